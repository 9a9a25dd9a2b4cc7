//! Model sources: one file, a shard set, or a directory holding either.
//!
//! Entry point: [`Model::open`], which accepts
//! - a `.safetensors` file;
//! - a `*.json` shard index (`{"weight_map": {tensor: shard file}}`, as
//!   written by `transformers`), whose shards sit next to it;
//! - a directory holding exactly one `*.safetensors.index.json`, or no index
//!   and exactly one `.safetensors` file, plus any other files
//!   (`config.json`, `tokenizer.json`, …), which the writer copies unchanged.
//!
//! Key decisions:
//! - Every shard is opened (and its header validated) up front; tensor names
//!   are then routed to their shard through one sorted map. A name held by
//!   two shards is an error, and so is any disagreement between the index and
//!   the shards, so that a written model cannot silently drop or duplicate a
//!   tensor.
//! - Shard names in the index must be plain file names (no directories, no
//!   `..`): the writer reuses them inside the output directory.
//! - In a directory, `.safetensors` files at the top that the index does
//!   not name are listed in [`Layout::Directory::ignored`] and not copied
//!   (they would be unpruned weights in the output). Subfolders are part of
//!   the model (e.g. a sentence-transformers `1_Pooling/config.json`):
//!   every regular file in them is an extra file, copied unchanged. Links
//!   to files are followed (a Hugging Face cache snapshot is made of them);
//!   links to folders, hidden folders (`.git`, `.cache`) and special files
//!   (FIFOs, devices, sockets) are not, and are listed in
//!   [`Layout::Directory::skipped`].

use std::collections::BTreeMap;
use std::ops::Range;
use std::path::{Component, Path, PathBuf};

use serde_json::Value;

use super::{LoadError, LoadErrorKind as K, TensorFile, TensorInfo};

/// How a model is stored on disk.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Layout {
    /// A single `.safetensors` file.
    File(PathBuf),
    /// Shards listed by a `*.safetensors.index.json`.
    Sharded {
        /// The index file.
        index: PathBuf,
        /// The shard files, sorted by file name.
        shards: Vec<PathBuf>,
    },
    /// A directory holding a [`Layout::File`] or a [`Layout::Sharded`] model.
    Directory {
        /// The directory.
        dir: PathBuf,
        /// The model inside it.
        inner: Box<Layout>,
        /// Other regular files in the directory and its subfolders, sorted,
        /// copied unchanged on write.
        extra_files: Vec<PathBuf>,
        /// Entries neither read nor copied, with the reason: links to
        /// folders, hidden folders, special files.
        skipped: Vec<(PathBuf, &'static str)>,
        /// `.safetensors` files in the directory that the index does not name;
        /// neither read nor copied.
        ignored: Vec<PathBuf>,
    },
}

impl Layout {
    /// The path the model was opened from (file, index or directory).
    pub fn root(&self) -> &Path {
        match self {
            Layout::File(p) => p,
            Layout::Sharded { index, .. } => index,
            Layout::Directory { dir, .. } => dir,
        }
    }
}

/// A model: one or more validated safetensors files with tensor names routed
/// to their file.
#[derive(Debug)]
pub struct Model {
    layout: Layout,
    /// In the order of the layout's file list.
    files: Vec<TensorFile>,
    /// Tensor name → index into `files`.
    names: BTreeMap<String, usize>,
}

impl Model {
    /// Open a model from a file, an index or a directory (see the module
    /// docs).
    ///
    /// # Errors
    /// Any [`TensorFile::open`] error for each shard; [`K::NotFound`];
    /// [`K::NoModel`] for a directory without exactly one model;
    /// [`K::BadIndex`], [`K::MissingShard`], [`K::MissingTensor`],
    /// [`K::DuplicateTensor`] for an inconsistent shard set.
    pub fn open(path: &Path) -> Result<Self, LoadError> {
        super::check_regular(path)?;
        let meta = std::fs::metadata(path).map_err(|e| LoadError::io(path, "open", e))?;
        if meta.is_dir() {
            return open_dir(path);
        }
        if path.extension().is_some_and(|e| e == "json") {
            return open_sharded(path);
        }
        let file = TensorFile::open(path)?;
        let names = file.tensors().iter().map(|t| (t.name.clone(), 0)).collect();
        Ok(Model { layout: Layout::File(path.to_owned()), files: vec![file], names })
    }

    /// A fingerprint of the model's contents as its headers describe them:
    /// 16 hex digits of an FNV-1a hash over every tensor's name, dtype, shape
    /// and byte length, in name order. Two models with the same tensors and
    /// shapes but other file names get the same fingerprint; two different
    /// models stored under the same file name do not.
    pub fn fingerprint(&self) -> String {
        let mut h: u64 = 0xcbf2_9ce4_8422_2325;
        let mut eat = |bytes: &[u8]| {
            for &b in bytes {
                h ^= u64::from(b);
                h = h.wrapping_mul(0x0000_0100_0000_01b3);
            }
        };
        for t in self.tensors() {
            eat(t.name.as_bytes());
            eat(&[0]);
            eat(format!("{:?}", t.dtype).as_bytes());
            for d in &t.shape {
                eat(&(*d as u64).to_le_bytes());
            }
            eat(&[0xff]);
        }
        format!("{h:016x}")
    }

    /// Check every file of the model with [`TensorFile::check_unchanged`].
    ///
    /// # Errors
    /// The first file that changed since it was opened.
    pub fn check_unchanged(&self) -> Result<(), LoadError> {
        self.files.iter().try_for_each(TensorFile::check_unchanged)
    }

    /// How the model is stored.
    pub fn layout(&self) -> &Layout {
        &self.layout
    }

    /// Entries of a model folder that are neither read nor copied, with the
    /// reason (see the module docs); empty for other layouts.
    pub fn skipped(&self) -> &[(PathBuf, &'static str)] {
        match &self.layout {
            Layout::Directory { skipped, .. } => skipped,
            _ => &[],
        }
    }

    /// The tensor files (one, or one per shard sorted by file name).
    pub fn files(&self) -> &[TensorFile] {
        &self.files
    }

    /// Every tensor of every shard, sorted by name.
    pub fn tensors(&self) -> Vec<&TensorInfo> {
        self.names.iter().filter_map(|(n, &i)| self.files[i].get(n)).collect()
    }

    /// The tensor called `name`, if any.
    pub fn get(&self, name: &str) -> Option<&TensorInfo> {
        self.file_of(name)?.get(name)
    }

    /// The file holding `name`, if any.
    pub fn file_of(&self, name: &str) -> Option<&TensorFile> {
        self.names.get(name).map(|&i| &self.files[i])
    }

    fn route(&self, name: &str) -> Result<&TensorFile, LoadError> {
        self.file_of(name).ok_or_else(|| {
            LoadError::new(self.layout.root(), K::NoSuchTensor, "no such tensor in this model")
                .tensor(name)
        })
    }

    /// Raw bytes of `name`; see [`TensorFile::bytes`].
    ///
    /// # Errors
    /// [`K::NoSuchTensor`].
    pub fn bytes(&self, name: &str) -> Result<&[u8], LoadError> {
        self.route(name)?.bytes(name)
    }

    /// Values of `name` as `f64`; see [`TensorFile::read_f64`].
    ///
    /// # Errors
    /// [`K::NoSuchTensor`] and those of [`TensorFile::read_f64`].
    pub fn read_f64(&self, name: &str) -> Result<Vec<f64>, LoadError> {
        self.route(name)?.read_f64(name)
    }

    /// Rows of a 2-D tensor as `f64`; see [`TensorFile::read_rows_f64`].
    ///
    /// # Errors
    /// [`K::NoSuchTensor`] and those of [`TensorFile::read_rows_f64`].
    pub fn read_rows_f64(&self, name: &str, rows: Range<usize>) -> Result<Vec<f64>, LoadError> {
        self.route(name)?.read_rows_f64(name, rows)
    }

    /// Fraction of exact zeros of `name`; see [`TensorFile::zero_fraction`].
    ///
    /// # Errors
    /// [`K::NoSuchTensor`] and those of [`TensorFile::zero_fraction`].
    pub fn zero_fraction(&self, name: &str) -> Result<f64, LoadError> {
        self.route(name)?.zero_fraction(name)
    }

    /// Canonical paths of every file the model reads or the writer copies
    /// (tensor files, index, extra files), sorted; the writer refuses to
    /// write over any of them.
    pub fn input_files(&self) -> Vec<PathBuf> {
        let mut out = Vec::new();
        collect_inputs(&self.layout, &mut out);
        let mut out: Vec<PathBuf> =
            out.into_iter().map(|p| p.canonicalize().unwrap_or_else(|_| p.to_owned())).collect();
        out.sort();
        out.dedup();
        out
    }
}

fn collect_inputs<'a>(layout: &'a Layout, out: &mut Vec<&'a Path>) {
    match layout {
        Layout::File(p) => out.push(p),
        Layout::Sharded { index, shards } => {
            out.push(index);
            out.extend(shards.iter().map(PathBuf::as_path));
        }
        Layout::Directory { inner, extra_files, .. } => {
            collect_inputs(inner, out);
            out.extend(extra_files.iter().map(PathBuf::as_path));
        }
    }
}

fn file_name(p: &Path) -> String {
    p.file_name().map_or_else(String::new, |n| n.to_string_lossy().into_owned())
}

fn open_dir(dir: &Path) -> Result<Model, LoadError> {
    let mut indexes = Vec::new();
    let mut weights = Vec::new();
    let mut extra = Vec::new();
    let mut skipped = Vec::new();
    let entries = std::fs::read_dir(dir).map_err(|e| LoadError::io(dir, "list", e))?;
    for entry in entries {
        let entry = entry.map_err(|e| LoadError::io(dir, "list", e))?;
        let path = entry.path();
        // Follows symlinks (e.g. a Hugging Face cache snapshot).
        let meta = std::fs::metadata(&path).map_err(|e| LoadError::io(&path, "stat", e))?;
        if meta.is_dir() {
            walk_subfolder(&path, &mut extra, &mut skipped)?;
            continue;
        }
        if !meta.is_file() {
            skipped.push((path, "not a regular file"));
            continue;
        }
        let name = file_name(&path);
        if name.ends_with(".safetensors.index.json") {
            indexes.push(path);
        } else if name.ends_with(".safetensors") {
            weights.push(path);
        } else {
            extra.push(path);
        }
    }
    indexes.sort();
    weights.sort();
    extra.sort();
    skipped.sort();
    let no_model = |d: String| LoadError::new(dir, K::NoModel, d);
    let names = |v: &[PathBuf]| v.iter().map(|p| file_name(p)).collect::<Vec<_>>().join(", ");
    let (inner, ignored) = match (indexes.as_slice(), weights.as_slice()) {
        ([index], _) => {
            let m = open_sharded(index)?;
            let used = m.input_files();
            let ignored = weights
                .into_iter()
                .filter(|w| !used.contains(&w.canonicalize().unwrap_or_else(|_| w.clone())))
                .collect();
            (m, ignored)
        }
        ([], [one]) => (Model::open(one)?, Vec::new()),
        ([], []) => {
            return Err(no_model(
                "holds no .safetensors file and no *.safetensors.index.json".into(),
            ))
        }
        ([], many) => {
            return Err(no_model(format!(
                "holds {} .safetensors files ({}) but no *.safetensors.index.json; pass one file \
                 or add an index",
                many.len(),
                names(many)
            )))
        }
        (many, _) => {
            return Err(no_model(format!(
                "holds {} shard indexes ({}); pass one of them",
                many.len(),
                names(many)
            )))
        }
    };
    Ok(Model {
        layout: Layout::Directory {
            dir: dir.to_owned(),
            inner: Box::new(inner.layout),
            extra_files: extra,
            skipped,
            ignored,
        },
        files: inner.files,
        names: inner.names,
    })
}

/// Collect the regular files under the subfolder `sub` of a model folder
/// into `extra`; links to folders, hidden folders and special files go to
/// `skipped`.
fn walk_subfolder(
    sub: &Path,
    extra: &mut Vec<PathBuf>,
    skipped: &mut Vec<(PathBuf, &'static str)>,
) -> Result<(), LoadError> {
    let link = std::fs::symlink_metadata(sub).map_err(|e| LoadError::io(sub, "stat", e))?;
    if link.file_type().is_symlink() {
        skipped.push((sub.to_owned(), "a link to a folder, not followed"));
        return Ok(());
    }
    if file_name(sub).starts_with('.') {
        skipped.push((sub.to_owned(), "a hidden folder"));
        return Ok(());
    }
    let entries = std::fs::read_dir(sub).map_err(|e| LoadError::io(sub, "list", e))?;
    for entry in entries {
        let path = entry.map_err(|e| LoadError::io(sub, "list", e))?.path();
        let meta = std::fs::metadata(&path).map_err(|e| LoadError::io(&path, "stat", e))?;
        if meta.is_dir() {
            walk_subfolder(&path, extra, skipped)?;
        } else if meta.is_file() {
            extra.push(path);
        } else {
            skipped.push((path, "not a regular file"));
        }
    }
    Ok(())
}

/// Parse the index's `weight_map` into tensor → shard file name.
fn read_index(index: &Path) -> Result<BTreeMap<String, String>, LoadError> {
    super::check_regular(index)?;
    let text = std::fs::read(index).map_err(|e| LoadError::io(index, "read", e))?;
    parse_index(index, &text)
}

/// [`read_index`] on the index's bytes.
pub(crate) fn parse_index(
    index: &Path,
    text: &[u8],
) -> Result<BTreeMap<String, String>, LoadError> {
    let bad = |d: String| LoadError::new(index, K::BadIndex, d);
    let root: Value =
        serde_json::from_slice(text).map_err(|e| bad(format!("shard index is not JSON: {e}")))?;
    let Some(Value::Object(map)) = root.get("weight_map") else {
        return Err(bad("shard index has no \"weight_map\" object".into()));
    };
    let mut out = BTreeMap::new();
    for (tensor, shard) in map {
        let Value::String(shard) = shard else {
            return Err(bad(format!("weight_map value of tensor '{tensor}' is not a string")));
        };
        let mut parts = Path::new(shard).components();
        if !matches!((parts.next(), parts.next()), (Some(Component::Normal(_)), None)) {
            return Err(bad(format!(
                "weight_map names shard '{shard}' for tensor '{tensor}', which is not a plain \
                 file name"
            )));
        }
        out.insert(tensor.clone(), shard.clone());
    }
    Ok(out)
}

fn open_sharded(index: &Path) -> Result<Model, LoadError> {
    let map = read_index(index)?;
    let base = index.parent().unwrap_or(Path::new(""));
    let mut shard_names: Vec<&String> = map.values().collect();
    shard_names.sort();
    shard_names.dedup();
    let mut files = Vec::with_capacity(shard_names.len());
    for shard in &shard_names {
        let path = base.join(shard);
        if !path.is_file() {
            return Err(LoadError::new(
                index,
                K::MissingShard,
                format!("weight_map names shard '{shard}', which does not exist next to the index"),
            ));
        }
        files.push(TensorFile::open(&path)?);
    }
    let mut names: BTreeMap<String, usize> = BTreeMap::new();
    for (i, f) in files.iter().enumerate() {
        for t in f.tensors() {
            if let Some(&j) = names.get(&t.name) {
                return Err(LoadError::new(
                    index,
                    K::DuplicateTensor,
                    format!(
                        "shards '{}' and '{}' both hold this tensor",
                        shard_names[j], shard_names[i]
                    ),
                )
                .tensor(&t.name));
            }
            names.insert(t.name.clone(), i);
        }
    }
    for (tensor, shard) in &map {
        let holder = names.get(tensor).map(|&i| shard_names[i]);
        if holder != Some(shard) {
            return Err(LoadError::new(
                index,
                K::MissingTensor,
                format!("weight_map puts this tensor in shard '{shard}', which does not hold it"),
            )
            .tensor(tensor));
        }
    }
    if let Some((tensor, &i)) = names.iter().find(|(t, _)| !map.contains_key(*t)) {
        return Err(LoadError::new(
            index,
            K::BadIndex,
            format!("shard '{}' holds this tensor but weight_map does not list it", shard_names[i]),
        )
        .tensor(tensor));
    }
    let shards = shard_names.iter().map(|s| base.join(s)).collect();
    Ok(Model { layout: Layout::Sharded { index: index.to_owned(), shards }, files, names })
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::io::file::tests::raw;
    use crate::io::testdir::TestDir;

    /// A valid file holding F32 tensors `(name, values)` as 1-D, in order.
    pub(crate) fn f32_file(tensors: &[(&str, &[f32])]) -> Vec<u8> {
        let mut header = String::from("{");
        let mut data = Vec::new();
        for (k, (name, v)) in tensors.iter().enumerate() {
            let start = data.len();
            data.extend(v.iter().flat_map(|x| x.to_le_bytes()));
            if k > 0 {
                header.push(',');
            }
            header.push_str(&format!(
                r#""{name}":{{"dtype":"F32","shape":[{}],"data_offsets":[{start},{}]}}"#,
                v.len(),
                data.len()
            ));
        }
        header.push('}');
        raw(&header, &data)
    }

    /// `dir` with two shards, an index and a config.json.
    pub(crate) fn sharded_dir(dir: &Path) {
        std::fs::write(dir.join("m-1.safetensors"), f32_file(&[("a", &[1.0, 2.0])])).unwrap();
        std::fs::write(dir.join("m-2.safetensors"), f32_file(&[("b", &[3.0]), ("c", &[0.0])]))
            .unwrap();
        std::fs::write(
            dir.join("m.safetensors.index.json"),
            r#"{"metadata":{"total_size":16},"weight_map":{"a":"m-1.safetensors","b":"m-2.safetensors","c":"m-2.safetensors"}}"#,
        )
        .unwrap();
        std::fs::write(dir.join("config.json"), r#"{"hidden_size": 2}"#).unwrap();
    }

    #[test]
    fn opens_a_single_file() {
        let d = TestDir::new("model-file");
        let p = d.join("w.safetensors");
        std::fs::write(&p, f32_file(&[("x", &[1.0, 0.0])])).unwrap();
        let m = Model::open(&p).unwrap();
        assert_eq!(m.layout(), &Layout::File(p.clone()));
        assert_eq!(m.read_f64("x").unwrap(), [1.0, 0.0]);
        assert_eq!(m.zero_fraction("x").unwrap(), 0.5);
        assert_eq!(m.input_files(), [p.canonicalize().unwrap()]);
        let e = m.read_f64("y").unwrap_err();
        assert_eq!(e.kind(), K::NoSuchTensor);
        assert!(e.to_string().contains("w.safetensors: tensor 'y'"), "{e}");
    }

    #[test]
    fn opens_a_sharded_directory() {
        let d = TestDir::new("model-dir");
        sharded_dir(d.path());
        std::fs::write(d.join("stale.safetensors"), f32_file(&[("a", &[9.0])])).unwrap();
        std::fs::create_dir(d.join(".git")).unwrap();
        std::fs::write(d.join(".git/HEAD"), "ref").unwrap();
        let m = Model::open(d.path()).unwrap();
        let names: Vec<_> = m.tensors().iter().map(|t| t.name.as_str()).collect();
        assert_eq!(names, ["a", "b", "c"]);
        assert_eq!(m.read_f64("b").unwrap(), [3.0]);
        assert_eq!(m.file_of("c").unwrap().path(), d.join("m-2.safetensors"));
        assert_eq!(m.bytes("a").unwrap(), [1f32.to_le_bytes(), 2f32.to_le_bytes()].concat());
        let Layout::Directory { inner, extra_files, ignored, skipped, .. } = m.layout() else {
            panic!("expected a directory layout, got {:?}", m.layout());
        };
        assert_eq!(extra_files, &[d.join("config.json")]);
        assert_eq!(skipped, &[(d.join(".git"), "a hidden folder")]);
        assert_eq!(ignored, &[d.join("stale.safetensors")]);
        let Layout::Sharded { shards, .. } = &**inner else { panic!("expected shards") };
        assert_eq!(shards, &[d.join("m-1.safetensors"), d.join("m-2.safetensors")]);
        assert_eq!(m.input_files().len(), 4);
        // Opening the index directly gives the bare shard layout.
        let m = Model::open(&d.join("m.safetensors.index.json")).unwrap();
        assert!(matches!(m.layout(), Layout::Sharded { .. }));
        assert_eq!(m.input_files().len(), 3);
    }

    #[test]
    fn directory_errors() {
        let d = TestDir::new("model-dir-err");
        let e = Model::open(d.path()).unwrap_err();
        assert_eq!(e.kind(), K::NoModel);
        assert!(e.to_string().contains("holds no .safetensors file"), "{e}");
        std::fs::write(d.join("a.safetensors"), f32_file(&[("a", &[1.0])])).unwrap();
        std::fs::write(d.join("b.safetensors"), f32_file(&[("b", &[1.0])])).unwrap();
        let e = Model::open(d.path()).unwrap_err();
        assert_eq!(e.kind(), K::NoModel);
        assert!(e.to_string().contains("(a.safetensors, b.safetensors)"), "{e}");
        let e = Model::open(&d.join("nothing")).unwrap_err();
        assert_eq!(e.kind(), K::NotFound);
        assert!(e.to_string().contains("nothing: no such file"), "{e}");
    }

    /// Write `index` into a sharded dir and return the open error.
    fn index_err(tag: &str, index: &str) -> (TestDir, LoadError) {
        let d = TestDir::new(tag);
        sharded_dir(d.path());
        let p = d.join("m.safetensors.index.json");
        std::fs::write(&p, index).unwrap();
        let e = Model::open(&p).unwrap_err();
        (d, e)
    }

    #[test]
    fn bad_index() {
        let (_d, e) = index_err("idx-json", "{weight_map:");
        assert_eq!(e.kind(), K::BadIndex);
        assert!(e.to_string().contains("m.safetensors.index.json: shard index is not JSON"), "{e}");

        let (_d, e) = index_err("idx-nomap", r#"{"metadata":{}}"#);
        assert_eq!(e.kind(), K::BadIndex);
        assert!(e.to_string().contains("has no \"weight_map\""), "{e}");

        let (_d, e) = index_err("idx-path", r#"{"weight_map":{"a":"../m-1.safetensors"}}"#);
        assert_eq!(e.kind(), K::BadIndex);
        assert!(e.to_string().contains("not a plain file name"), "{e}");

        let (_d, e) = index_err(
            "idx-shard",
            r#"{"weight_map":{"a":"m-1.safetensors","b":"m-9.safetensors"}}"#,
        );
        assert_eq!(e.kind(), K::MissingShard);
        assert!(
            e.to_string().contains("names shard 'm-9.safetensors', which does not exist"),
            "{e}"
        );

        let (_d, e) = index_err(
            "idx-tensor",
            r#"{"weight_map":{"a":"m-1.safetensors","b":"m-2.safetensors","c":"m-2.safetensors","z":"m-2.safetensors"}}"#,
        );
        assert_eq!(e.kind(), K::MissingTensor);
        assert!(
            e.to_string().contains(
                "index.json: tensor 'z': weight_map puts this tensor in shard 'm-2.safetensors'"
            ),
            "{e}"
        );

        let (_d, e) = index_err(
            "idx-unlisted",
            r#"{"weight_map":{"a":"m-1.safetensors","b":"m-2.safetensors"}}"#,
        );
        assert_eq!(e.kind(), K::BadIndex);
        assert!(
            e.to_string().contains("tensor 'c': shard 'm-2.safetensors' holds this tensor"),
            "{e}"
        );
    }

    #[test]
    fn duplicate_tensor_across_shards() {
        let d = TestDir::new("idx-dup");
        sharded_dir(d.path());
        std::fs::write(d.join("m-1.safetensors"), f32_file(&[("a", &[1.0]), ("b", &[2.0])]))
            .unwrap();
        let e = Model::open(d.path()).unwrap_err();
        assert_eq!(e.kind(), K::DuplicateTensor);
        assert!(
            e.to_string().contains(
                "tensor 'b': shards 'm-1.safetensors' and 'm-2.safetensors' both hold this tensor"
            ),
            "{e}"
        );
    }

    #[test]
    fn a_bad_shard_is_named() {
        let d = TestDir::new("idx-badshard");
        sharded_dir(d.path());
        std::fs::write(d.join("m-2.safetensors"), [1u8, 2]).unwrap();
        let e = Model::open(d.path()).unwrap_err();
        assert_eq!(e.kind(), K::Truncated);
        assert_eq!(e.path(), d.join("m-2.safetensors"));
    }
}
