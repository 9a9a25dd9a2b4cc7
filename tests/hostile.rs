//! Hostile and careless input (issue 16, the input side): each test runs the
//! real binary on one bad input and checks the promise of the README's exit
//! code table: one line on stderr naming the file, tensor, key or option at
//! fault, the documented exit code, no panic (exit 101), nothing blocking.

mod common;

use common::*;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const DEMO: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/demo-models/pump-monitor");

fn demo(f: &str) -> String {
    format!("{DEMO}/{f}")
}

/// Exit code `code`, one `lopper: error:` line holding every needle.
fn one_line(o: &std::process::Output, code: i32, needles: &[&str]) -> String {
    let err = stderr(o);
    assert_eq!(o.status.code(), Some(code), "stderr: {err}");
    assert_eq!(err.trim_end().lines().count(), 1, "one line expected: {err}");
    assert!(err.starts_with("lopper: error: "), "{err}");
    for n in needles {
        assert!(err.contains(n), "message lacks '{n}': {err}");
    }
    err
}

// ---- item 5: zero-sized layers -------------------------------------------

#[test]
fn zero_sized_layers_are_skipped_with_a_note_not_a_panic() {
    let dir = Scratch::new("hostile-zero");
    let m = dir.path("m.safetensors");
    let a = dir.path("a.safetensors");
    write_st(&m, &[f32s("a.weight", &[8, 0], &[]), f32s("b.weight", &[8, 16], &values(128, 1))]);
    write_st(&a, &[f32s("a.weight", &[40, 0], &[]), f32s("b.weight", &[40, 16], &values(640, 2))]);
    let (out, rep) = (dir.path("o.safetensors"), dir.path("r.json"));
    let o = lopper(&[
        "prune",
        s(&m),
        "--activations",
        s(&a),
        "--sparsity",
        "0.5",
        "-o",
        s(&out),
        "--report",
        s(&rep),
        "-q",
    ]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(0), "{err}");
    assert!(err.contains("skipping zero-sized layer 'a.weight' [8, 0]"), "{err}");
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&rep).unwrap()).unwrap();
    let names: Vec<&str> =
        r["layers"].as_array().unwrap().iter().map(|l| l["name"].as_str().unwrap()).collect();
    assert_eq!(names, ["b.weight"]);
    // The report reads back (item 10).
    let page = dir.path("p.html");
    let o = lopper(&["report", s(&rep), "-o", s(&page)]);
    assert!(o.status.success(), "{}", stderr(&o));
}

// ---- item 6: ridge and numeric range -------------------------------------

#[test]
fn ridge_zero_on_dependent_inputs_is_the_options_fault_and_names_layer_and_lambda() {
    let dir = Scratch::new("hostile-ridge0");
    let out = dir.path("o.safetensors");
    let m = demo("model.safetensors");
    let a = demo("calibration.safetensors");
    for method in ["l0", "obs"] {
        let o = lopper(&[
            "prune",
            &m,
            "--activations",
            &a,
            "--sparsity",
            "0.5",
            "--ridge",
            "0",
            "--method",
            method,
            "-o",
            s(&out),
            "-q",
        ]);
        let err = one_line(&o, 2, &["--ridge 0", "hidden.1.weight", "λ=0.000e0", "linearly"]);
        assert!(!err.contains("NaN"), "{err}");
        assert!(!out.exists());
    }
}

#[test]
fn a_ridge_that_overflows_is_refused_naming_the_option_and_layer() {
    let dir = Scratch::new("hostile-ridge-big");
    let out = dir.path("o.safetensors");
    let o = lopper(&[
        "prune",
        &demo("model.safetensors"),
        "--activations",
        &demo("calibration.safetensors"),
        "--sparsity",
        "0.5",
        "--ridge",
        "1e308",
        "-o",
        s(&out),
    ]);
    let err = one_line(&o, 2, &["--ridge 1e308", "overflows", "hidden.0.weight"]);
    assert!(!err.contains("NaN") && !err.contains("λ=inf"), "{err}");
}

#[test]
fn activations_whose_gram_overflows_are_refused_naming_the_tensor() {
    let dir = Scratch::new("hostile-huge");
    let (m, _) = small_model(&dir);
    let a = dir.path("huge.safetensors");
    // F64 activations near 1e160: finite, but XᵀX overflows.
    let f64s = |name: &str, shape: [usize; 2], seed| T {
        name: name.into(),
        dtype: "F64",
        shape: shape.to_vec(),
        data: values(shape[0] * shape[1], seed)
            .iter()
            .flat_map(|x| (f64::from(*x) * 1e160).to_le_bytes())
            .collect(),
    };
    write_st(&a, &[f64s("enc.0.weight", [40, 8], 6), f64s("enc.1.weight", [40, 6], 7)]);
    let out = dir.path("o.safetensors");
    let o = lopper(&["prune", s(&m), "--activations", s(&a), "--sparsity", "0.5", "-o", s(&out)]);
    let err = one_line(&o, 2, &["enc.0.weight", "not finite"]);
    assert!(!err.contains("NaN"), "{err}");
}

// ---- item 8 and 5: config.json that lies (real BERT model) ---------------

/// A copy of the real model's folder with config.json edited.
fn bert_copy(dir: &Scratch, tag: &str, edit: impl Fn(&mut serde_json::Value)) -> Option<PathBuf> {
    let src = model_dir()?;
    let dst = dir.path(tag);
    std::fs::create_dir_all(&dst).unwrap();
    for f in ["model.safetensors", "tokenizer.json"] {
        std::os::unix::fs::symlink(src.join(f), dst.join(f)).unwrap();
    }
    let mut cfg: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(src.join("config.json")).unwrap()).unwrap();
    edit(&mut cfg);
    std::fs::write(dst.join("config.json"), cfg.to_string()).unwrap();
    Some(dst)
}

#[test]
fn bert_configs_that_cannot_describe_the_weights_are_refused_naming_the_key() {
    let dir = Scratch::new("hostile-bert");
    let text = dir.path("t.txt");
    std::fs::write(
        &text,
        "the pump started at dawn and the valve opened twice before noon\n".repeat(40),
    )
    .unwrap();
    let out = dir.path("out");
    type Edit = Box<dyn Fn(&mut serde_json::Value)>;
    let cases: Vec<(&str, Edit, Vec<&str>)> = vec![
        ("heads0", Box::new(|c| c["num_attention_heads"] = 0.into()), vec!["num_attention_heads"]),
        (
            "heads5",
            Box::new(|c| c["num_attention_heads"] = 5.into()),
            vec!["hidden_size", "num_attention_heads"],
        ),
        ("act", Box::new(|c| c["hidden_act"] = "swish".into()), vec!["hidden_act", "swish"]),
        ("eps", Box::new(|c| c["layer_norm_eps"] = (-1e-3).into()), vec!["layer_norm_eps"]),
        (
            "layers3",
            Box::new(|c| c["num_hidden_layers"] = 3.into()),
            vec!["num_hidden_layers", "encoder.layer.3."],
        ),
    ];
    for (tag, edit, needles) in cases {
        let Some(m) = bert_copy(&dir, tag, edit) else { return };
        let o = lopper(&[
            "prune",
            s(&m),
            "--text",
            s(&text),
            "--samples",
            "4",
            "--seq-len",
            "16",
            "--sparsity",
            "0.5",
            "-o",
            s(&out),
            "-q",
        ]);
        let mut all = vec!["config.json"];
        all.extend(needles);
        one_line(&o, 2, &all);
        assert!(!out.exists(), "{tag}: output written");
    }
}

// ---- item 10: lopper reads every report it writes -------------------------

#[test]
fn all_zero_activations_give_an_undefined_error_with_a_note_and_the_report_reads_back() {
    let dir = Scratch::new("hostile-zero-acts");
    let (m, _) = small_model(&dir);
    let a = dir.path("zeros.safetensors");
    write_st(
        &a,
        &[
            f32s("enc.0.weight", &[40, 8], &[0.0; 320]),
            f32s("enc.1.weight", &[40, 6], &values(240, 7)),
        ],
    );
    let (out, rep) = (dir.path("o.safetensors"), dir.path("r.json"));
    let o = lopper(&[
        "prune",
        s(&m),
        "--activations",
        s(&a),
        "--sparsity",
        "0.5",
        "-o",
        s(&out),
        "--report",
        s(&rep),
        "-q",
    ]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(0), "{err}");
    assert!(err.contains("'enc.0.weight'") && err.contains("undefined"), "{err}");
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&rep).unwrap()).unwrap();
    let l0 = &r["layers"][0];
    assert_eq!(l0["name"], "enc.0.weight");
    assert!(l0["rel_error"].is_null(), "{l0}");
    assert!(r["layers"][1]["rel_error"].is_f64());
    assert!(r["summary"]["mean_rel_error"].is_f64(), "the mean leaves the undefined layer out");
    let o = lopper(&["report", s(&rep), "-o", s(&dir.path("p.html"))]);
    assert!(o.status.success(), "{}", stderr(&o));
}

// ---- item 11 --------------------------------------------------------------

#[test]
fn report_refuses_two_different_models_with_the_same_file_name() {
    let dir = Scratch::new("hostile-fingerprint");
    let (m, a) = small_model(&dir);
    let other = dir.path("other");
    std::fs::create_dir_all(&other).unwrap();
    let m2 = other.join("model.safetensors");
    // The same prunable layers, but another head: another model.
    write_st(
        &m2,
        &[
            f32s("enc.0.weight", &[6, 8], &values(48, 12)),
            f32s("enc.1.weight", &[4, 6], &values(24, 14)),
            f32s("head.weight", &[3, 4], &values(12, 15)),
        ],
    );
    let mut reports = Vec::new();
    for (i, model) in [&m, &m2].iter().enumerate() {
        let r = dir.path(&format!("r{i}.json"));
        let out = dir.path(&format!("o{i}.safetensors"));
        let o = lopper(&[
            "prune",
            s(model),
            "--activations",
            s(&a),
            "--sparsity",
            "0.5",
            "-o",
            s(&out),
            "--report",
            s(&r),
            "-q",
        ]);
        assert!(o.status.success(), "{}", stderr(&o));
        reports.push(r);
    }
    let page = dir.path("p.html");
    let o = lopper(&["report", s(&reports[0]), s(&reports[1]), "-o", s(&page)]);
    one_line(&o, 2, &["different models", "fingerprint"]);
    assert!(!page.exists());
    // The same model twice still goes side by side.
    let o = lopper(&["report", s(&reports[0]), s(&reports[0]), "-o", s(&page)]);
    assert!(o.status.success(), "{}", stderr(&o));
}

#[test]
fn control_characters_in_tensor_names_are_escaped() {
    let dir = Scratch::new("hostile-ctrl");
    let m = dir.path("m.safetensors");
    let evil = "enc\n\u{1b}[31mred.weight";
    write_st(&m, &[f32s(evil, &[4, 8], &values(32, 1))]);
    let o = lopper(&["inspect", s(&m)]);
    assert!(o.status.success(), "{}", stderr(&o));
    let table = stdout(&o);
    assert!(!table.contains('\u{1b}'), "raw escape in: {table:?}");
    assert!(table.contains("enc\\u{a}\\u{1b}[31mred.weight"), "{table}");
    // A missing activation names the tensor on one line.
    let (_, a) = small_model(&dir);
    let o = lopper(&[
        "prune",
        s(&m),
        "--activations",
        s(&a),
        "--sparsity",
        "0.5",
        "-o",
        s(&dir.path("o")),
    ]);
    let err = one_line(&o, 2, &["enc\\u{a}\\u{1b}[31mred.weight"]);
    assert!(!err.contains('\u{1b}'));
}

#[test]
fn negative_pattern_and_threads_name_the_option() {
    let dir = Scratch::new("hostile-neg");
    let (m, a) = small_model(&dir);
    let out = dir.path("o.safetensors");
    let base = ["prune", s(&m), "--activations", s(&a), "-o", s(&out)];
    for (extra, want) in [
        (vec!["--pattern", "-2:4"], "--pattern"),
        (vec!["--sparsity", "0.5", "--threads", "-3"], "--threads"),
        (vec!["--sparsity", "0.5", "--max-sweeps", "-1"], "--max-sweeps"),
    ] {
        let o = lopper(&[&base[..], &extra[..]].concat());
        one_line(&o, 2, &[want, "-"]);
    }
    let o = lopper(&["speed", s(&m), "--threads", "-1"]);
    one_line(&o, 2, &["--threads"]);
}

/// Run `args` with a deadline; `None` when it had to be killed.
fn run_with_deadline(args: &[&str], secs: u64) -> Option<std::process::Output> {
    let mut child = Command::new(env!("CARGO_BIN_EXE_lopper"))
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let t0 = Instant::now();
    while t0.elapsed() < Duration::from_secs(secs) {
        if child.try_wait().unwrap().is_some() {
            return Some(child.wait_with_output().unwrap());
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    let _ = child.kill();
    let _ = child.wait();
    None
}

#[test]
fn a_fifo_as_model_activations_or_text_is_refused_without_blocking() {
    let dir = Scratch::new("hostile-fifo");
    let (m, a) = small_model(&dir);
    let fifo = dir.path("pipe.safetensors");
    let ok = Command::new("mkfifo").arg(&fifo).status().unwrap();
    assert!(ok.success());
    let out = dir.path("o.safetensors");
    let f = s(&fifo);
    let page = dir.path("p.html");
    let real = model_dir();
    let mut cases: Vec<Vec<&str>> = vec![
        vec!["inspect", f],
        vec!["prune", f, "--activations", s(&a), "--sparsity", "0.5", "-o", s(&out)],
        vec!["prune", s(&m), "--activations", f, "--sparsity", "0.5", "-o", s(&out)],
        vec!["report", f, "-o", s(&page)],
    ];
    if let Some(r) = &real {
        cases.push(vec!["prune", s(r), "--text", f, "--sparsity", "0.5", "-o", s(&out)]);
        cases.push(vec!["eval", s(r), s(r), "--text", f]);
    }
    for args in cases {
        let o = run_with_deadline(&args, 20).unwrap_or_else(|| panic!("{args:?} blocked"));
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
        assert!(err.contains("pipe.safetensors") && err.contains("not a regular file"), "{err}");
    }
}

/// Not a CLI test: the check that turns an input truncated during a run
/// into an input error (the write would otherwise fail with "Bad address").
#[test]
fn an_input_changed_during_a_run_is_reported_against_the_input() {
    let dir = Scratch::new("hostile-trunc");
    let (m, _) = small_model(&dir);
    let model = lopper::io::Model::open(&m).unwrap();
    model.check_unchanged().unwrap();
    let len = std::fs::metadata(&m).unwrap().len();
    let f = std::fs::OpenOptions::new().write(true).open(&m).unwrap();
    f.set_len(len / 2).unwrap();
    let e = model.check_unchanged().unwrap_err();
    let e = lopper::error::Error::from(e);
    assert_eq!(e.exit_code(), 2);
    let msg = e.to_string();
    assert!(
        msg.contains("model.safetensors") && msg.contains("changed while lopper was running"),
        "{msg}"
    );
    let _: &Path = &m;
}
