//! End-to-end comparison of a pruned model with its dense original on text:
//! pooled-embedding cosine for encoders, perplexity and next-token KL
//! divergence for decoders.
//!
//! The metric kernels ([`cosine`], [`log_softmax`], [`kl_divergence`]) are
//! pure functions on slices; [`evaluate`] runs both networks.

use crate::arch::{self, Batch, Kind, Network};
use crate::error::Error;
use crate::io::Model;
use crate::report::EvalSummary;
use crate::tokenize::{load_tokenizer, read_text, tokenize, Framing};
use std::collections::BTreeMap;
use std::path::PathBuf;

/// What to evaluate on.
#[derive(Clone, Debug, PartialEq)]
pub struct EvalOptions {
    /// UTF-8 text never used for calibration. Encoders read one input per
    /// non-empty line; decoders read consecutive windows of tokens.
    pub text: PathBuf,
    /// Most inputs (lines or windows); `None`: 1000 lines or 64 windows.
    pub samples: Option<usize>,
    /// Decoder window length in tokens; `None`: 256 (or the model's limit).
    /// Encoder lines are cut at the model's position limit.
    pub seq_len: Option<usize>,
}

/// Cosine similarity `a·b / (‖a‖‖b‖)` (0 when either is zero).
pub fn cosine(a: &[f64], b: &[f64]) -> f64 {
    let dot: f64 = a.iter().zip(b).map(|(x, y)| x * y).sum();
    let na: f64 = a.iter().map(|x| x * x).sum::<f64>().sqrt();
    let nb: f64 = b.iter().map(|x| x * x).sum::<f64>().sqrt();
    if na == 0.0 || nb == 0.0 {
        0.0
    } else {
        dot / (na * nb)
    }
}

/// `log softmax(z)ᵢ = zᵢ − m − log Σⱼ exp(zⱼ − m)` with `m = max z`.
pub fn log_softmax(z: &[f64]) -> Vec<f64> {
    let m = z.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let lse = m + z.iter().map(|v| (v - m).exp()).sum::<f64>().ln();
    z.iter().map(|v| v - lse).collect()
}

/// `KL(p ‖ q) = Σᵢ pᵢ (log pᵢ − log qᵢ)` from log-probabilities.
pub fn kl_divergence(log_p: &[f64], log_q: &[f64]) -> f64 {
    log_p
        .iter()
        .zip(log_q)
        .map(|(lp, lq)| if lp.is_finite() { lp.exp() * (lp - lq) } else { 0.0 })
        .sum()
}

/// The dense network and its pruned copy.
pub type NetworkPair = (Box<dyn Network>, Box<dyn Network>);

/// Build the dense network of `dense` and a copy with `replace` applied
/// (weights in the file's storage orientation, by tensor name).
pub fn networks(dense: &Model, replace: &BTreeMap<String, Vec<f64>>) -> Result<NetworkPair, Error> {
    let a = arch::load(dense)?;
    let mut b = arch::load(dense)?;
    for (name, values) in replace {
        let Some(lin) = b.linear(name) else { continue };
        let (o, i) = lin.shape();
        let w: Vec<f32> = if lin.transposed {
            // Stored [d_in, d_out]: element (r, c) of the [d_out, d_in] view
            // is values[c·d_out + r].
            (0..o * i).map(|k| values[(k % i) * o + k / i] as f32).collect()
        } else {
            values.iter().map(|&v| v as f32).collect()
        };
        b.set_weight(name, &w)?;
    }
    Ok((a, b))
}

/// Read every linear layer of the network from `pruned` (same names and
/// shapes as `dense`), in storage orientation, for [`networks`].
pub fn pruned_weights(dense: &Model, pruned: &Model) -> Result<BTreeMap<String, Vec<f64>>, Error> {
    let net = arch::load(dense)?;
    let mut out = BTreeMap::new();
    for b in 0..net.num_blocks() {
        for g in net.groups(b) {
            for name in g.layers {
                let (d, p) = (dense.get(&name), pruned.get(&name));
                let p = p.ok_or_else(|| {
                    Error::input(format!(
                        "{}: no tensor '{name}', which the dense model has",
                        pruned.layout().root().display()
                    ))
                })?;
                let d = d.expect("the network was built from the dense tensors");
                if d.shape != p.shape {
                    return Err(Error::input(format!(
                        "{}: tensor '{name}' has shape {:?}, the dense model's has {:?}",
                        pruned.layout().root().display(),
                        p.shape,
                        d.shape
                    )));
                }
                out.insert(name.clone(), pruned.read_f64(&name)?);
            }
        }
    }
    Ok(out)
}

/// Compare `dense` with a copy whose weights `replace` overrides.
pub fn evaluate(
    dense: &Model,
    replace: &BTreeMap<String, Vec<f64>>,
    opts: &EvalOptions,
) -> Result<EvalSummary, Error> {
    let (a, b) = networks(dense, replace)?;
    compare(a.as_ref(), b.as_ref(), dense, opts)
}

/// Compare `dense` with the model `pruned`: the same tensors with other
/// values, or a structurally smaller model (fewer neurons or heads, its own
/// `config.json`), which is then run by its own network.
pub fn evaluate_models(
    dense: &Model,
    pruned: &Model,
    opts: &EvalOptions,
) -> Result<EvalSummary, Error> {
    let smaller =
        dense.tensors().iter().any(|t| pruned.get(&t.name).is_some_and(|p| p.shape != t.shape));
    if !smaller {
        return evaluate(dense, &pruned_weights(dense, pruned)?, opts);
    }
    let (a, b) = (arch::load(dense)?, arch::load(pruned)?);
    if a.family() != b.family() || a.num_blocks() != b.num_blocks() {
        return Err(Error::input(format!(
            "{}: not a pruned copy of {} (another family or block count)",
            pruned.layout().root().display(),
            dense.layout().root().display()
        )));
    }
    compare(a.as_ref(), b.as_ref(), dense, opts)
}

/// Run the dense network `a` and the pruned `b` on `opts.text`, tokenized
/// with the tokenizer of `dense`.
fn compare(
    a: &dyn Network,
    b: &dyn Network,
    dense: &Model,
    opts: &EvalOptions,
) -> Result<EvalSummary, Error> {
    let dir = arch::model_dir(dense);
    let tok = load_tokenizer(&dir)?;
    let text = read_text(&opts.text)?;
    let shown = opts.text.display().to_string();
    match a.kind() {
        Kind::Encoder => {
            let limit = a.max_positions().unwrap_or(512);
            let mut seqs: Vec<Vec<u32>> = Vec::new();
            for line in text.lines().map(str::trim).filter(|l| !l.is_empty()) {
                if seqs.len() >= opts.samples.unwrap_or(1000) {
                    break;
                }
                let enc = tok
                    .encode(line, true)
                    .map_err(|e| Error::input(format!("{shown}: cannot tokenize a line ({e})")))?;
                let mut ids = enc.get_ids().to_vec();
                if ids.len() > limit {
                    // Keep the closing special token, as truncation does.
                    let last = *ids.last().expect("non-empty");
                    ids.truncate(limit - 1);
                    ids.push(last);
                }
                seqs.push(ids);
            }
            encoder_summary(a, b, &seqs, shown)
        }
        Kind::Decoder => {
            let framing = Framing::for_network(a.family(), &tok, &dir)?;
            let max = a.max_positions().unwrap_or(usize::MAX);
            let seq_len = opts.seq_len.unwrap_or(256).min(max);
            let content = seq_len.saturating_sub(framing.len());
            if content < 2 {
                return Err(Error::usage(format!("--seq-len {seq_len} is too short to evaluate")));
            }
            let ids = tokenize(&tok, &text)
                .map_err(|e| Error::input(format!("{shown}: cannot tokenize: {e}")))?;
            let wins: Vec<Vec<u32>> = ids
                .chunks_exact(content)
                .take(opts.samples.unwrap_or(64))
                .map(|c| framing.frame(c))
                .collect();
            if wins.is_empty() {
                return Err(Error::input(format!(
                    "{shown}: holds {} tokens, fewer than one window of {content}",
                    ids.len()
                )));
            }
            decoder_summary(a, b, &wins, framing.prefix.len(), shown)
        }
    }
}

/// Final hidden states `[n·L, d]` (before pooling or the head) and the
/// network's output, as f64.
fn run(net: &dyn Network, batch: &Batch) -> Result<(Vec<f64>, Vec<f64>), Error> {
    let go = || -> arch::Result<(Vec<f64>, Vec<f64>)> {
        let mut x = net.embed(batch)?;
        for b in 0..net.num_blocks() {
            x = net.block(b, &x, &mut |_, _| Ok(()))?;
        }
        let out = arch::rows(&net.output(&x)?)?;
        Ok((arch::to_f64_rows(&arch::rows(&x)?)?, arch::to_f64_rows(&out)?))
    };
    Ok(go()?)
}

/// Running `Σ‖a − b‖²` and `Σ‖a‖²` over final hidden states.
#[derive(Default)]
struct StateError {
    diff: f64,
    norm: f64,
}

impl StateError {
    fn add(&mut self, dense: &[f64], pruned: &[f64]) {
        self.diff += dense.iter().zip(pruned).map(|(a, b)| (a - b) * (a - b)).sum::<f64>();
        self.norm += dense.iter().map(|a| a * a).sum::<f64>();
    }

    fn relative(&self) -> Option<f64> {
        (self.norm > 0.0).then(|| self.diff / self.norm)
    }
}

fn encoder_summary(
    a: &dyn Network,
    b: &dyn Network,
    seqs: &[Vec<u32>],
    text: String,
) -> Result<EvalSummary, Error> {
    if seqs.is_empty() {
        return Err(Error::input(format!("{text}: no non-empty line to evaluate")));
    }
    // Batch lines of equal length together (no padding in the forward pass).
    let mut order: Vec<usize> = (0..seqs.len()).collect();
    order.sort_by_key(|&i| seqs[i].len());
    let mut cos = vec![0.0; seqs.len()];
    let mut states = StateError::default();
    let mut start = 0;
    while start < order.len() {
        let len = seqs[order[start]].len();
        let mut end = start;
        while end < order.len() && seqs[order[end]].len() == len && end - start < 64 {
            end += 1;
        }
        let group: Vec<Vec<u32>> = order[start..end].iter().map(|&i| seqs[i].clone()).collect();
        let batch = Batch::new(&group);
        let (ha, ea) = run(a, &batch)?;
        let (hb, eb) = run(b, &batch)?;
        states.add(&ha, &hb);
        let d = ea.len() / group.len();
        for (k, &i) in order[start..end].iter().enumerate() {
            cos[i] = cosine(&ea[k * d..(k + 1) * d], &eb[k * d..(k + 1) * d]);
        }
        start = end;
    }
    Ok(EvalSummary {
        text,
        kind: "encoder".into(),
        inputs: seqs.len(),
        tokens: seqs.iter().map(Vec::len).sum(),
        cosine_mean: Some(cos.iter().sum::<f64>() / cos.len() as f64),
        cosine_min: Some(cos.iter().copied().fold(f64::INFINITY, f64::min)),
        hidden_rel_error: states.relative(),
        ..EvalSummary::default()
    })
}

fn decoder_summary(
    a: &dyn Network,
    b: &dyn Network,
    wins: &[Vec<u32>],
    skip: usize,
    text: String,
) -> Result<EvalSummary, Error> {
    let (mut nll_a, mut nll_b, mut kl, mut predicted, mut positions) = (0.0, 0.0, 0.0, 0, 0);
    let mut states = StateError::default();
    for w in wins {
        let batch = Batch::new(std::slice::from_ref(w));
        let (ha, la) = run(a, &batch)?;
        let (hb, lb) = run(b, &batch)?;
        states.add(&ha, &hb);
        let v = la.len() / w.len();
        for t in 0..w.len() {
            let pa = log_softmax(&la[t * v..(t + 1) * v]);
            let pb = log_softmax(&lb[t * v..(t + 1) * v]);
            kl += kl_divergence(&pa, &pb);
            positions += 1;
            // Predict token t+1 from position t; framing tokens at the start
            // are given, not predicted.
            if t + 1 < w.len() && t + 1 >= skip {
                let next = w[t + 1] as usize;
                nll_a -= pa[next];
                nll_b -= pb[next];
                predicted += 1;
            }
        }
    }
    let p = predicted.max(1) as f64;
    Ok(EvalSummary {
        text,
        kind: "decoder".into(),
        inputs: wins.len(),
        tokens: wins.iter().map(Vec::len).sum(),
        perplexity_dense: Some((nll_a / p).exp()),
        perplexity_pruned: Some((nll_b / p).exp()),
        kl_mean: Some(kl / positions.max(1) as f64),
        hidden_rel_error: states.relative(),
        ..EvalSummary::default()
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cosine_of_known_vectors() {
        assert!((cosine(&[1.0, 0.0], &[0.0, 2.0])).abs() < 1e-15);
        assert!((cosine(&[1.0, 2.0], &[2.0, 4.0]) - 1.0).abs() < 1e-15);
        // 3-4-5 triangle: cos = 3/5.
        assert!((cosine(&[3.0, 4.0], &[1.0, 0.0]) - 0.6).abs() < 1e-15);
        assert_eq!(cosine(&[0.0, 0.0], &[1.0, 1.0]), 0.0);
    }

    #[test]
    fn log_softmax_normalises_and_is_shift_invariant() {
        let z = [1.0, 2.0, 3.0, 1000.0];
        let l = log_softmax(&z);
        let total: f64 = l.iter().map(|v| v.exp()).sum();
        assert!((total - 1.0).abs() < 1e-12);
        let shifted: Vec<f64> = z.iter().map(|v| v - 50.0).collect();
        for (x, y) in l.iter().zip(log_softmax(&shifted)) {
            assert!((x - y).abs() < 1e-9);
        }
        // Uniform logits: log(1/n).
        assert!((log_softmax(&[0.0; 4])[0] + 4f64.ln()).abs() < 1e-15);
    }

    #[test]
    fn kl_matches_hand_computation() {
        // KL([1/2, 1/2] ‖ [1/4, 3/4]) = ½ln2 + ½ln(2/3), by the definition.
        let p = [0.5f64.ln(), 0.5f64.ln()];
        let q = [0.25f64.ln(), 0.75f64.ln()];
        let want = 0.5 * 2f64.ln() + 0.5 * (2.0f64 / 3.0).ln();
        assert!((kl_divergence(&p, &q) - want).abs() < 1e-15);
        assert_eq!(kl_divergence(&p, &p), 0.0);
    }
}
