//! A timing run of the local search on one large synthetic layer
//! (ignored by default).

use crate::rng::SplitMix64;
use crate::solve::objective::relative_error;
use crate::solve::{prune_layer, regularised, ridge_lambda, Method, Pattern, Scope, SolveParams};
use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, Par};
use std::time::Instant;

/// A 1536 x 1536 layer with 16k calibration rows of structured
/// activations: 8 shared latent factors, a moving-average correlation
/// between neighbouring inputs, log-normal channel scales and 1% outlier
/// channels 10x louder. Run with
/// `cargo test --release --lib bench_1536 -- --ignored --nocapture`;
/// `LOPPER_BENCH` picks patterns, `LOPPER_CHOL`, `LOPPER_CG_TOL` and
/// `LOPPER_SWEEP_ITER` override `chol_max`, `cg_tol`, `cg_sweep_iter`.
#[test]
#[ignore]
fn bench_1536() {
    let (n, d) = (16384, 1536);
    let par = Par::rayon(0);
    let mut rng = SplitMix64::new(1);
    let t = Instant::now();
    let load = Mat::from_fn(8, d, |_, _| rng.normal());
    let scale: Vec<f64> = (0..d)
        .map(|_| {
            let s = (0.5 * rng.normal()).exp();
            if rng.uniform() < 0.01 {
                10.0 * s
            } else {
                s
            }
        })
        .collect();
    let u = Mat::from_fn(n, 8, |_, _| rng.normal());
    let z = Mat::from_fn(n, d + 1, |_, _| rng.normal());
    let mut x = Mat::<f64>::zeros(n, d);
    matmul(x.as_mut(), Accum::Replace, u.as_ref(), load.as_ref(), 0.5, par);
    for j in 0..d {
        for i in 0..n {
            x[(i, j)] = scale[j] * (x[(i, j)] + z[(i, j + 1)] + 0.6 * z[(i, j)]);
        }
    }
    let mut h = Mat::<f64>::zeros(d, d);
    matmul(h.as_mut(), Accum::Replace, x.transpose(), x.as_ref(), 1.0, par);
    drop((x, z, u));
    let w = Mat::from_fn(d, d, |_, _| rng.normal() / (d as f64).sqrt());
    println!("setup {:.2}s", t.elapsed().as_secs_f64());
    let lambda = ridge_lambda(h.as_ref(), 0.01);
    let a = regularised(h.as_ref(), lambda);
    // The machine is shared: time each solver `reps` times, keep the
    // fastest.
    let timed = |params: &SolveParams, reps: usize| {
        let mut best = f64::INFINITY;
        let mut out = None;
        for _ in 0..reps {
            let t = Instant::now();
            let p = prune_layer(w.as_ref(), h.as_ref(), params, par).unwrap();
            best = best.min(t.elapsed().as_secs_f64());
            out = Some(p);
        }
        (best, out.unwrap())
    };
    // `LOPPER_BENCH=90,layer,50,24` picks the patterns (default all).
    let pick = std::env::var("LOPPER_BENCH").unwrap_or_else(|_| "90,layer,50,24".into());
    for (name, pattern, reps) in [
        ("90", Pattern::Unstructured { sparsity: 0.9, scope: Scope::Row }, 3),
        ("layer", Pattern::Unstructured { sparsity: 0.9, scope: Scope::Layer }, 1),
        ("50", Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row }, 1),
        ("24", Pattern::NofM { n: 2, m: 4 }, 1),
    ] {
        if !pick.split(',').any(|p| p == name) {
            continue;
        }
        let mut params = SolveParams { pattern, ridge_alpha: 0.01, ..SolveParams::default() };
        let (t_obs, ob) = timed(&params, reps);
        let e_obs = relative_error(w.as_ref(), ob.weight.as_ref(), h.as_ref(), par);
        params.method = Method::L0;
        params.l0.trace = true;
        let env = |k: &str| std::env::var(k).ok().and_then(|v| v.parse::<f64>().ok());
        if let Some(v) = env("LOPPER_CHOL") {
            params.l0.chol_max = Some(v as usize);
        }
        if let Some(v) = env("LOPPER_SWEEP_ITER") {
            params.l0.cg_sweep_iter = v as usize;
        }
        if let Some(v) = env("LOPPER_CG_TOL") {
            params.l0.cg_tol = v;
        }
        let (t_l0, l0) = timed(&params, reps);
        let e_l0 = relative_error(w.as_ref(), l0.weight.as_ref(), h.as_ref(), par);
        let _ = &a;
        println!(
            "{pattern:?}: obs {t_obs:.2}s err {e_obs:.4e} | l0 {t_l0:.2}s ({:.1}x) err {e_l0:.4e} ({:+.1}%) init {:?} sweeps {} swaps {} cg {}",
            t_l0 / t_obs,
            100.0 * (e_l0 / e_obs - 1.0),
            l0.info.init,
            l0.info.sweeps,
            l0.info.swaps,
            l0.info.refit_iterations
        );
        println!("  trace {:?}", l0.info.trace);
        let phases: Vec<String> =
            l0.info.phases.iter().map(|(n, t)| format!("{n} {t:.2}s")).collect();
        println!("  phases: {}", phases.join(", "));
    }
}
