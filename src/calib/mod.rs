//! Calibration statistics: the Gram matrices a layer's solver and report need.
//!
//! A layer sees calibration rows `x_i` (its inputs on calibration data). The
//! rows are split, deterministically, into the rows the solver fits and the
//! held-out rows it never sees; each part is reduced to its Gram matrix
//!
//! ```text
//! H = Σ_i x_i x_iᵀ = XᵀX            (d_in x d_in)
//! ```
//!
//! which is all the least-squares objective needs: `‖X (w − ŵ)‖² = (w − ŵ)ᵀ H (w − ŵ)`.
//! Gram matrices are accumulated in f64 from chunks of rows, so memory is
//! `O(d_in²)` whatever the number of rows, and two accumulators over
//! disjoint rows merge by addition.

use faer::linalg::matmul::triangular::{self, BlockStructure};
use faer::{Accum, Mat, MatRef, Par};

/// Is row `i` of `n` held out at `fraction`? Row `i` is held out when
/// `⌊(i+1)·f⌋ > ⌊i·f⌋`, which spreads `⌊n·f⌋` held-out rows evenly through the
/// file (every 10th row at the default 0.1) and needs no random seed.
pub fn is_holdout(i: usize, fraction: f64) -> bool {
    fraction > 0.0 && ((i + 1) as f64 * fraction).floor() > (i as f64 * fraction).floor()
}

/// Number of held-out rows among `n` at `fraction`.
pub fn holdout_count(n: usize, fraction: f64) -> usize {
    (0..n).filter(|&i| is_holdout(i, fraction)).count()
}

/// A running `XᵀX` over the rows seen so far.
#[derive(Clone, Debug)]
pub struct Gram {
    h: Mat<f64>,
    rows: usize,
}

impl Gram {
    /// An empty accumulator for inputs of width `d`.
    pub fn new(d: usize) -> Self {
        Gram { h: Mat::zeros(d, d), rows: 0 }
    }

    /// The Gram matrix of the inputs `idx` only, `H[idx, idx]`, over the
    /// same rows.
    pub fn restricted(&self, idx: &[usize]) -> Self {
        Gram {
            h: Mat::from_fn(idx.len(), idx.len(), |a, b| self.h[(idx[a], idx[b])]),
            rows: self.rows,
        }
    }

    /// Add rows given row-major in `x` (`x.len() = rows · d`): `H += XᵀX`.
    ///
    /// # Panics
    /// When `x.len()` is not a multiple of the width.
    #[track_caller]
    pub fn add_rows(&mut self, x: &[f64], par: Par) {
        let d = self.h.nrows();
        assert!(d > 0 && x.len() % d == 0, "row data is not a multiple of the width {d}");
        let n = x.len() / d;
        if n == 0 {
            return;
        }
        // Row-major X (n x d) is column-major Xᵀ (d x n). H is symmetric:
        // accumulate its lower triangle (half the flops), then mirror it.
        let xt = MatRef::from_column_major_slice(x, d, n);
        triangular::matmul(
            self.h.as_mut(),
            BlockStructure::TriangularLower,
            Accum::Add,
            xt,
            BlockStructure::Rectangular,
            xt.transpose(),
            BlockStructure::Rectangular,
            1.0,
            par,
        );
        for c in 1..d {
            for r in 0..c {
                self.h[(r, c)] = self.h[(c, r)];
            }
        }
        self.rows += n;
    }

    /// Add the statistics of disjoint rows.
    pub fn merge(&mut self, other: &Gram) {
        self.h += &other.h;
        self.rows += other.rows;
    }

    /// Rows accumulated.
    pub fn rows(&self) -> usize {
        self.rows
    }

    /// The Gram matrix.
    pub fn matrix(&self) -> MatRef<'_, f64> {
        self.h.as_ref()
    }
}

/// The two Gram matrices of one layer: fitted rows and held-out rows.
#[derive(Clone, Debug)]
pub struct LayerGrams {
    /// Rows the solver fits.
    pub calib: Gram,
    /// Rows the solver never sees.
    pub holdout: Gram,
}

impl LayerGrams {
    /// Empty statistics for inputs of width `d`.
    pub fn new(d: usize) -> Self {
        LayerGrams { calib: Gram::new(d), holdout: Gram::new(d) }
    }

    /// The statistics of the inputs `idx` only: `H[idx, idx]` of both parts.
    pub fn restricted(&self, idx: &[usize]) -> Self {
        LayerGrams { calib: self.calib.restricted(idx), holdout: self.holdout.restricted(idx) }
    }

    /// Add a chunk of rows (row-major) whose first row has global index
    /// `first`, routing each row by [`is_holdout`].
    pub fn add_chunk(&mut self, x: &[f64], first: usize, fraction: f64, par: Par) {
        let d = self.calib.h.nrows();
        let n = x.len() / d;
        let (mut fit, mut held) = (Vec::with_capacity(x.len()), Vec::new());
        for i in 0..n {
            let row = &x[i * d..(i + 1) * d];
            if is_holdout(first + i, fraction) {
                held.extend_from_slice(row);
            } else {
                fit.extend_from_slice(row);
            }
        }
        self.calib.add_rows(&fit, par);
        self.holdout.add_rows(&held, par);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn holdout_takes_every_tenth_row() {
        let held: Vec<usize> = (0..35).filter(|&i| is_holdout(i, 0.1)).collect();
        assert_eq!(held, vec![9, 19, 29]);
        assert_eq!(holdout_count(1000, 0.1), 100);
        assert_eq!(holdout_count(1000, 0.25), 250);
        assert_eq!(holdout_count(1000, 0.0), 0);
    }

    #[test]
    fn chunked_gram_equals_direct_product() {
        // Direct XᵀX by definition, against chunked accumulation and merge.
        let (n, d) = (23, 4);
        let x: Vec<f64> = (0..n * d).map(|i| ((i * 7919) % 101) as f64 / 10.0 - 5.0).collect();
        let mut want = Mat::<f64>::zeros(d, d);
        for i in 0..n {
            for a in 0..d {
                for b in 0..d {
                    want[(a, b)] += x[i * d + a] * x[i * d + b];
                }
            }
        }
        let mut g = LayerGrams::new(d);
        g.add_chunk(&x[..10 * d], 0, 0.0, Par::Seq);
        g.add_chunk(&x[10 * d..], 10, 0.0, Par::Seq);
        assert_eq!(g.calib.rows(), n);
        let diff = (g.calib.matrix() - &want).norm_max();
        assert!(diff <= 1e-12 * want.norm_max(), "max diff {diff:e}");

        let mut split = LayerGrams::new(d);
        split.add_chunk(&x, 0, 0.2, Par::Seq);
        assert_eq!(split.holdout.rows(), 4);
        // H[idx, idx] by definition.
        let idx = [3, 0];
        let r = split.calib.restricted(&idx);
        assert_eq!(r.rows(), split.calib.rows());
        for (a, &i) in idx.iter().enumerate() {
            for (b, &j) in idx.iter().enumerate() {
                assert_eq!(r.matrix()[(a, b)], split.calib.matrix()[(i, j)]);
            }
        }
        let mut total = split.calib.clone();
        total.merge(&split.holdout);
        assert!((total.matrix() - &want).norm_max() <= 1e-12 * want.norm_max());
    }
}
