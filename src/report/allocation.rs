//! The allocation section of a report: each layer's chosen sparsity with
//! its predicted and measured contribution (see `driver::allocate`).

use serde::{Deserialize, Serialize};

/// One layer's row of the allocation table.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct ShareRow {
    /// Weight tensor name.
    pub name: String,
    /// Block index.
    pub block: usize,
    /// Weights in the layer.
    pub weights: usize,
    /// Chosen sparsity.
    pub sparsity: f64,
    /// Relative output error the OBS curve predicts at that sparsity.
    pub error_predicted: f64,
    /// Sensitivity `g`: relative final-state change per unit of the layer's
    /// relative error.
    pub sensitivity: f64,
    /// Predicted contribution to the final-state change, `g · e(s)`.
    pub contribution_predicted: f64,
    /// The same with the error the final solve reached on its calibration
    /// rows, `g · e_solved` (filled after the solve).
    pub contribution_measured: Option<f64>,
    /// Outlier ratio of the layer's block (outlier spread only).
    pub outlier_ratio: Option<f64>,
    /// The measured final-state changes at the probe sparsities.
    pub probes: Vec<[f64; 2]>,
}

/// The allocation of a run, as the report records it.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct AllocationReport {
    /// `uniform`, `outlier` or `measured`.
    pub spread: String,
    /// Overall target sparsity over the selected weights.
    pub target: f64,
    /// Overall sparsity of the chosen per-layer counts.
    pub planned: f64,
    /// Per-layer cap and floor.
    pub cap: f64,
    /// See [`AllocationReport::cap`].
    pub floor: f64,
    /// Predicted final-state change of the allocation, `Σ g_i e_i(s_i)`.
    pub predicted: f64,
    /// The same prediction for uniform sparsity at the target.
    pub predicted_uniform: f64,
    /// Seconds of the measuring pass.
    pub seconds: f64,
    /// Per layer, in forward order.
    pub layers: Vec<ShareRow>,
}
