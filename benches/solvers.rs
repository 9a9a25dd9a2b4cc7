//! Solver benchmark: time and relative error of each method on synthetic
//! layers with structured activations, next to one dense Cholesky
//! factorisation of the same Gram matrix (the yardstick for "how many
//! factorisations does a method cost").
//!
//! Run with `cargo bench --bench solvers` (add `-- --quick` for a smaller
//! run). Prints a Markdown table; the figures in docs/benchmarks.md come
//! from this program.

use faer::{Mat, Par, Side};
use lopper::calib::Gram;
use lopper::rng::SplitMix64;
use lopper::solve::{self, objective, Method, Pattern, Scope, SolveParams};
use std::time::Instant;

/// Activations with the structure seen in trained networks: a low-rank
/// shared component, per-input scales spread over two decades, and a few
/// loud outlier inputs. Returns the Gram matrix of `n` rows.
fn structured_gram(n: usize, d: usize, seed: u64) -> Mat<f64> {
    let mut rng = SplitMix64::new(seed);
    let rank = 32.min(d);
    let mix = Mat::from_fn(rank, d, |_, _| rng.normal());
    let scale: Vec<f64> = (0..d)
        .map(|j| {
            let s = (10f64).powf(rng.uniform() * 2.0 - 1.0);
            if j % 97 == 5 {
                20.0 * s
            } else {
                s
            }
        })
        .collect();
    let mut gram = Gram::new(d);
    let chunk = 2048;
    let mut done = 0;
    while done < n {
        let m = chunk.min(n - done);
        let mut x = vec![0.0; m * d];
        for i in 0..m {
            let z: Vec<f64> = (0..rank).map(|_| rng.normal()).collect();
            for j in 0..d {
                let shared: f64 =
                    (0..rank).map(|k| z[k] * mix[(k, j)]).sum::<f64>() / (rank as f64).sqrt();
                x[i * d + j] = scale[j] * (0.8 * shared + 0.6 * rng.normal());
            }
        }
        gram.add_rows(&x, Par::rayon(0));
        done += m;
    }
    gram.matrix().to_owned()
}

fn weights(d_out: usize, d_in: usize, seed: u64) -> Mat<f64> {
    let mut rng = SplitMix64::new(seed);
    let row_scale: Vec<f64> = (0..d_out).map(|_| 0.5 + rng.uniform()).collect();
    Mat::from_fn(d_out, d_in, |r, _| row_scale[r] * rng.normal() / (d_in as f64).sqrt())
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    v[v.len() / 2]
}

fn time<T>(reps: usize, mut f: impl FnMut() -> T) -> (f64, T) {
    let mut times = Vec::new();
    let mut out = None;
    for _ in 0..reps {
        let t = Instant::now();
        out = Some(f());
        times.push(t.elapsed().as_secs_f64());
    }
    (median(times), out.unwrap())
}

/// Peak resident memory of this process so far, in GiB (Linux `VmHWM`).
fn peak_rss_gib() -> Option<f64> {
    let s = std::fs::read_to_string("/proc/self/status").ok()?;
    let kib: f64 =
        s.lines().find(|l| l.starts_with("VmHWM:"))?.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / (1024.0 * 1024.0))
}

/// The large-layer check: a 4096 x 11008 layer (an MLP projection of a 7B
/// decoder, common practice) at 90% per row, local search capped at two
/// sweeps; prints the time of each step and the peak memory.
fn big() {
    let (d_out, d_in, rows) = (4096, 11008, 12288);
    let par = Par::rayon(0);
    let t = Instant::now();
    let h = structured_gram(rows, d_in, 21);
    let w = weights(d_out, d_in, 22);
    println!("layer {d_out} x {d_in}, {rows} rows: statistics {:.1} s", t.elapsed().as_secs_f64());
    let pattern = Pattern::Unstructured { sparsity: 0.9, scope: Scope::Row };
    let mut params = SolveParams { method: Method::L0, pattern, ..SolveParams::default() };
    params.l0.max_sweeps = 2;
    for method in [Method::Obs, Method::L0] {
        let p = SolveParams { method, ..params.clone() };
        let t = Instant::now();
        let pruned = solve::prune_layer(w.as_ref(), h.as_ref(), &p, par).unwrap();
        let secs = t.elapsed().as_secs_f64();
        let err = objective::relative_error(w.as_ref(), pruned.weight.as_ref(), h.as_ref(), par);
        println!(
            "{}: {secs:.1} s, relative error {err:.4e}, sweeps {}, peak memory so far {:.2} GiB",
            method.name(),
            pruned.info.sweeps,
            peak_rss_gib().unwrap_or(f64::NAN)
        );
    }
}

fn main() {
    if std::env::args().any(|a| a == "--big") {
        big();
        return;
    }
    let quick = std::env::args().any(|a| a == "--quick");
    let rows = if quick { 4096 } else { 16384 };
    let reps = if quick { 1 } else { 3 };
    let par = Par::rayon(0);
    println!(
        "lopper solver benchmark: {} cores, {rows} calibration rows, median of {reps}",
        std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
    );
    let shapes: &[(usize, usize)] =
        if quick { &[(384, 1536)] } else { &[(1536, 1536), (384, 1536)] };
    let patterns = [
        ("50% per-row", Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row }),
        ("90% per-row", Pattern::Unstructured { sparsity: 0.9, scope: Scope::Row }),
        ("2:4", Pattern::NofM { n: 2, m: 4 }),
    ];
    for &(d_out, d_in) in shapes {
        let t = Instant::now();
        let h = structured_gram(rows, d_in, 11);
        let w = weights(d_out, d_in, 12);
        println!(
            "\n### layer {d_out} x {d_in} (statistics built in {:.2} s)\n",
            t.elapsed().as_secs_f64()
        );
        let lambda = solve::ridge_lambda(h.as_ref(), 0.01);
        let a = solve::regularised(h.as_ref(), lambda);
        let (t_chol, _) = time(reps, || a.llt(Side::Lower).map(|_| ()));
        println!("dense Cholesky of A ({d_in} x {d_in}): {:.4} s\n", t_chol);
        println!("| pattern | method | seconds | x Cholesky | rel. error | sweeps | swaps |");
        println!("|---|---|---:|---:|---:|---:|---:|");
        for (label, pattern) in patterns {
            for method in [Method::Magnitude, Method::Obs, Method::L0] {
                let params = SolveParams { method, pattern, ..SolveParams::default() };
                // The kernels alone, on the prepared A: what a method costs
                // beyond the statistics every method shares.
                let (secs, pruned) = time(reps, || match method {
                    Method::Magnitude => solve::baseline::magnitude(w.as_ref(), pattern),
                    Method::Obs => solve::obs::sweep(
                        w.as_ref(),
                        a.as_ref(),
                        lambda,
                        pattern,
                        params.obs_block,
                        par,
                    )
                    .unwrap(),
                    _ => solve::l0::solve(w.as_ref(), a.as_ref(), lambda, &params, par).unwrap(),
                });
                let err =
                    objective::relative_error(w.as_ref(), pruned.weight.as_ref(), h.as_ref(), par);
                println!(
                    "| {label} | {} | {secs:.3} | {:.1} | {err:.4e} | {} | {} |",
                    method.name(),
                    secs / t_chol,
                    pruned.info.sweeps,
                    pruned.info.swaps
                );
            }
        }
    }
}
