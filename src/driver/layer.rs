//! One layer's step: choose the ridge, solve, measure the calibration and
//! held-out error, and count what the stored dtype keeps.

use super::{JobConfig, Target};
use crate::calib::LayerGrams;
use crate::error::{Error, ErrorKind, Result};
use crate::io;
use crate::report::{Certified, LayerReport};
use crate::solve::certify::CertifyParams;
use crate::solve::{self, objective, L0Params, Method, SolveParams};
use crate::source::Planned;
use faer::{Mat, MatRef, Par};
use std::fmt;
use std::str::FromStr;
use std::time::Instant;

/// The ridge α values tried by `--ridge auto`.
pub const AUTO_RIDGE_GRID: &[f64] = &[0.01, 0.03, 0.1, 0.3, 1.0];

/// α for layers that have no held-out rows to choose one with.
pub const DEFAULT_RIDGE: f64 = 0.01;

/// How the ridge strength is chosen.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Ridge {
    /// A fixed α for every layer.
    Fixed(f64),
    /// Per layer, the α of [`AUTO_RIDGE_GRID`] with the lowest held-out
    /// error. A layer without held-out rows uses `fallback`, or is an input
    /// error when there is none (the user asked for `auto` explicitly).
    Auto {
        /// α for layers without held-out rows.
        fallback: Option<f64>,
    },
}

impl Default for Ridge {
    /// `auto`, falling back to [`DEFAULT_RIDGE`] without held-out rows.
    fn default() -> Self {
        Ridge::Auto { fallback: Some(DEFAULT_RIDGE) }
    }
}

impl FromStr for Ridge {
    type Err = String;

    /// `auto` (explicit: held-out rows are required) or a number α ≥ 0.
    fn from_str(s: &str) -> Result<Self, String> {
        match s.trim() {
            "auto" => Ok(Ridge::Auto { fallback: None }),
            t => match t.parse::<f64>() {
                Ok(a) if a.is_finite() && a >= 0.0 => Ok(Ridge::Fixed(a)),
                _ => Err(format!("'{t}' must be a number >= 0 or 'auto'")),
            },
        }
    }
}

impl fmt::Display for Ridge {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Ridge::Fixed(a) => write!(f, "{a}"),
            Ridge::Auto { .. } => f.write_str("auto"),
        }
    }
}

impl Ridge {
    /// The report's JSON form: the number, or `"auto"`.
    pub fn to_json(self) -> serde_json::Value {
        match self {
            Ridge::Fixed(a) => serde_json::json!(a),
            Ridge::Auto { .. } => serde_json::json!("auto"),
        }
    }
}

/// Result of pruning one layer.
#[derive(Clone, Debug)]
pub struct Solved {
    /// Pruned weight, row-major `[d_out, d_in]`.
    pub values: Vec<f64>,
    /// The layer's report row (`seconds` covers the solve only).
    pub report: LayerReport,
    /// Local-search objective after each sweep (when tracing).
    pub trace: Vec<f64>,
}

/// `a` as the user would write it: plain for ordinary values, in
/// scientific notation when very large or small.
fn short(a: f64) -> String {
    if a != 0.0 && !(1e-4..1e6).contains(&a.abs()) {
        format!("{a:e}")
    } else {
        format!("{a}")
    }
}

/// Nonzeros of `values` once stored as `dtype` (a tiny kept weight can round
/// to zero in F16/BF16, and the report counts what the file holds).
fn stored_nonzeros(values: &[f64], dtype: io::Dtype) -> Result<usize, String> {
    let mut bytes = Vec::new();
    io::dtype::encode_f64(dtype, values, &mut bytes).map_err(|e| e.to_string())?;
    let zeros = io::dtype::count_zeros(dtype, &bytes).unwrap_or(0);
    Ok(values.len() - zeros)
}

/// Prune `layer`, whose dense weight is `w`, from its calibration
/// statistics: choose the ridge as `cfg` says, solve for `target`, and
/// measure calibration and held-out error.
///
/// # Errors
/// [`ErrorKind::Solve`] when the solver fails or the result cannot be stored
/// in the layer's dtype.
pub fn solve_layer(
    cfg: &JobConfig,
    target: Target,
    layer: &Planned,
    w: MatRef<'_, f64>,
    grams: &LayerGrams,
    par: Par,
) -> Result<Solved> {
    let t0 = Instant::now();
    let name = layer.name.as_str();
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let h = grams.calib.matrix();
    let held = (grams.holdout.rows() > 0).then(|| grams.holdout.matrix());
    let base = SolveParams {
        method: target.method,
        pattern: target.pattern,
        ridge_alpha: DEFAULT_RIDGE,
        obs_block: 128,
        l0: L0Params { trace: cfg.trace, ..cfg.l0.clone() },
    };
    // Statistics that overflowed (activations beyond about 1e154) or hold
    // NaN cannot be solved on: the input's fault, named.
    for (what, m) in [("calibration", Some(h)), ("held-out", held)] {
        let Some(m) = m else { continue };
        let finite = (0..m.ncols()).all(|c| (0..m.nrows()).all(|r| m[(r, c)].is_finite()));
        if !finite {
            return Err(Error::input(format!(
                "layer '{}' [{d_out}, {d_in}]: the Gram matrix XᵀX of its {what} inputs is not \
                 finite (inputs too large, above about 1e154, or not numbers); rescale or check \
                 the calibration inputs",
                crate::io::escape(name)
            ))
            .with_layer(name));
        }
    }
    let solve_err = |e: solve::SolveError| {
        let fixed = match cfg.ridge {
            Ridge::Fixed(a) => Some(a),
            Ridge::Auto { .. } => None,
        };
        match (&e, fixed) {
            // With the user's own α the failure is the option's to fix.
            (solve::SolveError::NotPositiveDefinite { .. }, Some(a)) => {
                let why = if a == 0.0 {
                    " (with --ridge 0 the layer's calibration inputs must be linearly \
                     independent; these are not, so the least-squares problem has no unique \
                     solution: use --ridge > 0, e.g. --ridge 0.01)"
                } else {
                    ""
                };
                Error::solve(name, [d_out, d_in], e)
                    .context(format!("--ridge {}", short(a)))
                    .with_kind(ErrorKind::Usage)
                    .append(why)
            }
            _ => Error::solve(name, [d_out, d_in], e),
        }
    };
    if let Ridge::Fixed(a) = cfg.ridge {
        let lambda = solve::ridge_lambda(h, a);
        if !lambda.is_finite() {
            let mean = (0..d_in).map(|j| h[(j, j)]).sum::<f64>() / d_in.max(1) as f64;
            return Err(Error::usage(format!(
                "--ridge {}: λ = α · mean(diag(XᵀX)) = {a:e} · {mean:.3e} overflows for layer \
                 '{}' [{d_out}, {d_in}]; use a smaller --ridge",
                short(a),
                crate::io::escape(name)
            ))
            .with_layer(name));
        }
    }
    let alpha = match cfg.ridge {
        Ridge::Fixed(a) => a,
        // The ridge does not change score-only methods: nothing to choose.
        Ridge::Auto { .. } if matches!(target.method, Method::Magnitude | Method::Scaled) => {
            DEFAULT_RIDGE
        }
        Ridge::Auto { fallback } if held.is_none() => {
            fallback.expect("planned: explicit auto ridge has held-out rows")
        }
        Ridge::Auto { .. } => {
            let held = held.expect("checked above");
            let mut best = (f64::INFINITY, AUTO_RIDGE_GRID[0]);
            // The local search is scored through the OBS sweep, a one-shot
            // proxy that picks nearly the same α at a fraction of the cost
            // (see docs/methods.md for the measurement).
            let proxy = if target.method == Method::L0 { Method::Obs } else { target.method };
            for &a in AUTO_RIDGE_GRID {
                let p = SolveParams { ridge_alpha: a, method: proxy, ..base.clone() };
                let trial = solve::prune_layer(w, h, &p, par).map_err(solve_err)?;
                let e = objective::relative_error(w, trial.weight.as_ref(), held, par);
                if e < best.0 {
                    best = (e, a);
                }
            }
            best.1
        }
    };
    let params = SolveParams { ridge_alpha: alpha, ..base };
    let pruned = solve::prune_layer(w, h, &params, par).map_err(solve_err)?;
    let seconds = t0.elapsed().as_secs_f64();
    let certificate = cfg.certify.as_ref().map(|p| certify(w, h, &pruned, target.pattern, p, par));
    let what = pruned.weight;
    let rel_error = objective::relative_error(w, what.as_ref(), h, par);
    let rel_error_holdout = held.map(|hh| objective::relative_error(w, what.as_ref(), hh, par));
    if rel_error.is_nan() {
        eprintln!(
            "lopper: note: layer '{}': its dense outputs on the calibration rows are all zero \
             (zero inputs or weights), so its relative error is undefined (null in the report)",
            crate::io::escape(name)
        );
    }
    let mut values = Vec::with_capacity(d_out * d_in);
    for r in 0..d_out {
        for c in 0..d_in {
            values.push(what[(r, c)]);
        }
    }
    let kept = stored(layer, &values)?;
    let total = d_out * d_in;
    let si = pruned.info;
    let report = LayerReport {
        name: name.to_string(),
        shape: [d_out, d_in],
        kept,
        total,
        sparsity: 1.0 - kept as f64 / total as f64,
        rel_error,
        rel_error_holdout,
        seconds,
        rel_error_stored: None,
        rel_error_holdout_stored: None,
        calibration_rows: grams.calib.rows(),
        holdout_rows: grams.holdout.rows(),
        ridge_alpha: alpha,
        ridge_lambda: si.lambda,
        objective_initial: si.objective_initial,
        objective_final: si.objective_final,
        sweeps: si.sweeps,
        swaps: si.swaps,
        init: si.init.map(str::to_string),
        certificate,
    };
    Ok(Solved { values, report, trace: si.trace })
}

/// The layer's certificate: a proven lower bound on the best objective of
/// `pattern` for `A = H + λI`, warm-started from the solver's weights, and
/// the gap of the solver's `objective_final` to it.
fn certify(
    w: MatRef<'_, f64>,
    h: MatRef<'_, f64>,
    pruned: &solve::Pruned,
    pattern: solve::Pattern,
    params: &CertifyParams,
    par: Par,
) -> Certified {
    let t0 = Instant::now();
    let lambda = pruned.info.lambda;
    let a = solve::regularised(h, lambda);
    let c = solve::certify::certify(
        w,
        a.as_ref(),
        lambda,
        pruned.weight.as_ref(),
        pattern,
        params,
        par,
    );
    let f = pruned.info.objective_final;
    Certified {
        lower_bound: c.lower_bound,
        certified_gap: if f > 0.0 { ((f - c.lower_bound) / f).max(0.0) } else { 0.0 },
        rows_proven_optimal: c.rows_optimal.map(|k| k as f64 / c.rows.max(1) as f64),
        bound_seconds: t0.elapsed().as_secs_f64(),
    }
}

/// How a structured cut of the layer's block narrows its problem.
#[derive(Clone, Debug)]
pub enum Narrow<'a> {
    /// A producer: only these output rows remain (the others are deleted
    /// with their units).
    Rows(Vec<usize>),
    /// The consumer: only these input columns remain, starting from its
    /// refit on them (`start`, `[d_out, d_in]` at full width).
    Cols {
        /// Kept input columns, ascending.
        cols: Vec<usize>,
        /// The consumer refit on `cols`.
        start: MatRef<'a, f64>,
        /// Ridge α the cut used.
        alpha: f64,
    },
}

/// Whether `target` prunes nothing beyond a structured cut.
pub(crate) fn cut_only(target: &Target) -> bool {
    target.cut.is_some()
        && matches!(target.pattern, solve::Pattern::Unstructured { sparsity, .. } if sparsity == 0.0)
}

/// [`solve_layer`] on what a structured cut leaves of the layer. Returns
/// `None` for a layer the run leaves as it is (a cut-only run and a layer
/// the cut does not touch, or only deletes rows of).
///
/// The result has the layer's full shape: a producer's deleted rows keep
/// their dense values and a consumer's deleted columns are zero, so the
/// block computes what the smaller model will. The report row describes
/// the smaller layer (its shape and counts); a consumer's errors are
/// measured against its dense weight on all columns.
///
/// # Errors
/// As [`solve_layer`].
pub fn solve_narrowed(
    cfg: &JobConfig,
    target: Target,
    layer: &Planned,
    w: MatRef<'_, f64>,
    grams: &LayerGrams,
    narrow: Option<&Narrow<'_>>,
    par: Par,
) -> Result<Option<Solved>> {
    let only_cut = cut_only(&target);
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let sub = |shape: [usize; 2]| Planned { shape, ..layer.clone() };
    match narrow {
        None if only_cut => Ok(None),
        None => solve_layer(cfg, target, layer, w, grams, par).map(Some),
        Some(Narrow::Rows(_)) if only_cut => Ok(None),
        Some(Narrow::Rows(rows)) => {
            let ws = Mat::from_fn(rows.len(), d_in, |r, c| w[(rows[r], c)]);
            let mut s =
                solve_layer(cfg, target, &sub([rows.len(), d_in]), ws.as_ref(), grams, par)?;
            let mut full: Vec<f64> = (0..d_out * d_in).map(|k| w[(k / d_in, k % d_in)]).collect();
            for (i, &r) in rows.iter().enumerate() {
                full[r * d_in..(r + 1) * d_in].copy_from_slice(&s.values[i * d_in..(i + 1) * d_in]);
            }
            s.values = full;
            Ok(Some(s))
        }
        Some(Narrow::Cols { cols, start, alpha }) => {
            let t0 = Instant::now();
            let k = cols.len();
            let ws = Mat::from_fn(d_out, k, |r, c| start[(r, cols[c])]);
            let gs = grams.restricted(cols);
            let mut s = if only_cut {
                as_is(&sub([d_out, k]), ws.as_ref(), &gs, *alpha)?
            } else {
                solve_layer(cfg, target, &sub([d_out, k]), ws.as_ref(), &gs, par)?
            };
            let mut full = vec![0.0; d_out * d_in];
            for r in 0..d_out {
                for (c, &col) in cols.iter().enumerate() {
                    full[r * d_in + col] = s.values[r * k + c];
                }
            }
            let what = MatRef::from_row_major_slice(&full, d_out, d_in);
            let h = grams.calib.matrix();
            s.report.rel_error = objective::relative_error(w, what, h, par);
            s.report.rel_error_holdout = (grams.holdout.rows() > 0)
                .then(|| objective::relative_error(w, what, grams.holdout.matrix(), par));
            s.report.seconds = t0.elapsed().as_secs_f64();
            s.values = full;
            Ok(Some(s))
        }
    }
}

/// The report of a layer kept as `w` (a consumer whose cut is all the run
/// does to it).
fn as_is(layer: &Planned, w: MatRef<'_, f64>, grams: &LayerGrams, alpha: f64) -> Result<Solved> {
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let values: Vec<f64> = (0..d_out * d_in).map(|k| w[(k / d_in, k % d_in)]).collect();
    let kept = stored(layer, &values)?;
    let h = grams.calib.matrix();
    let lambda = solve::ridge_lambda(h, alpha);
    let report = LayerReport {
        name: layer.name.clone(),
        shape: [d_out, d_in],
        kept,
        total: d_out * d_in,
        sparsity: 1.0 - kept as f64 / (d_out * d_in).max(1) as f64,
        rel_error: 0.0,
        rel_error_holdout: None,
        rel_error_stored: None,
        rel_error_holdout_stored: None,
        seconds: 0.0,
        calibration_rows: grams.calib.rows(),
        holdout_rows: grams.holdout.rows(),
        ridge_alpha: alpha,
        ridge_lambda: lambda,
        objective_initial: 0.0,
        objective_final: 0.0,
        sweeps: 0,
        swaps: 0,
        init: Some("cut+refit".to_string()),
        certificate: None,
    };
    Ok(Solved { values, report, trace: Vec::new() })
}

/// Set the errors of `s` (values `[d_out, d_in]` at `w`'s full shape) after
/// rounding its values to `dtype`, the weights the written model holds:
/// `‖X(W − round(Ŵ))ᵀ‖²_F / ‖XWᵀ‖²_F` on the calibration and held-out
/// Gram matrices.
pub(crate) fn stored_errors(
    s: &mut Solved,
    dtype: io::Dtype,
    w: MatRef<'_, f64>,
    grams: &LayerGrams,
    par: Par,
) {
    let mut bytes = Vec::new();
    if io::dtype::encode_f64(dtype, &s.values, &mut bytes).is_err() {
        return;
    }
    let mut rounded = Vec::with_capacity(s.values.len());
    if !io::dtype::decode_f64(dtype, &bytes, &mut rounded) {
        return;
    }
    drop(bytes);
    let what = MatRef::from_row_major_slice(&rounded, w.nrows(), w.ncols());
    s.report.rel_error_stored = Some(objective::relative_error(w, what, grams.calib.matrix(), par));
    s.report.rel_error_holdout_stored = (grams.holdout.rows() > 0)
        .then(|| objective::relative_error(w, what, grams.holdout.matrix(), par));
}

/// Nonzeros of `values` as stored in `layer`'s dtype, or the error that
/// says they cannot be stored.
fn stored(layer: &Planned, values: &[f64]) -> Result<usize> {
    let (name, dtype) = (layer.name.as_str(), layer.dtype);
    stored_nonzeros(values, dtype).map_err(|e| {
        Error::new(
            ErrorKind::Solve,
            format!(
                "layer '{name}': pruned weights cannot be stored as {dtype:?}: {e} (raise --ridge \
                 to damp the refit, or leave the layer dense with --skip)"
            ),
        )
        .with_layer(name)
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ridge_parses_and_prints_the_same_way() {
        assert_eq!("auto".parse::<Ridge>(), Ok(Ridge::Auto { fallback: None }));
        assert_eq!(" 0.1 ".parse::<Ridge>(), Ok(Ridge::Fixed(0.1)));
        for bad in ["-1", "nan", "inf", "x"] {
            assert!(bad.parse::<Ridge>().is_err(), "{bad}");
        }
        assert_eq!(Ridge::Fixed(0.03).to_string(), "0.03");
        assert_eq!(Ridge::default().to_string(), "auto");
        assert_eq!(Ridge::Fixed(0.5).to_json(), serde_json::json!(0.5));
    }
}
