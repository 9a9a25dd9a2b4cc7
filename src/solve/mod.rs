//! Per-layer pruning solvers: pure kernels, matrices in, pruned matrices out.
//!
//! This module owns the numerical job of lopper. Given one linear layer's dense
//! weight `W` (`d_out x d_in`, rows are output units) and the Gram matrix of its
//! calibration inputs `H = X^T X` (`d_in x d_in`), a solver returns a pruned
//! weight `Ŵ` that obeys a sparsity [`Pattern`] and an [`SolveInfo`] that feeds
//! the report. Nothing here touches files, flags or the terminal.
//!
//! Every solver works on the ridge-regularised matrix
//!
//! ```text
//! A = H + λ I,   λ = α · mean(diag(H))          (see [`ridge_lambda`])
//! ```
//!
//! and, row by row, on the objective `f(ŵ) = (w − ŵ)ᵀ A (w − ŵ)`, which is
//! `‖X wᵀ − X ŵᵀ‖² + λ ‖w − ŵ‖²`: the squared output error on the calibration
//! rows plus a ridge penalty that keeps kept weights close to their trained
//! values where the calibration data says little about them.
//!
//! Submodules, one per step:
//! - [`budget`]: how many weights each row / the layer keeps.
//! - [`allocate`]: per-layer sparsities under one global budget.
//! - [`mask`]: top-k selection of a score matrix under a pattern.
//! - [`baseline`]: `magnitude` and `scaled` (score-only, no weight update).
//! - [`obs`]: the column-sequential Optimal Brain Surgeon sweep.
//! - [`objective`]: objective and relative errors.
//! - [`l0`]: refit and local search for the L0-constrained problem.
//! - [`group`]: structured pruning: which input columns (neurons, heads) a
//!   layer keeps, shared by every row, with the exact refit.

pub mod allocate;
pub mod baseline;
pub mod budget;
pub mod certify;
pub mod group;
pub mod l0;
pub mod mask;
mod names;
pub mod objective;
pub mod obs;

use faer::{Mat, MatRef, Par};

/// Whether an unstructured budget applies to each output row or to the layer.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Scope {
    /// Every output row keeps the same number of weights.
    Row,
    /// One budget for the whole matrix; rows may keep different counts.
    Layer,
}

/// The sparsity pattern a pruned layer must obey.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Pattern {
    /// A fraction `sparsity` in `[0, 1)` of the weights are zero.
    Unstructured {
        /// Fraction of zeros.
        sparsity: f64,
        /// Where the budget applies.
        scope: Scope,
    },
    /// At most `n` nonzeros in each consecutive group of `m` inputs of a row.
    NofM {
        /// Kept per group.
        n: usize,
        /// Group width; must divide `d_in`.
        m: usize,
    },
}

/// Which solver prunes the layer.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Method {
    /// Keep the largest `|w_ij|`.
    Magnitude,
    /// Keep the largest `|w_ij| · ‖X_:,j‖` (Sun et al. 2023).
    Scaled,
    /// One-shot Optimal Brain Surgeon column sweep (Hassibi & Stork 1993;
    /// Frantar & Alistarh 2023).
    Obs,
    /// L0-constrained ridge least squares by local search.
    L0,
}

impl Method {
    /// The name used on the command line and in reports.
    pub fn name(self) -> &'static str {
        match self {
            Method::Magnitude => "magnitude",
            Method::Scaled => "scaled",
            Method::Obs => "obs",
            Method::L0 => "l0",
        }
    }
}

/// Settings of the local-search solver.
#[derive(Clone, Debug, PartialEq)]
pub struct L0Params {
    /// Maximum number of swap sweeps per layer. Default 20 (a 1536-wide
    /// layer converges in 6–7 sweeps at 50% and 90% sparsity).
    pub max_sweeps: usize,
    /// Wall-clock budget per layer in seconds (`None`: unlimited).
    pub max_seconds: Option<f64>,
    /// Record the objective after every sweep in [`SolveInfo::trace`].
    pub trace: bool,
    /// Largest support refit by a dense per-row Cholesky solve of `A_SS`;
    /// rows keeping more are refit together by batched conjugate gradients.
    /// `None` (default): see [`L0Params::chol_limit`].
    pub chol_max: Option<usize>,
    /// Relative residual `‖g_S‖ / ‖(A w)_S‖` at which a CG refit of a row
    /// stops. Default `1e-6`: the objective error left is quadratic in it,
    /// and swap prices use the exact gradient of whatever the refit returns.
    /// The returned weights of CG rows are refit to this tolerance.
    pub cg_tol: f64,
    /// Iteration cap of the final CG refit. Default 500.
    pub cg_max_iter: usize,
    /// Iteration cap of the CG refits of the starts and between sweeps
    /// (warm-started, so each lowers `f` without reaching `cg_tol`; the
    /// swaps price exactly from whatever point they leave). Default 3.
    pub cg_sweep_iter: usize,
    /// A move is accepted when it lowers the row objective by more than
    /// `swap_tol · wᵀAw` (the objective of pruning the whole row). Default
    /// `1e-12`.
    pub swap_tol: f64,
    /// Rows keeping at most this many weights also try swaps priced with
    /// the refit (`l0/exact.rs`) once the cheap swaps stop improving; cost
    /// `2 d_in k²` per row and sweep. Default 64.
    pub exact_max_k: usize,
}

impl L0Params {
    /// The support size up to which refits use per-row Cholesky:
    /// `k ≤ cbrt(240 · d_in²)` (≈ 830 for `d_in = 1536`, ≈ 3070 for 11008).
    /// A factorisation costs `k³/3` per row and refit; one CG iteration costs
    /// `2·d_in²` per row, and a solve runs a few capped CG refits plus one to
    /// `cg_tol`. How many iterations that takes depends on the conditioning
    /// of `A_SS`: on synthetic activations CG won at `k = 768, d_in = 1536`
    /// (5.4 s against about 15 s for the layer), on the BERT encoder's real,
    /// outlier-heavy activations Cholesky won at the same size (3.5 s against
    /// 8.5 s for a 384 x 1536 layer). The limit follows the real data.
    pub fn chol_limit(&self, d_in: usize) -> usize {
        self.chol_max.unwrap_or_else(|| (240.0 * (d_in as f64).powi(2)).cbrt() as usize)
    }
}

impl Default for L0Params {
    fn default() -> Self {
        L0Params {
            max_sweeps: 20,
            max_seconds: None,
            trace: false,
            chol_max: None,
            cg_tol: 1e-6,
            cg_max_iter: 500,
            cg_sweep_iter: 3,
            swap_tol: 1e-12,
            exact_max_k: 64,
        }
    }
}

/// Settings shared by all solvers.
#[derive(Clone, Debug, PartialEq)]
pub struct SolveParams {
    /// Which solver.
    pub method: Method,
    /// Which pattern.
    pub pattern: Pattern,
    /// Ridge strength α; `λ = α · mean(diag(H))`.
    pub ridge_alpha: f64,
    /// Column block width of the OBS sweep (mask chosen per block).
    pub obs_block: usize,
    /// Local-search settings (used by [`Method::L0`]).
    pub l0: L0Params,
}

impl Default for SolveParams {
    fn default() -> Self {
        SolveParams {
            method: Method::L0,
            pattern: Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row },
            ridge_alpha: 0.01,
            obs_block: 128,
            l0: L0Params::default(),
        }
    }
}

/// What a solve did, for the report.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct SolveInfo {
    /// Ridge λ actually added to the diagonal.
    pub lambda: f64,
    /// `Σ_r f_r` at the starting point of the solver (for one-shot methods,
    /// equal to the final value).
    pub objective_initial: f64,
    /// `Σ_r f_r` of the returned weights.
    pub objective_final: f64,
    /// Which initialisation the local search started from, if any.
    pub init: Option<&'static str>,
    /// Local-search sweeps run.
    pub sweeps: usize,
    /// Swap moves accepted (per-layer scope: including moves of budget
    /// between rows).
    pub swaps: usize,
    /// Conjugate-gradient iterations spent in refits (0 when every refit was
    /// a dense Cholesky solve).
    pub refit_iterations: usize,
    /// Objective after every sweep (when tracing), starting with the initial one.
    pub trace: Vec<f64>,
    /// Wall-clock seconds per phase of the local search, in order of first
    /// use (empty for the one-shot methods).
    pub phases: Vec<(&'static str, f64)>,
}

/// A numerical failure, carrying its diagnostic.
#[derive(Clone, Debug, PartialEq)]
#[non_exhaustive]
pub enum SolveError {
    /// The ridge-regularised Gram matrix `A = H + λI` (or the block `A_SS`
    /// of one output row's kept inputs) is not positive definite: a Cholesky
    /// pivot was not positive.
    NotPositiveDefinite {
        /// Ridge λ that was added to the diagonal of `H`.
        lambda: f64,
        /// The output row (row of the weight) whose refit failed, when the
        /// failure is particular to one row; `None` when `A` itself failed.
        row: Option<usize>,
    },
    /// The pattern cannot be applied to a layer of this width.
    BadPattern {
        /// What is wrong.
        reason: String,
    },
}

impl std::fmt::Display for SolveError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            SolveError::NotPositiveDefinite { lambda, row } => {
                write!(f, "Gram matrix plus ridge λ={lambda:.3e} is not positive definite")?;
                if let Some(r) = row {
                    write!(f, " (output row {r})")?;
                }
                write!(
                    f,
                    "; raise --ridge (e.g. --ridge 0.1) or check the calibration inputs for \
                     constant or duplicated columns"
                )
            }
            SolveError::BadPattern { reason } => write!(f, "{reason}"),
        }
    }
}

impl std::error::Error for SolveError {}

/// A pruned layer.
#[derive(Clone, Debug)]
pub struct Pruned {
    /// The pruned weight, `d_out x d_in`; zero exactly where pruned.
    pub weight: Mat<f64>,
    /// Solver diagnostics.
    pub info: SolveInfo,
}

/// `λ = α · mean(diag(H))`; falls back to `α` when `H` has a zero diagonal
/// (all-zero activations), so `A` stays positive definite.
pub fn ridge_lambda(h: MatRef<'_, f64>, alpha: f64) -> f64 {
    let n = h.nrows();
    if n == 0 {
        return alpha;
    }
    let mean = (0..n).map(|j| h[(j, j)]).sum::<f64>() / n as f64;
    if mean > 0.0 {
        alpha * mean
    } else {
        alpha
    }
}

/// `A = H + λ I`. A dead input (`H_jj = 0`, an all-zero input column) never
/// changes the output, so pruning its weight costs only the ridge term
/// `λ (w − ŵ)²`, which is exactly what `A_jj = λ` charges; with `λ = 0` it
/// gets a tiny diagonal instead (`1e-12 · mean(diag H)`), so that `A` stays
/// invertible and its weight is pruned first, at practically no cost.
pub fn regularised(h: MatRef<'_, f64>, lambda: f64) -> Mat<f64> {
    let mut a = h.to_owned();
    let n = a.nrows();
    let dead = if lambda > 0.0 {
        lambda
    } else {
        let mean = (0..n).map(|j| h[(j, j)]).sum::<f64>() / n.max(1) as f64;
        if mean > 0.0 && mean.is_finite() {
            1e-12 * mean
        } else {
            1e-12
        }
    };
    for j in 0..n {
        if a[(j, j)] == 0.0 {
            a[(j, j)] = dead;
        } else {
            a[(j, j)] += lambda;
        }
    }
    a
}

/// Peak bytes a solve of a `d_out x d_in` layer needs, beyond the caller's
/// copies of `W` and `H`: `A` and the OBS factors (`O(d_in²)`, up to four
/// `d_in x d_in` f64 matrices alive at once) and the solver's working
/// matrices (`O(d_out·d_in)`, up to twelve for the local search, which also
/// keeps an f32 copy of `A`).
pub fn memory_estimate(d_out: usize, d_in: usize, method: Method) -> u128 {
    let (sq, rect) = (d_in as u128 * d_in as u128 * 8, d_out as u128 * d_in as u128 * 8);
    match method {
        Method::Magnitude | Method::Scaled => sq + 3 * rect,
        Method::Obs => 5 * sq + 4 * rect,
        Method::L0 => 6 * sq + 12 * rect,
    }
}

/// Check that `pattern` can be applied to a layer with `d_in` inputs.
pub fn check_pattern(pattern: Pattern, d_in: usize) -> Result<(), SolveError> {
    match pattern {
        Pattern::Unstructured { sparsity, .. } => {
            if !(0.0..1.0).contains(&sparsity) {
                return Err(SolveError::BadPattern {
                    reason: format!("sparsity {sparsity} is outside [0, 1)"),
                });
            }
        }
        Pattern::NofM { n, m } => {
            if m == 0 || n == 0 || n > m {
                return Err(SolveError::BadPattern {
                    reason: format!("pattern {n}:{m} needs 0 < N <= M"),
                });
            }
            if d_in % m != 0 {
                return Err(SolveError::BadPattern {
                    reason: format!(
                        "pattern {n}:{m}: M={m} does not divide the input width {d_in}"
                    ),
                });
            }
        }
    }
    Ok(())
}

/// Prune one layer. `w` is `d_out x d_in`, `h` is the Gram matrix `XᵀX` of the
/// calibration inputs (`d_in x d_in`, no ridge added).
///
/// # Errors
/// [`SolveError::BadPattern`] when the pattern does not fit `d_in`;
/// [`SolveError::NotPositiveDefinite`] when `A` cannot be factored.
///
/// # Panics
/// When `h` is not square with side `d_in`.
#[track_caller]
pub fn prune_layer(
    w: MatRef<'_, f64>,
    h: MatRef<'_, f64>,
    params: &SolveParams,
    par: Par,
) -> Result<Pruned, SolveError> {
    assert_eq!(h.nrows(), w.ncols(), "Gram matrix side must equal d_in");
    assert_eq!(h.ncols(), w.ncols(), "Gram matrix must be square");
    check_pattern(params.pattern, w.ncols())?;
    let lambda = ridge_lambda(h, params.ridge_alpha);
    let a = regularised(h, lambda);
    let mut pruned = match params.method {
        Method::Magnitude => baseline::magnitude(w, params.pattern),
        Method::Scaled => baseline::scaled(w, h, params.pattern),
        Method::Obs => obs::sweep(w, a.as_ref(), lambda, params.pattern, params.obs_block, par)?,
        Method::L0 => l0::solve(w, a.as_ref(), lambda, params, par)?,
    };
    pruned.info.lambda = lambda;
    if params.method != Method::L0 {
        let f = objective::objective(w, pruned.weight.as_ref(), a.as_ref(), par);
        pruned.info.objective_initial = f;
        pruned.info.objective_final = f;
    }
    Ok(pruned)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn indefinite_gram_reports_lambda_and_fix() {
        // Hand-worked: H = [[2, 3], [3, 2]] has eigenvalues 2 ± 3 = 5, −1.
        // With α = 0.01, λ = α · mean(diag H) = 0.01 · 2 = 0.02 and A = H + λI
        // keeps the eigenvalue −0.98, so its Cholesky factorisation fails on
        // A itself (no particular output row).
        let h = faer::mat![[2.0, 3.0], [3.0, 2.0]];
        let w = faer::mat![[1.0, -1.0], [0.5, 2.0]];
        for method in [Method::Obs, Method::L0] {
            let params = SolveParams {
                method,
                pattern: Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row },
                ridge_alpha: 0.01,
                ..SolveParams::default()
            };
            let err = prune_layer(w.as_ref(), h.as_ref(), &params, Par::Seq).unwrap_err();
            assert_eq!(
                err,
                SolveError::NotPositiveDefinite { lambda: 0.02, row: None },
                "{method:?}"
            );
            let msg = err.to_string();
            for want in
                ["λ=2.000e-2", "not positive definite", "raise --ridge", "duplicated columns"]
            {
                assert!(msg.contains(want), "{method:?}: {msg:?} lacks {want:?}");
            }
            assert!(!msg.contains("row"), "{msg:?}");
        }
        // A negative-definite H (−I) with ridge 0: `ridge_lambda` falls back
        // to α = 0 when mean(diag H) ≤ 0, so the reported λ is 0, not NaN.
        let h = faer::mat![[-1.0, 0.0], [0.0, -1.0]];
        let params =
            SolveParams { method: Method::Obs, ridge_alpha: 0.0, ..SolveParams::default() };
        let err = prune_layer(w.as_ref(), h.as_ref(), &params, Par::Seq).unwrap_err();
        assert_eq!(err, SolveError::NotPositiveDefinite { lambda: 0.0, row: None });
        assert!(err.to_string().contains("λ=0.000e0"), "{err}");
    }

    #[test]
    fn dead_inputs_are_free_to_prune() {
        // Input 0 never fires (its column of X is zero, so is row/column 0
        // of H); inputs 1..3 are independent with H = I on them. Pruning
        // the dead weight changes no output, so with --ridge 0 at 25% per
        // row every method that reads H must prune it, however large it is,
        // and the error on the calibration rows is zero; this needs A to
        // stay invertible (A_00 > 0). With λ > 0 pruning it costs λ·w², the
        // ridge term of the objective, and nothing more (A_00 = λ; it was
        // 1 + λ, a cost unrelated to the objective).
        let h = faer::mat![
            [0.0, 0.0, 0.0, 0.0],
            [0.0, 1.0, 0.0, 0.0],
            [0.0, 0.0, 1.0, 0.0],
            [0.0, 0.0, 0.0, 1.0],
        ];
        let w = faer::mat![[10.0, 1.0, -1.0, 0.5], [-8.0, 0.25, 2.0, 1.0]];
        let a = regularised(h.as_ref(), 0.0075);
        assert_eq!(a[(0, 0)], 0.0075);
        assert_eq!(a[(1, 1)], 1.0075);
        let a0 = regularised(h.as_ref(), 0.0)[(0, 0)];
        assert!(a0 > 0.0 && a0 < 1e-9, "{a0}");
        let alpha = 0.0;
        for method in [Method::Obs, Method::L0] {
            let params = SolveParams {
                method,
                pattern: Pattern::Unstructured { sparsity: 0.25, scope: Scope::Row },
                ridge_alpha: alpha,
                ..SolveParams::default()
            };
            let p = prune_layer(w.as_ref(), h.as_ref(), &params, Par::Seq).unwrap();
            for r in 0..2 {
                assert_eq!(p.weight[(r, 0)], 0.0, "{method:?} α={alpha} row {r}");
                for c in 1..4 {
                    assert!((p.weight[(r, c)] - w[(r, c)]).abs() < 1e-9, "{method:?}");
                }
            }
            let e = objective::relative_error(w.as_ref(), p.weight.as_ref(), h.as_ref(), Par::Seq);
            assert!(e < 1e-12, "{method:?} α={alpha}: {e}");
        }
    }

    #[test]
    fn row_failure_message_names_the_row() {
        let err = SolveError::NotPositiveDefinite { lambda: 1.234e-3, row: Some(17) };
        assert_eq!(
            err.to_string(),
            "Gram matrix plus ridge λ=1.234e-3 is not positive definite (output row 17); raise \
             --ridge (e.g. --ridge 0.1) or check the calibration inputs for constant or \
             duplicated columns"
        );
    }
}
