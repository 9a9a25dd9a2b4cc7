//! Per-layer sparsities for one overall target: a first pass over the
//! calibration text that measures what each layer's sparsity costs, then
//! the allocation ([`crate::solve::allocate`]) that the usual sequential
//! solve follows.
//!
//! What the pass measures, per selected layer `i`, on the dense model:
//! - an error curve `e_i(s)`: the relative output error
//!   `tr(D H Dᵀ) / tr(W H Wᵀ)` of the one-shot OBS sweep at each sparsity
//!   of a grid, on the layer's calibration Gram matrix `H`;
//! - a sensitivity `g_i`: the layer alone is pruned (OBS) at a few probe
//!   sparsities, the remaining blocks are run on calibration windows, and
//!   the relative change of the final hidden states
//!   `δ_i(s) = ‖Y'_i(s) − Y‖²_F / ‖Y‖²_F` is fitted by `δ ≈ g_i · e_i(s)`
//!   (least squares through the origin).
//!
//! The predicted end-to-end damage of an allocation is `Σ_i g_i e_i(s_i)`:
//! to first order the final-state change is linear in each layer's output
//! change, and changes from different layers add in squared norm when they
//! are uncorrelated, so the squared relative changes add. The allocation
//! minimises that sum (exactly, over the convex hulls of the curves) with
//! the total number of zeros fixed.

use super::{plan_params, JobConfig, Progress, Target};
use crate::arch::{self, Batch, Network};
use crate::calib::is_holdout;
use crate::error::{Error, Result};
use crate::io::Model;
pub use crate::report::allocation::{AllocationReport, ShareRow};
use crate::solve::allocate::{self as alloc, Curve};
use crate::solve::{self, budget, Method, Pattern, Scope, SolveParams};
use crate::source::{self, text, Calibration, Planned};
use candle_core::Tensor;
use faer::MatRef;
use std::collections::BTreeMap;
use std::fmt;
use std::sync::Arc;
use std::time::Instant;

/// How the overall target is spread over the layers.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Spread {
    /// Every layer at the target.
    Uniform,
    /// Outlier-weighted per block (Yin et al. 2024, "OWL").
    Outlier,
    /// Measured error curves and sensitivities, allocated by
    /// [`crate::solve::allocate`].
    Measured,
}

impl Spread {
    /// The name on the command line and in reports.
    pub fn name(self) -> &'static str {
        match self {
            Spread::Uniform => "uniform",
            Spread::Outlier => "outlier",
            Spread::Measured => "measured",
        }
    }
}

impl fmt::Display for Spread {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Settings of a spread target.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SpreadConfig {
    /// How the target is spread.
    pub spread: Spread,
    /// No layer sparser than this.
    pub cap: f64,
    /// No layer denser than this.
    pub floor: f64,
}

/// Sparsity grid of the error curves (the floor and cap are added).
pub const GRID: &[f64] = &[0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95];
/// Probe sparsities of the sensitivity measurement.
pub const PROBES: &[f64] = &[0.5, 0.8];
/// Calibration windows the sensitivity measurement runs (fitted windows
/// only, the first ones drawn).
pub const PROBE_WINDOWS: usize = 32;
/// Outlier threshold `M` and range `λ` of the outlier-weighted baseline:
/// the values Yin et al. (2024) report using for LLaMA, as remembered
/// (M = 5, λ = 0.08).
pub const OUTLIER_M: f64 = 5.0;
/// See [`OUTLIER_M`].
pub const OUTLIER_LAMBDA: f64 = 0.08;

/// A run's per-layer sparsities and what they were chosen from.
#[derive(Clone, Debug)]
pub struct Allocation {
    /// Sparsity by layer name.
    pub sparsities: Arc<BTreeMap<String, f64>>,
    /// The record.
    pub report: AllocationReport,
}

/// What the pass measured about one layer.
struct Measured {
    planned: Planned,
    block: usize,
    /// `(sparsity, relative error)` on the grid, ascending.
    curve: Vec<(f64, f64)>,
    sensitivity: f64,
    probes: Vec<[f64; 2]>,
}

/// Zero count of `layer` at sparsity `s` under `scope` (what the solver's
/// budget will zero).
fn zeros_at(shape: [usize; 2], s: f64, scope: Scope) -> usize {
    let [d_out, d_in] = shape;
    match scope {
        Scope::Row => d_out * budget::zeros(s, d_in),
        Scope::Layer => budget::zeros(s, d_out * d_in),
    }
}

/// The error curve interpolated at sparsity `s`.
fn error_at(curve: &[(f64, f64)], s: f64) -> f64 {
    let mut prev = curve[0];
    for &(x, e) in curve {
        if s <= x {
            let t = if x > prev.0 { (s - prev.0) / (x - prev.0) } else { 1.0 };
            return prev.1 + t.clamp(0.0, 1.0) * (e - prev.1);
        }
        prev = (x, e);
    }
    prev.1
}

/// Run blocks `from..` on `x` and return the final hidden states.
fn run_from(net: &dyn Network, from: usize, x: &Tensor) -> arch::Result<Tensor> {
    let mut h = x.clone();
    for b in from..net.num_blocks() {
        h = net.block(b, &h, &mut |_, _| Ok(()))?;
    }
    Ok(h)
}

/// `‖a − b‖² / ‖b‖²` over every element.
fn rel_change(a: &[Tensor], b: &[Tensor]) -> arch::Result<f64> {
    let (mut num, mut den) = (0.0, 0.0);
    for (a, b) in a.iter().zip(b) {
        num += f64::from((a - b)?.sqr()?.sum_all()?.to_scalar::<f32>()?);
        den += f64::from(b.sqr()?.sum_all()?.to_scalar::<f32>()?);
    }
    Ok(if den > 0.0 { num / den } else { 0.0 })
}

/// Choose each layer's sparsity for an overall `target` over the selected
/// weights. [`Spread::Uniform`] needs no pass and returns `None`.
///
/// # Errors
/// A calibration that is not text (the pass runs the model), bounds that
/// cannot meet the target, or anything the pass's forward runs fail with.
pub fn plan(
    cfg: &JobConfig,
    model: &Model,
    target: f64,
    scope: Scope,
    spread: SpreadConfig,
    progress: &dyn Fn(Progress<'_>),
) -> Result<Option<Allocation>> {
    if spread.spread == Spread::Uniform {
        return Ok(None);
    }
    let flag = "--spread";
    let Calibration::Text(ts) = &cfg.calibration else {
        return Err(Error::usage(format!(
            "{flag} {}: needs text calibration (--text); it runs the model",
            spread.spread
        )));
    };
    if !(spread.floor..=spread.cap).contains(&target) {
        return Err(Error::usage(format!(
            "{flag}: the target {target} must lie within --layer-min {} and --layer-max {}",
            spread.floor, spread.cap
        )));
    }
    let t0 = Instant::now();
    let par = cfg.par();
    // The pass sees the dense model only: no propagation.
    let dense = Calibration::Text(text::TextSource { propagate: false, ..ts.clone() });
    let probe_pattern = Pattern::Unstructured { sparsity: target, scope };
    let pairs = [(Method::Obs, probe_pattern)];
    let mut src = source::open(&dense, model, &plan_params(cfg, &pairs, false))?;
    let mut net = arch::load(model)?;
    let (wins, _) = text::windows(model, net.as_ref(), ts)?;
    let probe_wins: Vec<Vec<u32>> = wins
        .iter()
        .enumerate()
        .filter(|(i, _)| !is_holdout(*i, cfg.holdout))
        .map(|(_, w)| w.clone())
        .take(PROBE_WINDOWS)
        .collect();
    let batches: Vec<Batch> = probe_wins.chunks(16).map(Batch::new).collect();
    // Dense inputs of every block and the final states, on the probe windows.
    let mut inputs: Vec<Vec<Tensor>> = Vec::with_capacity(net.num_blocks() + 1);
    inputs.push(batches.iter().map(|b| net.embed(b)).collect::<arch::Result<_>>()?);
    for b in 0..net.num_blocks() {
        let next = inputs[b]
            .iter()
            .map(|x| net.block(b, x, &mut |_, _| Ok(())))
            .collect::<arch::Result<Vec<_>>>()?;
        inputs.push(next);
    }
    let finals = inputs.pop().expect("one entry per block and the embedding");

    let mut measured: Vec<Measured> = Vec::new();
    let mut ratios: Vec<(usize, f64, usize)> = Vec::new();
    let mut grid: Vec<f64> =
        GRID.iter().copied().filter(|&s| s > spread.floor && s < spread.cap).collect();
    grid.insert(0, spread.floor);
    grid.push(spread.cap);
    // One entry of `inputs` per block of the network and of the source.
    for (b, xs) in inputs.iter().enumerate() {
        let layers = src.blocks()[b].clone();
        if layers.is_empty() {
            src.finish_block(b)?;
            continue;
        }
        progress(Progress::Statistics(&format!("measuring {}", src.block_label(b))));
        let stats = src.statistics(b, par)?;
        let mut scored: Vec<(Vec<f64>, Vec<f64>)> = Vec::new();
        for layer in &layers {
            let w = src.weight(layer)?;
            let grams = &stats.grams[&layer.group];
            let h = grams.calib.matrix();
            let obs = |s: f64| -> Result<faer::Mat<f64>> {
                let p = SolveParams {
                    method: Method::Obs,
                    pattern: Pattern::Unstructured { sparsity: s, scope },
                    ridge_alpha: super::DEFAULT_RIDGE,
                    ..SolveParams::default()
                };
                let [d_out, d_in] = layer.shape;
                solve::prune_layer(w.as_ref(), h, &p, par)
                    .map(|p| p.weight)
                    .map_err(|e| Error::solve(&layer.name, [d_out, d_in], e))
            };
            let mut curve = Vec::with_capacity(grid.len());
            for &s in &grid {
                let e = if s == 0.0 {
                    0.0
                } else {
                    solve::objective::relative_error(w.as_ref(), obs(s)?.as_ref(), h, par)
                };
                curve.push((s, if e.is_finite() { e } else { 0.0 }));
            }
            // Sensitivity: this layer alone pruned, the rest dense.
            let dense_w: Vec<f32> = to_rows(w.as_ref()).iter().map(|&v| v as f32).collect();
            let mut probes = Vec::new();
            for &s in PROBES {
                let s = s.clamp(spread.floor, spread.cap);
                if s == 0.0 {
                    continue;
                }
                let pw = obs(s)?;
                let e = solve::objective::relative_error(w.as_ref(), pw.as_ref(), h, par);
                let vals: Vec<f32> = to_rows(pw.as_ref()).iter().map(|&v| v as f32).collect();
                net.set_weight(&layer.name, &vals)?;
                let outs = xs
                    .iter()
                    .map(|x| run_from(net.as_ref(), b, x))
                    .collect::<arch::Result<Vec<_>>>()?;
                net.set_weight(&layer.name, &dense_w)?;
                probes.push([e, rel_change(&outs, &finals)?]);
            }
            let num: f64 = probes.iter().map(|p| p[0] * p[1]).sum();
            let den: f64 = probes.iter().map(|p| p[0] * p[0]).sum();
            let sensitivity = if den > 0.0 { num / den } else { 0.0 };
            if spread.spread == Spread::Outlier {
                let x: Vec<f64> = (0..h.nrows()).map(|j| h[(j, j)].max(0.0).sqrt()).collect();
                scored.push((to_rows(w.as_ref()), x));
            }
            measured.push(Measured {
                planned: layer.clone(),
                block: b,
                curve,
                sensitivity,
                probes,
            });
        }
        if spread.spread == Spread::Outlier {
            let refs: Vec<(&[f64], &[f64])> =
                scored.iter().map(|(w, x)| (w.as_slice(), x.as_slice())).collect();
            let size: usize = layers.iter().map(|l| l.shape[0] * l.shape[1]).sum();
            ratios.push((b, alloc::outlier_ratio(&refs, OUTLIER_M), size));
        }
        src.finish_block(b)?;
    }
    let sizes: Vec<usize> =
        measured.iter().map(|m| m.planned.shape[0] * m.planned.shape[1]).collect();
    let total: usize = sizes.iter().sum();
    let chosen: Vec<f64> = match spread.spread {
        Spread::Uniform => unreachable!("returned above"),
        Spread::Outlier => {
            let r: Vec<f64> = ratios.iter().map(|r| r.1).collect();
            let n: Vec<usize> = ratios.iter().map(|r| r.2).collect();
            let per_block = alloc::outlier_sparsities(&r, &n, target, OUTLIER_LAMBDA);
            measured
                .iter()
                .map(|m| {
                    let k = ratios.iter().position(|r| r.0 == m.block).expect("every block scored");
                    per_block[k].clamp(spread.floor, spread.cap)
                })
                .collect()
        }
        Spread::Measured => {
            let curves: Vec<Curve> = measured
                .iter()
                .map(|m| {
                    let [d_out, _] = m.planned.shape;
                    let step = if scope == Scope::Row { d_out } else { 1 };
                    let mut points: Vec<(usize, f64)> = Vec::new();
                    // Bounds in counts, rounded inwards so no layer leaves them.
                    let (unit, times) = match scope {
                        Scope::Row => (m.planned.shape[1], d_out),
                        Scope::Layer => (d_out * m.planned.shape[1], 1),
                    };
                    let lo = (spread.floor * unit as f64).ceil() as usize * times;
                    let hi = (spread.cap * unit as f64).floor() as usize * times;
                    for &(s, e) in &m.curve {
                        let z = zeros_at(m.planned.shape, s, scope).clamp(lo, hi);
                        if points.last().is_none_or(|p| p.0 < z) {
                            points.push((z, m.sensitivity * e));
                        }
                    }
                    Curve { step, points }
                })
                .collect();
            let want = budget::zeros(target, total);
            let z = alloc::allocate(&curves, want)
                .map_err(|e| Error::usage(format!("{flag} measured at {target}: {e}")))?;
            z.iter().zip(&sizes).map(|(&z, &n)| z as f64 / n as f64).collect()
        }
    };
    let mut rows = Vec::with_capacity(measured.len());
    let (mut predicted, mut predicted_uniform, mut zeros) = (0.0, 0.0, 0usize);
    for (i, m) in measured.iter().enumerate() {
        let s = chosen[i];
        let e = error_at(&m.curve, s);
        predicted += m.sensitivity * e;
        predicted_uniform += m.sensitivity * error_at(&m.curve, target);
        zeros += zeros_at(m.planned.shape, s, scope);
        rows.push(ShareRow {
            name: m.planned.name.clone(),
            block: m.block,
            weights: sizes[i],
            sparsity: s,
            error_predicted: e,
            sensitivity: m.sensitivity,
            contribution_predicted: m.sensitivity * e,
            contribution_measured: None,
            outlier_ratio: ratios.iter().find(|r| r.0 == m.block).map(|r| r.1),
            probes: m.probes.clone(),
        });
    }
    let sparsities: BTreeMap<String, f64> =
        rows.iter().map(|r| (r.name.clone(), r.sparsity)).collect();
    let report = AllocationReport {
        spread: spread.spread.name().to_string(),
        target,
        planned: zeros as f64 / total.max(1) as f64,
        cap: spread.cap,
        floor: spread.floor,
        predicted,
        predicted_uniform,
        seconds: t0.elapsed().as_secs_f64(),
        layers: rows,
    };
    Ok(Some(Allocation { sparsities: Arc::new(sparsities), report }))
}

/// Fill each row's measured contribution from the solved layers' errors.
pub fn record_solved(report: &mut AllocationReport, errors: &BTreeMap<String, f64>) {
    for r in &mut report.layers {
        r.contribution_measured = errors.get(&r.name).map(|e| r.sensitivity * e);
    }
}

/// `target` with each layer at its allocated sparsity.
pub fn allocated(target: Target, alloc: &Allocation) -> Target {
    Target { per_layer: Some(Arc::clone(&alloc.sparsities)), ..target }
}

fn to_rows(m: MatRef<'_, f64>) -> Vec<f64> {
    let mut v = Vec::with_capacity(m.nrows() * m.ncols());
    for r in 0..m.nrows() {
        for c in 0..m.ncols() {
            v.push(m[(r, c)]);
        }
    }
    v
}
