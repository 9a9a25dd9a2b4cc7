//! The text table of a [`LatencyReport`]: one line per scenario and
//! variant, speedups over dense, and the share of time in the block linear
//! layers with the bound it sets.

use std::fmt::Write as _;

use super::LatencyReport;

/// Render the report for a terminal.
pub fn render(r: &LatencyReport) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{} ({}, {}) · {} thread{} · load {} → {}",
        r.model,
        r.model_type,
        r.kind,
        r.threads,
        if r.threads == 1 { "" } else { "s" },
        r.load[0],
        r.load[1]
    );
    if let Some(d) = &r.dense_model {
        let _ = writeln!(s, "dense model: {d}");
    }
    let _ =
        writeln!(s, "pruned layers: {} of {} block linear layers", r.pruned_layers, r.block_layers);
    if let Some(e) = r.sparse_check_rel_error {
        let _ =
            writeln!(s, "sparse kernels vs dense forward, same weights: relative error {e:.1e}");
    }
    if let Some(e) = r.decode_check_rel_error {
        let _ = writeln!(s, "cached decode vs full forward: largest relative error {e:.1e}");
    }
    let _ = writeln!(
        s,
        "\n{:<16} {:<15} {:>10} {:>10} {:>12} {:>8} {:>8} {:>8}",
        "scenario", "variant", "p50 ms", "p90 ms", "units/s", "speedup", "linear", "kernels"
    );
    for (name, sc) in &r.scenarios {
        for (v, st) in &sc.variants {
            let speed = sc.speedup.get(v).map_or("1.00x".to_string(), |x| format!("{x:.2}x"));
            let kernels = if v == "sparse_kernels" {
                format!("{}/{}", sc.layers_sparse, sc.layers_sparse + sc.layers_dense_fallback)
            } else {
                "-".to_string()
            };
            let _ = writeln!(
                s,
                "{:<16} {:<15} {:>10.2} {:>10.2} {:>8.1} {:<3} {:>8} {:>7.0}% {:>8}",
                name,
                v,
                st.p50_ms,
                st.p90_ms,
                st.per_s,
                if sc.unit == "tokens" { "tok" } else { "sen" },
                speed,
                100.0 * st.linear_share,
                kernels
            );
        }
        let _ = writeln!(
            s,
            "{:<16} ({}; dense spends {:.0}% in block linear layers: no pruning of them can \
             beat {:.2}x)",
            "",
            sc.call,
            100.0 * sc.variants["dense"].linear_share,
            sc.linear_bound_speedup
        );
    }
    let _ = writeln!(
        s,
        "\nlinear = share of time in block linear layers; kernels = pruned layers on a sparse \
         kernel / pruned layers (the others measured faster dense).\nnote: {}",
        r.note
    );
    s
}
