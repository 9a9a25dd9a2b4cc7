//! One block's structured step: choose which FFN neurons and attention
//! heads the block keeps, and refit the layer that reads them.
//!
//! For each [`Units`] of a block with a cut requested, the consumer's input
//! columns are grouped by unit and the group problem of
//! [`crate::solve::group`] picks the kept units from the consumer's Gram
//! matrix:
//!
//! ```text
//! minimise over S (|S| = kept units) and Ŵ (zero outside S's columns):
//!     Σ_rows (w − ŵ)ᵀ A (w − ŵ),    A = H + λI
//! ```
//!
//! and the consumer is refit on the kept columns. Every block removes the
//! same number of units, so the written model has a standard config.
//!
//! **Mean shift.** When the consumer has a bias and is refit, the bias also
//! absorbs the mean of the output change: with `D = W − Ŵ` and `μ` the mean
//! of the fitted inputs, `Σ_i ‖D z_i − c‖²` is least at `c = D μ`, so the new
//! bias is `b + D μ` and what remains is `tr(D C Dᵀ)` with the scatter
//! matrix `C = Σ_i (z_i − μ)(z_i − μ)ᵀ = H − n μ μᵀ`. The group problem is
//! then solved on `C` in place of `H` (common practice for structured
//! pruning: removed units rarely have zero mean output — GELU and SiLU
//! outputs do not).

use super::{Ridge, AUTO_RIDGE_GRID, DEFAULT_RIDGE};
use crate::arch::units::{UnitKind, Units};
use crate::calib::LayerGrams;
use crate::error::{Error, Result};
use crate::report::UnitsReport;
use crate::solve::group::{self, GroupMethod, GroupParams};
use crate::solve::{objective, Method};
use faer::{Mat, MatRef, Par};
use std::fmt;
use std::str::FromStr;
use std::time::Instant;

/// How many units to remove: a fraction of them or a count.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Amount {
    /// A fraction in `[0, 1)`, rounded to the nearest count.
    Fraction(f64),
    /// An exact count.
    Count(usize),
}

impl FromStr for Amount {
    type Err = String;

    /// An integer is a count (`256`); a number with a point is a fraction
    /// (`0.25`).
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        let t = s.trim();
        if let Ok(n) = t.parse::<usize>() {
            return Ok(Amount::Count(n));
        }
        match t.parse::<f64>() {
            Ok(f) if (0.0..1.0).contains(&f) => Ok(Amount::Fraction(f)),
            _ => Err(format!(
                "'{t}' must be a fraction in [0, 1) such as 0.25, or a count such as 256"
            )),
        }
    }
}

impl fmt::Display for Amount {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Amount::Fraction(x) => write!(f, "{x}"),
            Amount::Count(n) => write!(f, "{n}"),
        }
    }
}

impl Amount {
    /// Units removed out of `count`.
    pub fn removed(self, count: usize) -> usize {
        match self {
            Amount::Fraction(f) => (f * count as f64).round() as usize,
            Amount::Count(n) => n,
        }
    }
}

/// What a run removes from every block.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CutSpec {
    /// FFN neurons to remove per block.
    pub neurons: Option<Amount>,
    /// Attention heads (key/value heads with their query heads) to remove
    /// per block.
    pub heads: Option<Amount>,
    /// Score-only methods (`magnitude`, `scaled`): refit the consumer on the
    /// kept units instead of only deleting the others.
    pub refit: bool,
}

impl CutSpec {
    /// The amount asked for units of `kind`.
    pub fn amount(&self, kind: UnitKind) -> Option<Amount> {
        match kind {
            UnitKind::Neuron => self.neurons,
            UnitKind::Head => self.heads,
        }
    }

    /// The option that asks for `kind`, for messages.
    pub fn flag(kind: UnitKind) -> &'static str {
        match kind {
            UnitKind::Neuron => "--remove-neurons",
            UnitKind::Head => "--remove-heads",
        }
    }
}

/// How the consumer's bias absorbs the mean of the output change.
#[derive(Clone, Debug)]
pub struct MeanShift {
    /// The bias tensor.
    pub bias: String,
    /// Its dense values.
    pub dense: Vec<f64>,
    /// Mean of the consumer's fitted inputs.
    pub mu: Vec<f64>,
}

impl MeanShift {
    /// The bias for the dense weight `w` pruned to `what`: `b + (W − Ŵ) μ`.
    pub fn bias_for(&self, w: MatRef<'_, f64>, what: MatRef<'_, f64>) -> Vec<f64> {
        (0..w.nrows())
            .map(|r| {
                let shift: f64 =
                    (0..w.ncols()).map(|c| (w[(r, c)] - what[(r, c)]) * self.mu[c]).sum();
                self.dense[r] + shift
            })
            .collect()
    }
}

/// The kept units of one [`Units`] of one block, and the consumer refit on
/// them.
#[derive(Clone, Debug)]
pub struct UnitCut {
    /// Block index.
    pub block: usize,
    /// What was cut.
    pub units: Units,
    /// Kept unit indices, ascending.
    pub kept: Vec<usize>,
    /// The consumer after the cut, `[d_out, d_in]` at full width, zero
    /// outside the kept units' columns.
    pub weight: Mat<f64>,
    /// The consumer's bias absorbs the mean output change, if it has one
    /// and is refit.
    pub shift: Option<MeanShift>,
    /// Its report row.
    pub report: UnitsReport,
}

impl UnitCut {
    /// Entries kept along a slice of `per_unit` entries per unit.
    pub fn kept_entries(&self, per_unit: usize) -> Vec<usize> {
        self.kept.iter().flat_map(|&u| u * per_unit..(u + 1) * per_unit).collect()
    }

    /// The consumer's kept input columns.
    pub fn kept_columns(&self) -> Vec<usize> {
        self.kept_entries(self.units.width)
    }
}

/// The group method a layer method stands for: score-only methods score
/// units, `obs` removes units one by one with the exact group refit, `l0`
/// adds the swap local search.
fn group_method(method: Method) -> GroupMethod {
    match method {
        Method::Magnitude => GroupMethod::Magnitude,
        Method::Scaled => GroupMethod::Scaled,
        Method::Obs => GroupMethod::Greedy,
        Method::L0 => GroupMethod::Swap,
    }
}

/// Settings of a structured solve.
#[derive(Clone, Copy, Debug)]
pub struct CutParams {
    /// Ridge choice, as for layers.
    pub ridge: Ridge,
    /// Layer method, mapped to a group method.
    pub method: Method,
    /// Refit after score-only selection.
    pub refit: bool,
    /// Most swap rounds.
    pub max_rounds: usize,
    /// Most seconds of swap search.
    pub max_seconds: Option<f64>,
}

/// Remove `removed` of `units` (block `block`) from the consumer weight
/// `w`, whose input statistics are `grams`; `bias` is the consumer's dense
/// bias, if it has one.
///
/// # Errors
/// [`crate::ErrorKind::Solve`] when the solver fails.
#[allow(clippy::too_many_arguments)]
pub fn cut_units(
    block: usize,
    units: &Units,
    removed: usize,
    w: MatRef<'_, f64>,
    bias: Option<Vec<f64>>,
    grams: &LayerGrams,
    p: &CutParams,
    par: Par,
) -> Result<UnitCut> {
    let t0 = Instant::now();
    let keep = units.count - removed;
    let method = group_method(p.method);
    let score_only = matches!(method, GroupMethod::Magnitude | GroupMethod::Scaled) && !p.refit;
    let shift = match (bias, &units.consumer_bias) {
        (Some(dense), Some(name)) if !score_only => {
            Some(MeanShift { bias: name.clone(), dense, mu: grams.calib.means() })
        }
        _ => None,
    };
    // The solver's statistics: about the fitted rows' mean when the bias
    // absorbs it; errors are measured against the plain output energy.
    let stats = match &shift {
        Some(m) => grams.centered(&m.mu),
        None => grams.clone(),
    };
    let h = stats.calib.matrix();
    let held = (stats.holdout.rows() > 0).then(|| stats.holdout.matrix());
    let params = |alpha: f64, method: GroupMethod| GroupParams {
        method,
        refit: p.refit,
        ridge_alpha: alpha,
        max_rounds: p.max_rounds,
        max_seconds: p.max_seconds,
    };
    let name = units.consumer.as_str();
    let solve_err = |e| Error::solve(name, [w.nrows(), w.ncols()], e);
    let alpha = match p.ridge {
        Ridge::Fixed(a) => a,
        Ridge::Auto { .. } if score_only => DEFAULT_RIDGE,
        Ridge::Auto { fallback } if held.is_none() => {
            fallback.expect("planned: explicit auto ridge has held-out rows")
        }
        Ridge::Auto { .. } => {
            let held = held.expect("checked above");
            // As for layers, the search is scored through its one-shot start.
            let proxy = if method == GroupMethod::Swap { GroupMethod::Greedy } else { method };
            let mut best = (f64::INFINITY, AUTO_RIDGE_GRID[0]);
            for &a in AUTO_RIDGE_GRID {
                let trial = group::solve_groups(w, h, units.width, keep, &params(a, proxy), par)
                    .map_err(solve_err)?;
                let e = objective::relative_error_with(
                    w,
                    trial.weight.as_ref(),
                    held,
                    grams.holdout.matrix(),
                    par,
                );
                if e < best.0 {
                    best = (e, a);
                }
            }
            best.1
        }
    };
    let sol = group::solve_groups(w, h, units.width, keep, &params(alpha, method), par)
        .map_err(solve_err)?;
    let what = sol.weight.as_ref();
    let rel_error = objective::relative_error_with(w, what, h, grams.calib.matrix(), par);
    let rel_error_holdout =
        held.map(|hh| objective::relative_error_with(w, what, hh, grams.holdout.matrix(), par));
    let removed_units: Vec<usize> =
        (0..units.count).filter(|u| sol.kept.binary_search(u).is_err()).collect();
    let report = UnitsReport {
        block,
        kind: units.kind.plural().to_string(),
        consumer: units.consumer.clone(),
        before: units.count,
        after: keep,
        removed: removed_units,
        method: p.method.to_string(),
        refit: !score_only,
        rel_error,
        rel_error_holdout,
        ridge_alpha: alpha,
        objective_start: sol.objective_start,
        objective: sol.objective,
        rounds: sol.rounds,
        swaps: sol.swaps,
        seconds: t0.elapsed().as_secs_f64(),
    };
    Ok(UnitCut { block, units: units.clone(), kept: sol.kept, weight: sol.weight, shift, report })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn amounts_parse_as_fraction_or_count() {
        assert_eq!("0.25".parse::<Amount>(), Ok(Amount::Fraction(0.25)));
        assert_eq!("256".parse::<Amount>(), Ok(Amount::Count(256)));
        for bad in ["1.5", "-0.1", "x", "nan"] {
            assert!(bad.parse::<Amount>().is_err(), "{bad}");
        }
        assert_eq!(Amount::Fraction(0.25).removed(1536), 384);
        assert_eq!(Amount::Count(3).removed(16), 3);
    }

    /// The mean shift against the outputs computed by definition:
    /// `Σ_i ‖(W z_i + b) − (Ŵ z_i + b̂)‖² / Σ_i ‖W z_i‖²` on the fitted rows
    /// equals the reported error, and it is below the error of the same
    /// kept set without a bias change.
    #[test]
    fn mean_shift_matches_outputs_by_definition() {
        use crate::arch::units::{Slice, UnitKind};
        let (n, d, d_out) = (60, 6, 3);
        let mut rng = crate::rng::SplitMix64::new(5);
        // Inputs with nonzero means (as after GELU) and correlation.
        let mut z = vec![0.0; n * d];
        for i in 0..n {
            let common = rng.normal();
            for j in 0..d {
                z[i * d + j] = 0.5 + 0.3 * j as f64 + common + 0.5 * rng.normal();
            }
        }
        let w = Mat::from_fn(d_out, d, |_, _| rng.normal());
        let b: Vec<f64> = (0..d_out).map(|_| rng.normal()).collect();
        let mut grams = LayerGrams::new(d);
        grams.add_chunk(&z, 0, 0.0, Par::Seq);
        let units = Units {
            kind: UnitKind::Neuron,
            count: d,
            consumer: "down.weight".into(),
            width: 1,
            consumer_bias: Some("down.bias".into()),
            group: 0,
            slices: vec![Slice { tensor: "down.weight".into(), axis: 1, per_unit: 1 }],
        };
        let p = CutParams {
            ridge: Ridge::Fixed(0.0),
            method: Method::L0,
            refit: true,
            max_rounds: 20,
            max_seconds: None,
        };
        let cut =
            cut_units(0, &units, 2, w.as_ref(), Some(b.clone()), &grams, &p, Par::Seq).unwrap();
        let shift = cut.shift.as_ref().expect("a refit consumer with a bias shifts it");
        let bh = shift.bias_for(w.as_ref(), cut.weight.as_ref());
        let (mut num, mut den, mut plain) = (0.0, 0.0, 0.0);
        for i in 0..n {
            let zi = &z[i * d..(i + 1) * d];
            for r in 0..d_out {
                let y: f64 = (0..d).map(|c| w[(r, c)] * zi[c]).sum::<f64>();
                let yh: f64 = (0..d).map(|c| cut.weight[(r, c)] * zi[c]).sum::<f64>();
                num += (y + b[r] - yh - bh[r]).powi(2);
                plain += (y - yh).powi(2);
                den += y * y;
            }
        }
        let want = num / den;
        let got = cut.report.rel_error;
        assert!((got - want).abs() <= 1e-9 * want, "reported {got}, by definition {want}");
        assert!(num < plain, "the shifted bias must lower the error: {num} vs {plain}");
    }
}
