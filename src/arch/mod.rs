//! Forward passes of the supported architecture families, on CPU in f32.
//!
//! This module owns: reading `config.json` into an [`ArchConfig`], building a
//! [`Network`] from a model's safetensors tensors, and running it block by
//! block with a *tap* that sees the input of every group of linear layers.
//! Block structure ([`units`]) says which tensor slices make up an FFN
//! neuron or an attention head. It knows nothing about pruning; the
//! calibration driver
//! (`crate::source::text`) calls [`Network::embed`], [`Network::block`] and
//! [`Network::set_weight`].
//!
//! Weights are read one of two ways: [`load`] reads every tensor as f32 up
//! front (evaluation, tests); [`load_by_block`] reads only the small tensors
//! (norms, embeddings) up front and each block's linear weights when the
//! caller reaches it ([`Network::load_block`], [`Network::unload_block`]),
//! so a pruning run holds one block's f32 weights, not the model's.
//!
//! Families (from `model_type`):
//! - [`bert`]: BERT-style encoders (`bert`): token/position/type embeddings,
//!   post-norm blocks, GELU (erf form).
//! - [`llama`]: Llama-style decoders (`llama`, `mistral`, `qwen2`): RMSNorm,
//!   rotary position embeddings, SwiGLU MLP, grouped-query attention, causal
//!   mask.
//! - [`gpt2`]: GPT-2-style decoders (`gpt2`): learned positions, pre-norm,
//!   GELU (tanh form), weights stored `[d_in, d_out]`.
//!
//! Conventions shared by every family:
//! - A batch is `n` sequences of the same length `L`, every token real: no
//!   padding and no attention mask beyond the causal one of decoders.
//!   Callers group sequences by length instead.
//! - Every [`Linear`] holds its weight as `[d_out, d_in]` whatever the
//!   stored layout; `transposed` says the file stores `[d_in, d_out]`.
//! - Blocks compute in f32 with candle-core's CPU backend.

pub mod bert;
pub mod decode;
pub mod gpt2;
pub mod kernel;
pub mod llama;
pub mod units;

use crate::io::Model;
use candle_core::{DType, Device, Tensor, D};
use std::collections::BTreeMap;
use std::fmt;
use std::path::Path;

/// The supported `model_type` values, for messages.
pub const SUPPORTED: &str = "bert, llama, mistral, qwen2, gpt2";

/// What went wrong while reading a config or running a network.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum ArchErrorKind {
    /// `config.json` is missing, unreadable or not the expected JSON.
    Config,
    /// The `model_type` is not one of [`SUPPORTED`].
    Unsupported,
    /// A tensor the architecture needs is missing or has the wrong shape.
    Weights,
    /// A tensor operation failed during the forward pass.
    Compute,
}

/// An architecture error: one line naming the file, tensor or setting.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ArchError {
    kind: ArchErrorKind,
    message: String,
}

impl ArchError {
    pub(crate) fn new(kind: ArchErrorKind, message: impl Into<String>) -> Self {
        ArchError { kind, message: message.into() }
    }

    /// What went wrong.
    pub fn kind(&self) -> ArchErrorKind {
        self.kind
    }
}

impl fmt::Display for ArchError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for ArchError {}

impl From<candle_core::Error> for ArchError {
    fn from(e: candle_core::Error) -> Self {
        // candle's messages can span lines (backtraces); keep the first.
        let text = e.to_string();
        let first = text.lines().next().unwrap_or("tensor operation failed");
        ArchError::new(ArchErrorKind::Compute, format!("forward pass: {first}"))
    }
}

/// Result alias for this module.
pub type Result<T> = std::result::Result<T, ArchError>;

/// Encoder (sentence embeddings) or decoder (next-token logits).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Kind {
    /// Bidirectional encoder; [`Network::output`] gives mean-pooled
    /// embeddings `[n, d]`.
    Encoder,
    /// Causal decoder; [`Network::output`] gives logits `[n, L, vocab]`.
    Decoder,
}

/// Architecture family.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Family {
    /// BERT-style encoder.
    Bert,
    /// Llama-style decoder (llama, mistral, qwen2).
    Llama,
    /// GPT-2-style decoder.
    Gpt2,
}

/// `config.json`, parsed: the family plus the raw JSON for family-specific
/// fields.
#[derive(Clone, Debug)]
pub struct ArchConfig {
    /// The `model_type` string as written.
    pub model_type: String,
    /// Family it maps to.
    pub family: Family,
    /// The whole JSON object.
    pub json: serde_json::Value,
    /// Where it was read from (for messages).
    pub path: String,
}

impl ArchConfig {
    /// Read `dir/config.json`.
    ///
    /// # Errors
    /// [`ArchErrorKind::Config`] when the file is missing or not a JSON
    /// object with a `model_type`; [`ArchErrorKind::Unsupported`] for other
    /// model types (the message names the supported ones and `--activations`).
    pub fn read(dir: &Path) -> Result<Self> {
        let path = dir.join("config.json");
        let shown = path.display().to_string();
        crate::io::check_regular(&path)
            .map_err(|e| ArchError::new(ArchErrorKind::Config, e.to_string()))?;
        let text = std::fs::read_to_string(&path).map_err(|e| {
            ArchError::new(
                ArchErrorKind::Config,
                format!("{shown}: cannot read the model config ({e}); text calibration needs config.json next to the weights"),
            )
        })?;
        Self::parse(&text, &shown)
    }

    /// Parse config text; `path` is used in messages.
    pub fn parse(text: &str, path: &str) -> Result<Self> {
        let json: serde_json::Value = serde_json::from_str(text).map_err(|e| {
            ArchError::new(ArchErrorKind::Config, format!("{path}: not valid JSON ({e})"))
        })?;
        let model_type = json
            .get("model_type")
            .and_then(|v| v.as_str())
            .ok_or_else(|| {
                ArchError::new(ArchErrorKind::Config, format!("{path}: no \"model_type\" string"))
            })?
            .to_string();
        let family = match model_type.as_str() {
            "bert" => Family::Bert,
            "llama" | "mistral" | "qwen2" => Family::Llama,
            "gpt2" => Family::Gpt2,
            other => {
                return Err(ArchError::new(
                    ArchErrorKind::Unsupported,
                    format!(
                        "{path}: model_type '{other}' is not supported for text calibration \
                         (supported: {SUPPORTED}); for any other model, collect the layer inputs \
                         yourself and pass them with --activations"
                    ),
                ))
            }
        };
        Ok(ArchConfig { model_type, family, json, path: path.to_string() })
    }

    /// A required unsigned integer field.
    pub fn usize(&self, key: &str) -> Result<usize> {
        self.json.get(key).and_then(|v| v.as_u64()).map(|v| v as usize).ok_or_else(|| {
            ArchError::new(
                ArchErrorKind::Config,
                format!("{}: missing or non-integer \"{key}\"", self.path),
            )
        })
    }

    /// An optional unsigned integer field.
    pub fn usize_or(&self, key: &str, default: usize) -> usize {
        self.json.get(key).and_then(|v| v.as_u64()).map_or(default, |v| v as usize)
    }

    /// An optional float field.
    pub fn f64_or(&self, key: &str, default: f64) -> f64 {
        self.json.get(key).and_then(|v| v.as_f64()).unwrap_or(default)
    }

    /// An optional normalisation ε: refused when negative or not finite
    /// (a negative ε under the square root gives NaN everywhere).
    pub fn eps_or(&self, key: &str, default: f64) -> Result<f64> {
        let v = match self.json.get(key) {
            None | Some(serde_json::Value::Null) => return Ok(default),
            Some(v) => v.as_f64(),
        };
        match v {
            Some(e) if e.is_finite() && e >= 0.0 => Ok(e),
            _ => Err(ArchError::new(
                ArchErrorKind::Config,
                format!(
                    "{}: \"{key}\" must be a finite number >= 0, not {}",
                    self.path, self.json[key]
                ),
            )),
        }
    }

    /// A required unsigned integer field that must be at least 1.
    pub fn positive(&self, key: &str) -> Result<usize> {
        match self.usize(key)? {
            0 => Err(ArchError::new(
                ArchErrorKind::Config,
                format!("{}: \"{key}\" is 0; it must be at least 1", self.path),
            )),
            v => Ok(v),
        }
    }

    /// An optional boolean field.
    pub fn bool_or(&self, key: &str, default: bool) -> bool {
        self.json.get(key).and_then(|v| v.as_bool()).unwrap_or(default)
    }
}

/// One linear layer `y = x Wᵀ + b`.
#[derive(Clone, Debug)]
pub struct Linear {
    /// Name of the weight tensor in the model file.
    pub name: String,
    /// Weight `[d_out, d_in]`, f32, contiguous.
    pub weight: Tensor,
    /// Bias `[d_out]`, if any.
    pub bias: Option<Tensor>,
    /// The file stores the weight as `[d_in, d_out]` (GPT-2 style).
    pub transposed: bool,
    /// The product to run instead of candle's dense one, if any
    /// ([`kernel`]); cleared when the weight is replaced.
    pub kernel: Option<kernel::Kernel>,
}

impl Linear {
    /// `[d_out, d_in]`.
    pub fn shape(&self) -> (usize, usize) {
        let d = self.weight.dims();
        (d[0], d[1])
    }

    /// `x [.., d_in] → [.., d_out]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let Some(k) = &self.kernel else { return self.product(x) };
        let t = std::time::Instant::now();
        let y = match k {
            kernel::Kernel::Dense => self.product(x),
            kernel::Kernel::Sparse(w) => self.product_with(x, |x| kernel::sparse_product(w, x)),
        };
        kernel::add_time(t);
        y
    }

    fn product(&self, x: &Tensor) -> Result<Tensor> {
        self.product_with(x, |x| Ok(x.matmul(&self.weight.t()?)?))
    }

    fn product_with(
        &self,
        x: &Tensor,
        f: impl FnOnce(&Tensor) -> Result<Tensor>,
    ) -> Result<Tensor> {
        // One 2-D product [rows, d_in]·Wᵀ, whatever the leading dimensions.
        let dims = x.dims().to_vec();
        let d_in = *dims.last().expect("at least 1-D");
        let rows = x.elem_count() / d_in.max(1);
        let y = f(&x.contiguous()?.reshape((rows, d_in))?)?;
        let mut out = dims;
        *out.last_mut().expect("at least 1-D") = self.shape().0;
        let y = y.reshape(out)?;
        Ok(match &self.bias {
            Some(b) => y.broadcast_add(b)?,
            None => y,
        })
    }
}

/// Linear layers of one block that read the same input, so they share one
/// Gram matrix.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Group {
    /// Short label, e.g. `"attention input"`.
    pub label: String,
    /// Weight tensor names, in forward order.
    pub layers: Vec<String>,
}

/// A batch of `n` token sequences of equal length, all tokens real.
#[derive(Clone, Debug)]
pub struct Batch {
    /// Token ids `[n, L]`, u32.
    pub ids: Tensor,
}

impl Batch {
    /// Build from equal-length id sequences.
    ///
    /// # Panics
    /// If `seqs` is empty or the lengths differ (caller contract).
    #[track_caller]
    pub fn new(seqs: &[Vec<u32>]) -> Self {
        assert!(!seqs.is_empty(), "empty batch");
        let l = seqs[0].len();
        assert!(seqs.iter().all(|s| s.len() == l), "sequences of different lengths");
        let flat: Vec<u32> = seqs.iter().flatten().copied().collect();
        let ids = Tensor::from_vec(flat, (seqs.len(), l), &Device::Cpu).expect("shape matches");
        Batch { ids }
    }

    /// `(n, L)`.
    pub fn dims(&self) -> (usize, usize) {
        let d = self.ids.dims();
        (d[0], d[1])
    }
}

/// Receives the input of group `g` of the current block as `[n·L, d_in]`.
pub type Tap<'a> = dyn FnMut(usize, &Tensor) -> Result<()> + 'a;

/// A network that can be run block by block.
pub trait Network: Send + Sync {
    /// Family.
    fn family(&self) -> Family;

    /// Encoder or decoder.
    fn kind(&self) -> Kind;

    /// Number of blocks (transformer layers).
    fn num_blocks(&self) -> usize;

    /// The linear layers of block `b`, grouped by shared input, in forward
    /// order.
    fn groups(&self, b: usize) -> Vec<Group>;

    /// Token embeddings (plus positions and types, as the family does):
    /// `[n, L] → [n, L, d]`.
    fn embed(&self, batch: &Batch) -> Result<Tensor>;

    /// Block `b`: `[n, L, d] → [n, L, d]`. `tap(g, x)` is called with the
    /// input of each group `g` of [`Network::groups`]`(b)`, flattened to
    /// `[n·L, d_in]`, before the group's layers are applied.
    fn block(&self, b: usize, x: &Tensor, tap: &mut Tap<'_>) -> Result<Tensor>;

    /// After the last block: pooled embeddings `[n, d]` for encoders, logits
    /// `[n, L, vocab]` for decoders.
    fn output(&self, x: &Tensor) -> Result<Tensor>;

    /// Longest sequence the position embeddings allow, if limited.
    fn max_positions(&self) -> Option<usize> {
        None
    }

    /// The family's linear layers.
    fn linears(&self) -> &Linears;

    /// The family's linear layers, to replace or (un)load weights.
    fn linears_mut(&mut self) -> &mut Linears;

    /// A linear layer by weight tensor name, if its weight is loaded.
    fn linear(&self, name: &str) -> Option<&Linear> {
        self.linears().get(name)
    }

    /// Shape and layout of a linear layer, loaded or not.
    fn layer_spec(&self, name: &str) -> Option<&LinearSpec> {
        self.linears().spec(name)
    }

    /// Read the linear weights of block `b` from `model` (a network from
    /// [`load_by_block`]; a no-op when they are loaded).
    ///
    /// # Errors
    /// An unreadable tensor (NaN or infinity included), named.
    fn load_block(&mut self, b: usize, model: &Model) -> Result<()> {
        let names: Vec<String> = self.groups(b).into_iter().flat_map(|g| g.layers).collect();
        self.linears_mut().load(&names, model)
    }

    /// Drop the linear weights of block `b` (a network from
    /// [`load_by_block`] only; an eager network keeps them).
    fn unload_block(&mut self, b: usize) {
        let names: Vec<String> = self.groups(b).into_iter().flat_map(|g| g.layers).collect();
        self.linears_mut().unload(&names);
    }

    /// The removable units of block `b` ([`units::Units`]): FFN neurons,
    /// and attention heads where the family's config can express fewer.
    fn units(&self, b: usize) -> Vec<units::Units>;

    /// Replace a linear layer's weight (`[d_out, d_in]`, row-major f32).
    ///
    /// # Errors
    /// [`ArchErrorKind::Weights`] for an unknown name or a wrong length.
    fn set_weight(&mut self, name: &str, values: &[f32]) -> Result<()> {
        self.linears_mut().set(name, values)
    }

    /// Put a product kernel in place for a linear layer ([`kernel`]), or
    /// remove it with `None`.
    ///
    /// # Errors
    /// [`ArchErrorKind::Weights`] for an unknown name or a sparse weight of
    /// another shape.
    fn set_kernel(&mut self, name: &str, k: Option<kernel::Kernel>) -> Result<()> {
        self.linears_mut().set_kernel(name, k)
    }

    /// Decoders: run new tokens `batch` (positions `cache.len()..`) through
    /// every block, reading and extending the key/value `cache`, and return
    /// their logits `[n, l, vocab]` ([`decode`]).
    ///
    /// # Errors
    /// [`ArchErrorKind::Unsupported`] for encoders; compute errors.
    fn forward_cached(&self, batch: &Batch, cache: &mut decode::KvCache) -> Result<Tensor> {
        let _ = (batch, cache);
        Err(ArchError::new(
            ArchErrorKind::Unsupported,
            format!("{:?} networks have no key/value-cached decoding", self.family()),
        ))
    }

    /// Run every block without taps and return [`Network::output`].
    fn forward(&self, batch: &Batch) -> Result<Tensor> {
        let mut x = self.embed(batch)?;
        for b in 0..self.num_blocks() {
            x = self.block(b, &x, &mut |_, _| Ok(()))?;
        }
        self.output(&x)
    }
}

/// The folder that holds a model's `config.json` and `tokenizer.json`: the
/// model directory, or the folder of a single file or shard index.
pub fn model_dir(model: &Model) -> std::path::PathBuf {
    let root = model.layout().root();
    if root.is_dir() {
        root.to_path_buf()
    } else {
        root.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new(".")).to_path_buf()
    }
}

/// Build the network described by `dir/config.json` from `model`'s tensors.
///
/// # Errors
/// Config errors, unsupported families, and missing or misshapen tensors.
pub fn load(model: &Model) -> Result<Box<dyn Network>> {
    build(model, Weights::new(model))
}

/// Build the network like [`load`] but leave every block's linear weights
/// in the file until [`Network::load_block`] (shapes are checked now). A
/// decoder's output head is not read: such a network serves calibration,
/// not [`Network::output`].
///
/// # Errors
/// As [`load`].
pub fn load_by_block(model: &Model) -> Result<Box<dyn Network>> {
    build(model, Weights { model, lazy: true })
}

fn build(model: &Model, w: Weights<'_>) -> Result<Box<dyn Network>> {
    let cfg = ArchConfig::read(&model_dir(model))?;
    let net: Box<dyn Network> = match cfg.family {
        Family::Bert => Box::new(bert::Bert::new(&cfg, &w)?),
        Family::Llama => Box::new(llama::Llama::new(&cfg, &w)?),
        Family::Gpt2 => Box::new(gpt2::Gpt2::new(&cfg, &w)?),
    };
    check_blocks(&cfg, model, net.as_ref())?;
    Ok(net)
}

/// Refuse a config whose block count leaves blocks of the weights unused:
/// every tensor under the blocks' common prefix (`encoder.layer.`,
/// `model.layers.`, `h.`) must belong to a block the network runs, so no
/// prunable weight is silently left out.
fn check_blocks(cfg: &ArchConfig, model: &Model, net: &dyn Network) -> Result<()> {
    let key = match cfg.family {
        Family::Gpt2 => "n_layer",
        _ => "num_hidden_layers",
    };
    let n = net.num_blocks();
    if n == 0 {
        return Err(ArchError::new(
            ArchErrorKind::Config,
            format!("{}: \"{key}\" is 0; the model has no blocks to calibrate", cfg.path),
        ));
    }
    // The prefix of block 0's first linear, up to its index.
    let Some(first) = net.groups(0).into_iter().flat_map(|g| g.layers).next() else {
        return Ok(());
    };
    let Some(at) =
        first.find(".0.").map(|i| i + 1).or_else(|| first.starts_with("0.").then_some(0))
    else {
        return Ok(());
    };
    let prefix = &first[..at];
    for t in model.tensors() {
        let Some(rest) = t.name.strip_prefix(prefix) else { continue };
        let digits: String = rest.chars().take_while(char::is_ascii_digit).collect();
        let index = match digits.parse::<usize>() {
            Ok(i) if rest[digits.len()..].starts_with('.') => i,
            _ => continue,
        };
        if index >= n {
            return Err(ArchError::new(
                ArchErrorKind::Config,
                format!(
                    "{}: \"{key}\" is {n}, but the weights hold more blocks (tensor '{}' of \
                     block {index} would be left out); fix \"{key}\"",
                    cfg.path,
                    crate::io::escape(&t.name)
                ),
            ));
        }
    }
    Ok(())
}

/// Tensor access for the family constructors: reads any float dtype as f32
/// and checks shapes, with messages naming the tensor.
pub struct Weights<'a> {
    model: &'a Model,
    /// Linear weights are read later, block by block.
    lazy: bool,
}

impl<'a> Weights<'a> {
    /// Wrap a model; every tensor is read when asked for.
    pub fn new(model: &'a Model) -> Self {
        Weights { model, lazy: false }
    }

    /// Whether linear weights wait for [`Network::load_block`].
    pub fn lazy(&self) -> bool {
        self.lazy
    }

    /// Whether a tensor exists.
    pub fn has(&self, name: &str) -> bool {
        self.model.get(name).is_some()
    }

    /// The first of `prefixes` under which `probe` exists (e.g. `""` or
    /// `"bert."`).
    pub fn prefix<'p>(&self, prefixes: &[&'p str], probe: &str) -> Option<&'p str> {
        prefixes.iter().copied().find(|p| self.has(&format!("{p}{probe}")))
    }

    /// Check that a tensor exists with exactly `shape`.
    pub fn check(&self, name: &str, shape: &[usize]) -> Result<()> {
        let info = self.model.get(name).ok_or_else(|| {
            ArchError::new(
                ArchErrorKind::Weights,
                format!("{}: missing tensor '{name}'", self.model.layout().root().display()),
            )
        })?;
        if info.shape != shape {
            return Err(ArchError::new(
                ArchErrorKind::Weights,
                format!("tensor '{name}' has shape {:?}; the config implies {shape:?}", info.shape),
            ));
        }
        Ok(())
    }

    /// Read a tensor of exactly `shape` as f32 (decoded straight from the
    /// stored dtype, no f64 copy).
    pub fn tensor(&self, name: &str, shape: &[usize]) -> Result<Tensor> {
        self.check(name, shape)?;
        let file = self.model.file_of(name).expect("checked above");
        let data = file
            .read_f32(name)
            .map_err(|e| ArchError::new(ArchErrorKind::Weights, e.to_string()))?;
        Ok(Tensor::from_slice(&data, shape, &Device::Cpu)?)
    }

    /// A linear layer stored `[d_out, d_in]` (or `[d_in, d_out]` when
    /// `transposed`), with an optional bias `<stem>.bias`.
    pub fn linear(
        &self,
        stem: &str,
        d_in: usize,
        d_out: usize,
        bias: bool,
        transposed: bool,
    ) -> Result<Linear> {
        let name = format!("{stem}.weight");
        let weight = if transposed {
            self.tensor(&name, &[d_in, d_out])?.t()?.contiguous()?
        } else {
            self.tensor(&name, &[d_out, d_in])?
        };
        let bias = if bias { Some(self.tensor(&format!("{stem}.bias"), &[d_out])?) } else { None };
        Ok(Linear { name, weight, bias, transposed, kernel: None })
    }
}

/// Where a linear layer's weight is in the file and what shape it has.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct LinearSpec {
    /// Tensor name stem (`<stem>.weight`, `<stem>.bias`).
    pub stem: String,
    /// `[d_out, d_in]`.
    pub shape: [usize; 2],
    /// It has a bias.
    pub bias: bool,
    /// The file stores the weight as `[d_in, d_out]`.
    pub transposed: bool,
}

/// A named set of linear layers with checked replacement; the families keep
/// their layers here so [`Network::linear`] and [`Network::set_weight`] are
/// shared code. Built lazily ([`load_by_block`]), a layer has its spec but
/// no weight until [`Linears::load`].
#[derive(Clone, Debug, Default)]
pub struct Linears {
    specs: BTreeMap<String, LinearSpec>,
    by_name: BTreeMap<String, Linear>,
    lazy: bool,
}

impl Linears {
    /// Add a layer; returns its name for the family's own bookkeeping.
    pub fn add(&mut self, l: Linear) -> String {
        let name = l.name.clone();
        let (d_out, d_in) = l.shape();
        let spec = LinearSpec {
            stem: name.strip_suffix(".weight").unwrap_or(&name).to_string(),
            shape: [d_out, d_in],
            bias: l.bias.is_some(),
            transposed: l.transposed,
        };
        self.specs.insert(name.clone(), spec);
        self.by_name.insert(name.clone(), l);
        name
    }

    /// Add the layer `<stem>.weight` of `w`'s model: read now, or (lazy
    /// weights) only checked for shape and read by [`Linears::load`].
    ///
    /// # Errors
    /// A missing or misshapen weight or bias, named.
    pub fn add_from(
        &mut self,
        w: &Weights<'_>,
        stem: &str,
        d_in: usize,
        d_out: usize,
        bias: bool,
        transposed: bool,
    ) -> Result<String> {
        if !w.lazy {
            return Ok(self.add(w.linear(stem, d_in, d_out, bias, transposed)?));
        }
        let name = format!("{stem}.weight");
        w.check(&name, &if transposed { [d_in, d_out] } else { [d_out, d_in] })?;
        if bias {
            w.check(&format!("{stem}.bias"), &[d_out])?;
        }
        self.lazy = true;
        let spec = LinearSpec { stem: stem.to_string(), shape: [d_out, d_in], bias, transposed };
        self.specs.insert(name.clone(), spec);
        Ok(name)
    }

    /// Read the weights of `names` that are not loaded.
    ///
    /// # Errors
    /// An unknown name or an unreadable tensor.
    pub fn load(&mut self, names: &[String], model: &Model) -> Result<()> {
        let w = Weights::new(model);
        for name in names {
            if self.by_name.contains_key(name) {
                continue;
            }
            let s = self.spec(name).ok_or_else(|| {
                ArchError::new(ArchErrorKind::Weights, format!("no linear layer '{name}'"))
            })?;
            let [d_out, d_in] = s.shape;
            let l = w.linear(&s.stem, d_in, d_out, s.bias, s.transposed)?;
            self.by_name.insert(name.clone(), l);
        }
        Ok(())
    }

    /// Drop the weights of `names` when the set was built lazily.
    pub fn unload(&mut self, names: &[String]) {
        if self.lazy {
            for n in names {
                self.by_name.remove(n);
            }
        }
    }

    /// Look up a loaded layer by weight name.
    pub fn get(&self, name: &str) -> Option<&Linear> {
        self.by_name.get(name)
    }

    /// Shape and layout by weight name, loaded or not.
    pub fn spec(&self, name: &str) -> Option<&LinearSpec> {
        self.specs.get(name)
    }

    /// The spec of a layer the family registered itself.
    ///
    /// # Panics
    /// If the family never added it (a bug, not an input error).
    #[track_caller]
    pub fn spec_at(&self, name: &str) -> &LinearSpec {
        self.specs.get(name).unwrap_or_else(|| panic!("layer '{name}' was never added"))
    }

    /// Look up a layer the family registered itself.
    ///
    /// # Panics
    /// If the family never added it, or it is not loaded (bugs, not input
    /// errors).
    #[track_caller]
    pub fn at(&self, name: &str) -> &Linear {
        self.by_name.get(name).unwrap_or_else(|| panic!("layer '{name}' was never added"))
    }

    /// Replace a weight, checking the length against `[d_out, d_in]`.
    pub fn set(&mut self, name: &str, values: &[f32]) -> Result<()> {
        let l = self.by_name.get_mut(name).ok_or_else(|| {
            ArchError::new(ArchErrorKind::Weights, format!("no linear layer '{name}'"))
        })?;
        let (o, i) = l.shape();
        if values.len() != o * i {
            return Err(ArchError::new(
                ArchErrorKind::Weights,
                format!("layer '{name}': {} values for a [{o}, {i}] weight", values.len()),
            ));
        }
        l.weight = Tensor::from_slice(values, (o, i), &Device::Cpu)?;
        l.kernel = None;
        Ok(())
    }

    /// Put a product kernel in place (or remove it with `None`).
    pub fn set_kernel(&mut self, name: &str, k: Option<kernel::Kernel>) -> Result<()> {
        let l = self.by_name.get_mut(name).ok_or_else(|| {
            ArchError::new(ArchErrorKind::Weights, format!("no linear layer '{name}'"))
        })?;
        if let Some(kernel::Kernel::Sparse(w)) = &k {
            if w.shape() != l.shape() {
                return Err(ArchError::new(
                    ArchErrorKind::Weights,
                    format!(
                        "layer '{name}': sparse kernel of shape {:?} for a {:?} weight",
                        w.shape(),
                        l.shape()
                    ),
                ));
            }
        }
        l.kernel = k;
        Ok(())
    }
}

/// LayerNorm over the last dimension: `(x − μ)/√(σ² + ε)·γ + β`.
pub fn layer_norm(x: &Tensor, gamma: &Tensor, beta: &Tensor, eps: f64) -> Result<Tensor> {
    let mean = x.mean_keepdim(D::Minus1)?;
    let xc = x.broadcast_sub(&mean)?;
    let var = xc.sqr()?.mean_keepdim(D::Minus1)?;
    let y = xc.broadcast_div(&(var + eps)?.sqrt()?)?;
    Ok(y.broadcast_mul(gamma)?.broadcast_add(beta)?)
}

/// RMSNorm over the last dimension: `x/√(mean(x²) + ε)·γ`.
pub fn rms_norm(x: &Tensor, gamma: &Tensor, eps: f64) -> Result<Tensor> {
    let ms = x.sqr()?.mean_keepdim(D::Minus1)?;
    Ok(x.broadcast_div(&(ms + eps)?.sqrt()?)?.broadcast_mul(gamma)?)
}

/// Softmax over the last dimension, shifted by the row maximum.
pub fn softmax_last(x: &Tensor) -> Result<Tensor> {
    let m = x.max_keepdim(D::Minus1)?;
    let e = x.broadcast_sub(&m)?.exp()?;
    Ok(e.broadcast_div(&e.sum_keepdim(D::Minus1)?)?)
}

/// Scaled dot-product attention on `[n, h, L, dh]` heads, with an optional
/// causal mask: `softmax(Q Kᵀ/√dh + M) V`.
pub fn attention(q: &Tensor, k: &Tensor, v: &Tensor, causal: bool) -> Result<Tensor> {
    let dh = q.dim(D::Minus1)?;
    let scores = (q.matmul(&k.t()?)? * (1.0 / (dh as f64).sqrt()))?;
    let scores = if causal {
        let l = q.dim(2)?;
        let mask: Vec<f32> =
            (0..l * l).map(|i| if i % l > i / l { f32::NEG_INFINITY } else { 0.0 }).collect();
        let mask = Tensor::from_vec(mask, (l, l), &Device::Cpu)?;
        scores.broadcast_add(&mask)?
    } else {
        scores
    };
    Ok(softmax_last(&scores)?.matmul(v)?)
}

/// `[n, L, h·dh] → [n, h, L, dh]` (contiguous).
pub fn split_heads(x: &Tensor, heads: usize) -> Result<Tensor> {
    let (n, l, d) = x.dims3()?;
    Ok(x.reshape((n, l, heads, d / heads))?.transpose(1, 2)?.contiguous()?)
}

/// `[n, h, L, dh] → [n, L, h·dh]`.
pub fn merge_heads(x: &Tensor) -> Result<Tensor> {
    let (n, h, l, dh) = x.dims4()?;
    Ok(x.transpose(1, 2)?.contiguous()?.reshape((n, l, h * dh))?)
}

/// `[n, L, d] → [n·L, d]` (the tap's view).
pub fn rows(x: &Tensor) -> Result<Tensor> {
    let d = x.dim(D::Minus1)?;
    let count = x.elem_count() / d.max(1);
    Ok(x.contiguous()?.reshape((count, d))?)
}

/// Copy a 2-D f32 tensor out as row-major f64.
pub fn to_f64_rows(x: &Tensor) -> Result<Vec<f64>> {
    let v: Vec<f32> = x.to_dtype(DType::F32)?.flatten_all()?.to_vec1()?;
    Ok(v.into_iter().map(f64::from).collect())
}

#[cfg(test)]
mod config_checks {
    use super::*;

    fn cfg(json: &str) -> ArchConfig {
        ArchConfig::parse(json, "m/config.json").unwrap()
    }

    #[test]
    fn norm_eps_must_be_finite_and_not_negative() {
        let c = cfg(r#"{"model_type":"llama","layer_norm_eps":-1e-5,"rms_norm_eps":-1,"x":1e-6}"#);
        for key in ["layer_norm_eps", "rms_norm_eps"] {
            let e = c.eps_or(key, 1e-6).unwrap_err().to_string();
            assert!(e.starts_with("m/config.json: ") && e.contains(key), "{e}");
        }
        assert_eq!(c.eps_or("x", 1.0).unwrap(), 1e-6);
        assert_eq!(c.eps_or("absent", 0.5).unwrap(), 0.5);
        let c = cfg(r#"{"model_type":"llama","rms_norm_eps":"tiny"}"#);
        assert!(c.eps_or("rms_norm_eps", 1e-6).is_err());
        // Through the family readers.
        let base = r#""model_type":"llama","hidden_size":8,"num_attention_heads":2,"num_hidden_layers":1,"intermediate_size":4,"vocab_size":5"#;
        let e =
            llama::LlamaConfig::from_config(&cfg(&format!("{{{base},\"rms_norm_eps\":-1e-6}}")))
                .unwrap_err()
                .to_string();
        assert!(e.contains("config.json") && e.contains("rms_norm_eps"), "{e}");
        let g = r#""model_type":"gpt2","n_embd":8,"n_head":2,"n_layer":1,"vocab_size":5"#;
        let e = gpt2::Gpt2Config::from_config(&cfg(&format!("{{{g},\"layer_norm_epsilon\":-1}}")))
            .unwrap_err()
            .to_string();
        assert!(e.contains("config.json") && e.contains("layer_norm_epsilon"), "{e}");
    }

    #[test]
    fn llama_heads_must_divide_the_width_without_head_dim() {
        let base =
            r#""model_type":"llama","num_hidden_layers":1,"intermediate_size":4,"vocab_size":5"#;
        let e = llama::LlamaConfig::from_config(&cfg(&format!(
            "{{{base},\"hidden_size\":10,\"num_attention_heads\":4}}"
        )))
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("config.json")
                && e.contains("hidden_size")
                && e.contains("num_attention_heads"),
            "{e}"
        );
        // An explicit head_dim may differ from hidden / heads.
        assert!(llama::LlamaConfig::from_config(&cfg(&format!(
            "{{{base},\"hidden_size\":10,\"num_attention_heads\":4,\"head_dim\":4}}"
        )))
        .is_ok());
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn config_names_unsupported_types_and_the_way_around() {
        let e = ArchConfig::parse(r#"{"model_type": "t5"}"#, "m/config.json").unwrap_err();
        assert_eq!(e.kind(), ArchErrorKind::Unsupported);
        let m = e.to_string();
        assert!(m.contains("'t5'") && m.contains(SUPPORTED) && m.contains("--activations"), "{m}");
        let e = ArchConfig::parse("{", "m/config.json").unwrap_err();
        assert_eq!(e.kind(), ArchErrorKind::Config);
        for (t, f) in [("bert", Family::Bert), ("qwen2", Family::Llama), ("gpt2", Family::Gpt2)] {
            let c = ArchConfig::parse(&format!(r#"{{"model_type": "{t}"}}"#), "c").unwrap();
            assert_eq!(c.family, f);
        }
    }

    #[test]
    fn softmax_and_norms_match_hand_formulas() {
        let x = Tensor::new(&[[1.0f32, 2.0, 3.0], [0.0, 0.0, 0.0]], &Device::Cpu).unwrap();
        let s: Vec<Vec<f32>> = softmax_last(&x).unwrap().to_vec2().unwrap();
        let z: f32 = [1.0f32, 2.0, 3.0].iter().map(|v| v.exp()).sum();
        assert!((s[0][2] - 3f32.exp() / z).abs() < 1e-6);
        assert!((s[1][0] - 1.0 / 3.0).abs() < 1e-6);
        let g = Tensor::new(&[1.0f32, 1.0, 1.0], &Device::Cpu).unwrap();
        let b = Tensor::new(&[0.0f32, 0.0, 0.0], &Device::Cpu).unwrap();
        let y: Vec<Vec<f32>> = layer_norm(&x, &g, &b, 0.0).unwrap().to_vec2().unwrap();
        // (x − 2)/√(2/3) for x = 1, 2, 3.
        assert!((y[0][0] + 1.224_744_9).abs() < 1e-5 && y[0][1].abs() < 1e-6);
        let r: Vec<Vec<f32>> = rms_norm(&x, &g, 0.0).unwrap().to_vec2().unwrap();
        // 3/√(14/3)
        assert!((r[0][2] - 3.0 / (14.0f32 / 3.0).sqrt()).abs() < 1e-5);
    }

    #[test]
    fn causal_attention_ignores_later_tokens() {
        let dev = Device::Cpu;
        let q = Tensor::randn(0f32, 1.0, (1, 1, 4, 3), &dev).unwrap();
        let k = Tensor::randn(0f32, 1.0, (1, 1, 4, 3), &dev).unwrap();
        let v = Tensor::randn(0f32, 1.0, (1, 1, 4, 3), &dev).unwrap();
        let full: Vec<f32> =
            attention(&q, &k, &v, true).unwrap().flatten_all().unwrap().to_vec1().unwrap();
        // Changing the last key/value must not move the first three outputs.
        let k2 = k.narrow(2, 0, 3).unwrap().contiguous().unwrap();
        let v2 = v.narrow(2, 0, 3).unwrap().contiguous().unwrap();
        let q2 = q.narrow(2, 0, 3).unwrap().contiguous().unwrap();
        let part: Vec<f32> =
            attention(&q2, &k2, &v2, true).unwrap().flatten_all().unwrap().to_vec1().unwrap();
        for (a, b) in full[..9].iter().zip(&part) {
            assert!((a - b).abs() < 1e-6);
        }
        // The first token attends only to itself: its output is v[0].
        let v0: Vec<f32> = v.narrow(2, 0, 1).unwrap().flatten_all().unwrap().to_vec1().unwrap();
        for (a, b) in full[..3].iter().zip(&v0) {
            assert!((a - b).abs() < 1e-6);
        }
    }
}
