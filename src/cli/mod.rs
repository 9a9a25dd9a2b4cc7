//! The command-line front end: flags → config → pipeline, then printing.
//!
//! Exit codes: 0 success, 2 usage or input error, 1 anything else, 130 when
//! `lopper compare` was interrupted (what finished is kept). Errors are
//! printed as one line, `lopper: error: …`, on stderr.

mod args;
mod compare;
mod config;
mod inspect;
mod sparse;

use crate::pipeline::{self, ErrorKind, Progress};
use args::{Cli, Command};
use clap::Parser;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// Exit code for success.
pub const EXIT_OK: i32 = 0;
/// Exit code for failures that are not the input's fault.
pub const EXIT_FAILURE: i32 = 1;
/// Exit code for usage and input errors.
pub const EXIT_USAGE: i32 = 2;
/// Exit code after Ctrl-C (128 + SIGINT, the shell's convention).
pub const EXIT_INTERRUPTED: i32 = 130;

/// A front-end failure with its exit code.
struct Failure {
    code: i32,
    message: String,
}

impl Failure {
    fn usage(message: impl Into<String>) -> Self {
        Failure { code: EXIT_USAGE, message: message.into() }
    }
}

impl From<pipeline::Error> for Failure {
    fn from(e: pipeline::Error) -> Self {
        let code = if e.kind() == ErrorKind::Input { EXIT_USAGE } else { EXIT_FAILURE };
        Failure { code, message: e.to_string() }
    }
}

/// Run the tool with the process arguments; returns the exit code.
pub fn run() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) if !e.use_stderr() => {
            // --help and --version.
            let _ = e.print();
            return EXIT_OK;
        }
        Err(e) => {
            // Clap's message is several lines (usage, tips); keep the first,
            // with the indented list it introduces (missing arguments).
            let text = e.render().to_string();
            let mut lines = text.lines().filter(|l| !l.trim().is_empty());
            let first = lines.next().unwrap_or("invalid arguments");
            let mut first = first.strip_prefix("error: ").unwrap_or(first).to_string();
            if first.ends_with(':') {
                let items: Vec<&str> =
                    lines.take_while(|l| l.starts_with(' ')).map(str::trim).collect();
                first = format!("{first} {}", items.join(", "));
            }
            eprintln!("lopper: error: {first} (see `lopper --help`)");
            return EXIT_USAGE;
        }
    };
    let result = match cli.command {
        Command::Inspect(a) => inspect::run(&a),
        Command::Prune(a) => prune(&a),
        Command::Eval(a) => eval(&a),
        Command::Compare(a) => compare::compare(&a),
        Command::Report(a) => compare::report(&a),
        Command::Speed(a) => sparse::speed(&a),
        Command::Pack(a) => sparse::pack(&a),
    };
    match result {
        Ok(()) => EXIT_OK,
        Err(f) => {
            eprintln!("lopper: error: {}", f.message);
            f.code
        }
    }
}

fn prune(a: &args::PruneArgs) -> Result<(), Failure> {
    let cfg = config::prune_config(a).map_err(Failure::usage)?;
    set_threads(cfg.threads);
    let bar = if a.quiet {
        ProgressBar::hidden()
    } else {
        ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr())
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{spinner} pruning {pos}/{len} layers [{elapsed_precise}] {wide_msg}",
        )
        .expect("valid template"),
    );
    let on_progress = |p: Progress<'_>| match p {
        Progress::Start(n) => bar.set_length(n as u64),
        Progress::Layer(i, name) => {
            bar.set_position(i as u64);
            bar.set_message(name.to_string());
        }
        Progress::Evaluating => {
            bar.set_position(bar.length().unwrap_or(0));
            bar.set_message("comparing with the dense model on --eval-text");
        }
        Progress::Writing => {
            bar.set_position(bar.length().unwrap_or(0));
            bar.set_message("writing outputs");
        }
    };
    let report = pipeline::prune(&cfg, &on_progress);
    bar.finish_and_clear();
    let report = report?;
    if !a.quiet {
        print!("{}", report.render_table());
        for o in &report.outputs {
            println!("wrote {o}");
        }
    }
    Ok(())
}

/// Size the global thread pool once per process. The forward passes' matrix
/// products read the same setting from `RAYON_NUM_THREADS`.
fn set_threads(n: usize) {
    std::env::set_var("RAYON_NUM_THREADS", n.to_string());
    // A second global pool cannot be built; the first one wins, which is fine
    // for a process that runs one command.
    let _ = rayon::ThreadPoolBuilder::new().num_threads(n).build_global();
}

fn eval(a: &args::EvalArgs) -> Result<(), Failure> {
    set_threads(config::resolve_threads(a.threads));
    for (flag, v) in [("--samples", a.samples), ("--seq-len", a.seq_len)] {
        if v == Some(0) {
            return Err(Failure::usage(format!("{flag} must be at least 1")));
        }
    }
    let dense = crate::io::Model::open(&a.dense).map_err(pipeline::Error::from)?;
    let pruned = crate::io::Model::open(&a.pruned).map_err(pipeline::Error::from)?;
    let replace = crate::evaluate::pruned_weights(&dense, &pruned)?;
    let opts = crate::evaluate::EvalOptions {
        text: a.text.clone(),
        samples: a.samples,
        seq_len: a.seq_len,
    };
    let summary = crate::evaluate::evaluate(&dense, &replace, &opts)?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&summary).expect("serialises"));
    } else {
        println!("{}", summary.render());
        println!("note: {}", crate::report::VALIDATION_NOTICE);
    }
    Ok(())
}
