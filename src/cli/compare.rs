//! `lopper compare` and `lopper report`: flag validation, the progress bar,
//! Ctrl-C handling and printing. The work is in [`crate::compare`].
//!
//! Ctrl-C or SIGTERM (or SIGHUP) once asks the driver to stop after the
//! current solve and write what finished (exit code 130); a second signal
//! exits at once, after any file write in progress, marking the last
//! checkpoint `interrupted`.

use super::args::{CompareArgs, ReportArgs};
use super::config::{compare_config, focus_key};
use super::progress::gauge;
use super::{Failure, EXIT_INTERRUPTED};
use crate::compare::data::{self, Source, Status};
use crate::compare::{self, page, table, Control};
use crate::driver::Progress;
use crate::error::{Error, Result};
use std::sync::atomic::Ordering;
use std::sync::Arc;

/// `lopper compare`.
pub(super) fn compare(a: &CompareArgs) -> Result<(), Failure> {
    let cfg = compare_config(a)?;
    super::set_threads(cfg.job.threads);
    let bar = gauge(a.job.run.quiet);
    let ids: Vec<String> = cfg
        .runs()
        .iter()
        .map(|t| data::run_id(t.method.name(), &data::target_key(t.pattern)))
        .collect();
    let control = Arc::new(Control::default());
    {
        let (c, b) = (Arc::clone(&control), bar.clone());
        let out_dir = cfg.out_dir.clone();
        // Only one handler per process; a second `set_handler` (never in
        // this binary) would fail and leave Ctrl-C to end the process.
        let _ = ctrlc::set_handler(move || {
            if !c.stop.swap(true, Ordering::SeqCst) {
                b.suspend(|| {
                    eprintln!(
                        "lopper: stopping after the current solve; finished solves are kept \
                         (Ctrl-C again to stop at once)"
                    )
                });
            } else {
                let _writing = c.writing.lock().unwrap_or_else(|e| e.into_inner());
                compare::mark_stopped(&out_dir);
                b.abandon();
                eprintln!("lopper: stopped at once; comparison.json holds the last checkpoint");
                std::process::exit(EXIT_INTERRUPTED);
            }
        });
    }
    let on_progress = |p: Progress<'_>| match p {
        Progress::Start(n) => bar.set_length(n as u64),
        Progress::Statistics(label) => bar.set_message(format!("{label}: statistics")),
        Progress::Solve { layer, run, .. } => bar.set_message(format!("{layer}: {}", ids[run])),
        Progress::Done(k) => bar.set_position(k as u64),
        Progress::Evaluating => bar.set_message("comparing with the dense model on --eval-text"),
        Progress::Writing => bar.set_message("writing models"),
        Progress::Note(n) => {
            if !a.job.run.quiet {
                bar.suspend(|| eprintln!("lopper: {n}"));
            }
        }
    };
    let outcome = compare::compare(&cfg, &on_progress, &control);
    bar.finish_and_clear();
    let outcome = outcome?;
    let c = &outcome.comparison;
    if !a.job.run.quiet {
        print!("{}", table::render(&[outcome.source()]));
        for o in &outcome.outputs {
            println!("wrote {}", o.display());
        }
        println!("note: {}", c.notice);
    }
    if c.status == Status::Interrupted {
        let done: usize = c.runs.iter().map(|r| r.layers.len()).sum();
        let total = c.runs.len() * c.layers.len();
        return Err(Failure::Interrupted(format!(
            "interrupted: {done} of {total} solves finished and are kept in {}",
            cfg.out_dir.join(compare::JSON_NAME).display()
        )));
    }
    Ok(())
}

/// `lopper report`.
pub(super) fn report(a: &ReportArgs) -> Result<()> {
    let inputs: Vec<std::path::PathBuf> =
        a.reports.iter().map(|p| crate::io::canonical_target(p)).collect();
    crate::outputs::check_distinct(&inputs, &[("-o", a.output.as_path())])?;
    if !a.output.is_dir() {
        crate::outputs::check_file("-o", &a.output, crate::outputs::Write::Replace)?;
    }
    let mut sources: Vec<Source> = Vec::new();
    for p in &a.reports {
        sources.push(data::load(p).map_err(|m| Error::input(m).with_path(p))?);
    }
    data::check_compatible(&sources).map_err(Error::input)?;
    let focus = match &a.focus {
        None => None,
        Some(f) => Some(focus_key(f, &page::targets_of(&sources))?),
    };
    if a.output.is_dir() {
        return Err(Error::usage(format!(
            "-o {}: is a folder; give the page's file name",
            a.output.display()
        )));
    }
    let html = page::render(&sources, focus.as_deref());
    crate::io::write_atomic(&a.output, |w| std::io::Write::write_all(w, html.as_bytes()))?;
    if !a.quiet {
        print!("{}", table::render(&sources));
        println!("wrote {}", a.output.display());
    }
    Ok(())
}
