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
/// `w`, whose input statistics are `grams`.
///
/// # Errors
/// [`crate::ErrorKind::Solve`] when the solver fails.
pub fn cut_units(
    block: usize,
    units: &Units,
    removed: usize,
    w: MatRef<'_, f64>,
    grams: &LayerGrams,
    p: &CutParams,
    par: Par,
) -> Result<UnitCut> {
    let t0 = Instant::now();
    let keep = units.count - removed;
    let h = grams.calib.matrix();
    let held = (grams.holdout.rows() > 0).then(|| grams.holdout.matrix());
    let method = group_method(p.method);
    let params = |alpha: f64, method: GroupMethod| GroupParams {
        method,
        refit: p.refit,
        ridge_alpha: alpha,
        max_rounds: p.max_rounds,
        max_seconds: p.max_seconds,
    };
    let name = units.consumer.as_str();
    let solve_err = |e| Error::solve(name, [w.nrows(), w.ncols()], e);
    let score_only = matches!(method, GroupMethod::Magnitude | GroupMethod::Scaled) && !p.refit;
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
                let e = objective::relative_error(w, trial.weight.as_ref(), held, par);
                if e < best.0 {
                    best = (e, a);
                }
            }
            best.1
        }
    };
    let sol = group::solve_groups(w, h, units.width, keep, &params(alpha, method), par)
        .map_err(solve_err)?;
    let rel_error = objective::relative_error(w, sol.weight.as_ref(), h, par);
    let rel_error_holdout =
        held.map(|hh| objective::relative_error(w, sol.weight.as_ref(), hh, par));
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
    Ok(UnitCut { block, units: units.clone(), kept: sol.kept, weight: sol.weight, report })
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
}
