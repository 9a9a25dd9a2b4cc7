//! The comparison page: one self-contained HTML file (inline CSS and SVG,
//! one tiny inline script, no network, no fonts) drawn from one or more
//! [`Source`]s. Entry points: [`render`], and [`targets_of`] to check a
//! `--focus` before rendering.
//!
//! Sections, top to bottom, one module each: title and provenance, and the
//! validation caution (`header`); the summary table, target × method
//! (`summary`); error against sparsity, one line per series with N:M
//! patterns in a side panel on the same y axis (`curves`); end-to-end
//! quality against measured whole-model speedup, when timed (`frontier`);
//! errors per layer
//! at the focus target (`per_layer`); notes on calibration, settings,
//! sources and how to read (`notes`); and every figure in a collapsed table
//! (`all_figures`). Each section reads the `View` built once here (series
//! and their styles, targets, the metric the page leads with, the focus
//! target; module `view`) and appends to one string, so the same sources
//! give the same bytes. The stylesheet is `style.css`, inlined. SVG scales,
//! markers and number formats come from `compare::svg`, which the terminal
//! tables share.
//!
//! Every figure drawn or printed carries its exact value in `data-value`
//! (with `data-source`, `data-run`, `data-field` and, per layer,
//! `data-layer`), so a test can check the page against the JSON. Charts are
//! `<svg class="lopper-chart" data-chart="…">`; after layout, the inline
//! script records how many have a non-empty box in `body[data-rendered-charts]`.

mod all_figures;
mod curves;
mod frontier;
mod header;
mod notes;
mod per_layer;
mod summary;
mod view;

use super::data::Source;
use super::svg::esc;
use std::fmt::Write as _;
use view::View;

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
    frontier::section(&mut h, &v);
    per_layer::section(&mut h, &v);
    notes::section(&mut h, &v);
    all_figures::section(&mut h, &v);
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
