//! What a comparison keeps while it runs: the weights of solved layers
//! until their run has every layer, the checkpoint files rewritten as
//! solves finish, and the stop request shared with a signal handler.
//!
//! - [`Parking`]: each solved layer's weights, encoded in the layer's
//!   dtype and in storage orientation, in memory. Runs that keep models
//!   are solved one after another (see [`super`]), so at most one run's
//!   weights are held, and no file is left behind however the process
//!   ends.
//! - [`write_checkpoint`]: `comparison.json` and `comparison.html` written
//!   atomically (temp file + rename) while holding [`Control::writing`], so
//!   an impatient second Ctrl-C never cuts a file short;
//!   [`mark_stopped`] is what such a second signal leaves.

use super::data::{self, Comparison, Source, Status};
use super::{page, HTML_NAME, JSON_NAME};
use crate::error::{Error, Result};
use crate::io;
use std::collections::BTreeMap;
use std::path::Path;
use std::sync::atomic::AtomicBool;
use std::sync::Mutex;

/// Shared between the driver and whoever may stop it (a signal handler).
#[derive(Debug, Default)]
pub struct Control {
    /// Set to ask the driver to stop after the current solve.
    pub stop: AtomicBool,
    /// Held by the driver while it writes files; a handler that wants to
    /// exit at once takes it first, so no file is left half-written and no
    /// temporary is left behind.
    pub writing: Mutex<()>,
}

/// Solved layers' weights, waiting for their run to finish.
#[derive(Default)]
pub(crate) struct Parking {
    parked: BTreeMap<(usize, usize), Vec<u8>>,
}

impl Parking {
    /// Keep layer `layer` of run `run`, encoded as `dtype`.
    pub(crate) fn park(
        &mut self,
        run: usize,
        layer: usize,
        values: &[f64],
        dtype: io::Dtype,
    ) -> Result<()> {
        let mut bytes = Vec::new();
        io::dtype::encode_f64(dtype, values, &mut bytes).map_err(|e| {
            Error::new(
                crate::error::ErrorKind::Solve,
                format!(
                    "run {run}, layer {layer}: cannot encode the pruned weights as {dtype}: {e}"
                ),
            )
        })?;
        self.parked.insert((run, layer), bytes);
        Ok(())
    }

    /// The values [`Parking::park`] kept, decoded from `dtype`.
    pub(crate) fn fetch(&self, run: usize, layer: usize, dtype: io::Dtype) -> Result<Vec<f64>> {
        let bytes = self.parked.get(&(run, layer)).ok_or_else(|| {
            Error::new(
                crate::error::ErrorKind::Solve,
                format!("run {run}, layer {layer}: no weights were kept"),
            )
        })?;
        let mut out = Vec::new();
        io::dtype::decode_f64(dtype, bytes, &mut out);
        Ok(out)
    }

    /// Forget run `run`'s weights.
    pub(crate) fn release(&mut self, run: usize) {
        self.parked.retain(|&(r, _), _| r != run);
    }
}

/// Write `comparison.json` and `comparison.html` of `comp` into `out_dir`
/// atomically, holding the write lock.
///
/// # Errors
/// [`crate::ErrorKind::Output`] when a file cannot be written.
pub(crate) fn write_checkpoint(out_dir: &Path, comp: &Comparison, control: &Control) -> Result<()> {
    let _guard = control.writing.lock().unwrap_or_else(|e| e.into_inner());
    write_files(out_dir, comp)
}

fn write_files(out_dir: &Path, comp: &Comparison) -> Result<()> {
    let json = comp.to_json();
    let source = Source { label: "this run".to_string(), path: None, comparison: comp.clone() };
    let html = page::render(std::slice::from_ref(&source), Some(&comp.settings.focus));
    let mut staged = io::Staged::new();
    staged.file(&out_dir.join(JSON_NAME), |w| std::io::Write::write_all(w, json.as_bytes()))?;
    staged.file(&out_dir.join(HTML_NAME), |w| std::io::Write::write_all(w, html.as_bytes()))?;
    staged.commit()?;
    Ok(())
}

/// For a handler about to exit at once, holding [`Control::writing`]: mark
/// the last checkpoint in `out_dir` (if any) as interrupted, so the record
/// never says `running` after the process is gone.
pub fn mark_stopped(out_dir: &Path) {
    let Ok(mut source) = data::load(&out_dir.join(JSON_NAME)) else { return };
    let comp = &mut source.comparison;
    if comp.status == Status::Running {
        comp.status = Status::Interrupted;
        comp.status_detail = Some(
            "stopped at once by a second signal; the solves of the last checkpoint are kept"
                .to_string(),
        );
        let _ = write_files(out_dir, comp);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compare::data::{self, testing};
    use crate::solve::{Method, Pattern, Scope};
    use std::path::PathBuf;

    fn scratch(tag: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("lopper-ckpt-{tag}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    #[test]
    fn parked_weights_round_trip_in_their_dtype() {
        let mut p = Parking::default();
        let v = vec![0.5, -1.25, 0.0, 3.0];
        p.park(2, 7, &v, io::Dtype::F32).unwrap();
        assert_eq!(p.fetch(2, 7, io::Dtype::F32).unwrap(), v);
        // BF16 keeps 8 significant bits: 1/3 comes back as the nearest
        // bf16, 0.333984375 (IEEE-style rounding, common practice).
        p.park(0, 0, &[1.0 / 3.0], io::Dtype::BF16).unwrap();
        assert_eq!(p.fetch(0, 0, io::Dtype::BF16).unwrap(), vec![0.333984375]);
        let e = p.fetch(9, 9, io::Dtype::F32).unwrap_err();
        assert!(e.to_string().contains("run 9, layer 9"), "{e}");
        p.release(2);
        assert!(p.fetch(2, 7, io::Dtype::F32).is_err());
        assert!(p.fetch(0, 0, io::Dtype::BF16).is_ok());
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
