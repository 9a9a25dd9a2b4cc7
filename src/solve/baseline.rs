//! Score-only baselines: a mask from a score, no weight update.
//!
//! - `magnitude`: score `|w_ij|` (common practice).
//! - `scaled`: score `|w_ij| · ‖X_:,j‖`, where `‖X_:,j‖ = sqrt(H_jj)` is the
//!   norm of input `j` over the calibration rows (Sun, Liu, Bair & Kolter
//!   2023, "A Simple and Effective Pruning Approach for Large Language Models").

use super::mask::select;
use super::{Pattern, Pruned, SolveInfo};
use faer::{Mat, MatRef};

/// Keep the largest `|w_ij|` under `pattern`.
pub fn magnitude(w: MatRef<'_, f64>, pattern: Pattern) -> Pruned {
    let scores = Mat::from_fn(w.nrows(), w.ncols(), |r, c| w[(r, c)].abs());
    let mask = select(scores.as_ref(), pattern);
    Pruned { weight: mask.apply(w), info: SolveInfo::default() }
}

/// Scores `|w_ij| · sqrt(H_jj)`.
pub fn scaled_scores(w: MatRef<'_, f64>, h: MatRef<'_, f64>) -> Mat<f64> {
    let norms: Vec<f64> = (0..w.ncols()).map(|j| h[(j, j)].max(0.0).sqrt()).collect();
    Mat::from_fn(w.nrows(), w.ncols(), |r, c| w[(r, c)].abs() * norms[c])
}

/// Keep the largest `|w_ij| · ‖X_:,j‖` under `pattern`.
pub fn scaled(w: MatRef<'_, f64>, h: MatRef<'_, f64>, pattern: Pattern) -> Pruned {
    let mask = select(scaled_scores(w, h).as_ref(), pattern);
    Pruned { weight: mask.apply(w), info: SolveInfo::default() }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::solve::Scope;

    #[test]
    fn per_row_half_magnitude_by_hand() {
        // Worked by hand: each row keeps its two largest |w|.
        let w = faer::mat![[0.1, -3.0, 2.0, 0.5], [4.0, 0.0, -0.2, -1.0], [1.0, 1.0, -1.0, 2.0]];
        let p = magnitude(w.as_ref(), Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row });
        let want = faer::mat![[0.0, -3.0, 2.0, 0.0], [4.0, 0.0, 0.0, -1.0], [1.0, 0.0, 0.0, 2.0]];
        assert_eq!(p.weight, want);
    }

    #[test]
    fn scaled_prefers_loud_inputs() {
        // Input 1 is 10x louder than input 0, so its smaller weight survives.
        let w = faer::mat![[1.0, 0.5]];
        let h = faer::mat![[1.0, 0.0], [0.0, 100.0]];
        let p = scaled(
            w.as_ref(),
            h.as_ref(),
            Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row },
        );
        assert_eq!(p.weight, faer::mat![[0.0, 0.5]]);
        let p = magnitude(w.as_ref(), Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row });
        assert_eq!(p.weight, faer::mat![[1.0, 0.0]]);
    }
}
