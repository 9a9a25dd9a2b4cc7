//! Quality against latency (`data-chart="frontier"`): one point per run
//! that has both a whole-model speedup (`--time-whole`) and an end-to-end
//! figure on held-out text (`--eval-text`): x = measured speedup over the
//! dense model on the machine that ran the comparison, y = the end-to-end
//! figure (mean cosine for encoders, perplexity for decoders). A point is
//! on the frontier when no other point is at least as good on both axes
//! and better on one; those are drawn large with a ring and joined by a
//! line. Nothing is written when no run has both figures.

use super::view::{Series, View};
use crate::compare::data::{target_display, Run};
use crate::compare::svg::{esc, exact, marker};
use std::fmt::Write as _;

/// A plotted run: its series, the run, speedup, end-to-end figure.
struct Point<'a> {
    series: &'a Series,
    run: &'a Run,
    x: f64,
    y: f64,
}

/// Indices of the points no other point dominates: `x` larger is better;
/// `y` larger is better when `higher`, else smaller.
pub(super) fn non_dominated(pts: &[(f64, f64)], higher: bool) -> Vec<usize> {
    let better = |a: f64, b: f64| if higher { a > b } else { a < b };
    let at_least = |a: f64, b: f64| if higher { a >= b } else { a <= b };
    (0..pts.len())
        .filter(|&i| {
            !pts.iter().enumerate().any(|(j, q)| {
                j != i
                    && q.0 >= pts[i].0
                    && at_least(q.1, pts[i].1)
                    && (q.0 > pts[i].0 || better(q.1, pts[i].1))
            })
        })
        .collect()
}

/// Write the section, or nothing.
pub(super) fn section(h: &mut String, v: &View<'_>) {
    let mut pts = Vec::new();
    let mut metric = None;
    for s in &v.series {
        for r in &v.sources[s.source].comparison.runs {
            if r.method != s.method {
                continue;
            }
            if let (Some(w), Some(e)) = (&r.whole, &r.end_to_end) {
                if w.speedup.is_finite() && e.value.is_finite() {
                    metric.get_or_insert((e.metric.clone(), e.higher_is_better, e.dense));
                    pts.push(Point { series: s, run: r, x: w.speedup, y: e.value });
                }
            }
        }
    }
    let Some((metric, higher, dense)) = metric else { return };
    // One metric per chart: keep the points of the first one.
    pts.retain(|p| p.run.end_to_end.as_ref().is_some_and(|e| e.metric == metric));
    let xy: Vec<(f64, f64)> = pts.iter().map(|p| (p.x, p.y)).collect();
    let front = non_dominated(&xy, higher);
    let (w, hgt, l, r, t, b) = (640.0, 360.0, 70.0, 20.0, 20.0, 50.0);
    let span = |vals: &mut dyn Iterator<Item = f64>| {
        let (lo, hi) =
            vals.fold((f64::INFINITY, f64::NEG_INFINITY), |a, v| (a.0.min(v), a.1.max(v)));
        let pad = ((hi - lo) * 0.08).max(hi.abs() * 0.01).max(1e-9);
        (lo - pad, hi + pad)
    };
    let (x0, x1) = span(&mut pts.iter().map(|p| p.x).chain([1.0]));
    let (y0, y1) = span(&mut pts.iter().map(|p| p.y).chain(dense));
    let px = |x: f64| l + (x - x0) / (x1 - x0) * (w - l - r);
    let py = |y: f64| t + (y1 - y) / (y1 - y0) * (hgt - t - b);
    let _ = write!(
        h,
        "<h2>Quality against latency</h2><p class=\"lead\">Each point is one method at one \
         target: x is the whole model's measured speedup over the dense model on the machine \
         that ran this comparison ({}), y the {} on the held-out text ({} is better). Large \
         ringed points are the frontier: no other point is both faster and better. Ship from \
         the frontier; the dashed lines mark the dense model. Timings depend on the CPU, the \
         threads and the load: re-run <code>lopper latency</code> on the target machine.</p>\
         <svg class=\"lopper-chart\" data-chart=\"frontier\" viewBox=\"0 0 {w} {hgt}\" role=\"img\" \
         aria-label=\"end-to-end quality against measured speedup\">",
        esc(&pts[0].run.whole.as_ref().map(|w| w.scenario.clone()).unwrap_or_default()),
        esc(&metric),
        if higher { "higher" } else { "lower" }
    );
    let _ = write!(
        h,
        "<rect x=\"{l}\" y=\"{t}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"none\" stroke=\"#9aa3ad\"/>\
         <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-weight=\"600\">speedup over dense (x)</text>\
         <text transform=\"translate(18 {:.1}) rotate(-90)\" text-anchor=\"middle\" font-weight=\"600\">{}</text>",
        w - l - r,
        hgt - t - b,
        (l + w - r) / 2.0,
        hgt - 10.0,
        (t + hgt - b) / 2.0,
        esc(&metric)
    );
    for i in 0..=4 {
        let xv = x0 + (x1 - x0) * f64::from(i) / 4.0;
        let yv = y0 + (y1 - y0) * f64::from(i) / 4.0;
        let _ = write!(
            h,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{xv:.2}</text>\
             <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{}</text>",
            px(xv),
            hgt - b + 16.0,
            l - 6.0,
            py(yv) + 4.0,
            short(yv)
        );
    }
    // The dense model: speedup 1 and its figure.
    let _ = write!(
        h,
        "<line x1=\"{0:.1}\" x2=\"{0:.1}\" y1=\"{t}\" y2=\"{1:.1}\" stroke=\"#9aa3ad\" stroke-dasharray=\"4 3\"/>",
        px(1.0),
        hgt - b
    );
    if let Some(d) = dense {
        let _ = write!(
            h,
            "<line x1=\"{l}\" x2=\"{:.1}\" y1=\"{1:.1}\" y2=\"{1:.1}\" stroke=\"#9aa3ad\" stroke-dasharray=\"4 3\"/>",
            w - r,
            py(d)
        );
    }
    let mut line: Vec<&Point> = front.iter().map(|&i| &pts[i]).collect();
    line.sort_by(|a, b| a.x.total_cmp(&b.x));
    if line.len() > 1 {
        let d: Vec<String> =
            line.iter().map(|p| format!("{:.1},{:.1}", px(p.x), py(p.y))).collect();
        let _ = write!(
            h,
            "<polyline points=\"{}\" fill=\"none\" stroke=\"#444\" stroke-width=\"1.2\"/>",
            d.join(" ")
        );
    }
    for (i, p) in pts.iter().enumerate() {
        let on = front.contains(&i);
        let title = format!(
            "{} {}: {:.2}x, {} {}{}",
            p.series.label,
            target_display(&p.run.target),
            p.x,
            metric,
            short(p.y),
            if on { " (frontier)" } else { "" }
        );
        if on {
            let _ = write!(
                h,
                "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"10\" fill=\"none\" stroke=\"#222\" stroke-width=\"1.2\"/>",
                px(p.x),
                py(p.y)
            );
        }
        let attrs = format!(
            "class=\"pt{}\" data-source=\"{}\" data-run=\"{}\" data-field=\"speedup\" data-value=\"{}\" \
             data-quality=\"{}\" data-frontier=\"{on}\"",
            if on { " frontier" } else { "" },
            p.series.source,
            esc(&p.run.id),
            exact(Some(p.x)),
            exact(Some(p.y))
        );
        let r = if on { 7.0 } else { 5.0 };
        marker(
            h,
            p.series.shape,
            px(p.x),
            py(p.y),
            r,
            p.series.colour,
            p.series.filled,
            &attrs,
            Some(&title),
        );
    }
    h.push_str("</svg>");
}

/// Four significant digits.
fn short(v: f64) -> String {
    if v.abs() >= 100.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.4}")
    }
}

#[cfg(test)]
mod tests {
    use super::non_dominated;
    use crate::compare::data::testing::{comparison, run};
    use crate::compare::data::{EndToEnd, WholeLatency};
    use crate::compare::page::testing::{charts, page};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn the_chart_marks_the_frontier_runs_and_needs_both_figures() {
        let row = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let mut runs = vec![
            run(Method::Obs, row(0.5), 0.01, Some(1.5), 2),
            run(Method::Obs, row(0.7), 0.02, Some(1.5), 2),
            run(Method::Magnitude, row(0.7), 0.05, Some(1.5), 2),
        ];
        let h = page(comparison(2, runs.clone()), None);
        assert!(!charts(&h).contains(&"frontier"), "no timings: no chart");
        // obs 0.5: 1.2x, 0.99; obs 0.7: 1.8x, 0.97; magnitude 0.7: 1.7x, 0.90
        // (beaten by obs 0.7 on both).
        for (r, (x, y)) in runs.iter_mut().zip([(1.2, 0.99), (1.8, 0.97), (1.7, 0.90)]) {
            r.whole = Some(WholeLatency {
                scenario: "decode_batch_1".into(),
                dense_ms: 10.0 * x,
                pruned_ms: 10.0,
                speedup: x,
            });
            r.end_to_end = Some(EndToEnd {
                metric: "mean cosine".into(),
                value: y,
                dense: Some(1.0),
                higher_is_better: true,
                details: serde_json::Value::Null,
            });
        }
        let h = page(comparison(2, runs), None);
        assert!(charts(&h).contains(&"frontier"));
        let flags: Vec<&str> =
            h.split("data-frontier=\"").skip(1).map(|s| &s[..s.find('"').unwrap()]).collect();
        assert_eq!(flags, ["true", "true", "false"]);
    }

    #[test]
    fn frontier_keeps_points_no_other_beats_on_both_axes() {
        // Worked by hand: (1.2, 0.99) and (2.0, 0.95) and (3.0, 0.80) trade
        // off; (1.5, 0.90) is beaten by (2.0, 0.95) on both axes.
        let pts = [(1.2, 0.99), (1.5, 0.90), (2.0, 0.95), (3.0, 0.80)];
        assert_eq!(non_dominated(&pts, true), vec![0, 2, 3]);
        // Lower is better (perplexity): (3.0, 0.80) is fastest and lowest,
        // so it beats every other point.
        assert_eq!(non_dominated(&pts, false), vec![3]);
        // Perplexities 5, 6, 7 at 1.0x, 2.0x, 1.5x: the third is slower and
        // worse than the second.
        assert_eq!(non_dominated(&[(1.0, 5.0), (2.0, 6.0), (1.5, 7.0)], false), vec![0, 1]);
        // Equal points do not remove each other.
        assert_eq!(non_dominated(&[(1.0, 1.0), (1.0, 1.0)], true), vec![0, 1]);
    }
}
