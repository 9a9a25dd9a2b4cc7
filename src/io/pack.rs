//! The `.sprig` file: pruned layers in their sparse layouts, written by
//! `lopper pack` next to the dense-with-zeros safetensors file.
//!
//! Entry points: [`write_pack`] and [`read_pack`]. The byte layout is
//! specified in docs/pack-format.md; in short, all integers little-endian:
//! a 48-byte header (magic, version, layer count, name table, file length),
//! one 64-byte record per layer sorted by name, the UTF-8 names, then each
//! layer's sections (rows: offsets, indices, values; groups: values,
//! positions), every section starting at a multiple of 64 bytes with zero
//! padding in between and nothing after the last one.
//!
//! Key decisions: the reader validates the header, every record and the
//! tiling of the sections with checked arithmetic before it decodes a
//! section, and each layer's contents through
//! [`RowCompressed::from_parts`]/[`GroupPacked::from_parts`], so a corrupt
//! file is an error naming the file and layer, never a panic or a wrong
//! product.

use std::fs::File;
use std::io::Write;
use std::path::Path;

use memmap2::Mmap;
use safetensors::Dtype;

use super::{LoadError, LoadErrorKind as K, WriteError};
use crate::sparse::{ColumnIndices, GroupPacked, RowCompressed, SparseWeight};

/// The first 8 bytes of every `.sprig` file.
pub const SPRIG_MAGIC: [u8; 8] = *b"LOPSPRIG";
/// `(major, minor)` written; readers accept any minor of their major.
pub const SPRIG_VERSION: (u16, u16) = (1, 0);

const HEADER: usize = 48;
const RECORD: usize = 64;
const ALIGN: usize = 64;
const KIND_ROWS: u8 = 1;
const KIND_GROUPS: u8 = 2;

/// One layer of a `.sprig` file.
#[derive(Clone, Debug, PartialEq)]
pub struct PackedLayer {
    /// Tensor name in the dense model.
    pub name: String,
    /// Dtype of the tensor in the dense model (values are stored as F32;
    /// F16 and BF16 convert exactly, F64 rounds to nearest).
    pub source_dtype: Dtype,
    /// The weight.
    pub weight: SparseWeight,
}

fn dtype_code(d: Dtype) -> Option<u8> {
    match d {
        Dtype::F32 => Some(0),
        Dtype::F16 => Some(1),
        Dtype::BF16 => Some(2),
        Dtype::F64 => Some(3),
        _ => None,
    }
}

fn code_dtype(c: u8) -> Option<Dtype> {
    [Dtype::F32, Dtype::F16, Dtype::BF16, Dtype::F64].get(usize::from(c)).copied()
}

fn align(n: usize) -> usize {
    n.div_ceil(ALIGN) * ALIGN
}

/// Byte lengths of a layer's three sections (the third is 0 for groups).
fn section_lengths(w: &SparseWeight) -> [usize; 3] {
    match w {
        SparseWeight::Rows(s) => [4 * s.row_start().len(), s.cols().width() * s.nnz(), 4 * s.nnz()],
        SparseWeight::Groups(s) => [4 * s.values().len(), s.positions().len(), 0],
    }
}

/// Write `layers` to `path` atomically (see [`super::write_atomic`]).
/// Layers are stored sorted by name.
///
/// # Errors
/// [`super::WriteErrorKind::BadOutput`] for duplicate or empty names or a
/// source dtype other than F32/F16/BF16/F64; [`super::WriteErrorKind::Io`].
pub fn write_pack(path: &Path, layers: &[PackedLayer]) -> Result<(), WriteError> {
    let bad = |name: &str, d: String| {
        WriteError::new(path, super::WriteErrorKind::BadOutput, d).tensor(name)
    };
    let mut order: Vec<&PackedLayer> = layers.iter().collect();
    order.sort_by(|a, b| a.name.cmp(&b.name));
    for w in order.windows(2) {
        if w[0].name == w[1].name {
            return Err(bad(&w[0].name, "two layers have this name".into()));
        }
    }
    let mut names = Vec::new();
    let mut records = Vec::with_capacity(order.len() * RECORD);
    let names_len: usize = order.iter().map(|l| l.name.len()).sum();
    let names_at = HEADER + RECORD * order.len();
    let mut at = align(names_at + names_len);
    let mut plan = Vec::with_capacity(order.len());
    for l in &order {
        if l.name.is_empty() {
            return Err(bad("", "a layer has an empty name".into()));
        }
        let code = dtype_code(l.source_dtype).ok_or_else(|| {
            bad(&l.name, format!("source dtype {} is not a float", l.source_dtype))
        })?;
        let lens = section_lengths(&l.weight);
        let mut offsets = [0usize; 3];
        for (o, len) in offsets.iter_mut().zip(lens) {
            if len > 0 {
                *o = at;
                at = align(at + len);
            }
        }
        let (d_out, d_in) = l.weight.shape();
        let (kind, bits, n, m, count) = match &l.weight {
            SparseWeight::Rows(s) => (KIND_ROWS, 8 * s.cols().width(), 0, 0, s.nnz()),
            SparseWeight::Groups(s) => {
                let (n, m) = s.pattern();
                (KIND_GROUPS, 4, n, m, s.values().len())
            }
        };
        let mut r = Vec::with_capacity(RECORD);
        r.extend((names.len() as u32).to_le_bytes());
        r.extend((l.name.len() as u32).to_le_bytes());
        r.extend([kind, bits as u8, n as u8, m as u8, code, 0, 0, 0]);
        for v in [d_out, d_in, count, offsets[0], offsets[1], offsets[2]] {
            r.extend((v as u64).to_le_bytes());
        }
        debug_assert_eq!(r.len(), RECORD);
        records.extend(r);
        names.extend(l.name.as_bytes());
        plan.push((offsets, lens));
    }
    // The file ends where the last section ends, without padding.
    let file_len = plan
        .iter()
        .flat_map(|(o, l)| o.iter().zip(l).filter(|(_, l)| **l > 0).map(|(o, l)| o + l))
        .max()
        .unwrap_or(names_at + names_len);
    let mut header = Vec::with_capacity(HEADER);
    header.extend(SPRIG_MAGIC);
    header.extend(SPRIG_VERSION.0.to_le_bytes());
    header.extend(SPRIG_VERSION.1.to_le_bytes());
    header.extend((order.len() as u32).to_le_bytes());
    for v in [names_at, names_len, file_len, 0] {
        header.extend((v as u64).to_le_bytes());
    }
    debug_assert_eq!(header.len(), HEADER);

    super::write_atomic(path, |w| {
        w.write_all(&header)?;
        w.write_all(&records)?;
        w.write_all(&names)?;
        let mut pos = names_at + names_len;
        for (l, (offsets, lens)) in order.iter().zip(&plan) {
            for k in 0..3 {
                if lens[k] == 0 {
                    continue;
                }
                w.write_all(&vec![0u8; offsets[k] - pos])?;
                write_section(w, &l.weight, k)?;
                pos = offsets[k] + lens[k];
            }
        }
        Ok(())
    })
}

fn write_section(w: &mut impl Write, weight: &SparseWeight, k: usize) -> std::io::Result<()> {
    fn floats(w: &mut impl Write, v: &[f32]) -> std::io::Result<()> {
        for c in v.chunks(4096) {
            let b: Vec<u8> = c.iter().flat_map(|x| x.to_le_bytes()).collect();
            w.write_all(&b)?;
        }
        Ok(())
    }
    match (weight, k) {
        (SparseWeight::Rows(s), 0) => {
            let b: Vec<u8> = s.row_start().iter().flat_map(|x| x.to_le_bytes()).collect();
            w.write_all(&b)
        }
        (SparseWeight::Rows(s), 1) => match s.cols() {
            ColumnIndices::U16(c) => {
                w.write_all(&c.iter().flat_map(|x| x.to_le_bytes()).collect::<Vec<u8>>())
            }
            ColumnIndices::U32(c) => {
                w.write_all(&c.iter().flat_map(|x| x.to_le_bytes()).collect::<Vec<u8>>())
            }
        },
        (SparseWeight::Rows(s), _) => floats(w, s.values()),
        (SparseWeight::Groups(s), 0) => floats(w, s.values()),
        (SparseWeight::Groups(s), _) => w.write_all(s.positions()),
    }
}

fn u16_at(b: &[u8], at: usize) -> u16 {
    u16::from_le_bytes(b[at..at + 2].try_into().expect("2 bytes"))
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().expect("4 bytes"))
}

fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().expect("8 bytes"))
}

/// Read and validate a `.sprig` file; layers come back sorted by name.
///
/// # Errors
/// [`K::NotFound`], [`K::Io`]; [`K::Truncated`] and [`K::TrailingData`] when
/// the length differs from the header's; [`K::BadHeader`] for a wrong magic,
/// an unknown major version, or a malformed record or name;
/// [`K::OffsetsOutOfOrder`] when sections do not tile the file as specified;
/// [`K::InvalidPackedLayer`] naming the layer whose contents break the
/// layout's rules.
pub fn read_pack(path: &Path) -> Result<Vec<PackedLayer>, LoadError> {
    super::check_regular(path)?;
    let file = File::open(path).map_err(|e| LoadError::io(path, "open", e))?;
    let meta = file.metadata().map_err(|e| LoadError::io(path, "stat", e))?;
    if meta.is_dir() {
        return Err(LoadError::new(path, K::Io, "is a directory; expected a .sprig file"));
    }
    if meta.len() == 0 {
        return Err(LoadError::new(path, K::Truncated, "file is empty; expected a .sprig file"));
    }
    // SAFETY: read-only map; lopper replaces files only by rename.
    let map = unsafe { Mmap::map(&file) }.map_err(|e| LoadError::io(path, "map", e))?;
    parse(path, &map)
}

pub(crate) fn parse(path: &Path, b: &[u8]) -> Result<Vec<PackedLayer>, LoadError> {
    let err = |kind, d: String| LoadError::new(path, kind, d);
    if b.len() < 8 || b[..8] != SPRIG_MAGIC {
        return Err(err(
            K::BadHeader,
            "not a .sprig file (its first 8 bytes are not LOPSPRIG)".into(),
        ));
    }
    if b.len() < HEADER {
        return Err(err(
            K::Truncated,
            format!("file is truncated: {} bytes, header needs {HEADER}", b.len()),
        ));
    }
    let (major, minor) = (u16_at(b, 8), u16_at(b, 10));
    if major != SPRIG_VERSION.0 {
        return Err(err(
            K::BadHeader,
            format!(
                "format version {major}.{minor} is not supported; this lopper reads version {}.x",
                SPRIG_VERSION.0
            ),
        ));
    }
    let count = u32_at(b, 12) as usize;
    let (names_at, names_len, file_len) = (u64_at(b, 16), u64_at(b, 24), u64_at(b, 32));
    if file_len != b.len() as u64 {
        let kind = if file_len > b.len() as u64 { K::Truncated } else { K::TrailingData };
        return Err(err(
            kind,
            format!("header says {file_len} bytes but the file has {}", b.len()),
        ));
    }
    let records_end = count.checked_mul(RECORD).and_then(|r| r.checked_add(HEADER));
    let names_end = names_at.checked_add(names_len);
    match (records_end, names_end) {
        (Some(r), Some(e)) if names_at == r as u64 && e <= file_len => {}
        _ => {
            return Err(err(
                K::BadHeader,
                format!(
                    "{count} layer records and a name table at {names_at} of {names_len} bytes \
                     do not fit a {file_len}-byte file"
                ),
            ))
        }
    }
    let (names_at, names_len) = (names_at as usize, names_len as usize);
    let names = &b[names_at..names_at + names_len];
    let mut pos = names_at + names_len;
    let mut layers: Vec<PackedLayer> = Vec::with_capacity(count);
    for i in 0..count {
        let r = &b[HEADER + i * RECORD..HEADER + (i + 1) * RECORD];
        let (n_at, n_len) = (u32_at(r, 0) as usize, u32_at(r, 4) as usize);
        let name = n_at
            .checked_add(n_len)
            .filter(|&e| e <= names_len && n_len > 0)
            .and_then(|e| std::str::from_utf8(&names[n_at..e]).ok())
            .ok_or_else(|| {
                err(
                    K::BadHeader,
                    format!("layer record {i}: name is not valid UTF-8 in the name table"),
                )
            })?
            .to_owned();
        if layers.last().is_some_and(|l| l.name >= name) {
            return Err(err(
                K::BadHeader,
                "layer records are not sorted by name without duplicates".into(),
            )
            .tensor(&name));
        }
        let bad = |kind, d: String| LoadError::new(path, kind, d).tensor(&name);
        let (kind, bits, n, m, code) = (r[8], r[9], usize::from(r[10]), usize::from(r[11]), r[12]);
        if r[13..16] != [0, 0, 0] {
            return Err(bad(K::BadHeader, "reserved record bytes are not zero".into()));
        }
        let source_dtype = code_dtype(code)
            .ok_or_else(|| bad(K::BadHeader, format!("unknown source dtype code {code}")))?;
        let field = |k: usize| usize::try_from(u64_at(r, 16 + 8 * k)).ok();
        let (Some(d_out), Some(d_in), Some(count), Some(o0), Some(o1), Some(o2)) =
            (field(0), field(1), field(2), field(3), field(4), field(5))
        else {
            return Err(bad(
                K::BadHeader,
                "a record field does not fit this machine's usize".into(),
            ));
        };
        let lens = match (kind, bits) {
            (KIND_ROWS, 16 | 32) if n == 0 && m == 0 => [
                d_out.checked_add(1).and_then(|v| v.checked_mul(4)),
                count.checked_mul(usize::from(bits / 8)),
                count.checked_mul(4),
            ],
            (KIND_GROUPS, 4) => [count.checked_mul(4), Some(count.div_ceil(2)), Some(0)],
            _ => {
                return Err(bad(
                    K::BadHeader,
                    format!("unknown layout: kind {kind}, {bits}-bit indices, n {n}, m {m}"),
                ))
            }
        };
        let offsets = [o0, o1, o2];
        let mut sections: [&[u8]; 3] = [&[], &[], &[]];
        for k in 0..3 {
            let Some(len) = lens[k] else {
                return Err(bad(K::BadHeader, "section length overflows".into()));
            };
            if len == 0 {
                if offsets[k] != 0 {
                    return Err(bad(
                        K::OffsetsOutOfOrder,
                        format!("empty section {k} has offset {}", offsets[k]),
                    ));
                }
                continue;
            }
            let want = align(pos);
            let end = offsets[k].checked_add(len).filter(|&e| e <= b.len());
            if offsets[k] != want || end.is_none() {
                return Err(bad(
                    K::OffsetsOutOfOrder,
                    format!(
                        "section {k} ({len} bytes) at offset {}; expected offset {want} within \
                         the {}-byte file",
                        offsets[k],
                        b.len()
                    ),
                ));
            }
            if b[pos..want].iter().any(|&x| x != 0) {
                return Err(bad(
                    K::InvalidPackedLayer,
                    "padding before a section is not zero".into(),
                ));
            }
            sections[k] = &b[want..want + len];
            pos = want + len;
        }
        let invalid = |e: crate::sparse::SparseError| bad(K::InvalidPackedLayer, e.to_string());
        let floats = |s: &[u8]| -> Vec<f32> {
            s.chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().expect("4 bytes"))).collect()
        };
        let weight = if kind == KIND_ROWS {
            let row_start: Vec<u32> = sections[0]
                .chunks_exact(4)
                .map(|c| u32::from_le_bytes(c.try_into().expect("4")))
                .collect();
            let cols = if bits == 16 {
                ColumnIndices::U16(
                    sections[1].chunks_exact(2).map(|c| u16::from_le_bytes([c[0], c[1]])).collect(),
                )
            } else {
                ColumnIndices::U32(
                    sections[1]
                        .chunks_exact(4)
                        .map(|c| u32::from_le_bytes(c.try_into().expect("4")))
                        .collect(),
                )
            };
            let values = floats(sections[2]);
            SparseWeight::Rows(
                RowCompressed::from_parts(d_out, d_in, row_start, cols, values).map_err(invalid)?,
            )
        } else {
            let values = floats(sections[0]);
            SparseWeight::Groups(
                GroupPacked::from_parts(d_out, d_in, n, m, values, sections[1].to_vec())
                    .map_err(invalid)?,
            )
        };
        layers.push(PackedLayer { name, source_dtype, weight });
    }
    if pos != b.len() {
        return Err(err(
            K::TrailingData,
            format!("{} bytes after the last section", b.len() - pos),
        ));
    }
    Ok(layers)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::io::testdir::TestDir;

    fn layers() -> Vec<PackedLayer> {
        // Rows with u16 indices (one empty row), rows with u32 indices, and a
        // 2:4 layer with a padded group and an odd slot count.
        let a = [0.0, 1.5, 0.0, -2.0, 0.0, 0.0, 0.0, 0.0, 3.0, 0.0, 0.0, 0.25];
        let mut wide = vec![0.0f32; 2 * 70_000];
        wide[3] = 1.0;
        wide[70_000 + 69_999] = -4.0;
        let g = [0.0, 0.0, 2.0, 0.0, 0.0, 0.0, 0.0, 5.0, 0.0, 7.0];
        vec![
            PackedLayer {
                name: "b.weight".into(),
                source_dtype: Dtype::BF16,
                weight: SparseWeight::Rows(RowCompressed::from_dense(&a, 3, 4).unwrap()),
            },
            PackedLayer {
                name: "a.weight".into(),
                source_dtype: Dtype::F32,
                weight: SparseWeight::Rows(RowCompressed::from_dense(&wide, 2, 70_000).unwrap()),
            },
            PackedLayer {
                name: "c.weight".into(),
                source_dtype: Dtype::F16,
                weight: SparseWeight::Groups(GroupPacked::from_dense(&g, 1, 10, 1, 4).unwrap()),
            },
        ]
    }

    #[test]
    fn round_trip_sorted_and_aligned() {
        let dir = TestDir::new("pack");
        let path = dir.join("m.sprig");
        let mut want = layers();
        write_pack(&path, &want).unwrap();
        let got = read_pack(&path).unwrap();
        want.sort_by(|a, b| a.name.cmp(&b.name));
        assert_eq!(got, want);
        let bytes = std::fs::read(&path).unwrap();
        assert_eq!(&bytes[..8], b"LOPSPRIG");
        assert_eq!(u64_at(&bytes, 32), bytes.len() as u64);
        // Every section offset is a multiple of 64.
        for i in 0..3 {
            for k in 0..3 {
                assert_eq!(u64_at(&bytes, HEADER + i * RECORD + 40 + 8 * k) % 64, 0);
            }
        }
        // No temp file is left behind.
        assert_eq!(TestDir::list(dir.path()), vec!["m.sprig"]);
    }

    /// Byte-exact layout of a one-layer file, written out by hand from
    /// docs/pack-format.md.
    #[test]
    fn golden_bytes() {
        let dir = TestDir::new("pack-golden");
        let path = dir.join("g.sprig");
        let w = [0.0, 2.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0];
        let layer = PackedLayer {
            name: "l".into(),
            source_dtype: Dtype::F32,
            weight: SparseWeight::Rows(RowCompressed::from_dense(&w, 2, 4).unwrap()),
        };
        write_pack(&path, &[layer]).unwrap();
        let mut want = Vec::new();
        want.extend(b"LOPSPRIG");
        want.extend([1, 0, 0, 0, 1, 0, 0, 0]); // version 1.0, 1 layer
        for v in [112u64, 1, 264, 0] {
            want.extend(v.to_le_bytes()); // names at, names len, file len, reserved
        }
        want.extend([0, 0, 0, 0, 1, 0, 0, 0]); // name at 0, length 1
        want.extend([1, 16, 0, 0, 0, 0, 0, 0]); // rows, 16-bit indices, F32
        for v in [2u64, 4, 2, 128, 192, 256] {
            want.extend(v.to_le_bytes()); // d_out, d_in, nnz, section offsets
        }
        want.push(b'l');
        want.resize(128, 0);
        want.extend([0u32, 1, 2].iter().flat_map(|v| v.to_le_bytes()));
        want.resize(192, 0);
        want.extend([1u16, 2].iter().flat_map(|v| v.to_le_bytes()));
        want.resize(256, 0);
        want.extend([2.0f32, 1.0].iter().flat_map(|v| v.to_le_bytes()));
        assert_eq!(want.len(), 264); // the file ends right after the values
        assert_eq!(std::fs::read(&path).unwrap(), want);
    }

    #[test]
    fn every_error_kind_names_file_and_layer() {
        let dir = TestDir::new("pack-bad");
        let good = dir.join("good.sprig");
        write_pack(&good, &layers()).unwrap();
        let bytes = std::fs::read(&good).unwrap();
        let check = |mutate: &dyn Fn(&mut Vec<u8>), kind: K, needle: &str| {
            let mut b = bytes.clone();
            mutate(&mut b);
            let p = dir.join("bad.sprig");
            std::fs::write(&p, &b).unwrap();
            let e = read_pack(&p).unwrap_err();
            assert_eq!(e.kind(), kind, "{e}");
            let msg = e.to_string();
            assert!(msg.starts_with(&p.display().to_string()), "{msg}");
            assert!(msg.contains(needle), "{msg} lacks {needle}");
            assert!(!msg.contains('\n'));
        };
        check(&|b| b[0] = b'X', K::BadHeader, "not a .sprig file");
        check(&|b| b[8] = 2, K::BadHeader, "version 2.0");
        check(&|b| b.truncate(b.len() - 1), K::Truncated, "header says");
        check(&|b| b.push(0), K::TrailingData, "header says");
        check(&|b| b.truncate(20), K::Truncated, "header needs");
        // Layer 0 is a.weight: move its first section by 64 bytes.
        check(
            &|b| {
                let o = u64_at(b, HEADER + 40) + 64;
                b[HEADER + 40..HEADER + 48].copy_from_slice(&o.to_le_bytes());
            },
            K::OffsetsOutOfOrder,
            "tensor 'a.weight': section 0",
        );
        // Layer 1 (b.weight, 4 wide): its first column index becomes 9.
        check(
            &|b| {
                let o = u64_at(b, HEADER + RECORD + 48) as usize;
                b[o..o + 2].copy_from_slice(&9u16.to_le_bytes());
            },
            K::InvalidPackedLayer,
            "tensor 'b.weight': row 0: column 9 is outside 0..4",
        );
        // A nonzero padding byte before layer 2's first section.
        check(
            &|b| {
                let o = u64_at(b, HEADER + 2 * RECORD + 40) as usize;
                b[o - 1] = 1;
            },
            K::InvalidPackedLayer,
            "padding",
        );
        // Swap the first two names: records no longer sorted.
        check(
            &|b| {
                let at = u64_at(b, 16) as usize;
                b[at] = b'z';
            },
            K::BadHeader,
            "sorted",
        );
        check(&|b| b[HEADER + 8] = 9, K::BadHeader, "unknown layout");
        check(&|b| b[HEADER + 12] = 7, K::BadHeader, "dtype code 7");
        check(&|b| b[12] = 200, K::BadHeader, "do not fit");
        let e = read_pack(&dir.join("missing.sprig")).unwrap_err();
        assert_eq!(e.kind(), K::NotFound);
    }

    #[test]
    fn duplicate_names_are_refused_before_writing() {
        let dir = TestDir::new("pack-dup");
        let mut l = layers();
        l[1].name = "b.weight".into();
        let e = write_pack(&dir.join("d.sprig"), &l).unwrap_err();
        assert!(e.to_string().contains("two layers have this name"), "{e}");
        assert!(TestDir::list(dir.path()).is_empty());
    }
}
