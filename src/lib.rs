//! lopper prunes the linear layers of trained dense networks on CPU.
//!
//! The job, layer by layer: from the layer's dense weight `W` (`d_out x
//! d_in`) and the Gram matrix `H = XᵀX` of the inputs `X` it saw on
//! calibration data, find a sparse `Ŵ` that reproduces the layer's outputs,
//! minimising `‖XWᵀ − XŴᵀ‖² + λ‖W − Ŵ‖²` under a sparsity pattern. The
//! command-line tool (`lopper inspect`, `lopper prune`) wraps the same
//! library calls; see the README for its use.
//!
//! Data flows one way: [`cli`] parses flags into configs → [`driver`]
//! (and [`compare`], the driver with several runs) loops over the blocks of
//! a [`source`] (an activations file via [`io`], or the model's own forward
//! pass from [`arch`] over windows cut by [`tokenize`]), reduces inputs to
//! Gram matrices with [`calib`], prunes each selected layer ([`select`])
//! with [`solve`], and hands the results to [`report`] and [`io`]'s writer;
//! [`evaluate`] compares a pruned model with its dense original on text.
//! After pruning, [`sparse`] stores pruned weights sparse and multiplies
//! with them, and [`deploy`] packs a pruned model's layers into a `.sprig`
//! file (`lopper pack`) and times them against the dense product (`lopper
//! speed`). Every failure above the readers and solvers is an [`Error`]
//! whose [`ErrorKind`] fixes the exit code.
//!
//! ```
//! use faer::{Mat, Par};
//! use lopper::calib::Gram;
//! use lopper::solve::{objective, prune_layer, Method, Pattern, Scope, SolveParams};
//!
//! // Calibration inputs: 64 rows of 8 correlated inputs.
//! let x: Vec<f64> = (0..64 * 8).map(|i| ((i * 37 % 17) as f64 - 8.0) / 8.0).collect();
//! let mut gram = Gram::new(8);
//! gram.add_rows(&x, Par::Seq);
//! let w = Mat::from_fn(4, 8, |r, c| ((r + 2 * c) % 5) as f64 - 2.0);
//!
//! let pattern = Pattern::Unstructured { sparsity: 0.5, scope: Scope::Row };
//! let mut errors = Vec::new();
//! for method in [Method::Magnitude, Method::Obs] {
//!     let params = SolveParams { method, pattern, ..SolveParams::default() };
//!     let pruned = prune_layer(w.as_ref(), gram.matrix(), &params, Par::Seq).unwrap();
//!     // Every row keeps exactly 4 of its 8 weights.
//!     for r in 0..4 {
//!         assert_eq!((0..8).filter(|&c| pruned.weight[(r, c)] != 0.0).count(), 4);
//!     }
//!     errors.push(objective::relative_error(w.as_ref(), pruned.weight.as_ref(), gram.matrix(), Par::Seq));
//! }
//! // The OBS sweep reconstructs the outputs better than magnitude pruning.
//! assert!(errors[1] < errors[0]);
//! ```
#![deny(missing_docs)]

pub mod arch;
pub mod calib;
pub mod cli;
pub mod compare;
pub mod deploy;
pub mod driver;
pub mod error;
pub mod evaluate;
pub mod io;
pub mod outputs;
pub mod report;
pub mod rng;
pub mod select;
pub mod solve;
pub mod source;
pub mod sparse;
pub mod timing;
pub mod tokenize;

pub use driver::{prune, JobConfig, PruneConfig, Ridge, Target};
pub use error::{Error, ErrorKind, Result};
pub use solve::{Method, Pattern, Scope};
pub use source::Calibration;
