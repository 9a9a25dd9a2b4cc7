//! Swap moves evaluated with the refit: the exact change of the refit
//! optimum when `i` leaves the support and `j` joins it.
//!
//! At a refit optimum (`g_S = 0`), with `M = A_SS⁻¹` and `V = A_{Sᶜ,S} M`,
//! removing `i` (position `p` in `S`) with the other kept weights
//! re-optimised costs `ŵ_i² / M_pp` (the OBS saliency) and leaves the
//! gradient `g'_j = g_j − (ŵ_i / M_pp) V_jp` outside `S`. Adding `j` to
//! `S∖{i}` then gains `g'_j² / s'_j`, where `s'_j` is the Schur complement
//! of `A_jj` with respect to `S∖{i}`:
//!
//! ```text
//! s_j  = A_jj − Σ_p V_jp A_{j,S_p}          (Schur complement w.r.t. S)
//! s'_j = s_j + V_jp² / M_pp                 (dropping i from S)
//! Δ(i, j) = ŵ_i² / M_pp − g'_j² / s'_j      = f(S − i + j) − f(S)
//! ```
//!
//! One factorisation of `A_SS` (`k³/3`), its inverse (`k³`) and the product
//! `V` (`2 (d_in − k) k²`, faer matmul) price all `k·(d_in − k)` swaps
//! exactly, and small blocks of several swaps at once (the same formulas
//! with `M_RR`, `V_{J,R}` in place of scalars) cost O(k) more each. That is
//! more than a sweep of the fixed-others swaps in
//! [`super::swap`] (O(k·d_in)), so these moves are used once the cheap ones
//! stop improving, and only on rows with `k ≤ L0Params::exact_max_k`.

use super::swap::RowMut;
use super::{col, refit};
use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, MatRef, Par};

/// Swaps of a single pair ranked for the pairwise search in
/// [`best_move`]: the `TOP` best ones are combined two at a time.
const TOP: usize = 16;

/// An exact move: prune `out`, keep `inn` (same length), objective change
/// `delta` after the refit.
#[derive(Clone, Debug)]
pub(crate) struct Move {
    pub delta: f64,
    pub out: Vec<usize>,
    pub inn: Vec<usize>,
}

/// Everything needed to price moves from one refit optimum.
struct Priced {
    s: Vec<usize>,
    out: Vec<usize>,
    /// `M = A_SS⁻¹`.
    m: Mat<f64>,
    /// `A_{Sᶜ,S}`, rows in the order of `out`.
    aos: Mat<f64>,
    /// `V = A_{Sᶜ,S} M`.
    v: Mat<f64>,
    /// Schur complements `s_j` w.r.t. `S`, in the order of `out`.
    schur: Vec<f64>,
}

impl Priced {
    fn new(a: MatRef<'_, f64>, keep: &[bool]) -> Option<Self> {
        let d = keep.len();
        let s: Vec<usize> = (0..d).filter(|&c| keep[c]).collect();
        let out: Vec<usize> = (0..d).filter(|&c| !keep[c]).collect();
        let k = s.len();
        if k == 0 || out.is_empty() {
            return None;
        }
        let mut l = Mat::from_fn(k, k, |p, q| a[(s[p], s[q])]);
        refit::llt_in_place(l.as_mut()).ok()?;
        let mut m = Mat::<f64>::identity(k, k);
        refit::llt_solve_in_place(l.as_ref(), m.as_mut());
        let aos = Mat::from_fn(out.len(), k, |q, p| col(a, s[p])[out[q]]);
        let mut v = Mat::<f64>::zeros(out.len(), k);
        matmul(v.as_mut(), Accum::Replace, aos.as_ref(), m.as_ref(), 1.0, Par::Seq);
        let schur = (0..out.len())
            .map(|q| {
                let j = out[q];
                a[(j, j)] - (0..k).map(|p| v[(q, p)] * aos[(q, p)]).sum::<f64>()
            })
            .collect();
        Some(Priced { s, out, m, aos, v, schur })
    }

    /// `Δ` of the single swap `S[p]` out, `out[q]` in.
    fn single(&self, row: &RowMut<'_>, p: usize, q: usize) -> f64 {
        let wi = row.w_hat[self.s[p]];
        let mpp = self.m[(p, p)];
        let vq = self.v[(q, p)];
        let gj = row.g[self.out[q]] - wi / mpp * vq;
        let sj = self.schur[q] + vq * vq / mpp;
        if sj > 0.0 {
            wi * wi / mpp - gj * gj / sj
        } else {
            f64::INFINITY
        }
    }

    /// `Δ` of pruning `S[ps]` and keeping `out[qs]` (block form of
    /// [`Priced::single`]):
    /// `Δ = ŵ_Rᵀ M_RR⁻¹ ŵ_R − g'_Jᵀ S'_JJ⁻¹ g'_J` with
    /// `g'_J = g_J − V_{J,R} M_RR⁻¹ ŵ_R` and
    /// `S'_JJ = A_JJ − A_{J,S} M A_{S,J} + V_{J,R} M_RR⁻¹ V_{J,R}ᵀ`.
    fn block(&self, a: MatRef<'_, f64>, row: &RowMut<'_>, ps: &[usize], qs: &[usize]) -> f64 {
        let (r, t, k) = (ps.len(), qs.len(), self.s.len());
        let mut mrr: Vec<f64> = (0..r * r).map(|e| self.m[(ps[e / r], ps[e % r])]).collect();
        let l = match cholesky(&mut mrr, r) {
            Some(()) => mrr,
            None => return f64::INFINITY,
        };
        let mut y: Vec<f64> = ps.iter().map(|&p| row.w_hat[self.s[p]]).collect();
        let cost: f64 = {
            let w_r = y.clone();
            solve(&l, r, &mut y);
            w_r.iter().zip(&y).map(|(a, b)| a * b).sum()
        };
        let gp: Vec<f64> = qs
            .iter()
            .map(|&q| row.g[self.out[q]] - (0..r).map(|x| self.v[(q, ps[x])] * y[x]).sum::<f64>())
            .collect();
        // Z = M_RR⁻¹ V_{J,R}ᵀ, column per addition.
        let z: Vec<Vec<f64>> = qs
            .iter()
            .map(|&q| {
                let mut c: Vec<f64> = ps.iter().map(|&p| self.v[(q, p)]).collect();
                solve(&l, r, &mut c);
                c
            })
            .collect();
        let mut sjj = vec![0.0; t * t];
        for (x1, &q1) in qs.iter().enumerate() {
            for (x2, &q2) in qs.iter().enumerate() {
                let (j1, j2) = (self.out[q1], self.out[q2]);
                let cross: f64 = (0..k).map(|p| self.v[(q1, p)] * self.aos[(q2, p)]).sum();
                let back: f64 = (0..r).map(|x| self.v[(q1, ps[x])] * z[x2][x]).sum();
                sjj[x1 * t + x2] = a[(j1, j2)] - cross + back;
            }
        }
        if cholesky(&mut sjj, t).is_none() {
            return f64::INFINITY;
        }
        let mut u = gp.clone();
        solve(&sjj, t, &mut u);
        cost - gp.iter().zip(&u).map(|(a, b)| a * b).sum::<f64>()
    }
}

/// In-place lower Cholesky of a small `n x n` row-major SPD matrix.
///
/// Kept beside faer's `llt` on purpose: [`Priced::block`] factors `M_RR`
/// and `S'_JJ`, whose side is the number of weights a move prunes (2 for a
/// pair of swaps, up to `2·min(n, m − n)` for a pair of N:M group moves),
/// so `n` is 1–8, where faer's per-call setup (a `Mat` and a scratch
/// `MemBuffer` per factorisation) outweighs the arithmetic. Measured with
/// `Priced::block` rewritten on `refit::llt_in_place` /
/// `refit::llt_solve_in_place` (all right-hand sides solved at once), same
/// `Δ` to 1e-15 relative, release build, on a shared 2-core machine (load
/// average 5–6), best of 5 runs of 200k calls:
///
/// ```text
/// r = t         1     2     3     4     6     8
/// hand, ns    301   467   844  1257  2847  4981
/// faer, ns    903  1079  1433  2142  3899  5989   (3.0x … 1.2x slower)
/// ```
///
/// and on whole solves (`Par::Seq`, best of 8 alternated runs, identical
/// objectives): 2:4 on 128 x 128 0.231 s vs 0.265 s (+15%), 1:8 on
/// 64 x 512 0.159 s vs 0.200 s (+26%), 75% per row on 128 x 256 0.510 s vs
/// 0.555 s (+9%), all with `k ≤ exact_max_k` so these moves run.
fn cholesky(m: &mut [f64], n: usize) -> Option<()> {
    for j in 0..n {
        let mut d = m[j * n + j];
        for c in 0..j {
            d -= m[j * n + c] * m[j * n + c];
        }
        if d.is_nan() || d <= 0.0 {
            return None;
        }
        let d = d.sqrt();
        m[j * n + j] = d;
        for i in j + 1..n {
            let mut x = m[i * n + j];
            for c in 0..j {
                x -= m[i * n + c] * m[j * n + c];
            }
            m[i * n + j] = x / d;
        }
    }
    Some(())
}

/// Solve `L Lᵀ x = b` in place with the factor from [`cholesky`].
fn solve(l: &[f64], n: usize, b: &mut [f64]) {
    for i in 0..n {
        let mut x = b[i];
        for c in 0..i {
            x -= l[i * n + c] * b[c];
        }
        b[i] = x / l[i * n + i];
    }
    for i in (0..n).rev() {
        let mut x = b[i];
        for c in i + 1..n {
            x -= l[c * n + i] * b[c];
        }
        b[i] = x / l[i * n + i];
    }
}

/// The best exact move of a row at a refit optimum.
///
/// Atomic moves: every single swap (unstructured, `group = None`) or every
/// other choice of the kept set inside one group (N:M, `group = Some(m)`).
/// Besides the best atomic move, every pair of the [`TOP`] best atomic moves
/// with disjoint indices (and distinct groups) is priced jointly: two moves
/// can improve together when neither does alone.
pub(crate) fn best_move(
    a: MatRef<'_, f64>,
    row: &RowMut<'_>,
    group: Option<usize>,
) -> Option<Move> {
    let pr = Priced::new(a, row.keep)?;
    let mut best: Option<Move> = None;
    let mut consider = |delta: f64, ps: &[usize], qs: &[usize]| {
        if best.as_ref().is_none_or(|b| delta < b.delta) {
            best = Some(Move {
                delta,
                out: ps.iter().map(|&p| pr.s[p]).collect(),
                inn: qs.iter().map(|&q| pr.out[q]).collect(),
            });
        }
    };
    // Atomic moves (Δ, removed positions in S, added positions in Sᶜ,
    // group), best first; only the `TOP` best are kept for pairing.
    let mut top: Vec<(f64, Vec<usize>, Vec<usize>, usize)> = Vec::with_capacity(TOP + 1);
    let mut push = |delta: f64, ps: Vec<usize>, qs: Vec<usize>, grp: usize| {
        if top.len() < TOP || delta < top[TOP - 1].0 {
            let at = top.partition_point(|e| e.0 <= delta);
            top.insert(at, (delta, ps, qs, grp));
            top.truncate(TOP);
        }
    };
    match group {
        None => {
            for p in 0..pr.s.len() {
                for q in 0..pr.out.len() {
                    push(pr.single(row, p, q), vec![p], vec![q], usize::MAX);
                }
            }
        }
        Some(m) => {
            let d = row.keep.len();
            let mut pos = vec![usize::MAX; d];
            for (p, &c) in pr.s.iter().enumerate() {
                pos[c] = p;
            }
            for (q, &c) in pr.out.iter().enumerate() {
                pos[c] = q;
            }
            for g0 in (0..d).step_by(m) {
                let cur: u32 = (0..m).filter(|&c| row.keep[g0 + c]).fold(0, |acc, c| acc | 1 << c);
                for t in 0u32..1 << m {
                    if t == cur || t.count_ones() != cur.count_ones() {
                        continue;
                    }
                    let bits =
                        |x: u32| (0..m).filter(move |&c| (x >> c) & 1 == 1).map(|c| pos[g0 + c]);
                    let ps: Vec<usize> = bits(cur & !t).collect();
                    let qs: Vec<usize> = bits(t & !cur).collect();
                    let delta = if ps.len() == 1 {
                        pr.single(row, ps[0], qs[0])
                    } else {
                        pr.block(a, row, &ps, &qs)
                    };
                    push(delta, ps, qs, g0);
                }
            }
        }
    }
    if let Some((delta, ps, qs, _)) = top.first() {
        consider(*delta, ps, qs);
    }
    for x in 0..top.len() {
        for y in x + 1..top.len() {
            let (a1, a2) = (&top[x], &top[y]);
            let disjoint =
                a1.1.iter().all(|p| !a2.1.contains(p)) && a1.2.iter().all(|q| !a2.2.contains(q));
            if disjoint && (a1.3 == usize::MAX || a1.3 != a2.3) {
                let ps: Vec<usize> = a1.1.iter().chain(&a2.1).copied().collect();
                let qs: Vec<usize> = a1.2.iter().chain(&a2.2).copied().collect();
                consider(pr.block(a, row, &ps, &qs), &ps, &qs);
            }
        }
    }
    best
}

/// Exact budget prices of a row at a refit optimum: the cheapest removal
/// `(ŵ_i² / M_ii, i)` and the best addition `(g_j² / s_j, j)`, both with the
/// other kept weights refit.
pub(crate) type Prices = (Option<(f64, usize)>, Option<(f64, usize)>);

/// See [`Prices`].
pub(crate) fn budget_prices(a: MatRef<'_, f64>, row: &RowMut<'_>) -> Prices {
    let d = row.keep.len();
    let k = row.keep.iter().filter(|&&x| x).count();
    if k == 0 {
        // Nothing to remove; adding j alone gains g_j² / A_jj exactly.
        let add =
            (0..d).map(|j| (row.g[j] * row.g[j] / a[(j, j)], j)).max_by(|p, q| p.0.total_cmp(&q.0));
        return (None, add);
    }
    let Some(pr) = Priced::new(a, row.keep) else {
        // Full support: only removals.
        let s: Vec<usize> = (0..d).collect();
        let mut l = Mat::from_fn(d, d, |p, q| a[(s[p], s[q])]);
        let inverse = refit::llt_in_place(l.as_mut()).ok().map(|()| {
            let mut m = Mat::<f64>::identity(d, d);
            refit::llt_solve_in_place(l.as_ref(), m.as_mut());
            m
        });
        let rem = inverse.and_then(|m| {
            (0..d)
                .map(|i| (row.w_hat[i] * row.w_hat[i] / m[(i, i)], i))
                .min_by(|p, q| p.0.total_cmp(&q.0))
        });
        return (rem, None);
    };
    let rem = (0..pr.s.len())
        .map(|p| {
            let wi = row.w_hat[pr.s[p]];
            (wi * wi / pr.m[(p, p)], pr.s[p])
        })
        .min_by(|p, q| p.0.total_cmp(&q.0).then(p.1.cmp(&q.1)));
    let add = (0..pr.out.len())
        .filter(|&q| pr.schur[q] > 0.0)
        .map(|q| {
            let gj = row.g[pr.out[q]];
            (gj * gj / pr.schur[q], pr.out[q])
        })
        .max_by(|p, q| p.0.total_cmp(&q.0).then(q.1.cmp(&p.1)));
    (rem, add)
}

/// Flip the support for move `mv`, keeping `g = A (ŵ − w)` consistent (the
/// new weights start at 0); the caller refits the row, which lands on
/// `f(S) + mv.delta`.
pub(crate) fn flip(a: MatRef<'_, f64>, row: &mut RowMut<'_>, mv: &Move) {
    for &i in &mv.out {
        let wi = row.w_hat[i];
        refit::axpy(row.g, -wi, col(a, i));
        row.w_hat[i] = 0.0;
        row.keep[i] = false;
    }
    for &j in &mv.inn {
        row.keep[j] = true;
    }
}

#[cfg(test)]
mod tests {
    use super::super::tests::instance;
    use super::super::{refit, Problem, State};
    use super::*;

    #[test]
    fn small_cholesky_matches_faer() {
        // The hand-written factor and solve against faer's `llt` on random
        // SPD matrices M = BᵀB + I of the sides the block prices use.
        // Both are backward stable, so they agree to O(n ε κ(M)) relative;
        // κ(M) ≤ 1 + ‖B‖² ≤ 1 + n², so 1e-13 leaves a wide margin.
        let mut rng = crate::rng::SplitMix64::new(31);
        for n in 1..=8 {
            let b = Mat::from_fn(n, n, |_, _| rng.normal());
            let m = b.transpose() * &b + Mat::<f64>::identity(n, n);
            let rhs: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
            let mut l: Vec<f64> = (0..n * n).map(|e| m[(e / n, e % n)]).collect();
            cholesky(&mut l, n).unwrap();
            let mut x = rhs.clone();
            solve(&l, n, &mut x);
            let mut lf = m.clone();
            refit::llt_in_place(lf.as_mut()).unwrap();
            let mut xf = Mat::from_fn(n, 1, |i, _| rhs[i]);
            refit::llt_solve_in_place(lf.as_ref(), xf.as_mut());
            let scale = xf.norm_max();
            let diff = (0..n).map(|i| (x[i] - xf[(i, 0)]).abs()).fold(0.0, f64::max);
            assert!(diff <= 1e-13 * scale, "n = {n}: max diff {diff:.3e} vs {:.3e}", 1e-13 * scale);
        }
        // A matrix with a non-positive pivot is refused by both.
        let mut bad = vec![1.0, 2.0, 2.0, 1.0];
        assert!(cholesky(&mut bad, 2).is_none());
        assert!(refit::llt_in_place(faer::mat![[1.0, 2.0], [2.0, 1.0]].as_mut()).is_err());
    }

    #[test]
    fn priced_moves_match_refit_differences() {
        // Δ from the block formulas against f(S') − f(S) with both supports
        // refit from scratch by Cholesky.
        let mut rng = crate::rng::SplitMix64::new(21);
        let (x, w, lambda) = instance(&mut rng, 60, 12, 1, 0.01);
        let mut a = x.transpose() * &x;
        for j in 0..12 {
            a[(j, j)] += lambda;
        }
        let prob = Problem::new(w.as_ref(), a.as_ref(), lambda, Par::Seq);
        let refit_value = |keep: &[bool]| {
            let (mut wh, mut g) = (vec![0.0; 12], vec![0.0; 12]);
            refit::cholesky_row(a.as_ref(), &prob.w, &prob.b, &mut wh, keep, &mut g).unwrap()
        };
        let keep: Vec<bool> = (0..12).map(|c| c % 3 != 0).collect();
        let mut st = State::from_support(&prob, keep.clone(), None, Par::Seq);
        let f0 =
            refit::cholesky_row(a.as_ref(), &prob.w, &prob.b, &mut st.w_hat, &st.keep, &mut st.g)
                .unwrap();
        let row = RowMut { w_hat: &mut st.w_hat, g: &mut st.g, keep: &mut st.keep };
        let pr = Priced::new(a.as_ref(), row.keep).unwrap();
        let tol = 1e-9 * prob.dense[0];
        let moves: [(&[usize], &[usize]); 4] =
            [(&[0], &[0]), (&[3], &[2]), (&[1, 5], &[0, 3]), (&[0, 2, 7], &[1, 2, 3])];
        for (ps, qs) in moves {
            let delta = if ps.len() == 1 {
                pr.single(&row, ps[0], qs[0])
            } else {
                pr.block(a.as_ref(), &row, ps, qs)
            };
            let mut k2 = keep.clone();
            for &p in ps {
                k2[pr.s[p]] = false;
            }
            for &q in qs {
                k2[pr.out[q]] = true;
            }
            let want = refit_value(&k2) - f0;
            assert!(
                (delta - want).abs() <= tol,
                "{ps:?}/{qs:?}: {delta} vs {want} (tol {tol:.2e})"
            );
        }
        let (rem, add) = budget_prices(a.as_ref(), &row);
        let (cost, i) = rem.unwrap();
        let mut k2 = keep.clone();
        k2[i] = false;
        assert!((refit_value(&k2) - f0 - cost).abs() <= tol);
        let (gain, j) = add.unwrap();
        let mut k3 = keep.clone();
        k3[j] = true;
        assert!((f0 - refit_value(&k3) - gain).abs() <= tol);
    }
}
