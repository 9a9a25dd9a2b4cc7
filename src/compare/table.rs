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
    out
}
