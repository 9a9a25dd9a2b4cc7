//! Whole-model CPU latency: the model's own forward pass, end to end, timed
//! dense against pruned with lopper's sparse kernels, and against a
//! structurally smaller model as written.
//!
//! This module owns the scenarios, the variants and the report:
//! - Scenarios: encoders run `batch × seq` token batches (sentences/s);
//!   decoders run a prefill of `prefill` tokens (tokens/s) and decode at
//!   batch 1 with the key/value cache (`crate::arch::decode`), one call per
//!   generated token (ms/token).
//! - Variants: `dense` (the dense model, or the given model with candle's
//!   dense products when no dense model is given), `sparse_kernels` (the
//!   given model, each pruned layer on the product [`choose`] measured
//!   faster at the scenario's row count), `as_written` (the given model with
//!   dense products, when its linear layers are smaller than the dense
//!   model's: a structural cut).
//! - Calls alternate between variants (decoding: token by token, each
//!   variant with its own cache), so a change in machine load hits all of
//!   them alike. Each call's time and the time spent in block linear
//!   layers ([`crate::arch::kernel::layer_time`]) are kept; the rest
//!   (attention, norms, embeddings, output head) is their difference — the
//!   part sparsity cannot shrink (Amdahl's law: with a share `s` of the time
//!   in the layers, the whole model gains at most `1/(1 − s)`).
//!
//! Before timing, the sparse-kernel forward is checked against the dense
//! forward of the same weights (relative error reported), and for decoders
//! the cached decode against the full forward.

pub mod choose;
pub mod table;

use std::collections::BTreeMap;
use std::time::Instant;

use candle_core::Tensor;
use serde::Serialize;

use crate::arch::decode::{self, KvCache};
use crate::arch::kernel::{self, Kernel};
use crate::arch::{self, Batch, Kind, Network};
use crate::error::{Error, Result};
use crate::io::Model;
use crate::rng::SplitMix64;
use choose::{block_linears, quantile, Candidate, Choice};

/// What to time and how often.
#[derive(Clone, Debug)]
pub struct LatencyConfig {
    /// Threads (already resolved).
    pub threads: usize,
    /// Encoder batch sizes.
    pub batches: Vec<usize>,
    /// Encoder sequence length.
    pub seq: usize,
    /// Decoder prefill length (0: no prefill scenario).
    pub prefill: usize,
    /// Decoder: prompt length before the timed decode steps.
    pub prompt: usize,
    /// Decoder: timed tokens per decode run.
    pub tokens: usize,
    /// Timed calls per variant (encoder batches, prefills, decode runs).
    pub reps: usize,
    /// Untimed calls per variant first.
    pub warmup: usize,
    /// Seed for the random token ids.
    pub seed: u64,
}

/// Per-call statistics of one variant in one scenario.
#[derive(Clone, Debug, Serialize)]
pub struct Stats {
    /// Median milliseconds per call (per token when decoding).
    pub p50_ms: f64,
    /// 90th-percentile milliseconds per call.
    pub p90_ms: f64,
    /// Units (sentences or tokens) per second at the median.
    pub per_s: f64,
    /// Median milliseconds per call in block linear layers.
    pub linear_ms: f64,
    /// Share of the total time in block linear layers.
    pub linear_share: f64,
    /// Timed calls.
    pub calls: usize,
}

/// One scenario: the variants side by side.
#[derive(Clone, Debug, Serialize)]
pub struct Scenario {
    /// What one call is, in words.
    pub call: String,
    /// `sentences` or `tokens`.
    pub unit: String,
    /// Input rows each linear layer sees per call.
    pub rows: usize,
    /// Variant name → statistics.
    pub variants: BTreeMap<String, Stats>,
    /// `dense` median / variant median, per variant other than `dense`.
    pub speedup: BTreeMap<String, f64>,
    /// Amdahl's bound on the dense run: `1 / (1 − linear share)`.
    pub linear_bound_speedup: f64,
    /// Pruned layers on their sparse kernel (the rest stay dense).
    pub layers_sparse: usize,
    /// Pruned layers kept dense because the sparse kernel was slower.
    pub layers_dense_fallback: usize,
}

/// The whole report.
#[derive(Clone, Debug, Serialize)]
pub struct LatencyReport {
    /// The model timed.
    pub model: String,
    /// The dense model it is compared with, if given.
    pub dense_model: Option<String>,
    /// `bert`, `llama`, ...
    pub model_type: String,
    /// Encoder or decoder.
    pub kind: String,
    /// Threads.
    pub threads: usize,
    /// `/proc/loadavg` before and after.
    pub load: [String; 2],
    /// Pruned layers (at least 10% exact zeros) of the block linear layers.
    pub pruned_layers: usize,
    /// Block linear layers.
    pub block_layers: usize,
    /// ‖sparse-kernel output − dense output‖ / ‖dense output‖ for the same
    /// weights, on one batch.
    pub sparse_check_rel_error: Option<f64>,
    /// Largest relative error of cached-decode logits against the full
    /// forward, over a few steps (decoders).
    pub decode_check_rel_error: Option<f64>,
    /// Scenario name → results.
    pub scenarios: BTreeMap<String, Scenario>,
    /// Per-layer kernel choices, per scenario.
    pub choices: BTreeMap<String, Vec<Choice>>,
    /// Reminder that speed is not quality.
    pub note: String,
}

/// A way to run a model: which network and which kernels.
struct Variant {
    name: &'static str,
    net: usize,
    kernels: Vec<(String, Kernel)>,
}

fn load_avg() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_default()
}

fn linear_params(net: &dyn Network) -> usize {
    block_linears(net).iter().filter_map(|n| net.linear(n)).map(|l| l.shape().0 * l.shape().1).sum()
}

/// Time `model` (and `dense`, when given) as [`LatencyConfig`] says.
/// `note(msg)` reports progress.
///
/// # Errors
/// Loading errors, models of different families, a configuration the
/// model cannot run (sequence beyond its positions), compute errors.
pub fn measure(
    model: &Model,
    dense: Option<&Model>,
    cfg: &LatencyConfig,
    note: &dyn Fn(&str),
) -> Result<LatencyReport> {
    let load0 = load_avg();
    let conf = arch::ArchConfig::read(&arch::model_dir(model))?;
    let vocab = conf.usize("vocab_size")?;
    note("loading the model");
    let mut nets: Vec<Box<dyn Network>> = vec![arch::load(model)?];
    if let Some(d) = dense {
        note("loading the dense model");
        let dn = arch::load(d)?;
        if dn.family() != nets[0].family() || dn.num_blocks() != nets[0].num_blocks() {
            return Err(Error::usage(format!(
                "--dense {}: a {:?} model of {} blocks, but the model is a {:?} of {} blocks",
                d.layout().root().display(),
                dn.family(),
                dn.num_blocks(),
                nets[0].family(),
                nets[0].num_blocks()
            )));
        }
        nets.push(dn);
    }
    let kind = nets[0].kind();
    let longest = match kind {
        Kind::Encoder => cfg.seq,
        Kind::Decoder => cfg.prefill.max(cfg.prompt + cfg.warmup + cfg.tokens),
    };
    if let Some(max) = nets.iter().filter_map(|n| n.max_positions()).min() {
        if longest > max {
            return Err(Error::usage(format!(
                "{longest} positions are needed but the model allows {max}; lower --seq, \
                 --prefill or --tokens"
            )));
        }
    }
    let layers = block_linears(nets[0].as_ref());
    note("finding pruned layers");
    let cands = choose::candidates(nets[0].as_ref())?;
    let smaller =
        dense.is_some() && linear_params(nets[0].as_ref()) < linear_params(nets[1].as_ref());

    let mut rng = SplitMix64::new(cfg.seed);
    let mut ids = |n: usize, l: usize| -> Vec<Vec<u32>> {
        (0..n).map(|_| (0..l).map(|_| rng.below(vocab as u64) as u32).collect()).collect()
    };

    // Correctness of what is about to be timed.
    let all_dense: Vec<(String, Kernel)> =
        layers.iter().map(|n| (n.clone(), Kernel::Dense)).collect();
    let all_sparse: Vec<(String, Kernel)> =
        cands.iter().map(|c| (c.name.clone(), Kernel::Sparse(c.sparse.clone()))).collect();
    let (sparse_check, decode_check) = {
        let net = &mut nets[0];
        let batch = Batch::new(&ids(if kind == Kind::Encoder { 2 } else { 1 }, 16));
        let sparse_check = if cands.is_empty() {
            None
        } else {
            note("checking the sparse kernels against the dense forward");
            apply(net.as_mut(), &all_dense)?;
            let want = net.forward(&batch)?;
            apply(net.as_mut(), &all_sparse)?;
            let got = net.forward(&batch)?;
            Some(rel_error(&got, &want)?)
        };
        let decode_check = if kind == Kind::Decoder {
            note("checking cached decoding against the full forward");
            Some(decode::check_against_full(net.as_ref(), &ids(1, 8)[0], 4)?)
        } else {
            None
        };
        (sparse_check, decode_check)
    };

    let mut scenarios = BTreeMap::new();
    let mut choices = BTreeMap::new();
    let plans: Vec<(String, usize, usize)> = match kind {
        Kind::Encoder => {
            cfg.batches.iter().map(|&b| (format!("encode_batch_{b}"), b, cfg.seq)).collect()
        }
        Kind::Decoder => {
            let mut v = vec![];
            if cfg.prefill > 0 {
                v.push((format!("prefill_{}", cfg.prefill), 1, cfg.prefill));
            }
            v.push(("decode_batch_1".to_string(), 1, 1));
            v
        }
    };
    for (name, n, l) in plans {
        let decoding = name.starts_with("decode");
        note(&format!("{name}: measuring each pruned layer's kernels"));
        let picked = choose::choose(nets[0].as_ref(), &cands, n * l)?;
        let variants = variants(&layers, &cands, &picked, dense.is_some(), smaller);
        note(&format!("{name}: timing {} variants", variants.len()));
        let mut samples: Vec<(Vec<f64>, Vec<f64>)> = vec![(vec![], vec![]); variants.len()];
        if decoding {
            decode_runs(&mut nets, &variants, cfg, &mut ids, &mut samples)?;
        }
        let rounds = if decoding { 0 } else { cfg.warmup + cfg.reps };
        for rep in 0..rounds {
            for (vi, v) in variants.iter().enumerate() {
                let net = &mut nets[v.net];
                apply(net.as_mut(), &v.kernels)?;
                let batch = Batch::new(&ids(n, l));
                let (t, k) = call(|| net.forward(&batch).map(|_| ()))?;
                if rep >= cfg.warmup {
                    samples[vi].0.push(t);
                    samples[vi].1.push(k);
                }
            }
        }
        let per_call = if decoding { 1 } else { n * if kind == Kind::Decoder { l } else { 1 } };
        let mut stats = BTreeMap::new();
        for (v, (mut t, mut k)) in variants.iter().zip(samples) {
            let share = k.iter().sum::<f64>() / t.iter().sum::<f64>().max(f64::MIN_POSITIVE);
            let p50 = quantile(&mut t, 0.5);
            stats.insert(
                v.name.to_string(),
                Stats {
                    p50_ms: 1e3 * p50,
                    p90_ms: 1e3 * quantile(&mut t, 0.9),
                    per_s: per_call as f64 / p50,
                    linear_ms: 1e3 * quantile(&mut k, 0.5),
                    linear_share: share,
                    calls: t.len(),
                },
            );
        }
        let base = stats["dense"].p50_ms;
        let speedup = stats
            .iter()
            .filter(|(k, _)| *k != "dense")
            .map(|(k, s)| (k.clone(), base / s.p50_ms))
            .collect();
        let bound = 1.0 / (1.0 - stats["dense"].linear_share).max(1e-9);
        let layers_sparse = picked.iter().filter(|c| c.sparse).count();
        scenarios.insert(
            name.clone(),
            Scenario {
                call: describe(kind, &name, n, l, cfg),
                unit: if kind == Kind::Encoder { "sentences" } else { "tokens" }.into(),
                rows: n * l,
                variants: stats,
                speedup,
                linear_bound_speedup: bound,
                layers_sparse,
                layers_dense_fallback: picked.len() - layers_sparse,
            },
        );
        choices.insert(name, picked);
    }
    Ok(LatencyReport {
        model: model.layout().root().display().to_string(),
        dense_model: dense.map(|d| d.layout().root().display().to_string()),
        model_type: conf.model_type.clone(),
        kind: format!("{kind:?}").to_lowercase(),
        threads: cfg.threads,
        load: [load0, load_avg()],
        pruned_layers: cands.len(),
        block_layers: layers.len(),
        sparse_check_rel_error: sparse_check,
        decode_check_rel_error: decode_check,
        scenarios,
        choices,
        note: crate::report::VALIDATION_NOTICE.to_string(),
    })
}

fn describe(kind: Kind, name: &str, n: usize, l: usize, cfg: &LatencyConfig) -> String {
    match kind {
        Kind::Encoder => format!("forward of {n} x {l} tokens"),
        Kind::Decoder if name.starts_with("decode") => format!(
            "one generated token at batch 1 with the key/value cache, after a {}-token prompt",
            cfg.prompt
        ),
        Kind::Decoder => format!("prefill of {l} tokens at batch 1"),
    }
}

/// The variants to run: kernels for `nets[0]` (the model) and `nets[1]`
/// (the dense model, when given).
fn variants(
    layers: &[String],
    cands: &[Candidate],
    picked: &[Choice],
    has_dense: bool,
    smaller: bool,
) -> Vec<Variant> {
    let dense: Vec<(String, Kernel)> = layers.iter().map(|n| (n.clone(), Kernel::Dense)).collect();
    let mut sparse = dense.clone();
    for (c, p) in cands.iter().zip(picked) {
        if p.sparse {
            if let Some(slot) = sparse.iter_mut().find(|(n, _)| *n == c.name) {
                slot.1 = Kernel::Sparse(c.sparse.clone());
            }
        }
    }
    let mut v =
        vec![Variant { name: "dense", net: usize::from(has_dense), kernels: dense.clone() }];
    if !cands.is_empty() {
        v.push(Variant { name: "sparse_kernels", net: 0, kernels: sparse });
    }
    if smaller {
        v.push(Variant { name: "as_written", net: 0, kernels: dense });
    }
    v
}

/// Put `kernels` in place on `net` (layers it lacks are skipped: the dense
/// model of a structural cut has the same names).
fn apply(net: &mut dyn Network, kernels: &[(String, Kernel)]) -> Result<()> {
    for (n, k) in kernels {
        if net.linear(n).is_some() {
            net.set_kernel(n, Some(k.clone()))?;
        }
    }
    Ok(())
}

/// Seconds of `f` and of the layer clock during it.
fn call(f: impl FnOnce() -> arch::Result<()>) -> Result<(f64, f64)> {
    let k0 = kernel::layer_time();
    let t = Instant::now();
    f()?;
    let total = t.elapsed().as_secs_f64();
    Ok((total, (kernel::layer_time() - k0).as_secs_f64()))
}

/// `reps` decode runs. In each, every variant gets its own cache and the
/// same prompt (untimed), then the variants take turns token by token —
/// `warmup` untimed tokens, then `tokens` timed ones, the same random id
/// for all — so a change in machine load hits them alike.
fn decode_runs(
    nets: &mut [Box<dyn Network>],
    variants: &[Variant],
    cfg: &LatencyConfig,
    ids: &mut dyn FnMut(usize, usize) -> Vec<Vec<u32>>,
    samples: &mut [(Vec<f64>, Vec<f64>)],
) -> Result<()> {
    for _ in 0..cfg.reps {
        let prompt = Batch::new(&ids(1, cfg.prompt));
        let mut caches = Vec::with_capacity(variants.len());
        for v in variants {
            let net = &mut nets[v.net];
            apply(net.as_mut(), &v.kernels)?;
            let mut cache = KvCache::new(net.num_blocks());
            net.forward_cached(&prompt, &mut cache)?;
            caches.push(cache);
        }
        for s in 0..cfg.warmup + cfg.tokens {
            let batch = Batch::new(&ids(1, 1));
            for (vi, v) in variants.iter().enumerate() {
                let net = &mut nets[v.net];
                apply(net.as_mut(), &v.kernels)?;
                let cache = &mut caches[vi];
                let (t, k) = call(|| net.forward_cached(&batch, cache).map(|_| ()))?;
                if s >= cfg.warmup {
                    samples[vi].0.push(t);
                    samples[vi].1.push(k);
                }
            }
        }
    }
    Ok(())
}

fn rel_error(a: &Tensor, b: &Tensor) -> Result<f64> {
    let a: Vec<f32> = a.flatten_all().and_then(|t| t.to_vec1()).map_err(arch::ArchError::from)?;
    let b: Vec<f32> = b.flatten_all().and_then(|t| t.to_vec1()).map_err(arch::ArchError::from)?;
    Ok(decode::relative_error(&a, &b))
}
