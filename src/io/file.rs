//! One `.safetensors` file: mmap, header parsing and validation, tensor reads.
//!
//! Entry point: [`TensorFile::open`]. The format is an 8-byte little-endian
//! header length `n`, `n` bytes of UTF-8 JSON (optionally padded with
//! spaces), then the data section. The JSON maps each tensor name to
//! `{"dtype", "shape", "data_offsets": [start, end]}` (offsets relative to the
//! data section) plus an optional `"__metadata__"` string map.
//!
//! Key decisions:
//! - The header is parsed with `serde_json` into our own structures (not
//!   `safetensors::SafeTensors`), so that every error can name the file and
//!   the tensor. The whole header is validated with checked arithmetic before
//!   any tensor byte is read, with the same rules as the reference loader:
//!   byte length = numel × dtype size, and tensors, sorted by offset, tile the
//!   data section exactly (no overlap, no gap, no trailing bytes).
//! - The file is memory-mapped read-only. Mapping is `unsafe` because another
//!   process could truncate the file under us; lopper itself only ever
//!   replaces files by rename (see `write.rs`), which leaves existing maps
//!   valid.
//! - F32 tensors are borrowed in place from the map when the data is 4-byte
//!   aligned on a little-endian target ([`TensorFile::read_f32`]); everything
//!   else is decoded into a new buffer.

use std::borrow::Cow;
use std::collections::HashMap;
use std::fs::File;
use std::ops::Range;
use std::path::{Path, PathBuf};

use memmap2::Mmap;
use safetensors::Dtype;
use serde_json::Value;

use super::dtype::{self, byte_len, count_zeros, decode_f32, decode_f64, parse_dtype};
use super::{LoadError, LoadErrorKind as K};

/// Largest header accepted, as in the reference loader (100 MB).
pub(crate) const MAX_HEADER: u64 = 100_000_000;

/// Name, dtype and shape of one tensor.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TensorInfo {
    /// Tensor name as written in the header.
    pub name: String,
    /// Element type.
    pub dtype: Dtype,
    /// Shape, row-major (C order); `[]` is a scalar.
    pub shape: Vec<usize>,
}

impl TensorInfo {
    /// Number of elements (the product of the shape; 1 for a scalar).
    /// Validated on open not to overflow.
    pub fn params(&self) -> usize {
        self.shape.iter().product()
    }

    /// Whether the dtype is F16, BF16, F32 or F64 (the dtypes lopper reads as
    /// numbers and writes back).
    pub fn is_float(&self) -> bool {
        dtype::is_float(self.dtype)
    }
}

/// One memory-mapped safetensors file with a validated header.
#[derive(Debug)]
pub struct TensorFile {
    path: PathBuf,
    mmap: Mmap,
    /// Byte offset of the data section in the file (8 + header length).
    data_start: usize,
    /// Sorted by name.
    infos: Vec<TensorInfo>,
    /// Byte range of each tensor within the data section, parallel to `infos`.
    spans: Vec<Range<usize>>,
    /// Indices into `infos`, sorted by data offset (file order).
    by_offset: Vec<usize>,
    metadata: Option<HashMap<String, String>>,
    /// Modification time when opened (to notice a file changed under us).
    modified: Option<std::time::SystemTime>,
}

/// One header entry before the cross-tensor checks.
struct Entry {
    info: TensorInfo,
    span: Range<usize>,
}

impl TensorFile {
    /// Open, map and validate `path`.
    ///
    /// # Errors
    /// [`K::NotFound`], [`K::Io`], [`K::Truncated`], [`K::HeaderNotJson`],
    /// [`K::BadHeader`], [`K::UnknownDtype`], [`K::ShapeMismatch`],
    /// [`K::OffsetsOutOfBounds`], [`K::OffsetsOutOfOrder`],
    /// [`K::TrailingData`]; each names `path` and, where relevant, the tensor.
    pub fn open(path: &Path) -> Result<Self, LoadError> {
        super::check_regular(path)?;
        let file = File::open(path).map_err(|e| LoadError::io(path, "open", e))?;
        let meta = file.metadata().map_err(|e| LoadError::io(path, "stat", e))?;
        if meta.is_dir() {
            return Err(LoadError::new(
                path,
                K::Io,
                "is a directory; expected a .safetensors file (or open it as a model)",
            ));
        }
        let file_len = meta.len();
        if file_len < 8 {
            return Err(LoadError::new(
                path,
                K::Truncated,
                format!(
                    "file is truncated: {file_len} bytes, shorter than the 8-byte header length"
                ),
            ));
        }
        // SAFETY: read-only map; see the module docs for the truncation caveat.
        let mmap = unsafe { Mmap::map(&file) }.map_err(|e| LoadError::io(path, "map", e))?;
        let (data_start, entries, metadata) = parse(path, &mmap)?;
        let mut entries = entries;
        entries.sort_by(|a, b| a.info.name.cmp(&b.info.name));
        let mut by_offset: Vec<usize> = (0..entries.len()).collect();
        by_offset.sort_by_key(|&i| (entries[i].span.start, entries[i].span.end));
        let (infos, spans) = entries.into_iter().map(|e| (e.info, e.span)).unzip();
        Ok(TensorFile {
            path: path.to_owned(),
            mmap,
            data_start,
            infos,
            spans,
            by_offset,
            metadata,
            modified: meta.modified().ok(),
        })
    }

    /// Check that the file still has the size and modification time it had
    /// when opened. The data is memory-mapped, so a file truncated or
    /// rewritten in place during a run would otherwise surface as a failed
    /// (or wrong) copy into the output.
    ///
    /// # Errors
    /// [`K::Truncated`] naming the file, its size then and now.
    pub fn check_unchanged(&self) -> Result<(), LoadError> {
        let then = self.mmap.len() as u64;
        let changed = |now: String| {
            LoadError::new(
                &self.path,
                K::Truncated,
                format!(
                    "the input changed while lopper was running ({then} bytes when opened, {now}); \
                     rerun on a copy that nothing else writes to"
                ),
            )
        };
        let meta = std::fs::metadata(&self.path).map_err(|e| changed(format!("now {e}")))?;
        if meta.len() != then {
            return Err(changed(format!("{} bytes now", meta.len())));
        }
        if meta.modified().ok() != self.modified {
            return Err(changed("modified since".into()));
        }
        Ok(())
    }

    /// The path the file was opened with.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Every tensor, sorted by name.
    pub fn tensors(&self) -> &[TensorInfo] {
        &self.infos
    }

    /// Tensor names in data-offset (file) order.
    pub fn names_in_file_order(&self) -> impl Iterator<Item = &str> + '_ {
        self.by_offset.iter().map(|&i| self.infos[i].name.as_str())
    }

    /// The tensor called `name`, if any.
    pub fn get(&self, name: &str) -> Option<&TensorInfo> {
        self.position(name).map(|i| &self.infos[i])
    }

    /// The header's `__metadata__` map, if present.
    pub fn metadata(&self) -> Option<&HashMap<String, String>> {
        self.metadata.as_ref()
    }

    fn position(&self, name: &str) -> Option<usize> {
        self.infos.binary_search_by(|t| t.name.as_str().cmp(name)).ok()
    }

    fn find(&self, name: &str) -> Result<usize, LoadError> {
        self.position(name).ok_or_else(|| {
            LoadError::new(&self.path, K::NoSuchTensor, "no such tensor in this file").tensor(name)
        })
    }

    /// Raw bytes of `name` as stored (little-endian, row-major).
    ///
    /// # Errors
    /// [`K::NoSuchTensor`].
    pub fn bytes(&self, name: &str) -> Result<&[u8], LoadError> {
        let i = self.find(name)?;
        Ok(self.span_bytes(i))
    }

    fn span_bytes(&self, i: usize) -> &[u8] {
        let s = &self.spans[i];
        // In bounds: validated on open against the map length.
        &self.mmap[self.data_start + s.start..self.data_start + s.end]
    }

    fn float_index(&self, name: &str) -> Result<usize, LoadError> {
        let i = self.find(name)?;
        let d = self.infos[i].dtype;
        if !dtype::is_float(d) {
            return Err(LoadError::new(
                &self.path,
                K::UnsupportedDtype,
                format!(
                    "dtype {d} cannot be read as floating point; expected F16, BF16, F32 or F64"
                ),
            )
            .tensor(name));
        }
        Ok(i)
    }

    fn non_finite(&self, name: &str, index: usize, value: f64) -> LoadError {
        let what = if value.is_nan() {
            "NaN"
        } else if value > 0.0 {
            "inf"
        } else {
            "-inf"
        };
        LoadError::new(
            &self.path,
            K::NonFinite { index },
            format!("contains {what} at index {index}"),
        )
        .tensor(name)
    }

    fn check_finite(&self, name: &str, base: usize, v: &[f64]) -> Result<(), LoadError> {
        match v.iter().position(|x| !x.is_finite()) {
            Some(k) => Err(self.non_finite(name, base + k, v[k])),
            None => Ok(()),
        }
    }

    /// All values of a float tensor as `f64`, row-major.
    ///
    /// # Errors
    /// [`K::NoSuchTensor`], [`K::UnsupportedDtype`] for non-float dtypes,
    /// [`K::NonFinite`] naming the flat index of the first NaN or infinity.
    pub fn read_f64(&self, name: &str) -> Result<Vec<f64>, LoadError> {
        let i = self.float_index(name)?;
        let mut out = Vec::new();
        decode_f64(self.infos[i].dtype, self.span_bytes(i), &mut out);
        self.check_finite(name, 0, &out)?;
        Ok(out)
    }

    /// All values of a float tensor as `f32`, row-major. An F32 tensor whose
    /// data is 4-byte aligned is borrowed from the map without copying.
    ///
    /// # Errors
    /// As [`TensorFile::read_f64`].
    pub fn read_f32(&self, name: &str) -> Result<Cow<'_, [f32]>, LoadError> {
        let i = self.float_index(name)?;
        let bytes = self.span_bytes(i);
        let values: Cow<'_, [f32]> = match borrow_f32(self.infos[i].dtype, bytes) {
            Some(v) => Cow::Borrowed(v),
            None => {
                let mut out = Vec::new();
                decode_f32(self.infos[i].dtype, bytes, &mut out);
                Cow::Owned(out)
            }
        };
        if let Some(k) = values.iter().position(|x| !x.is_finite()) {
            return Err(self.non_finite(name, k, f64::from(values[k])));
        }
        Ok(values)
    }

    /// Rows `rows` (`start..end`) of a 2-D float tensor as `f64`, row-major,
    /// for streaming large tensors. A NaN or infinity is reported with its
    /// flat index in the whole tensor.
    ///
    /// # Errors
    /// As [`TensorFile::read_f64`], plus [`K::BadRange`] if the tensor is not
    /// 2-D or `rows` is not within `0..=shape[0]` with `start <= end`.
    pub fn read_rows_f64(&self, name: &str, rows: Range<usize>) -> Result<Vec<f64>, LoadError> {
        let i = self.float_index(name)?;
        let info = &self.infos[i];
        let &[nrows, ncols] = info.shape.as_slice() else {
            return Err(LoadError::new(
                &self.path,
                K::BadRange,
                format!("cannot read rows of a tensor with shape {:?}; expected 2-D", info.shape),
            )
            .tensor(name));
        };
        if rows.start > rows.end || rows.end > nrows {
            return Err(LoadError::new(
                &self.path,
                K::BadRange,
                format!("rows {}..{} are outside 0..{nrows}", rows.start, rows.end),
            )
            .tensor(name));
        }
        // Cannot overflow: rows.end * ncols * size <= the validated byte length.
        let size = info.dtype.bitsize() / 8; // float dtypes are whole bytes
        let (a, b) = (rows.start * ncols * size, rows.end * ncols * size);
        let mut out = Vec::new();
        decode_f64(info.dtype, &self.span_bytes(i)[a..b], &mut out);
        self.check_finite(name, rows.start * ncols, &out)?;
        Ok(out)
    }

    /// Fraction of elements that are exactly zero (`±0` for floats), in
    /// `[0, 1]`; `0` for an empty tensor.
    ///
    /// # Errors
    /// [`K::NoSuchTensor`]; [`K::UnsupportedDtype`] for sub-byte floats,
    /// F8_E8M0 and C64.
    pub fn zero_fraction(&self, name: &str) -> Result<f64, LoadError> {
        let i = self.find(name)?;
        let info = &self.infos[i];
        let zeros = count_zeros(info.dtype, self.span_bytes(i)).ok_or_else(|| {
            LoadError::new(
                &self.path,
                K::UnsupportedDtype,
                format!("cannot count zeros of dtype {}", info.dtype),
            )
            .tensor(name)
        })?;
        let n = info.params();
        Ok(if n == 0 { 0.0 } else { zeros as f64 / n as f64 })
    }
}

/// `bytes` viewed as `f32` without copying, if `dtype` is F32, the target is
/// little-endian and the data is 4-byte aligned.
fn borrow_f32(dtype: Dtype, bytes: &[u8]) -> Option<&[f32]> {
    if dtype != Dtype::F32 || cfg!(target_endian = "big") {
        return None;
    }
    // SAFETY: every 4-byte pattern is a valid f32; `align_to` only yields a
    // middle part that is correctly aligned.
    let (pre, mid, post) = unsafe { bytes.align_to::<f32>() };
    (pre.is_empty() && post.is_empty()).then_some(mid)
}

type Parsed = (usize, Vec<Entry>, Option<HashMap<String, String>>);

/// [`parse`] on any bytes (the fuzz entry point): the length checks of
/// [`TensorFile::open`], then the header; returns the number of tensors.
pub(crate) fn parse_bytes(path: &Path, buf: &[u8]) -> Result<usize, LoadError> {
    if buf.len() < 8 {
        return Err(LoadError::new(
            path,
            K::Truncated,
            format!(
                "file is truncated: {} bytes, shorter than the 8-byte header length",
                buf.len()
            ),
        ));
    }
    parse(path, buf).map(|(_, entries, _)| entries.len())
}

/// Parse and validate the header of the file mapped in `buf`.
fn parse(path: &Path, buf: &[u8]) -> Result<Parsed, LoadError> {
    let err = |kind, detail: String| LoadError::new(path, kind, detail);
    let file_len = buf.len() as u64;
    let n = u64::from_le_bytes(buf[..8].try_into().expect("file has at least 8 bytes"));
    if n > MAX_HEADER {
        return Err(err(
            K::BadHeader,
            format!("header length {n} exceeds the limit of {MAX_HEADER} bytes"),
        ));
    }
    // n <= MAX_HEADER, so 8 + n neither overflows u64 nor usize on 64-bit;
    // on smaller targets `buf.len()` bounds it below.
    let header_end = 8 + n;
    if header_end > file_len {
        return Err(err(
            K::Truncated,
            format!(
                "file is truncated: header length {n} needs {header_end} bytes but the file has \
                 {file_len}"
            ),
        ));
    }
    let header_end = header_end as usize;
    let text = std::str::from_utf8(&buf[8..header_end]).map_err(|e| {
        err(
            K::HeaderNotJson,
            format!("header is not JSON: invalid UTF-8 at byte {}", 8 + e.valid_up_to()),
        )
    })?;
    let root: Value = serde_json::from_str(text)
        .map_err(|e| err(K::HeaderNotJson, format!("header is not JSON: {e}")))?;
    let Value::Object(map) = root else {
        return Err(err(K::BadHeader, "header is JSON but not an object".into()));
    };
    // A JSON object keeps the last of repeated keys: count them first, so a
    // repeated tensor name is named as such (not as a gap in the offsets).
    if let Some(dup) = first_duplicate_key(text) {
        return Err(err(
            K::BadHeader,
            format!("tensor name '{}' appears more than once in the header", super::escape(&dup)),
        )
        .tensor(&dup));
    }

    let mut metadata = None;
    let mut entries = Vec::with_capacity(map.len());
    for (name, value) in &map {
        if name == "__metadata__" {
            metadata = Some(parse_metadata(path, value)?);
        } else {
            entries.push(parse_entry(path, name, value)?);
        }
    }
    check_layout(path, &entries, buf.len() - header_end, file_len)?;
    Ok((header_end, entries, metadata))
}

/// The first top-level key of the JSON object `text` that repeats an
/// earlier one (`None` when every key is distinct or `text` is not an
/// object).
fn first_duplicate_key(text: &str) -> Option<String> {
    use serde::de::{Deserializer as _, IgnoredAny, MapAccess, Visitor};
    struct Keys;
    impl<'de> Visitor<'de> for Keys {
        type Value = Option<String>;
        fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            f.write_str("a JSON object")
        }
        fn visit_map<A: MapAccess<'de>>(self, mut a: A) -> Result<Self::Value, A::Error> {
            let mut seen = std::collections::HashSet::new();
            let mut dup = None;
            while let Some(k) = a.next_key::<String>()? {
                a.next_value::<IgnoredAny>()?;
                if dup.is_none() && !seen.insert(k.clone()) {
                    dup = Some(k);
                }
            }
            Ok(dup)
        }
    }
    serde_json::Deserializer::from_str(text).deserialize_map(Keys).ok().flatten()
}

fn parse_metadata(path: &Path, value: &Value) -> Result<HashMap<String, String>, LoadError> {
    let bad = |d: String| LoadError::new(path, K::BadHeader, d);
    let Value::Object(m) = value else {
        return Err(bad("__metadata__ is not an object of strings".into()));
    };
    m.iter()
        .map(|(k, v)| match v {
            Value::String(s) => Ok((k.clone(), s.clone())),
            _ => Err(bad(format!("__metadata__ value of key '{k}' is not a string"))),
        })
        .collect()
}

/// Parse one tensor entry and check it on its own: field types, dtype,
/// offsets in order, byte length = numel × dtype size.
fn parse_entry(path: &Path, name: &str, value: &Value) -> Result<Entry, LoadError> {
    let bad = |kind, d: String| LoadError::new(path, kind, d).tensor(name);
    let Value::Object(m) = value else {
        return Err(bad(K::BadHeader, "entry is not an object".into()));
    };
    let dtype_str = match m.get("dtype") {
        Some(Value::String(s)) => s,
        _ => return Err(bad(K::BadHeader, "missing or non-string \"dtype\"".into())),
    };
    let dtype = parse_dtype(dtype_str).ok_or_else(|| {
        bad(
            K::UnknownDtype,
            format!("unknown dtype '{dtype_str}'; expected one of {}", dtype::known_names()),
        )
    })?;
    let ints = |key: &str| -> Option<Vec<usize>> {
        m.get(key)?.as_array()?.iter().map(|v| v.as_u64()?.try_into().ok()).collect()
    };
    let shape = ints("shape").ok_or_else(|| {
        bad(K::BadHeader, "missing \"shape\", or it is not a list of non-negative integers".into())
    })?;
    let offsets = ints("data_offsets").filter(|o| o.len() == 2).ok_or_else(|| {
        bad(K::BadHeader, "missing \"data_offsets\", or it is not two non-negative integers".into())
    })?;
    let (start, end) = (offsets[0], offsets[1]);
    if end < start {
        return Err(bad(
            K::OffsetsOutOfOrder,
            format!("data_offsets [{start}, {end}] end before they start"),
        ));
    }
    let need =
        shape.iter().try_fold(1usize, |a, &d| a.checked_mul(d)).and_then(|n| byte_len(dtype, n));
    if need != Some(end - start) {
        let need = need.map_or("more than usize::MAX".to_string(), |n| n.to_string());
        return Err(bad(
            K::ShapeMismatch,
            format!(
                "shape {shape:?} of {dtype} needs {need} bytes but data_offsets [{start}, {end}] \
                 span {}",
                end - start
            ),
        ));
    }
    Ok(Entry { info: TensorInfo { name: name.to_owned(), dtype, shape }, span: start..end })
}

/// Check that the tensors, sorted by offset, tile `0..data_len` exactly.
///
/// A gap in the offsets that reaches past the data section is reported as
/// out of bounds (the header is wrong); a contiguous header whose last tensor
/// reaches past the data section means the file was cut short (truncated).
fn check_layout(
    path: &Path,
    entries: &[Entry],
    data_len: usize,
    file_len: u64,
) -> Result<(), LoadError> {
    let mut order: Vec<&Entry> = entries.iter().collect();
    order.sort_by(|a, b| {
        (a.span.start, a.span.end, &a.info.name).cmp(&(b.span.start, b.span.end, &b.info.name))
    });
    let mut expected = 0usize;
    let mut prev: Option<&str> = None;
    for e in &order {
        let (s, t, name) = (e.span.start, e.span.end, e.info.name.as_str());
        let err = |kind, d: String| LoadError::new(path, kind, d).tensor(name);
        if s < expected {
            let p = prev.expect("expected > 0 implies a previous tensor");
            return Err(err(
                K::OffsetsOutOfOrder,
                format!("data_offsets [{s}, {t}] overlap tensor '{p}', which ends at {expected}"),
            ));
        }
        if s > expected {
            if t > data_len {
                return Err(err(
                    K::OffsetsOutOfBounds,
                    format!(
                        "data_offsets [{s}, {t}] lie outside the data section of {data_len} bytes"
                    ),
                ));
            }
            let after =
                prev.map_or("the start of the data section".into(), |p| format!("tensor '{p}'"));
            return Err(err(
                K::OffsetsOutOfOrder,
                format!(
                    "data_offsets [{s}, {t}] leave a gap after {after} (expected start {expected}); \
                     tensor data must be contiguous"
                ),
            ));
        }
        if t > data_len {
            let missing = (t - data_len) as u64;
            return Err(err(
                K::Truncated,
                format!(
                    "file is truncated: data_offsets [{s}, {t}] need {} bytes but the file has \
                     {file_len}",
                    file_len.saturating_add(missing)
                ),
            ));
        }
        expected = t;
        prev = Some(name);
    }
    if expected != data_len {
        return Err(LoadError::new(
            path,
            K::TrailingData,
            format!(
                "data section holds {data_len} bytes but the tensors cover only {expected}; \
                 {} bytes trail the last tensor",
                data_len - expected
            ),
        ));
    }
    Ok(())
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::io::testdir::TestDir;
    use crate::rng::SplitMix64;

    /// A file from a literal header (padded with spaces to a multiple of 8,
    /// as the writer does) and data bytes.
    pub(crate) fn raw(header: &str, data: &[u8]) -> Vec<u8> {
        let mut h = header.as_bytes().to_vec();
        while h.len() % 8 != 0 {
            h.push(b' ');
        }
        let mut out = (h.len() as u64).to_le_bytes().to_vec();
        out.extend_from_slice(&h);
        out.extend_from_slice(data);
        out
    }

    fn f32s(v: &[f32]) -> Vec<u8> {
        v.iter().flat_map(|x| x.to_le_bytes()).collect()
    }

    /// Write `bytes` as `name` in `dir`, try to open it, return the error.
    fn open_err(dir: &TestDir, name: &str, bytes: &[u8]) -> LoadError {
        let p = dir.join(name);
        std::fs::write(&p, bytes).unwrap();
        TensorFile::open(&p).expect_err("a bad file must not open")
    }

    #[test]
    fn reads_a_hand_made_file() {
        let dir = TestDir::new("file-ok");
        let header = r#"{"__metadata__":{"format":"pt"},"w":{"dtype":"F32","shape":[2,2],"data_offsets":[0,16]},"b":{"dtype":"F16","shape":[2],"data_offsets":[16,20]}}"#;
        let mut data = f32s(&[1.0, -0.0, 0.0, 2.5]);
        data.extend_from_slice(&half::f16::from_f32(0.5).to_le_bytes());
        data.extend_from_slice(&half::f16::from_f32(0.0).to_le_bytes());
        let p = dir.join("m.safetensors");
        std::fs::write(&p, raw(header, &data)).unwrap();
        let f = TensorFile::open(&p).unwrap();
        let names: Vec<_> = f.tensors().iter().map(|t| t.name.as_str()).collect();
        assert_eq!(names, ["b", "w"]);
        assert_eq!(f.names_in_file_order().collect::<Vec<_>>(), ["w", "b"]);
        assert_eq!(f.get("w").unwrap().shape, [2, 2]);
        assert_eq!(f.get("w").unwrap().params(), 4);
        assert!(f.get("w").unwrap().is_float());
        assert_eq!(f.metadata().unwrap()["format"], "pt");
        assert_eq!(f.read_f64("w").unwrap(), [1.0, -0.0, 0.0, 2.5]);
        assert_eq!(f.read_f64("b").unwrap(), [0.5, 0.0]);
        assert_eq!(f.read_rows_f64("w", 1..2).unwrap(), [0.0, 2.5]);
        assert_eq!(f.read_rows_f64("w", 1..1).unwrap(), Vec::<f64>::new());
        assert_eq!(f.zero_fraction("w").unwrap(), 0.5);
        assert_eq!(f.zero_fraction("b").unwrap(), 0.5);
        assert_eq!(f.bytes("b").unwrap(), &data[16..20]);
        // The header is 8-aligned, so `w` starts 4-aligned and is borrowed.
        let w = f.read_f32("w").unwrap();
        assert!(matches!(w, Cow::Borrowed(_)));
        assert_eq!(&*w, &[1.0, -0.0, 0.0, 2.5]);
        assert!(matches!(f.read_f32("b").unwrap(), Cow::Owned(_)));
    }

    #[test]
    fn misaligned_f32_is_copied() {
        let dir = TestDir::new("file-misaligned");
        let header = r#"{"a":{"dtype":"U8","shape":[1],"data_offsets":[0,1]},"w":{"dtype":"F32","shape":[1],"data_offsets":[1,5]}}"#;
        let mut data = vec![7u8];
        data.extend_from_slice(&3.5f32.to_le_bytes());
        let p = dir.join("m.safetensors");
        std::fs::write(&p, raw(header, &data)).unwrap();
        let f = TensorFile::open(&p).unwrap();
        let w = f.read_f32("w").unwrap();
        assert!(matches!(w, Cow::Owned(_)));
        assert_eq!(&*w, &[3.5]);
    }

    #[test]
    fn reading_errors_name_file_and_tensor() {
        let dir = TestDir::new("file-read-err");
        let header = r#"{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,24]},"i":{"dtype":"I64","shape":[1],"data_offsets":[24,32]},"e":{"dtype":"F4","shape":[2],"data_offsets":[32,33]}}"#;
        let mut data = f32s(&[0.0, 1.0, 2.0, 3.0, f32::NAN, 5.0]);
        data.extend_from_slice(&0i64.to_le_bytes());
        data.push(0);
        let p = dir.join("nan.safetensors");
        std::fs::write(&p, raw(header, &data)).unwrap();
        let f = TensorFile::open(&p).unwrap();
        let e = f.read_f64("w").unwrap_err();
        assert_eq!(e.kind(), K::NonFinite { index: 4 });
        assert_eq!(e.to_string(), format!("{}: tensor 'w': contains NaN at index 4", p.display()));
        // Flat index in the whole tensor, not in the slice read.
        assert_eq!(f.read_rows_f64("w", 1..2).unwrap_err().kind(), K::NonFinite { index: 4 });
        assert_eq!(f.read_rows_f64("w", 0..1).unwrap(), [0.0, 1.0, 2.0]);
        assert_eq!(f.read_f32("w").unwrap_err().kind(), K::NonFinite { index: 4 });
        let e = f.read_rows_f64("w", 1..3).unwrap_err();
        assert_eq!(e.kind(), K::BadRange);
        assert!(e.to_string().contains("rows 1..3 are outside 0..2"), "{e}");
        let e = f.read_f64("i").unwrap_err();
        assert_eq!(e.kind(), K::UnsupportedDtype);
        assert!(e.to_string().contains("tensor 'i': dtype I64"), "{e}");
        assert_eq!(f.zero_fraction("i").unwrap(), 1.0);
        assert_eq!(f.zero_fraction("e").unwrap_err().kind(), K::UnsupportedDtype);
        let e = f.read_f64("nope").unwrap_err();
        assert_eq!(e.kind(), K::NoSuchTensor);
        assert!(e.to_string().contains("tensor 'nope'"), "{e}");
    }

    #[test]
    fn inf_is_reported_with_sign_and_index() {
        let dir = TestDir::new("file-inf");
        let header = r#"{"w":{"dtype":"BF16","shape":[3],"data_offsets":[0,6]}}"#;
        let data: Vec<u8> = [1.0f32, 2.0, f32::NEG_INFINITY]
            .iter()
            .flat_map(|&x| half::bf16::from_f32(x).to_le_bytes())
            .collect();
        let p = dir.join("inf.safetensors");
        std::fs::write(&p, raw(header, &data)).unwrap();
        let e = TensorFile::open(&p).unwrap().read_f64("w").unwrap_err();
        assert_eq!(e.kind(), K::NonFinite { index: 2 });
        assert!(
            e.to_string().ends_with("inf.safetensors: tensor 'w': contains -inf at index 2"),
            "{e}"
        );
    }

    #[test]
    fn missing_file() {
        let dir = TestDir::new("file-missing");
        let p = dir.join("absent.safetensors");
        let e = TensorFile::open(&p).unwrap_err();
        assert_eq!(e.kind(), K::NotFound);
        assert!(e.to_string().contains("absent.safetensors: no such file"), "{e}");
    }

    #[test]
    fn truncated_files() {
        let dir = TestDir::new("file-truncated");
        let e = open_err(&dir, "short.safetensors", &[1, 0, 0]);
        assert_eq!(e.kind(), K::Truncated);
        assert!(e.to_string().contains("short.safetensors: file is truncated: 3 bytes"), "{e}");

        let mut b = 1000u64.to_le_bytes().to_vec();
        b.extend_from_slice(b"{}");
        let e = open_err(&dir, "hdr.safetensors", &b);
        assert_eq!(e.kind(), K::Truncated);
        assert!(
            e.to_string().contains("header length 1000 needs 1008 bytes but the file has 10"),
            "{e}"
        );

        let header = r#"{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"b":{"dtype":"F32","shape":[2],"data_offsets":[8,16]}}"#;
        let e = open_err(&dir, "data.safetensors", &raw(header, &[0; 12]));
        assert_eq!(e.kind(), K::Truncated);
        assert!(e.to_string().contains("data.safetensors: tensor 'b': file is truncated"), "{e}");

        // A huge tensor: the byte count in the message must not overflow.
        let n = u64::MAX - 3;
        let header = format!(r#"{{"a":{{"dtype":"U8","shape":[{n}],"data_offsets":[0,{n}]}}}}"#);
        let e = open_err(&dir, "huge.safetensors", &raw(&header, &[0; 4]));
        assert_eq!(e.kind(), K::Truncated);
        assert!(e.to_string().contains(&format!("need {} bytes", u64::MAX)), "{e}");
    }

    #[test]
    fn duplicate_tensor_names_are_named_as_duplicates() {
        // JSON keeps the last of two equal keys; the first tensor's bytes
        // would then look like a gap. The message names the duplicate.
        let dir = TestDir::new("file-dup");
        let header = r#"{"w":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"w":{"dtype":"F32","shape":[2],"data_offsets":[8,16]}}"#;
        let e = open_err(&dir, "dup.safetensors", &raw(header, &[0; 16]));
        assert_eq!(e.kind(), K::BadHeader);
        assert_eq!(e.tensor_name(), Some("w"));
        let m = e.to_string();
        assert!(m.contains("'w' appears more than once"), "{m}");
        assert!(!m.contains("gap"), "{m}");
    }

    #[test]
    fn header_not_json() {
        let dir = TestDir::new("file-json");
        let e = open_err(&dir, "j.safetensors", &raw("{\"a\": [1,", &[]));
        assert_eq!(e.kind(), K::HeaderNotJson);
        assert!(e.to_string().contains("j.safetensors: header is not JSON"), "{e}");
        let mut b = 8u64.to_le_bytes().to_vec();
        b.extend_from_slice(&[b'{', 0xff, 0xfe, b'}', b' ', b' ', b' ', b' ']);
        let e = open_err(&dir, "u.safetensors", &b);
        assert_eq!(e.kind(), K::HeaderNotJson);
        assert!(e.to_string().contains("invalid UTF-8 at byte 9"), "{e}");
        let e = open_err(&dir, "arr.safetensors", &raw("[1, 2]", &[]));
        assert_eq!(e.kind(), K::BadHeader);
        let huge = (MAX_HEADER + 1).to_le_bytes();
        let e = open_err(&dir, "huge.safetensors", &huge);
        assert_eq!(e.kind(), K::BadHeader);
    }

    #[test]
    fn bad_entries() {
        let dir = TestDir::new("file-entries");
        let e = open_err(
            &dir,
            "d.safetensors",
            &raw(r#"{"w":{"dtype":"F12","shape":[1],"data_offsets":[0,4]}}"#, &[0; 4]),
        );
        assert_eq!(e.kind(), K::UnknownDtype);
        assert!(e.to_string().contains("d.safetensors: tensor 'w': unknown dtype 'F12'"), "{e}");

        let e = open_err(
            &dir,
            "s.safetensors",
            &raw(r#"{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,20]}}"#, &[0; 20]),
        );
        assert_eq!(e.kind(), K::ShapeMismatch);
        assert!(
            e.to_string().contains(
                "tensor 'w': shape [2, 3] of F32 needs 24 bytes but data_offsets [0, 20] span 20"
            ),
            "{e}"
        );

        let big = format!(
            r#"{{"w":{{"dtype":"F64","shape":[{},{}],"data_offsets":[0,8]}}}}"#,
            u64::MAX,
            u64::MAX
        );
        let e = open_err(&dir, "o.safetensors", &raw(&big, &[0; 8]));
        assert!(matches!(e.kind(), K::ShapeMismatch | K::BadHeader), "{e}");

        let e = open_err(
            &dir,
            "n.safetensors",
            &raw(r#"{"w":{"dtype":"F32","shape":[-1],"data_offsets":[0,4]}}"#, &[0; 4]),
        );
        assert_eq!(e.kind(), K::BadHeader);
        assert!(e.to_string().contains("tensor 'w': missing \"shape\""), "{e}");

        let e = open_err(&dir, "m.safetensors", &raw(r#"{"__metadata__":{"k":1}}"#, &[]));
        assert_eq!(e.kind(), K::BadHeader);
    }

    #[test]
    fn offsets_outside_the_data_section() {
        let dir = TestDir::new("file-oob");
        let header = r#"{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"b":{"dtype":"F32","shape":[2],"data_offsets":[1000,1008]}}"#;
        let e = open_err(&dir, "oob.safetensors", &raw(header, &[0; 16]));
        assert_eq!(e.kind(), K::OffsetsOutOfBounds);
        assert!(
            e.to_string().contains(
                "oob.safetensors: tensor 'b': data_offsets [1000, 1008] lie outside the data section of 16 bytes"
            ),
            "{e}"
        );
    }

    #[test]
    fn overlapping_and_out_of_order_offsets() {
        let dir = TestDir::new("file-order");
        let header = r#"{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"b":{"dtype":"F32","shape":[2],"data_offsets":[4,12]}}"#;
        let e = open_err(&dir, "ov.safetensors", &raw(header, &[0; 12]));
        assert_eq!(e.kind(), K::OffsetsOutOfOrder);
        assert!(
            e.to_string().contains("tensor 'b': data_offsets [4, 12] overlap tensor 'a'"),
            "{e}"
        );

        let header = r#"{"a":{"dtype":"F32","shape":[0],"data_offsets":[8,4]}}"#;
        let e = open_err(&dir, "rev.safetensors", &raw(header, &[0; 8]));
        assert_eq!(e.kind(), K::OffsetsOutOfOrder);
        assert!(
            e.to_string().contains("tensor 'a': data_offsets [8, 4] end before they start"),
            "{e}"
        );

        let header = r#"{"a":{"dtype":"F32","shape":[1],"data_offsets":[4,8]}}"#;
        let e = open_err(&dir, "gap.safetensors", &raw(header, &[0; 8]));
        assert_eq!(e.kind(), K::OffsetsOutOfOrder);
        assert!(e.to_string().contains("leave a gap"), "{e}");

        let header = r#"{"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]}}"#;
        let e = open_err(&dir, "trail.safetensors", &raw(header, &[0; 8]));
        assert_eq!(e.kind(), K::TrailingData);
        assert!(e.to_string().contains("trail.safetensors: data section holds 8 bytes"), "{e}");
    }

    /// Seeded corruption of a valid file (byte flips and every truncation)
    /// must give an error or a file whose tensors all read without panicking.
    #[test]
    fn corrupted_files_never_panic() {
        let dir = TestDir::new("file-fuzz");
        let header = r#"{"__metadata__":{"k":"v"},"w":{"dtype":"F32","shape":[2,2],"data_offsets":[0,16]},"h":{"dtype":"BF16","shape":[3],"data_offsets":[16,22]},"i":{"dtype":"I8","shape":[2],"data_offsets":[22,24]}}"#;
        let good = raw(header, &(0..24).collect::<Vec<u8>>());
        let p = dir.join("f.safetensors");
        let exercise = |bytes: &[u8]| -> bool {
            std::fs::write(&p, bytes).unwrap();
            let Ok(f) = TensorFile::open(&p) else { return false };
            for t in f.tensors() {
                let _ = f.read_f64(&t.name);
                let _ = f.read_f32(&t.name);
                let _ = f.zero_fraction(&t.name);
                let _ = f.read_rows_f64(&t.name, 0..1);
                assert_eq!(Some(f.bytes(&t.name).unwrap().len()), byte_len(t.dtype, t.params()));
            }
            true
        };
        assert!(exercise(&good));
        for len in 0..good.len() {
            assert!(!exercise(&good[..len]), "a file cut to {len} bytes opened");
        }
        let mut rng = SplitMix64::new(0x5eed);
        let mut opened = 0;
        for _ in 0..2000 {
            let mut b = good.clone();
            for _ in 0..1 + rng.below(3) {
                let at = rng.below(b.len() as u64) as usize;
                b[at] = rng.next_u64() as u8;
            }
            opened += usize::from(exercise(&b));
        }
        // Flips in the data section keep the file valid, so some must open.
        assert!(opened > 0 && opened < 2000, "opened {opened} of 2000");
    }

    #[test]
    fn empty_header_and_empty_tensors_are_valid() {
        let dir = TestDir::new("file-empty");
        let p = dir.join("e.safetensors");
        std::fs::write(&p, raw("{}", &[])).unwrap();
        assert!(TensorFile::open(&p).unwrap().tensors().is_empty());
        let header = r#"{"z":{"dtype":"F32","shape":[0,3],"data_offsets":[0,0]},"s":{"dtype":"F64","shape":[],"data_offsets":[0,8]}}"#;
        std::fs::write(&p, raw(header, &1.25f64.to_le_bytes())).unwrap();
        let f = TensorFile::open(&p).unwrap();
        assert_eq!(f.read_f64("s").unwrap(), [1.25]);
        assert_eq!(f.read_f64("z").unwrap(), Vec::<f64>::new());
        assert_eq!(f.zero_fraction("z").unwrap(), 0.0);
    }
}
