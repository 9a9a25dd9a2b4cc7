//! Swap moves: one kept weight out, one pruned weight in, all others fixed.
//!
//! With `e = ŵ − w` and the gradient `g = A e` (kept current by rank-one
//! updates), removing `i` (`ŵ_i → 0`) and adding `j` at its best value `t`
//! changes the row objective by exactly
//!
//! ```text
//! Δ(i, j) = −2 ŵ_i g_i + ŵ_i² A_ii − (g_j − ŵ_i A_ij)² / A_jj,
//! t*      = (ŵ_i A_ij − g_j) / A_jj,
//! ```
//!
//! so once `g` is known every pair costs O(1), and applying a change `δ` to
//! coordinate `c` costs one column of `A`: `g += δ A_{:,c}`.
//!
//! A sweep over a row ([`score_block`] then [`apply_row`]):
//! 1. For every kept `i`, find the best partner `j ∉ S` (the largest
//!    `(g_j − ŵ_i A_ij)² / A_jj`): O(k·d_in) per row, no inverse. Rows are
//!    scored in blocks against one column `A_{:,i}` at a time, so `A` streams
//!    from memory once per block of rows instead of once per row.
//! 2. Take the candidates in order of `Δ`, re-evaluate each exactly with the
//!    updated `g` (re-scanning for the best free partner if the stored one is
//!    taken or no longer improving) and accept when `Δ < −tol`. Every index
//!    moves at most once per sweep, so accepted swaps do not undo each other.
//!
//! N:M rows ([`apply_nm_row`]) swap inside a group only: the best pair of each
//! group, groups in order of `Δ`, one swap per group per sweep.
//!
//! Per-layer scope also moves budget between rows ([`budget_moves`]): drop the
//! cheapest kept weight of one row (cost `−2 ŵ_i g_i + ŵ_i² A_ii`) and add the
//! best pruned weight of another (gain `g_j² / A_jj`, value `−g_j / A_jj`);
//! the two rows are independent, so the sum is exact.

use super::col;
use super::refit::axpy;
use faer::MatRef;

/// A swap candidate: prune `out`, keep `inn`, objective change `delta`.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Cand {
    pub delta: f64,
    pub out: usize,
    pub inn: usize,
}

/// Defines a lane-parallel search for the largest `(g_j − x a_j)² m_j` and
/// its index (`usize::MAX` when every `m_j = 0`), for one float type: `$lanes`
/// independent lanes with branch-free updates so the loop vectorises, `$idx`
/// lane indices (as wide as the floats, so the lanes pair up), ties to the
/// lower index; plus an AVX2 build of the same operations (wider registers,
/// no FMA contraction, so the results are identical) picked at run time.
macro_rules! best_partner_search {
    ($entry:ident, $avx2:ident, $body:ident, $t:ty, $lanes:expr, $idx:ty) => {
        #[inline]
        fn $entry(x: $t, a: &[$t], g: &[$t], m: &[$t]) -> ($t, usize) {
            #[cfg(target_arch = "x86_64")]
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2, checked just above.
                return unsafe { $avx2(x, a, g, m) };
            }
            $body(x, a, g, m)
        }

        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx2")]
        fn $avx2(x: $t, a: &[$t], g: &[$t], m: &[$t]) -> ($t, usize) {
            $body(x, a, g, m)
        }

        #[inline(always)]
        fn $body(x: $t, a: &[$t], g: &[$t], m: &[$t]) -> ($t, usize) {
            const L: usize = $lanes;
            let n = g.len().min(a.len()).min(m.len());
            let (a, g, m) = (&a[..n], &g[..n], &m[..n]);
            let mut best = [0.0 as $t; L];
            let mut idx = [<$idx>::MAX; L];
            let chunks = n / L;
            for c in 0..chunks {
                let base = c * L;
                let (ac, gc, mc) = (&a[base..base + L], &g[base..base + L], &m[base..base + L]);
                for l in 0..L {
                    let t = gc[l] - x * ac[l];
                    let v = t * t * mc[l];
                    let gt = v > best[l];
                    best[l] = if gt { v } else { best[l] };
                    idx[l] = if gt { (base + l) as $idx } else { idx[l] };
                }
            }
            let (mut bv, mut bi) = (0.0 as $t, usize::MAX);
            for l in 0..L {
                let i = idx[l] as usize;
                if idx[l] != <$idx>::MAX
                    && (best[l] > bv || (best[l] == bv && best[l] > 0.0 && i < bi))
                {
                    bv = best[l];
                    bi = i;
                }
            }
            for j in chunks * L..n {
                let t = g[j] - x * a[j];
                let v = t * t * m[j];
                if v > bv {
                    bv = v;
                    bi = j;
                }
            }
            (bv, bi)
        }
    };
}

// f64: prices are used as found. f32 (twice the lanes): only the index is
// used; the caller prices the chosen pair exactly in f64.
best_partner_search!(best_partner, best_partner_avx2, best_partner_body, f64, 8, usize);
best_partner_search!(best_partner_f32, best_partner_f32_avx2, best_partner_f32_body, f32, 16, u32);

/// One row's mutable state, borrowed from the layer state.
pub(crate) struct RowMut<'s> {
    pub w_hat: &'s mut [f64],
    pub g: &'s mut [f64],
    pub keep: &'s mut [bool],
}

/// Score a block of rows: for each row, the best partner of every kept
/// index, keeping candidates with `Δ < −tol[row]`. `avail` is workspace
/// (`rows.len() · d_in`); on return it holds `1/A_jj` for `j ∉ S`, else 0.
///
/// The search for the partner runs in f32 (`a32` is `A` rounded, `g` and
/// `1/A_jj` are rounded per block); the chosen pair is then priced exactly
/// in f64, so rounding can only pick a slightly worse partner, never accept
/// a move on a wrong price ([`apply_row`] re-prices again before applying).
pub(crate) fn score_block(
    a: MatRef<'_, f64>,
    a32: MatRef<'_, f32>,
    inv_diag: &[f64],
    rows: &[RowMut<'_>],
    tol: &[f64],
    avail: &mut [f64],
    cands: &mut [Vec<Cand>],
) {
    let d = inv_diag.len();
    let mut g32 = vec![0.0f32; rows.len() * d];
    let mut m32 = vec![0.0f32; rows.len() * d];
    for (bi, row) in rows.iter().enumerate() {
        let m = &mut avail[bi * d..(bi + 1) * d];
        for j in 0..d {
            m[j] = if row.keep[j] { 0.0 } else { inv_diag[j] };
            m32[bi * d + j] = m[j] as f32;
            g32[bi * d + j] = row.g[j] as f32;
        }
        cands[bi].clear();
    }
    for i in 0..d {
        if !rows.iter().any(|r| r.keep[i]) {
            continue;
        }
        let ai = col(a, i);
        let ai32 = a32.col(i).try_as_col_major().expect("unit row stride").as_slice();
        for (bi, row) in rows.iter().enumerate() {
            if !row.keep[i] {
                continue;
            }
            let wi = row.w_hat[i];
            let c0 = wi * (wi * ai[i] - 2.0 * row.g[i]);
            let rg = bi * d..(bi + 1) * d;
            let j = best_partner_f32(wi as f32, ai32, &g32[rg.clone()], &m32[rg]).1;
            let v = if j == usize::MAX {
                0.0
            } else {
                let t = row.g[j] - wi * ai[j];
                t * t * inv_diag[j]
            };
            let delta = c0 - v;
            if j != usize::MAX && delta < -tol[bi] {
                cands[bi].push(Cand { delta, out: i, inn: j });
            }
        }
    }
}

/// Apply the candidates of one row in order of `Δ`, each re-evaluated
/// exactly with the current `g`. `avail` is this row's slice from
/// [`score_block`]. Returns (swaps, total Δ).
pub(crate) fn apply_row(
    a: MatRef<'_, f64>,
    inv_diag: &[f64],
    row: &mut RowMut<'_>,
    cands: &mut [Cand],
    tol: f64,
    avail: &mut [f64],
) -> (usize, f64) {
    cands.sort_by(|p, q| p.delta.total_cmp(&q.delta).then(p.out.cmp(&q.out)));
    let (mut swaps, mut total) = (0, 0.0);
    for c in cands.iter() {
        let i = c.out;
        if !row.keep[i] {
            continue;
        }
        let ai = col(a, i);
        let wi = row.w_hat[i];
        let c0 = wi * (wi * ai[i] - 2.0 * row.g[i]);
        let exact = |j: usize, g: &[f64]| {
            let t = g[j] - wi * ai[j];
            c0 - t * t * inv_diag[j]
        };
        let (mut j, mut delta) = (c.inn, f64::INFINITY);
        if avail[j] > 0.0 {
            delta = exact(j, row.g);
        }
        if delta.is_nan() || delta >= -tol {
            let (v, jj) = best_partner(wi, ai, row.g, avail);
            if jj == usize::MAX {
                continue;
            }
            j = jj;
            delta = c0 - v;
        }
        if delta < -tol {
            // i out: g −= ŵ_i A_{:,i}; then j in at t* = −g_j / A_jj.
            axpy(row.g, -wi, ai);
            row.w_hat[i] = 0.0;
            row.keep[i] = false;
            let t = -row.g[j] * inv_diag[j];
            row.w_hat[j] = t;
            row.keep[j] = true;
            axpy(row.g, t, col(a, j));
            avail[i] = 0.0;
            avail[j] = 0.0;
            swaps += 1;
            total += delta;
        }
    }
    (swaps, total)
}

/// Best in-group swap of group `g0..g0+m`: (Δ, out, in), exact for the
/// current `g`.
fn best_group_pair(
    a: MatRef<'_, f64>,
    inv_diag: &[f64],
    row: &RowMut<'_>,
    g0: usize,
    m: usize,
) -> Option<Cand> {
    let mut best: Option<Cand> = None;
    for i in g0..g0 + m {
        if !row.keep[i] {
            continue;
        }
        let ai = col(a, i);
        let wi = row.w_hat[i];
        let c0 = wi * (wi * ai[i] - 2.0 * row.g[i]);
        for j in g0..g0 + m {
            if row.keep[j] {
                continue;
            }
            let t = row.g[j] - wi * ai[j];
            let delta = c0 - t * t * inv_diag[j];
            if best.is_none_or(|b| delta < b.delta) {
                best = Some(Cand { delta, out: i, inn: j });
            }
        }
    }
    best
}

/// One N:M sweep of a row: score the best pair of every group, then take
/// groups in order of `Δ`, re-evaluating each group's best pair exactly.
/// Returns (swaps, total Δ).
pub(crate) fn apply_nm_row(
    a: MatRef<'_, f64>,
    inv_diag: &[f64],
    row: &mut RowMut<'_>,
    m: usize,
    tol: f64,
) -> (usize, f64) {
    let d = inv_diag.len();
    let mut cands: Vec<Cand> = (0..d / m)
        .filter_map(|q| best_group_pair(a, inv_diag, row, q * m, m))
        .filter(|c| c.delta < -tol)
        .collect();
    cands.sort_by(|p, q| p.delta.total_cmp(&q.delta).then(p.out.cmp(&q.out)));
    let (mut swaps, mut total) = (0, 0.0);
    for c in cands {
        let g0 = c.out / m * m;
        let Some(c) = best_group_pair(a, inv_diag, row, g0, m) else { continue };
        if c.delta < -tol {
            let wi = row.w_hat[c.out];
            axpy(row.g, -wi, col(a, c.out));
            row.w_hat[c.out] = 0.0;
            row.keep[c.out] = false;
            let t = -row.g[c.inn] * inv_diag[c.inn];
            row.w_hat[c.inn] = t;
            row.keep[c.inn] = true;
            axpy(row.g, t, col(a, c.inn));
            swaps += 1;
            total += c.delta;
        }
    }
    (swaps, total)
}

/// Cheapest removal `(cost, i)` of a row, cost `−2 ŵ_i g_i + ŵ_i² A_ii`.
fn cheapest_removal(diag: &[f64], row: &RowMut<'_>) -> Option<(f64, usize)> {
    (0..diag.len())
        .filter(|&i| row.keep[i])
        .map(|i| {
            let wi = row.w_hat[i];
            (wi * (wi * diag[i] - 2.0 * row.g[i]), i)
        })
        .min_by(|p, q| p.0.total_cmp(&q.0).then(p.1.cmp(&q.1)))
}

/// Best addition `(gain, j)` of a row, gain `g_j² / A_jj` (objective falls by
/// it).
fn best_addition(inv_diag: &[f64], row: &RowMut<'_>) -> Option<(f64, usize)> {
    (0..inv_diag.len())
        .filter(|&j| !row.keep[j])
        .map(|j| (row.g[j] * row.g[j] * inv_diag[j], j))
        .max_by(|p, q| p.0.total_cmp(&q.0).then(q.1.cmp(&p.1)))
}

/// Pair the best additions (`adds[r] = (gain, j)`) with the cheapest
/// removals in other rows (`rems[r] = (cost, i)`) while `cost − gain < −tol`;
/// each row takes part in at most one move. Returns
/// `(receiving row, j, donor row, i, Δ)` per move.
pub(crate) fn pair_rows(
    adds: &[Option<(f64, usize)>],
    rems: &[Option<(f64, usize)>],
    tol: f64,
) -> Vec<(usize, usize, usize, usize, f64)> {
    let n = adds.len();
    let mut add_order: Vec<usize> = (0..n).filter(|&r| adds[r].is_some()).collect();
    add_order.sort_by(|&p, &q| adds[q].unwrap().0.total_cmp(&adds[p].unwrap().0).then(p.cmp(&q)));
    let mut rem_order: Vec<usize> = (0..n).filter(|&r| rems[r].is_some()).collect();
    rem_order.sort_by(|&p, &q| rems[p].unwrap().0.total_cmp(&rems[q].unwrap().0).then(p.cmp(&q)));
    let mut used = vec![false; n];
    let mut out = Vec::new();
    let mut next_rem = 0;
    for &ra in &add_order {
        if used[ra] {
            continue;
        }
        while next_rem < rem_order.len() && used[rem_order[next_rem]] {
            next_rem += 1;
        }
        // The cheapest unused removal in a row other than `ra`.
        let Some(&rr) = rem_order[next_rem..].iter().find(|&&r| !used[r] && r != ra) else {
            break;
        };
        let (gain, j) = adds[ra].unwrap();
        let (cost, i) = rems[rr].unwrap();
        let delta = cost - gain;
        if delta.is_nan() || delta >= -tol {
            break;
        }
        used[ra] = true;
        used[rr] = true;
        out.push((ra, j, rr, i, delta));
    }
    out
}

/// Move budget between rows with the fixed-others prices: drop the
/// cheapest weight of one row, add the best weight of another. Returns
/// (moves, total Δ, rows touched).
pub(crate) fn budget_moves(
    a: MatRef<'_, f64>,
    diag: &[f64],
    inv_diag: &[f64],
    rows: &mut [RowMut<'_>],
    tol: f64,
) -> (usize, f64, Vec<usize>) {
    let adds: Vec<Option<(f64, usize)>> = rows.iter().map(|r| best_addition(inv_diag, r)).collect();
    let rems: Vec<Option<(f64, usize)>> = rows.iter().map(|r| cheapest_removal(diag, r)).collect();
    let (mut total, mut touched) = (0.0, Vec::new());
    let moves = pair_rows(&adds, &rems, tol);
    for &(ra, j, rr, i, delta) in &moves {
        let wi = rows[rr].w_hat[i];
        axpy(rows[rr].g, -wi, col(a, i));
        rows[rr].w_hat[i] = 0.0;
        rows[rr].keep[i] = false;
        let t = -rows[ra].g[j] * inv_diag[j];
        rows[ra].w_hat[j] = t;
        rows[ra].keep[j] = true;
        axpy(rows[ra].g, t, col(a, j));
        total += delta;
        touched.push(ra);
        touched.push(rr);
    }
    (moves.len(), total, touched)
}

#[cfg(test)]
mod tests {
    use super::super::tests::instance;
    use super::super::{refit, Problem, State};
    use super::*;
    use faer::Par;

    #[test]
    fn swap_delta_matches_direct_objective() {
        // Δ(i, j) and t* against f recomputed from scratch (a fresh
        // gradient) after applying the move.
        let mut rng = crate::rng::SplitMix64::new(8);
        let (x, w, lambda) = instance(&mut rng, 50, 10, 2, 0.01);
        let mut a = x.transpose() * &x;
        for j in 0..10 {
            a[(j, j)] += lambda;
        }
        let prob = Problem::new(w.as_ref(), a.as_ref(), lambda, Par::Seq);
        let keep: Vec<bool> = (0..20).map(|c| c % 10 < 5).collect();
        let st = State::from_support(&prob, keep, None, Par::Seq);
        for r in 0..2 {
            let rg = r * 10..(r + 1) * 10;
            let f0 = st.f[r];
            for i in 0..5 {
                for j in 5..10 {
                    let mut row = st.clone();
                    let mut rm = RowMut {
                        w_hat: &mut row.w_hat[rg.clone()],
                        g: &mut row.g[rg.clone()],
                        keep: &mut row.keep[rg.clone()],
                    };
                    let wi = rm.w_hat[i];
                    let c0 = wi * (wi * a[(i, i)] - 2.0 * rm.g[i]);
                    let t = rm.g[j] - wi * a[(i, j)];
                    let delta = c0 - t * t / a[(j, j)];
                    let mut cands = vec![Cand { delta, out: i, inn: j }];
                    let mut avail: Vec<f64> =
                        (0..10).map(|c| if c >= 5 { 1.0 / a[(c, c)] } else { 0.0 }).collect();
                    let (n, got) = apply_row(
                        a.as_ref(),
                        &prob.inv_diag,
                        &mut rm,
                        &mut cands,
                        -f64::INFINITY,
                        &mut avail,
                    );
                    assert_eq!(n, 1);
                    let mut g = vec![0.0; 10];
                    let f1 = refit::gradient_row(
                        a.as_ref(),
                        &prob.w[rg.clone()],
                        &prob.b[rg.clone()],
                        rm.w_hat,
                        rm.keep,
                        &mut g,
                    );
                    // The move may pick a better partner than j; compare the
                    // reported Δ with the direct change either way.
                    let tol = 1e-10 * prob.dense[r];
                    assert!(
                        (f0 + got - f1).abs() <= tol,
                        "row {r} ({i},{j}): {f0} + {got} vs {f1}"
                    );
                    assert!(got <= delta + tol);
                    // The incrementally updated gradient equals a fresh one.
                    let diff =
                        g.iter().zip(rm.g.iter()).map(|(p, q)| (p - q).abs()).fold(0.0, f64::max);
                    assert!(
                        diff <= 1e-10 * prob.dense[r].sqrt() * a.norm_max().sqrt(),
                        "gradient drift {diff:.3e}"
                    );
                }
            }
        }
    }
}
