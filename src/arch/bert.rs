//! BERT-style encoder (Devlin et al., 2019): token + position + type
//! embeddings with LayerNorm, then post-norm blocks
//! `h = LN(x + Attn(x))`, `y = LN(h + W₂·gelu(W₁ h))`, GELU in its erf form.
//!
//! Weight names follow the common layout `embeddings.*`, `encoder.layer.{i}.*`,
//! with or without a `bert.` prefix. The output is the sentence embedding:
//! mean pooling over tokens (or the first token when the model's
//! `1_Pooling/config.json` asks for it).

use super::units::{self, UnitKind, Units};
use super::{
    attention, layer_norm, merge_heads, rows, split_heads, ArchConfig, ArchError, ArchErrorKind,
    Batch, Family, Group, Kind, Linear, Linears, Network, Result, Tap, Weights,
};
use candle_core::Tensor;

/// How token states become one sentence embedding.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Pooling {
    /// Mean over tokens.
    Mean,
    /// The first (`[CLS]`) token.
    First,
}

struct Block {
    qkv: [String; 3],
    attn_out: String,
    ln1: (Tensor, Tensor),
    up: String,
    down: String,
    ln2: (Tensor, Tensor),
}

/// A loaded BERT-style encoder.
pub struct Bert {
    heads: usize,
    eps: f64,
    word: Tensor,
    position: Tensor,
    token_type: Tensor,
    ln_embed: (Tensor, Tensor),
    blocks: Vec<Block>,
    linears: Linears,
    pooling: Pooling,
}

impl Bert {
    /// Build from the config and the model's tensors.
    pub fn new(cfg: &ArchConfig, w: &Weights<'_>) -> Result<Self> {
        let bad = |m: String| ArchError::new(ArchErrorKind::Config, format!("{}: {m}", cfg.path));
        let d = cfg.positive("hidden_size")?;
        let layers = cfg.usize("num_hidden_layers")?;
        let heads = cfg.positive("num_attention_heads")?;
        if d % heads != 0 {
            return Err(bad(format!(
                "\"hidden_size\" = {d} is not a multiple of \"num_attention_heads\" = {heads}"
            )));
        }
        let inter = cfg.positive("intermediate_size")?;
        let vocab = cfg.usize("vocab_size")?;
        let max_pos = cfg.usize_or("max_position_embeddings", 512);
        let types = cfg.usize_or("type_vocab_size", 2);
        let eps = cfg.eps_or("layer_norm_eps", 1e-12)?;
        // The MLP is GELU in its erf form (`transformers`' "gelu").
        match cfg.json.get("hidden_act") {
            None => {}
            Some(serde_json::Value::String(a)) if a == "gelu" || a == "gelu_python" => {}
            Some(other) => {
                return Err(bad(format!(
                    "\"hidden_act\" {other} is not supported for bert (supported: \"gelu\", \
                     \"gelu_python\")"
                )))
            }
        }
        let p = w.prefix(&["", "bert."], "embeddings.word_embeddings.weight").unwrap_or("");
        let ln = |stem: &str| -> Result<(Tensor, Tensor)> {
            Ok((
                w.tensor(&format!("{stem}.weight"), &[d])?,
                w.tensor(&format!("{stem}.bias"), &[d])?,
            ))
        };
        let word = w.tensor(&format!("{p}embeddings.word_embeddings.weight"), &[vocab, d])?;
        let position =
            w.tensor(&format!("{p}embeddings.position_embeddings.weight"), &[max_pos, d])?;
        let token_type =
            w.tensor(&format!("{p}embeddings.token_type_embeddings.weight"), &[types, d])?;
        let ln_embed = ln(&format!("{p}embeddings.LayerNorm"))?;
        let mut linears = Linears::default();
        let mut blocks = Vec::with_capacity(layers);
        for i in 0..layers {
            let s = format!("{p}encoder.layer.{i}");
            let mut lin = |stem: String, di: usize, dout: usize| -> Result<String> {
                linears.add_from(w, &stem, di, dout, true, false)
            };
            let qkv = [
                lin(format!("{s}.attention.self.query"), d, d)?,
                lin(format!("{s}.attention.self.key"), d, d)?,
                lin(format!("{s}.attention.self.value"), d, d)?,
            ];
            let attn_out = lin(format!("{s}.attention.output.dense"), d, d)?;
            let up = lin(format!("{s}.intermediate.dense"), d, inter)?;
            let down = lin(format!("{s}.output.dense"), inter, d)?;
            blocks.push(Block {
                qkv,
                attn_out,
                ln1: ln(&format!("{s}.attention.output.LayerNorm"))?,
                up,
                down,
                ln2: ln(&format!("{s}.output.LayerNorm"))?,
            });
        }
        let pooling = read_pooling(cfg);
        Ok(Bert { heads, eps, word, position, token_type, ln_embed, blocks, linears, pooling })
    }

    /// The pooling in use.
    pub fn pooling(&self) -> Pooling {
        self.pooling
    }

    fn lin(&self, name: &str) -> &Linear {
        self.linears.at(name)
    }
}

/// `1_Pooling/config.json` next to `config.json`, if present; mean otherwise.
fn read_pooling(cfg: &ArchConfig) -> Pooling {
    let dir = std::path::Path::new(&cfg.path).parent().map(|p| p.join("1_Pooling/config.json"));
    let json = dir
        .and_then(|p| std::fs::read_to_string(p).ok())
        .and_then(|t| serde_json::from_str::<serde_json::Value>(&t).ok());
    match json {
        Some(j) if j.get("pooling_mode_cls_token").and_then(|v| v.as_bool()) == Some(true) => {
            Pooling::First
        }
        _ => Pooling::Mean,
    }
}

impl Network for Bert {
    fn family(&self) -> Family {
        Family::Bert
    }

    fn kind(&self) -> Kind {
        Kind::Encoder
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
            g("attention output", &[&k.attn_out]),
            g("mlp input", &[&k.up]),
            g("mlp output", &[&k.down]),
        ]
    }

    fn units(&self, b: usize) -> Vec<Units> {
        let k = &self.blocks[b];
        let (up, down) = (self.linears.spec_at(&k.up), self.linears.spec_at(&k.down));
        let mut slices = units::producer(up, 1);
        slices.push(units::consumer(down, 1));
        let count = up.shape[0];
        vec![Units {
            kind: UnitKind::Neuron,
            count,
            consumer: k.down.clone(),
            width: 1,
            group: 3,
            slices,
        }]
    }

    fn embed(&self, batch: &Batch) -> Result<Tensor> {
        let (n, l) = batch.dims();
        let max = self.position.dim(0)?;
        if l > max {
            return Err(super::ArchError::new(
                super::ArchErrorKind::Compute,
                format!("sequence of {l} tokens exceeds max_position_embeddings = {max}"),
            ));
        }
        let ids = batch.ids.flatten_all()?;
        let tok = self.word.embedding(&ids)?.reshape((n, l, ()))?;
        let pos = self.position.narrow(0, 0, l)?.unsqueeze(0)?;
        let typ = self.token_type.narrow(0, 0, 1)?.unsqueeze(0)?;
        let x = tok.broadcast_add(&pos)?.broadcast_add(&typ)?;
        layer_norm(&x, &self.ln_embed.0, &self.ln_embed.1, self.eps)
    }

    fn block(&self, b: usize, x: &Tensor, tap: &mut Tap<'_>) -> Result<Tensor> {
        let k = &self.blocks[b];
        tap(0, &rows(x)?)?;
        let q = split_heads(&self.lin(&k.qkv[0]).forward(x)?, self.heads)?;
        let kk = split_heads(&self.lin(&k.qkv[1]).forward(x)?, self.heads)?;
        let v = split_heads(&self.lin(&k.qkv[2]).forward(x)?, self.heads)?;
        let ctx = merge_heads(&attention(&q, &kk, &v, false)?)?;
        tap(1, &rows(&ctx)?)?;
        let h = (self.lin(&k.attn_out).forward(&ctx)? + x)?;
        let h = layer_norm(&h, &k.ln1.0, &k.ln1.1, self.eps)?;
        tap(2, &rows(&h)?)?;
        let a = self.lin(&k.up).forward(&h)?.gelu_erf()?;
        tap(3, &rows(&a)?)?;
        let y = (self.lin(&k.down).forward(&a)? + h)?;
        layer_norm(&y, &k.ln2.0, &k.ln2.1, self.eps)
    }

    fn output(&self, x: &Tensor) -> Result<Tensor> {
        Ok(match self.pooling {
            Pooling::Mean => x.mean(1)?,
            Pooling::First => x.narrow(1, 0, 1)?.squeeze(1)?,
        })
    }

    fn max_positions(&self) -> Option<usize> {
        Some(self.position.dims()[0])
    }

    fn linears(&self) -> &Linears {
        &self.linears
    }

    fn linears_mut(&mut self) -> &mut Linears {
        &mut self.linears
    }
}
