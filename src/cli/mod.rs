//! The command line: one file per command, each an argument struct and a `run` function
//! over the library. `main` maps errors to exit codes: 2 for bad input or usage, 1 for
//! internal failures.

mod compile;
mod export;
mod featurize;
mod import;
mod inspect;
mod kernel_check;
pub(crate) mod progress;
mod report;
mod score;
mod train;

use clap::{Parser, Subcommand};
use kernelpress::{Error, ErrorKind, Result};

/// kernelpress: compile kernel machines into compact random-feature models.
#[derive(Debug, Parser)]
#[command(name = "kernelpress", version, about, long_about = None)]
pub struct Cli {
    /// No progress bars or log lines on stderr (warnings still print).
    #[arg(long, global = true)]
    pub quiet: bool,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    Train(train::Args),
    Import(import::Args),
    Score(score::Args),
    Inspect(inspect::Args),
    KernelCheck(kernel_check::Args),
    Featurize(featurize::Args),
    Compile(compile::Args),
    Export(export::Args),
    Report(report::Args),
}

/// Parses the process arguments, runs the command, and returns the exit code.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return match e.kind() {
                clap::error::ErrorKind::DisplayHelp | clap::error::ErrorKind::DisplayVersion => 0,
                _ => 2,
            };
        }
    };
    progress::set_quiet(cli.quiet);
    let res = match cli.command {
        Command::Train(a) => train::run(a),
        Command::Import(a) => import::run(a),
        Command::Score(a) => score::run(a),
        Command::Inspect(a) => inspect::run(a),
        Command::KernelCheck(a) => kernel_check::run(a),
        Command::Featurize(a) => featurize::run(a),
        Command::Compile(a) => compile::run(a),
        Command::Export(a) => export::run(a),
        Command::Report(a) => report::run(a),
    };
    match res {
        Ok(()) => 0,
        Err(e) => {
            let prefix = match e.kind() {
                ErrorKind::Input | ErrorKind::File => "error",
                ErrorKind::Gate => "quality gate failed",
                ErrorKind::Numerical => "numerical failure",
                ErrorKind::Io => "I/O error",
                _ => "internal error",
            };
            eprintln!("{prefix}: {e}");
            e.exit_code()
        }
    }
}

/// Writes `text` to stdout, treating a closed pipe as success.
pub(crate) fn print_stdout(text: &str) -> Result<()> {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    match out.write_all(text.as_bytes()).and_then(|_| out.flush()) {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        Err(e) => Err(Error::internal(format!("cannot write to stdout: {e}"))),
    }
}

/// The quality gate shared by `compile` and `report`.
#[derive(Debug, Clone, clap::Args)]
pub(crate) struct GateArgs {
    /// Quality gate: exit with code 3 when label agreement with the exact model is below P.
    /// Without it, agreement below 0.99 only prints a warning.
    #[arg(long)]
    pub min_agreement: Option<f64>,
    /// Quality gate: exit with code 3 when the compiled model's accuracy on the labels of
    /// --target is below A.
    #[arg(long)]
    pub min_accuracy: Option<f64>,
}

impl GateArgs {
    pub(crate) fn validate(&self) -> Result<()> {
        for (name, v) in [
            ("--min-agreement", self.min_agreement),
            ("--min-accuracy", self.min_accuracy),
        ] {
            if let Some(v) = v {
                if !(0.0..=1.0).contains(&v) {
                    return Err(Error::input(format!("{name} {v} must be between 0 and 1")));
                }
            }
        }
        Ok(())
    }
    /// The agreement below which the report warns.
    pub(crate) fn tolerance(&self) -> f64 {
        self.min_agreement.unwrap_or(0.99)
    }
    /// Why the gate fails, if it does.
    pub(crate) fn failure(&self, r: &kernelpress::report::Report) -> Result<Option<String>> {
        let mut why = Vec::new();
        if let Some(p) = self.min_agreement {
            match r.agreement {
                Some(a) if a < p => why.push(format!("agreement {a:.4} < --min-agreement {p}")),
                Some(_) => {}
                None => {
                    return Err(Error::input(
                        "--min-agreement applies to classifiers; this model is a regression",
                    ))
                }
            }
        }
        if let Some(p) = self.min_accuracy {
            match r.accuracy_compiled {
                Some(a) if a < p => why.push(format!("accuracy {a:.4} < --min-accuracy {p}")),
                Some(_) => {}
                None => {
                    return Err(Error::input(
                        "--min-accuracy needs true labels: name the label column with --target",
                    ))
                }
            }
        }
        Ok((!why.is_empty()).then(|| why.join("; ")))
    }
}

/// Reads data for a model, matching columns by name (or by position), printing the notes.
pub(crate) fn read_for(
    path: &std::path::Path,
    target: Option<&str>,
    names: &[String],
    by_position: bool,
) -> Result<kernelpress::data::Table> {
    let m = kernelpress::data::read_for_model(path, target, names, by_position)?;
    for n in &m.notes {
        progress::note(n);
    }
    Ok(m.table)
}

/// Parses a kernel expression given on the command line.
pub(crate) fn kernel_arg(s: &str) -> Result<kernelpress::kernel::Kernel> {
    s.parse()
        .map_err(|e: Error| e.context(format!("--kernel '{s}'")))
}
