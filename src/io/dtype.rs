//! Element types: names, sizes, little-endian decoding to `f32`/`f64`,
//! encoding from `f64`, and zero counting.
//!
//! Entry points: [`parse_dtype`], [`decode_f64`], [`decode_f32`],
//! [`encode_f64`], [`count_zeros`].
//!
//! Key decision: encoding rounds to nearest, ties to even, *from the `f64`
//! value*. `half::f16::from_f64` is not used because it drops the low 32
//! mantissa bits (software path) or rounds through `f32` (F16C path) before
//! rounding again, which gets ties wrong: `1 + 2⁻¹¹ + 2⁻⁴⁰` must round up to
//! `1 + 2⁻¹⁰` in F16 but becomes `1`. We round `f64 → f32` *to odd* and then
//! `f32 → f16/bf16` to nearest even; with at least two extra bits in the
//! intermediate format this double rounding is exact (Boldo & Melquiond,
//! "Emulation of FMA and correctly rounded sums: proved algorithms using
//! rounding to odd", IEEE TC 2008).

use half::{bf16, f16};
use safetensors::Dtype;

/// Every dtype of the safetensors format with its header name.
const NAMES: [(Dtype, &str); 22] = [
    (Dtype::BOOL, "BOOL"),
    (Dtype::F4, "F4"),
    (Dtype::F6_E2M3, "F6_E2M3"),
    (Dtype::F6_E3M2, "F6_E3M2"),
    (Dtype::U8, "U8"),
    (Dtype::I8, "I8"),
    (Dtype::F8_E5M2, "F8_E5M2"),
    (Dtype::F8_E4M3, "F8_E4M3"),
    (Dtype::F8_E8M0, "F8_E8M0"),
    (Dtype::F8_E4M3FNUZ, "F8_E4M3FNUZ"),
    (Dtype::F8_E5M2FNUZ, "F8_E5M2FNUZ"),
    (Dtype::I16, "I16"),
    (Dtype::U16, "U16"),
    (Dtype::F16, "F16"),
    (Dtype::BF16, "BF16"),
    (Dtype::I32, "I32"),
    (Dtype::U32, "U32"),
    (Dtype::F32, "F32"),
    (Dtype::C64, "C64"),
    (Dtype::F64, "F64"),
    (Dtype::I64, "I64"),
    (Dtype::U64, "U64"),
];

/// The dtype written in a header as `name` (case-sensitive, as the format
/// specifies), or `None` if the format has no such dtype.
pub fn parse_dtype(name: &str) -> Option<Dtype> {
    NAMES.iter().find(|(_, n)| *n == name).map(|(d, _)| *d)
}

/// The header name of `dtype`.
pub fn dtype_name(dtype: Dtype) -> &'static str {
    NAMES.iter().find(|(d, _)| *d == dtype).map_or("UNKNOWN", |(_, n)| n)
}

/// A comma-separated list of every dtype name, for error messages.
pub(crate) fn known_names() -> String {
    NAMES.iter().map(|(_, n)| *n).collect::<Vec<_>>().join(", ")
}

/// Whether `dtype` is one of the float types lopper reads and writes.
pub fn is_float(dtype: Dtype) -> bool {
    matches!(dtype, Dtype::F16 | Dtype::BF16 | Dtype::F32 | Dtype::F64)
}

/// Bytes taken by `numel` elements of `dtype`, or `None` on overflow or when
/// sub-byte elements do not fill whole bytes.
pub(crate) fn byte_len(dtype: Dtype, numel: usize) -> Option<usize> {
    let bits = dtype.bitsize();
    if bits % 8 == 0 {
        return numel.checked_mul(bits / 8);
    }
    let total = numel.checked_mul(bits)?;
    (total % 8 == 0).then_some(total / 8)
}

/// Decode little-endian `bytes` of a float `dtype` into `out` (cleared
/// first). Returns `false`, leaving `out` empty, for a non-float dtype.
/// `bytes.len()` must be a multiple of the element size.
pub fn decode_f64(dtype: Dtype, bytes: &[u8], out: &mut Vec<f64>) -> bool {
    out.clear();
    match dtype {
        Dtype::F64 => out.extend(
            bytes
                .chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().expect("chunks_exact(8) yields 8 bytes"))),
        ),
        Dtype::F32 => out.extend(bytes.chunks_exact(4).map(|c| {
            f64::from(f32::from_le_bytes(c.try_into().expect("chunks_exact(4) yields 4 bytes")))
        })),
        Dtype::F16 => {
            out.extend(bytes.chunks_exact(2).map(|c| f16::from_le_bytes([c[0], c[1]]).to_f64()))
        }
        Dtype::BF16 => {
            out.extend(bytes.chunks_exact(2).map(|c| bf16::from_le_bytes([c[0], c[1]]).to_f64()))
        }
        _ => return false,
    }
    true
}

/// As [`decode_f64`], into `f32`. F64 values are rounded to nearest `f32`.
pub fn decode_f32(dtype: Dtype, bytes: &[u8], out: &mut Vec<f32>) -> bool {
    out.clear();
    match dtype {
        Dtype::F64 => out.extend(bytes.chunks_exact(8).map(|c| {
            f64::from_le_bytes(c.try_into().expect("chunks_exact(8) yields 8 bytes")) as f32
        })),
        Dtype::F32 => out.extend(
            bytes
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes(c.try_into().expect("chunks_exact(4) yields 4 bytes"))),
        ),
        Dtype::F16 => {
            out.extend(bytes.chunks_exact(2).map(|c| f16::from_le_bytes([c[0], c[1]]).to_f32()))
        }
        Dtype::BF16 => {
            out.extend(bytes.chunks_exact(2).map(|c| bf16::from_le_bytes([c[0], c[1]]).to_f32()))
        }
        _ => return false,
    }
    true
}

/// Why a value could not be encoded.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum EncodeError {
    /// The target dtype is not a float type lopper writes.
    Unsupported,
    /// Element `index` is NaN or infinite, or overflows the target dtype.
    NotRepresentable {
        /// Flat row-major index.
        index: usize,
        /// The offending value.
        value: f64,
    },
}

impl std::fmt::Display for EncodeError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            EncodeError::Unsupported => f.write_str("the dtype is not a float type lopper writes"),
            EncodeError::NotRepresentable { index, value } => {
                write!(f, "value {value} at index {index} is not representable")
            }
        }
    }
}

/// `v` rounded to `f32` with round-to-odd: truncate toward zero, then set the
/// last mantissa bit if anything was lost.
fn f32_round_to_odd(v: f64) -> f32 {
    let t = v as f32;
    if f64::from(t) == v || !v.is_finite() {
        return t;
    }
    let mut bits = t.to_bits();
    // Sign-magnitude: decrementing the bits moves |t| one ulp toward zero.
    // `t` is never ±0 here when |t| > |v|, since |v| > 0.
    if f64::from(t).abs() > v.abs() {
        bits -= 1;
    }
    f32::from_bits(bits | 1)
}

/// `v` rounded to nearest-even F16.
fn to_f16(v: f64) -> f16 {
    f16::from_f32(f32_round_to_odd(v))
}

/// `v` rounded to nearest-even BF16.
fn to_bf16(v: f64) -> bf16 {
    bf16::from_f32(f32_round_to_odd(v))
}

/// Append `values` encoded little-endian as `dtype` to `out`, rounding to
/// nearest, ties to even. `±0.0` stays `±0.0`.
///
/// # Errors
/// [`EncodeError::Unsupported`] for a non-float dtype;
/// [`EncodeError::NotRepresentable`] for the first NaN, infinity or finite
/// value that overflows to infinity in `dtype` (nothing useful is appended).
pub fn encode_f64(dtype: Dtype, values: &[f64], out: &mut Vec<u8>) -> Result<(), EncodeError> {
    fn put<const N: usize>(
        values: &[f64],
        out: &mut Vec<u8>,
        enc: impl Fn(f64) -> ([u8; N], bool),
    ) -> Result<(), EncodeError> {
        out.reserve(values.len() * N);
        for (index, &value) in values.iter().enumerate() {
            let (bytes, finite) = enc(value);
            if !value.is_finite() || !finite {
                return Err(EncodeError::NotRepresentable { index, value });
            }
            out.extend_from_slice(&bytes);
        }
        Ok(())
    }
    match dtype {
        Dtype::F64 => put(values, out, |v| (v.to_le_bytes(), true)),
        Dtype::F32 => put(values, out, |v| {
            let x = v as f32;
            (x.to_le_bytes(), x.is_finite())
        }),
        Dtype::F16 => put(values, out, |v| {
            let x = to_f16(v);
            (x.to_le_bytes(), x.is_finite())
        }),
        Dtype::BF16 => put(values, out, |v| {
            let x = to_bf16(v);
            (x.to_le_bytes(), x.is_finite())
        }),
        _ => Err(EncodeError::Unsupported),
    }
}

/// Number of elements of `bytes` that are exactly zero (`±0` for floats, `0`
/// for integers, `false` for BOOL), or `None` for dtypes without a single
/// zero encoding we support (sub-byte floats, F8_E8M0, C64).
pub fn count_zeros(dtype: Dtype, bytes: &[u8]) -> Option<usize> {
    // Floats with a sign bit: zero is every bit clear except possibly the sign
    // (the top bit of the last, most significant, byte).
    let signed_zero = |n: usize| {
        bytes
            .chunks_exact(n)
            .filter(|c| c[..n - 1].iter().all(|&b| b == 0) && c[n - 1] & 0x7f == 0)
            .count()
    };
    let all_zero = |n: usize| bytes.chunks_exact(n).filter(|c| c.iter().all(|&b| b == 0)).count();
    Some(match dtype {
        Dtype::F64 => signed_zero(8),
        Dtype::F32 => signed_zero(4),
        Dtype::F16 | Dtype::BF16 => signed_zero(2),
        Dtype::F8_E4M3 | Dtype::F8_E5M2 => signed_zero(1),
        // In the FNUZ encodings 0x80 is NaN; only 0x00 is zero.
        Dtype::F8_E4M3FNUZ | Dtype::F8_E5M2FNUZ => all_zero(1),
        Dtype::BOOL | Dtype::U8 | Dtype::I8 => all_zero(1),
        Dtype::I16 | Dtype::U16 => all_zero(2),
        Dtype::I32 | Dtype::U32 => all_zero(4),
        Dtype::I64 | Dtype::U64 => all_zero(8),
        _ => return None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn enc(dtype: Dtype, v: f64) -> Vec<u8> {
        let mut out = Vec::new();
        encode_f64(dtype, &[v], &mut out).unwrap();
        out
    }

    #[test]
    fn names_round_trip() {
        for (d, n) in NAMES {
            assert_eq!(parse_dtype(n), Some(d));
            assert_eq!(dtype_name(d), n);
            assert_eq!(d.to_string(), n, "our name table disagrees with safetensors");
        }
        assert_eq!(parse_dtype("f32"), None);
        assert_eq!(parse_dtype("F12"), None);
    }

    #[test]
    fn byte_len_checks_overflow_and_sub_byte() {
        assert_eq!(byte_len(Dtype::F32, 6), Some(24));
        assert_eq!(byte_len(Dtype::F4, 4), Some(2));
        assert_eq!(byte_len(Dtype::F4, 3), None);
        assert_eq!(byte_len(Dtype::F64, usize::MAX / 4), None);
        assert_eq!(byte_len(Dtype::U8, usize::MAX), Some(usize::MAX));
        assert_eq!(byte_len(Dtype::F4, usize::MAX / 2), None);
    }

    #[test]
    fn f16_rounds_to_nearest_even_from_f64() {
        let two = |e: i32| 2f64.powi(e);
        // Exact tie: 1 + 2⁻¹¹ lies halfway between 1 and 1 + 2⁻¹⁰; even is 1.
        assert_eq!(enc(Dtype::F16, 1.0 + two(-11)), 0x3c00u16.to_le_bytes());
        // 1 + 3·2⁻¹¹ is halfway between 1 + 2⁻¹⁰ (odd) and 1 + 2⁻⁹ (even).
        assert_eq!(enc(Dtype::F16, 1.0 + 3.0 * two(-11)), 0x3c02u16.to_le_bytes());
        // Just above the tie, by a bit that f32 cannot hold: must round up.
        assert_eq!(enc(Dtype::F16, 1.0 + two(-11) + two(-40)), 0x3c01u16.to_le_bytes());
        // Just below the tie: must round down.
        assert_eq!(enc(Dtype::F16, 1.0 + two(-11) - two(-40)), 0x3c00u16.to_le_bytes());
        // Negative mirror.
        assert_eq!(enc(Dtype::F16, -(1.0 + two(-11) + two(-40))), 0xbc01u16.to_le_bytes());
        // Subnormal: 2⁻²⁴ is the smallest F16; 1.5·2⁻²⁴ + tiny rounds up to 2·2⁻²⁴.
        assert_eq!(enc(Dtype::F16, 1.5 * two(-24) + two(-60)), 0x0002u16.to_le_bytes());
        // Below half the smallest subnormal: flushes to zero.
        assert_eq!(enc(Dtype::F16, 0.49 * two(-24)), 0x0000u16.to_le_bytes());
    }

    #[test]
    fn bf16_rounds_to_nearest_even_from_f64() {
        let two = |e: i32| 2f64.powi(e);
        assert_eq!(enc(Dtype::BF16, 1.0 + two(-8)), 0x3f80u16.to_le_bytes());
        assert_eq!(enc(Dtype::BF16, 1.0 + two(-8) + two(-40)), 0x3f81u16.to_le_bytes());
        assert_eq!(enc(Dtype::BF16, 1.0 + 3.0 * two(-8)), 0x3f82u16.to_le_bytes());
        // Far below the f32 subnormal range the sticky bit still counts.
        assert_eq!(enc(Dtype::BF16, 1e-300), 0x0000u16.to_le_bytes());
    }

    #[test]
    fn zero_stays_zero_and_keeps_its_sign() {
        for d in [Dtype::F16, Dtype::BF16, Dtype::F32, Dtype::F64] {
            let pos = enc(d, 0.0);
            assert!(pos.iter().all(|&b| b == 0), "{d}: +0 became {pos:?}");
            let neg = enc(d, -0.0);
            assert_eq!(count_zeros(d, &neg), Some(1), "{d}: -0 became {neg:?}");
            assert_eq!(*neg.last().unwrap(), 0x80, "{d}: -0 lost its sign");
        }
    }

    #[test]
    fn encode_rejects_non_finite_and_overflow() {
        let mut out = Vec::new();
        let e = encode_f64(Dtype::F16, &[1.0, 70000.0], &mut out).unwrap_err();
        assert_eq!(e, EncodeError::NotRepresentable { index: 1, value: 70000.0 });
        let e = encode_f64(Dtype::F32, &[f64::NAN], &mut out).unwrap_err();
        assert!(matches!(e, EncodeError::NotRepresentable { index: 0, .. }));
        let e = encode_f64(Dtype::F64, &[0.0, f64::NEG_INFINITY], &mut out).unwrap_err();
        assert!(matches!(e, EncodeError::NotRepresentable { index: 1, .. }));
        assert_eq!(encode_f64(Dtype::I64, &[1.0], &mut out), Err(EncodeError::Unsupported));
    }

    #[test]
    fn decode_inverts_encode() {
        let values = [0.0, -0.0, 1.5, -2.25, 65504.0, 1.0 / 1024.0];
        for d in [Dtype::F16, Dtype::BF16, Dtype::F32, Dtype::F64] {
            let mut bytes = Vec::new();
            encode_f64(d, &values, &mut bytes).unwrap();
            assert_eq!(bytes.len(), values.len() * d.bitsize() / 8);
            let mut back = Vec::new();
            assert!(decode_f64(d, &bytes, &mut back));
            let mut back32 = Vec::new();
            assert!(decode_f32(d, &bytes, &mut back32));
            for (i, &v) in values.iter().enumerate() {
                // All test values are exact in every float dtype except 65504
                // in BF16 (8 significant bits): 65504 = 0xffe0 → 65536.
                let want = if d == Dtype::BF16 && v == 65504.0 { 65536.0 } else { v };
                assert_eq!(back[i].to_bits(), want.to_bits(), "{d} index {i}");
                assert_eq!(back32[i].to_bits(), (want as f32).to_bits(), "{d} index {i}");
            }
        }
        let mut out = vec![1.0];
        assert!(!decode_f64(Dtype::I32, &[0; 4], &mut out));
        assert!(out.is_empty());
    }

    #[test]
    fn count_zeros_per_dtype() {
        // F32: +0, -0, 1.0, smallest subnormal (not zero).
        let mut b = Vec::new();
        for v in [0.0f32, -0.0, 1.0, f32::from_bits(1)] {
            b.extend_from_slice(&v.to_le_bytes());
        }
        assert_eq!(count_zeros(Dtype::F32, &b), Some(2));
        // I16: 0, -32768 (0x8000 is not zero for integers), 1.
        let b: Vec<u8> = [0i16, i16::MIN, 1].iter().flat_map(|v| v.to_le_bytes()).collect();
        assert_eq!(count_zeros(Dtype::I16, &b), Some(1));
        assert_eq!(count_zeros(Dtype::F8_E4M3, &[0x00, 0x80, 0x01]), Some(2));
        assert_eq!(count_zeros(Dtype::F8_E4M3FNUZ, &[0x00, 0x80, 0x01]), Some(1));
        assert_eq!(count_zeros(Dtype::F4, &[0]), None);
    }
}
