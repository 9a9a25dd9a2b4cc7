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
//! 1. Starts (`starts.rs`): the support of the OBS sweep
//!    ([`crate::solve::obs::sweep`]), refit warm-started from its weights;
//!    then, only if every row of it is refit by Cholesky and `max_seconds`
//!    is not spent, the activation-scaled magnitude mask
//!    (`|w_ij|·sqrt(A_jj)`, [`crate::solve::baseline::scaled_scores`]),
//!    refit. Per row (per row and N:M) or for the whole layer (per-layer
//!    scope, whose row budgets differ between the starts) the better one is
//!    kept; [`SolveInfo::init`] says which: `"scaled+refit"`, `"obs+refit"`
//!    or `"mixed"`. (Large supports skip the scaled start: it costs a second
//!    refit of the layer and on a 1536-wide layer at 50% it won 114 of 1536
//!    rows for no change in the final error.)
//! 2. Sweeps (`sweep.rs`): per-layer budget moves between rows
//!    (fixed-others prices; prices with the refit when those find nothing),
//!    then for every row still improving a batch of non-interacting swaps; a
//!    row where none improves tries the best move priced with the refit (a
//!    single swap, a pair of swaps, or an N:M group re-choice). Then a refit
//!    (exact or capped, above) of the rows that changed. A row with no
//!    improving move is a local optimum and is left alone (per-layer scope
//!    wakes rows touched by a budget move). Stops when no row improves or
//!    the budget ([`crate::solve::L0Params::max_sweeps`], `max_seconds`,
//!    checked after the starts and between sweeps) runs out.
//! 3. The final refit of the CG rows (`sweep.rs`; always run, also when the
//!    budget ran out: it is what makes the returned weights refit to
//!    `cg_tol`).
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
//!
//! Tests of the whole solver (against exhaustive enumeration) and the test
//! instances the step modules share are in `tests.rs`; `bench.rs` holds an
//! ignored timing run on a 1536-wide layer.

mod exact;
mod refit;
mod starts;
mod swap;
mod sweep;

#[cfg(test)]
mod bench;
#[cfg(test)]
pub(crate) mod tests;

use super::{Pruned, SolveError, SolveInfo, SolveParams};
use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, MatMut, MatRef, Par};
use rayon::prelude::*;
use std::time::Instant;
use swap::RowMut;

/// Solve the L0-constrained problem for every row of `w`; `a` is the
/// ridge-regularised Gram matrix `H + λI` and `lambda` its ridge λ
/// (reported in errors and in [`SolveInfo::lambda`]).
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `A` (or some `A_SS`) cannot be
/// factored.
pub fn solve(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    lambda: f64,
    params: &SolveParams,
    par: Par,
) -> Result<Pruned, SolveError> {
    let mut clock = Clock::start(params.l0.max_seconds);
    let owned;
    let a = if a.row_stride() == 1 {
        a
    } else {
        owned = a.to_owned();
        owned.as_ref()
    };
    let prob = Problem::new(w, a, lambda, par);
    clock.lap("setup");

    // 1. The better of the two refit starts.
    let start = starts::best(&prob, w, params, par, &mut clock)?;
    let mut state = start.state;
    let mut info = SolveInfo {
        lambda,
        init: Some(start.init),
        objective_initial: state.total(),
        refit_iterations: start.cg_iters,
        ..SolveInfo::default()
    };
    if params.l0.trace {
        info.trace.push(info.objective_initial);
    }

    // 2. Swap sweeps, each followed by a refit of the rows that changed.
    sweep::sweeps(&prob, &mut state, params, par, &mut clock, &mut info)?;

    // 3. The rows refit by capped CG so far, refit to `cg_tol`.
    sweep::final_refit(&prob, &mut state, params, par, &mut info)?;
    clock.lap("final refit");

    info.objective_final = state.total();
    let weight = state.weight(prob.d_out, prob.d_in);
    clock.lap("output");
    info.phases = clock.phases;
    Ok(Pruned { weight, info })
}

/// Column `c` of a column-major `A` as a slice.
#[inline]
pub(crate) fn col(a: MatRef<'_, f64>, c: usize) -> &'_ [f64] {
    a.col(c).try_as_col_major().expect("A must have unit row stride").as_slice()
}

/// Fixed data of one layer, rows stored row-major.
pub(crate) struct Problem<'s> {
    pub a: MatRef<'s, f64>,
    /// The ridge λ in `A`, for error reports.
    pub lambda: f64,
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
    pub(crate) fn new(w: MatRef<'_, f64>, a: MatRef<'s, f64>, lambda: f64, par: Par) -> Self {
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
        Problem { a, lambda, d_out, d_in, w: wr, b, dense, diag, inv_diag, a32 }
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

    /// Per-row mutable views.
    fn rows_mut(&mut self, d_in: usize) -> Vec<RowMut<'_>> {
        self.w_hat
            .chunks_mut(d_in)
            .zip(self.g.chunks_mut(d_in))
            .zip(self.keep.chunks_mut(d_in))
            .map(|((w_hat, g), keep)| RowMut { w_hat, g, keep })
            .collect()
    }

    /// `Ŵ` as a `d_out x d_in` matrix, exactly zero off the support.
    fn weight(&self, d_out: usize, d_in: usize) -> Mat<f64> {
        Mat::from_fn(d_out, d_in, |r, c| {
            if self.keep[r * d_in + c] {
                self.w_hat[r * d_in + c]
            } else {
                0.0
            }
        })
    }
}

/// Wall clock of one solve: the time per phase ([`SolveInfo::phases`]) and
/// the `max_seconds` budget.
struct Clock {
    start: Instant,
    limit: Option<f64>,
    mark: Instant,
    phases: Vec<(&'static str, f64)>,
}

impl Clock {
    fn start(limit: Option<f64>) -> Self {
        let now = Instant::now();
        Clock { start: now, limit, mark: now, phases: Vec::new() }
    }

    /// Charge the time since the previous call (or the start) to `name`.
    fn lap(&mut self, name: &'static str) {
        let now = Instant::now();
        let dt = (now - self.mark).as_secs_f64();
        self.mark = now;
        match self.phases.iter_mut().find(|(n, _)| *n == name) {
            Some((_, t)) => *t += dt,
            None => self.phases.push((name, dt)),
        }
    }

    /// Whether `max_seconds` is spent.
    fn out_of_time(&self) -> bool {
        self.limit.is_some_and(|t| self.start.elapsed().as_secs_f64() >= t)
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
