//! GPT-2-style decoders (`gpt2`): Radford et al. (2019), "Language Models
//! are Unsupervised Multitask Learners".
//!
//! This module owns reading the GPT-2 fields of `config.json`
//! ([`Gpt2Config`]), loading the tensors, and the forward pass:
//! - token embeddings `wte` plus learned positions `wpe` (names with or
//!   without the `transformer.` prefix);
//! - pre-norm blocks with LayerNorm `ln_1`, `ln_2` (ε = `layer_norm_epsilon`,
//!   default 1e-5): `h = x + c_proj(Attn(LN₁(x)))`,
//!   `y = h + mlp.c_proj(gelu(c_fc(LN₂(h))))`;
//! - one fused projection `attn.c_attn` to `[q | k | v]` (each `d` wide, in
//!   that order), multi-head causal attention scaled by `1/√head_dim`;
//! - GELU in the tanh form (`activation_function` `gelu_new`, the GPT-2
//!   default, or its aliases `gelu_pytorch_tanh`, `gelu_fast`); `gelu` means
//!   the erf form, as in `transformers`;
//! - MLP width `n_inner`, default `4·d`;
//! - final LayerNorm `ln_f`, logits tied to `wte`.
//!
//! Every linear layer (`c_attn`, `attn.c_proj`, `mlp.c_fc`, `mlp.c_proj`) is
//! a "Conv1D" stored `[d_in, d_out]`; it is held as `[d_out, d_in]` with
//! `transposed = true` and its file name, so a writer can store it back in
//! the file's layout. Non-default attention scalings
//! (`scale_attn_weights = false`, `scale_attn_by_inverse_layer_idx = true`)
//! are refused with an error rather than computed wrongly.

use super::decode::{attention_at, KvCache};
use super::units::{self, UnitKind, Units};
use super::{
    attention, layer_norm, merge_heads, rows, split_heads, ArchConfig, ArchError, ArchErrorKind,
    Batch, Family, Group, Kind, Linear, Linears, Network, Result, Tap, Weights,
};
use candle_core::{Tensor, D};

/// The GELU variant of `activation_function`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Gelu {
    /// `0.5x(1 + tanh(√(2/π)(x + 0.044715x³)))` (`gelu_new` and aliases).
    Tanh,
    /// `0.5x(1 + erf(x/√2))` (`gelu`).
    Erf,
}

impl Gelu {
    /// Apply elementwise.
    pub fn apply(self, x: &Tensor) -> Result<Tensor> {
        Ok(match self {
            Gelu::Tanh => x.gelu()?,
            Gelu::Erf => x.gelu_erf()?,
        })
    }
}

/// The GPT-2 settings of `config.json`.
#[derive(Clone, Debug, PartialEq)]
pub struct Gpt2Config {
    /// Width `n_embd`.
    pub hidden: usize,
    /// Blocks `n_layer`.
    pub layers: usize,
    /// Heads `n_head`.
    pub heads: usize,
    /// MLP width `n_inner` (default `4·hidden`).
    pub inner: usize,
    /// `vocab_size`.
    pub vocab: usize,
    /// Learned positions `n_positions`.
    pub positions: usize,
    /// LayerNorm ε `layer_norm_epsilon` (default 1e-5).
    pub eps: f64,
    /// MLP activation.
    pub gelu: Gelu,
}

impl Gpt2Config {
    /// Read and check the fields.
    ///
    /// # Errors
    /// [`ArchErrorKind::Config`] for missing sizes, heads that do not divide
    /// the width, other activations, or non-default attention scaling.
    pub fn from_config(cfg: &ArchConfig) -> Result<Self> {
        let bad = |m: String| ArchError::new(ArchErrorKind::Config, format!("{}: {m}", cfg.path));
        let hidden = cfg.usize("n_embd")?;
        let heads = cfg.usize("n_head")?;
        if heads == 0 || hidden % heads != 0 {
            return Err(bad(format!("n_embd = {hidden} is not a multiple of n_head = {heads}")));
        }
        let act =
            cfg.json.get("activation_function").and_then(|v| v.as_str()).unwrap_or("gelu_new");
        let gelu = match act {
            "gelu_new" | "gelu_pytorch_tanh" | "gelu_fast" => Gelu::Tanh,
            "gelu" => Gelu::Erf,
            other => {
                return Err(bad(format!(
                    "activation_function '{other}' is not supported (supported: gelu_new, \
                     gelu_pytorch_tanh, gelu_fast, gelu)"
                )))
            }
        };
        if !cfg.bool_or("scale_attn_weights", true) {
            return Err(bad("scale_attn_weights = false is not supported".into()));
        }
        if cfg.bool_or("scale_attn_by_inverse_layer_idx", false) {
            return Err(bad("scale_attn_by_inverse_layer_idx = true is not supported".into()));
        }
        Ok(Gpt2Config {
            hidden,
            layers: cfg.usize("n_layer")?,
            heads,
            inner: cfg.usize_or("n_inner", 4 * hidden),
            vocab: cfg.usize("vocab_size")?,
            positions: cfg.usize_or("n_positions", 1024),
            eps: cfg.eps_or("layer_norm_epsilon", 1e-5)?,
            gelu,
        })
    }
}

struct Block {
    ln1: (Tensor, Tensor),
    c_attn: String,
    attn_proj: String,
    ln2: (Tensor, Tensor),
    c_fc: String,
    mlp_proj: String,
}

/// A loaded GPT-2-style decoder.
pub struct Gpt2 {
    cfg: Gpt2Config,
    wte: Tensor,
    wpe: Tensor,
    blocks: Vec<Block>,
    ln_f: (Tensor, Tensor),
    linears: Linears,
}

impl Gpt2 {
    /// Build from the config and the model's tensors.
    ///
    /// # Errors
    /// Config errors ([`Gpt2Config::from_config`]) and missing or misshapen
    /// tensors, named.
    pub fn new(cfg: &ArchConfig, w: &Weights<'_>) -> Result<Self> {
        let c = Gpt2Config::from_config(cfg)?;
        let d = c.hidden;
        let p = w.prefix(&["transformer.", ""], "wte.weight").unwrap_or("");
        let ln = |stem: &str| -> Result<(Tensor, Tensor)> {
            Ok((
                w.tensor(&format!("{stem}.weight"), &[d])?,
                w.tensor(&format!("{stem}.bias"), &[d])?,
            ))
        };
        let wte = w.tensor(&format!("{p}wte.weight"), &[c.vocab, d])?;
        let wpe = w.tensor(&format!("{p}wpe.weight"), &[c.positions, d])?;
        let mut linears = Linears::default();
        let mut blocks = Vec::with_capacity(c.layers);
        for i in 0..c.layers {
            let s = format!("{p}h.{i}");
            let mut lin = |stem: String, di: usize, dout: usize| -> Result<String> {
                linears.add_from(w, &stem, di, dout, true, true)
            };
            blocks.push(Block {
                ln1: ln(&format!("{s}.ln_1"))?,
                c_attn: lin(format!("{s}.attn.c_attn"), d, 3 * d)?,
                attn_proj: lin(format!("{s}.attn.c_proj"), d, d)?,
                ln2: ln(&format!("{s}.ln_2"))?,
                c_fc: lin(format!("{s}.mlp.c_fc"), d, c.inner)?,
                mlp_proj: lin(format!("{s}.mlp.c_proj"), c.inner, d)?,
            });
        }
        let ln_f = ln(&format!("{p}ln_f"))?;
        Ok(Gpt2 { cfg: c, wte, wpe, blocks, ln_f, linears })
    }

    /// The settings in use.
    pub fn config(&self) -> &Gpt2Config {
        &self.cfg
    }

    fn lin(&self, name: &str) -> &Linear {
        self.linears.at(name)
    }

    /// Token plus learned position embeddings for positions `start..start+l`.
    fn embed_at(&self, batch: &Batch, start: usize) -> Result<Tensor> {
        let (n, l) = batch.dims();
        if start + l > self.cfg.positions {
            return Err(ArchError::new(
                ArchErrorKind::Compute,
                format!(
                    "sequence of {} tokens exceeds n_positions = {}",
                    start + l,
                    self.cfg.positions
                ),
            ));
        }
        let ids = batch.ids.flatten_all()?;
        let tok = self.wte.embedding(&ids)?.reshape((n, l, ()))?;
        Ok(tok.broadcast_add(&self.wpe.narrow(0, start, l)?.unsqueeze(0)?)?)
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
        let (d, eps) = (self.cfg.hidden, self.cfg.eps);
        let h = layer_norm(x, &k.ln1.0, &k.ln1.1, eps)?;
        tap(0, &rows(&h)?)?;
        let qkv = self.lin(&k.c_attn).forward(&h)?;
        let part = |i: usize| split_heads(&qkv.narrow(D::Minus1, i * d, d)?, self.cfg.heads);
        let ctx = match cache {
            None => attention(&part(0)?, &part(1)?, &part(2)?, true)?,
            Some(cache) => {
                let start = cache.len();
                let (k, v) = cache.append(b, part(1)?, part(2)?)?;
                attention_at(&part(0)?, &k, &v, start)?
            }
        };
        let ctx = merge_heads(&ctx)?;
        tap(1, &rows(&ctx)?)?;
        let x = (x + self.lin(&k.attn_proj).forward(&ctx)?)?;
        let h = layer_norm(&x, &k.ln2.0, &k.ln2.1, eps)?;
        tap(2, &rows(&h)?)?;
        let a = self.cfg.gelu.apply(&self.lin(&k.c_fc).forward(&h)?)?;
        tap(3, &rows(&a)?)?;
        Ok((x + self.lin(&k.mlp_proj).forward(&a)?)?)
    }
}

impl Network for Gpt2 {
    fn family(&self) -> Family {
        Family::Gpt2
    }

    fn kind(&self) -> Kind {
        Kind::Decoder
    }

    fn num_blocks(&self) -> usize {
        self.blocks.len()
    }

    fn groups(&self, b: usize) -> Vec<Group> {
        let k = &self.blocks[b];
        let g = |label: &str, layer: &String| Group {
            label: label.to_string(),
            layers: vec![layer.clone()],
        };
        vec![
            g("attention input", &k.c_attn),
            g("attention output", &k.attn_proj),
            g("mlp input", &k.c_fc),
            g("mlp output", &k.mlp_proj),
        ]
    }

    fn units(&self, b: usize) -> Vec<Units> {
        let k = &self.blocks[b];
        let (fc, proj) = (self.linears.spec_at(&k.c_fc), self.linears.spec_at(&k.mlp_proj));
        let mut slices = units::producer(fc, 1);
        slices.push(units::consumer(proj, 1));
        let count = fc.shape[0];
        vec![Units {
            kind: UnitKind::Neuron,
            count,
            consumer: k.mlp_proj.clone(),
            width: 1,
            group: 3,
            slices,
        }]
    }

    fn embed(&self, batch: &Batch) -> Result<Tensor> {
        self.embed_at(batch, 0)
    }

    fn block(&self, b: usize, x: &Tensor, tap: &mut Tap<'_>) -> Result<Tensor> {
        self.run_block(b, x, tap, None)
    }

    fn forward_cached(&self, batch: &Batch, cache: &mut KvCache) -> Result<Tensor> {
        let (_, l) = batch.dims();
        let mut x = self.embed_at(batch, cache.len())?;
        for b in 0..self.blocks.len() {
            x = self.run_block(b, &x, &mut |_, _| Ok(()), Some(&mut *cache))?;
        }
        cache.advance(l);
        self.output(&x)
    }

    fn output(&self, x: &Tensor) -> Result<Tensor> {
        let h = layer_norm(x, &self.ln_f.0, &self.ln_f.1, self.cfg.eps)?;
        Ok(h.broadcast_matmul(&self.wte.t()?)?)
    }

    fn max_positions(&self) -> Option<usize> {
        Some(self.cfg.positions)
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
    use candle_core::Device;

    fn config(extra: &str) -> Result<Gpt2Config> {
        let text = format!(
            r#"{{"model_type": "gpt2", "n_embd": 32, "n_layer": 2, "n_head": 4,
                "vocab_size": 50{extra}}}"#
        );
        Gpt2Config::from_config(&ArchConfig::parse(&text, "m/config.json").unwrap())
    }

    #[test]
    fn config_defaults_follow_gpt2() {
        let c = config("").unwrap();
        assert_eq!((c.inner, c.positions, c.eps, c.gelu), (128, 1024, 1e-5, Gelu::Tanh));
        let c = config(r#", "n_inner": null, "activation_function": "gelu""#).unwrap();
        assert_eq!((c.inner, c.gelu), (128, Gelu::Erf));
        let c = config(r#", "n_inner": 40, "activation_function": "gelu_pytorch_tanh""#).unwrap();
        assert_eq!((c.inner, c.gelu), (40, Gelu::Tanh));
    }

    #[test]
    fn config_refuses_what_is_not_implemented() {
        let e = config(r#", "activation_function": "relu""#).unwrap_err();
        assert!(e.to_string().contains("'relu'") && e.to_string().contains("gelu_new"), "{e}");
        let e = config(r#", "scale_attn_by_inverse_layer_idx": true"#).unwrap_err();
        assert!(e.to_string().contains("scale_attn_by_inverse_layer_idx"), "{e}");
        let e = config(r#", "n_head": 5"#).unwrap_err();
        assert_eq!(e.kind(), ArchErrorKind::Config);
    }

    #[test]
    fn gelu_forms_match_their_formulas_at_one() {
        let x = Tensor::new(&[1.0f32, -2.0], &Device::Cpu).unwrap();
        let t: Vec<f32> = Gelu::Tanh.apply(&x).unwrap().to_vec1().unwrap();
        let e: Vec<f32> = Gelu::Erf.apply(&x).unwrap().to_vec1().unwrap();
        let tanh_form = |x: f64| {
            0.5 * x
                * (1.0 + ((2.0 / std::f64::consts::PI).sqrt() * (x + 0.044715 * x * x * x)).tanh())
        };
        // Φ(1) = 0.841344746…, Φ(−2) = 0.022750131…
        assert!((t[0] as f64 - tanh_form(1.0)).abs() < 1e-6);
        assert!((t[1] as f64 - tanh_form(-2.0)).abs() < 1e-6);
        assert!((e[0] as f64 - 0.841_344_746).abs() < 1e-6);
        assert!((e[1] as f64 + 2.0 * 0.022_750_131).abs() < 1e-6);
        // The two forms differ visibly at x = 1 (0.841192 vs 0.841345).
        assert!((t[0] - e[0]).abs() > 1e-4);
    }
}
