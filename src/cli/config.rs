//! Turn raw flags into a validated [`PruneConfig`]. Every message names the
//! option at fault.

use super::args::{MethodArg, PruneArgs, ScopeArg};
use crate::evaluate::EvalOptions;
use crate::pipeline::{Calibration, PruneConfig, Ridge};
use crate::select::Selection;
use crate::solve::{L0Params, Method, Pattern, Scope};
use crate::textcal::TextSource;

/// α for layers that have no held-out rows to choose one with.
pub const DEFAULT_RIDGE: f64 = 0.01;

/// Parse `N:M`.
pub fn parse_pattern(s: &str) -> Result<(usize, usize), String> {
    let bad =
        || format!("--pattern '{s}' is not of the form N:M with integers 0 < N <= M (e.g. 2:4)");
    let (n, m) = s.split_once(':').ok_or_else(bad)?;
    let (n, m): (usize, usize) =
        (n.trim().parse().map_err(|_| bad())?, m.trim().parse().map_err(|_| bad())?);
    if n == 0 || m == 0 || n > m {
        return Err(bad());
    }
    Ok((n, m))
}

/// Resolve `--threads 0` to the machine's cores.
pub fn resolve_threads(n: usize) -> usize {
    if n > 0 {
        n
    } else {
        std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
    }
}

/// Validate `args`.
pub fn prune_config(args: &PruneArgs) -> Result<PruneConfig, String> {
    let pattern = match (&args.pattern, args.sparsity) {
        (Some(p), None) => {
            let (n, m) = parse_pattern(p)?;
            Pattern::NofM { n, m }
        }
        (None, Some(s)) => {
            if !(0.0..1.0).contains(&s) {
                return Err(format!("--sparsity {s} is outside [0, 1)"));
            }
            let scope = match args.scope {
                ScopeArg::Row => Scope::Row,
                ScopeArg::Layer => Scope::Layer,
            };
            Pattern::Unstructured { sparsity: s, scope }
        }
        _ => return Err("give exactly one of --sparsity and --pattern".into()),
    };
    let ridge = match args.ridge.as_deref().map(str::trim) {
        None => Ridge::Auto { fallback: Some(DEFAULT_RIDGE) },
        Some("auto") => Ridge::Auto { fallback: None },
        Some(s) => match s.parse::<f64>() {
            Ok(a) if a.is_finite() && a >= 0.0 => Ridge::Fixed(a),
            _ => return Err(format!("--ridge '{s}' must be a number >= 0 or 'auto'")),
        },
    };
    if !(0.0..1.0).contains(&args.holdout) {
        return Err(format!("--holdout {} is outside [0, 1)", args.holdout));
    }
    if let Some(t) = args.layer_seconds {
        if !(t.is_finite() && t > 0.0) {
            return Err(format!("--layer-seconds {t} must be a positive number"));
        }
    }
    let method = match args.method {
        MethodArg::Magnitude => Method::Magnitude,
        MethodArg::Scaled => Method::Scaled,
        MethodArg::Obs => Method::Obs,
        MethodArg::L0 => Method::L0,
    };
    let mut l0 = L0Params::default();
    if let Some(n) = args.max_sweeps {
        l0.max_sweeps = n;
    }
    if args.layer_seconds.is_some() {
        l0.max_seconds = args.layer_seconds;
    }
    for (flag, v) in [("--samples", args.samples), ("--seq-len", args.seq_len)] {
        if v == Some(0) {
            return Err(format!("{flag} must be at least 1"));
        }
    }
    if args.text.is_none() {
        let text_only = [
            ("--samples", args.samples.is_some()),
            ("--seq-len", args.seq_len.is_some()),
            ("--seed", args.seed.is_some()),
            ("--no-propagate", args.no_propagate),
        ];
        if let Some((flag, _)) = text_only.iter().find(|f| f.1) {
            return Err(format!("{flag} applies to text calibration only: add --text FILE"));
        }
    }
    let calibration = match (&args.activations, &args.text) {
        (Some(a), None) => Calibration::Activations(a.clone()),
        (None, Some(t)) => Calibration::Text(TextSource {
            path: t.clone(),
            samples: args.samples,
            seq_len: args.seq_len,
            seed: args.seed.unwrap_or(0),
            propagate: !args.no_propagate,
        }),
        _ => return Err("give exactly one of --activations and --text".into()),
    };
    let eval = args.eval_text.as_ref().map(|t| EvalOptions {
        text: t.clone(),
        samples: None,
        seq_len: args.seq_len,
    });
    Ok(PruneConfig {
        model: args.model.clone(),
        calibration,
        eval,
        output: args.output.clone(),
        report: args.report.clone(),
        trace: args.trace.clone(),
        method,
        pattern,
        ridge,
        holdout: args.holdout,
        selection: Selection { only: args.only.clone(), skip: args.skip.clone() },
        threads: resolve_threads(args.threads),
        l0,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn patterns() {
        assert_eq!(parse_pattern("2:4"), Ok((2, 4)));
        assert_eq!(parse_pattern(" 1 : 8 "), Ok((1, 8)));
        for bad in ["2", "4:2", "0:4", "a:b", "2:0", "2:4:8"] {
            let e = parse_pattern(bad).unwrap_err();
            assert!(e.contains("--pattern"), "{bad}: {e}");
        }
    }
}
