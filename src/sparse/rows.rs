//! Compressed rows for unstructured sparsity, and their product kernels.
//!
//! Row `r` of the weight is `values[row_start[r]..row_start[r + 1]]` at
//! columns `cols[row_start[r]..row_start[r + 1]]` (strictly increasing).
//! Columns are `u16` when `d_in <= 65,536` (every index fits), else `u32`;
//! half the index bytes matter because the product at batch 1 is bound by
//! the bytes it reads.

use std::ops::Range;

use super::{
    batch_tile, check_shapes, for_row_blocks, madd, multiversion, padded_batch, tile_inputs,
    transpose, Par, SparseError, SparseErrorKind as K, CHUNK_VALUES,
};

/// Column indices of the stored values.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum ColumnIndices {
    /// For `d_in <= 65,536`.
    U16(Vec<u16>),
    /// For wider layers.
    U32(Vec<u32>),
}

impl ColumnIndices {
    /// Bytes per index (2 or 4).
    pub fn width(&self) -> usize {
        match self {
            ColumnIndices::U16(_) => 2,
            ColumnIndices::U32(_) => 4,
        }
    }

    /// Number of indices.
    pub fn len(&self) -> usize {
        match self {
            ColumnIndices::U16(v) => v.len(),
            ColumnIndices::U32(v) => v.len(),
        }
    }

    /// Whether there are none.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Index `k` as `usize`.
    pub fn get(&self, k: usize) -> usize {
        match self {
            ColumnIndices::U16(v) => usize::from(v[k]),
            ColumnIndices::U32(v) => v[k] as usize,
        }
    }
}

/// The index width `RowCompressed` uses for a layer `d_in` wide.
fn index_width(d_in: usize) -> usize {
    if d_in <= 1 << 16 {
        2
    } else {
        4
    }
}

/// A sparse `[d_out, d_in]` weight stored by rows.
#[derive(Clone, Debug, PartialEq)]
pub struct RowCompressed {
    d_out: usize,
    d_in: usize,
    row_start: Vec<u32>,
    cols: ColumnIndices,
    values: Vec<f32>,
}

impl RowCompressed {
    /// Store the nonzeros of `w` (`[d_out, d_in]`, row-major). `-0.0` counts
    /// as zero.
    ///
    /// # Errors
    /// [`K::TooLarge`] if the layer has `2³²` or more nonzeros.
    ///
    /// # Panics
    /// If `w.len() != d_out * d_in`.
    #[track_caller]
    pub fn from_dense(w: &[f32], d_out: usize, d_in: usize) -> Result<Self, SparseError> {
        assert_eq!(w.len(), d_out * d_in, "weight length must be d_out * d_in");
        let nnz = w.iter().filter(|v| **v != 0.0).count();
        if u32::try_from(nnz).is_err() {
            return Err(SparseError::new(
                K::TooLarge,
                format!("{nnz} nonzeros do not fit 32-bit row offsets (at most {})", u32::MAX),
            ));
        }
        let mut row_start = Vec::with_capacity(d_out + 1);
        let mut values = Vec::with_capacity(nnz);
        let mut idx = Vec::with_capacity(nnz);
        row_start.push(0u32);
        for row in w.chunks_exact(d_in.max(1)).take(d_out) {
            for (c, &v) in row.iter().enumerate() {
                if v != 0.0 {
                    values.push(v);
                    idx.push(c as u32);
                }
            }
            row_start.push(values.len() as u32);
        }
        // d_in == 0: no rows were visited.
        row_start.resize(d_out + 1, 0);
        let cols = if index_width(d_in) == 2 {
            ColumnIndices::U16(idx.into_iter().map(|c| c as u16).collect())
        } else {
            ColumnIndices::U32(idx)
        };
        Ok(RowCompressed { d_out, d_in, row_start, cols, values })
    }

    /// Assemble from stored parts, checking every invariant: `d_out + 1`
    /// non-decreasing offsets from 0 to the number of values, one index per
    /// value, the index width [`RowCompressed`] uses for `d_in`, columns
    /// strictly increasing within a row and below `d_in`, finite nonzero
    /// values.
    ///
    /// # Errors
    /// [`K::BadParts`] naming the first broken invariant.
    pub fn from_parts(
        d_out: usize,
        d_in: usize,
        row_start: Vec<u32>,
        cols: ColumnIndices,
        values: Vec<f32>,
    ) -> Result<Self, SparseError> {
        let bad = |d: String| Err(SparseError::new(K::BadParts, d));
        if row_start.len() != d_out + 1 {
            return bad(format!(
                "{} row offsets; expected d_out + 1 = {}",
                row_start.len(),
                d_out + 1
            ));
        }
        if cols.len() != values.len() {
            return bad(format!("{} column indices for {} values", cols.len(), values.len()));
        }
        if cols.width() != index_width(d_in) {
            return bad(format!(
                "{}-byte column indices; a layer {d_in} wide uses {}-byte indices",
                cols.width(),
                index_width(d_in)
            ));
        }
        if row_start[0] != 0 || row_start[d_out] as usize != values.len() {
            return bad(format!(
                "row offsets run from {} to {}; expected 0 to {}",
                row_start[0],
                row_start[d_out],
                values.len()
            ));
        }
        if let Some(r) = (0..d_out).find(|&r| row_start[r] > row_start[r + 1]) {
            let (a, b) = (row_start[r], row_start[r + 1]);
            return bad(format!("row {r}: offsets decrease ({a} > {b})"));
        }
        for r in 0..d_out {
            let (a, b) = (row_start[r] as usize, row_start[r + 1] as usize);
            for (k, &v) in values.iter().enumerate().take(b).skip(a) {
                let c = cols.get(k);
                if c >= d_in {
                    return bad(format!("row {r}: column {c} is outside 0..{d_in}"));
                }
                if k > a && cols.get(k - 1) >= c {
                    return bad(format!("row {r}: columns not strictly increasing at {c}"));
                }
                if !v.is_finite() || v == 0.0 {
                    return bad(format!(
                        "row {r}, column {c}: stored value {v} is not finite and nonzero"
                    ));
                }
            }
        }
        Ok(RowCompressed { d_out, d_in, row_start, cols, values })
    }

    /// `(d_out, d_in)`.
    pub fn shape(&self) -> (usize, usize) {
        (self.d_out, self.d_in)
    }

    /// Number of stored values.
    pub fn nnz(&self) -> usize {
        self.values.len()
    }

    /// Row offsets (`d_out + 1`).
    pub fn row_start(&self) -> &[u32] {
        &self.row_start
    }

    /// Column indices, one per stored value.
    pub fn cols(&self) -> &ColumnIndices {
        &self.cols
    }

    /// Stored values.
    pub fn values(&self) -> &[f32] {
        &self.values
    }

    /// The dense `[d_out, d_in]` weight, row-major.
    pub fn to_dense(&self) -> Vec<f32> {
        let mut w = vec![0.0; self.d_out * self.d_in];
        for r in 0..self.d_out {
            for k in self.row_start[r] as usize..self.row_start[r + 1] as usize {
                w[r * self.d_in + self.cols.get(k)] = self.values[k];
            }
        }
        w
    }

    /// Bytes of weight data one product reads: values, indices and row
    /// offsets.
    pub fn weight_bytes(&self) -> usize {
        Self::bytes_for(self.d_out, self.d_in, self.nnz())
    }

    /// [`RowCompressed::weight_bytes`] for a layer of this shape and number
    /// of nonzeros.
    pub fn bytes_for(d_out: usize, d_in: usize, nnz: usize) -> usize {
        nnz * (4 + index_width(d_in)) + 4 * (d_out + 1)
    }

    /// Workspace length (in `f32`) that [`RowCompressed::matmul`] needs for
    /// batch `b`.
    pub fn matmul_workspace(&self, b: usize) -> usize {
        if b <= 1 {
            0
        } else {
            padded_batch(b) * (self.d_in + self.d_out)
        }
    }

    /// `y = x Wᵀ`: `x` is `[b, d_in]`, `y` is `[b, d_out]`, both row-major.
    ///
    /// # Panics
    /// If `x`, `y` or `work` (see [`RowCompressed::matmul_workspace`]) are
    /// too short.
    #[track_caller]
    pub fn matmul(&self, x: &[f32], b: usize, y: &mut [f32], work: &mut [f32], par: Par) {
        check_shapes(self.d_out, self.d_in, x, b, y);
        assert!(work.len() >= self.matmul_workspace(b), "workspace too small");
        let cost = |r: usize| self.row_start[r] as usize + r;
        if b == 1 {
            for_row_blocks(y, self.d_out, 1, par, cost, |rows, out| match &self.cols {
                #[cfg(target_arch = "x86_64")]
                ColumnIndices::U16(c) if gather_pays() => {
                    // SAFETY: isa() checked AVX2 and FMA at run time.
                    unsafe { rows_vec_u16_gather(rows, &self.row_start, c, &self.values, x, out) }
                }
                ColumnIndices::U16(c) => {
                    rows_vec_u16(rows, &self.row_start, c, &self.values, x, out)
                }
                ColumnIndices::U32(c) => {
                    rows_vec_u32(rows, &self.row_start, c, &self.values, x, out)
                }
            });
            return;
        }
        if b == 0 || self.d_in == 0 {
            y.fill(0.0);
            return;
        }
        let bp = padded_batch(b);
        let (xt, rest) = work.split_at_mut(bp * self.d_in);
        let yt = &mut rest[..bp * self.d_out];
        tile_inputs(x, b, self.d_in, xt);
        let xt = &*xt;
        let d_in = self.d_in;
        for_row_blocks(yt, self.d_out, bp, par, cost, |rows, out| {
            let (s, v) = (&self.row_start[..], &self.values[..]);
            match (&self.cols, batch_tile(b)) {
                (ColumnIndices::U16(c), 8) => rows_batch_u16_8(rows, s, c, v, xt, d_in, out),
                (ColumnIndices::U16(c), _) => rows_batch_u16_16(rows, s, c, v, xt, d_in, out),
                (ColumnIndices::U32(c), 8) => rows_batch_u32_8(rows, s, c, v, xt, d_in, out),
                (ColumnIndices::U32(c), _) => rows_batch_u32_16(rows, s, c, v, xt, d_in, out),
            }
        });
        transpose(yt, self.d_out, b, bp, y, self.d_out);
    }
}

/// Column index types.
trait Index: Copy {
    fn at(self) -> usize;
}

impl Index for u16 {
    #[inline(always)]
    fn at(self) -> usize {
        usize::from(self)
    }
}

impl Index for u32 {
    #[inline(always)]
    fn at(self) -> usize {
        self as usize
    }
}

/// Batch 1: `y_r = Σ_k v_k x_{c_k}` over the row's stored values, with four
/// independent partial sums so consecutive multiply-adds do not wait on
/// each other.
#[inline(always)]
fn rows_vec<const FMA: bool, I: Index>(
    rows: Range<usize>,
    start: &[u32],
    cols: &[I],
    vals: &[f32],
    x: &[f32],
    y: &mut [f32],
) {
    for (r, out) in rows.zip(y.iter_mut()) {
        let (a, b) = (start[r] as usize, start[r + 1] as usize);
        let (c, v) = (&cols[a..b], &vals[a..b]);
        let mut acc = [0.0f32; 4];
        let (c4, v4) = (c.chunks_exact(4), v.chunks_exact(4));
        let (ct, vt) = (c4.remainder(), v4.remainder());
        for (ci, vi) in c4.zip(v4) {
            for j in 0..4 {
                acc[j] = madd::<FMA>(vi[j], x[ci[j].at()], acc[j]);
            }
        }
        for (ci, vi) in ct.iter().zip(vt) {
            acc[0] = madd::<FMA>(*vi, x[ci.at()], acc[0]);
        }
        *out = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    }
}

/// The gather kernel ran 1.6x the scalar loop on a 4096 x 4096 layer at
/// 70-90% zeros (docs/benchmarks.md); it needs AVX2.
#[cfg(target_arch = "x86_64")]
fn gather_pays() -> bool {
    super::isa() != super::Isa::Portable
}

/// Batch 1, u16 columns, AVX2: eight stored weights per step, their inputs
/// fetched by one gather.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn rows_vec_u16_gather(
    rows: Range<usize>,
    start: &[u32],
    cols: &[u16],
    vals: &[f32],
    x: &[f32],
    y: &mut [f32],
) {
    use std::arch::x86_64::*;
    for (r, out) in rows.zip(y.iter_mut()) {
        let (a, b) = (start[r] as usize, start[r + 1] as usize);
        let (c, v) = (&cols[a..b], &vals[a..b]);
        let mut acc = [_mm256_setzero_ps(); 2];
        let (c8, v8) = (c.chunks_exact(8), v.chunks_exact(8));
        let (ct, vt) = (c8.remainder(), v8.remainder());
        for (k, (ci, vi)) in c8.zip(v8).enumerate() {
            // SAFETY: `ci` holds 8 u16 and `vi` 8 f32 (chunks_exact); every
            // column is below d_in = x.len() (checked on construction).
            unsafe {
                let idx = _mm256_cvtepu16_epi32(_mm_loadu_si128(ci.as_ptr().cast()));
                let xs = _mm256_i32gather_ps::<4>(x.as_ptr(), idx);
                acc[k & 1] = _mm256_fmadd_ps(_mm256_loadu_ps(vi.as_ptr()), xs, acc[k & 1]);
            }
        }
        let sum = _mm256_add_ps(acc[0], acc[1]);
        let half = _mm_add_ps(_mm256_castps256_ps128(sum), _mm256_extractf128_ps(sum, 1));
        let pair = _mm_add_ps(half, _mm_movehl_ps(half, half));
        let mut total = _mm_cvtss_f32(_mm_add_ss(pair, _mm_movehdup_ps(pair)));
        for (ci, vi) in ct.iter().zip(vt) {
            total = vi.mul_add(x[usize::from(*ci)], total);
        }
        *out = total;
    }
}

/// Batch `b > 1` on tiled inputs `xt` (`[tiles][d_in][T]`, see
/// `tile_inputs`): for each chunk of rows, each tile, each row,
/// `yᵀ_r[t·T + j] = Σ_k v_k xt[t][c_k][j]`, four partial sums per lane.
#[inline(always)]
fn rows_batch<const FMA: bool, I: Index, const T: usize>(
    rows: Range<usize>,
    start: &[u32],
    cols: &[I],
    vals: &[f32],
    xt: &[f32],
    d_in: usize,
    yt: &mut [f32],
) {
    let bp = yt.len() / rows.len().max(1);
    let mut r0 = rows.start;
    while r0 < rows.end {
        let limit = start[r0] as usize + CHUNK_VALUES;
        let r1 = (r0 + 1..rows.end).find(|&r| start[r + 1] as usize > limit).unwrap_or(rows.end);
        for (t, xs) in xt.chunks_exact(d_in * T).take(bp / T).enumerate() {
            for r in r0..r1 {
                let (a, b) = (start[r] as usize, start[r + 1] as usize);
                let (c, v) = (&cols[a..b], &vals[a..b]);
                let mut acc = [[0.0f32; T]; 4];
                let (c4, v4) = (c.chunks_exact(4), v.chunks_exact(4));
                let (ct, vt) = (c4.remainder(), v4.remainder());
                for (ci, vi) in c4.zip(v4) {
                    for u in 0..4 {
                        let x: &[f32; T] = xs[ci[u].at() * T..][..T].try_into().unwrap();
                        for j in 0..T {
                            acc[u][j] = madd::<FMA>(vi[u], x[j], acc[u][j]);
                        }
                    }
                }
                for (ci, vi) in ct.iter().zip(vt) {
                    let x: &[f32; T] = xs[ci.at() * T..][..T].try_into().unwrap();
                    for j in 0..T {
                        acc[0][j] = madd::<FMA>(*vi, x[j], acc[0][j]);
                    }
                }
                let out = &mut yt[(r - rows.start) * bp + t * T..][..T];
                for j in 0..T {
                    out[j] = (acc[0][j] + acc[1][j]) + (acc[2][j] + acc[3][j]);
                }
            }
        }
        r0 = r1;
    }
}

multiversion!(fn rows_vec_u16(rows: Range<usize>, start: &[u32], cols: &[u16], vals: &[f32], x: &[f32], y: &mut [f32]) = rows_vec[u16]);
multiversion!(fn rows_vec_u32(rows: Range<usize>, start: &[u32], cols: &[u32], vals: &[f32], x: &[f32], y: &mut [f32]) = rows_vec[u32]);
multiversion!(fn rows_batch_u16_8(rows: Range<usize>, start: &[u32], cols: &[u16], vals: &[f32], xt: &[f32], d_in: usize, yt: &mut [f32]) = rows_batch[u16, 8]);
multiversion!(fn rows_batch_u16_16(rows: Range<usize>, start: &[u32], cols: &[u16], vals: &[f32], xt: &[f32], d_in: usize, yt: &mut [f32]) = rows_batch[u16, 16]);
multiversion!(fn rows_batch_u32_8(rows: Range<usize>, start: &[u32], cols: &[u32], vals: &[f32], xt: &[f32], d_in: usize, yt: &mut [f32]) = rows_batch[u32, 8]);
multiversion!(fn rows_batch_u32_16(rows: Range<usize>, start: &[u32], cols: &[u32], vals: &[f32], xt: &[f32], d_in: usize, yt: &mut [f32]) = rows_batch[u32, 16]);

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sparse::testing::{assert_close, pars, random_sparse, reference, SplitMix64};

    /// Reference: the dense product by its definition (`testing::reference`).
    fn check(w: &[f32], d_out: usize, d_in: usize, rng: &mut SplitMix64, what: &str) {
        let sp = RowCompressed::from_dense(w, d_out, d_in).unwrap();
        assert_eq!(sp.to_dense(), w, "{what}: round trip");
        for b in [1, 2, 3, 8, 9, 17, 32, 64] {
            let x = rng.values(b * d_in);
            let (want, bound) = reference(w, d_out, d_in, &x, b);
            for par in pars() {
                let mut y = vec![f32::NAN; b * d_out];
                let mut work = vec![f32::NAN; sp.matmul_workspace(b)];
                sp.matmul(&x, b, &mut y, &mut work, par);
                assert_close(&y, &want, &bound, &format!("{what}, b = {b}, {par:?}"));
            }
        }
    }

    #[test]
    fn matches_dense_product_on_awkward_shapes() {
        let mut rng = SplitMix64::new(11);
        for (d_out, d_in) in [(1, 1), (2, 3), (7, 5), (31, 33), (64, 127), (127, 128), (5, 257)] {
            for density in [0.0, 0.05, 0.3, 0.5, 1.0] {
                let w = random_sparse(&mut rng, d_out, d_in, density);
                check(&w, d_out, d_in, &mut rng, &format!("{d_out}x{d_in} density {density}"));
            }
        }
    }

    #[test]
    fn empty_and_dense_rows_mixed() {
        let mut rng = SplitMix64::new(12);
        let (d_out, d_in) = (40, 67);
        let mut w = random_sparse(&mut rng, d_out, d_in, 0.2);
        for r in (0..d_out).step_by(3) {
            w[r * d_in..(r + 1) * d_in].fill(0.0);
        }
        for r in (1..d_out).step_by(5) {
            for v in &mut w[r * d_in..(r + 1) * d_in] {
                *v = rng.value() + 2.0;
            }
        }
        check(&w, d_out, d_in, &mut rng, "mixed rows");
        // All-zero layer: y is exactly zero.
        let zero = vec![0.0f32; d_out * d_in];
        let sp = RowCompressed::from_dense(&zero, d_out, d_in).unwrap();
        assert_eq!(sp.nnz(), 0);
        let x = rng.values(3 * d_in);
        let mut y = vec![f32::NAN; 3 * d_out];
        let mut work = vec![0.0; sp.matmul_workspace(3)];
        sp.matmul(&x, 3, &mut y, &mut work, Par::rayon(2));
        assert!(y.iter().all(|v| *v == 0.0));
        // Negative zero is not stored.
        let sp = RowCompressed::from_dense(&[-0.0, 1.0], 1, 2).unwrap();
        assert_eq!(sp.nnz(), 1);
    }

    #[test]
    fn wide_layers_use_32_bit_indices() {
        let mut rng = SplitMix64::new(13);
        let d_out = 3;
        for (d_in, width) in [(65_536, 2), (65_537, 4), (70_001, 4)] {
            let w = random_sparse(&mut rng, d_out, d_in, 0.01);
            let mut w = w;
            w[d_in - 1] = 0.5; // the last column is stored
            let sp = RowCompressed::from_dense(&w, d_out, d_in).unwrap();
            assert_eq!(sp.cols().width(), width, "d_in {d_in}");
            assert_eq!(sp.weight_bytes(), sp.nnz() * (4 + width) + 4 * (d_out + 1));
            check(&w, d_out, d_in, &mut rng, &format!("d_in {d_in}"));
        }
    }

    #[test]
    fn zero_sized_layers() {
        for (d_out, d_in) in [(0, 5), (4, 0), (0, 0)] {
            let sp = RowCompressed::from_dense(&[], d_out, d_in).unwrap();
            assert_eq!(sp.row_start().len(), d_out + 1);
            let x = vec![1.0; 2 * d_in];
            let mut y = vec![f32::NAN; 2 * d_out];
            let mut work = vec![0.0; sp.matmul_workspace(2)];
            sp.matmul(&x, 2, &mut y, &mut work, Par::Seq);
            assert!(y.iter().all(|v| *v == 0.0));
        }
    }

    #[test]
    fn from_parts_checks_every_invariant() {
        let w = [0.0, 1.0, 2.0, 0.0, 0.0, 0.0, 3.0, 0.0];
        let sp = RowCompressed::from_dense(&w, 2, 4).unwrap();
        let parts = |s: &RowCompressed| (s.row_start.clone(), s.cols.clone(), s.values.clone());
        let (rs, cols, vals) = parts(&sp);
        assert_eq!(RowCompressed::from_parts(2, 4, rs.clone(), cols.clone(), vals.clone()), Ok(sp));
        let bad = |rs: Vec<u32>, cols: ColumnIndices, vals: Vec<f32>| {
            let e = RowCompressed::from_parts(2, 4, rs, cols, vals).unwrap_err();
            assert_eq!(e.kind(), K::BadParts);
            e.to_string()
        };
        assert!(bad(vec![0, 2], cols.clone(), vals.clone()).contains("row offsets"));
        assert!(bad(vec![0, 2, 2], cols.clone(), vals.clone()).contains("0 to 3"));
        assert!(bad(vec![0, 4, 3], cols.clone(), vals.clone()).contains("decrease"));
        let c = ColumnIndices::U16(vec![2, 1, 2]);
        assert!(bad(rs.clone(), c, vals.clone()).contains("increasing"));
        let c = ColumnIndices::U16(vec![1, 4, 2]);
        assert!(bad(rs.clone(), c, vals.clone()).contains("outside"));
        let c = ColumnIndices::U32(vec![1, 2, 2]);
        assert!(bad(rs.clone(), c, vals.clone()).contains("4-byte"));
        assert!(bad(rs.clone(), cols.clone(), vec![1.0, f32::NAN, 3.0]).contains("finite"));
        assert!(bad(rs.clone(), cols.clone(), vec![1.0, 0.0, 3.0]).contains("nonzero"));
        assert!(bad(rs, cols, vec![1.0]).contains("indices for"));
    }
}
