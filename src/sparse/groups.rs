//! N:M packing and its product kernels.
//!
//! Inputs are cut into `groups = ceil(d_in / m)` groups of `m` consecutive
//! columns (the last one narrower when `m` does not divide `d_in`). Every
//! group of every row stores exactly `n` slots; slot `s = (r·groups + g)·n +
//! k` holds a value `values[s]` and a 4-bit position within its group, in
//! byte `s / 2` of `positions`, low nibble for even `s`. Within a group the
//! nonzero values come first in increasing position; the remaining slots
//! are padding with value `+0.0` and position 0. No row offsets are needed:
//! every row has the same number of slots.

use std::ops::Range;

use super::{
    batch_tile, check_shapes, for_row_blocks, madd, multiversion, padded_batch, tile_inputs,
    transpose, Par, SparseError, SparseErrorKind as K, CHUNK_VALUES,
};

/// Widest group supported (positions are 4 bits).
pub const MAX_GROUP: usize = 16;

/// The most nonzeros any group of `m` consecutive inputs of any row of `w`
/// holds (`m >= 1`; the last group of a row may be narrower).
///
/// # Panics
/// If `w.len() != d_out * d_in` or `m == 0`.
#[track_caller]
pub fn max_per_group(w: &[f32], d_out: usize, d_in: usize, m: usize) -> usize {
    assert_eq!(w.len(), d_out * d_in, "weight length must be d_out * d_in");
    assert!(m > 0, "group width must be positive");
    let mut most = 0;
    for row in w.chunks_exact(d_in.max(1)).take(d_out) {
        for g in row.chunks(m) {
            most = most.max(g.iter().filter(|v| **v != 0.0).count());
        }
    }
    most
}

fn check_nm(n: usize, m: usize) -> Result<(), SparseError> {
    if !(1..=MAX_GROUP).contains(&m) || !(1..=m).contains(&n) {
        return Err(SparseError::new(
            K::UnsupportedGroup,
            format!(
                "pattern {n}:{m} is not supported; N:M packing needs 1 <= N <= M <= {MAX_GROUP}"
            ),
        ));
    }
    Ok(())
}

/// A `[d_out, d_in]` weight with at most `n` nonzeros in every group of `m`
/// consecutive inputs, packed by groups.
#[derive(Clone, Debug, PartialEq)]
pub struct GroupPacked {
    d_out: usize,
    d_in: usize,
    n: usize,
    m: usize,
    groups: usize,
    values: Vec<f32>,
    positions: Vec<u8>,
}

impl GroupPacked {
    /// Pack `w` (`[d_out, d_in]`, row-major) as `n:m`. `-0.0` counts as
    /// zero.
    ///
    /// # Errors
    /// [`K::UnsupportedGroup`] unless `1 <= n <= m <= 16`;
    /// [`K::PatternViolated`] naming the first group with more than `n`
    /// nonzeros.
    ///
    /// # Panics
    /// If `w.len() != d_out * d_in`.
    #[track_caller]
    pub fn from_dense(
        w: &[f32],
        d_out: usize,
        d_in: usize,
        n: usize,
        m: usize,
    ) -> Result<Self, SparseError> {
        assert_eq!(w.len(), d_out * d_in, "weight length must be d_out * d_in");
        check_nm(n, m)?;
        let groups = d_in.div_ceil(m);
        let slots = d_out * groups * n;
        let mut values = vec![0.0f32; slots];
        let mut positions = vec![0u8; slots.div_ceil(2)];
        for r in 0..d_out {
            let row = &w[r * d_in..(r + 1) * d_in];
            for (g, grp) in row.chunks(m).enumerate() {
                let mut k = 0;
                for (p, &v) in grp.iter().enumerate() {
                    if v == 0.0 {
                        continue;
                    }
                    if k == n {
                        return Err(SparseError::new(
                            K::PatternViolated { row: r, group: g },
                            format!(
                                "row {r}, inputs {}..{}: more than {n} nonzeros in a group of {m}; \
                                 the weight is not {n}:{m} sparse",
                                g * m,
                                g * m + grp.len()
                            ),
                        ));
                    }
                    let s = (r * groups + g) * n + k;
                    values[s] = v;
                    positions[s / 2] |= (p as u8) << (4 * (s % 2));
                    k += 1;
                }
            }
        }
        Ok(GroupPacked { d_out, d_in, n, m, groups, values, positions })
    }

    /// Assemble from stored parts, checking every invariant (see the module
    /// docs): lengths, positions inside their group, nonzeros first in
    /// increasing position, padding `+0.0` at position 0, finite values.
    ///
    /// # Errors
    /// [`K::UnsupportedGroup`]; [`K::BadParts`] naming the first broken
    /// invariant.
    pub fn from_parts(
        d_out: usize,
        d_in: usize,
        n: usize,
        m: usize,
        values: Vec<f32>,
        positions: Vec<u8>,
    ) -> Result<Self, SparseError> {
        check_nm(n, m)?;
        let bad = |d: String| Err(SparseError::new(K::BadParts, d));
        let groups = d_in.div_ceil(m);
        let slots = d_out.checked_mul(groups).and_then(|v| v.checked_mul(n));
        if slots != Some(values.len()) {
            return bad(format!(
                "{} values; a {d_out} x {d_in} layer packed {n}:{m} has {d_out} x {groups} x {n}",
                values.len()
            ));
        }
        if positions.len() != values.len().div_ceil(2) {
            return bad(format!(
                "{} position bytes; expected {} for {} slots",
                positions.len(),
                values.len().div_ceil(2),
                values.len()
            ));
        }
        if values.len() % 2 == 1 && positions[positions.len() - 1] >> 4 != 0 {
            return bad("the unused last position nibble is not zero".into());
        }
        for r in 0..d_out {
            for g in 0..groups {
                let width = m.min(d_in - g * m);
                let mut last: Option<usize> = None;
                let mut padding = false;
                for k in 0..n {
                    let s = (r * groups + g) * n + k;
                    let (v, p) = (values[s], usize::from((positions[s / 2] >> (4 * (s % 2))) & 15));
                    let at = || format!("row {r}, group {g}, slot {k}");
                    if !v.is_finite() {
                        return bad(format!("{}: value {v} is not finite", at()));
                    }
                    if v == 0.0 {
                        if v.is_sign_negative() || p != 0 {
                            return bad(format!("{}: padding must be +0.0 at position 0", at()));
                        }
                        padding = true;
                        continue;
                    }
                    if padding {
                        return bad(format!("{}: a value follows padding", at()));
                    }
                    if p >= width || last.is_some_and(|q| q >= p) {
                        return bad(format!(
                            "{}: position {p} is outside 0..{width} or not increasing",
                            at()
                        ));
                    }
                    last = Some(p);
                }
            }
        }
        Ok(GroupPacked { d_out, d_in, n, m, groups, values, positions })
    }

    /// `(d_out, d_in)`.
    pub fn shape(&self) -> (usize, usize) {
        (self.d_out, self.d_in)
    }

    /// `(n, m)`.
    pub fn pattern(&self) -> (usize, usize) {
        (self.n, self.m)
    }

    /// Slot values, `[d_out, groups, n]`.
    pub fn values(&self) -> &[f32] {
        &self.values
    }

    /// Packed 4-bit positions, two per byte.
    pub fn positions(&self) -> &[u8] {
        &self.positions
    }

    /// Number of nonzero stored values.
    pub fn nnz(&self) -> usize {
        self.values.iter().filter(|v| **v != 0.0).count()
    }

    /// The dense `[d_out, d_in]` weight, row-major.
    pub fn to_dense(&self) -> Vec<f32> {
        let mut w = vec![0.0; self.d_out * self.d_in];
        for (s, &v) in self.values.iter().enumerate() {
            if v != 0.0 {
                let (rg, r) = (s / self.n, s / self.n / self.groups);
                let g = rg % self.groups;
                let p = usize::from((self.positions[s / 2] >> (4 * (s % 2))) & 15);
                w[r * self.d_in + g * self.m + p] = v;
            }
        }
        w
    }

    /// Bytes of weight data one product reads: values and positions.
    pub fn weight_bytes(&self) -> usize {
        Self::bytes_for(self.d_out, self.d_in, self.n, self.m)
    }

    /// [`GroupPacked::weight_bytes`] for a layer of this shape and pattern
    /// (`m >= 1`).
    pub fn bytes_for(d_out: usize, d_in: usize, n: usize, m: usize) -> usize {
        let slots = d_out * d_in.div_ceil(m) * n;
        4 * slots + slots.div_ceil(2)
    }

    /// Workspace length (in `f32`) that [`GroupPacked::matmul`] needs for
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
    /// If `x`, `y` or `work` (see [`GroupPacked::matmul_workspace`]) are too
    /// short.
    #[track_caller]
    pub fn matmul(&self, x: &[f32], b: usize, y: &mut [f32], work: &mut [f32], par: Par) {
        check_shapes(self.d_out, self.d_in, x, b, y);
        assert!(work.len() >= self.matmul_workspace(b), "workspace too small");
        let g = Geometry { groups: self.groups, n: self.n, m: self.m };
        let cost = |r: usize| r * g.groups * g.n;
        let (v, p) = (&self.values[..], &self.positions[..]);
        if b == 1 {
            for_row_blocks(y, self.d_out, 1, par, cost, |rows, out| {
                #[cfg(target_arch = "x86_64")]
                if (g.n, g.m) == (2, 4) && super::isa() != super::Isa::Portable {
                    // SAFETY: isa() checked AVX2, FMA and BMI2 at run time.
                    unsafe { two_of_four_vec_avx2(rows, g, v, p, x, out) };
                    return;
                }
                if g.n == 2 {
                    groups_vec_pairs(rows, g, v, p, x, out)
                } else {
                    groups_vec_any(rows, g, v, p, x, out)
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
        for_row_blocks(yt, self.d_out, bp, par, cost, |rows, out| match batch_tile(b) {
            8 => groups_batch_8(rows, g, v, p, xt, d_in, out),
            _ => groups_batch_16(rows, g, v, p, xt, d_in, out),
        });
        transpose(yt, self.d_out, b, bp, y, self.d_out);
    }
}

/// Group geometry passed to the kernels.
#[derive(Clone, Copy)]
struct Geometry {
    groups: usize,
    n: usize,
    m: usize,
}

/// Position of slot `s`.
#[inline(always)]
fn pos(positions: &[u8], s: usize) -> usize {
    usize::from((positions[s >> 1] >> ((s & 1) << 2)) & 15)
}

/// Batch 1, any `n`: `y_r = Σ_g Σ_k v_{rgk} x_{g·m + p_{rgk}}`.
#[inline(always)]
fn groups_vec_any_body<const FMA: bool>(
    rows: Range<usize>,
    g: Geometry,
    vals: &[f32],
    positions: &[u8],
    x: &[f32],
    y: &mut [f32],
) {
    let per_row = g.groups * g.n;
    for (r, out) in rows.zip(y.iter_mut()) {
        let mut acc = [0.0f32; 4];
        let mut s = r * per_row;
        for grp in 0..g.groups {
            let base = grp * g.m;
            for k in 0..g.n {
                acc[k & 3] = madd::<FMA>(vals[s], x[base + pos(positions, s)], acc[k & 3]);
                s += 1;
            }
        }
        *out = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    }
}

/// Batch 1, `n = 2`: the two positions of group `(r, g)` are the two nibbles
/// of byte `r·groups + g` (slot numbers `2(r·groups + g)` and `+1`).
#[inline(always)]
fn groups_vec_pairs_body<const FMA: bool>(
    rows: Range<usize>,
    g: Geometry,
    vals: &[f32],
    positions: &[u8],
    x: &[f32],
    y: &mut [f32],
) {
    for (r, out) in rows.zip(y.iter_mut()) {
        let first = r * g.groups;
        let v = &vals[2 * first..2 * (first + g.groups)];
        let p = &positions[first..first + g.groups];
        let mut acc = [0.0f32; 4];
        let (p2, v4) = (p.chunks_exact(2), v.chunks_exact(4));
        let (pt, vt) = (p2.remainder(), v4.remainder());
        let mut base = 0;
        for (pp, vv) in p2.zip(v4) {
            let (a, b) = (usize::from(pp[0]), usize::from(pp[1]));
            acc[0] = madd::<FMA>(vv[0], x[base + (a & 15)], acc[0]);
            acc[1] = madd::<FMA>(vv[1], x[base + (a >> 4)], acc[1]);
            acc[2] = madd::<FMA>(vv[2], x[base + g.m + (b & 15)], acc[2]);
            acc[3] = madd::<FMA>(vv[3], x[base + g.m + (b >> 4)], acc[3]);
            base += 2 * g.m;
        }
        if let (Some(&a), [v0, v1]) = (pt.first(), vt) {
            let a = usize::from(a);
            acc[0] = madd::<FMA>(*v0, x[base + (a & 15)], acc[0]);
            acc[1] = madd::<FMA>(*v1, x[base + (a >> 4)], acc[1]);
        }
        *out = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    }
}

/// Batch 1, 2:4, AVX2: four groups (16 inputs, 8 slots) per step. `pdep`
/// spreads the 8 position nibbles into 8 bytes, which widen to lanes; adding
/// the group offsets `0 0 4 4 8 8 12 12` gives each slot's input within the
/// 16, and two in-register permutes of the 16 inputs plus a blend pick them,
/// so no load depends on a position.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma,bmi2")]
unsafe fn two_of_four_vec_avx2(
    rows: Range<usize>,
    g: Geometry,
    vals: &[f32],
    positions: &[u8],
    x: &[f32],
    y: &mut [f32],
) {
    use std::arch::x86_64::*;
    // Whole groups of 4 inputs; a narrower last group goes to the tail.
    let blocks = (x.len() / 4).min(g.groups) / 4;
    let offsets = _mm256_setr_epi32(0, 0, 4, 4, 8, 8, 12, 12);
    let seven = _mm256_set1_epi32(7);
    for (r, out) in rows.zip(y.iter_mut()) {
        let first = r * g.groups;
        let v = &vals[2 * first..2 * (first + g.groups)];
        let p = &positions[first..first + g.groups];
        let mut acc = [_mm256_setzero_ps(); 2];
        for k in 0..blocks {
            let bits = u32::from_le_bytes(p[4 * k..4 * k + 4].try_into().unwrap());
            let spread = _pdep_u64(u64::from(bits), 0x0F0F_0F0F_0F0F_0F0F);
            let idx = _mm256_cvtepu8_epi32(_mm_cvtsi64_si128(spread as i64));
            let idx = _mm256_add_epi32(idx, offsets);
            let xs = &x[16 * k..16 * k + 16];
            let vs = &v[8 * k..8 * k + 8];
            // SAFETY: `xs` holds 16 and `vs` 8 floats (checked by slicing).
            let (lo, hi, w) = unsafe {
                (
                    _mm256_loadu_ps(xs.as_ptr()),
                    _mm256_loadu_ps(xs.as_ptr().add(8)),
                    _mm256_loadu_ps(vs.as_ptr()),
                )
            };
            let from_hi = _mm256_castsi256_ps(_mm256_cmpgt_epi32(idx, seven));
            let picked = _mm256_blendv_ps(
                _mm256_permutevar8x32_ps(lo, idx),
                _mm256_permutevar8x32_ps(hi, idx),
                from_hi,
            );
            acc[k & 1] = _mm256_fmadd_ps(w, picked, acc[k & 1]);
        }
        let sum = _mm256_add_ps(acc[0], acc[1]);
        let half = _mm_add_ps(_mm256_castps256_ps128(sum), _mm256_extractf128_ps(sum, 1));
        let pair = _mm_add_ps(half, _mm_movehl_ps(half, half));
        let mut total = _mm_cvtss_f32(_mm_add_ss(pair, _mm_movehdup_ps(pair)));
        for grp in 4 * blocks..g.groups {
            let (a, base) = (usize::from(p[grp]), grp * 4);
            total = v[2 * grp].mul_add(x[base + (a & 15)], total);
            total = v[2 * grp + 1].mul_add(x[base + (a >> 4)], total);
        }
        *out = total;
    }
}

/// Batch `b > 1` on tiled inputs `xt` (`[tiles][d_in][T]`): as the
/// compressed-row kernel, with column `g·m + p` for each slot.
#[inline(always)]
fn groups_batch_body<const FMA: bool, const T: usize>(
    rows: Range<usize>,
    g: Geometry,
    vals: &[f32],
    positions: &[u8],
    xt: &[f32],
    d_in: usize,
    yt: &mut [f32],
) {
    let bp = yt.len() / rows.len().max(1);
    let per_row = g.groups * g.n;
    let chunk = (CHUNK_VALUES / per_row.max(1)).max(1);
    for r0 in rows.clone().step_by(chunk) {
        let r1 = (r0 + chunk).min(rows.end);
        for (t, xs) in xt.chunks_exact(d_in * T).take(bp / T).enumerate() {
            for r in r0..r1 {
                let mut acc = [[0.0f32; T]; 4];
                let mut s = r * per_row;
                for grp in 0..g.groups {
                    let base = grp * g.m;
                    for _ in 0..g.n {
                        let v = vals[s];
                        let x: &[f32; T] =
                            xs[(base + pos(positions, s)) * T..][..T].try_into().unwrap();
                        let a = &mut acc[s & 3];
                        for j in 0..T {
                            a[j] = madd::<FMA>(v, x[j], a[j]);
                        }
                        s += 1;
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

multiversion!(fn groups_vec_any(rows: Range<usize>, g: Geometry, vals: &[f32], positions: &[u8], x: &[f32], y: &mut [f32]) = groups_vec_any_body[]);
multiversion!(fn groups_vec_pairs(rows: Range<usize>, g: Geometry, vals: &[f32], positions: &[u8], x: &[f32], y: &mut [f32]) = groups_vec_pairs_body[]);
multiversion!(fn groups_batch_8(rows: Range<usize>, g: Geometry, vals: &[f32], positions: &[u8], xt: &[f32], d_in: usize, yt: &mut [f32]) = groups_batch_body[8]);
multiversion!(fn groups_batch_16(rows: Range<usize>, g: Geometry, vals: &[f32], positions: &[u8], xt: &[f32], d_in: usize, yt: &mut [f32]) = groups_batch_body[16]);

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sparse::testing::{assert_close, pars, reference, SplitMix64};

    /// A weight with at most `n` nonzeros per group of `m`: each group keeps
    /// a random number of its entries, up to `n`, at random positions.
    fn random_nm(rng: &mut SplitMix64, d_out: usize, d_in: usize, n: usize, m: usize) -> Vec<f32> {
        let mut w = vec![0.0f32; d_out * d_in];
        for r in 0..d_out {
            for g0 in (0..d_in).step_by(m) {
                let width = m.min(d_in - g0);
                let keep = (rng.below(n as u64 + 1) as usize).min(width);
                let mut pos: Vec<usize> = (0..width).collect();
                for i in 0..keep {
                    let j = i + rng.below((width - i) as u64) as usize;
                    pos.swap(i, j);
                    w[r * d_in + g0 + pos[i]] = rng.value() + 1.5;
                }
            }
        }
        w
    }

    /// Reference: the dense product by its definition (`testing::reference`).
    fn check(w: &[f32], d_out: usize, d_in: usize, n: usize, m: usize, rng: &mut SplitMix64) {
        let what = format!("{n}:{m} on {d_out}x{d_in}");
        let sp = GroupPacked::from_dense(w, d_out, d_in, n, m).unwrap();
        assert_eq!(sp.to_dense(), w, "{what}: round trip");
        let parts = (sp.values.clone(), sp.positions.clone());
        let again = GroupPacked::from_parts(d_out, d_in, n, m, parts.0, parts.1);
        assert_eq!(again.as_ref(), Ok(&sp), "{what}: from_parts");
        for b in [1, 3, 8, 16, 33] {
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
    fn every_n_m_up_to_16_matches_dense_product() {
        let mut rng = SplitMix64::new(21);
        for m in 1..=MAX_GROUP {
            for n in 1..=m {
                // d_in a multiple of m, and one with a narrower last group.
                for d_in in [3 * m, 2 * m + m.div_ceil(2)] {
                    let d_out = 1 + rng.below(9) as usize;
                    let w = random_nm(&mut rng, d_out, d_in, n, m);
                    check(&w, d_out, d_in, n, m, &mut rng);
                }
            }
        }
    }

    #[test]
    fn bigger_two_of_four_with_empty_and_full_groups() {
        let mut rng = SplitMix64::new(22);
        let (d_out, d_in) = (67, 132);
        let mut w = random_nm(&mut rng, d_out, d_in, 2, 4);
        w[..d_in].fill(0.0); // an empty row
        for g0 in (0..d_in).step_by(4) {
            w[d_in + g0] = 1.0; // row 1: every group full
            w[d_in + g0 + 1] = 0.0;
            w[d_in + g0 + 2] = 0.0;
            w[d_in + g0 + 3] = -2.0;
        }
        check(&w, d_out, d_in, 2, 4, &mut rng);
        let zero = vec![0.0f32; d_out * d_in];
        check(&zero, d_out, d_in, 2, 4, &mut rng);
        assert_eq!(max_per_group(&w, d_out, d_in, 4), 2);
        assert_eq!(GroupPacked::bytes_for(d_out, d_in, 2, 4), d_out * 33 * 2 * 4 + d_out * 33);
    }

    #[test]
    fn unsupported_patterns_and_violations_are_named() {
        let w = [1.0, 2.0, 0.0, 0.0, 0.0, 0.0, 3.0, 0.0];
        for (n, m) in [(0, 4), (5, 4), (1, 0), (2, 17)] {
            let e = GroupPacked::from_dense(&w, 1, 8, n, m).unwrap_err();
            assert_eq!(e.kind(), K::UnsupportedGroup, "{n}:{m}");
            assert!(e.to_string().contains(&format!("{n}:{m}")), "{e}");
        }
        let e = GroupPacked::from_dense(&w, 2, 4, 1, 4).unwrap_err();
        assert_eq!(e.kind(), K::PatternViolated { row: 0, group: 0 });
        assert!(e.to_string().starts_with("row 0, inputs 0..4: more than 1"), "{e}");
    }

    #[test]
    fn from_parts_rejects_broken_invariants() {
        let w = [0.0, 1.0, 2.0, 0.0, 0.0, 0.0, 3.0, 0.0];
        let sp = GroupPacked::from_dense(&w, 2, 4, 2, 4).unwrap();
        let (v, p) = (sp.values.clone(), sp.positions.clone());
        // Slots: row 0 = (1.0 @1, 2.0 @2), row 1 = (3.0 @2, pad).
        assert_eq!(v, vec![1.0, 2.0, 3.0, 0.0]);
        assert_eq!(p, vec![0x21, 0x02]);
        let bad = |v: Vec<f32>, p: Vec<u8>| {
            GroupPacked::from_parts(2, 4, 2, 4, v, p).unwrap_err().to_string()
        };
        assert!(bad(v[..3].to_vec(), p.clone()).contains("3 values"));
        assert!(bad(v.clone(), vec![0x21]).contains("position bytes"));
        assert!(bad(v.clone(), vec![0x12, 0x02]).contains("not increasing"));
        assert!(bad(v.clone(), vec![0x21, 0x12]).contains("padding"));
        assert!(bad(vec![1.0, 2.0, 0.0, 3.0], vec![0x21, 0x20]).contains("follows padding"));
        assert!(bad(vec![1.0, 2.0, 3.0, -0.0], p.clone()).contains("padding"));
        assert!(bad(vec![1.0, f32::INFINITY, 3.0, 0.0], p.clone()).contains("finite"));
        // A narrower last group bounds positions by its width.
        let e = GroupPacked::from_parts(1, 6, 1, 4, vec![1.0, 1.0], vec![0x30]).unwrap_err();
        assert!(e.to_string().contains("outside 0..2"), "{e}");
        // The unused high nibble of an odd slot count must be zero.
        let e = GroupPacked::from_parts(1, 4, 1, 4, vec![1.0], vec![0x10]).unwrap_err();
        assert!(e.to_string().contains("nibble"), "{e}");
    }
}
