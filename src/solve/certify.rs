//! A proven lower bound on the best possible error of a pruned layer, from
//! the perspective relaxation of the L0-constrained ridge problem.
//!
//! Per row, with `A = H + λI`, `b = A w`, `c = wᵀ A w`, the pruned weights
//! `ŵ` minimise `f(ŵ) = (w − ŵ)ᵀ A (w − ŵ) = ŵᵀAŵ − 2bᵀŵ + c` under the
//! pattern. Split `A = B + D` with `D = diag(d)`, `d > 0`, and `B ⪰ 0`
//! ([`split_diagonal`]). Writing `Σ d_i ŵ_i²` as `Σ d_i ŵ_i² / z_i` with the
//! keep indicators `z ∈ {0,1}` and relaxing them to `z ∈ [0,1]`, `Σ z ≤ k`,
//! gives the perspective relaxation (Frangioni & Gentile 2006; for least
//! squares with a diagonal split, Dong, Chen & Linderoth 2015). Its
//! Lagrangian dual, parametrised by any `y ∈ ℝⁿ` (the multiplier is
//! `v = 2(b − By)`), is
//!
//! ```text
//! L(y) = c − yᵀBy − top_k( (b − By)_i² / d_i )     ≤  f*   for EVERY y
//! ```
//!
//! (`min_ŵ ŵᵀBŵ − 2(By)ᵀŵ = −yᵀBy` needs only `B ⪰ 0`;
//! `min_{ŵ_i, z} Σ d_i ŵ_i²/z_i − v_iŵ_i = −top_k(v_i²/4d_i)`.) So the bound
//! stays valid wherever the maximisation stops. `top_k` becomes the sum of
//! the `n` largest in each group for N:M, and the `K` largest over all rows
//! for a per-layer budget. `L` is concave in `y`; at a refit optimum `ŵ` on
//! `S`, `L(ŵ) = f(ŵ)` exactly when `min_{i∈S} d_i ŵ_i² ≥ max_{j∉S} g_j²/d_j`
//! (`g = A(ŵ − w)`): the row is then proven optimal.
//!
//! **Maximisation** ([`certify`]): start from the solver's `Ŵ`, then ascend.
//! The supergradient is `2B(r_z − y)` with `r_z,i = z_i (b − By)_i / d_i` and
//! `z` a maximiser of the top-k; the step direction is `p = r_z − y` (the
//! supergradient preconditioned by `B⁻¹/2`) with `z` taken from a smoothed
//! top-k (`z = clip((a − τ)/μ, 0, 1)`, `Σ z = k`), which spreads the
//! direction over near-ties instead of stalling at the kinks; then an exact
//! (golden-section) line search of the true `L` along `p`. One iteration is
//! one product `P·B` for the rows still open (`2·rows·n²`) and `O(n)` per
//! line-search point; `B` is never factored.
//!
//! **Branch and bound** ([`branch_and_bound`]): exact optimum of one row by
//! fixing entries in (`z_i = 1`) or out (`ŵ_i = 0`) and bounding each node
//! with the same `L` (fixed-in entries always counted, fixed-out ones never).
//! Leaves are refit exactly. Used by the tests as a reference for rows up to
//! about 40 wide.

use super::{budget, Pattern, Scope};
use faer::linalg::matmul::matmul;
use faer::linalg::solvers::Solve;
use faer::{Accum, Mat, MatMut, MatRef, Par, Side};
use rayon::prelude::*;

/// How the diagonal part `D` of `A = B + D` is chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Split {
    /// `d_i = λ` (the ridge only; `B = H`). Zero without a ridge.
    Ridge,
    /// `d_i = μ_min(A)` for every `i`: the largest multiple of `I` under `A`.
    Uniform,
    /// `d_i = t · A_ii` with `t = μ_min(diag(A)^{-1/2} A diag(A)^{-1/2})`:
    /// the largest multiple of `diag(A)` under `A`.
    Scaled,
}

/// Settings of [`certify`].
#[derive(Clone, Debug, PartialEq)]
pub struct CertifyParams {
    /// Most ascent iterations per layer. Default 5: on the BERT encoder 30
    /// iterations cost twice the `l0` solve (see docs/benchmarks.md).
    pub max_iter: usize,
    /// Choice of `D`. Default [`Split::Scaled`].
    pub split: Split,
    /// A row is counted as proven optimal when `f_r − L_r ≤ optimal_tol · f_r`.
    /// Default `1e-6`.
    pub optimal_tol: f64,
}

impl Default for CertifyParams {
    fn default() -> Self {
        CertifyParams { max_iter: 5, split: Split::Scaled, optimal_tol: 1e-6 }
    }
}

/// A certified lower bound for one layer.
#[derive(Clone, Debug, PartialEq)]
pub struct Certificate {
    /// `L ≤ min Σ_r f_r` over every mask the pattern allows (`≥ 0`).
    pub lower_bound: f64,
    /// `Σ_r f_r` of the weights that were certified.
    pub objective: f64,
    /// `(objective − lower_bound) / objective`, 0 when the objective is 0.
    pub gap: f64,
    /// Rows with `f_r − L_r ≤ optimal_tol · f_r` (`None` for a per-layer
    /// budget, where rows have no bound of their own).
    pub rows_optimal: Option<usize>,
    /// Rows of the layer.
    pub rows: usize,
    /// `D` as a multiple of the ridge-free reference of the split: `t` for
    /// [`Split::Scaled`], `d_i` for the others.
    pub split_scale: f64,
    /// Ascent iterations run.
    pub iterations: usize,
}

/// Fixing of an entry in branch and bound.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Fix {
    Free,
    In,
    Out,
}

/// Groups of `width` consecutive entries of which at most `keep` are kept.
#[derive(Clone, Copy, Debug)]
struct Groups {
    width: usize,
    keep: usize,
}

/// Sum of the `k` largest of `v` (reorders `v`).
fn sum_largest(v: &mut [f64], k: usize) -> f64 {
    if k == 0 {
        return 0.0;
    }
    if k < v.len() {
        v.select_nth_unstable_by(k - 1, |x, y| y.total_cmp(x));
        v[..k].iter().sum()
    } else {
        v.iter().sum()
    }
}

/// `h*`: per group, the fixed-in entries plus the largest free ones up to
/// the group's budget.
fn top_sum(a: &[f64], g: Groups, fix: Option<&[Fix]>, scratch: &mut Vec<f64>) -> f64 {
    let mut total = 0.0;
    for (gi, chunk) in a.chunks(g.width).enumerate() {
        scratch.clear();
        let mut left = g.keep;
        for (j, &v) in chunk.iter().enumerate() {
            match fix.map_or(Fix::Free, |f| f[gi * g.width + j]) {
                Fix::In => {
                    total += v;
                    left = left.saturating_sub(1);
                }
                Fix::Out => {}
                Fix::Free => scratch.push(v),
            }
        }
        total += sum_largest(scratch, left);
    }
    total
}

/// Smoothed maximiser of the top-k: per group, `z = clip((a − τ)/μ, 0, 1)`
/// on the free entries with `Σ z` = the group's budget left (`τ` by
/// bisection); fixed-in entries get 1, fixed-out 0. `mu ≤ 0`: hard top-k.
fn soft_select(a: &[f64], g: Groups, fix: Option<&[Fix]>, mu: f64, z: &mut [f64]) {
    let mut free: Vec<usize> = Vec::with_capacity(g.width);
    for (gi, chunk) in a.chunks(g.width).enumerate() {
        let base = gi * g.width;
        free.clear();
        let mut left = g.keep;
        for j in 0..chunk.len() {
            match fix.map_or(Fix::Free, |f| f[base + j]) {
                Fix::In => {
                    z[base + j] = 1.0;
                    left = left.saturating_sub(1);
                }
                Fix::Out => z[base + j] = 0.0,
                Fix::Free => free.push(j),
            }
        }
        if left >= free.len() || left == 0 {
            let v = if left == 0 { 0.0 } else { 1.0 };
            free.iter().for_each(|&j| z[base + j] = v);
            continue;
        }
        if mu <= 0.0 {
            let mut idx = free.clone();
            idx.select_nth_unstable_by(left - 1, |&x, &y| chunk[y].total_cmp(&chunk[x]));
            free.iter().for_each(|&j| z[base + j] = 0.0);
            idx[..left].iter().for_each(|&j| z[base + j] = 1.0);
            continue;
        }
        let count = |tau: f64| -> f64 {
            free.iter().map(|&j| ((chunk[j] - tau) / mu).clamp(0.0, 1.0)).sum()
        };
        let hi0 = free.iter().map(|&j| chunk[j]).fold(f64::NEG_INFINITY, f64::max);
        let (mut lo, mut hi) = (hi0 - mu * (free.len() as f64 + 1.0) - mu, hi0);
        // Σ z(τ) falls from |free| at lo to 0 at hi; find Σ z = left.
        for _ in 0..60 {
            let mid = 0.5 * (lo + hi);
            if count(mid) > left as f64 {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        let tau = 0.5 * (lo + hi);
        free.iter().for_each(|&j| z[base + j] = ((chunk[j] - tau) / mu).clamp(0.0, 1.0));
    }
}

/// Largest `t` ≤ `guess` (tried, then lowered) such that `M − t·S` is
/// proven positive semidefinite, `S = diag(s)`: a Cholesky factorisation of
/// `M − t·S − η·diag(M)` succeeds, `η = 2n(n+1)ε`. That covers the rounding
/// of the factorisation: success means `M − tS − η diag(M) + ΔM ⪰ 0` with
/// `|ΔM| ≤ γ_{n+1}|Rᵀ||R|` (Higham 2002, Thm 10.5, from memory), so
/// `|ΔM_ij| ≤ γ_{n+1} (M_ii M_jj)^{1/2}` and `‖diag(M)^{-1/2} ΔM
/// diag(M)^{-1/2}‖₂ ≤ n γ_{n+1} ≤ η`.
fn verified_shift(m: MatRef<'_, f64>, s: &[f64], guess: f64) -> f64 {
    let n = m.nrows();
    let eta = 2.0 * n as f64 * (n as f64 + 1.0) * f64::EPSILON;
    // η in units of s: how far below `guess` the first retries step.
    let r = (0..n).map(|i| m[(i, i)] / s[i]).fold(0.0, f64::max) * eta;
    let tries = [
        guess,
        guess - 4.0 * r,
        guess - 64.0 * r,
        guess - 1024.0 * r,
        guess * (1.0 - 1e-4),
        guess * 0.999,
        guess * 0.99,
        guess * 0.95,
        guess * 0.9,
        guess * 0.8,
        guess * 0.6,
        guess * 0.4,
        guess * 0.2,
    ];
    for t in tries {
        if t <= 0.0 || !t.is_finite() {
            continue;
        }
        let b =
            Mat::from_fn(
                n,
                n,
                |i, j| {
                    if i == j {
                        m[(i, i)] * (1.0 - eta) - t * s[i]
                    } else {
                        m[(i, j)]
                    }
                },
            );
        if b.llt(Side::Lower).is_ok() {
            return t;
        }
    }
    0.0
}

/// Smallest eigenvalue of `S^{-1/2} M S^{-1/2}` estimated by inverse
/// iteration (a Rayleigh quotient, so an over-estimate: the caller verifies).
fn min_eig_scaled(m: MatRef<'_, f64>, s: &[f64]) -> f64 {
    let n = m.nrows();
    let r: Vec<f64> = s.iter().map(|&x| 1.0 / x.sqrt()).collect();
    let ms = Mat::from_fn(n, n, |i, j| m[(i, j)] * r[i] * r[j]);
    let Ok(llt) = ms.llt(Side::Lower) else { return 0.0 };
    let mut x = Mat::from_fn(n, 1, |i, _| 1.0 + ((i * 7919) % 13) as f64 / 13.0);
    let mut rho = f64::INFINITY;
    for _ in 0..40 {
        let nx = x.norm_l2();
        x /= faer::Scale(nx);
        let y = llt.solve(&x);
        // Rayleigh quotient of M_s at y: xᵀy / yᵀy (M_s y = x).
        let xy: f64 = (0..n).map(|i| x[(i, 0)] * y[(i, 0)]).sum();
        let yy: f64 = (0..n).map(|i| y[(i, 0)] * y[(i, 0)]).sum();
        let next = xy / yy;
        x = y;
        if (rho - next).abs() <= 1e-4 * next {
            rho = next;
            break;
        }
        rho = next;
    }
    rho
}

/// The diagonal `d` of the split `A = B + diag(d)` with `B ⪰ 0` proven (see
/// `verified_shift`), and its scale (see [`Certificate::split_scale`]).
/// `lambda` is the ridge λ inside `A`.
pub fn split_diagonal(a: MatRef<'_, f64>, lambda: f64, split: Split) -> (Vec<f64>, f64) {
    let n = a.nrows();
    let diag: Vec<f64> = (0..n).map(|i| a[(i, i)]).collect();
    let ones = vec![1.0; n];
    let dmax = diag.iter().cloned().fold(0.0, f64::max);
    match split {
        Split::Ridge => {
            let t = verified_shift(a, &ones, lambda);
            (vec![t; n], t)
        }
        Split::Uniform => {
            let guess = min_eig_scaled(a, &ones);
            let t = verified_shift(a, &ones, guess.max(0.0));
            let t = if t < lambda { verified_shift(a, &ones, lambda) } else { t };
            (vec![t; n], t)
        }
        Split::Scaled => {
            if n == 0 || diag.iter().any(|&x| x <= 0.0 || !x.is_finite()) {
                return (vec![0.0; n], 0.0);
            }
            let guess = min_eig_scaled(a, &diag);
            let mut t = verified_shift(a, &diag, guess.max(0.0));
            // `λ / max A_ii` is always under A (B ⪰ H ⪰ 0): never do worse.
            if dmax > 0.0 && t < lambda / dmax {
                t = verified_shift(a, &diag, lambda / dmax);
            }
            (diag.iter().map(|&x| t * x).collect(), t)
        }
    }
}

/// Rows ascended together: `y`, `u = B y`, `b = A w` (row-major), `c`, the
/// best bound so far and its smoothing.
struct Ascent {
    n: usize,
    y: Vec<f64>,
    u: Vec<f64>,
    b: Vec<f64>,
    c: Vec<f64>,
    bound: Vec<f64>,
    mu: Vec<f64>,
    open: Vec<bool>,
    /// Right end of the next line search, per row.
    reach: Vec<f64>,
    /// The previous direction, its product with `B`, the previous
    /// preconditioned gradient `s` and `(Bs)ᵀs`, per row (nonlinear CG).
    cg: Option<Cg>,
}

/// Memory of the nonlinear CG of [`Ascent::run`].
struct Cg {
    p: Vec<f64>,
    q: Vec<f64>,
    s: Vec<f64>,
    norm: Vec<f64>,
}

impl Cg {
    fn new(rows: usize, n: usize) -> Self {
        Cg {
            p: vec![0.0; rows * n],
            q: vec![0.0; rows * n],
            s: vec![0.0; rows * n],
            norm: vec![0.0; rows],
        }
    }
}

/// `Y B` for row-major `y` (`rows x n`), returned row-major.
fn times_b(y: &[f64], rows: usize, n: usize, bm: MatRef<'_, f64>, par: Par) -> Vec<f64> {
    let mut out = vec![0.0; rows * n];
    if rows > 0 && n > 0 {
        matmul(
            MatMut::from_row_major_slice_mut(&mut out, rows, n),
            Accum::Replace,
            MatRef::from_row_major_slice(y, rows, n),
            bm,
            1.0,
            par,
        );
    }
    out
}

/// `L` of one row at `y + t p`: `c − (y+tp)ᵀB(y+tp) − h*((r − t q)²/d)`
/// with `r = b − By`, `q = Bp`; `quad = (yᵀu, yᵀq, pᵀq)`.
#[allow(clippy::too_many_arguments)]
fn row_value(
    t: f64,
    c: f64,
    quad: (f64, f64, f64),
    r: &[f64],
    q: &[f64],
    d: &[f64],
    g: Groups,
    fix: Option<&[Fix]>,
    a: &mut Vec<f64>,
    scratch: &mut Vec<f64>,
) -> f64 {
    a.clear();
    a.extend(r.iter().zip(q).zip(d).map(|((&ri, &qi), &di)| (ri - t * qi).powi(2) / di));
    c - quad.0 - 2.0 * t * quad.1 - t * t * quad.2 - top_sum(a, g, fix, scratch)
}

/// Maximise a concave `phi` on `[0, hi]` by golden section; the best point
/// seen and its value.
fn golden(mut phi: impl FnMut(f64) -> f64, hi: f64) -> (f64, f64) {
    let ratio = 0.5 * (5f64.sqrt() - 1.0);
    let (mut lo, mut up) = (0.0, hi);
    let mut x1 = up - ratio * (up - lo);
    let mut x2 = lo + ratio * (up - lo);
    let (mut f1, mut f2) = (phi(x1), phi(x2));
    let mut best = if f1 >= f2 { (x1, f1) } else { (x2, f2) };
    for _ in 0..24 {
        if f1 >= f2 {
            up = x2;
            x2 = x1;
            f2 = f1;
            x1 = up - ratio * (up - lo);
            f1 = phi(x1);
        } else {
            lo = x1;
            x1 = x2;
            f1 = f2;
            x2 = lo + ratio * (up - lo);
            f2 = phi(x2);
        }
        for (x, f) in [(x1, f1), (x2, f2)] {
            if f > best.1 {
                best = (x, f);
            }
        }
    }
    best
}

impl Ascent {
    fn new(y: Vec<f64>, b: Vec<f64>, c: Vec<f64>, n: usize, bm: MatRef<'_, f64>, par: Par) -> Self {
        let rows = c.len();
        let u = times_b(&y, rows, n, bm, par);
        Ascent {
            n,
            y,
            u,
            b,
            c,
            bound: vec![f64::NEG_INFINITY; rows],
            mu: vec![0.5; rows],
            open: vec![true; rows],
            reach: vec![2.0; rows],
            cg: None,
        }
    }

    /// Bounds at the current `y` of every row (separable budgets), after a
    /// line search from `y` towards the dense weights `w` (where
    /// `L(w) = Σ` of the smallest unkept `d_i w_i²` ≥ 0, so the bound never
    /// starts below that); `Bw = b − d∘w` needs no product.
    fn evaluate(&mut self, w: &[f64], d: &[f64], g: Groups, fix: Option<&[Fix]>) {
        let n = self.n;
        let (mut a, mut s) = (Vec::new(), Vec::new());
        for row in 0..self.c.len() {
            let rg = row * n..(row + 1) * n;
            let r: Vec<f64> =
                self.b[rg.clone()].iter().zip(&self.u[rg.clone()]).map(|(b, u)| b - u).collect();
            let p: Vec<f64> = (0..n).map(|i| w[rg.start + i] - self.y[rg.start + i]).collect();
            let q: Vec<f64> = (0..n)
                .map(|i| self.b[rg.start + i] - d[i] * w[rg.start + i] - self.u[rg.start + i])
                .collect();
            let yr = &self.y[rg.clone()];
            let yu: f64 = yr.iter().zip(&self.u[rg.clone()]).map(|(y, u)| y * u).sum();
            let yq: f64 = yr.iter().zip(&q).map(|(y, q)| y * q).sum();
            let pq: f64 = p.iter().zip(&q).map(|(p, q)| p * q).sum();
            let c = self.c[row];
            let mut phi = |t: f64| row_value(t, c, (yu, yq, pq), &r, &q, d, g, fix, &mut a, &mut s);
            let v0 = phi(0.0);
            let (t, v) = golden(&mut phi, 1.0);
            let v1 = phi(1.0);
            let (t, v) = if v1 >= v { (1.0, v1) } else { (t, v) };
            if v > v0 {
                for i in 0..n {
                    self.y[rg.start + i] += t * p[i];
                    self.u[rg.start + i] += t * q[i];
                }
            }
            self.bound[row] = self.bound[row].max(v0).max(v);
        }
    }

    /// Up to `iters` ascent iterations of the open rows; a row closes when
    /// `done(row, bound)` or when it stops improving. Returns iterations run.
    #[allow(clippy::too_many_arguments)]
    fn run(
        &mut self,
        bm: MatRef<'_, f64>,
        d: &[f64],
        g: Groups,
        fix: Option<&[Fix]>,
        iters: usize,
        done: &(dyn Fn(usize, f64) -> bool + Sync),
        par: Par,
    ) -> usize {
        let n = self.n;
        let rows = self.c.len();
        for row in 0..rows {
            if done(row, self.bound[row]) {
                self.open[row] = false;
            }
        }
        let parallel = matches!(par, Par::Rayon(t) if t.get() > 1);
        let mut stall = vec![0u8; rows];
        for it in 0..iters {
            let active: Vec<usize> = (0..rows).filter(|&r| self.open[r]).collect();
            if active.is_empty() {
                return it;
            }
            // Directions p = z∘r/d − y of the open rows, compacted.
            let dir = |&row: &usize| -> Vec<f64> {
                let rg = row * n..(row + 1) * n;
                let r: Vec<f64> = self.b[rg.clone()]
                    .iter()
                    .zip(&self.u[rg.clone()])
                    .map(|(b, u)| b - u)
                    .collect();
                let a: Vec<f64> = r.iter().zip(d).map(|(ri, di)| ri * ri / di).collect();
                let scale = {
                    let mut v = a.clone();
                    let k = g.keep.min(g.width).max(1);
                    let mut kth = 0.0f64;
                    for chunk in v.chunks_mut(g.width) {
                        let kk = k.min(chunk.len());
                        chunk.select_nth_unstable_by(kk - 1, |x, y| y.total_cmp(x));
                        kth = kth.max(chunk[kk - 1]);
                    }
                    kth
                };
                let mut z = vec![0.0; n];
                soft_select(&a, g, fix, self.mu[row] * scale, &mut z);
                (0..n).map(|i| z[i] * r[i] / d[i] - self.y[rg.start + i]).collect()
            };
            let sg: Vec<f64> = if parallel {
                active.par_iter().flat_map_iter(dir).collect()
            } else {
                active.iter().flat_map(dir).collect()
            };
            let bs = times_b(&sg, active.len(), n, bm, par);
            // Preconditioned nonlinear CG (Polak–Ribière+): p = s + β p_old,
            // q = Bp = Bs + β q_old, so one product per iteration.
            let mut p = vec![0.0; active.len() * n];
            let mut q = vec![0.0; active.len() * n];
            for (x, &row) in active.iter().enumerate() {
                let (sx, bsx) = (&sg[x * n..(x + 1) * n], &bs[x * n..(x + 1) * n]);
                let rg = row * n..(row + 1) * n;
                let beta = match &self.cg {
                    Some(cg) if cg.norm[row] > 0.0 => {
                        let num: f64 =
                            (0..n).map(|i| bsx[i] * (sx[i] - cg.s[rg.start + i])).sum::<f64>();
                        (num / cg.norm[row]).max(0.0)
                    }
                    _ => 0.0,
                };
                let (px, qx) = (&mut p[x * n..(x + 1) * n], &mut q[x * n..(x + 1) * n]);
                for i in 0..n {
                    let (po, qo) = match &self.cg {
                        Some(cg) => (cg.p[rg.start + i], cg.q[rg.start + i]),
                        None => (0.0, 0.0),
                    };
                    px[i] = sx[i] + beta * po;
                    qx[i] = bsx[i] + beta * qo;
                }
                // Not an ascent direction (∇ᵀp = 2 (Bs)ᵀp ≤ 0): restart.
                if beta > 0.0 && (0..n).map(|i| bsx[i] * px[i]).sum::<f64>() <= 0.0 {
                    px.copy_from_slice(sx);
                    qx.copy_from_slice(bsx);
                }
            }
            let step = |(x, &row): (usize, &usize)| -> (f64, f64) {
                let rg = row * n..(row + 1) * n;
                let (px, qx) = (&p[x * n..(x + 1) * n], &q[x * n..(x + 1) * n]);
                let r: Vec<f64> = self.b[rg.clone()]
                    .iter()
                    .zip(&self.u[rg.clone()])
                    .map(|(b, u)| b - u)
                    .collect();
                let yr = &self.y[rg.clone()];
                let yu: f64 = yr.iter().zip(&self.u[rg]).map(|(y, u)| y * u).sum();
                let yq: f64 = yr.iter().zip(qx).map(|(y, q)| y * q).sum();
                let pq: f64 = px.iter().zip(qx).map(|(p, q)| p * q).sum();
                let (mut a, mut s) = (Vec::with_capacity(n), Vec::with_capacity(n));
                let c = self.c[row];
                golden(
                    |t| row_value(t, c, (yu, yq, pq), &r, qx, d, g, fix, &mut a, &mut s),
                    self.reach[row],
                )
            };
            let steps: Vec<(f64, f64)> = if parallel {
                active.par_iter().enumerate().map(step).collect()
            } else {
                active.iter().enumerate().map(step).collect()
            };
            let cg = self.cg.get_or_insert_with(|| Cg::new(rows, n));
            for (x, &row) in active.iter().enumerate() {
                let (t, v) = steps[x];
                let old = self.bound[row];
                let rg = row * n..(row + 1) * n;
                if v > old && t > 0.0 {
                    for (i, j) in rg.clone().enumerate() {
                        self.y[j] += t * p[x * n + i];
                        self.u[j] += t * q[x * n + i];
                    }
                    self.bound[row] = v;
                    self.mu[row] = (self.mu[row] * 0.5).max(1e-6);
                    // A step near the end of the bracket: look further next time.
                    self.reach[row] = (4.0 * t).max(2.0);
                    cg.p[rg.clone()].copy_from_slice(&p[x * n..(x + 1) * n]);
                    cg.q[rg.clone()].copy_from_slice(&q[x * n..(x + 1) * n]);
                } else {
                    self.mu[row] = (self.mu[row] * 4.0).min(4.0);
                    cg.p[rg.clone()].iter_mut().for_each(|v| *v = 0.0);
                    cg.q[rg.clone()].iter_mut().for_each(|v| *v = 0.0);
                }
                cg.s[rg.clone()].copy_from_slice(&sg[x * n..(x + 1) * n]);
                cg.norm[row] = (0..n).map(|i| bs[x * n + i] * sg[x * n + i]).sum();
                let gain = v - old;
                if gain <= 1e-12 * self.c[row].abs() {
                    stall[row] += 1;
                } else {
                    stall[row] = 0;
                }
                if stall[row] >= 4 || done(row, self.bound[row]) {
                    self.open[row] = false;
                }
            }
        }
        iters
    }
}

/// Row-major copy of `m`.
fn row_major(m: MatRef<'_, f64>) -> Vec<f64> {
    let (r, c) = (m.nrows(), m.ncols());
    let mut v = vec![0.0; r * c];
    for i in 0..r {
        for j in 0..c {
            v[i * c + j] = m[(i, j)];
        }
    }
    v
}

/// A proven lower bound on `min Σ_r f_r` over every mask `pattern` allows,
/// for the layer with dense weights `w` (`d_out x d_in`), `A = H + λI`
/// (`lambda` is that λ), warm-started from the solver's `what`, whose
/// objective the certificate's gap is taken against.
///
/// # Panics
/// When the shapes disagree.
#[track_caller]
pub fn certify(
    w: MatRef<'_, f64>,
    a: MatRef<'_, f64>,
    lambda: f64,
    what: MatRef<'_, f64>,
    pattern: Pattern,
    params: &CertifyParams,
    par: Par,
) -> Certificate {
    let (rows, n) = (w.nrows(), w.ncols());
    assert_eq!((a.nrows(), a.ncols()), (n, n), "A must be d_in x d_in");
    assert_eq!((what.nrows(), what.ncols()), (rows, n), "Ŵ must have the shape of W");
    let (d, split_scale) = split_diagonal(a, lambda, params.split);
    let bm = Mat::from_fn(n, n, |i, j| if i == j { a[(i, i)] - d[i] } else { a[(i, j)] });
    let wr = row_major(w);
    let b = times_b(&wr, rows, n, a, par);
    let c: Vec<f64> = (0..rows)
        .map(|r| (0..n).map(|i| wr[r * n + i] * b[r * n + i]).sum::<f64>().max(0.0))
        .collect();
    let y = row_major(what);
    let mut st = Ascent::new(y, b, c, n, bm.as_ref(), par);
    // f_r of Ŵ: c − 2bᵀŷ + ŷᵀBŷ + Σ d ŷ².
    let f: Vec<f64> = (0..rows)
        .map(|r| {
            let rg = r * n..(r + 1) * n;
            let (y, u, b) = (&st.y[rg.clone()], &st.u[rg.clone()], &st.b[rg]);
            let v: f64 =
                (0..n).map(|i| -2.0 * b[i] * y[i] + y[i] * u[i] + d[i] * y[i] * y[i]).sum();
            (st.c[r] + v).max(0.0)
        })
        .collect();
    let objective: f64 = f.iter().sum();
    let gap_of =
        |lb: f64| if objective > 0.0 { ((objective - lb) / objective).max(0.0) } else { 0.0 };
    if d.iter().all(|&x| x <= 0.0) || rows == 0 || n == 0 {
        return Certificate {
            lower_bound: 0.0,
            objective,
            gap: gap_of(0.0),
            rows_optimal: None,
            rows,
            split_scale,
            iterations: 0,
        };
    }
    let groups = match pattern {
        Pattern::Unstructured { sparsity, scope: Scope::Row } => {
            Some(Groups { width: n, keep: budget::kept(sparsity, n) })
        }
        Pattern::NofM { n: keep, m } => Some(Groups { width: m, keep }),
        Pattern::Unstructured { scope: Scope::Layer, .. } => None,
    };
    let tol = params.optimal_tol;
    match groups {
        Some(g) => {
            st.evaluate(&wr, &d, g, None);
            let done = |r: usize, lb: f64| f[r] - lb <= tol * f[r];
            let iterations = st.run(bm.as_ref(), &d, g, None, params.max_iter, &done, par);
            let lower_bound = st.bound.iter().map(|&x| x.max(0.0)).sum::<f64>();
            let optimal = (0..rows).filter(|&r| done(r, st.bound[r])).count();
            Certificate {
                lower_bound,
                objective,
                gap: gap_of(lower_bound),
                rows_optimal: Some(optimal),
                rows,
                split_scale,
                iterations,
            }
        }
        None => {
            let Pattern::Unstructured { sparsity, .. } = pattern else { unreachable!() };
            let keep = budget::kept(sparsity, rows * n);
            let (lower_bound, iterations) =
                layer_ascent(&mut st, &wr, bm.as_ref(), &d, keep, objective, params, par);
            Certificate {
                lower_bound,
                objective,
                gap: gap_of(lower_bound),
                rows_optimal: None,
                rows,
                split_scale,
                iterations,
            }
        }
    }
}

/// The ascent for a per-layer budget: one `h*` (the `keep` largest over
/// the whole layer), one step length for all rows. Returns the bound (≥ 0)
/// and the iterations run.
#[allow(clippy::too_many_arguments)]
fn layer_ascent(
    st: &mut Ascent,
    w: &[f64],
    bm: MatRef<'_, f64>,
    d: &[f64],
    keep: usize,
    objective: f64,
    params: &CertifyParams,
    par: Par,
) -> (f64, usize) {
    let (rows, n) = (st.c.len(), st.n);
    let g = Groups { width: rows * n, keep };
    let ctot: f64 = st.c.iter().sum();
    let value = |st: &Ascent, t: f64, p: &[f64], q: &[f64], a: &mut Vec<f64>, s: &mut Vec<f64>| {
        let mut quad = 0.0;
        a.clear();
        for j in 0..rows * n {
            let (y, u) = (st.y[j] + t * p[j], st.u[j] + t * q[j]);
            quad += y * u;
            a.push((st.b[j] - u).powi(2) / d[j % n]);
        }
        ctot - quad - top_sum(a, g, None, s)
    };
    let zero = vec![0.0; rows * n];
    let (mut a, mut s) = (Vec::new(), Vec::new());
    let mut best = value(st, 0.0, &zero, &zero, &mut a, &mut s);
    // First towards the dense weights (`L(w) ≥ 0`; `Bw = b − d∘w`).
    let p: Vec<f64> = (0..rows * n).map(|j| w[j] - st.y[j]).collect();
    let q: Vec<f64> = (0..rows * n).map(|j| st.b[j] - d[j % n] * w[j] - st.u[j]).collect();
    let (t, v) = golden(|t| value(st, t, &p, &q, &mut a, &mut s), 1.0);
    let v1 = value(st, 1.0, &p, &q, &mut a, &mut s);
    let (t, v) = if v1 >= v { (1.0, v1) } else { (t, v) };
    if v > best {
        st.y.iter_mut().zip(&p).for_each(|(y, p)| *y += t * p);
        st.u.iter_mut().zip(&q).for_each(|(u, q)| *u += t * q);
        best = v;
    }
    let mut mu = 0.5;
    let mut stall = 0;
    let mut it = 0;
    while it < params.max_iter && objective - best > params.optimal_tol * objective && stall < 4 {
        it += 1;
        let r: Vec<f64> = st.b.iter().zip(&st.u).map(|(b, u)| b - u).collect();
        let av: Vec<f64> = r.iter().enumerate().map(|(j, ri)| ri * ri / d[j % n]).collect();
        let kth = {
            let mut v = av.clone();
            let k = keep.clamp(1, v.len());
            v.select_nth_unstable_by(k - 1, |x, y| y.total_cmp(x));
            v[k - 1]
        };
        let mut z = vec![0.0; rows * n];
        soft_select(&av, g, None, mu * kth, &mut z);
        let p: Vec<f64> = (0..rows * n).map(|j| z[j] * r[j] / d[j % n] - st.y[j]).collect();
        let q = times_b(&p, rows, n, bm, par);
        let (t, v) = golden(|t| value(st, t, &p, &q, &mut a, &mut s), 2.0);
        if v > best && t > 0.0 {
            st.y.iter_mut().zip(&p).for_each(|(y, p)| *y += t * p);
            st.u.iter_mut().zip(&q).for_each(|(u, q)| *u += t * q);
            stall = if v - best <= 1e-12 * ctot { stall + 1 } else { 0 };
            best = v;
            mu = (mu * 0.5).max(1e-6);
        } else {
            stall += 1;
            mu = (mu * 4.0).min(4.0);
        }
    }
    (best.max(0.0), it)
}

/// Result of [`branch_and_bound`].
#[derive(Clone, Debug, PartialEq)]
pub struct Exact {
    /// The optimal objective `min_{|S| ≤ k} f(S)`.
    pub value: f64,
    /// An optimal support (ascending).
    pub support: Vec<usize>,
    /// Nodes bounded.
    pub nodes: usize,
}

/// `f(S) = c − b_Sᵀ A_SS⁻¹ b_S` by a Cholesky solve; `None` when `A_SS`
/// cannot be factored.
fn support_value(a: MatRef<'_, f64>, b: &[f64], c: f64, s: &[usize]) -> Option<f64> {
    if s.is_empty() {
        return Some(c);
    }
    let ass = Mat::from_fn(s.len(), s.len(), |p, q| a[(s[p], s[q])]);
    let rhs = Mat::from_fn(s.len(), 1, |p, _| b[s[p]]);
    let x = ass.llt(Side::Lower).ok()?.solve(&rhs);
    Some(c - (0..s.len()).map(|p| b[s[p]] * x[(p, 0)]).sum::<f64>())
}

/// The exact optimum of one row, `min f(ŵ)` over `‖ŵ‖₀ ≤ k`, by depth-first
/// branch and bound on the keep indicators with the bound `L` of this
/// module at every node, started from the support `start` (e.g. the local
/// search's). Exponential in the worst case: meant for rows up to about 40
/// wide.
///
/// # Panics
/// When `a` is not `n x n` for `n = w.len()`.
#[track_caller]
pub fn branch_and_bound(
    a: MatRef<'_, f64>,
    lambda: f64,
    w: &[f64],
    k: usize,
    start: &[usize],
) -> Exact {
    let n = w.len();
    assert_eq!((a.nrows(), a.ncols()), (n, n), "A must be n x n");
    let k = k.min(n);
    let (d, _) = split_diagonal(a, lambda, Split::Scaled);
    let bm = Mat::from_fn(n, n, |i, j| if i == j { a[(i, i)] - d[i] } else { a[(i, j)] });
    let b: Vec<f64> = (0..n).map(|i| (0..n).map(|j| a[(i, j)] * w[j]).sum()).collect();
    let c = w.iter().zip(&b).map(|(x, y)| x * y).sum::<f64>().max(0.0);
    let mut start: Vec<usize> = start.iter().copied().filter(|&i| i < n).collect();
    start.sort_unstable();
    start.dedup();
    start.truncate(k);
    let mut best = (support_value(a, &b, c, &start).unwrap_or(f64::INFINITY), start);
    let g = Groups { width: n, keep: k };
    let mut nodes = 0;
    // Stack of (fixings, warm start y).
    let mut stack: Vec<(Vec<Fix>, Vec<f64>)> = vec![(vec![Fix::Free; n], w.to_vec())];
    while let Some((fix, y)) = stack.pop() {
        nodes += 1;
        let ins: Vec<usize> = (0..n).filter(|&i| fix[i] == Fix::In).collect();
        let free: Vec<usize> = (0..n).filter(|&i| fix[i] == Fix::Free).collect();
        if ins.len() == k || ins.len() + free.len() <= k {
            // A leaf: the support is decided (f is monotone in S).
            let s: Vec<usize> = (0..n).filter(|&i| fix[i] != Fix::Out).take(n).collect();
            let s = if ins.len() == k { ins } else { s };
            if let Some(v) = support_value(a, &b, c, &s) {
                if v < best.0 {
                    best = (v, s);
                }
            }
            continue;
        }
        let mut st = Ascent::new(y, b.clone(), vec![c], n, bm.as_ref(), Par::Seq);
        st.evaluate(w, &d, g, Some(&fix));
        let cut = best.0;
        let done = |_: usize, lb: f64| lb >= cut - 1e-12 * c;
        st.run(bm.as_ref(), &d, g, Some(&fix), 60, &done, Par::Seq);
        if st.bound[0] >= cut - 1e-12 * c {
            continue;
        }
        // Branch on the free entry the relaxation most wants kept.
        let r: Vec<f64> = (0..n).map(|i| b[i] - st.u[i]).collect();
        let j = *free
            .iter()
            .max_by(|&&x, &&y| (r[x] * r[x] / d[x]).total_cmp(&(r[y] * r[y] / d[y])))
            .expect("free entries remain");
        let mut out = fix.clone();
        out[j] = Fix::Out;
        let mut inn = fix;
        inn[j] = Fix::In;
        stack.push((out, st.y.clone()));
        stack.push((inn, st.y));
    }
    Exact { value: best.0, support: best.1, nodes }
}

#[cfg(test)]
#[path = "certify_tests.rs"]
mod tests;
