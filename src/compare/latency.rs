//! `--time-whole`: every kept run model timed end to end against the dense
//! model ([`crate::timing`], batch 1: sentences for encoders, tokens
//! decoded with the key/value cache for decoders), for the frontier chart.

use std::path::Path;

use super::data::{Comparison, WholeLatency};
use super::CompareConfig;
use crate::driver::Progress;
use crate::error::Result;
use crate::io::Model;
use crate::timing::{self, LatencyConfig};

/// Settings of the whole-model timing in a comparison: batch 1 only, no
/// prefill, 3 timed calls (decoders: 3 runs of 16 tokens).
fn config(threads: usize) -> LatencyConfig {
    LatencyConfig {
        threads,
        batches: vec![1],
        seq: 128,
        prefill: 0,
        prompt: 32,
        tokens: 16,
        reps: 3,
        warmup: 2,
        seed: 1,
    }
}

/// Time every run with a written model and record [`WholeLatency`].
pub(super) fn measure_whole(
    cfg: &CompareConfig,
    dense: &Model,
    comp: &mut Comparison,
    progress: &dyn Fn(Progress<'_>),
) -> Result<()> {
    if !cfg.time_whole {
        return Ok(());
    }
    let lc = config(cfg.job.threads);
    for run in comp.runs.iter_mut() {
        let Some(path) = &run.model_output else { continue };
        progress(Progress::Writing);
        let model = Model::open(Path::new(path))?;
        let r = timing::measure(&model, Some(dense), &lc, &|_| {})
            .map_err(|e| e.context(format!("timing {}", run.id)))?;
        let Some((name, sc)) = r.scenarios.iter().find(|(n, _)| n.ends_with("batch_1")) else {
            continue;
        };
        let variant = if sc.variants.contains_key("as_written")
            && !sc.variants.contains_key("sparse_kernels")
        {
            "as_written"
        } else {
            "sparse_kernels"
        };
        let (Some(d), Some(p)) = (sc.variants.get("dense"), sc.variants.get(variant)) else {
            continue;
        };
        run.whole = Some(WholeLatency {
            scenario: name.clone(),
            dense_ms: d.p50_ms,
            pruned_ms: p.p50_ms,
            speedup: d.p50_ms / p.p50_ms,
        });
    }
    Ok(())
}
