//! The `kernelpress` command line: a thin layer over the library (one file per command
//! under `cli/`); progress bars and log lines live here, never in the library.

// `!(v > 0.0)` is the deliberate idiom that also rejects NaN (as in the library).
#![allow(clippy::neg_cmp_op_on_partial_ord)]

mod cli;

fn main() {
    std::process::exit(cli::main());
}
