//! The page header: the title (model name), run status (complete, or why
//! not, per source), provenance (layers, runs, sources, lopper versions,
//! date or date range), and the validation caution under it.

use super::view::View;
use crate::compare::data::Status;
use crate::compare::svg::esc;
use std::collections::BTreeSet;
use std::fmt::Write as _;

/// Write the header and the caution for the page titled `title`.
pub(super) fn section(h: &mut String, v: &View<'_>, title: &str) {
    let first = &v.sources[0].comparison;
    let complete = v.sources.iter().all(|s| s.comparison.status == Status::Complete);
    let status = if complete {
        "<span class=\"status ok\">complete</span>".to_string()
    } else {
        let why: Vec<String> = v
            .sources
            .iter()
            .filter(|s| s.comparison.status != Status::Complete)
            .map(|s| {
                let c = &s.comparison;
                let what = match c.status {
                    Status::Interrupted => "interrupted".to_string(),
                    Status::Running => "still running".to_string(),
                    Status::Failed => {
                        format!("failed: {}", c.status_detail.clone().unwrap_or_default())
                    }
                    Status::Complete => unreachable!(),
                };
                if v.sources.len() > 1 {
                    format!("{} {what}", s.label)
                } else {
                    what
                }
            })
            .collect();
        format!("<span class=\"status partial\">incomplete — {}</span>", esc(&why.join("; ")))
    };
    let runs: usize = v.sources.iter().map(|s| s.comparison.runs.len()).sum();
    let versions: BTreeSet<&str> =
        v.sources.iter().map(|s| s.comparison.tool_version.as_str()).collect();
    let dates: Vec<&str> =
        v.sources.iter().map(|s| s.comparison.created.as_str()).filter(|d| !d.is_empty()).collect();
    let date = match (dates.iter().min(), dates.iter().max()) {
        (Some(a), Some(b)) if a == b => a.replace('T', " ").replace('Z', " UTC"),
        (Some(a), Some(b)) => {
            let (a, b) = (&a[..10.min(a.len())], &b[..10.min(b.len())]);
            if a == b {
                a.to_string()
            } else {
                format!("{a} … {b}")
            }
        }
        _ => "date unknown".to_string(),
    };
    let versions: Vec<&str> = versions.into_iter().collect();
    let _ = writeln!(
        h,
        "<header><div><p class=\"kicker\">lopper · pruning methods side by side</p>\
         <h1>{}</h1><div>{status}</div></div>\
         <div class=\"meta\">{} layers · {runs} runs{}<br>lopper {} · {}</div></header>",
        esc(title),
        v.layer_count(),
        if v.sources.len() > 1 {
            format!(" from {} reports", v.sources.len())
        } else {
            String::new()
        },
        esc(&versions.join(", ")),
        esc(&date),
    );
    let _ = writeln!(
        h,
        "<p class=\"caution\" data-notice><strong>Caution.</strong> {}</p>",
        esc(&first.notice)
    );
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compare::data::testing::{comparison, run};
    use crate::compare::data::Source;
    use crate::solve::{Method, Pattern, Scope};

    #[test]
    fn status_and_provenance_name_each_source() {
        let row = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
        let a = comparison(2, vec![run(Method::Obs, row, 0.1, Some(1.0), 2)]);
        let mut b = comparison(2, vec![run(Method::L0, row, 0.1, Some(1.0), 1)]);
        b.status = Status::Failed;
        b.status_detail = Some("out of <memory>".into());
        b.created = "2025-02-03T10:00:00Z".into();
        b.tool_version = "1".into();
        let sources: Vec<Source> = [("a", a), ("b", b)]
            .into_iter()
            .map(|(l, c)| Source { label: l.into(), path: None, comparison: c })
            .collect();
        let mut h = String::new();
        section(&mut h, &View::new(&sources, None), "m<1>");
        assert!(h.contains("<h1>m&lt;1&gt;</h1>"), "{h}");
        assert!(h.contains("incomplete — b failed: out of &lt;memory&gt;"), "{h}");
        assert!(h.contains("2 layers · 2 runs from 2 reports"), "{h}");
        assert!(h.contains("lopper 0, 1 · 2025-01-01 … 2025-02-03"), "{h}");
        assert!(h.contains("<p class=\"caution\" data-notice>"), "{h}");
        // One complete source: its exact start time.
        let mut h = String::new();
        section(&mut h, &View::new(&sources[..1], None), "m");
        assert!(
            h.contains("status ok") && h.contains("1 runs<br>lopper 0 · 2025-01-01 00:00:00 UTC")
        );
    }
}
