//! Calibration from text: tokenize a UTF-8 file, draw fixed-length windows
//! of tokens, run the model block by block and accumulate one pair of Gram
//! matrices (fitted and held-out) per group of linear layers that read the
//! same input.
//!
//! Sequential calibration (the default): the inputs of block `b+1` are
//! computed by blocks `0..=b` *after* they were pruned, so every layer is
//! fitted to the inputs it will see in the pruned model and can compensate
//! what earlier pruning changed. With `propagate = false` every block sees
//! the dense model's inputs.
//!
//! Held-out rows are whole windows: window `i` is held out when
//! [`crate::calib::is_holdout`]`(i, fraction)`, so held-out tokens come from
//! other parts of the text than the fitted ones.
//!
//! Memory: the hidden states of all windows at the current block
//! (`samples × seq_len × d` f32, twice: inputs and outputs) plus the Gram
//! matrices of one block; the activations of a group exist only for one
//! batch at a time. With `by_block` (the default) the network holds only
//! the current block's f32 linear weights, read from the memory map when
//! the block is reached and dropped when it is finished.

use super::{check_layer, BlockStats, LayerSource, PlanParams, Planned};
use crate::arch::{self, Batch, Kind, Network};
use crate::calib::{is_holdout, LayerGrams};
use crate::error::{Error, Result};
use crate::io::Model;
use crate::report::PhaseTimes;
use crate::tokenize::{draw_windows, load_tokenizer, read_text, tokenize, Framing};
use candle_core::Tensor;
use faer::{Mat, Par};
use std::collections::BTreeMap;
use std::path::PathBuf;
use std::time::Instant;

/// Text calibration settings.
#[derive(Clone, Debug, PartialEq)]
pub struct TextSource {
    /// UTF-8 text file.
    pub path: PathBuf,
    /// Number of windows (`None`: [`default_shape`]).
    pub samples: Option<usize>,
    /// Tokens per window, special tokens included (`None`: [`default_shape`]).
    pub seq_len: Option<usize>,
    /// Seed for drawing the windows.
    pub seed: u64,
    /// Feed each block the outputs of the already pruned blocks before it.
    pub propagate: bool,
    /// Read each block's weights when it is reached and drop them after
    /// ([`arch::load_by_block`]); `false` reads the whole model first.
    pub by_block: bool,
}

/// Default `(samples, seq_len)` for a network kind: 128 × 128 tokens for
/// encoders (sentence-length inputs), 128 × 256 for decoders.
pub fn default_shape(kind: Kind) -> (usize, usize) {
    match kind {
        Kind::Encoder => (128, 128),
        Kind::Decoder => (128, 256),
    }
}

/// Sequences per forward batch: about 4k tokens, enough rows for efficient
/// matrix products while one group's inputs stay small.
fn batch_size(seq_len: usize) -> usize {
    (4096 / seq_len.max(1)).max(1)
}

/// Which layers of each block are pruned, checked before any forward pass.
fn plan(model: &Model, net: &dyn Network, params: &PlanParams<'_>) -> Result<Vec<Vec<Planned>>> {
    let mut names: Vec<String> = Vec::new();
    for b in 0..net.num_blocks() {
        for g in net.groups(b) {
            names.extend(g.layers);
        }
    }
    let refs: Vec<&str> = names.iter().map(String::as_str).collect();
    let root = model.layout().root().display();
    if let Some(g) = params.selection.unmatched_only(&refs).first() {
        return Err(Error::usage(format!(
            "--only '{g}' matches no linear layer the {root} forward pass uses"
        )));
    }
    let mut blocks = Vec::with_capacity(net.num_blocks());
    for b in 0..net.num_blocks() {
        let mut planned = Vec::new();
        for (gi, g) in net.groups(b).into_iter().enumerate() {
            for name in g.layers {
                let info = model.get(&name).expect("the network was built from these tensors");
                let lin = net.layer_spec(&name).expect("group layers are registered");
                let [d_out, d_in] = lin.shape;
                if !params.selection.selects(&name, &[d_out, d_in], info.is_float()) {
                    continue;
                }
                check_layer(&name, [d_out, d_in], params)?;
                let transposed = lin.transposed;
                let layer = Planned {
                    name,
                    shape: [d_out, d_in],
                    dtype: info.dtype,
                    transposed,
                    group: gi,
                };
                planned.push(layer);
            }
        }
        blocks.push(planned);
    }
    if blocks.iter().all(Vec::is_empty) {
        return Err(Error::usage(format!(
            "no linear layer of {root} is selected (check --only / --skip)"
        )));
    }
    Ok(blocks)
}

/// Tokenize the calibration text and cut it into windows.
///
/// Returns the windows (each exactly `seq_len` ids, framing included) and
/// the number of tokens in the text.
///
/// # Errors
/// An unreadable text or tokenizer, or a `--seq-len` that does not fit the
/// model or the text.
pub fn windows(
    model: &Model,
    net: &dyn Network,
    src: &TextSource,
) -> Result<(Vec<Vec<u32>>, usize)> {
    let dir = arch::model_dir(model);
    let tok = load_tokenizer(&dir)?;
    let framing = Framing::for_network(net.family(), &tok, &dir)?;
    let (def_n, def_l) = default_shape(net.kind());
    let samples = src.samples.unwrap_or(def_n);
    let seq_len = src.seq_len.unwrap_or(def_l);
    if let Some(max) = net.max_positions() {
        if seq_len > max {
            return Err(Error::usage(format!(
                "--seq-len {seq_len} exceeds the model's {max} positions"
            )));
        }
    }
    let content = seq_len.checked_sub(framing.len()).filter(|&c| c > 0).ok_or_else(|| {
        Error::usage(format!(
            "--seq-len {seq_len} leaves no room for text after the model's {} special tokens",
            framing.len()
        ))
    })?;
    let text = read_text(&src.path)?;
    let shown = src.path.display();
    let ids = tokenize(&tok, &text)
        .map_err(|e| Error::input(format!("{shown}: cannot tokenize: {e}")).with_path(&src.path))?;
    if ids.len() < content {
        return Err(Error::input(format!(
            "{shown}: holds {} tokens, fewer than the {content} each window of --seq-len \
             {seq_len} needs",
            ids.len()
        ))
        .with_path(&src.path));
    }
    let starts = draw_windows(ids.len(), samples, content, src.seed);
    if let Some(note) = overlap_note(ids.len(), samples, content) {
        eprintln!("lopper: note: {shown}: {note}");
    }
    let wins = starts.iter().map(|&s| framing.frame(&ids[s..s + content])).collect();
    Ok((wins, ids.len()))
}

/// A model run on windows of calibration text, one block at a time.
pub struct TextCalibration<'m> {
    model: &'m Model,
    /// Blocks' weights are read when reached.
    by_block: bool,
    src: TextSource,
    holdout: f64,
    net: Box<dyn Network>,
    blocks: Vec<Vec<Planned>>,
    /// `(index of the first window, batch)`.
    batches: Vec<(usize, Batch)>,
    seq_len: usize,
    /// Inputs of the current block, per batch.
    hidden: Vec<Tensor>,
    /// Outputs of the current block, from its dense pass.
    next: Vec<Tensor>,
    timing: PhaseTimes,
    description: serde_json::Value,
}

impl<'m> TextCalibration<'m> {
    /// Build the network, plan the layers, tokenize the text and embed the
    /// windows.
    ///
    /// # Errors
    /// An unsupported or broken model, a bad selection, text or tokenizer,
    /// or a layer no target fits.
    pub fn open(model: &'m Model, src: &TextSource, params: &PlanParams<'_>) -> Result<Self> {
        let mut timing = PhaseTimes::default();
        // Units (structured cuts) read every block's shapes from loaded
        // weights, so structured runs read the whole model.
        let by_block = src.by_block && !params.structured;
        let t = Instant::now();
        let net = if by_block { arch::load_by_block(model)? } else { arch::load(model)? };
        timing.read += t.elapsed().as_secs_f64();
        let blocks = plan(model, net.as_ref(), params)?;
        let t = Instant::now();
        let (wins, total_tokens) = windows(model, net.as_ref(), src)?;
        timing.tokenize = t.elapsed().as_secs_f64();
        let seq_len = wins[0].len();
        let per_batch = batch_size(seq_len);
        let batches: Vec<(usize, Batch)> = wins
            .chunks(per_batch)
            .enumerate()
            .map(|(i, c)| (i * per_batch, Batch::new(c)))
            .collect();
        let t = Instant::now();
        let hidden = batches.iter().map(|(_, b)| net.embed(b)).collect::<arch::Result<_>>()?;
        timing.forward += t.elapsed().as_secs_f64();
        let held = (0..wins.len()).filter(|&i| is_holdout(i, params.holdout)).count();
        let model_type = arch::ArchConfig::read(&arch::model_dir(model))
            .map(|c| c.model_type)
            .unwrap_or_default();
        let description = serde_json::json!({
            "text": src.path.display().to_string(),
            "text_tokens": total_tokens,
            "samples": wins.len(),
            "seq_len": seq_len,
            "seed": src.seed,
            "holdout_samples": held,
            "propagate": src.propagate,
            "model_type": model_type,
        });
        Ok(TextCalibration {
            model,
            by_block,
            src: src.clone(),
            holdout: params.holdout,
            net,
            blocks,
            batches,
            seq_len,
            hidden,
            next: Vec::new(),
            timing,
            description,
        })
    }
}

impl LayerSource for TextCalibration<'_> {
    fn blocks(&self) -> &[Vec<Planned>] {
        &self.blocks
    }

    fn block_label(&self, b: usize) -> String {
        format!("block {b}")
    }

    fn follows_pruned(&self) -> bool {
        self.src.propagate
    }

    fn statistics(&mut self, b: usize, par: Par) -> Result<BlockStats> {
        if self.by_block {
            let t = Instant::now();
            self.net.load_block(b, self.model)?;
            self.timing.read += t.elapsed().as_secs_f64();
        }
        let t0 = Instant::now();
        let groups = self.net.groups(b);
        let mut grams: BTreeMap<usize, LayerGrams> = BTreeMap::new();
        for p in &self.blocks[b] {
            grams.entry(p.group).or_insert_with(|| LayerGrams::new(p.shape[1]));
        }
        // One pass over the batches with the block still dense.
        let (seq_len, holdout) = (self.seq_len, self.holdout);
        let mut next = Vec::with_capacity(self.hidden.len());
        let mut gram_secs = 0.0;
        for ((first, _), x) in self.batches.iter().zip(&self.hidden) {
            let mut tap = |g: usize, rows: &Tensor| -> arch::Result<()> {
                let Some(lg) = grams.get_mut(&g) else { return Ok(()) };
                let tg = Instant::now();
                let d = rows.dim(1)?;
                let data: Vec<f32> = rows.flatten_all()?.to_vec1()?;
                let (mut fit, mut held) = (Vec::new(), Vec::new());
                for (j, seq) in data.chunks(seq_len * d).enumerate() {
                    let to = if is_holdout(first + j, holdout) { &mut held } else { &mut fit };
                    to.extend(seq.iter().map(|&v| f64::from(v)));
                }
                drop(data);
                lg.calib.add_rows(&fit, par);
                lg.holdout.add_rows(&held, par);
                gram_secs += tg.elapsed().as_secs_f64();
                Ok(())
            };
            next.push(self.net.block(b, x, &mut tap)?);
        }
        let seconds = t0.elapsed().as_secs_f64();
        self.timing.forward += seconds - gram_secs;
        self.timing.gram += gram_secs;
        self.next = next;
        for (g, lg) in &grams {
            if lg.calib.rows() == 0 {
                return Err(Error::usage(format!(
                    "{}: --holdout {} leaves no calibration rows for the '{}' input of block {b}",
                    self.src.path.display(),
                    holdout,
                    groups[*g].label
                )));
            }
        }
        Ok(BlockStats { grams, seconds })
    }

    fn weight(&self, layer: &Planned) -> Result<Mat<f64>> {
        let lin = self.net.linear(&layer.name).expect("planned layers are in the network");
        let [d_out, d_in] = layer.shape;
        let flat = arch::to_f64_rows(&lin.weight)?;
        Ok(Mat::from_fn(d_out, d_in, |r, c| flat[r * d_in + c]))
    }

    fn hand_back(&mut self, layer: &Planned, values: &[f64]) -> Result<()> {
        let f32s: Vec<f32> = values.iter().map(|&v| v as f32).collect();
        Ok(self.net.set_weight(&layer.name, &f32s)?)
    }

    fn finish_block(&mut self, b: usize) -> Result<()> {
        // Propagate: recompute the block's outputs with its pruned weights.
        let t = Instant::now();
        let last = b + 1 == self.net.num_blocks();
        if self.src.propagate && !self.blocks[b].is_empty() && !last {
            self.next.clear();
            for x in &self.hidden {
                self.next.push(self.net.block(b, x, &mut |_, _| Ok(()))?);
            }
        }
        self.hidden = std::mem::take(&mut self.next);
        self.timing.forward += t.elapsed().as_secs_f64();
        if self.by_block {
            self.net.unload_block(b);
        }
        Ok(())
    }

    fn description(&self) -> Option<serde_json::Value> {
        Some(self.description.clone())
    }

    fn timing(&self) -> Option<PhaseTimes> {
        Some(self.timing)
    }

    fn model_type(&self) -> Option<String> {
        self.description["model_type"].as_str().map(str::to_string)
    }

    fn units(&self, b: usize) -> Vec<arch::units::Units> {
        self.net.units(b)
    }
}

/// A note when `samples` windows of `content` tokens cover the `n_tokens`
/// of the text many times over (each token in more than 4 windows on
/// average): the windows then repeat the same text, and more of them add
/// cost, not information.
pub(crate) fn overlap_note(n_tokens: usize, samples: usize, content: usize) -> Option<String> {
    let covered = samples as f64 * content as f64 / n_tokens.max(1) as f64;
    (covered > 4.0).then(|| {
        let distinct = n_tokens.div_ceil(content.max(1));
        format!(
            "--samples {samples} windows of {content} tokens cover its {n_tokens} tokens about \
             {covered:.0} times over (about {distinct} windows would not overlap); the windows \
             repeat the same text, so calibration costs more without more information"
        )
    })
}

#[cfg(test)]
mod tests {
    use super::overlap_note;

    #[test]
    fn many_overlapping_windows_get_a_note() {
        // 100000 windows of 126 tokens on a 5000-token text: each token is
        // in about 2520 windows.
        let n = overlap_note(5000, 100_000, 126).expect("a note");
        assert!(n.contains("--samples 100000") && n.contains("2520 times"), "{n}");
        assert!(n.contains("about 40 windows"), "{n}");
        // Four covers or fewer: no note.
        assert_eq!(overlap_note(5000, 128, 126), None);
        assert_eq!(overlap_note(5000, 158, 126), None);
        assert!(overlap_note(5000, 200, 126).is_some());
    }
}
