//! lopper: prune trained dense networks on CPU.
#![warn(missing_docs)]

pub mod calib;
pub mod cli;
pub mod io;
pub mod pipeline;
pub mod report;
pub mod select;
pub mod solve;
