//! `lopper compare` and `lopper report`: flag validation, the progress bar,
//! Ctrl-C handling and printing. The work is in [`crate::compare`].
//!
//! Ctrl-C once asks the driver to stop after the current solve and write
//! what finished (exit code 130); a second Ctrl-C exits at once, after any
//! file write in progress, removing parked weights.

use super::args::{CompareArgs, MethodArg, ReportArgs, ScopeArg};
use super::config::{parse_pattern, resolve_threads, DEFAULT_RIDGE};
use super::{Failure, EXIT_INTERRUPTED};
use crate::compare::data::{self, Source, Status};
use crate::compare::{self, page, table, CompareConfig, Control, Progress};
use crate::pipeline::{Calibration, ErrorKind, PruneConfig, Ridge};
use crate::select::Selection;
use crate::solve::{L0Params, Method, Pattern, Scope};
use crate::textcal::TextSource;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::sync::atomic::Ordering;
use std::sync::Arc;

fn method_of(m: MethodArg) -> Method {
    match m {
        MethodArg::Magnitude => Method::Magnitude,
        MethodArg::Scaled => Method::Scaled,
        MethodArg::Obs => Method::Obs,
        MethodArg::L0 => Method::L0,
    }
}

/// Validate `lopper compare` flags.
pub fn compare_config(a: &CompareArgs) -> Result<CompareConfig, String> {
    let scope = match a.scope {
        ScopeArg::Row => Scope::Row,
        ScopeArg::Layer => Scope::Layer,
    };
    let mut sparsities = a.sparsities.clone();
    if sparsities.is_empty() && a.patterns.is_empty() {
        sparsities = vec![0.5, 0.7, 0.9];
    }
    let mut targets = Vec::new();
    for &s in &sparsities {
        if !(0.0..1.0).contains(&s) {
            return Err(format!("--sparsities: {s} is outside [0, 1)"));
        }
        let p = Pattern::Unstructured { sparsity: s, scope };
        if targets.contains(&p) {
            return Err(format!("--sparsities lists {s} twice"));
        }
        targets.push(p);
    }
    for p in &a.patterns {
        let (n, m) = parse_pattern(p).map_err(|e| e.replace("--pattern ", "--patterns "))?;
        let p = Pattern::NofM { n, m };
        if targets.contains(&p) {
            return Err(format!("--patterns lists {n}:{m} twice"));
        }
        targets.push(p);
    }
    let mut methods = Vec::new();
    for &m in &a.methods {
        let m = method_of(m);
        if methods.contains(&m) {
            return Err(format!("--methods lists {} twice", m.name()));
        }
        methods.push(m);
    }
    let focus = match &a.focus {
        None => None,
        Some(f) => {
            let key = match f.trim().parse::<f64>() {
                Ok(s) => format!("{s}"),
                Err(_) => match parse_pattern(f) {
                    Ok((n, m)) => format!("{n}:{m}"),
                    Err(_) => String::new(),
                },
            };
            let keys: Vec<String> = targets.iter().map(|p| data::target_key(*p)).collect();
            if !keys.contains(&key) {
                return Err(format!("--focus {f} is not one of the targets ({})", keys.join(", ")));
            }
            Some(key)
        }
    };
    let ridge = match a.ridge.as_deref().map(str::trim) {
        None => Ridge::Auto { fallback: Some(DEFAULT_RIDGE) },
        Some("auto") => Ridge::Auto { fallback: None },
        Some(s) => match s.parse::<f64>() {
            Ok(x) if x.is_finite() && x >= 0.0 => Ridge::Fixed(x),
            _ => return Err(format!("--ridge '{s}' must be a number >= 0 or 'auto'")),
        },
    };
    if !(0.0..1.0).contains(&a.holdout) {
        return Err(format!("--holdout {} is outside [0, 1)", a.holdout));
    }
    let mut l0 = L0Params::default();
    if let Some(n) = a.max_sweeps {
        l0.max_sweeps = n;
    }
    if let Some(t) = a.layer_seconds {
        if !(t.is_finite() && t > 0.0) {
            return Err(format!("--layer-seconds {t} must be a positive number"));
        }
        l0.max_seconds = Some(t);
    }
    if a.text.is_none() {
        let text_only = [
            ("--samples", a.samples.is_some()),
            ("--seq-len", a.seq_len.is_some()),
            ("--seed", a.seed.is_some()),
            ("--no-propagate", a.no_propagate),
            ("--eval-text", a.eval_text.is_some()),
        ];
        if let Some((flag, _)) = text_only.iter().find(|f| f.1) {
            return Err(format!("{flag} applies to text calibration only: add --text FILE"));
        }
    }
    for (flag, v) in [("--samples", a.samples), ("--seq-len", a.seq_len)] {
        if v == Some(0) {
            return Err(format!("{flag} must be at least 1"));
        }
    }
    if a.speed_batch.is_some() && !a.keep_models {
        return Err("--speed-batch times the pruned models: add --keep-models".into());
    }
    if a.speed_batch == Some(0) {
        return Err("--speed-batch must be at least 1".into());
    }
    let calibration = match (&a.activations, &a.text) {
        (Some(p), None) => Calibration::Activations(p.clone()),
        (None, Some(t)) => Calibration::Text(TextSource {
            path: t.clone(),
            samples: a.samples,
            seq_len: a.seq_len,
            seed: a.seed.unwrap_or(0),
            propagate: !a.no_propagate,
        }),
        _ => return Err("give exactly one of --activations and --text".into()),
    };
    let base = PruneConfig {
        model: a.model.clone(),
        calibration,
        output: a.out_dir.clone(),
        report: None,
        trace: None,
        method: methods[0],
        pattern: targets[0],
        ridge,
        holdout: a.holdout,
        selection: Selection { only: a.only.clone(), skip: a.skip.clone() },
        threads: resolve_threads(a.threads),
        l0,
        eval: None,
    };
    Ok(CompareConfig {
        base,
        methods,
        targets,
        out_dir: a.out_dir.clone(),
        keep_models: a.keep_models,
        speed_batch: a.speed_batch,
        focus,
        eval_text: a.eval_text.clone(),
        globs: (a.only.clone(), a.skip.clone()),
    })
}

fn bar(quiet: bool) -> ProgressBar {
    let bar = if quiet {
        ProgressBar::hidden()
    } else {
        ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr())
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{spinner} comparing [{bar:24}] {pos}/{len} solves, {elapsed} elapsed, ETA {eta} \
             {wide_msg}",
        )
        .expect("valid template")
        .progress_chars("=> "),
    );
    bar
}

/// `lopper compare`.
pub fn compare(a: &CompareArgs) -> Result<(), Failure> {
    let cfg = compare_config(a).map_err(Failure::usage)?;
    std::env::set_var("RAYON_NUM_THREADS", cfg.base.threads.to_string());
    let _ = rayon::ThreadPoolBuilder::new().num_threads(cfg.base.threads).build_global();
    let bar = bar(a.quiet);
    let control = Arc::new(Control::default());
    {
        let (c, b) = (Arc::clone(&control), bar.clone());
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
                c.remove_scratch();
                b.abandon();
                eprintln!("lopper: stopped at once; comparison.json holds the last checkpoint");
                std::process::exit(EXIT_INTERRUPTED);
            }
        });
    }
    let on_progress = |p: Progress<'_>| match p {
        Progress::Start(n) => bar.set_length(n as u64),
        Progress::Layer(name) => bar.set_message(format!("{name}: statistics")),
        Progress::Solve(name, run) => bar.set_message(format!("{name}: {run}")),
        Progress::Done(k) => bar.set_position(k as u64),
        Progress::Writing => bar.set_message("writing models"),
    };
    let outcome = compare::compare(&cfg, &on_progress, &control);
    bar.finish_and_clear();
    let outcome = outcome.map_err(|e| Failure {
        code: if e.kind() == ErrorKind::Input { super::EXIT_USAGE } else { super::EXIT_FAILURE },
        message: e.to_string(),
    })?;
    let c = &outcome.comparison;
    if !a.quiet {
        print!("{}", table::render(&[outcome.source()]));
        for o in &outcome.outputs {
            println!("wrote {}", o.display());
        }
        println!("note: {}", c.notice);
    }
    if c.status == Status::Interrupted {
        let done: usize = c.runs.iter().map(|r| r.layers.len()).sum();
        let total = c.runs.len() * c.layers.len();
        return Err(Failure {
            code: EXIT_INTERRUPTED,
            message: format!(
                "interrupted: {done} of {total} solves finished and are kept in {}",
                cfg.out_dir.join(compare::JSON_NAME).display()
            ),
        });
    }
    Ok(())
}

/// `lopper report`.
pub fn report(a: &ReportArgs) -> Result<(), Failure> {
    let out = crate::pipeline::canonical(&a.output);
    let mut sources: Vec<Source> = Vec::new();
    for p in &a.reports {
        if crate::pipeline::canonical(p) == out {
            return Err(Failure::usage(format!(
                "-o {}: refusing to overwrite the input report",
                a.output.display()
            )));
        }
        sources.push(data::load(p).map_err(Failure::usage)?);
    }
    data::check_compatible(&sources).map_err(Failure::usage)?;
    let focus = match &a.focus {
        None => None,
        Some(f) => {
            let keys = page::targets_of(&sources);
            let key = match f.trim().parse::<f64>() {
                Ok(s) => format!("{s}"),
                Err(_) => parse_pattern(f).map(|(n, m)| format!("{n}:{m}")).unwrap_or_default(),
            };
            if !keys.contains(&key) {
                return Err(Failure::usage(format!(
                    "--focus {f} is not a target of these reports ({})",
                    keys.join(", ")
                )));
            }
            Some(key)
        }
    };
    if a.output.is_dir() {
        return Err(Failure::usage(format!(
            "-o {}: is a folder; give the page's file name",
            a.output.display()
        )));
    }
    let html = page::render(&sources, focus.as_deref());
    crate::io::write_atomic(&a.output, |w| std::io::Write::write_all(w, html.as_bytes()))
        .map_err(|e| Failure::usage(e.to_string()))?;
    if !a.quiet {
        print!("{}", table::render(&sources));
        println!("wrote {}", a.output.display());
    }
    Ok(())
}
