//! The layer driver: for each block of a [`LayerSource`], build the
//! statistics, solve every selected layer for every run, and hand the
//! results to a [`Sink`]. `lopper prune` is one run ([`prune`]);
//! `lopper compare` is the same loop with runs (method × target) as a
//! second dimension.
//!
//! Loop order: when the source's statistics do not depend on the pruned
//! weights (activations, or text without propagation), every run shares
//! one pass: blocks outside, runs inside, one block's statistics in memory.
//! When they do (sequential text calibration), or when the sink asks for
//! whole runs ([`Sink::whole_runs`]: compare keeping models, so that an
//! interrupted comparison keeps finished runs), each run has its own pass
//! of the source: runs outside, blocks inside.
//!
//! Parallelism lives inside the kernels (matrix products and rows), bounded
//! by `threads`; the driver itself is sequential, so reports come out in
//! layer order.

pub mod allocate;
pub mod cut;
pub mod estimate;
mod layer;
mod prune;
pub mod shrink;

pub use cut::{Amount, CutSpec, UnitCut};
pub use layer::{
    solve_layer, solve_narrowed, Narrow, Ridge, Solved, AUTO_RIDGE_GRID, DEFAULT_RIDGE,
};
pub(crate) use prune::model_meta;
pub use prune::{prune, PruneConfig};

use crate::arch::units::{head_limit, UnitKind, Units};
use crate::error::{Error, Result};
use crate::evaluate::EvalOptions;
use crate::io::Model;
use crate::report::PhaseTimes;
use crate::select::Selection;
use crate::solve::{self, L0Params, Method, Pattern};
use crate::source::{self, Calibration, LayerSource, PlanParams, Planned};
use faer::Par;
use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Instant;

/// Run `write` (an output that copies from `model`'s memory-mapped files)
/// after checking that the model's files did not change during the run;
/// when the write fails and an input changed meanwhile (a truncated input
/// makes the copy fail with "Bad address"), the input is reported, not the
/// output.
///
/// # Errors
/// The changed input ([`crate::error::ErrorKind::Input`]) or the write error.
pub(crate) fn write_checked<T>(
    model: &Model,
    write: impl FnOnce() -> std::result::Result<T, crate::io::WriteError>,
) -> Result<T> {
    model.check_unchanged()?;
    write().map_err(|e| match model.check_unchanged() {
        Err(changed) => Error::from(changed),
        Ok(()) => Error::from(e),
    })
}

/// What every run of a job shares: the model, the calibration, and how
/// each layer is solved apart from its method and target.
#[derive(Clone, Debug)]
pub struct JobConfig {
    /// Model file, index or directory.
    pub model: PathBuf,
    /// Where the calibration inputs come from.
    pub calibration: Calibration,
    /// Ridge choice.
    pub ridge: Ridge,
    /// Fraction of activation rows (text: windows) held out.
    pub holdout: f64,
    /// Which tensors.
    pub selection: Selection,
    /// Worker threads (resolved, ≥ 1).
    pub threads: usize,
    /// Local-search settings.
    pub l0: L0Params,
    /// Record the local-search objective after every sweep.
    pub trace: bool,
    /// Prove a lower bound on each layer's best possible objective
    /// (`None`: off, the default).
    pub certify: Option<crate::solve::certify::CertifyParams>,
    /// End-to-end comparison on held-out text, when asked for.
    pub eval: Option<EvalOptions>,
}

impl JobConfig {
    /// The kernels' parallelism.
    pub fn par(&self) -> Par {
        if self.threads > 1 {
            Par::rayon(self.threads)
        } else {
            Par::Seq
        }
    }
}

/// One run: a method at a target.
#[derive(Clone, Debug, PartialEq)]
pub struct Target {
    /// Solver.
    pub method: Method,
    /// Sparsity pattern (of what a structured cut leaves).
    pub pattern: Pattern,
    /// Structured pruning: units removed from every block first.
    pub cut: Option<CutSpec>,
    /// Unstructured sparsity per layer name, overriding the pattern's
    /// (an allocation, see [`allocate`]).
    pub per_layer: Option<Arc<BTreeMap<String, f64>>>,
}

impl Target {
    /// Unstructured or N:M pruning only.
    pub fn new(method: Method, pattern: Pattern) -> Self {
        Target { method, pattern, cut: None, per_layer: None }
    }

    /// The target of layer `name`: its allocated sparsity when it has one.
    pub fn at_layer(&self, name: &str) -> Target {
        let mut t = Target { per_layer: None, ..self.clone() };
        let s = self.per_layer.as_ref().and_then(|m| m.get(name));
        if let (Some(&sparsity), Pattern::Unstructured { scope, .. }) = (s, self.pattern) {
            t.pattern = Pattern::Unstructured { sparsity, scope };
        }
        t
    }
}

/// Progress events for a front end.
#[derive(Clone, Copy, Debug)]
pub enum Progress<'a> {
    /// This many solves (layers × runs) lie ahead.
    Start(usize),
    /// Building the statistics of this block (or layer).
    Statistics(&'a str),
    /// `done` solves are finished; layer `layer` of run `run` starts.
    Solve {
        /// Solves finished so far.
        done: usize,
        /// Weight tensor name.
        layer: &'a str,
        /// Index of the run.
        run: usize,
    },
    /// This many solves are finished.
    Done(usize),
    /// All layers are done; the pruned model is compared with the dense one.
    Evaluating,
    /// Outputs are being written.
    Writing,
    /// Something the user should know that is not an error (one line).
    Note(&'a str),
}

/// Where solved layers go.
pub trait Sink {
    /// The statistics of a block are ready (before its layers are solved).
    fn statistics(&mut self, _layers: &[Planned], _stats: &source::BlockStats) {}

    /// Layer `layer` of run `run` is solved.
    ///
    /// # Errors
    /// Whatever keeping the result fails with; the driver stops.
    fn solved(&mut self, run: usize, layer: &Planned, solved: Solved) -> Result<()>;

    /// Run `run` has every layer. `timing` is the source's phase times
    /// (text calibration) with the solve time of the runs that shared it.
    ///
    /// # Errors
    /// Whatever finishing the run fails with; the driver stops.
    fn run_done(&mut self, run: usize, timing: Option<PhaseTimes>) -> Result<()>;

    /// Run `run` removed units of a block (before that block's layers are
    /// solved).
    ///
    /// # Errors
    /// Whatever keeping the result fails with; the driver stops.
    fn cut(&mut self, _run: usize, _cut: &UnitCut) -> Result<()> {
        Ok(())
    }

    /// Seconds spent writing results as they came ([`PhaseTimes::write`]).
    fn write_seconds(&self) -> f64 {
        0.0
    }

    /// Asked between solves: stop now, leaving later solves undone.
    fn stop_requested(&self) -> bool {
        false
    }

    /// Solve the runs one after another (runs outside blocks), even when
    /// they could share one pass, so that every run finished before a stop
    /// is whole.
    fn whole_runs(&self) -> bool {
        false
    }
}

/// How [`drive`] ended.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Finish {
    /// Every run has every layer.
    Complete,
    /// [`Sink::stop_requested`] said stop.
    Stopped,
}

/// Plan parameters for `targets` under `cfg`.
fn plan_params<'a>(
    cfg: &'a JobConfig,
    targets: &'a [(Method, Pattern)],
    structured: bool,
) -> PlanParams<'a> {
    PlanParams {
        selection: &cfg.selection,
        holdout: cfg.holdout,
        needs_holdout: cfg.ridge == (Ridge::Auto { fallback: None }),
        targets,
        structured,
    }
}

/// Open the calibration source of `cfg` for `model`, checked for every run
/// of `targets` (see [`source::open`]).
///
/// # Errors
/// Anything wrong with the selection, the calibration data or the targets.
pub fn open_source<'m>(
    cfg: &JobConfig,
    targets: &[Target],
    model: &'m Model,
) -> Result<Box<dyn LayerSource + 'm>> {
    let pairs: Vec<(Method, Pattern)> = targets.iter().map(|t| (t.method, t.pattern)).collect();
    let structured = targets.iter().any(|t| t.cut.is_some());
    let src = source::open(&cfg.calibration, model, &plan_params(cfg, &pairs, structured))?;
    check_cuts(targets, src.as_ref())?;
    Ok(src)
}

/// Solve every selected layer of `first` for every run of `targets`,
/// handing each result to `sink`. `first` is the source [`open_source`]
/// returned; runs that cannot share it get a fresh one.
///
/// # Errors
/// The first failure of the source, a solver or the sink.
pub fn drive<'m>(
    cfg: &JobConfig,
    targets: &[Target],
    model: &'m Model,
    first: Box<dyn LayerSource + 'm>,
    sink: &mut dyn Sink,
    progress: &dyn Fn(Progress<'_>),
) -> Result<Finish> {
    let par = cfg.par();
    check_cuts(targets, first.as_ref())?;
    let n_layers: usize = first.blocks().iter().map(Vec::len).sum();
    progress(Progress::Start(n_layers * targets.len()));
    let all: Vec<usize> = (0..targets.len()).collect();
    let cohorts: Vec<Vec<usize>> = if first.follows_pruned() || sink.whole_runs() {
        all.iter().map(|&r| vec![r]).collect()
    } else {
        vec![all]
    };
    let mut next = Some(first);
    let mut done = 0;
    for cohort in cohorts {
        let mut src = match next.take() {
            Some(s) => s,
            None => open_source(cfg, targets, model)?,
        };
        let mut solve_secs = 0.0;
        // Blocks after the last selected layer change nothing: not run.
        let end = src.blocks().iter().rposition(|l| !l.is_empty()).map_or(0, |b| b + 1);
        for b in 0..end {
            if sink.stop_requested() {
                return Ok(Finish::Stopped);
            }
            let layers = src.blocks()[b].clone();
            progress(Progress::Statistics(&src.block_label(b)));
            let stats = src.statistics(b, par)?;
            sink.statistics(&layers, &stats);
            let t = Instant::now();
            let mut cuts: Vec<Vec<UnitCut>> = vec![Vec::new(); targets.len()];
            for &r in &cohort {
                cuts[r] = cut_block(cfg, &targets[r], src.as_ref(), b, &layers, &stats, par)?;
                for c in &cuts[r] {
                    sink.cut(r, c)?;
                }
            }
            solve_secs += t.elapsed().as_secs_f64();
            for layer in &layers {
                let w = src.weight(layer)?;
                for &r in &cohort {
                    if sink.stop_requested() {
                        return Ok(Finish::Stopped);
                    }
                    progress(Progress::Solve { done, layer: &layer.name, run: r });
                    let t = Instant::now();
                    let grams = &stats.grams[&layer.group];
                    let narrow = narrow_for(&cuts[r], &layer.name);
                    let solved = solve_narrowed(
                        cfg,
                        targets[r].at_layer(&layer.name),
                        layer,
                        w.as_ref(),
                        grams,
                        narrow.as_ref(),
                        par,
                    )?;
                    solve_secs += t.elapsed().as_secs_f64();
                    if let Some(mut solved) = solved {
                        layer::stored_errors(&mut solved, layer.dtype, w.as_ref(), grams, par);
                        if src.follows_pruned() {
                            src.hand_back(layer, &solved.values)?;
                        }
                        sink.solved(r, layer, solved)?;
                    }
                    done += 1;
                    progress(Progress::Done(done));
                }
            }
            src.finish_block(b)?;
        }
        let write = sink.write_seconds();
        let timing = src.timing().map(|t| PhaseTimes { solve: solve_secs, write, ..t });
        for &r in &cohort {
            sink.run_done(r, timing)?;
        }
    }
    Ok(Finish::Complete)
}

/// Refuse structured cuts the source or the family cannot do, before any
/// work: units the source does not know, heads the family's config cannot
/// express, a cut that leaves nothing, a consumer left out of the
/// selection, a pattern that does not fit the consumer's kept width.
fn check_cuts(targets: &[Target], src: &dyn LayerSource) -> Result<()> {
    let all = src.all_units();
    let planned = |name: &str| src.blocks().iter().flatten().any(|l| l.name == name);
    for t in targets {
        let Some(spec) = t.cut else { continue };
        for kind in [UnitKind::Neuron, UnitKind::Head] {
            let Some(amount) = spec.amount(kind) else { continue };
            let flag = CutSpec::flag(kind);
            let limit = match kind {
                UnitKind::Head => src.model_type().as_deref().and_then(head_limit),
                UnitKind::Neuron => None,
            };
            if let Some(why) = limit {
                return Err(Error::usage(format!("{flag}: {why}")));
            }
            let of_kind: Vec<&Units> = all.iter().filter(|u| u.kind == kind).collect();
            if of_kind.is_empty() {
                let why = if all.is_empty() {
                    "it needs the model's blocks: text calibration (--text), or activations \
                     of a model directory with config.json"
                } else {
                    "the model has no such units"
                };
                return Err(Error::usage(format!("{flag}: {why}")));
            }
            for u in of_kind {
                let removed = amount.removed(u.count);
                if removed >= u.count {
                    return Err(Error::usage(format!(
                        "{flag} {amount} removes {removed} of the {} {} of each block; keep at \
                         least one",
                        u.count,
                        kind.plural()
                    )));
                }
                if !planned(&u.consumer) {
                    return Err(Error::usage(format!(
                        "{flag} needs '{}' selected (it reads the {} and is refit); check --only \
                         / --skip",
                        u.consumer,
                        kind.plural()
                    )));
                }
                let kept_cols = (u.count - removed) * u.width;
                solve::check_pattern(t.pattern, kept_cols).map_err(|e| {
                    Error::usage(format!(
                        "{flag} {amount} leaves '{}' {kept_cols} inputs wide: {e}",
                        u.consumer
                    ))
                })?;
            }
        }
    }
    Ok(())
}

/// The units run `target` removes from block `b`.
fn cut_block(
    cfg: &JobConfig,
    target: &Target,
    src: &dyn LayerSource,
    b: usize,
    layers: &[Planned],
    stats: &source::BlockStats,
    par: Par,
) -> Result<Vec<UnitCut>> {
    let Some(spec) = target.cut else { return Ok(Vec::new()) };
    let params = cut::CutParams {
        ridge: cfg.ridge,
        method: target.method,
        refit: spec.refit,
        max_rounds: cfg.l0.max_sweeps,
        max_seconds: cfg.l0.max_seconds,
    };
    let mut out = Vec::new();
    for u in src.units(b) {
        let Some(amount) = spec.amount(u.kind) else { continue };
        let consumer = layers.iter().find(|l| l.name == u.consumer).expect("checked before");
        let w = src.weight(consumer)?;
        let grams = &stats.grams[&u.group];
        out.push(cut::cut_units(b, &u, amount.removed(u.count), w.as_ref(), grams, &params, par)?);
    }
    Ok(out)
}

/// How the cuts of a block narrow layer `name`.
fn narrow_for<'a>(cuts: &'a [UnitCut], name: &str) -> Option<Narrow<'a>> {
    for c in cuts {
        if c.units.consumer == name {
            return Some(Narrow::Cols {
                cols: c.kept_columns(),
                start: c.weight.as_ref(),
                alpha: c.report.ridge_alpha,
            });
        }
        if let Some(s) = c.units.slices.iter().find(|s| s.tensor == name) {
            return Some(Narrow::Rows(c.kept_entries(s.per_unit)));
        }
    }
    None
}
