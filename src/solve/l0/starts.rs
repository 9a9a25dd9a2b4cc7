//! Step 1 of the local search: the starting point, two supports refit and
//! the better one kept.
//!
//! - The OBS start: the support of the column sweep
//!   ([`crate::solve::obs::sweep`]), completed to the budget and refit
//!   warm-started from the sweep's weights.
//! - The scaled start: the activation-scaled magnitude mask
//!   `|w_ij|·sqrt(A_jj)` ([`crate::solve::baseline::scaled_scores`]), refit
//!   from `W`. Built only when every row of the OBS start is refit by
//!   Cholesky and `max_seconds` is not spent.
//!
//! Both are refit the same way as a sweep's changed rows
//! ([`super::refit::refit_rows`]): exactly on rows within the Cholesky limit,
//! by capped CG above it. Per row (per-row scope and N:M) or for the whole
//! layer (per-layer scope, whose row budgets differ between the starts) the
//! lower objective wins; [`Start::init`] names the result.

use super::refit::{cg_rows, refit_rows};
use super::{Clock, Problem, State};
use crate::solve::baseline::scaled_scores;
use crate::solve::mask::{select, top_k, Mask};
use crate::solve::{budget, obs, Pattern, Scope, SolveError, SolveParams};
use faer::{Mat, MatRef, Par};

/// The chosen starting state.
pub(super) struct Start {
    pub state: State,
    /// `"obs+refit"`, `"scaled+refit"` or `"mixed"` (some rows from each).
    pub init: &'static str,
    /// CG iterations spent in the refits of the starts.
    pub cg_iters: usize,
}

/// Build the starts, refit them and keep the better one (per row, or per
/// layer for per-layer scope).
///
/// # Errors
/// [`SolveError::NotPositiveDefinite`] when `A` or some `A_SS` cannot be
/// factored.
pub(super) fn best(
    prob: &Problem<'_>,
    w: MatRef<'_, f64>,
    params: &SolveParams,
    par: Par,
    clock: &mut Clock,
) -> Result<Start, SolveError> {
    let scores = scaled_scores(w, prob.a);
    let (obs_state, mut cg_iters) = obs_start(prob, w, &scores, params, par, clock)?;
    // The scaled start is skipped when the time budget is already spent, and
    // when some row of the OBS start is refit by CG: large supports, where
    // the OBS start is clearly better (on the 1536-wide benchmark at 50% the
    // scaled start won 114 of 1536 rows and the final error was the same
    // without it) and a second refit of the whole layer costs as much as the
    // OBS sweep.
    let all = vec![true; prob.d_out];
    let large =
        cg_rows(&obs_state.keep, &all, prob.d_in, params.l0.chol_limit(prob.d_in)).contains(&true);
    let scaled_state = if clock.out_of_time() || large {
        None
    } else {
        let keep = mask_support(&select(scores.as_ref(), params.pattern));
        let mut state = start_state(prob, keep, None, params, par);
        cg_iters += refit_rows(prob, &mut state, &all, params, params.l0.cg_sweep_iter, par)?;
        Some(state)
    };
    drop(scores);
    clock.lap("start scaled");
    let layer = matches!(params.pattern, Pattern::Unstructured { scope: Scope::Layer, .. });
    let (state, init) = choose(prob, obs_state, scaled_state, layer);
    Ok(Start { state, init, cg_iters })
}

/// The OBS sweep's support, completed to the budget and refit warm-started
/// from the sweep's weights. Returns the state and the CG iterations.
fn obs_start(
    prob: &Problem<'_>,
    w: MatRef<'_, f64>,
    scores: &Mat<f64>,
    params: &SolveParams,
    par: Par,
    clock: &mut Clock,
) -> Result<(State, usize), SolveError> {
    let d_in = prob.d_in;
    let ob = obs::sweep(w, prob.a, prob.lambda, params.pattern, params.obs_block, par)?;
    clock.lap("obs sweep");
    let mut keep = mask_support(&Mask::nonzeros(ob.weight.as_ref()));
    complete_support(&mut keep, scores, params.pattern);
    let from: Vec<f64> = (0..prob.d_out * d_in).map(|i| ob.weight[(i / d_in, i % d_in)]).collect();
    drop(ob);
    let mut state = start_state(prob, keep, Some(&from), params, par);
    drop(from);
    let all = vec![true; prob.d_out];
    let iters = refit_rows(prob, &mut state, &all, params, params.l0.cg_sweep_iter, par)?;
    clock.lap("start obs");
    Ok((state, iters))
}

/// `ŵ = from ∘ keep` before its refit. A start refit only by Cholesky needs
/// no gradient beforehand; one with CG rows needs it for the warm start.
fn start_state(
    prob: &Problem<'_>,
    keep: Vec<bool>,
    from: Option<&[f64]>,
    params: &SolveParams,
    par: Par,
) -> State {
    let all = vec![true; prob.d_out];
    if cg_rows(&keep, &all, prob.d_in, params.l0.chol_limit(prob.d_in)).contains(&true) {
        State::from_support(prob, keep, from, par)
    } else {
        State::unrefined(prob, keep, from)
    }
}

/// Keep the better start: for the whole layer under per-layer scope (the
/// row budgets differ between the starts), else row by row.
fn choose(
    prob: &Problem<'_>,
    mut obs: State,
    scaled: Option<State>,
    layer: bool,
) -> (State, &'static str) {
    let Some(scaled) = scaled else {
        return (obs, "obs+refit");
    };
    if layer {
        return if obs.total() <= scaled.total() {
            (obs, "obs+refit")
        } else {
            (scaled, "scaled+refit")
        };
    }
    let d_in = prob.d_in;
    let mut took_scaled = 0;
    for r in 0..prob.d_out {
        if scaled.f[r] < obs.f[r] {
            let rg = r * d_in..(r + 1) * d_in;
            obs.w_hat[rg.clone()].copy_from_slice(&scaled.w_hat[rg.clone()]);
            obs.g[rg.clone()].copy_from_slice(&scaled.g[rg.clone()]);
            obs.keep[rg.clone()].copy_from_slice(&scaled.keep[rg]);
            obs.f[r] = scaled.f[r];
            took_scaled += 1;
        }
    }
    let init = match took_scaled {
        0 => "obs+refit",
        t if t == prob.d_out => "scaled+refit",
        _ => "mixed",
    };
    (obs, init)
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
