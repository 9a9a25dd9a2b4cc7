//! Whole-model runs with sparse kernels and decoding with a key/value
//! cache, on tiny random-weight models written here (Llama with
//! grouped-query attention, GPT-2) and on the real MiniLM encoder.
//!
//! - Cached decoding: at every step the logits equal the last position of
//!   the full-sequence forward, and for Llama they equal
//!   candle-transformers 0.11.1's own cached decoder
//!   (`models::llama::Llama` with `Cache::new(true, ..)`), the outside
//!   reference, run on the same file — with the layers pruned and on sparse
//!   kernels.
//! - Sparse kernels in the forward pass: the same outputs as the dense
//!   forward of the same pruned weights (70% unstructured and 2:4), relative
//!   error ‖a − b‖ / ‖b‖ ≤ 1e-4, for BERT (MiniLM), Llama and GPT-2.
//! - `lopper latency` runs end to end on a tiny model and reports both
//!   checks within tolerance, a speedup per variant, and decode figures.

mod common;
use candle_core::{DType, Device, Tensor};
use candle_nn::VarBuilder;
use candle_transformers::models as ct;
use common::*;
use lopper::arch::decode::{self, KvCache};
use lopper::arch::kernel::Kernel;
use lopper::arch::{self, Batch, Network};
use lopper::io::Model;
use lopper::rng::SplitMix64;
use lopper::sparse::SparseWeight;
use serde_json::{json, Value};
use std::collections::HashMap;
use std::sync::Arc;

const TOL: f64 = 1e-4;

fn dev() -> Device {
    Device::Cpu
}

fn rand(n: usize, scale: f32, offset: f32, seed: u64) -> Vec<f32> {
    values(n, seed).into_iter().map(|u| offset + scale * u).collect()
}

/// Tiny model folders; weights scaled so activations stay of order one.
struct Builder {
    tensors: Vec<T>,
    seed: u64,
}

impl Builder {
    fn add(&mut self, name: &str, shape: &[usize], scale: f32, offset: f32) {
        self.seed += 1;
        let v = rand(shape.iter().product(), scale, offset, self.seed);
        self.tensors.push(f32s(name, shape, &v));
    }
    fn weight(&mut self, name: &str, shape: &[usize], d_in: usize) {
        self.add(name, shape, (3.0 / d_in as f32).sqrt(), 0.0);
    }
    fn write(&self, tag: &str, config: &Value) -> Scratch {
        let dir = Scratch::new(tag);
        write_st(&dir.path("model.safetensors"), &self.tensors);
        std::fs::write(dir.path("config.json"), config.to_string()).unwrap();
        dir
    }
}

const VOCAB: usize = 101;

fn llama_config() -> Value {
    json!({
        "model_type": "llama", "hidden_size": 64, "num_hidden_layers": 2,
        "num_attention_heads": 4, "num_key_value_heads": 2, "intermediate_size": 96,
        "vocab_size": VOCAB, "rms_norm_eps": 1e-5, "rope_theta": 10000.0,
        "max_position_embeddings": 64, "tie_word_embeddings": false, "hidden_act": "silu"
    })
}

fn tiny_llama(tag: &str) -> Scratch {
    let (d, f) = (64, 96);
    let mut b = Builder { tensors: vec![], seed: 40 };
    b.add("model.embed_tokens.weight", &[VOCAB, d], 1.0, 0.0);
    for i in 0..2 {
        let s = format!("model.layers.{i}");
        b.add(&format!("{s}.input_layernorm.weight"), &[d], 0.2, 1.0);
        for (p, out) in [("q_proj", d), ("k_proj", d / 2), ("v_proj", d / 2)] {
            b.weight(&format!("{s}.self_attn.{p}.weight"), &[out, d], d);
        }
        b.weight(&format!("{s}.self_attn.o_proj.weight"), &[d, d], d);
        b.add(&format!("{s}.post_attention_layernorm.weight"), &[d], 0.2, 1.0);
        b.weight(&format!("{s}.mlp.gate_proj.weight"), &[f, d], d);
        b.weight(&format!("{s}.mlp.up_proj.weight"), &[f, d], d);
        b.weight(&format!("{s}.mlp.down_proj.weight"), &[d, f], f);
    }
    b.add("model.norm.weight", &[d], 0.2, 1.0);
    b.weight("lm_head.weight", &[VOCAB, d], d);
    b.write(tag, &llama_config())
}

fn tiny_gpt2(tag: &str) -> Scratch {
    let (d, f) = (32, 128);
    let mut b = Builder { tensors: vec![], seed: 90 };
    b.add("wte.weight", &[VOCAB, d], 1.0, 0.0);
    b.add("wpe.weight", &[64, d], 0.5, 0.0);
    for i in 0..2 {
        let s = format!("h.{i}");
        for ln in ["ln_1", "ln_2"] {
            b.add(&format!("{s}.{ln}.weight"), &[d], 0.2, 1.0);
            b.add(&format!("{s}.{ln}.bias"), &[d], 0.1, 0.0);
        }
        for (p, di, dout) in [
            ("attn.c_attn", d, 3 * d),
            ("attn.c_proj", d, d),
            ("mlp.c_fc", d, f),
            ("mlp.c_proj", f, d),
        ] {
            b.weight(&format!("{s}.{p}.weight"), &[di, dout], di);
            b.add(&format!("{s}.{p}.bias"), &[dout], 0.1, 0.0);
        }
    }
    b.add("ln_f.weight", &[d], 0.2, 1.0);
    b.add("ln_f.bias", &[d], 0.1, 0.0);
    let config = json!({
        "model_type": "gpt2", "n_embd": d, "n_layer": 2, "n_head": 4,
        "vocab_size": VOCAB, "n_positions": 64
    });
    b.write(tag, &config)
}

fn open(dir: &std::path::Path) -> Box<dyn Network> {
    arch::load(&Model::open(dir).unwrap()).unwrap()
}

fn block_linears(net: &dyn Network) -> Vec<String> {
    (0..net.num_blocks()).flat_map(|b| net.groups(b)).flat_map(|g| g.layers).collect()
}

/// How a test prunes: keep the largest |w| (magnitude, common practice) —
/// `Some((n, m))` keeps `n` per group of `m` consecutive inputs, `None` keeps
/// 30% of each row.
fn magnitude(w: &[f32], d_in: usize, nm: Option<(usize, usize)>) -> Vec<f32> {
    let (keep, width) = nm.unwrap_or(((3 * d_in).div_ceil(10), d_in));
    let mut out = w.to_vec();
    for g in out.chunks_mut(width) {
        let mut order: Vec<usize> = (0..g.len()).collect();
        order.sort_by(|&a, &b| g[b].abs().total_cmp(&g[a].abs()));
        for &i in &order[keep..] {
            g[i] = 0.0;
        }
    }
    out
}

/// Prune every block linear of `net` in memory, and put a sparse kernel on
/// each (`kernels`) or leave the dense product; returns the pruned weights
/// `[d_out, d_in]` by name.
fn prune_all(
    net: &mut dyn Network,
    nm: Option<(usize, usize)>,
    kernels: bool,
) -> HashMap<String, Vec<f32>> {
    let mut out = HashMap::new();
    for name in block_linears(net) {
        let l = net.linear(&name).unwrap();
        let (o, i) = l.shape();
        let w: Vec<f32> = l.weight.flatten_all().unwrap().to_vec1().unwrap();
        let p = magnitude(&w, i, nm);
        net.set_weight(&name, &p).unwrap();
        if kernels {
            let s = SparseWeight::from_dense(&p, o, i, nm).unwrap();
            if let Some((n, m)) = nm {
                assert_eq!(s.layout().to_string(), format!("{n}:{m}"), "{name}");
            }
            net.set_kernel(&name, Some(Kernel::Sparse(Arc::new(s)))).unwrap();
        }
        out.insert(name, p);
    }
    out
}

fn rel(a: &Tensor, b: &Tensor) -> f64 {
    let a: Vec<f32> = a.flatten_all().unwrap().to_vec1().unwrap();
    let b: Vec<f32> = b.flatten_all().unwrap().to_vec1().unwrap();
    decode::relative_error(&a, &b)
}

fn random_ids(n: usize, l: usize, seed: u64) -> Vec<Vec<u32>> {
    let mut rng = SplitMix64::new(seed);
    (0..n).map(|_| (0..l).map(|_| rng.below(VOCAB as u64) as u32).collect()).collect()
}

/// The sparse-kernel forward equals the dense forward of the same pruned
/// weights, for 70% unstructured and 2:4.
fn sparse_forward_matches_dense(dir: &std::path::Path, ids: &[Vec<u32>], what: &str) {
    for nm in [None, Some((2, 4))] {
        let mut dense = open(dir);
        let mut sparse = open(dir);
        prune_all(&mut *dense, nm, false);
        prune_all(&mut *sparse, nm, true);
        let batch = Batch::new(ids);
        let want = dense.forward(&batch).unwrap();
        let got = sparse.forward(&batch).unwrap();
        let e = rel(&got, &want);
        eprintln!("{what} {nm:?}: sparse vs dense relative error {e:.2e}");
        assert!(e <= TOL, "{what} {nm:?}: relative error {e:.3e}");
        // The pruning changed the output: the check is not dense vs dense.
        let unpruned = open(dir).forward(&batch).unwrap();
        assert!(rel(&want, &unpruned) > 1e-2, "{what}: pruning had no effect");
    }
}

#[test]
fn cached_decode_matches_the_full_forward_at_every_step() {
    for (what, dir) in [("llama", tiny_llama("dec-llama")), ("gpt2", tiny_gpt2("dec-gpt2"))] {
        let net = open(&dir.0);
        let prompt = &random_ids(1, 5, 3)[0];
        // Our own full forward on the growing sequence as the reference.
        let e = decode::check_against_full(&*net, prompt, 12).unwrap();
        eprintln!("{what}: cached vs full, worst step relative error {e:.2e}");
        assert!(e <= TOL, "{what}: {e:.3e}");
        // A cache that forgot a position would change the logits.
        let mut cache = KvCache::new(net.num_blocks());
        let a = net.forward_cached(&Batch::new(std::slice::from_ref(prompt)), &mut cache).unwrap();
        assert_eq!(cache.len(), 5);
        let mut short = KvCache::new(net.num_blocks());
        net.forward_cached(&Batch::new(&[prompt[1..4].to_vec()]), &mut short).unwrap();
        let b = net.forward_cached(&Batch::new(&[vec![prompt[4]]]), &mut short).unwrap();
        assert!(rel(&b, &a.narrow(1, 4, 1).unwrap()) > 1e-3, "{what}: the cache is not read");
    }
}

#[test]
fn pruned_llama_decode_on_sparse_kernels_matches_candle_transformers_cached_llama() {
    let dir = tiny_llama("dec-ref");
    let mut net = open(&dir.0);
    let pruned = prune_all(&mut *net, None, true);
    // The reference reads the same file with the pruned weights put in.
    let mut map: HashMap<String, Tensor> =
        candle_core::safetensors::load(dir.path("model.safetensors"), &dev()).unwrap();
    for (name, w) in &pruned {
        let shape = map[name].dims().to_vec();
        map.insert(name.clone(), Tensor::from_vec(w.clone(), shape, &dev()).unwrap());
    }
    let c: ct::llama::LlamaConfig = serde_json::from_value(llama_config()).unwrap();
    let c = c.into_config(false);
    let vb = VarBuilder::from_tensors(map, DType::F32, &dev());
    let reference = ct::llama::Llama::load(vb, &c).unwrap();
    let mut ref_cache = ct::llama::Cache::new(true, DType::F32, &c, &dev()).unwrap();
    let mut cache = KvCache::new(net.num_blocks());
    let mut input = random_ids(1, 6, 11)[0].clone();
    let mut pos = 0;
    for step in 0..10 {
        let ids = Tensor::from_vec(input.clone(), (1, input.len()), &dev()).unwrap();
        // Outside reference: candle-transformers 0.11.1, its own KV cache.
        let want = reference.forward(&ids, pos, &mut ref_cache).unwrap().flatten_all().unwrap();
        let ours = net.forward_cached(&Batch::new(&[input.clone()]), &mut cache).unwrap();
        let last = ours.get(0).unwrap().get(input.len() - 1).unwrap();
        let e = rel(&last, &want);
        assert!(e <= TOL, "step {step}: relative error {e:.3e}");
        pos += input.len();
        input = vec![decode::argmax(&last.to_vec1::<f32>().unwrap())];
    }
}

#[test]
fn sparse_kernels_give_the_dense_forward_of_the_same_weights() {
    let ids = random_ids(2, 9, 5);
    sparse_forward_matches_dense(&tiny_llama("sp-llama").0, &ids, "llama");
    sparse_forward_matches_dense(&tiny_gpt2("sp-gpt2").0, &ids, "gpt2");
    // Cached decoding on sparse kernels against the dense full forward.
    let dir = tiny_gpt2("sp-gpt2-dec");
    let mut sparse = open(&dir.0);
    prune_all(&mut *sparse, None, true);
    let e = decode::check_against_full(&*sparse, &ids[0], 6).unwrap();
    assert!(e <= TOL, "gpt2 sparse decode: {e:.3e}");
}

#[test]
fn minilm_on_sparse_kernels_gives_its_dense_forward() {
    let Some(dir) = model_dir() else { return };
    // Token ids below MiniLM's 30,522-word vocabulary, 2 x 32.
    let mut rng = SplitMix64::new(9);
    let ids: Vec<Vec<u32>> =
        (0..2).map(|_| (0..32).map(|_| 1000 + rng.below(20_000) as u32).collect()).collect();
    sparse_forward_matches_dense(&dir, &ids, "minilm");
}

#[test]
fn latency_command_reports_checked_speedups_and_decode_figures() {
    let dir = tiny_llama("lat-cli");
    // Prune the file itself (70% unstructured by magnitude) so the command
    // finds zeros.
    let mut net = open(&dir.0);
    let pruned = prune_all(&mut *net, None, false);
    let mut tensors: Vec<T> = Vec::new();
    for (name, t) in candle_core::safetensors::load(dir.path("model.safetensors"), &dev()).unwrap()
    {
        let v: Vec<f32> = match pruned.get(&name) {
            Some(p) => p.clone(),
            None => t.flatten_all().unwrap().to_vec1().unwrap(),
        };
        tensors.push(f32s(&name, t.dims(), &v));
    }
    write_st(&dir.path("model.safetensors"), &tensors);
    let o = lopper(&[
        "latency",
        dir.0.to_str().unwrap(),
        "--json",
        "--reps",
        "2",
        "--tokens",
        "3",
        "--prefill",
        "16",
        "--prompt",
        "4",
        "--threads",
        "1",
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let r: Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(r["pruned_layers"], 14, "7 linears in each of 2 blocks");
    assert!(r["sparse_check_rel_error"].as_f64().unwrap() <= TOL);
    assert!(r["decode_check_rel_error"].as_f64().unwrap() <= TOL);
    let d = &r["scenarios"]["decode_batch_1"];
    assert_eq!(d["variants"]["dense"]["calls"], 6, "2 runs x 3 tokens");
    let s = d["speedup"]["sparse_kernels"].as_f64().unwrap();
    let (a, b) = (
        d["variants"]["dense"]["p50_ms"].as_f64().unwrap(),
        d["variants"]["sparse_kernels"]["p50_ms"].as_f64().unwrap(),
    );
    assert!((s - a / b).abs() < 1e-9 * s, "speedup = dense / sparse medians");
    let share = d["variants"]["dense"]["linear_share"].as_f64().unwrap();
    assert!(share > 0.0 && share < 1.0, "{share}");
    assert!(r["scenarios"]["prefill_16"]["speedup"]["sparse_kernels"].as_f64().unwrap() > 0.0);
    // Bad input: a zero count is refused in one line.
    let o = lopper(&["latency", dir.0.to_str().unwrap(), "--tokens", "0"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("--tokens"), "{}", stderr(&o));
}
