//! The notes: model and layer count, then for one source its calibration,
//! calibration inputs, settings and tool version, or for several a table of
//! the sources (file, date, version, calibration, ridge, runs); and how to
//! read the relative error.

use super::view::View;
use crate::compare::data::INPUTS_SHARED;
use crate::compare::svg::esc;
use std::fmt::Write as _;

/// Write the notes list, then the sources table when there are several.
pub(super) fn section(h: &mut String, v: &View<'_>) {
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
    super::view::thousands(&n.to_string())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::compare::data::Source;
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn one_source_lists_its_settings_several_a_table() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let mut c = comparison(3, vec![run(Method::Obs, row, 0.1, Some(1.0), 3)]);
        c.settings.skip = vec!["head*".into()];
        let one = [Source { label: "a".into(), path: None, comparison: c.clone() }];
        let mut h = String::new();
        section(&mut h, &View::new(&one, None));
        assert!(h.contains("3 linear layers, 24 weights"), "{h}");
        assert!(h.contains("shared: every run was solved on the same Gram matrices"));
        assert!(h.contains("ridge auto · held-out fraction 0.1") && h.contains(" · skip head*"));
        assert!(!h.contains("data-table=\"sources\""));
        let two: Vec<Source> = ["a", "b"]
            .into_iter()
            .map(|l| Source {
                label: l.into(),
                path: Some(format!("{l}.json")),
                comparison: c.clone(),
            })
            .collect();
        let mut h = String::new();
        section(&mut h, &View::new(&two, None));
        assert!(h.contains("<dd>2 reports, listed below</dd>"));
        assert!(h.ends_with("</table>") && h.matches("<tr><td>").count() == 2, "{h}");
        assert!(h.contains("<td><code>b.json</code></td>"));
    }

    #[test]
    fn counts_group_thousands() {
        assert_eq!(fmt_count(0), "0");
        assert_eq!(fmt_count(999), "999");
        assert_eq!(fmt_count(1000), "1,000");
        assert_eq!(fmt_count(22_713_216), "22,713,216");
    }
}
