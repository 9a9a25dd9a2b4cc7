//! Sparse storage of pruned linear weights and the kernels that multiply
//! with it: `y = x Wᵀ` for a batch `x` (`[b, d_in]` row-major) and a weight
//! `W` (`[d_out, d_in]`), giving `y` (`[b, d_out]` row-major).
//!
//! Contents:
//! - [`RowCompressed`] (`rows.rs`): unstructured sparsity. Per output row,
//!   the nonzero values and their column indices (`u16` when `d_in <=
//!   65,536`, else `u32`), rows delimited by `u32` offsets.
//! - [`GroupPacked`] (`groups.rs`): N:M sparsity. Inputs are cut into groups
//!   of `M` consecutive columns; every group stores exactly `N` values (padded
//!   with zeros) and `N` in-group positions of 4 bits each, two per byte.
//!   Supported: `1 <= N <= M <= 16`.
//! - [`dense_matmul`] (`dense.rs`): the dense baseline the sparse kernels are
//!   timed against; a vectorised matrix-vector product for `b = 1`, faer's
//!   matrix product above.
//! - [`choose_layout`]: which of the two layouts a pruned weight gets;
//!   [`SparseWeight`] (`weight.rs`) holds either.
//!
//! Key decisions:
//! - Kernels are pure: slices in, slices out, a caller-sized workspace and a
//!   [`Par`] budget. They never allocate inside the timed path.
//! - Parallelism is over output rows, in contiguous blocks holding about the
//!   same number of stored values, so threads get equal work on layers whose
//!   rows differ in density.
//! - For `b > 1` the kernels first lay `x` out in the workspace tile by tile
//!   (`[b / T][d_in][T]`, `T` = 8 or 16 batch rows), so that each stored
//!   weight `w_rc` updates `T` outputs from `T` contiguous inputs: a vector
//!   multiply-add instead of a gather. Rows run in chunks of about 1,024
//!   stored values and each chunk runs over every tile, so both the chunk's
//!   weights and the tile's inputs are read from cache. Results go to `yᵀ`
//!   (`[d_out, b]`) and are transposed into `y` at the end.
//! - Explicit SIMD is limited to compiling the same portable loops several
//!   times with wider instruction sets (AVX2+FMA+BMI2, AVX-512) chosen at
//!   run time, plus two hand-written AVX2 kernels at batch 1 where
//!   measurement showed they pay (a gather for compressed rows with u16
//!   indices, in-register permutes for 2:4); measurements are in
//!   docs/benchmarks.md. Setting `LOPPER_PORTABLE_KERNELS` forces the
//!   portable loops (for comparison and debugging).

mod dense;
mod groups;
mod rows;
mod weight;

use std::fmt;
use std::ops::Range;
use std::sync::OnceLock;

pub use dense::{dense_matmul, dense_matmul_workspace, DenseKernel};
pub use faer::Par;
pub use groups::{max_per_group, GroupPacked, MAX_GROUP};
pub use rows::{ColumnIndices, RowCompressed};
pub use weight::SparseWeight;

/// What went wrong while building a sparse weight.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum SparseErrorKind {
    /// N:M with `M` outside `1..=16` or `N` outside `1..=M`.
    UnsupportedGroup,
    /// A group holds more than `N` nonzeros.
    PatternViolated {
        /// Output row of the group.
        row: usize,
        /// Group index within the row.
        group: usize,
    },
    /// The layer holds too many values for 32-bit row offsets.
    TooLarge,
    /// Stored parts are inconsistent (lengths, offsets, indices).
    BadParts,
}

/// An error while building a sparse weight; one lower-case line.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SparseError {
    kind: SparseErrorKind,
    detail: String,
}

impl SparseError {
    pub(crate) fn new(kind: SparseErrorKind, detail: impl Into<String>) -> Self {
        SparseError { kind, detail: detail.into() }
    }

    /// What went wrong.
    pub fn kind(&self) -> SparseErrorKind {
        self.kind
    }
}

impl fmt::Display for SparseError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.detail)
    }
}

impl std::error::Error for SparseError {}

/// The storage a pruned weight gets.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Layout {
    /// [`RowCompressed`].
    Rows,
    /// [`GroupPacked`] with `n` of every `m`.
    Groups {
        /// Values kept per group.
        n: usize,
        /// Group width.
        m: usize,
    },
}

impl fmt::Display for Layout {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Layout::Rows => f.write_str("rows"),
            Layout::Groups { n, m } => write!(f, "{n}:{m}"),
        }
    }
}

/// Pick the layout for a pruned weight `w` (`[d_out, d_in]` row-major).
///
/// With `hint = Some((n, m))` (the pattern the model was pruned with) the
/// weight gets N:M packing when it holds at most `n` nonzeros in every group
/// of `m`. Without a hint, widths `m` of 4, 8 and 16 are tried with the
/// smallest `n` the weight satisfies. Either way, N:M is used only when
/// `n < m <= d_in` and its bytes are no more than the compressed rows'; otherwise
/// [`Layout::Rows`].
pub fn choose_layout(w: &[f32], d_out: usize, d_in: usize, hint: Option<(usize, usize)>) -> Layout {
    assert_eq!(w.len(), d_out * d_in, "weight length must be d_out * d_in");
    let nnz = w.iter().filter(|v| **v != 0.0).count();
    let rows_bytes = RowCompressed::bytes_for(d_out, d_in, nnz);
    let candidates: Vec<usize> = match hint {
        Some((_, m)) if (1..=MAX_GROUP).contains(&m) => vec![m],
        Some(_) => vec![],
        None => vec![4, 8, 16],
    };
    let mut best: Option<(usize, Layout)> = None;
    for m in candidates {
        let n = max_per_group(w, d_out, d_in, m).max(1);
        if let Some((hn, _)) = hint {
            if n > hn {
                continue;
            }
        }
        if m > d_in || n >= m {
            continue;
        }
        let bytes = GroupPacked::bytes_for(d_out, d_in, n, m);
        if bytes <= rows_bytes && best.is_none_or(|(b, _)| bytes < b) {
            best = Some((bytes, Layout::Groups { n, m }));
        }
    }
    best.map_or(Layout::Rows, |(_, l)| l)
}

/// Instruction sets the kernels are compiled for.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Isa {
    Portable,
    #[cfg_attr(not(target_arch = "x86_64"), allow(dead_code))]
    Avx2,
    #[cfg_attr(not(target_arch = "x86_64"), allow(dead_code))]
    Avx512,
}

/// The widest instruction set this CPU runs, detected once.
pub(crate) fn isa() -> Isa {
    static ISA: OnceLock<Isa> = OnceLock::new();
    *ISA.get_or_init(|| {
        #[cfg(target_arch = "x86_64")]
        {
            if std::env::var_os("LOPPER_PORTABLE_KERNELS").is_some() {
                return Isa::Portable;
            }
            let avx2 = is_x86_feature_detected!("avx2")
                && is_x86_feature_detected!("fma")
                && is_x86_feature_detected!("bmi2");
            if avx2 && is_x86_feature_detected!("avx512f") && is_x86_feature_detected!("avx512vl") {
                return Isa::Avx512;
            }
            if avx2 {
                return Isa::Avx2;
            }
        }
        Isa::Portable
    })
}

/// Define `$name(args)` that runs `$body::<FMA>(args)` compiled for the
/// widest instruction set [`isa`] reports. `FMA` is true where fused
/// multiply-add is a single instruction (elsewhere `mul_add` would be a slow
/// library call).
macro_rules! multiversion {
    ($vis:vis fn $name:ident($($arg:ident : $ty:ty),* $(,)?) = $body:ident[$($g:tt),*]) => {
        $vis fn $name($($arg: $ty),*) {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2,fma")]
                unsafe fn avx2($($arg: $ty),*) {
                    $body::<true, $($g),*>($($arg),*)
                }
                #[target_feature(enable = "avx512f,avx512vl,avx2,fma")]
                unsafe fn avx512($($arg: $ty),*) {
                    $body::<true, $($g),*>($($arg),*)
                }
                match $crate::sparse::isa() {
                    // SAFETY: the CPU supports the features (runtime check).
                    $crate::sparse::Isa::Avx512 => return unsafe { avx512($($arg),*) },
                    $crate::sparse::Isa::Avx2 => return unsafe { avx2($($arg),*) },
                    $crate::sparse::Isa::Portable => {}
                }
            }
            $body::<false, $($g),*>($($arg),*)
        }
    };
}
pub(crate) use multiversion;

/// `acc + a·b`, fused where that is one instruction.
#[inline(always)]
pub(crate) fn madd<const FMA: bool>(a: f32, b: f32, acc: f32) -> f32 {
    if FMA {
        a.mul_add(b, acc)
    } else {
        acc + a * b
    }
}

/// Split rows `0..n` into at most `parts` contiguous ranges of about equal
/// cost, where `cost_before(r)` is the (non-decreasing) cost of rows `0..r`.
pub(crate) fn balanced_ranges(
    n: usize,
    parts: usize,
    cost_before: impl Fn(usize) -> usize,
) -> Vec<Range<usize>> {
    let parts = parts.clamp(1, n.max(1));
    let total = cost_before(n);
    let mut out = Vec::with_capacity(parts);
    let mut start = 0;
    for p in 1..=parts {
        let end = if p == parts {
            n
        } else {
            // First row r with cost_before(r) >= p/parts of the total.
            let target = (total as u128 * p as u128 / parts as u128) as usize;
            let (mut lo, mut hi) = (start, n);
            while lo < hi {
                let mid = lo + (hi - lo) / 2;
                if cost_before(mid) < target {
                    lo = mid + 1;
                } else {
                    hi = mid;
                }
            }
            lo.max(start)
        };
        if end > start {
            out.push(start..end);
        }
        start = end;
    }
    out
}

/// Multiply-adds per thread below which a product runs on one thread:
/// handing work to another thread costs a few microseconds. Zero in unit
/// tests, so that small shapes exercise the parallel path.
const MIN_PARALLEL_WORK: usize = if cfg!(test) { 0 } else { 1 << 15 };

/// Run `f` on each block of rows of `out` (`rows` rows of `width` values,
/// row-major), in parallel under `par`, with about equal cost per block;
/// `cost_before(r) · width` estimates the multiply-adds of rows `0..r`.
pub(crate) fn for_row_blocks(
    out: &mut [f32],
    rows: usize,
    width: usize,
    par: Par,
    cost_before: impl Fn(usize) -> usize + Sync,
    f: impl Fn(Range<usize>, &mut [f32]) + Sync,
) {
    debug_assert_eq!(out.len(), rows * width);
    let threads = par.degree();
    if threads <= 1
        || rows < 2
        || cost_before(rows).saturating_mul(width) < threads * MIN_PARALLEL_WORK
    {
        f(0..rows, out);
        return;
    }
    // A few blocks per thread absorb uneven progress between threads.
    let ranges = balanced_ranges(rows, 4 * threads, cost_before);
    let mut pieces = Vec::with_capacity(ranges.len());
    let mut rest = out;
    for r in &ranges {
        let (head, tail) = rest.split_at_mut(r.len() * width);
        pieces.push((r.clone(), head));
        rest = tail;
    }
    use rayon::prelude::*;
    pieces.into_par_iter().with_max_len(1).for_each(|(r, piece)| f(r, piece));
}

/// `dst[c·dst_stride + r] = src[r·src_stride + c]` for `r < rows`,
/// `c < cols`: a transpose between row-major arrays with row strides.
pub(crate) fn transpose(
    src: &[f32],
    rows: usize,
    cols: usize,
    src_stride: usize,
    dst: &mut [f32],
    dst_stride: usize,
) {
    const TILE: usize = 32;
    for r0 in (0..rows).step_by(TILE) {
        for c0 in (0..cols).step_by(TILE) {
            for r in r0..(r0 + TILE).min(rows) {
                let s = &src[r * src_stride..];
                for c in c0..(c0 + TILE).min(cols) {
                    dst[c * dst_stride + r] = s[c];
                }
            }
        }
    }
}

/// Batch tile width of the batched kernels: 8 lanes for `b <= 8`, else 16
/// (one AVX-512 or two AVX2 registers per partial sum).
pub(crate) fn batch_tile(b: usize) -> usize {
    if b <= 8 {
        8
    } else {
        16
    }
}

/// `b` rounded up to whole tiles.
pub(crate) fn padded_batch(b: usize) -> usize {
    b.div_ceil(batch_tile(b)) * batch_tile(b)
}

/// Lay `x` (`[b, d_in]`) out tile by tile: `xt[(t·d_in + c)·T + j] =
/// x[(t·T + j)·d_in + c]`, zero where `t·T + j >= b`. One tile's inputs
/// (`d_in · T` values) are then contiguous and stay in cache while a chunk
/// of rows runs over them.
pub(crate) fn tile_inputs(x: &[f32], b: usize, d_in: usize, xt: &mut [f32]) {
    let t = batch_tile(b);
    xt.fill(0.0);
    for (i, xi) in x.chunks_exact(d_in.max(1)).take(b).enumerate() {
        let tile = &mut xt[(i / t) * d_in * t..];
        for (c, &v) in xi.iter().enumerate() {
            tile[c * t + i % t] = v;
        }
    }
}

/// Stored values per chunk of rows in the batched kernels: the chunk's
/// weights (about 6 KiB) and a tile of inputs share the L1 cache.
pub(crate) const CHUNK_VALUES: usize = 1024;

#[track_caller]
pub(crate) fn check_shapes(d_out: usize, d_in: usize, x: &[f32], b: usize, y: &[f32]) {
    assert_eq!(x.len(), b * d_in, "x must hold b * d_in = {b} * {d_in} values");
    assert_eq!(y.len(), b * d_out, "y must hold b * d_out = {b} * {d_out} values");
}

#[cfg(test)]
pub(crate) mod testing {
    //! Seeded random data and the reference product for the kernel tests.

    pub(crate) use crate::rng::SplitMix64;

    /// `y = x Wᵀ` by the definition of the matrix product, in f64, plus the
    /// bound `γ_n Σ_k |x_ik w_jk|` on the error of any f32 summation order of
    /// `n = d_in` products (Higham, Accuracy and Stability of Numerical
    /// Algorithms, 2nd ed., eq. 3.5), doubled for the rounding of the f32
    /// products themselves.
    pub(crate) fn reference(
        w: &[f32],
        d_out: usize,
        d_in: usize,
        x: &[f32],
        b: usize,
    ) -> (Vec<f64>, Vec<f64>) {
        let mut y = vec![0.0; b * d_out];
        let mut bound = vec![0.0; b * d_out];
        let u = f64::from(f32::EPSILON) / 2.0;
        let n = (d_in + 1) as f64;
        let gamma = n * u / (1.0 - n * u);
        for i in 0..b {
            for j in 0..d_out {
                let (mut s, mut a) = (0.0f64, 0.0f64);
                for k in 0..d_in {
                    let p = f64::from(x[i * d_in + k]) * f64::from(w[j * d_in + k]);
                    s += p;
                    a += p.abs();
                }
                y[i * d_out + j] = s;
                bound[i * d_out + j] = 2.0 * gamma * a + f64::from(f32::MIN_POSITIVE);
            }
        }
        (y, bound)
    }

    /// Assert `got` is within the reference bound; prints the worst entry.
    #[track_caller]
    pub(crate) fn assert_close(got: &[f32], want: &[f64], bound: &[f64], what: &str) {
        assert_eq!(got.len(), want.len(), "{what}: length");
        let mut worst = (0.0f64, 0usize);
        for (k, ((g, w), t)) in got.iter().zip(want).zip(bound).enumerate() {
            let excess = (f64::from(*g) - w).abs() / t;
            if excess > worst.0 || excess.is_nan() {
                worst = (excess, k);
            }
        }
        let k = worst.1;
        assert!(
            worst.0 <= 1.0,
            "{what}: entry {k}: got {}, want {}, |diff| {:e} > bound {:e}",
            got[k],
            want[k],
            (f64::from(got[k]) - want[k]).abs(),
            bound[k]
        );
    }

    /// A `[d_out, d_in]` weight where each entry is nonzero with
    /// probability `density`.
    pub(crate) fn random_sparse(
        rng: &mut SplitMix64,
        d_out: usize,
        d_in: usize,
        density: f64,
    ) -> Vec<f32> {
        (0..d_out * d_in).map(|_| if rng.uniform() < density { rng.value() } else { 0.0 }).collect()
    }

    pub(crate) fn pars() -> [super::Par; 2] {
        [super::Par::Seq, super::Par::rayon(3)]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn balanced_ranges_cover_and_balance() {
        // Cost of row r is r (triangular), so later blocks hold fewer rows.
        let before = |r: usize| r * (r.saturating_sub(1)) / 2;
        let ranges = balanced_ranges(100, 4, before);
        assert_eq!(ranges.first().unwrap().start, 0);
        assert_eq!(ranges.last().unwrap().end, 100);
        for w in ranges.windows(2) {
            assert_eq!(w[0].end, w[1].start);
        }
        let costs: Vec<usize> = ranges.iter().map(|r| before(r.end) - before(r.start)).collect();
        let total = before(100);
        for c in &costs {
            assert!(c.abs_diff(total / 4) <= 100, "{costs:?}");
        }
        assert!(ranges[0].len() > ranges[3].len());
        // More parts than rows, zero cost, empty.
        assert_eq!(balanced_ranges(3, 8, |r| r).len(), 3);
        assert_eq!(balanced_ranges(5, 2, |_| 0), vec![0..5]);
        assert!(balanced_ranges(0, 2, |_| 0).is_empty());
    }

    #[test]
    fn transpose_with_stride() {
        let src: Vec<f32> = (0..35).map(|v| v as f32).collect(); // 5 x 7
        let mut dst = vec![-1.0; 7 * 8];
        transpose(&src, 5, 7, 7, &mut dst, 8);
        for r in 0..5 {
            for c in 0..7 {
                assert_eq!(dst[c * 8 + r], src[r * 7 + c]);
            }
            assert_eq!(dst[r * 8 + 7], -1.0);
        }
    }

    #[test]
    fn layout_choice() {
        // 2:4 exactly.
        let mut w = vec![0.0f32; 4 * 16];
        for (k, v) in w.iter_mut().enumerate() {
            if k % 4 < 2 {
                *v = 1.0 + k as f32;
            }
        }
        assert_eq!(choose_layout(&w, 4, 16, None), Layout::Groups { n: 2, m: 4 });
        assert_eq!(choose_layout(&w, 4, 16, Some((2, 4))), Layout::Groups { n: 2, m: 4 });
        // A hint the weight does not satisfy falls back to rows.
        assert_eq!(choose_layout(&w, 4, 16, Some((1, 4))), Layout::Rows);
        // 90% unstructured: rows are smaller than any N:M.
        let mut rng = testing::SplitMix64::new(7);
        let w = testing::random_sparse(&mut rng, 64, 256, 0.1);
        assert_eq!(choose_layout(&w, 64, 256, None), Layout::Rows);
        // Fully dense: rows (N = M is never packed).
        let w = vec![1.0f32; 8 * 8];
        assert_eq!(choose_layout(&w, 8, 8, None), Layout::Rows);
        assert_eq!(Layout::Groups { n: 2, m: 4 }.to_string(), "2:4");
    }
}
