//! A seeded mutation fuzzer for lopper's three binary/JSON readers, on the
//! stable toolchain: the safetensors header parser, the shard index reader
//! and the `.sprig` reader. Each target starts from valid files, applies one
//! to four random mutations (bit flips, byte inserts and deletes, edits of
//! length and offset fields, JSON-token splices, truncation, chunk copies)
//! and calls the parser in-process under `catch_unwind`. A run fails on a
//! panic, or on an error whose printed form (as `lopper: error: …` shows
//! it) is empty or more than one line.
//!
//! Used by `tests/fuzz.rs` (a few thousand executions per target, in the
//! test suite) and `benches/fuzz.rs` (the long run:
//! `cargo bench --bench fuzz -- 1000000`).

#![allow(dead_code)]

use lopper::io::{self, LoadError, PackedLayer};
use lopper::rng::SplitMix64;
use lopper::sparse::{GroupPacked, RowCompressed, SparseWeight};
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;

/// One parser and the valid files its mutations start from.
pub struct Target {
    pub name: &'static str,
    pub seeds: Vec<Vec<u8>>,
    pub parse: fn(&Path, &[u8]) -> Result<usize, LoadError>,
}

/// What a run found.
#[derive(Debug, Default)]
pub struct Outcome {
    pub execs: u64,
    /// Inputs the parser accepted.
    pub accepted: u64,
    /// Inputs refused with a one-line error.
    pub refused: u64,
    /// Inputs that panicked or gave a bad message: (input, what).
    pub failures: Vec<(Vec<u8>, String)>,
}

/// The three targets with their seed files.
pub fn targets() -> Vec<Target> {
    vec![
        Target { name: "safetensors", seeds: safetensors_seeds(), parse: io::fuzz::safetensors },
        Target { name: "shard-index", seeds: index_seeds(), parse: io::fuzz::shard_index },
        Target { name: "sprig", seeds: sprig_seeds(), parse: io::fuzz::sprig },
    ]
}

/// A safetensors file from `(name, dtype, shape, element size)` entries,
/// laid out back to back, with optional metadata.
fn safetensors(entries: &[(&str, &str, &[usize], usize)], meta: Option<&str>) -> Vec<u8> {
    let mut parts = Vec::new();
    if let Some(m) = meta {
        parts.push(format!("\"__metadata__\":{m}"));
    }
    let mut at = 0usize;
    for (name, dtype, shape, size) in entries {
        let n: usize = shape.iter().product::<usize>() * size;
        let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
        parts.push(format!(
            "\"{name}\":{{\"dtype\":\"{dtype}\",\"shape\":[{}],\"data_offsets\":[{at},{}]}}",
            dims.join(","),
            at + n
        ));
        at += n;
    }
    let mut header = format!("{{{}}}", parts.join(",")).into_bytes();
    while header.len() % 8 != 0 {
        header.push(b' ');
    }
    let mut out = (header.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(&header);
    let mut rng = SplitMix64::new(at as u64);
    out.extend((0..at).map(|_| rng.next_u64() as u8));
    out
}

fn safetensors_seeds() -> Vec<Vec<u8>> {
    vec![
        safetensors(
            &[
                ("enc.0.weight", "F32", &[4, 3], 4),
                ("enc.0.bias", "F16", &[4], 2),
                ("enc.1.weight", "BF16", &[2, 4], 2),
                ("ids", "I64", &[3], 8),
            ],
            Some("{\"format\":\"pt\",\"lopper.method\":\"l0\"}"),
        ),
        safetensors(&[("w", "F64", &[2, 2], 8), ("e", "F32", &[0, 3], 4)], None),
        safetensors(&[], Some("{}")),
    ]
}

fn index_seeds() -> Vec<Vec<u8>> {
    vec![
        br#"{"metadata":{"total_size":1234},"weight_map":{"enc.0.weight":"model-00001-of-00002.safetensors","enc.0.bias":"model-00001-of-00002.safetensors","enc.1.weight":"model-00002-of-00002.safetensors"}}"#.to_vec(),
        br#"{"weight_map":{"a":"m.safetensors"}}"#.to_vec(),
    ]
}

fn sprig_seeds() -> Vec<Vec<u8>> {
    let a = [0.0, 1.5, 0.0, -2.0, 0.0, 0.0, 0.0, 0.0, 3.0, 0.0, 0.0, 0.25];
    let mut wide = vec![0.0f32; 2 * 70_000];
    wide[3] = 1.0;
    wide[70_000 + 69_999] = -4.0;
    let g = [0.0, 0.0, 2.0, 0.0, 0.0, 0.0, 0.0, 5.0, 0.0, 7.0];
    let sets = [
        vec![
            PackedLayer {
                name: "b.weight".into(),
                source_dtype: io::Dtype::BF16,
                weight: SparseWeight::Rows(RowCompressed::from_dense(&a, 3, 4).unwrap()),
            },
            PackedLayer {
                name: "c.weight".into(),
                source_dtype: io::Dtype::F16,
                weight: SparseWeight::Groups(GroupPacked::from_dense(&g, 1, 10, 1, 4).unwrap()),
            },
        ],
        vec![PackedLayer {
            name: "a.weight".into(),
            source_dtype: io::Dtype::F32,
            weight: SparseWeight::Rows(RowCompressed::from_dense(&wide, 2, 70_000).unwrap()),
        }],
    ];
    static CALLS: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
    let call = CALLS.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let dir = std::env::temp_dir().join(format!("lopper-fuzz-seeds-{}-{call}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let mut out = Vec::new();
    for (i, layers) in sets.iter().enumerate() {
        let p = dir.join(format!("s{i}.sprig"));
        io::write_pack(&p, layers).unwrap();
        out.push(std::fs::read(&p).unwrap());
    }
    let _ = std::fs::remove_dir_all(&dir);
    out
}

/// Replacement tokens for JSON splices: boundary numbers, wrong types,
/// the format's own keys and values.
const TOKENS: &[&str] = &[
    "0",
    "-1",
    "1",
    "7",
    "4294967296",
    "18446744073709551615",
    "18446744073709551616",
    "1e999",
    "-0",
    "0.5",
    "null",
    "true",
    "\"\"",
    "[]",
    "{}",
    "[0,0]",
    "[0,18446744073709551615]",
    "[4294967296,4294967296]",
    "\"F32\"",
    "\"F16\"",
    "\"BF16\"",
    "\"F64\"",
    "\"I8\"",
    "\"BOOL\"",
    "\"Q4\"",
    "\"__metadata__\"",
    "\"dtype\"",
    "\"shape\"",
    "\"data_offsets\"",
    "\"weight_map\"",
    "\"enc.0.weight\"",
    "\"../x.safetensors\"",
    "\"/abs.safetensors\"",
    "\"a\\nb\"",
    "\"\\u001b[31m\"",
    "\"\\ud800\"",
    ",",
    ":",
    "[",
    "]",
    "{",
    "}",
];

/// Interesting values for length and offset fields.
fn interesting(rng: &mut SplitMix64, len: usize) -> u64 {
    let picks = [
        0,
        1,
        7,
        8,
        len as u64,
        (len as u64).wrapping_sub(1),
        len as u64 + 1,
        u32::MAX as u64,
        u64::MAX,
        u64::MAX / 2,
        1 << 32,
        100_000_001,
    ];
    let v = picks[rng.below(picks.len() as u64) as usize];
    if rng.below(4) == 0 {
        v.wrapping_add(rng.below(16)).wrapping_sub(8)
    } else {
        v
    }
}

/// Byte ranges of JSON tokens (strings, numbers, literals, punctuation) in
/// the printable part of `b`.
fn json_tokens(b: &[u8]) -> Vec<(usize, usize)> {
    let mut out = Vec::new();
    let mut i = 0;
    while i < b.len() {
        let c = b[i];
        let start = i;
        if c == b'"' {
            i += 1;
            while i < b.len() && b[i] != b'"' {
                i += if b[i] == b'\\' { 2 } else { 1 };
            }
            i = (i + 1).min(b.len());
        } else if c == b'-' || c.is_ascii_digit() {
            i += 1;
            while i < b.len() && (b[i].is_ascii_digit() || b"eE+-.".contains(&b[i])) {
                i += 1;
            }
        } else if c.is_ascii_alphabetic() {
            while i < b.len() && b[i].is_ascii_alphabetic() {
                i += 1;
            }
        } else if b"{}[],:".contains(&c) {
            i += 1;
        } else {
            i += 1;
            continue;
        }
        out.push((start, i));
    }
    out
}

/// Apply one random mutation to `b`.
fn mutate_once(b: &mut Vec<u8>, rng: &mut SplitMix64) {
    let len = b.len();
    let at = |rng: &mut SplitMix64, n: usize| if n == 0 { 0 } else { rng.below(n as u64) as usize };
    match rng.below(8) {
        0 if len > 0 => {
            for _ in 0..1 + rng.below(4) {
                let i = at(rng, len);
                b[i] ^= 1 << rng.below(8);
            }
        }
        1 => {
            let i = at(rng, len + 1);
            const PUNCT: &[u8] = b"{}[]\",:0\\ ";
            let v =
                if rng.below(2) == 0 { rng.next_u64() as u8 } else { PUNCT[at(rng, PUNCT.len())] };
            b.insert(i, v);
        }
        2 if len > 0 => {
            let i = at(rng, len);
            let n = (1 + rng.below(8) as usize).min(len - i);
            b.drain(i..i + n);
        }
        3 if len >= 8 => {
            // A length or offset field: 8, 4 or 2 bytes, aligned or not.
            let width = [8usize, 4, 2][at(rng, 3)];
            let i = if rng.below(2) == 0 { 0 } else { at(rng, len - width + 1) };
            let i = if rng.below(2) == 0 { i / width * width } else { i };
            let v = interesting(rng, len).to_le_bytes();
            b[i..i + width].copy_from_slice(&v[..width]);
        }
        4 | 5 => {
            let toks = json_tokens(b);
            if toks.is_empty() {
                return mutate_once(b, rng);
            }
            let (s, e) = toks[at(rng, toks.len())];
            let new: Vec<u8> = if rng.below(3) == 0 {
                // Duplicate another token of the file (repeated keys, values).
                let (s2, e2) = toks[at(rng, toks.len())];
                b[s2..e2].to_vec()
            } else {
                TOKENS[at(rng, TOKENS.len())].as_bytes().to_vec()
            };
            b.splice(s..e, new);
        }
        6 if len > 0 => {
            b.truncate(at(rng, len));
        }
        7 if len > 1 => {
            // Copy a chunk over another place.
            let s = at(rng, len);
            let n = (1 + rng.below(32) as usize).min(len - s);
            let chunk = b[s..s + n].to_vec();
            let d = at(rng, len);
            b.splice(d..(d + n).min(len), chunk);
        }
        _ => {
            let i = at(rng, len + 1);
            b.insert(i, rng.next_u64() as u8);
        }
    }
}

/// For the safetensors target, keep the header length consistent with the
/// header most of the time, so mutations reach the JSON validation.
fn fix_length(b: &mut [u8], old_len: usize) {
    if b.len() >= 8 {
        let n = u64::from_le_bytes(b[..8].try_into().unwrap());
        if n.checked_add(8).is_some_and(|end| end <= old_len as u64) {
            let delta = b.len() as i64 - old_len as i64;
            let fixed = (n as i64 + delta).max(0) as u64;
            b[..8].copy_from_slice(&fixed.to_le_bytes());
        }
    }
}

/// One input, checked: `Ok(true)` accepted, `Ok(false)` refused properly,
/// `Err(why)` a failure.
pub fn check(target: &Target, input: &[u8]) -> Result<bool, String> {
    let path = Path::new("fuzz.bin");
    match catch_unwind(AssertUnwindSafe(|| (target.parse)(path, input))) {
        Err(p) => {
            let msg = p
                .downcast_ref::<String>()
                .cloned()
                .or_else(|| p.downcast_ref::<&str>().map(|s| s.to_string()))
                .unwrap_or_else(|| "panic".into());
            Err(format!("panic: {msg}"))
        }
        Ok(Ok(_)) => Ok(true),
        Ok(Err(e)) => {
            // As the command line prints it.
            let shown = lopper::error::Error::from(e).to_string();
            if shown.trim().is_empty() || shown.contains('\n') || shown.contains('\r') {
                Err(format!("bad message: {shown:?}"))
            } else {
                Ok(false)
            }
        }
    }
}

/// Run `execs` mutated inputs of `target` from `seed`.
pub fn run(target: &Target, execs: u64, seed: u64) -> Outcome {
    let mut rng = SplitMix64::new(seed);
    let mut out = Outcome::default();
    // Silence the default hook's backtraces; failures are collected.
    let hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    for seed_file in &target.seeds {
        match check(target, seed_file) {
            Ok(true) => {}
            other => {
                out.failures.push((seed_file.clone(), format!("seed not accepted: {other:?}")))
            }
        }
    }
    for _ in 0..execs {
        let base = &target.seeds[rng.below(target.seeds.len() as u64) as usize];
        let mut b = base.clone();
        let mutated = catch_unwind(AssertUnwindSafe(|| {
            for _ in 0..1 + rng.below(4) {
                mutate_once(&mut b, &mut rng);
            }
        }));
        if mutated.is_err() {
            std::panic::set_hook(hook);
            panic!("the fuzz engine itself panicked while mutating");
        }
        if target.name == "safetensors" && rng.below(4) != 0 {
            fix_length(&mut b, base.len());
        }
        out.execs += 1;
        match check(target, &b) {
            Ok(true) => out.accepted += 1,
            Ok(false) => out.refused += 1,
            Err(why) => {
                if out.failures.len() < 20 {
                    out.failures.push((b, why));
                }
            }
        }
    }
    std::panic::set_hook(hook);
    out
}
