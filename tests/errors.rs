//! One test per error class, run through the real binary: every command
//! that can meet the error prints one line naming the object at fault and
//! exits with the code the README documents for that class (2: usage,
//! input, layer; 1: solve, output). The exit-code table is the project's
//! own contract (README "Exit codes"); a one-line `tool: error: …` message
//! on stderr is common practice for command-line tools.

mod common;

use common::*;
use std::path::PathBuf;

/// Prune the small model with a report; returns the report's path.
fn report_of(dir: &Scratch, m: &str, a: &str) -> PathBuf {
    let r = dir.path("r.json");
    let p = dir.path("p.safetensors");
    let args =
        ["prune", m, "--activations", a, "--sparsity", "0.5", "-o", s(&p), "--report", s(&r), "-q"];
    let ok = lopper(&args);
    assert!(ok.status.success(), "{}", stderr(&ok));
    r
}

/// Run `args`; check the exit code, one line of stderr holding every
/// needle, and that no file appeared in `dir` except `allowed`.
fn expect(dir: &Scratch, args: &[&str], code: i32, needles: &[&str], allowed: &[&str]) {
    let before = dir.files();
    let o = lopper(args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(code), "{args:?}\nstderr: {err}");
    assert_eq!(err.trim_end().lines().count(), 1, "{args:?}: one line expected: {err}");
    assert!(err.starts_with("lopper: error: "), "{err}");
    for n in needles {
        assert!(err.contains(n), "{args:?}: message lacks '{n}': {err}");
    }
    let mut after = dir.files();
    after.retain(|f| !allowed.iter().any(|a| f.starts_with(a)));
    assert_eq!(after, before, "{args:?} left files behind");
}

#[test]
fn usage_errors_exit_2_and_name_the_option_in_every_command() {
    let dir = Scratch::new("err-usage");
    let (m, a) = small_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let out = dir.path("out");
    let o = s(&out);
    // The same shared flag, rejected the same way by both commands that take it.
    for flag in [["--ridge", "-1"], ["--holdout", "1.5"], ["--layer-seconds", "0"]] {
        expect(
            &dir,
            &[&["prune", &m, "--activations", &a, "--sparsity", "0.5", "-o", o], &flag[..]]
                .concat(),
            2,
            &[flag[0]],
            &[],
        );
        expect(
            &dir,
            &[&["compare", &m, "--activations", &a, "--out-dir", o], &flag[..]].concat(),
            2,
            &[flag[0]],
            &[],
        );
    }
    expect(&dir, &["speed", &m, "--batch", "0"], 2, &["--batch 0"], &[]);
    expect(&dir, &["eval", &m, &m, "--text", &a, "--samples", "0"], 2, &["--samples"], &[]);
    expect(&dir, &["inspect", &m, "--only", "nothing.*"], 2, &["--only", "nothing.*"], &[]);
    expect(&dir, &["pack", &m, "--only", "nothing.*", "-o", o], 2, &["--only"], &[]);
}

#[test]
fn overwriting_an_input_is_a_usage_error_in_every_command() {
    let dir = Scratch::new("err-overwrite");
    let (m, a) = small_model(&dir);
    let (ms, a) = (s(&m).to_string(), s(&a).to_string());
    let needles = ["refusing to overwrite", "model.safetensors"];
    expect(
        &dir,
        &["prune", &ms, "--activations", &a, "--sparsity", "0.5", "-o", &ms],
        2,
        &needles,
        &[],
    );
    expect(
        &dir,
        &["prune", &ms, "--activations", &a, "--sparsity", "0.5", "-o", "x.st", "--report", &a],
        2,
        &["--report", "refusing to overwrite", "acts.safetensors"],
        &[],
    );
    expect(&dir, &["pack", &ms, "-o", &ms], 2, &needles, &[]);
    // A report read by `lopper report` is an input too.
    let r = report_of(&dir, &ms, &a);
    expect(&dir, &["report", s(&r), "-o", s(&r)], 2, &["refusing to overwrite", "r.json"], &[]);
}

#[test]
fn input_errors_exit_2_and_name_the_file_in_every_command() {
    let dir = Scratch::new("err-input");
    let (m, a) = small_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let missing = s(&dir.path("missing.safetensors")).to_string();
    let o = s(&dir.path("out")).to_string();
    let n = ["missing.safetensors"];
    expect(&dir, &["inspect", &missing], 2, &n, &[]);
    expect(
        &dir,
        &["prune", &missing, "--activations", &a, "--sparsity", "0.5", "-o", &o],
        2,
        &n,
        &[],
    );
    expect(
        &dir,
        &["prune", &m, "--activations", &missing, "--sparsity", "0.5", "-o", &o],
        2,
        &n,
        &[],
    );
    expect(&dir, &["compare", &missing, "--activations", &a, "--out-dir", &o], 2, &n, &[]);
    expect(&dir, &["compare", &m, "--activations", &missing, "--out-dir", &o], 2, &n, &[]);
    expect(&dir, &["speed", &missing], 2, &n, &[]);
    expect(&dir, &["pack", &missing, "-o", &o], 2, &n, &[]);
    expect(&dir, &["eval", &missing, &m, "--text", &a], 2, &n, &[]);
    expect(&dir, &["report", &missing, "-o", &o], 2, &n, &[]);
}

#[test]
fn a_layer_that_cannot_take_the_pattern_exits_2_and_is_named_in_every_command() {
    let dir = Scratch::new("err-layer");
    let (m, a) = small_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let o = s(&dir.path("out")).to_string();
    let n = ["enc.1.weight", "[4, 6]", "does not divide"];
    expect(&dir, &["prune", &m, "--activations", &a, "--pattern", "2:4", "-o", &o], 2, &n, &[]);
    expect(
        &dir,
        &["compare", &m, "--activations", &a, "--patterns", "2:4", "--out-dir", &o],
        2,
        &n,
        &[],
    );
}

/// An F16 layer of weights near the format's largest value (65504), whose
/// inputs share one factor: the refit after pruning half of each row moves
/// the kept weights past 65504, which F16 cannot store.
fn overflowing_model(dir: &Scratch) -> (PathBuf, PathBuf) {
    let model = dir.path("m16.safetensors");
    write_st(&model, &[f16s("enc.0.weight", &[4, 8], &[60000.0; 32])]);
    let z = values(40, 11);
    let noise = values(320, 12);
    let x: Vec<f32> = (0..320).map(|i| z[i / 8] + 0.01 * noise[i]).collect();
    let acts = dir.path("a16.safetensors");
    write_st(&acts, &[f32s("enc.0.weight", &[40, 8], &x)]);
    (model, acts)
}

#[test]
fn a_solve_failure_exits_1_and_names_the_layer_in_every_command() {
    let dir = Scratch::new("err-solve");
    let (m, a) = overflowing_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let o = s(&dir.path("out.safetensors")).to_string();
    let n = ["enc.0.weight", "F16", "--ridge"];
    let solve = ["--ridge", "0"];
    expect(
        &dir,
        &[
            &["prune", &m, "--activations", &a, "--sparsity", "0.5", "--method", "obs", "-o", &o],
            &solve[..],
        ]
        .concat(),
        1,
        &n,
        &[],
    );
    // compare keeps what finished: its record says `failed`, with the cause.
    let cdir = dir.path("cmp");
    expect(
        &dir,
        &[
            &[
                "compare",
                &m,
                "--activations",
                &a,
                "--sparsities",
                "0.5",
                "--methods",
                "obs",
                "--out-dir",
                s(&cdir),
            ],
            &solve[..],
        ]
        .concat(),
        1,
        &n,
        &["cmp"],
    );
    let c: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(cdir.join("comparison.json")).unwrap())
            .unwrap();
    assert_eq!(c["status"], "failed");
    assert!(c["status_detail"].as_str().unwrap().contains("enc.0.weight"), "{c}");
}

/// A write that fails after the work exits 1 and leaves nothing new: the
/// report goes to /dev/full (through a link, so no root is needed and the
/// device is never at risk). An output folder that does not exist is found
/// before any work instead, exit 2, in every command that writes files.
#[test]
fn an_output_failure_exits_1_in_every_command() {
    let dir = Scratch::new("err-output");
    let (m, a) = small_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let r = report_of(&dir, &m, &a);
    let full = dir.path("full");
    std::os::unix::fs::symlink("/dev/full", &full).unwrap();
    let out = dir.path("out.safetensors");
    expect(
        &dir,
        &[
            "prune",
            &m,
            "--activations",
            &a,
            "--sparsity",
            "0.5",
            "-o",
            s(&out),
            "--report",
            s(&full),
        ],
        1,
        &["--report", "full", "cannot write"],
        &[],
    );
    let nodir = dir.path("no-such-folder");
    expect(
        &dir,
        &["prune", &m, "--activations", &a, "--sparsity", "0.5", "-o", s(&nodir.join("o.st"))],
        2,
        &["-o", "no-such-folder", "does not exist"],
        &[],
    );
    expect(
        &dir,
        &["report", s(&r), "-o", s(&nodir.join("page.html"))],
        2,
        &["-o", "no-such-folder"],
        &[],
    );
    expect(
        &dir,
        &["pack", s(&dir.path("p.safetensors")), "-o", s(&nodir.join("m.sprig"))],
        2,
        &["-o", "no-such-folder"],
        &[],
    );
}
