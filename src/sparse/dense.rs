//! The dense baseline: `y = x Wᵀ` with every weight stored.
//!
//! Batch 1 is a matrix-vector product bound by reading `W` once; it runs a
//! dot product per row with 32 independent partial sums (four or eight
//! vector registers) so the loads, not the additions, set the pace. Larger
//! batches go to faer's matrix product, which blocks for registers and cache
//! and beats a row-by-row loop from batch 2 up on the machines measured (see
//! docs/benchmarks.md and [`DenseKernel`]).

use std::ops::Range;

use faer::linalg::matmul::matmul;
use faer::{Accum, MatMut, MatRef};

use super::{check_shapes, for_row_blocks, madd, multiversion, Par};

/// Which dense kernel [`dense_matmul`] runs.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum DenseKernel {
    /// The row-dot-product loop for batch 1, faer above.
    #[default]
    Auto,
    /// The row-dot-product loop at any batch (one pass over `W` per batch
    /// row; for measuring the choice).
    Rows,
    /// faer's matrix product at any batch.
    Faer,
}

/// Workspace length (in `f32`) that [`dense_matmul`] needs: none.
pub fn dense_matmul_workspace(_d_out: usize, _d_in: usize, _b: usize) -> usize {
    0
}

/// `y = x Wᵀ` for a dense `w` (`[d_out, d_in]`), `x` (`[b, d_in]`) and `y`
/// (`[b, d_out]`), all row-major, with the kernel `kernel`.
///
/// # Panics
/// If a slice's length does not match the shapes.
// The arguments mirror the product's parts one to one.
#[allow(clippy::too_many_arguments)]
#[track_caller]
pub fn dense_matmul(
    w: &[f32],
    d_out: usize,
    d_in: usize,
    x: &[f32],
    b: usize,
    y: &mut [f32],
    kernel: DenseKernel,
    par: Par,
) {
    assert_eq!(w.len(), d_out * d_in, "weight length must be d_out * d_in");
    check_shapes(d_out, d_in, x, b, y);
    let rows = match kernel {
        DenseKernel::Auto => b == 1,
        DenseKernel::Rows => true,
        DenseKernel::Faer => false,
    };
    if b == 0 || d_out == 0 {
        return;
    }
    if d_in == 0 {
        y.fill(0.0);
        return;
    }
    if rows {
        for (xi, yi) in x.chunks_exact(d_in).zip(y.chunks_exact_mut(d_out)) {
            for_row_blocks(
                yi,
                d_out,
                1,
                par,
                |r| r,
                |rows, out| dense_rows(rows, w, d_in, xi, out),
            );
        }
        return;
    }
    let x = MatRef::from_row_major_slice(x, b, d_in);
    let wt = MatRef::from_row_major_slice(w, d_out, d_in).transpose();
    let y = MatMut::from_row_major_slice_mut(y, b, d_out);
    matmul(y, Accum::Replace, x, wt, 1.0f32, par);
}

/// `y_r = Σ_k w_rk x_k` for the rows in `rows`.
#[inline(always)]
fn dense_rows_body<const FMA: bool>(
    rows: Range<usize>,
    w: &[f32],
    d_in: usize,
    x: &[f32],
    y: &mut [f32],
) {
    const L: usize = 32;
    for (r, out) in rows.zip(y.iter_mut()) {
        let row = &w[r * d_in..(r + 1) * d_in];
        let mut acc = [0.0f32; L];
        let (wc, xc) = (row.chunks_exact(L), x.chunks_exact(L));
        let (wt, xt) = (wc.remainder(), xc.remainder());
        for (wv, xv) in wc.zip(xc) {
            for j in 0..L {
                acc[j] = madd::<FMA>(wv[j], xv[j], acc[j]);
            }
        }
        for (j, (a, b)) in wt.iter().zip(xt).enumerate() {
            acc[j] = madd::<FMA>(*a, *b, acc[j]);
        }
        // Pairwise reduction of the partial sums.
        let mut width = L;
        while width > 1 {
            width /= 2;
            for j in 0..width {
                acc[j] += acc[j + width];
            }
        }
        *out = acc[0];
    }
}

multiversion!(fn dense_rows(rows: Range<usize>, w: &[f32], d_in: usize, x: &[f32], y: &mut [f32]) = dense_rows_body[]);

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sparse::testing::{assert_close, pars, reference, Rng};

    /// Reference: the dense product by its definition (`testing::reference`).
    #[test]
    fn every_kernel_matches_the_definition() {
        let mut rng = Rng(31);
        for (d_out, d_in) in [(1, 1), (3, 31), (33, 65), (64, 128), (17, 300)] {
            let w: Vec<f32> = (0..d_out * d_in).map(|_| rng.value()).collect();
            for b in [1, 2, 7, 64] {
                let x: Vec<f32> = (0..b * d_in).map(|_| rng.value()).collect();
                let (want, bound) = reference(&w, d_out, d_in, &x, b);
                for kernel in [DenseKernel::Auto, DenseKernel::Rows, DenseKernel::Faer] {
                    for par in pars() {
                        let mut y = vec![f32::NAN; b * d_out];
                        dense_matmul(&w, d_out, d_in, &x, b, &mut y, kernel, par);
                        let what = format!("{d_out}x{d_in}, b = {b}, {kernel:?}, {par:?}");
                        assert_close(&y, &want, &bound, &what);
                    }
                }
            }
        }
        let mut y = vec![f32::NAN; 4];
        dense_matmul(&[], 2, 0, &[], 2, &mut y, DenseKernel::Auto, Par::Seq);
        assert_eq!(y, vec![0.0; 4]);
    }
}
