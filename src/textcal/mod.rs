//! Calibration from text: read and tokenize a UTF-8 file, draw fixed-length
//! windows of tokens, run the model block by block and accumulate one pair
//! of Gram matrices (fitted and held-out) per group of linear layers that
//! read the same input, pruning each block as soon as its statistics are
//! complete.
//!
//! Sequential pruning (the default): the inputs of block `b+1` are computed
//! by blocks `0..=b` *after* they were pruned, so every layer is fitted to
//! the inputs it will see in the pruned model and can compensate what
//! earlier pruning changed. With `propagate = false` every block sees the
//! dense model's inputs.
//!
//! Held-out rows are whole windows: window `i` is held out when
//! [`crate::calib::is_holdout`]`(i, fraction)`, so held-out tokens come from
//! other parts of the text than the fitted ones.
//!
//! Memory: the hidden states of all windows at the current block
//! (`samples × seq_len × d` f32) plus the Gram matrices of one block; the
//! activations of a group exist only for one batch at a time.

mod tokens;

pub use tokens::{draw_windows, load_tokenizer, read_text, tokenize, Framing};

use crate::arch::{self, ArchError, ArchErrorKind, Batch, Kind, Network};
use crate::calib::{is_holdout, LayerGrams};
use crate::io::Model;
use crate::pipeline::{self, Error, Progress, PruneConfig, Solved};
use crate::report::PhaseTimes;
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
}

/// Default `(samples, seq_len)` for a network kind: 128 × 128 tokens for
/// encoders (sentence-length inputs), 128 × 256 for decoders.
pub fn default_shape(kind: Kind) -> (usize, usize) {
    match kind {
        Kind::Encoder => (128, 128),
        Kind::Decoder => (128, 256),
    }
}

/// What [`run`] produced.
pub struct TextRun {
    /// Pruned weights in the file's storage orientation, by tensor name.
    pub replaced: BTreeMap<String, Vec<f64>>,
    /// One solved layer per pruned tensor, in forward order.
    pub solved: Vec<(String, Solved)>,
    /// Description for the report's settings.
    pub description: serde_json::Value,
    /// Phase timings.
    pub timing: PhaseTimes,
}

fn arch_error(e: ArchError) -> Error {
    match e.kind() {
        ArchErrorKind::Compute => Error::solve(e.to_string()),
        _ => Error::input(e.to_string()),
    }
}

/// A tensor's f32 values as f64, row-major.
fn tensor_f64(t: &Tensor) -> Result<Vec<f64>, Error> {
    arch::to_f64_rows(t).map_err(arch_error)
}

/// Sequences per forward batch: about 4k tokens, enough rows for efficient
/// matrix products while one group's inputs stay small.
fn batch_size(seq_len: usize) -> usize {
    (4096 / seq_len.max(1)).max(1)
}

/// One selected linear layer of a block.
struct Planned {
    name: String,
    group: usize,
    dtype: crate::io::Dtype,
}

/// Which layers of each block are pruned, checked before any forward pass.
fn plan(cfg: &PruneConfig, model: &Model, net: &dyn Network) -> Result<Vec<Vec<Planned>>, Error> {
    let mut names: Vec<String> = Vec::new();
    for b in 0..net.num_blocks() {
        for g in net.groups(b) {
            names.extend(g.layers);
        }
    }
    let refs: Vec<&str> = names.iter().map(String::as_str).collect();
    if let Some(g) = cfg.selection.unmatched_only(&refs).first() {
        return Err(Error::input(format!(
            "--only '{g}' matches no linear layer the {} forward pass uses",
            cfg.model.display()
        )));
    }
    let mut blocks = Vec::with_capacity(net.num_blocks());
    let mut count = 0;
    for b in 0..net.num_blocks() {
        let mut planned = Vec::new();
        for (gi, g) in net.groups(b).into_iter().enumerate() {
            for name in g.layers {
                let info = model.get(&name).expect("the network was built from these tensors");
                let lin = net.linear(&name).expect("group layers are registered");
                let (d_out, d_in) = lin.shape();
                if !cfg.selection.selects(&name, &[d_out, d_in], info.is_float()) {
                    continue;
                }
                pipeline::check_memory(
                    &name,
                    d_out,
                    d_in,
                    cfg.method,
                    pipeline::available_memory(),
                )?;
                crate::solve::check_pattern(cfg.pattern, d_in)
                    .map_err(|e| Error::input(format!("layer '{name}' [{d_out}, {d_in}]: {e}")))?;
                planned.push(Planned { name, group: gi, dtype: info.dtype });
                count += 1;
            }
        }
        blocks.push(planned);
    }
    if count == 0 {
        return Err(Error::input(format!(
            "no linear layer of {} is selected (check --only / --skip)",
            cfg.model.display()
        )));
    }
    Ok(blocks)
}

/// Check what [`run`] would prune, without running anything: the number of
/// selected layers.
///
/// # Errors
/// As [`run`] before its first forward pass.
pub fn count_layers(cfg: &PruneConfig, model: &Model) -> Result<usize, Error> {
    let net = arch::load(model).map_err(arch_error)?;
    Ok(plan(cfg, model, net.as_ref())?.iter().map(Vec::len).sum())
}

/// Tokenize the calibration text and cut it into windows.
///
/// Returns the windows (each exactly `seq_len` ids, framing included) and
/// the number of tokens in the text.
pub fn windows(
    model: &Model,
    net: &dyn Network,
    src: &TextSource,
) -> Result<(Vec<Vec<u32>>, usize), Error> {
    let dir = arch::model_dir(model);
    let tok = load_tokenizer(&dir)?;
    let framing = Framing::for_network(net.family(), &tok, &dir)?;
    let (def_n, def_l) = default_shape(net.kind());
    let samples = src.samples.unwrap_or(def_n);
    let seq_len = src.seq_len.unwrap_or(def_l);
    if let Some(max) = net.max_positions() {
        if seq_len > max {
            return Err(Error::input(format!(
                "--seq-len {seq_len} exceeds the model's {max} positions"
            )));
        }
    }
    let content = seq_len.checked_sub(framing.len()).filter(|&c| c > 0).ok_or_else(|| {
        Error::input(format!(
            "--seq-len {seq_len} leaves no room for text after the model's {} special tokens",
            framing.len()
        ))
    })?;
    let text = read_text(&src.path)?;
    let ids = tokenize(&tok, &text)
        .map_err(|e| Error::input(format!("{}: cannot tokenize: {e}", src.path.display())))?;
    if ids.len() < content {
        return Err(Error::input(format!(
            "{}: holds {} tokens, fewer than the {content} each window of --seq-len {seq_len} needs",
            src.path.display(),
            ids.len()
        )));
    }
    let starts = draw_windows(ids.len(), samples, content, src.seed);
    let wins = starts.iter().map(|&s| framing.frame(&ids[s..s + content])).collect();
    Ok((wins, ids.len()))
}

/// Run text calibration and prune block by block.
///
/// `progress` receives [`Progress::Start`] with the number of layers, then
/// one [`Progress::Layer`] per layer as its solve begins.
pub fn run(
    cfg: &PruneConfig,
    model: &Model,
    src: &TextSource,
    progress: &dyn Fn(Progress<'_>),
    par: Par,
) -> Result<TextRun, Error> {
    let mut timing = PhaseTimes::default();
    let mut net = arch::load(model).map_err(arch_error)?;
    let blocks = plan(cfg, model, net.as_ref())?;
    let t = Instant::now();
    let (wins, total_tokens) = windows(model, net.as_ref(), src)?;
    timing.tokenize = t.elapsed().as_secs_f64();
    let seq_len = wins[0].len();
    let per_batch = batch_size(seq_len);
    let batches: Vec<(usize, Batch)> =
        wins.chunks(per_batch).enumerate().map(|(i, c)| (i * per_batch, Batch::new(c))).collect();

    let t = Instant::now();
    let mut hidden: Vec<Tensor> = Vec::with_capacity(batches.len());
    for (_, b) in &batches {
        hidden.push(net.embed(b).map_err(arch_error)?);
    }
    timing.forward += t.elapsed().as_secs_f64();

    let n_layers: usize = blocks.iter().map(Vec::len).sum();
    progress(Progress::Start(n_layers));
    let mut done = 0;
    let mut replaced = BTreeMap::new();
    let mut solved = Vec::with_capacity(n_layers);
    for (b, planned) in blocks.iter().enumerate() {
        let groups = net.groups(b);
        let mut grams: BTreeMap<usize, LayerGrams> = BTreeMap::new();
        for p in planned {
            let d_in = net.linear(&p.name).expect("planned").shape().1;
            grams.entry(p.group).or_insert_with(|| LayerGrams::new(d_in));
        }
        // Collect: one pass over the batches with the block still dense.
        let mut next = Vec::with_capacity(hidden.len());
        let mut gram_secs = 0.0;
        let t = Instant::now();
        for ((first, _), x) in batches.iter().zip(&hidden) {
            let mut tap = |g: usize, rows: &Tensor| -> arch::Result<()> {
                let Some(lg) = grams.get_mut(&g) else { return Ok(()) };
                let tg = Instant::now();
                let d = rows.dim(1)?;
                let data: Vec<f32> = rows.flatten_all()?.to_vec1()?;
                let (mut fit, mut held) = (Vec::new(), Vec::new());
                for (j, seq) in data.chunks(seq_len * d).enumerate() {
                    let to = if is_holdout(first + j, cfg.holdout) { &mut held } else { &mut fit };
                    to.extend(seq.iter().map(|&v| f64::from(v)));
                }
                drop(data);
                lg.calib.add_rows(&fit, par);
                lg.holdout.add_rows(&held, par);
                gram_secs += tg.elapsed().as_secs_f64();
                Ok(())
            };
            next.push(net.block(b, x, &mut tap).map_err(arch_error)?);
        }
        timing.forward += t.elapsed().as_secs_f64() - gram_secs;
        timing.gram += gram_secs;
        for (g, lg) in &grams {
            if lg.calib.rows() == 0 {
                return Err(Error::input(format!(
                    "{}: --holdout {} leaves no calibration rows for the '{}' input of block {b}",
                    src.path.display(),
                    cfg.holdout,
                    groups[*g].label
                )));
            }
        }
        // Solve every selected layer of the block from its group's Grams.
        for p in planned {
            progress(Progress::Layer(done, &p.name));
            let t = Instant::now();
            let lin = net.linear(&p.name).expect("planned");
            let (d_out, d_in) = lin.shape();
            let transposed = lin.transposed;
            let flat = tensor_f64(&lin.weight)?;
            let w = Mat::from_fn(d_out, d_in, |r, c| flat[r * d_in + c]);
            let s =
                pipeline::solve_layer(cfg, &p.name, p.dtype, w.as_ref(), &grams[&p.group], par)?;
            let f32s: Vec<f32> = s.values.iter().map(|&v| v as f32).collect();
            net.set_weight(&p.name, &f32s).map_err(arch_error)?;
            let stored = if transposed {
                let mut t = vec![0.0; s.values.len()];
                for r in 0..d_out {
                    for c in 0..d_in {
                        t[c * d_out + r] = s.values[r * d_in + c];
                    }
                }
                t
            } else {
                s.values.clone()
            };
            replaced.insert(p.name.clone(), stored);
            timing.solve += t.elapsed().as_secs_f64();
            solved.push((p.name.clone(), s));
            done += 1;
        }
        drop(grams);
        // Propagate: recompute the block's outputs with its pruned weights.
        let t = Instant::now();
        if src.propagate && !planned.is_empty() && b + 1 < net.num_blocks() {
            next.clear();
            for x in &hidden {
                next.push(net.block(b, x, &mut |_, _| Ok(())).map_err(arch_error)?);
            }
        }
        hidden = next;
        timing.forward += t.elapsed().as_secs_f64();
    }
    let held = (0..wins.len()).filter(|&i| is_holdout(i, cfg.holdout)).count();
    let description = serde_json::json!({
        "text": src.path.display().to_string(),
        "text_tokens": total_tokens,
        "samples": wins.len(),
        "seq_len": seq_len,
        "seed": src.seed,
        "holdout_samples": held,
        "propagate": src.propagate,
        "model_type": arch::ArchConfig::read(&arch::model_dir(model)).map(|c| c.model_type).unwrap_or_default(),
    });
    Ok(TextRun { replaced, solved, description, timing })
}
