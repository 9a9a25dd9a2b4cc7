//! Calibration inputs from a safetensors file: per selected layer, a
//! `[rows, d_in]` tensor named like its weight. Each layer is a block of its
//! own; its rows are streamed in chunks of about 32 MiB and reduced to Gram
//! matrices, so memory is one layer's statistics.

use super::{check_layer, BlockStats, LayerSource, PlanParams, Planned};
use crate::arch::{self, units::Units};
use crate::calib::{holdout_count, LayerGrams};
use crate::error::{Error, Result};
use crate::io::{Model, TensorFile};
use crate::report::PhaseTimes;
use faer::{Mat, Par};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Rows per chunk when streaming activations (about 32 MiB of f64).
pub(crate) fn chunk_rows(width: usize) -> usize {
    ((4 << 20) / width.max(1)).max(1)
}

/// An activations file matched against a model's selected layers.
pub struct Activations<'m> {
    model: &'m Model,
    file: TensorFile,
    holdout: f64,
    /// One block per layer.
    blocks: Vec<Vec<Planned>>,
    /// Activation rows per layer, in block order.
    rows: Vec<usize>,
    /// Structured runs: every set of removable units of the model (from
    /// its config.json) and its `model_type`.
    units: Vec<Units>,
    model_type: Option<String>,
}

impl<'m> Activations<'m> {
    /// Open `path` and check every selected layer of `model` against it.
    ///
    /// # Errors
    /// An `--only` glob matching nothing, no layer selected, a missing,
    /// non-float or misshapen activation tensor, no rows left to fit, or a
    /// layer that no target fits (pattern or memory).
    pub fn open(model: &'m Model, path: &Path, params: &PlanParams<'_>) -> Result<Self> {
        let file = TensorFile::open(path)?;
        let all = model.tensors();
        let names: Vec<&str> = all.iter().map(|t| t.name.as_str()).collect();
        if let Some(g) = params.selection.unmatched_only(&names).first() {
            return Err(Error::usage(format!(
                "--only '{g}' matches no tensor in {}",
                model.layout().root().display()
            )));
        }
        let selected: Vec<_> = all
            .into_iter()
            .filter(|t| params.selection.selects(&t.name, &t.shape, t.is_float()))
            .filter(|t| {
                // A zero-sized layer has nothing to prune (and no Gram matrix).
                let empty = t.shape.contains(&0);
                if empty {
                    eprintln!(
                        "lopper: note: skipping zero-sized layer '{}' {:?}: nothing to prune",
                        crate::io::escape(&t.name),
                        t.shape
                    );
                }
                !empty
            })
            .collect();
        if selected.is_empty() {
            return Err(Error::usage(format!(
                "no prunable tensor selected in {} (check --only / --skip; `lopper inspect` \
                 lists candidates)",
                model.layout().root().display()
            )));
        }
        let shown = path.display();
        let bad = |m: String| Error::input(format!("{shown}: {m}")).with_path(path);
        let (mut blocks, mut rows) = (Vec::new(), Vec::new());
        for w in selected {
            let (d_out, d_in) = (w.shape[0], w.shape[1]);
            let name = &w.name;
            let a = file.get(name).ok_or_else(|| {
                bad(format!(
                    "no activation tensor '{name}' for the selected layer of that name (add it, \
                     or leave the layer out with --skip)"
                ))
                .with_layer(name)
            })?;
            if !a.is_float() {
                return Err(bad(format!(
                    "activation tensor '{name}' has dtype {:?}; expected a float dtype",
                    a.dtype
                )));
            }
            if a.shape.len() != 2 {
                return Err(bad(format!(
                    "activation tensor '{name}' has shape {:?}; expected [rows, {d_in}]",
                    a.shape
                )));
            }
            let (n, width) = (a.shape[0], a.shape[1]);
            if width != d_in {
                let why = if width == d_out {
                    format!(
                        "its width matches the layer's output size d_out={d_out}, not its input \
                         size d_in={d_in}: store the inputs that flow into the layer"
                    )
                } else {
                    format!("its width matches neither d_in={d_in} nor d_out={d_out}")
                };
                return Err(bad(format!(
                    "activation tensor '{name}' is [{n}, {width}] for weight [{d_out}, {d_in}]; \
                     {why}"
                )));
            }
            let fitted = n - holdout_count(n, params.holdout);
            if fitted == 0 {
                return Err(bad(format!(
                    "activation tensor '{name}' has {n} rows, none left to fit after --holdout {}",
                    params.holdout
                )));
            }
            if params.needs_holdout && fitted == n {
                return Err(Error::usage(format!(
                    "--ridge auto needs held-out rows, but '{name}' has {n} rows and --holdout {} \
                     holds none out",
                    params.holdout
                )));
            }
            check_layer(name, [d_out, d_in], params)?;
            let layer = Planned {
                name: name.clone(),
                shape: [d_out, d_in],
                dtype: w.dtype,
                transposed: false,
                group: 0,
            };
            blocks.push(vec![layer]);
            rows.push(n);
        }
        let (units, model_type) =
            if params.structured { model_units(model)? } else { (vec![], None) };
        Ok(Activations { model, file, holdout: params.holdout, blocks, rows, units, model_type })
    }

    /// The activations file.
    pub fn path(&self) -> PathBuf {
        self.file.path().to_path_buf()
    }
}

/// The removable units of `model`, from its config.json and tensors, for a
/// structured run calibrated from activations.
fn model_units(model: &Model) -> Result<(Vec<Units>, Option<String>)> {
    let net = arch::load(model)?;
    let cfg = arch::ArchConfig::read(&arch::model_dir(model))?;
    let units: Vec<Units> = (0..net.num_blocks()).flat_map(|b| net.units(b)).collect();
    // An activations file holds each layer's inputs for its `[d_out, d_in]`
    // weight as stored; GPT-2 stores `[d_in, d_out]`.
    if let Some(u) = units.iter().find(|u| net.linear(&u.consumer).is_some_and(|l| l.transposed)) {
        return Err(Error::usage(format!(
            "structured pruning from --activations needs weights stored [d_out, d_in]; '{}' is \
             stored [d_in, d_out] (GPT-2): calibrate with --text",
            u.consumer
        )));
    }
    Ok((units, Some(cfg.model_type)))
}

impl LayerSource for Activations<'_> {
    fn blocks(&self) -> &[Vec<Planned>] {
        &self.blocks
    }

    fn block_label(&self, b: usize) -> String {
        self.blocks[b][0].name.clone()
    }

    fn follows_pruned(&self) -> bool {
        false
    }

    fn statistics(&mut self, b: usize, par: Par) -> Result<BlockStats> {
        let t0 = Instant::now();
        let layer = &self.blocks[b][0];
        let d_in = layer.shape[1];
        let mut grams = LayerGrams::new(d_in);
        let step = chunk_rows(d_in);
        let mut start = 0;
        while start < self.rows[b] {
            let end = (start + step).min(self.rows[b]);
            let x = self.file.read_rows_f64(&layer.name, start..end)?;
            grams.add_chunk(&x, start, self.holdout, par);
            start = end;
        }
        let grams = BTreeMap::from([(0, grams)]);
        Ok(BlockStats { grams, seconds: t0.elapsed().as_secs_f64() })
    }

    fn weight(&self, layer: &Planned) -> Result<Mat<f64>> {
        let [d_out, d_in] = layer.shape;
        let flat = self.model.read_f64(&layer.name)?;
        Ok(Mat::from_fn(d_out, d_in, |r, c| flat[r * d_in + c]))
    }

    fn model_type(&self) -> Option<String> {
        self.model_type.clone()
    }

    fn units(&self, b: usize) -> Vec<Units> {
        // Each layer is a block of its own, its group index 0.
        let layer = &self.blocks[b][0];
        self.units
            .iter()
            .filter(|u| u.consumer == layer.name)
            .map(|u| Units { group: layer.group, ..u.clone() })
            .collect()
    }

    fn all_units(&self) -> Vec<Units> {
        self.units.clone()
    }

    fn hand_back(&mut self, _: &Planned, _: &[f64]) -> Result<()> {
        Ok(())
    }

    fn finish_block(&mut self, _: usize) -> Result<()> {
        Ok(())
    }

    fn description(&self) -> Option<serde_json::Value> {
        None
    }

    fn timing(&self) -> Option<PhaseTimes> {
        None
    }
}
