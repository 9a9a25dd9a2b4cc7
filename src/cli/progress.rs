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
