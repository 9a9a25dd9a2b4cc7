//! Structured (group) pruning of one linear layer: which input *columns* to
//! keep, shared by every output row, and the exact refit of the rest.
//!
//! Removing FFN neurons (or attention heads) of a block removes input
//! columns of the consumer layer (e.g. `down_proj`, `d_out x d_in`). Columns
//! come in groups of `g` consecutive columns (`g = 1` for neurons, `g =
//! head_dim` for heads; group `k` is columns `k·g .. (k+1)·g`). With
//! `A = H + λI` ([`crate::solve::regularised`]) and `B = W A`, the problem is
//!
//! ```text
//! minimise over kept groups S (|S| = keep) and Ŵ (zero outside S's columns)
//!   f = Σ_rows (w − ŵ)ᵀ A (w − ŵ)
//! fixed S:  Ŵ_S = B_{:,S} A_SS⁻¹                          (exact refit)
//!           f(S) = tr(W A Wᵀ) − tr(B_S A_SS⁻¹ B_Sᵀ) = tr(W_{Sᶜ} (A/A_SS) W_{Sᶜ}ᵀ)
//! ```
//!
//! At a refit optimum with `M = A_SS⁻¹` and `U = Ŵ_S`:
//!
//! - **Removal (group OBS).** Removing group `I ⊂ S` costs
//!   `tr(U_I M_II⁻¹ U_Iᵀ)`, and the new refit is
//!   `M' = M − M_{:,I} M_II⁻¹ M_{I,:}`, `Ŵ' = Ŵ − U_I M_II⁻¹ M_{I,:}`
//!   (both exactly zero on `I`).
//! - **Addition.** With `P = M A_{S,Sᶜ}`, the residual gradient
//!   `G = Ŵ_S A_{S,Sᶜ} − B_{Sᶜ}` (zero on `S` at the optimum) and the Schur
//!   blocks `S_JJ = A_JJ − A_{J,S} P_{:,J}`, adding group `J` lowers `f` by
//!   `tr(S_JJ⁻¹ G_Jᵀ G_J)`; the new inverse is bordered,
//!   `M'' = M + q S_JJ⁻¹ qᵀ` and `Ŵ'' = Ŵ + G_J S_JJ⁻¹ qᵀ` with
//!   `q = [P_{:,J}; −I]` (so `J`'s new weights are `−G_J S_JJ⁻¹`).
//! - **Swap `I → J`** (remove then add), with `R = M_II⁻¹`, `X = R P_IJ`:
//!   `G'_J = G_J − U_I X`, `S'_JJ = S_JJ + P_IJᵀ X`, so
//!
//!   ```text
//!   Δ(I→J) = tr(R UᵀU_II) − tr(S'_JJ⁻¹ G'_Jᵀ G'_J)
//!   G'_Jᵀ G'_J = GᵀG_JJ − Xᵀ C_IJ − C_IJᵀ X + Xᵀ UᵀU_II X,   C = Uᵀ G
//!   ```
//!
//!   O(g³) per pair once `P`, `G`, `C` and the diagonal blocks of `UᵀU`,
//!   `GᵀG` are known (three matrix products per round).
//!
//! Methods ([`GroupMethod`]): the two score baselines (optionally refit),
//! greedy backward elimination with the exact removal cost, and a swap
//! local search from the greedy set. Greedy keeps `M` lazily as
//! `M0 − V Vᵀ` (one `g`-column block of `V` per removal) and recomputes
//! `M0 = A_SS⁻¹` and `Ŵ` from scratch every `⌈groups/8⌉` removals; `Ŵ`
//! itself is updated in place. A removal `t` steps after a refresh costs
//! `O(d_out·|S|·g + |S|·t·g²)` instead of the `O(|S|²·g)` of updating `M`.
//! The swap search prices every pair exactly each round, then applies the
//! best non-overlapping improving pairs one by one, each re-priced exactly
//! on the state the previous ones left (updated by the removal/addition
//! formulas above), and ends the round with an exact refit (Cholesky of
//! `A_SS`); a round that rounding made worse is undone and the search stops.
//! The returned weight is always the Cholesky refit of the returned set
//! ([`refit_columns`]) and its objective is recomputed from it; Swap returns
//! the greedy set if that refit came out worse, so `f` never increases.
//!
//! Everything is f64; the big products (`M A_{S,Sᶜ}`, `Ŵ A_{S,Sᶜ}`,
//! `Ŵᵀ G`, the rank-`g` updates) are faer matrix products run with `par`.
//!
//! Tests (against exhaustive enumeration with an independent solver) are in
//! `group_tests.rs`, with an ignored timing run.

use super::objective::objective;
use super::{regularised, ridge_lambda, SolveError};
use faer::linalg::matmul::matmul;
use faer::linalg::solvers::{DenseSolveCore, Solve};
use faer::{Accum, Mat, MatMut, MatRef, Par, Side};
use std::time::Instant;

/// How the kept groups are chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum GroupMethod {
    /// Keep the groups with the largest `‖W_{:,J}‖_F` (consumer column norm).
    Magnitude,
    /// Keep the groups with the largest `Σ_{j∈J} ‖W_{:,j}‖² H_jj`
    /// (activation-weighted norm).
    Scaled,
    /// Backward elimination: repeatedly remove the group whose removal
    /// raises `f` least, priced exactly (group OBS) at the refit optimum.
    Greedy,
    /// Greedy start, then swaps (one kept group out, one removed group in)
    /// priced exactly, accepted only when they lower `f`.
    Swap,
}

/// Settings of [`solve_groups`].
#[derive(Clone, Debug, PartialEq)]
pub struct GroupParams {
    /// Which method.
    pub method: GroupMethod,
    /// Magnitude and Scaled only: refit the kept columns exactly instead of
    /// only zeroing the others. Greedy and Swap always refit.
    pub refit: bool,
    /// Ridge strength α; `λ = α · mean(diag(H))`.
    pub ridge_alpha: f64,
    /// Swap only: maximum number of pricing rounds.
    pub max_rounds: usize,
    /// Swap only: wall-clock budget in seconds for the whole solve (checked
    /// between swaps and rounds; the greedy start always completes).
    pub max_seconds: Option<f64>,
}

impl Default for GroupParams {
    fn default() -> Self {
        GroupParams {
            method: GroupMethod::Swap,
            refit: true,
            ridge_alpha: 0.01,
            max_rounds: 50,
            max_seconds: None,
        }
    }
}

/// The result of [`solve_groups`].
#[derive(Clone, Debug)]
pub struct GroupSolution {
    /// Kept group indices, ascending.
    pub kept: Vec<usize>,
    /// The pruned weight, `d_out x d_in`, exactly zero outside kept columns.
    pub weight: Mat<f64>,
    /// Ridge λ added to the diagonal of `H`.
    pub lambda: f64,
    /// `f = Σ_rows (w − ŵ)ᵀ A (w − ŵ)` at the returned weight.
    pub objective: f64,
    /// `f` after the start (the greedy set, refit, for Swap; equal to
    /// `objective` for the other methods).
    pub objective_start: f64,
    /// Swap pricing rounds run.
    pub rounds: usize,
    /// Swaps accepted.
    pub swaps: usize,
}

/// A swap is accepted when it lowers `f` by more than `SWAP_TOL · f`.
const SWAP_TOL: f64 = 1e-10;

/// Choose `keep` groups of `group` consecutive input columns of `w`
/// (`d_out x d_in`) and return the pruned, refit weight. `h` is the Gram
/// matrix `XᵀX` of the layer's calibration inputs (no ridge).
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `A = H + λI` (or one of its
/// principal blocks) cannot be factored.
///
/// # Panics
/// When `group` is 0 or does not divide `d_in`, `keep > d_in / group`, or
/// `h` is not `d_in x d_in`.
#[track_caller]
pub fn solve_groups(
    w: MatRef<'_, f64>,
    h: MatRef<'_, f64>,
    group: usize,
    keep: usize,
    params: &GroupParams,
    par: Par,
) -> Result<GroupSolution, SolveError> {
    let (d_out, d_in) = (w.nrows(), w.ncols());
    assert!(group >= 1 && d_in % group == 0, "group {group} must divide d_in {d_in}");
    let n_groups = d_in / group;
    assert!(keep <= n_groups, "keep {keep} exceeds the {n_groups} groups");
    assert!(h.nrows() == d_in && h.ncols() == d_in, "Gram matrix must be d_in x d_in");
    let start = Instant::now();
    let g = group;
    let lambda = ridge_lambda(h, params.ridge_alpha);
    let a = regularised(h, lambda);
    let mut sol = GroupSolution {
        kept: Vec::new(),
        weight: Mat::zeros(d_out, d_in),
        lambda,
        objective: 0.0,
        objective_start: 0.0,
        rounds: 0,
        swaps: 0,
    };
    if keep == n_groups {
        sol.kept = (0..n_groups).collect();
        sol.weight = w.to_owned();
        return Ok(sol);
    }
    let finish = |mut sol: GroupSolution, weight: Mat<f64>| {
        sol.objective = objective(w, weight.as_ref(), a.as_ref(), par);
        sol.weight = weight;
        sol
    };
    if keep == 0 {
        let f = objective(w, sol.weight.as_ref(), a.as_ref(), par);
        sol.objective = f;
        sol.objective_start = f;
        return Ok(sol);
    }
    match params.method {
        GroupMethod::Magnitude | GroupMethod::Scaled => {
            let score = |k: usize| -> f64 {
                (k * g..(k + 1) * g)
                    .map(|j| {
                        let n2: f64 = (0..d_out).map(|r| w[(r, j)] * w[(r, j)]).sum();
                        if params.method == GroupMethod::Scaled {
                            n2 * h[(j, j)].max(0.0)
                        } else {
                            n2
                        }
                    })
                    .sum()
            };
            let scores: Vec<f64> = (0..n_groups).map(score).collect();
            let mut order: Vec<usize> = (0..n_groups).collect();
            // Largest first; ties to the lower index (stable sort).
            order.sort_by(|&x, &y| scores[y].total_cmp(&scores[x]));
            let mut kept = order[..keep].to_vec();
            kept.sort_unstable();
            let cols = group_cols(&kept, g);
            let weight = if params.refit {
                refit_inner(w, a.as_ref(), None, &cols, lambda, par)?
            } else {
                let mut z = Mat::zeros(d_out, d_in);
                for &c in &cols {
                    z.col_mut(c).copy_from(w.col(c));
                }
                z
            };
            sol.kept = kept;
            let mut sol = finish(sol, weight);
            sol.objective_start = sol.objective;
            Ok(sol)
        }
        GroupMethod::Greedy | GroupMethod::Swap => {
            let mut b = Mat::<f64>::zeros(d_out, d_in);
            matmul(b.as_mut(), Accum::Replace, w, a.as_ref(), 1.0, par);
            let kept = greedy(a.as_ref(), b.as_ref(), g, keep, lambda, par)?;
            let cols = group_cols(&kept, g);
            let weight = refit_inner(w, a.as_ref(), Some(b.as_ref()), &cols, lambda, par)?;
            let f0 = objective(w, weight.as_ref(), a.as_ref(), par);
            sol.objective_start = f0;
            if params.method == GroupMethod::Greedy {
                sol.kept = kept;
                return Ok(finish(sol, weight));
            }
            let base: f64 =
                (0..d_in).map(|c| (0..d_out).map(|r| w[(r, c)] * b[(r, c)]).sum::<f64>()).sum();
            let prob = Problem { a: a.as_ref(), b: b.as_ref(), base, g, n_groups, lambda, par };
            let out = swap_search(&prob, kept.clone(), params, start)?;
            sol.rounds = out.rounds;
            sol.swaps = out.swaps;
            let mut kept2 = out.slots;
            kept2.sort_unstable();
            if kept2 == kept {
                sol.kept = kept;
                return Ok(finish(sol, weight));
            }
            let cols = group_cols(&kept2, g);
            let weight2 = refit_inner(w, a.as_ref(), Some(b.as_ref()), &cols, lambda, par)?;
            let f1 = objective(w, weight2.as_ref(), a.as_ref(), par);
            // Monotone even against rounding in the swap bookkeeping.
            if f1 <= f0 {
                sol.kept = kept2;
                sol.objective = f1;
                sol.weight = weight2;
                Ok(sol)
            } else {
                sol.kept = kept;
                Ok(finish(sol, weight))
            }
        }
    }
}

/// Exact refit of `w` on the columns `cols` of the ridge-regularised Gram
/// matrix `a`: `Ŵ_S = (W A)_{:,S} A_SS⁻¹` by a Cholesky factorisation of
/// `A_SS`, zero elsewhere.
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `A_SS` cannot be factored (with
/// `lambda: 0.0`: the ridge is already inside `a` and unknown here).
pub fn refit_columns(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    cols: &[usize],
    par: Par,
) -> Result<Mat<f64>, SolveError> {
    refit_inner(w, a, None, cols, 0.0, par)
}

/// [`refit_columns`] with `B = W A` when the caller has it, and the λ to
/// report.
fn refit_inner(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    b: Option<MatRef<'_, f64>>,
    cols: &[usize],
    lambda: f64,
    par: Par,
) -> Result<Mat<f64>, SolveError> {
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let mut out = Mat::<f64>::zeros(d_out, d_in);
    if cols.is_empty() {
        return Ok(out);
    }
    let llt = gather(a, cols, cols).llt(Side::Lower).map_err(|_| npd(lambda))?;
    // B_Sᵀ = A_{S,:} Wᵀ (A symmetric).
    let bst = match b {
        Some(b) => Mat::from_fn(cols.len(), d_out, |p, r| b[(r, cols[p])]),
        None => {
            let all: Vec<usize> = (0..d_in).collect();
            let mut t = Mat::<f64>::zeros(cols.len(), d_out);
            matmul(t.as_mut(), Accum::Replace, gather(a, cols, &all), w.transpose(), 1.0, par);
            t
        }
    };
    let x = llt.solve(bst);
    for (p, &c) in cols.iter().enumerate() {
        for r in 0..d_out {
            out[(r, c)] = x[(p, r)];
        }
    }
    Ok(out)
}

fn npd(lambda: f64) -> SolveError {
    SolveError::NotPositiveDefinite { lambda, row: None }
}

/// The columns of `groups`, in order.
pub(crate) fn group_cols(groups: &[usize], g: usize) -> Vec<usize> {
    groups.iter().flat_map(|&k| k * g..(k + 1) * g).collect()
}

/// `a[rows, cols]`.
fn gather(a: MatRef<'_, f64>, rows: &[usize], cols: &[usize]) -> Mat<f64> {
    Mat::from_fn(rows.len(), cols.len(), |i, j| a[(rows[i], cols[j])])
}

/// `A_SS⁻¹` for the columns `cols`.
fn inverse_block(a: MatRef<'_, f64>, cols: &[usize], lambda: f64) -> Result<Mat<f64>, SolveError> {
    Ok(gather(a, cols, cols).llt(Side::Lower).map_err(|_| npd(lambda))?.inverse())
}

// ---------------------------------------------------------------------------
// Small dense g x g helpers (row-major slices).

/// Cholesky `a = L Lᵀ` in place (lower triangle, row-major `g x g`); false
/// when a pivot is not positive.
pub(crate) fn chol(a: &mut [f64], g: usize) -> bool {
    for j in 0..g {
        let mut d = a[j * g + j];
        for k in 0..j {
            d -= a[j * g + k] * a[j * g + k];
        }
        if d.is_nan() || d <= 0.0 {
            return false;
        }
        let d = d.sqrt();
        a[j * g + j] = d;
        for i in j + 1..g {
            let mut s = a[i * g + j];
            for k in 0..j {
                s -= a[i * g + k] * a[j * g + k];
            }
            a[i * g + j] = s / d;
        }
    }
    true
}

/// Solve `L Lᵀ X = Y` in place for `Y` row-major `g x n`.
pub(crate) fn chol_solve(l: &[f64], y: &mut [f64], g: usize, n: usize) {
    for i in 0..g {
        for k in 0..i {
            let lik = l[i * g + k];
            for c in 0..n {
                y[i * n + c] -= lik * y[k * n + c];
            }
        }
        let d = l[i * g + i];
        for c in 0..n {
            y[i * n + c] /= d;
        }
    }
    for i in (0..g).rev() {
        for k in i + 1..g {
            let lki = l[k * g + i];
            for c in 0..n {
                y[i * n + c] -= lki * y[k * n + c];
            }
        }
        let d = l[i * g + i];
        for c in 0..n {
            y[i * n + c] /= d;
        }
    }
}

/// `tr(L⁻ᵀ L⁻¹ Y)` for `Y` row-major `g x g`; `scratch` has length `g²`.
fn trace_solve(l: &[f64], y: &[f64], g: usize, scratch: &mut [f64]) -> f64 {
    scratch.copy_from_slice(y);
    chol_solve(l, scratch, g, g);
    (0..g).map(|i| scratch[i * g + i]).sum()
}

/// The `g x g` diagonal blocks of the square `m`, row-major, one per slot.
pub(crate) fn diag_blocks(m: MatRef<'_, f64>, g: usize) -> Vec<f64> {
    let n = m.nrows() / g;
    let mut out = vec![0.0; n * g * g];
    for p in 0..n {
        for x in 0..g {
            for y in 0..g {
                out[p * g * g + x * g + y] = m[(p * g + x, p * g + y)];
            }
        }
    }
    out
}

/// The blocks `U_pᵀ U_p` of the column groups `p` of `u`, row-major.
pub(crate) fn gram_blocks(u: MatRef<'_, f64>, g: usize) -> Vec<f64> {
    let n = u.ncols() / g;
    let mut out = vec![0.0; n * g * g];
    for p in 0..n {
        for x in 0..g {
            let cx = u.col(p * g + x);
            for y in x..g {
                let v = cx.transpose() * u.col(p * g + y);
                out[p * g * g + x * g + y] = v;
                out[p * g * g + y * g + x] = v;
            }
        }
    }
    out
}

/// Group OBS removal costs `tr(M_II⁻¹ UᵀU_II)` from the diagonal blocks of
/// `M = A_SS⁻¹` and of `UᵀU` (`U = Ŵ_S`), one per slot; `+∞` for slots
/// marked in `skip` or whose `M_II` cannot be factored.
pub(crate) fn removal_costs(mblk: &[f64], kblk: &[f64], g: usize, skip: &[bool]) -> Vec<f64> {
    let gg = g * g;
    let (mut l, mut s) = (vec![0.0; gg], vec![0.0; gg]);
    (0..skip.len())
        .map(|p| {
            if skip[p] {
                return f64::INFINITY;
            }
            l.copy_from_slice(&mblk[p * gg..(p + 1) * gg]);
            if !chol(&mut l, g) {
                return f64::INFINITY;
            }
            trace_solve(&l, &kblk[p * gg..(p + 1) * gg], g, &mut s)
        })
        .collect()
}

/// Rows of `x` (`n x g`) times `L⁻ᵀ`: solves `Y Lᵀ = X` row by row.
fn times_inv_lt(x: MatRef<'_, f64>, l: &[f64], g: usize) -> Mat<f64> {
    let mut y = x.to_owned();
    for r in 0..y.nrows() {
        for i in 0..g {
            let mut s = y[(r, i)];
            for k in 0..i {
                s -= l[i * g + k] * y[(r, k)];
            }
            y[(r, i)] = s / l[i * g + i];
        }
    }
    y
}

// ---------------------------------------------------------------------------
// Greedy backward elimination.

/// Kept groups (ascending) after removing `n_groups − keep` groups one by
/// one, each the cheapest by the exact group OBS cost at the current refit.
fn greedy(
    a: MatRef<'_, f64>,
    b: MatRef<'_, f64>,
    g: usize,
    keep: usize,
    lambda: f64,
    par: Par,
) -> Result<Vec<usize>, SolveError> {
    let n_groups = a.nrows() / g;
    let d_out = b.nrows();
    let gg = g * g;
    let mut alive: Vec<usize> = (0..n_groups).collect();
    let mut left = n_groups - keep;
    let period = n_groups.div_ceil(8).max(1);
    while left > 0 {
        // Refresh: M0 = A_SS⁻¹, Ŵ = B_S M0 on the current set.
        let cols = group_cols(&alive, g);
        let s0 = cols.len();
        let m0 = inverse_block(a, &cols, lambda)?;
        let mut what = Mat::<f64>::zeros(d_out, s0);
        matmul(what.as_mut(), Accum::Replace, gather_cols(b, &cols), m0.as_ref(), 1.0, par);
        let mut mblk = diag_blocks(m0.as_ref(), g);
        let mut dead = vec![false; alive.len()];
        let batch = period.min(left);
        // M = M0 − V Vᵀ, one g-column block of V per removal.
        let mut v = Mat::<f64>::zeros(s0, batch * g);
        for t in 0..batch {
            let kblk = gram_blocks(what.as_ref(), g);
            let costs = removal_costs(&mblk, &kblk, g, &dead);
            let mut j = usize::MAX;
            for (p, &c) in costs.iter().enumerate() {
                if !dead[p] && (j == usize::MAX || c < costs[j]) {
                    j = p;
                }
            }
            // m = M_{:,J} = M0_{:,J} − V V_{J,:}ᵀ.
            let mut m = m0.as_ref().subcols(j * g, g).to_owned();
            if t > 0 {
                let vt = v.as_ref().subcols(0, t * g);
                matmul(m.as_mut(), Accum::Add, vt, vt.subrows(j * g, g).transpose(), -1.0, par);
            }
            let mut l: Vec<f64> = (0..gg).map(|i| m[(j * g + i / g, i % g)]).collect();
            if !chol(&mut l, g) {
                return Err(npd(lambda));
            }
            // v = M_{:,J} L⁻ᵀ (so M_{:,J} M_JJ⁻¹ M_{J,:} = v vᵀ), z = Ŵ_J L⁻ᵀ.
            let vn = times_inv_lt(m.as_ref(), &l, g);
            let z = times_inv_lt(what.as_ref().subcols(j * g, g), &l, g);
            matmul(what.as_mut(), Accum::Add, z.as_ref(), vn.transpose(), -1.0, par);
            what.as_mut().subcols_mut(j * g, g).fill(0.0);
            for p in 0..alive.len() {
                if dead[p] {
                    continue;
                }
                for x in 0..g {
                    for y in 0..g {
                        let mut s = 0.0;
                        for k in 0..g {
                            s += vn[(p * g + x, k)] * vn[(p * g + y, k)];
                        }
                        mblk[p * gg + x * g + y] -= s;
                    }
                }
            }
            v.as_mut().subcols_mut(t * g, g).copy_from(&vn);
            dead[j] = true;
        }
        left -= batch;
        alive = alive.iter().zip(&dead).filter(|(_, &d)| !d).map(|(&k, _)| k).collect();
    }
    Ok(alive)
}

/// `b[:, cols]`.
fn gather_cols(b: MatRef<'_, f64>, cols: &[usize]) -> Mat<f64> {
    Mat::from_fn(b.nrows(), cols.len(), |r, j| b[(r, cols[j])])
}

// ---------------------------------------------------------------------------
// Swap local search.

/// Fixed data of one solve.
pub(crate) struct Problem<'s> {
    pub a: MatRef<'s, f64>,
    /// `B = W A`.
    pub b: MatRef<'s, f64>,
    /// `tr(W A Wᵀ)`, the objective of removing everything.
    pub base: f64,
    pub g: usize,
    pub n_groups: usize,
    pub lambda: f64,
    pub par: Par,
}

/// A kept set in slot order with its refit: `M = A_SS⁻¹`, `Ŵ_S`, `f`.
#[derive(Clone)]
pub(crate) struct State {
    /// Group held by each slot (slot `p` is columns `p·g..(p+1)·g` of `M`
    /// and `Ŵ`).
    pub slots: Vec<usize>,
    pub cols: Vec<usize>,
    pub m: Mat<f64>,
    pub what: Mat<f64>,
    pub f: f64,
}

impl State {
    /// The exact refit of `slots`.
    pub(crate) fn exact(pb: &Problem<'_>, slots: Vec<usize>) -> Result<State, SolveError> {
        let cols = group_cols(&slots, pb.g);
        let m = inverse_block(pb.a, &cols, pb.lambda)?;
        let bs = gather_cols(pb.b, &cols);
        let mut what = Mat::<f64>::zeros(pb.b.nrows(), cols.len());
        matmul(what.as_mut(), Accum::Replace, bs.as_ref(), m.as_ref(), 1.0, pb.par);
        // f = tr(WAWᵀ) − tr(Ŵ_S B_Sᵀ) at the refit optimum.
        let mut fit = 0.0;
        for c in 0..cols.len() {
            fit += what.col(c).transpose() * bs.col(c);
        }
        Ok(State { slots, cols, m, what, f: (pb.base - fit).max(0.0) })
    }

    /// Groups not in the set, ascending.
    pub(crate) fn removed(&self, n_groups: usize) -> Vec<usize> {
        let mut inn = vec![false; n_groups];
        for &k in &self.slots {
            inn[k] = true;
        }
        (0..n_groups).filter(|&k| !inn[k]).collect()
    }
}

/// Exact `Δ f` of every swap (slot `p` out, removed group `rem[q]` in) at
/// the refit optimum `st`: entry `(p, q)`; `+∞` where a block is singular.
pub(crate) fn swap_prices(pb: &Problem<'_>, st: &State, rem: &[usize]) -> Mat<f64> {
    let (g, par) = (pb.g, pb.par);
    let gg = g * g;
    let s = st.cols.len();
    let rcols = group_cols(rem, g);
    let r = rcols.len();
    let a_sr = gather(pb.a, &st.cols, &rcols);
    let mut p = Mat::<f64>::zeros(s, r);
    matmul(p.as_mut(), Accum::Replace, st.m.as_ref(), a_sr.as_ref(), 1.0, par);
    // G = Ŵ_S A_{S,Sᶜ} − B_{Sᶜ}.
    let mut gm = gather_cols(pb.b, &rcols);
    matmul(gm.as_mut(), Accum::Replace, st.what.as_ref(), a_sr.as_ref(), 1.0, par);
    let bsc = gather_cols(pb.b, &rcols);
    gm -= &bsc;
    let mut c = Mat::<f64>::zeros(s, r);
    matmul(c.as_mut(), Accum::Replace, st.what.transpose(), gm.as_ref(), 1.0, par);
    // Schur blocks S_JJ = A_JJ − A_{J,S} P_{:,J}.
    let nr = rem.len();
    let mut sblk = vec![0.0; nr * gg];
    for q in 0..nr {
        for x in 0..g {
            for y in 0..g {
                let dot = a_sr.col(q * g + x).transpose() * p.col(q * g + y);
                sblk[q * gg + x * g + y] = pb.a[(rcols[q * g + x], rcols[q * g + y])] - dot;
            }
        }
    }
    let kblk = gram_blocks(st.what.as_ref(), g);
    let gblk = gram_blocks(gm.as_ref(), g);
    let mblk = diag_blocks(st.m.as_ref(), g);
    let ns = st.slots.len();
    let mut out = Mat::<f64>::from_fn(ns, nr, |_, _| f64::INFINITY);
    let mut lm = vec![0.0; gg];
    let mut tmp = vec![vec![0.0; gg]; 5];
    for sp in 0..ns {
        lm.copy_from_slice(&mblk[sp * gg..(sp + 1) * gg]);
        if !chol(&mut lm, g) {
            continue;
        }
        let kp = &kblk[sp * gg..(sp + 1) * gg];
        let cost = trace_solve(&lm, kp, g, &mut tmp[0]);
        for q in 0..nr {
            let [x, kx, gp, sp2, scratch] = &mut tmp[..] else { unreachable!() };
            // X = M_II⁻¹ P_IJ, then K X with K = UᵀU_II.
            for i in 0..g {
                for j in 0..g {
                    x[i * g + j] = p[(sp * g + i, q * g + j)];
                }
            }
            chol_solve(&lm, x, g, g);
            for k in 0..g {
                for j in 0..g {
                    kx[k * g + j] = (0..g).map(|t| kp[k * g + t] * x[t * g + j]).sum();
                }
            }
            // G'ᵀG' = GᵀG_JJ − XᵀC_IJ − C_IJᵀX + Xᵀ (K X);
            // S' = S_JJ + P_IJᵀ X.
            for i in 0..g {
                for j in 0..g {
                    let mut v = gblk[q * gg + i * g + j];
                    let mut sv = sblk[q * gg + i * g + j];
                    for k in 0..g {
                        let cki = c[(sp * g + k, q * g + i)];
                        let ckj = c[(sp * g + k, q * g + j)];
                        v += x[k * g + i] * (kx[k * g + j] - ckj) - cki * x[k * g + j];
                        sv += p[(sp * g + k, q * g + i)] * x[k * g + j];
                    }
                    gp[i * g + j] = v;
                    sp2[i * g + j] = sv;
                }
            }
            if !chol(sp2, g) {
                continue;
            }
            let gain = trace_solve(sp2, gp, g, scratch);
            out[(sp, q)] = cost - gain;
        }
    }
    out
}

/// Price the swap of slot `sp` for group `j` exactly on the current state
/// and apply it (updating `M`, `Ŵ`, the slot and `f`) when it lowers `f`
/// by more than `SWAP_TOL · f`. Returns the change applied.
pub(crate) fn try_swap(pb: &Problem<'_>, st: &mut State, sp: usize, j: usize) -> Option<f64> {
    let (g, par) = (pb.g, pb.par);
    let gg = g * g;
    let s = st.cols.len();
    let jcols: Vec<usize> = (j * g..(j + 1) * g).collect();
    let acol = gather(pb.a, &st.cols, &jcols);
    // P_{:,J} = M A_{S,J}; G_J = Ŵ A_{S,J} − B_J; S_JJ = A_JJ − A_{J,S} P_{:,J}.
    let mut pj = Mat::<f64>::zeros(s, g);
    matmul(pj.as_mut(), Accum::Replace, st.m.as_ref(), acol.as_ref(), 1.0, par);
    let mut gj = Mat::<f64>::zeros(pb.b.nrows(), g);
    matmul(gj.as_mut(), Accum::Replace, st.what.as_ref(), acol.as_ref(), 1.0, par);
    gj -= gather_cols(pb.b, &jcols);
    let mut sj = vec![0.0; gg];
    for x in 0..g {
        for y in 0..g {
            sj[x * g + y] = pb.a[(jcols[x], jcols[y])] - acol.col(x).transpose() * pj.col(y);
        }
    }
    let ui = st.what.as_ref().subcols(sp * g, g).to_owned();
    let kblk = gram_blocks(ui.as_ref(), g);
    let mut lm: Vec<f64> = (0..gg).map(|i| st.m[(sp * g + i / g, sp * g + i % g)]).collect();
    if !chol(&mut lm, g) {
        return None;
    }
    let mut scratch = vec![0.0; gg];
    let cost = trace_solve(&lm, &kblk, g, &mut scratch);
    // X = R P_IJ (row-major g x g), R = M_II⁻¹.
    let pij: Vec<f64> = (0..gg).map(|i| pj[(sp * g + i / g, i % g)]).collect();
    let mut x = pij.clone();
    chol_solve(&lm, &mut x, g, g);
    let xm = Mat::from_fn(g, g, |i, k| x[i * g + k]);
    let mut gp = gj.clone();
    matmul(gp.as_mut(), Accum::Add, ui.as_ref(), xm.as_ref(), -1.0, par);
    let mut sprime = sj.clone();
    for i in 0..g {
        for k in 0..g {
            let mut v = 0.0;
            for t in 0..g {
                v += pij[t * g + i] * x[t * g + k];
            }
            sprime[i * g + k] += v;
        }
    }
    let gpg = gram_blocks(gp.as_ref(), g);
    let mut ls = sprime.clone();
    if !chol(&mut ls, g) {
        return None;
    }
    let gain = trace_solve(&ls, &gpg, g, &mut scratch);
    let delta = cost - gain;
    if delta.is_nan() || delta >= -SWAP_TOL * st.f {
        return None;
    }
    // Remove I: M' = M − M_{:,I} R M_{I,:}, Ŵ' = Ŵ − U_I R M_{I,:}.
    let mi = st.m.as_ref().subcols(sp * g, g).to_owned();
    let rmi = solve_rows(mi.as_ref(), &lm, g); // M_{:,I} R
    let rui = solve_rows(ui.as_ref(), &lm, g); // U_I R
    matmul(st.m.as_mut(), Accum::Add, rmi.as_ref(), mi.transpose(), -1.0, par);
    matmul(st.what.as_mut(), Accum::Add, rui.as_ref(), mi.transpose(), -1.0, par);
    // q = P' − E_I with P' = M' A_{S,J} = P_{:,J} − M_{:,I} R P_IJ.
    let pijm = Mat::from_fn(g, g, |i, k| pij[i * g + k]);
    let mut qm = pj;
    matmul(qm.as_mut(), Accum::Add, rmi.as_ref(), pijm.as_ref(), -1.0, par);
    zero_slot(st.m.as_mut(), sp, g);
    st.what.as_mut().subcols_mut(sp * g, g).fill(0.0);
    for i in 0..g {
        for k in 0..g {
            qm[(sp * g + i, k)] = if i == k { -1.0 } else { 0.0 };
        }
    }
    // Add J: M'' = M' + q S'⁻¹ qᵀ, Ŵ'' = Ŵ' + G'_J S'⁻¹ qᵀ.
    let qs = solve_rows(qm.as_ref(), &ls, g);
    let gs = solve_rows(gp.as_ref(), &ls, g);
    matmul(st.m.as_mut(), Accum::Add, qs.as_ref(), qm.transpose(), 1.0, par);
    matmul(st.what.as_mut(), Accum::Add, gs.as_ref(), qm.transpose(), 1.0, par);
    st.slots[sp] = j;
    st.cols[sp * g..(sp + 1) * g].copy_from_slice(&jcols);
    st.f = (st.f + delta).max(0.0);
    Some(delta)
}

/// Rows of `x` (`n x g`) times `(L Lᵀ)⁻¹`.
fn solve_rows(x: MatRef<'_, f64>, l: &[f64], g: usize) -> Mat<f64> {
    let mut y = x.to_owned();
    let mut row = vec![0.0; g];
    for r in 0..y.nrows() {
        for i in 0..g {
            row[i] = y[(r, i)];
        }
        chol_solve(l, &mut row, g, 1);
        for i in 0..g {
            y[(r, i)] = row[i];
        }
    }
    y
}

/// Zero rows and columns of slot `sp` of the square `m`.
fn zero_slot(mut m: MatMut<'_, f64>, sp: usize, g: usize) {
    m.as_mut().subcols_mut(sp * g, g).fill(0.0);
    m.subrows_mut(sp * g, g).fill(0.0);
}

/// What the swap search did.
pub(crate) struct SwapOutcome {
    pub slots: Vec<usize>,
    pub rounds: usize,
    pub swaps: usize,
}

/// Local search over swaps from the kept set `start`.
fn swap_search(
    pb: &Problem<'_>,
    start: Vec<usize>,
    params: &GroupParams,
    t0: Instant,
) -> Result<SwapOutcome, SolveError> {
    let out_of_time = || params.max_seconds.is_some_and(|s| t0.elapsed().as_secs_f64() >= s);
    let mut st = State::exact(pb, start)?;
    let (mut rounds, mut swaps) = (0, 0);
    while rounds < params.max_rounds && !out_of_time() {
        rounds += 1;
        let rem = st.removed(pb.n_groups);
        if rem.is_empty() || st.slots.is_empty() {
            break;
        }
        let prices = swap_prices(pb, &st, &rem);
        let tol = SWAP_TOL * st.f;
        let mut cand: Vec<(f64, usize, usize)> = Vec::new();
        for sp in 0..prices.nrows() {
            for q in 0..prices.ncols() {
                let d = prices[(sp, q)];
                if d < -tol {
                    cand.push((d, sp, q));
                }
            }
        }
        if cand.is_empty() {
            break;
        }
        cand.sort_by(|x, y| x.0.total_cmp(&y.0));
        let before = st.clone();
        let (mut used_s, mut used_q) = (vec![false; prices.nrows()], vec![false; rem.len()]);
        let mut applied = 0;
        for &(_, sp, q) in &cand {
            if used_s[sp] || used_q[q] {
                continue;
            }
            if applied > 0 && out_of_time() {
                break;
            }
            used_s[sp] = true;
            used_q[q] = true;
            if try_swap(pb, &mut st, sp, rem[q]).is_some() {
                applied += 1;
            }
        }
        if applied == 0 {
            break;
        }
        // Exact refit of the new set; undo the round if rounding made it worse.
        let fresh = State::exact(pb, st.slots.clone())?;
        if fresh.f > before.f {
            st = before;
            break;
        }
        st = fresh;
        swaps += applied;
    }
    Ok(SwapOutcome { slots: st.slots, rounds, swaps })
}

#[cfg(test)]
#[path = "group_tests.rs"]
mod tests;
