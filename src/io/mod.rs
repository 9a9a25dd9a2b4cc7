//! Reading and writing models stored as safetensors.
//!
//! Contents:
//! - [`TensorFile`] (`file.rs`): one mmapped `.safetensors` file. The whole
//!   header is validated with checked arithmetic on open, before any tensor
//!   byte is touched; tensors are then read one at a time as raw bytes, `f64`
//!   or `f32` (F32 borrowed in place from the mmap when aligned).
//! - [`Model`] (`model.rs`): a single file, a shard set described by a
//!   `*.safetensors.index.json`, or a directory holding either plus other
//!   files (`config.json`, `tokenizer.json`, …). Tensor names are routed to
//!   their shard.
//! - [`write_model`] and [`write_atomic`] (`write.rs`): write a pruned model
//!   mirroring the input layout. Untouched tensors are copied byte for byte;
//!   every file goes to a temp file in the target folder, is fsynced and then
//!   renamed, so a crash never leaves a half-written file and an mmapped input
//!   is never truncated. Writing over an input is refused.
//! - [`read_pack`] and [`write_pack`] (`pack.rs`): the `.sprig` file of
//!   sparse layers written by `lopper pack` (docs/pack-format.md).
//! - [`dtype`]: dtype names, little-endian decoding, round-to-nearest-even
//!   encoding from `f64`.
//!
//! Errors: [`LoadError`] for everything that reads, [`WriteError`] for
//! everything that writes. Both are a struct with a `#[non_exhaustive]` kind
//! read through `kind()`; `Display` is one lower-case line that names the file
//! and, where relevant, the tensor, e.g.
//! `model.safetensors: tensor 'encoder.0.weight': contains NaN at index 17`.
//! The message already includes the text of any underlying `std::io::Error`
//! (so `source()` is `None` and a printed chain does not repeat it); the
//! error itself is available through `io_error()`.

pub mod dtype;
mod file;
mod model;
mod pack;
mod stream;
mod write;

use std::fmt;
use std::path::{Path, PathBuf};

pub use file::{TensorFile, TensorInfo};

/// Refuse a path that exists but is not a regular file or a folder: a FIFO,
/// socket or device could block a read forever or never end. A missing
/// path passes (the open that follows names it).
///
/// # Errors
/// [`LoadErrorKind::Io`] naming the path.
pub fn check_regular(path: &Path) -> Result<(), LoadError> {
    match std::fs::metadata(path) {
        Ok(m) if !m.is_file() && !m.is_dir() => Err(LoadError::new(
            path,
            LoadErrorKind::Io,
            "is not a regular file (a FIFO, socket or device); lopper reads only regular files",
        )),
        _ => Ok(()),
    }
}

/// In-memory entry points of the readers, for the fuzz targets
/// (`tests/fuzz.rs`, `benches/fuzz.rs`): each parses and validates `bytes`
/// as if read from `path` and returns the number of entries.
#[doc(hidden)]
pub mod fuzz {
    use super::LoadError;
    use std::path::Path;

    /// A `.safetensors` file: header length, header JSON and layout.
    pub fn safetensors(path: &Path, bytes: &[u8]) -> Result<usize, LoadError> {
        super::file::parse_bytes(path, bytes)
    }

    /// A `*.safetensors.index.json` shard index.
    pub fn shard_index(path: &Path, bytes: &[u8]) -> Result<usize, LoadError> {
        super::model::parse_index(path, bytes).map(|m| m.len())
    }

    /// A `.sprig` pack.
    pub fn sprig(path: &Path, bytes: &[u8]) -> Result<usize, LoadError> {
        super::pack::parse(path, bytes).map(|l| l.len())
    }
}

/// `text` with control characters (newlines, escapes, NUL, …) written as
/// `\u{..}` escapes, for printing names that come from input files (a
/// tensor name may hold any UTF-8): messages stay one line and a terminal
/// never receives raw control bytes.
pub fn escape(text: &str) -> std::borrow::Cow<'_, str> {
    if !text.chars().any(char::is_control) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        if c.is_control() {
            out.push_str(&format!("\\u{{{:x}}}", c as u32));
        } else {
            out.push(c);
        }
    }
    std::borrow::Cow::Owned(out)
}
pub use model::{Layout, Model};
pub use pack::{read_pack, write_pack, PackedLayer, SPRIG_MAGIC, SPRIG_VERSION};
pub use safetensors::Dtype;
pub use stream::StreamedModel;
pub use write::{
    canonical_target, file_kind, folder_of, in_system_dir, is_stream, model_targets,
    remove_temporaries, stage_model, write_atomic, write_model, write_model_edited, Edits, Staged,
};

/// The accessors and the one-line `Display` (`path: tensor 'name': detail`)
/// that [`LoadError`] and [`WriteError`] share: both name a file, maybe a
/// tensor, and say what went wrong.
macro_rules! located_error {
    ($error:ident, $kind:ident, $path_doc:literal) => {
        impl $error {
            pub(crate) fn tensor(mut self, name: &str) -> Self {
                self.tensor = Some(name.to_owned());
                self
            }

            /// What went wrong.
            pub fn kind(&self) -> $kind {
                self.kind
            }

            #[doc = $path_doc]
            pub fn path(&self) -> &Path {
                &self.path
            }

            /// The tensor the error is about, if any.
            pub fn tensor_name(&self) -> Option<&str> {
                self.tensor.as_deref()
            }
        }

        impl fmt::Display for $error {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                write!(f, "{}: ", self.path.display())?;
                if let Some(t) = &self.tensor {
                    write!(f, "tensor '{t}': ")?;
                }
                f.write_str(&self.detail)
            }
        }

        impl std::error::Error for $error {}
    };
}

/// What went wrong while reading a file or model.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum LoadErrorKind {
    /// The file or directory does not exist.
    NotFound,
    /// The operating system refused to open, map or list it (see
    /// [`LoadError::io_error`]).
    Io,
    /// The file ends before its header, or before the data the header
    /// describes.
    Truncated,
    /// The header is not UTF-8 JSON.
    HeaderNotJson,
    /// The header is JSON but not a safetensors header (wrong structure,
    /// field types or size).
    BadHeader,
    /// A tensor has a dtype the format does not define.
    UnknownDtype,
    /// A tensor's shape × dtype size differs from its byte length.
    ShapeMismatch,
    /// A tensor's data offsets lie outside the data section.
    OffsetsOutOfBounds,
    /// Tensors overlap, leave a gap, or a tensor ends before it starts.
    OffsetsOutOfOrder,
    /// The data section holds bytes after the last tensor.
    TrailingData,
    /// A tensor holds NaN or ±infinity at this flat row-major index.
    NonFinite {
        /// Flat row-major index of the first offending element.
        index: usize,
    },
    /// The tensor's dtype cannot be read this way (e.g. an integer tensor read
    /// as floating point).
    UnsupportedDtype,
    /// No tensor of that name.
    NoSuchTensor,
    /// A row range outside the tensor, or a row read of a tensor that is not
    /// 2-D.
    BadRange,
    /// The shard index is not JSON, has no `weight_map`, or is inconsistent
    /// with its shards.
    BadIndex,
    /// The index names a shard file that does not exist.
    MissingShard,
    /// The index names a tensor that its shard does not hold.
    MissingTensor,
    /// Two shards hold a tensor of the same name.
    DuplicateTensor,
    /// A directory holds no model, or more than one.
    NoModel,
    /// A packed (`.sprig`) layer's data breaks the layout's rules (offsets,
    /// indices, padding); see docs/pack-format.md.
    InvalidPackedLayer,
}

/// An error while reading a file or model; names the file and, where
/// relevant, the tensor.
#[derive(Debug)]
pub struct LoadError {
    path: PathBuf,
    tensor: Option<String>,
    kind: LoadErrorKind,
    detail: String,
    source: Option<std::io::Error>,
}

impl LoadError {
    pub(crate) fn new(path: &Path, kind: LoadErrorKind, detail: impl Into<String>) -> Self {
        LoadError { path: path.to_owned(), tensor: None, kind, detail: detail.into(), source: None }
    }

    pub(crate) fn io(path: &Path, what: &str, err: std::io::Error) -> Self {
        if err.kind() == std::io::ErrorKind::NotFound {
            return LoadError::new(path, LoadErrorKind::NotFound, "no such file or directory");
        }
        let mut e = LoadError::new(path, LoadErrorKind::Io, format!("cannot {what}: {err}"));
        e.source = Some(err);
        e
    }

    /// The operating-system error behind an [`LoadErrorKind::Io`] error.
    pub fn io_error(&self) -> Option<&std::io::Error> {
        self.source.as_ref()
    }
}

located_error!(LoadError, LoadErrorKind, "The file (or index, or directory) the error is about.");

/// What went wrong while writing a model.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum WriteErrorKind {
    /// An output path is one of the model's input files (or its directory).
    WouldOverwriteInput,
    /// The output path has the wrong kind (a directory where a file is
    /// needed, or the reverse).
    BadOutput,
    /// The operating system refused to create, write, sync or rename.
    Io,
    /// Reading an input while writing failed (see [`WriteError::load_error`]).
    Load,
    /// A replacement names a tensor the model does not hold.
    NoSuchTensor,
    /// A replacement has a different number of values than the tensor.
    ShapeMismatch,
    /// A replacement targets a tensor whose dtype lopper does not encode.
    UnsupportedDtype,
    /// A replacement value is NaN, infinite, or overflows the tensor's dtype.
    NotRepresentable {
        /// Flat row-major index of the first offending value.
        index: usize,
    },
}

/// An error while writing a model; names the output file and, where
/// relevant, the tensor.
#[derive(Debug)]
pub struct WriteError {
    path: PathBuf,
    tensor: Option<String>,
    kind: WriteErrorKind,
    detail: String,
    io: Option<std::io::Error>,
    load: Option<Box<LoadError>>,
}

impl WriteError {
    pub(crate) fn new(path: &Path, kind: WriteErrorKind, detail: impl Into<String>) -> Self {
        WriteError {
            path: path.to_owned(),
            tensor: None,
            kind,
            detail: detail.into(),
            io: None,
            load: None,
        }
    }

    pub(crate) fn io(path: &Path, what: &str, err: std::io::Error) -> Self {
        let mut e = WriteError::new(path, WriteErrorKind::Io, format!("cannot {what}: {err}"));
        e.io = Some(err);
        e
    }

    pub(crate) fn load(path: &Path, err: LoadError) -> Self {
        let mut e = WriteError::new(path, WriteErrorKind::Load, format!("reading input: {err}"));
        e.load = Some(Box::new(err));
        e
    }

    /// The operating-system error behind an [`WriteErrorKind::Io`] error.
    pub fn io_error(&self) -> Option<&std::io::Error> {
        self.io.as_ref()
    }

    /// The read error behind a [`WriteErrorKind::Load`] error.
    pub fn load_error(&self) -> Option<&LoadError> {
        self.load.as_deref()
    }
}

located_error!(WriteError, WriteErrorKind, "The output path the error is about.");

/// Scratch directories for tests: a fresh folder under the system temp dir,
/// removed on drop.
#[cfg(test)]
pub(crate) mod testdir {
    use std::path::{Path, PathBuf};
    use std::sync::atomic::{AtomicUsize, Ordering};

    pub(crate) struct TestDir(PathBuf);

    impl TestDir {
        pub(crate) fn new(tag: &str) -> Self {
            static N: AtomicUsize = AtomicUsize::new(0);
            let n = N.fetch_add(1, Ordering::Relaxed);
            let dir =
                std::env::temp_dir().join(format!("lopper-io-{tag}-{}-{n}", std::process::id()));
            let _ = std::fs::remove_dir_all(&dir);
            std::fs::create_dir_all(&dir).unwrap();
            TestDir(dir)
        }

        pub(crate) fn path(&self) -> &Path {
            &self.0
        }

        pub(crate) fn join(&self, name: &str) -> PathBuf {
            self.0.join(name)
        }

        /// Sorted file names in `dir`.
        pub(crate) fn list(dir: &Path) -> Vec<String> {
            let mut v: Vec<String> = std::fs::read_dir(dir)
                .unwrap()
                .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
                .collect();
            v.sort();
            v
        }
    }

    impl Drop for TestDir {
        fn drop(&mut self) {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn display_is_one_line_naming_file_and_tensor() {
        let e = LoadError::new(
            Path::new("model.safetensors"),
            LoadErrorKind::NonFinite { index: 17 },
            "contains NaN at index 17",
        )
        .tensor("encoder.0.weight");
        assert_eq!(
            e.to_string(),
            "model.safetensors: tensor 'encoder.0.weight': contains NaN at index 17"
        );
        assert_eq!(e.kind(), LoadErrorKind::NonFinite { index: 17 });
        assert_eq!(e.tensor_name(), Some("encoder.0.weight"));
    }

    #[test]
    fn io_not_found_maps_to_its_own_kind() {
        let err = std::io::Error::from(std::io::ErrorKind::NotFound);
        let e = LoadError::io(Path::new("x.safetensors"), "open", err);
        assert_eq!(e.kind(), LoadErrorKind::NotFound);
        let err = std::io::Error::from(std::io::ErrorKind::PermissionDenied);
        let e = LoadError::io(Path::new("x.safetensors"), "open", err);
        assert_eq!(e.kind(), LoadErrorKind::Io);
        assert_eq!(e.io_error().map(|e| e.kind()), Some(std::io::ErrorKind::PermissionDenied));
        assert!(e.to_string().starts_with("x.safetensors: cannot open: "), "{e}");
    }
}
