//! The CI-sized run of the reader fuzzer (`tests/common/fuzz_engine.rs`):
//! a few thousand seeded mutations of valid files per target, each parsed
//! in-process; no panic, and every refusal one line. The long run is
//! `cargo bench --bench fuzz -- 1000000` (figures in docs/testing.md).

#[path = "common/fuzz_engine.rs"]
mod engine;

fn fuzz(name: &str) {
    let target = engine::targets().into_iter().find(|t| t.name == name).unwrap();
    let execs =
        std::env::var("LOPPER_FUZZ_EXECS").ok().and_then(|v| v.parse().ok()).unwrap_or(4000);
    let out = engine::run(&target, execs, 0x5eed_0000 + name.len() as u64);
    let shown: Vec<String> = out
        .failures
        .iter()
        .map(|(input, why)| format!("{why}\n  input: {:?}", String::from_utf8_lossy(input)))
        .collect();
    assert!(out.failures.is_empty(), "{name}: {} failures:\n{}", shown.len(), shown.join("\n"));
    assert_eq!(out.execs, execs);
    // The mutations must reach past the first check: some inputs are still
    // accepted, most are refused.
    assert!(out.refused > execs / 4, "{name}: only {} of {execs} refused", out.refused);
    assert!(out.accepted > 0, "{name}: no mutated input was accepted");
}

#[test]
fn safetensors_header_parser_survives_mutations() {
    fuzz("safetensors");
}

#[test]
fn shard_index_reader_survives_mutations() {
    fuzz("shard-index");
}

#[test]
fn sprig_reader_survives_mutations() {
    fuzz("sprig");
}

/// Inputs the fuzzer (or review) found, kept as regressions.
#[test]
fn found_inputs_are_refused_in_one_line() {
    let targets = engine::targets();
    let st = &targets[0];
    // A tensor name with a newline (a JSON escape) must not break the
    // one-line message.
    let header = br#"{"a\nb":{"dtype":"F32","shape":[2],"data_offsets":[0,4]}}"#;
    let mut f = (header.len() as u64).to_le_bytes().to_vec();
    f.extend_from_slice(header);
    f.extend_from_slice(&[0; 4]);
    assert_eq!(engine::check(st, &f), Ok(false));
}
