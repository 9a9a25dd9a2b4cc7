//! [`SparseWeight`]: either layout behind one interface.

use super::{choose_layout, GroupPacked, Layout, Par, RowCompressed, SparseError};

/// A pruned weight in the layout [`choose_layout`] picked for it.
#[derive(Clone, Debug, PartialEq)]
pub enum SparseWeight {
    /// Unstructured: compressed rows.
    Rows(RowCompressed),
    /// N:M: packed groups.
    Groups(GroupPacked),
}

impl SparseWeight {
    /// Store `w` (`[d_out, d_in]`, row-major) in the layout
    /// [`choose_layout`] picks for it with `hint`.
    ///
    /// # Errors
    /// As [`RowCompressed::from_dense`].
    ///
    /// # Panics
    /// If `w.len() != d_out * d_in`.
    #[track_caller]
    pub fn from_dense(
        w: &[f32],
        d_out: usize,
        d_in: usize,
        hint: Option<(usize, usize)>,
    ) -> Result<Self, SparseError> {
        match choose_layout(w, d_out, d_in, hint) {
            Layout::Rows => RowCompressed::from_dense(w, d_out, d_in).map(SparseWeight::Rows),
            Layout::Groups { n, m } => {
                GroupPacked::from_dense(w, d_out, d_in, n, m).map(SparseWeight::Groups)
            }
        }
    }

    /// The layout.
    pub fn layout(&self) -> Layout {
        match self {
            SparseWeight::Rows(_) => Layout::Rows,
            SparseWeight::Groups(g) => {
                let (n, m) = g.pattern();
                Layout::Groups { n, m }
            }
        }
    }

    /// `(d_out, d_in)`.
    pub fn shape(&self) -> (usize, usize) {
        match self {
            SparseWeight::Rows(s) => s.shape(),
            SparseWeight::Groups(s) => s.shape(),
        }
    }

    /// Bits per stored index: 16 or 32 for rows, 4 for groups.
    pub fn index_bits(&self) -> usize {
        match self {
            SparseWeight::Rows(s) => 8 * s.cols().width(),
            SparseWeight::Groups(_) => 4,
        }
    }

    /// Number of nonzero weights.
    pub fn nnz(&self) -> usize {
        match self {
            SparseWeight::Rows(s) => s.nnz(),
            SparseWeight::Groups(s) => s.nnz(),
        }
    }

    /// Bytes of weight data one product reads.
    pub fn weight_bytes(&self) -> usize {
        match self {
            SparseWeight::Rows(s) => s.weight_bytes(),
            SparseWeight::Groups(s) => s.weight_bytes(),
        }
    }

    /// The dense `[d_out, d_in]` weight, row-major.
    pub fn to_dense(&self) -> Vec<f32> {
        match self {
            SparseWeight::Rows(s) => s.to_dense(),
            SparseWeight::Groups(s) => s.to_dense(),
        }
    }

    /// Workspace length (in `f32`) for [`SparseWeight::matmul`] at batch `b`.
    pub fn matmul_workspace(&self, b: usize) -> usize {
        match self {
            SparseWeight::Rows(s) => s.matmul_workspace(b),
            SparseWeight::Groups(s) => s.matmul_workspace(b),
        }
    }

    /// `y = x Wᵀ`; see [`RowCompressed::matmul`].
    ///
    /// # Panics
    /// If `x`, `y` or `work` are too short.
    #[track_caller]
    pub fn matmul(&self, x: &[f32], b: usize, y: &mut [f32], work: &mut [f32], par: Par) {
        match self {
            SparseWeight::Rows(s) => s.matmul(x, b, y, work, par),
            SparseWeight::Groups(s) => s.matmul(x, b, y, work, par),
        }
    }
}
