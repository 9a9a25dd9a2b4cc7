//! Tests of the whole local search ([`super::solve`]) against exhaustive
//! enumeration and the OBS sweep, and the test instances shared by the
//! step modules' own tests.

use super::refit;
use super::{solve, Problem};
use crate::rng::SplitMix64;
use crate::solve::baseline::scaled_scores;
use crate::solve::mask::{select, Mask};
use crate::solve::{budget, obs, Pattern, Pruned, Scope, SolveParams};
use faer::{Mat, Par};

/// Calibration inputs with correlated columns (a shared factor plus a
/// moving average) and two outlier columns 8x louder, dense weights, and
/// `λ = α · mean diag(XᵀX)`.
pub(crate) fn instance(
    rng: &mut SplitMix64,
    n: usize,
    d: usize,
    rows: usize,
    alpha: f64,
) -> (Mat<f64>, Mat<f64>, f64) {
    let z = Mat::from_fn(n, d + 1, |_, _| rng.normal());
    let common: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
    let o1 = rng.below(d as u64) as usize;
    let o2 = rng.below(d as u64) as usize;
    let x = Mat::from_fn(n, d, |i, j| {
        let v = z[(i, j + 1)] + 0.7 * z[(i, j)] + 0.5 * common[i];
        if j == o1 || j == o2 {
            8.0 * v
        } else {
            v
        }
    });
    let w = Mat::from_fn(rows, d, |_, _| rng.normal());
    let h = x.transpose() * &x;
    let lambda = alpha * (0..d).map(|j| h[(j, j)]).sum::<f64>() / d as f64;
    (x, w, lambda)
}

fn gram(x: &Mat<f64>, lambda: f64) -> Mat<f64> {
    let mut a = x.transpose() * x;
    for j in 0..a.nrows() {
        a[(j, j)] += lambda;
    }
    a
}

/// Optimal value on support `s` (row-local indices): `wᵀAw − b_Sᵀ A_SS⁻¹ b_S`,
/// by a dense LU solve (a different factorisation from the solver's).
fn support_value(a: &Mat<f64>, w: &[f64], s: &[usize]) -> f64 {
    let d = w.len();
    let b: Vec<f64> = (0..d).map(|i| (0..d).map(|j| a[(i, j)] * w[j]).sum()).collect();
    let dense: f64 = (0..d).map(|i| w[i] * b[i]).sum();
    if s.is_empty() {
        return dense;
    }
    let ass = Mat::from_fn(s.len(), s.len(), |p, q| a[(s[p], s[q])]);
    let rhs = Mat::from_fn(s.len(), 1, |p, _| b[s[p]]);
    use faer::linalg::solvers::Solve;
    let x = ass.partial_piv_lu().solve(rhs);
    dense - (0..s.len()).map(|p| b[s[p]] * x[(p, 0)]).sum::<f64>()
}

/// All `k`-subsets of `0..d`.
fn subsets(d: usize, k: usize) -> Vec<Vec<usize>> {
    (0u32..1 << d)
        .filter(|m| m.count_ones() as usize == k)
        .map(|m| (0..d).filter(|&j| m >> j & 1 == 1).collect())
        .collect()
}

/// All N:M supports of a row of width `d`: every combination of one
/// `n`-subset per group.
fn nm_supports(d: usize, n: usize, m: usize) -> Vec<Vec<usize>> {
    let per_group = subsets(m, n);
    let mut out: Vec<Vec<usize>> = vec![Vec::new()];
    for q in 0..d / m {
        out = out
            .into_iter()
            .flat_map(|s| {
                per_group
                    .iter()
                    .map(move |g| s.iter().copied().chain(g.iter().map(|&j| q * m + j)).collect())
            })
            .collect();
    }
    out
}

fn l0_params(pattern: Pattern) -> SolveParams {
    SolveParams { method: super::super::Method::L0, pattern, ..SolveParams::default() }
}

fn objective(w: &Mat<f64>, what: &Mat<f64>, a: &Mat<f64>) -> f64 {
    crate::solve::objective::objective(w.as_ref(), what.as_ref(), a.as_ref(), Par::Seq)
}

/// Greedy: scaled magnitude mask, then exact refit (per row, dense LU).
fn greedy_value(w: &Mat<f64>, a: &Mat<f64>, pattern: Pattern) -> f64 {
    let mask = select(scaled_scores(w.as_ref(), a.as_ref()).as_ref(), pattern);
    (0..w.nrows())
        .map(|r| {
            let wr: Vec<f64> = (0..w.ncols()).map(|c| w[(r, c)]).collect();
            let s: Vec<usize> = (0..w.ncols()).filter(|&c| mask.get(r, c)).collect();
            support_value(a, &wr, &s)
        })
        .sum()
}

struct Tally {
    name: String,
    hits: usize,
    n: usize,
    gaps: [f64; 3],
}

impl Tally {
    fn new(name: &str) -> Self {
        Tally { name: name.into(), hits: 0, n: 0, gaps: [0.0; 3] }
    }
    fn add(&mut self, opt: f64, l0: f64, greedy: f64, obs: f64) {
        let gap = |v: f64| (v - opt) / opt.max(f64::MIN_POSITIVE);
        self.n += 1;
        // 1e-6 relative: far above the rounding of a d ≤ 16 refit
        // (≈ 1e-13 κ), far below any real difference between supports.
        if gap(l0) <= 1e-6 {
            self.hits += 1;
        }
        for (s, v) in self.gaps.iter_mut().zip([l0, greedy, obs]) {
            *s += gap(v);
        }
    }
    fn report(&self) -> (f64, f64) {
        let n = self.n as f64;
        let rate = self.hits as f64 / n;
        println!(
            "{}: l0 optimal on {}/{} ({:.0}%), mean gap l0 {:.3e}, greedy {:.3e}, obs {:.3e}",
            self.name,
            self.hits,
            self.n,
            100.0 * rate,
            self.gaps[0] / n,
            self.gaps[1] / n,
            self.gaps[2] / n
        );
        (rate, self.gaps[0] / n)
    }
}

/// Run the solver and the two baselines on one instance; returns
/// (l0, greedy, obs) objectives after checking conformity, exact zeros
/// and monotonicity.
fn run_methods(w: &Mat<f64>, a: &Mat<f64>, lambda: f64, pattern: Pattern) -> (f64, f64, f64) {
    let mut params = l0_params(pattern);
    params.l0.trace = true;
    let got = solve(w.as_ref(), a.as_ref(), lambda, &params, Par::Seq).unwrap();
    check_output(w, a, &got, pattern);
    let ob =
        obs::sweep(w.as_ref(), a.as_ref(), lambda, pattern, params.obs_block, Par::Seq).unwrap();
    (objective(w, &got.weight, a), greedy_value(w, a, pattern), objective(w, &ob.weight, a))
}

/// Conformity, exact zeros off the support, objective bookkeeping and a
/// non-increasing trace.
fn check_output(w: &Mat<f64>, a: &Mat<f64>, got: &Pruned, pattern: Pattern) {
    let mask = Mask::nonzeros(got.weight.as_ref());
    assert!(mask.conforms(pattern), "{pattern:?}: output does not conform");
    let info = &got.info;
    let direct = objective(w, &got.weight, a);
    // The bookkept Σ f_r comes from exact gradients; it matches a fresh
    // product up to rounding of O(d ε ‖W‖² ‖A‖).
    let scale = w.norm_l2().powi(2) * a.norm_max() * a.nrows() as f64;
    let tol = 1e-12 * scale;
    assert!(
        (info.objective_final - direct).abs() <= tol,
        "final {} vs direct {direct} (tol {tol:.2e})",
        info.objective_final
    );
    assert!(
        info.objective_final <= info.objective_initial,
        "{} > {}",
        info.objective_final,
        info.objective_initial
    );
    assert_eq!(info.trace.first().copied(), Some(info.objective_initial));
    for p in info.trace.windows(2) {
        assert!(p[1] <= p[0], "trace rose: {:?}", info.trace);
    }
}

#[test]
fn conforms_and_never_increases() {
    // Every pattern, both refit paths (per-row Cholesky, batched CG via
    // chol_max = 0), sequential and parallel.
    let mut rng = SplitMix64::new(99);
    let (x, w, lambda) = instance(&mut rng, 200, 48, 12, 0.01);
    let a = gram(&x, lambda);
    let patterns = [
        Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row },
        Pattern::Unstructured { sparsity: 0.9, scope: Scope::Row },
        Pattern::Unstructured { sparsity: 0.7, scope: Scope::Layer },
        Pattern::NofM { n: 2, m: 4 },
        Pattern::NofM { n: 1, m: 8 },
    ];
    for pattern in patterns {
        for (chol_max, par) in [
            (256, Par::Seq),
            (0, Par::Seq),
            (256, Par::rayon(2)),
            (0, Par::rayon(2)),
            (256, Par::rayon(3)),
        ] {
            let mut params = l0_params(pattern);
            params.l0.trace = true;
            params.l0.chol_max = Some(chol_max);
            let got = solve(w.as_ref(), a.as_ref(), lambda, &params, par).unwrap();
            check_output(&w, &a, &got, pattern);
            assert_eq!(got.info.trace.len(), got.info.sweeps + 1, "{pattern:?}");
            assert!(got.info.init.is_some());
            if chol_max == 0 {
                assert!(got.info.refit_iterations > 0, "{pattern:?}: CG path not taken");
                // The final refit leaves every row within cg_tol.
                let prob = Problem::new(w.as_ref(), a.as_ref(), lambda, Par::Seq);
                let d = w.ncols();
                for r in 0..w.nrows() {
                    let wr: Vec<f64> = (0..d).map(|c| got.weight[(r, c)]).collect();
                    let keep: Vec<bool> = wr.iter().map(|&x| x != 0.0).collect();
                    let rg = r * d..(r + 1) * d;
                    let mut g = vec![0.0; d];
                    refit::gradient_row(
                        a.as_ref(),
                        &prob.w[rg.clone()],
                        &prob.b[rg.clone()],
                        &wr,
                        &keep,
                        &mut g,
                    );
                    let sq = |x: &[f64]| -> f64 {
                        x.iter().zip(&keep).filter(|(_, &k)| k).map(|(v, _)| v * v).sum()
                    };
                    let (res, rhs) = (sq(&g).sqrt(), sq(&prob.b[rg]).sqrt());
                    assert!(
                        res <= 1.01 * params.l0.cg_tol * rhs,
                        "{pattern:?} row {r}: residual {res:.3e} vs {rhs:.3e}"
                    );
                }
            }
            // Not worse than either start: the OBS sweep, refit or not.
            let ob =
                obs::sweep(w.as_ref(), a.as_ref(), lambda, pattern, params.obs_block, par).unwrap();
            let f_obs = objective(&w, &ob.weight, &a);
            assert!(
                got.info.objective_final <= f_obs * (1.0 + 1e-9),
                "{pattern:?}: {} > obs {f_obs}",
                got.info.objective_final
            );
        }
    }
}

#[test]
fn edge_budgets() {
    // Keep everything: the refit reproduces W (objective at rounding
    // level). Keep nothing: all zeros, objective = Σ wᵀAw.
    let mut rng = SplitMix64::new(4);
    let (x, w, lambda) = instance(&mut rng, 60, 16, 4, 0.01);
    let a = gram(&x, lambda);
    let dense: f64 = objective(&w, &Mat::zeros(4, 16), &a);
    for pattern in [
        Pattern::Unstructured { sparsity: 0.0, scope: Scope::Row },
        Pattern::Unstructured { sparsity: 0.0, scope: Scope::Layer },
        Pattern::NofM { n: 4, m: 4 },
    ] {
        let mut params = l0_params(pattern);
        params.l0.trace = true;
        let got = solve(w.as_ref(), a.as_ref(), lambda, &params, Par::Seq).unwrap();
        check_output(&w, &a, &got, pattern);
        // A full refit solves A ŵ = A w: error O(ε κ(A)) relative.
        assert!(
            got.info.objective_final <= 1e-9 * dense,
            "{pattern:?}: {}",
            got.info.objective_final
        );
    }
    for pattern in [
        Pattern::Unstructured { sparsity: 0.99, scope: Scope::Row },
        Pattern::Unstructured { sparsity: 0.999, scope: Scope::Layer },
    ] {
        let got = solve(w.as_ref(), a.as_ref(), lambda, &l0_params(pattern), Par::Seq).unwrap();
        assert_eq!(got.weight, Mat::<f64>::zeros(4, 16));
        assert!((got.info.objective_final - dense).abs() <= 1e-12 * dense);
    }
}

#[test]
fn budget_runs_out_cleanly() {
    // A zero sweep budget returns the better start, refit; a zero time
    // budget likewise.
    let mut rng = SplitMix64::new(3);
    let (x, w, lambda) = instance(&mut rng, 100, 32, 6, 0.01);
    let a = gram(&x, lambda);
    let pattern = Pattern::Unstructured { sparsity: 0.75, scope: Scope::Row };
    for (sweeps, secs) in [(0, None), (20, Some(0.0))] {
        let mut params = l0_params(pattern);
        params.l0.max_sweeps = sweeps;
        params.l0.max_seconds = secs;
        params.l0.trace = true;
        let got = solve(w.as_ref(), a.as_ref(), lambda, &params, Par::Seq).unwrap();
        check_output(&w, &a, &got, pattern);
        assert_eq!(got.info.sweeps, 0);
        assert_eq!(got.info.objective_final, got.info.objective_initial);
        assert_eq!(got.info.trace, vec![got.info.objective_initial]);
    }
}

#[test]
fn per_row_matches_exhaustive_enumeration() {
    // Source: exhaustive enumeration of supports, exact by construction.
    // 192 instances (32 sizes x 2 ridges x 3 sparsities). The local search
    // stops at a local optimum on about 5% of such instances (measured:
    // 25 and 40 of 576 instances from 12 seeds with the former LCG and with
    // SplitMix64, which draw from the same distributions), so with the
    // former 48 instances (binomial standard error ≈ 3.3%) the 90% bound
    // failed on 2 of the 24 seeds tried, this one included; at 192
    // (≈ 1.7%) it measures the rate rather than the seed. Bound unchanged.
    let d = 16;
    let mut tally = Tally::new("per-row");
    let mut rng = SplitMix64::new(2024);
    for seed in 0..32 {
        for alpha in [0.0, 0.01] {
            let (x, w, lambda) = instance(&mut rng, 24 + seed, d, 3, alpha);
            let a = gram(&x, lambda);
            for sparsity in [0.5, 0.75, 0.875] {
                let pattern = Pattern::Unstructured { sparsity, scope: Scope::Row };
                let k = budget::kept(sparsity, d);
                let all = subsets(d, k);
                let opt: f64 = (0..w.nrows())
                    .map(|r| {
                        let wr: Vec<f64> = (0..d).map(|c| w[(r, c)]).collect();
                        all.iter().map(|s| support_value(&a, &wr, s)).fold(f64::INFINITY, f64::min)
                    })
                    .sum();
                let (l0, greedy, ob) = run_methods(&w, &a, lambda, pattern);
                tally.add(opt, l0, greedy, ob);
            }
        }
    }
    let (rate, gap) = tally.report();
    assert!(rate >= 0.9, "l0 optimal on only {:.0}% of instances", 100.0 * rate);
    assert!(gap < 0.01, "mean gap {gap:.3e} ≥ 1%");
}

#[test]
fn two_four_matches_exhaustive_enumeration() {
    // Source: exhaustive enumeration over group choices (6^(d/4)
    // supports), exact by construction.
    let d = 16;
    let pattern = Pattern::NofM { n: 2, m: 4 };
    let all = nm_supports(d, 2, 4);
    assert_eq!(all.len(), 6usize.pow(4));
    let mut tally = Tally::new("2:4");
    let mut rng = SplitMix64::new(77);
    for seed in 0..10 {
        for alpha in [0.0, 0.01] {
            let (x, w, lambda) = instance(&mut rng, 24 + seed, d, 3, alpha);
            let a = gram(&x, lambda);
            let opt: f64 = (0..w.nrows())
                .map(|r| {
                    let wr: Vec<f64> = (0..d).map(|c| w[(r, c)]).collect();
                    all.iter().map(|s| support_value(&a, &wr, s)).fold(f64::INFINITY, f64::min)
                })
                .sum();
            let (l0, greedy, ob) = run_methods(&w, &a, lambda, pattern);
            tally.add(opt, l0, greedy, ob);
        }
    }
    let (rate, gap) = tally.report();
    assert!(rate >= 0.9, "l0 optimal on only {:.0}% of instances", 100.0 * rate);
    assert!(gap < 0.01, "mean gap {gap:.3e} ≥ 1%");
}

#[test]
fn per_layer_matches_exhaustive_enumeration() {
    // Source: exhaustive enumeration of layer supports (all K-subsets of
    // the d_out·d_in weights), exact by construction.
    let (rows, d) = (3, 5);
    let mut tally = Tally::new("per-layer");
    let mut rng = SplitMix64::new(5);
    for seed in 0..6 {
        for alpha in [0.0, 0.01] {
            let (x, w, lambda) = instance(&mut rng, 20 + seed, d, rows, alpha);
            let a = gram(&x, lambda);
            for sparsity in [0.5, 0.75] {
                let pattern = Pattern::Unstructured { sparsity, scope: Scope::Layer };
                let k = budget::kept(sparsity, rows * d);
                // Row values for every row support, then every split.
                let wr: Vec<Vec<f64>> =
                    (0..rows).map(|r| (0..d).map(|c| w[(r, c)]).collect()).collect();
                let val: Vec<Vec<f64>> = (0..rows)
                    .map(|r| {
                        (0u32..1 << d)
                            .map(|m| {
                                support_value(
                                    &a,
                                    &wr[r],
                                    &(0..d).filter(|&j| m >> j & 1 == 1).collect::<Vec<_>>(),
                                )
                            })
                            .collect()
                    })
                    .collect();
                let opt = (0u32..1 << (rows * d))
                    .filter(|m| m.count_ones() as usize == k)
                    .map(|m| {
                        (0..rows)
                            .map(|r| val[r][((m >> (r * d)) & ((1 << d) - 1)) as usize])
                            .sum::<f64>()
                    })
                    .fold(f64::INFINITY, f64::min);
                let (l0, greedy, ob) = run_methods(&w, &a, lambda, pattern);
                tally.add(opt, l0, greedy, ob);
            }
        }
    }
    let (rate, gap) = tally.report();
    assert!(rate >= 0.9, "l0 optimal on only {:.0}% of instances", 100.0 * rate);
    assert!(gap < 0.01, "mean gap {gap:.3e} ≥ 1%");
}
