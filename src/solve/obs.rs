//! The one-shot Optimal Brain Surgeon sweep, column by column.
//!
//! Optimal Brain Surgeon (Hassibi & Stork 1993) removes weight `j` of a row
//! and compensates the others with the exact least-squares update
//!
//! ```text
//! δw = −(w_j / [A⁻¹]_jj) · A⁻¹ e_j,     cost  w_j² / [A⁻¹]_jj
//! ```
//!
//! where `A⁻¹` is the inverse of `A` restricted to the weights still free.
//! The column-sequential form (Frantar & Alistarh 2023, "SparseGPT") visits
//! the inputs in order `0, 1, …, d_in−1`; once column `j` is decided it is
//! frozen, so the free set after `j` is `{j+1, …}` for every row and the
//! rows share one sequence of inverses. With the upper Cholesky factor
//! `A⁻¹ = Uᵀ U`, row `j` of `U` divided by `U_jj` is exactly the OBS
//! direction on the free set `{j, …}`, and `U_jj² = [A_{j:,j:}⁻¹]_jj`. So
//! deciding column `j` (keep: `q = w_j`, prune: `q = 0`) is
//!
//! ```text
//! err = (w_j − q) / U_jj,    w_{j+1:} −= err · U_{j, j+1:}
//! ```
//!
//! Updates inside a block of columns are applied at once; the block's errors
//! then update every later column with one matrix product
//! `W_{:, b1:} −= Err · U_{b0:b1, b1:}`.
//!
//! The mask is chosen by the saliency `w_j² / U_jj²` of the current weights:
//! at the start of each block for unstructured patterns (each row, or the
//! whole block for per-layer scope, prunes its cumulative share of the budget
//! so the totals are exact) and at the start of each group for N:M.

use super::budget;
use super::mask::top_k;
use super::{Pattern, Pruned, Scope, SolveError, SolveInfo};
use faer::linalg::matmul::matmul;
use faer::linalg::solvers::DenseSolveCore;
use faer::{Accum, Mat, MatRef, Par, Side};

/// Upper-triangular `U` with `A⁻¹ = Uᵀ U`; `lambda` is the ridge in `A`,
/// reported in the error.
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `A` (or its inverse) cannot be
/// factored.
pub fn inverse_cholesky_upper(a: MatRef<'_, f64>, lambda: f64) -> Result<Mat<f64>, SolveError> {
    let npd = || SolveError::NotPositiveDefinite { lambda, row: None };
    let inv = a.llt(Side::Lower).map_err(|_| npd())?.inverse();
    let l = inv.llt(Side::Lower).map_err(|_| npd())?;
    Ok(l.L().transpose().to_owned())
}

/// Zeros row `r` should have after the first `c` of `d_in` columns, so that
/// the per-block counts add up exactly to `total`.
fn cumulative_share(total: usize, c: usize, d_in: usize) -> usize {
    ((total as u128 * c as u128 + d_in as u128 / 2) / d_in as u128) as usize
}

/// Run the sweep. `a` is the ridge-regularised Gram matrix `H + λI` and
/// `lambda` its ridge λ (reported in errors and in [`SolveInfo::lambda`]).
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `a` cannot be factored.
pub fn sweep(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    lambda: f64,
    pattern: Pattern,
    block: usize,
    par: Par,
) -> Result<Pruned, SolveError> {
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let u = inverse_cholesky_upper(a, lambda)?;
    let mut w = w.to_owned();
    let block = match pattern {
        Pattern::NofM { m, .. } => block.max(m).div_ceil(m) * m,
        _ => block.max(1),
    };
    let mut keep = vec![true; d_out * d_in]; // column-major: keep[c * d_out + r]
    let mut b0 = 0;
    while b0 < d_in {
        let b1 = (b0 + block).min(d_in);
        let bw = b1 - b0;
        if let Pattern::Unstructured { sparsity, scope } = pattern {
            choose_block(&w, &u, &mut keep, b0, b1, sparsity, scope);
        }
        let mut err = Mat::<f64>::zeros(d_out, bw);
        for j in b0..b1 {
            if let Pattern::NofM { n, m } = pattern {
                if j % m == 0 {
                    choose_group(&w, &u, &mut keep, j, n, m);
                }
            }
            let ujj = u[(j, j)];
            for r in 0..d_out {
                let wj = w[(r, j)];
                let q = if keep[j * d_out + r] { wj } else { 0.0 };
                let e = (wj - q) / ujj;
                err[(r, j - b0)] = e;
                w[(r, j)] = q;
            }
            // w_{j+1:b1} −= err · U_{j, j+1:b1}, one column at a time.
            for jj in j + 1..b1 {
                let ujjj = u[(j, jj)];
                if ujjj != 0.0 {
                    for r in 0..d_out {
                        let e = err[(r, j - b0)];
                        w[(r, jj)] -= e * ujjj;
                    }
                }
            }
        }
        if b1 < d_in {
            let rest = w.as_mut().subcols_mut(b1, d_in - b1);
            matmul(
                rest,
                Accum::Add,
                err.as_ref(),
                u.as_ref().submatrix(b0, b1, bw, d_in - b1),
                -1.0,
                par,
            );
        }
        b0 = b1;
    }
    // Pruned entries are exactly zero; kept ones carry the compensation.
    for c in 0..d_in {
        for r in 0..d_out {
            if !keep[c * d_out + r] {
                w[(r, c)] = 0.0;
            }
        }
    }
    Ok(Pruned { weight: w, info: SolveInfo { lambda, ..SolveInfo::default() } })
}

/// Mark the lowest-saliency weights of columns `b0..b1` as pruned.
fn choose_block(
    w: &Mat<f64>,
    u: &Mat<f64>,
    keep: &mut [bool],
    b0: usize,
    b1: usize,
    sparsity: f64,
    scope: Scope,
) {
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let bw = b1 - b0;
    // Negated saliency, so `top_k` picks the cheapest weights to prune.
    let cost = |r: usize, j: usize| -(w[(r, j)] / u[(j, j)]).powi(2);
    match scope {
        Scope::Row => {
            let z = budget::zeros(sparsity, d_in);
            let prune = cumulative_share(z, b1, d_in) - cumulative_share(z, b0, d_in);
            for r in 0..d_out {
                let s: Vec<f64> = (b0..b1).map(|j| cost(r, j)).collect();
                for i in top_k(&s, prune) {
                    keep[(b0 + i) * d_out + r] = false;
                }
            }
        }
        Scope::Layer => {
            let z = budget::zeros(sparsity, d_out * d_in);
            let prune = cumulative_share(z, b1, d_in) - cumulative_share(z, b0, d_in);
            let s: Vec<f64> = (0..bw * d_out).map(|i| cost(i % d_out, b0 + i / d_out)).collect();
            for i in top_k(&s, prune) {
                keep[(b0 + i / d_out) * d_out + i % d_out] = false;
            }
        }
    }
}

/// Keep the `n` highest-saliency weights of group `j0..j0+m` in every row.
fn choose_group(w: &Mat<f64>, u: &Mat<f64>, keep: &mut [bool], j0: usize, n: usize, m: usize) {
    let d_out = w.nrows();
    for r in 0..d_out {
        let s: Vec<f64> = (j0..j0 + m).map(|j| -(w[(r, j)] / u[(j, j)]).powi(2)).collect();
        for i in top_k(&s, m - n) {
            keep[(j0 + i) * d_out + r] = false;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::SplitMix64;
    use crate::solve::mask::Mask;
    use crate::solve::regularised;

    fn gram(n: usize, d: usize, seed: u64) -> Mat<f64> {
        // Correlated inputs: x_j = z_j + 0.6 z_{j-1}, z uniform in [-½, ½).
        let mut rng = SplitMix64::new(seed);
        let z = Mat::from_fn(n, d, |_, _| rng.uniform() - 0.5);
        let x =
            Mat::from_fn(n, d, |i, j| z[(i, j)] + if j > 0 { 0.6 * z[(i, j - 1)] } else { 0.0 });
        x.transpose() * &x
    }

    /// Reference: the sequential OBS procedure with an explicit dense
    /// inverse of `A` restricted to the free columns at every step (faer's
    /// LU-based `inverse`, a different factorisation from the kernel's).
    fn reference(w: &Mat<f64>, a: &Mat<f64>, mask: &Mask) -> Mat<f64> {
        let (d_out, d) = (w.nrows(), w.ncols());
        let mut out = w.clone();
        for r in 0..d_out {
            let mut row: Vec<f64> = (0..d).map(|c| w[(r, c)]).collect();
            for j in 0..d {
                let free: Vec<usize> = (j..d).collect();
                let sub = Mat::from_fn(free.len(), free.len(), |p, q| a[(free[p], free[q])]);
                let inv = sub.partial_piv_lu().inverse();
                if !mask.get(r, j) {
                    // δw_free = −(w_j / inv_00) · inv[:, 0]
                    let scale = row[j] / inv[(0, 0)];
                    for (p, &c) in free.iter().enumerate() {
                        row[c] -= scale * inv[(p, 0)];
                    }
                    row[j] = 0.0;
                }
            }
            for c in 0..d {
                out[(r, c)] = row[c];
            }
        }
        out
    }

    #[test]
    fn sweep_matches_sequential_dense_inverses() {
        let d = 9;
        let h = gram(40, d, 7);
        let a = regularised(h.as_ref(), 0.05);
        let w = Mat::from_fn(3, d, |r, c| ((r * 7 + c * 5) % 11) as f64 / 5.0 - 1.0);
        for (pattern, block) in [
            (Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row }, 4),
            (Pattern::Unstructured { sparsity: 0.6, scope: Scope::Layer }, 3),
            (Pattern::Unstructured { sparsity: 0.3, scope: Scope::Row }, 128),
        ] {
            let got = sweep(w.as_ref(), a.as_ref(), 0.05, pattern, block, Par::Seq).unwrap();
            let mask = Mask::nonzeros(got.weight.as_ref());
            assert!(mask.conforms(pattern), "{pattern:?}");
            let want = reference(&w, &a, &mask);
            let diff = (&got.weight - &want).norm_max();
            let tol = 1e-10 * w.norm_max() * d as f64;
            assert!(diff <= tol, "{pattern:?}: max diff {diff:.3e} > {tol:.3e}");
        }
    }

    #[test]
    fn nm_sweep_conforms_and_matches_reference() {
        let d = 8;
        let a = regularised(gram(30, d, 3).as_ref(), 0.01);
        let w = Mat::from_fn(4, d, |r, c| ((r * 3 + c * 7) % 9) as f64 - 4.0);
        let p = Pattern::NofM { n: 2, m: 4 };
        let got = sweep(w.as_ref(), a.as_ref(), 0.01, p, 128, Par::Seq).unwrap();
        let mask = Mask::nonzeros(got.weight.as_ref());
        assert!(mask.conforms(p));
        assert_eq!(mask.count(), 4 * 4);
        let want = reference(&w, &a, &mask);
        assert!((&got.weight - &want).norm_max() <= 1e-9);
    }

    #[test]
    fn one_column_prune_equals_obs_formula() {
        // Pruning only the first column, whose free set is every column: the
        // classic OBS update with the full inverse,
        // δw = −(w_j/[A⁻¹]_jj) A⁻¹ e_j (Hassibi & Stork 1993).
        let a = faer::mat![[4.0, 1.0, 0.5], [1.0, 3.0, 0.2], [0.5, 0.2, 2.0]];
        let w = faer::mat![[0.1, 2.0, 1.0]];
        let p = Pattern::Unstructured { sparsity: 1.0 / 3.0, scope: Scope::Row };
        let got = sweep(w.as_ref(), a.as_ref(), 0.0, p, 128, Par::Seq).unwrap();
        let inv = a.partial_piv_lu().inverse();
        let s = 0.1 / inv[(0, 0)];
        let want = faer::mat![[0.0, 2.0 - s * inv[(1, 0)], 1.0 - s * inv[(2, 0)]]];
        assert!((&got.weight - &want).norm_max() < 1e-12, "{:?}", got.weight);
    }
}
