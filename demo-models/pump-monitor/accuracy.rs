//! `pump-accuracy`: accuracy of (pruned) pump-monitor models on the
//! held-out set.
//!
//! ```text
//! target/release/pump-accuracy [--eval EVAL.safetensors] \
//!     MODEL.safetensors [--label NAME] [--report REPORT.json] [MODEL2 ...]
//! ```
//!
//! A second binary of the package, built by the plain `cargo build --release`
//! from normal dependencies only (anyhow, safetensors, half, serde_json), so
//! the demo needs none of the dev-dependencies. Paths are relative to the
//! working directory; run it from the repository root.
//!
//! Prints one line per model: path, eval accuracy, and the fraction of zero
//! weights in the hidden layers (`hidden.*.weight`). `--label` and `--report`
//! refer to the model named just before them; when any is given, a summary
//! table follows, with the mean relative reconstruction errors read from each
//! lopper JSON report (`summary.mean_rel_error`, `summary.mean_rel_error_holdout`).
//!
//! The model is the demo MLP: `hidden.0`, `hidden.1`, ... with ReLU, then
//! `head`; weights `[d_out, d_in]` in F32, F16 or BF16. With no model given,
//! the dense demo model is used.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use safetensors::{Dtype, SafeTensors};

const DEMO_DIR: &str = "demo-models/pump-monitor";

/// One model to evaluate, with what the command line said about it.
struct Entry {
    path: PathBuf,
    label: Option<String>,
    report: Option<PathBuf>,
}

/// A linear layer with its weight stored transposed (`[d_in, d_out]`), so the
/// forward pass is a row of axpy updates that skips zero inputs.
struct Layer {
    d_in: usize,
    d_out: usize,
    w_t: Vec<f32>,
    bias: Vec<f32>,
    zeros: usize,
}

fn to_f32(st: &SafeTensors, name: &str) -> Result<(Vec<f32>, Vec<usize>)> {
    let t = st.tensor(name).with_context(|| format!("tensor `{name}` not found"))?;
    let bytes = t.data();
    let values = match t.dtype() {
        Dtype::F32 => {
            bytes.chunks_exact(4).map(|b| f32::from_le_bytes(b.try_into().unwrap())).collect()
        }
        Dtype::F16 => {
            bytes.chunks_exact(2).map(|b| half::f16::from_le_bytes([b[0], b[1]]).to_f32()).collect()
        }
        Dtype::BF16 => bytes
            .chunks_exact(2)
            .map(|b| half::bf16::from_le_bytes([b[0], b[1]]).to_f32())
            .collect(),
        other => bail!("tensor `{name}`: unsupported dtype {other:?}"),
    };
    Ok((values, t.shape().to_vec()))
}

fn load_layer(st: &SafeTensors, prefix: &str) -> Result<Layer> {
    let (w, shape) = to_f32(st, &format!("{prefix}.weight"))?;
    let [d_out, d_in] = shape[..] else { bail!("{prefix}.weight: expected 2 dims, got {shape:?}") };
    let (bias, _) = to_f32(st, &format!("{prefix}.bias"))?;
    let mut w_t = vec![0.0; d_in * d_out];
    for o in 0..d_out {
        for i in 0..d_in {
            w_t[i * d_out + o] = w[o * d_in + i];
        }
    }
    let zeros = w.iter().filter(|&&v| v == 0.0).count();
    Ok(Layer { d_in, d_out, w_t, bias, zeros })
}

/// Returns (accuracy, fraction of zero weights in the hidden layers).
fn evaluate(model: &Path, features: &[f32], labels: &[i64]) -> Result<(f64, f64)> {
    let bytes = std::fs::read(model).with_context(|| format!("reading {}", model.display()))?;
    let st =
        SafeTensors::deserialize(&bytes).with_context(|| format!("parsing {}", model.display()))?;
    let mut hidden = Vec::new();
    while st.names().iter().any(|n| *n == format!("hidden.{}.weight", hidden.len())) {
        hidden.push(load_layer(&st, &format!("hidden.{}", hidden.len()))?);
    }
    let head = load_layer(&st, "head")?;
    let total: usize = hidden.iter().map(|l| l.d_in * l.d_out).sum();
    let zeros: usize = hidden.iter().map(|l| l.zeros).sum();

    let d_in = hidden.first().unwrap_or(&head).d_in;
    let mut correct = 0;
    for (x, &label) in features.chunks_exact(d_in).zip(labels) {
        let mut h = x.to_vec();
        for (k, layer) in hidden.iter().chain([&head]).enumerate() {
            let mut y = layer.bias.clone();
            for (i, &xi) in h.iter().enumerate() {
                if xi != 0.0 {
                    let row = &layer.w_t[i * layer.d_out..(i + 1) * layer.d_out];
                    y.iter_mut().zip(row).for_each(|(yo, &w)| *yo += xi * w);
                }
            }
            if k < hidden.len() {
                y.iter_mut().for_each(|v| *v = v.max(0.0));
            }
            h = y;
        }
        let pred = (0..h.len()).fold(0, |best, j| if h[j] > h[best] { j } else { best });
        correct += (pred as i64 == label) as usize;
    }
    Ok((correct as f64 / labels.len() as f64, zeros as f64 / total.max(1) as f64))
}

/// (`summary.mean_rel_error`, `summary.mean_rel_error_holdout`) of a lopper report.
fn read_report(path: &Path) -> Result<(f64, f64)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let json: serde_json::Value =
        serde_json::from_str(&text).with_context(|| format!("parsing {}", path.display()))?;
    let field = |key: &str| {
        json["summary"][key]
            .as_f64()
            .with_context(|| format!("{}: no number at summary.{key}", path.display()))
    };
    Ok((field("mean_rel_error")?, field("mean_rel_error_holdout")?))
}

fn main() {
    if let Err(err) = run() {
        eprintln!("error: {err:#}");
        std::process::exit(1);
    }
}

fn run() -> Result<()> {
    let mut eval = PathBuf::from(DEMO_DIR).join("eval.safetensors");
    let mut entries: Vec<Entry> = Vec::new();
    let mut args = std::env::args().skip(1);
    while let Some(arg) = args.next() {
        let mut value = |flag: &str| args.next().with_context(|| format!("{flag} needs a value"));
        match arg.as_str() {
            "--eval" => eval = value("--eval")?.into(),
            "--label" | "--report" => {
                let v = value(&arg)?;
                let last = entries
                    .last_mut()
                    .with_context(|| format!("{arg} must follow a model path"))?;
                if arg == "--label" {
                    last.label = Some(v)
                } else {
                    last.report = Some(v.into())
                }
            }
            "-h" | "--help" => {
                println!("usage: pump-accuracy [--eval EVAL] MODEL [--label NAME] [--report REPORT.json] [MODEL ...]");
                return Ok(());
            }
            flag if flag.starts_with("--") => bail!("unknown option {flag}"),
            path => entries.push(Entry { path: path.into(), label: None, report: None }),
        }
    }
    if entries.is_empty() {
        entries.push(Entry {
            path: PathBuf::from(DEMO_DIR).join("model.safetensors"),
            label: None,
            report: None,
        });
    }

    let bytes = std::fs::read(&eval).with_context(|| format!("reading {}", eval.display()))?;
    let st = SafeTensors::deserialize(&bytes)?;
    let (features, _) = to_f32(&st, "features")?;
    let t = st.tensor("labels")?;
    if t.dtype() != Dtype::I64 {
        bail!("eval labels must be I64, got {:?}", t.dtype());
    }
    let labels: Vec<i64> =
        t.data().chunks_exact(8).map(|b| i64::from_le_bytes(b.try_into().unwrap())).collect();

    let mut rows = Vec::new();
    for e in &entries {
        let (acc, zeros) = evaluate(&e.path, &features, &labels)?;
        println!("{}  accuracy {acc:.4}  hidden zeros {zeros:.3}", e.path.display());
        let errs = e.report.as_deref().map(read_report).transpose()?;
        rows.push((e, acc, zeros, errs));
    }

    if entries.iter().any(|e| e.label.is_some() || e.report.is_some()) {
        let fmt = |v: Option<f64>| v.map_or("-".to_string(), |v| format!("{v:.3e}"));
        println!();
        println!(
            "{:<12} {:>14} {:>16} {:>9} {:>13}",
            "method", "rel err calib", "rel err holdout", "accuracy", "hidden zeros"
        );
        println!("{}", "-".repeat(68));
        for (e, acc, zeros, errs) in rows {
            let name = e.label.clone().unwrap_or_else(|| e.path.display().to_string());
            let (calib, holdout) = (errs.map(|r| r.0), errs.map(|r| r.1));
            println!("{name:<12} {:>14} {:>16} {acc:>9.4} {zeros:>13.3}", fmt(calib), fmt(holdout));
        }
    }
    Ok(())
}
