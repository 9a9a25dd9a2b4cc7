//! The comparison page: one self-contained HTML file (inline CSS and SVG,
//! one tiny inline script, no network, no fonts) drawn from one or more
//! [`Source`]s.
//!
//! Sections, top to bottom: title and provenance, the validation caution,
//! the summary table (target × method), error against sparsity (one line per
//! series, with N:M patterns in a side panel on the same y axis), errors per
//! layer at the focus target, notes (calibration, settings, sources, how to
//! read), and every figure in a collapsed table.
//!
//! A *series* is one method from one source; it keeps the method's colour
//! and marker (Okabe & Ito 2008 palette, so colour-blind readers can tell
//! them apart, and a distinct marker shape so print and greyscale still
//! work). Series from a second or third source differ by dash and hollow
//! markers.
//!
//! Every figure drawn or printed carries its exact value in `data-value`
//! (with `data-source`, `data-run`, `data-field` and, per layer,
//! `data-layer`), so a test can check the page against the JSON. Charts are
//! `<svg class="lopper-chart" data-chart="…">`; after layout, the inline
//! script records how many have a non-empty box in `body[data-rendered-charts]`.

mod curves;
mod header;
mod summary;
mod view;

use super::data::{Run, Source, INPUTS_SHARED};
use super::svg::{decade_label, esc, exact, marker, sci, LogScale};
use std::fmt::Write as _;
use view::{legend, percent_2, swatch, Metric, Series, View};

/// The target keys present in `sources` (for validating `--focus`).
pub fn targets_of(sources: &[Source]) -> Vec<String> {
    let mut v: Vec<String> = Vec::new();
    for s in sources {
        for r in &s.comparison.runs {
            if !v.contains(&r.target) {
                v.push(r.target.clone());
            }
        }
    }
    v
}

/// The page's stylesheet, inlined into `<style>` (after a newline).
const STYLE: &str = include_str!("style.css");

/// Render the page for `sources` (already checked compatible), with the
/// per-layer chart at `focus` (a target key) or at the default target.
pub fn render(sources: &[Source], focus: Option<&str>) -> String {
    let v = View::new(sources, focus);
    let mut h = String::with_capacity(64 << 10);
    let title = sources
        .first()
        .map(|s| super::data::display_name(&s.comparison.model))
        .unwrap_or_else(|| "lopper".to_string());
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">\
         <title>{} · lopper comparison</title><style>\n{STYLE}</style></head>\n<body>\n<main>\n",
        esc(&title)
    );
    header::section(&mut h, &v, &title);
    summary::section(&mut h, &v);
    curves::section(&mut h, &v);
    per_layer(&mut h, &v);
    notes(&mut h, &v);
    all_figures(&mut h, &v);
    h.push_str(
        "</main>\n<script>addEventListener('load',function(){var n=0;\
         document.querySelectorAll('svg.lopper-chart').forEach(function(s){\
         var r=s.getBoundingClientRect();if(r.width>0&&r.height>0)n++});\
         var b=document.body;b.setAttribute('data-rendered-charts',String(n));\
         b.setAttribute('data-page-height',String(document.documentElement.scrollHeight))});\
         </script>\n\
         </body></html>\n",
    );
    h
}

fn per_layer(h: &mut String, v: &View<'_>) {
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
}

fn notes(h: &mut String, v: &View<'_>) {
    h.push_str("<h2>Notes</h2><dl class=\"notes\">");
    let mut sources_table = None;
    let dd = |h: &mut String, k: &str, val: String| {
        let _ = write!(h, "<dt>{}</dt><dd>{val}</dd>", esc(k));
    };
    let first = &v.sources[0].comparison;
    dd(h, "model", format!("<code>{}</code>", esc(&first.model)));
    let weights: usize = first.layers.iter().map(|l| l.shape[0] * l.shape[1]).sum();
    dd(
        h,
        "layers",
        format!("{} linear layers, {} weights", first.layers.len(), fmt_count(weights)),
    );
    if v.sources.len() == 1 {
        let c = first;
        dd(h, "calibration", esc(&c.calibration.description));
        let mut kinds: Vec<String> = Vec::new();
        for r in &c.runs {
            if !kinds.contains(&r.calibration_inputs) {
                kinds.push(r.calibration_inputs.clone());
            }
        }
        let inputs = if kinds.len() == 1 && kinds[0] == INPUTS_SHARED {
            "shared: every run was solved on the same Gram matrices, built once per layer".into()
        } else {
            c.runs
                .iter()
                .map(|r| format!("{} {}", esc(&r.id), esc(&r.calibration_inputs)))
                .collect::<Vec<_>>()
                .join(", ")
        };
        dd(h, "calibration inputs", inputs);
        let s = &c.settings;
        let ridge = match &s.ridge {
            serde_json::Value::String(r) => r.clone(),
            other => other.to_string(),
        };
        let mut set = format!(
            "scope {} · ridge {} · held-out fraction {} · local search up to {} sweeps{} · {} threads",
            esc(&s.scope),
            esc(&ridge),
            c.calibration.holdout,
            s.max_sweeps,
            s.layer_seconds.map(|t| format!(" and {t} s per layer")).unwrap_or_default(),
            s.threads
        );
        if !s.only.is_empty() {
            let _ = write!(set, " · only {}", esc(&s.only.join(", ")));
        }
        if !s.skip.is_empty() {
            let _ = write!(set, " · skip {}", esc(&s.skip.join(", ")));
        }
        dd(h, "settings", set);
        dd(h, "tool", format!("lopper {} · started {}", esc(&c.tool_version), esc(&c.created)));
        if let Some(e) = &s.eval_text {
            dd(h, "evaluation text", format!("<code>{}</code>", esc(e)));
        }
    } else {
        let mut t = String::from(
            "<table class=\"sources\" data-table=\"sources\"><tr><th>report</th><th>file</th><th>date</th><th>lopper</th>\
             <th>calibration</th><th>ridge</th><th>runs</th></tr>",
        );
        for s in v.sources {
            let c = &s.comparison;
            let ridge = match &c.settings.ridge {
                serde_json::Value::String(r) => r.clone(),
                other => other.to_string(),
            };
            let ids: Vec<&str> = c.runs.iter().map(|r| r.id.as_str()).collect();
            let _ = write!(
                t,
                "<tr><td>{}</td><td><code>{}</code></td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                esc(&s.label),
                esc(s.path.as_deref().unwrap_or("")),
                esc(&c.created),
                esc(&c.tool_version),
                esc(&c.calibration.description),
                esc(&ridge),
                esc(&ids.join(", "))
            );
        }
        t.push_str("</table>");
        dd(h, "sources", format!("{} reports, listed below", v.sources.len()));
        sources_table = Some(t);
    }
    dd(
        h,
        "how to read",
        "relative error of a layer = ‖XWᵀ − XŴᵀ‖² / ‖XWᵀ‖² over its calibration inputs X, \
         dense W against pruned Ŵ; <em>held-out</em> rows were never shown to the solvers, so a \
         gap between calibration and held-out error is overfitting. Means are over layers."
            .into(),
    );
    h.push_str("</dl>\n");
    if let Some(t) = sources_table {
        h.push_str(&t);
    }
}

/// `22,713,216`.
fn fmt_count(n: usize) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(c);
    }
    out
}

fn all_figures(h: &mut String, v: &View<'_>) {
    h.push_str(
        "<details><summary>Every figure, per run and layer</summary>\
         <table class=\"all\" data-table=\"layers\"><thead><tr><th>run</th><th>layer</th>\
         <th>zeros</th><th>calibration error</th><th>held-out error</th><th>ridge α</th>\
         <th>sweeps</th><th>swaps</th><th>solve s</th></tr></thead><tbody>\n",
    );
    for (si, s) in v.sources.iter().enumerate() {
        for r in &s.comparison.runs {
            let name =
                if v.sources.len() > 1 { format!("{} · {}", s.label, r.id) } else { r.id.clone() };
            for l in &r.layers {
                let cell = |field: &str, val: f64, text: String| {
                    format!(
                        "<td class=\"n\" data-field=\"{field}\" data-value=\"{}\">{text}</td>",
                        exact(Some(val))
                    )
                };
                let _ = write!(
                    h,
                    "<tr data-source=\"{si}\" data-run=\"{}\" data-layer=\"{}\"><td>{}</td><td><code>{}</code></td>",
                    esc(&r.id),
                    esc(&l.name),
                    esc(&name),
                    esc(&l.name)
                );
                h.push_str(&cell("sparsity", l.sparsity, format!("{}%", percent_2(l.sparsity))));
                h.push_str(&cell("rel_error", l.rel_error, sci(Some(l.rel_error))));
                let _ = write!(
                    h,
                    "<td class=\"n\" data-field=\"rel_error_holdout\" data-value=\"{}\">{}</td>",
                    exact(l.rel_error_holdout),
                    sci(l.rel_error_holdout)
                );
                h.push_str(&cell("ridge_alpha", l.ridge_alpha, format!("{}", l.ridge_alpha)));
                h.push_str(&cell("sweeps", l.sweeps as f64, l.sweeps.to_string()));
                h.push_str(&cell("swaps", l.swaps as f64, l.swaps.to_string()));
                h.push_str(&cell("seconds", l.seconds, format!("{:.3}", l.seconds)));
                h.push_str("</tr>\n");
            }
        }
    }
    h.push_str("</tbody></table></details>\n");
}

/// Pages, views and attribute readers for the section tests.
#[cfg(test)]
mod testing {
    use super::*;
    use crate::compare::data::Comparison;

    /// `c` as the only source, labelled `x`.
    pub(super) fn sources(c: Comparison) -> Vec<Source> {
        vec![Source { label: "x".into(), path: None, comparison: c }]
    }

    /// The whole page for one comparison.
    pub(super) fn page(c: Comparison, focus: Option<&str>) -> String {
        render(&sources(c), focus)
    }

    /// The `data-chart` names, in page order.
    pub(super) fn charts(html: &str) -> Vec<&str> {
        html.split("data-chart=\"").skip(1).map(|s| &s[..s.find('"').unwrap()]).collect()
    }

    /// The `data-value`s next to `data-field="field"`, in page order
    /// (`None` for an empty value).
    pub(super) fn values(html: &str, field: &str) -> Vec<Option<f64>> {
        let key = format!("data-field=\"{field}\" data-value=\"");
        html.split(key.as_str())
            .skip(1)
            .map(|s| {
                let v = &s[..s.find('"').unwrap()];
                (!v.is_empty()).then(|| v.parse().unwrap())
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::testing::{charts, page};
    use crate::compare::data::testing::{comparison, run};
    use crate::compare::data::Status;
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn chart_set_follows_the_targets() {
        let row = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let nm = Pattern::NofM { n: 2, m: 4 };
        // Sparsities and a pattern: curves, the pattern panel, per layer at 70%.
        let c = comparison(
            2,
            vec![
                run(Method::Obs, row(0.5), 0.01, Some(1.5), 2),
                run(Method::Obs, row(0.7), 0.02, Some(1.5), 2),
                run(Method::Obs, nm, 0.015, Some(1.5), 2),
            ],
        );
        let h = page(c.clone(), None);
        assert_eq!(charts(&h), ["curves", "patterns", "layers"]);
        assert!(h.contains("data-target=\"0.7\"") && h.contains("Per layer at 70%"));
        assert!(!h.contains("data-target=\"2:4\""));
        let h = page(c, Some("2:4"));
        assert!(h.contains("data-chart=\"layers\" data-target=\"2:4\""));
        // Patterns only: no curves, the panel carries the legend.
        let h = page(comparison(2, vec![run(Method::L0, nm, 0.01, Some(1.5), 2)]), None);
        assert_eq!(charts(&h), ["patterns", "layers"]);
        assert!(h.contains("legend-item"));
    }

    #[test]
    fn a_set_stopped_before_any_solve_still_renders() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let mut c = comparison(3, vec![run(Method::L0, row, 0.1, Some(1.0), 0)]);
        c.status = Status::Interrupted;
        let h = page(c, None);
        assert!(h.contains("incomplete — interrupted"));
        assert!(charts(&h).is_empty(), "no figures, no charts");
        assert!(h.contains("(0 of 3 layers)") && h.ends_with("</html>\n"));
    }

    #[test]
    fn text_is_escaped() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let mut c = comparison(1, vec![run(Method::Obs, row, 0.1, Some(1.0), 1)]);
        c.model = "<script>x</script>&.safetensors".into();
        let h = page(c, None);
        assert!(!h.contains("<script>x") && h.contains("&lt;script&gt;x"));
    }

    #[test]
    fn the_stylesheet_is_inlined_whole() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let h = page(comparison(1, vec![run(Method::Obs, row, 0.1, Some(1.0), 1)]), None);
        assert!(h.contains(&format!("<style>\n{}</style>", super::STYLE)));
        assert!(super::STYLE.starts_with(":root{") && super::STYLE.ends_with("}\n"));
    }
}
