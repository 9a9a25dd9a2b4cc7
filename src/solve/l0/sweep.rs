//! Steps 2 and 3 of the local search: swap sweeps until no row improves or
//! the budget runs out, then the final refit of the rows refit by CG.
//!
//! One sweep ([`sweeps`]):
//! 1. Per-layer scope only ([`budget_moves`]): rounds of cheap budget moves
//!    between rows ([`super::swap::budget_moves`], fixed-others prices);
//!    when they find nothing, one round priced with the refit
//!    ([`super::exact::budget_prices`]).
//! 2. Every active row, in blocks of [`ROW_BLOCK`] rows ([`sweep_rows`]): a
//!    batch of non-interacting cheap swaps (unstructured:
//!    [`super::swap::score_block`] + [`super::swap::apply_row`]; N:M:
//!    [`super::swap::apply_nm_row`]); a row where none improves tries the
//!    best move priced with the refit ([`super::exact::best_move`]).
//! 3. A refit of the rows that changed ([`super::refit::refit_rows`]), and
//!    [`restore_worse`] for rows that rounding left worse than before.
//!
//! A row with no improving move is a local optimum and is made inactive;
//! per-layer scope wakes the rows a budget move touched.

use super::refit::{cg_rows, gradient_row, refit_rows};
use super::swap::{self, Cand, RowMut};
use super::{exact, for_each, Clock, Problem, State};
use crate::solve::{Pattern, Scope, SolveError, SolveInfo, SolveParams};
use faer::Par;

/// Rows scored together against one column of `A` (cache blocking).
const ROW_BLOCK: usize = 16;

/// Rounds of cheap budget moves per sweep (per-layer scope).
const BUDGET_ROUNDS: usize = 16;

/// Weights, support and objectives of every row, copied before a step that
/// must not raise the objective.
struct Snapshot {
    w_hat: Vec<f64>,
    keep: Vec<bool>,
    f: Vec<f64>,
}

impl Snapshot {
    fn of(state: &State) -> Self {
        Snapshot { w_hat: state.w_hat.clone(), keep: state.keep.clone(), f: state.f.clone() }
    }

    /// Overwrite with `state`, reusing the buffers.
    fn take(&mut self, state: &State) {
        self.w_hat.copy_from_slice(&state.w_hat);
        self.keep.copy_from_slice(&state.keep);
        self.f.copy_from_slice(&state.f);
    }
}

/// Run swap sweeps from `state` until no row improves or the budget
/// ([`crate::solve::L0Params::max_sweeps`], `max_seconds`, checked before
/// each sweep) runs out. Counts sweeps, swaps, CG iterations and, when
/// tracing, the objective after each sweep into `info`.
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when some `A_SS` cannot be factored.
pub(super) fn sweeps(
    prob: &Problem<'_>,
    state: &mut State,
    params: &SolveParams,
    par: Par,
    clock: &mut Clock,
    info: &mut SolveInfo,
) -> Result<(), SolveError> {
    let (d_out, d_in) = (prob.d_out, prob.d_in);
    let layer = is_layer(params.pattern);
    let exact_k = params.l0.exact_max_k.min(params.l0.chol_limit(d_in));
    let tol: Vec<f64> = prob.dense.iter().map(|&c| params.l0.swap_tol * c).collect();
    let layer_tol = params.l0.swap_tol * prob.dense.iter().sum::<f64>() / d_out.max(1) as f64;
    let mut active = vec![true; d_out];
    let mut before = Snapshot::of(state);

    while info.sweeps < params.l0.max_sweeps && !clock.out_of_time() {
        before.take(state);
        let mut changed = vec![false; d_out];
        clock.lap("sweep refits");

        // Rows a cheap budget move touched (no exact moves this sweep: not at
        // a refit optimum) and rows an exact budget move flipped (no moves at
        // all until refit: above their priced value until then).
        let mut flipped = vec![false; d_out];
        if layer {
            let (moves, touched) = budget_moves(prob, state, exact_k, layer_tol, &mut flipped, par);
            clock.lap("budget moves");
            info.swaps += moves;
            for r in touched {
                changed[r] = true;
                active[r] = true;
            }
        }

        let swaps = sweep_rows(
            prob,
            state,
            &active,
            &changed,
            &flipped,
            &tol,
            params.pattern,
            exact_k,
            par,
        );
        for r in 0..d_out {
            info.swaps += swaps[r];
            if swaps[r] > 0 {
                changed[r] = true;
            } else if !changed[r] {
                active[r] = false;
            }
        }
        info.sweeps += 1;
        clock.lap("sweep swaps");
        if !changed.contains(&true) {
            if params.l0.trace {
                info.trace.push(state.total());
            }
            break;
        }
        info.refit_iterations +=
            refit_rows(prob, state, &changed, params, params.l0.cg_sweep_iter, par)?;
        for r in restore_worse(prob, state, &before, layer) {
            active[r] = false;
        }
        if params.l0.trace {
            info.trace.push(state.total());
        }
    }
    clock.lap("sweep refits");
    Ok(())
}

/// Refit the rows above the Cholesky limit, left by capped CG so far, to
/// `cg_tol` (always run, also when the budget ran out: it is what makes the
/// returned weights of those rows refit to `cg_tol`).
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when some `A_SS` cannot be factored.
pub(super) fn final_refit(
    prob: &Problem<'_>,
    state: &mut State,
    params: &SolveParams,
    par: Par,
    info: &mut SolveInfo,
) -> Result<(), SolveError> {
    let all = vec![true; prob.d_out];
    let loose = cg_rows(&state.keep, &all, prob.d_in, params.l0.chol_limit(prob.d_in));
    if loose.contains(&true) {
        let before = Snapshot::of(state);
        info.refit_iterations +=
            refit_rows(prob, state, &loose, params, params.l0.cg_max_iter, par)?;
        restore_worse(prob, state, &before, is_layer(params.pattern));
        if let Some(last) = info.trace.last_mut() {
            *last = last.min(state.total());
        }
    }
    Ok(())
}

fn is_layer(pattern: Pattern) -> bool {
    matches!(pattern, Pattern::Unstructured { scope: Scope::Layer, .. })
}

/// Per-layer scope: move budget between rows. Several rounds of cheap moves,
/// each re-pricing every row with its current `g`, so budget can flow
/// further than one weight per row per sweep; when they find nothing and
/// every row keeps at most `exact_k` weights, one round of moves priced with
/// the refit. Returns the moves and the rows they touched; sets `flipped`
/// for the rows of the moves priced with the refit.
fn budget_moves(
    prob: &Problem<'_>,
    state: &mut State,
    exact_k: usize,
    layer_tol: f64,
    flipped: &mut [bool],
    par: Par,
) -> (usize, Vec<usize>) {
    let mut rows = state.rows_mut(prob.d_in);
    let mut moves = 0;
    let mut touched = Vec::new();
    for _ in 0..BUDGET_ROUNDS {
        let (m, _, t) =
            swap::budget_moves(prob.a, &prob.diag, &prob.inv_diag, &mut rows, layer_tol);
        moves += m;
        touched.extend(t);
        if m == 0 {
            break;
        }
    }
    if moves == 0 && rows.iter().all(|r| r.keep.iter().filter(|&&x| x).count() <= exact_k) {
        for (ra, rr) in exact_budget_moves(prob, &mut rows, layer_tol, par) {
            flipped[ra] = true;
            flipped[rr] = true;
            touched.push(ra);
            touched.push(rr);
            moves += 1;
        }
    }
    (moves, touched)
}

/// The cheap prices stall: price removals and additions with the refit
/// (exact, the rows being independent) and pair the best ones across rows.
/// Only flips the support; the refit at the end of the sweep realises
/// exactly the priced change. Returns `(receiving row, donor row)` per move.
fn exact_budget_moves(
    prob: &Problem<'_>,
    rows: &mut [RowMut<'_>],
    layer_tol: f64,
    par: Par,
) -> Vec<(usize, usize)> {
    let a = prob.a;
    let mut prices: Vec<exact::Prices> = vec![(None, None); rows.len()];
    let items: Vec<_> = rows.iter().zip(prices.iter_mut()).collect();
    for_each(items, par, |(row, pr)| *pr = exact::budget_prices(a, row));
    let rems: Vec<_> = prices.iter().map(|p| p.0).collect();
    let adds: Vec<_> = prices.iter().map(|p| p.1).collect();
    let mut done = Vec::new();
    for (ra, j, rr, i, _) in swap::pair_rows(&adds, &rems, layer_tol) {
        exact::flip(a, &mut rows[rr], &exact::Move { delta: 0.0, out: vec![i], inn: vec![] });
        rows[ra].keep[j] = true;
        done.push((ra, rr));
    }
    done
}

/// Keep the best state: every move and refit lowers `f` exactly (per row,
/// or in total for per-layer scope, where a donor row rises), so an increase
/// can only be rounding; restore the rows it affects from `before`. Returns
/// the restored rows.
fn restore_worse(
    prob: &Problem<'_>,
    state: &mut State,
    before: &Snapshot,
    layer: bool,
) -> Vec<usize> {
    let (d_out, d_in) = (prob.d_out, prob.d_in);
    let restore: Vec<usize> = if layer {
        let (now, was) = (state.total(), before.f.iter().sum::<f64>());
        debug_assert!(
            now <= was + 1e-9 * prob.dense.iter().sum::<f64>(),
            "objective rose from {was} to {now}"
        );
        if now > was {
            (0..d_out).collect()
        } else {
            Vec::new()
        }
    } else {
        (0..d_out)
            .filter(|&r| {
                debug_assert!(
                    state.f[r] <= before.f[r] + 1e-9 * prob.dense[r],
                    "row {r}: objective rose from {} to {}",
                    before.f[r],
                    state.f[r]
                );
                state.f[r] > before.f[r]
            })
            .collect()
    };
    for &r in &restore {
        let rg = r * d_in..(r + 1) * d_in;
        state.w_hat[rg.clone()].copy_from_slice(&before.w_hat[rg.clone()]);
        state.keep[rg.clone()].copy_from_slice(&before.keep[rg.clone()]);
        state.f[r] = gradient_row(
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

/// One swap sweep over the active rows, in blocks of [`ROW_BLOCK`] rows.
/// Rows in `moved` (a budget move came) skip the moves priced with the
/// refit; rows in `flipped` skip the sweep. Returns the swaps accepted per
/// row.
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
    let rows = state.rows_mut(d_in);
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
        cheap_swaps(prob, &mut rows, &ids, &row_tol, pattern, sw);
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

/// The fixed-others swaps of one block of rows (`ids`: their positions in
/// the block, `sw`: the block's swap counts).
fn cheap_swaps(
    prob: &Problem<'_>,
    rows: &mut [RowMut<'_>],
    ids: &[usize],
    row_tol: &[f64],
    pattern: Pattern,
    sw: &mut [usize],
) {
    let d_in = prob.d_in;
    match pattern {
        Pattern::NofM { m, .. } => {
            for (bi, (row, &i)) in rows.iter_mut().zip(ids).enumerate() {
                sw[i] = swap::apply_nm_row(prob.a, &prob.inv_diag, row, m, row_tol[bi]).0;
            }
        }
        Pattern::Unstructured { .. } => {
            let mut avail = vec![0.0; rows.len() * d_in];
            let mut cands: Vec<Vec<Cand>> = vec![Vec::new(); rows.len()];
            swap::score_block(
                prob.a,
                prob.a32.as_ref(),
                &prob.inv_diag,
                rows,
                row_tol,
                &mut avail,
                &mut cands,
            );
            for (bi, (row, &i)) in rows.iter_mut().zip(ids).enumerate() {
                let av = &mut avail[bi * d_in..(bi + 1) * d_in];
                sw[i] =
                    swap::apply_row(prob.a, &prob.inv_diag, row, &mut cands[bi], row_tol[bi], av).0;
            }
        }
    }
}
