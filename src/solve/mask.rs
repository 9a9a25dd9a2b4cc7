//! Keep/prune masks and top-k selection of a score matrix under a [`Pattern`].
//!
//! A [`Mask`] is row-major over a `d_out x d_in` layer. [`select`] keeps the
//! highest scores: per row (each row keeps `kept(s, d_in)`), per layer (the
//! matrix keeps `kept(s, d_out·d_in)`), or N:M (each group of `m` consecutive
//! inputs of a row keeps `n`). Ties are broken by position (earlier index is
//! kept), so selection is deterministic.

use super::{budget, Pattern, Scope};
use faer::{Mat, MatRef};
use std::cmp::Ordering;

/// Which weights of a `rows x cols` layer are kept.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Mask {
    rows: usize,
    cols: usize,
    keep: Vec<bool>,
}

impl Mask {
    /// A mask that keeps nothing.
    pub fn empty(rows: usize, cols: usize) -> Self {
        Mask { rows, cols, keep: vec![false; rows * cols] }
    }

    /// The mask of the nonzeros of `w`.
    pub fn nonzeros(w: MatRef<'_, f64>) -> Self {
        let mut m = Mask::empty(w.nrows(), w.ncols());
        for r in 0..w.nrows() {
            for c in 0..w.ncols() {
                m.set(r, c, w[(r, c)] != 0.0);
            }
        }
        m
    }

    /// Number of rows (`d_out`).
    pub fn rows(&self) -> usize {
        self.rows
    }

    /// Number of columns (`d_in`).
    pub fn cols(&self) -> usize {
        self.cols
    }

    /// Is weight `(r, c)` kept?
    #[inline]
    pub fn get(&self, r: usize, c: usize) -> bool {
        self.keep[r * self.cols + c]
    }

    /// Keep or prune weight `(r, c)`.
    #[inline]
    pub fn set(&mut self, r: usize, c: usize, keep: bool) {
        self.keep[r * self.cols + c] = keep;
    }

    /// Row `r` as a slice of flags.
    pub fn row(&self, r: usize) -> &[bool] {
        &self.keep[r * self.cols..(r + 1) * self.cols]
    }

    /// Row `r`, mutable.
    pub fn row_mut(&mut self, r: usize) -> &mut [bool] {
        &mut self.keep[r * self.cols..(r + 1) * self.cols]
    }

    /// Kept weights in row `r`.
    pub fn row_count(&self, r: usize) -> usize {
        self.row(r).iter().filter(|&&k| k).count()
    }

    /// Kept weights in the layer.
    pub fn count(&self) -> usize {
        self.keep.iter().filter(|&&k| k).count()
    }

    /// `w` with pruned entries set to zero.
    pub fn apply(&self, w: MatRef<'_, f64>) -> Mat<f64> {
        Mat::from_fn(w.nrows(), w.ncols(), |r, c| if self.get(r, c) { w[(r, c)] } else { 0.0 })
    }

    /// Does this mask keep no more than `pattern` allows (and, for
    /// unstructured patterns, exactly the budget)?
    pub fn conforms(&self, pattern: Pattern) -> bool {
        match pattern {
            Pattern::Unstructured { sparsity, scope: Scope::Row } => {
                let k = budget::kept(sparsity, self.cols);
                (0..self.rows).all(|r| self.row_count(r) == k)
            }
            Pattern::Unstructured { sparsity, scope: Scope::Layer } => {
                self.count() == budget::kept(sparsity, self.rows * self.cols)
            }
            Pattern::NofM { n, m } => {
                self.cols % m == 0
                    && (0..self.rows).all(|r| {
                        self.row(r).chunks(m).all(|g| g.iter().filter(|&&k| k).count() <= n)
                    })
            }
        }
    }
}

/// Descending by score, ascending by index on ties; NaN scores sort last.
fn by_score_desc(scores: &[f64]) -> impl Fn(&usize, &usize) -> Ordering + '_ {
    move |&a, &b| {
        scores[b]
            .partial_cmp(&scores[a])
            .unwrap_or_else(|| scores[a].is_nan().cmp(&scores[b].is_nan()))
            .then(a.cmp(&b))
    }
}

/// Indices of the `k` largest entries of `scores` (ties: lower index first).
pub fn top_k(scores: &[f64], k: usize) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..scores.len()).collect();
    if k == 0 {
        return Vec::new();
    }
    if k < idx.len() {
        idx.select_nth_unstable_by(k - 1, by_score_desc(scores));
        idx.truncate(k);
    }
    idx
}

/// Keep the highest `scores` (`d_out x d_in`) under `pattern`.
pub fn select(scores: MatRef<'_, f64>, pattern: Pattern) -> Mask {
    let (rows, cols) = (scores.nrows(), scores.ncols());
    let mut mask = Mask::empty(rows, cols);
    let row_scores = |r: usize| -> Vec<f64> { (0..cols).map(|c| scores[(r, c)]).collect() };
    match pattern {
        Pattern::Unstructured { sparsity, scope: Scope::Row } => {
            let k = budget::kept(sparsity, cols);
            for r in 0..rows {
                for c in top_k(&row_scores(r), k) {
                    mask.set(r, c, true);
                }
            }
        }
        Pattern::Unstructured { sparsity, scope: Scope::Layer } => {
            let k = budget::kept(sparsity, rows * cols);
            let all: Vec<f64> = (0..rows).flat_map(&row_scores).collect();
            for i in top_k(&all, k) {
                mask.keep[i] = true;
            }
        }
        Pattern::NofM { n, m } => {
            for r in 0..rows {
                let s = row_scores(r);
                for (g, chunk) in s.chunks(m).enumerate() {
                    for c in top_k(chunk, n.min(chunk.len())) {
                        mask.set(r, g * m + c, true);
                    }
                }
            }
        }
    }
    mask
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn top_k_breaks_ties_by_index() {
        assert_eq!(top_k(&[1.0, 3.0, 3.0, 2.0], 2), {
            let mut v = top_k(&[1.0, 3.0, 3.0, 2.0], 2);
            v.sort();
            v
        });
        let mut v = top_k(&[1.0, 3.0, 3.0, 3.0], 2);
        v.sort();
        assert_eq!(v, vec![1, 2]);
        assert!(top_k(&[1.0], 0).is_empty());
        assert_eq!(top_k(&[1.0, 2.0], 5).len(), 2);
    }

    #[test]
    fn every_pattern_conforms() {
        let s = Mat::from_fn(5, 8, |r, c| ((r * 31 + c * 17) % 13) as f64 - 6.0);
        for p in [
            Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row },
            Pattern::Unstructured { sparsity: 0.7, scope: Scope::Row },
            Pattern::Unstructured { sparsity: 0.3, scope: Scope::Layer },
            Pattern::NofM { n: 2, m: 4 },
            Pattern::NofM { n: 1, m: 8 },
        ] {
            let m = select(s.as_ref(), p);
            assert!(m.conforms(p), "{p:?}");
        }
        let m = select(s.as_ref(), Pattern::NofM { n: 2, m: 4 });
        assert_eq!(m.count(), 5 * 4);
        let m = select(s.as_ref(), Pattern::Unstructured { sparsity: 0.3, scope: Scope::Layer });
        assert_eq!(m.count(), 28);
    }

    #[test]
    fn per_layer_moves_budget_to_the_large_row() {
        // Row 0 holds all the large scores: per-layer keeps them all there.
        let s = Mat::from_fn(2, 4, |r, c| if r == 0 { 10.0 + c as f64 } else { c as f64 });
        let m = select(s.as_ref(), Pattern::Unstructured { sparsity: 0.5, scope: Scope::Layer });
        assert_eq!(m.row_count(0), 4);
        assert_eq!(m.row_count(1), 0);
    }
}
