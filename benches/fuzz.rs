//! The long run of the reader fuzzer (`tests/common/fuzz_engine.rs`):
//!
//! ```sh
//! cargo bench --bench fuzz -- 1000000            # executions per target
//! cargo bench --bench fuzz -- 1000000 sprig 7    # one target, seed 7
//! ```
//!
//! Prints, per target, the executions, accepted and refused inputs, wall
//! time, and every failure (exit code 1 when there is one).

#[path = "../tests/common/fuzz_engine.rs"]
mod engine;

use std::time::Instant;

fn main() {
    // `cargo bench` passes `--bench`; ignore flags.
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let execs: u64 = args.first().and_then(|a| a.parse().ok()).unwrap_or(1_000_000);
    let only = args.get(1).cloned();
    let seed: u64 = args.get(2).and_then(|a| a.parse().ok()).unwrap_or(1);
    let mut failed = false;
    for target in engine::targets() {
        if only.as_deref().is_some_and(|o| o != target.name) {
            continue;
        }
        let t0 = Instant::now();
        let out = engine::run(&target, execs, seed);
        let secs = t0.elapsed().as_secs_f64();
        println!(
            "{:<12} {:>9} execs  {:>9} accepted  {:>9} refused  {:>3} failures  {:>7.1} s  \
             ({:.0} execs/s)",
            target.name,
            out.execs,
            out.accepted,
            out.refused,
            out.failures.len(),
            secs,
            out.execs as f64 / secs
        );
        for (input, why) in &out.failures {
            failed = true;
            println!("  {why}\n    input: {:?}", String::from_utf8_lossy(input));
        }
    }
    if failed {
        std::process::exit(1);
    }
}
