//! Output targets checked before any work: no output may replace a file
//! the command reads, no two outputs may share a path, every output's
//! folder exists and takes new files, and no output replaces a special
//! file (folder, device, FIFO, socket). `--report` and `--trace` may name a
//! character device or FIFO (`/dev/stdout`, a pipe), which is then written
//! into directly instead of replaced.

use crate::error::{Error, Result};
use crate::io::{canonical_target, file_kind, folder_of, Model};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

/// Every file a command on `model` reads: its weight files, the model
/// folder, its `config.json` and `tokenizer.json` when present, and
/// `extra` (calibration data, evaluation text), all canonical.
pub fn input_files(model: &Model, extra: &[&Path]) -> Vec<PathBuf> {
    let mut inputs = model.input_files();
    let root = model.layout().root();
    inputs.push(canonical_target(root));
    let dir = crate::arch::model_dir(model);
    for name in ["config.json", "tokenizer.json"] {
        let p = dir.join(name);
        if p.is_file() {
            inputs.push(canonical_target(&p));
        }
    }
    inputs.extend(extra.iter().map(|p| canonical_target(p)));
    inputs
}

/// Refuse an output (`(flag, path)`) that is one of `inputs`, or that
/// shares its path with an earlier output (unless that path is a character
/// device or FIFO, which both are written into).
///
/// # Errors
/// [`crate::error::ErrorKind::Usage`], naming the flag and path.
pub fn check_distinct(inputs: &[PathBuf], outs: &[(&str, &Path)]) -> Result<()> {
    for (i, (flag, p)) in outs.iter().enumerate() {
        let c = canonical_target(p);
        if inputs.contains(&c) {
            return Err(Error::usage(format!(
                "{flag} {}: refusing to overwrite an input file",
                p.display()
            ))
            .with_path(p));
        }
        // Two outputs may share a character device or FIFO (`/dev/stdout`):
        // both are written into it, not replaced.
        let shared = |q: &Path| canonical_target(q) == c && !crate::io::is_stream(p);
        if let Some((other, _)) = outs[..i].iter().find(|(_, q)| shared(q)) {
            return Err(Error::usage(format!(
                "{flag} {} is the same path as {other}",
                p.display()
            ))
            .with_path(p));
        }
    }
    Ok(())
}

/// How an output file may be written.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Write {
    /// Only as a regular file, replaced by renaming a temporary.
    Replace,
    /// A character device or FIFO is written into directly.
    MayStream,
}

/// Check one output file before any work: an existing target must be a
/// regular file (or, with [`Write::MayStream`], a character device or
/// FIFO), and its folder must exist and take new files.
///
/// # Errors
/// [`crate::error::ErrorKind::Usage`], one line naming `flag` and `path`.
pub fn check_file(flag: &str, path: &Path, how: Write) -> Result<()> {
    use std::os::unix::fs::FileTypeExt;
    let refuse = |what: String| Err(Error::usage(format!("{flag} {}: {what}", path.display())));
    if how == Write::MayStream && crate::io::is_stream(path) {
        return Ok(());
    }
    match std::fs::metadata(path) {
        Ok(m) if m.is_file() => {}
        Ok(m)
            if how == Write::MayStream
                && (m.file_type().is_char_device() || m.file_type().is_fifo()) =>
        {
            return Ok(());
        }
        Ok(m) if m.is_dir() => return refuse("is a folder; give a file name".into()),
        Ok(m) => {
            let hint = if how == Write::MayStream {
                "a character device or FIFO is written into directly, but not this"
            } else {
                "lopper replaces outputs and will not replace it"
            };
            return refuse(format!("is not a regular file ({}); {hint}", file_kind(&m)));
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
        Err(e) => return refuse(format!("cannot check it: {e}")),
    }
    check_folder(flag, path, folder_of(path))
}

/// Check a folder output (a model folder, compare's `--out-dir`): an
/// existing `dir` must be a folder that takes new files; a missing one
/// needs a parent folder that does.
///
/// # Errors
/// [`crate::error::ErrorKind::Usage`], naming `flag` and `dir`.
pub fn check_dir(flag: &str, dir: &Path) -> Result<()> {
    match std::fs::metadata(dir) {
        Ok(m) if m.is_dir() => check_folder(flag, dir, dir),
        Ok(m) => Err(Error::usage(format!(
            "{flag} {}: exists and is not a folder ({})",
            dir.display(),
            file_kind(&m)
        ))),
        Err(_) => check_folder(flag, dir, folder_of(dir)),
    }
}

/// `folder` (where `path` goes) exists and a file can be created in it: a
/// probe file is created and removed at once.
fn check_folder(flag: &str, path: &Path, folder: &Path) -> Result<()> {
    static N: AtomicUsize = AtomicUsize::new(0);
    let refuse = |what: String| Err(Error::usage(format!("{flag} {}: {what}", path.display())));
    if crate::io::in_system_dir(path) {
        return refuse("is under /dev or /proc, where lopper creates and replaces no file".into());
    }
    if !folder.is_dir() {
        return refuse(format!("the folder {} does not exist", folder.display()));
    }
    let probe = folder.join(format!(
        ".lopper-probe-{}-{}",
        std::process::id(),
        N.fetch_add(1, Ordering::Relaxed)
    ));
    match std::fs::OpenOptions::new().write(true).create_new(true).open(&probe) {
        Ok(_) => {
            let _ = std::fs::remove_file(&probe);
            Ok(())
        }
        Err(e) => refuse(format!("cannot create files in {}: {e}", folder.display())),
    }
}

/// Check the pruned model written to `out` (flag `flag`) before any work:
/// its files ([`crate::io::model_targets`]) are not `inputs`, not special
/// files, and their folder takes new files. Returns the files, for
/// [`check_distinct`] against the command's other outputs.
///
/// # Errors
/// [`crate::error::ErrorKind::Usage`], naming the flag and the file.
pub fn check_model_output(
    flag: &str,
    model: &Model,
    out: &Path,
    inputs: &[PathBuf],
) -> Result<Vec<PathBuf>> {
    let (to_dir, files) =
        crate::io::model_targets(model, out).map_err(|e| Error::from(e).context(flag))?;
    if to_dir {
        check_dir(flag, out)?;
        if let crate::io::Layout::Directory { dir, .. } = model.layout() {
            let (o, d) = (canonical_target(out), canonical_target(dir));
            if o.starts_with(&d) {
                return Err(Error::usage(format!(
                    "{flag} {}: is inside the input model folder {}; choose a path outside it",
                    out.display(),
                    dir.display()
                )));
            }
        }
    }
    for f in &files {
        if inputs.contains(&canonical_target(f)) {
            return Err(Error::usage(format!(
                "{flag} {}: would write {}, an input file",
                out.display(),
                f.display()
            ))
            .with_path(f));
        }
        if let Ok(m) = std::fs::metadata(f) {
            if !m.is_file() {
                let which = if f == out { String::new() } else { format!("{} ", f.display()) };
                return Err(Error::usage(format!(
                    "{flag} {}: {which}is not a regular file ({}); lopper will not replace it",
                    out.display(),
                    file_kind(&m)
                ))
                .with_path(f));
            }
        }
        // A subfolder of the output that exists must be a folder.
        let mut d = folder_of(f);
        while d != out && d.starts_with(out) {
            if d.exists() && !d.is_dir() {
                return Err(Error::usage(format!(
                    "{flag} {}: {} exists and is not a folder",
                    out.display(),
                    d.display()
                )));
            }
            d = folder_of(d);
        }
    }
    if !to_dir {
        check_file(flag, out, Write::Replace)?;
    }
    Ok(files)
}

/// One note line per entry of a model folder that is neither read nor
/// copied (links to folders, hidden folders, special files).
pub fn skipped_notes(model: &Model) -> Vec<String> {
    model
        .skipped()
        .iter()
        .map(|(p, why)| format!("note: {} is not copied: {why}", p.display()))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::ErrorKind;

    #[test]
    fn outputs_must_differ_from_inputs_and_each_other() {
        let input = canonical_target(Path::new("Cargo.toml"));
        assert_eq!(input, Path::new("Cargo.toml").canonicalize().unwrap());
        let e = check_distinct(
            std::slice::from_ref(&input),
            &[("--report", Path::new("./Cargo.toml"))],
        )
        .unwrap_err();
        assert_eq!(e.kind(), ErrorKind::Usage);
        assert_eq!(e.to_string(), "--report ./Cargo.toml: refusing to overwrite an input file");
        let e =
            check_distinct(&[], &[("-o", Path::new("a.json")), ("--trace", Path::new("a.json"))])
                .unwrap_err();
        assert_eq!(e.to_string(), "--trace a.json is the same path as -o");
        assert!(check_distinct(&[input], &[("-o", Path::new("new.safetensors"))]).is_ok());
    }
}
