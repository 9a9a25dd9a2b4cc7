//! Peak memory and disk of a prune run, estimated from the shapes and
//! settings before any work, and checked against the machine.
//!
//! This module owns the estimate's arithmetic ([`estimate`], pure) and the
//! check ([`check`]: `MemAvailable` from `/proc/meminfo`, free space of the
//! output folder's file system). Byte counts, with `d` the model width,
//! `S × L` the calibration windows, and per layer `[d_out, d_in]`:
//! - hidden states: `2·S·L·d·4` (a block's inputs and outputs, f32);
//! - a batch's activations: `4096·max(d_in)·4·8` (about 4k rows; the
//!   widest group input and the few tensors a block computes from it);
//! - weights: the current block's f32 linear weights when read block by
//!   block; with `--whole-model` every layer's f32 weight plus every pruned
//!   layer's f64 values waiting to be written;
//! - Gram matrices: `2·d_in²·8` per group of the block (fitted and
//!   held-out);
//! - the solve of the block's costliest layer: `W` and its copies
//!   (`4·d_out·d_in·8`) plus the solver's own estimate
//!   ([`crate::solve::memory_estimate`]);
//! - every tensor outside the blocks (embeddings, output head, final norm)
//!   in f32; with `--whole-model` also the blocks' unselected tensors.

use crate::error::{Error, Result};
use crate::io::Model;
use crate::solve::memory_estimate;
use crate::source::{LayerSource, Planned};
use std::collections::BTreeSet;
use std::path::Path;

/// Runs whose estimated peak memory or output size reaches this many bytes
/// (1 GiB) print the estimate before starting.
pub const NOTE_FROM: u128 = 1 << 30;

/// The estimate's parts, in bytes.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Estimate {
    /// Hidden states of every window at one block.
    pub states: u128,
    /// One batch's activations.
    pub batch: u128,
    /// Tensors outside the blocks, in f32.
    pub other: u128,
    /// Linear weights held (one block, or all with the pruned values).
    pub weights: u128,
    /// Gram matrices of the costliest block.
    pub grams: u128,
    /// Solving its costliest layer.
    pub solve: u128,
    /// The costliest block's index and its costliest layer.
    pub block: usize,
    /// Name of that layer.
    pub layer: String,
    /// Bytes the output files take.
    pub disk: u128,
}

impl Estimate {
    /// Peak resident bytes.
    pub fn peak(&self) -> u128 {
        self.states + self.batch + self.other + self.weights + self.grams + self.solve
    }

    /// One line for the user.
    pub fn line(&self) -> String {
        format!(
            "estimated peak memory {} (hidden states {}, block {} weights {}, Gram matrices {}, \
             solving '{}' {}, embeddings and other tensors {}); output {} on disk",
            gib(self.peak()),
            gib(self.states),
            self.block,
            gib(self.weights),
            gib(self.grams),
            self.layer,
            gib(self.solve),
            gib(self.other),
            gib(self.disk)
        )
    }
}

fn gib(b: u128) -> String {
    format!("{:.2} GiB", b as f64 / (1u128 << 30) as f64)
}

/// The shapes a run needs to be estimated.
#[derive(Clone, Debug)]
pub struct Shapes<'a> {
    /// Planned layers per block.
    pub blocks: &'a [Vec<Planned>],
    /// `(windows, tokens per window)` of text calibration.
    pub windows: Option<(usize, usize)>,
    /// Bytes of every tensor outside the planned layers, as f32.
    pub other: u128,
    /// Bytes of the output files.
    pub disk: u128,
}

/// Estimate the peak of a run of `method`s over `shapes`; `whole_model`
/// holds every weight (see the module docs).
pub fn estimate(shapes: &Shapes<'_>, methods: &[crate::solve::Method], whole: bool) -> Estimate {
    let all = shapes.blocks.iter().flatten();
    let d = all.clone().map(|l| l.shape[1]).min().unwrap_or(0) as u128;
    let widest = all.clone().map(|l| l.shape[1]).max().unwrap_or(0) as u128;
    let rect = |l: &Planned| l.shape[0] as u128 * l.shape[1] as u128;
    let states = shapes.windows.map_or(0, |(s, l)| 2 * s as u128 * l as u128 * d * 4);
    let batch = if shapes.windows.is_some() { 4096 * widest * 4 * 8 } else { 0 };
    let all_weights: u128 = all.clone().map(|l| rect(l) * (4 + 8)).sum();
    let mut best = Estimate::default();
    for (b, layers) in shapes.blocks.iter().enumerate() {
        let groups: BTreeSet<(usize, usize)> =
            layers.iter().map(|l| (l.group, l.shape[1])).collect();
        let grams: u128 = groups.iter().map(|&(_, i)| 2 * (i as u128).pow(2) * 8).sum();
        let weights = if whole { all_weights } else { layers.iter().map(|l| rect(l) * 4).sum() };
        let Some((layer, solve)) = layers
            .iter()
            .map(|l| {
                let m = methods.iter().map(|&m| memory_estimate(l.shape[0], l.shape[1], m));
                (l, 4 * rect(l) * 8 + m.max().unwrap_or(0))
            })
            .max_by_key(|p| p.1)
        else {
            continue;
        };
        let e = Estimate {
            states,
            batch,
            other: shapes.other,
            weights,
            grams,
            solve,
            block: b,
            layer: layer.name.clone(),
            disk: shapes.disk,
        };
        if e.peak() > best.peak() {
            best = e;
        }
    }
    best
}

/// Estimate the run and refuse it, before any work, when it would not fit
/// in the memory the system has available or the output would not fit on
/// its disk. Returns the estimate for the user.
///
/// # Errors
/// [`crate::ErrorKind::Usage`] naming the largest part and what would make
/// the run fit.
pub fn check(
    model: &Model,
    target: &crate::driver::Target,
    output: &Path,
    src: &dyn LayerSource,
    whole: bool,
) -> Result<Estimate> {
    let planned: BTreeSet<&str> = src.blocks().iter().flatten().map(|l| l.name.as_str()).collect();
    // Tensors of no block (embeddings, head, final norm) are held all
    // along; a block's other tensors only with its block, unless the whole
    // model is read.
    let in_block =
        |n: &str| n.split('.').any(|p| !p.is_empty() && p.bytes().all(|b| b.is_ascii_digit()));
    let other = model
        .tensors()
        .iter()
        .filter(|t| !planned.contains(t.name.as_str()) && (whole || !in_block(&t.name)))
        .map(|t| t.params() as u128 * 4)
        .sum();
    let disk = model
        .input_files()
        .iter()
        .filter_map(|p| std::fs::metadata(p).ok())
        .map(|m| m.len() as u128)
        .sum();
    let desc = src.description();
    let windows = desc
        .as_ref()
        .and_then(|d| Some((d["samples"].as_u64()? as usize, d["seq_len"].as_u64()? as usize)));
    let shapes = Shapes { blocks: src.blocks(), windows, other, disk };
    let e = estimate(&shapes, &[target.method], whole);
    if let Some(avail) = crate::source::available_memory() {
        if e.peak() > avail {
            let parts = [
                (e.states, "the calibration windows' hidden states: use fewer --samples or a smaller --seq-len"),
                (e.grams + e.solve, "the Gram matrices and solve of the widest layer: use a lighter --method, or --skip it"),
                (e.weights, "the weights held: drop --whole-model"),
                (e.other, "the embeddings and other tensors outside the blocks"),
            ];
            let (_, why) = parts.iter().max_by_key(|p| p.0).expect("non-empty");
            return Err(Error::usage(format!(
                "the run needs about {} of memory at block {} (layer '{}'), but {} is available; \
                 the largest part is {why}",
                gib(e.peak()),
                e.block,
                e.layer,
                gib(avail)
            )));
        }
    }
    if let Some(free) = free_disk(output) {
        if e.disk > free {
            return Err(Error::usage(format!(
                "-o {}: the output takes about {} but its file system has {} free",
                output.display(),
                gib(e.disk),
                gib(free)
            )));
        }
    }
    Ok(e)
}

/// Free bytes on the file system of `path`'s nearest existing folder.
fn free_disk(path: &Path) -> Option<u128> {
    let mut p = path.to_path_buf();
    while !p.exists() {
        p = match p.parent() {
            Some(q) if !q.as_os_str().is_empty() => q.to_path_buf(),
            _ => std::path::PathBuf::from("."),
        };
    }
    let c = std::ffi::CString::new(p.as_os_str().as_encoded_bytes()).ok()?;
    let mut s: libc::statvfs = unsafe { std::mem::zeroed() };
    // SAFETY: `c` is a NUL-terminated path and `s` a valid out-pointer.
    let rc = unsafe { libc::statvfs(c.as_ptr(), &mut s) };
    (rc == 0).then(|| s.f_bavail as u128 * s.f_frsize as u128)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::solve::Method;

    fn layer(name: &str, shape: [usize; 2], group: usize) -> Planned {
        Planned {
            name: name.into(),
            shape,
            dtype: crate::io::Dtype::BF16,
            transposed: false,
            group,
        }
    }

    #[test]
    fn the_costliest_block_and_layer_are_named() {
        // Two blocks; the second has the wider input. Byte counts by hand
        // from the formulas in the module docs.
        let blocks =
            vec![vec![layer("a", [8, 4], 0)], vec![layer("b", [4, 8], 0), layer("c", [2, 8], 0)]];
        let shapes = Shapes { blocks: &blocks, windows: Some((2, 3)), other: 100, disk: 7 };
        let e = estimate(&shapes, &[Method::Magnitude], false);
        assert_eq!(e.block, 1);
        assert_eq!(e.states, 2 * 2 * 3 * 4 * 4);
        assert_eq!(e.grams, 2 * 64 * 8);
        assert_eq!(e.weights, (32 + 16) * 4);
        // 4·rect·8 + magnitude's sq + 3·rect (in f64 bytes).
        assert_eq!(e.solve, 4 * 32 * 8 + 64 * 8 + 3 * 32 * 8);
        assert_eq!(e.batch, 4096 * 8 * 4 * 8);
        assert_eq!(e.peak(), e.states + e.batch + 100 + e.weights + e.grams + e.solve);
        // The whole model holds every weight in f32 and f64.
        let w = estimate(&shapes, &[Method::Magnitude], true);
        assert_eq!(w.weights, (32 + 32 + 16) * 12);
        assert!(e.line().contains("solving 'b'"), "{}", e.line());
    }
}
