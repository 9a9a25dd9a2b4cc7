//! The product a [`Linear`](super::Linear) runs, when it is not candle's
//! dense one: a [`Kernel`] put in place per layer by whole-model timing
//! (`crate::timing`), plus a clock of the time spent in those layers.
//!
//! This module owns: running `y = x Wᵀ + b` with a [`SparseWeight`]
//! (compressed rows or N:M groups) on a candle tensor, with one reused
//! workspace per thread, and the process-wide [`layer_time`] clock that
//! counts the time of every layer holding a kernel (sparse or dense), so a
//! timing run can split a forward pass into "kernel layers" and the rest.
//!
//! Key decision: the dense weight stays in the [`Linear`](super::Linear) so
//! the same network can be run both ways and compared; only memory, not the
//! result, pays for that.

use std::cell::RefCell;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use candle_core::{Device, Tensor};

use super::Result;
use crate::sparse::{Par, SparseWeight};

/// How a layer with a kernel computes its product.
#[derive(Clone, Debug)]
pub enum Kernel {
    /// candle's dense product, as without a kernel, but counted by
    /// [`layer_time`].
    Dense,
    /// lopper's sparse kernel on the layer's nonzeros; the weight must equal
    /// the layer's dense weight.
    Sparse(Arc<SparseWeight>),
}

/// Nanoseconds spent in layers with a kernel, since the process started.
static LAYER_NANOS: AtomicU64 = AtomicU64::new(0);

/// Total time spent so far in the products of layers holding a [`Kernel`]
/// (bias included). Take the difference of two readings around a call.
pub fn layer_time() -> Duration {
    Duration::from_nanos(LAYER_NANOS.load(Ordering::Relaxed))
}

pub(super) fn add_time(t: Instant) {
    LAYER_NANOS.fetch_add(t.elapsed().as_nanos() as u64, Ordering::Relaxed);
}

thread_local! {
    static WORK: RefCell<Vec<f32>> = const { RefCell::new(Vec::new()) };
}

/// `x [rows, d_in] → x Wᵀ [rows, d_out]` with the sparse `w`, threads from
/// the current rayon pool.
pub(super) fn sparse_product(w: &SparseWeight, x: &Tensor) -> Result<Tensor> {
    let (d_out, _) = w.shape();
    let rows = x.dim(0)?;
    let xs: Vec<f32> = x.flatten_all()?.to_vec1()?;
    let mut y = vec![0f32; rows * d_out];
    let threads = rayon::current_num_threads();
    let par = if threads <= 1 { Par::Seq } else { Par::rayon(threads) };
    WORK.with(|work| {
        let mut work = work.borrow_mut();
        let need = w.matmul_workspace(rows);
        if work.len() < need {
            work.resize(need, 0.0);
        }
        w.matmul(&xs, rows, &mut y, &mut work[..need], par);
    });
    Ok(Tensor::from_vec(y, (rows, d_out), &Device::Cpu)?)
}
