//! The removable units of a block: FFN neurons and attention heads, as
//! slices of the tensors that hold them, and the config keys that count
//! them.
//!
//! Removing unit `u` of a [`Units`] deletes, from every tensor of
//! [`Units::slices`], the `per_unit` consecutive entries `u·per_unit ..
//! (u+1)·per_unit` along the slice's storage axis. The block computes the
//! same function with the unit removed as with the consumer's columns of
//! that unit set to zero: a neuron's or head's output reaches the rest of
//! the block only through those columns.
//!
//! - FFN neurons: rows of the producers (`intermediate.dense`,
//!   `gate_proj` + `up_proj`, `c_fc`, with their biases) and columns of the
//!   consumer (`output.dense`, `down_proj`, `c_proj`).
//! - Attention heads (Llama family only): a unit is one key/value head with
//!   the `num_attention_heads / num_key_value_heads` query heads that share
//!   it, so the written config keeps query heads a multiple of key/value
//!   heads. Rows of `q_proj`, `k_proj`, `v_proj` (and biases), columns of
//!   `o_proj`. Only `llama` and `mistral` configs take an explicit
//!   `head_dim`; BERT, GPT-2 and Qwen2 loaders derive the head width from
//!   `hidden / heads`, so fewer heads cannot be written there
//!   ([`head_limit`]).

use super::{ArchConfig, ArchError, ArchErrorKind, Family, LinearSpec, Result};
use serde_json::Value;

/// What a unit is.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum UnitKind {
    /// One FFN neuron.
    Neuron,
    /// One key/value head and the query heads that share it.
    Head,
}

impl UnitKind {
    /// `neurons` or `heads`, for reports.
    pub fn plural(self) -> &'static str {
        match self {
            UnitKind::Neuron => "neurons",
            UnitKind::Head => "heads",
        }
    }
}

/// A run of `per_unit` entries per unit along one storage axis of a tensor.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Slice {
    /// Tensor name.
    pub tensor: String,
    /// Axis in the file's storage layout.
    pub axis: usize,
    /// Entries per unit along `axis`.
    pub per_unit: usize,
}

/// The units of one kind in one block.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Units {
    /// Neurons or heads.
    pub kind: UnitKind,
    /// Number of units.
    pub count: usize,
    /// Weight name of the consumer, the layer whose input the units form.
    pub consumer: String,
    /// Consumer columns (of its `[d_out, d_in]` view) per unit.
    pub width: usize,
    /// Index of the consumer's group in [`super::Network::groups`].
    pub group: usize,
    /// Every tensor slice a unit owns, the consumer's included.
    pub slices: Vec<Slice>,
}

/// Slices of a producer: its weight rows (storage axis 0, or 1 when stored
/// `[d_in, d_out]`) and its bias.
pub(crate) fn producer(l: &LinearSpec, per_unit: usize) -> Vec<Slice> {
    let name = format!("{}.weight", l.stem);
    let mut v = vec![Slice { tensor: name.clone(), axis: usize::from(l.transposed), per_unit }];
    if l.bias {
        v.push(Slice { tensor: bias_name(&name), axis: 0, per_unit });
    }
    v
}

/// The consumer's input columns (storage axis 1, or 0 when transposed).
pub(crate) fn consumer(l: &LinearSpec, per_unit: usize) -> Slice {
    Slice { tensor: format!("{}.weight", l.stem), axis: usize::from(!l.transposed), per_unit }
}

/// `stem.weight` → `stem.bias`.
fn bias_name(weight: &str) -> String {
    format!("{}.bias", weight.strip_suffix(".weight").unwrap_or(weight))
}

/// Why a model type's config cannot express fewer heads, if it cannot.
/// Llama and Mistral configs take an explicit `head_dim`; the others
/// derive the head width from the model width and the head count.
pub fn head_limit(model_type: &str) -> Option<&'static str> {
    match model_type {
        "llama" | "mistral" => None,
        "bert" => Some(
            "BERT's config.json derives the head width from hidden_size / num_attention_heads, \
             so a model with fewer heads cannot be written; remove FFN neurons only",
        ),
        "gpt2" => Some(
            "GPT-2's config.json derives the head width from n_embd / n_head, so a model with \
             fewer heads cannot be written; remove FFN neurons only",
        ),
        _ => Some(
            "this model type's loaders derive the head width from hidden_size / \
             num_attention_heads, so a model with fewer heads cannot be written; remove FFN \
             neurons only",
        ),
    }
}

/// `config.json` of the model with `neurons` FFN neurons per block and
/// `kv_groups` key/value heads per block (each with its query heads).
/// `None` leaves a count as it is.
///
/// # Errors
/// [`ArchErrorKind::Config`] when the config lacks a count it needs, or
/// heads are asked of a family that cannot express them.
pub fn resized_config(
    cfg: &ArchConfig,
    neurons: Option<usize>,
    kv_groups: Option<usize>,
) -> Result<Value> {
    let mut json = cfg.json.clone();
    let obj = json.as_object_mut().ok_or_else(|| {
        ArchError::new(ArchErrorKind::Config, format!("{}: not a JSON object", cfg.path))
    })?;
    if let Some(n) = neurons {
        let key = match cfg.family {
            Family::Gpt2 => "n_inner",
            Family::Bert | Family::Llama => "intermediate_size",
        };
        obj.insert(key.to_string(), Value::from(n));
    }
    if let Some(kv) = kv_groups {
        if let Some(why) = head_limit(&cfg.model_type) {
            return Err(ArchError::new(ArchErrorKind::Config, why));
        }
        let c = super::llama::LlamaConfig::from_config(cfg)?;
        let rep = c.heads / c.kv_heads;
        obj.insert("num_attention_heads".to_string(), Value::from(kv * rep));
        obj.insert("num_key_value_heads".to_string(), Value::from(kv));
        // The head width no longer follows from hidden / heads: say it.
        obj.insert("head_dim".to_string(), Value::from(c.head_dim));
    }
    Ok(json)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cfg(text: &str) -> ArchConfig {
        ArchConfig::parse(text, "m/config.json").unwrap()
    }

    #[test]
    fn configs_get_the_family_s_own_keys() {
        let c = cfg(r#"{"model_type": "bert", "intermediate_size": 1536, "hidden_size": 384}"#);
        let j = resized_config(&c, Some(768), None).unwrap();
        assert_eq!(j["intermediate_size"], 768);
        assert_eq!(j["hidden_size"], 384);
        let e = resized_config(&c, None, Some(4)).unwrap_err();
        assert!(e.to_string().contains("FFN neurons only"), "{e}");

        let c = cfg(r#"{"model_type": "gpt2", "n_embd": 64}"#);
        assert_eq!(resized_config(&c, Some(100), None).unwrap()["n_inner"], 100);

        // 8 query heads over 2 key/value heads of width 16 (hidden 128):
        // keeping one key/value head keeps its 4 query heads.
        let c = cfg(r#"{"model_type": "llama", "hidden_size": 128, "num_attention_heads": 8,
                "num_key_value_heads": 2, "intermediate_size": 256, "num_hidden_layers": 2,
                "vocab_size": 50}"#);
        let j = resized_config(&c, Some(192), Some(1)).unwrap();
        assert_eq!(j["num_attention_heads"], 4);
        assert_eq!(j["num_key_value_heads"], 1);
        assert_eq!(j["head_dim"], 16);
        assert_eq!(j["intermediate_size"], 192);
    }

    #[test]
    fn bias_names_follow_the_weight() {
        assert_eq!(bias_name("h.0.mlp.c_fc.weight"), "h.0.mlp.c_fc.bias");
    }
}
