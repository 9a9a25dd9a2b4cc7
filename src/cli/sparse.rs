//! `lopper speed` and `lopper pack`: flag checks, progress, and printing;
//! the work is in [`crate::deploy`].

use std::fmt::Write as _;

use super::args::{PackArgs, SpeedArgs};
use super::config::{resolve_threads, selection};
use super::progress::bar;
use crate::deploy::{self, SpeedConfig, SpeedReport};
use crate::error::{Error, Result};
use crate::io::Model;

/// Bytes `--streamed` cycles through per weight.
const STREAM_BYTES: usize = 512 << 20;

/// Check the flags of `lopper speed`.
fn speed_config(a: &SpeedArgs) -> Result<SpeedConfig> {
    if a.batch.is_empty() {
        return Err(Error::usage("--batch needs at least one batch size"));
    }
    if let Some(b) = a.batch.iter().find(|&&b| !(1..=65_536).contains(&b)) {
        return Err(Error::usage(format!("--batch {b} is outside 1..=65536")));
    }
    if !(a.min_time.is_finite() && a.min_time > 0.0 && a.min_time <= 60.0) {
        return Err(Error::usage(format!(
            "--min-time {} must be a number of seconds in (0, 60]",
            a.min_time
        )));
    }
    let mut batches = a.batch.clone();
    batches.sort_unstable();
    batches.dedup();
    Ok(SpeedConfig {
        batches,
        threads: resolve_threads(a.run.threads),
        min_time: a.min_time,
        selection: selection(&a.selection),
        stream_bytes: if a.streamed { STREAM_BYTES } else { 0 },
    })
}

pub(super) fn speed(a: &SpeedArgs) -> Result<()> {
    let cfg = speed_config(a)?;
    let _ = rayon::ThreadPoolBuilder::new().num_threads(cfg.threads).build_global();
    let model = Model::open(&a.model)?;
    let bar = bar(a.run.quiet, "timing", "layers");
    let report = deploy::measure(&model, &cfg, &|done, total, name| {
        bar.set_length(total as u64);
        bar.set_position(done as u64);
        bar.set_message(name.to_string());
    });
    bar.finish_and_clear();
    let report = report?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&report).expect("report serialises"));
    } else {
        print!("{}", speed_table(&report));
    }
    Ok(())
}

pub(super) fn pack(a: &PackArgs) -> Result<()> {
    let model = Model::open(&a.model)?;
    let sel = selection(&a.selection);
    let bar = bar(a.quiet, "packing", "layers");
    let packed = deploy::pack(&model, &sel, &a.output, &|done, total, name| {
        bar.set_length(total as u64);
        bar.set_position(done as u64);
        bar.set_message(name.to_string());
    });
    bar.finish_and_clear();
    let packed = packed?;
    if !a.quiet {
        let w = packed
            .iter()
            .map(|l| crate::io::escape(&l.name).chars().count())
            .max()
            .unwrap_or(5)
            .max(5);
        let mut s = String::new();
        let _ = writeln!(
            s,
            "{:<w$}  {:>11}  {:>9}  {:>10}  {:>10}",
            "layer", "shape", "layout", "dense", "packed"
        );
        let (mut dense, mut sparse) = (0, 0);
        for l in &packed {
            let (o, i) = l.weight.shape();
            let d = o * i * l.source_dtype.bitsize() / 8;
            let layout = format!("{}/{}b", l.weight.layout(), l.weight.index_bits());
            let _ = writeln!(
                s,
                "{:<w$}  {:>11}  {:>9}  {:>10}  {:>10}",
                crate::io::escape(&l.name),
                format!("{o}x{i}"),
                layout,
                bytes(d),
                bytes(l.weight.weight_bytes())
            );
            dense += d;
            sparse += l.weight.weight_bytes();
        }
        let _ = writeln!(
            s,
            "{} layers: {} dense -> {} packed ({:.1}% of dense)",
            packed.len(),
            bytes(dense),
            bytes(sparse),
            100.0 * sparse as f64 / dense.max(1) as f64
        );
        let _ = writeln!(s, "wrote {}", a.output.display());
        print!("{s}");
    }
    Ok(())
}

/// Human-readable bytes (binary prefixes).
fn bytes(n: usize) -> String {
    let n = n as f64;
    if n < 1024.0 {
        format!("{n} B")
    } else if n < 1024.0 * 1024.0 {
        format!("{:.1} KiB", n / 1024.0)
    } else if n < 1024.0 * 1024.0 * 1024.0 {
        format!("{:.1} MiB", n / (1024.0 * 1024.0))
    } else {
        format!("{:.2} GiB", n / (1024.0 * 1024.0 * 1024.0))
    }
}

/// Human-readable seconds.
fn secs(t: f64) -> String {
    if t < 1e-3 {
        format!("{:.1}us", t * 1e6)
    } else if t < 1.0 {
        format!("{:.2}ms", t * 1e3)
    } else {
        format!("{t:.2}s")
    }
}

/// One line per layer: what it is, the bytes each product reads, then per
/// batch size `dense sparse gain`; the sums below a rule.
fn speed_table(r: &SpeedReport) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{} · {} thread{} · weights {} · median of samples over >= {}s per kernel",
        r.model,
        r.threads,
        if r.threads == 1 { "" } else { "s" },
        if r.weights == "streamed" { "streamed from memory" } else { "resident (cache)" },
        r.min_time
    );
    let w = r
        .layers
        .iter()
        .map(|l| crate::io::escape(&l.name).chars().count())
        .max()
        .unwrap_or(5)
        .max(9);
    let mut head = format!(
        "{:<w$}  {:>11}  {:>6}  {:>8}  {:>21}",
        "layer", "shape", "zeros", "layout", "bytes dense → sparse"
    );
    let mut under = format!("{:<w$}  {:>11}  {:>6}  {:>8}  {:>21}", "", "", "", "", "");
    for t in &r.totals.timings {
        let _ = write!(head, " │ {:^27}", format!("batch {}", t.batch));
        let _ = write!(under, " │ {:>9} {:>9} {:>7}", "dense", "sparse", "gain");
    }
    let _ = writeln!(s, "{head}");
    let _ = writeln!(s, "{under}");
    let row = |s: &mut String,
               name: &str,
               shape: &str,
               zeros: &str,
               layout: &str,
               db: usize,
               sb: usize,
               ts: &[deploy::Timing]| {
        let _ = write!(
            s,
            "{:<w$}  {:>11}  {:>6}  {:>8}  {:>21}",
            name,
            shape,
            zeros,
            layout,
            format!("{} → {}", bytes(db), bytes(sb))
        );
        for t in ts {
            let _ = write!(
                s,
                " │ {:>9} {:>9} {:>6.2}x",
                secs(t.dense_seconds),
                secs(t.sparse_seconds),
                t.speedup
            );
        }
        s.push('\n');
    };
    for l in &r.layers {
        let layout = format!("{}/{}b", l.layout, l.index_bits);
        row(
            &mut s,
            &crate::io::escape(&l.name),
            &format!("{}x{}", l.shape[0], l.shape[1]),
            &format!("{:.1}%", 100.0 * l.zero_fraction),
            &layout,
            l.dense_bytes,
            l.sparse_bytes,
            &l.timings,
        );
    }
    let _ = writeln!(s, "{}", "─".repeat(head.chars().count()));
    let t = &r.totals;
    row(
        &mut s,
        &format!("all {} layers", t.layers),
        "",
        "",
        "",
        t.dense_bytes,
        t.sparse_bytes,
        &t.timings,
    );
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::deploy::{LayerSpeed, SpeedTotals, Timing};

    #[test]
    fn speed_flags_are_checked() {
        use clap::Parser;
        let parse = |args: &[&str]| {
            let cli = super::super::args::Cli::try_parse_from(args).unwrap();
            match cli.command {
                super::super::args::Command::Speed(a) => speed_config(&a),
                _ => unreachable!(),
            }
        };
        let c = parse(&["lopper", "speed", "m", "--batch", "8,1,8", "--threads", "2"]).unwrap();
        assert_eq!(c.batches, vec![1, 8]);
        assert_eq!(c.threads, 2);
        assert_eq!(c.stream_bytes, 0);
        assert!(parse(&["lopper", "speed", "m", "--batch", "0"])
            .unwrap_err()
            .to_string()
            .contains("--batch 0"));
        let e = parse(&["lopper", "speed", "m", "--min-time", "-1"]).unwrap_err().to_string();
        assert!(e.contains("--min-time"), "{e}");
        assert_eq!(
            parse(&["lopper", "speed", "m", "--streamed"]).unwrap().stream_bytes,
            STREAM_BYTES
        );
    }

    #[test]
    fn table_has_a_row_per_layer_and_a_total() {
        let t = |b| Timing { batch: b, dense_seconds: 2e-3, sparse_seconds: 5e-4, speedup: 4.0 };
        let layer = |n: &str| LayerSpeed {
            name: n.into(),
            shape: [8, 16],
            zero_fraction: 0.9,
            layout: "rows".into(),
            index_bits: 16,
            dense_bytes: 512,
            sparse_bytes: 120,
            timings: vec![t(1), t(8)],
        };
        let r = SpeedReport {
            model: "m.safetensors".into(),
            threads: 2,
            weights: "resident".into(),
            min_time: 0.2,
            layers: vec![layer("a.weight"), layer("b.weight")],
            totals: SpeedTotals {
                layers: 2,
                dense_bytes: 1024,
                sparse_bytes: 240,
                timings: vec![t(1), t(8)],
            },
        };
        let text = speed_table(&r);
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 7, "{text}");
        assert!(lines[1].contains("batch 1") && lines[1].contains("batch 8"), "{text}");
        assert!(lines[3].starts_with("a.weight") && lines[3].contains("rows/16b"), "{text}");
        assert!(
            lines[3].contains("2.00ms")
                && lines[3].contains("500.0us")
                && lines[3].contains("4.00x")
        );
        assert!(
            lines[6].starts_with("all 2 layers") && lines[6].contains("1.0 KiB → 240 B"),
            "{text}"
        );
    }
}
