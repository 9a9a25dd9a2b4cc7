//! Llama-style decoders (`llama`, `mistral`, `qwen2`): the Llama layout of
//! Touvron et al. (2023), "LLaMA: Open and Efficient Foundation Language
//! Models", which the other two share.
//!
//! This module owns reading the family's `config.json` fields
//! ([`LlamaConfig`]), loading its tensors, and the forward pass:
//! - token embeddings `model.embed_tokens.weight`, no learned positions;
//! - pre-norm blocks with RMSNorm (`input_layernorm`,
//!   `post_attention_layernorm`, ε = `rms_norm_eps`):
//!   `h = x + o(Attn(RMS(x)))`, `y = h + down(silu(gate(RMS(h))) ⊙ up(RMS(h)))`,
//!   the SwiGLU MLP of Shazeer (2020), "GLU Variants Improve Transformer";
//! - rotary position embeddings on queries and keys (Su et al., 2021,
//!   "RoFormer: Enhanced Transformer with Rotary Position Embedding"), in the
//!   half-split ("rotate_half") convention these checkpoints use: dimension
//!   `i` of a head pairs with dimension `i + head_dim/2`, at frequency
//!   `rope_theta^(−2i/head_dim)`; the `llama3` frequency scaling is
//!   implemented, any other `rope_scaling` is refused with an error;
//! - grouped-query attention (Ainslie et al., 2023, "GQA: Training
//!   Generalized Multi-Query Transformer Models from Multi-Head
//!   Checkpoints"): `num_key_value_heads` key/value heads, each shared by
//!   `num_attention_heads / num_key_value_heads` consecutive query heads;
//!   causal mask;
//! - final RMSNorm `model.norm`, then logits by `lm_head.weight`, or by the
//!   token embeddings when `tie_word_embeddings` is set or `lm_head.weight`
//!   is absent.
//!
//! Biases are read wherever the file has them (qwen2 has them on the query,
//! key and value projections): presence of `<layer>.bias` decides, not the
//! model type. Sliding-window attention (mistral, qwen2) is not
//! implemented: calibration sequences are far shorter than the windows these
//! models use (4096 and more), and a sequence longer than the configured
//! window is refused rather than computed with the wrong mask.

use super::decode::{attention_at, KvCache};
use super::units::{self, Slice, UnitKind, Units};
use super::{
    attention, merge_heads, rms_norm, rows, split_heads, ArchConfig, ArchError, ArchErrorKind,
    Batch, Family, Group, Kind, Linear, Linears, Network, Result, Tap, Weights,
};
use candle_core::{Device, Tensor, D};

/// Frequency scaling of the rotary embedding (`rope_scaling` in the config).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum RopeScaling {
    /// No scaling (absent, `null`, or type `"default"`).
    None,
    /// Llama 3.1's piecewise scaling: long wavelengths divided by `factor`,
    /// short ones kept, a smooth blend in between.
    Llama3 {
        /// Division of the low frequencies.
        factor: f64,
        /// Wavelengths above `original_max / low_freq_factor` are scaled.
        low_freq_factor: f64,
        /// Wavelengths below `original_max / high_freq_factor` are kept.
        high_freq_factor: f64,
        /// Context length of the unscaled model.
        original_max: f64,
    },
}

/// The Llama-family settings of `config.json`.
#[derive(Clone, Debug, PartialEq)]
pub struct LlamaConfig {
    /// Model width `hidden_size`.
    pub hidden: usize,
    /// Number of blocks `num_hidden_layers`.
    pub layers: usize,
    /// Query heads `num_attention_heads`.
    pub heads: usize,
    /// Key/value heads `num_key_value_heads` (default: `heads`).
    pub kv_heads: usize,
    /// Per-head width `head_dim` (default: `hidden / heads`).
    pub head_dim: usize,
    /// MLP width `intermediate_size`.
    pub intermediate: usize,
    /// `vocab_size`.
    pub vocab: usize,
    /// RMSNorm ε `rms_norm_eps` (default 1e-6, as in `transformers`).
    pub eps: f64,
    /// Rotary base `rope_theta` (default 10000).
    pub rope_theta: f64,
    /// Rotary frequency scaling.
    pub rope_scaling: RopeScaling,
    /// `tie_word_embeddings` (default false).
    pub tie_word_embeddings: bool,
    /// Sliding attention window, when the config turns one on.
    pub window: Option<usize>,
}

impl LlamaConfig {
    /// Read and check the family's fields.
    ///
    /// # Errors
    /// [`ArchErrorKind::Config`] for missing sizes, heads that do not divide,
    /// an odd head width, an activation other than SiLU, or a `rope_scaling`
    /// this module does not implement.
    pub fn from_config(cfg: &ArchConfig) -> Result<Self> {
        let bad = |m: String| ArchError::new(ArchErrorKind::Config, format!("{}: {m}", cfg.path));
        let hidden = cfg.usize("hidden_size")?;
        let heads = cfg.usize("num_attention_heads")?;
        if heads == 0 {
            return Err(bad("num_attention_heads is 0".into()));
        }
        let kv_heads = cfg.usize_or("num_key_value_heads", heads);
        if kv_heads == 0 || heads % kv_heads != 0 {
            return Err(bad(format!(
                "num_attention_heads = {heads} is not a multiple of num_key_value_heads = {kv_heads}"
            )));
        }
        if cfg.json.get("head_dim").and_then(|v| v.as_u64()).is_none() && hidden % heads != 0 {
            return Err(bad(format!(
                "\"hidden_size\" = {hidden} is not a multiple of \"num_attention_heads\" = \
                 {heads} (and there is no \"head_dim\")"
            )));
        }
        let head_dim = cfg.usize_or("head_dim", hidden / heads);
        if head_dim == 0 || head_dim % 2 != 0 {
            return Err(bad(format!("head width {head_dim} is not a positive even number")));
        }
        let act = cfg.json.get("hidden_act").and_then(|v| v.as_str()).unwrap_or("silu");
        if act != "silu" && act != "swish" {
            return Err(bad(format!(
                "hidden_act '{act}' is not supported for {} (the SwiGLU MLP uses silu)",
                cfg.model_type
            )));
        }
        let window = if cfg.bool_or("use_sliding_window", true) {
            cfg.json.get("sliding_window").and_then(|v| v.as_u64()).map(|v| v as usize)
        } else {
            None
        };
        Ok(LlamaConfig {
            hidden,
            layers: cfg.usize("num_hidden_layers")?,
            heads,
            kv_heads,
            head_dim,
            intermediate: cfg.usize("intermediate_size")?,
            vocab: cfg.usize("vocab_size")?,
            eps: cfg.eps_or("rms_norm_eps", 1e-6)?,
            rope_theta: cfg.f64_or("rope_theta", 10_000.0),
            rope_scaling: read_rope_scaling(cfg)?,
            tie_word_embeddings: cfg.bool_or("tie_word_embeddings", false),
            window,
        })
    }

    /// The rotary frequencies `θ_i`, `i < head_dim/2`, after scaling.
    pub fn inv_freq(&self) -> Vec<f64> {
        let hd = self.head_dim as f64;
        let base =
            (0..self.head_dim / 2).map(|i| self.rope_theta.powf(-2.0 * i as f64 / hd)).collect();
        scale_inv_freq(base, self.rope_scaling)
    }
}

fn read_rope_scaling(cfg: &ArchConfig) -> Result<RopeScaling> {
    let bad = |m: String| ArchError::new(ArchErrorKind::Config, format!("{}: {m}", cfg.path));
    let s = match cfg.json.get("rope_scaling") {
        None | Some(serde_json::Value::Null) => return Ok(RopeScaling::None),
        Some(s) => s,
    };
    let kind = s.get("rope_type").or_else(|| s.get("type")).and_then(|v| v.as_str());
    match kind {
        Some("default") => Ok(RopeScaling::None),
        Some("llama3") => {
            let f = |k: &str| {
                s.get(k).and_then(|v| v.as_f64()).ok_or_else(|| {
                    bad(format!("rope_scaling of type llama3 needs a number \"{k}\""))
                })
            };
            Ok(RopeScaling::Llama3 {
                factor: f("factor")?,
                low_freq_factor: f("low_freq_factor")?,
                high_freq_factor: f("high_freq_factor")?,
                original_max: f("original_max_position_embeddings")?,
            })
        }
        other => Err(bad(format!(
            "rope_scaling {} is not supported (supported: none, \"default\", \"llama3\")",
            other.map_or_else(|| s.to_string(), |t| format!("of type '{t}'"))
        ))),
    }
}

/// Apply [`RopeScaling`] to unscaled frequencies (`transformers`'
/// `_compute_llama3_parameters`).
fn scale_inv_freq(freqs: Vec<f64>, scaling: RopeScaling) -> Vec<f64> {
    let RopeScaling::Llama3 { factor, low_freq_factor, high_freq_factor, original_max } = scaling
    else {
        return freqs;
    };
    let low_wavelen = original_max / low_freq_factor;
    let high_wavelen = original_max / high_freq_factor;
    freqs
        .into_iter()
        .map(|f| {
            let wavelen = 2.0 * std::f64::consts::PI / f;
            if wavelen < high_wavelen {
                f
            } else if wavelen > low_wavelen {
                f / factor
            } else {
                let smooth = (original_max / wavelen - low_freq_factor)
                    / (high_freq_factor - low_freq_factor);
                (1.0 - smooth) * f / factor + smooth * f
            }
        })
        .collect()
}

/// Rotary tables for positions `0..len`: `(cos, sin)`, each
/// `[len, inv_freq.len()]`, angles computed in f64.
pub fn rope_tables(inv_freq: &[f64], len: usize) -> Result<(Tensor, Tensor)> {
    let half = inv_freq.len();
    let mut cos = Vec::with_capacity(len * half);
    let mut sin = Vec::with_capacity(len * half);
    for p in 0..len {
        for &f in inv_freq {
            let a = p as f64 * f;
            cos.push(a.cos() as f32);
            sin.push(a.sin() as f32);
        }
    }
    Ok((
        Tensor::from_vec(cos, (len, half), &Device::Cpu)?,
        Tensor::from_vec(sin, (len, half), &Device::Cpu)?,
    ))
}

/// Rotate heads `x [n, h, L, hd]` by position in the half-split convention:
/// `(x₁, x₂) ↦ (x₁ cos − x₂ sin, x₂ cos + x₁ sin)` where `x₁`, `x₂` are the
/// first and second halves of each head and `cos`, `sin` come from
/// [`rope_tables`] for `L` positions.
pub fn apply_rope(x: &Tensor, cos: &Tensor, sin: &Tensor) -> Result<Tensor> {
    let half = x.dim(D::Minus1)? / 2;
    let x1 = x.narrow(D::Minus1, 0, half)?;
    let x2 = x.narrow(D::Minus1, half, half)?;
    let a = (x1.broadcast_mul(cos)? - x2.broadcast_mul(sin)?)?;
    let b = (x2.broadcast_mul(cos)? + x1.broadcast_mul(sin)?)?;
    Ok(Tensor::cat(&[a, b], D::Minus1)?)
}

/// Grouped-query attention's sharing: `[n, kv, L, hd] → [n, kv·rep, L, hd]`,
/// head `j` of the result being head `j / rep` of the input.
pub fn repeat_kv(x: &Tensor, rep: usize) -> Result<Tensor> {
    if rep == 1 {
        return Ok(x.clone());
    }
    let (n, kv, l, hd) = x.dims4()?;
    Ok(x.unsqueeze(2)?.broadcast_as((n, kv, rep, l, hd))?.reshape((n, kv * rep, l, hd))?)
}

struct Block {
    qkv: [String; 3],
    o: String,
    gate: String,
    up: String,
    down: String,
    ln1: Tensor,
    ln2: Tensor,
}

/// A loaded Llama-style decoder.
pub struct Llama {
    cfg: LlamaConfig,
    inv_freq: Vec<f64>,
    embed: Tensor,
    blocks: Vec<Block>,
    norm: Tensor,
    /// `[vocab, d]`; the embedding matrix itself when tied; `None` when
    /// built by block (calibration needs no logits).
    lm_head: Option<Tensor>,
    linears: Linears,
}

impl Llama {
    /// Build from the config and the model's tensors.
    ///
    /// # Errors
    /// Config errors ([`LlamaConfig::from_config`]) and missing or misshapen
    /// tensors, named.
    pub fn new(cfg: &ArchConfig, w: &Weights<'_>) -> Result<Self> {
        let c = LlamaConfig::from_config(cfg)?;
        let (d, hd) = (c.hidden, c.head_dim);
        let p = w.prefix(&["model.", ""], "embed_tokens.weight").unwrap_or("model.");
        let embed = w.tensor(&format!("{p}embed_tokens.weight"), &[c.vocab, d])?;
        let mut linears = Linears::default();
        let mut blocks = Vec::with_capacity(c.layers);
        for i in 0..c.layers {
            let s = format!("{p}layers.{i}");
            let mut lin = |stem: String, di: usize, dout: usize| -> Result<String> {
                let bias = w.has(&format!("{stem}.bias"));
                linears.add_from(w, &stem, di, dout, bias, false)
            };
            let qkv = [
                lin(format!("{s}.self_attn.q_proj"), d, c.heads * hd)?,
                lin(format!("{s}.self_attn.k_proj"), d, c.kv_heads * hd)?,
                lin(format!("{s}.self_attn.v_proj"), d, c.kv_heads * hd)?,
            ];
            let o = lin(format!("{s}.self_attn.o_proj"), c.heads * hd, d)?;
            let gate = lin(format!("{s}.mlp.gate_proj"), d, c.intermediate)?;
            let up = lin(format!("{s}.mlp.up_proj"), d, c.intermediate)?;
            let down = lin(format!("{s}.mlp.down_proj"), c.intermediate, d)?;
            blocks.push(Block {
                qkv,
                o,
                gate,
                up,
                down,
                ln1: w.tensor(&format!("{s}.input_layernorm.weight"), &[d])?,
                ln2: w.tensor(&format!("{s}.post_attention_layernorm.weight"), &[d])?,
            });
        }
        let norm = w.tensor(&format!("{p}norm.weight"), &[d])?;
        let lm_head = if c.tie_word_embeddings || !w.has("lm_head.weight") {
            Some(embed.clone())
        } else if w.lazy() {
            w.check("lm_head.weight", &[c.vocab, d])?;
            None
        } else {
            Some(w.tensor("lm_head.weight", &[c.vocab, d])?)
        };
        let inv_freq = c.inv_freq();
        Ok(Llama { cfg: c, inv_freq, embed, blocks, norm, lm_head, linears })
    }

    /// The settings in use.
    pub fn config(&self) -> &LlamaConfig {
        &self.cfg
    }

    fn lin(&self, name: &str) -> &Linear {
        self.linears.at(name)
    }

    /// Block `b`; with a cache, `x` holds the positions after the cached
    /// ones, whose keys and values are read from and appended to it.
    fn run_block(
        &self,
        b: usize,
        x: &Tensor,
        tap: &mut Tap<'_>,
        cache: Option<&mut KvCache>,
    ) -> Result<Tensor> {
        let k = &self.blocks[b];
        let c = &self.cfg;
        let l = x.dim(1)?;
        let h = rms_norm(x, &k.ln1, c.eps)?;
        tap(0, &rows(&h)?)?;
        let q = split_heads(&self.lin(&k.qkv[0]).forward(&h)?, c.heads)?;
        let kk = split_heads(&self.lin(&k.qkv[1]).forward(&h)?, c.kv_heads)?;
        let v = split_heads(&self.lin(&k.qkv[2]).forward(&h)?, c.kv_heads)?;
        let start = cache.as_ref().map_or(0, |c| c.len());
        let (cos, sin) = rope_tables(&self.inv_freq, start + l)?;
        let (cos, sin) = (cos.narrow(0, start, l)?, sin.narrow(0, start, l)?);
        let q = apply_rope(&q, &cos, &sin)?;
        let kk = apply_rope(&kk, &cos, &sin)?;
        let rep = c.heads / c.kv_heads;
        let ctx = match cache {
            None => attention(&q, &repeat_kv(&kk, rep)?, &repeat_kv(&v, rep)?, true)?,
            Some(cache) => {
                let (kk, v) = cache.append(b, kk, v)?;
                attention_at(&q, &repeat_kv(&kk, rep)?, &repeat_kv(&v, rep)?, start)?
            }
        };
        let ctx = merge_heads(&ctx)?;
        tap(1, &rows(&ctx)?)?;
        let x = (x + self.lin(&k.o).forward(&ctx)?)?;
        let h = rms_norm(&x, &k.ln2, c.eps)?;
        tap(2, &rows(&h)?)?;
        let a = (self.lin(&k.gate).forward(&h)?.silu()? * self.lin(&k.up).forward(&h)?)?;
        tap(3, &rows(&a)?)?;
        Ok((x + self.lin(&k.down).forward(&a)?)?)
    }
}

impl Network for Llama {
    fn family(&self) -> Family {
        Family::Llama
    }

    fn kind(&self) -> Kind {
        Kind::Decoder
    }

    fn num_blocks(&self) -> usize {
        self.blocks.len()
    }

    fn groups(&self, b: usize) -> Vec<Group> {
        let k = &self.blocks[b];
        let g = |label: &str, layers: &[&String]| Group {
            label: label.to_string(),
            layers: layers.iter().map(|s| s.to_string()).collect(),
        };
        vec![
            g("attention input", &[&k.qkv[0], &k.qkv[1], &k.qkv[2]]),
            g("attention output", &[&k.o]),
            g("mlp input", &[&k.gate, &k.up]),
            g("mlp output", &[&k.down]),
        ]
    }

    fn units(&self, b: usize) -> Vec<Units> {
        let k = &self.blocks[b];
        let c = &self.cfg;
        let mut neurons: Vec<Slice> = [&k.gate, &k.up]
            .iter()
            .flat_map(|n| units::producer(self.linears.spec_at(n), 1))
            .collect();
        neurons.push(units::consumer(self.linears.spec_at(&k.down), 1));
        // A head unit: one key/value head and the `rep` consecutive query
        // heads that share it.
        let rep = c.heads / c.kv_heads;
        let mut heads = units::producer(self.linears.spec_at(&k.qkv[0]), rep * c.head_dim);
        for n in &k.qkv[1..] {
            heads.extend(units::producer(self.linears.spec_at(n), c.head_dim));
        }
        heads.push(units::consumer(self.linears.spec_at(&k.o), rep * c.head_dim));
        vec![
            Units {
                kind: UnitKind::Head,
                count: c.kv_heads,
                consumer: k.o.clone(),
                width: rep * c.head_dim,
                group: 1,
                slices: heads,
            },
            Units {
                kind: UnitKind::Neuron,
                count: c.intermediate,
                consumer: k.down.clone(),
                width: 1,
                group: 3,
                slices: neurons,
            },
        ]
    }

    fn embed(&self, batch: &Batch) -> Result<Tensor> {
        let (n, l) = batch.dims();
        if let Some(win) = self.cfg.window.filter(|&win| l > win) {
            return Err(ArchError::new(
                ArchErrorKind::Compute,
                format!(
                    "sequence of {l} tokens exceeds the sliding attention window of {win}, \
                     which is not implemented; use shorter sequences"
                ),
            ));
        }
        let ids = batch.ids.flatten_all()?;
        Ok(self.embed.embedding(&ids)?.reshape((n, l, ()))?)
    }

    fn block(&self, b: usize, x: &Tensor, tap: &mut Tap<'_>) -> Result<Tensor> {
        self.run_block(b, x, tap, None)
    }

    fn forward_cached(&self, batch: &Batch, cache: &mut KvCache) -> Result<Tensor> {
        let (_, l) = batch.dims();
        let start = cache.len();
        if let Some(win) = self.cfg.window.filter(|&win| start + l > win) {
            return Err(ArchError::new(
                ArchErrorKind::Compute,
                format!("{} positions exceed the sliding attention window of {win}", start + l),
            ));
        }
        let mut x = self.embed(batch)?;
        for b in 0..self.blocks.len() {
            x = self.run_block(b, &x, &mut |_, _| Ok(()), Some(&mut *cache))?;
        }
        cache.advance(l);
        self.output(&x)
    }

    fn output(&self, x: &Tensor) -> Result<Tensor> {
        let h = rms_norm(x, &self.norm, self.cfg.eps)?;
        let head = self.lm_head.as_ref().ok_or_else(|| {
            ArchError::new(
                ArchErrorKind::Weights,
                "the output head was not read (network built by block)",
            )
        })?;
        Ok(h.broadcast_matmul(&head.t()?)?)
    }

    fn max_positions(&self) -> Option<usize> {
        // Positions are rotary (no table), but a sliding window limits the
        // sequences this forward pass can run exactly.
        self.cfg.window
    }

    fn linears(&self) -> &Linears {
        &self.linears
    }

    fn linears_mut(&mut self) -> &mut Linears {
        &mut self.linears
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dev() -> Device {
        Device::Cpu
    }

    fn vec4(x: &Tensor) -> Vec<f32> {
        x.flatten_all().unwrap().to_vec1().unwrap()
    }

    fn config(extra: &str) -> Result<LlamaConfig> {
        let text = format!(
            r#"{{"model_type": "llama", "hidden_size": 64, "num_hidden_layers": 2,
                "num_attention_heads": 4, "intermediate_size": 96, "vocab_size": 101{extra}}}"#
        );
        LlamaConfig::from_config(&ArchConfig::parse(&text, "m/config.json").unwrap())
    }

    #[test]
    fn rope_is_the_identity_at_position_zero() {
        let x = Tensor::randn(0f32, 1.0, (2, 3, 1, 8), &dev()).unwrap();
        let (cos, sin) = rope_tables(&[1.0, 0.1, 0.01, 0.001], 1).unwrap();
        assert_eq!(vec4(&apply_rope(&x, &cos, &sin).unwrap()), vec4(&x));
    }

    #[test]
    fn rope_rotates_dimension_i_with_i_plus_half() {
        // head_dim 2, frequency 1, position 1: (1, 0) ↦ (cos 1, sin 1) and
        // (0, 1) ↦ (−sin 1, cos 1).
        let x =
            Tensor::new(&[[[[0f32, 0.0], [1.0, 0.0]], [[0.0, 0.0], [0.0, 1.0]]]], &dev()).unwrap(); // [1, 2, 2, 2]: two heads, positions 0 and 1
        let (cos, sin) = rope_tables(&[1.0], 2).unwrap();
        let y = vec4(&apply_rope(&x, &cos, &sin).unwrap());
        let (c, s) = (1f32.cos(), 1f32.sin());
        let want = [0.0, 0.0, c, s, 0.0, 0.0, -s, c];
        for (a, b) in y.iter().zip(want) {
            assert!((a - b).abs() < 1e-6, "{y:?}");
        }
    }

    #[test]
    fn rope_preserves_norms_and_scores_depend_on_distance_only() {
        let c = config("").unwrap();
        let freqs = c.inv_freq();
        assert_eq!(freqs.len(), 8);
        assert!((freqs[1] - 10_000f64.powf(-2.0 / 16.0)).abs() < 1e-15);
        let (cos, sin) = rope_tables(&freqs, 40).unwrap();
        let q = Tensor::randn(0f32, 1.0, (1, 1, 1, 16), &dev()).unwrap();
        let k = Tensor::randn(0f32, 1.0, (1, 1, 1, 16), &dev()).unwrap();
        // The same vector at every position, rotated.
        let rot = |x: &Tensor| apply_rope(&x.repeat((1, 1, 40, 1)).unwrap(), &cos, &sin).unwrap();
        let (rq, rk) = (rot(&q), rot(&k));
        let norms: Vec<f32> =
            rq.sqr().unwrap().sum(3).unwrap().flatten_all().unwrap().to_vec1().unwrap();
        for n in &norms {
            assert!((n - norms[0]).abs() < 1e-4 * norms[0], "{norms:?}");
        }
        // ⟨R_m q, R_n k⟩ depends on m − n: compare (m, n) = (5, 2) and (35, 32).
        let dot = |m: usize, n: usize| -> f32 {
            let a = rq.narrow(2, m, 1).unwrap();
            let b = rk.narrow(2, n, 1).unwrap();
            (a * b).unwrap().sum_all().unwrap().to_scalar().unwrap()
        };
        assert!((dot(5, 2) - dot(35, 32)).abs() < 1e-4, "{} {}", dot(5, 2), dot(35, 32));
        assert!((dot(5, 2) - dot(2, 5)).abs() > 1e-3, "rotation should not be symmetric");
    }

    #[test]
    fn grouped_query_attention_shares_each_kv_head_across_consecutive_query_heads() {
        let q = Tensor::randn(0f32, 1.0, (2, 4, 5, 8), &dev()).unwrap();
        let k = Tensor::randn(0f32, 1.0, (2, 2, 5, 8), &dev()).unwrap();
        let v = Tensor::randn(0f32, 1.0, (2, 2, 5, 8), &dev()).unwrap();
        // kv_heads == heads: repeat is the identity, GQA is plain attention.
        assert_eq!(vec4(&repeat_kv(&k, 1).unwrap()), vec4(&k));
        // 4 query heads on 2 kv heads: heads 0, 1 use kv head 0; 2, 3 use 1.
        let out =
            attention(&q, &repeat_kv(&k, 2).unwrap(), &repeat_kv(&v, 2).unwrap(), true).unwrap();
        for j in 0..4 {
            let one = |t: &Tensor, h: usize| t.narrow(1, h, 1).unwrap().contiguous().unwrap();
            let plain = attention(&one(&q, j), &one(&k, j / 2), &one(&v, j / 2), true).unwrap();
            let got = vec4(&one(&out, j));
            for (a, b) in got.iter().zip(vec4(&plain)) {
                assert!((a - b).abs() < 1e-6);
            }
        }
    }

    #[test]
    fn llama3_scaling_keeps_short_waves_scales_long_ones_and_blends_between() {
        let s = RopeScaling::Llama3 {
            factor: 8.0,
            low_freq_factor: 1.0,
            high_freq_factor: 4.0,
            original_max: 64.0,
        };
        // Wavelengths 2π/f: 6.3 (< 16, kept), 628 (> 64, scaled by 1/8), and
        // 2π/0.2 = 31.4 between: smooth = (64/31.4 − 1)/3.
        let out = scale_inv_freq(vec![1.0, 0.01, 0.2], s);
        assert_eq!(out[0], 1.0);
        assert!((out[1] - 0.01 / 8.0).abs() < 1e-15);
        let smooth = (64.0 / (2.0 * std::f64::consts::PI / 0.2) - 1.0) / 3.0;
        assert!((out[2] - ((1.0 - smooth) * 0.2 / 8.0 + smooth * 0.2)).abs() < 1e-15);
    }

    #[test]
    fn config_defaults_and_refusals() {
        let c = config("").unwrap();
        assert_eq!((c.kv_heads, c.head_dim, c.eps, c.rope_theta), (4, 16, 1e-6, 10_000.0));
        assert_eq!(
            (c.rope_scaling, c.window, c.tie_word_embeddings),
            (RopeScaling::None, None, false)
        );
        let c = config(
            r#", "num_key_value_heads": 2, "head_dim": 32, "rope_scaling": null,
                          "sliding_window": 4096"#,
        )
        .unwrap();
        assert_eq!((c.kv_heads, c.head_dim, c.window), (2, 32, Some(4096)));
        let c = config(r#", "sliding_window": 4096, "use_sliding_window": false"#).unwrap();
        assert_eq!(c.window, None);
        let c = config(r#", "rope_scaling": {"rope_type": "default"}"#).unwrap();
        assert_eq!(c.rope_scaling, RopeScaling::None);
        let e = config(r#", "rope_scaling": {"type": "yarn", "factor": 4.0}"#).unwrap_err();
        assert_eq!(e.kind(), ArchErrorKind::Config);
        assert!(e.to_string().contains("'yarn'") && e.to_string().contains("llama3"), "{e}");
        let e = config(r#", "rope_scaling": {"rope_type": "llama3", "factor": 8.0}"#).unwrap_err();
        assert!(e.to_string().contains("low_freq_factor"), "{e}");
        let e = config(r#", "num_key_value_heads": 3"#).unwrap_err();
        assert!(e.to_string().contains("num_key_value_heads = 3"), "{e}");
        let e = config(r#", "hidden_act": "gelu""#).unwrap_err();
        assert!(e.to_string().contains("'gelu'"), "{e}");
    }
}
