//! The command-line front end: flags → config → driver, then printing.
//!
//! Exit codes are the same in every command: 0 success; 2 for a usage or
//! input error (the user's to fix); 1 for a failure on valid input (a
//! solver, the disk, a kernel check), see [`crate::ErrorKind::exit_code`];
//! 130 when `lopper compare` was interrupted (what finished is kept).
//! Errors are printed as one line, `lopper: error: …`, on stderr.

mod args;
mod compare;
mod config;
mod inspect;
mod latency;
mod progress;
mod sparse;

use crate::driver::{self, Progress};
use crate::error::{Error, Result};
use args::{Cli, Command};
use clap::Parser;

/// Exit code for success.
pub const EXIT_OK: i32 = 0;
/// Exit code for failures that are not the input's fault.
pub const EXIT_FAILURE: i32 = 1;
/// Exit code for usage and input errors.
pub const EXIT_USAGE: i32 = 2;
/// Exit code after Ctrl-C (128 + SIGINT, the shell's convention).
pub const EXIT_INTERRUPTED: i32 = 130;

/// How a command ended, when not with success.
enum Failure {
    /// An error; its kind gives the exit code.
    Error(Error),
    /// Stopped on request, with a message (exit code 130).
    Interrupted(String),
}

impl From<Error> for Failure {
    fn from(e: Error) -> Self {
        Failure::Error(e)
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
        Command::Inspect(a) => inspect::run(&a).map_err(Failure::from),
        Command::Prune(a) => prune(&a).map_err(Failure::from),
        Command::Eval(a) => eval(&a).map_err(Failure::from),
        Command::Compare(a) => compare::compare(&a),
        Command::Report(a) => compare::report(&a).map_err(Failure::from),
        Command::Speed(a) => sparse::speed(&a).map_err(Failure::from),
        Command::Pack(a) => sparse::pack(&a).map_err(Failure::from),
        Command::Latency(a) => latency::run(&a).map_err(Failure::from),
    };
    match result {
        Ok(()) => EXIT_OK,
        Err(Failure::Error(e)) => {
            eprintln!("lopper: error: {e}");
            e.exit_code()
        }
        Err(Failure::Interrupted(m)) => {
            eprintln!("lopper: error: {m}");
            EXIT_INTERRUPTED
        }
    }
}

fn prune(a: &args::PruneArgs) -> Result<()> {
    let cfg = config::prune_config(a)?;
    set_threads(cfg.job.threads);
    let bar = progress::bar(a.job.run.quiet, "pruning", "layers");
    // Ctrl-C / SIGTERM: remove the temporaries of the outputs (written
    // block by block) and stop; nothing new is left behind.
    let b = bar.clone();
    let _ = ctrlc::set_handler(move || {
        crate::io::remove_temporaries();
        b.abandon();
        eprintln!("lopper: interrupted; no output was written");
        std::process::exit(EXIT_INTERRUPTED);
    });
    let blocks = std::cell::Cell::new((0usize, std::time::Instant::now()));
    let on_progress = |p: Progress<'_>| match p {
        Progress::Start(n) => bar.set_length(n as u64),
        Progress::Solve { done, layer, .. } => {
            bar.set_position(done as u64);
            bar.set_message(layer.to_string());
        }
        Progress::Evaluating => {
            bar.set_position(bar.length().unwrap_or(0));
            bar.set_message("comparing with the dense model on --eval-text");
        }
        Progress::Writing => {
            bar.set_position(bar.length().unwrap_or(0));
            bar.set_message("writing outputs");
        }
        Progress::Note(n) => {
            if !a.job.run.quiet {
                bar.suspend(|| eprintln!("lopper: {n}"));
            }
        }
        Progress::Statistics(label) => {
            // Per block: the time per block so far gives the time left.
            let (n, t0) = blocks.get();
            let eta = match (n, bar.length()) {
                (0, _) | (_, None | Some(0)) => String::new(),
                (_, Some(len)) => {
                    let done = bar.position().max(1) as f64;
                    let left = t0.elapsed().as_secs_f64() / done * (len as f64 - done);
                    format!(" (about {} left)", progress::duration(left))
                }
            };
            blocks.set((n + 1, t0));
            bar.set_message(format!("{label}: statistics{eta}"));
        }
        Progress::Done(k) => bar.set_position(k as u64),
    };
    let report = driver::prune(&cfg, &on_progress);
    bar.finish_and_clear();
    let report = report?;
    if !a.job.run.quiet {
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

fn eval(a: &args::EvalArgs) -> Result<()> {
    set_threads(config::resolve_threads(a.threads));
    config::check_counts(a.samples, a.seq_len)?;
    let dense = crate::io::Model::open(&a.dense)?;
    let pruned = crate::io::Model::open(&a.pruned)?;
    let opts = crate::evaluate::EvalOptions {
        text: a.text.clone(),
        samples: a.samples,
        seq_len: a.seq_len,
    };
    let summary = crate::evaluate::evaluate_models(&dense, &pruned, &opts)?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&summary).expect("serialises"));
    } else {
        println!("{}", summary.render());
        println!("note: {}", crate::report::VALIDATION_NOTICE);
    }
    Ok(())
}
