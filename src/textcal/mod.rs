//! Calibration from text: tokenize, sample windows, run the model block by
//! block and accumulate per-group Gram matrices, pruning as it goes.

use std::path::PathBuf;

/// Text calibration settings.
#[derive(Clone, Debug, PartialEq)]
pub struct TextSource {
    /// UTF-8 text file.
    pub path: PathBuf,
    /// Number of sequences (`None`: the family's default).
    pub samples: Option<usize>,
    /// Tokens per sequence (`None`: the family's default).
    pub seq_len: Option<usize>,
    /// Seed for drawing the windows.
    pub seed: u64,
    /// Feed each block the outputs of the already pruned blocks before it.
    pub propagate: bool,
}
