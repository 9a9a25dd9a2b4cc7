//! Where each layer's calibration statistics come from.
//!
//! A [`LayerSource`] yields, block by block, the selected linear layers and
//! the Gram matrices of their inputs (fitted and held-out, one pair per
//! group of layers that read the same input), gives each layer's dense
//! weight, and takes pruned weights back. Two sources:
//! - [`activations`]: a safetensors file with one `[rows, d_in]` tensor per
//!   layer; each layer is a block of its own, streamed in chunks.
//! - [`text`]: the model's own forward pass over windows of calibration
//!   text; with propagation (the default) block `b+1` sees the outputs of
//!   the already pruned blocks before it ([`LayerSource::follows_pruned`]).
//!
//! [`open`] checks everything that can be checked before any statistics
//! are built: layer selection, activation shapes, patterns against widths
//! for every target, memory per layer.

pub mod activations;
pub mod text;

use crate::arch::units::Units;
use crate::calib::LayerGrams;
use crate::error::{Error, Result};
use crate::io::{Dtype, Model};
use crate::report::PhaseTimes;
use crate::select::Selection;
use crate::solve::{self, Method, Pattern};
use faer::{Mat, Par};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

pub use text::TextSource;

/// The source of calibration inputs.
#[derive(Clone, Debug, PartialEq)]
pub enum Calibration {
    /// A safetensors file with one `[rows, d_in]` tensor per pruned layer,
    /// named like its weight.
    Activations(PathBuf),
    /// Text run through the model itself.
    Text(TextSource),
}

impl Calibration {
    /// The file the calibration data is read from.
    pub fn path(&self) -> &Path {
        match self {
            Calibration::Activations(p) => p,
            Calibration::Text(t) => &t.path,
        }
    }
}

/// What a source needs to plan: which layers, and what will be asked of
/// them.
#[derive(Clone, Copy, Debug)]
pub struct PlanParams<'a> {
    /// `--only` / `--skip`.
    pub selection: &'a Selection,
    /// Fraction of rows (text: windows) held out.
    pub holdout: f64,
    /// The ridge is chosen on held-out rows, which must then exist.
    pub needs_holdout: bool,
    /// Every (method, pattern) the layers will be solved for.
    pub targets: &'a [(Method, Pattern)],
    /// Some run removes FFN neurons or heads: the source must know the
    /// model's units.
    pub structured: bool,
}

/// One selected linear layer.
#[derive(Clone, Debug, PartialEq)]
pub struct Planned {
    /// Weight tensor name.
    pub name: String,
    /// `[d_out, d_in]`.
    pub shape: [usize; 2],
    /// Storage dtype in the model file.
    pub dtype: Dtype,
    /// The file stores the weight as `[d_in, d_out]` (GPT-2 style).
    pub transposed: bool,
    /// Index of the group (shared input) within its block.
    pub group: usize,
}

impl Planned {
    /// Row-major `[d_out, d_in]` values in the file's storage orientation.
    pub fn to_storage(&self, values: Vec<f64>) -> Vec<f64> {
        if !self.transposed {
            return values;
        }
        let [d_out, d_in] = self.shape;
        let mut t = vec![0.0; values.len()];
        for r in 0..d_out {
            for c in 0..d_in {
                t[c * d_out + r] = values[r * d_in + c];
            }
        }
        t
    }
}

/// The statistics of one block.
pub struct BlockStats {
    /// One pair of Gram matrices per group index that has a selected layer.
    pub grams: BTreeMap<usize, LayerGrams>,
    /// Seconds spent building them (including forward passes).
    pub seconds: f64,
}

/// Calibration statistics, block by block; see the module docs.
pub trait LayerSource {
    /// The selected layers of each block, in forward order.
    fn blocks(&self) -> &[Vec<Planned>];

    /// A label for block `b` in progress messages.
    fn block_label(&self, b: usize) -> String;

    /// Whether the statistics of later blocks depend on the weights handed
    /// back ([`LayerSource::hand_back`]); when not, several runs can share
    /// one pass.
    fn follows_pruned(&self) -> bool;

    /// Build the statistics of block `b` (blocks are visited in order).
    ///
    /// # Errors
    /// Unreadable inputs, a failed forward pass, or a group left without
    /// fitted rows.
    fn statistics(&mut self, b: usize, par: Par) -> Result<BlockStats>;

    /// The dense weight of `layer`, `[d_out, d_in]`.
    ///
    /// # Errors
    /// An unreadable tensor.
    fn weight(&self, layer: &Planned) -> Result<Mat<f64>>;

    /// Take the pruned weight of `layer` (row-major `[d_out, d_in]`).
    ///
    /// # Errors
    /// A weight the network cannot take.
    fn hand_back(&mut self, layer: &Planned, values: &[f64]) -> Result<()>;

    /// Block `b` is solved: move on to the next one.
    ///
    /// # Errors
    /// A failed forward pass.
    fn finish_block(&mut self, b: usize) -> Result<()>;

    /// What the report records about the calibration (text sources).
    fn description(&self) -> Option<serde_json::Value>;

    /// Time spent so far, by phase (text sources).
    fn timing(&self) -> Option<PhaseTimes>;

    /// The config's `model_type`, when the source runs the model.
    fn model_type(&self) -> Option<String> {
        None
    }

    /// The removable units whose consumer is a layer of block `b` (FFN
    /// neurons, attention heads), with the consumer's group index in this
    /// block, when the source knows the model's block structure.
    fn units(&self, _b: usize) -> Vec<Units> {
        Vec::new()
    }

    /// Every set of removable units of the model, selected or not.
    fn all_units(&self) -> Vec<Units> {
        (0..self.blocks().len()).flat_map(|b| self.units(b)).collect()
    }
}

/// Open the source `calibration` describes for `model`, planned for
/// `params`.
///
/// # Errors
/// Anything wrong with the selection, the calibration data or the targets,
/// found before any statistics are built.
pub fn open<'m>(
    calibration: &Calibration,
    model: &'m Model,
    params: &PlanParams<'_>,
) -> Result<Box<dyn LayerSource + 'm>> {
    Ok(match calibration {
        Calibration::Activations(p) => Box::new(activations::Activations::open(model, p, params)?),
        Calibration::Text(t) => Box::new(text::TextCalibration::open(model, t, params)?),
    })
}

/// Refuse a selected layer that no target can be solved for: a pattern
/// that does not fit its width, or statistics that do not fit in memory.
pub(crate) fn check_layer(name: &str, shape: [usize; 2], params: &PlanParams<'_>) -> Result<()> {
    let [d_out, d_in] = shape;
    let available = available_memory();
    for &(method, pattern) in params.targets {
        check_memory(name, d_out, d_in, method, available)?;
        solve::check_pattern(pattern, d_in).map_err(|e| {
            Error::layer_unfit(name, format!("layer '{name}' [{d_out}, {d_in}]: {e}"))
        })?;
    }
    Ok(())
}

/// Bytes of memory the system can still hand out (`MemAvailable`), if known.
pub(crate) fn available_memory() -> Option<u128> {
    let text = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = text.lines().find(|l| l.starts_with("MemAvailable:"))?;
    let kib: u128 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}

/// Refuse a layer whose statistics and solver state cannot fit in memory.
/// `need` counts the two Gram matrices, `W` and its pruned copy, plus the
/// solver's own estimate.
pub(crate) fn check_memory(
    name: &str,
    d_out: usize,
    d_in: usize,
    method: Method,
    available: Option<u128>,
) -> Result<()> {
    let need = 2 * (d_in as u128).pow(2) * 8
        + 3 * d_out as u128 * d_in as u128 * 8
        + solve::memory_estimate(d_out, d_in, method);
    match available {
        Some(avail) if need > avail => {
            let gib = |b: u128| b as f64 / (1u128 << 30) as f64;
            Err(Error::layer_unfit(
                name,
                format!(
                    "layer '{name}' [{d_out}, {d_in}] needs about {:.1} GiB for its Gram matrices \
                     and solver state, but only {:.1} GiB of memory is available; free memory or \
                     use a lighter --method",
                    gib(need),
                    gib(avail)
                ),
            ))
        }
        _ => Ok(()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::ErrorKind;

    #[test]
    fn memory_check_names_the_layer_and_sizes() {
        // A 4096 x 11008 layer fits in 24 GiB with the local search...
        let gib = 1u128 << 30;
        assert!(check_memory("big", 4096, 11008, Method::L0, Some(24 * gib)).is_ok());
        // ... but not in 4 GiB, and the message says why.
        let e = check_memory("big", 4096, 11008, Method::L0, Some(4 * gib)).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::Layer);
        assert_eq!(e.layer(), Some("big"));
        let m = e.to_string();
        assert!(m.contains("'big' [4096, 11008]") && m.contains("4.0 GiB"), "{m}");
        assert!(check_memory("x", 10, 10, Method::Obs, None).is_ok());
    }

    #[test]
    fn storage_orientation_transposes_only_when_stored_transposed() {
        let mut p = Planned {
            name: "c_fc.weight".into(),
            shape: [2, 3],
            dtype: Dtype::F32,
            transposed: false,
            group: 0,
        };
        let v = vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
        assert_eq!(p.to_storage(v.clone()), v);
        p.transposed = true;
        // [[1,2,3],[4,5,6]]ᵀ = [[1,4],[2,5],[3,6]], row-major.
        assert_eq!(p.to_storage(v), vec![1.0, 4.0, 2.0, 5.0, 3.0, 6.0]);
    }
}
