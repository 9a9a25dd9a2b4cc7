//! The dense baseline: `y = x Wᵀ` with every weight stored.
//!
//! Three kernels: faer's matrix product, which blocks for registers and
//! cache; a row loop (one dot product per output with 32 independent partial
//! sums, one pass over `W` per batch row); and "tiles", the batched sparse
//! kernels' scheme with every weight stored (one pass over `W`, inputs tiled
//! by batch rows). [`DenseKernel::Auto`] picks the fastest as measured on a
//! 2-core AVX-512 machine (`cargo bench --bench kernels -- --dense-choice`,
//! docs/benchmarks.md): faer at batch 1 (about 1.5-2x the row loop) and
//! above batch 8; tiles at batch 2 to 8 on weights of 8 MiB or more, where
//! faer's product ran at a third of the tiles' speed on a 4096 x 4096 layer.

use std::ops::Range;

use faer::linalg::matmul::matmul;
use faer::{Accum, MatMut, MatRef};

use super::{
    batch_tile, check_shapes, for_row_blocks, madd, multiversion, padded_batch, tile_inputs,
    transpose, Par,
};

/// Which dense kernel [`dense_matmul`] runs.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum DenseKernel {
    /// faer, except [`DenseKernel::Tiles`] for batch 2 to 8 on weights of
    /// 8 MiB or more.
    #[default]
    Auto,
    /// The row-dot-product loop at any batch (one pass over `W` per batch
    /// row; for measuring the choice).
    Rows,
    /// faer's matrix product at any batch.
    Faer,
    /// The batched sparse kernels' scheme with every weight stored: inputs
    /// tiled by 8 or 16 batch rows, one pass over `W` (batch 1: the row
    /// loop).
    Tiles,
}

/// Smallest weight (bytes) for which [`DenseKernel::Auto`] uses tiles at
/// batch 2 to 8.
const TILES_MIN_BYTES: usize = 8 << 20;

/// Workspace length (in `f32`) that [`dense_matmul`] needs with
/// [`DenseKernel::Tiles`] (the others need none).
pub fn dense_matmul_workspace(d_out: usize, d_in: usize, b: usize) -> usize {
    if b <= 1 {
        0
    } else {
        padded_batch(b) * (d_in + d_out)
    }
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
    let kernel = match kernel {
        DenseKernel::Auto if (2..=8).contains(&b) && 4 * d_out * d_in >= TILES_MIN_BYTES => {
            DenseKernel::Tiles
        }
        DenseKernel::Auto => DenseKernel::Faer,
        k => k,
    };
    let rows = kernel == DenseKernel::Rows;
    if b == 0 || d_out == 0 {
        return;
    }
    if d_in == 0 {
        y.fill(0.0);
        return;
    }
    if kernel == DenseKernel::Tiles && b > 1 {
        let bp = padded_batch(b);
        let mut work = vec![0.0f32; dense_matmul_workspace(d_out, d_in, b)];
        let (xt, yt) = work.split_at_mut(bp * d_in);
        tile_inputs(x, b, d_in, xt);
        let xt = &*xt;
        for_row_blocks(
            yt,
            d_out,
            bp,
            par,
            |r| r * d_in,
            |rows, out| match batch_tile(b) {
                8 => dense_tiles_8(rows, w, xt, d_in, out),
                _ => dense_tiles_16(rows, w, xt, d_in, out),
            },
        );
        transpose(yt, d_out, b, bp, y, d_out);
        return;
    }
    if rows || kernel == DenseKernel::Tiles {
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

/// Batch `b > 1` on tiled inputs (see `tile_inputs`): for each tile, each
/// row, `yᵀ_r[t·T + j] = Σ_c w_rc xt[t][c][j]`, four partial sums per lane.
#[inline(always)]
fn dense_tiles_body<const FMA: bool, const T: usize>(
    rows: Range<usize>,
    w: &[f32],
    xt: &[f32],
    d_in: usize,
    yt: &mut [f32],
) {
    let bp = yt.len() / rows.len().max(1);
    // Rows per chunk: about 1,024 weights, so a chunk stays in L1 while it
    // runs over every tile.
    let chunk = (1024 / d_in.max(1)).max(1);
    for r0 in rows.clone().step_by(chunk) {
        let r1 = (r0 + chunk).min(rows.end);
        for (t, xs) in xt.chunks_exact(d_in * T).take(bp / T).enumerate() {
            for r in r0..r1 {
                let row = &w[r * d_in..(r + 1) * d_in];
                let mut acc = [[0.0f32; T]; 4];
                let (w4, x4) = (row.chunks_exact(4), xs.chunks_exact(4 * T));
                let (wt, xtail) = (w4.remainder(), x4.remainder());
                for (wv, xv) in w4.zip(x4) {
                    for u in 0..4 {
                        for j in 0..T {
                            acc[u][j] = madd::<FMA>(wv[u], xv[u * T + j], acc[u][j]);
                        }
                    }
                }
                for (k, &wv) in wt.iter().enumerate() {
                    for j in 0..T {
                        acc[0][j] = madd::<FMA>(wv, xtail[k * T + j], acc[0][j]);
                    }
                }
                let out = &mut yt[(r - rows.start) * bp + t * T..][..T];
                for j in 0..T {
                    out[j] = (acc[0][j] + acc[1][j]) + (acc[2][j] + acc[3][j]);
                }
            }
        }
    }
}

multiversion!(fn dense_tiles_8(rows: Range<usize>, w: &[f32], xt: &[f32], d_in: usize, yt: &mut [f32]) = dense_tiles_body[8]);
multiversion!(fn dense_tiles_16(rows: Range<usize>, w: &[f32], xt: &[f32], d_in: usize, yt: &mut [f32]) = dense_tiles_body[16]);
multiversion!(fn dense_rows(rows: Range<usize>, w: &[f32], d_in: usize, x: &[f32], y: &mut [f32]) = dense_rows_body[]);

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sparse::testing::{assert_close, pars, reference, SplitMix64};

    /// Reference: the dense product by its definition (`testing::reference`).
    #[test]
    fn every_kernel_matches_the_definition() {
        let mut rng = SplitMix64::new(31);
        for (d_out, d_in) in [(1, 1), (3, 31), (33, 65), (64, 128), (17, 300)] {
            let w = rng.values(d_out * d_in);
            for b in [1, 2, 7, 64] {
                let x = rng.values(b * d_in);
                let (want, bound) = reference(&w, d_out, d_in, &x, b);
                for kernel in
                    [DenseKernel::Auto, DenseKernel::Rows, DenseKernel::Faer, DenseKernel::Tiles]
                {
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
