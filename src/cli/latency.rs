//! `lopper latency`: flag checks, progress and printing; the work is in
//! [`crate::timing`].

use super::args::LatencyArgs;
use super::config::resolve_threads;
use super::progress::bar;
use crate::error::{Error, Result};
use crate::io::Model;
use crate::timing::{self, LatencyConfig};

fn config(a: &LatencyArgs) -> Result<LatencyConfig> {
    for (flag, v) in [
        ("--seq", a.seq),
        ("--prefill", a.prefill),
        ("--prompt", a.prompt),
        ("--tokens", a.tokens),
        ("--reps", a.reps),
    ] {
        if v == 0 {
            return Err(Error::usage(format!("{flag} must be at least 1")));
        }
    }
    if a.batch.is_empty() || a.batch.iter().any(|&b| !(1..=4096).contains(&b)) {
        return Err(Error::usage("--batch needs sizes in 1..=4096"));
    }
    let mut batches = a.batch.clone();
    batches.sort_unstable();
    batches.dedup();
    Ok(LatencyConfig {
        threads: resolve_threads(a.run.threads),
        batches,
        seq: a.seq,
        prefill: a.prefill,
        prompt: a.prompt,
        tokens: a.tokens,
        reps: a.reps,
        warmup: a.warmup,
        seed: a.seed,
    })
}

pub(super) fn run(a: &LatencyArgs) -> Result<()> {
    let cfg = config(a)?;
    super::set_threads(cfg.threads);
    let model = Model::open(&a.model)?;
    let dense = a.dense.as_ref().map(|d| Model::open(d)).transpose()?;
    let bar = bar(a.run.quiet, "timing", "steps");
    // Loads, two checks, then two steps per scenario (encoders: one per
    // batch size; decoders: prefill and decode).
    let scenarios = cfg.batches.len().max(2);
    bar.set_length((1 + usize::from(dense.is_some()) + 2 + 2 * scenarios) as u64);
    let note = |m: &str| {
        bar.inc(1);
        bar.set_message(m.to_string());
    };
    let report = timing::measure(&model, dense.as_ref(), &cfg, &note);
    bar.finish_and_clear();
    let report = report?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&report).expect("report serialises"));
    } else if !a.run.quiet {
        print!("{}", timing::table::render(&report));
    }
    Ok(())
}
