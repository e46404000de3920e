//! The command line: one file per command, each an argument struct and a `run` function
//! over the library. `main` maps errors to exit codes: 2 for bad input or usage, 1 for
//! internal failures.

mod compile;
mod export;
mod export_check;
mod featurize;
mod import;
mod inspect;
mod kernel_check;
mod machine;
mod memory;
pub(crate) mod progress;
mod report;
mod score;
mod sweep;
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
    /// Memory ceiling (e.g. 4G, 512M). Given, it bounds the whole process: sizes from
    /// files, flags and expressions are checked against it less the memory in use, and the
    /// command stops with exit 2 if its resident memory crosses it. Without it, each such
    /// size is checked against half of the physical memory.
    #[arg(long, global = true)]
    pub max_memory: Option<String>,
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
    Compile(Box<compile::Args>),
    Export(export::Args),
    Report(report::Args),
    Sweep(sweep::Args),
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
    if let Some(m) = &cli.max_memory {
        match kernelpress::limits::parse_size(m) {
            Ok(v) => {
                kernelpress::limits::set_max_memory(v);
                memory::watch(v);
            }
            Err(e) => {
                eprintln!("error: {e}");
                return 2;
            }
        }
    }
    let _ = ctrlc::set_handler(|| {
        remove_temporaries();
        std::process::exit(130);
    });
    let res = match cli.command {
        Command::Train(a) => train::run(a),
        Command::Import(a) => import::run(a),
        Command::Score(a) => score::run(a),
        Command::Inspect(a) => inspect::run(a),
        Command::KernelCheck(a) => kernel_check::run(a),
        Command::Featurize(a) => featurize::run(a),
        Command::Compile(a) => compile::run(*a),
        Command::Export(a) => export::run(a),
        Command::Report(a) => report::run(a),
        Command::Sweep(a) => sweep::run(a),
    };
    match res {
        Ok(()) => 0,
        Err(e) => {
            let prefix = match e.kind() {
                ErrorKind::Input | ErrorKind::File => "error",
                ErrorKind::Gate => "quality gate failed",
                ErrorKind::Budget => "no model meets the budget",
                ErrorKind::KeepExact => "keep the exact model",
                ErrorKind::Numerical => "numerical failure",
                ErrorKind::Io => "I/O error",
                _ => "internal error",
            };
            eprintln!("{prefix}: {e}");
            e.exit_code()
        }
    }
}

/// Folders where this run writes outputs (their temporary files are removed on a signal).
static OUTPUT_DIRS: std::sync::Mutex<Vec<std::path::PathBuf>> = std::sync::Mutex::new(Vec::new());

/// Removes this process's temporary outputs (`.NAME.<random>.tmpPID` files and folders)
/// from the output folders. A folder moved aside while a replacement is renamed in
/// (`.NAME.old.tmpPID`) is left, so that nothing of the user's is deleted.
pub(crate) fn remove_temporaries() {
    let suffix = format!(".tmp{}", std::process::id());
    if let Ok(dirs) = OUTPUT_DIRS.lock() {
        for d in dirs.iter() {
            if let Ok(rd) = std::fs::read_dir(d) {
                for e in rd.flatten() {
                    let n = e.file_name().to_string_lossy().to_string();
                    if n.starts_with('.') && n.ends_with(&suffix) && !n.contains(".old.tmp") {
                        if e.path().is_dir() {
                            let _ = std::fs::remove_dir_all(e.path());
                        } else {
                            let _ = std::fs::remove_file(e.path());
                        }
                    }
                }
            }
        }
    }
}

/// Checks outputs before any work: each output's folder exists (or, for `folder` outputs,
/// its parent does), no output is also an input, and no two outputs are the same file.
/// Registers the folders for clean-up on a signal.
pub(crate) fn guard_outputs(
    inputs: &[&std::path::Path],
    outputs: &[(&std::path::Path, bool)],
) -> Result<()> {
    use std::path::{Path, PathBuf};
    let canon = |p: &Path| -> Option<PathBuf> {
        if let Ok(c) = p.canonicalize() {
            return Some(c);
        }
        let parent = match p.parent() {
            Some(q) if !q.as_os_str().is_empty() => q.to_path_buf(),
            _ => PathBuf::from("."),
        };
        parent
            .canonicalize()
            .ok()
            .map(|c| c.join(p.file_name().unwrap_or_default()))
    };
    let ins: Vec<PathBuf> = inputs
        .iter()
        .filter_map(|p| p.canonicalize().ok())
        .collect();
    let mut seen: Vec<PathBuf> = Vec::new();
    for (out, folder) in outputs {
        let parent = match out.parent() {
            Some(q) if !q.as_os_str().is_empty() => q.to_path_buf(),
            _ => PathBuf::from("."),
        };
        if !parent.is_dir() {
            return Err(Error::input(format!(
                "{}: folder {} does not exist; create it first",
                out.display(),
                parent.display()
            )));
        }
        let c = canon(out).ok_or_else(|| {
            Error::input(format!("{}: cannot resolve the output path", out.display()))
        })?;
        if ins.contains(&c) {
            return Err(Error::input(format!(
                "{}: this output is also an input of the command; refusing to overwrite it",
                out.display()
            )));
        }
        // A folder output is written whole: no input may live inside it.
        if *folder {
            if let Some(i) = ins.iter().find(|i| i.starts_with(&c)) {
                return Err(Error::input(format!(
                    "{}: the input {} lives inside this output folder, which the export writes whole; choose another folder",
                    out.display(),
                    i.display()
                )));
            }
        }
        if seen.contains(&c) {
            return Err(Error::input(format!(
                "{}: given as two different outputs",
                out.display()
            )));
        }
        seen.push(c);
        kernelpress::data::check_writable(out, *folder)?;
        if let Ok(mut dirs) = OUTPUT_DIRS.lock() {
            dirs.push(parent.clone());
        }
    }
    Ok(())
}

/// A note when a model or statistics file carries no checksum (written before checksums
/// existed): it loads, but its contents cannot be verified.
pub(crate) fn note_unverified(path: &std::path::Path) {
    if kernelpress::format::has_checksum(path) == Some(false) {
        progress::note(format!(
            "{}: carries no checksum (written by an earlier version); it loads, but its contents cannot be verified — write it again to add one",
            path.display()
        ));
    }
}

/// A warning when the head precision has no fast instructions on this CPU: the portable
/// loops give the same decisions, more slowly than the f32 head.
pub(crate) fn warn_slow_head(p: kernelpress::linalg::HeadPrecision) {
    if !p.fast_here() {
        progress::warn(format!(
            "this CPU has no {} instructions for the {} head: its f32 paths use the portable loops, which give the same decisions more slowly than the f32 head (--head-precision f32 is faster here)",
            if p == kernelpress::linalg::HeadPrecision::Int8 { "AVX-512 VNNI" } else { "AVX-512 BF16" },
            p.name()
        ));
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
        .map_err(|e: Error| e.context(format!("--kernel '{}'", abridged(s, 80))))
}

/// `s` itself when short, else its start, an ellipsis and its length: an error line
/// stays one readable line whatever the user typed.
pub(crate) fn abridged(s: &str, max: usize) -> String {
    let n = s.chars().count();
    if n <= max {
        s.to_string()
    } else {
        let head: String = s.chars().take(max.saturating_sub(20)).collect();
        format!("{head}… ({n} characters)")
    }
}

/// The methods of `--methods` (default: every method for the kernel but identity), each
/// checked to serve `kernel`.
pub(crate) fn methods_arg(
    names: &[String],
    kernel: &kernelpress::kernel::Kernel,
) -> Result<Vec<kernelpress::features::Method>> {
    use kernelpress::features::{methods_for, Method};
    let all = methods_for(kernel);
    let methods: Vec<Method> = if names.is_empty() {
        all.iter()
            .copied()
            .filter(|m| *m != Method::Identity)
            .collect()
    } else {
        names
            .iter()
            .map(|m| Method::parse(m.trim()))
            .collect::<Result<_>>()?
    };
    for m in &methods {
        if !all.contains(m) {
            return Err(Error::input(format!(
                "--methods: {m} cannot serve kernel {kernel}"
            )));
        }
    }
    Ok(methods)
}

/// Prints `text` and turns a failed gate into exit code 3, after the model was written.
pub(crate) fn finish_gate(text: &str, gate: Option<String>, out: &std::path::Path) -> Result<()> {
    print_stdout(text)?;
    match gate {
        Some(why) => Err(Error::new(
            ErrorKind::Gate,
            format!("{why}; the model was written to {}", out.display()),
        )),
        None => Ok(()),
    }
}
