//! Raw command-line flags (clap). Flags that several commands share are
//! defined once, as groups flattened into each command: [`SelectionArgs`],
//! [`CalibrationArgs`], [`SolverArgs`] and [`RunArgs`]. Validation into
//! typed configs happens in [`super::config`].

use crate::driver::allocate::Spread;
use crate::driver::Ridge;
use crate::solve::{Method, Scope};
use clap::builder::PossibleValue;
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
    /// Compare a pruned model's outputs with its dense original on text.
    Eval(EvalArgs),
    /// Run several methods at several sparsities on the same calibration
    /// data and write comparison.json and comparison.html.
    Compare(Box<CompareArgs>),
    /// Put saved reports (prune --report files, comparison.json) side by
    /// side on one page.
    Report(ReportArgs),
    /// Time each pruned layer's product, dense against sparse, on this CPU.
    Speed(SpeedArgs),
    /// Write a pruned model's sparse layers to a compact .sprig file.
    Pack(PackArgs),
    /// Time the whole model end to end on this CPU: dense against pruned
    /// with sparse kernels (encoders: sentences/s; decoders: prefill and
    /// cached decode).
    Latency(LatencyArgs),
}

impl ValueEnum for Method {
    fn value_variants<'a>() -> &'a [Self] {
        &Method::ALL
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        let help = match self {
            Method::Magnitude => "Keep the largest |w|",
            Method::Scaled => "Keep the largest |w|·‖x_j‖ (input-norm scaled magnitude)",
            Method::Obs => "One-shot Optimal Brain Surgeon column sweep",
            Method::L0 => "L0-constrained ridge least squares by local search",
        };
        Some(PossibleValue::new(self.name()).help(help))
    }
}

impl ValueEnum for Scope {
    fn value_variants<'a>() -> &'a [Self] {
        &[Scope::Row, Scope::Layer]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        let help = match self {
            Scope::Row => "Every output row keeps the same number of weights",
            Scope::Layer => "One budget for the whole layer",
        };
        Some(PossibleValue::new(self.name()).help(help))
    }
}

impl ValueEnum for Spread {
    fn value_variants<'a>() -> &'a [Self] {
        &[Spread::Uniform, Spread::Outlier, Spread::Measured]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        let help = match self {
            Spread::Uniform => "Every layer at --sparsity",
            Spread::Outlier => "Per block, shifted against its outlier ratio (Yin et al. 2024)",
            Spread::Measured => {
                "Measured error curves and output sensitivities, allocated to the least \
                 predicted change of the final hidden states (text calibration)"
            }
        };
        Some(PossibleValue::new(self.name()).help(help))
    }
}

/// How an overall --sparsity is spread over the layers.
#[derive(Debug, Args, Clone)]
#[command(next_help_heading = "Per-layer sparsity")]
pub struct SpreadArgs {
    /// --sparsity is the overall fraction of zeros over the selected
    /// weights; this chooses each layer's share.
    #[arg(long, value_enum, default_value = "uniform")]
    pub spread: Spread,
    /// With --spread: no layer sparser than this.
    #[arg(long, value_name = "S", default_value_t = 0.95, allow_negative_numbers = true)]
    pub layer_max: f64,
    /// With --spread: no layer denser than this.
    #[arg(long, value_name = "S", default_value_t = 0.0, allow_negative_numbers = true)]
    pub layer_min: f64,
}

/// Which tensors a command works on.
#[derive(Debug, Args, Clone)]
#[command(next_help_heading = "Layer selection")]
pub struct SelectionArgs {
    /// Only 2-D float tensors whose name matches GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub only: Vec<String>,
    /// Leave out tensors whose name matches GLOB (repeatable).
    #[arg(long, value_name = "GLOB")]
    pub skip: Vec<String>,
}

/// Where the calibration inputs come from, and held-out text.
#[derive(Debug, Args)]
#[command(next_help_heading = "Calibration")]
#[command(group(ArgGroup::new("calibration").required(true).args(["activations", "text"])))]
pub struct CalibrationArgs {
    /// Safetensors file of calibration inputs: per pruned layer, a tensor
    /// named like its weight, shape [rows, d_in].
    #[arg(long, value_name = "FILE")]
    pub activations: Option<PathBuf>,
    /// UTF-8 calibration text, run through the model itself (MODEL must be a
    /// directory with config.json and tokenizer.json; model types bert,
    /// llama, mistral, qwen2, gpt2).
    #[arg(long, value_name = "FILE")]
    pub text: Option<PathBuf>,
    /// Text calibration: number of token windows drawn from the text
    /// [default: 128]
    #[arg(long, value_name = "N", allow_hyphen_values = true)]
    pub samples: Option<usize>,
    /// Text calibration: tokens per window, special tokens included
    /// [default: 128 for encoders, 256 for decoders]
    #[arg(long, value_name = "L", allow_hyphen_values = true)]
    pub seq_len: Option<usize>,
    /// Text calibration: seed for drawing the windows [default: 0]
    #[arg(long, value_name = "SEED", allow_hyphen_values = true)]
    pub seed: Option<u64>,
    /// Text calibration: collect every block's inputs from the dense model
    /// instead of from the already pruned blocks before it (compare: every
    /// run then shares one pass).
    #[arg(long)]
    pub no_propagate: bool,
    /// Fraction of activation rows (text: of token windows) held out from
    /// the solver to measure overfitting, in [0, 1).
    #[arg(long, value_name = "F", default_value_t = 0.1, allow_negative_numbers = true)]
    pub holdout: f64,
    /// After pruning, compare the pruned model with the dense one on this
    /// held-out text (as `lopper eval` does; MODEL must be a directory with
    /// config.json and tokenizer.json) and add the end-to-end figures.
    #[arg(long, value_name = "FILE")]
    pub eval_text: Option<PathBuf>,
}

/// How each layer is solved, apart from method and target.
#[derive(Debug, Args)]
#[command(next_help_heading = "Solver")]
pub struct SolverArgs {
    /// Where an unstructured sparsity budget applies.
    #[arg(long, value_enum, default_value = "row")]
    pub scope: Scope,
    /// Ridge α (λ = α·mean(diag(XᵀX))), or `auto`: per layer, the α in
    /// {0.01, 0.03, 0.1, 0.3, 1} with the lowest error on the held-out rows
    /// [default: auto, or 0.01 for a layer without held-out rows]
    #[arg(long, value_name = "ALPHA|auto", allow_hyphen_values = true)]
    pub ridge: Option<String>,
    /// Local search: most swap sweeps per layer [default: 20]
    #[arg(long, value_name = "N", allow_hyphen_values = true)]
    pub max_sweeps: Option<usize>,
    /// Local search: most seconds per layer, checked between sweeps
    /// [default: no limit]
    #[arg(long, value_name = "SECS", allow_hyphen_values = true)]
    pub layer_seconds: Option<f64>,
}

/// How the process runs.
#[derive(Debug, Args)]
#[command(next_help_heading = "Run")]
pub struct RunArgs {
    /// Worker threads (0 = all cores; more than the cores is capped, with a
    /// note).
    #[arg(long, value_name = "N", default_value_t = 0, allow_hyphen_values = true)]
    pub threads: usize,
    /// Print nothing but errors (no progress bar, no table).
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// The flag groups that prune and compare share.
#[derive(Debug, Args)]
pub struct JobArgs {
    /// Where the calibration inputs come from.
    #[command(flatten)]
    pub calibration: CalibrationArgs,
    /// How each layer is solved.
    #[command(flatten)]
    pub solver: SolverArgs,
    /// Which tensors.
    #[command(flatten)]
    pub selection: SelectionArgs,
    /// Threads and output volume.
    #[command(flatten)]
    pub run: RunArgs,
}

/// `lopper prune`.
#[derive(Debug, Args)]
#[command(group(ArgGroup::new("target").required(true).multiple(true)
    .args(["sparsity", "pattern", "remove_neurons", "remove_heads"])))]
pub struct PruneArgs {
    /// A .safetensors file, a *.safetensors.index.json, or a model directory.
    pub model: PathBuf,
    /// Fraction of weights to zero, in [0, 1).
    #[arg(long, value_name = "S", allow_negative_numbers = true)]
    pub sparsity: Option<f64>,
    /// N:M pattern instead of --sparsity: at most N nonzeros in each group of
    /// M consecutive inputs of a row (e.g. 2:4).
    #[arg(long, value_name = "N:M", conflicts_with_all = ["sparsity", "scope"], allow_hyphen_values = true)]
    pub pattern: Option<String>,
    /// Solver.
    #[arg(long, value_enum, default_value = "l0")]
    pub method: Method,
    /// Remove this many FFN neurons from every block, a fraction (0.25) or
    /// a count (384), and write a smaller model (MODEL must be a directory
    /// with config.json). Combines with --sparsity or --pattern, which then
    /// apply to what remains.
    #[arg(long, value_name = "F|N", help_heading = "Structured", allow_hyphen_values = true)]
    pub remove_neurons: Option<String>,
    /// Remove this many key/value heads, each with the query heads that
    /// share it, from every block (model types llama and mistral, whose
    /// config takes head_dim; other configs cannot express fewer heads).
    #[arg(long, value_name = "F|N", help_heading = "Structured", allow_hyphen_values = true)]
    pub remove_heads: Option<String>,
    /// With --method magnitude or scaled: refit the layer that reads the
    /// removed units on the kept ones, instead of only deleting the others
    /// (obs and l0 always refit).
    #[arg(long, help_heading = "Structured")]
    pub refit: bool,
    /// Per-layer sparsities under the overall --sparsity.
    #[command(flatten)]
    pub spread: SpreadArgs,
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
    /// Also prove, per layer, a lower bound on the best objective any mask
    /// of the pattern could reach, and report the certified gap to it
    /// (JSON: lower_bound, certified_gap, rows_proven_optimal).
    #[arg(long)]
    pub certify: bool,
    /// Read the whole model into memory first and write the output at the
    /// end, as lopper did before block streaming (several times the f32
    /// model in memory; the same output bytes; for checking).
    #[arg(long)]
    pub whole_model: bool,
    /// Calibration, solver, selection and run flags.
    #[command(flatten)]
    pub job: JobArgs,
}

/// `lopper compare`.
#[derive(Debug, Args)]
pub struct CompareArgs {
    /// A .safetensors file, a *.safetensors.index.json, or a model directory.
    pub model: PathBuf,
    /// Unstructured targets, fractions of zeros in [0, 1), comma-separated
    /// [default: 0.5,0.7,0.9 when --patterns is not given either]
    #[arg(long, value_name = "S,S,...", value_delimiter = ',', allow_negative_numbers = true)]
    pub sparsities: Vec<f64>,
    /// N:M pattern targets, comma-separated (e.g. 2:4,4:8).
    #[arg(long, value_name = "N:M,...", value_delimiter = ',', allow_hyphen_values = true)]
    pub patterns: Vec<String>,
    /// Methods to run, comma-separated.
    #[arg(long, value_enum, value_delimiter = ',', default_value = "magnitude,scaled,obs,l0")]
    pub methods: Vec<Method>,
    /// Folder for comparison.json, comparison.html and, with --keep-models,
    /// models/<method>-<target>/.
    #[arg(long, value_name = "DIR")]
    pub out_dir: PathBuf,
    /// Also write every run's pruned model under DIR/models/.
    #[arg(long)]
    pub keep_models: bool,
    /// With --keep-models: time every run's pruned layers, dense against
    /// sparse kernels, at this batch size (as `lopper speed` does) and add a
    /// speed column to the page.
    #[arg(long, value_name = "B", allow_hyphen_values = true)]
    pub speed_batch: Option<usize>,
    /// With --keep-models: time every run's model end to end against the
    /// dense model (as `lopper latency`: batch 1, sentences for encoders,
    /// cached decode for decoders) and draw the quality-latency frontier
    /// (with --eval-text).
    #[arg(long)]
    pub time_whole: bool,
    /// Target for the per-layer chart (one of the sparsities or patterns)
    /// [default: the highest sparsity, else the first pattern]
    #[arg(long, value_name = "S|N:M", allow_hyphen_values = true)]
    pub focus: Option<String>,
    /// Calibration, solver, selection and run flags.
    #[command(flatten)]
    pub job: JobArgs,
}

/// `lopper eval`.
#[derive(Debug, Args)]
pub struct EvalArgs {
    /// The dense model directory (config.json, tokenizer.json, weights).
    pub dense: PathBuf,
    /// The pruned weights: a .safetensors file or directory with the same
    /// tensor names.
    pub pruned: PathBuf,
    /// UTF-8 text the pruning never saw. Encoders: one input per non-empty
    /// line. Decoders: consecutive windows of --seq-len tokens.
    #[arg(long, value_name = "FILE")]
    pub text: PathBuf,
    /// Most lines (encoders) or windows (decoders) to evaluate
    /// [default: 1000 lines, 64 windows]
    #[arg(long, value_name = "N", allow_hyphen_values = true)]
    pub samples: Option<usize>,
    /// Decoders: tokens per window [default: 256]
    #[arg(long, value_name = "L", allow_hyphen_values = true)]
    pub seq_len: Option<usize>,
    /// Print JSON instead of a sentence.
    #[arg(long)]
    pub json: bool,
    /// Worker threads (0 = all cores; more than the cores is capped, with a
    /// note).
    #[arg(long, value_name = "N", default_value_t = 0, allow_hyphen_values = true)]
    pub threads: usize,
}

/// `lopper inspect`.
#[derive(Debug, Args)]
pub struct InspectArgs {
    /// A .safetensors file, a *.safetensors.index.json, or a model directory.
    pub model: PathBuf,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Which tensors.
    #[command(flatten)]
    pub selection: SelectionArgs,
}

/// `lopper speed`.
#[derive(Debug, Args)]
pub struct SpeedArgs {
    /// A pruned model: .safetensors file, *.safetensors.index.json, or
    /// model directory.
    pub model: PathBuf,
    /// Batch sizes (rows of x in y = x Wᵀ), comma-separated.
    #[arg(
        long,
        value_name = "B,B,..",
        value_delimiter = ',',
        default_value = "1,8,64",
        allow_hyphen_values = true
    )]
    pub batch: Vec<usize>,
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
    /// Which tensors.
    #[command(flatten)]
    pub selection: SelectionArgs,
    /// Threads and output volume.
    #[command(flatten)]
    pub run: RunArgs,
}

/// `lopper report`.
#[derive(Debug, Args)]
pub struct ReportArgs {
    /// JSON reports: files written by `lopper prune --report` and/or
    /// comparison.json files, all of the same model.
    #[arg(required = true, value_name = "REPORT")]
    pub reports: Vec<PathBuf>,
    /// The HTML page to write.
    #[arg(short = 'o', long = "output", value_name = "PAGE")]
    pub output: PathBuf,
    /// Target for the per-layer chart (a sparsity such as 0.7, or N:M)
    /// [default: the highest sparsity, else the first pattern]
    #[arg(long, value_name = "S|N:M", allow_hyphen_values = true)]
    pub focus: Option<String>,
    /// Print nothing but errors.
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
    /// Which tensors.
    #[command(flatten)]
    pub selection: SelectionArgs,
    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Parse `--ridge` (for the validator; clap keeps the raw string so the
/// message can name the flag).
pub(super) fn parse_ridge(s: Option<&str>) -> Result<Ridge, String> {
    match s {
        None => Ok(Ridge::default()),
        Some(s) => s.parse().map_err(|e| format!("--ridge {e}")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn flags_are_consistent() {
        // clap's own consistency check over every command and group.
        Cli::command().debug_assert();
    }

    #[test]
    fn shared_flags_parse_the_same_in_prune_and_compare() {
        let p = Cli::try_parse_from([
            "lopper",
            "prune",
            "m",
            "--text",
            "t.txt",
            "--sparsity",
            "0.5",
            "-o",
            "o",
            "--only",
            "a.*",
            "--threads",
            "3",
            "--method",
            "obs",
        ])
        .unwrap();
        let c = Cli::try_parse_from([
            "lopper",
            "compare",
            "m",
            "--text",
            "t.txt",
            "--out-dir",
            "o",
            "--only",
            "a.*",
            "--threads",
            "3",
            "--methods",
            "obs,l0",
        ])
        .unwrap();
        match (p.command, c.command) {
            (Command::Prune(p), Command::Compare(c)) => {
                assert_eq!(p.job.selection.only, c.job.selection.only);
                assert_eq!(p.job.run.threads, c.job.run.threads);
                assert_eq!(p.method, Method::Obs);
                assert_eq!(c.methods, [Method::Obs, Method::L0]);
            }
            _ => panic!("wrong commands"),
        }
        // Calibration is required, and exclusive.
        assert!(Cli::try_parse_from(["lopper", "compare", "m", "--out-dir", "o"]).is_err());
        assert!(Cli::try_parse_from([
            "lopper",
            "prune",
            "m",
            "--text",
            "t",
            "--activations",
            "a",
            "--sparsity",
            "0.5",
            "-o",
            "o"
        ])
        .is_err());
    }
}

/// `lopper latency`.
#[derive(Debug, Args)]
pub struct LatencyArgs {
    /// The model to time (a model directory with config.json): pruned,
    /// structurally smaller, or dense.
    pub model: PathBuf,
    /// The dense model it was cut from, timed as the baseline (default: the
    /// model itself with dense products, the same cost for unstructured and
    /// N:M pruning; give it for a structurally smaller model).
    #[arg(long, value_name = "DIR")]
    pub dense: Option<PathBuf>,
    /// Encoders: batch sizes, comma-separated.
    #[arg(long, value_name = "B,B,..", value_delimiter = ',', default_value = "1,32")]
    pub batch: Vec<usize>,
    /// Encoders: tokens per sequence.
    #[arg(long, value_name = "L", default_value_t = 128)]
    pub seq: usize,
    /// Decoders: prefill length in tokens.
    #[arg(long, value_name = "L", default_value_t = 256)]
    pub prefill: usize,
    /// Decoders: prompt tokens before the timed decode steps.
    #[arg(long, value_name = "L", default_value_t = 32)]
    pub prompt: usize,
    /// Decoders: timed tokens per decode run.
    #[arg(long, value_name = "N", default_value_t = 32)]
    pub tokens: usize,
    /// Timed calls per variant (encoder batches, prefills, decode runs).
    #[arg(long, value_name = "N", default_value_t = 5)]
    pub reps: usize,
    /// Untimed calls first (decoders: untimed tokens at the start of each
    /// decode run).
    #[arg(long, value_name = "N", default_value_t = 2)]
    pub warmup: usize,
    /// Seed for the random token ids.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Threads and output volume.
    #[command(flatten)]
    pub run: RunArgs,
}
