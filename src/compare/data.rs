//! The comparison record (`comparison.json`) and how saved reports are read
//! back and put side by side.
//!
//! A [`Comparison`] is one set of runs (method × target) over the same
//! layers. `lopper compare` writes one; `lopper report` reads any mix of
//! `comparison.json` files and `lopper prune --report` files ([`load`]),
//! turns each into a [`Source`] (a prune report becomes a set of one run),
//! and refuses to put together sources whose models differ ([`check_compatible`]).
//!
//! Field names are a contract: fields may be added, never renamed. Each
//! run's `layers[]` are the same objects as a prune report's `layers[]`
//! ([`LayerReport`]), so figures mean the same thing in both files.

use crate::report::{LayerReport, Report, Summary, VALIDATION_NOTICE};
use crate::solve::{Method, Pattern};
use serde::{Deserialize, Serialize};
use std::path::Path;

/// `format` field of `comparison.json`.
pub const FORMAT: &str = "lopper-comparison";
/// `format_version` field of `comparison.json`.
pub const FORMAT_VERSION: u32 = 1;

/// `calibration_inputs` of a run whose layers were solved on the Gram
/// matrices every run of the set shared.
pub const INPUTS_SHARED: &str = "shared";
/// `calibration_inputs` of a run that needed its own inputs (sequential text
/// calibration: each block sees the outputs of this run's pruned blocks).
pub const INPUTS_OWN: &str = "own (sequential)";
/// `calibration_inputs` of a run read from a `lopper prune --report` file.
pub const INPUTS_PRUNE: &str = "separate prune run";

/// Whether a run set finished.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Status {
    /// Every run finished every layer.
    Complete,
    /// Still running (a checkpoint written between solves).
    Running,
    /// Stopped by Ctrl-C; finished solves are kept.
    Interrupted,
    /// Stopped by an error (see `status_detail`); finished solves are kept.
    Failed,
}

/// Where the calibration inputs came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CalibrationInfo {
    /// `activations` (a safetensors file of layer inputs) or `text`.
    pub kind: String,
    /// The file, as given.
    pub path: String,
    /// Fraction of rows held out from the solvers.
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub holdout: f64,
    /// One line for people, e.g. `activations from acts.safetensors, 1382
    /// fitted + 154 held-out rows per layer`.
    pub description: String,
}

/// How the set was run.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CompareSettings {
    /// Methods, in run order.
    pub methods: Vec<String>,
    /// Target keys (`0.5`, `2:4`), in run order.
    pub targets: Vec<String>,
    /// `row` or `layer` for the unstructured targets.
    pub scope: String,
    /// Ridge α (a number) or `"auto"`.
    pub ridge: serde_json::Value,
    /// Local search: most sweeps per layer.
    pub max_sweeps: usize,
    /// Local search: most seconds per layer.
    pub layer_seconds: Option<f64>,
    /// Worker threads.
    pub threads: usize,
    /// `--only` globs.
    pub only: Vec<String>,
    /// `--skip` globs.
    pub skip: Vec<String>,
    /// Whether pruned weights were written.
    pub keep_models: bool,
    /// Target shown in the per-layer chart.
    pub focus: String,
    /// Held-out text for end-to-end figures (`null` until text evaluation lands).
    pub eval_text: Option<String>,
}

/// One selected layer.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LayerInfo {
    /// Tensor name.
    pub name: String,
    /// `[d_out, d_in]`.
    pub shape: [usize; 2],
    /// Calibration rows fitted (shared calibration; 0 if unknown).
    pub calibration_rows: usize,
    /// Held-out rows.
    pub holdout_rows: usize,
    /// Seconds spent reading the layer's inputs and building its Gram
    /// matrices, once for all runs.
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub gram_seconds: f64,
}

/// End-to-end quality of a pruned model against the dense one on held-out
/// text (filled by text evaluation; `null` until then).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EndToEnd {
    /// What `value` measures, e.g. `mean cosine` or `perplexity`.
    pub metric: String,
    /// The pruned model's figure.
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub value: f64,
    /// The dense model's figure, where the metric has one.
    pub dense: Option<f64>,
    /// Direction of better.
    pub higher_is_better: bool,
    /// Further figures (e.g. minimum cosine, KL divergence).
    #[serde(default)]
    pub details: serde_json::Value,
}

/// Measured latency of the pruned linear layers (filled by the speed
/// measurement; `null` until then).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Speed {
    /// Rows per product.
    pub batch: usize,
    /// Dense seconds summed over the pruned layers.
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub dense_seconds: f64,
    /// Sparse-kernel seconds summed over the pruned layers.
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub sparse_seconds: f64,
}

/// Measured whole-model latency of a kept run model against the dense
/// model (`lopper compare --time-whole`, as `lopper latency`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WholeLatency {
    /// Scenario timed: `encode_batch_1` or `decode_batch_1`.
    pub scenario: String,
    /// Dense model, median milliseconds per call (per token decoding).
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub dense_ms: f64,
    /// Pruned model on its sparse kernels (or as written when smaller).
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub pruned_ms: f64,
    /// `dense_ms / pruned_ms`.
    #[serde(deserialize_with = "crate::report::f64_or_nan")]
    pub speedup: f64,
}

/// One method at one target over the layers.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Run {
    /// `<method>-<target slug>`, e.g. `l0-0.7`, `obs-2of4`; also the folder
    /// name under `models/`.
    pub id: String,
    /// Solver name.
    pub method: String,
    /// Target key: the sparsity (`0.7`) or the pattern (`2:4`).
    pub target: String,
    /// Target fraction of zeros, for unstructured targets.
    pub sparsity: Option<f64>,
    /// `N:M`, for pattern targets.
    pub pattern: Option<String>,
    /// `row`, `layer` or `group`.
    pub scope: String,
    /// [`INPUTS_SHARED`], [`INPUTS_OWN`] or [`INPUTS_PRUNE`].
    pub calibration_inputs: String,
    /// Every selected layer solved.
    pub complete: bool,
    /// Per layer, in layer order; `seconds` covers the solve only.
    pub layers: Vec<LayerReport>,
    /// Totals over `layers`; `seconds` is the sum of their solve times.
    pub summary: Summary,
    /// End-to-end figures, `null` until text evaluation provides them.
    pub end_to_end: Option<EndToEnd>,
    /// Latency, `null` until the speed measurement provides it.
    pub speed: Option<Speed>,
    /// Whole-model latency (`--time-whole`), absent until measured.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub whole: Option<WholeLatency>,
    /// Where the pruned weights were written (`--keep-models`).
    pub model_output: Option<String>,
}

/// The whole `comparison.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Comparison {
    /// [`FORMAT`].
    pub format: String,
    /// [`FORMAT_VERSION`].
    pub format_version: u32,
    /// lopper version that wrote it.
    pub tool_version: String,
    /// When the set started, UTC, `YYYY-MM-DDTHH:MM:SSZ`.
    pub created: String,
    /// Complete, running, interrupted or failed.
    pub status: Status,
    /// The error that stopped a failed set.
    pub status_detail: Option<String>,
    /// Model path as given.
    pub model: String,
    /// [`crate::io::Model::fingerprint`] of the model (absent in files of
    /// older versions).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub model_fingerprint: Option<String>,
    /// Calibration data.
    pub calibration: CalibrationInfo,
    /// How the set was run.
    pub settings: CompareSettings,
    /// Selected layers, in order.
    pub layers: Vec<LayerInfo>,
    /// Runs, method-major in the order of `settings`.
    pub runs: Vec<Run>,
    /// [`VALIDATION_NOTICE`].
    pub notice: String,
}

impl Comparison {
    /// Pretty JSON. Non-finite numbers become `null`.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("comparison serialises")
    }
}

/// The key of a target: `0.5` for an unstructured sparsity, `2:4` for a pattern.
pub fn target_key(p: Pattern) -> String {
    p.to_string()
}

/// The key as people read it: `70%`, `2:4`.
pub fn target_display(key: &str) -> String {
    match key.parse::<f64>() {
        Ok(s) => format!("{}%", percent(s)),
        Err(_) => key.to_string(),
    }
}

/// `100·s` with at most one decimal and no trailing `.0` (`0.7` → `70`).
pub fn percent(s: f64) -> String {
    let t = format!("{:.1}", 100.0 * s);
    t.strip_suffix(".0").map(str::to_string).unwrap_or(t)
}

/// The run id for `method` at `key` (file-name safe: `2:4` → `2of4`).
pub fn run_id(method: &str, key: &str) -> String {
    format!("{method}-{}", key.replace(':', "of"))
}

/// Scope name of a pattern (`row`, `layer`, `group`).
pub fn scope_name(p: Pattern) -> &'static str {
    p.scope_name()
}

/// An empty run of `method` at `pattern`.
pub fn new_run(method: Method, pattern: Pattern, inputs: &str) -> Run {
    let key = target_key(pattern);
    let (sparsity, pat) = match pattern {
        Pattern::Unstructured { sparsity, .. } => (Some(sparsity), None),
        Pattern::NofM { .. } => (None, Some(key.clone())),
    };
    Run {
        id: run_id(method.name(), &key),
        method: method.name().to_string(),
        target: key,
        sparsity,
        pattern: pat,
        scope: scope_name(pattern).to_string(),
        calibration_inputs: inputs.to_string(),
        complete: false,
        layers: Vec::new(),
        summary: Summary::of(&[], 0.0),
        end_to_end: None,
        speed: None,
        whole: None,
        model_output: None,
    }
}

impl Run {
    /// Recompute `summary` from `layers`.
    pub fn resum(&mut self) {
        let secs = self.layers.iter().map(|l| l.seconds).sum();
        self.summary = Summary::of(&self.layers, secs);
    }
}

/// The current time, UTC, as `YYYY-MM-DDTHH:MM:SSZ`.
pub fn utc_now() -> String {
    let secs = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs() as i64)
        .unwrap_or(0);
    utc_string(secs)
}

/// Seconds since 1970 as `YYYY-MM-DDTHH:MM:SSZ` (proleptic Gregorian; the
/// days-to-date step is H. Hinnant's `civil_from_days`).
pub fn utc_string(secs: i64) -> String {
    let (days, rem) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!("{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z", rem / 3600, rem % 3600 / 60, rem % 60)
}

/// A loaded report file, as a set of runs.
#[derive(Clone, Debug)]
pub struct Source {
    /// Short name for people (file stem, or the folder of a `comparison.json`).
    pub label: String,
    /// The file it came from (`None` for a set that was just computed).
    pub path: Option<String>,
    /// The runs.
    pub comparison: Comparison,
}

/// Read `path`: a `comparison.json` or a `lopper prune --report` file.
///
/// # Errors
/// One line naming `path`: unreadable, not JSON, or neither kind of report.
pub fn load(path: &Path) -> Result<Source, String> {
    let shown = path.display();
    crate::io::check_regular(path).map_err(|e| e.to_string())?;
    let text =
        std::fs::read_to_string(path).map_err(|e| format!("{shown}: cannot read it: {e}"))?;
    let value: serde_json::Value = serde_json::from_str(&text)
        .map_err(|e| format!("{shown}: not JSON ({e}); expected a lopper report"))?;
    let comparison = if value.get("format").and_then(|f| f.as_str()) == Some(FORMAT) {
        let v = value.get("format_version").and_then(|v| v.as_u64()).unwrap_or(0);
        if v > u64::from(FORMAT_VERSION) {
            return Err(format!(
                "{shown}: comparison format version {v} is newer than this lopper reads \
                 ({FORMAT_VERSION}); use a newer lopper"
            ));
        }
        serde_json::from_value::<Comparison>(value)
            .map_err(|e| format!("{shown}: malformed comparison file: {e}"))?
    } else if value.get("settings").is_some() && value.get("layers").is_some() {
        let r = serde_json::from_value::<Report>(value)
            .map_err(|e| format!("{shown}: malformed prune report: {e}"))?;
        let date = std::fs::metadata(path)
            .and_then(|m| m.modified())
            .ok()
            .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
            .map(|d| utc_string(d.as_secs() as i64))
            .unwrap_or_default();
        from_prune_report(r, &date)
    } else {
        return Err(format!(
            "{shown}: not a lopper report (expected a `lopper prune --report` file or a \
             comparison.json)"
        ));
    };
    let label = source_label(path);
    Ok(Source { label, path: Some(path.display().to_string()), comparison })
}

/// File stem, or the folder name for a file called `comparison.json`.
fn source_label(path: &Path) -> String {
    let stem = path.file_stem().map(|s| s.to_string_lossy().into_owned()).unwrap_or_default();
    if stem == "comparison" {
        if let Some(dir) = path.parent().and_then(|p| p.file_name()) {
            return dir.to_string_lossy().into_owned();
        }
    }
    stem
}

/// A prune report as a set of one run. `date` stands in for the creation
/// time, which prune reports do not record (the file's modification time).
pub fn from_prune_report(r: Report, date: &str) -> Comparison {
    let s = &r.settings;
    let key = match (&s.pattern, s.sparsity) {
        (Some(p), _) => p.clone(),
        (None, Some(x)) => format!("{x}"),
        (None, None) => "?".to_string(),
    };
    let layers: Vec<LayerInfo> = r
        .layers
        .iter()
        .map(|l| LayerInfo {
            name: l.name.clone(),
            shape: l.shape,
            calibration_rows: l.calibration_rows,
            holdout_rows: l.holdout_rows,
            gram_seconds: 0.0,
        })
        .collect();
    let rows = r.layers.first().map(|l| (l.calibration_rows, l.holdout_rows));
    let (kind, path) = match (&s.activations, &s.text) {
        (Some(a), _) => ("activations", a.clone()),
        (None, Some(t)) => ("text", t["text"].as_str().unwrap_or("?").to_string()),
        (None, None) => ("activations", "?".to_string()),
    };
    let description = match (&s.text, rows) {
        (Some(t), _) => format!(
            "text from {path}: {} windows x {} tokens, seed {}, {}",
            t["samples"],
            t["seq_len"],
            t["seed"],
            if t["propagate"] == true { "sequential" } else { "dense inputs (--no-propagate)" }
        ),
        (None, Some((c, h))) => {
            format!("activations from {path}, {c} fitted + {h} held-out rows (first layer)")
        }
        (None, None) => format!("activations from {path}"),
    };
    let mut run = Run {
        id: run_id(&s.method, &key),
        method: s.method.clone(),
        target: key.clone(),
        sparsity: s.sparsity,
        pattern: s.pattern.clone(),
        scope: s.scope.clone(),
        calibration_inputs: INPUTS_PRUNE.to_string(),
        complete: true,
        layers: r.layers.clone(),
        summary: r.summary.clone(),
        end_to_end: None,
        speed: None,
        whole: None,
        model_output: r.outputs.first().cloned(),
    };
    // Prune reports time statistics and solve together; keep their figures.
    run.summary.seconds = r.layers.iter().map(|l| l.seconds).sum();
    Comparison {
        format: FORMAT.to_string(),
        format_version: FORMAT_VERSION,
        tool_version: s.tool_version.clone(),
        created: date.to_string(),
        status: Status::Complete,
        status_detail: None,
        model: s.model.clone(),
        model_fingerprint: s.model_fingerprint.clone(),
        calibration: CalibrationInfo {
            kind: kind.to_string(),
            path,
            holdout: s.holdout,
            description,
        },
        settings: CompareSettings {
            methods: vec![s.method.clone()],
            targets: vec![key.clone()],
            scope: s.scope.clone(),
            ridge: s.ridge.clone(),
            max_sweeps: 0,
            layer_seconds: None,
            threads: s.threads,
            only: Vec::new(),
            skip: Vec::new(),
            keep_models: !r.outputs.is_empty(),
            focus: key,
            eval_text: None,
        },
        layers,
        runs: vec![run],
        notice: if r.notice.is_empty() { VALIDATION_NOTICE.to_string() } else { r.notice },
    }
}

/// The last component of a model path (`/a/b/minilm/` → `minilm`).
pub fn model_name(model: &str) -> String {
    let p = Path::new(model.trim_end_matches(['/', '\\']));
    p.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_else(|| model.to_string())
}

/// A model path as a title: the last component, with its folder when the
/// last component is a file (`pump-monitor/model.safetensors`).
pub fn display_name(model: &str) -> String {
    let p = Path::new(model.trim_end_matches(['/', '\\']));
    let name = model_name(model);
    let is_file = name.ends_with(".safetensors") || name.ends_with(".json");
    match p.parent().and_then(|d| d.file_name()) {
        Some(dir) if is_file => format!("{}/{name}", dir.to_string_lossy()),
        _ => name,
    }
}

/// Refuse to put sources side by side unless they describe the same model:
/// the same model name (last path component, so the same model on two
/// machines matches) and the same layers, names and shapes, in order.
///
/// # Errors
/// One line naming the two files and the first difference.
pub fn check_compatible(sources: &[Source]) -> Result<(), String> {
    let Some(first) = sources.first() else { return Ok(()) };
    let name = |s: &Source| s.path.clone().unwrap_or_else(|| s.label.clone());
    let a = &first.comparison;
    for s in &sources[1..] {
        let b = &s.comparison;
        let (fa, fb) = (name(first), name(s));
        let (ma, mb) = (model_name(&a.model), model_name(&b.model));
        if ma != mb {
            return Err(format!(
                "{fa} and {fb} describe different models ('{ma}' vs '{mb}'); only reports of \
                 the same model can be put side by side"
            ));
        }
        if let (Some(x), Some(y)) = (&a.model_fingerprint, &b.model_fingerprint) {
            if x != y {
                return Err(format!(
                    "{fa} and {fb} describe different models: both are called '{ma}' but their \
                     tensors differ (model fingerprint {x} vs {y}); only reports of the same \
                     model can be put side by side"
                ));
            }
        }
        if a.layers.len() != b.layers.len() {
            return Err(format!(
                "{fa} and {fb} cover different layers ({} vs {} layers of '{ma}'); prune the \
                 same layers (--only/--skip) to compare",
                a.layers.len(),
                b.layers.len()
            ));
        }
        for (la, lb) in a.layers.iter().zip(&b.layers) {
            if la.name != lb.name {
                return Err(format!(
                    "{fa} and {fb} cover different layers ('{}' vs '{}'); prune the same \
                     layers (--only/--skip) to compare",
                    la.name, lb.name
                ));
            }
            if la.shape != lb.shape {
                return Err(format!(
                    "{fa} and {fb} disagree on layer '{}': shape {:?} vs {:?}, so they are not \
                     the same model",
                    la.name, la.shape, lb.shape
                ));
            }
        }
    }
    Ok(())
}

/// Small comparisons for unit tests.
#[cfg(test)]
pub(crate) mod testing {
    use super::*;

    /// A layer report named `name` with calibration error `err` and
    /// held-out error `held · err` (none when `held` is `None`).
    pub fn layer(name: &str, err: f64, held: Option<f64>) -> LayerReport {
        LayerReport {
            name: name.into(),
            shape: [2, 4],
            kept: 4,
            total: 8,
            sparsity: 0.5,
            rel_error: err,
            rel_error_holdout: held.map(|h| h * err),
            rel_error_stored: None,
            rel_error_holdout_stored: None,
            seconds: 0.25,
            calibration_rows: 9,
            holdout_rows: usize::from(held.is_some()),
            ridge_alpha: 0.01,
            ridge_lambda: 0.1,
            objective_initial: 1.0,
            objective_final: 1.0,
            sweeps: 0,
            swaps: 0,
            init: None,
            certificate: None,
        }
    }

    /// A run with `n` layers `l0, l1, …` of error `err`.
    pub fn run(m: Method, p: Pattern, err: f64, held: Option<f64>, n: usize) -> Run {
        let mut r = new_run(m, p, INPUTS_SHARED);
        for i in 0..n {
            r.layers.push(layer(&format!("l{i}"), err, held));
        }
        r.resum();
        r
    }

    /// A comparison of `n_layers` layers holding `runs`.
    pub fn comparison(n_layers: usize, runs: Vec<Run>) -> Comparison {
        Comparison {
            format: FORMAT.into(),
            format_version: FORMAT_VERSION,
            tool_version: "0".into(),
            created: "2025-01-01T00:00:00Z".into(),
            status: Status::Complete,
            status_detail: None,
            model: "m.safetensors".into(),
            model_fingerprint: None,
            calibration: CalibrationInfo {
                kind: "activations".into(),
                path: "a".into(),
                holdout: 0.1,
                description: "d".into(),
            },
            settings: CompareSettings {
                methods: vec![],
                targets: vec![],
                scope: "row".into(),
                ridge: serde_json::json!("auto"),
                max_sweeps: 20,
                layer_seconds: None,
                threads: 1,
                only: vec![],
                skip: vec![],
                keep_models: false,
                focus: String::new(),
                eval_text: None,
            },
            layers: (0..n_layers)
                .map(|i| LayerInfo {
                    name: format!("l{i}"),
                    shape: [2, 4],
                    calibration_rows: 9,
                    holdout_rows: 1,
                    gram_seconds: 0.0,
                })
                .collect(),
            runs,
            notice: VALIDATION_NOTICE.into(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::solve::Scope;

    #[test]
    fn dates_match_known_timestamps() {
        // Known instants (POSIX time, leap seconds excluded by definition).
        assert_eq!(utc_string(0), "1970-01-01T00:00:00Z");
        assert_eq!(utc_string(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(utc_string(1_700_000_000), "2023-11-14T22:13:20Z");
        assert_eq!(utc_string(4_107_542_399), "2100-02-28T23:59:59Z");
    }

    #[test]
    fn target_keys_and_labels() {
        let p = Pattern::Unstructured { sparsity: 0.7, scope: Scope::Row };
        assert_eq!(target_key(p), "0.7");
        assert_eq!(target_display("0.7"), "70%");
        assert_eq!(target_display("0.625"), "62.5%");
        assert_eq!(target_display("2:4"), "2:4");
        assert_eq!(run_id("obs", "2:4"), "obs-2of4");
        assert_eq!(model_name("/data/models/minilm/"), "minilm");
        assert_eq!(model_name("m.safetensors"), "m.safetensors");
        assert_eq!(display_name("demo/pump/model.safetensors"), "pump/model.safetensors");
        assert_eq!(display_name("/data/minilm/"), "minilm");
    }
}
