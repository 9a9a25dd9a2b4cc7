//! Decoding with a key/value cache: each new token runs through the blocks
//! once, attending to the keys and values of every earlier position kept
//! from the previous calls, instead of re-running the whole sequence.
//!
//! This module owns: the cache ([`KvCache`], per block the keys and values
//! `[n, kv_heads, T, head_dim]` after the rotary embedding), attention of
//! `l` new queries at positions `start..start+l` on all `start + l` cached
//! keys ([`attention_at`]), a greedy decode loop ([`greedy`]) and its check
//! against the full-sequence forward ([`check_against_full`]). The
//! families' cached blocks are in `llama.rs` and `gpt2.rs`
//! ([`Network::forward_cached`]).
//!
//! With the cache, the query at position `p` sees keys `0..=p`; without it
//! the causal mask gives the same set, so both forwards compute the same
//! logits up to the order of floating-point sums.

use candle_core::{Device, Tensor, D};

use super::{softmax_last, ArchError, ArchErrorKind, Batch, Network, Result};

/// Keys and values of the positions run so far, per block.
#[derive(Clone, Debug, Default)]
pub struct KvCache {
    blocks: Vec<Option<(Tensor, Tensor)>>,
    len: usize,
}

impl KvCache {
    /// An empty cache for `blocks` blocks.
    pub fn new(blocks: usize) -> Self {
        KvCache { blocks: vec![None; blocks], len: 0 }
    }

    /// Positions held.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether no position is held.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Block `b`'s keys and values with `k`, `v` (`[n, h, l, hd]`, the new
    /// positions) appended along the positions; returns the whole of them.
    pub(crate) fn append(&mut self, b: usize, k: Tensor, v: Tensor) -> Result<(Tensor, Tensor)> {
        let slot = self.blocks.get_mut(b).ok_or_else(|| {
            ArchError::new(ArchErrorKind::Compute, format!("cache has no block {b}"))
        })?;
        let next = match slot.take() {
            None => (k, v),
            Some((pk, pv)) => (Tensor::cat(&[&pk, &k], 2)?, Tensor::cat(&[&pv, &v], 2)?),
        };
        *slot = Some(next.clone());
        Ok(next)
    }

    /// Mark `l` more positions as held (after every block has appended).
    pub(crate) fn advance(&mut self, l: usize) {
        self.len += l;
    }
}

/// `softmax(Q Kᵀ/√dh + M) V` for queries `q [n, h, l, dh]` at positions
/// `start..start+l` and keys/values `[n, h, start+l, dh]`; `M` masks key `j`
/// for query `i` when `j > start + i`.
pub fn attention_at(q: &Tensor, k: &Tensor, v: &Tensor, start: usize) -> Result<Tensor> {
    let dh = q.dim(D::Minus1)?;
    let (l, t) = (q.dim(2)?, k.dim(2)?);
    let scores = (q.matmul(&k.t()?)? * (1.0 / (dh as f64).sqrt()))?;
    let scores = if l > 1 {
        let mask: Vec<f32> = (0..l * t)
            .map(|e| if e % t > start + e / t { f32::NEG_INFINITY } else { 0.0 })
            .collect();
        scores.broadcast_add(&Tensor::from_vec(mask, (l, t), &Device::Cpu)?)?
    } else {
        // One query at the last position sees every key.
        scores
    };
    Ok(softmax_last(&scores)?.matmul(v)?)
}

/// Greedy decoding of one sequence: run `prompt` (prefill), then `steps`
/// tokens, each the argmax of the previous logits, through
/// [`Network::forward_cached`]. `on_step(i, logits)` sees the logits
/// `[vocab]` that chose token `i` (0 = from the prompt's last position).
/// Returns the generated tokens.
///
/// # Errors
/// Encoders, an empty prompt, and compute errors.
pub fn greedy(
    net: &dyn Network,
    prompt: &[u32],
    steps: usize,
    on_step: &mut dyn FnMut(usize, &[f32]) -> Result<()>,
) -> Result<Vec<u32>> {
    if prompt.is_empty() {
        return Err(ArchError::new(
            ArchErrorKind::Compute,
            "decoding needs a prompt of >= 1 token",
        ));
    }
    let mut cache = KvCache::new(net.num_blocks());
    let mut input = prompt.to_vec();
    let mut out = Vec::with_capacity(steps);
    for i in 0..steps {
        let logits = net.forward_cached(&Batch::new(&[input]), &mut cache)?;
        let last = logits.dim(1)? - 1;
        let row: Vec<f32> = logits.get(0)?.get(last)?.to_vec1()?;
        on_step(i, &row)?;
        let next = argmax(&row);
        out.push(next);
        input = vec![next];
    }
    Ok(out)
}

/// Index of the largest value (the first one on ties).
pub fn argmax(v: &[f32]) -> u32 {
    let mut best = 0;
    for (i, x) in v.iter().enumerate() {
        if *x > v[best] {
            best = i;
        }
    }
    best as u32
}

/// Decode `steps` tokens greedily with the cache and, at every step, compare
/// the step's logits with the last position's logits of the full forward
/// ([`Network::forward`]) on the whole sequence so far. Returns the largest
/// relative error `‖a − b‖₂ / ‖b‖₂` over the steps.
///
/// # Errors
/// As [`greedy`].
pub fn check_against_full(net: &dyn Network, prompt: &[u32], steps: usize) -> Result<f64> {
    let mut seq = prompt.to_vec();
    let mut worst = 0f64;
    greedy(net, prompt, steps, &mut |_, row| {
        let full = net.forward(&Batch::new(&[seq.clone()]))?;
        let want: Vec<f32> = full.get(0)?.get(seq.len() - 1)?.to_vec1()?;
        worst = worst.max(relative_error(row, &want));
        seq.push(argmax(row));
        Ok(())
    })?;
    Ok(worst)
}

/// `‖a − b‖₂ / ‖b‖₂`, in f64.
pub fn relative_error(a: &[f32], b: &[f32]) -> f64 {
    let (mut num, mut den) = (0f64, 0f64);
    for (x, y) in a.iter().zip(b) {
        num += (f64::from(*x) - f64::from(*y)).powi(2);
        den += f64::from(*y).powi(2);
    }
    (num / den.max(f64::MIN_POSITIVE)).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::arch::attention;

    #[test]
    fn cached_attention_equals_the_causal_rows_of_full_attention() {
        // Full causal attention over 6 positions (mod.rs `attention`), against
        // positions 4..6 computed as new queries on 6 keys with start = 4.
        let dev = Device::Cpu;
        let q = Tensor::randn(0f32, 1.0, (2, 3, 6, 4), &dev).unwrap();
        let k = Tensor::randn(0f32, 1.0, (2, 3, 6, 4), &dev).unwrap();
        let v = Tensor::randn(0f32, 1.0, (2, 3, 6, 4), &dev).unwrap();
        let full = attention(&q, &k, &v, true).unwrap();
        for (start, l) in [(4, 2), (5, 1), (0, 6)] {
            let part = attention_at(&q.narrow(2, start, l).unwrap(), &k, &v, start).unwrap();
            let want: Vec<f32> =
                full.narrow(2, start, l).unwrap().flatten_all().unwrap().to_vec1().unwrap();
            let got: Vec<f32> = part.flatten_all().unwrap().to_vec1().unwrap();
            assert!(relative_error(&got, &want) < 1e-6, "start {start}");
        }
    }

    #[test]
    fn argmax_takes_the_first_of_ties() {
        assert_eq!(argmax(&[0.0, 3.0, 3.0, -1.0]), 1);
        assert_eq!(relative_error(&[1.0, 0.0], &[1.0, 0.0]), 0.0);
        // ‖(0, 1)‖ / ‖(1, 0)‖ = 1.
        assert!((relative_error(&[1.0, 1.0], &[1.0, 0.0]) - 1.0).abs() < 1e-12);
    }
}
