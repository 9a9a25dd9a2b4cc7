//! The one error type above the readers and the solvers.
//!
//! [`Error`] holds a [`ErrorKind`] (whose fault, hence the exit code), a
//! one-line message that names the object at fault (file, tensor, layer or
//! option) and, where a lower layer failed, that layer's error as
//! [`std::error::Error::source`]: [`io::LoadError`], [`io::WriteError`],
//! [`arch::ArchError`] or [`solve::SolveError`], so a library caller can
//! still ask for the path, tensor or diagnostic.
//!
//! Exit codes ([`ErrorKind::exit_code`]) are the same in every command: 2
//! for anything the user can fix in the command line or the input files, 1
//! for a failure on valid input (a solver, the disk, a kernel check).

use crate::{arch, io, solve};
use std::fmt;
use std::path::{Path, PathBuf};

/// Whose fault, and so the exit code.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// An option value or combination is wrong, or an output path would
    /// replace an input (exit code 2).
    Usage,
    /// An input file (model, shard index, activations, text, config,
    /// tokenizer, report) is missing, malformed or does not fit the model
    /// (exit code 2).
    Input,
    /// A selected layer cannot be pruned as asked: its width does not fit
    /// the pattern, or its statistics do not fit in memory (exit code 2).
    Layer,
    /// A solver or forward pass failed on valid input (exit code 1).
    Solve,
    /// Writing an output failed (exit code 1).
    Output,
    /// A sparse kernel disagreed with the dense product: a bug (exit code 1).
    Mismatch,
}

impl ErrorKind {
    /// The process exit code for this kind.
    pub fn exit_code(self) -> i32 {
        match self {
            ErrorKind::Usage | ErrorKind::Input | ErrorKind::Layer => 2,
            ErrorKind::Solve | ErrorKind::Output | ErrorKind::Mismatch => 1,
        }
    }
}

type Source = Box<dyn std::error::Error + Send + Sync + 'static>;

/// A failure of a lopper command or library call: one line naming its
/// object.
#[derive(Debug)]
pub struct Error {
    kind: ErrorKind,
    message: String,
    path: Option<PathBuf>,
    layer: Option<String>,
    source: Option<Source>,
}

/// Result alias for this crate.
pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    /// An error of `kind` with `message` (one line, lower case, naming the
    /// object and, where possible, the fix).
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Self {
        Error { kind, message: message.into(), path: None, layer: None, source: None }
    }

    /// A bad option value or combination.
    pub fn usage(message: impl Into<String>) -> Self {
        Error::new(ErrorKind::Usage, message)
    }

    /// A bad input file.
    pub fn input(message: impl Into<String>) -> Self {
        Error::new(ErrorKind::Input, message)
    }

    /// A layer that cannot be pruned as asked.
    pub fn layer_unfit(layer: &str, message: impl Into<String>) -> Self {
        Error::new(ErrorKind::Layer, message).with_layer(layer)
    }

    /// A failed output.
    pub fn output(path: &Path, message: impl Into<String>) -> Self {
        Error::new(ErrorKind::Output, message).with_path(path)
    }

    /// A solver failure on layer `layer` of shape `[d_out, d_in]`.
    pub fn solve(layer: &str, shape: [usize; 2], e: solve::SolveError) -> Self {
        let kind = match e {
            solve::SolveError::BadPattern { .. } => ErrorKind::Layer,
            _ => ErrorKind::Solve,
        };
        let message = format!("layer '{layer}' [{}, {}]: {e}", shape[0], shape[1]);
        Error::new(kind, message).with_layer(layer).with_source(e)
    }

    /// The same error, charged to `kind` (e.g. a solver failure caused by the
    /// user's `--ridge`).
    pub fn with_kind(mut self, kind: ErrorKind) -> Self {
        self.kind = kind;
        self
    }

    /// Record the file the error is about.
    pub fn with_path(mut self, path: &Path) -> Self {
        self.path = Some(path.to_path_buf());
        self
    }

    /// Record the layer (weight tensor name) the error is about.
    pub fn with_layer(mut self, layer: &str) -> Self {
        self.layer = Some(layer.to_string());
        self
    }

    /// Keep the lower error behind this one.
    pub fn with_source(mut self, e: impl std::error::Error + Send + Sync + 'static) -> Self {
        self.source = Some(Box::new(e));
        self
    }

    /// Prefix the message with where it happened (`"timing l0-0.5"`).
    pub fn context(mut self, what: impl fmt::Display) -> Self {
        self.message = format!("{what}: {}", self.message);
        self
    }

    /// Add `text` to the end of the message.
    pub fn append(mut self, text: &str) -> Self {
        self.message.push_str(text);
        self
    }

    /// Whose fault.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The process exit code ([`ErrorKind::exit_code`]).
    pub fn exit_code(&self) -> i32 {
        self.kind.exit_code()
    }

    /// The file the error is about, if known.
    pub fn path(&self) -> Option<&Path> {
        self.path.as_deref()
    }

    /// The layer (weight tensor name) the error is about, if known.
    pub fn layer(&self) -> Option<&str> {
        self.layer.as_deref()
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        // Names from input files may hold control characters: escape them,
        // so the message stays one line and the terminal sees no raw bytes.
        f.write_str(&io::escape(&self.message))
    }
}

impl std::error::Error for Error {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        self.source.as_deref().map(|e| e as &(dyn std::error::Error + 'static))
    }
}

impl From<io::LoadError> for Error {
    fn from(e: io::LoadError) -> Self {
        let mut out = Error::new(ErrorKind::Input, e.to_string()).with_path(e.path());
        out.layer = e.tensor_name().map(str::to_string);
        out.with_source(e)
    }
}

impl From<io::WriteError> for Error {
    fn from(e: io::WriteError) -> Self {
        let kind = match e.kind() {
            io::WriteErrorKind::WouldOverwriteInput | io::WriteErrorKind::BadOutput => {
                ErrorKind::Usage
            }
            _ => ErrorKind::Output,
        };
        let mut out = Error::new(kind, e.to_string()).with_path(e.path());
        out.layer = e.tensor_name().map(str::to_string);
        out.with_source(e)
    }
}

impl From<arch::ArchError> for Error {
    fn from(e: arch::ArchError) -> Self {
        let kind = match e.kind() {
            arch::ArchErrorKind::Compute => ErrorKind::Solve,
            _ => ErrorKind::Input,
        };
        Error::new(kind, e.to_string()).with_source(e)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::error::Error as _;

    #[test]
    fn exit_codes_follow_the_kind() {
        // The documented table (README "Exit codes"): 2 for the user's
        // fault, 1 for a failure on valid input.
        for (k, code) in [
            (ErrorKind::Usage, 2),
            (ErrorKind::Input, 2),
            (ErrorKind::Layer, 2),
            (ErrorKind::Solve, 1),
            (ErrorKind::Output, 1),
            (ErrorKind::Mismatch, 1),
        ] {
            assert_eq!(k.exit_code(), code, "{k:?}");
        }
    }

    #[test]
    fn lower_errors_stay_reachable() {
        let load = io::LoadError::new(
            Path::new("m.safetensors"),
            io::LoadErrorKind::NoSuchTensor,
            "not found",
        )
        .tensor("fc.weight");
        let e = Error::from(load);
        assert_eq!(e.kind(), ErrorKind::Input);
        assert_eq!(e.path(), Some(Path::new("m.safetensors")));
        assert_eq!(e.layer(), Some("fc.weight"));
        let src = e.source().and_then(|s| s.downcast_ref::<io::LoadError>()).unwrap();
        assert_eq!(src.kind(), io::LoadErrorKind::NoSuchTensor);

        let overwrite = io::WriteError::new(
            Path::new("m.safetensors"),
            io::WriteErrorKind::WouldOverwriteInput,
            "refusing to overwrite an input",
        );
        assert_eq!(Error::from(overwrite).exit_code(), 2);
    }

    #[test]
    fn solver_failures_name_the_layer() {
        let e = Error::solve(
            "fc.weight",
            [4, 8],
            solve::SolveError::BadPattern { reason: "width 8 is not a multiple of 3".into() },
        );
        assert_eq!(e.kind(), ErrorKind::Layer);
        assert_eq!(e.to_string(), "layer 'fc.weight' [4, 8]: width 8 is not a multiple of 3");
        assert!(e.source().is_some());
    }
}
