//! L0-constrained ridge least squares by exact refits and swap local search.
//!
//! Per output row `w` (a row of `W`, length `d_in`) with `A = H + λI`:
//!
//! ```text
//! minimise  f(ŵ) = (w − ŵ)ᵀ A (w − ŵ)   subject to the pattern:
//!   per row     ‖ŵ‖₀ ≤ k = kept(s, d_in) for every row
//!   per layer   Σ_rows ‖ŵ‖₀ ≤ K = kept(s, d_out·d_in), rows free to differ
//!   N:M         ≤ n nonzeros in every group of m consecutive inputs
//! ```
//!
//! **Refit** (`refit.rs`). On a fixed support `S` the optimum is
//! `ŵ_S = w_S + A_SS⁻¹ A_{S,Sᶜ} w_{Sᶜ}` (equivalently `A_SS ŵ_S = (A w)_S`)
//! with value `f(S) = w_{Sᶜ}ᵀ (A / A_SS) w_{Sᶜ}`, the Schur complement of
//! `A_SS` in `A`. With `e = ŵ − w` and `g = A e`, a refit optimum is exactly
//! `g_S = 0`. All rows' gradients at once are one product `G = (Ŵ − W) A`;
//! we precompute `B = W A` and keep `G = Ŵ A − B`.
//!
//! **Swaps** (`swap.rs`). Pruning `i` and keeping `j` at its best value with
//! the rest fixed changes `f` by
//! `Δ = −2ŵ_i g_i + ŵ_i² A_ii − (g_j − ŵ_i A_ij)² / A_jj` (new value
//! `t* = (ŵ_i A_ij − g_j)/A_jj`); O(1) per pair given `g`, and a change `δ`
//! of coordinate `c` updates `g += δ A_{:,c}`.
//!
//! **Swaps priced with the refit** (`exact.rs`). At a refit optimum, with
//! `M = A_SS⁻¹`, the exact change of `f(S)` for `i` out, `j` in is
//! `ŵ_i²/M_ii − g'_j²/s'_j` (OBS removal, then adding `j` with the Schur
//! complement `s'_j` of `A_jj` w.r.t. `S∖{i}`); the same block formulas
//! price several swaps at once. These cost `2 d_in k²` per row, so they run
//! only when the cheap swaps stall and only for `k ≤ exact_max_k`.
//!
//! **Refits, exact and capped.** A row keeping at most
//! [`crate::solve::L0Params::chol_limit`] weights is always refit exactly
//! (per-row Cholesky), so it sits at its refit optimum between sweeps. Rows
//! keeping more are refit together by batched CG warm-started from the
//! current `ŵ`, capped at `cg_sweep_iter` iterations (products in f32) for
//! the starts and between sweeps: each refit lowers `f` without reaching the
//! optimum, and the swap prices stay exact because they use the exact
//! gradient of the point the refit leaves (recomputed in f64). Those rows
//! get one final CG refit (f64) to `cg_tol` at the end: **the returned
//! weights of rows above the Cholesky limit are refit to `cg_tol`**
//! (relative residual `‖g_S‖ / ‖(A w)_S‖`), not to rounding. The moves
//! priced with the refit (`exact.rs`) need a refit optimum, so they only run
//! on rows refit by Cholesky (`k ≤ min(exact_max_k, chol_limit)`).
//!
//! **Algorithm** ([`solve`]):
//! 1. Starts: the support of the OBS sweep ([`crate::solve::obs::sweep`]),
//!    refit warm-started from its weights; then, only if every row of it is
//!    refit by Cholesky and `max_seconds` is not spent, the activation-scaled
//!    magnitude mask (`|w_ij|·sqrt(A_jj)`,
//!    [`crate::solve::baseline::scaled_scores`]), refit. Per row (per row and
//!    N:M) or for the whole layer (per-layer scope, whose row budgets differ
//!    between the starts) the better one is kept; [`SolveInfo::init`] says
//!    which: `"scaled+refit"`, `"obs+refit"` or `"mixed"`. (Large supports
//!    skip the scaled start: it costs a second refit of the layer and on a
//!    1536-wide layer at 50% it won 114 of 1536 rows for no change in the
//!    final error.)
//! 2. Sweeps: per-layer budget moves between rows (fixed-others prices;
//!    prices with the refit when those find nothing), then for every row
//!    still improving a batch of non-interacting swaps; a row where none
//!    improves tries the best move priced with the refit (a single swap, a
//!    pair of swaps, or an N:M group re-choice). Then a refit (exact or
//!    capped, above) of the rows that changed. A row with no improving move
//!    is a local optimum and is left alone (per-layer scope wakes rows
//!    touched by a budget move). Stops when no row improves or the budget
//!    ([`crate::solve::L0Params::max_sweeps`], `max_seconds`, checked after
//!    the starts and between sweeps) runs out.
//! 3. The final refit of the CG rows (always run, also when the budget ran
//!    out: it is what makes the returned weights refit to `cg_tol`).
//! 4. Each accepted move has `Δ < −tol` exactly and a refit (CG from a warm
//!    start included) lowers `f` on its support, so the objective never
//!    increases; a row that rounding made worse is restored from the copy
//!    taken before the sweep (and before the final refit).
//!    [`SolveInfo::phases`] records the wall-clock time of each phase.
//!
//! Rows are independent (except per-layer budget moves, which are cheap and
//! sequential), so swaps and per-row refits run over blocks of rows in
//! parallel with rayon when `par` allows, on `n` threads for
//! `Par::Rayon(n)`. The swap scoring is O(k·(d_in − k)) per row per sweep
//! and never inverts `A_SS`; its partner search runs in f32 (AVX2 when the
//! CPU has it) and every chosen pair is priced again in f64.
//!
//! Memory: `A` is borrowed and copied once to f32 (`d_in²` f32); the solver
//! keeps `W`, `B`, `Ŵ`, `G` and a copy of `Ŵ` (five `d_out x d_in` f64
//! matrices, plus a second `Ŵ, G` pair and the OBS sweep's own buffers while
//! the starts are built, and at most two more f64 and two f32 ones inside
//! the batched CG refit). Per thread, a Cholesky refit holds one `k x k`
//! matrix; nothing is `d_in²` per row.
//! Gradients, dot products and objectives are f64, which is what lets `Δ`
//! be trusted down to `tol`; only the partner search and the products of
//! the capped CG refits run in f32, and their results are recomputed in
//! f64 before any price or objective uses them.

pub(crate) mod exact;
pub(crate) mod refit;
pub(crate) mod swap;

use super::baseline::scaled_scores;
use super::mask::{select, top_k, Mask};
use super::{budget, obs, Pattern, Pruned, Scope, SolveError, SolveInfo, SolveParams};
use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, MatMut, MatRef, Par};
use rayon::prelude::*;
use std::time::Instant;
use swap::{Cand, RowMut};

/// Rows scored together against one column of `A` (cache blocking).
const ROW_BLOCK: usize = 16;

/// Rounds of cheap budget moves per sweep (per-layer scope).
const BUDGET_ROUNDS: usize = 16;

/// Column `c` of a column-major `A` as a slice.
#[inline]
pub(crate) fn col(a: MatRef<'_, f64>, c: usize) -> &'_ [f64] {
    a.col(c).try_as_col_major().expect("A must have unit row stride").as_slice()
}

/// Fixed data of one layer, rows stored row-major.
pub(crate) struct Problem<'s> {
    pub a: MatRef<'s, f64>,
    pub d_out: usize,
    pub d_in: usize,
    /// `W`, row-major.
    pub w: Vec<f64>,
    /// `B = W A`, row-major; row `r` is `A w_r`.
    pub b: Vec<f64>,
    /// `wᵀ A w` per row: the objective of pruning everything.
    pub dense: Vec<f64>,
    pub diag: Vec<f64>,
    pub inv_diag: Vec<f64>,
    /// `A` rounded to f32, for the partner search of the swap scoring.
    pub a32: Mat<f32>,
}

impl<'s> Problem<'s> {
    pub(crate) fn new(w: MatRef<'_, f64>, a: MatRef<'s, f64>, par: Par) -> Self {
        let (d_out, d_in) = (w.nrows(), w.ncols());
        let mut wr = vec![0.0; d_out * d_in];
        for r in 0..d_out {
            for c in 0..d_in {
                wr[r * d_in + c] = w[(r, c)];
            }
        }
        let mut b = vec![0.0; d_out * d_in];
        matmul(
            MatMut::from_row_major_slice_mut(&mut b, d_out, d_in),
            Accum::Replace,
            w,
            a,
            1.0,
            par,
        );
        let dense = (0..d_out)
            .map(|r| {
                let rg = r * d_in..(r + 1) * d_in;
                wr[rg.clone()].iter().zip(&b[rg]).map(|(x, y)| x * y).sum::<f64>().max(0.0)
            })
            .collect();
        let diag: Vec<f64> = (0..d_in).map(|j| a[(j, j)]).collect();
        let inv_diag = diag.iter().map(|&x| 1.0 / x).collect();
        let a32 = Mat::from_fn(d_in, d_in, |i, j| a[(i, j)] as f32);
        Problem { a, d_out, d_in, w: wr, b, dense, diag, inv_diag, a32 }
    }
}

/// The search state: current weights, gradient `G = Ŵ A − B`, support and
/// row objectives.
#[derive(Clone, Debug)]
pub(crate) struct State {
    pub w_hat: Vec<f64>,
    pub g: Vec<f64>,
    pub keep: Vec<bool>,
    pub f: Vec<f64>,
}

impl State {
    /// `ŵ = start ∘ keep` (`start` defaults to `W`), with its gradient.
    pub(crate) fn from_support(
        prob: &Problem<'_>,
        keep: Vec<bool>,
        start: Option<&[f64]>,
        par: Par,
    ) -> Self {
        let mut s = State::unrefined(prob, keep, start);
        refit::gradient_all(prob, &mut s, par);
        s
    }

    /// As [`State::from_support`] but without the gradient (one product of
    /// the layer with `A`): for states that a Cholesky refit rebuilds anyway.
    fn unrefined(prob: &Problem<'_>, keep: Vec<bool>, start: Option<&[f64]>) -> Self {
        let src = start.unwrap_or(&prob.w);
        let w_hat = keep.iter().zip(src).map(|(&k, &x)| if k { x } else { 0.0 }).collect();
        let n = keep.len();
        State { w_hat, g: vec![0.0; n], keep, f: vec![0.0; prob.d_out] }
    }

    fn total(&self) -> f64 {
        self.f.iter().sum()
    }
}

/// Wall-clock time per phase, accumulated.
#[derive(Default)]
struct Phases {
    done: Vec<(&'static str, f64)>,
    mark: Option<Instant>,
}

impl Phases {
    /// Charge the time since the previous call (or the start) to `name`.
    fn lap(&mut self, name: &'static str) {
        let now = Instant::now();
        let dt = self.mark.map_or(0.0, |m| (now - m).as_secs_f64());
        self.mark = Some(now);
        match self.done.iter_mut().find(|(n, _)| *n == name) {
            Some((_, t)) => *t += dt,
            None => self.done.push((name, dt)),
        }
    }
}

/// Run `f` on every item, in parallel when `par` allows: with
/// `Par::Rayon(n)` on `n` threads (the global rayon pool when it has that
/// size, else a pool of `n` threads built for the call, which costs far less
/// than the row work it runs).
fn for_each<T: Send>(items: Vec<T>, par: Par, f: impl Fn(T) + Sync + Send) {
    match par {
        Par::Seq => items.into_iter().for_each(f),
        Par::Rayon(n) if n.get() == 1 => items.into_iter().for_each(f),
        Par::Rayon(n) if n.get() == rayon::current_num_threads() => {
            items.into_par_iter().for_each(f)
        }
        Par::Rayon(n) => match rayon::ThreadPoolBuilder::new().num_threads(n.get()).build() {
            Ok(pool) => pool.install(|| items.into_par_iter().for_each(f)),
            Err(_) => items.into_par_iter().for_each(f),
        },
    }
}

/// Rows refit by CG (support larger than the Cholesky limit) among `rows`.
fn cg_rows(keep: &[bool], rows: &[bool], d_in: usize, chol_max: usize) -> Vec<bool> {
    keep.chunks(d_in)
        .zip(rows)
        .map(|(k, &r)| r && k.iter().filter(|&&x| x).count() > chol_max)
        .collect()
}

/// Refit the rows flagged in `rows`: those keeping at most
/// [`crate::solve::L0Params::chol_limit`] weights exactly by per-row
/// Cholesky, the rest by batched CG warm-started from `ŵ`, capped at
/// `max_iter` iterations (or stopped at `cg_tol`). Returns CG iterations.
fn refit_rows(
    prob: &Problem<'_>,
    state: &mut State,
    rows: &[bool],
    params: &SolveParams,
    max_iter: usize,
    par: Par,
) -> Result<usize, SolveError> {
    let d_in = prob.d_in;
    let by_cg = cg_rows(&state.keep, rows, d_in, params.l0.chol_limit(d_in));
    let err = std::sync::Mutex::new(None);
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
        match refit::cholesky_row(prob.a, &prob.w[rg.clone()], &prob.b[rg], w_hat, keep, g) {
            Ok(v) => *f = v,
            Err(e) => *err.lock().unwrap() = Some(e),
        }
    });
    if let Some(e) = err.into_inner().unwrap() {
        return Err(e);
    }
    if by_cg.iter().any(|&r| r) {
        // The capped refits run their products in f32; the final one in f64
        // (an f32 pass to 1e-4 first saved nothing: CG restarted in f64
        // needed as many iterations from there to 1e-6).
        let single = max_iter < params.l0.cg_max_iter;
        Ok(refit::pcg(prob, state, &by_cg, params.l0.cg_tol, max_iter, single, par))
    } else {
        Ok(0)
    }
}

/// Make the support hold exactly the budget (per row / per layer) or at
/// most `n` per group, topping up with the highest `scores`. Needed when a
/// start leaves kept weights at exactly zero.
fn complete_support(keep: &mut [bool], scores: &Mat<f64>, pattern: Pattern) {
    let (d_out, d_in) = (scores.nrows(), scores.ncols());
    let free = |keep: &[bool], r: usize, c: usize| {
        if keep[r * d_in + c] {
            f64::NEG_INFINITY
        } else {
            scores[(r, c)]
        }
    };
    match pattern {
        Pattern::Unstructured { sparsity, scope: Scope::Row } => {
            let k = budget::kept(sparsity, d_in);
            for r in 0..d_out {
                let have = keep[r * d_in..(r + 1) * d_in].iter().filter(|&&x| x).count();
                if have < k {
                    let s: Vec<f64> = (0..d_in).map(|c| free(keep, r, c)).collect();
                    for c in top_k(&s, k - have) {
                        keep[r * d_in + c] = true;
                    }
                }
            }
        }
        Pattern::Unstructured { sparsity, scope: Scope::Layer } => {
            let k = budget::kept(sparsity, d_out * d_in);
            let have = keep.iter().filter(|&&x| x).count();
            if have < k {
                let s: Vec<f64> =
                    (0..d_out * d_in).map(|i| free(keep, i / d_in, i % d_in)).collect();
                for i in top_k(&s, k - have) {
                    keep[i] = true;
                }
            }
        }
        Pattern::NofM { .. } => {}
    }
}

/// Row-major support of a mask.
fn mask_support(mask: &Mask) -> Vec<bool> {
    (0..mask.rows()).flat_map(|r| mask.row(r).to_vec()).collect()
}

/// Solve the L0-constrained problem for every row of `w`; `a` is the
/// ridge-regularised Gram matrix.
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `A` (or some `A_SS`) cannot be
/// factored.
pub fn solve(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    params: &SolveParams,
    par: Par,
) -> Result<Pruned, SolveError> {
    let start = Instant::now();
    let owned;
    let a = if a.row_stride() == 1 {
        a
    } else {
        owned = a.to_owned();
        owned.as_ref()
    };
    let (d_out, d_in) = (w.nrows(), w.ncols());
    let pattern = params.pattern;
    let mut ph = Phases { mark: Some(start), ..Phases::default() };
    let prob = Problem::new(w, a, par);
    let all = vec![true; d_out];

    let scores = scaled_scores(w, a);
    // A start refit only by Cholesky needs no gradient beforehand; one with
    // CG rows needs it for the warm start.
    let chol_max = params.l0.chol_limit(d_in);
    let start_state = |keep: Vec<bool>, from: Option<&[f64]>| {
        if cg_rows(&keep, &all, d_in, chol_max).iter().any(|&r| r) {
            State::from_support(&prob, keep, from, par)
        } else {
            State::unrefined(&prob, keep, from)
        }
    };
    let out_of_time = || params.l0.max_seconds.is_some_and(|t| start.elapsed().as_secs_f64() >= t);
    ph.lap("setup");
    // Start (b): the OBS sweep's support, refit warm-started from its weights.
    let ob = obs::sweep(w, a, pattern, params.obs_block, par)?;
    ph.lap("obs sweep");
    let mut keep_b = mask_support(&Mask::nonzeros(ob.weight.as_ref()));
    complete_support(&mut keep_b, &scores, pattern);
    let ob_rm: Vec<f64> = (0..d_out * d_in).map(|i| ob.weight[(i / d_in, i % d_in)]).collect();
    drop(ob);
    let mut sb = start_state(keep_b, Some(&ob_rm));
    drop(ob_rm);
    let sweep_iter = params.l0.cg_sweep_iter;
    let mut cg_iters = refit_rows(&prob, &mut sb, &all, params, sweep_iter, par)?;
    ph.lap("start obs");
    // Start (a): the scaled magnitude mask, refit warm-started from `W` on
    // it. Skipped when the time budget is already spent, and when some row
    // of the OBS start is refit by CG: large supports, where the OBS start is
    // clearly better (on the 1536-wide benchmark at 50% the scaled start won
    // 114 of 1536 rows and the final error was the same without it) and a
    // second refit of the whole layer costs as much as the OBS sweep.
    let large = cg_rows(&sb.keep, &all, d_in, chol_max).iter().any(|&r| r);
    let sa = if out_of_time() || large {
        None
    } else {
        let mut sa = start_state(mask_support(&select(scores.as_ref(), pattern)), None);
        cg_iters += refit_rows(&prob, &mut sa, &all, params, sweep_iter, par)?;
        Some(sa)
    };
    drop(scores);
    ph.lap("start scaled");

    let layer = matches!(pattern, Pattern::Unstructured { scope: Scope::Layer, .. });
    let mut state;
    let init;
    match sa {
        None => (state, init) = (sb, "obs+refit"),
        Some(sa) if layer => {
            (state, init) =
                if sb.total() <= sa.total() { (sb, "obs+refit") } else { (sa, "scaled+refit") };
        }
        Some(sa) => {
            let mut took_a = 0;
            for r in 0..d_out {
                if sa.f[r] < sb.f[r] {
                    let rg = r * d_in..(r + 1) * d_in;
                    sb.w_hat[rg.clone()].copy_from_slice(&sa.w_hat[rg.clone()]);
                    sb.g[rg.clone()].copy_from_slice(&sa.g[rg.clone()]);
                    sb.keep[rg.clone()].copy_from_slice(&sa.keep[rg]);
                    sb.f[r] = sa.f[r];
                    took_a += 1;
                }
            }
            state = sb;
            init = match took_a {
                0 => "obs+refit",
                t if t == d_out => "scaled+refit",
                _ => "mixed",
            };
        }
    }

    let mut info = SolveInfo { init: Some(init), ..SolveInfo::default() };
    info.objective_initial = state.total();
    if params.l0.trace {
        info.trace.push(info.objective_initial);
    }
    let tol: Vec<f64> = prob.dense.iter().map(|&c| params.l0.swap_tol * c).collect();
    let layer_tol = params.l0.swap_tol * prob.dense.iter().sum::<f64>() / d_out.max(1) as f64;
    let mut active = vec![true; d_out];
    let mut prev_w = state.w_hat.clone();
    let mut prev_keep = state.keep.clone();
    let mut prev_f = state.f.clone();

    while info.sweeps < params.l0.max_sweeps {
        if let Some(limit) = params.l0.max_seconds {
            if start.elapsed().as_secs_f64() >= limit {
                break;
            }
        }
        prev_w.copy_from_slice(&state.w_hat);
        prev_keep.copy_from_slice(&state.keep);
        prev_f.copy_from_slice(&state.f);
        let mut changed = vec![false; d_out];
        ph.lap("sweep refits");

        // Rows a cheap budget move touched (no exact moves this sweep: not at
        // a refit optimum) and rows an exact budget move flipped (no moves at
        // all until refit: above their priced value until then).
        let mut flipped = vec![false; d_out];
        if layer {
            let exact_k = params.l0.exact_max_k.min(params.l0.chol_limit(d_in));
            let mut rows = rows_mut(&mut state, d_in);
            let mut moves = 0;
            let mut touched = Vec::new();
            // Several rounds, each re-pricing every row with its current g,
            // so budget can flow further than one weight per row per sweep.
            for _ in 0..BUDGET_ROUNDS {
                let (m, _, t) =
                    swap::budget_moves(a, &prob.diag, &prob.inv_diag, &mut rows, layer_tol);
                moves += m;
                touched.extend(t);
                if m == 0 {
                    break;
                }
            }
            if moves == 0 && rows.iter().all(|r| r.keep.iter().filter(|&&x| x).count() <= exact_k) {
                // The cheap prices stall: price removals and additions with
                // the refit (exact, the rows being independent).
                let mut prices: Vec<exact::Prices> = vec![(None, None); d_out];
                let items: Vec<_> = rows.iter().zip(prices.iter_mut()).collect();
                for_each(items, par, |(row, pr)| *pr = exact::budget_prices(a, row));
                let rems: Vec<_> = prices.iter().map(|p| p.0).collect();
                let adds: Vec<_> = prices.iter().map(|p| p.1).collect();
                for (ra, j, rr, i, _) in swap::pair_rows(&adds, &rems, layer_tol) {
                    // Flip only; the refit at the end of the sweep realises
                    // exactly the priced change.
                    exact::flip(
                        a,
                        &mut rows[rr],
                        &exact::Move { delta: 0.0, out: vec![i], inn: vec![] },
                    );
                    rows[ra].keep[j] = true;
                    flipped[ra] = true;
                    flipped[rr] = true;
                    touched.push(ra);
                    touched.push(rr);
                    moves += 1;
                }
            }
            drop(rows);
            ph.lap("budget moves");
            info.swaps += moves;
            for r in touched {
                changed[r] = true;
                active[r] = true;
            }
        }

        let exact_k = params.l0.exact_max_k.min(params.l0.chol_limit(d_in));
        let swaps =
            sweep_rows(&prob, &mut state, &active, &changed, &flipped, &tol, pattern, exact_k, par);
        for r in 0..d_out {
            info.swaps += swaps[r];
            if swaps[r] > 0 {
                changed[r] = true;
            } else if !changed[r] {
                active[r] = false;
            }
        }
        info.sweeps += 1;
        ph.lap("sweep swaps");
        if !changed.iter().any(|&c| c) {
            if params.l0.trace {
                info.trace.push(state.total());
            }
            break;
        }
        cg_iters += refit_rows(&prob, &mut state, &changed, params, sweep_iter, par)?;

        for r in restore_worse(&prob, &mut state, &prev_w, &prev_keep, &prev_f, layer) {
            active[r] = false;
        }
        if params.l0.trace {
            info.trace.push(state.total());
        }
    }

    ph.lap("sweep refits");

    // Final refit of the rows refit by capped CG so far, to `cg_tol`.
    let loose = cg_rows(&state.keep, &all, d_in, chol_max);
    if loose.iter().any(|&r| r) {
        prev_w.copy_from_slice(&state.w_hat);
        prev_keep.copy_from_slice(&state.keep);
        prev_f.copy_from_slice(&state.f);
        cg_iters += refit_rows(&prob, &mut state, &loose, params, params.l0.cg_max_iter, par)?;
        restore_worse(&prob, &mut state, &prev_w, &prev_keep, &prev_f, layer);
        if let Some(last) = info.trace.last_mut() {
            *last = last.min(state.total());
        }
    }
    ph.lap("final refit");
    info.objective_final = state.total();
    info.refit_iterations = cg_iters;
    let weight = Mat::from_fn(d_out, d_in, |r, c| {
        if state.keep[r * d_in + c] {
            state.w_hat[r * d_in + c]
        } else {
            0.0
        }
    });
    ph.lap("output");
    info.phases = ph.done;
    Ok(Pruned { weight, info })
}

/// Keep the best state: every move and refit lowers `f` exactly (per row,
/// or in total for per-layer scope, where a donor row rises), so an increase
/// can only be rounding; restore the rows it affects from the copy taken
/// before. Returns the restored rows.
fn restore_worse(
    prob: &Problem<'_>,
    state: &mut State,
    prev_w: &[f64],
    prev_keep: &[bool],
    prev_f: &[f64],
    layer: bool,
) -> Vec<usize> {
    let (d_out, d_in) = (prob.d_out, prob.d_in);
    let restore: Vec<usize> = if layer {
        let (now, before) = (state.total(), prev_f.iter().sum::<f64>());
        debug_assert!(
            now <= before + 1e-9 * prob.dense.iter().sum::<f64>(),
            "objective rose from {before} to {now}"
        );
        if now > before {
            (0..d_out).collect()
        } else {
            Vec::new()
        }
    } else {
        (0..d_out)
            .filter(|&r| {
                debug_assert!(
                    state.f[r] <= prev_f[r] + 1e-9 * prob.dense[r],
                    "row {r}: objective rose from {} to {}",
                    prev_f[r],
                    state.f[r]
                );
                state.f[r] > prev_f[r]
            })
            .collect()
    };
    for &r in &restore {
        let rg = r * d_in..(r + 1) * d_in;
        state.w_hat[rg.clone()].copy_from_slice(&prev_w[rg.clone()]);
        state.keep[rg.clone()].copy_from_slice(&prev_keep[rg.clone()]);
        state.f[r] = refit::gradient_row(
            prob.a,
            &prob.w[rg.clone()],
            &prob.b[rg.clone()],
            &state.w_hat[rg.clone()],
            &state.keep[rg.clone()],
            &mut state.g[rg],
        );
    }
    restore
}

/// Per-row mutable views of the state.
fn rows_mut(state: &mut State, d_in: usize) -> Vec<RowMut<'_>> {
    state
        .w_hat
        .chunks_mut(d_in)
        .zip(state.g.chunks_mut(d_in))
        .zip(state.keep.chunks_mut(d_in))
        .map(|((w_hat, g), keep)| RowMut { w_hat, g, keep })
        .collect()
}

/// One swap sweep over the active rows, in blocks of [`ROW_BLOCK`] rows.
/// Returns the swaps accepted per row.
#[allow(clippy::too_many_arguments)]
fn sweep_rows(
    prob: &Problem<'_>,
    state: &mut State,
    active: &[bool],
    moved: &[bool],
    flipped: &[bool],
    tol: &[f64],
    pattern: Pattern,
    exact_max_k: usize,
    par: Par,
) -> Vec<usize> {
    let d_in = prob.d_in;
    let mut swaps = vec![0usize; prob.d_out];
    let rows = rows_mut(state, d_in);
    let mut blocks: Vec<(usize, Vec<RowMut<'_>>, &mut [usize])> = Vec::new();
    let mut it = rows.into_iter();
    for (bi, sw) in swaps.chunks_mut(ROW_BLOCK).enumerate() {
        let r0 = bi * ROW_BLOCK;
        let block: Vec<RowMut<'_>> = it.by_ref().take(sw.len()).collect();
        blocks.push((r0, block, sw));
    }
    for_each(blocks, par, |(r0, block, sw)| {
        // Rows an exact budget move flipped sit above their priced value
        // until refit, so they wait for the refit at the end of the sweep.
        let (ids, mut rows): (Vec<usize>, Vec<RowMut<'_>>) = block
            .into_iter()
            .enumerate()
            .filter(|(i, _)| active[r0 + i] && !flipped[r0 + i])
            .unzip();
        if rows.is_empty() {
            return;
        }
        let row_tol: Vec<f64> = ids.iter().map(|&i| tol[r0 + i]).collect();
        match pattern {
            Pattern::NofM { m, .. } => {
                for (row, &i) in rows.iter_mut().zip(&ids) {
                    sw[i] = swap::apply_nm_row(prob.a, &prob.inv_diag, row, m, tol[r0 + i]).0;
                }
            }
            Pattern::Unstructured { .. } => {
                let mut avail = vec![0.0; rows.len() * d_in];
                let mut cands: Vec<Vec<Cand>> = vec![Vec::new(); rows.len()];
                swap::score_block(
                    prob.a,
                    prob.a32.as_ref(),
                    &prob.inv_diag,
                    &rows,
                    &row_tol,
                    &mut avail,
                    &mut cands,
                );
                for (bi, (row, &i)) in rows.iter_mut().zip(&ids).enumerate() {
                    let av = &mut avail[bi * d_in..(bi + 1) * d_in];
                    sw[i] = swap::apply_row(
                        prob.a,
                        &prob.inv_diag,
                        row,
                        &mut cands[bi],
                        row_tol[bi],
                        av,
                    )
                    .0;
                }
            }
        }
        // Rows where the cheap swaps found nothing (and no budget move came)
        // sit at a refit optimum: price moves with the refit.
        let group = match pattern {
            Pattern::NofM { m, .. } => Some(m),
            Pattern::Unstructured { .. } => None,
        };
        for (row, &i) in rows.iter_mut().zip(&ids) {
            if sw[i] > 0 || moved[r0 + i] || row.keep.iter().filter(|&&k| k).count() > exact_max_k {
                continue;
            }
            if let Some(mv) = exact::best_move(prob.a, row, group) {
                if mv.delta < -tol[r0 + i] {
                    exact::flip(prob.a, row, &mv);
                    sw[i] = mv.out.len();
                }
            }
        }
    });
    swaps
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// A tiny deterministic generator (64-bit LCG, Knuth's MMIX constants).
    pub(crate) struct Lcg(u64);

    impl Lcg {
        pub(crate) fn new(seed: u64) -> Self {
            Lcg(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ 0xD1B5_4A32_D192_ED03)
        }
        /// Uniform in [0, 1).
        pub(crate) fn uniform(&mut self) -> f64 {
            self.0 = self.0.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            (self.0 >> 11) as f64 / (1u64 << 53) as f64
        }
        /// Standard normal (Box–Muller).
        pub(crate) fn normal(&mut self) -> f64 {
            let u = self.uniform().max(1e-300);
            let v = self.uniform();
            (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
        }
    }

    /// Calibration inputs with correlated columns (a shared factor plus a
    /// moving average) and two outlier columns 8x louder, dense weights, and
    /// `λ = α · mean diag(XᵀX)`.
    pub(crate) fn instance(
        rng: &mut Lcg,
        n: usize,
        d: usize,
        rows: usize,
        alpha: f64,
    ) -> (Mat<f64>, Mat<f64>, f64) {
        let z = Mat::from_fn(n, d + 1, |_, _| rng.normal());
        let common: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
        let o1 = (rng.uniform() * d as f64) as usize;
        let o2 = (rng.uniform() * d as f64) as usize;
        let x = Mat::from_fn(n, d, |i, j| {
            let v = z[(i, j + 1)] + 0.7 * z[(i, j)] + 0.5 * common[i];
            if j == o1 || j == o2 {
                8.0 * v
            } else {
                v
            }
        });
        let w = Mat::from_fn(rows, d, |_, _| rng.normal());
        let h = x.transpose() * &x;
        let lambda = alpha * (0..d).map(|j| h[(j, j)]).sum::<f64>() / d as f64;
        (x, w, lambda)
    }

    fn gram(x: &Mat<f64>, lambda: f64) -> Mat<f64> {
        let mut a = x.transpose() * x;
        for j in 0..a.nrows() {
            a[(j, j)] += lambda;
        }
        a
    }

    /// Optimal value on support `s` (row-local indices): `wᵀAw − b_Sᵀ A_SS⁻¹ b_S`,
    /// by a dense LU solve (a different factorisation from the solver's).
    fn support_value(a: &Mat<f64>, w: &[f64], s: &[usize]) -> f64 {
        let d = w.len();
        let b: Vec<f64> = (0..d).map(|i| (0..d).map(|j| a[(i, j)] * w[j]).sum()).collect();
        let dense: f64 = (0..d).map(|i| w[i] * b[i]).sum();
        if s.is_empty() {
            return dense;
        }
        let ass = Mat::from_fn(s.len(), s.len(), |p, q| a[(s[p], s[q])]);
        let rhs = Mat::from_fn(s.len(), 1, |p, _| b[s[p]]);
        use faer::linalg::solvers::Solve;
        let x = ass.partial_piv_lu().solve(rhs);
        dense - (0..s.len()).map(|p| b[s[p]] * x[(p, 0)]).sum::<f64>()
    }

    /// All `k`-subsets of `0..d`.
    fn subsets(d: usize, k: usize) -> Vec<Vec<usize>> {
        (0u32..1 << d)
            .filter(|m| m.count_ones() as usize == k)
            .map(|m| (0..d).filter(|&j| m >> j & 1 == 1).collect())
            .collect()
    }

    /// All N:M supports of a row of width `d`: every combination of one
    /// `n`-subset per group.
    fn nm_supports(d: usize, n: usize, m: usize) -> Vec<Vec<usize>> {
        let per_group = subsets(m, n);
        let mut out: Vec<Vec<usize>> = vec![Vec::new()];
        for q in 0..d / m {
            out = out
                .into_iter()
                .flat_map(|s| {
                    per_group.iter().map(move |g| {
                        s.iter().copied().chain(g.iter().map(|&j| q * m + j)).collect()
                    })
                })
                .collect();
        }
        out
    }

    fn l0_params(pattern: Pattern) -> SolveParams {
        SolveParams { method: super::super::Method::L0, pattern, ..SolveParams::default() }
    }

    fn objective(w: &Mat<f64>, what: &Mat<f64>, a: &Mat<f64>) -> f64 {
        crate::solve::objective::objective(w.as_ref(), what.as_ref(), a.as_ref(), Par::Seq)
    }

    /// Greedy: scaled magnitude mask, then exact refit (per row, dense LU).
    fn greedy_value(w: &Mat<f64>, a: &Mat<f64>, pattern: Pattern) -> f64 {
        let mask = select(scaled_scores(w.as_ref(), a.as_ref()).as_ref(), pattern);
        (0..w.nrows())
            .map(|r| {
                let wr: Vec<f64> = (0..w.ncols()).map(|c| w[(r, c)]).collect();
                let s: Vec<usize> = (0..w.ncols()).filter(|&c| mask.get(r, c)).collect();
                support_value(a, &wr, &s)
            })
            .sum()
    }

    struct Tally {
        name: String,
        hits: usize,
        n: usize,
        gaps: [f64; 3],
    }

    impl Tally {
        fn new(name: &str) -> Self {
            Tally { name: name.into(), hits: 0, n: 0, gaps: [0.0; 3] }
        }
        fn add(&mut self, opt: f64, l0: f64, greedy: f64, obs: f64) {
            let gap = |v: f64| (v - opt) / opt.max(f64::MIN_POSITIVE);
            self.n += 1;
            // 1e-6 relative: far above the rounding of a d ≤ 16 refit
            // (≈ 1e-13 κ), far below any real difference between supports.
            if gap(l0) <= 1e-6 {
                self.hits += 1;
            }
            for (s, v) in self.gaps.iter_mut().zip([l0, greedy, obs]) {
                *s += gap(v);
            }
        }
        fn report(&self) -> (f64, f64) {
            let n = self.n as f64;
            let rate = self.hits as f64 / n;
            println!(
                "{}: l0 optimal on {}/{} ({:.0}%), mean gap l0 {:.3e}, greedy {:.3e}, obs {:.3e}",
                self.name,
                self.hits,
                self.n,
                100.0 * rate,
                self.gaps[0] / n,
                self.gaps[1] / n,
                self.gaps[2] / n
            );
            (rate, self.gaps[0] / n)
        }
    }

    /// Run the solver and the two baselines on one instance; returns
    /// (l0, greedy, obs) objectives after checking conformity, exact zeros
    /// and monotonicity.
    fn run_methods(w: &Mat<f64>, a: &Mat<f64>, pattern: Pattern) -> (f64, f64, f64) {
        let mut params = l0_params(pattern);
        params.l0.trace = true;
        let got = solve(w.as_ref(), a.as_ref(), &params, Par::Seq).unwrap();
        check_output(w, a, &got, pattern);
        let ob = obs::sweep(w.as_ref(), a.as_ref(), pattern, params.obs_block, Par::Seq).unwrap();
        (objective(w, &got.weight, a), greedy_value(w, a, pattern), objective(w, &ob.weight, a))
    }

    /// Conformity, exact zeros off the support, objective bookkeeping and a
    /// non-increasing trace.
    fn check_output(w: &Mat<f64>, a: &Mat<f64>, got: &Pruned, pattern: Pattern) {
        let mask = Mask::nonzeros(got.weight.as_ref());
        assert!(mask.conforms(pattern), "{pattern:?}: output does not conform");
        let info = &got.info;
        let direct = objective(w, &got.weight, a);
        // The bookkept Σ f_r comes from exact gradients; it matches a fresh
        // product up to rounding of O(d ε ‖W‖² ‖A‖).
        let scale = w.norm_l2().powi(2) * a.norm_max() * a.nrows() as f64;
        let tol = 1e-12 * scale;
        assert!(
            (info.objective_final - direct).abs() <= tol,
            "final {} vs direct {direct} (tol {tol:.2e})",
            info.objective_final
        );
        assert!(
            info.objective_final <= info.objective_initial,
            "{} > {}",
            info.objective_final,
            info.objective_initial
        );
        assert_eq!(info.trace.first().copied(), Some(info.objective_initial));
        for p in info.trace.windows(2) {
            assert!(p[1] <= p[0], "trace rose: {:?}", info.trace);
        }
    }

    #[test]
    fn conforms_and_never_increases() {
        // Every pattern, both refit paths (per-row Cholesky, batched CG via
        // chol_max = 0), sequential and parallel.
        let mut rng = Lcg::new(99);
        let (x, w, lambda) = instance(&mut rng, 200, 48, 12, 0.01);
        let a = gram(&x, lambda);
        let patterns = [
            Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row },
            Pattern::Unstructured { sparsity: 0.9, scope: Scope::Row },
            Pattern::Unstructured { sparsity: 0.7, scope: Scope::Layer },
            Pattern::NofM { n: 2, m: 4 },
            Pattern::NofM { n: 1, m: 8 },
        ];
        for pattern in patterns {
            for (chol_max, par) in [
                (256, Par::Seq),
                (0, Par::Seq),
                (256, Par::rayon(2)),
                (0, Par::rayon(2)),
                (256, Par::rayon(3)),
            ] {
                let mut params = l0_params(pattern);
                params.l0.trace = true;
                params.l0.chol_max = Some(chol_max);
                let got = solve(w.as_ref(), a.as_ref(), &params, par).unwrap();
                check_output(&w, &a, &got, pattern);
                assert_eq!(got.info.trace.len(), got.info.sweeps + 1, "{pattern:?}");
                assert!(got.info.init.is_some());
                if chol_max == 0 {
                    assert!(got.info.refit_iterations > 0, "{pattern:?}: CG path not taken");
                    // The final refit leaves every row within cg_tol.
                    let prob = Problem::new(w.as_ref(), a.as_ref(), Par::Seq);
                    let d = w.ncols();
                    for r in 0..w.nrows() {
                        let wr: Vec<f64> = (0..d).map(|c| got.weight[(r, c)]).collect();
                        let keep: Vec<bool> = wr.iter().map(|&x| x != 0.0).collect();
                        let rg = r * d..(r + 1) * d;
                        let mut g = vec![0.0; d];
                        refit::gradient_row(
                            a.as_ref(),
                            &prob.w[rg.clone()],
                            &prob.b[rg.clone()],
                            &wr,
                            &keep,
                            &mut g,
                        );
                        let sq = |x: &[f64]| -> f64 {
                            x.iter().zip(&keep).filter(|(_, &k)| k).map(|(v, _)| v * v).sum()
                        };
                        let (res, rhs) = (sq(&g).sqrt(), sq(&prob.b[rg]).sqrt());
                        assert!(
                            res <= 1.01 * params.l0.cg_tol * rhs,
                            "{pattern:?} row {r}: residual {res:.3e} vs {rhs:.3e}"
                        );
                    }
                }
                // Not worse than either start: the OBS sweep, refit or not.
                let ob =
                    obs::sweep(w.as_ref(), a.as_ref(), pattern, params.obs_block, par).unwrap();
                let f_obs = objective(&w, &ob.weight, &a);
                assert!(
                    got.info.objective_final <= f_obs * (1.0 + 1e-9),
                    "{pattern:?}: {} > obs {f_obs}",
                    got.info.objective_final
                );
            }
        }
    }

    #[test]
    fn edge_budgets() {
        // Keep everything: the refit reproduces W (objective at rounding
        // level). Keep nothing: all zeros, objective = Σ wᵀAw.
        let mut rng = Lcg::new(4);
        let (x, w, lambda) = instance(&mut rng, 60, 16, 4, 0.01);
        let a = gram(&x, lambda);
        let dense: f64 = objective(&w, &Mat::zeros(4, 16), &a);
        for pattern in [
            Pattern::Unstructured { sparsity: 0.0, scope: Scope::Row },
            Pattern::Unstructured { sparsity: 0.0, scope: Scope::Layer },
            Pattern::NofM { n: 4, m: 4 },
        ] {
            let mut params = l0_params(pattern);
            params.l0.trace = true;
            let got = solve(w.as_ref(), a.as_ref(), &params, Par::Seq).unwrap();
            check_output(&w, &a, &got, pattern);
            // A full refit solves A ŵ = A w: error O(ε κ(A)) relative.
            assert!(
                got.info.objective_final <= 1e-9 * dense,
                "{pattern:?}: {}",
                got.info.objective_final
            );
        }
        for pattern in [
            Pattern::Unstructured { sparsity: 0.99, scope: Scope::Row },
            Pattern::Unstructured { sparsity: 0.999, scope: Scope::Layer },
        ] {
            let got = solve(w.as_ref(), a.as_ref(), &l0_params(pattern), Par::Seq).unwrap();
            assert_eq!(got.weight, Mat::<f64>::zeros(4, 16));
            assert!((got.info.objective_final - dense).abs() <= 1e-12 * dense);
        }
    }

    #[test]
    fn budget_runs_out_cleanly() {
        // A zero sweep budget returns the better start, refit; a zero time
        // budget likewise.
        let mut rng = Lcg::new(3);
        let (x, w, lambda) = instance(&mut rng, 100, 32, 6, 0.01);
        let a = gram(&x, lambda);
        let pattern = Pattern::Unstructured { sparsity: 0.75, scope: Scope::Row };
        for (sweeps, secs) in [(0, None), (20, Some(0.0))] {
            let mut params = l0_params(pattern);
            params.l0.max_sweeps = sweeps;
            params.l0.max_seconds = secs;
            params.l0.trace = true;
            let got = solve(w.as_ref(), a.as_ref(), &params, Par::Seq).unwrap();
            check_output(&w, &a, &got, pattern);
            assert_eq!(got.info.sweeps, 0);
            assert_eq!(got.info.objective_final, got.info.objective_initial);
            assert_eq!(got.info.trace, vec![got.info.objective_initial]);
        }
    }

    #[test]
    fn per_row_matches_exhaustive_enumeration() {
        // Source: exhaustive enumeration of supports, exact by construction.
        let d = 16;
        let mut tally = Tally::new("per-row");
        let mut rng = Lcg::new(2024);
        for seed in 0..8 {
            for alpha in [0.0, 0.01] {
                let (x, w, lambda) = instance(&mut rng, 24 + seed, d, 3, alpha);
                let a = gram(&x, lambda);
                for sparsity in [0.5, 0.75, 0.875] {
                    let pattern = Pattern::Unstructured { sparsity, scope: Scope::Row };
                    let k = budget::kept(sparsity, d);
                    let all = subsets(d, k);
                    let opt: f64 = (0..w.nrows())
                        .map(|r| {
                            let wr: Vec<f64> = (0..d).map(|c| w[(r, c)]).collect();
                            all.iter()
                                .map(|s| support_value(&a, &wr, s))
                                .fold(f64::INFINITY, f64::min)
                        })
                        .sum();
                    let (l0, greedy, ob) = run_methods(&w, &a, pattern);
                    tally.add(opt, l0, greedy, ob);
                }
            }
        }
        let (rate, gap) = tally.report();
        assert!(rate >= 0.9, "l0 optimal on only {:.0}% of instances", 100.0 * rate);
        assert!(gap < 0.01, "mean gap {gap:.3e} ≥ 1%");
    }

    #[test]
    fn two_four_matches_exhaustive_enumeration() {
        // Source: exhaustive enumeration over group choices (6^(d/4)
        // supports), exact by construction.
        let d = 16;
        let pattern = Pattern::NofM { n: 2, m: 4 };
        let all = nm_supports(d, 2, 4);
        assert_eq!(all.len(), 6usize.pow(4));
        let mut tally = Tally::new("2:4");
        let mut rng = Lcg::new(77);
        for seed in 0..10 {
            for alpha in [0.0, 0.01] {
                let (x, w, lambda) = instance(&mut rng, 24 + seed, d, 3, alpha);
                let a = gram(&x, lambda);
                let opt: f64 = (0..w.nrows())
                    .map(|r| {
                        let wr: Vec<f64> = (0..d).map(|c| w[(r, c)]).collect();
                        all.iter().map(|s| support_value(&a, &wr, s)).fold(f64::INFINITY, f64::min)
                    })
                    .sum();
                let (l0, greedy, ob) = run_methods(&w, &a, pattern);
                tally.add(opt, l0, greedy, ob);
            }
        }
        let (rate, gap) = tally.report();
        assert!(rate >= 0.9, "l0 optimal on only {:.0}% of instances", 100.0 * rate);
        assert!(gap < 0.01, "mean gap {gap:.3e} ≥ 1%");
    }

    #[test]
    fn per_layer_matches_exhaustive_enumeration() {
        // Source: exhaustive enumeration of layer supports (all K-subsets of
        // the d_out·d_in weights), exact by construction.
        let (rows, d) = (3, 5);
        let mut tally = Tally::new("per-layer");
        let mut rng = Lcg::new(5);
        for seed in 0..6 {
            for alpha in [0.0, 0.01] {
                let (x, w, lambda) = instance(&mut rng, 20 + seed, d, rows, alpha);
                let a = gram(&x, lambda);
                for sparsity in [0.5, 0.75] {
                    let pattern = Pattern::Unstructured { sparsity, scope: Scope::Layer };
                    let k = budget::kept(sparsity, rows * d);
                    // Row values for every row support, then every split.
                    let wr: Vec<Vec<f64>> =
                        (0..rows).map(|r| (0..d).map(|c| w[(r, c)]).collect()).collect();
                    let val: Vec<Vec<f64>> = (0..rows)
                        .map(|r| {
                            (0u32..1 << d)
                                .map(|m| {
                                    support_value(
                                        &a,
                                        &wr[r],
                                        &(0..d).filter(|&j| m >> j & 1 == 1).collect::<Vec<_>>(),
                                    )
                                })
                                .collect()
                        })
                        .collect();
                    let opt = (0u32..1 << (rows * d))
                        .filter(|m| m.count_ones() as usize == k)
                        .map(|m| {
                            (0..rows)
                                .map(|r| val[r][((m >> (r * d)) & ((1 << d) - 1)) as usize])
                                .sum::<f64>()
                        })
                        .fold(f64::INFINITY, f64::min);
                    let (l0, greedy, ob) = run_methods(&w, &a, pattern);
                    tally.add(opt, l0, greedy, ob);
                }
            }
        }
        let (rate, gap) = tally.report();
        assert!(rate >= 0.9, "l0 optimal on only {:.0}% of instances", 100.0 * rate);
        assert!(gap < 0.01, "mean gap {gap:.3e} ≥ 1%");
    }
}
#[cfg(test)]
mod bench {
    use super::tests::Lcg;
    use super::*;
    use crate::solve::objective::relative_error;
    use crate::solve::{prune_layer, regularised, ridge_lambda, Method};

    /// A 1536 x 1536 layer with 16k calibration rows of structured
    /// activations: 8 shared latent factors, a moving-average correlation
    /// between neighbouring inputs, log-normal channel scales and 1% outlier
    /// channels 10x louder. Run with
    /// `cargo test --release --lib bench_1536 -- --ignored --nocapture`;
    /// `LOPPER_BENCH` picks patterns, `LOPPER_CHOL`, `LOPPER_CG_TOL` and
    /// `LOPPER_SWEEP_ITER` override `chol_max`, `cg_tol`, `cg_sweep_iter`.
    #[test]
    #[ignore]
    fn bench_1536() {
        let (n, d) = (16384, 1536);
        let par = Par::rayon(0);
        let mut rng = Lcg::new(1);
        let t = Instant::now();
        let load = Mat::from_fn(8, d, |_, _| rng.normal());
        let scale: Vec<f64> = (0..d)
            .map(|_| {
                let s = (0.5 * rng.normal()).exp();
                if rng.uniform() < 0.01 {
                    10.0 * s
                } else {
                    s
                }
            })
            .collect();
        let u = Mat::from_fn(n, 8, |_, _| rng.normal());
        let z = Mat::from_fn(n, d + 1, |_, _| rng.normal());
        let mut x = Mat::<f64>::zeros(n, d);
        matmul(x.as_mut(), Accum::Replace, u.as_ref(), load.as_ref(), 0.5, par);
        for j in 0..d {
            for i in 0..n {
                x[(i, j)] = scale[j] * (x[(i, j)] + z[(i, j + 1)] + 0.6 * z[(i, j)]);
            }
        }
        let mut h = Mat::<f64>::zeros(d, d);
        matmul(h.as_mut(), Accum::Replace, x.transpose(), x.as_ref(), 1.0, par);
        drop((x, z, u));
        let w = Mat::from_fn(d, d, |_, _| rng.normal() / (d as f64).sqrt());
        println!("setup {:.2}s", t.elapsed().as_secs_f64());
        let lambda = ridge_lambda(h.as_ref(), 0.01);
        let a = regularised(h.as_ref(), lambda);
        // The machine is shared: time each solver `reps` times, keep the
        // fastest.
        let timed = |params: &SolveParams, reps: usize| {
            let mut best = f64::INFINITY;
            let mut out = None;
            for _ in 0..reps {
                let t = Instant::now();
                let p = prune_layer(w.as_ref(), h.as_ref(), params, par).unwrap();
                best = best.min(t.elapsed().as_secs_f64());
                out = Some(p);
            }
            (best, out.unwrap())
        };
        // `LOPPER_BENCH=90,layer,50,24` picks the patterns (default all).
        let pick = std::env::var("LOPPER_BENCH").unwrap_or_else(|_| "90,layer,50,24".into());
        for (name, pattern, reps) in [
            ("90", Pattern::Unstructured { sparsity: 0.9, scope: Scope::Row }, 3),
            ("layer", Pattern::Unstructured { sparsity: 0.9, scope: Scope::Layer }, 1),
            ("50", Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row }, 1),
            ("24", Pattern::NofM { n: 2, m: 4 }, 1),
        ] {
            if !pick.split(',').any(|p| p == name) {
                continue;
            }
            let mut params = SolveParams { pattern, ridge_alpha: 0.01, ..SolveParams::default() };
            let (t_obs, ob) = timed(&params, reps);
            let e_obs = relative_error(w.as_ref(), ob.weight.as_ref(), h.as_ref(), par);
            params.method = Method::L0;
            params.l0.trace = true;
            let env = |k: &str| std::env::var(k).ok().and_then(|v| v.parse::<f64>().ok());
            if let Some(v) = env("LOPPER_CHOL") {
                params.l0.chol_max = Some(v as usize);
            }
            if let Some(v) = env("LOPPER_SWEEP_ITER") {
                params.l0.cg_sweep_iter = v as usize;
            }
            if let Some(v) = env("LOPPER_CG_TOL") {
                params.l0.cg_tol = v;
            }
            let (t_l0, l0) = timed(&params, reps);
            let e_l0 = relative_error(w.as_ref(), l0.weight.as_ref(), h.as_ref(), par);
            let _ = &a;
            println!(
                "{pattern:?}: obs {t_obs:.2}s err {e_obs:.4e} | l0 {t_l0:.2}s ({:.1}x) err {e_l0:.4e} ({:+.1}%) init {:?} sweeps {} swaps {} cg {}",
                t_l0 / t_obs,
                100.0 * (e_l0 / e_obs - 1.0),
                l0.info.init,
                l0.info.sweeps,
                l0.info.swaps,
                l0.info.refit_iterations
            );
            println!("  trace {:?}", l0.info.trace);
            let phases: Vec<String> =
                l0.info.phases.iter().map(|(n, t)| format!("{n} {t:.2}s")).collect();
            println!("  phases: {}", phases.join(", "));
        }
    }
}
