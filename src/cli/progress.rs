//! Progress bars on stderr (indicatif), hidden with `--quiet`.
//!
//! Counting bars read `⠋ pruning 3/36 layers [00:00:41] encoder.layer.0…`;
//! the comparison bar adds a gauge of its own look (`▪` done, `▸` the
//! solve under way, `·` to go) and an ETA, since it runs for minutes.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

fn new(quiet: bool) -> ProgressBar {
    if quiet {
        ProgressBar::hidden()
    } else {
        ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr())
    }
}

/// A counting bar: `{verb} {pos}/{len} {unit}`, the elapsed time and a
/// message.
pub(super) fn bar(quiet: bool, verb: &str, unit: &str) -> ProgressBar {
    let bar = new(quiet);
    bar.set_style(
        ProgressStyle::with_template(&format!(
            "{{spinner}} {verb} {{pos}}/{{len}} {unit} [{{elapsed_precise}}] {{wide_msg}}"
        ))
        .expect("valid template"),
    );
    bar
}

/// The comparison's bar: a gauge, solves done, elapsed time and ETA.
pub(super) fn gauge(quiet: bool) -> ProgressBar {
    let bar = new(quiet);
    bar.set_style(
        ProgressStyle::with_template(
            "{spinner} comparing {bar:24} {pos}/{len} solves · {elapsed} elapsed · about {eta} \
             to go · {wide_msg}",
        )
        .expect("valid template")
        .progress_chars("▪▸·"),
    );
    bar
}

/// Seconds as `2h 05m`, `3m 10s` or `12s`.
pub(super) fn duration(secs: f64) -> String {
    let s = secs.max(0.0).round() as u64;
    match (s / 3600, s % 3600 / 60, s % 60) {
        (0, 0, s) => format!("{s}s"),
        (0, m, s) => format!("{m}m {s:02}s"),
        (h, m, _) => format!("{h}h {m:02}m"),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn durations_read_in_the_largest_units() {
        assert_eq!(super::duration(12.4), "12s");
        assert_eq!(super::duration(190.0), "3m 10s");
        assert_eq!(super::duration(7500.0), "2h 05m");
    }
}
