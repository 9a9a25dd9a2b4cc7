//! Block-streamed pruning: the same bytes as the whole-model path, bounded
//! memory on a sharded bf16 model, and nothing left behind by a failure or
//! an interrupt in the middle of a run.
//!
//! The reference for the bytes is `lopper prune --whole-model`: the path
//! that reads the whole model first and writes every tensor at the end
//! (the code before streaming, kept). Models come from
//! scripts/make_random_model.py (python3 with numpy; never skipped).

mod common;

use common::{lopper, model_dir, stderr, Scratch};
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

const TEXT: &str = "/usr/share/common-licenses/GPL-3";

fn scratch(tag: &str) -> Scratch {
    Scratch::under(Path::new(env!("CARGO_TARGET_TMPDIR")), tag)
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Run the generator; panics (never skips) when python3 or numpy is missing.
fn generate(out: &Path, args: &[&str]) {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("scripts/make_random_model.py");
    let o = Command::new("python3").arg(&script).arg(out).args(args).output().unwrap_or_else(|e| {
        panic!("python3 with numpy is needed to generate the test models: {e}")
    });
    assert!(
        o.status.success(),
        "{} failed: {}",
        script.display(),
        String::from_utf8_lossy(&o.stderr)
    );
}

/// A Llama-shape bf16 model of about 60 MB in three shards: 8 blocks of
/// width 512 (MLP 1408), vocabulary 8192.
fn mid_llama(dir: &Scratch) -> PathBuf {
    let out = dir.path("mid-llama");
    generate(
        &out,
        &[
            "--family",
            "llama",
            "--size",
            "tiny",
            "--hidden",
            "512",
            "--intermediate",
            "1408",
            "--layers",
            "8",
            "--heads",
            "8",
            "--kv-heads",
            "2",
            "--vocab",
            "8192",
            "--shard-mb",
            "24",
        ],
    );
    out
}

/// Every file of folder `a` has the same bytes in `b`, and `b` has no other.
fn same_folders(a: &Path, b: &Path) {
    let names = |d: &Path| {
        let mut v: Vec<String> = std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    };
    assert_eq!(names(a), names(b));
    for n in names(a) {
        if a.join(&n).is_dir() {
            same_folders(&a.join(&n), &b.join(&n));
            continue;
        }
        let (x, y) = (std::fs::read(a.join(&n)).unwrap(), std::fs::read(b.join(&n)).unwrap());
        assert!(x == y, "{n} differs between {} and {}", a.display(), b.display());
    }
}

/// Entries of `dir` that are lopper temporaries.
fn temporaries(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains("lopper-tmp"))
        .collect()
}

/// Prune `model` twice, streamed and with `--whole-model`, and compare
/// every output byte.
fn streamed_equals_whole(dir: &Scratch, tag: &str, model: &Path, extra: &[&str]) {
    let mut outs = Vec::new();
    for whole in [false, true] {
        let out = dir.path(&format!("{tag}-{whole}"));
        let mut args = vec!["prune", s(model), "--text", TEXT, "--method", "obs", "--sparsity"];
        args.extend(["0.5", "--samples", "8", "--seq-len", "32", "--quiet", "-o", s(&out)]);
        args.extend(extra);
        if whole {
            args.push("--whole-model");
        }
        let o = lopper(&args);
        assert!(o.status.success(), "{tag} (whole model: {whole}): {}", stderr(&o));
        outs.push(out);
    }
    if outs[0].is_dir() {
        same_folders(&outs[0], &outs[1]);
    } else {
        assert!(std::fs::read(&outs[0]).unwrap() == std::fs::read(&outs[1]).unwrap(), "{tag}");
    }
}

#[test]
fn streaming_changes_memory_not_bytes() {
    let dir = scratch("streamed-bytes");
    for family in ["llama", "gpt2"] {
        let m = dir.path(family);
        generate(
            &m,
            &["--family", family, "--size", "tiny", "--dtype", "bf16", "--shard-mb", "0.4"],
        );
        streamed_equals_whole(&dir, family, &m, &[]);
    }
    // MiniLM (f32, one file); `--no-propagate` covers the other loop order.
    if let Some(m) = model_dir() {
        streamed_equals_whole(&dir, "minilm", &m.join("model.safetensors"), &[]);
        streamed_equals_whole(&dir, "minilm-np", &m, &["--no-propagate"]);
    }
}

/// Run lopper and return its exit status and peak resident set size in
/// bytes (`ru_maxrss` of wait4(2), which Linux gives in KiB). The child
/// is reaped by that wait4 call, not by `Child::wait`.
#[allow(clippy::zombie_processes)]
fn run_measured(args: &[&str]) -> (bool, u64, String) {
    let err = tempfile_path();
    let child = Command::new(env!("CARGO_BIN_EXE_lopper"))
        .args(args)
        .stderr(std::fs::File::create(&err).unwrap())
        .spawn()
        .unwrap();
    let pid = child.id() as libc::pid_t;
    let mut status = 0;
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: `pid` is our child, not waited yet; both out-pointers are valid.
    let r = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    assert_eq!(r, pid);
    let text = std::fs::read_to_string(&err).unwrap_or_default();
    let _ = std::fs::remove_file(&err);
    (libc::WIFEXITED(status) && libc::WEXITSTATUS(status) == 0, usage.ru_maxrss as u64 * 1024, text)
}

fn tempfile_path() -> PathBuf {
    static N: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
    let n = N.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    Path::new(env!("CARGO_TARGET_TMPDIR")).join(format!("streamed-{}-{n}.err", std::process::id()))
}

/// Peak RSS limit for the 60 MB bf16 model pruned from text: measured
/// here (2 cores, shared), the whole-model path peaks at about 530 MB and
/// the streamed one at about 300 MB (the model's f32 weights are 124 MB,
/// their f64 pruned values 180 MB).
const LIMIT: u64 = 420 << 20;

#[test]
fn a_sharded_bf16_model_prunes_in_bounded_memory_and_stays_bf16() {
    let dir = scratch("streamed-memory");
    let model = mid_llama(&dir);
    let out = dir.path("out");
    let report = dir.path("report.json");
    let base = ["prune", s(&model), "--text", TEXT, "--method", "magnitude", "--sparsity", "0.5"];
    let mut args = base.to_vec();
    args.extend(["--samples", "8", "--seq-len", "64", "--quiet", "-o", s(&out)]);
    args.extend(["--report", s(&report)]);
    let (ok, peak, err) = run_measured(&args);
    assert!(ok, "{err}");
    assert!(peak < LIMIT, "streamed peak RSS {} MiB >= limit {} MiB", peak >> 20, LIMIT >> 20);
    // The limit means something: the whole-model path exceeds it.
    let whole_out = dir.path("whole");
    let mut w = base.to_vec();
    w.extend([
        "--samples",
        "8",
        "--seq-len",
        "64",
        "--quiet",
        "-o",
        s(&whole_out),
        "--whole-model",
    ]);
    let (ok, whole_peak, err) = run_measured(&w);
    assert!(ok, "{err}");
    assert!(whole_peak > LIMIT, "whole-model peak {} MiB under the limit", whole_peak >> 20);

    // Output dtype = input dtype: every tensor of every shard is BF16
    // (safetensors header: u64 length, then JSON; the format's description).
    for e in std::fs::read_dir(&out).unwrap() {
        let p = e.unwrap().path();
        if p.extension().is_some_and(|x| x == "safetensors") {
            let bytes = std::fs::read(&p).unwrap();
            let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
            let h: Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
            for (name, t) in h.as_object().unwrap() {
                if name != "__metadata__" {
                    assert_eq!(t["dtype"], "BF16", "{name}");
                }
            }
        }
    }
    // Every layer reports its error after rounding to bf16. Magnitude
    // pruning keeps the input's own bf16 values, so rounding them back to
    // bf16 is exact and the stored error must equal the solver's (to the
    // last bits of the f64 sums).
    let r: Value = serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
    let layers = r["layers"].as_array().unwrap();
    assert_eq!(layers.len(), 8 * 7);
    for l in layers {
        let (e, st) = (l["rel_error"].as_f64().unwrap(), l["rel_error_stored"].as_f64().unwrap());
        assert!(st.is_finite() && st >= 0.0, "{l}");
        assert!((st - e).abs() <= 1e-9 * e, "{}: {e} vs stored {st}", l["name"]);
    }
    assert!(r["summary"]["mean_rel_error_stored"].as_f64().is_some());
    assert!(temporaries(dir.0.as_path()).is_empty());
}

#[test]
fn a_bad_tensor_in_the_last_shard_leaves_nothing() {
    let dir = scratch("streamed-bad-tensor");
    let model = dir.path("m");
    generate(
        &model,
        &["--family", "llama", "--size", "tiny", "--dtype", "bf16", "--shard-mb", "0.4"],
    );
    // The last block's down projection, in the last shard: a NaN (bf16
    // 0x7FC0) at its first value, so blocks before it are written first.
    let index: Value = serde_json::from_str(
        &std::fs::read_to_string(model.join("model.safetensors.index.json")).unwrap(),
    )
    .unwrap();
    let name = "model.layers.1.mlp.down_proj.weight";
    let shard = model.join(index["weight_map"][name].as_str().unwrap());
    let mut bytes = std::fs::read(&shard).unwrap();
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let h: Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
    let start = 8 + n + h[name]["data_offsets"][0].as_u64().unwrap() as usize;
    bytes[start..start + 2].copy_from_slice(&0x7FC0u16.to_le_bytes());
    std::fs::write(&shard, bytes).unwrap();
    let out = dir.path("out");
    let o = lopper(&[
        "prune",
        s(&model),
        "--text",
        TEXT,
        "--sparsity",
        "0.5",
        "--method",
        "obs",
        "--samples",
        "8",
        "--seq-len",
        "32",
        "--quiet",
        "-o",
        s(&out),
    ]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(e.contains(name), "{e}");
    assert!(!out.exists());
    assert!(temporaries(dir.0.as_path()).is_empty(), "{:?}", temporaries(dir.0.as_path()));
}

#[test]
fn an_interrupt_midway_leaves_nothing() {
    let dir = scratch("streamed-interrupt");
    let model = mid_llama(&dir);
    let out = dir.path("out");
    let mut child = Command::new(env!("CARGO_BIN_EXE_lopper"))
        .args([
            "prune",
            s(&model),
            "--text",
            TEXT,
            "--sparsity",
            "0.5",
            "--method",
            "obs",
            "--samples",
            "16",
            "--seq-len",
            "64",
            "--quiet",
            "-o",
            s(&out),
        ])
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    // Wait for the output's temporary folder: the run is then writing.
    let t0 = Instant::now();
    while temporaries(dir.0.as_path()).is_empty() {
        assert!(t0.elapsed() < Duration::from_secs(120), "no temporary appeared");
        assert!(child.try_wait().unwrap().is_none(), "lopper ended before it could be interrupted");
        std::thread::sleep(Duration::from_millis(20));
    }
    std::thread::sleep(Duration::from_millis(300));
    // SAFETY: signalling our own child.
    unsafe { libc::kill(child.id() as libc::pid_t, libc::SIGINT) };
    let o = child.wait_with_output().unwrap();
    // 130 = 128 + SIGINT, the shell convention lopper follows.
    assert_eq!(o.status.code(), Some(130), "{}", stderr(&o));
    assert!(!out.exists());
    assert!(temporaries(dir.0.as_path()).is_empty(), "{:?}", temporaries(dir.0.as_path()));
}
