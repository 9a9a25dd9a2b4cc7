//! Which product each pruned layer runs: its sparse kernel or candle's
//! dense one, picked by measured time at the number of input rows a
//! scenario feeds it.
//!
//! A layer counts as pruned when at least [`MIN_ZEROS`] of its weights are
//! exactly zero. Its sparse form is [`SparseWeight::from_dense`] (N:M groups
//! when every group of 4, 8 or 16 holds few enough nonzeros and that is
//! smaller, else compressed rows). Both products are timed on the same
//! random input, layer after layer through the whole model (so each
//! layer's weights come from memory, not from a cache its own previous call
//! filled), [`PASSES`] times; the median decides, and the dense product is
//! kept unless the sparse one is faster.

use std::sync::Arc;
use std::time::Instant;

use candle_core::{Device, Tensor};

use crate::arch::kernel::Kernel;
use crate::arch::{Network, Result};
use crate::sparse::SparseWeight;

/// Fraction of exact zeros from which a layer is treated as pruned.
pub const MIN_ZEROS: f64 = 0.1;

/// Timed passes over the layers per product.
pub const PASSES: usize = 3;

/// A pruned layer's sparse form.
pub struct Candidate {
    /// Weight tensor name.
    pub name: String,
    /// Its nonzeros in the layout picked for it.
    pub sparse: Arc<SparseWeight>,
}

/// Every linear layer of the blocks, in forward order.
pub fn block_linears(net: &dyn Network) -> Vec<String> {
    (0..net.num_blocks()).flat_map(|b| net.groups(b)).flat_map(|g| g.layers).collect()
}

/// The pruned layers of `net` (see [`MIN_ZEROS`]) in sparse form.
///
/// # Errors
/// Tensor read errors; a layer too large for 32-bit offsets is left dense.
pub fn candidates(net: &dyn Network) -> Result<Vec<Candidate>> {
    let mut out = Vec::new();
    for name in block_linears(net) {
        let Some(l) = net.linear(&name) else { continue };
        let (d_out, d_in) = l.shape();
        let w: Vec<f32> = l.weight.flatten_all()?.to_vec1()?;
        let zeros = w.iter().filter(|v| **v == 0.0).count();
        if (zeros as f64) < MIN_ZEROS * w.len() as f64 {
            continue;
        }
        if let Ok(s) = SparseWeight::from_dense(&w, d_out, d_in, None) {
            out.push(Candidate { name, sparse: Arc::new(s) });
        }
    }
    Ok(out)
}

/// One layer's measured choice.
#[derive(Clone, Debug, serde::Serialize)]
pub struct Choice {
    /// Weight tensor name.
    pub name: String,
    /// Sparse layout (`rows`, `2:4`, ...).
    pub layout: String,
    /// Median seconds of the dense product.
    pub dense_s: f64,
    /// Median seconds of the sparse product.
    pub sparse_s: f64,
    /// The sparse kernel was faster and is used.
    pub sparse: bool,
}

/// Time dense against sparse for every candidate at `rows` input rows and
/// return the choices, in the candidates' order.
///
/// # Errors
/// Compute errors.
pub fn choose(net: &dyn Network, cands: &[Candidate], rows: usize) -> Result<Vec<Choice>> {
    let mut dense = vec![Vec::new(); cands.len()];
    let mut sparse = vec![Vec::new(); cands.len()];
    let inputs: Vec<Tensor> = cands
        .iter()
        .map(|c| Tensor::randn(0f32, 1.0, (rows, c.sparse.shape().1), &Device::Cpu))
        .collect::<candle_core::Result<_>>()?;
    for pass in 0..=PASSES {
        for with_sparse in [false, true] {
            for (i, c) in cands.iter().enumerate() {
                let Some(l) = net.linear(&c.name) else { continue };
                let mut l = l.clone();
                l.kernel = with_sparse.then(|| Kernel::Sparse(c.sparse.clone()));
                let t = Instant::now();
                std::hint::black_box(l.forward(&inputs[i])?);
                // Pass 0 is a warm-up.
                if pass > 0 {
                    let s = t.elapsed().as_secs_f64();
                    if with_sparse { &mut sparse[i] } else { &mut dense[i] }.push(s);
                }
            }
        }
    }
    Ok(cands
        .iter()
        .enumerate()
        .map(|(i, c)| {
            let (d, s) = (median(&mut dense[i]), median(&mut sparse[i]));
            Choice {
                name: c.name.clone(),
                layout: c.sparse.layout().to_string(),
                dense_s: d,
                sparse_s: s,
                sparse: s < d,
            }
        })
        .collect())
}

/// The median (upper one for even counts); 0 for none.
pub fn median(v: &mut [f64]) -> f64 {
    quantile(v, 0.5)
}

/// The value at fraction `q` of `v` (nearest rank, sorts `v`); 0 for none.
pub fn quantile(v: &mut [f64], q: f64) -> f64 {
    if v.is_empty() {
        return 0.0;
    }
    v.sort_by(f64::total_cmp);
    let i = ((q * v.len() as f64).ceil() as usize).clamp(1, v.len()) - 1;
    v[i]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nearest_rank_quantiles() {
        // Nearest rank (common practice): the ⌈q·n⌉-th smallest value.
        let mut v = vec![5.0, 1.0, 4.0, 2.0, 3.0];
        assert_eq!(median(&mut v), 3.0);
        assert_eq!(quantile(&mut v, 0.9), 5.0);
        let mut w: Vec<f64> = (1..=10).map(f64::from).collect();
        assert_eq!(quantile(&mut w, 0.9), 9.0);
        assert_eq!(median(&mut w), 5.0);
        assert_eq!(median(&mut []), 0.0);
    }
}
