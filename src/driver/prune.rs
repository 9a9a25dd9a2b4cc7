//! `lopper prune`: one run of the driver, then the pruned model, the trace
//! and the report, written only when every layer succeeded.

use super::allocate::{self, SpreadConfig};
use super::shrink::shrink;
use super::{drive, open_source, JobConfig, Progress, Sink, Solved, Target, UnitCut};
use crate::error::Result;
use crate::io::{self, Model};
use crate::outputs::{check_distinct, check_file, check_model_output, input_files, Write};
use crate::report::{
    LayerReport, PhaseTimes, Report, Settings, StructureReport, Summary, VALIDATION_NOTICE,
};
use crate::source::{Calibration, Planned};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Everything a prune run needs, validated by the caller's flag parsing.
#[derive(Clone, Debug)]
pub struct PruneConfig {
    /// Model, calibration and solver settings.
    pub job: JobConfig,
    /// Method and pattern.
    pub target: Target,
    /// Output file (single-file model) or directory.
    pub output: PathBuf,
    /// JSON report path.
    pub report: Option<PathBuf>,
    /// JSON-lines objective trace path.
    pub trace: Option<PathBuf>,
    /// Hold every pruned tensor in memory and write the model at the end
    /// (the reference path); otherwise tensors are written as their blocks
    /// finish, unless the run needs them all at the end (`--eval-text`, a
    /// structured cut).
    pub whole_model: bool,
    /// How an unstructured target is spread over the layers (`None`:
    /// every layer at the target).
    pub spread: Option<SpreadConfig>,
}

/// Keeps one run's results until they are written: the pruned weights go
/// to `writer` as they come when there is one, else into `replaced`.
#[derive(Default)]
struct Collect<'m> {
    writer: Option<io::StreamedModel<'m>>,
    write_secs: f64,
    /// Pruned weights in storage orientation, by tensor name.
    replaced: BTreeMap<String, Vec<f64>>,
    layers: Vec<LayerReport>,
    traces: Vec<(String, Vec<f64>)>,
    timing: Option<PhaseTimes>,
    cuts: Vec<UnitCut>,
}

impl Sink for Collect<'_> {
    fn solved(&mut self, _: usize, layer: &Planned, s: Solved) -> Result<()> {
        let values = layer.to_storage(s.values);
        match &mut self.writer {
            Some(w) => {
                let t = Instant::now();
                w.put(&layer.name, &values).map_err(|e| flagged("-o", e))?;
                self.write_secs += t.elapsed().as_secs_f64();
            }
            None => {
                self.replaced.insert(layer.name.clone(), values);
            }
        }
        self.traces.push((layer.name.clone(), s.trace));
        self.layers.push(s.report);
        Ok(())
    }

    fn cut(&mut self, _: usize, cut: &UnitCut) -> Result<()> {
        self.cuts.push(cut.clone());
        Ok(())
    }

    fn run_done(&mut self, _: usize, timing: Option<PhaseTimes>) -> Result<()> {
        self.timing = timing;
        Ok(())
    }

    fn write_seconds(&self) -> f64 {
        self.write_secs
    }
}

/// The `lopper.*` metadata written into a pruned model.
pub(crate) fn model_meta(
    job: &JobConfig,
    target: &Target,
    layers: usize,
) -> BTreeMap<String, String> {
    let mut meta = BTreeMap::new();
    meta.insert("lopper.version".to_string(), env!("CARGO_PKG_VERSION").to_string());
    meta.insert("lopper.method".to_string(), target.method.to_string());
    match target.pattern.sparsity() {
        Some(s) => meta.insert("lopper.sparsity".to_string(), s.to_string()),
        None => meta.insert("lopper.pattern".to_string(), target.pattern.to_string()),
    };
    meta.insert("lopper.scope".to_string(), target.pattern.scope_name().to_string());
    meta.insert("lopper.ridge".to_string(), job.ridge.to_string());
    meta.insert("lopper.holdout".to_string(), job.holdout.to_string());
    meta.insert("lopper.pruned_layers".to_string(), layers.to_string());
    meta
}

/// Prune the selected layers of `cfg.job.model` and write the outputs.
///
/// # Errors
/// Usage and input errors before any work; [`crate::ErrorKind::Solve`] when
/// a solver fails, [`crate::ErrorKind::Output`] when writing fails. Nothing
/// is written unless every layer succeeded.
pub fn prune(cfg: &PruneConfig, progress: &dyn Fn(Progress<'_>)) -> Result<Report> {
    let t0 = Instant::now();
    let job = &cfg.job;
    let model = Model::open(&job.model)?;
    let eval_text = job.eval.as_ref().map(|e| e.text.as_path());
    let mut read: Vec<&Path> = vec![job.calibration.path()];
    read.extend(eval_text);
    // Every output checked before any work: not an input, not each other,
    // not a special file, in a folder that takes new files.
    let inputs = input_files(&model, &read);
    let mut outs = vec![("-o", cfg.output.as_path())];
    outs.extend(cfg.report.as_deref().map(|p| ("--report", p)));
    outs.extend(cfg.trace.as_deref().map(|p| ("--trace", p)));
    check_distinct(&inputs, &outs)?;
    let model_files = check_model_output("-o", &model, &cfg.output, &inputs)?;
    let mut outs = vec![("-o", cfg.output.as_path())];
    if model_files.iter().all(|f| f != &cfg.output) {
        outs.extend(model_files.iter().map(|f| ("-o", f.as_path())));
    }
    outs.extend(cfg.report.as_deref().map(|p| ("--report", p)));
    outs.extend(cfg.trace.as_deref().map(|p| ("--trace", p)));
    check_distinct(&inputs, &outs)?;
    for (flag, p) in [("--report", &cfg.report), ("--trace", &cfg.trace)] {
        if let Some(p) = p {
            check_file(flag, p, Write::MayStream)?;
        }
    }
    for n in crate::outputs::skipped_notes(&model) {
        progress(Progress::Note(&n));
    }
    if let Some(t) = eval_text {
        // Fail on a bad evaluation file before the long part.
        crate::tokenize::read_text(t)?;
    }
    let mut target = cfg.target.clone();
    let mut allocation = None;
    if let (Some(spread), Some(overall)) = (cfg.spread, target.pattern.sparsity()) {
        let scope = match target.pattern {
            crate::solve::Pattern::Unstructured { scope, .. } => scope,
            crate::solve::Pattern::NofM { .. } => unreachable!("has a sparsity"),
        };
        if let Some(a) = allocate::plan(job, &model, overall, scope, spread, progress)? {
            target = allocate::allocated(target, &a);
            allocation = Some(a.report);
        }
    }
    let targets = [target];
    let meta_with = |layers: usize| {
        let mut meta = model_meta(job, &cfg.target, layers);
        if let Some(a) = &allocation {
            meta.insert("lopper.spread".to_string(), a.spread.clone());
        }
        meta
    };
    let source = open_source(job, &targets, &model)?;
    let text = source.description();
    let planned: usize = source.blocks().iter().map(Vec::len).sum();
    let estimate =
        super::estimate::check(&model, &targets[0], &cfg.output, source.as_ref(), cfg.whole_model)?;
    // Worth a line only where memory or disk can run short; small runs
    // (and every error message after them) stay one line.
    if estimate.peak().max(estimate.disk) >= super::estimate::NOTE_FROM {
        progress(Progress::Note(&estimate.line()));
    }
    // Every output is staged (temporaries in the target folders) and
    // renamed into place together once all are written; a failure removes
    // every temporary and leaves nothing new.
    let mut staged = io::Staged::new();
    let mut sink = Collect::default();
    if !cfg.whole_model && job.eval.is_none() && cfg.target.cut.is_none() {
        let meta = meta_with(planned);
        let begin = io::StreamedModel::begin(&mut staged, &model, &cfg.output, &meta);
        sink.writer = Some(begin.map_err(|e| flagged("-o", e))?);
    }
    drive(job, &targets, &model, source, &mut sink, progress)?;
    let eval = match &job.eval {
        Some(opts) => {
            progress(Progress::Evaluating);
            Some(crate::evaluate::evaluate(&model, &sink.replaced, opts)?)
        }
        None => None,
    };
    progress(Progress::Writing);

    let pattern = cfg.target.pattern;
    let activations = match &job.calibration {
        Calibration::Activations(p) => Some(p.display().to_string()),
        Calibration::Text(_) => None,
    };
    let settings = Settings {
        model_fingerprint: Some(model.fingerprint()),
        method: cfg.target.method.to_string(),
        sparsity: pattern.sparsity(),
        pattern: pattern.sparsity().is_none().then(|| pattern.to_string()),
        scope: pattern.scope_name().to_string(),
        ridge: job.ridge.to_json(),
        holdout: job.holdout,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        model: job.model.display().to_string(),
        activations,
        text,
        threads: job.threads,
    };
    let meta = meta_with(sink.layers.len());
    let (written, structure) = if let Some(w) = sink.writer.take() {
        super::write_checked(&model, || w.finish(&mut staged, &meta))?;
        (model_files, None)
    } else if sink.cuts.is_empty() {
        let edits = io::Edits { replaced: &sink.replaced, ..io::Edits::default() };
        let stage = || io::stage_model(&mut staged, &model, &cfg.output, &edits, &meta);
        super::write_checked(&model, stage)?;
        (model_files, None)
    } else {
        let small = shrink(&model, &sink.replaced, &sink.cuts)?;
        let mut config = serde_json::to_vec_pretty(&small.config).expect("JSON serialises");
        config.push(b'\n');
        let files = BTreeMap::from([("config.json".to_string(), config)]);
        let edits = io::Edits { replaced: &small.values, reshaped: &small.shapes, files: &files };
        let stage = || io::stage_model(&mut staged, &model, &cfg.output, &edits, &meta);
        super::write_checked(&model, stage)?;
        let mut written = model_files;
        let config = cfg.output.join("config.json");
        if !written.contains(&config) {
            written.push(config);
        }
        let report = StructureReport {
            units: sink.cuts.iter().map(|c| c.report.clone()).collect(),
            params_before: small.params_before,
            params_after: small.params_after,
            config: small.changes,
        };
        (written, Some(report))
    };
    let mut outputs: Vec<String> = written.iter().map(|p| p.display().to_string()).collect();
    if let Some(path) = &cfg.trace {
        let mut text = String::new();
        for (name, t) in &sink.traces {
            for (sweep, f) in t.iter().enumerate() {
                let line = serde_json::json!({ "layer": name, "sweep": sweep, "objective": f });
                text.push_str(&line.to_string());
                text.push('\n');
            }
        }
        staged.file_or_stream(path, text.into_bytes()).map_err(|e| flagged("--trace", e))?;
        outputs.push(path.display().to_string());
    }
    if let Some(path) = &cfg.report {
        outputs.push(path.display().to_string());
    }
    if let Some(a) = &mut allocation {
        let errors = sink.layers.iter().map(|l| (l.name.clone(), l.rel_error)).collect();
        allocate::record_solved(a, &errors);
    }
    let summary = Summary::of(&sink.layers, t0.elapsed().as_secs_f64());
    let report = Report {
        settings,
        layers: sink.layers,
        summary,
        outputs,
        timing: sink.timing,
        eval,
        structure,
        allocation,
        notice: VALIDATION_NOTICE.to_string(),
    };
    if let Some(path) = &cfg.report {
        let json = report.to_json().into_bytes();
        staged.file_or_stream(path, json).map_err(|e| flagged("--report", e))?;
    }
    let flags: Vec<(&Path, &str)> = [(&cfg.report, "--report"), (&cfg.trace, "--trace")]
        .into_iter()
        .filter_map(|(p, f)| p.as_deref().map(|p| (p, f)))
        .collect();
    staged.commit().map_err(|e| {
        let flag = flags.iter().find(|(p, _)| *p == e.path()).map_or("-o", |(_, f)| f);
        flagged(flag, e)
    })?;
    Ok(report)
}

/// A write error prefixed with the option that named the file.
fn flagged(flag: &str, e: io::WriteError) -> crate::error::Error {
    crate::error::Error::from(e).context(flag)
}
