//! lopper: prune trained dense networks on CPU.
#![warn(missing_docs)]

pub mod io;
pub mod solve;
