//! Exact refit of the kept weights of every row on a fixed support.
//!
//! For a row with dense weights `w`, support `S` and `b = A w`, the optimum of
//! `f(ŵ) = (w − ŵ)ᵀ A (w − ŵ)` over `ŵ` supported on `S` solves the normal
//! equations
//!
//! ```text
//! A_SS ŵ_S = b_S        ⇔   ŵ_S = w_S + A_SS⁻¹ A_{S,Sᶜ} w_{Sᶜ}
//! ```
//!
//! and after it the gradient `g = A ŵ − b = A (ŵ − w)` vanishes on `S`. Two
//! ways to solve it:
//!
//! - [`cholesky_row`]: gather `A_SS`, factor it (faer `llt`), solve. Cost
//!   `k³/3 + k·d_in` per row (the second term rebuilds `g = A_{:,S} ŵ_S − b`
//!   exactly, so `g` carries no accumulated update error). Used for the rows
//!   keeping at most [`crate::solve::L0Params::chol_limit`] weights.
//! - [`pcg`]: preconditioned conjugate gradients on all rows at once. One
//!   iteration is one dense product `Q = P A` of the masked search directions
//!   (`d_out x d_in` times `d_in x d_in`, faer matmul), a Jacobi
//!   preconditioner `1/A_jj`, per-row step lengths, warm start from the
//!   current `ŵ`. A row stops when `‖g_S‖ ≤ tol · ‖b_S‖`; its direction is
//!   then zeroed so it costs nothing further. CG with exact line search
//!   decreases `f` at every step, so a refit never raises the objective.
//!   After the last iteration `G = Ŵ A − B` of the refit rows is recomputed
//!   in f64 with one product so the recursively updated gradient does not
//!   drift. Capped refits (between sweeps) may run the products in f32.
//!
//! [`refit_rows`] sends each row to one of the two by its support size.
//!
//! All accumulation is in f64: the Gram matrix, the products and the dot
//! products that give step lengths and objectives.

use super::{col, for_each, Problem, State};
use crate::solve::{SolveError, SolveParams};
use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::cholesky::llt::factor::{
    cholesky_in_place, cholesky_in_place_scratch, LltError, LltRegularization,
};
use faer::linalg::cholesky::llt::solve as llt_solve;
use faer::linalg::matmul::matmul;
use faer::{Accum, Conj, Mat, MatMut, MatRef, Par};

/// `g = A_{:,S} ŵ_S − b` and `f = (ŵ − w)ᵀ g` for one row, from scratch.
pub(crate) fn gradient_row(
    a: MatRef<'_, f64>,
    w: &[f64],
    b: &[f64],
    w_hat: &[f64],
    keep: &[bool],
    g: &mut [f64],
) -> f64 {
    for (gj, bj) in g.iter_mut().zip(b) {
        *gj = -bj;
    }
    for (c, (&x, &k)) in w_hat.iter().zip(keep).enumerate() {
        if k && x != 0.0 {
            axpy(g, x, col(a, c));
        }
    }
    row_objective(w, w_hat, g)
}

/// `f = (ŵ − w)ᵀ g`, which equals `(ŵ − w)ᵀ A (ŵ − w)` when `g = A (ŵ − w)`.
pub(crate) fn row_objective(w: &[f64], w_hat: &[f64], g: &[f64]) -> f64 {
    let f: f64 = w_hat.iter().zip(w).zip(g).map(|((x, y), gj)| (x - y) * gj).sum();
    // Rounding can leave a tiny negative value at an exact fit.
    f.max(0.0)
}

/// `y += α x`.
#[inline]
pub(crate) fn axpy(y: &mut [f64], alpha: f64, x: &[f64]) {
    for (yi, xi) in y.iter_mut().zip(x) {
        *yi += alpha * xi;
    }
}

/// Factor the SPD matrix `m` in place as `L Lᵀ` (lower triangle),
/// sequentially: rows are the parallel dimension, so a per-row
/// factorisation must not spawn work of its own.
///
/// # Errors
/// [`LltError::NonPositivePivot`] when a pivot is not positive.
pub(crate) fn llt_in_place(m: MatMut<'_, f64>) -> Result<(), LltError> {
    let n = m.nrows();
    let mut buf = MemBuffer::new(cholesky_in_place_scratch::<f64>(n, Par::Seq, Default::default()));
    cholesky_in_place(
        m,
        LltRegularization::default(),
        Par::Seq,
        MemStack::new(&mut buf),
        Default::default(),
    )
    .map(|_| ())
}

/// Solve `L Lᵀ X = R` in place with the factor from [`llt_in_place`].
pub(crate) fn llt_solve_in_place(l: MatRef<'_, f64>, rhs: MatMut<'_, f64>) {
    let mut buf = MemBuffer::new(StackReq::EMPTY);
    llt_solve::solve_in_place_with_conj(l, Conj::No, rhs, Par::Seq, MemStack::new(&mut buf));
}

/// Refit one row by a dense Cholesky solve of `A_SS ŵ_S = b_S`; rebuilds
/// `g` and returns the row objective.
///
/// # Errors
/// [`LltError::NonPositivePivot`] when `A_SS` cannot be factored.
pub(crate) fn cholesky_row(
    a: MatRef<'_, f64>,
    w: &[f64],
    b: &[f64],
    w_hat: &mut [f64],
    keep: &[bool],
    g: &mut [f64],
) -> Result<f64, LltError> {
    let s: Vec<usize> = (0..keep.len()).filter(|&c| keep[c]).collect();
    w_hat.fill(0.0);
    if !s.is_empty() {
        let k = s.len();
        let mut l = Mat::from_fn(k, k, |p, q| a[(s[p], s[q])]);
        let mut x = Mat::from_fn(k, 1, |p, _| b[s[p]]);
        llt_in_place(l.as_mut())?;
        llt_solve_in_place(l.as_ref(), x.as_mut());
        for (p, &c) in s.iter().enumerate() {
            w_hat[c] = x[(p, 0)];
        }
    }
    Ok(gradient_row(a, w, b, w_hat, keep, g))
}

/// Rows refit by CG (support larger than the Cholesky limit) among `rows`.
pub(crate) fn cg_rows(keep: &[bool], rows: &[bool], d_in: usize, chol_max: usize) -> Vec<bool> {
    keep.chunks(d_in)
        .zip(rows)
        .map(|(k, &r)| r && k.iter().filter(|&&x| x).count() > chol_max)
        .collect()
}

/// Refit the rows flagged in `rows`: those keeping at most
/// [`crate::solve::L0Params::chol_limit`] weights exactly by per-row
/// Cholesky, the rest by batched CG warm-started from `ŵ`, capped at
/// `max_iter` iterations (or stopped at `cg_tol`). Returns CG iterations.
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when some `A_SS` cannot be factored;
/// it names the lowest such row.
pub(crate) fn refit_rows(
    prob: &Problem<'_>,
    state: &mut State,
    rows: &[bool],
    params: &SolveParams,
    max_iter: usize,
    par: Par,
) -> Result<usize, SolveError> {
    let d_in = prob.d_in;
    let by_cg = cg_rows(&state.keep, rows, d_in, params.l0.chol_limit(d_in));
    let failed = std::sync::Mutex::new(None::<usize>);
    let items: Vec<_> = state
        .w_hat
        .chunks_mut(d_in)
        .zip(state.g.chunks_mut(d_in))
        .zip(state.keep.chunks(d_in))
        .zip(state.f.iter_mut())
        .enumerate()
        .filter(|(r, _)| rows[*r] && !by_cg[*r])
        .collect();
    for_each(items, par, |(r, (((w_hat, g), keep), f))| {
        let rg = r * d_in..(r + 1) * d_in;
        match cholesky_row(prob.a, &prob.w[rg.clone()], &prob.b[rg], w_hat, keep, g) {
            Ok(v) => *f = v,
            Err(_) => {
                // The lowest failing row, whatever order the threads ran in.
                let mut first = failed.lock().unwrap();
                *first = Some(first.map_or(r, |q| q.min(r)));
            }
        }
    });
    if let Some(row) = failed.into_inner().unwrap() {
        return Err(SolveError::NotPositiveDefinite { lambda: prob.lambda, row: Some(row) });
    }
    if by_cg.contains(&true) {
        // The capped refits run their products in f32; the final one in f64
        // (an f32 pass to 1e-4 first saved nothing: CG restarted in f64
        // needed as many iterations from there to 1e-6).
        let single = max_iter < params.l0.cg_max_iter;
        Ok(pcg(prob, state, &by_cg, params.l0.cg_tol, max_iter, single, par))
    } else {
        Ok(0)
    }
}

/// Row-major view of a `rows x cols` slice.
fn view(x: &[f64], rows: usize, cols: usize) -> MatRef<'_, f64> {
    MatRef::from_row_major_slice(x, rows, cols)
}

fn view_mut(x: &mut [f64], rows: usize, cols: usize) -> MatMut<'_, f64> {
    MatMut::from_row_major_slice_mut(x, rows, cols)
}

/// `G = Ŵ A − B` for all rows (one product) and the row objectives.
pub(crate) fn gradient_all(prob: &Problem<'_>, state: &mut State, par: Par) {
    let (d_out, d_in) = (prob.d_out, prob.d_in);
    for (gj, bj) in state.g.iter_mut().zip(prob.b.iter()) {
        *gj = -bj;
    }
    matmul(
        view_mut(&mut state.g, d_out, d_in),
        Accum::Add,
        view(&state.w_hat, d_out, d_in),
        prob.a,
        1.0,
        par,
    );
    for (r, gr) in state.g.chunks_mut(d_in).enumerate() {
        state.f[r] = row_objective(
            &prob.w[r * d_in..(r + 1) * d_in],
            &state.w_hat[r * d_in..(r + 1) * d_in],
            gr,
        );
    }
}

/// As [`gradient_all`] for the rows flagged in `rows` only (one product of
/// those rows with `A`).
pub(crate) fn gradient_rows(prob: &Problem<'_>, state: &mut State, rows: &[bool], par: Par) {
    let (d_out, d_in) = (prob.d_out, prob.d_in);
    let ids: Vec<usize> = (0..d_out).filter(|&r| rows[r]).collect();
    if ids.len() == d_out {
        return gradient_all(prob, state, par);
    }
    let n = ids.len();
    let mut x = vec![0.0; n * d_in];
    for (slot, &r) in ids.iter().enumerate() {
        x[slot * d_in..(slot + 1) * d_in].copy_from_slice(&state.w_hat[r * d_in..(r + 1) * d_in]);
    }
    let mut q = vec![0.0; n * d_in];
    matmul(view_mut(&mut q, n, d_in), Accum::Replace, view(&x, n, d_in), prob.a, 1.0, par);
    for (slot, &r) in ids.iter().enumerate() {
        let rg = r * d_in..(r + 1) * d_in;
        for ((gj, qj), bj) in state.g[rg.clone()]
            .iter_mut()
            .zip(&q[slot * d_in..(slot + 1) * d_in])
            .zip(&prob.b[rg.clone()])
        {
            *gj = qj - bj;
        }
        state.f[r] = row_objective(&prob.w[rg.clone()], &state.w_hat[rg.clone()], &state.g[rg]);
    }
}

/// Batched Jacobi-preconditioned CG on all rows with `rows[r]` set, warm
/// started from `state.w_hat` (which must be zero off the support and have a
/// consistent `state.g`). Returns the iterations run. Rows not flagged are
/// left untouched. With `single`, the products `P A` run in f32 (with `A`
/// rounded): the step lengths and `g` then carry f32 rounding, so this is
/// for the capped refits between sweeps only; `g` and `f` are recomputed in
/// f64 at the end either way, so the state stays exact for the swaps.
///
/// Search directions are stored only for rows still iterating (compacted as
/// rows converge), so the product `Q = P A` shrinks with the active set.
pub(crate) fn pcg(
    prob: &Problem<'_>,
    state: &mut State,
    rows: &[bool],
    tol: f64,
    max_iter: usize,
    single: bool,
    par: Par,
) -> usize {
    let (d_out, d_in) = (prob.d_out, prob.d_in);
    let inv = &prob.inv_diag;
    let masked_sq = |r: usize, x: &[f64], keep: &[bool]| -> f64 {
        let rg = r * d_in..(r + 1) * d_in;
        x[rg.clone()].iter().zip(&keep[rg]).filter(|(_, &k)| k).map(|(v, _)| v * v).sum()
    };
    // Active rows with their stop threshold ‖g_S‖² ≤ tol² ‖b_S‖² and r·z.
    let mut act: Vec<(usize, f64, f64)> = Vec::new();
    for r in (0..d_out).filter(|&r| rows[r]) {
        let thresh = tol * tol * masked_sq(r, &prob.b, &state.keep);
        if masked_sq(r, &state.g, &state.keep) > thresh {
            act.push((r, thresh, 0.0));
        }
    }
    let mut p = vec![0.0; act.len() * d_in];
    for (slot, (r, _, rz)) in act.iter_mut().enumerate() {
        // z = −g_S / diag(A); p = z; rz = (−g_S)·z.
        let (rg, pr) = (*r * d_in..(*r + 1) * d_in, &mut p[slot * d_in..(slot + 1) * d_in]);
        let mut s = 0.0;
        for ((pj, (&gj, &kj)), &ij) in
            pr.iter_mut().zip(state.g[rg.clone()].iter().zip(&state.keep[rg])).zip(inv)
        {
            if kj {
                *pj = -gj * ij;
                s += gj * gj * ij;
            }
        }
        *rz = s;
    }
    let mut q = vec![0.0; act.len() * d_in];
    let (mut p32, mut q32) = if single {
        (vec![0.0f32; act.len() * d_in], vec![0.0f32; act.len() * d_in])
    } else {
        (Vec::new(), Vec::new())
    };
    let mut iters = 0;
    while iters < max_iter && !act.is_empty() {
        iters += 1;
        let na = act.len();
        if single {
            for (x, &y) in p32[..na * d_in].iter_mut().zip(&p[..na * d_in]) {
                *x = y as f32;
            }
            matmul(
                MatMut::from_row_major_slice_mut(&mut q32[..na * d_in], na, d_in),
                Accum::Replace,
                MatRef::from_row_major_slice(&p32[..na * d_in], na, d_in),
                prob.a32.as_ref(),
                1.0f32,
                par,
            );
            for (x, &y) in q[..na * d_in].iter_mut().zip(&q32[..na * d_in]) {
                *x = y as f64;
            }
        } else {
            matmul(
                view_mut(&mut q[..na * d_in], na, d_in),
                Accum::Replace,
                view(&p[..na * d_in], na, d_in),
                prob.a,
                1.0,
                par,
            );
        }
        let mut next = 0;
        for slot in 0..na {
            let (r, thresh, rz) = act[slot];
            let rg = r * d_in..(r + 1) * d_in;
            let ps = slot * d_in..(slot + 1) * d_in;
            let pq: f64 = p[ps.clone()].iter().zip(&q[ps.clone()]).map(|(x, y)| x * y).sum();
            if pq.is_nan() || pq <= 0.0 {
                continue;
            }
            let alpha = rz / pq;
            // ŵ += α p (zero off S), g += α q (everywhere: g = A ŵ − b).
            axpy(&mut state.w_hat[rg.clone()], alpha, &p[ps.clone()]);
            axpy(&mut state.g[rg.clone()], alpha, &q[ps.clone()]);
            if masked_sq(r, &state.g, &state.keep) <= thresh {
                continue;
            }
            let mut s = 0.0;
            for ((&gj, &kj), &ij) in
                state.g[rg.clone()].iter().zip(&state.keep[rg.clone()]).zip(inv)
            {
                if kj {
                    s += gj * gj * ij;
                }
            }
            let beta = s / rz;
            // Row stays active: write its new direction into slot `next`.
            let pn = next * d_in;
            for (c, ((&gj, &kj), &ij)) in
                state.g[rg.clone()].iter().zip(&state.keep[rg.clone()]).zip(inv).enumerate()
            {
                p[pn + c] = if kj { -gj * ij + beta * p[ps.start + c] } else { 0.0 };
            }
            act[next] = (r, thresh, s);
            next += 1;
        }
        act.truncate(next);
    }
    gradient_rows(prob, state, rows, par);
    iters
}

#[cfg(test)]
mod tests {
    use super::super::tests::instance;
    use super::super::{Problem, State};
    use super::*;
    use faer::linalg::solvers::SolveLstsq;

    /// Reference: minimise ‖M (w − ŵ)‖² over ŵ supported on S with
    /// M = [X; sqrt(λ) I], i.e. the least-squares problem M_S ŵ_S ≈ M w,
    /// solved by faer's Householder QR (`Mat::qr().solve_lstsq`), which never
    /// forms A = MᵀM.
    fn lstsq_reference(x: &Mat<f64>, lambda: f64, w: &[f64], keep: &[bool]) -> Vec<f64> {
        let (n, d) = (x.nrows(), x.ncols());
        let m = Mat::from_fn(n + d, d, |i, j| {
            if i < n {
                x[(i, j)]
            } else if i - n == j {
                lambda.sqrt()
            } else {
                0.0
            }
        });
        let s: Vec<usize> = (0..d).filter(|&j| keep[j]).collect();
        let ms = Mat::from_fn(n + d, s.len(), |i, p| m[(i, s[p])]);
        let rhs = Mat::from_fn(n + d, 1, |i, _| (0..d).map(|j| m[(i, j)] * w[j]).sum::<f64>());
        let sol = ms.qr().solve_lstsq(rhs);
        let mut out = vec![0.0; d];
        for (p, &c) in s.iter().enumerate() {
            out[c] = sol[(p, 0)];
        }
        out
    }

    #[test]
    fn refit_names_the_lowest_failing_row() {
        // Hand-worked: A_{01} = [[1, 2], [2, 1]] has eigenvalues 1 ± 2 = 3, −1,
        // so rows 1 and 2, keeping inputs {0, 1}, cannot be refit; row 0,
        // keeping {0, 2} (A_SS = I), can. The error names row 1 and the λ
        // the problem was built with, under any thread count.
        let a = faer::mat![[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 1.0]];
        let w = Mat::from_fn(3, 3, |r, c| (r + c) as f64 - 1.5);
        let lambda = 0.25;
        let prob = Problem::new(w.as_ref(), a.as_ref(), lambda, Par::Seq);
        let keep = [true, false, true, true, true, false, true, true, false].to_vec();
        for par in [Par::Seq, Par::rayon(2)] {
            let mut st = State::from_support(&prob, keep.clone(), None, par);
            let params = crate::solve::SolveParams::default();
            let err = refit_rows(&prob, &mut st, &[true; 3], &params, 3, par).unwrap_err();
            assert_eq!(err, SolveError::NotPositiveDefinite { lambda, row: Some(1) });
        }
    }

    #[test]
    fn refit_matches_qr_least_squares() {
        let mut rng = crate::rng::SplitMix64::new(11);
        for trial in 0..12 {
            let d = 6 + trial % 7;
            let (x, w, lambda) =
                instance(&mut rng, 40, d, 3, if trial % 2 == 0 { 0.01 } else { 0.0 });
            let a = {
                let mut a = x.transpose() * &x;
                for j in 0..d {
                    a[(j, j)] += lambda;
                }
                a
            };
            let prob = Problem::new(w.as_ref(), a.as_ref(), lambda, Par::Seq);
            let keep: Vec<bool> = (0..3 * d).map(|_| rng.uniform() < 0.5).collect();
            // Both refit paths: per-row Cholesky and batched PCG.
            let mut chol = State::from_support(&prob, keep.clone(), None, Par::Seq);
            let mut cg = chol.clone();
            for r in 0..3 {
                let rg = r * d..(r + 1) * d;
                cholesky_row(
                    a.as_ref(),
                    &prob.w[rg.clone()],
                    &prob.b[rg.clone()],
                    &mut chol.w_hat[rg.clone()],
                    &chol.keep[rg.clone()],
                    &mut chol.g[rg],
                )
                .unwrap();
            }
            pcg(&prob, &mut cg, &[true; 3], 1e-13, 10 * d, false, Par::Seq);
            for r in 0..3 {
                let rg = r * d..(r + 1) * d;
                let want = lstsq_reference(&x, lambda, &prob.w[rg.clone()], &keep[rg.clone()]);
                let scale =
                    want.iter().chain(&prob.w[rg.clone()]).fold(0.0f64, |m, v| m.max(v.abs()));
                // QR backward error is O(ε κ(M_S)); the instances are mildly
                // conditioned, so 1e-9 relative leaves a wide margin.
                let tol = 1e-9 * scale.max(1.0);
                for (name, got) in
                    [("cholesky", &chol.w_hat[rg.clone()]), ("pcg", &cg.w_hat[rg.clone()])]
                {
                    let diff =
                        got.iter().zip(&want).map(|(p, q)| (p - q).abs()).fold(0.0, f64::max);
                    assert!(
                        diff <= tol,
                        "{name} trial {trial} row {r}: max diff {diff:.3e} > {tol:.3e}"
                    );
                    for (j, &v) in got.iter().enumerate() {
                        if !keep[r * d + j] {
                            assert_eq!(v, 0.0);
                        }
                    }
                }
            }
        }
    }
}
