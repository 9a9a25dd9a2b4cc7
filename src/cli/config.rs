//! Raw flags → validated configs. One validator per flag group
//! ([`job_config`] for what prune and compare share), so every command
//! checks a flag the same way; every message names the option at fault.

use super::args::{CompareArgs, JobArgs, PruneArgs, SelectionArgs, SpreadArgs};
use crate::compare::{data, CompareConfig};
use crate::driver::allocate::{Spread, SpreadConfig};
use crate::driver::{Amount, CutSpec, JobConfig, PruneConfig, Target};
use crate::error::{Error, Result};
use crate::evaluate::EvalOptions;
use crate::select::Selection;
use crate::solve::{L0Params, Pattern};
use crate::source::{Calibration, TextSource};

/// Resolve `--threads`: 0 means every CPU; more than the CPUs this process
/// may use is capped at that count, with a note on stderr (more threads
/// than cores only make a compute-bound run slower).
pub fn resolve_threads(n: usize) -> usize {
    let cpus = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let (threads, note) = cap_threads(n, cpus);
    if let Some(note) = note {
        eprintln!("lopper: note: {note}");
    }
    threads
}

/// `--threads n` on a machine with `cpus` CPUs: the count to use, and a
/// note when it was capped.
fn cap_threads(n: usize, cpus: usize) -> (usize, Option<String>) {
    match n {
        0 => (cpus, None),
        n if n > cpus => {
            (cpus, Some(format!("--threads {n} is more than the {cpus} CPUs here; using {cpus}")))
        }
        n => (n, None),
    }
}

/// `--only` / `--skip`.
pub fn selection(a: &SelectionArgs) -> Selection {
    Selection { only: a.only.clone(), skip: a.skip.clone() }
}

/// `--samples` / `--seq-len`: at least 1 when given.
pub fn check_counts(samples: Option<usize>, seq_len: Option<usize>) -> Result<()> {
    for (flag, v) in [("--samples", samples), ("--seq-len", seq_len)] {
        if v == Some(0) {
            return Err(Error::usage(format!("{flag} must be at least 1")));
        }
    }
    Ok(())
}

/// A `--focus` value as a target key, if it is one of `keys`.
pub fn focus_key(f: &str, keys: &[String]) -> Result<String> {
    let key = f.parse::<Pattern>().map(|p| p.to_string()).unwrap_or_default();
    if keys.contains(&key) {
        Ok(key)
    } else {
        Err(Error::usage(format!("--focus {f} is not one of the targets ({})", keys.join(", "))))
    }
}

/// What prune and compare share: calibration, solver settings, selection,
/// threads.
fn job_config(model: &std::path::Path, job: &JobArgs) -> Result<JobConfig> {
    let (c, s) = (&job.calibration, &job.solver);
    let ridge = super::args::parse_ridge(s.ridge.as_deref()).map_err(Error::usage)?;
    if !(0.0..1.0).contains(&c.holdout) {
        return Err(Error::usage(format!("--holdout {} is outside [0, 1)", c.holdout)));
    }
    let mut l0 = L0Params::default();
    if let Some(n) = s.max_sweeps {
        l0.max_sweeps = n;
    }
    if let Some(t) = s.layer_seconds {
        if !(t.is_finite() && t > 0.0) {
            return Err(Error::usage(format!("--layer-seconds {t} must be a positive number")));
        }
        l0.max_seconds = Some(t);
    }
    check_counts(c.samples, c.seq_len)?;
    if c.text.is_none() {
        let text_only = [
            ("--samples", c.samples.is_some()),
            ("--seq-len", c.seq_len.is_some()),
            ("--seed", c.seed.is_some()),
            ("--no-propagate", c.no_propagate),
        ];
        if let Some((flag, _)) = text_only.iter().find(|f| f.1) {
            return Err(Error::usage(format!(
                "{flag} applies to text calibration only: add --text FILE"
            )));
        }
    }
    let calibration = match (&c.activations, &c.text) {
        (Some(a), None) => Calibration::Activations(a.clone()),
        (None, Some(t)) => Calibration::Text(TextSource {
            path: t.clone(),
            samples: c.samples,
            seq_len: c.seq_len,
            seed: c.seed.unwrap_or(0),
            propagate: !c.no_propagate,
            by_block: true,
        }),
        _ => return Err(Error::usage("give exactly one of --activations and --text")),
    };
    let eval = c.eval_text.as_ref().map(|t| EvalOptions {
        text: t.clone(),
        samples: None,
        seq_len: c.seq_len,
    });
    Ok(JobConfig {
        model: model.to_path_buf(),
        calibration,
        ridge,
        holdout: c.holdout,
        selection: selection(&job.selection),
        threads: resolve_threads(job.run.threads),
        l0,
        trace: false,
        certify: None,
        eval,
    })
}

/// Validate `lopper prune`.
pub fn prune_config(a: &PruneArgs) -> Result<PruneConfig> {
    let amount = |flag: &str, v: &Option<String>| -> Result<Option<Amount>> {
        v.as_deref()
            .map(|t| t.parse::<Amount>().map_err(|e| Error::usage(format!("{flag} {e}"))))
            .transpose()
    };
    let neurons = amount("--remove-neurons", &a.remove_neurons)?;
    let heads = amount("--remove-heads", &a.remove_heads)?;
    let cut = (neurons.is_some() || heads.is_some()).then_some(CutSpec {
        neurons,
        heads,
        refit: a.refit,
    });
    if a.refit && cut.is_none() {
        return Err(Error::usage("--refit applies to --remove-neurons / --remove-heads"));
    }
    let pattern = match (&a.pattern, a.sparsity) {
        (Some(p), None) => {
            Pattern::parse_n_of_m(p).map_err(|e| Error::usage(format!("--pattern {e}")))?
        }
        (None, Some(s)) => Pattern::unstructured(s, a.job.solver.scope)
            .map_err(|e| Error::usage(format!("--sparsity {e}")))?,
        // A cut alone: nothing is pruned in what remains.
        (None, None) if cut.is_some() => {
            Pattern::unstructured(0.0, a.job.solver.scope).expect("0 is a valid sparsity")
        }
        _ => return Err(Error::usage("give exactly one of --sparsity and --pattern")),
    };
    if cut.is_some() && !a.model.is_dir() {
        return Err(Error::usage(format!(
            "{}: structured pruning writes a new config.json; give MODEL as the model directory",
            a.model.display()
        )));
    }
    let mut job = job_config(&a.model, &a.job)?;
    job.trace = a.trace.is_some();
    job.certify = a.certify.then(crate::solve::certify::CertifyParams::default);
    if let Calibration::Text(t) = &mut job.calibration {
        t.by_block = !a.whole_model;
    }
    let spread = spread_config(&a.spread, pattern, cut.is_some())?;
    Ok(PruneConfig {
        whole_model: a.whole_model,
        job,
        spread,
        target: Target { method: a.method, pattern, cut, per_layer: None },
        output: a.output.clone(),
        report: a.report.clone(),
        trace: a.trace.clone(),
    })
}

/// Validate the per-layer spread of an overall target.
fn spread_config(a: &SpreadArgs, pattern: Pattern, cut: bool) -> Result<Option<SpreadConfig>> {
    for (flag, v) in [("--layer-max", a.layer_max), ("--layer-min", a.layer_min)] {
        if !(0.0..1.0).contains(&v) {
            return Err(Error::usage(format!("{flag} {v} is outside [0, 1)")));
        }
    }
    if a.spread == Spread::Uniform {
        return Ok(None);
    }
    let Some(s) = pattern.sparsity() else {
        return Err(Error::usage(format!("--spread {} needs --sparsity, not --pattern", a.spread)));
    };
    if cut {
        return Err(Error::usage(format!(
            "--spread {} does not combine with --remove-neurons / --remove-heads",
            a.spread
        )));
    }
    if !(a.layer_min..=a.layer_max).contains(&s) {
        return Err(Error::usage(format!(
            "--sparsity {s} must lie within --layer-min {} and --layer-max {}",
            a.layer_min, a.layer_max
        )));
    }
    Ok(Some(SpreadConfig { spread: a.spread, cap: a.layer_max, floor: a.layer_min }))
}

/// Validate `lopper compare`.
pub fn compare_config(a: &CompareArgs) -> Result<CompareConfig> {
    let mut sparsities = a.sparsities.clone();
    if sparsities.is_empty() && a.patterns.is_empty() {
        sparsities = vec![0.5, 0.7, 0.9];
    }
    let mut targets = Vec::new();
    let mut push = |p: Pattern, flag: &str| {
        if targets.contains(&p) {
            return Err(Error::usage(format!("{flag} lists {p} twice")));
        }
        targets.push(p);
        Ok(())
    };
    for &s in &sparsities {
        let p = Pattern::unstructured(s, a.job.solver.scope)
            .map_err(|e| Error::usage(format!("--sparsities: {e}")))?;
        push(p, "--sparsities")?;
    }
    for p in &a.patterns {
        let p = Pattern::parse_n_of_m(p).map_err(|e| Error::usage(format!("--patterns {e}")))?;
        push(p, "--patterns")?;
    }
    let mut methods = Vec::new();
    for &m in &a.methods {
        if methods.contains(&m) {
            return Err(Error::usage(format!("--methods lists {m} twice")));
        }
        methods.push(m);
    }
    let focus = match &a.focus {
        None => None,
        Some(f) => {
            let keys: Vec<String> = targets.iter().map(|p| data::target_key(*p)).collect();
            Some(focus_key(f, &keys)?)
        }
    };
    if a.speed_batch.is_some() && !a.keep_models {
        return Err(Error::usage("--speed-batch times the pruned models: add --keep-models"));
    }
    if a.time_whole && !a.keep_models {
        return Err(Error::usage("--time-whole times the pruned models: add --keep-models"));
    }
    if a.speed_batch == Some(0) {
        return Err(Error::usage("--speed-batch must be at least 1"));
    }
    let job = job_config(&a.model, &a.job)?;
    Ok(CompareConfig {
        job,
        methods,
        targets,
        out_dir: a.out_dir.clone(),
        keep_models: a.keep_models,
        speed_batch: a.speed_batch,
        time_whole: a.time_whole,
        focus,
        globs: (a.job.selection.only.clone(), a.job.selection.skip.clone()),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn threads_are_capped_at_the_cpus() {
        assert_eq!(cap_threads(0, 8), (8, None));
        assert_eq!(cap_threads(3, 8), (3, None));
        assert_eq!(cap_threads(8, 8), (8, None));
        let (t, note) = cap_threads(10_000, 2);
        assert_eq!(t, 2);
        assert_eq!(note.unwrap(), "--threads 10000 is more than the 2 CPUs here; using 2");
    }

    #[test]
    fn focus_takes_either_kind_of_key() {
        let keys = vec!["0.7".to_string(), "2:4".to_string()];
        assert_eq!(focus_key("0.70", &keys).unwrap(), "0.7");
        assert_eq!(focus_key(" 2:4", &keys).unwrap(), "2:4");
        let e = focus_key("0.5", &keys).unwrap_err();
        assert_eq!(e.to_string(), "--focus 0.5 is not one of the targets (0.7, 2:4)");
        assert_eq!(e.exit_code(), 2);
    }
}
