//! What every section of the comparison page shares: the [`View`] built once
//! from the sources (series, targets, the metric the page leads with, the
//! focus target), and the small drawing helpers more than one section uses
//! (series swatch, chart legend, sparsity in percent).
//!
//! A *series* is one method from one source; it keeps the method's colour
//! and marker (Okabe & Ito 2008 palette, so colour-blind readers can tell
//! them apart, and a distinct marker shape so print and greyscale still
//! work). Series from a second or third source differ by dash and hollow
//! markers. Methods the page does not know take the rest of the palette.
//!
//! The page leads with held-out error when every run that solved a layer
//! has held-out rows, else with calibration error. Targets are ordered
//! unstructured by sparsity, then N:M patterns in order of appearance.

use crate::compare::data::{target_display, Run, Source};
use crate::compare::svg::{esc, marker, Shape};
use std::collections::BTreeSet;
use std::fmt::Write as _;

/// Colour and marker of a known method (Okabe–Ito colours).
fn method_style(method: &str) -> Option<(&'static str, Shape)> {
    match method {
        "magnitude" => Some(("#D55E00", Shape::Square)),
        "scaled" => Some(("#E69F00", Shape::Triangle)),
        "obs" => Some(("#009E73", Shape::Diamond)),
        "l0" => Some(("#0072B2", Shape::Circle)),
        _ => None,
    }
}

/// Styles for methods this page does not know (rest of the palette).
const EXTRA: [(&str, Shape); 3] =
    [("#CC79A7", Shape::TriangleDown), ("#56B4E9", Shape::Circle), ("#000000", Shape::Square)];

/// Dash patterns by source index.
const DASHES: [&str; 4] = ["", "7 4", "2 3", "9 3 2 3"];

/// One method from one source.
pub(super) struct Series {
    /// Index of the source in [`View::sources`].
    pub(super) source: usize,
    pub(super) method: String,
    /// The method, with the source's label when another source has it too.
    pub(super) label: String,
    pub(super) colour: &'static str,
    pub(super) shape: Shape,
    /// Filled markers for the first source, hollow for the others.
    pub(super) filled: bool,
    /// SVG `stroke-dasharray` by source; empty for a solid line.
    pub(super) dash: &'static str,
}

/// Which error the charts and the summary lead with.
#[derive(Clone, Copy, PartialEq)]
pub(super) enum Metric {
    Holdout,
    Calibration,
}

impl Metric {
    pub(super) fn field(self) -> &'static str {
        match self {
            Metric::Holdout => "mean_rel_error_holdout",
            Metric::Calibration => "mean_rel_error",
        }
    }
    pub(super) fn words(self) -> &'static str {
        match self {
            Metric::Holdout => "held-out",
            Metric::Calibration => "calibration",
        }
    }
    pub(super) fn mean(self, r: &Run) -> Option<f64> {
        match self {
            Metric::Holdout => r.summary.mean_rel_error_holdout,
            Metric::Calibration => Some(r.summary.mean_rel_error),
        }
        .filter(|_| !r.layers.is_empty())
    }
    pub(super) fn layer(self, l: &crate::report::LayerReport) -> Option<f64> {
        match self {
            Metric::Holdout => l.rel_error_holdout,
            Metric::Calibration => Some(l.rel_error),
        }
    }
}

/// A target column: key, scope, and how it reads.
#[derive(Clone, Debug, PartialEq)]
pub(super) struct Target {
    pub(super) key: String,
    pub(super) scope: String,
    pub(super) sparsity: Option<f64>,
}

impl Target {
    fn of(r: &Run) -> Self {
        Target { key: r.target.clone(), scope: r.scope.clone(), sparsity: r.sparsity }
    }
    pub(super) fn label(&self) -> String {
        let base = target_display(&self.key);
        if self.scope == "layer" {
            format!("{base} per layer")
        } else {
            base
        }
    }
    fn matches(&self, r: &Run) -> bool {
        r.target == self.key && r.scope == self.scope
    }
}

/// Everything the sections share.
pub(super) struct View<'a> {
    pub(super) sources: &'a [Source],
    /// Source by source, methods in order of first appearance.
    pub(super) series: Vec<Series>,
    /// Unstructured by sparsity, then patterns in order of appearance.
    pub(super) targets: Vec<Target>,
    /// The error the page leads with.
    pub(super) metric: Metric,
    /// Target of the per-layer chart: `--focus`, else the highest
    /// sparsity, else the first pattern.
    pub(super) focus: Option<Target>,
}

impl<'a> View<'a> {
    pub(super) fn new(sources: &'a [Source], focus: Option<&str>) -> Self {
        let mut series = Vec::new();
        let mut extra = 0;
        let mut seen = BTreeSet::new();
        for (si, s) in sources.iter().enumerate() {
            for r in &s.comparison.runs {
                if !seen.insert((si, r.method.clone())) {
                    continue;
                }
                let (colour, shape) = method_style(&r.method).unwrap_or_else(|| {
                    extra += 1;
                    EXTRA[(extra - 1) % EXTRA.len()]
                });
                let shared = sources.iter().enumerate().any(|(j, o)| {
                    j != si && o.comparison.runs.iter().any(|q| q.method == r.method)
                });
                let label =
                    if shared { format!("{} · {}", r.method, s.label) } else { r.method.clone() };
                series.push(Series {
                    source: si,
                    method: r.method.clone(),
                    label,
                    colour,
                    shape,
                    filled: si == 0,
                    dash: DASHES[si % DASHES.len()],
                });
            }
        }
        let mut targets: Vec<Target> = Vec::new();
        for s in sources {
            for r in &s.comparison.runs {
                let t = Target::of(r);
                if !targets.contains(&t) {
                    targets.push(t);
                }
            }
        }
        // Unstructured by sparsity, then patterns in order of appearance.
        targets.sort_by(|a, b| match (a.sparsity, b.sparsity) {
            (Some(x), Some(y)) => x.total_cmp(&y).then(a.scope.cmp(&b.scope)),
            (Some(_), None) => std::cmp::Ordering::Less,
            (None, Some(_)) => std::cmp::Ordering::Greater,
            (None, None) => std::cmp::Ordering::Equal,
        });
        let all_held = sources
            .iter()
            .flat_map(|s| &s.comparison.runs)
            .all(|r| r.layers.is_empty() || r.summary.mean_rel_error_holdout.is_some());
        let metric = if all_held { Metric::Holdout } else { Metric::Calibration };
        let focus = focus
            .and_then(|k| targets.iter().find(|t| t.key == k).cloned())
            .or_else(|| targets.iter().rev().find(|t| t.sparsity.is_some()).cloned())
            .or_else(|| targets.first().cloned());
        View { sources, series, targets, metric, focus }
    }

    pub(super) fn run(&self, s: &Series, t: &Target) -> Option<&'a Run> {
        self.sources[s.source].comparison.runs.iter().find(|r| r.method == s.method && t.matches(r))
    }

    pub(super) fn layer_count(&self) -> usize {
        self.sources.first().map(|s| s.comparison.layers.len()).unwrap_or(0)
    }
}

impl Series {
    /// ` stroke-dasharray="…"` for a dashed series; empty for a solid one.
    pub(super) fn dash_attr(&self) -> String {
        if self.dash.is_empty() {
            String::new()
        } else {
            format!(" stroke-dasharray=\"{}\"", self.dash)
        }
    }
}

/// `n` with commas between groups of three digits (`1234567` → `1,234,567`).
pub(super) fn thousands(digits: &str) -> String {
    let mut out = String::new();
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(c);
    }
    out
}

pub(super) fn swatch(s: &Series) -> String {
    let mut m = String::new();
    let dash = s.dash_attr();
    let _ = write!(
        m,
        "<svg class=\"swatch\" width=\"30\" height=\"14\" aria-hidden=\"true\">\
         <line x1=\"1\" y1=\"7\" x2=\"29\" y2=\"7\" stroke=\"{}\" stroke-width=\"2\"{dash}/>",
        s.colour
    );
    marker(&mut m, s.shape, 15.0, 7.0, 4.5, s.colour, s.filled, "", None);
    m.push_str("</svg>");
    m
}

/// Legend row across the top of a chart.
pub(super) fn legend(out: &mut String, series: &[&Series], x0: f64, y: f64, width: f64) {
    let mut x = x0;
    let mut y = y;
    for s in series {
        let w = 44.0 + 7.2 * s.label.chars().count() as f64;
        if x + w > x0 + width && x > x0 {
            x = x0;
            y += 18.0;
        }
        let dash = s.dash_attr();
        let _ = write!(
            out,
            "<g class=\"legend-item\"><line x1=\"{x:.1}\" y1=\"{y:.1}\" x2=\"{:.1}\" y2=\"{y:.1}\" \
             stroke=\"{}\" stroke-width=\"2\"{dash}/>",
            x + 26.0,
            s.colour
        );
        marker(out, s.shape, x + 13.0, y, 4.5, s.colour, s.filled, "", None);
        let _ = write!(
            out,
            "<text x=\"{:.1}\" y=\"{:.1}\">{}</text></g>",
            x + 32.0,
            y + 4.0,
            esc(&s.label)
        );
        x += w;
    }
}

/// Achieved sparsity in percent with two decimals.
pub(super) fn percent_2(z: f64) -> String {
    format!("{:.2}", 100.0 * z)
}

#[cfg(test)]
mod tests {
    use super::super::testing::page;
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn without_held_out_rows_the_page_leads_with_calibration_error() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Layer };
        let h = page(comparison(1, vec![run(Method::Magnitude, row, 0.25, None, 1)]), None);
        assert!(h.contains("mean calibration relative error"));
        assert!(!h.contains("mean held-out relative error"));
        assert!(h.contains("data-field=\"mean_rel_error\" data-value=\"0.25\""));
        assert!(h.contains("50% per layer"));
    }

    #[test]
    fn a_method_in_two_sources_is_two_series_told_apart() {
        let row = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let a = comparison(1, vec![run(Method::Obs, row(0.5), 0.1, Some(1.0), 1)]);
        let b = comparison(
            1,
            vec![
                run(Method::Obs, row(0.7), 0.2, Some(1.0), 1),
                run(Method::L0, row(0.5), 0.1, Some(1.0), 1),
            ],
        );
        let sources: Vec<Source> = [("a", a), ("b", b)]
            .into_iter()
            .map(|(l, c)| Source { label: l.into(), path: None, comparison: c })
            .collect();
        let v = View::new(&sources, None);
        let s: Vec<(&str, bool, &str)> =
            v.series.iter().map(|s| (s.label.as_str(), s.filled, s.dash)).collect();
        assert_eq!(s, [("obs · a", true, ""), ("obs · b", false, "7 4"), ("l0", false, "7 4")]);
        assert_eq!(v.series[0].colour, v.series[1].colour);
        // Targets in sparsity order; the focus defaults to the highest.
        let keys: Vec<&str> = v.targets.iter().map(|t| t.key.as_str()).collect();
        assert_eq!(keys, ["0.5", "0.7"]);
        assert_eq!(v.focus.map(|t| t.key), Some("0.7".to_string()));
    }
}
