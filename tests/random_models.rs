//! Models written by `scripts/make_random_model.py` (random weights,
//! realistic layout): a tiny Llama-style decoder with grouped-query
//! attention and a tiny GPT-2, bf16, sharded into several files with a
//! `model.safetensors.index.json`, as published checkpoints are.
//!
//! - lopper loads each one and its forward pass agrees with an outside
//!   reference, the models of candle-transformers 0.11.1 (`models::llama`;
//!   for GPT-2 the text decoder of `models::whisper`, as in
//!   tests/forward_reference.rs, which says why it is a valid reference),
//!   run on the same shards read by candle's own safetensors loader. Both
//!   read the bf16 values as f32 exactly; agreement is
//!   ‖ours − reference‖ / ‖reference‖ ≤ 1e-4 over all logits.
//! - The `lopper` binary prunes the Llama one from text to 50% and writes
//!   bf16 shards under the same names, every pruned layer half zeros.
//!
//! Needs python3 with numpy (scripts/test.sh installs it); without them the
//! tests fail with a message saying so, they do not skip.

mod common;
use candle_core::{DType, Device, Tensor};
use candle_nn::VarBuilder;
use candle_transformers::models as ct;
use common::*;
use lopper::arch::{self, Batch, Family};
use lopper::io::Model;
use lopper::rng::SplitMix64;
use serde_json::Value;
use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::process::Command;

const TOL: f64 = 1e-4;

type Map = HashMap<String, Tensor>;

fn dev() -> Device {
    Device::Cpu
}

/// A scratch folder under target/ (cargo's temporary folder for
/// integration tests).
fn scratch(tag: &str) -> Scratch {
    Scratch::under(Path::new(env!("CARGO_TARGET_TMPDIR")), tag)
}

/// Run the generator; panics (never skips) when python3 or numpy is missing.
fn generate(out: &Path, args: &[&str]) {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("scripts/make_random_model.py");
    let check = Command::new("python3").args(["-c", "import numpy"]).output();
    match check {
        Ok(o) if o.status.success() => {}
        _ => panic!(
            "python3 with numpy is needed to generate the test models \
             (scripts/test.sh installs it: `python3 -m pip install numpy`)"
        ),
    }
    let o = Command::new("python3").arg(&script).arg(out).args(args).output().expect("run python3");
    assert!(
        o.status.success(),
        "{} failed:\n{}{}",
        script.display(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
}

/// The shard files the index names, sorted, and the index's weight map.
fn shards(dir: &Path) -> (Vec<String>, BTreeMap<String, String>) {
    let index: Value = serde_json::from_str(
        &std::fs::read_to_string(dir.join("model.safetensors.index.json")).unwrap(),
    )
    .unwrap();
    let map: BTreeMap<String, String> = index["weight_map"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.as_str().unwrap().to_string()))
        .collect();
    let mut files: Vec<String> = map.values().cloned().collect();
    files.sort();
    files.dedup();
    let total: usize = files
        .iter()
        .map(|f| read_st(&dir.join(f)).0.values().map(|t| t.2.len()).sum::<usize>())
        .sum();
    assert_eq!(index["metadata"]["total_size"].as_u64(), Some(total as u64), "total_size");
    (files, map)
}

/// Every tensor of every shard, read by candle's own safetensors loader and
/// converted to f32.
fn candle_tensors(dir: &Path) -> Map {
    let mut map = Map::new();
    for f in shards(dir).0 {
        for (name, t) in candle_core::safetensors::load(dir.join(&f), &dev()).unwrap() {
            assert_eq!(t.dtype(), DType::BF16, "{name}");
            map.insert(name, t.to_dtype(DType::F32).unwrap());
        }
    }
    map
}

fn vb(map: &Map) -> VarBuilder<'static> {
    VarBuilder::from_tensors(map.clone(), DType::F32, &dev())
}

fn config(dir: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(dir.join("config.json")).unwrap()).unwrap()
}

/// ‖a − b‖ / ‖b‖ over all elements, in f64.
fn rel(a: &Tensor, b: &Tensor) -> f64 {
    assert_eq!(a.dims(), b.dims());
    let a: Vec<f32> = a.flatten_all().unwrap().to_vec1().unwrap();
    let b: Vec<f32> = b.flatten_all().unwrap().to_vec1().unwrap();
    let (mut num, mut den) = (0f64, 0f64);
    for (x, y) in a.iter().zip(&b) {
        num += (f64::from(*x) - f64::from(*y)).powi(2);
        den += f64::from(*y).powi(2);
    }
    (num / den).sqrt()
}

fn check(what: &str, ours: &Tensor, reference: &Tensor) {
    let e = rel(ours, reference);
    eprintln!("{what}: relative error {e:.2e}");
    assert!(e <= TOL, "{what}: relative error {e:.3e} exceeds {TOL:e}");
}

fn random_ids(n: usize, l: usize, vocab: usize, seed: u64) -> Vec<Vec<u32>> {
    let mut rng = SplitMix64::new(seed);
    (0..n).map(|_| (0..l).map(|_| rng.below(vocab as u64) as u32).collect()).collect()
}

fn ids_tensor(ids: &[Vec<u32>]) -> Tensor {
    let flat: Vec<u32> = ids.iter().flatten().copied().collect();
    Tensor::from_vec(flat, (ids.len(), ids[0].len()), &dev()).unwrap()
}

/// lopper's logits `[n, L, vocab]`, through `Model::open` and `arch::load`.
fn lopper_logits(dir: &Path, family: Family, ids: &[Vec<u32>]) -> Tensor {
    let model = Model::open(dir).unwrap();
    assert_eq!(model.files().len(), shards(dir).0.len(), "every shard opened");
    let net = arch::load(&model).unwrap();
    assert_eq!(net.family(), family);
    net.forward(&Batch::new(ids)).unwrap()
}

/// `--family F --size tiny` at bf16 in shards of 0.4 MB: the 4096 x 64
/// embedding (0.5 MB) takes a shard of its own, so there are at least two.
fn tiny(family: &str, dir: &Scratch) -> PathBuf {
    let out = dir.path(family);
    generate(&out, &["--family", family, "--size", "tiny", "--dtype", "bf16", "--shard-mb", "0.4"]);
    let (files, _) = shards(&out);
    assert!(files.len() >= 2, "{files:?}");
    for (i, f) in files.iter().enumerate() {
        assert_eq!(f, &format!("model-{:05}-of-{:05}.safetensors", i + 1, files.len()));
    }
    out
}

#[test]
fn generated_llama_matches_candle_llama() {
    let dir = scratch("random-llama");
    let model = tiny("llama", &dir);
    let cfg = config(&model);
    assert!(cfg["num_key_value_heads"].as_u64() < cfg["num_attention_heads"].as_u64());
    let vocab = cfg["vocab_size"].as_u64().unwrap() as usize;
    let ids = random_ids(3, 12, vocab, 5);
    let ours = lopper_logits(&model, Family::Llama, &ids);

    // Outside reference: candle-transformers 0.11.1 models::llama::Llama on
    // the config.json as written, which returns the last position's logits;
    // run on every prefix and stacked to [n, L, vocab].
    let c: ct::llama::LlamaConfig = serde_json::from_value(cfg).unwrap();
    let c = c.into_config(false);
    let reference = ct::llama::Llama::load(vb(&candle_tensors(&model)), &c).unwrap();
    let all = ids_tensor(&ids);
    let steps: Vec<Tensor> = (1..=ids[0].len())
        .map(|t| {
            let mut cache = ct::llama::Cache::new(false, DType::F32, &c, &dev()).unwrap();
            reference.forward(&all.narrow(1, 0, t).unwrap(), 0, &mut cache).unwrap()
        })
        .collect();
    let theirs = Tensor::stack(&steps, 1).unwrap();
    check("generated llama (4 heads, 2 kv heads, bf16 shards)", &ours, &theirs);
}

/// `[d_in, d_out]` file tensor → `[d_out, d_in]`.
fn tr(t: &Tensor) -> Tensor {
    t.t().unwrap().contiguous().unwrap()
}

#[test]
fn generated_gpt2_matches_candle_whisper_text_decoder() {
    let dir = scratch("random-gpt2");
    let model = tiny("gpt2", &dir);
    let cfg = config(&model);
    let u = |k: &str| cfg[k].as_u64().unwrap() as usize;
    let (d, layers, heads, vocab, positions) =
        (u("n_embd"), u("n_layer"), u("n_head"), u("vocab_size"), u("n_positions"));
    assert_eq!(u("n_inner"), 4 * d, "whisper's MLP is 4·d wide");
    let ids = random_ids(3, 13, vocab, 6);
    let ours = lopper_logits(&model, Family::Gpt2, &ids);

    // Outside reference: candle-transformers 0.11.1
    // models::whisper::model::TextDecoder (all positions). Its blocks are
    // GPT-2 blocks plus a cross-attention sub-block, silenced here by a zero
    // output projection; its key projection has no bias, which softmax makes
    // irrelevant (GPT-2's key bias adds the same q·b_k to every score of a
    // query row). The mapping is the one of tests/forward_reference.rs.
    let map = candle_tensors(&model);
    let g = |n: &str| map[n].clone();
    let zeros = |s: &[usize]| Tensor::zeros(s, DType::F32, &dev()).unwrap();
    let ones = |s: &[usize]| Tensor::ones(s, DType::F32, &dev()).unwrap();
    let mut m = Map::new();
    let dec = "model.decoder";
    m.insert(format!("{dec}.embed_tokens.weight"), g("wte.weight"));
    m.insert(format!("{dec}.embed_positions.weight"), g("wpe.weight"));
    m.insert(format!("{dec}.layer_norm.weight"), g("ln_f.weight"));
    m.insert(format!("{dec}.layer_norm.bias"), g("ln_f.bias"));
    for i in 0..layers {
        let (h, s) = (format!("h.{i}"), format!("{dec}.layers.{i}"));
        let w = tr(&g(&format!("{h}.attn.c_attn.weight")));
        let bias = g(&format!("{h}.attn.c_attn.bias"));
        for (j, p) in ["q_proj", "k_proj", "v_proj"].iter().enumerate() {
            m.insert(format!("{s}.self_attn.{p}.weight"), w.narrow(0, j * d, d).unwrap());
            if *p != "k_proj" {
                m.insert(format!("{s}.self_attn.{p}.bias"), bias.narrow(0, j * d, d).unwrap());
            }
        }
        for (to, from) in
            [("self_attn.out_proj", "attn.c_proj"), ("fc1", "mlp.c_fc"), ("fc2", "mlp.c_proj")]
        {
            m.insert(format!("{s}.{to}.weight"), tr(&g(&format!("{h}.{from}.weight"))));
            m.insert(format!("{s}.{to}.bias"), g(&format!("{h}.{from}.bias")));
        }
        for (to, from) in [("self_attn_layer_norm", "ln_1"), ("final_layer_norm", "ln_2")] {
            m.insert(format!("{s}.{to}.weight"), g(&format!("{h}.{from}.weight")));
            m.insert(format!("{s}.{to}.bias"), g(&format!("{h}.{from}.bias")));
        }
        for p in ["q_proj", "k_proj", "v_proj", "out_proj"] {
            m.insert(format!("{s}.encoder_attn.{p}.weight"), zeros(&[d, d]));
            if p != "k_proj" {
                m.insert(format!("{s}.encoder_attn.{p}.bias"), zeros(&[d]));
            }
        }
        m.insert(format!("{s}.encoder_attn_layer_norm.weight"), ones(&[d]));
        m.insert(format!("{s}.encoder_attn_layer_norm.bias"), zeros(&[d]));
    }
    // A minimal audio encoder that is loaded but never run.
    let enc = "model.encoder";
    m.insert(format!("{enc}.conv1.weight"), zeros(&[d, 1, 3]));
    m.insert(format!("{enc}.conv1.bias"), zeros(&[d]));
    m.insert(format!("{enc}.conv2.weight"), zeros(&[d, d, 3]));
    m.insert(format!("{enc}.conv2.bias"), zeros(&[d]));
    m.insert(format!("{enc}.layer_norm.weight"), ones(&[d]));
    m.insert(format!("{enc}.layer_norm.bias"), zeros(&[d]));
    let wc = ct::whisper::Config {
        num_mel_bins: 1,
        max_source_positions: 4,
        d_model: d,
        encoder_attention_heads: heads,
        encoder_layers: 0,
        vocab_size: vocab,
        max_target_positions: positions,
        decoder_attention_heads: heads,
        decoder_layers: layers,
        suppress_tokens: vec![],
    };
    let mut whisper = ct::whisper::model::Whisper::load(&vb(&m), wc).unwrap();
    let audio = zeros(&[ids.len(), 4, d]);
    let hidden = whisper.decoder.forward(&ids_tensor(&ids), &audio, true).unwrap();
    let theirs = whisper.decoder.final_linear(&hidden).unwrap();
    check("generated gpt2 (4 heads, bf16 shards)", &ours, &theirs);
}

/// Lines of made-up words from the model's own vocabulary (special tokens
/// left out), drawn with a skewed distribution so some words recur.
fn calibration_text(model: &Path, words: usize, seed: u64) -> String {
    let tok: Value =
        serde_json::from_str(&std::fs::read_to_string(model.join("tokenizer.json")).unwrap())
            .unwrap();
    let mut vocab: Vec<(&String, u64)> = tok["model"]["vocab"]
        .as_object()
        .unwrap()
        .iter()
        .filter(|(w, _)| !w.starts_with('<'))
        .map(|(w, id)| (w, id.as_u64().unwrap()))
        .collect();
    vocab.sort_by_key(|(_, id)| *id);
    let mut rng = SplitMix64::new(seed);
    let mut out = String::new();
    for i in 0..words {
        // The product of two uniform draws favours small ids.
        let r = rng.below(vocab.len() as u64) * rng.below(vocab.len() as u64);
        out.push_str(vocab[(r / vocab.len() as u64) as usize].0);
        out.push(if i % 12 == 11 { '\n' } else { ' ' });
    }
    out
}

#[test]
fn lopper_prunes_a_generated_sharded_bf16_llama() {
    let dir = scratch("random-prune");
    let model = tiny("llama", &dir);
    let text = dir.path("calib.txt");
    std::fs::write(&text, calibration_text(&model, 6000, 11)).unwrap();
    let out = dir.path("pruned");
    let o = lopper(&[
        "prune",
        s(&model),
        "--text",
        s(&text),
        "--sparsity",
        "0.5",
        "-o",
        s(&out),
        "--quiet",
    ]);
    assert!(o.status.success(), "lopper prune failed:\n{}", stderr(&o));

    // Sharded the same way: the same shard files holding the same tensors.
    let (files, weight_map) = shards(&model);
    let (out_files, out_map) = shards(&out);
    assert_eq!(out_files, files);
    assert_eq!(out_map, weight_map);
    for f in ["config.json", "tokenizer.json"] {
        assert_eq!(std::fs::read(model.join(f)).unwrap(), std::fs::read(out.join(f)).unwrap());
    }
    let mut pruned = 0;
    for f in &files {
        let (dense, _) = read_st(&model.join(f));
        let (written, _) = read_st(&out.join(f));
        assert_eq!(dense.keys().collect::<Vec<_>>(), written.keys().collect::<Vec<_>>(), "{f}");
        for (name, (dtype, shape, bytes)) in &written {
            assert_eq!(dtype, "BF16", "{name}");
            assert_eq!(shape, &dense[name].1, "{name}");
            let is_linear = name.contains("_proj.");
            if !is_linear {
                assert!(bytes == &dense[name].2, "{name} is not pruned and must be unchanged");
                continue;
            }
            // Every row keeps round(0.5 · d_in) = d_in / 2 weights.
            pruned += 1;
            let d_in = shape[1];
            let values: Vec<u16> =
                bytes.chunks_exact(2).map(|c| u16::from_le_bytes([c[0], c[1]])).collect();
            for (r, row) in values.chunks_exact(d_in).enumerate() {
                // ±0 in bf16.
                let zeros = row.iter().filter(|&&v| v & 0x7fff == 0).count();
                assert_eq!(zeros, d_in / 2, "{name} row {r}");
            }
        }
    }
    let layers = config(&model)["num_hidden_layers"].as_u64().unwrap() as usize;
    assert_eq!(pruned, 7 * layers, "every q/k/v/o/gate/up/down projection pruned");
}
