//! Errors per layer at the focus target (`data-chart="layers"`): one row
//! per layer in pruning order, one marker per series on a log scale, a
//! range line joining a layer's markers, then the three layers that lose
//! the most for each series. Nothing is written without a focus target,
//! runs at it, or any layer error.

use super::view::{legend, swatch, Metric, Series, View};
use crate::compare::data::Run;
use crate::compare::svg::{decade_label, esc, exact, marker, sci, LogScale};
use std::fmt::Write as _;

/// Write the section, or nothing when there is nothing to draw.
pub(super) fn section(h: &mut String, v: &View<'_>) {
    let Some(t) = &v.focus else { return };
    let metric = v.metric;
    let runs: Vec<(&Series, &Run)> =
        v.series.iter().filter_map(|s| v.run(s, t).map(|r| (s, r))).collect();
    let layers = &v.sources[0].comparison.layers;
    if runs.is_empty() || layers.is_empty() {
        return;
    }
    let values: Vec<f64> =
        runs.iter().flat_map(|(_, r)| r.layers.iter().filter_map(|l| metric.layer(l))).collect();
    if values.is_empty() {
        return;
    }
    let _ = writeln!(
        h,
        "<h2>Per layer at {}</h2><p class=\"lede\">The {} relative error of every layer, one \
         marker per method; layers further right lose more of their output. Rows are in \
         pruning order (sorted by tensor name).</p>",
        esc(&t.label()),
        metric.words()
    );
    let longest = layers.iter().map(|l| l.name.chars().count()).max().unwrap_or(10) as f64;
    let left = (longest * 6.4 + 20.0).clamp(120.0, 420.0);
    // Taller rows when there are few layers, denser when there are many.
    let row = match layers.len() {
        0..=8 => 28.0,
        9..=48 => 18.0,
        _ => 15.0,
    };
    let (width, right, top) = (1120.0, 24.0, 58.0);
    let height = top + row * layers.len() as f64 + 54.0;
    let xs = LogScale::covering(values.iter().copied(), left, width - right);
    let bottom = top + row * layers.len() as f64;
    let _ = write!(
        h,
        "<figure><svg class=\"lopper-chart\" data-chart=\"layers\" data-target=\"{}\" \
         viewBox=\"0 0 {width} {height:.0}\" width=\"{width}\" height=\"{height:.0}\" role=\"img\" \
         aria-label=\"{} relative error per layer at {}\">",
        esc(&t.key),
        metric.words(),
        esc(&t.label())
    );
    let series: Vec<&Series> = runs.iter().map(|(s, _)| *s).collect();
    legend(h, &series, left, 20.0, width - left - right);
    for (i, l) in layers.iter().enumerate() {
        let y = top + row * i as f64;
        if i % 2 == 0 {
            let _ = write!(
                h,
                "<rect x=\"0\" y=\"{y:.1}\" width=\"{:.1}\" height=\"{row}\" fill=\"#f6f8fa\"/>",
                width - right
            );
        }
        let _ = write!(
            h,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\" font-size=\"11\">{}</text>",
            left - 8.0,
            y + row / 2.0 + 4.0,
            esc(&l.name)
        );
    }
    for m in xs.minors() {
        let x = xs.px(m);
        let _ = write!(h, "<line x1=\"{x:.1}\" x2=\"{x:.1}\" y1=\"{top}\" y2=\"{bottom:.1}\" stroke=\"#eceff2\"/>");
    }
    for e in xs.decades() {
        let x = xs.px(10f64.powi(e));
        let _ = write!(
            h,
            "<line x1=\"{x:.1}\" x2=\"{x:.1}\" y1=\"{top}\" y2=\"{bottom:.1}\" stroke=\"#c9d0d7\"/>\
             <text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{}</text>",
            bottom + 18.0,
            decade_label(e)
        );
    }
    let _ = write!(
        h,
        "<rect x=\"{left}\" y=\"{top}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"none\" stroke=\"#9aa3ad\"/>\
         <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-weight=\"600\">{} relative error of the layer (log scale)</text>",
        width - left - right,
        bottom - top,
        (left + width - right) / 2.0,
        bottom + 42.0,
        metric.words()
    );
    // Range line per layer, then markers.
    for (i, l) in layers.iter().enumerate() {
        let y = top + row * i as f64 + row / 2.0;
        let xs_row: Vec<f64> = runs
            .iter()
            .filter_map(|(_, r)| r.layers.iter().find(|q| q.name == l.name))
            .filter_map(|q| metric.layer(q))
            .map(|e| xs.px(e))
            .collect();
        if xs_row.len() > 1 {
            let (a, b) = (
                xs_row.iter().cloned().fold(f64::INFINITY, f64::min),
                xs_row.iter().cloned().fold(f64::NEG_INFINITY, f64::max),
            );
            let _ = write!(h, "<line x1=\"{a:.1}\" x2=\"{b:.1}\" y1=\"{y:.1}\" y2=\"{y:.1}\" stroke=\"#aab2bb\" stroke-width=\"1.2\"/>");
        }
    }
    for (s, r) in &runs {
        for (i, l) in layers.iter().enumerate() {
            let Some(q) = r.layers.iter().find(|q| q.name == l.name) else { continue };
            let Some(e) = metric.layer(q) else { continue };
            let y = top + row * i as f64 + row / 2.0;
            let attrs = format!(
                "class=\"pt\" data-source=\"{}\" data-run=\"{}\" data-layer=\"{}\" data-field=\"{}\" data-value=\"{}\"",
                s.source,
                esc(&r.id),
                esc(&l.name),
                match metric {
                    Metric::Holdout => "rel_error_holdout",
                    Metric::Calibration => "rel_error",
                },
                exact(Some(e))
            );
            let title = format!("{} · {}: {}", s.label, l.name, sci(Some(e)));
            marker(h, s.shape, xs.px(e), y, 4.6, s.colour, s.filled, &attrs, Some(&title));
        }
    }
    h.push_str("</svg>");
    // The layers that suffer most, per series.
    h.push_str(
        "<figcaption>Layers that lose the most, per method:</figcaption><ul class=\"worst\">",
    );
    for (s, r) in &runs {
        let mut ls: Vec<(&str, f64)> =
            r.layers.iter().filter_map(|q| metric.layer(q).map(|e| (q.name.as_str(), e))).collect();
        ls.sort_by(|a, b| b.1.total_cmp(&a.1));
        let top: Vec<String> = ls
            .iter()
            .take(3)
            .map(|(n, e)| format!("<code>{}</code> {}", esc(n), sci(Some(*e))))
            .collect();
        let _ = write!(
            h,
            "<li>{}<strong>{}</strong>: {}</li>",
            swatch(s),
            esc(&s.label),
            top.join(", ")
        );
    }
    h.push_str("</ul></figure>\n");
    certified(h, &runs);
}

/// The certified gaps of runs pruned with `--certify`: per series, the
/// median and worst over layers and the layer of the worst. Nothing when no
/// run carries a certificate.
fn certified(h: &mut String, runs: &[(&Series, &Run)]) {
    let rows: Vec<(&Series, Vec<(&str, f64)>)> = runs
        .iter()
        .map(|(s, r)| {
            let gaps = r
                .layers
                .iter()
                .filter_map(|l| l.certificate.as_ref().map(|c| (l.name.as_str(), c.certified_gap)))
                .collect();
            (*s, gaps)
        })
        .filter(|(_, g): &(&Series, Vec<_>)| !g.is_empty())
        .collect();
    if rows.is_empty() {
        return;
    }
    h.push_str(
        "<p class=\"lede\">Certified gap: a proven lower bound on the best objective any mask \
         of the pattern could reach, per layer; no mask can lower the layer's objective by more \
         than this fraction. A small gap says more search will not help that layer; a large one \
         says the bound cannot tell.</p><ul class=\"worst\" data-chart=\"certified\">",
    );
    for (s, mut gaps) in rows {
        gaps.sort_by(|a, b| a.1.total_cmp(&b.1));
        let mid = gaps.len() / 2;
        let median =
            if gaps.len() % 2 == 1 { gaps[mid].1 } else { 0.5 * (gaps[mid - 1].1 + gaps[mid].1) };
        let (worst_name, worst) = gaps[gaps.len() - 1];
        let _ = write!(
            h,
            "<li data-median=\"{}\" data-worst=\"{}\">{}<strong>{}</strong>: median {:.3}%, \
             worst {:.3}% (<code>{}</code>) over {} layers</li>",
            exact(Some(median)),
            exact(Some(worst)),
            swatch(s),
            esc(&s.label),
            100.0 * median,
            100.0 * worst,
            esc(worst_name),
            gaps.len()
        );
    }
    h.push_str("</ul>\n");
}

#[cfg(test)]
mod tests {
    use super::super::testing::{charts, sources, values};
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn markers_carry_each_layer_error_at_the_focus() {
        let row = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let mut runs = vec![
            run(Method::Obs, row(0.5), 0.1, Some(1.0), 3),
            run(Method::Obs, row(0.7), 0.1, Some(1.0), 3),
            run(Method::L0, row(0.7), 0.1, Some(1.0), 3),
        ];
        for (k, r) in runs.iter_mut().enumerate() {
            for (i, l) in r.layers.iter_mut().enumerate() {
                l.rel_error_holdout = Some(0.01 * (1 + i + 3 * k) as f64);
            }
        }
        let src = sources(comparison(3, runs.clone()));
        let mut h = String::new();
        section(&mut h, &View::new(&src, Some("0.7")));
        assert_eq!(charts(&h), ["layers"]);
        let want: Vec<Option<f64>> =
            runs[1..].iter().flat_map(|r| r.layers.iter().map(|l| l.rel_error_holdout)).collect();
        assert_eq!(values(&h, "rel_error_holdout"), want);
        assert_eq!(h.matches("data-layer=\"l2\"").count(), 2);
        // The worst layer leads each series' list.
        assert!(h.contains("<strong>l0</strong>: <code>l2</code> 9.00e-2"), "{h}");
    }

    #[test]
    fn certified_gaps_are_summarised_per_series() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let mut r = run(Method::L0, row, 0.1, Some(1.0), 3);
        for (i, l) in r.layers.iter_mut().enumerate() {
            l.certificate = Some(crate::report::Certified {
                lower_bound: 1.0,
                certified_gap: [0.02, 0.5, 0.1][i],
                rows_proven_optimal: Some(0.25),
                bound_seconds: 0.1,
            });
        }
        let plain = run(Method::Obs, row, 0.1, Some(1.0), 3);
        let src = sources(comparison(3, vec![r, plain]));
        let mut h = String::new();
        section(&mut h, &View::new(&src, Some("0.5")));
        // Gaps 0.02, 0.1, 0.5: median 0.1, worst 0.5 on the second layer;
        // the run without certificates gets no line.
        assert!(h.contains("median 10.000%, worst 50.000% (<code>l1</code>) over 3 layers"), "{h}");
        assert_eq!(h.matches("data-median=").count(), 1);
        let mut h2 = String::new();
        let plain = run(Method::Obs, row, 0.1, Some(1.0), 3);
        section(&mut h2, &View::new(&sources(comparison(3, vec![plain])), Some("0.5")));
        assert!(!h2.contains("Certified gap"));
    }

    #[test]
    fn nothing_without_runs_at_the_focus() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let src = sources(comparison(2, vec![run(Method::Obs, row, 0.1, Some(1.0), 0)]));
        let mut h = String::new();
        section(&mut h, &View::new(&src, None));
        assert_eq!(h, "");
    }
}
