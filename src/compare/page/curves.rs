//! Error against sparsity: the mean error of each run on a shared log
//! scale, unstructured targets as one line per series over sparsity in
//! percent (`data-chart="curves"`), N:M patterns as markers in a side panel
//! on the same y axis (`data-chart="patterns"`). The legend sits on the
//! curves, or on the panel when there are only patterns. Nothing is written
//! when no run has a mean error.

use super::view::{legend, Series, Target, View};
use crate::compare::data::{target_display, Run};
use crate::compare::svg::{decade_label, esc, exact, marker, sci, LinScale, LogScale};
use std::fmt::Write as _;

/// The data attributes of one plotted point: its source, run, field and
/// exact value, so a test can check the page against the JSON.
fn point_attrs(s: &Series, r: &Run, field: &str, y: f64) -> String {
    format!(
        "class=\"pt\" data-source=\"{}\" data-run=\"{}\" data-field=\"{field}\" data-value=\"{}\"",
        s.source,
        esc(&r.id),
        exact(Some(y))
    )
}

/// The plot area of a chart, in SVG units, inside its `width × height` box.
#[derive(Clone, Copy)]
struct Frame {
    left: f64,
    right: f64,
    top: f64,
    bottom: f64,
    width: f64,
    height: f64,
}

impl Frame {
    /// The plot area's border and the axis titles (y on a log scale).
    fn draw(&self, h: &mut String, xlabel: &str, ylabel: &str) {
        let Frame { left, right, top, bottom, width, height } = *self;
        let _ = write!(
            h,
            "<rect x=\"{left}\" y=\"{top}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"none\" stroke=\"#9aa3ad\"/>\
             <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-weight=\"600\">{xlabel}</text>\
             <text transform=\"translate(18 {:.1}) rotate(-90)\" text-anchor=\"middle\" font-weight=\"600\">{} (log scale)</text>",
            width - left - right,
            height - top - bottom,
            (left + width - right) / 2.0,
            height - 12.0,
            (top + height - bottom) / 2.0,
            esc(ylabel)
        );
    }
}

/// Write the section, or nothing when there is no mean error to draw.
/// Horizontal log-scale gridlines and labels on the left of a plot.
fn y_log_axis(out: &mut String, ys: &LogScale, x0: f64, x1: f64) {
    for m in ys.minors() {
        let y = ys.px(m);
        let _ = write!(
            out,
            "<line x1=\"{x0}\" x2=\"{x1}\" y1=\"{y:.1}\" y2=\"{y:.1}\" stroke=\"#f0f2f4\"/>"
        );
    }
    for e in ys.decades() {
        let y = ys.px(10f64.powi(e));
        let _ = write!(
            out,
            "<line x1=\"{x0}\" x2=\"{x1}\" y1=\"{y:.1}\" y2=\"{y:.1}\" stroke=\"#d5dae0\"/>\
             <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{}</text>",
            x0 - 8.0,
            y + 4.0,
            decade_label(e)
        );
    }
}

pub(super) fn section(h: &mut String, v: &View<'_>) {
    let metric = v.metric;
    let unstructured: Vec<&Target> = v.targets.iter().filter(|t| t.sparsity.is_some()).collect();
    let patterns: Vec<&Target> = v.targets.iter().filter(|t| t.sparsity.is_none()).collect();
    let mut values = Vec::new();
    for s in &v.series {
        for t in &v.targets {
            if let Some(x) = v.run(s, t).and_then(|r| metric.mean(r)) {
                values.push(x);
            }
        }
    }
    if values.is_empty() {
        return;
    }
    let _ = writeln!(
        h,
        "<h2>Error against sparsity</h2><p class=\"lede\">Each point is one run: the mean {} \
         relative error of its layers. Lines join a method's unstructured targets{}.</p>\
         <div class=\"charts\">",
        metric.words(),
        if patterns.is_empty() {
            ""
        } else {
            "; N:M patterns sit in the panel on the right, on the same scale"
        }
    );
    let (height, top, bottom) = (420.0, 58.0, 56.0);
    let ys = LogScale::covering(values.iter().copied(), height - bottom, top);
    let ylabel = format!("mean {} relative error", metric.words());
    let series: Vec<&Series> = v.series.iter().collect();
    if !unstructured.is_empty() {
        let width = if patterns.is_empty() { 820.0 } else { 720.0 };
        let (left, right) = (78.0, 18.0);
        let sp: Vec<f64> =
            unstructured.iter().filter_map(|t| t.sparsity).map(|s| 100.0 * s).collect();
        let (lo, hi) = (
            sp.iter().cloned().fold(f64::INFINITY, f64::min),
            sp.iter().cloned().fold(0.0, f64::max),
        );
        let (d0, d1) = (((lo - 5.0) / 10.0).floor() * 10.0, ((hi + 5.0) / 10.0).ceil() * 10.0);
        let (d0, d1) = (d0.max(0.0), d1.min(100.0).max(d0 + 10.0));
        let xs = LinScale { d0, d1, p0: left, p1: width - right };
        let _ = write!(
            h,
            "<figure><svg class=\"lopper-chart\" data-chart=\"curves\" viewBox=\"0 0 {width} {height}\" \
             width=\"{width}\" height=\"{height}\" role=\"img\" aria-label=\"{} against sparsity, per method\">",
            esc(&ylabel)
        );
        legend(h, &series, left, 20.0, width - left - right);
        y_log_axis(h, &ys, left, width - right);
        let mut tick = d0;
        while tick <= d1 + 1e-9 {
            let x = xs.px(tick);
            let _ = write!(
                h,
                "<line x1=\"{x:.1}\" x2=\"{x:.1}\" y1=\"{top}\" y2=\"{:.1}\" stroke=\"#f0f2f4\"/>\
                 <text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{tick:.0}</text>",
                height - bottom,
                height - bottom + 18.0
            );
            tick += 10.0;
        }
        let plot = Frame { left, right, top, bottom, width, height };
        plot.draw(h, "sparsity (%)", &ylabel);
        for s in &v.series {
            let pts: Vec<(f64, f64, &Run)> = unstructured
                .iter()
                .filter_map(|t| v.run(s, t))
                .filter_map(|r| Some((100.0 * r.sparsity?, metric.mean(r)?, r)))
                .collect();
            if pts.len() > 1 {
                let path: Vec<String> = pts
                    .iter()
                    .map(|(x, y, _)| format!("{:.1},{:.1}", xs.px(*x), ys.px(*y)))
                    .collect();
                let dash = s.dash_attr();
                let _ = write!(
                    h,
                    "<polyline points=\"{}\" fill=\"none\" stroke=\"{}\" stroke-width=\"2.2\" stroke-linejoin=\"round\"{dash}/>",
                    path.join(" "),
                    s.colour
                );
            }
            for (x, y, r) in pts {
                let attrs = point_attrs(s, r, metric.field(), y);
                let title =
                    format!("{} at {}: {}", s.label, target_display(&r.target), sci(Some(y)));
                marker(
                    h,
                    s.shape,
                    xs.px(x),
                    ys.px(y),
                    5.5,
                    s.colour,
                    s.filled,
                    &attrs,
                    Some(&title),
                );
            }
        }
        h.push_str("</svg></figure>\n");
    }
    if !patterns.is_empty() {
        let width = if unstructured.is_empty() { 560.0 } else { 370.0 };
        let (left, right) = (78.0, 14.0);
        let _ = write!(
            h,
            "<figure><svg class=\"lopper-chart\" data-chart=\"patterns\" viewBox=\"0 0 {width} {height}\" \
             width=\"{width}\" height=\"{height}\" role=\"img\" aria-label=\"{} for N:M patterns, per method\">",
            esc(&ylabel)
        );
        if unstructured.is_empty() {
            legend(h, &series, left, 20.0, width - left - right);
        } else {
            let _ =
                write!(h, "<text x=\"{left}\" y=\"24\" font-weight=\"600\">N:M patterns</text>");
        }
        y_log_axis(h, &ys, left, width - right);
        let band = (width - left - right) / patterns.len() as f64;
        let n = v.series.len().max(1) as f64;
        for (i, t) in patterns.iter().enumerate() {
            let cx = left + band * (i as f64 + 0.5);
            let _ = write!(
                h,
                "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{}</text>",
                height - bottom + 18.0,
                esc(&t.key)
            );
            for (k, s) in v.series.iter().enumerate() {
                let Some(r) = v.run(s, t) else { continue };
                let Some(y) = metric.mean(r) else { continue };
                let step = (band * 0.6 / n).min(16.0);
                let x = cx + (k as f64 - (n - 1.0) / 2.0) * step;
                let attrs = point_attrs(s, r, metric.field(), y);
                let title = format!("{} at {}: {}", s.label, t.key, sci(Some(y)));
                marker(h, s.shape, x, ys.px(y), 5.5, s.colour, s.filled, &attrs, Some(&title));
            }
        }
        let plot = Frame { left, right, top, bottom, width, height };
        plot.draw(h, "pattern (N kept of every M)", &ylabel);
        h.push_str("</svg></figure>\n");
    }
    h.push_str("</div>\n");
}

#[cfg(test)]
mod tests {
    use super::super::testing::{charts, sources, values};
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn each_point_carries_its_run_mean() {
        let row = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let nm = Pattern::NofM { n: 2, m: 4 };
        let runs = vec![
            run(Method::Magnitude, row(0.5), 0.04, Some(1.5), 2),
            run(Method::Magnitude, row(0.7), 0.09, Some(1.5), 2),
            run(Method::Magnitude, nm, 0.07, Some(1.5), 2),
            run(Method::L0, row(0.5), 0.01, Some(1.2), 2),
            run(Method::L0, row(0.7), 0.03, Some(1.2), 2),
            run(Method::L0, nm, 0.02, Some(1.2), 2),
        ];
        let src = sources(comparison(2, runs.clone()));
        let mut h = String::new();
        section(&mut h, &View::new(&src, None));
        assert_eq!(charts(&h), ["curves", "patterns"]);
        // Curves series by series, then the panel target by target.
        let mean = |i: usize| runs[i].summary.mean_rel_error_holdout;
        let want: Vec<Option<f64>> = [0, 1, 3, 4, 2, 5].into_iter().map(mean).collect();
        assert_eq!(values(&h, "mean_rel_error_holdout"), want);
        assert_eq!(h.matches("<polyline").count(), 2, "one line per series");
    }

    #[test]
    fn nothing_without_a_solved_layer() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let src = sources(comparison(2, vec![run(Method::Obs, row, 0.1, Some(1.0), 0)]));
        let mut h = String::new();
        section(&mut h, &View::new(&src, None));
        assert_eq!(h, "");
    }
}
