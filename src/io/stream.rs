//! Writing a pruned model tensor by tensor, as the run produces them.
//!
//! This module owns [`StreamedModel`]: the output tensor files of a model
//! whose tensors keep their dtypes and shapes are created up front as
//! temporaries of a [`Staged`] set, with their final headers (every offset
//! is known from the input); each pruned tensor is encoded and written at
//! its offset as soon as it is handed over, and [`StreamedModel::finish`]
//! copies the untouched tensors from the input map, syncs, and stages the
//! index and extra files. The result is byte for byte what
//! [`super::stage_model`] writes from the same replacements, without
//! holding them all in memory; nothing is in place until the set is
//! committed.

use std::collections::{BTreeMap, HashSet};
use std::fs::File;
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};

use super::write::{encode_checked, model_targets_with, stage_files, tensor_parts, Edits, Staged};
use super::{Model, TensorFile, WriteError, WriteErrorKind as K};

/// One output tensor file being filled.
struct OutFile<'m> {
    target: PathBuf,
    input: &'m TensorFile,
    file: File,
    /// Header length: tensor data starts here.
    data_start: u64,
    header: Vec<u8>,
    /// Name → (offset in the data section, input bytes), file order.
    parts: Vec<(&'m str, u64, &'m [u8])>,
}

/// A pruned copy of a model, written as tensors arrive; see the module
/// docs.
pub struct StreamedModel<'m> {
    model: &'m Model,
    out: PathBuf,
    files: Vec<OutFile<'m>>,
    /// Tensor name → index into `files`.
    by_name: BTreeMap<&'m str, usize>,
    written: HashSet<String>,
    metadata: BTreeMap<String, String>,
}

impl<'m> StreamedModel<'m> {
    /// Check the outputs and create every tensor file's temporary in
    /// `staged`, header included. `metadata` is merged into each header as
    /// [`super::stage_model`] does; [`StreamedModel::finish`] may change
    /// its values if the header keeps its length.
    ///
    /// # Errors
    /// As [`super::model_targets`], and [`K::Io`] creating the files.
    pub fn begin(
        staged: &mut Staged,
        model: &'m Model,
        out: &Path,
        metadata: &BTreeMap<String, String>,
    ) -> Result<Self, WriteError> {
        let (to_dir, targets) = model_targets_with(model, out)?;
        if to_dir {
            staged.folder(out)?;
        }
        let mut files = Vec::new();
        let mut by_name = BTreeMap::new();
        for (target, input) in targets {
            let Some(input) = input else { continue };
            if let (true, Some(parent)) = (to_dir, target.parent()) {
                staged.folder(parent)?;
            }
            let (header, data) = tensor_parts(input, metadata);
            let file = staged.open(&target)?;
            let mut parts = Vec::with_capacity(data.len());
            let mut offset = 0u64;
            for (name, bytes) in input.names_in_file_order().zip(data) {
                by_name.insert(name, files.len());
                parts.push((name, offset, bytes));
                offset += bytes.len() as u64;
            }
            let data_start = header.len() as u64;
            file.set_len(data_start + offset)
                .and_then(|()| file.write_all_at(&header, 0))
                .map_err(|e| WriteError::io(&target, "write", e))?;
            files.push(OutFile { target, input, file, data_start, header, parts });
        }
        Ok(StreamedModel {
            model,
            out: out.to_owned(),
            files,
            by_name,
            written: HashSet::new(),
            metadata: metadata.clone(),
        })
    }

    /// Encode `values` (row-major, storage orientation) to tensor `name`'s
    /// dtype and write them at its place.
    ///
    /// # Errors
    /// [`K::NoSuchTensor`], [`K::ShapeMismatch`], [`K::UnsupportedDtype`],
    /// [`K::NotRepresentable`] as [`super::write_model`]; [`K::Io`].
    pub fn put(&mut self, name: &str, values: &[f64]) -> Result<(), WriteError> {
        let err = |kind, d: String| WriteError::new(&self.out, kind, d).tensor(name);
        let (Some(info), Some(&fi)) = (self.model.get(name), self.by_name.get(name)) else {
            return Err(err(K::NoSuchTensor, "no such tensor in the input model".into()));
        };
        let bytes = encode_checked(&self.out, name, info.dtype, &info.shape, values)?;
        let f = &self.files[fi];
        let &(_, offset, _) = f.parts.iter().find(|p| p.0 == name).expect("indexed above");
        f.file
            .write_all_at(&bytes, f.data_start + offset)
            .map_err(|e| WriteError::io(&f.target, "write", e))?;
        self.written.insert(name.to_string());
        Ok(())
    }

    /// Copy every tensor not written from the input, rewrite the headers
    /// with `metadata` (same length as at [`StreamedModel::begin`], padded
    /// with spaces when shorter), sync, and stage the index and the extra
    /// files of a model directory.
    ///
    /// # Errors
    /// [`K::Io`], or [`K::BadOutput`] if the new metadata makes a header
    /// longer.
    pub fn finish(
        self,
        staged: &mut Staged,
        metadata: &BTreeMap<String, String>,
    ) -> Result<(), WriteError> {
        for f in &self.files {
            let io = |e| WriteError::io(&f.target, "write", e);
            for &(name, offset, bytes) in &f.parts {
                if !self.written.contains(name) {
                    f.file.write_all_at(bytes, f.data_start + offset).map_err(io)?;
                }
            }
            if metadata != &self.metadata {
                let (header, _) = tensor_parts(f.input, metadata);
                let header = repad(header, f.header.len()).ok_or_else(|| {
                    WriteError::new(&f.target, K::BadOutput, "the final header outgrew its room")
                })?;
                f.file.write_all_at(&header, 0).map_err(io)?;
            }
            f.file.sync_all().map_err(|e| WriteError::io(&f.target, "sync", e))?;
        }
        stage_files(staged, self.model, &self.out, &Edits::default(), metadata, false)
    }
}

/// A safetensors header (8-byte length, JSON, spaces) padded with spaces to
/// `len` bytes in all, or `None` if its JSON does not fit.
fn repad(header: Vec<u8>, len: usize) -> Option<Vec<u8>> {
    let json = &header[8..];
    let end = json.iter().rposition(|&b| b != b' ').map_or(0, |i| i + 1);
    if 8 + end > len {
        return None;
    }
    let mut out = ((len - 8) as u64).to_le_bytes().to_vec();
    out.extend_from_slice(&json[..end]);
    out.resize(len, b' ');
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::repad;

    #[test]
    fn repad_keeps_the_json_and_fills_with_spaces() {
        // The safetensors header: u64 little-endian length, then JSON
        // (format description of the safetensors project).
        let json = b"{\"a\":1}  ";
        let mut h = (json.len() as u64).to_le_bytes().to_vec();
        h.extend_from_slice(json);
        let p = repad(h.clone(), 24).unwrap();
        assert_eq!(p.len(), 24);
        assert_eq!(u64::from_le_bytes(p[..8].try_into().unwrap()), 16);
        assert_eq!(&p[8..15], b"{\"a\":1}");
        assert!(p[15..].iter().all(|&b| b == b' '));
        assert!(repad(h, 12).is_none());
    }
}
