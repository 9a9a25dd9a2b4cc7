//! PLACEHOLDER (replaced by the real kernel at merge).
#![allow(missing_docs, dead_code)]
use super::SolveError;
use faer::{Mat, MatRef, Par};
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum GroupMethod {
    Magnitude,
    Scaled,
    Greedy,
    Swap,
}
#[derive(Clone, Debug)]
pub struct GroupParams {
    pub method: GroupMethod,
    pub refit: bool,
    pub ridge_alpha: f64,
    pub max_rounds: usize,
    pub max_seconds: Option<f64>,
}
#[derive(Clone, Debug)]
pub struct GroupSolution {
    pub kept: Vec<usize>,
    pub weight: Mat<f64>,
    pub lambda: f64,
    pub objective: f64,
    pub objective_start: f64,
    pub rounds: usize,
    pub swaps: usize,
}
pub fn solve_groups(
    w: MatRef<'_, f64>,
    h: MatRef<'_, f64>,
    group: usize,
    keep: usize,
    params: &GroupParams,
    par: Par,
) -> Result<GroupSolution, SolveError> {
    let d = w.ncols();
    let n = d / group;
    let mut score: Vec<(f64, usize)> = (0..n)
        .map(|k| {
            let mut s = 0.0;
            for c in k * group..(k + 1) * group {
                for r in 0..w.nrows() {
                    s += w[(r, c)]
                        * w[(r, c)]
                        * if params.method == GroupMethod::Magnitude { 1.0 } else { h[(c, c)] };
                }
            }
            (s, k)
        })
        .collect();
    score.sort_by(|a, b| b.0.partial_cmp(&a.0).unwrap());
    let mut kept: Vec<usize> = score[..keep].iter().map(|x| x.1).collect();
    kept.sort();
    let lambda = super::ridge_lambda(h, params.ridge_alpha);
    let a = super::regularised(h, lambda);
    let mut wt = Mat::zeros(w.nrows(), d);
    for &k in &kept {
        for c in k * group..(k + 1) * group {
            for r in 0..w.nrows() {
                wt[(r, c)] = w[(r, c)];
            }
        }
    }
    let f = super::objective::objective(w, wt.as_ref(), a.as_ref(), par);
    Ok(GroupSolution {
        kept,
        weight: wt,
        lambda,
        objective: f,
        objective_start: f,
        rounds: 0,
        swaps: 0,
    })
}
