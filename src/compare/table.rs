//! The compact terminal summary: one row per method (and source), one
//! column per target, each cell the mean held-out relative error (the
//! calibration error when no rows were held out), `*` on the lowest of each
//! column, then the solve time per row.

use super::data::{target_display, Run, Source};
use super::svg::sci;
use std::fmt::Write as _;

/// The table for `sources`, ending with a newline.
pub fn render(sources: &[Source]) -> String {
    let runs: Vec<(usize, &Run)> = sources
        .iter()
        .enumerate()
        .flat_map(|(i, s)| s.comparison.runs.iter().map(move |r| (i, r)))
        .collect();
    let held =
        runs.iter().all(|(_, r)| r.layers.is_empty() || r.summary.mean_rel_error_holdout.is_some());
    let mean = |r: &Run| {
        if r.layers.is_empty() {
            None
        } else if held {
            r.summary.mean_rel_error_holdout
        } else {
            Some(r.summary.mean_rel_error)
        }
    };
    // Columns: targets in first-seen order (with scope when per layer).
    let col = |r: &Run| {
        let t = target_display(&r.target);
        if r.scope == "layer" {
            format!("{t}/layer")
        } else {
            t
        }
    };
    // Unstructured targets by sparsity, then patterns as they come.
    let mut keyed: Vec<(Option<f64>, String)> = Vec::new();
    let mut rows: Vec<(usize, String)> = Vec::new();
    for (i, r) in &runs {
        let c = col(r);
        if !keyed.iter().any(|(_, k)| k == &c) {
            keyed.push((r.sparsity, c));
        }
        if !rows.contains(&(*i, r.method.clone())) {
            rows.push((*i, r.method.clone()));
        }
    }
    keyed.sort_by(|a, b| match (a.0, b.0) {
        (Some(x), Some(y)) => x.total_cmp(&y),
        (Some(_), None) => std::cmp::Ordering::Less,
        (None, Some(_)) => std::cmp::Ordering::Greater,
        (None, None) => std::cmp::Ordering::Equal,
    });
    let cols: Vec<String> = keyed.into_iter().map(|(_, c)| c).collect();
    let label = |(i, m): &(usize, String)| {
        if sources.len() > 1 {
            format!("{m} ({})", sources[*i].label)
        } else {
            m.clone()
        }
    };
    let best: Vec<Option<f64>> = cols
        .iter()
        .map(|c| {
            runs.iter()
                .filter(|(_, r)| &col(r) == c)
                .filter_map(|(_, r)| mean(r))
                .min_by(|a, b| a.total_cmp(b))
        })
        .collect();
    let wl = rows.iter().map(|r| label(r).chars().count()).max().unwrap_or(6).max(6);
    let wc = cols.iter().map(|c| c.chars().count()).max().unwrap_or(0).max(9);
    let mut out = String::new();
    let _ = writeln!(
        out,
        "mean {} relative error per layer (* lowest per target)",
        if held { "held-out" } else { "calibration" }
    );
    let mut head = format!("{:<wl$}", "method");
    for c in &cols {
        let _ = write!(head, "  {c:>w$} ", w = wc - 1);
    }
    let _ = write!(head, "  {:>9}", "solve s");
    let _ = writeln!(out, "{head}");
    let _ = writeln!(out, "{}", "-".repeat(head.chars().count()));
    for key in &rows {
        let mut line = format!("{:<wl$}", label(key));
        let mut secs = 0.0;
        for (ci, c) in cols.iter().enumerate() {
            let r = runs.iter().find(|(i, r)| *i == key.0 && r.method == key.1 && &col(r) == c);
            let cell = match r {
                Some((_, r)) => {
                    secs += r.summary.seconds;
                    let m = mean(r);
                    let star = if m.is_some() && m == best[ci] { "*" } else { " " };
                    format!("{:>w$}{star}", sci(m), w = wc - 1)
                }
                None => " ".repeat(wc),
            };
            let _ = write!(line, "  {cell}");
        }
        let _ = write!(line, "  {secs:>9.2}");
        let _ = writeln!(out, "{line}");
    }
    // Stopped early: say how much of the model the means cover.
    let total = sources.iter().map(|s| s.comparison.layers.len()).max().unwrap_or(0);
    let counts: Vec<usize> = runs.iter().map(|(_, r)| r.layers.len()).collect();
    let (lo, hi) = (counts.iter().min().copied(), counts.iter().max().copied());
    if let (Some(lo), Some(hi)) = (lo, hi) {
        if lo < total {
            let span = if lo == hi { lo.to_string() } else { format!("{lo} to {hi}") };
            let _ = writeln!(
                out,
                "partial: runs cover {span} of {total} layers; means are over finished layers"
            );
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn stars_the_lowest_per_target_and_flags_partial_runs() {
        let half = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let nm = Pattern::NofM { n: 2, m: 4 };
        let mut runs = Vec::new();
        for (m, e) in [(Method::Magnitude, 0.1), (Method::L0, 0.01)] {
            for p in [nm, half] {
                // The local search at 2:4 stopped after one of two layers.
                let n = if m == Method::L0 && p == nm { 1 } else { 2 };
                runs.push(run(m, p, e, Some(2.0), n));
            }
        }
        let c = comparison(2, runs);
        let t = render(&[Source { label: "x".into(), path: None, comparison: c }]);
        let lines: Vec<&str> = t.lines().collect();
        assert!(lines[0].contains("held-out"), "{t}");
        // Targets sorted: the sparsity before the pattern, whatever the run order.
        let head = lines[1];
        assert!(head.find("50%").unwrap() < head.find("2:4").unwrap(), "{t}");
        let l0 = lines.iter().find(|l| l.starts_with("l0")).unwrap();
        assert_eq!(l0.matches('*').count(), 2, "{t}");
        assert!(l0.contains("2.00e-2*"), "{t}");
        assert!(l0.trim_end().ends_with("0.75"), "3 layers x 0.25 s: {t}");
        assert!(t.contains("partial: runs cover 1 to 2 of 2 layers"), "{t}");
    }
}
