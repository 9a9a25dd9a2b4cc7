use super::*;
use crate::rng::SplitMix64;

/// Cost of `z` on `points` (linear between them).
fn cost(c: &Curve, z: usize) -> f64 {
    interpolate(&c.points, z as f64)
}

fn total_cost(curves: &[Curve], z: &[usize], hull: bool) -> f64 {
    curves
        .iter()
        .zip(z)
        .map(
            |(c, &z)| {
                if hull {
                    interpolate(&lower_hull(&c.points), z as f64)
                } else {
                    cost(c, z)
                }
            },
        )
        .sum()
}

/// Exact optimum of the piecewise-linear model by enumeration: an optimal
/// point of `min Σ c_i(z_i), Σ z_i = T` over piecewise-linear `c_i` has at
/// most one layer strictly between grid points (a basic solution of the
/// linear program on the segments), so enumerate every grid point of every
/// layer but one, and give the free layer the rest.
fn enumerate(curves: &[Curve], target: usize) -> f64 {
    let n = curves.len();
    let mut best = f64::INFINITY;
    for free in 0..n {
        let others: Vec<usize> = (0..n).filter(|&i| i != free).collect();
        let mut idx = vec![0usize; others.len()];
        loop {
            let used: usize = others.iter().zip(&idx).map(|(&i, &k)| curves[i].points[k].0).sum();
            let fc = &curves[free].points;
            if used <= target {
                let zf = target - used;
                if zf >= fc[0].0 && zf <= fc[fc.len() - 1].0 {
                    let c: f64 =
                        others.iter().zip(&idx).map(|(&i, &k)| curves[i].points[k].1).sum();
                    best = best.min(c + interpolate(fc, zf as f64));
                }
            }
            // Next combination (odometer).
            let mut p = 0;
            while p < idx.len() {
                idx[p] += 1;
                if idx[p] < curves[others[p]].points.len() {
                    break;
                }
                idx[p] = 0;
                p += 1;
            }
            if p == idx.len() {
                break;
            }
        }
    }
    best
}

/// A random increasing curve on `k` points `step · m · j`; convex when
/// `convex`, otherwise with random (possibly shrinking) increments.
fn curve(rng: &mut SplitMix64, m: usize, k: usize, convex: bool) -> Curve {
    let mut c = 0.0;
    let mut inc = rng.uniform() * 0.1;
    let mut points = Vec::new();
    for j in 0..k {
        points.push((m * j, c));
        inc = if convex { inc + rng.uniform() } else { rng.uniform() * 2.0 };
        c += inc;
    }
    Curve { step: 1, points }
}

#[test]
fn lower_hull_drops_points_above_chords() {
    // Hand example: (1, 3) lies above the chord (0,0)–(2,2); (2, 2) lies
    // below the chord (0,0)–(3,3.5) (2.33 at x = 2) and (3, 3.5) below
    // (2,2)–(4,6) (4 at x = 3), so both stay. A point on a chord is dropped.
    let p = [(0, 0.0), (1, 3.0), (2, 2.0), (3, 3.5), (4, 6.0)];
    assert_eq!(lower_hull(&p), vec![(0, 0.0), (2, 2.0), (3, 3.5), (4, 6.0)]);
    assert_eq!(lower_hull(&[(0, 0.0), (1, 1.0), (2, 2.0)]), vec![(0, 0.0), (2, 2.0)]);
    assert_eq!(interpolate(&p, 2.5), 2.75);
}

#[test]
fn equal_layers_on_the_grid_match_exhaustive_grid_search() {
    // Reference: exhaustive search over every combination of grid points
    // (6^4 = 1296) with Σ z = T, for convex curves of equal-size layers.
    let mut rng = SplitMix64::new(11);
    for trial in 0..40 {
        let curves: Vec<Curve> = (0..4).map(|_| curve(&mut rng, 10, 6, true)).collect();
        let target = 10 * (trial % 21);
        let mut best = f64::INFINITY;
        for code in 0..6usize.pow(4) {
            let z: Vec<usize> = (0..4).map(|i| 10 * (code / 6usize.pow(i) % 6)).collect();
            if z.iter().sum::<usize>() == target {
                best = best.min(total_cost(&curves, &z, false));
            }
        }
        let z = allocate(&curves, target).unwrap();
        assert_eq!(z.iter().sum::<usize>(), target);
        assert!(z.iter().all(|v| v % 10 == 0), "off the grid: {z:?}");
        let got = total_cost(&curves, &z, false);
        assert!((got - best).abs() <= 1e-9 * (1.0 + best), "trial {trial}: {got} vs {best}");
    }
}

#[test]
fn mixed_sizes_match_enumeration_of_the_linear_model() {
    // Layers of different sizes (one 4x larger, as an FFN layer against an
    // attention layer) and any target: equal to the enumerated optimum.
    let mut rng = SplitMix64::new(5);
    for trial in 0..60 {
        let sizes = [3, 12, 3, 5];
        let curves: Vec<Curve> = sizes.iter().map(|&m| curve(&mut rng, m, 5, true)).collect();
        let caps: usize = curves.iter().map(|c| c.points[4].0).sum();
        let target = (rng.uniform() * caps as f64) as usize;
        let z = allocate(&curves, target).unwrap();
        assert_eq!(z.iter().sum::<usize>(), target, "trial {trial}");
        let got = total_cost(&curves, &z, false);
        let want = enumerate(&curves, target);
        assert!((got - want).abs() <= 1e-9 * (1.0 + want), "trial {trial}: {got} vs {want}");
    }
}

#[test]
fn nonconvex_curves_are_bounded_by_the_enumerated_optimum() {
    // The hull lies below a non-convex curve: the allocation's hull cost is
    // a lower bound on the enumerated optimum, and its true cost an upper
    // one; both equal it when the greedy stops on points of the curve.
    let mut rng = SplitMix64::new(9);
    let mut equal = 0;
    for trial in 0..60 {
        let curves: Vec<Curve> = [4, 4, 8].iter().map(|&m| curve(&mut rng, m, 6, false)).collect();
        let target = 4 * (trial % 16);
        let z = allocate(&curves, target).unwrap();
        let want = enumerate(&curves, target);
        let (lower, upper) = (total_cost(&curves, &z, true), total_cost(&curves, &z, false));
        assert!(lower <= want + 1e-9 && want <= upper + 1e-9, "{lower} {want} {upper}");
        if (lower - upper).abs() < 1e-12 {
            assert!((upper - want).abs() < 1e-9);
            equal += 1;
        }
    }
    assert!(equal > 0, "no trial stopped on curve points");
}

#[test]
fn steps_round_the_one_partial_layer() {
    // Row-scoped counts: multiples of d_out; the total misses the target by
    // at most half the step of one layer.
    let curves = vec![
        Curve { step: 384, points: vec![(0, 0.0), (384 * 100, 1.0), (384 * 300, 5.0)] },
        Curve { step: 1536, points: vec![(0, 0.0), (1536 * 100, 3.0), (1536 * 300, 9.0)] },
    ];
    for target in [10_000, 123_457, 300_001, 500_000] {
        let z = allocate(&curves, target).unwrap();
        assert!(z[0] % 384 == 0 && z[1] % 1536 == 0, "{z:?}");
        let miss = z.iter().sum::<usize>().abs_diff(target);
        assert!(miss <= 1536 / 2, "{target}: {z:?}");
    }
}

#[test]
fn targets_outside_floors_and_caps_are_refused() {
    let c = Curve { step: 1, points: vec![(10, 0.0), (20, 1.0)] };
    let two = vec![c.clone(), c];
    assert_eq!(allocate(&two, 19), Err(AllocError::BelowFloors { floors: 20 }));
    assert_eq!(allocate(&two, 41), Err(AllocError::AboveCaps { caps: 40 }));
    assert_eq!(allocate(&two, 20).unwrap(), vec![10, 10]);
    let bad = Curve { step: 3, points: vec![(0, 0.0), (4, 1.0)] };
    assert_eq!(allocate(&[bad], 0), Err(AllocError::BadCurve(0)));
}

#[test]
fn outlier_sparsities_follow_the_published_mapping() {
    // Yin et al. 2024 (OWL), as remembered: ratios mapped linearly onto
    // [0, 2λ], centred so the mean is the target, subtracted from it.
    // By hand: shifts (0, 0.08, 0.16), mean 0.08 → 0.78, 0.70, 0.62.
    let s = outlier_sparsities(&[0.1, 0.2, 0.3], &[1, 1, 1], 0.7, 0.08);
    for (got, want) in s.iter().zip([0.78, 0.70, 0.62]) {
        assert!((got - want).abs() < 1e-12, "{s:?}");
    }
    // Unequal sizes: the size-weighted mean stays at the target.
    let sizes = [1, 4, 1, 4];
    let s = outlier_sparsities(&[0.05, 0.01, 0.02, 0.03], &sizes, 0.5, 0.1);
    let mean = s.iter().zip(sizes).map(|(s, n)| s * n as f64).sum::<f64>() / 10.0;
    assert!((mean - 0.5).abs() < 1e-12, "{s:?}");
    assert!((s[0] - s[1] + 0.2).abs() < 1e-12, "full range 2λ between extremes: {s:?}");
    assert_eq!(outlier_sparsities(&[0.3, 0.3], &[1, 1], 0.6, 0.1), vec![0.6, 0.6]);
}

#[test]
fn outlier_ratio_counts_scores_above_m_times_the_mean() {
    // Worked by hand, M = 2.
    let (w1, x1) = (vec![1.0, -1.0, 1.0, 3.0], vec![1.0, 3.0]);
    let (w2, x2) = (vec![0.5, 0.5, 1.0, -1.0], vec![2.0, 1.0]);
    let r = outlier_ratio(&[(&w1, &x1), (&w2, &x2)], 2.0);
    // Layer 1 scores: [1·1, 1·3, 1·1, 3·3] = [1, 3, 1, 9]; layer 2: [1, 0.5, 2, 1].
    // Mean 18.5 / 8 = 2.3125; above 4.625: only 9.
    assert!((r - 1.0 / 8.0).abs() < 1e-12, "{r}");
}
