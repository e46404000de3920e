//! The `kernelpress` command line: a thin layer over the library (one file per command
//! under `cli/`); progress bars and log lines live here, never in the library.

mod cli;

fn main() {
    std::process::exit(cli::main());
}
