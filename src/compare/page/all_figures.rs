//! Every figure, per run and layer, in a collapsed table
//! (`data-table="layers"`): zeros, calibration and held-out error, ridge α,
//! sweeps, swaps and solve time, each cell with its exact `data-value`.

use super::view::{percent_2, View};
use crate::compare::svg::{esc, exact, sci};
use std::fmt::Write as _;

/// Write the collapsed table of every layer of every run.
pub(super) fn section(h: &mut String, v: &View<'_>) {
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

#[cfg(test)]
mod tests {
    use super::super::testing::{sources, values};
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn every_layer_row_carries_its_figures() {
        let row = |s| Pattern::Unstructured { sparsity: s, scope: Scope::Row };
        let mut runs = vec![
            run(Method::Obs, row(0.5), 0.1, Some(1.5), 2),
            run(Method::Magnitude, row(0.7), 0.3, None, 2),
        ];
        for (k, r) in runs.iter_mut().enumerate() {
            for (i, l) in r.layers.iter_mut().enumerate() {
                l.rel_error = 0.01 * (1 + i + 2 * k) as f64;
                l.swaps = 10 * k + i;
            }
        }
        let src = sources(comparison(2, runs.clone()));
        let mut h = String::new();
        section(&mut h, &View::new(&src, None));
        let layers = || runs.iter().flat_map(|r| &r.layers);
        assert_eq!(h.matches("<tr data-source=\"0\" data-run=").count(), 4);
        let calib: Vec<Option<f64>> = layers().map(|l| Some(l.rel_error)).collect();
        assert_eq!(values(&h, "rel_error"), calib);
        let held: Vec<Option<f64>> = layers().map(|l| l.rel_error_holdout).collect();
        assert_eq!(values(&h, "rel_error_holdout"), held);
        assert_eq!(held[2], None, "no held-out rows, empty value");
        let swaps: Vec<Option<f64>> = layers().map(|l| Some(l.swaps as f64)).collect();
        assert_eq!(values(&h, "swaps"), swaps);
        assert!(h.contains("data-run=\"magnitude-0.7\" data-layer=\"l1\"><td>magnitude-0.7</td>"));
    }
}
