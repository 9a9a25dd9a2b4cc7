//! Careless and hostile output targets, through the real binary: special
//! files (FIFOs, character devices) are never replaced, no output replaces
//! an input, output problems are found before any work, a failure leaves
//! nothing new, and a model folder is copied whole (subfolders included).
//!
//! Nothing here needs root: character devices are reached through a
//! symbolic link to `/dev/null` or `/dev/full` inside the scratch folder, so
//! a regression replaces the link, never the device.

mod common;

use common::*;
use std::os::unix::fs::FileTypeExt;
use std::path::Path;
use std::process::{Command, Stdio};

fn mkfifo(p: &Path) {
    let ok = Command::new("mkfifo").arg(p).status().expect("mkfifo runs");
    assert!(ok.success(), "mkfifo {}", p.display());
}

fn is_fifo(p: &Path) -> bool {
    std::fs::symlink_metadata(p).unwrap().file_type().is_fifo()
}

fn is_link(p: &Path) -> bool {
    std::fs::symlink_metadata(p).unwrap().file_type().is_symlink()
}

/// Every entry under `dir`, relative, sorted (hidden ones included).
fn tree(dir: &Path) -> Vec<String> {
    fn walk(root: &Path, d: &Path, out: &mut Vec<String>) {
        for e in std::fs::read_dir(d).unwrap() {
            let e = e.unwrap();
            let p = e.path();
            out.push(p.strip_prefix(root).unwrap().to_string_lossy().into_owned());
            if e.file_type().unwrap().is_dir() {
                walk(root, &p, out);
            }
        }
    }
    let mut out = Vec::new();
    walk(dir, dir, &mut out);
    out.sort();
    out
}

/// Run `args`: exit `code`, one line on stderr holding every needle, and
/// the scratch folder's tree unchanged.
fn refused(dir: &Scratch, args: &[&str], code: i32, needles: &[&str]) {
    let before = tree(&dir.0);
    let o = lopper(args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(code), "{args:?}\nstderr: {err}");
    assert_eq!(err.trim_end().lines().count(), 1, "{args:?}: one line expected: {err}");
    for n in needles {
        assert!(err.contains(n), "{args:?}: message lacks '{n}': {err}");
    }
    assert_eq!(tree(&dir.0), before, "{args:?} changed the scratch folder");
}

/// A model folder: weights, config.json, and a sentence-transformers
/// style `1_Pooling/config.json` subfolder.
fn model_dir(dir: &Scratch) -> (std::path::PathBuf, std::path::PathBuf) {
    let (m, a) = small_model(dir);
    let md = dir.path("md");
    std::fs::create_dir_all(md.join("1_Pooling")).unwrap();
    std::fs::rename(&m, md.join("model.safetensors")).unwrap();
    std::fs::write(md.join("config.json"), "{\"model_type\": \"mlp\"}\n").unwrap();
    std::fs::write(md.join("1_Pooling/config.json"), "{\"pooling_mode_mean_tokens\": true}\n")
        .unwrap();
    (md, a)
}

#[test]
fn special_files_are_never_replaced() {
    let dir = Scratch::new("hostile-special");
    let (m, a) = small_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let fifo = dir.path("fifo");
    mkfifo(&fifo);
    let null = dir.path("null");
    std::os::unix::fs::symlink("/dev/null", &null).unwrap();
    let folder = dir.path("folder");
    std::fs::create_dir(&folder).unwrap();
    let prune = |extra: &[&str]| {
        let mut v = vec!["prune", &m, "--activations", &a, "--sparsity", "0.5", "-q"];
        v.extend_from_slice(extra);
        v.into_iter().map(str::to_string).collect::<Vec<_>>()
    };
    let out = s(&dir.path("out.safetensors")).to_string();
    for (args, needles) in [
        (prune(&["-o", s(&fifo)]), vec!["-o", "fifo", "not a regular file"]),
        (prune(&["-o", s(&null)]), vec!["-o", "null", "not a regular file"]),
        (prune(&["-o", s(&folder)]), vec!["-o", "folder"]),
        (prune(&["-o", &out, "--trace", s(&folder)]), vec!["--trace", "folder"]),
    ] {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        refused(&dir, &args, 2, &needles);
    }
    let p = dir.path("p.safetensors");
    let ok = lopper(&["prune", &m, "--activations", &a, "--sparsity", "0.5", "-o", s(&p), "-q"]);
    assert!(ok.status.success(), "{}", stderr(&ok));
    refused(&dir, &["pack", s(&p), "-o", s(&fifo)], 2, &["-o", "fifo", "not a regular file"]);
    refused(&dir, &["pack", s(&p), "-o", s(&null)], 2, &["-o", "null"]);
    // A comparison folder whose comparison.json is a FIFO.
    let cdir = dir.path("cmp");
    std::fs::create_dir(&cdir).unwrap();
    mkfifo(&cdir.join("comparison.json"));
    refused(
        &dir,
        &["compare", &m, "--activations", &a, "--sparsities", "0.5", "--out-dir", s(&cdir)],
        2,
        &["comparison.json", "not a regular file"],
    );
    assert!(is_fifo(&cdir.join("comparison.json")));

    // --report and --trace write straight into a character device or FIFO.
    let null2 = dir.path("null2");
    std::os::unix::fs::symlink("/dev/null", &null2).unwrap();
    let o = lopper(
        &prune(&["-o", &out, "--report", s(&null), "--trace", s(&null2)])
            .iter()
            .map(String::as_str)
            .collect::<Vec<_>>(),
    );
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(is_link(&null) && is_link(&null2), "a link to /dev/null was replaced");
    assert!(Path::new(&out).is_file());
    let reader = Command::new("cat").arg(&fifo).stdout(Stdio::piped()).spawn().unwrap();
    let o = lopper(
        &prune(&["-o", &out, "--report", s(&fifo)]).iter().map(String::as_str).collect::<Vec<_>>(),
    );
    // `cat` ends when lopper closes the FIFO; if lopper never opened it,
    // stop `cat` after a grace period.
    let mut reader = reader;
    let t0 = std::time::Instant::now();
    while reader.try_wait().unwrap().is_none() && t0.elapsed().as_secs() < 5 {
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    if reader.try_wait().unwrap().is_none() {
        reader.kill().unwrap();
    }
    let got = reader.wait_with_output().unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(is_fifo(&fifo), "the FIFO was replaced");
    let report: serde_json::Value = serde_json::from_slice(&got.stdout).expect("report via FIFO");
    assert_eq!(report["layers"].as_array().unwrap().len(), 2);

    // A model folder output whose config.json is a FIFO.
    let (md, a2) = model_dir(&dir);
    let od = dir.path("od");
    std::fs::create_dir(&od).unwrap();
    mkfifo(&od.join("config.json"));
    refused(
        &dir,
        &["prune", s(&md), "--activations", s(&a2), "--sparsity", "0.5", "-o", s(&od), "-q"],
        2,
        &["config.json", "not a regular file"],
    );
}

#[test]
fn no_output_replaces_an_input() {
    let dir = Scratch::new("hostile-inputs");
    let (md, a) = model_dir(&dir);
    let (md, a) = (s(&md).to_string(), s(&a).to_string());
    // The activations sit where the model folder's copy of config.json
    // would go.
    let od = dir.path("od");
    std::fs::create_dir(&od).unwrap();
    let acts = od.join("config.json");
    std::fs::copy(&a, &acts).unwrap();
    refused(
        &dir,
        &["prune", &md, "--activations", s(&acts), "--sparsity", "0.5", "-o", s(&od), "-q"],
        2,
        &["-o", "config.json", "input"],
    );
    // Two outputs on one path: the report where the model's config goes.
    let od2 = dir.path("od2");
    refused(
        &dir,
        &[
            "prune",
            &md,
            "--activations",
            &a,
            "--sparsity",
            "0.5",
            "-o",
            s(&od2),
            "--report",
            s(&od2.join("config.json")),
            "-q",
        ],
        2,
        &["--report", "config.json"],
    );
    // A kept model of compare may not replace the activations either.
    let cdir = dir.path("c");
    let kept = cdir.join("models/l0-0.5");
    std::fs::create_dir_all(&kept).unwrap();
    std::fs::copy(&a, kept.join("config.json")).unwrap();
    refused(
        &dir,
        &[
            "compare",
            &md,
            "--activations",
            s(&kept.join("config.json")),
            "--sparsities",
            "0.5",
            "--methods",
            "l0",
            "--out-dir",
            s(&cdir),
            "--keep-models",
        ],
        2,
        &["config.json", "input"],
    );
}

#[test]
fn output_problems_are_found_before_any_work_and_failures_leave_nothing() {
    let dir = Scratch::new("hostile-early");
    let (m, a) = small_model(&dir);
    let (m, a) = (s(&m).to_string(), s(&a).to_string());
    let out = dir.path("out.safetensors");
    let nodir = dir.path("nodir");
    for (args, needles) in [
        (
            vec!["-o", s(&out), "--report", s(&nodir.join("r.json"))],
            vec!["--report", "nodir", "does not exist"],
        ),
        (vec!["-o", s(&nodir.join("o.safetensors"))], vec!["-o", "nodir"]),
        (vec!["-o", "/proc/nope/out"], vec!["-o", "/proc/nope/out"]),
        (vec!["-o", s(&out), "--trace", "/proc/nope.txt"], vec!["--trace", "/proc/nope.txt"]),
    ] {
        let mut v = vec!["prune", &m, "--activations", &a, "--sparsity", "0.5", "-q"];
        v.extend(args);
        refused(&dir, &v, 2, &needles);
    }
    let p = dir.path("p.safetensors");
    let ok = lopper(&["prune", &m, "--activations", &a, "--sparsity", "0.5", "-o", s(&p), "-q"]);
    assert!(ok.status.success(), "{}", stderr(&ok));
    refused(&dir, &["pack", s(&p), "-o", s(&nodir.join("m.sprig"))], 2, &["-o", "nodir"]);
    refused(
        &dir,
        &["compare", &m, "--activations", &a, "--out-dir", s(&nodir.join("c"))],
        2,
        &["--out-dir", "nodir"],
    );

    // A failure while writing (the report goes to /dev/full) leaves no
    // model, no temporary, no new folder.
    let full = dir.path("full");
    std::os::unix::fs::symlink("/dev/full", &full).unwrap();
    refused(
        &dir,
        &["prune", &m, "--activations", &a, "--sparsity", "0.5", "-o", s(&out), "--report"]
            .into_iter()
            .chain([s(&full), "-q"])
            .collect::<Vec<_>>(),
        1,
        &["--report", "full"],
    );
    let (md, a2) = model_dir(&dir);
    refused(
        &dir,
        &[
            "prune",
            s(&md),
            "--activations",
            s(&a2),
            "--sparsity",
            "0.5",
            "-o",
            s(&dir.path("newdir")),
            "--trace",
            s(&full),
            "-q",
        ],
        1,
        &["--trace", "full"],
    );
    assert!(is_link(&full));
}

#[test]
fn a_model_folder_is_copied_whole() {
    let dir = Scratch::new("hostile-tree");
    let (md, a) = model_dir(&dir);
    std::fs::create_dir_all(md.join("2_Dense/deeper")).unwrap();
    std::fs::write(md.join("2_Dense/deeper/notes.txt"), "kept\n").unwrap();
    // A link to a folder outside the tree is not followed; a FIFO is skipped.
    let outside = dir.path("outside");
    std::fs::create_dir(&outside).unwrap();
    std::fs::write(outside.join("secret.txt"), "not part of the model\n").unwrap();
    std::os::unix::fs::symlink(&outside, md.join("linked")).unwrap();
    mkfifo(&md.join("1_Pooling/pipe"));
    let od = dir.path("od");
    let o = lopper(&["prune", s(&md), "--activations", s(&a), "--sparsity", "0.5", "-o", s(&od)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(
        tree(&od),
        [
            "1_Pooling",
            "1_Pooling/config.json",
            "2_Dense",
            "2_Dense/deeper",
            "2_Dense/deeper/notes.txt",
            "config.json",
            "model.safetensors"
        ]
    );
    for f in ["1_Pooling/config.json", "2_Dense/deeper/notes.txt", "config.json"] {
        assert_eq!(std::fs::read(od.join(f)).unwrap(), std::fs::read(md.join(f)).unwrap(), "{f}");
    }
    let err = stderr(&o);
    assert!(err.contains("note:") && err.contains("pipe") && err.contains("linked"), "{err}");
    // Writing into the existing folder again: same tree, no temporaries.
    let o = lopper(&["prune", s(&md), "--activations", s(&a), "--sparsity", "0.7", "-o", s(&od)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(tree(&od).len(), 7, "{:?}", tree(&od));
}
