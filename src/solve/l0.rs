//! L0-constrained ridge least squares by local search (placeholder).

use super::{Pruned, SolveError, SolveParams};
use faer::{MatRef, Par};

/// Solve the L0-constrained problem for every row of `w`.
///
/// # Errors
/// As [`super::prune_layer`].
pub fn solve(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    params: &SolveParams,
    par: Par,
) -> Result<Pruned, SolveError> {
    super::obs::sweep(w, a, params.pattern, params.obs_block, par)
}
