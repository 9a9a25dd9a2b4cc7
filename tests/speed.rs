//! End-to-end tests of `lopper speed` and `lopper pack` on models pruned by
//! `lopper prune`: one timing entry per pruned layer, the `.sprig` round
//! trip against the dense-with-zeros file, and bad input (one-line message
//! naming the culprit, exit code 2, no output file).

mod common;
use common::*;

use lopper::io::{read_pack, TensorFile};
use std::path::{Path, PathBuf};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// A model with two prunable layers (one wider than 64 inputs) and tensors
/// the default rule leaves alone, plus activations for the two layers.
fn model(dir: &Scratch) -> (PathBuf, PathBuf) {
    let model = dir.path("model.safetensors");
    write_st(
        &model,
        &[
            f32s("embed.weight", &[10, 96], &values(960, 1)),
            f32s("enc.0.weight", &[64, 96], &values(64 * 96, 2)),
            f32s("enc.0.bias", &[64], &values(64, 3)),
            f32s("enc.1.weight", &[40, 64], &values(40 * 64, 4)),
            f32s("head.weight", &[2, 40], &values(80, 5)),
        ],
    );
    let acts = dir.path("acts.safetensors");
    write_st(
        &acts,
        &[
            f32s("enc.0.weight", &[120, 96], &values(120 * 96, 6)),
            f32s("enc.1.weight", &[120, 64], &values(120 * 64, 7)),
        ],
    );
    (model, acts)
}

/// `lopper prune` with the magnitude method and `target` flags.
fn pruned(dir: &Scratch, target: &[&str], name: &str) -> PathBuf {
    let (model, acts) = model(dir);
    let out = dir.path(name);
    let mut args = vec!["prune", s(&model), "--activations", s(&acts), "--method", "magnitude"];
    args.extend_from_slice(target);
    args.extend_from_slice(&["-o", s(&out), "--quiet"]);
    let o = lopper(&args);
    assert!(o.status.success(), "{}", stderr(&o));
    out
}

#[test]
fn speed_json_has_one_entry_per_pruned_layer() {
    let dir = Scratch::new("speed-json");
    let out = pruned(&dir, &["--sparsity", "0.9"], "p.safetensors");
    let o = lopper(&["speed", s(&out), "--json", "--batch", "1,4", "--min-time", "0.01"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    let layers = v["layers"].as_array().unwrap();
    let names: Vec<&str> = layers.iter().map(|l| l["name"].as_str().unwrap()).collect();
    assert_eq!(names, ["enc.0.weight", "enc.1.weight"]);
    for l in layers {
        let (d_out, d_in) = (l["shape"][0].as_u64().unwrap(), l["shape"][1].as_u64().unwrap());
        assert_eq!(l["dense_bytes"].as_u64().unwrap(), 4 * d_out * d_in);
        // 90% per row: round(0.1 · d_in) nonzeros per row, 6 bytes each
        // (f32 value, u16 column) plus 4-byte row offsets.
        let kept = d_out * ((d_in as f64 * 0.1).round() as u64);
        assert_eq!(l["sparse_bytes"].as_u64().unwrap(), 6 * kept + 4 * (d_out + 1));
        assert_eq!(l["layout"], "rows");
        assert_eq!(l["index_bits"], 16);
        assert!((l["zero_fraction"].as_f64().unwrap() - 0.9).abs() < 0.02);
        let t = l["timings"].as_array().unwrap();
        assert_eq!(t.iter().map(|t| t["batch"].as_u64().unwrap()).collect::<Vec<_>>(), [1, 4]);
        for t in t {
            let (d, sp) =
                (t["dense_seconds"].as_f64().unwrap(), t["sparse_seconds"].as_f64().unwrap());
            assert!(d > 0.0 && sp > 0.0, "{t}");
            assert!((t["speedup"].as_f64().unwrap() - d / sp).abs() < 1e-9 * d / sp);
        }
    }
    let total = &v["totals"];
    assert_eq!(total["layers"], 2);
    let sum = |k: &str| layers.iter().map(|l| l[k].as_u64().unwrap()).sum::<u64>();
    assert_eq!(total["dense_bytes"].as_u64().unwrap(), sum("dense_bytes"));
    assert_eq!(total["sparse_bytes"].as_u64().unwrap(), sum("sparse_bytes"));
    let d0: f64 = layers.iter().map(|l| l["timings"][0]["dense_seconds"].as_f64().unwrap()).sum();
    assert!((total["timings"][0]["dense_seconds"].as_f64().unwrap() - d0).abs() <= 1e-12);

    // The table: a row per layer, a total row.
    let o = lopper(&["speed", s(&out), "--batch", "2", "--min-time", "0.01", "--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let text = stdout(&o);
    assert!(text.contains("batch 2"), "{text}");
    assert_eq!(text.lines().filter(|l| l.starts_with("enc.")).count(), 2, "{text}");
    assert!(text.lines().any(|l| l.starts_with("all 2 layers")), "{text}");
    assert!(stderr(&o).is_empty(), "--quiet: {}", stderr(&o));
}

#[test]
fn two_of_four_is_timed_and_packed_as_groups() {
    let dir = Scratch::new("speed-nm");
    let out = pruned(&dir, &["--pattern", "2:4"], "p.safetensors");
    let o = lopper(&["speed", s(&out), "--json", "--batch", "1", "--min-time", "0.01", "-q"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    for l in v["layers"].as_array().unwrap() {
        assert_eq!(l["layout"], "2:4", "{l}");
        assert_eq!(l["index_bits"], 4);
        let (d_out, d_in) = (l["shape"][0].as_u64().unwrap(), l["shape"][1].as_u64().unwrap());
        // Half the values plus one byte of positions per group of 4.
        assert_eq!(l["sparse_bytes"].as_u64().unwrap(), 2 * d_out * d_in + d_out * d_in / 4);
    }
    let packed = dir.path("p.sprig");
    let o = lopper(&["pack", s(&out), "-o", s(&packed), "-q"]);
    assert!(o.status.success(), "{}", stderr(&o));
    round_trip_matches(&out, &packed, "2:4");
}

/// Every packed layer read back equals the dense-with-zeros tensor, and
/// every other tensor is absent.
fn round_trip_matches(dense: &Path, packed: &Path, layout: &str) {
    let layers = read_pack(packed).unwrap();
    let names: Vec<&str> = layers.iter().map(|l| l.name.as_str()).collect();
    assert_eq!(names, ["enc.0.weight", "enc.1.weight"]);
    let file = TensorFile::open(dense).unwrap();
    for l in &layers {
        assert_eq!(l.weight.layout().to_string(), layout);
        assert_eq!(l.weight.to_dense(), file.read_f32(&l.name).unwrap().into_owned(), "{}", l.name);
        let info = file.get(&l.name).unwrap();
        assert_eq!([l.weight.shape().0, l.weight.shape().1], [info.shape[0], info.shape[1]]);
    }
}

#[test]
fn pack_round_trip_and_summary() {
    let dir = Scratch::new("pack");
    let out = pruned(&dir, &["--sparsity", "0.7"], "p.safetensors");
    let before = std::fs::read(&out).unwrap();
    let packed = dir.path("p.sprig");
    let o = lopper(&["pack", s(&out), "-o", s(&packed)]);
    assert!(o.status.success(), "{}", stderr(&o));
    round_trip_matches(&out, &packed, "rows");
    let text = stdout(&o);
    assert!(
        text.contains("2 layers:") && text.contains(&format!("wrote {}", s(&packed))),
        "{text}"
    );
    // The dense file is untouched, and nothing else appeared.
    assert_eq!(std::fs::read(&out).unwrap(), before);
    assert_eq!(dir.files(), ["acts.safetensors", "model.safetensors", "p.safetensors", "p.sprig"]);
}

#[test]
fn bad_input_is_one_line_exit_2_no_output() {
    let dir = Scratch::new("speed-bad");
    let (model, _) = model(&dir);
    let pruned = pruned(&dir, &["--sparsity", "0.5"], "p.safetensors");
    let sprig = dir.path("x.sprig");
    let missing = dir.path("missing.safetensors");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        // The unpruned model has no zeros in its prunable layers.
        (vec!["speed", s(&model)], "no pruned layer"),
        (vec!["pack", s(&model), "-o", s(&sprig)], "no pruned layer"),
        (vec!["speed", s(&missing)], "missing.safetensors"),
        (vec!["pack", s(&pruned), "-o", s(&pruned)], "refusing to overwrite"),
        (vec!["pack", s(&pruned), "-o", s(&dir.0)], "is a directory"),
        (vec!["speed", s(&pruned), "--batch", "0"], "--batch 0"),
        (vec!["speed", s(&pruned), "--batch", "x"], "--batch"),
        (vec!["speed", s(&pruned), "--min-time", "0"], "--min-time"),
        (vec!["speed", s(&pruned), "--only", "nope.*"], "--only 'nope.*'"),
        (vec!["pack", s(&pruned)], "required arguments"),
    ];
    let before = dir.files();
    for (args, needle) in cases {
        let o = lopper(&args);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
        assert!(err.starts_with("lopper: error: ") && err.contains(needle), "{args:?}: {err}");
        assert_eq!(err.trim_end().lines().count(), 1, "{args:?}: {err}");
        assert!(stdout(&o).is_empty(), "{args:?}");
    }
    assert_eq!(dir.files(), before);
    // A corrupt dense file names the file.
    let bad = dir.path("bad.safetensors");
    std::fs::write(&bad, b"not a safetensors file").unwrap();
    let o = lopper(&["pack", s(&bad), "-o", s(&sprig)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("bad.safetensors"), "{}", stderr(&o));
    assert!(!sprig.exists());
}
