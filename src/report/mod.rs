//! The per-layer error report: plain result structs, rendered as a terminal
//! table or as JSON.
//!
//! Field names of the JSON form are a contract (`settings`, `layers[]` with
//! `name, shape, kept, sparsity, rel_error, rel_error_holdout, seconds`, and
//! `summary`); fields may be added, never renamed. Layers are listed in the
//! order they were pruned (sorted by tensor name), so the same inputs give
//! the same report apart from timings.

pub mod allocation;

use serde::{Deserialize, Serialize};
use std::fmt::Write as _;

/// A reminder that calibration error is not model quality.
pub const VALIDATION_NOTICE: &str =
    "Reconstruction error on calibration data does not show every way \
a pruned model can get worse: validate it on your own evaluation data before deploying.";

/// Read an `f64` that lopper may have written as `null`: serde_json writes
/// NaN and the infinities as `null` (e.g. the sparsity of a zero-sized
/// layer, an undefined relative error), and every report lopper writes must
/// read back. `null` reads as NaN.
pub(crate) fn f64_or_nan<'de, D: serde::Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
}

/// How the run was set up.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Settings {
    /// Solver name (`magnitude`, `scaled`, `obs`, `l0`).
    pub method: String,
    /// Target fraction of zeros, for unstructured patterns.
    pub sparsity: Option<f64>,
    /// `N:M` pattern, when used.
    pub pattern: Option<String>,
    /// `row` or `layer` for unstructured patterns; `group` for N:M.
    pub scope: String,
    /// Ridge α (a number) or `"auto"`.
    pub ridge: serde_json::Value,
    /// Fraction of activation rows held out.
    #[serde(deserialize_with = "f64_or_nan")]
    pub holdout: f64,
    /// lopper version.
    pub tool_version: String,
    /// Model path as given.
    pub model: String,
    /// Activations path as given (`null` for text calibration).
    pub activations: Option<String>,
    /// Text calibration: file, windows, seed, propagation (`null` with
    /// activations).
    pub text: Option<serde_json::Value>,
    /// Worker threads.
    pub threads: usize,
    /// [`crate::io::Model::fingerprint`] of the model (absent in reports of
    /// older versions).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub model_fingerprint: Option<String>,
}

/// One pruned layer.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct LayerReport {
    /// Tensor name.
    pub name: String,
    /// `[d_out, d_in]`.
    pub shape: [usize; 2],
    /// Nonzero weights after pruning (as written).
    pub kept: usize,
    /// `d_out · d_in`.
    pub total: usize,
    /// Achieved fraction of zeros.
    #[serde(deserialize_with = "f64_or_nan")]
    pub sparsity: f64,
    /// `‖XWᵀ − XŴᵀ‖²_F / ‖XWᵀ‖²_F` on calibration rows.
    #[serde(deserialize_with = "f64_or_nan")]
    pub rel_error: f64,
    /// The same on held-out rows (`null` without held-out rows).
    pub rel_error_holdout: Option<f64>,
    /// `rel_error` of the weights as stored: rounded to the tensor's dtype
    /// (BF16/F16 keep 8/11 significant bits), what the written model
    /// computes.
    #[serde(default)]
    pub rel_error_stored: Option<f64>,
    /// `rel_error_holdout` of the weights as stored.
    #[serde(default)]
    pub rel_error_holdout_stored: Option<f64>,
    /// Wall-clock seconds for this layer (statistics + solve).
    #[serde(deserialize_with = "f64_or_nan")]
    pub seconds: f64,
    /// Calibration rows the solver fitted.
    pub calibration_rows: usize,
    /// Held-out rows.
    pub holdout_rows: usize,
    /// Ridge α used for this layer.
    #[serde(deserialize_with = "f64_or_nan")]
    pub ridge_alpha: f64,
    /// Ridge λ = α · mean(diag(H)).
    #[serde(deserialize_with = "f64_or_nan")]
    pub ridge_lambda: f64,
    /// Objective `Σ_r (w−ŵ)ᵀA(w−ŵ)` at the solver's start.
    #[serde(deserialize_with = "f64_or_nan")]
    pub objective_initial: f64,
    /// Objective at the end.
    #[serde(deserialize_with = "f64_or_nan")]
    pub objective_final: f64,
    /// Local-search sweeps (0 for one-shot methods).
    pub sweeps: usize,
    /// Swap moves accepted.
    pub swaps: usize,
    /// Starting point of the local search, if any.
    pub init: Option<String>,
    /// The proven lower bound on the best possible objective, when asked
    /// for (`lopper prune --certify`); its fields sit in the layer's object.
    #[serde(flatten)]
    pub certificate: Option<Certified>,
}

/// A layer's certificate: a proven lower bound on the objective of the best
/// mask its pattern allows (see [`crate::solve::certify`]).
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Certified {
    /// `L ≤ min Σ_r (w − ŵ)ᵀ A (w − ŵ)` over every allowed mask.
    pub lower_bound: f64,
    /// `(objective_final − lower_bound) / objective_final`: how much lower
    /// the objective of any mask could possibly be, as a fraction.
    pub certified_gap: f64,
    /// Share of the rows proven optimal (their own gap within 1e-6);
    /// `null` for a per-layer budget, where rows have no bound of their own.
    pub rows_proven_optimal: Option<f64>,
    /// Seconds spent on the bound (not in `seconds`).
    pub bound_seconds: f64,
}

/// Totals over the pruned layers.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Summary {
    /// Pruned layers.
    pub layers: usize,
    /// Nonzeros kept over all pruned layers.
    pub kept: usize,
    /// Weights in all pruned layers.
    pub total: usize,
    /// Overall fraction of zeros in the pruned layers.
    #[serde(deserialize_with = "f64_or_nan")]
    pub sparsity: f64,
    /// Mean of `rel_error` over layers.
    #[serde(deserialize_with = "f64_or_nan")]
    pub mean_rel_error: f64,
    /// Mean of `rel_error_holdout` over layers that have held-out rows.
    pub mean_rel_error_holdout: Option<f64>,
    /// Mean of `rel_error_stored` over layers that have it.
    #[serde(default)]
    pub mean_rel_error_stored: Option<f64>,
    /// Total wall-clock seconds.
    #[serde(deserialize_with = "f64_or_nan")]
    pub seconds: f64,
}

/// The whole report.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Report {
    /// Run settings.
    pub settings: Settings,
    /// Per layer.
    pub layers: Vec<LayerReport>,
    /// Totals.
    pub summary: Summary,
    /// Files written.
    pub outputs: Vec<String>,
    /// Seconds per phase, for text-calibrated runs.
    pub timing: Option<PhaseTimes>,
    /// End-to-end comparison with the dense model, when asked for.
    pub eval: Option<EvalSummary>,
    /// Structured pruning: the units removed per block (`null` without).
    #[serde(default)]
    pub structure: Option<StructureReport>,
    /// Per-layer sparsities chosen under one overall target (absent for a
    /// uniform target).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub allocation: Option<allocation::AllocationReport>,
    /// [`VALIDATION_NOTICE`].
    pub notice: String,
}

/// One block's cut of one kind of unit (FFN neurons or attention heads).
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct UnitsReport {
    /// Block index.
    pub block: usize,
    /// `neurons` or `heads` (a head unit is one key/value head with the
    /// query heads that share it).
    pub kind: String,
    /// The layer that reads the units, refit on the kept ones.
    pub consumer: String,
    /// Units before.
    pub before: usize,
    /// Units after.
    pub after: usize,
    /// Indices of the removed units.
    pub removed: Vec<usize>,
    /// Method that chose them.
    pub method: String,
    /// The consumer was refit on the kept units.
    pub refit: bool,
    /// The consumer's `‖XWᵀ − XŴᵀ‖²/‖XWᵀ‖²` on calibration rows after the cut
    /// (before any unstructured pruning of what remains).
    #[serde(deserialize_with = "f64_or_nan")]
    pub rel_error: f64,
    /// The same on held-out rows.
    pub rel_error_holdout: Option<f64>,
    /// Ridge α used.
    #[serde(deserialize_with = "f64_or_nan")]
    pub ridge_alpha: f64,
    /// Objective after the start (greedy removal for `l0`).
    #[serde(deserialize_with = "f64_or_nan")]
    pub objective_start: f64,
    /// Objective at the end.
    #[serde(deserialize_with = "f64_or_nan")]
    pub objective: f64,
    /// Swap rounds.
    pub rounds: usize,
    /// Swaps accepted.
    pub swaps: usize,
    /// Seconds for the structured solve.
    #[serde(deserialize_with = "f64_or_nan")]
    pub seconds: f64,
}

/// What structured pruning removed.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct StructureReport {
    /// One entry per block and kind of unit.
    pub units: Vec<UnitsReport>,
    /// Parameters of the whole model before.
    pub params_before: usize,
    /// Parameters of the written model.
    pub params_after: usize,
    /// The `config.json` keys that changed, with their new values.
    pub config: serde_json::Value,
}

/// Seconds spent in each phase of a text-calibrated run.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct PhaseTimes {
    /// Tokenizing the text and drawing windows.
    #[serde(deserialize_with = "f64_or_nan")]
    pub tokenize: f64,
    /// Forward passes through the blocks (collecting and propagating).
    #[serde(deserialize_with = "f64_or_nan")]
    pub forward: f64,
    /// Accumulating Gram matrices from the collected inputs.
    #[serde(deserialize_with = "f64_or_nan")]
    pub gram: f64,
    /// Solving the layers.
    #[serde(deserialize_with = "f64_or_nan")]
    pub solve: f64,
    /// Reading weights from the model files into f32 (block by block, or
    /// the whole model first).
    #[serde(default)]
    pub read: f64,
    /// Encoding and writing pruned tensors as their blocks finish (the
    /// final copy of the untouched tensors is in the total only).
    #[serde(default)]
    pub write: f64,
}

/// How far the pruned model's outputs are from the dense model's on text the
/// pruning never saw.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct EvalSummary {
    /// Text file evaluated.
    pub text: String,
    /// `encoder` or `decoder`.
    pub kind: String,
    /// Inputs evaluated: lines for encoders, windows for decoders.
    pub inputs: usize,
    /// Tokens run through each model.
    pub tokens: usize,
    /// Encoders: mean cosine similarity of pooled embeddings, pruned vs dense.
    pub cosine_mean: Option<f64>,
    /// Encoders: the lowest cosine over the inputs.
    pub cosine_min: Option<f64>,
    /// Decoders: perplexity of the dense model.
    pub perplexity_dense: Option<f64>,
    /// Decoders: perplexity of the pruned model.
    pub perplexity_pruned: Option<f64>,
    /// Decoders: mean KL(dense ‖ pruned) of next-token distributions, nats.
    pub kl_mean: Option<f64>,
    /// Both: `Σ‖h − ĥ‖² / Σ‖h‖²` over the final block's output states
    /// (before pooling or the head), dense `h` against pruned `ĥ`.
    pub hidden_rel_error: Option<f64>,
}

impl EvalSummary {
    /// One line for the terminal.
    pub fn render(&self) -> String {
        match (self.cosine_mean, self.perplexity_dense) {
            (Some(m), _) => format!(
                "end to end on {} ({} lines, {} tokens): embedding cosine pruned vs dense mean {:.4}, min {:.4}; final states error {}",
                self.text,
                self.inputs,
                self.tokens,
                m,
                self.cosine_min.unwrap_or(f64::NAN),
                fmt_err(self.hidden_rel_error)
            ),
            (None, Some(pd)) => {
                let pp = self.perplexity_pruned.unwrap_or(f64::NAN);
                format!(
                    "end to end on {} ({} windows, {} tokens): perplexity dense {pd:.3}, pruned {pp:.3} ({:+.1}%), mean KL {:.4} nats/token; final states error {}",
                    self.text,
                    self.inputs,
                    self.tokens,
                    100.0 * (pp / pd - 1.0),
                    self.kl_mean.unwrap_or(f64::NAN),
                    fmt_err(self.hidden_rel_error)
                )
            }
            _ => format!("end to end on {}: no inputs", self.text),
        }
    }
}

impl StructureReport {
    /// The removed units as a fixed-width text table, one line per block
    /// and kind, then the parameter totals.
    pub fn render_table(&self) -> String {
        let mut out = String::new();
        let head = format!(
            "{:>5}  {:<7}  {:>13}  {:>11}  {:>11}  {:>6}  {:>5}  {:>7}",
            "block", "units", "kept / before", "err calib", "err held", "alpha", "swaps", "sec"
        );
        let rule = "-".repeat(head.len());
        let _ = writeln!(out, "{head}\n{rule}");
        for u in &self.units {
            let _ = writeln!(
                out,
                "{:>5}  {:<7}  {:>13}  {:>11}  {:>11}  {:>6}  {:>5}  {:>7.2}",
                u.block,
                u.kind,
                format!("{}/{}", u.after, u.before),
                fmt_err(Some(u.rel_error)),
                fmt_err(u.rel_error_holdout),
                u.ridge_alpha,
                u.swaps,
                u.seconds
            );
        }
        let _ = writeln!(out, "{rule}");
        let pct = 100.0 * (1.0 - self.params_after as f64 / self.params_before.max(1) as f64);
        let _ = writeln!(
            out,
            "parameters {} -> {} ({pct:.1}% fewer); config.json: {}",
            self.params_before, self.params_after, self.config
        );
        out
    }
}

impl Summary {
    /// Totals of `layers`, with `seconds` of wall clock.
    pub fn of(layers: &[LayerReport], seconds: f64) -> Self {
        let kept: usize = layers.iter().map(|l| l.kept).sum();
        let total: usize = layers.iter().map(|l| l.total).sum();
        // Undefined errors (NaN: a layer whose dense outputs are all zero)
        // are left out of the means.
        let calib: Vec<f64> = layers.iter().map(|l| l.rel_error).filter(|e| !e.is_nan()).collect();
        let n = calib.len().max(1) as f64;
        let held: Vec<f64> =
            layers.iter().filter_map(|l| l.rel_error_holdout).filter(|e| !e.is_nan()).collect();
        let stored: Vec<f64> =
            layers.iter().filter_map(|l| l.rel_error_stored).filter(|e| !e.is_nan()).collect();
        Summary {
            mean_rel_error_stored: (!stored.is_empty())
                .then(|| stored.iter().sum::<f64>() / stored.len() as f64),
            layers: layers.len(),
            kept,
            total,
            sparsity: if total > 0 { 1.0 - kept as f64 / total as f64 } else { 0.0 },
            mean_rel_error: calib.iter().sum::<f64>() / n,
            mean_rel_error_holdout: (!held.is_empty())
                .then(|| held.iter().sum::<f64>() / held.len() as f64),
            seconds,
        }
    }
}

/// One line on the certified gaps of the layers that have one: median and
/// worst, and the seconds the bounds took.
fn certified_line(layers: &[LayerReport]) -> Option<String> {
    let certs: Vec<&Certified> = layers.iter().filter_map(|l| l.certificate.as_ref()).collect();
    if certs.is_empty() {
        return None;
    }
    let mut gaps: Vec<f64> = certs.iter().map(|c| c.certified_gap).collect();
    gaps.sort_by(f64::total_cmp);
    let mid = gaps.len() / 2;
    let median = if gaps.len() % 2 == 1 { gaps[mid] } else { 0.5 * (gaps[mid - 1] + gaps[mid]) };
    let worst = gaps[gaps.len() - 1];
    let secs: f64 = certs.iter().map(|c| c.bound_seconds).sum();
    Some(format!(
        "certified gap (no mask of the pattern can lower a layer's objective by more): median \
         {:.3}%, worst {:.3}% over {} layers; bounds took {secs:.2} s",
        100.0 * median,
        100.0 * worst,
        gaps.len()
    ))
}

fn fmt_err(x: Option<f64>) -> String {
    match x {
        Some(v) if v.is_finite() => format!("{v:.4e}"),
        Some(v) if v.is_nan() => "undefined".to_string(),
        Some(v) => format!("{v}"),
        None => "-".to_string(),
    }
}

impl Report {
    /// The report as a fixed-width text table.
    pub fn render_table(&self) -> String {
        let s = &self.settings;
        let target = match (&s.pattern, s.sparsity) {
            (Some(p), _) => format!("pattern {p}"),
            (None, Some(x)) => format!("sparsity {x} per {}", s.scope),
            _ => String::new(),
        };
        let mut out = String::new();
        let ridge = match &s.ridge {
            serde_json::Value::String(r) => r.clone(),
            other => other.to_string(),
        };
        let _ = writeln!(
            out,
            "lopper {} | method {} | {target} | ridge {ridge}",
            s.tool_version, s.method
        );
        let wname = self
            .layers
            .iter()
            .map(|l| crate::io::escape(&l.name).chars().count())
            .max()
            .unwrap_or(5)
            .max(5);
        // The local search's counters only mean something for it.
        let search = s.method == "l0";
        let mut head = format!(
            "{:<wname$}  {:>11}  {:>17}  {:>8}  {:>11}  {:>11}  {:>11}  {:>6}",
            "layer",
            "d_out x d_in",
            "kept / total",
            "zeros",
            "err calib",
            "err held",
            "err stored",
            "alpha"
        );
        if search {
            head.push_str(&format!("  {:>6}  {:>7}", "sweeps", "swaps"));
        }
        let certified = self.layers.iter().any(|l| l.certificate.is_some());
        if certified {
            head.push_str(&format!("  {:>9}  {:>7}", "cert. gap", "proven"));
        }
        head.push_str(&format!("  {:>7}", "sec"));
        let rule = "-".repeat(head.chars().count());
        let _ = writeln!(out, "{head}");
        let _ = writeln!(out, "{rule}");
        for l in &self.layers {
            let mut row = format!(
                "{:<wname$}  {:>11}  {:>17}  {:>7.2}%  {:>11}  {:>11}  {:>11}  {:>6}",
                crate::io::escape(&l.name),
                format!("{}x{}", l.shape[0], l.shape[1]),
                format!("{}/{}", l.kept, l.total),
                100.0 * l.sparsity,
                fmt_err(Some(l.rel_error)),
                fmt_err(l.rel_error_holdout),
                fmt_err(l.rel_error_stored),
                l.ridge_alpha
            );
            if search {
                row.push_str(&format!("  {:>6}  {:>7}", l.sweeps, l.swaps));
            }
            if certified {
                let (gap, proven) = match &l.certificate {
                    Some(c) => (
                        format!("{:.3}%", 100.0 * c.certified_gap),
                        c.rows_proven_optimal
                            .map_or("-".to_string(), |p| format!("{:.1}%", 100.0 * p)),
                    ),
                    None => ("-".to_string(), "-".to_string()),
                };
                row.push_str(&format!("  {gap:>9}  {proven:>7}"));
            }
            row.push_str(&format!("  {:>7.2}", l.seconds));
            let _ = writeln!(out, "{row}");
        }
        let m = &self.summary;
        let _ = writeln!(out, "{rule}");
        let _ = writeln!(
            out,
            "{} layers, {:.2}% zeros ({} of {} weights kept); mean error calib {} held-out {}; {:.2} s",
            m.layers,
            100.0 * m.sparsity,
            m.kept,
            m.total,
            fmt_err(Some(m.mean_rel_error)),
            fmt_err(m.mean_rel_error_holdout),
            m.seconds
        );
        if let Some(line) = certified_line(&self.layers) {
            let _ = writeln!(out, "{line}");
        }
        if let Some(st) = &self.structure {
            out.push_str(&st.render_table());
        }
        if let Some(t) = &self.timing {
            let _ = writeln!(
                out,
                "time: tokenize {:.2} s, read {:.2} s, forward {:.2} s, gram {:.2} s, solve {:.2} \
                 s, write {:.2} s",
                t.tokenize, t.read, t.forward, t.gram, t.solve, t.write
            );
        }
        if let Some(e) = &self.eval {
            let _ = writeln!(out, "{}", e.render());
        }
        let _ = writeln!(out, "note: {}", self.notice);
        out
    }

    /// The report as pretty JSON. Non-finite numbers become `null`.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("report serialises")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn layer(name: &str, kept: usize, err: f64, held: Option<f64>) -> LayerReport {
        LayerReport {
            name: name.into(),
            shape: [4, 5],
            kept,
            total: 20,
            sparsity: 1.0 - kept as f64 / 20.0,
            rel_error: err,
            rel_error_holdout: held,
            rel_error_stored: None,
            rel_error_holdout_stored: None,
            seconds: 0.5,
            calibration_rows: 90,
            holdout_rows: 10,
            ridge_alpha: 0.01,
            ridge_lambda: 0.02,
            objective_initial: 1.0,
            objective_final: 1.0,
            sweeps: 0,
            swaps: 0,
            init: None,
            certificate: None,
        }
    }

    #[test]
    fn summary_means_and_sparsity() {
        let l = [layer("a", 10, 0.1, Some(0.2)), layer("b", 5, 0.3, None)];
        let s = Summary::of(&l, 2.0);
        assert_eq!((s.kept, s.total), (15, 40));
        assert!((s.sparsity - 0.625).abs() < 1e-15);
        assert!((s.mean_rel_error - 0.2).abs() < 1e-15);
        assert_eq!(s.mean_rel_error_holdout, Some(0.2));
    }

    #[test]
    fn json_has_contract_fields() {
        let layers = vec![layer("a", 10, 0.1, Some(0.2))];
        let r = Report {
            structure: None,
            allocation: None,
            settings: Settings {
                method: "obs".into(),
                sparsity: Some(0.5),
                pattern: None,
                scope: "row".into(),
                ridge: serde_json::json!(0.01),
                holdout: 0.1,
                tool_version: "0".into(),
                model: "m".into(),
                activations: Some("a".into()),
                text: None,
                threads: 1,
                model_fingerprint: None,
            },
            summary: Summary::of(&layers, 1.0),
            layers,
            outputs: vec![],
            timing: None,
            eval: None,
            notice: VALIDATION_NOTICE.into(),
        };
        let v: serde_json::Value = serde_json::from_str(&r.to_json()).unwrap();
        for k in ["name", "shape", "kept", "sparsity", "rel_error", "rel_error_holdout", "seconds"]
        {
            assert!(v["layers"][0].get(k).is_some(), "missing layers[].{k}");
        }
        for k in ["sparsity", "mean_rel_error", "mean_rel_error_holdout", "seconds"] {
            assert!(v["summary"].get(k).is_some(), "missing summary.{k}");
        }
        assert_eq!(v["settings"]["method"], "obs");
        let t = r.render_table();
        assert!(t.contains("50.00%") && t.contains("1.0000e-1"), "{t}");
    }

    #[test]
    fn certificate_fields_sit_in_the_layer_and_read_back() {
        let mut a = layer("a", 10, 0.1, Some(0.2));
        a.certificate = Some(Certified {
            lower_bound: 0.75,
            certified_gap: 0.25,
            rows_proven_optimal: Some(0.5),
            bound_seconds: 0.1,
        });
        let mut b = layer("b", 10, 0.1, None);
        b.certificate = Some(Certified {
            lower_bound: 0.5,
            certified_gap: 0.5,
            rows_proven_optimal: None,
            bound_seconds: 0.2,
        });
        let plain = layer("c", 10, 0.1, None);
        let v = serde_json::to_value([&a, &b, &plain]).unwrap();
        assert_eq!(v[0]["lower_bound"], 0.75);
        assert_eq!(v[0]["certified_gap"], 0.25);
        assert_eq!(v[0]["rows_proven_optimal"], 0.5);
        assert!(v[1]["rows_proven_optimal"].is_null());
        assert!(v[2].get("lower_bound").is_none() && v[2].get("certified_gap").is_none());
        let back: Vec<LayerReport> = serde_json::from_value(v).unwrap();
        assert_eq!(back, vec![a.clone(), b.clone(), plain.clone()]);
        // Median of the gaps 0.25 and 0.5 is their mean; the worst is 0.5.
        let line = certified_line(&[a, b, plain]).unwrap();
        assert!(line.contains("median 37.500%, worst 50.000% over 2 layers"), "{line}");
    }

    #[test]
    fn every_report_lopper_writes_reads_back() {
        // A [0, 384] layer has sparsity 0/0 and an all-zero layer an
        // undefined error: NaN, which serde_json writes as null. The
        // reader of `lopper report` must take the file back.
        let mut empty = layer("empty", 0, f64::NAN, Some(f64::NAN));
        empty.shape = [0, 384];
        empty.total = 0;
        empty.sparsity = f64::NAN;
        empty.objective_initial = f64::INFINITY;
        let layers = vec![layer("a", 10, 0.1, Some(0.2)), empty];
        let r = Report {
            structure: None,
            allocation: None,
            settings: Settings {
                method: "obs".into(),
                sparsity: Some(0.5),
                pattern: None,
                scope: "row".into(),
                ridge: serde_json::json!(0.01),
                holdout: 0.1,
                tool_version: "0".into(),
                model: "m".into(),
                activations: Some("a".into()),
                text: None,
                threads: 1,
                model_fingerprint: Some("0123456789abcdef".into()),
            },
            summary: Summary::of(&layers, 1.0),
            layers,
            outputs: vec![],
            timing: Some(PhaseTimes { tokenize: f64::NAN, ..PhaseTimes::default() }),
            eval: None,
            notice: VALIDATION_NOTICE.into(),
        };
        let json = r.to_json();
        assert!(json.contains("\"sparsity\": null"), "{json}");
        // The summary leaves the undefined error out of the mean.
        assert!((r.summary.mean_rel_error - 0.1).abs() < 1e-15);
        let dir = std::env::temp_dir().join(format!("lopper-report-rt-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("r.json");
        std::fs::write(&path, &json).unwrap();
        let back = crate::compare::data::load(&path);
        let _ = std::fs::remove_dir_all(&dir);
        let back = back.expect("lopper reads its own report");
        let run = &back.comparison.runs[0];
        assert_eq!(run.layers.len(), 2);
        assert!(run.layers[1].sparsity.is_nan() && run.layers[1].rel_error.is_nan());
        assert_eq!(run.layers[1].rel_error_holdout, None);
        assert_eq!(run.layers[0], r.layers[0]);
        assert_eq!(back.comparison.model_fingerprint.as_deref(), Some("0123456789abcdef"));
        // And a comparison.json written from it reads back too.
        let again: crate::compare::data::Comparison =
            serde_json::from_str(&back.comparison.to_json()).unwrap();
        assert!(again.runs[0].layers[1].sparsity.is_nan());
        // Reports without a fingerprint (older versions) still read.
        let mut old: serde_json::Value = serde_json::from_str(&json).unwrap();
        old["settings"].as_object_mut().unwrap().remove("model_fingerprint").unwrap();
        let r2: Report = serde_json::from_value(old).unwrap();
        assert_eq!(r2.settings.model_fingerprint, None);
    }
}
