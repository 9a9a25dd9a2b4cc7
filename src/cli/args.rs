//! Raw command-line flags (clap). Validation into a config happens in
//! [`super::config`].

use clap::{ArgGroup, Args, Parser, Subcommand, ValueEnum};
use std::path::PathBuf;

/// Prune the linear layers of a trained network to a target sparsity, layer
/// by layer, by least-squares reconstruction of their outputs on
/// calibration activations.
#[derive(Debug, Parser)]
#[command(name = "lopper", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// List a model's tensors and which of them lopper would prune.
    Inspect(InspectArgs),
    /// Prune a model's linear layers and write the pruned model and a report.
    Prune(Box<PruneArgs>),
    /// Time each pruned layer's product, dense against sparse, on this CPU.
    Speed(SpeedArgs),
    /// Write a pruned model's sparse layers to a compact .sprig file.
    Pack(PackArgs),
}

/// `lopper inspect`.
#[derive(Debug, Args)]
pub struct InspectArgs {
    /// A .safetensors file, a *.safetensors.index.json, or a model directory.
    pub model: PathBuf,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Treat only 2-D float tensors matching GLOB as prunable (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub only: Vec<String>,
    /// Never treat tensors matching GLOB as prunable (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub skip: Vec<String>,
}

/// Solver choice on the command line.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum MethodArg {
    /// Keep the largest |w|.
    Magnitude,
    /// Keep the largest |w|·‖x_j‖ (input-norm scaled magnitude).
    Scaled,
    /// One-shot Optimal Brain Surgeon column sweep.
    Obs,
    /// L0-constrained ridge least squares by local search.
    L0,
}

/// Where an unstructured budget applies.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ScopeArg {
    /// Every output row keeps the same number of weights.
    Row,
    /// One budget for the whole layer.
    Layer,
}

/// `lopper prune`.
#[derive(Debug, Args)]
#[command(group(ArgGroup::new("target").required(true).args(["sparsity", "pattern"])))]
pub struct PruneArgs {
    /// A .safetensors file, a *.safetensors.index.json, or a model directory.
    pub model: PathBuf,
    /// Safetensors file of calibration inputs: per pruned layer, a tensor
    /// named like its weight, shape [rows, d_in].
    #[arg(long, value_name = "FILE")]
    pub activations: PathBuf,
    /// Fraction of weights to zero, in [0, 1).
    #[arg(long, value_name = "S", allow_negative_numbers = true)]
    pub sparsity: Option<f64>,
    /// N:M pattern instead of --sparsity: at most N nonzeros in each group of
    /// M consecutive inputs of a row (e.g. 2:4).
    #[arg(long, value_name = "N:M", conflicts_with_all = ["sparsity", "scope"])]
    pub pattern: Option<String>,
    /// Where the --sparsity budget applies.
    #[arg(long, value_enum, default_value = "row")]
    pub scope: ScopeArg,
    /// Solver.
    #[arg(long, value_enum, default_value = "l0")]
    pub method: MethodArg,
    /// Output: a .safetensors file for a single-file model, a directory for
    /// a sharded model or a model directory.
    #[arg(short = 'o', long = "output", value_name = "OUT")]
    pub output: PathBuf,
    /// Also write the report as JSON to FILE.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Write the local-search objective after every sweep as JSON lines.
    #[arg(long, value_name = "FILE")]
    pub trace: Option<PathBuf>,
    /// Ridge α (λ = α·mean(diag(XᵀX))), or `auto`: per layer, the α in
    /// {0.01, 0.03, 0.1, 0.3, 1} with the lowest error on the held-out rows
    /// [default: auto, or 0.01 for a layer without held-out rows]
    #[arg(long, value_name = "ALPHA|auto", allow_hyphen_values = true)]
    pub ridge: Option<String>,
    /// Fraction of activation rows held out from the solver to measure
    /// overfitting, in [0, 1).
    #[arg(long, value_name = "F", default_value_t = 0.1, allow_negative_numbers = true)]
    pub holdout: f64,
    /// Prune only 2-D float tensors matching GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub only: Vec<String>,
    /// Do not prune tensors matching GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub skip: Vec<String>,
    /// Local search: most swap sweeps per layer [default: 20]
    #[arg(long, value_name = "N")]
    pub max_sweeps: Option<usize>,
    /// Local search: most seconds per layer, checked between sweeps
    /// [default: no limit]
    #[arg(long, value_name = "SECS")]
    pub layer_seconds: Option<f64>,
    /// Worker threads (0 = all cores).
    #[arg(long, value_name = "N", default_value_t = 0)]
    pub threads: usize,
    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// `lopper speed`.
#[derive(Debug, Args)]
pub struct SpeedArgs {
    /// A pruned model: .safetensors file, *.safetensors.index.json, or
    /// model directory.
    pub model: PathBuf,
    /// Batch sizes (rows of x in y = x Wᵀ), comma-separated.
    #[arg(long, value_name = "B,B,..", value_delimiter = ',', default_value = "1,8,64")]
    pub batch: Vec<usize>,
    /// Worker threads (0 = all cores).
    #[arg(long, value_name = "N", default_value_t = 0)]
    pub threads: usize,
    /// Seconds of sampling per kernel and batch size, at least.
    #[arg(long, value_name = "SECS", default_value_t = 0.2, allow_negative_numbers = true)]
    pub min_time: f64,
    /// Read weights from main memory, as when a model larger than the CPU
    /// cache runs layer after layer: cycle through copies of each weight
    /// adding up to 512 MiB. Default: one copy, cache-resident if it fits.
    #[arg(long)]
    pub streamed: bool,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Time only 2-D float tensors matching GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub only: Vec<String>,
    /// Do not time tensors matching GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub skip: Vec<String>,
    /// No progress bar.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// `lopper pack`.
#[derive(Debug, Args)]
pub struct PackArgs {
    /// A pruned model: .safetensors file, *.safetensors.index.json, or
    /// model directory.
    pub model: PathBuf,
    /// Output .sprig file (docs/pack-format.md).
    #[arg(short = 'o', long = "output", value_name = "FILE")]
    pub output: PathBuf,
    /// Pack only 2-D float tensors matching GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub only: Vec<String>,
    /// Do not pack tensors matching GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub skip: Vec<String>,
    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}
