//! The summary table: one group of rows per target, one row per series
//! at that target, with the achieved zeros, the mean error the page leads
//! with (lowest per target tagged), the other mean error, the factor against
//! magnitude (from the same report when it has magnitude at that target,
//! else from any), end-to-end figure, speed-up and solve time; then a line
//! on the shared Gram-matrix time that solve times leave out.

use super::view::{percent_2, swatch, Metric, Series, View};
use crate::compare::data::{Run, INPUTS_SHARED};
use crate::compare::svg::{esc, exact, sci};
use std::fmt::Write as _;

/// Write the summary heading, table and Gram-time note.
pub(super) fn section(h: &mut String, v: &View<'_>) {
    let metric = v.metric;
    let has_mag = v.series.iter().any(|s| s.method == "magnitude");
    let _ = writeln!(
        h,
        "<h2>Summary</h2><p class=\"lede\">Mean {} relative error over the pruned layers \
         (lower is better; the lowest per target is marked), with the time the solver took. \
         End-to-end figures appear once the model is evaluated on held-out text.</p>",
        metric.words()
    );
    h.push_str("<table class=\"summary\" data-table=\"summary\"><thead><tr><th>target, method</th><th>zeros</th>");
    let _ = write!(
        h,
        "<th>mean {} error</th><th>mean {} error</th>",
        metric.words(),
        if metric == Metric::Holdout { "calibration" } else { "held-out" }
    );
    if has_mag {
        h.push_str("<th>vs magnitude</th>");
    }
    h.push_str("<th>end-to-end</th><th>speed</th><th>solve time</th></tr></thead><tbody>\n");
    let cols = if has_mag { 8 } else { 7 };
    let n_layers = v.layer_count();
    for t in &v.targets {
        let rows: Vec<(&Series, &Run)> =
            v.series.iter().filter_map(|s| v.run(s, t).map(|r| (s, r))).collect();
        if rows.is_empty() {
            continue;
        }
        let best = rows.iter().filter_map(|(_, r)| metric.mean(r)).min_by(|a, b| a.total_cmp(b));
        // Each run against magnitude from its own report at the same target,
        // else from any report (same model, same layers).
        let mag_of = |src: usize| {
            let mag = |(s, _): &&(&Series, &Run)| s.method == "magnitude";
            rows.iter()
                .filter(mag)
                .find(|(s, _)| s.source == src)
                .or_else(|| rows.iter().find(mag))
                .and_then(|(_, r)| metric.mean(r))
        };
        let _ =
            writeln!(h, "<tr class=\"group\"><td colspan=\"{cols}\">{}</td></tr>", esc(&t.label()));
        for &(s, r) in &rows {
            let lead = metric.mean(r);
            let other = match metric {
                Metric::Holdout => Some(r.summary.mean_rel_error),
                Metric::Calibration => r.summary.mean_rel_error_holdout,
            }
            .filter(|_| !r.layers.is_empty());
            let is_best = lead.is_some() && lead == best;
            let src = s.source;
            let id = esc(&r.id);
            let cell = |field: &str, val: Option<f64>, text: String, class: &str| {
                format!(
                    "<td class=\"{class}\" data-field=\"{field}\" data-value=\"{}\">{text}</td>",
                    exact(val)
                )
            };
            let partial = if r.layers.len() < n_layers {
                format!(" <span class=\"dim\">({} of {n_layers} layers)</span>", r.layers.len())
            } else {
                String::new()
            };
            let _ = write!(
                h,
                "<tr{} data-source=\"{src}\" data-run=\"{id}\"><td class=\"m\">{}{}{partial}</td>",
                if is_best { " class=\"best\"" } else { "" },
                swatch(s),
                esc(&s.label)
            );
            let zeros = (!r.layers.is_empty()).then_some(r.summary.sparsity);
            h.push_str(&cell(
                "sparsity",
                zeros,
                zeros.map(|z| format!("{}%", percent_2(z))).unwrap_or("—".into()),
                "",
            ));
            let tag = if is_best { "<span class=\"tag\">LOWEST</span>" } else { "" };
            h.push_str(&cell(metric.field(), lead, format!("{}{tag}", sci(lead)), "err"));
            let other_field = match metric {
                Metric::Holdout => "mean_rel_error",
                Metric::Calibration => "mean_rel_error_holdout",
            };
            h.push_str(&cell(other_field, other, sci(other), "dim"));
            if has_mag {
                let text = match (mag_of(s.source), lead) {
                    (_, _) if s.method == "magnitude" => "baseline".to_string(),
                    (Some(m), Some(x)) if x > 0.0 && m > 0.0 => {
                        let k = m / x;
                        if k >= 1.0 {
                            format!("{} × lower", fmt_factor(k))
                        } else {
                            format!("{} × higher", fmt_factor(1.0 / k))
                        }
                    }
                    _ => "—".to_string(),
                };
                let _ = write!(h, "<td>{text}</td>");
            }
            match &r.end_to_end {
                Some(e) => {
                    let _ = write!(
                        h,
                        "<td data-field=\"end_to_end\" data-value=\"{}\">{:.4} <span class=\"dim\">{}</span></td>",
                        exact(Some(e.value)),
                        e.value,
                        esc(&e.metric)
                    );
                }
                None => h.push_str("<td data-field=\"end_to_end\" data-value=\"\">—</td>"),
            }
            match &r.speed {
                Some(sp) if sp.sparse_seconds > 0.0 => {
                    let k = sp.dense_seconds / sp.sparse_seconds;
                    let _ = write!(
                        h,
                        "<td data-field=\"speedup\" data-value=\"{}\">{k:.2}× <span class=\"dim\">batch {}</span></td>",
                        exact(Some(k)),
                        sp.batch
                    );
                }
                _ => h.push_str("<td data-field=\"speedup\" data-value=\"\">—</td>"),
            }
            let secs = Some(r.summary.seconds);
            h.push_str(&cell("seconds", secs, format!("{:.2} s", r.summary.seconds), ""));
            h.push_str("</tr>\n");
        }
    }
    h.push_str("</tbody></table>\n");
    let gram: f64 = v
        .sources
        .iter()
        .filter(|s| s.comparison.runs.iter().any(|r| r.calibration_inputs == INPUTS_SHARED))
        .flat_map(|s| s.comparison.layers.iter().map(|l| l.gram_seconds))
        .sum();
    if gram > 0.0 {
        let _ = writeln!(
            h,
            "<p class=\"lede\" style=\"margin-top:6px;font-size:12.5px\">Solve time excludes \
             reading the calibration inputs and building each layer's Gram matrices, done once \
             for all runs that share them: {gram:.2} s.</p>"
        );
    }
}

/// A ratio for people: `3.4`, `27`, `1,240`.
fn fmt_factor(k: f64) -> String {
    if k < 10.0 {
        format!("{k:.1}")
    } else if k < 1000.0 {
        format!("{k:.0}")
    } else {
        super::view::thousands(&format!("{k:.0}"))
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{sources, values};
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn cells_carry_the_run_means_and_mark_the_lowest() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let runs = vec![
            run(Method::Magnitude, row, 0.04, Some(1.5), 2),
            run(Method::Obs, row, 0.01, Some(1.5), 2),
        ];
        let src = sources(comparison(2, runs.clone()));
        let mut h = String::new();
        section(&mut h, &View::new(&src, None));
        let held: Vec<Option<f64>> =
            runs.iter().map(|r| r.summary.mean_rel_error_holdout).collect();
        let calib: Vec<Option<f64>> = runs.iter().map(|r| Some(r.summary.mean_rel_error)).collect();
        assert_eq!(values(&h, "mean_rel_error_holdout"), held);
        assert_eq!(values(&h, "mean_rel_error"), calib);
        assert_eq!(values(&h, "sparsity"), [Some(0.5), Some(0.5)]);
        assert_eq!(h.matches("LOWEST").count(), 1);
        let obs = &h[h.find("data-run=\"obs-0.5\"").unwrap()..];
        assert!(obs.starts_with("data-run=\"obs-0.5\"><td class=\"m\">") && obs.contains("LOWEST"));
        assert!(h.contains("<td>baseline</td>") && h.contains("<td>4.0 × lower</td>"), "{h}");
    }

    #[test]
    fn factors_read_for_people() {
        assert_eq!(fmt_factor(3.44), "3.4");
        assert_eq!(fmt_factor(27.2), "27");
        assert_eq!(fmt_factor(1240.0), "1,240");
    }
}
