//! Writing a pruned model: atomic file writes and layout mirroring.
//!
//! Entry points: [`write_model`], [`write_atomic`], and [`Staged`] (the
//! outputs of one run, committed together).
//!
//! Output format of every tensor file:
//! - Tensors keep their names, shapes and dtypes and are written in the
//!   input file's data-offset order, contiguously, so an unpruned model is
//!   rewritten with every tensor at its original offset. The header lists
//!   `__metadata__` first (input metadata merged with the caller's, the
//!   caller's winning; keys sorted), then the tensors in that same order.
//! - The header is padded with spaces to a multiple of 8 bytes, so the data
//!   section starts 8-aligned (F32/F64 tensors after it stay aligned when
//!   their offsets are).
//! - Tensors not in `replaced` are copied byte for byte from the input map;
//!   replaced tensors are encoded to their original dtype, rounding to
//!   nearest even (see [`super::dtype`]).
//!
//! Key decisions: every value is validated and encoded, every output path
//! checked, and every header built before the first byte is written; each
//! file is then written by [`write_atomic`] (temp file in the target folder,
//! fsync, rename), which never truncates a file another process, or our own
//! mmap, is reading.

use std::collections::{BTreeMap, HashSet};
use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

use super::dtype::{encode_f64, EncodeError};
use super::{Dtype, Layout, Model, TensorFile, WriteError, WriteErrorKind as K};

/// Write a file atomically: `write` fills a temp file created next to `path`,
/// which is then flushed, fsynced and renamed over `path`. On any error the
/// temp file is removed and `path` is left as it was. A `path` that exists
/// and is not a regular file (a folder, device, FIFO or socket) is refused.
///
/// # Errors
/// [`K::BadOutput`] if `path` has no file name or is not a regular file;
/// [`K::Io`] naming `path` if creating, writing (including errors returned
/// by `write`), syncing or renaming fails.
pub fn write_atomic(
    path: &Path,
    write: impl FnOnce(&mut BufWriter<File>) -> std::io::Result<()>,
) -> Result<(), WriteError> {
    let mut staged = Staged::new();
    staged.file(path, write)?;
    staged.commit().map(|_| ())
}

static COUNTER: AtomicUsize = AtomicUsize::new(0);

/// Temporaries of every uncommitted [`Staged`] set in the process, so a
/// signal handler can remove them ([`remove_temporaries`]). A commit holds
/// the lock while it renames, so a handler sees either all temporaries or
/// none.
static LIVE: std::sync::Mutex<Vec<PathBuf>> = std::sync::Mutex::new(Vec::new());

fn live() -> std::sync::MutexGuard<'static, Vec<PathBuf>> {
    LIVE.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

/// Remove every temporary file and folder of uncommitted [`Staged`] sets;
/// for a Ctrl-C / SIGTERM handler that then exits. Later commits in this
/// process find their temporaries gone and fail.
pub fn remove_temporaries() {
    let mut l = live();
    for p in l.drain(..) {
        if p.is_dir() {
            let _ = std::fs::remove_dir_all(&p);
        } else {
            let _ = std::fs::remove_file(&p);
        }
    }
}

fn unregister(paths: &mut Vec<PathBuf>, items: &[Staging]) {
    paths.retain(|p| {
        !items.iter().any(
            |i| matches!(i, Staging::Temp { tmp, .. } | Staging::Folder { tmp, .. } if tmp == p),
        )
    });
}

/// A hidden name next to `path` for a temporary file or folder.
fn temp_beside(path: &Path) -> Result<PathBuf, WriteError> {
    let Some(name) = path.file_name() else {
        return Err(WriteError::new(path, K::BadOutput, "output path has no file name"));
    };
    Ok(folder_of(path).join(format!(
        ".{}.lopper-tmp-{}-{}",
        name.to_string_lossy(),
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    )))
}

/// The folder `path` is in (`.` for a bare file name).
pub fn folder_of(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Whether `path` is a character device or a FIFO (following links), or
/// an existing file under `/dev` or `/proc` (`/dev/stdout` redirected to a
/// file): an output that is written into directly rather than replaced.
pub fn is_stream(path: &Path) -> bool {
    use std::os::unix::fs::FileTypeExt;
    std::fs::metadata(path).is_ok_and(|m| {
        let t = m.file_type();
        t.is_char_device() || t.is_fifo() || (m.is_file() && in_system_dir(path))
    })
}

/// Whether `path` (as given, or resolved) lies under `/dev` or `/proc`,
/// where lopper never creates or replaces a file.
pub fn in_system_dir(path: &Path) -> bool {
    let sys = |p: &Path| p.starts_with("/dev") || p.starts_with("/proc");
    sys(path) || sys(&canonical_target(path))
}

/// One staged output.
enum Staging {
    /// A complete temp file to rename over `target`.
    Temp { tmp: PathBuf, target: PathBuf },
    /// A new folder built under a hidden name, renamed to `target`.
    Folder { tmp: PathBuf, target: PathBuf },
    /// Bytes written straight into a character device or FIFO.
    Stream { target: PathBuf, bytes: Vec<u8> },
}

/// The outputs of one run, staged and committed together: every file is
/// written completely (flushed and fsynced) to a temporary in its target
/// folder, and a new folder is built under a hidden name beside its
/// target; [`Staged::commit`] then writes any streams and renames
/// everything into place. Dropping an uncommitted set removes every
/// temporary, so a failure leaves nothing new.
#[derive(Default)]
pub struct Staged {
    items: Vec<Staging>,
    /// Final paths, in staging order.
    targets: Vec<PathBuf>,
    committed: bool,
}

impl Staged {
    /// An empty set.
    pub fn new() -> Self {
        Staged::default()
    }

    /// Where a path inside a staged new folder is built, if it is inside one.
    fn mapped(&self, p: &Path) -> Option<PathBuf> {
        self.items.iter().find_map(|i| match i {
            Staging::Folder { tmp, target } => {
                p.strip_prefix(target).ok().map(|rest| tmp.join(rest))
            }
            _ => None,
        })
    }

    /// Make sure folder `dir` will exist after the commit: an existing
    /// folder is used as it is; a missing one is built under a hidden name
    /// (or inside a staged folder) and renamed into place at the commit.
    ///
    /// # Errors
    /// [`K::BadOutput`] if `dir` exists and is not a folder; [`K::Io`] if
    /// the folder cannot be created.
    pub fn folder(&mut self, dir: &Path) -> Result<(), WriteError> {
        if let Some(m) = self.mapped(dir) {
            return std::fs::create_dir_all(&m)
                .map_err(|e| WriteError::io(dir, "create the folder", e));
        }
        match std::fs::metadata(dir) {
            Ok(m) if m.is_dir() => return Ok(()),
            Ok(_) => return Err(WriteError::new(dir, K::BadOutput, "exists and is not a folder")),
            Err(_) => {}
        }
        let parent = folder_of(dir);
        if !parent.is_dir() {
            self.folder(parent)?;
            if let Some(m) = self.mapped(dir) {
                return std::fs::create_dir_all(&m)
                    .map_err(|e| WriteError::io(dir, "create the folder", e));
            }
        }
        let tmp = temp_beside(dir)?;
        let mut l = live();
        std::fs::create_dir(&tmp).map_err(|e| WriteError::io(dir, "create the folder", e))?;
        l.push(tmp.clone());
        self.items.push(Staging::Folder { tmp, target: dir.to_owned() });
        Ok(())
    }

    /// Stage file `path`: `write` fills its temporary, which is flushed and
    /// fsynced. The folder of `path` must exist or be staged.
    ///
    /// # Errors
    /// [`K::BadOutput`] if `path` has no file name or exists and is not a
    /// regular file; [`K::Io`] naming `path` if creating, writing or
    /// syncing fails.
    pub fn file(
        &mut self,
        path: &Path,
        write: impl FnOnce(&mut BufWriter<File>) -> std::io::Result<()>,
    ) -> Result<(), WriteError> {
        let (tmp, file, registered) = self.create(path)?;
        let result = (|| {
            let mut w = BufWriter::new(file);
            write(&mut w).map_err(|e| WriteError::io(path, "write", e))?;
            let file = w.into_inner().map_err(|e| WriteError::io(path, "write", e.into_error()))?;
            file.sync_all().map_err(|e| WriteError::io(path, "sync", e))
        })();
        if let Err(e) = result {
            if registered {
                let item = self.items.pop().expect("registered above");
                unregister(&mut live(), std::slice::from_ref(&item));
            }
            let _ = std::fs::remove_file(&tmp);
            return Err(e);
        }
        self.targets.push(path.to_owned());
        Ok(())
    }

    /// Stage file `path` to be filled by the caller at any offsets (a
    /// model written tensor by tensor): its temporary is created now and
    /// returned open; the caller must sync it before [`Staged::commit`].
    ///
    /// # Errors
    /// As [`Staged::file`].
    pub fn open(&mut self, path: &Path) -> Result<File, WriteError> {
        let (_, file, _) = self.create(path)?;
        self.targets.push(path.to_owned());
        Ok(file)
    }

    /// Create the temporary of `path`, registered for removal; returns it,
    /// the open file, and whether it is an item of its own (not inside a
    /// staged folder).
    fn create(&mut self, path: &Path) -> Result<(PathBuf, File, bool), WriteError> {
        let (tmp, item) = match self.mapped(path) {
            Some(m) => (m, None),
            None => {
                if let Ok(m) = std::fs::metadata(path) {
                    if !m.is_file() {
                        return Err(not_regular(path, &m));
                    }
                }
                if in_system_dir(path) {
                    return Err(WriteError::new(
                        path,
                        K::BadOutput,
                        "is under /dev or /proc, where lopper creates and replaces no file",
                    ));
                }
                let tmp = temp_beside(path)?;
                (tmp.clone(), Some(Staging::Temp { tmp, target: path.to_owned() }))
            }
        };
        let mut l = live();
        let file = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&tmp)
            .map_err(|e| WriteError::io(path, "create a temp file in its folder", e))?;
        // Registered before writing, so a failure removes it.
        let registered = item.is_some();
        if let Some(item) = item {
            l.push(tmp.clone());
            self.items.push(item);
        }
        Ok((tmp, file, registered))
    }

    /// Stage `bytes` for `path`: written straight into it at the commit
    /// when it is a character device or FIFO ([`is_stream`]), else staged
    /// as a file.
    ///
    /// # Errors
    /// As [`Staged::file`].
    pub fn file_or_stream(&mut self, path: &Path, bytes: Vec<u8>) -> Result<(), WriteError> {
        if is_stream(path) {
            self.items.push(Staging::Stream { target: path.to_owned(), bytes });
            self.targets.push(path.to_owned());
            Ok(())
        } else {
            self.file(path, |w| w.write_all(&bytes))
        }
    }

    /// Write the streams, then rename every temporary into place, and
    /// return the final paths in staging order.
    ///
    /// # Errors
    /// [`K::Io`] if a stream cannot be written (nothing is renamed then) or
    /// a rename fails (the temporaries not yet renamed are removed).
    pub fn commit(mut self) -> Result<Vec<PathBuf>, WriteError> {
        for item in &self.items {
            if let Staging::Stream { target, bytes } = item {
                let mut f = OpenOptions::new()
                    .write(true)
                    .open(target)
                    .map_err(|e| WriteError::io(target, "open", e))?;
                f.write_all(bytes)
                    .and_then(|()| f.flush())
                    .map_err(|e| WriteError::io(target, "write", e))?;
            }
        }
        let mut folders = Vec::new();
        let mut l = live();
        let items = std::mem::take(&mut self.items);
        unregister(&mut l, &items);
        let mut rest = items.into_iter();
        while let Some(item) = rest.next() {
            let (tmp, target) = match &item {
                Staging::Temp { tmp, target } | Staging::Folder { tmp, target } => (tmp, target),
                Staging::Stream { .. } => continue,
            };
            if let Err(e) = std::fs::rename(tmp, target) {
                let err = WriteError::io(target, "rename the temp file", e);
                self.items.push(item);
                self.items.extend(rest);
                return Err(err);
            }
            folders.push(folder_of(target).to_owned());
        }
        drop(l);
        self.committed = true;
        // Make the renames durable; not every platform can sync a folder.
        folders.sort();
        folders.dedup();
        for d in folders {
            if let Ok(d) = File::open(d) {
                let _ = d.sync_all();
            }
        }
        Ok(std::mem::take(&mut self.targets))
    }
}

impl Drop for Staged {
    fn drop(&mut self) {
        if self.committed {
            return;
        }
        unregister(&mut live(), &self.items);
        for item in &self.items {
            match item {
                Staging::Temp { tmp, .. } => {
                    let _ = std::fs::remove_file(tmp);
                }
                Staging::Folder { tmp, .. } => {
                    let _ = std::fs::remove_dir_all(tmp);
                }
                Staging::Stream { .. } => {}
            }
        }
    }
}

/// The refusal of an existing output that is not a regular file.
pub(crate) fn not_regular(path: &Path, m: &std::fs::Metadata) -> WriteError {
    WriteError::new(
        path,
        K::BadOutput,
        format!(
            "is not a regular file ({}); lopper replaces outputs and will not replace it",
            file_kind(m)
        ),
    )
}

/// What kind of file `m` describes, in words.
pub fn file_kind(m: &std::fs::Metadata) -> &'static str {
    use std::os::unix::fs::FileTypeExt;
    let t = m.file_type();
    if t.is_dir() {
        "a folder"
    } else if t.is_char_device() {
        "a character device"
    } else if t.is_block_device() {
        "a block device"
    } else if t.is_fifo() {
        "a FIFO"
    } else if t.is_socket() {
        "a socket"
    } else if t.is_file() {
        "a regular file"
    } else {
        "a special file"
    }
}

/// Where a planned output file gets its bytes.
enum Job<'a> {
    /// A tensor file: header bytes, then data parts in order.
    Tensors { header: Vec<u8>, parts: Vec<&'a [u8]> },
    /// A copy of an input file (index, config, tokenizer, …).
    Copy(&'a Path),
    /// New contents (an edited config or index).
    Bytes(Vec<u8>),
}

/// Write a pruned copy of `model` to `out`, mirroring its layout, and return
/// the files written.
///
/// - [`Layout::File`]: `out` is the output file.
/// - [`Layout::Sharded`] or [`Layout::Directory`]: `out` is a directory
///   (created if missing) that receives every shard under its own file name,
///   the index copied unchanged (tensor names, dtypes and shapes, hence
///   `total_size`, are unchanged), and, for a directory, every extra file
///   (`config.json`, …) copied unchanged.
///
/// `replaced` holds row-major values for the pruned tensors, encoded to each
/// tensor's original dtype; every other tensor is copied byte for byte.
/// Tensors are written in the input file's data-offset order, so the output
/// is deterministic and, without replacements, byte-identical to an input
/// whose header lists `__metadata__` first and tensors in offset order.
/// `metadata` is merged into each file's `__metadata__`, winning over the
/// input's values.
///
/// # Errors
/// Checked before anything is written: [`K::NoSuchTensor`],
/// [`K::ShapeMismatch`], [`K::UnsupportedDtype`], [`K::NotRepresentable`]
/// for `replaced`; [`K::WouldOverwriteInput`] if an output file, or the output
/// directory, is one of [`Model::input_files`] (or the input directory);
/// [`K::BadOutput`] if `out` is a directory where a file is needed or the
/// reverse. While writing: [`K::Io`] (files already written stay complete).
pub fn write_model(
    model: &Model,
    out: &Path,
    replaced: &BTreeMap<String, Vec<f64>>,
    metadata: &BTreeMap<String, String>,
) -> Result<Vec<PathBuf>, WriteError> {
    write_model_edited(model, out, &Edits { replaced, ..Edits::default() }, metadata)
}

/// Changes to a model beyond new values of the same shape.
#[derive(Clone, Copy, Debug)]
pub struct Edits<'a> {
    /// Row-major values by tensor name (in the new shape when
    /// `reshaped` has one).
    pub replaced: &'a BTreeMap<String, Vec<f64>>,
    /// New shapes (a structurally smaller model); every reshaped tensor
    /// must be in `replaced`.
    pub reshaped: &'a BTreeMap<String, Vec<usize>>,
    /// New contents of extra files of a model directory, by file name
    /// (e.g. `config.json`).
    pub files: &'a BTreeMap<String, Vec<u8>>,
}

/// No replacement, no new shape, no new file.
static EMPTY_VALUES: BTreeMap<String, Vec<f64>> = BTreeMap::new();
static EMPTY_SHAPES: BTreeMap<String, Vec<usize>> = BTreeMap::new();
static EMPTY_FILES: BTreeMap<String, Vec<u8>> = BTreeMap::new();

impl Default for Edits<'_> {
    fn default() -> Self {
        Edits { replaced: &EMPTY_VALUES, reshaped: &EMPTY_SHAPES, files: &EMPTY_FILES }
    }
}

/// [`write_model`] with [`Edits`]: tensors may change shape (the index's
/// `total_size` is then recomputed) and extra files may get new contents.
///
/// # Errors
/// As [`write_model`]; a reshaped tensor without values is
/// [`K::ShapeMismatch`], and a new file for a model that is not a directory
/// is [`K::BadOutput`].
pub fn write_model_edited(
    model: &Model,
    out: &Path,
    edits: &Edits<'_>,
    metadata: &BTreeMap<String, String>,
) -> Result<Vec<PathBuf>, WriteError> {
    let mut staged = Staged::new();
    stage_model(&mut staged, model, out, edits, metadata)?;
    staged.commit()
}

/// The files a pruned copy of `model` written to `out` consists of, after
/// the checks [`write_model`] makes before writing (outputs that are
/// inputs, the kind of `out`). Returns whether `out` is a folder, and the
/// files.
///
/// # Errors
/// [`K::WouldOverwriteInput`], [`K::BadOutput`].
pub fn model_targets(model: &Model, out: &Path) -> Result<(bool, Vec<PathBuf>), WriteError> {
    model_targets_with(model, out).map(|(d, t)| (d, t.into_iter().map(|(p, _)| p).collect()))
}

/// An output file and the input tensor file it mirrors, if it is one.
pub(crate) type Target<'m> = (PathBuf, Option<&'m TensorFile>);

/// [`model_targets`] with each target's tensor file, if it is one.
pub(crate) fn model_targets_with<'m>(
    model: &'m Model,
    out: &Path,
) -> Result<(bool, Vec<Target<'m>>), WriteError> {
    let (to_dir, targets) = plan_targets(model, out);
    check_outputs(model, out, to_dir, targets.iter().map(|(p, _)| p.as_path()))?;
    let files = targets
        .into_iter()
        .map(|(p, r)| match r {
            Role::Tensors(f) => (p, Some(f)),
            _ => (p, None),
        })
        .collect();
    Ok((to_dir, files))
}

/// What a planned output file is: a tensor file, the index, or another
/// file of a model folder (with its path relative to the folder).
enum Role<'a> {
    Tensors(&'a TensorFile),
    Index(&'a Path),
    Extra(&'a Path, String),
}

/// (target, role) for every output file of `model` written to `out`, and
/// whether `out` is a folder.
fn plan_targets<'m>(model: &'m Model, out: &Path) -> (bool, Vec<(PathBuf, Role<'m>)>) {
    let (to_dir, inner, extra, root) = match model.layout() {
        Layout::File(_) => (false, model.layout(), &[][..], None),
        Layout::Sharded { .. } => (true, model.layout(), &[][..], None),
        Layout::Directory { inner, extra_files, dir, .. } => {
            (true, &**inner, extra_files.as_slice(), Some(dir.as_path()))
        }
    };
    let target = |p: &Path| {
        if to_dir {
            out.join(p.file_name().unwrap_or_default())
        } else {
            out.to_owned()
        }
    };
    let mut plan = Vec::new();
    for f in model.files() {
        plan.push((target(f.path()), Role::Tensors(f)));
    }
    if let Layout::Sharded { index, .. } = inner {
        plan.push((target(index), Role::Index(index)));
    }
    for p in extra {
        let rel = root
            .and_then(|r| p.strip_prefix(r).ok())
            .map_or_else(|| PathBuf::from(p.file_name().unwrap_or_default()), Path::to_owned);
        plan.push((out.join(&rel), Role::Extra(p, rel.to_string_lossy().into_owned())));
    }
    (to_dir, plan)
}

/// Stage a pruned copy of `model` at `out` in `staged` (see
/// [`write_model_edited`]); nothing is in place until the set is committed.
///
/// # Errors
/// As [`write_model_edited`].
pub fn stage_model(
    staged: &mut Staged,
    model: &Model,
    out: &Path,
    edits: &Edits<'_>,
    metadata: &BTreeMap<String, String>,
) -> Result<(), WriteError> {
    stage_files(staged, model, out, edits, metadata, true)
}

/// [`stage_model`], with or without the tensor files (a caller that
/// writes them itself, [`super::stream::StreamedModel`], stages the rest).
pub(crate) fn stage_files(
    staged: &mut Staged,
    model: &Model,
    out: &Path,
    edits: &Edits<'_>,
    metadata: &BTreeMap<String, String>,
    tensors: bool,
) -> Result<(), WriteError> {
    let encoded = encode_replaced(model, out, edits.replaced, edits.reshaped)?;
    if !edits.files.is_empty() && !matches!(model.layout(), Layout::Directory { .. }) {
        return Err(WriteError::new(
            out,
            K::BadOutput,
            "new config files can only be written for a model directory; give MODEL as a directory",
        ));
    }
    let (to_dir, targets) = plan_targets(model, out);
    // Plan: (target path, job) for every output file.
    let mut plan: Vec<(PathBuf, Job<'_>)> = Vec::new();
    let mut data_bytes = 0usize;
    for (path, role) in &targets {
        if let (Role::Tensors(f), true) = (role, tensors) {
            let job = tensor_job(f, &encoded, edits.reshaped, metadata);
            if let Job::Tensors { parts, .. } = &job {
                data_bytes += parts.iter().map(|p| p.len()).sum::<usize>();
            }
            plan.push((path.clone(), job));
        }
    }
    for (path, role) in &targets {
        match role {
            Role::Tensors(_) => {}
            Role::Index(index) => {
                let job = if edits.reshaped.is_empty() {
                    Job::Copy(index)
                } else {
                    Job::Bytes(index_with_total(index, data_bytes)?)
                };
                plan.push((path.clone(), job));
            }
            Role::Extra(p, rel) => match edits.files.get(rel) {
                Some(bytes) => plan.push((path.clone(), Job::Bytes(bytes.clone()))),
                None => plan.push((path.clone(), Job::Copy(p))),
            },
        }
    }
    for name in edits.files.keys() {
        if !targets.iter().any(|(_, r)| matches!(r, Role::Extra(_, rel) if rel == name)) {
            plan.push((out.join(name), Job::Bytes(edits.files[name].clone())));
        }
    }

    check_outputs(model, out, to_dir, plan.iter().map(|(p, _)| p.as_path()))?;

    if to_dir {
        staged.folder(out)?;
    }
    for (path, job) in plan {
        if let (true, Some(parent)) = (to_dir, path.parent()) {
            staged.folder(parent)?;
        }
        match job {
            Job::Tensors { header, parts } => staged.file(&path, |w| {
                w.write_all(&header)?;
                parts.iter().try_for_each(|p| w.write_all(p))
            })?,
            Job::Copy(src) => {
                let mut input = File::open(src)
                    .map_err(|e| WriteError::load(&path, super::LoadError::io(src, "open", e)))?;
                staged.file(&path, |w| std::io::copy(&mut input, w).map(|_| ()))?;
            }
            Job::Bytes(bytes) => staged.file(&path, |w| w.write_all(&bytes))?,
        }
    }
    Ok(())
}

/// The shard index at `index` with `metadata.total_size` set to `total`
/// (the tensors' data bytes); the weight map is unchanged.
fn index_with_total(index: &Path, total: usize) -> Result<Vec<u8>, WriteError> {
    let text = std::fs::read_to_string(index)
        .map_err(|e| WriteError::load(index, super::LoadError::io(index, "read", e)))?;
    let mut json: serde_json::Value = serde_json::from_str(&text).map_err(|e| {
        WriteError::new(index, K::BadOutput, format!("the shard index is not JSON ({e})"))
    })?;
    if let Some(obj) = json.as_object_mut() {
        let meta = obj.entry("metadata").or_insert_with(|| serde_json::json!({}));
        if let Some(m) = meta.as_object_mut() {
            m.insert("total_size".to_string(), serde_json::Value::from(total));
        }
    }
    let mut bytes = serde_json::to_vec_pretty(&json).expect("JSON values serialise");
    bytes.push(b'\n');
    Ok(bytes)
}

/// Validate and encode every replacement to its tensor's dtype.
fn encode_replaced<'a>(
    model: &Model,
    out: &Path,
    replaced: &'a BTreeMap<String, Vec<f64>>,
    reshaped: &BTreeMap<String, Vec<usize>>,
) -> Result<BTreeMap<&'a str, Vec<u8>>, WriteError> {
    if let Some(name) = reshaped.keys().find(|n| !replaced.contains_key(*n)) {
        return Err(WriteError::new(out, K::ShapeMismatch, "a new shape was given without values")
            .tensor(name));
    }
    let mut encoded = BTreeMap::new();
    for (name, values) in replaced {
        let err = |kind, d: String| WriteError::new(out, kind, d).tensor(name);
        let info = model
            .get(name)
            .ok_or_else(|| err(K::NoSuchTensor, "no such tensor in the input model".into()))?;
        let shape = reshaped.get(name).unwrap_or(&info.shape);
        let bytes = encode_checked(out, name, info.dtype, shape, values)?;
        encoded.insert(name.as_str(), bytes);
    }
    Ok(encoded)
}

/// `values` encoded to `dtype`, checked against `shape`: errors name the
/// output `out` and tensor `name`.
pub(super) fn encode_checked(
    out: &Path,
    name: &str,
    dtype: Dtype,
    shape: &[usize],
    values: &[f64],
) -> Result<Vec<u8>, WriteError> {
    let err = |kind, d: String| WriteError::new(out, kind, d).tensor(name);
    let count: usize = shape.iter().product();
    if values.len() != count {
        return Err(err(
            K::ShapeMismatch,
            format!("{} values were given for shape {shape:?} ({count} elements)", values.len()),
        ));
    }
    let mut bytes = Vec::new();
    match encode_f64(dtype, values, &mut bytes) {
        Ok(()) => Ok(bytes),
        Err(EncodeError::Unsupported) => Err(err(
            K::UnsupportedDtype,
            format!("cannot write dtype {dtype}; expected F16, BF16, F32 or F64"),
        )),
        Err(EncodeError::NotRepresentable { index, value }) => Err(err(
            K::NotRepresentable { index },
            format!("value {value} at index {index} is not representable in {dtype}"),
        )),
    }
}

/// The header and the input's data parts, in file order, of tensor file
/// `f` written with `metadata` and every tensor's bytes unchanged in
/// length (same dtypes and shapes): what [`stage_model`] writes, before
/// replacements.
pub(crate) fn tensor_parts<'a>(
    f: &'a TensorFile,
    metadata: &BTreeMap<String, String>,
) -> (Vec<u8>, Vec<&'a [u8]>) {
    static NONE: BTreeMap<&str, Vec<u8>> = BTreeMap::new();
    match tensor_job(f, &NONE, &EMPTY_SHAPES, metadata) {
        Job::Tensors { header, parts } => (header, parts),
        _ => unreachable!("tensor_job gives tensors"),
    }
}

/// The header and data parts of one output tensor file.
fn tensor_job<'a>(
    f: &'a TensorFile,
    encoded: &'a BTreeMap<&str, Vec<u8>>,
    reshaped: &'a BTreeMap<String, Vec<usize>>,
    metadata: &BTreeMap<String, String>,
) -> Job<'a> {
    let mut meta: BTreeMap<&str, &str> = BTreeMap::new();
    if let Some(m) = f.metadata() {
        meta.extend(m.iter().map(|(k, v)| (k.as_str(), v.as_str())));
    }
    meta.extend(metadata.iter().map(|(k, v)| (k.as_str(), v.as_str())));

    let mut tensors = Vec::new();
    let mut parts = Vec::new();
    let mut offset = 0usize;
    for name in f.names_in_file_order() {
        let info = f.get(name).expect("names come from the file");
        let bytes = match encoded.get(name) {
            Some(b) => b.as_slice(),
            None => f.bytes(name).expect("names come from the file"),
        };
        // Cannot overflow: the sum is the input's validated data length.
        let shape = reshaped.get(name).unwrap_or(&info.shape);
        tensors.push((name, info.dtype.to_string(), &shape[..], offset, offset + bytes.len()));
        offset += bytes.len();
        parts.push(bytes);
    }
    Job::Tensors { header: header_bytes(&meta, &tensors), parts }
}

/// A header entry: name, dtype, shape, start, end.
type HeaderEntry<'a> = (&'a str, String, &'a [usize], usize, usize);

/// The 8-byte length prefix and the JSON header padded with spaces to a
/// multiple of 8 bytes.
fn header_bytes(meta: &BTreeMap<&str, &str>, tensors: &[HeaderEntry<'_>]) -> Vec<u8> {
    let q = |s: &str| serde_json::to_string(s).expect("strings always serialize");
    let mut items = Vec::with_capacity(tensors.len() + 1);
    if !meta.is_empty() {
        let kv: Vec<String> = meta.iter().map(|(k, v)| format!("{}:{}", q(k), q(v))).collect();
        items.push(format!("\"__metadata__\":{{{}}}", kv.join(",")));
    }
    for (name, dtype, shape, start, end) in tensors {
        let shape: Vec<String> = shape.iter().map(usize::to_string).collect();
        items.push(format!(
            "{}:{{\"dtype\":\"{dtype}\",\"shape\":[{}],\"data_offsets\":[{start},{end}]}}",
            q(name),
            shape.join(",")
        ));
    }
    let mut json = format!("{{{}}}", items.join(",")).into_bytes();
    json.resize(json.len().next_multiple_of(8), b' ');
    let mut out = (json.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(&json);
    out
}

/// `p` made canonical even if it does not exist yet: the canonical parent
/// joined with the file name (or `p` itself when the parent is missing too,
/// in which case it cannot be an existing input).
pub fn canonical_target(p: &Path) -> PathBuf {
    if let Ok(c) = p.canonicalize() {
        return c;
    }
    match (p.parent(), p.file_name()) {
        (Some(dir), Some(name)) => {
            let dir = if dir.as_os_str().is_empty() { Path::new(".") } else { dir };
            dir.canonicalize().map_or_else(|_| p.to_owned(), |d| d.join(name))
        }
        _ => p.to_owned(),
    }
}

/// Refuse outputs that are inputs; check that `out` has the right kind.
fn check_outputs<'p>(
    model: &Model,
    out: &Path,
    to_dir: bool,
    targets: impl Iterator<Item = &'p Path>,
) -> Result<(), WriteError> {
    let inputs: HashSet<PathBuf> = model.input_files().into_iter().collect();
    let refuse = |p: &Path, what: &str| {
        WriteError::new(
            p,
            K::WouldOverwriteInput,
            format!("{what} of the input model; choose another output path"),
        )
    };
    let out_c = canonical_target(out);
    if inputs.contains(&out_c) {
        return Err(refuse(out, "is an input file"));
    }
    if to_dir {
        let mut dirs: HashSet<PathBuf> =
            inputs.iter().filter_map(|p| p.parent().map(Path::to_owned)).collect();
        if let Layout::Directory { dir, .. } = model.layout() {
            dirs.extend(dir.canonicalize().ok());
        }
        if dirs.contains(&out_c) {
            return Err(refuse(out, "is the directory"));
        }
    }
    for t in targets {
        if inputs.contains(&canonical_target(t)) {
            return Err(refuse(t, "would overwrite an input file"));
        }
    }
    match (to_dir, out.is_dir()) {
        (false, true) => Err(WriteError::new(
            out,
            K::BadOutput,
            "is a directory, but the input is a single file; give an output file path",
        )),
        (true, false) if out.exists() => Err(WriteError::new(
            out,
            K::BadOutput,
            "is not a directory, but the input is sharded or a directory; give a directory path",
        )),
        _ => Ok(()),
    }
}

#[cfg(test)]
#[path = "write_tests.rs"]
mod tests;
