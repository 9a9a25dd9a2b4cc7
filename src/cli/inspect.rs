//! `lopper inspect`: every tensor, its size, its zeros, and whether it would
//! be pruned.

use super::args::InspectArgs;
use super::config::selection;
use crate::error::{Error, Result};
use crate::io::Model;
use serde::Serialize;

#[derive(Serialize)]
struct Row {
    name: String,
    dtype: String,
    shape: Vec<usize>,
    params: usize,
    zero_fraction: f64,
    prunable: bool,
}

#[derive(Serialize)]
struct Totals {
    tensors: usize,
    params: usize,
    zero_fraction: f64,
    prunable_tensors: usize,
    prunable_params: usize,
}

#[derive(Serialize)]
struct Listing {
    model: String,
    tensors: Vec<Row>,
    totals: Totals,
}

pub(super) fn run(a: &InspectArgs) -> Result<()> {
    let model = Model::open(&a.model)?;
    let sel = selection(&a.selection);
    let infos = model.tensors();
    let names: Vec<&str> = infos.iter().map(|t| t.name.as_str()).collect();
    if let Some(g) = sel.unmatched_only(&names).first() {
        return Err(Error::usage(format!(
            "--only '{g}' matches no tensor in {}",
            a.model.display()
        )));
    }
    let mut rows = Vec::with_capacity(infos.len());
    for t in &infos {
        let zero_fraction = model.zero_fraction(&t.name)?;
        rows.push(Row {
            name: t.name.clone(),
            dtype: format!("{:?}", t.dtype),
            shape: t.shape.clone(),
            params: t.params(),
            zero_fraction,
            prunable: sel.selects(&t.name, &t.shape, t.is_float()),
        });
    }
    let params: usize = rows.iter().map(|r| r.params).sum();
    let zeros: f64 = rows.iter().map(|r| r.zero_fraction * r.params as f64).sum();
    let totals = Totals {
        tensors: rows.len(),
        params,
        zero_fraction: if params > 0 { zeros / params as f64 } else { 0.0 },
        prunable_tensors: rows.iter().filter(|r| r.prunable).count(),
        prunable_params: rows.iter().filter(|r| r.prunable).map(|r| r.params).sum(),
    };
    let listing = Listing { model: a.model.display().to_string(), tensors: rows, totals };
    if a.json {
        println!("{}", serde_json::to_string_pretty(&listing).expect("listing serialises"));
    } else {
        print!("{}", table(&listing));
    }
    Ok(())
}

fn table(l: &Listing) -> String {
    use std::fmt::Write as _;
    let w = l
        .tensors
        .iter()
        .map(|r| crate::io::escape(&r.name).chars().count())
        .max()
        .unwrap_or(6)
        .max(6);
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{:<w$}  {:<5}  {:>15}  {:>12}  {:>7}  prune",
        "tensor", "dtype", "shape", "params", "zeros"
    );
    for r in &l.tensors {
        let shape = r.shape.iter().map(|d| d.to_string()).collect::<Vec<_>>().join("x");
        let _ = writeln!(
            s,
            "{:<w$}  {:<5}  {:>15}  {:>12}  {:>6.2}%  {}",
            crate::io::escape(&r.name),
            r.dtype,
            shape,
            r.params,
            100.0 * r.zero_fraction,
            if r.prunable { "yes" } else { "-" }
        );
    }
    let t = &l.totals;
    let _ = writeln!(
        s,
        "{} tensors, {} parameters ({:.2}% zeros); {} prunable tensors with {} parameters ({:.1}%)",
        t.tensors,
        t.params,
        100.0 * t.zero_fraction,
        t.prunable_tensors,
        t.prunable_params,
        if t.params > 0 { 100.0 * t.prunable_params as f64 / t.params as f64 } else { 0.0 }
    );
    s
}
