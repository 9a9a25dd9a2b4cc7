//! What a comparison keeps while it runs: parked weights of solved layers
//! until their run has every layer, the checkpoint files rewritten as
//! solves finish, and the stop request shared with a signal handler.
//!
//! - [`Parking`]: each solved layer's weights, encoded in the layer's
//!   dtype and in storage orientation, in a hidden folder removed when the
//!   parking is dropped (or by [`Control::remove_scratch`] when the process
//!   exits without unwinding).
//! - [`write_checkpoint`]: `comparison.json` and `comparison.html` written
//!   atomically (temp file + rename) while holding [`Control::writing`], so
//!   an impatient second Ctrl-C never cuts a file short.

use super::data::{Comparison, Source};
use super::{page, HTML_NAME, JSON_NAME};
use crate::error::{Error, Result};
use crate::io;
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::Mutex;

/// Shared between the driver and whoever may stop it (a signal handler).
#[derive(Debug, Default)]
pub struct Control {
    /// Set to ask the driver to stop after the current solve.
    pub stop: AtomicBool,
    /// Held by the driver while it writes files; a handler that wants to
    /// exit at once takes it first, so no file is left half-written.
    pub writing: Mutex<()>,
    /// Scratch folders to remove if the process exits without unwinding.
    pub scratch: Mutex<Vec<PathBuf>>,
}

impl Control {
    /// Remove the scratch folders (for a handler about to exit at once).
    pub fn remove_scratch(&self) {
        let dirs = self.scratch.lock().unwrap_or_else(|e| e.into_inner());
        for d in dirs.iter() {
            let _ = std::fs::remove_dir_all(d);
        }
    }
}

/// Parked weights of solved layers, waiting for their run to finish.
pub(crate) struct Parking {
    dir: PathBuf,
}

impl Parking {
    /// Create the folder `dir` and register it with `control` as scratch.
    pub(crate) fn create(dir: PathBuf, control: &Control) -> Result<Self> {
        std::fs::create_dir_all(&dir).map_err(|e| {
            Error::output(&dir, format!("{}: cannot create it: {e}", dir.display()))
        })?;
        control.scratch.lock().unwrap_or_else(|e| e.into_inner()).push(dir.clone());
        Ok(Parking { dir })
    }

    fn path(&self, run: usize, layer: usize) -> PathBuf {
        self.dir.join(format!("{run}-{layer}.bin"))
    }

    /// Keep layer `layer` of run `run`, encoded as `dtype`.
    pub(crate) fn park(
        &self,
        run: usize,
        layer: usize,
        values: &[f64],
        dtype: io::Dtype,
    ) -> Result<()> {
        let mut bytes = Vec::new();
        io::dtype::encode_f64(dtype, values, &mut bytes).map_err(|e| {
            Error::output(&self.dir, format!("{}: cannot encode weights: {e}", self.dir.display()))
        })?;
        let p = self.path(run, layer);
        std::fs::write(&p, &bytes).map_err(|e| {
            Error::output(&p, format!("{}: cannot park pruned weights: {e}", p.display()))
        })
    }

    /// The values [`Parking::park`] kept, decoded from `dtype`.
    pub(crate) fn fetch(&self, run: usize, layer: usize, dtype: io::Dtype) -> Result<Vec<f64>> {
        let p = self.path(run, layer);
        let bytes = std::fs::read(&p).map_err(|e| {
            Error::output(&p, format!("{}: cannot read parked weights: {e}", p.display()))
        })?;
        let mut out = Vec::new();
        io::dtype::decode_f64(dtype, &bytes, &mut out);
        Ok(out)
    }
}

impl Drop for Parking {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.dir);
    }
}

/// Write `comparison.json` and `comparison.html` of `comp` into `out_dir`
/// atomically, holding the write lock.
///
/// # Errors
/// [`crate::ErrorKind::Output`] when a file cannot be written.
pub(crate) fn write_checkpoint(out_dir: &Path, comp: &Comparison, control: &Control) -> Result<()> {
    let _guard = control.writing.lock().unwrap_or_else(|e| e.into_inner());
    let json = comp.to_json();
    io::write_atomic(&out_dir.join(JSON_NAME), |w| std::io::Write::write_all(w, json.as_bytes()))?;
    let source = Source { label: "this run".to_string(), path: None, comparison: comp.clone() };
    let html = page::render(std::slice::from_ref(&source), Some(&comp.settings.focus));
    io::write_atomic(&out_dir.join(HTML_NAME), |w| std::io::Write::write_all(w, html.as_bytes()))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compare::data::{self, testing};
    use crate::solve::{Method, Pattern, Scope};

    fn scratch(tag: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("lopper-ckpt-{tag}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    #[test]
    fn parked_weights_round_trip_in_their_dtype_and_vanish_on_drop() {
        let root = scratch("park");
        let control = Control::default();
        let dir = root.join(".parked");
        let p = Parking::create(dir.clone(), &control).unwrap();
        let v = vec![0.5, -1.25, 0.0, 3.0];
        p.park(2, 7, &v, io::Dtype::F32).unwrap();
        assert_eq!(p.fetch(2, 7, io::Dtype::F32).unwrap(), v);
        // BF16 keeps 8 significant bits: 1/3 comes back as the nearest
        // bf16, 0.333984375 (IEEE-style rounding, common practice).
        p.park(0, 0, &[1.0 / 3.0], io::Dtype::BF16).unwrap();
        assert_eq!(p.fetch(0, 0, io::Dtype::BF16).unwrap(), vec![0.333984375]);
        let e = p.fetch(9, 9, io::Dtype::F32).unwrap_err();
        assert!(e.to_string().contains("9-9.bin"), "{e}");
        assert_eq!(control.scratch.lock().unwrap().as_slice(), std::slice::from_ref(&dir));
        drop(p);
        assert!(!dir.exists());
        std::fs::remove_dir_all(&root).unwrap();
    }

    #[test]
    fn checkpoint_writes_both_files_that_read_back() {
        let root = scratch("write");
        let p = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let comp = testing::comparison(2, vec![testing::run(Method::Obs, p, 0.1, None, 2)]);
        write_checkpoint(&root, &comp, &Control::default()).unwrap();
        let back = data::load(&root.join(JSON_NAME)).unwrap();
        assert_eq!(back.comparison, comp);
        let html = std::fs::read_to_string(root.join(HTML_NAME)).unwrap();
        assert!(html.starts_with("<!DOCTYPE html>"), "{}", &html[..40.min(html.len())]);
        // No temporary file is left beside them.
        let mut names: Vec<String> = std::fs::read_dir(&root)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        assert_eq!(names, [HTML_NAME, JSON_NAME]);
        // A folder that cannot hold the files is an output error.
        let e = write_checkpoint(&root.join("missing"), &comp, &Control::default()).unwrap_err();
        assert_eq!(e.kind(), crate::error::ErrorKind::Output);
        std::fs::remove_dir_all(&root).unwrap();
    }
}
