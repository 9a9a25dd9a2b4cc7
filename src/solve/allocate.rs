//! Per-layer sparsities under one global budget: pure allocation math.
//!
//! Each layer `i` has a cost curve `c_i(z)`: the predicted damage to the
//! model's output when `z` of its weights are zero, known at grid points
//! `(z_ik, c_ik)`. Between grid points the cost is linear. Given a total
//! number of zeros `T`, [`allocate`] solves
//!
//! ```text
//! minimise  Σ_i ĉ_i(z_i)   subject to   Σ_i z_i = T,   z_i0 ≤ z_i ≤ z_iK
//! ```
//!
//! where `ĉ_i` is the lower convex hull of the grid points. For a separable
//! sum of convex piecewise-linear functions under one linear equality the
//! greedy rule is exact (it is the Lagrangian solution: every layer sits at
//! the point where its hull's slope crosses one common price `μ`): start
//! every layer at its first point and fill the budget with hull segments in
//! ascending order of slope `Δc / Δz`. At most one layer ends inside a
//! segment. Where a curve is not convex the hull lies below it, so the
//! hull optimum is a lower bound on the grid optimum and equals it whenever
//! the greedy stops on hull vertices (checked against enumeration in the
//! tests).
//!
//! Counts are multiples of a per-layer `step` (a row-scoped budget can only
//! zero whole multiples of `d_out`); the one layer that ends inside a
//! segment is rounded to its step, so the total is `T` within half a step.
//!
//! [`outlier_sparsities`] is the outlier-weighted baseline (Yin et al. 2024).

use std::fmt;

/// A layer's cost curve on a grid of zero counts.
#[derive(Clone, Debug, PartialEq)]
pub struct Curve {
    /// Zero counts are multiples of this (≥ 1).
    pub step: usize,
    /// `(zeros, cost)`, zeros strictly ascending and multiples of `step`;
    /// the first point is the layer's floor, the last its cap.
    pub points: Vec<(usize, f64)>,
}

/// Why an allocation is impossible.
#[derive(Clone, Debug, PartialEq)]
pub enum AllocError {
    /// The floors already exceed the target (`need` zeros at least).
    BelowFloors {
        /// Sum of the floors.
        floors: usize,
    },
    /// The caps cannot reach the target.
    AboveCaps {
        /// Sum of the caps.
        caps: usize,
    },
    /// A curve has no points, unsorted zeros, a zero count off its step, or
    /// a cost that is not finite.
    BadCurve(usize),
}

impl fmt::Display for AllocError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            AllocError::BelowFloors { floors } => {
                write!(
                    f,
                    "the per-layer minimums already zero {floors} weights, more than the target"
                )
            }
            AllocError::AboveCaps { caps } => {
                write!(
                    f,
                    "the per-layer maximums zero at most {caps} weights, fewer than the target"
                )
            }
            AllocError::BadCurve(i) => write!(f, "cost curve {i} is malformed"),
        }
    }
}

/// Lower convex hull of points sorted by ascending `x` (monotone chain).
pub fn lower_hull(points: &[(usize, f64)]) -> Vec<(usize, f64)> {
    let mut hull: Vec<(usize, f64)> = Vec::with_capacity(points.len());
    for &p in points {
        while hull.len() >= 2 {
            let (a, b) = (hull[hull.len() - 2], hull[hull.len() - 1]);
            // Drop b when it lies on or above the chord a→p:
            // (b.y − a.y)(p.x − a.x) ≥ (p.y − a.y)(b.x − a.x).
            let lhs = (b.1 - a.1) * (p.0 - a.0) as f64;
            let rhs = (p.1 - a.1) * (b.0 - a.0) as f64;
            if lhs >= rhs {
                hull.pop();
            } else {
                break;
            }
        }
        hull.push(p);
    }
    hull
}

/// The piecewise-linear interpolation of `points` (ascending `x`) at `z`,
/// clamped to the end points.
pub fn interpolate(points: &[(usize, f64)], z: f64) -> f64 {
    let first = points[0];
    if z <= first.0 as f64 {
        return first.1;
    }
    for w in points.windows(2) {
        let (a, b) = (w[0], w[1]);
        if z <= b.0 as f64 {
            let t = (z - a.0 as f64) / (b.0 - a.0) as f64;
            return a.1 + t * (b.1 - a.1);
        }
    }
    points[points.len() - 1].1
}

/// The zero count of each layer that minimises the summed hull cost with
/// `Σ z_i = target` (within half the step of one layer); see the module
/// docs.
///
/// # Errors
/// A malformed curve, or a target outside the floors and caps.
pub fn allocate(curves: &[Curve], target: usize) -> Result<Vec<usize>, AllocError> {
    for (i, c) in curves.iter().enumerate() {
        let sorted = c.points.windows(2).all(|w| w[0].0 < w[1].0);
        let on_step = c.step > 0 && c.points.iter().all(|p| p.0 % c.step == 0);
        let finite = c.points.iter().all(|p| p.1.is_finite());
        if c.points.is_empty() || !sorted || !on_step || !finite {
            return Err(AllocError::BadCurve(i));
        }
    }
    let floors: usize = curves.iter().map(|c| c.points[0].0).sum();
    let caps: usize = curves.iter().map(|c| c.points[c.points.len() - 1].0).sum();
    if floors > target {
        return Err(AllocError::BelowFloors { floors });
    }
    if caps < target {
        return Err(AllocError::AboveCaps { caps });
    }
    let mut z: Vec<usize> = curves.iter().map(|c| c.points[0].0).collect();
    // Every hull segment as (slope, layer, index); a layer's slopes ascend,
    // so sorting by (slope, layer, index) keeps each layer's segments in
    // order.
    let hulls: Vec<Vec<(usize, f64)>> = curves.iter().map(|c| lower_hull(&c.points)).collect();
    let mut segs: Vec<(f64, usize, usize)> = Vec::new();
    for (i, h) in hulls.iter().enumerate() {
        for k in 0..h.len().saturating_sub(1) {
            let slope = (h[k + 1].1 - h[k].1) / (h[k + 1].0 - h[k].0) as f64;
            segs.push((slope, i, k));
        }
    }
    segs.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)).then(a.2.cmp(&b.2)));
    let mut left = target - floors;
    for (_, i, k) in segs {
        if left == 0 {
            break;
        }
        let len = hulls[i][k + 1].0 - hulls[i][k].0;
        if len <= left {
            z[i] += len;
            left -= len;
        } else {
            // The one layer inside a segment: round to its step.
            let step = curves[i].step;
            let take = ((left + step / 2) / step) * step;
            z[i] += take.min(len);
            left = 0;
        }
    }
    Ok(z)
}

/// Outlier-weighted layerwise sparsity (Yin et al. 2024, "OWL"): the
/// sparsity of group `g` (a block of layers) is the target shifted against
/// its outlier ratio `D_g`, mapped linearly onto a range of width `2λ`,
///
/// ```text
/// s_g = S − (2λ (D_g − min D) / (max D − min D) − m)
/// ```
///
/// with `m` chosen so that the mean of `s_g` weighted by `sizes` is the
/// target `S` (the paper's groups have equal sizes, where this is the
/// plain mean). Equal ratios give every group the target.
pub fn outlier_sparsities(ratios: &[f64], sizes: &[usize], target: f64, lambda: f64) -> Vec<f64> {
    let lo = ratios.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = ratios.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let spread = hi - lo;
    let shift: Vec<f64> = ratios
        .iter()
        .map(|&d| if spread > 0.0 { 2.0 * lambda * (d - lo) / spread } else { 0.0 })
        .collect();
    let total: f64 = sizes.iter().map(|&n| n as f64).sum();
    let mean = shift.iter().zip(sizes).map(|(s, &n)| s * n as f64).sum::<f64>() / total;
    shift.iter().map(|s| target - (s - mean)).collect()
}

/// The outlier ratio of one group of layers (Yin et al. 2024): the share of
/// the scores `|W_ij| · ‖X_j‖₂` of all its weights above `m` times their
/// mean. `layers` holds, per layer, its row-major `[d_out, d_in]` weight
/// and the input norms `‖X_j‖₂`.
pub fn outlier_ratio(layers: &[(&[f64], &[f64])], m: f64) -> f64 {
    let score = |w: &[f64], x: &[f64]| -> Vec<f64> {
        w.iter().enumerate().map(|(k, v)| v.abs() * x[k % x.len()]).collect()
    };
    let scores: Vec<Vec<f64>> = layers.iter().map(|(w, x)| score(w, x)).collect();
    let n: usize = scores.iter().map(Vec::len).sum();
    if n == 0 {
        return 0.0;
    }
    let mean = scores.iter().flatten().sum::<f64>() / n as f64;
    let above = scores.iter().flatten().filter(|&&s| s > m * mean).count();
    above as f64 / n as f64
}

#[cfg(test)]
#[path = "allocate_tests.rs"]
mod tests;
