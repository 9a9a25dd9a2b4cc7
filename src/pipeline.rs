//! The prune job: load → statistics → solve → write, over the selected layers.
//!
//! This is the only place that combines files ([`crate::io`]), layer
//! selection ([`crate::select`]), calibration statistics ([`crate::calib`]),
//! solvers ([`crate::solve`]) and the report ([`crate::report`]). Everything
//! that can be checked before solving is checked first (files, names,
//! shapes, patterns, output paths), so a bad input fails in seconds and no
//! output is written unless every layer was pruned.
//!
//! Layers are pruned one after another in name order; parallelism lives
//! inside the kernels (matrix products and rows), bounded by `threads`.

use crate::calib::{holdout_count, LayerGrams};
use crate::io::{self, Model, TensorFile, TensorInfo};
use crate::report::{LayerReport, Report, Settings, Summary, VALIDATION_NOTICE};
use crate::select::Selection;
use crate::solve::{self, objective, L0Params, Method, Pattern, Scope, SolveParams};
use crate::textcal::TextSource;
use faer::{Mat, Par};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// The ridge α values tried by `--ridge auto`.
pub const AUTO_RIDGE_GRID: &[f64] = &[0.01, 0.03, 0.1, 0.3, 1.0];

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

/// The source of calibration inputs.
#[derive(Clone, Debug, PartialEq)]
pub enum Calibration {
    /// A safetensors file with one `[rows, d_in]` tensor per pruned layer,
    /// named like its weight.
    Activations(PathBuf),
    /// Text run through the model itself (see [`crate::textcal`]).
    Text(TextSource),
}

impl Calibration {
    /// The file the calibration data is read from.
    pub fn path(&self) -> &Path {
        match self {
            Calibration::Activations(p) => p,
            Calibration::Text(t) => &t.path,
        }
    }
}

/// Everything a prune run needs, validated by the caller's flag parsing.
#[derive(Clone, Debug)]
pub struct PruneConfig {
    /// Model file, index or directory.
    pub model: PathBuf,
    /// Where the calibration inputs come from.
    pub calibration: Calibration,
    /// Output file (single-file model) or directory.
    pub output: PathBuf,
    /// JSON report path.
    pub report: Option<PathBuf>,
    /// JSON-lines objective trace path.
    pub trace: Option<PathBuf>,
    /// Solver.
    pub method: Method,
    /// Sparsity pattern.
    pub pattern: Pattern,
    /// Ridge choice.
    pub ridge: Ridge,
    /// Fraction of activation rows held out.
    pub holdout: f64,
    /// Which tensors.
    pub selection: Selection,
    /// Worker threads (resolved, ≥ 1).
    pub threads: usize,
    /// Local-search settings.
    pub l0: L0Params,
    /// End-to-end comparison on held-out text, when asked for.
    pub eval: Option<crate::evaluate::EvalOptions>,
}

/// What went wrong, and whose fault it is.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// Bad input: files, names, shapes, options (exit code 2).
    Input,
    /// A solver failed on valid input (exit code 1).
    Solve,
    /// Writing an output failed (exit code 1).
    Output,
}

/// A pipeline failure: one line naming its object.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Error {
    kind: ErrorKind,
    message: String,
}

impl Error {
    /// An input error.
    pub(crate) fn input(message: impl Into<String>) -> Self {
        Error { kind: ErrorKind::Input, message: message.into() }
    }

    /// A failure while computing on valid input.
    pub(crate) fn solve(message: impl Into<String>) -> Self {
        Error { kind: ErrorKind::Solve, message: message.into() }
    }

    /// Whose fault.
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

/// Progress events for a front end.
#[derive(Clone, Copy, Debug)]
pub enum Progress<'a> {
    /// Solving is about to start on this many layers.
    Start(usize),
    /// Layer `index` (0-based) is starting.
    Layer(usize, &'a str),
    /// All layers are done; the pruned model is compared with the dense one.
    Evaluating,
    /// All layers are done; outputs are being written.
    Writing,
}

/// One selected layer and its validated activation tensor.
pub(crate) struct Job<'a> {
    pub(crate) weight: &'a TensorInfo,
    pub(crate) rows: usize,
}

pub(crate) fn pattern_label(p: Pattern) -> (Option<f64>, Option<String>, &'static str) {
    match p {
        Pattern::Unstructured { sparsity, scope: Scope::Row } => (Some(sparsity), None, "row"),
        Pattern::Unstructured { sparsity, scope: Scope::Layer } => (Some(sparsity), None, "layer"),
        Pattern::NofM { n, m } => (None, Some(format!("{n}:{m}")), "group"),
    }
}

/// Canonical form of a path that may not exist yet.
pub(crate) fn canonical(p: &Path) -> PathBuf {
    if let Ok(c) = p.canonicalize() {
        return c;
    }
    let parent = p.parent().filter(|q| !q.as_os_str().is_empty()).unwrap_or(Path::new("."));
    match (parent.canonicalize(), p.file_name()) {
        (Ok(dir), Some(name)) => dir.join(name),
        _ => p.to_path_buf(),
    }
}

/// Refuse output paths that are inputs, or that collide with each other.
fn check_outputs(cfg: &PruneConfig, model: &Model) -> Result<(), Error> {
    let mut inputs: Vec<PathBuf> = model.input_files();
    inputs.push(canonical(cfg.calibration.path()));
    inputs.push(canonical(model.layout().root()));
    let mut outs = vec![("-o", &cfg.output)];
    if let Some(r) = &cfg.report {
        outs.push(("--report", r));
    }
    if let Some(t) = &cfg.trace {
        outs.push(("--trace", t));
    }
    for (i, (flag, p)) in outs.iter().enumerate() {
        let c = canonical(p);
        if inputs.contains(&c) {
            return Err(Error::input(format!(
                "{flag} {}: refusing to overwrite an input file",
                p.display()
            )));
        }
        for (other, q) in &outs[..i] {
            if canonical(q) == c {
                return Err(Error::input(format!(
                    "{flag} {} is the same path as {other}",
                    p.display()
                )));
            }
        }
    }
    Ok(())
}

/// Check every selected layer against its activation tensor.
pub(crate) fn plan<'a>(
    cfg: &PruneConfig,
    model: &'a Model,
    acts: &TensorFile,
    apath: &Path,
) -> Result<Vec<Job<'a>>, Error> {
    let all = model.tensors();
    let names: Vec<&str> = all.iter().map(|t| t.name.as_str()).collect();
    let unmatched = cfg.selection.unmatched_only(&names);
    if let Some(g) = unmatched.first() {
        return Err(Error::input(format!(
            "--only '{g}' matches no tensor in {}",
            cfg.model.display()
        )));
    }
    let selected: Vec<&TensorInfo> = all
        .into_iter()
        .filter(|t| cfg.selection.selects(&t.name, &t.shape, t.is_float()))
        .collect();
    if selected.is_empty() {
        return Err(Error::input(format!(
            "no prunable tensor selected in {} (check --only / --skip; `lopper inspect` lists candidates)",
            cfg.model.display()
        )));
    }
    let apath = apath.display();
    let mut jobs = Vec::with_capacity(selected.len());
    for w in selected {
        let (d_out, d_in) = (w.shape[0], w.shape[1]);
        let a = acts.get(&w.name).ok_or_else(|| {
            Error::input(format!(
                "{apath}: no activation tensor '{}' for the selected layer of that name \
                 (add it, or leave the layer out with --skip)",
                w.name
            ))
        })?;
        if !a.is_float() {
            return Err(Error::input(format!(
                "{apath}: activation tensor '{}' has dtype {:?}; expected a float dtype",
                w.name, a.dtype
            )));
        }
        if a.shape.len() != 2 {
            return Err(Error::input(format!(
                "{apath}: activation tensor '{}' has shape {:?}; expected [rows, {d_in}]",
                w.name, a.shape
            )));
        }
        let (rows, width) = (a.shape[0], a.shape[1]);
        if width != d_in {
            let why = if width == d_out {
                format!(
                    "its width matches the layer's output size d_out={d_out}, not its input size \
                     d_in={d_in}: store the inputs that flow into the layer"
                )
            } else {
                format!("its width matches neither d_in={d_in} nor d_out={d_out}")
            };
            return Err(Error::input(format!(
                "{apath}: activation tensor '{}' is [{rows}, {width}] for weight [{d_out}, {d_in}]; {why}",
                w.name
            )));
        }
        let fitted = rows - holdout_count(rows, cfg.holdout);
        if fitted == 0 {
            return Err(Error::input(format!(
                "{apath}: activation tensor '{}' has {rows} rows, none left to fit after --holdout {}",
                w.name, cfg.holdout
            )));
        }
        if cfg.ridge == (Ridge::Auto { fallback: None }) && fitted == rows {
            return Err(Error::input(format!(
                "--ridge auto needs held-out rows, but '{}' has {rows} rows and --holdout {} holds none out",
                w.name, cfg.holdout
            )));
        }
        check_memory(&w.name, d_out, d_in, cfg.method, available_memory())?;
        solve::check_pattern(cfg.pattern, d_in)
            .map_err(|e| Error::input(format!("layer '{}' [{d_out}, {d_in}]: {e}", w.name)))?;
        jobs.push(Job { weight: w, rows });
    }
    Ok(jobs)
}

/// Bytes of memory the system can still hand out (`MemAvailable`), if known.
pub(crate) fn available_memory() -> Option<u128> {
    let text = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = text.lines().find(|l| l.starts_with("MemAvailable:"))?;
    let kib: u128 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}

/// Refuse a layer whose statistics and solver state cannot fit in memory.
/// `need` counts the two Gram matrices, `W` and its pruned copy, plus the
/// solver's own estimate.
pub(crate) fn check_memory(
    name: &str,
    d_out: usize,
    d_in: usize,
    method: Method,
    available: Option<u128>,
) -> Result<(), Error> {
    let need = 2 * (d_in as u128).pow(2) * 8
        + 3 * d_out as u128 * d_in as u128 * 8
        + solve::memory_estimate(d_out, d_in, method);
    match available {
        Some(avail) if need > avail => {
            let gib = |b: u128| b as f64 / (1u128 << 30) as f64;
            Err(Error::input(format!(
                "layer '{name}' [{d_out}, {d_in}] needs about {:.1} GiB for its Gram matrices and \
                 solver state, but only {:.1} GiB of memory is available; free memory or use a \
                 lighter --method",
                gib(need),
                gib(avail)
            )))
        }
        _ => Ok(()),
    }
}

/// Rows per chunk when streaming activations (about 32 MiB of f64).
pub(crate) fn chunk_rows(width: usize) -> usize {
    ((4 << 20) / width.max(1)).max(1)
}

/// Nonzeros of `values` once stored as `dtype` (a tiny kept weight can round
/// to zero in F16/BF16, and the report counts what the file holds).
fn stored_nonzeros(values: &[f64], dtype: io::Dtype) -> Result<usize, String> {
    let mut bytes = Vec::new();
    io::dtype::encode_f64(dtype, values, &mut bytes).map_err(|e| e.to_string())?;
    let zeros = io::dtype::count_zeros(dtype, &bytes).unwrap_or(0);
    Ok(values.len() - zeros)
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

fn prune_one(
    cfg: &PruneConfig,
    model: &Model,
    acts: &TensorFile,
    job: &Job<'_>,
    par: Par,
) -> Result<Solved, Error> {
    let t0 = Instant::now();
    let info = job.weight;
    let (d_out, d_in) = (info.shape[0], info.shape[1]);
    let flat = model.read_f64(&info.name)?;
    let w = Mat::from_fn(d_out, d_in, |r, c| flat[r * d_in + c]);
    drop(flat);
    let mut grams = LayerGrams::new(d_in);
    let step = chunk_rows(d_in);
    let mut start = 0;
    while start < job.rows {
        let end = (start + step).min(job.rows);
        let x = acts.read_rows_f64(&info.name, start..end)?;
        grams.add_chunk(&x, start, cfg.holdout, par);
        start = end;
    }
    let mut s = solve_layer(cfg, &info.name, info.dtype, w.as_ref(), &grams, par)?;
    s.report.seconds = t0.elapsed().as_secs_f64();
    Ok(s)
}

/// Prune one layer with weight `w` (`[d_out, d_in]`, stored as `dtype` in
/// the model) from its calibration statistics: choose the ridge as `cfg`
/// says, solve, and measure calibration and held-out error.
///
/// # Errors
/// [`ErrorKind::Solve`] when the solver fails or the result cannot be stored
/// as `dtype`.
pub fn solve_layer(
    cfg: &PruneConfig,
    name: &str,
    dtype: io::Dtype,
    w: faer::MatRef<'_, f64>,
    grams: &LayerGrams,
    par: Par,
) -> Result<Solved, Error> {
    let t0 = Instant::now();
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let h = grams.calib.matrix();
    let held = (grams.holdout.rows() > 0).then(|| grams.holdout.matrix());
    let base = SolveParams {
        method: cfg.method,
        pattern: cfg.pattern,
        ridge_alpha: 0.01,
        obs_block: 128,
        l0: L0Params { trace: cfg.trace.is_some(), ..cfg.l0.clone() },
    };
    let solve_err = |e: solve::SolveError| Error {
        kind: ErrorKind::Solve,
        message: format!("layer '{name}' [{d_out}, {d_in}]: {e}"),
    };
    let alpha = match cfg.ridge {
        Ridge::Fixed(a) => a,
        // The ridge does not change score-only methods: nothing to choose.
        Ridge::Auto { .. } if matches!(cfg.method, Method::Magnitude | Method::Scaled) => 0.01,
        Ridge::Auto { fallback } if held.is_none() => {
            fallback.expect("planned: explicit auto ridge has held-out rows")
        }
        Ridge::Auto { .. } => {
            let held = held.expect("checked above");
            let mut best = (f64::INFINITY, AUTO_RIDGE_GRID[0]);
            // The local search is scored through the OBS sweep, a one-shot
            // proxy that picks nearly the same α at a fraction of the cost
            // (see docs/methods.md for the measurement).
            let proxy = if cfg.method == Method::L0 { Method::Obs } else { cfg.method };
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
    let what = pruned.weight;
    let rel_error = objective::relative_error(w, what.as_ref(), h, par);
    let rel_error_holdout = held.map(|hh| objective::relative_error(w, what.as_ref(), hh, par));
    let mut values = Vec::with_capacity(d_out * d_in);
    for r in 0..d_out {
        for c in 0..d_in {
            values.push(what[(r, c)]);
        }
    }
    let kept = stored_nonzeros(&values, dtype).map_err(|e| Error {
        kind: ErrorKind::Solve,
        message: format!("layer '{name}': pruned weights cannot be stored as {dtype:?}: {e}"),
    })?;
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
        seconds: t0.elapsed().as_secs_f64(),
        calibration_rows: grams.calib.rows(),
        holdout_rows: grams.holdout.rows(),
        ridge_alpha: alpha,
        ridge_lambda: si.lambda,
        objective_initial: si.objective_initial,
        objective_final: si.objective_final,
        sweeps: si.sweeps,
        swaps: si.swaps,
        init: si.init.map(str::to_string),
    };
    Ok(Solved { values, report, trace: si.trace })
}

/// Prune the selected layers of `cfg.model` and write the outputs.
///
/// # Errors
/// [`ErrorKind::Input`] for anything wrong with the inputs or options,
/// [`ErrorKind::Solve`] when a solver fails, [`ErrorKind::Output`] when
/// writing fails. Nothing is written unless every layer succeeded.
pub fn prune(cfg: &PruneConfig, progress: &dyn Fn(Progress<'_>)) -> Result<Report, Error> {
    let t0 = Instant::now();
    let model = Model::open(&cfg.model)?;
    check_outputs(cfg, &model)?;
    if let Some(e) = &cfg.eval {
        // Fail on a bad evaluation file before the long part.
        crate::textcal::read_text(&e.text)?;
    }
    let par = if cfg.threads > 1 { Par::rayon(cfg.threads) } else { Par::Seq };

    let mut replaced = BTreeMap::new();
    let mut layers = Vec::new();
    let mut traces = Vec::new();
    let (mut activations, mut text, mut timing) = (None, None, None);
    match &cfg.calibration {
        Calibration::Activations(apath) => {
            let acts = TensorFile::open(apath)?;
            let jobs = plan(cfg, &model, &acts, apath)?;
            progress(Progress::Start(jobs.len()));
            for (i, job) in jobs.iter().enumerate() {
                progress(Progress::Layer(i, &job.weight.name));
                let s = prune_one(cfg, &model, &acts, job, par)?;
                replaced.insert(job.weight.name.clone(), s.values);
                traces.push((job.weight.name.clone(), s.trace));
                layers.push(s.report);
            }
            activations = Some(apath.display().to_string());
        }
        Calibration::Text(src) => {
            let run = crate::textcal::run(cfg, &model, src, progress, par)?;
            replaced = run.replaced;
            for (name, s) in run.solved {
                traces.push((name, s.trace));
                layers.push(s.report);
            }
            text = Some(run.description);
            timing = Some(run.timing);
        }
    }
    let eval = match &cfg.eval {
        Some(opts) => {
            progress(Progress::Evaluating);
            Some(crate::evaluate::evaluate(&model, &replaced, opts)?)
        }
        None => None,
    };
    progress(Progress::Writing);

    let (sparsity, pattern, scope) = pattern_label(cfg.pattern);
    let ridge = match cfg.ridge {
        Ridge::Fixed(a) => serde_json::json!(a),
        Ridge::Auto { .. } => serde_json::json!("auto"),
    };
    let settings = Settings {
        method: cfg.method.name().to_string(),
        sparsity,
        pattern: pattern.clone(),
        scope: scope.to_string(),
        ridge: ridge.clone(),
        holdout: cfg.holdout,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        model: cfg.model.display().to_string(),
        activations,
        text,
        threads: cfg.threads,
    };
    let mut meta = BTreeMap::new();
    meta.insert("lopper.version".to_string(), settings.tool_version.clone());
    meta.insert("lopper.method".to_string(), settings.method.clone());
    match (sparsity, &pattern) {
        (_, Some(p)) => meta.insert("lopper.pattern".to_string(), p.clone()),
        (Some(s), None) => meta.insert("lopper.sparsity".to_string(), s.to_string()),
        _ => None,
    };
    meta.insert("lopper.scope".to_string(), scope.to_string());
    meta.insert("lopper.ridge".to_string(), ridge.to_string().trim_matches('"').to_string());
    meta.insert("lopper.holdout".to_string(), cfg.holdout.to_string());
    meta.insert("lopper.pruned_layers".to_string(), layers.len().to_string());

    let mut outputs: Vec<String> = io::write_model(&model, &cfg.output, &replaced, &meta)?
        .iter()
        .map(|p| p.display().to_string())
        .collect();
    if let Some(path) = &cfg.trace {
        let mut text = String::new();
        for (name, t) in &traces {
            for (sweep, f) in t.iter().enumerate() {
                let line = serde_json::json!({ "layer": name, "sweep": sweep, "objective": f });
                text.push_str(&line.to_string());
                text.push('\n');
            }
        }
        io::write_atomic(path, |w| std::io::Write::write_all(w, text.as_bytes()))?;
        outputs.push(path.display().to_string());
    }
    if let Some(path) = &cfg.report {
        outputs.push(path.display().to_string());
    }
    let summary = Summary::of(&layers, t0.elapsed().as_secs_f64());
    let report = Report {
        settings,
        layers,
        summary,
        outputs,
        timing,
        eval,
        notice: VALIDATION_NOTICE.to_string(),
    };
    if let Some(path) = &cfg.report {
        let json = report.to_json();
        io::write_atomic(path, |w| std::io::Write::write_all(w, json.as_bytes()))?;
    }
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn memory_check_names_the_layer_and_sizes() {
        // A 4096 x 11008 layer fits in 24 GiB with the local search...
        let gib = 1u128 << 30;
        assert!(check_memory("big", 4096, 11008, Method::L0, Some(24 * gib)).is_ok());
        // ... but not in 4 GiB, and the message says why.
        let e = check_memory("big", 4096, 11008, Method::L0, Some(4 * gib)).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::Input);
        let m = e.to_string();
        assert!(m.contains("'big' [4096, 11008]") && m.contains("4.0 GiB"), "{m}");
        assert!(check_memory("x", 10, 10, Method::Obs, None).is_ok());
    }

    #[test]
    fn outputs_must_differ_from_inputs_and_each_other() {
        assert_eq!(
            canonical(Path::new("Cargo.toml")),
            Path::new("Cargo.toml").canonicalize().unwrap()
        );
        let c = canonical(Path::new("does-not-exist.safetensors"));
        assert!(c.is_absolute() && c.ends_with("does-not-exist.safetensors"));
    }
}
