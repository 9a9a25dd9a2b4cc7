//! `lopper compare`: every chosen method at every chosen target on the same
//! calibration data, and the record and page that put them side by side.
//!
//! This module owns the comparison driver ([`compare`]), the
//! `comparison.json` record ([`data`]), the HTML page ([`page`]) and the
//! terminal summary ([`table`]). It reuses the prune pipeline's checks
//! ([`crate::pipeline`]'s plan) and its per-layer step
//! ([`pipeline::solve_layer`]), so a run here gives the same figures as
//! `lopper prune` with the same method, target and settings.
//!
//! Key decisions:
//! - Layers are the outer loop. Each layer's activations are read once and
//!   reduced to its Gram matrices, then every method × target is solved on
//!   them; memory is one layer's statistics, as for `prune`. Runs therefore
//!   all finish together at the last layer.
//! - What finished is kept: after a solve, at most every
//!   [`CHECKPOINT_SECONDS`], and at the end, `comparison.json` and
//!   `comparison.html` are rewritten atomically (temp file + rename) with
//!   every finished solve, status `running`. A stop request ([`Control`])
//!   is honoured between solves: the files are written once more with status
//!   `interrupted`, runs that finished every layer keep their models
//!   (`--keep-models`), and the caller exits non-zero.
//! - `--keep-models` parks each solved layer's weights, encoded in the
//!   layer's dtype, in a hidden folder under `models/` until its run has
//!   every layer, then writes the run's model with [`io::write_model`] and
//!   removes the parked files. Without it no weights are written.
//! - Text calibration (`Calibration::Text`) runs the model once per method ×
//!   target: sequential calibration gives each run its own propagated inputs
//!   ([`data::INPUTS_OWN`]), since every run's pruned blocks feed its next
//!   ones. Runs are the outer loop there; a stop request is honoured between
//!   runs, and `--eval-text` adds each run's end-to-end figures.

pub mod data;
pub mod page;
mod svg;
pub mod table;

use crate::calib::{holdout_count, LayerGrams};
use crate::io::{self, Model, TensorFile};
use crate::pipeline::{self, Calibration, ErrorKind, PruneConfig, Ridge};
use crate::report::VALIDATION_NOTICE;
use crate::solve::{Method, Pattern};
use data::{CalibrationInfo, CompareSettings, Comparison, LayerInfo, Run, Source, Status};
use faer::{Mat, Par};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;
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
    /// Model, calibration, ridge, hold-out, selection, threads and local
    /// search settings; `method`, `pattern`, `output`, `report` and `trace`
    /// are ignored (each run sets its own method and pattern).
    pub base: PruneConfig,
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
    /// Target key for the per-layer chart (`None`: the highest sparsity, or
    /// the first target).
    pub focus: Option<String>,
    /// Held-out text for end-to-end figures (refused until text evaluation lands).
    pub eval_text: Option<PathBuf>,
    /// `--only` / `--skip` as given, for the record.
    pub globs: (Vec<String>, Vec<String>),
}

/// Shared between the driver and whoever may stop it (a signal handler).
#[derive(Debug, Default)]
pub struct Control {
    /// Set to ask the driver to stop after the current solve.
    pub stop: AtomicBool,
    /// Held by the driver while it writes files; a handler that wants to
    /// exit at once takes it first, so no file is left half-written.
    pub writing: Mutex<()>,
    /// Scratch folders to remove if the process exits without unwinding.
    pub scratch: Mutex<Vec<PathBuf>>,
}

impl Control {
    /// Remove the scratch folders (for a handler about to exit at once).
    pub fn remove_scratch(&self) {
        let dirs = self.scratch.lock().unwrap_or_else(|e| e.into_inner());
        for d in dirs.iter() {
            let _ = std::fs::remove_dir_all(d);
        }
    }
}

/// Progress events for a front end.
#[derive(Clone, Copy, Debug)]
pub enum Progress<'a> {
    /// This many solves (layers × runs) lie ahead.
    Start(usize),
    /// Reading the inputs of this layer and building its statistics.
    Layer(&'a str),
    /// Solving this layer for this run.
    Solve(&'a str, &'a str),
    /// This many solves are done.
    Done(usize),
    /// Writing pruned models.
    Writing,
}

/// A comparison failure: one line naming its object.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Error {
    kind: ErrorKind,
    message: String,
}

impl Error {
    fn input(message: impl Into<String>) -> Self {
        Error { kind: ErrorKind::Input, message: message.into() }
    }

    /// Whose fault ([`ErrorKind::Input`] means exit code 2).
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }
}

impl std::fmt::Display for Error {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for Error {}

impl From<pipeline::Error> for Error {
    fn from(e: pipeline::Error) -> Self {
        Error { kind: e.kind(), message: e.to_string() }
    }
}

impl From<io::LoadError> for Error {
    fn from(e: io::LoadError) -> Self {
        Error::input(e.to_string())
    }
}

impl From<io::WriteError> for Error {
    fn from(e: io::WriteError) -> Self {
        Error { kind: ErrorKind::Output, message: e.to_string() }
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

/// Parked weights of solved layers, waiting for their run to finish.
struct Parking {
    dir: PathBuf,
}

impl Parking {
    fn path(&self, run: usize, layer: usize) -> PathBuf {
        self.dir.join(format!("{run}-{layer}.bin"))
    }

    fn park(
        &self,
        run: usize,
        layer: usize,
        values: &[f64],
        dtype: io::Dtype,
    ) -> Result<(), Error> {
        let mut bytes = Vec::new();
        io::dtype::encode_f64(dtype, values, &mut bytes).map_err(|e| Error {
            kind: ErrorKind::Output,
            message: format!("{}: cannot encode weights: {e}", self.dir.display()),
        })?;
        let p = self.path(run, layer);
        std::fs::write(&p, &bytes).map_err(|e| Error {
            kind: ErrorKind::Output,
            message: format!("{}: cannot park pruned weights: {e}", p.display()),
        })
    }

    fn fetch(&self, run: usize, layer: usize, dtype: io::Dtype) -> Result<Vec<f64>, Error> {
        let p = self.path(run, layer);
        let bytes = std::fs::read(&p).map_err(|e| Error {
            kind: ErrorKind::Output,
            message: format!("{}: cannot read parked weights: {e}", p.display()),
        })?;
        let mut out = Vec::new();
        io::dtype::decode_f64(dtype, &bytes, &mut out);
        Ok(out)
    }
}

impl Drop for Parking {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.dir);
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
/// [`ErrorKind::Input`] for anything wrong with the inputs or options,
/// found before any file is written. [`ErrorKind::Solve`] or
/// [`ErrorKind::Output`] for failures while running; the files then hold
/// what finished, with status `failed`.
pub fn compare(
    cfg: &CompareConfig,
    progress: &dyn Fn(Progress<'_>),
    control: &Control,
) -> Result<Outcome, Error> {
    let created = data::utc_now();
    let base = &cfg.base;
    let apath = match &base.calibration {
        Calibration::Activations(p) => p.clone(),
        Calibration::Text(t) => return compare_text(cfg, t, created, progress, control),
    };
    if let Some(p) = &cfg.eval_text {
        return Err(Error::input(format!(
            "--eval-text {}: end-to-end figures need the model run on text; use --text \
             calibration, or leave --eval-text out to compare layer errors",
            p.display()
        )));
    }
    let model = Model::open(&base.model)?;
    let acts = TensorFile::open(&apath)?;

    // Every run's plan must pass (patterns against widths, memory per method).
    let mut runs_cfg = Vec::new();
    let mut runs = Vec::new();
    for &method in &cfg.methods {
        for &pattern in &cfg.targets {
            let rc = PruneConfig {
                method,
                pattern,
                output: cfg.out_dir.clone(),
                report: None,
                trace: None,
                ..base.clone()
            };
            runs.push(data::new_run(method, pattern, data::INPUTS_SHARED));
            runs_cfg.push(rc);
        }
    }
    let Some(first) = runs_cfg.first() else {
        return Err(Error::input("nothing to compare: give --methods and a target"));
    };
    let jobs = pipeline::plan(first, &model, &acts, &apath)?;
    for rc in &runs_cfg[1..] {
        pipeline::plan(rc, &model, &acts, &apath)?;
    }
    check_out_dir(cfg, &model, &apath)?;
    std::fs::create_dir_all(&cfg.out_dir).map_err(|e| {
        Error::input(format!("--out-dir {}: cannot create it: {e}", cfg.out_dir.display()))
    })?;

    let layers: Vec<LayerInfo> = jobs
        .iter()
        .map(|j| {
            let held = holdout_count(j.rows, base.holdout);
            LayerInfo {
                name: j.weight.name.clone(),
                shape: [j.weight.shape[0], j.weight.shape[1]],
                calibration_rows: j.rows - held,
                holdout_rows: held,
                gram_seconds: 0.0,
            }
        })
        .collect();
    let rows = layers.first().map(|l| (l.calibration_rows, l.holdout_rows)).unwrap_or((0, 0));
    let uniform = layers.iter().all(|l| (l.calibration_rows, l.holdout_rows) == rows);
    let description = format!(
        "activations from {}, {} fitted + {} held-out rows {}",
        apath.display(),
        rows.0,
        rows.1,
        if uniform { "per layer" } else { "in the first layer (other layers differ)" }
    );
    let mut comp = Comparison {
        format: data::FORMAT.to_string(),
        format_version: data::FORMAT_VERSION,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        created,
        status: Status::Running,
        status_detail: None,
        model: base.model.display().to_string(),
        calibration: CalibrationInfo {
            kind: "activations".to_string(),
            path: apath.display().to_string(),
            holdout: base.holdout,
            description,
        },
        settings: settings(cfg, None),
        layers,
        runs,
        notice: VALIDATION_NOTICE.to_string(),
    };

    let parking = if cfg.keep_models {
        let dir = cfg.out_dir.join("models").join(format!(".parked-{}", std::process::id()));
        std::fs::create_dir_all(&dir).map_err(|e| Error {
            kind: ErrorKind::Output,
            message: format!("{}: cannot create it: {e}", dir.display()),
        })?;
        control.scratch.lock().unwrap_or_else(|e| e.into_inner()).push(dir.clone());
        Some(Parking { dir })
    } else {
        None
    };

    let par = if base.threads > 1 { Par::rayon(base.threads) } else { Par::Seq };
    let mut outputs = vec![cfg.out_dir.join(JSON_NAME), cfg.out_dir.join(HTML_NAME)];
    progress(Progress::Start(jobs.len() * runs_cfg.len()));
    let mut done = 0;
    let mut last = Instant::now();
    let mut failure: Option<Error> = None;
    let mut interrupted = false;
    'layers: for (li, job) in jobs.iter().enumerate() {
        if control.stop.load(Ordering::SeqCst) {
            interrupted = true;
            break;
        }
        let info = job.weight;
        progress(Progress::Layer(&info.name));
        let t0 = Instant::now();
        let grams = match layer_stats(&model, &acts, job, base.holdout, par) {
            Ok(g) => g,
            Err(e) => {
                failure = Some(e);
                break;
            }
        };
        comp.layers[li].gram_seconds = t0.elapsed().as_secs_f64();
        let (w, grams) = grams;
        for (ri, rc) in runs_cfg.iter().enumerate() {
            if control.stop.load(Ordering::SeqCst) {
                interrupted = true;
                break 'layers;
            }
            progress(Progress::Solve(&info.name, &comp.runs[ri].id));
            let solved = pipeline::solve_layer(rc, &info.name, info.dtype, w.as_ref(), &grams, par)
                .map_err(Error::from)
                .and_then(|s| {
                    if let Some(p) = &parking {
                        p.park(ri, li, &s.values, info.dtype)?;
                    }
                    Ok(s)
                });
            match solved {
                Ok(s) => {
                    let run = &mut comp.runs[ri];
                    run.layers.push(s.report);
                    run.resum();
                }
                Err(e) => {
                    failure = Some(e);
                    break 'layers;
                }
            }
            done += 1;
            progress(Progress::Done(done));
            if last.elapsed().as_secs_f64() >= CHECKPOINT_SECONDS {
                checkpoint(cfg, &comp, control)?;
                last = Instant::now();
            }
        }
    }
    let n_layers = jobs.len();
    for r in &mut comp.runs {
        r.complete = r.layers.len() == n_layers;
    }
    comp.status = match (&failure, interrupted) {
        (Some(e), _) => {
            comp.status_detail = Some(e.to_string());
            Status::Failed
        }
        (None, true) => Status::Interrupted,
        (None, false) => Status::Complete,
    };

    if let Some(parking) = &parking {
        progress(Progress::Writing);
        let _guard = control.writing.lock().unwrap_or_else(|e| e.into_inner());
        for ri in 0..comp.runs.len() {
            if !comp.runs[ri].complete {
                continue;
            }
            match write_run_model(cfg, &model, &jobs, parking, ri, &comp.runs[ri]) {
                Ok(path) => {
                    comp.runs[ri].model_output = Some(path.display().to_string());
                    outputs.push(path);
                }
                Err(e) => {
                    comp.status = Status::Failed;
                    comp.status_detail = Some(e.to_string());
                    failure.get_or_insert(e);
                    break;
                }
            }
        }
    }
    drop(parking);
    if comp.runs.iter().all(|r| !r.complete) || !cfg.keep_models {
        // No model written: leave no empty `models/` behind.
        let _ = std::fs::remove_dir(cfg.out_dir.join("models"));
    }
    if failure.is_none() {
        if let Err(e) = measure_speed(cfg, &mut comp, progress) {
            comp.status = Status::Failed;
            comp.status_detail = Some(e.to_string());
            failure = Some(e);
        }
    }
    checkpoint(cfg, &comp, control)?;
    match failure {
        Some(e) => Err(e),
        None => Ok(Outcome { comparison: comp, outputs }),
    }
}

/// Refuse an output folder that is a file, or whose outputs would replace
/// an input.
fn check_out_dir(cfg: &CompareConfig, model: &Model, acts: &Path) -> Result<(), Error> {
    let d = &cfg.out_dir;
    if d.exists() && !d.is_dir() {
        return Err(Error::input(format!("--out-dir {}: exists and is not a folder", d.display())));
    }
    let mut inputs = model.input_files();
    inputs.push(pipeline::canonical(acts));
    for name in [JSON_NAME, HTML_NAME] {
        let p = d.join(name);
        if inputs.contains(&pipeline::canonical(&p)) {
            return Err(Error::input(format!(
                "--out-dir {}: refusing to overwrite the input {}",
                d.display(),
                p.display()
            )));
        }
    }
    Ok(())
}

/// Read one layer's weight and reduce its activations to Gram matrices.
fn layer_stats(
    model: &Model,
    acts: &TensorFile,
    job: &pipeline::Job<'_>,
    holdout: f64,
    par: Par,
) -> Result<(Mat<f64>, LayerGrams), Error> {
    let info = job.weight;
    let (d_out, d_in) = (info.shape[0], info.shape[1]);
    let flat = model.read_f64(&info.name)?;
    let w = Mat::from_fn(d_out, d_in, |r, c| flat[r * d_in + c]);
    drop(flat);
    let mut grams = LayerGrams::new(d_in);
    let step = pipeline::chunk_rows(d_in);
    let mut start = 0;
    while start < job.rows {
        let end = (start + step).min(job.rows);
        let x = acts.read_rows_f64(&info.name, start..end)?;
        grams.add_chunk(&x, start, holdout, par);
        start = end;
    }
    Ok((w, grams))
}

/// Write one finished run's pruned model under `models/<run id>/` and
/// return the file (single-file model) or folder written.
fn write_run_model(
    cfg: &CompareConfig,
    model: &Model,
    jobs: &[pipeline::Job<'_>],
    parking: &Parking,
    ri: usize,
    run: &Run,
) -> Result<PathBuf, Error> {
    let dir = cfg.out_dir.join("models").join(&run.id);
    let out = match model.layout() {
        io::Layout::File(p) => {
            std::fs::create_dir_all(&dir).map_err(|e| Error {
                kind: ErrorKind::Output,
                message: format!("{}: cannot create it: {e}", dir.display()),
            })?;
            dir.join(p.file_name().unwrap_or_default())
        }
        _ => dir.clone(),
    };
    let mut replaced = BTreeMap::new();
    for (li, job) in jobs.iter().enumerate() {
        replaced.insert(job.weight.name.clone(), parking.fetch(ri, li, job.weight.dtype)?);
    }
    let meta = run_meta(cfg, run, jobs.len());
    io::write_model(model, &out, &replaced, &meta)?;
    Ok(out)
}

/// Write `comparison.json` and `comparison.html` atomically, holding the
/// write lock so an impatient stop never cuts a file short.
fn checkpoint(cfg: &CompareConfig, comp: &Comparison, control: &Control) -> Result<(), Error> {
    let _guard = control.writing.lock().unwrap_or_else(|e| e.into_inner());
    let json = comp.to_json();
    io::write_atomic(&cfg.out_dir.join(JSON_NAME), |w| {
        std::io::Write::write_all(w, json.as_bytes())
    })?;
    let source = Source { label: "this run".to_string(), path: None, comparison: comp.clone() };
    let html = page::render(std::slice::from_ref(&source), Some(&comp.settings.focus));
    io::write_atomic(&cfg.out_dir.join(HTML_NAME), |w| {
        std::io::Write::write_all(w, html.as_bytes())
    })?;
    Ok(())
}

/// The `lopper.*` metadata of a run's pruned model.
fn run_meta(cfg: &CompareConfig, run: &Run, layers: usize) -> BTreeMap<String, String> {
    let mut meta = BTreeMap::new();
    meta.insert("lopper.version".to_string(), env!("CARGO_PKG_VERSION").to_string());
    meta.insert("lopper.method".to_string(), run.method.clone());
    match &run.pattern {
        Some(p) => meta.insert("lopper.pattern".to_string(), p.clone()),
        None => meta.insert("lopper.sparsity".to_string(), run.target.clone()),
    };
    meta.insert("lopper.scope".to_string(), run.scope.clone());
    let ridge = match cfg.base.ridge {
        Ridge::Fixed(a) => a.to_string(),
        Ridge::Auto { .. } => "auto".to_string(),
    };
    meta.insert("lopper.ridge".to_string(), ridge);
    meta.insert("lopper.holdout".to_string(), cfg.base.holdout.to_string());
    meta.insert("lopper.pruned_layers".to_string(), layers.to_string());
    meta
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

/// [`compare`] with text calibration: one sequential run of the model per
/// method × target.
fn compare_text(
    cfg: &CompareConfig,
    src: &crate::textcal::TextSource,
    created: String,
    progress: &dyn Fn(Progress<'_>),
    control: &Control,
) -> Result<Outcome, Error> {
    let base = &cfg.base;
    let model = Model::open(&base.model)?;
    if let Some(p) = &cfg.eval_text {
        crate::textcal::read_text(p)?;
    }
    crate::textcal::read_text(&src.path)?;
    let mut runs_cfg = Vec::new();
    let mut runs = Vec::new();
    let inputs = if src.propagate { data::INPUTS_OWN } else { data::INPUTS_SHARED };
    for &method in &cfg.methods {
        for &pattern in &cfg.targets {
            let rc = PruneConfig {
                method,
                pattern,
                output: cfg.out_dir.clone(),
                report: None,
                trace: None,
                ..base.clone()
            };
            runs.push(data::new_run(method, pattern, inputs));
            runs_cfg.push(rc);
        }
    }
    let Some(first) = runs_cfg.first() else {
        return Err(Error::input("nothing to compare: give --methods and a target"));
    };
    let mut n_layers = crate::textcal::count_layers(first, &model)?;
    for rc in &runs_cfg[1..] {
        n_layers = crate::textcal::count_layers(rc, &model)?;
    }
    check_out_dir(cfg, &model, &src.path)?;
    std::fs::create_dir_all(&cfg.out_dir).map_err(|e| {
        Error::input(format!("--out-dir {}: cannot create it: {e}", cfg.out_dir.display()))
    })?;
    let mut comp = Comparison {
        format: data::FORMAT.to_string(),
        format_version: data::FORMAT_VERSION,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        created,
        status: Status::Running,
        status_detail: None,
        model: base.model.display().to_string(),
        calibration: CalibrationInfo {
            kind: "text".to_string(),
            path: src.path.display().to_string(),
            holdout: base.holdout,
            description: format!(
                "text from {}, run through the model once per method and target ({})",
                src.path.display(),
                if src.propagate {
                    "sequential: each run calibrates on its own pruned blocks' outputs"
                } else {
                    "dense inputs everywhere (--no-propagate)"
                }
            ),
        },
        settings: settings(cfg, cfg.eval_text.as_deref()),
        layers: Vec::new(),
        runs,
        notice: VALIDATION_NOTICE.to_string(),
    };
    let par = if base.threads > 1 { Par::rayon(base.threads) } else { Par::Seq };
    let mut outputs = vec![cfg.out_dir.join(JSON_NAME), cfg.out_dir.join(HTML_NAME)];
    progress(Progress::Start(n_layers * runs_cfg.len()));
    let mut failure: Option<Error> = None;
    let mut interrupted = false;
    for (ri, rc) in runs_cfg.iter().enumerate() {
        if control.stop.load(Ordering::SeqCst) {
            interrupted = true;
            break;
        }
        let id = comp.runs[ri].id.clone();
        let offset = ri * n_layers;
        let on = |p: pipeline::Progress<'_>| {
            if let pipeline::Progress::Layer(i, name) = p {
                progress(Progress::Done(offset + i));
                progress(Progress::Solve(name, &id));
            }
        };
        let result = crate::textcal::run(rc, &model, src, &on, par).map_err(Error::from);
        let result = result.and_then(|r| {
            let e2e = match &cfg.eval_text {
                Some(t) => {
                    let opts = crate::evaluate::EvalOptions {
                        text: t.clone(),
                        samples: None,
                        seq_len: src.seq_len,
                    };
                    Some(end_to_end(&crate::evaluate::evaluate(&model, &r.replaced, &opts)?))
                }
                None => None,
            };
            Ok((r, e2e))
        });
        let (r, e2e) = match result {
            Ok(x) => x,
            Err(e) => {
                failure = Some(e);
                break;
            }
        };
        if comp.layers.is_empty() {
            comp.layers = r
                .solved
                .iter()
                .map(|(_, s)| LayerInfo {
                    name: s.report.name.clone(),
                    shape: s.report.shape,
                    calibration_rows: s.report.calibration_rows,
                    holdout_rows: s.report.holdout_rows,
                    gram_seconds: 0.0,
                })
                .collect();
        }
        let run = &mut comp.runs[ri];
        run.layers = r.solved.into_iter().map(|(_, s)| s.report).collect();
        run.resum();
        run.summary.seconds = r.timing.forward + r.timing.gram + r.timing.solve;
        run.end_to_end = e2e;
        run.complete = true;
        if cfg.keep_models {
            progress(Progress::Writing);
            let dir = cfg.out_dir.join("models").join(&run.id);
            let _guard = control.writing.lock().unwrap_or_else(|e| e.into_inner());
            let meta = run_meta(cfg, run, n_layers);
            match io::write_model(&model, &dir, &r.replaced, &meta) {
                Ok(_) => {
                    run.model_output = Some(dir.display().to_string());
                    outputs.push(dir);
                }
                Err(e) => {
                    failure = Some(e.into());
                    break;
                }
            }
        }
        progress(Progress::Done(offset + n_layers));
        checkpoint(cfg, &comp, control)?;
    }
    comp.status = match (&failure, interrupted) {
        (Some(e), _) => {
            comp.status_detail = Some(e.to_string());
            Status::Failed
        }
        (None, true) => Status::Interrupted,
        (None, false) => Status::Complete,
    };
    if failure.is_none() {
        if let Err(e) = measure_speed(cfg, &mut comp, progress) {
            comp.status = Status::Failed;
            comp.status_detail = Some(e.to_string());
            failure = Some(e);
        }
    }
    checkpoint(cfg, &comp, control)?;
    match failure {
        Some(e) => Err(e),
        None => Ok(Outcome { comparison: comp, outputs }),
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
        threads: cfg.base.threads,
        min_time: 0.1,
        selection: cfg.base.selection.clone(),
        stream_bytes: 0,
    };
    for run in comp.runs.iter_mut() {
        let Some(path) = &run.model_output else { continue };
        progress(Progress::Writing);
        let model = Model::open(Path::new(path))?;
        let report = crate::deploy::measure(&model, &speed, &|_, _, _| {}).map_err(|e| Error {
            kind: ErrorKind::Solve,
            message: format!("timing {}: {e}", run.id),
        })?;
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
fn settings(cfg: &CompareConfig, eval_text: Option<&Path>) -> CompareSettings {
    let base = &cfg.base;
    CompareSettings {
        methods: cfg.methods.iter().map(|m| m.name().to_string()).collect(),
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
        ridge: match base.ridge {
            Ridge::Fixed(a) => serde_json::json!(a),
            Ridge::Auto { .. } => serde_json::json!("auto"),
        },
        max_sweeps: base.l0.max_sweeps,
        layer_seconds: base.l0.max_seconds,
        threads: base.threads,
        only: cfg.globs.0.clone(),
        skip: cfg.globs.1.clone(),
        keep_models: cfg.keep_models,
        focus: cfg.focus.clone().or_else(|| default_focus(&cfg.targets)).unwrap_or_default(),
        eval_text: eval_text.map(|p| p.display().to_string()),
    }
}
