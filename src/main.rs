//! The `lopper` binary: all logic lives in the library's `cli` module.

fn main() {
    std::process::exit(lopper::cli::run());
}
