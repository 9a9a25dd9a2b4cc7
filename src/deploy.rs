//! From a pruned model to sparse layers: which layers count as pruned, the
//! layout each one gets, packing them into a `.sprig` file (`lopper pack`),
//! and timing them against the dense product (`lopper speed`).
//!
//! Entry points: [`pack`] and [`measure`]; both take a [`Model`] already
//! opened. A layer counts as pruned when the selection picks it (by default
//! every 2-D float `*.weight` that is not an embedding, norm or head; see
//! [`crate::select`]) and at least one of its weights is zero. Its layout
//! comes from [`crate::sparse::choose_layout`], hinted by the `lopper.pattern` metadata
//! that `lopper prune --pattern N:M` writes.
//!
//! Timing ([`median_seconds`]): one warm-up call, then samples of enough
//! calls to last about 2 ms each, until `min_time` has passed and at least
//! 7 samples are in; the median sample is reported.

use std::hint::black_box;
use std::path::Path;
use std::time::Instant;

use serde::Serialize;

use crate::error::{Error, ErrorKind};
use crate::io::{self, Model, PackedLayer, TensorInfo};
use crate::select::Selection;
use crate::sparse::{dense_matmul, DenseKernel, Par, SparseWeight};

/// The `N:M` pattern recorded in the model's `lopper.pattern` metadata, if
/// any file of the model has one that parses.
pub fn pattern_hint(model: &Model) -> Option<(usize, usize)> {
    model.files().iter().find_map(|f| {
        let p = f.metadata()?.get("lopper.pattern")?;
        let (n, m) = p.split_once(':')?;
        Some((n.trim().parse().ok()?, m.trim().parse().ok()?))
    })
}

/// The model's pruned layers (see the module docs), sorted by name.
///
/// # Errors
/// [`ErrorKind::Input`] if an `--only` glob matches nothing, or a tensor's
/// zeros cannot be counted.
pub fn pruned_layers<'a>(model: &'a Model, sel: &Selection) -> Result<Vec<&'a TensorInfo>, Error> {
    let all = model.tensors();
    let names: Vec<&str> = all.iter().map(|t| t.name.as_str()).collect();
    if let Some(g) = sel.unmatched_only(&names).first() {
        return Err(Error::new(
            ErrorKind::Usage,
            format!("--only '{g}' matches no tensor in {}", model.layout().root().display()),
        ));
    }
    let mut out = Vec::new();
    for t in all {
        if sel.selects(&t.name, &t.shape, t.is_float()) && model.zero_fraction(&t.name)? > 0.0 {
            out.push(t);
        }
    }
    Ok(out)
}

fn no_layers(model: &Model) -> Error {
    Error::new(
        ErrorKind::Input,
        format!(
            "{}: no pruned layer (a selected 2-D float weight with zeros); prune it with \
             `lopper prune` first, or choose layers with --only",
            model.layout().root().display()
        ),
    )
}

/// Read `t` as f32 and store it sparse.
fn load_sparse(
    model: &Model,
    t: &TensorInfo,
    hint: Option<(usize, usize)>,
) -> Result<(Vec<f32>, SparseWeight), Error> {
    let file = model.file_of(&t.name).expect("listed tensors have a file");
    let w = file.read_f32(&t.name)?.into_owned();
    let (d_out, d_in) = (t.shape[0], t.shape[1]);
    let sparse = SparseWeight::from_dense(&w, d_out, d_in, hint).map_err(|e| {
        Error::new(ErrorKind::Input, format!("{}: tensor '{}': {e}", file.path().display(), t.name))
    })?;
    Ok((w, sparse))
}

/// Pack the model's pruned layers into `out` and return them. Refuses to
/// write over any input file of the model.
///
/// # Errors
/// [`ErrorKind::Input`] for unreadable tensors, no pruned layer, or `out`
/// naming an input; [`ErrorKind::Output`] if writing fails.
pub fn pack(
    model: &Model,
    sel: &Selection,
    out: &Path,
    progress: &dyn Fn(usize, usize, &str),
) -> Result<Vec<PackedLayer>, Error> {
    crate::outputs::check_distinct(&crate::outputs::input_files(model, &[]), &[("-o", out)])?;
    if out.is_dir() {
        return Err(Error::new(
            ErrorKind::Usage,
            format!(
                "-o {}: is a directory; expected a file name such as model.sprig",
                out.display()
            ),
        ));
    }
    crate::outputs::check_file("-o", out, crate::outputs::Write::Replace)?;
    let layers = pruned_layers(model, sel)?;
    if layers.is_empty() {
        return Err(no_layers(model));
    }
    let hint = pattern_hint(model);
    let mut packed = Vec::with_capacity(layers.len());
    for (i, t) in layers.iter().enumerate() {
        progress(i, layers.len(), &t.name);
        let (_, weight) = load_sparse(model, t, hint)?;
        packed.push(PackedLayer { name: t.name.clone(), source_dtype: t.dtype, weight });
    }
    io::write_pack(out, &packed)?;
    Ok(packed)
}

/// Median seconds per call of `f(i)`, where `i` counts the calls; see the
/// module docs.
pub fn median_seconds(min_time: f64, mut f: impl FnMut(usize)) -> f64 {
    let mut i = 0;
    let t = Instant::now();
    f(i);
    i += 1;
    let once = t.elapsed().as_secs_f64().max(1e-7);
    let reps = ((2e-3 / once).ceil() as usize).clamp(1, 10_000);
    let mut samples = Vec::new();
    let start = Instant::now();
    while samples.len() < 7 || (start.elapsed().as_secs_f64() < min_time && samples.len() < 1000) {
        let t = Instant::now();
        for _ in 0..reps {
            f(i);
            i += 1;
        }
        samples.push(t.elapsed().as_secs_f64() / reps as f64);
    }
    samples.sort_by(f64::total_cmp);
    samples[samples.len() / 2]
}

/// Settings of a [`measure`] run.
#[derive(Clone, Debug, PartialEq)]
pub struct SpeedConfig {
    /// Batch sizes to time.
    pub batches: Vec<usize>,
    /// Worker threads (resolved, >= 1).
    pub threads: usize,
    /// Seconds of sampling per kernel and batch, at least.
    pub min_time: f64,
    /// Which layers.
    pub selection: Selection,
    /// Cycle through copies of each weight adding up to this many bytes, so
    /// it is read from main memory; 0 times one copy (cache-resident when it
    /// fits).
    pub stream_bytes: usize,
}

/// Dense and sparse time at one batch size.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Timing {
    /// Rows of `x`.
    pub batch: usize,
    /// Median seconds of the dense product.
    pub dense_seconds: f64,
    /// Median seconds of the sparse product.
    pub sparse_seconds: f64,
    /// `dense_seconds / sparse_seconds`.
    pub speedup: f64,
}

/// One layer's figures.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct LayerSpeed {
    /// Tensor name.
    pub name: String,
    /// `[d_out, d_in]`.
    pub shape: [usize; 2],
    /// Fraction of zero weights.
    pub zero_fraction: f64,
    /// `rows` or `N:M`.
    pub layout: String,
    /// Bits per stored index.
    pub index_bits: usize,
    /// Bytes the dense product reads: `4 · d_out · d_in`.
    pub dense_bytes: usize,
    /// Bytes the sparse product reads: values, indices, row offsets.
    pub sparse_bytes: usize,
    /// One entry per batch size.
    pub timings: Vec<Timing>,
}

/// Sums over layers.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SpeedTotals {
    /// Layers timed.
    pub layers: usize,
    /// Sum of `dense_bytes`.
    pub dense_bytes: usize,
    /// Sum of `sparse_bytes`.
    pub sparse_bytes: usize,
    /// Per batch size, summed times (an estimate for all the pruned linear
    /// layers run once each) and their ratio.
    pub timings: Vec<Timing>,
}

/// Everything `lopper speed` reports.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SpeedReport {
    /// The model path.
    pub model: String,
    /// Worker threads.
    pub threads: usize,
    /// `resident` (one copy) or `streamed` (copies larger than the cache).
    pub weights: String,
    /// Minimum sampling time per kernel and batch.
    pub min_time: f64,
    /// Per layer, sorted by name.
    pub layers: Vec<LayerSpeed>,
    /// Sums.
    pub totals: SpeedTotals,
}

/// Deterministic inputs: `n` values uniform in [-1, 1) from the crate's
/// seeded generator.
fn inputs(n: usize, seed: u64) -> Vec<f32> {
    crate::rng::SplitMix64::new(seed).values(n)
}

/// Time every pruned layer of `model`, dense against sparse, at every batch
/// size. `progress(done, total, layer)` is called before each layer.
///
/// # Errors
/// [`ErrorKind::Input`] for unreadable tensors or no pruned layer;
/// [`ErrorKind::Mismatch`] if a sparse product differs from the dense one by
/// more than rounding allows.
pub fn measure(
    model: &Model,
    cfg: &SpeedConfig,
    progress: &dyn Fn(usize, usize, &str),
) -> Result<SpeedReport, Error> {
    let layers = pruned_layers(model, &cfg.selection)?;
    if layers.is_empty() {
        return Err(no_layers(model));
    }
    let hint = pattern_hint(model);
    let par = if cfg.threads <= 1 { Par::Seq } else { Par::rayon(cfg.threads) };
    let mut out = Vec::with_capacity(layers.len());
    for (i, t) in layers.iter().enumerate() {
        progress(i, layers.len(), &t.name);
        let (d_out, d_in) = (t.shape[0], t.shape[1]);
        let (w, sparse) = load_sparse(model, t, hint)?;
        let (dense_bytes, sparse_bytes) = (4 * d_out * d_in, sparse.weight_bytes());
        let copies = |bytes: usize| cfg.stream_bytes.div_ceil(bytes.max(1)).max(1);
        let dense_copies: Vec<Vec<f32>> = (0..copies(dense_bytes)).map(|_| w.clone()).collect();
        let sparse_copies: Vec<SparseWeight> =
            (0..copies(sparse_bytes)).map(|_| sparse.clone()).collect();
        let mut timings = Vec::with_capacity(cfg.batches.len());
        for &b in &cfg.batches {
            let x = inputs(b * d_in, 0x5EED + b as u64);
            let mut yd = vec![0.0f32; b * d_out];
            let mut ys = vec![0.0f32; b * d_out];
            let mut work = vec![0.0f32; sparse.matmul_workspace(b)];
            let dense_seconds = median_seconds(cfg.min_time, |k| {
                let w = &dense_copies[k % dense_copies.len()];
                dense_matmul(w, d_out, d_in, &x, b, &mut yd, DenseKernel::Auto, par);
                black_box(&yd);
            });
            let sparse_seconds = median_seconds(cfg.min_time, |k| {
                sparse_copies[k % sparse_copies.len()].matmul(&x, b, &mut ys, &mut work, par);
                black_box(&ys);
            });
            check_agreement(&w, d_in, &x, &yd, &ys, &t.name)?;
            timings.push(Timing {
                batch: b,
                dense_seconds,
                sparse_seconds,
                speedup: dense_seconds / sparse_seconds,
            });
        }
        let zeros = w.iter().filter(|v| **v == 0.0).count();
        out.push(LayerSpeed {
            name: t.name.clone(),
            shape: [d_out, d_in],
            zero_fraction: zeros as f64 / w.len() as f64,
            layout: sparse.layout().to_string(),
            index_bits: sparse.index_bits(),
            dense_bytes,
            sparse_bytes,
            timings,
        });
    }
    progress(layers.len(), layers.len(), "");
    let totals = SpeedTotals {
        layers: out.len(),
        dense_bytes: out.iter().map(|l| l.dense_bytes).sum(),
        sparse_bytes: out.iter().map(|l| l.sparse_bytes).sum(),
        timings: cfg
            .batches
            .iter()
            .enumerate()
            .map(|(k, &batch)| {
                let d: f64 = out.iter().map(|l| l.timings[k].dense_seconds).sum();
                let s: f64 = out.iter().map(|l| l.timings[k].sparse_seconds).sum();
                Timing { batch, dense_seconds: d, sparse_seconds: s, speedup: d / s }
            })
            .collect(),
    };
    Ok(SpeedReport {
        model: model.layout().root().display().to_string(),
        threads: cfg.threads,
        weights: if cfg.stream_bytes > 0 { "streamed" } else { "resident" }.to_string(),
        min_time: cfg.min_time,
        layers: out,
        totals,
    })
}

/// The dense and sparse outputs must agree to within the rounding of two
/// summation orders: `|y_d − y_s| <= 2 γ_{d_in} Σ_k |w_jk x_ik|` (Higham,
/// Accuracy and Stability of Numerical Algorithms, eq. 3.5), bounded here by
/// `max|w| · Σ_k |x_ik|`.
fn check_agreement(
    w: &[f32],
    d_in: usize,
    x: &[f32],
    yd: &[f32],
    ys: &[f32],
    name: &str,
) -> Result<(), Error> {
    let wmax = w.iter().fold(0.0f64, |m, v| m.max(f64::from(v.abs())));
    let u = f64::from(f32::EPSILON);
    let d_out = w.len() / d_in.max(1);
    for (i, xi) in x.chunks(d_in.max(1)).enumerate() {
        let xs: f64 = xi.iter().map(|v| f64::from(v.abs())).sum();
        let tol = 4.0 * (d_in as f64 + 1.0) * u * wmax * xs + f64::from(f32::MIN_POSITIVE);
        for j in 0..d_out {
            let (a, b) = (f64::from(yd[i * d_out + j]), f64::from(ys[i * d_out + j]));
            if (a - b).abs() > tol || a.is_nan() != b.is_nan() {
                return Err(Error::new(
                    ErrorKind::Mismatch,
                    format!(
                        "tensor '{name}': sparse product differs from dense at row {i}, output \
                         {j}: {b} against {a} (tolerance {tol:e}); please report this"
                    ),
                ));
            }
        }
    }
    Ok(())
}
