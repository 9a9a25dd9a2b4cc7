//! Tests of the group kernel against exhaustive enumeration with an
//! independent solver, and an ignored timing run.

use super::*;
use crate::rng::SplitMix64;
use crate::solve::l0::tests::instance;
use crate::solve::objective::objective;

/// Reference solver: Gaussian elimination with partial pivoting on
/// `A_SS X = B_Sᵀ` (hand-written, shares no code with the kernel), returning
/// the refit `Ŵ` (`d_out x d_in`, zero outside `cols`).
fn ref_refit(w: &Mat<f64>, a: &Mat<f64>, cols: &[usize]) -> Mat<f64> {
    let (d_out, d) = (w.nrows(), w.ncols());
    let k = cols.len();
    let mut out = Mat::<f64>::zeros(d_out, d);
    if k == 0 {
        return out;
    }
    // Augmented [A_SS | B_Sᵀ], B_S = W A_{:,S}.
    let mut m: Vec<Vec<f64>> = (0..k)
        .map(|p| {
            let mut row: Vec<f64> = (0..k).map(|q| a[(cols[p], cols[q])]).collect();
            for r in 0..d_out {
                row.push((0..d).map(|j| w[(r, j)] * a[(j, cols[p])]).sum());
            }
            row
        })
        .collect();
    for c in 0..k {
        let piv = (c..k).max_by(|&x, &y| m[x][c].abs().total_cmp(&m[y][c].abs())).unwrap();
        m.swap(c, piv);
        let pivot = m[c].clone();
        for row in m.iter_mut().skip(c + 1) {
            let f = row[c] / pivot[c];
            for (v, &p) in row.iter_mut().zip(&pivot).skip(c) {
                *v -= f * p;
            }
        }
    }
    for c in (0..k).rev() {
        for j in k..k + d_out {
            let mut v = m[c][j];
            for q in c + 1..k {
                v -= m[c][q] * out[(j - k, cols[q])];
            }
            out[(j - k, cols[c])] = v / m[c][c];
        }
    }
    out
}

/// `Σ_rows (w − ŵ)ᵀ A (w − ŵ)` by plain loops.
fn ref_objective(w: &Mat<f64>, what: &Mat<f64>, a: &Mat<f64>) -> f64 {
    let d = w.ncols();
    (0..w.nrows())
        .map(|r| {
            let e: Vec<f64> = (0..d).map(|j| w[(r, j)] - what[(r, j)]).collect();
            (0..d).map(|i| (0..d).map(|j| e[i] * a[(i, j)] * e[j]).sum::<f64>()).sum::<f64>()
        })
        .sum()
}

/// Optimal `f` on the kept groups `groups` by the reference solver.
fn ref_value(w: &Mat<f64>, a: &Mat<f64>, groups: &[usize], g: usize) -> f64 {
    ref_objective(w, &ref_refit(w, a, &group_cols(groups, g)), a)
}

/// All `k`-subsets of `0..n`.
fn subsets(n: usize, k: usize) -> Vec<Vec<usize>> {
    (0u32..1 << n)
        .filter(|m| m.count_ones() as usize == k)
        .map(|m| (0..n).filter(|&j| m >> j & 1 == 1).collect())
        .collect()
}

/// A small instance: `H = XᵀX` of correlated inputs with two outlier
/// columns 8x louder (shared with the l0 tests), `W`.
fn small(rng: &mut SplitMix64, d: usize, rows: usize) -> (Mat<f64>, Mat<f64>) {
    let (x, w, _) = instance(rng, 3 * d, d, rows, 0.0);
    (x.transpose() * &x, w)
}

fn params(method: GroupMethod, refit: bool, alpha: f64) -> GroupParams {
    GroupParams { method, refit, ridge_alpha: alpha, ..GroupParams::default() }
}

fn a_of(h: &Mat<f64>, alpha: f64) -> Mat<f64> {
    regularised(h.as_ref(), ridge_lambda(h.as_ref(), alpha))
}

#[test]
fn swap_reaches_enumerated_optimum() {
    let mut rng = SplitMix64::new(11);
    let configs: [(usize, usize, &[usize]); 5] = [
        (1, 10, &[2, 5, 8]),
        (1, 12, &[3, 6, 9]),
        (1, 14, &[4, 7, 10]),
        (2, 7, &[2, 3, 5]),
        (3, 6, &[2, 3, 4]),
    ];
    let methods = [
        ("swap", GroupMethod::Swap, true),
        ("greedy", GroupMethod::Greedy, true),
        ("magnitude+refit", GroupMethod::Magnitude, true),
        ("scaled+refit", GroupMethod::Scaled, true),
    ];
    let mut gaps: Vec<Vec<f64>> = vec![Vec::new(); methods.len()];
    for rep in 0..3 {
        for &(g, n_groups, keeps) in &configs {
            for alpha in [0.0, 0.01] {
                let d = g * n_groups;
                let (h, w) = small(&mut rng, d, 3 + rep);
                let a = a_of(&h, alpha);
                for &keep in keeps {
                    // Reference: exhaustive search over every kept set.
                    let best = subsets(n_groups, keep)
                        .iter()
                        .map(|s| ref_value(&w, &a, s, g))
                        .fold(f64::INFINITY, f64::min);
                    for (m, &(_, method, refit)) in methods.iter().enumerate() {
                        let p = params(method, refit, alpha);
                        let sol =
                            solve_groups(w.as_ref(), h.as_ref(), g, keep, &p, Par::Seq).unwrap();
                        // Reference: the independent refit of the returned set.
                        let f = ref_value(&w, &a, &sol.kept, g);
                        assert!(
                            (f - sol.objective).abs() <= 1e-9 * best.max(1e-300),
                            "{method:?}: reported {} vs recomputed {f}",
                            sol.objective
                        );
                        assert!(f >= best * (1.0 - 1e-9), "below the optimum?");
                        gaps[m].push(f / best - 1.0);
                    }
                }
            }
        }
    }
    let n = gaps[0].len();
    for (m, (name, _, _)) in methods.iter().enumerate() {
        let mean = gaps[m].iter().sum::<f64>() / n as f64;
        let max = gaps[m].iter().fold(0.0f64, |x, &y| x.max(y));
        let hit = gaps[m].iter().filter(|&&x| x <= 1e-9).count();
        eprintln!(
            "{name}: optimal {hit}/{n}, mean gap {:.3}%, max {:.3}%",
            100.0 * mean,
            100.0 * max
        );
    }
    // Reference: the enumerated optimum above.
    let hit = gaps[0].iter().filter(|&&x| x <= 1e-9).count();
    let mean = gaps[0].iter().sum::<f64>() / n as f64;
    assert!(hit as f64 >= 0.9 * n as f64, "swap optimal on {hit}/{n}");
    assert!(mean < 0.01, "swap mean gap {mean}");
}

/// A problem and an exact state on `slots` for the price tests.
fn problem_state<'s>(
    w: &Mat<f64>,
    a: &'s Mat<f64>,
    b: &'s Mat<f64>,
    g: usize,
    slots: Vec<usize>,
) -> (Problem<'s>, State) {
    let base = ref_objective(w, &Mat::zeros(w.nrows(), w.ncols()), a);
    let pb = Problem {
        a: a.as_ref(),
        b: b.as_ref(),
        base,
        g,
        n_groups: w.ncols() / g,
        lambda: 0.0,
        par: Par::Seq,
    };
    let st = State::exact(&pb, slots).unwrap();
    (pb, st)
}

#[test]
fn swap_and_removal_prices_equal_recomputed_changes() {
    let mut rng = SplitMix64::new(5);
    for (g, n_groups, slots) in
        [(1, 9, vec![7, 0, 3, 5]), (2, 6, vec![4, 1, 2]), (3, 5, vec![0, 3, 4])]
    {
        let d = g * n_groups;
        let (h, w) = small(&mut rng, d, 4);
        let a = a_of(&h, 0.01);
        let b = &w * &a;
        let (pb, st) = problem_state(&w, &a, &b, g, slots.clone());
        let f = ref_value(&w, &a, &slots, g);
        // Reference: the independent refit of the same set.
        assert!((st.f - f).abs() <= 1e-10 * f, "state f {} vs {f}", st.f);
        let rem = st.removed(n_groups);
        let prices = swap_prices(&pb, &st, &rem);
        let mut improving = None;
        for sp in 0..slots.len() {
            for (q, &j) in rem.iter().enumerate() {
                let mut s2 = slots.clone();
                s2[sp] = j;
                // Reference: f(S') − f(S), each refit independently.
                let want = ref_value(&w, &a, &s2, g) - f;
                let got = prices[(sp, q)];
                assert!((got - want).abs() <= 1e-8 * f, "g={g} ({sp},{j}): {got} vs {want}");
                if got < -1e-6 * f && improving.is_none() {
                    improving = Some((sp, j, got));
                }
            }
        }
        // Greedy removal cost: tr(Ŵ_I M_II⁻¹ Ŵ_Iᵀ) against f(S∖I) − f(S).
        let costs = removal_costs(
            &diag_blocks(st.m.as_ref(), g),
            &gram_blocks(st.what.as_ref(), g),
            g,
            &vec![false; slots.len()],
        );
        assert_eq!(costs.len(), slots.len());
        for (sp, &cost) in costs.iter().enumerate() {
            let mut s2 = slots.clone();
            s2.remove(sp);
            let want = ref_value(&w, &a, &s2, g) - f;
            assert!((cost - want).abs() <= 1e-8 * f, "g={g} remove {sp}: {cost} vs {want}");
        }
        // The incremental swap reprices the same and leaves the exact refit.
        let (sp, j, price) = improving.expect("instance has an improving swap");
        let mut st2 = st.clone();
        let delta = try_swap(&pb, &mut st2, sp, j).expect("improving swap applied");
        assert!((delta - price).abs() <= 1e-8 * f, "{delta} vs {price}");
        let fresh = State::exact(&pb, st2.slots.clone()).unwrap();
        // Reference: the exact state of the new set.
        assert!((st2.f - fresh.f).abs() <= 1e-8 * f);
        assert!((&st2.m - &fresh.m).norm_max() <= 1e-8 * fresh.m.norm_max());
        assert!((&st2.what - &fresh.what).norm_max() <= 1e-8 * fresh.what.norm_max());
    }
}

#[test]
fn refit_columns_solves_normal_equations() {
    let mut rng = SplitMix64::new(3);
    let d = 12;
    let (h, w) = small(&mut rng, d, 5);
    for alpha in [0.0, 0.01] {
        let a = a_of(&h, alpha);
        let cols = vec![0, 2, 3, 7, 8, 11];
        let got = refit_columns(w.as_ref(), a.as_ref(), &cols, Par::Seq).unwrap();
        let grad = (&got - &w) * &a;
        let b = &w * &a;
        let scale = b.norm_max();
        for c in 0..d {
            for r in 0..w.nrows() {
                if cols.contains(&c) {
                    // Reference: the normal equations, gradient zero on S.
                    assert!(grad[(r, c)].abs() <= 1e-9 * scale, "grad {}", grad[(r, c)]);
                } else {
                    assert_eq!(got[(r, c)], 0.0);
                }
            }
        }
        // Reference: the hand-written Gaussian elimination.
        let want = ref_refit(&w, &a, &cols);
        assert!((&got - &want).norm_max() <= 1e-9 * want.norm_max());
    }
}

#[test]
fn objectives_are_monotone_and_recomputed() {
    let mut rng = SplitMix64::new(21);
    for (g, n_groups, keep) in [(1, 24, 10), (1, 30, 20), (4, 12, 5), (2, 20, 7)] {
        let d = g * n_groups;
        let (x, w, _) = instance(&mut rng, 2 * d, d, 6, 0.0);
        let h = x.transpose() * &x;
        let a = a_of(&h, 0.01);
        let run = |m, refit| {
            solve_groups(w.as_ref(), h.as_ref(), g, keep, &params(m, refit, 0.01), Par::Seq)
                .unwrap()
        };
        let sols = [
            run(GroupMethod::Swap, true),
            run(GroupMethod::Greedy, true),
            run(GroupMethod::Magnitude, true),
            run(GroupMethod::Magnitude, false),
            run(GroupMethod::Scaled, true),
            run(GroupMethod::Scaled, false),
        ];
        for s in &sols {
            // Reference: objective::objective on the returned weight.
            let f = objective(w.as_ref(), s.weight.as_ref(), a.as_ref(), Par::Seq);
            assert!((f - s.objective).abs() <= 1e-12 * f.max(1.0), "{} vs {f}", s.objective);
            assert_eq!(s.kept.len(), keep);
            let cols = group_cols(&s.kept, g);
            for c in (0..d).filter(|c| !cols.contains(c)) {
                assert!(s.weight.col(c).iter().all(|&v| v == 0.0));
            }
        }
        // Reference: the greedy solution; swap starts there and never rises.
        assert!(sols[0].objective <= sols[1].objective, "swap above greedy");
        assert_eq!(sols[0].objective_start, sols[1].objective);
        // Reference: the same kept sets without refit.
        assert!(sols[2].objective <= sols[3].objective);
        assert!(sols[4].objective <= sols[5].objective);
        eprintln!(
            "g={g} keep {keep}/{n_groups}: swap {:.4e} ({} rounds, {} swaps) greedy {:.4e} mag {:.4e} scaled {:.4e}",
            sols[0].objective, sols[0].rounds, sols[0].swaps, sols[1].objective, sols[2].objective, sols[4].objective
        );
    }
}

#[test]
fn edge_cases() {
    let mut rng = SplitMix64::new(8);
    let d = 12;
    let (h, w) = small(&mut rng, d, 3);
    let a = a_of(&h, 0.01);
    let all = [GroupMethod::Magnitude, GroupMethod::Scaled, GroupMethod::Greedy, GroupMethod::Swap];
    let dense = objective(w.as_ref(), Mat::zeros(3, d).as_ref(), a.as_ref(), Par::Seq);
    for m in all {
        let p = params(m, true, 0.01);
        // keep = 0: all zero, f = tr(W A Wᵀ) (reference: objective of zero).
        let s = solve_groups(w.as_ref(), h.as_ref(), 3, 0, &p, Par::Seq).unwrap();
        assert!(s.kept.is_empty() && s.weight.norm_max() == 0.0);
        assert!((s.objective - dense).abs() <= 1e-12 * dense);
        // keep = all: W itself, f = 0.
        let s = solve_groups(w.as_ref(), h.as_ref(), 3, 4, &p, Par::Seq).unwrap();
        assert_eq!(s.kept, vec![0, 1, 2, 3]);
        assert_eq!(s.weight, w);
        assert_eq!(s.objective, 0.0);
        // group = d_in: one group, keep 1 (= W) or 0.
        let s = solve_groups(w.as_ref(), h.as_ref(), d, 1, &p, Par::Seq).unwrap();
        assert_eq!(s.weight, w);
        let s = solve_groups(w.as_ref(), h.as_ref(), d, 0, &p, Par::Seq).unwrap();
        assert_eq!(s.weight.norm_max(), 0.0);
    }
    // Dead inputs: columns 4 and 5 (group 2 of width 2) never fire, so H has
    // zero rows/columns there; A stays PD through `regularised`'s small
    // diagonal for dead inputs. With zero weights on them, group 2 costs nothing to remove
    // and Greedy and Swap remove it when one group goes.
    let mut hd = h.clone();
    for j in [4, 5] {
        for i in 0..d {
            hd[(i, j)] = 0.0;
            hd[(j, i)] = 0.0;
        }
    }
    let mut wd = w.clone();
    for r in 0..3 {
        wd[(r, 4)] = 0.0;
        wd[(r, 5)] = 0.0;
    }
    for m in [GroupMethod::Greedy, GroupMethod::Swap] {
        for alpha in [0.0, 0.01] {
            let s = solve_groups(wd.as_ref(), hd.as_ref(), 2, 5, &params(m, true, alpha), Par::Seq)
                .unwrap();
            // Reference: by hand, the dead group is the only free removal.
            assert_eq!(s.kept, vec![0, 1, 3, 4, 5], "{m:?} α={alpha}");
            // Reference: removing inputs whose weights are zero loses
            // nothing, so f is zero up to rounding (scale: f of keeping none).
            let ad = a_of(&hd, alpha);
            let none = ref_value(&wd, &ad, &[], 2);
            assert!(s.objective <= 1e-12 * none, "{m:?}: f {}", s.objective);
            assert!(ref_value(&wd, &ad, &s.kept, 2) <= 1e-12 * none);
        }
    }
    // With nonzero weights on the dead inputs the solve still succeeds and
    // matches the independent refit of its set.
    let s = solve_groups(
        w.as_ref(),
        hd.as_ref(),
        2,
        3,
        &params(GroupMethod::Swap, true, 0.0),
        Par::Seq,
    )
    .unwrap();
    let want = ref_value(&w, &a_of(&hd, 0.0), &s.kept, 2);
    assert!((s.objective - want).abs() <= 1e-9 * want);
}

/// Timing on synthetic layers shaped like MiniLM's FFN (384 x 1536), a
/// 1024 x 2816 layer and 16 heads of width 64. Run with
/// `cargo test --release --lib group_bench -- --ignored --nocapture`;
/// `LOPPER_GROUP_BENCH=384,1024,heads` picks cases.
#[test]
#[ignore]
fn group_bench() {
    use faer::linalg::matmul::matmul;
    let par = Par::rayon(0);
    let pick = std::env::var("LOPPER_GROUP_BENCH").unwrap_or_else(|_| "384,1024,heads".into());
    for (name, d_out, d, g, keeps) in [
        ("384", 384usize, 1536usize, 1usize, vec![768usize, 1152]),
        ("1024", 1024, 2816, 1, vec![1408]),
        ("heads", 384, 1024, 64, vec![12]),
    ] {
        if !pick.split(',').any(|p| p == name) {
            continue;
        }
        let mut rng = SplitMix64::new(1);
        let n = 4 * d;
        let load = Mat::from_fn(8, d, |_, _| rng.normal());
        let scale: Vec<f64> = (0..d)
            .map(|_| (0.5 * rng.normal()).exp() * if rng.uniform() < 0.01 { 10.0 } else { 1.0 })
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
        let w = Mat::from_fn(d_out, d, |_, _| rng.normal() / (d as f64).sqrt());
        for keep in keeps {
            for (label, method) in [
                ("scaled+refit", GroupMethod::Scaled),
                ("greedy", GroupMethod::Greedy),
                ("swap", GroupMethod::Swap),
            ] {
                let p = GroupParams { method, ..GroupParams::default() };
                let t = Instant::now();
                let s = solve_groups(w.as_ref(), h.as_ref(), g, keep, &p, par).unwrap();
                println!(
                    "{d_out}x{d} g={g} keep {keep}: {label} {:.2}s f_start {:.6e} f {:.6e} rounds {} swaps {}",
                    t.elapsed().as_secs_f64(),
                    s.objective_start,
                    s.objective,
                    s.rounds,
                    s.swaps
                );
            }
        }
    }
}
