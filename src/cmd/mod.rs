//! One file per subcommand; each holds a clap-derive struct (its doc comments are the help)
//! and a short `run` that calls the library's stages in order.

mod assess;
mod link;
mod match_pairs;
mod synth;

use clap::{Parser, Subcommand};
use dovetail::pipeline::Progress;
use dovetail::{Error, Result};
use std::io::IsTerminal;
use std::process::ExitCode;

/// One-to-one record linkage of two tables of people, with a feasibility check and a
/// confidence for every link.
#[derive(Debug, Parser)]
#[command(name = "dovetail", version, about)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    Link(link::Args),
    Assess(assess::Args),
    Match(match_pairs::Args),
    Synth(synth::Args),
}

/// Runs the chosen subcommand.
pub fn run(cli: Cli) -> Result<ExitCode> {
    match cli.command {
        Command::Link(a) => link::run(a),
        Command::Assess(a) => assess::run(a),
        Command::Match(a) => match_pairs::run(a),
        Command::Synth(a) => synth::run(a),
    }
}

/// Sets the number of worker threads (0 = one per core).
pub fn set_threads(threads: usize) -> Result<()> {
    if threads > 0 {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build_global()
            .map_err(|e| Error::config(format!("cannot start {threads} threads: {e}")))?;
    }
    Ok(())
}

/// Stage lines on stderr, unless quiet.
pub struct StageLines {
    quiet: bool,
    tty: bool,
}

impl StageLines {
    /// A sink that prints stage names unless `quiet`.
    pub fn new(quiet: bool) -> StageLines {
        StageLines {
            quiet,
            tty: std::io::stderr().is_terminal(),
        }
    }
}

impl Progress for StageLines {
    fn stage(&self, name: &str) {
        if !self.quiet {
            if self.tty {
                eprintln!("\u{2022} {name}");
            } else {
                eprintln!("stage: {name}");
            }
        }
    }
}

/// Prints warnings on stderr (they hold counts, never record values).
pub fn print_warnings(warnings: &[String], quiet: bool) {
    if quiet {
        return;
    }
    for w in warnings {
        eprintln!("warning: {w}");
    }
}
