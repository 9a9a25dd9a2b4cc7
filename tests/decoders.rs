//! Text calibration and evaluation end to end on tiny random-weight decoders
//! (Llama-style and GPT-2-style) that the tests write themselves: weights,
//! config.json and a word-level tokenizer.json, with text from a made-up
//! pump-maintenance log.

mod common;
use common::*;
use lopper::rng::SplitMix64;
use serde_json::{json, Value};
use std::path::{Path, PathBuf};

const WORDS: &[&str] = &[
    "pump", "valve", "filter", "tank", "pressure", "flow", "seal", "motor", "intake", "outlet",
    "line", "north", "south", "field", "checked", "replaced", "cleaned", "opened", "closed",
    "rising", "falling", "steady", "low", "high", "at", "the", "on", "after", "before", "dawn",
    "noon", "dusk", "one", "two", "three", "four", "crew", "logged", "noise", "leak", "none",
    "minor", "and", "was", "is", "a", "of", "to", ".",
];

/// Word-level vocabulary: `[UNK]`, `<s>`, then [`WORDS`].
fn vocab() -> Vec<String> {
    let mut v = vec!["[UNK]".to_string(), "<s>".to_string()];
    v.extend(WORDS.iter().map(|w| w.to_string()));
    v
}

/// A tokenizer.json in the open format of the `tokenizers` library:
/// whitespace pre-tokenizer and a word-level model.
fn tokenizer_json() -> Value {
    let vocab: serde_json::Map<String, Value> =
        vocab().into_iter().enumerate().map(|(i, w)| (w, json!(i))).collect();
    json!({
        "version": "1.0", "truncation": null, "padding": null, "added_tokens": [],
        "normalizer": null, "pre_tokenizer": {"type": "Whitespace"},
        "post_processor": null, "decoder": null,
        "model": {"type": "WordLevel", "vocab": vocab, "unk_token": "[UNK]"}
    })
}

/// Log lines from a seeded generator: `the pump on line two was checked at
/// dawn . pressure steady .` and the like.
fn log_text(lines: usize, seed: u64) -> String {
    let mut rng = SplitMix64::new(seed);
    let mut pick = |xs: &[&'static str]| xs[rng.below(xs.len() as u64) as usize];
    let mut out = String::new();
    for _ in 0..lines {
        let parts = [
            "the",
            pick(&["pump", "valve", "filter", "tank", "seal", "motor"]),
            "on line",
            pick(&["one", "two", "three", "four"]),
            "was",
            pick(&["checked", "replaced", "cleaned", "opened", "closed"]),
            pick(&["at", "before", "after"]),
            pick(&["dawn", "noon", "dusk"]),
            ".",
            pick(&["pressure", "flow"]),
            pick(&["rising", "falling", "steady", "low", "high"]),
            ". noise",
            pick(&["none", "minor", "high"]),
            ".\n",
        ];
        out.push_str(&parts.join(" "));
    }
    out
}

fn rand(n: usize, scale: f32, seed: u64) -> Vec<f32> {
    values(n, seed).into_iter().map(|v| v * scale).collect()
}

fn ones(n: usize) -> Vec<f32> {
    vec![1.0; n]
}

const D: usize = 32;
const LAYERS: usize = 2;

/// A Llama-style decoder: 4 heads of 8, 2 key/value heads, SwiGLU 48 wide.
fn write_llama(dir: &Path) {
    let v = vocab().len();
    let (kv, inter) = (16, 48);
    let mut t = vec![f32s("model.embed_tokens.weight", &[v, D], &rand(v * D, 1.0, 1))];
    for i in 0..LAYERS {
        let p = format!("model.layers.{i}");
        let s = 10 * (i as u64 + 1);
        let shapes = [
            ("self_attn.q_proj", [D, D]),
            ("self_attn.k_proj", [kv, D]),
            ("self_attn.v_proj", [kv, D]),
            ("self_attn.o_proj", [D, D]),
            ("mlp.gate_proj", [inter, D]),
            ("mlp.up_proj", [inter, D]),
            ("mlp.down_proj", [D, inter]),
        ];
        for (k, (name, sh)) in shapes.iter().enumerate() {
            let w = rand(sh[0] * sh[1], 0.3, s + k as u64);
            t.push(f32s(&format!("{p}.{name}.weight"), sh, &w));
        }
        t.push(f32s(&format!("{p}.input_layernorm.weight"), &[D], &ones(D)));
        t.push(f32s(&format!("{p}.post_attention_layernorm.weight"), &[D], &ones(D)));
    }
    t.push(f32s("model.norm.weight", &[D], &ones(D)));
    t.push(f32s("lm_head.weight", &[v, D], &rand(v * D, 0.5, 99)));
    write_st(&dir.join("model.safetensors"), &t);
    let cfg = json!({
        "model_type": "llama", "hidden_size": D, "intermediate_size": inter,
        "num_hidden_layers": LAYERS, "num_attention_heads": 4, "num_key_value_heads": 2,
        "vocab_size": v, "rms_norm_eps": 1e-5, "rope_theta": 10000.0,
        "max_position_embeddings": 128, "bos_token_id": 1, "tie_word_embeddings": false
    });
    std::fs::write(dir.join("config.json"), cfg.to_string()).unwrap();
}

/// A GPT-2-style decoder: 4 heads, Conv1D weights stored `[d_in, d_out]`.
fn write_gpt2(dir: &Path) {
    let v = vocab().len();
    let pos = 64;
    let mut t = vec![
        f32s("wte.weight", &[v, D], &rand(v * D, 1.0, 2)),
        f32s("wpe.weight", &[pos, D], &rand(pos * D, 0.1, 3)),
    ];
    for i in 0..LAYERS {
        let p = format!("h.{i}");
        let s = 20 * (i as u64 + 1);
        for (k, (name, sh)) in [
            ("attn.c_attn", [D, 3 * D]),
            ("attn.c_proj", [D, D]),
            ("mlp.c_fc", [D, 4 * D]),
            ("mlp.c_proj", [4 * D, D]),
        ]
        .iter()
        .enumerate()
        {
            t.push(f32s(
                &format!("{p}.{name}.weight"),
                sh,
                &rand(sh[0] * sh[1], 0.3, s + k as u64),
            ));
            t.push(f32s(
                &format!("{p}.{name}.bias"),
                &[sh[1]],
                &rand(sh[1], 0.05, s + 7 + k as u64),
            ));
        }
        for ln in ["ln_1", "ln_2"] {
            t.push(f32s(&format!("{p}.{ln}.weight"), &[D], &ones(D)));
            t.push(f32s(&format!("{p}.{ln}.bias"), &[D], &[0.0; D]));
        }
    }
    t.push(f32s("ln_f.weight", &[D], &ones(D)));
    t.push(f32s("ln_f.bias", &[D], &[0.0; D]));
    write_st(&dir.join("model.safetensors"), &t);
    let cfg = json!({
        "model_type": "gpt2", "n_embd": D, "n_head": 4, "n_layer": LAYERS,
        "n_positions": pos, "vocab_size": v, "layer_norm_epsilon": 1e-5
    });
    std::fs::write(dir.join("config.json"), cfg.to_string()).unwrap();
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

struct Setup {
    _dir: Scratch,
    model: PathBuf,
    calib: PathBuf,
    heldout: PathBuf,
    out: PathBuf,
    report: PathBuf,
}

fn setup(tag: &str, write: fn(&Path)) -> Setup {
    let dir = Scratch::new(tag);
    let model = dir.path("model");
    std::fs::create_dir_all(&model).unwrap();
    write(&model);
    std::fs::write(model.join("tokenizer.json"), tokenizer_json().to_string()).unwrap();
    let (calib, heldout) = (dir.path("calib.txt"), dir.path("heldout.txt"));
    std::fs::write(&calib, log_text(200, 5)).unwrap();
    std::fs::write(&heldout, log_text(60, 77)).unwrap();
    Setup {
        out: dir.path("out"),
        report: dir.path("report.json"),
        _dir: dir,
        model,
        calib,
        heldout,
    }
}

fn prune(st: &Setup, extra: &[&str]) -> Value {
    let mut args = vec![
        "prune",
        s(&st.model),
        "--text",
        s(&st.calib),
        "--samples",
        "24",
        "--seq-len",
        "32",
        "--eval-text",
        s(&st.heldout),
        "-o",
        s(&st.out),
        "--report",
        s(&st.report),
        "--quiet",
    ];
    args.extend_from_slice(extra);
    let o = lopper(&args);
    assert!(o.status.success(), "{}", stderr(&o));
    serde_json::from_str(&std::fs::read_to_string(&st.report).unwrap()).unwrap()
}

fn eval_json(dense: &Path, pruned: &Path, text: &Path) -> Value {
    let o = lopper(&["eval", s(dense), s(pruned), "--text", s(text), "--seq-len", "32", "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    serde_json::from_str(&stdout(&o)).unwrap()
}

/// Zeros in each row of the `[d_out, d_in]` view of a stored weight.
fn zeros_per_row(values: &[f32], shape: &[usize], transposed: bool) -> Vec<usize> {
    let (d_out, d_in) = if transposed { (shape[1], shape[0]) } else { (shape[0], shape[1]) };
    (0..d_out)
        .map(|r| {
            (0..d_in)
                .filter(|&c| {
                    let k = if transposed { c * d_out + r } else { r * d_in + c };
                    values[k] == 0.0
                })
                .count()
        })
        .collect()
}

fn check_family(st: &Setup, per_block: usize, transposed_names: &[&str]) {
    let r = prune(st, &["--sparsity", "0.5", "--method", "l0"]);
    let layers = r["layers"].as_array().unwrap();
    assert_eq!(layers.len(), LAYERS * per_block);
    let (dense, _) = read_st(&st.model.join("model.safetensors"));
    let (pruned, _) = read_st(&st.out.join("model.safetensors"));
    assert_eq!(dense.keys().collect::<Vec<_>>(), pruned.keys().collect::<Vec<_>>());
    for l in layers {
        let name = l["name"].as_str().unwrap();
        let (_, dshape, _) = &dense[name];
        let (_, pshape, bytes) = &pruned[name];
        // Written back in the file's own layout.
        assert_eq!(dshape, pshape, "{name}");
        let transposed = transposed_names.iter().any(|t| name.contains(t));
        let d_in = if transposed { pshape[0] } else { pshape[1] };
        for z in zeros_per_row(&as_f32(bytes), pshape, transposed) {
            assert_eq!(z, d_in / 2, "{name}: every row of [d_out, d_in] keeps half");
        }
    }
    // End-to-end figures: finite, and the pruned model is the worse one.
    let e = &r["eval"];
    assert_eq!(e["kind"], "decoder");
    let (pd, pp, kl) = (
        e["perplexity_dense"].as_f64().unwrap(),
        e["perplexity_pruned"].as_f64().unwrap(),
        e["kl_mean"].as_f64().unwrap(),
    );
    assert!(pd.is_finite() && pd > 1.0 && pp.is_finite() && kl > 0.0, "{e}");
    // `lopper eval` on the written file gives the report's figures...
    let again = eval_json(&st.model, &st.out, &st.heldout);
    for k in ["perplexity_dense", "perplexity_pruned", "kl_mean", "hidden_rel_error"] {
        let (a, b) = (again[k].as_f64().unwrap(), e[k].as_f64().unwrap());
        assert!((a - b).abs() <= 1e-6 * b.abs().max(1e-9), "{k}: {a} vs {b}");
    }
    // ... and against itself the dense model has no divergence at all.
    let same = eval_json(&st.model, &st.model, &st.heldout);
    assert_eq!(same["kl_mean"].as_f64().unwrap(), 0.0);
    assert_eq!(same["perplexity_dense"], same["perplexity_pruned"]);
}

#[test]
fn llama_style_decoder_prunes_from_text_and_evaluates() {
    let st = setup("llama-text", write_llama);
    check_family(&st, 7, &[]);
}

#[test]
fn gpt2_style_decoder_prunes_from_text_and_keeps_its_layout() {
    let st = setup("gpt2-text", write_gpt2);
    check_family(&st, 4, &["c_attn", "c_proj", "c_fc"]);
}

#[test]
fn decoder_n_of_m_and_sequential_options() {
    let st = setup("gpt2-2of4", write_gpt2);
    let r = prune(&st, &["--pattern", "2:4", "--method", "obs", "--no-propagate", "--seed", "9"]);
    assert_eq!(r["settings"]["pattern"], "2:4");
    assert_eq!(r["settings"]["text"]["propagate"], false);
    assert_eq!(r["settings"]["text"]["seed"], 9);
    for l in r["layers"].as_array().unwrap() {
        assert!((l["sparsity"].as_f64().unwrap() - 0.5).abs() < 1e-9);
    }
}

#[test]
fn neurons_removed_and_the_rest_pruned_in_one_run_write_what_was_evaluated() {
    let st = setup("llama-cut-and-prune", write_llama);
    let r = prune(&st, &["--remove-neurons", "0.25", "--sparsity", "0.5"]);
    let (small, _) = read_st(&st.out.join("model.safetensors"));
    // 48 neurons less 12: gate/up keep 36 rows, down keeps 36 columns; every
    // row of the remaining matrices keeps half its weights.
    for i in 0..LAYERS {
        let p = format!("model.layers.{i}.mlp");
        for (name, shape) in [("gate_proj", [36, D]), ("up_proj", [36, D]), ("down_proj", [D, 36])]
        {
            let (_, sh, bytes) = &small[&format!("{p}.{name}.weight")];
            assert_eq!(sh, &shape.to_vec(), "{p}.{name}");
            for z in zeros_per_row(&as_f32(bytes), sh, false) {
                assert_eq!(z, sh[1] / 2, "{p}.{name}");
            }
        }
    }
    let cfg: Value =
        serde_json::from_str(&std::fs::read_to_string(st.out.join("config.json")).unwrap())
            .unwrap();
    assert_eq!(cfg["intermediate_size"], 36);
    // The report describes the smaller layers.
    let down = r["layers"]
        .as_array()
        .unwrap()
        .iter()
        .find(|l| l["name"] == "model.layers.1.mlp.down_proj.weight")
        .unwrap();
    assert_eq!(down["shape"], json!([D, 36]));
    assert_eq!(down["total"], json!(D * 36));
    let units = r["structure"]["units"].as_array().unwrap();
    assert_eq!(units.len(), LAYERS);
    assert_eq!(units[0]["removed"].as_array().unwrap().len(), 12);
    // The written model is the one the run evaluated.
    let again = eval_json(&st.model, &st.out, &st.heldout);
    for k in ["perplexity_pruned", "kl_mean", "hidden_rel_error"] {
        let (a, b) = (again[k].as_f64().unwrap(), r["eval"][k].as_f64().unwrap());
        assert!((a - b).abs() <= 1e-6 * b.abs().max(1e-9), "{k}: {a} vs {b}");
    }
}

#[test]
fn structured_cuts_that_cannot_be_done_are_refused_before_any_work() {
    let llama = setup("llama-cut-errors", write_llama);
    let gpt2 = setup("gpt2-cut-errors", write_gpt2);
    let run = |st: &Setup, extra: &[&str], needles: &[&str]| {
        let mut args = vec!["prune", s(&st.model), "--text", s(&st.calib), "-o", s(&st.out)];
        args.extend_from_slice(&["--seq-len", "32", "--samples", "8"]);
        args.extend_from_slice(extra);
        let o = lopper(&args);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{extra:?}: {err}");
        assert_eq!(err.trim_end().lines().count(), 1, "{extra:?}: {err}");
        for n in needles {
            assert!(err.contains(n), "{extra:?}: message lacks '{n}': {err}");
        }
        assert!(!st.out.exists(), "{extra:?} wrote {}", st.out.display());
    };
    run(&gpt2, &["--remove-heads", "1"], &["--remove-heads", "n_embd / n_head"]);
    run(
        &llama,
        &["--remove-neurons", "48"],
        &["--remove-neurons", "48 of the 48", "keep at least one"],
    );
    run(&llama, &["--remove-neurons", "1.5"], &["--remove-neurons", "'1.5'"]);
    // 47 kept inputs cannot hold 2:4 groups.
    run(&llama, &["--remove-neurons", "1", "--pattern", "2:4"], &["--remove-neurons", "47 inputs"]);
    run(&llama, &["--remove-neurons", "4", "--skip", "*down_proj*"], &["down_proj", "--skip"]);
    run(&llama, &["--sparsity", "0.5", "--refit"], &["--refit"]);
    // A single file cannot carry the new config.json.
    let file = llama.model.join("model.safetensors");
    let o = lopper(&[
        "prune",
        s(&file),
        "--text",
        s(&llama.calib),
        "--remove-neurons",
        "4",
        "-o",
        s(&llama.out),
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("model directory"), "{}", stderr(&o));
}

#[test]
fn neurons_removed_with_activations_of_a_model_directory() {
    let st = setup("llama-cut-acts", write_llama);
    // The inputs of each block's down_proj (48 wide), from a seeded
    // generator: the activations file names them like the weights.
    let acts = st._dir.path("acts.safetensors");
    let rows = 200;
    let t: Vec<T> = (0..LAYERS)
        .map(|i| {
            let name = format!("model.layers.{i}.mlp.down_proj.weight");
            f32s(&name, &[rows, 48], &values(rows * 48, 50 + i as u64))
        })
        .collect();
    write_st(&acts, &t);
    let (m, a, out, rep) = (s(&st.model), s(&acts), s(&st.out), s(&st.report));
    let args = ["prune", m, "--activations", a, "--only", "*down_proj*", "--remove-neurons", "12"];
    let o = lopper(&[&args[..], &["-o", out, "--report", rep, "-q"]].concat());
    assert!(o.status.success(), "{}", stderr(&o));
    let (small, _) = read_st(&st.out.join("model.safetensors"));
    for i in 0..LAYERS {
        let p = format!("model.layers.{i}.mlp");
        assert_eq!(small[&format!("{p}.gate_proj.weight")].1, vec![36, D]);
        assert_eq!(small[&format!("{p}.up_proj.weight")].1, vec![36, D]);
        assert_eq!(small[&format!("{p}.down_proj.weight")].1, vec![D, 36]);
    }
    let cfg: Value =
        serde_json::from_str(&std::fs::read_to_string(st.out.join("config.json")).unwrap())
            .unwrap();
    assert_eq!(cfg["intermediate_size"], 36);
    let r: Value = serde_json::from_str(&std::fs::read_to_string(&st.report).unwrap()).unwrap();
    assert_eq!(r["structure"]["units"].as_array().unwrap().len(), LAYERS);
    // A consumer left out of the selection is refused before any work.
    let o = lopper(&[
        "prune",
        m,
        "--activations",
        a,
        "--only",
        "*.0.mlp.down_proj*",
        "--remove-neurons",
        "12",
        "-o",
        s(&st._dir.path("other")),
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("model.layers.1.mlp.down_proj.weight"), "{}", stderr(&o));
}

/// Zeros and weights over every layer a report lists, counted in the file.
fn counted_zeros(st: &Setup, r: &Value, transposed: bool) -> Vec<(String, usize, usize)> {
    let (pruned, _) = read_st(&st.out.join("model.safetensors"));
    r["layers"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            let name = l["name"].as_str().unwrap().to_string();
            let (_, shape, bytes) = &pruned[&name];
            let z: usize = zeros_per_row(&as_f32(bytes), shape, transposed).iter().sum();
            (name, z, shape[0] * shape[1])
        })
        .collect()
}

#[test]
fn spread_targets_hit_the_overall_sparsity_and_keep_the_bounds() {
    let st = setup("llama-spread", write_llama);
    // Layer scope: every layer's count is free, so the zeros written equal
    // round(0.6 · N) within one weight per layer (the check).
    let r = prune(
        &st,
        &["--sparsity", "0.6", "--spread", "measured", "--scope", "layer", "--method", "obs"],
    );
    let counts = counted_zeros(&st, &r, false);
    let n: usize = counts.iter().map(|c| c.2).sum();
    let z: usize = counts.iter().map(|c| c.1).sum();
    let want = (0.6 * n as f64).round() as usize;
    assert!(z.abs_diff(want) <= counts.len(), "{z} zeros, want {want} ± {}", counts.len());
    let a = &r["allocation"];
    assert_eq!(a["spread"], "measured");
    let rows = a["layers"].as_array().unwrap();
    assert_eq!(rows.len(), counts.len());
    let spread: Vec<f64> = rows.iter().map(|l| l["sparsity"].as_f64().unwrap()).collect();
    assert!(spread.iter().any(|&s| (s - 0.6).abs() > 0.01), "not spread at all: {spread:?}");
    for l in rows {
        assert!(l["contribution_measured"].as_f64().unwrap() >= 0.0, "{l}");
        assert!(l["sensitivity"].as_f64().unwrap() >= 0.0, "{l}");
    }
    // Row scope with bounds: every row of a layer keeps the same count, no
    // layer leaves [0.3, 0.8], and the total misses by at most half a row
    // budget of one layer (counts are multiples of d_out).
    let r = prune(
        &st,
        &["--sparsity", "0.6", "--spread", "measured", "--layer-min", "0.3", "--layer-max", "0.8"],
    );
    let counts = counted_zeros(&st, &r, false);
    let z: usize = counts.iter().map(|c| c.1).sum();
    let widest = 48;
    assert!(z.abs_diff(want) <= widest / 2, "{z} zeros, want {want}");
    for (name, z, size) in &counts {
        let s = *z as f64 / *size as f64;
        assert!((0.3 - 1e-9..=0.8 + 1e-9).contains(&s), "{name}: {s}");
    }
    // The outlier baseline: per-block sparsities whose size-weighted mean is
    // the target (Yin et al. 2024), so the total is within row rounding.
    let r = prune(&st, &["--sparsity", "0.6", "--spread", "outlier", "--method", "obs"]);
    let counts = counted_zeros(&st, &r, false);
    let z: usize = counts.iter().map(|c| c.1).sum();
    let rows: usize = counts.len() * widest;
    assert!(z.abs_diff(want) <= rows / 2, "{z} zeros, want {want}");
    assert_eq!(r["allocation"]["spread"], "outlier");
}
