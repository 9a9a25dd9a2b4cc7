//! Kernel benchmark: `y = x Wᵀ` with the dense weight against the sparse
//! layouts of the same pruned weight, next to the time a read of the
//! sparse kernel's bytes would take at the memory bandwidth measured in the
//! same run.
//!
//! Run with `cargo bench --bench kernels` (`-- --quick` for shorter timings,
//! `-- --threads N` to change the thread count, default all cores). Prints
//! Markdown tables; the figures in docs/benchmarks.md come from this
//! program.
//!
//! Two cache regimes are timed:
//! - **streamed**: every call uses the next of several copies of the weight,
//!   together larger than the last-level cache, so the weight comes from
//!   main memory as it does when a large model runs layer after layer. The
//!   bound divides the bytes by the bandwidth of a streaming read of 1 GiB.
//! - **resident**: the same copy every call, so a weight that fits in cache
//!   is read from cache. The bound divides the bytes by the bandwidth of a
//!   streaming read of a buffer of the same size, repeated.

use std::hint::black_box;

use lopper::deploy::median_seconds as time;
use lopper::rng::SplitMix64;
use lopper::sparse::{dense_matmul, DenseKernel, GroupPacked, Par, RowCompressed};

/// Layer shapes `[d_out, d_in]`: a 4096-wide projection as in 7B-parameter
/// decoders, and a 1536 x 384 MLP projection as in small sentence encoders
/// (common practice).
const SHAPES: [(usize, usize); 2] = [(4096, 4096), (1536, 384)];
const BATCHES: [usize; 3] = [1, 8, 64];
/// Bytes the copies of a weight add up to in the streamed regime; larger
/// than the cache this machine gives one process.
const STREAM_BYTES: usize = 768 << 20;

#[derive(Clone, Copy, Debug)]
enum Pattern {
    Unstructured(f64),
    TwoOfFour,
}

impl Pattern {
    fn label(self) -> String {
        match self {
            Pattern::Unstructured(s) => format!("{:.0}%", 100.0 * s),
            Pattern::TwoOfFour => "2:4".into(),
        }
    }
}

/// A pruned weight: per row, exactly `round(s · d_in)` zeros at random
/// positions (as `lopper prune --sparsity s` leaves it), or 2 of every 4.
fn pruned_weight(d_out: usize, d_in: usize, pattern: Pattern, rng: &mut SplitMix64) -> Vec<f32> {
    let mut w: Vec<f32> = (0..d_out * d_in).map(|_| rng.value() + 2.0).collect();
    for row in w.chunks_exact_mut(d_in) {
        match pattern {
            Pattern::Unstructured(s) => {
                let zeros = (s * d_in as f64).round() as usize;
                let mut idx: Vec<usize> = (0..d_in).collect();
                for i in 0..zeros {
                    let j = i + rng.below((d_in - i) as u64) as usize;
                    idx.swap(i, j);
                    row[idx[i]] = 0.0;
                }
            }
            Pattern::TwoOfFour => {
                for g in row.chunks_exact_mut(4) {
                    let a = rng.below(4) as usize;
                    let b = (a + 1 + rng.below(3) as usize) % 4;
                    g[a] = 0.0;
                    g[b] = 0.0;
                }
            }
        }
    }
    w
}

/// Sum of `v` with 32 independent partial sums.
fn stream_sum(v: &[f32]) -> f32 {
    let mut acc = [0.0f32; 32];
    for c in v.chunks_exact(32) {
        for j in 0..32 {
            acc[j] += c[j];
        }
    }
    acc.iter().sum()
}

/// Bandwidth in bytes/s of reading `bytes` bytes with `threads` threads,
/// the buffer read again and again (so a buffer that fits stays in cache).
fn read_bandwidth(bytes: usize, threads: usize, min_time: f64) -> f64 {
    let n = (bytes / 4).max(32 * threads);
    let v: Vec<f32> = (0..n).map(|i| (i % 5) as f32).collect();
    let chunk = n.div_ceil(threads);
    let secs = time(min_time, |_| {
        use rayon::prelude::*;
        let s: f32 = v.par_chunks(chunk).map(stream_sum).sum();
        black_box(s);
    });
    (n * 4) as f64 / secs
}

struct Row {
    shape: (usize, usize),
    pattern: String,
    layout: String,
    batch: usize,
    dense: f64,
    sparse: f64,
    dense_bytes: usize,
    sparse_bytes: usize,
    bound: f64,
}

enum Sparse {
    Rows(RowCompressed),
    Groups(GroupPacked),
}

impl Sparse {
    fn bytes(&self) -> usize {
        match self {
            Sparse::Rows(s) => s.weight_bytes(),
            Sparse::Groups(s) => s.weight_bytes(),
        }
    }
    fn workspace(&self, b: usize) -> usize {
        match self {
            Sparse::Rows(s) => s.matmul_workspace(b),
            Sparse::Groups(s) => s.matmul_workspace(b),
        }
    }
    fn matmul(&self, x: &[f32], b: usize, y: &mut [f32], work: &mut [f32], par: Par) {
        match self {
            Sparse::Rows(s) => s.matmul(x, b, y, work, par),
            Sparse::Groups(s) => s.matmul(x, b, y, work, par),
        }
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let quick = args.iter().any(|a| a == "--quick");
    let threads = args
        .iter()
        .position(|a| a == "--threads")
        .and_then(|i| args.get(i + 1))
        .and_then(|s| s.parse().ok())
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()));
    let _ = rayon::ThreadPoolBuilder::new().num_threads(threads).build_global();
    let par = if threads == 1 { Par::Seq } else { Par::rayon(threads) };
    let min_time = if quick { 0.05 } else { 0.3 };
    let regimes: &[bool] = if args.iter().any(|a| a == "--resident-only") {
        &[false]
    } else if args.iter().any(|a| a == "--streamed-only") {
        &[true]
    } else {
        &[true, false]
    };

    let dram_bw = read_bandwidth(1 << 30, threads, min_time);
    println!("threads: {threads}; streaming read of 1 GiB: {:.1} GB/s\n", dram_bw / 1e9);

    let patterns = [
        Pattern::Unstructured(0.5),
        Pattern::Unstructured(0.7),
        Pattern::Unstructured(0.9),
        Pattern::TwoOfFour,
    ];
    let mut rng = SplitMix64::new(2024);
    for &streamed in regimes {
        let mut rows = Vec::new();
        for &(d_out, d_in) in &SHAPES {
            for &pattern in &patterns {
                let w = pruned_weight(d_out, d_in, pattern, &mut rng);
                let sparse = match pattern {
                    Pattern::TwoOfFour => {
                        Sparse::Groups(GroupPacked::from_dense(&w, d_out, d_in, 2, 4).unwrap())
                    }
                    Pattern::Unstructured(_) => {
                        Sparse::Rows(RowCompressed::from_dense(&w, d_out, d_in).unwrap())
                    }
                };
                let layout = match &sparse {
                    Sparse::Rows(_) => "rows".to_string(),
                    Sparse::Groups(_) => "2:4".to_string(),
                };
                let (dense_bytes, sparse_bytes) = (4 * d_out * d_in, sparse.bytes());
                let copies = |bytes: usize| if streamed { STREAM_BYTES.div_ceil(bytes) } else { 1 };
                let dense_copies: Vec<Vec<f32>> =
                    (0..copies(dense_bytes)).map(|_| w.clone()).collect();
                let sparse_copies: Vec<Sparse> = (0..copies(sparse_bytes))
                    .map(|_| match &sparse {
                        Sparse::Rows(s) => Sparse::Rows(s.clone()),
                        Sparse::Groups(s) => Sparse::Groups(s.clone()),
                    })
                    .collect();
                let bw = if streamed {
                    dram_bw
                } else {
                    read_bandwidth(sparse_bytes, threads, min_time)
                };
                for &b in &BATCHES {
                    let x = rng.values(b * d_in);
                    let mut y = vec![0.0f32; b * d_out];
                    let mut work = vec![0.0f32; sparse.workspace(b)];
                    let dense = time(min_time, |i| {
                        let w = &dense_copies[i % dense_copies.len()];
                        dense_matmul(w, d_out, d_in, &x, b, &mut y, DenseKernel::Auto, par);
                        black_box(&y);
                    });
                    let sp = time(min_time, |i| {
                        let s = &sparse_copies[i % sparse_copies.len()];
                        s.matmul(&x, b, &mut y, &mut work, par);
                        black_box(&y);
                    });
                    rows.push(Row {
                        shape: (d_out, d_in),
                        pattern: pattern.label(),
                        layout: layout.clone(),
                        batch: b,
                        dense,
                        sparse: sp,
                        dense_bytes,
                        sparse_bytes,
                        bound: sparse_bytes as f64 / bw,
                    });
                }
            }
        }
        print_table(streamed, &rows);
    }
    if args.iter().any(|a| a == "--dense-choice") {
        dense_choice(par, min_time, &mut rng);
    }
}

fn print_table(streamed: bool, rows: &[Row]) {
    let regime = if streamed { "streamed from memory" } else { "resident in cache" };
    println!("### Weights {regime}\n");
    println!(
        "| layer | pattern | layout | batch | dense µs | sparse µs | speedup | weight MB dense / sparse | bound µs | sparse / bound |"
    );
    println!("|---|---|---|---:|---:|---:|---:|---:|---:|---:|");
    for r in rows {
        println!(
            "| {}x{} | {} | {} | {} | {:.1} | {:.1} | {:.2}x | {:.2} / {:.2} | {:.1} | {:.2} |",
            r.shape.0,
            r.shape.1,
            r.pattern,
            r.layout,
            r.batch,
            r.dense * 1e6,
            r.sparse * 1e6,
            r.dense / r.sparse,
            r.dense_bytes as f64 / 1e6,
            r.sparse_bytes as f64 / 1e6,
            r.bound * 1e6,
            r.sparse / r.bound
        );
    }
    println!();
}

/// Row loop against faer's product for the dense baseline, weights
/// resident.
fn dense_choice(par: Par, min_time: f64, rng: &mut SplitMix64) {
    println!("### Dense kernel choice (weights resident)\n");
    println!("| layer | batch | row loop µs | faer µs | tiles µs |");
    println!("|---|---:|---:|---:|---:|");
    for &(d_out, d_in) in &SHAPES {
        let w = rng.values(d_out * d_in);
        for b in [1, 2, 3, 4, 8, 64] {
            let x = rng.values(b * d_in);
            let mut y = vec![0.0f32; b * d_out];
            let mut t = [0.0; 3];
            let kernels = [DenseKernel::Rows, DenseKernel::Faer, DenseKernel::Tiles];
            for (k, kernel) in kernels.into_iter().enumerate() {
                t[k] = time(min_time, |_| {
                    dense_matmul(&w, d_out, d_in, &x, b, &mut y, kernel, par);
                    black_box(&y);
                });
            }
            let us = t.map(|v| v * 1e6);
            println!("| {d_out}x{d_in} | {b} | {:.1} | {:.1} | {:.1} |", us[0], us[1], us[2]);
        }
    }
    println!();
}
