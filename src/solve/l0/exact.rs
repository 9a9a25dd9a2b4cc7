//! Swap moves evaluated with the refit: the exact change of the refit
//! optimum when `i` leaves the support and `j` joins it.
//!
//! At a refit optimum (`g_S = 0`), with `M = A_SS⁻¹` and `V = A_{Sᶜ,S} M`,
//! removing `i` (position `p` in `S`) with the other kept weights
//! re-optimised costs `ŵ_i² / M_pp` (the OBS saliency) and leaves the
//! gradient `g'_j = g_j − (ŵ_i / M_pp) V_jp` outside `S`. Adding `j` to
//! `S∖{i}` then gains `g'_j² / s'_j`, where `s'_j` is the Schur complement
//! of `A_jj` with respect to `S∖{i}`:
//!
//! ```text
//! s_j  = A_jj − Σ_p V_jp A_{j,S_p}          (Schur complement w.r.t. S)
//! s'_j = s_j + V_jp² / M_pp                 (dropping i from S)
//! Δ(i, j) = ŵ_i² / M_pp − g'_j² / s'_j      = f(S − i + j) − f(S)
//! ```
//!
//! One factorisation of `A_SS` (`k³/3`), its inverse (`k³`) and the product
//! `V` (`2 (d_in − k) k²`, faer matmul) price all `k·(d_in − k)` swaps
//! exactly. That is more than a sweep of the fixed-others swaps in
//! [`super::swap`] (O(k·d_in)), so these moves are used once the cheap ones
//! stop improving, and only on rows with `k ≤ L0Params::exact_max_k`.

use super::col;
use super::swap::{Cand, RowMut};
use faer::linalg::matmul::matmul;
use faer::linalg::solvers::DenseSolveCore;
use faer::{Accum, Mat, MatRef, Par, Side};

/// The best exact swap of a row at a refit optimum; `group` restricts `j` to
/// the N:M group of `i` (width `group`), `None` allows any `j ∉ S`.
pub(crate) fn best_swap(a: MatRef<'_, f64>, row: &RowMut<'_>, group: Option<usize>) -> Option<Cand> {
    let d = row.keep.len();
    let s: Vec<usize> = (0..d).filter(|&c| row.keep[c]).collect();
    let out: Vec<usize> = (0..d).filter(|&c| !row.keep[c]).collect();
    let k = s.len();
    if k == 0 || out.is_empty() {
        return None;
    }
    let ass = Mat::from_fn(k, k, |p, q| a[(s[p], s[q])]);
    let m = ass.llt(Side::Lower).ok()?.inverse();
    let aos = Mat::from_fn(out.len(), k, |q, p| col(a, s[p])[out[q]]);
    let mut v = Mat::<f64>::zeros(out.len(), k);
    matmul(v.as_mut(), Accum::Replace, aos.as_ref(), m.as_ref(), 1.0, Par::Seq);
    let schur: Vec<f64> = (0..out.len())
        .map(|q| {
            let j = out[q];
            a[(j, j)] - (0..k).map(|p| v[(q, p)] * aos[(q, p)]).sum::<f64>()
        })
        .collect();
    let mut best: Option<Cand> = None;
    for (p, &i) in s.iter().enumerate() {
        let wi = row.w_hat[i];
        let mpp = m[(p, p)];
        let cost = wi * wi / mpp;
        let scale = wi / mpp;
        for (q, &j) in out.iter().enumerate() {
            if group.is_some_and(|gw| j / gw != i / gw) {
                continue;
            }
            let vq = v[(q, p)];
            let gj = row.g[j] - scale * vq;
            let sj = schur[q] + vq * vq / mpp;
            if !(sj > 0.0) {
                continue;
            }
            let delta = cost - gj * gj / sj;
            if best.is_none_or(|b| delta < b.delta) {
                best = Some(Cand { delta, out: i, inn: j });
            }
        }
    }
    best
}

/// Flip the support for the swap `c` (`i` out, `j` in at value 0), keeping
/// `g = A (ŵ − w)` consistent; the caller refits the row, which lands on
/// `f(S) + c.delta`.
pub(crate) fn flip(a: MatRef<'_, f64>, row: &mut RowMut<'_>, c: Cand) {
    let wi = row.w_hat[c.out];
    super::refit::axpy(row.g, -wi, col(a, c.out));
    row.w_hat[c.out] = 0.0;
    row.keep[c.out] = false;
    row.keep[c.inn] = true;
}
