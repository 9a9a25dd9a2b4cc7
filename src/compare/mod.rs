//! `lopper compare`: every chosen method at every chosen target on the same
//! calibration data, and the record and page that put them side by side.
//!
//! This module owns the comparison's configuration and its [`Sink`] (what
//! happens to each solved layer and each finished run); the loop over
//! layers is the prune driver's ([`crate::driver::drive`]) with the runs as
//! a second dimension, so a run here gives the same figures as
//! `lopper prune` with the same method, target and settings. Beside it:
//! the `comparison.json` record ([`data`]), the HTML page ([`page`]), the
//! terminal summary ([`table`]) and what is kept while running
//! (`checkpoint`).
//!
//! Key decisions:
//! - Shared statistics: with activations, or text without propagation,
//!   each block's Gram matrices are built once and every run is solved on
//!   them ([`data::INPUTS_SHARED`]). Sequential text calibration gives each
//!   run its own pass over the model ([`data::INPUTS_OWN`]), since every
//!   run's pruned blocks feed its next ones.
//! - What finished is kept: after a solve, at most every
//!   [`CHECKPOINT_SECONDS`], after each run and at the end,
//!   `comparison.json` and `comparison.html` are rewritten atomically with
//!   every finished solve. A stop request ([`Control`]: Ctrl-C, SIGTERM)
//!   is honoured between solves: the files are written once more with
//!   status `interrupted`, runs that finished every layer keep their
//!   models (`--keep-models`), and the caller exits non-zero.
//! - Whole runs when they are kept: with `--keep-models` or `--eval-text`
//!   the runs are solved one after another ([`Sink::whole_runs`]), each
//!   its own pass over the statistics, so an interrupted comparison keeps
//!   every run finished before the stop as a complete model (and its
//!   end-to-end figures). Without them, runs sharing statistics are solved
//!   block by block (each block's statistics built once), and a stop keeps
//!   every finished solve, but usually no whole run. Each solved layer's
//!   weights are held in memory (`checkpoint`) until its run has every
//!   layer; then the run's model is evaluated and written (staged and
//!   renamed into place together), and the weights dropped.

mod checkpoint;
pub mod data;
mod latency;
pub mod page;
mod svg;
pub mod table;

pub use checkpoint::{mark_stopped, Control};

use crate::driver::{self, JobConfig, Progress, Sink, Solved, Target};
use crate::error::{Error, Result};
use crate::io::{self, Model};
use crate::report::{PhaseTimes, VALIDATION_NOTICE};
use crate::solve::{Method, Pattern};
use crate::source::{BlockStats, Calibration, Planned};
use checkpoint::{write_checkpoint, Parking};
use data::{CalibrationInfo, CompareSettings, Comparison, LayerInfo, Source, Status};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::time::Instant;

/// Least seconds between two checkpoint writes while solving.
pub const CHECKPOINT_SECONDS: f64 = 2.0;

/// File names inside the output folder.
pub const JSON_NAME: &str = "comparison.json";
/// See [`JSON_NAME`].
pub const HTML_NAME: &str = "comparison.html";

/// Everything a comparison needs, validated by the caller's flag parsing.
#[derive(Clone, Debug)]
pub struct CompareConfig {
    /// Model, calibration, ridge, hold-out, selection, threads, local
    /// search settings and end-to-end evaluation, shared by every run.
    pub job: JobConfig,
    /// Methods, in run order.
    pub methods: Vec<Method>,
    /// Targets, in run order.
    pub targets: Vec<Pattern>,
    /// Output folder (created when the inputs check out).
    pub out_dir: PathBuf,
    /// Write each run's pruned model under `models/<run id>/`.
    pub keep_models: bool,
    /// Time each written model's pruned layers at this batch size.
    pub speed_batch: Option<usize>,
    /// Time each written model end to end against the dense model
    /// (`--time-whole`) for the frontier chart.
    pub time_whole: bool,
    /// Target key for the per-layer chart (`None`: the highest sparsity, or
    /// the first target).
    pub focus: Option<String>,
    /// `--only` / `--skip` as given, for the record.
    pub globs: (Vec<String>, Vec<String>),
}

impl CompareConfig {
    /// The runs, method-major: every target of the first method, then the
    /// next method's.
    pub fn runs(&self) -> Vec<Target> {
        let mut runs = Vec::with_capacity(self.methods.len() * self.targets.len());
        for &method in &self.methods {
            for &pattern in &self.targets {
                runs.push(Target::new(method, pattern));
            }
        }
        runs
    }
}

/// What a finished (or stopped) comparison produced.
#[derive(Clone, Debug)]
pub struct Outcome {
    /// The record as last written.
    pub comparison: Comparison,
    /// Files and folders written.
    pub outputs: Vec<PathBuf>,
}

impl Outcome {
    /// The record as a page source.
    pub fn source(&self) -> Source {
        Source { label: "this run".to_string(), path: None, comparison: self.comparison.clone() }
    }
}

/// Keeps the record, parks weights, evaluates and writes finished runs.
struct Record<'a> {
    cfg: &'a CompareConfig,
    model: &'a Model,
    control: &'a Control,
    comp: Comparison,
    /// Every selected layer, in record order.
    planned: Vec<Planned>,
    /// Layer name → index in `planned` and `comp.layers`.
    index: BTreeMap<String, usize>,
    parking: Option<Parking>,
    outputs: Vec<PathBuf>,
    last_checkpoint: Instant,
    progress: &'a dyn Fn(Progress<'_>),
}

impl Record<'_> {
    fn checkpoint(&mut self) -> Result<()> {
        write_checkpoint(&self.cfg.out_dir, &self.comp, self.control)?;
        self.last_checkpoint = Instant::now();
        Ok(())
    }

    /// The parked weights of run `run`, in storage orientation by name.
    fn weights(&self, run: usize) -> Result<BTreeMap<String, Vec<f64>>> {
        let parking = self.parking.as_ref().expect("parked when models or evaluation are kept");
        let mut replaced = BTreeMap::new();
        for (li, layer) in self.planned.iter().enumerate() {
            replaced.insert(layer.name.clone(), parking.fetch(run, li, layer.dtype)?);
        }
        Ok(replaced)
    }

    /// Write run `run`'s model under `models/<run id>/`: the file of a
    /// single-file model, or the folder of a sharded or folder model.
    fn write_model(&mut self, run: usize, replaced: &BTreeMap<String, Vec<f64>>) -> Result<()> {
        (self.progress)(Progress::Writing);
        let target = self.cfg.runs()[run].clone();
        let (dir, out) = model_output(self.cfg, self.model, &self.comp.runs[run].id);
        let meta = driver::model_meta(&self.cfg.job, &target, self.planned.len());
        // Held while files are staged and renamed: a signal that stops the
        // process at once waits, so no temporary is left behind.
        let _guard = self.control.writing.lock().unwrap_or_else(|e| e.into_inner());
        let mut staged = io::Staged::new();
        staged.folder(&dir)?;
        let edits = io::Edits { replaced, ..io::Edits::default() };
        let stage = || io::stage_model(&mut staged, self.model, &out, &edits, &meta);
        driver::write_checked(self.model, stage)?;
        staged.commit()?;
        self.comp.runs[run].model_output = Some(out.display().to_string());
        self.outputs.push(out);
        Ok(())
    }
}

impl Sink for Record<'_> {
    fn statistics(&mut self, layers: &[Planned], stats: &BlockStats) {
        for layer in layers {
            let info = &mut self.comp.layers[self.index[&layer.name]];
            if info.calibration_rows == 0 {
                let g = &stats.grams[&layer.group];
                info.calibration_rows = g.calib.rows();
                info.holdout_rows = g.holdout.rows();
                info.gram_seconds = stats.seconds / layers.len() as f64;
            }
        }
    }

    fn solved(&mut self, run: usize, layer: &Planned, s: Solved) -> Result<()> {
        if let Some(p) = &mut self.parking {
            let li = self.index[&layer.name];
            p.park(run, li, &layer.to_storage(s.values), layer.dtype)?;
        }
        let r = &mut self.comp.runs[run];
        r.layers.push(s.report);
        r.resum();
        if self.last_checkpoint.elapsed().as_secs_f64() >= CHECKPOINT_SECONDS {
            self.checkpoint()?;
        }
        Ok(())
    }

    fn run_done(&mut self, run: usize, timing: Option<PhaseTimes>) -> Result<()> {
        let r = &mut self.comp.runs[run];
        r.complete = true;
        if let (Some(t), data::INPUTS_OWN) = (timing, r.calibration_inputs.as_str()) {
            r.summary.seconds = t.forward + t.gram + t.solve;
        }
        if self.parking.is_some() {
            let replaced = self.weights(run)?;
            if let Some(opts) = &self.cfg.job.eval {
                (self.progress)(Progress::Evaluating);
                let e = crate::evaluate::evaluate(self.model, &replaced, opts)?;
                self.comp.runs[run].end_to_end = Some(end_to_end(&e));
            }
            if self.cfg.keep_models {
                self.write_model(run, &replaced)?;
            }
            if let Some(p) = &mut self.parking {
                p.release(run);
            }
        }
        self.checkpoint()
    }

    fn stop_requested(&self) -> bool {
        self.control.stop.load(Ordering::SeqCst)
    }

    fn whole_runs(&self) -> bool {
        self.parking.is_some()
    }
}

/// Run every method at every target and write `comparison.json`,
/// `comparison.html` and, with `keep_models`, the pruned models into
/// `cfg.out_dir`.
///
/// A stop request ([`Control::stop`]) returns `Ok` with status
/// [`Status::Interrupted`] after writing what finished.
///
/// # Errors
/// Usage and input errors, found before any file is written.
/// [`crate::ErrorKind::Solve`] or [`crate::ErrorKind::Output`] for failures
/// while running; the files then hold what finished, with status `failed`.
pub fn compare(
    cfg: &CompareConfig,
    progress: &dyn Fn(Progress<'_>),
    control: &Control,
) -> Result<Outcome> {
    let created = data::utc_now();
    let job = &cfg.job;
    let targets = cfg.runs();
    if targets.is_empty() {
        return Err(Error::usage("nothing to compare: give --methods and a target"));
    }
    let eval_text = job.eval.as_ref().map(|e| e.text.as_path());
    let (kind, inputs) = match &job.calibration {
        Calibration::Activations(_) if eval_text.is_some() => {
            return Err(Error::usage(format!(
                "--eval-text {}: end-to-end figures need the model run on text; use --text \
                 calibration, or leave --eval-text out to compare layer errors",
                eval_text.expect("matched").display()
            )));
        }
        Calibration::Activations(_) => ("activations", data::INPUTS_SHARED),
        Calibration::Text(t) if t.propagate => ("text", data::INPUTS_OWN),
        Calibration::Text(_) => ("text", data::INPUTS_SHARED),
    };
    let model = Model::open(&job.model)?;
    let calib = job.calibration.path();
    if let Some(t) = eval_text {
        crate::tokenize::read_text(t)?;
    }
    if let Calibration::Text(t) = &job.calibration {
        crate::tokenize::read_text(&t.path)?;
    }
    let source = driver::open_source(job, &targets, &model)?;
    let mut read = vec![calib];
    read.extend(eval_text);
    let read_files = crate::outputs::input_files(&model, &read);
    check_out_dir(&cfg.out_dir, &read_files)?;
    if cfg.keep_models {
        for t in &targets {
            let id = data::run_id(t.method.name(), &data::target_key(t.pattern));
            check_kept_model(cfg, &model, &id, &read_files)?;
        }
    }
    if cfg.keep_models {
        for n in crate::outputs::skipped_notes(&model) {
            progress(Progress::Note(&n));
        }
    }
    std::fs::create_dir(&cfg.out_dir)
        .or_else(|e| if cfg.out_dir.is_dir() { Ok(()) } else { Err(e) })
        .map_err(|e| {
            Error::usage(format!("--out-dir {}: cannot create it: {e}", cfg.out_dir.display()))
        })?;

    let planned: Vec<Planned> = source.blocks().iter().flatten().cloned().collect();
    let layers = planned
        .iter()
        .map(|l| LayerInfo {
            name: l.name.clone(),
            shape: l.shape,
            calibration_rows: 0,
            holdout_rows: 0,
            gram_seconds: 0.0,
        })
        .collect();
    let description = match &job.calibration {
        // Rows are known once statistics are built; see `describe_rows`.
        Calibration::Activations(p) => format!("activations from {}", p.display()),
        Calibration::Text(t) => format!(
            "text from {}, run through the model ({})",
            t.path.display(),
            if t.propagate {
                "sequential: each run calibrates on its own pruned blocks' outputs"
            } else {
                "dense inputs everywhere (--no-propagate), shared by every run"
            }
        ),
    };
    let comp = Comparison {
        format: data::FORMAT.to_string(),
        format_version: data::FORMAT_VERSION,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        created,
        status: Status::Running,
        status_detail: None,
        model: job.model.display().to_string(),
        model_fingerprint: Some(model.fingerprint()),
        calibration: CalibrationInfo {
            kind: kind.to_string(),
            path: calib.display().to_string(),
            holdout: job.holdout,
            description,
        },
        settings: settings(cfg),
        layers,
        runs: targets.iter().map(|t| data::new_run(t.method, t.pattern, inputs)).collect(),
        notice: VALIDATION_NOTICE.to_string(),
    };
    let parking = (cfg.keep_models || job.eval.is_some()).then(Parking::default);
    let index = planned.iter().enumerate().map(|(i, l)| (l.name.clone(), i)).collect();
    let mut record = Record {
        cfg,
        model: &model,
        control,
        comp,
        planned,
        index,
        parking,
        outputs: vec![cfg.out_dir.join(JSON_NAME), cfg.out_dir.join(HTML_NAME)],
        last_checkpoint: Instant::now(),
        progress,
    };
    let finish = driver::drive(job, &targets, &model, source, &mut record, progress);
    let Record { mut comp, parking, mut outputs, .. } = record;
    if kind == "activations" {
        comp.calibration.description = describe_rows(calib, &comp.layers);
    }
    drop(parking);
    if comp.runs.iter().all(|r| r.model_output.is_none()) {
        // No model written: leave no empty `models/` behind.
        let _ = std::fs::remove_dir(cfg.out_dir.join("models"));
    }
    let mut failure = None;
    comp.status = match finish {
        Err(e) => {
            comp.status_detail = Some(e.to_string());
            failure = Some(e);
            Status::Failed
        }
        Ok(driver::Finish::Stopped) => Status::Interrupted,
        Ok(driver::Finish::Complete) => Status::Complete,
    };
    if failure.is_none() {
        let timed = measure_speed(cfg, &mut comp, progress)
            .and_then(|()| latency::measure_whole(cfg, &model, &mut comp, progress));
        if let Err(e) = timed {
            comp.status = Status::Failed;
            comp.status_detail = Some(e.to_string());
            failure = Some(e);
        }
    }
    write_checkpoint(&cfg.out_dir, &comp, control)?;
    outputs.dedup();
    match failure {
        Some(e) => Err(e),
        None => Ok(Outcome { comparison: comp, outputs }),
    }
}

/// `activations from A, F fitted + H held-out rows per layer`, from the
/// layers whose statistics were built.
fn describe_rows(path: &Path, layers: &[LayerInfo]) -> String {
    let seen: Vec<&LayerInfo> = layers.iter().filter(|l| l.calibration_rows > 0).collect();
    let rows = seen.first().map(|l| (l.calibration_rows, l.holdout_rows)).unwrap_or((0, 0));
    let uniform = seen.iter().all(|l| (l.calibration_rows, l.holdout_rows) == rows);
    format!(
        "activations from {}, {} fitted + {} held-out rows {}",
        path.display(),
        rows.0,
        rows.1,
        if uniform { "per layer" } else { "in the first layer (other layers differ)" }
    )
}

/// Refuse an output folder that is a file, that cannot be created or
/// take new files, or whose outputs would replace one of `inputs` or a
/// special file.
fn check_out_dir(dir: &Path, inputs: &[PathBuf]) -> Result<()> {
    crate::outputs::check_dir("--out-dir", dir)?;
    for name in [JSON_NAME, HTML_NAME] {
        let p = dir.join(name);
        if inputs.contains(&io::canonical_target(&p)) {
            return Err(Error::usage(format!(
                "--out-dir {}: refusing to overwrite the input {}",
                dir.display(),
                p.display()
            )));
        }
        if let Ok(m) = std::fs::metadata(&p) {
            if !m.is_file() {
                return Err(Error::usage(format!(
                    "--out-dir {}: {} is not a regular file ({}); lopper will not replace it",
                    dir.display(),
                    p.display(),
                    io::file_kind(&m)
                )));
            }
        }
    }
    Ok(())
}

/// Where run `id`'s model is kept: its folder under `models/`, and the
/// model's output path (the file of a single-file model, else the folder).
fn model_output(cfg: &CompareConfig, model: &Model, id: &str) -> (PathBuf, PathBuf) {
    let dir = cfg.out_dir.join("models").join(id);
    let out = match model.layout() {
        io::Layout::File(p) => dir.join(p.file_name().unwrap_or_default()),
        _ => dir.clone(),
    };
    (dir, out)
}

/// Refuse a kept model (`--keep-models`) whose files would replace an
/// input or a special file, before any work.
fn check_kept_model(
    cfg: &CompareConfig,
    model: &Model,
    id: &str,
    inputs: &[PathBuf],
) -> Result<()> {
    let (_, out) = model_output(cfg, model, id);
    let (_, files) =
        io::model_targets(model, &out).map_err(|e| Error::from(e).context("--keep-models"))?;
    for f in files.iter().chain([&out]) {
        let refuse = |what: String| {
            Err(Error::usage(format!("--keep-models: {} {what}", f.display())).with_path(f))
        };
        if inputs.contains(&io::canonical_target(f)) {
            return refuse("would replace an input file".to_string());
        }
        match std::fs::metadata(f) {
            Ok(m) if f == &out && m.is_dir() && !matches!(model.layout(), io::Layout::File(_)) => {}
            Ok(m) if !m.is_file() => {
                return refuse(format!(
                    "is not a regular file ({}); lopper will not replace it",
                    io::file_kind(&m)
                ))
            }
            _ => {}
        }
    }
    Ok(())
}

/// The target key used for `--focus` by default: the highest unstructured
/// sparsity, else the first target.
pub fn default_focus(targets: &[Pattern]) -> Option<String> {
    let top = targets
        .iter()
        .filter_map(|p| match p {
            Pattern::Unstructured { sparsity, .. } => Some(*sparsity),
            Pattern::NofM { .. } => None,
        })
        .max_by(|a, b| a.total_cmp(b));
    match top {
        Some(s) => Some(format!("{s}")),
        None => targets.first().map(|p| data::target_key(*p)),
    }
}

/// The end-to-end figures of one run, from the evaluation summary.
fn end_to_end(e: &crate::report::EvalSummary) -> data::EndToEnd {
    let details = serde_json::to_value(e).unwrap_or_default();
    match (e.cosine_mean, e.perplexity_pruned) {
        (Some(c), _) => data::EndToEnd {
            metric: "mean cosine".to_string(),
            value: c,
            dense: Some(1.0),
            higher_is_better: true,
            details,
        },
        (None, p) => data::EndToEnd {
            metric: "perplexity".to_string(),
            value: p.unwrap_or(f64::NAN),
            dense: e.perplexity_dense,
            higher_is_better: false,
            details,
        },
    }
}

/// With `speed_batch`, time every written run model's pruned layers, dense
/// against sparse kernels, and record the sums over layers.
fn measure_speed(
    cfg: &CompareConfig,
    comp: &mut Comparison,
    progress: &dyn Fn(Progress<'_>),
) -> Result<(), Error> {
    let Some(batch) = cfg.speed_batch else { return Ok(()) };
    let speed = crate::deploy::SpeedConfig {
        batches: vec![batch],
        threads: cfg.job.threads,
        min_time: 0.1,
        selection: cfg.job.selection.clone(),
        stream_bytes: 0,
    };
    for run in comp.runs.iter_mut() {
        let Some(path) = &run.model_output else { continue };
        progress(Progress::Writing);
        let model = Model::open(Path::new(path))?;
        let report = crate::deploy::measure(&model, &speed, &|_, _, _| {})
            .map_err(|e| e.context(format!("timing {}", run.id)))?;
        if let Some(t) = report.totals.timings.first() {
            run.speed = Some(data::Speed {
                batch: t.batch,
                dense_seconds: t.dense_seconds,
                sparse_seconds: t.sparse_seconds,
            });
        }
    }
    Ok(())
}

/// The settings block of the record.
fn settings(cfg: &CompareConfig) -> CompareSettings {
    let base = &cfg.job;
    CompareSettings {
        methods: cfg.methods.iter().map(Method::to_string).collect(),
        targets: cfg.targets.iter().map(|p| data::target_key(*p)).collect(),
        scope: cfg
            .targets
            .iter()
            .find_map(|p| match p {
                Pattern::Unstructured { .. } => Some(data::scope_name(*p)),
                Pattern::NofM { .. } => None,
            })
            .unwrap_or("row")
            .to_string(),
        ridge: base.ridge.to_json(),
        max_sweeps: base.l0.max_sweeps,
        layer_seconds: base.l0.max_seconds,
        threads: base.threads,
        only: cfg.globs.0.clone(),
        skip: cfg.globs.1.clone(),
        keep_models: cfg.keep_models,
        focus: cfg.focus.clone().or_else(|| default_focus(&cfg.targets)).unwrap_or_default(),
        eval_text: base.eval.as_ref().map(|e| e.text.display().to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::solve::Scope;

    fn layer(rows: usize, held: usize) -> LayerInfo {
        LayerInfo {
            name: "l".into(),
            shape: [2, 4],
            calibration_rows: rows,
            holdout_rows: held,
            gram_seconds: 0.0,
        }
    }

    #[test]
    fn rows_are_described_from_the_layers_that_have_statistics() {
        let p = Path::new("acts.safetensors");
        let d = describe_rows(p, &[layer(90, 10), layer(90, 10), layer(0, 0)]);
        assert_eq!(d, "activations from acts.safetensors, 90 fitted + 10 held-out rows per layer");
        let d = describe_rows(p, &[layer(90, 10), layer(45, 5)]);
        assert!(d.ends_with("in the first layer (other layers differ)"), "{d}");
    }

    #[test]
    fn default_focus_is_the_highest_sparsity_else_the_first_pattern() {
        let u = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let nm = Pattern::NofM { n: 2, m: 4 };
        assert_eq!(default_focus(&[u(0.5), nm, u(0.9), u(0.7)]).as_deref(), Some("0.9"));
        assert_eq!(default_focus(&[nm, Pattern::NofM { n: 1, m: 4 }]).as_deref(), Some("2:4"));
        assert_eq!(default_focus(&[]), None);
    }

    #[test]
    fn out_dir_must_be_a_folder_whose_files_are_not_inputs() {
        let dir = std::env::temp_dir().join(format!("lopper-outdir-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let json = dir.join(JSON_NAME);
        std::fs::write(&json, "{}").unwrap();
        let inputs = vec![io::canonical_target(&json)];
        let e = check_out_dir(&dir, &inputs).unwrap_err();
        assert_eq!(e.kind(), crate::error::ErrorKind::Usage);
        assert!(e.to_string().contains("refusing to overwrite the input"), "{e}");
        let e = check_out_dir(&json, &[]).unwrap_err();
        assert!(e.to_string().contains("exists and is not a folder"), "{e}");
        assert!(check_out_dir(&dir.join("new"), &inputs).is_ok());
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn runs_are_method_major() {
        let u = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let nm = Pattern::NofM { n: 2, m: 4 };
        let job = JobConfig {
            model: "m".into(),
            calibration: Calibration::Activations("a".into()),
            ridge: driver::Ridge::default(),
            holdout: 0.1,
            selection: Default::default(),
            threads: 1,
            l0: Default::default(),
            trace: false,
            certify: None,
            eval: None,
        };
        let cfg = CompareConfig {
            job,
            methods: vec![Method::Obs, Method::L0],
            targets: vec![u, nm],
            out_dir: "o".into(),
            keep_models: false,
            speed_batch: None,
            time_whole: false,
            focus: None,
            globs: (vec![], vec![]),
        };
        let ids: Vec<String> = cfg
            .runs()
            .iter()
            .map(|t| data::run_id(t.method.name(), &data::target_key(t.pattern)))
            .collect();
        assert_eq!(ids, ["obs-0.5", "obs-2of4", "l0-0.5", "l0-2of4"]);
    }
}
