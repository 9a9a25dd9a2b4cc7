//! The per-layer objective and the relative reconstruction errors the report
//! shows.
//!
//! With `D = W − Ŵ` (rows are output units):
//!
//! ```text
//! objective      Σ_r (w_r − ŵ_r)ᵀ A (w_r − ŵ_r) = Σ (D A) ∘ D
//! relative error ‖X Wᵀ − X Ŵᵀ‖²_F / ‖X Wᵀ‖²_F = tr(D H Dᵀ) / tr(W H Wᵀ)
//! ```
//!
//! Both are accumulated in f64 from an f64 matrix product.

use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, MatRef, Par};

/// `Σ_r d_rᵀ M d_r` per row `r` of `d` (`M` symmetric).
pub fn row_quadratic_forms(d: MatRef<'_, f64>, m: MatRef<'_, f64>, par: Par) -> Vec<f64> {
    let mut dm = Mat::<f64>::zeros(d.nrows(), d.ncols());
    matmul(dm.as_mut(), Accum::Replace, d, m, 1.0, par);
    (0..d.nrows()).map(|r| (0..d.ncols()).map(|c| dm[(r, c)] * d[(r, c)]).sum()).collect()
}

/// `Σ_r (w_r − ŵ_r)ᵀ M (w_r − ŵ_r)`.
pub fn objective(w: MatRef<'_, f64>, what: MatRef<'_, f64>, m: MatRef<'_, f64>, par: Par) -> f64 {
    let d = Mat::from_fn(w.nrows(), w.ncols(), |r, c| w[(r, c)] - what[(r, c)]);
    row_quadratic_forms(d.as_ref(), m, par).iter().sum()
}

/// `tr(D H Dᵀ) / tr(W H Wᵀ)`; zero when the layer's output is zero on these
/// rows and the pruned output is too, infinity when only the dense one is.
pub fn relative_error(
    w: MatRef<'_, f64>,
    what: MatRef<'_, f64>,
    h: MatRef<'_, f64>,
    par: Par,
) -> f64 {
    let num = objective(w, what, h, par).max(0.0);
    let den: f64 = row_quadratic_forms(w, h, par).iter().sum();
    if den > 0.0 {
        num / den
    } else if num > 0.0 {
        f64::INFINITY
    } else {
        // Dense outputs all zero: 0/0, the relative error is undefined.
        f64::NAN
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_error_matches_direct_outputs() {
        // Direct definition ‖X Wᵀ − X Ŵᵀ‖² / ‖X Wᵀ‖² against the Gram form.
        let x = Mat::from_fn(7, 3, |i, j| ((i * 5 + j * 3) % 7) as f64 - 2.5);
        let w = Mat::from_fn(2, 3, |r, c| (r as f64 + 1.0) * (c as f64 - 0.7));
        let what = Mat::from_fn(2, 3, |r, c| if c == 1 { 0.0 } else { w[(r, c)] });
        let h = x.transpose() * &x;
        let y = &x * w.transpose();
        let yh = &x * what.transpose();
        let num: f64 = (0..7)
            .flat_map(|i| (0..2).map(move |r| (i, r)))
            .map(|(i, r)| (y[(i, r)] - yh[(i, r)]).powi(2))
            .sum();
        let den: f64 =
            (0..7).flat_map(|i| (0..2).map(move |r| (i, r))).map(|(i, r)| y[(i, r)].powi(2)).sum();
        let got = relative_error(w.as_ref(), what.as_ref(), h.as_ref(), Par::Seq);
        let want = num / den;
        assert!((got - want).abs() <= 1e-12 * want.max(1.0), "got {got}, want {want}");
    }
}
