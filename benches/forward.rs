//! Whole-model forward benchmark: the time of `Network::forward` (embedding,
//! every block, output head) on CPU, for any model folder lopper can load
//! (BERT-style encoders, Llama-style and GPT-2-style decoders), e.g. a dense
//! model against a structurally smaller copy of it.
//!
//! ```text
//! cargo bench --bench forward -- MODEL_DIR [MODEL_DIR2 ...] [--threads N]
//!     [--batch 1,32] [--seq 128] [--reps N] [--warmup N] [--seed S]
//! ```
//!
//! For each model: open it and build the network (`lopper::arch::load`,
//! weights held in f32 whatever the stored dtype), draw random token
//! batches (uniform ids below the config's `vocab_size`, a fresh batch per
//! call), run `--warmup` calls (default 1), then time `--reps` calls
//! (default 5) for each batch size at sequence length `--seq`. Prints a
//! table (median and 90th-percentile milliseconds per call; tokens/s for
//! decoders, sentences/s for encoders) and one JSON object per row on lines
//! starting with `{`.
//!
//! Threads: `--threads 0` (default) uses every CPU, more than the CPUs is
//! capped; the count is set as the `lopper` binary sets it — the global
//! rayon pool and `RAYON_NUM_THREADS`, which candle's CPU matrix products
//! read.

use std::hint::black_box;
use std::path::PathBuf;
use std::time::Instant;

use lopper::arch::{self, ArchConfig, Batch, Kind};
use lopper::io::Model;
use lopper::rng::SplitMix64;

struct Args {
    models: Vec<PathBuf>,
    threads: usize,
    batches: Vec<usize>,
    seq: usize,
    reps: usize,
    warmup: usize,
    seed: u64,
}

const USAGE: &str = "usage: cargo bench --bench forward -- MODEL_DIR [MODEL_DIR ...] \
                     [--threads N] [--batch 1,32] [--seq 128] [--reps 5] [--warmup 1] [--seed S]";

fn fail(msg: &str) -> ! {
    eprintln!("forward: {msg}\n{USAGE}");
    std::process::exit(2)
}

fn parse_args() -> Args {
    let mut a = Args {
        models: Vec::new(),
        threads: 0,
        batches: vec![1, 32],
        seq: 128,
        reps: 5,
        warmup: 1,
        seed: 1,
    };
    let mut it = std::env::args().skip(1);
    while let Some(arg) = it.next() {
        let mut value =
            |name: &str| it.next().unwrap_or_else(|| fail(&format!("{name} needs a value")));
        let num = |name: &str, v: String| -> usize {
            v.parse().unwrap_or_else(|_| fail(&format!("{name} {v}: not a whole number")))
        };
        match arg.as_str() {
            // cargo bench passes --bench to harness-less benches.
            "--bench" => {}
            "--threads" => a.threads = num("--threads", value("--threads")),
            "--seq" => a.seq = num("--seq", value("--seq")),
            "--reps" => a.reps = num("--reps", value("--reps")),
            "--warmup" => a.warmup = num("--warmup", value("--warmup")),
            "--seed" => a.seed = num("--seed", value("--seed")) as u64,
            "--batch" => {
                a.batches = value("--batch").split(',').map(|s| num("--batch", s.into())).collect()
            }
            "-h" | "--help" => {
                println!("{USAGE}");
                std::process::exit(0)
            }
            s if s.starts_with('-') => fail(&format!("unknown option {s}")),
            _ => a.models.push(PathBuf::from(arg)),
        }
    }
    if a.models.is_empty() {
        fail("no model folder given");
    }
    if a.seq == 0 || a.reps == 0 || a.batches.contains(&0) {
        fail("--seq, --reps and every --batch must be at least 1");
    }
    a
}

/// `--threads n` as lopper resolves it: 0 is every CPU; more than the CPUs
/// is capped at the CPUs.
fn resolve_threads(n: usize) -> usize {
    let cpus = std::thread::available_parallelism().map_or(1, |c| c.get());
    if n == 0 {
        cpus
    } else {
        n.min(cpus)
    }
}

/// The value at fraction `q` of sorted `v` (nearest rank).
fn quantile(v: &[f64], q: f64) -> f64 {
    let i = ((q * v.len() as f64).ceil() as usize).clamp(1, v.len()) - 1;
    v[i]
}

fn human(n: usize) -> String {
    if n >= 1_000_000_000 {
        format!("{:.2}B", n as f64 / 1e9)
    } else {
        format!("{:.1}M", n as f64 / 1e6)
    }
}

fn main() {
    let a = parse_args();
    let threads = resolve_threads(a.threads);
    std::env::set_var("RAYON_NUM_THREADS", threads.to_string());
    let _ = rayon::ThreadPoolBuilder::new().num_threads(threads).build_global();
    eprintln!(
        "forward: {threads} thread{}, seq {}, batches {:?}, {} warm-up + {} timed calls each",
        if threads == 1 { "" } else { "s" },
        a.seq,
        a.batches,
        a.warmup,
        a.reps
    );

    let mut rows = Vec::new();
    let mut json = Vec::new();
    for dir in &a.models {
        let shown = dir.display().to_string();
        let t = Instant::now();
        let model = Model::open(dir).unwrap_or_else(|e| fail(&format!("{shown}: {e}")));
        let params: usize = model.tensors().iter().map(|t| t.params()).sum();
        let cfg =
            ArchConfig::read(&arch::model_dir(&model)).unwrap_or_else(|e| fail(&e.to_string()));
        let vocab = cfg.usize("vocab_size").unwrap_or_else(|e| fail(&e.to_string()));
        let net = arch::load(&model).unwrap_or_else(|e| fail(&format!("{shown}: {e}")));
        let load_s = t.elapsed().as_secs_f64();
        if let Some(max) = net.max_positions() {
            if a.seq > max {
                fail(&format!(
                    "{shown}: --seq {} is longer than the model's {max} positions",
                    a.seq
                ));
            }
        }
        let kind = net.kind();
        eprintln!(
            "{shown}: {} ({:?}), {} parameters, {} blocks, loaded in {load_s:.1} s",
            cfg.model_type,
            kind,
            human(params),
            net.num_blocks()
        );
        let mut rng = SplitMix64::new(a.seed);
        for &b in &a.batches {
            let mut batch = || {
                let ids: Vec<Vec<u32>> = (0..b)
                    .map(|_| (0..a.seq).map(|_| rng.below(vocab as u64) as u32).collect())
                    .collect();
                Batch::new(&ids)
            };
            let call = |batch: &Batch| {
                let t = Instant::now();
                let out = net.forward(batch).unwrap_or_else(|e| fail(&format!("{shown}: {e}")));
                black_box(&out);
                drop(out);
                t.elapsed().as_secs_f64()
            };
            for _ in 0..a.warmup {
                call(&batch());
            }
            let mut times: Vec<f64> = (0..a.reps).map(|_| call(&batch())).collect();
            times.sort_by(f64::total_cmp);
            let (median, p90) = (quantile(&times, 0.5), quantile(&times, 0.9));
            let (unit, rate) = match kind {
                Kind::Decoder => ("tokens/s", (b * a.seq) as f64 / median),
                Kind::Encoder => ("sentences/s", b as f64 / median),
            };
            rows.push(format!(
                "| {shown} | {} | {b} | {} | {:.1} | {:.1} | {:.1} {unit} |",
                human(params),
                a.seq,
                1e3 * median,
                1e3 * p90,
                rate
            ));
            let mut row = serde_json::json!({
                "model": shown, "model_type": cfg.model_type, "params": params,
                "blocks": net.num_blocks(), "batch": b, "seq": a.seq, "threads": threads,
                "reps": a.reps, "median_ms": 1e3 * median, "p90_ms": 1e3 * p90,
                "load_s": load_s,
            });
            let rate_key = if kind == Kind::Decoder { "tokens_per_s" } else { "sentences_per_s" };
            row[rate_key] = serde_json::json!(rate);
            json.push(row);
            eprintln!("  batch {b}: median {:.1} ms, p90 {:.1} ms", 1e3 * median, 1e3 * p90);
        }
    }
    println!("| model | params | batch | seq | median ms | p90 ms | throughput |");
    println!("|---|---:|---:|---:|---:|---:|---:|");
    for r in &rows {
        println!("{r}");
    }
    for j in &json {
        println!("{j}");
    }
}
