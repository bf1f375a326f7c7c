//! One file per subcommand; each holds a clap-derive struct (its doc comments are the help)
//! and a short `run` that calls the library's stages in order.

mod assess;
mod audit;
mod link;
mod match_pairs;
mod review;
mod score;
mod synth;
mod tune;

use clap::{Parser, Subcommand};
use dovetail::pipeline::Progress;
use dovetail::{Error, Result};
use std::io::IsTerminal;
use std::process::ExitCode;

/// One-to-one record linkage of two tables of people, with a feasibility check and a
/// confidence for every link.
#[derive(Debug, Parser)]
#[command(
    name = "dovetail",
    version,
    about,
    after_help = "Exit status: 0 success; 1 error (config, input or output); 2 usage (a bad \
                  option or value); 3 stopped because the linkage is infeasible \
                  (--stop-if-infeasible); 4 stopped before blocking because the estimated \
                  peak memory is over --memory-budget."
)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    Link(link::Args),
    Assess(assess::Args),
    Review(review::Args),
    Audit(audit::Args),
    Match(match_pairs::Args),
    Score(score::Args),
    Synth(synth::Args),
    Tune(tune::Args),
}

/// Runs the chosen subcommand.
pub fn run(cli: Cli) -> Result<ExitCode> {
    match cli.command {
        Command::Link(a) => link::run(a),
        Command::Assess(a) => assess::run(a),
        Command::Review(a) => review::run(a),
        Command::Audit(a) => audit::run(a),
        Command::Match(a) => match_pairs::run(a),
        Command::Score(a) => score::run(a),
        Command::Synth(a) => synth::run(a),
        Command::Tune(a) => tune::run(a),
    }
}

/// Options every config-driven subcommand takes.
#[derive(Debug, clap::Args)]
pub struct RunArgs {
    /// The run's config file (TOML); table paths in it are relative to it.
    #[arg(long)]
    pub config: std::path::PathBuf,
    /// Output folder.
    #[arg(long, default_value = "dovetail-out")]
    pub out: std::path::PathBuf,
    /// Worker threads (0 = one per core); outputs do not depend on it.
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
    /// Print nothing but errors.
    #[arg(long)]
    pub quiet: bool,
    /// Stop before blocking (exit status 4, nothing written) when the estimated peak memory is
    /// over SIZE: e.g. 8G, 500M (powers of 1000) or 2GiB (powers of 1024); `0` or `none`
    /// switches the check off. Default: 80% of the smallest of the cgroup's memory limit, the
    /// available memory (MemAvailable) and the address-space limit (ulimit -v); no default
    /// budget outside Linux.
    #[arg(long, value_name = "SIZE", value_parser = parse_budget)]
    pub memory_budget: Option<BudgetOpt>,
}

/// `--memory-budget` as given: the parsed size and its text, for messages.
#[derive(Debug, Clone)]
pub struct BudgetOpt {
    arg: dovetail::budget::BudgetArg,
    text: String,
}

fn parse_budget(text: &str) -> std::result::Result<BudgetOpt, String> {
    Ok(BudgetOpt {
        arg: dovetail::budget::parse_size(text)?,
        text: text.trim().to_string(),
    })
}

impl RunArgs {
    /// Sets the threads, reads the config and starts the progress lines.
    pub fn start(&self) -> Result<(dovetail::config::Config, StageLines)> {
        set_threads(self.threads)?;
        let config = dovetail::config::Config::from_path(&self.config)?;
        Ok((config, StageLines::new(self.quiet)))
    }

    /// The memory budget in force (see [`dovetail::budget::budget_for`]).
    pub fn budget(&self) -> dovetail::budget::Budget {
        let opt = self.memory_budget.as_ref();
        dovetail::budget::budget_for(opt.map(|o| o.arg), opt.map(|o| o.text.as_str()))
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

/// Progress on stderr: a spinner per stage (indicatif) when stderr is a terminal, plain stage
/// lines when it is not, nothing with `--quiet`.
pub struct StageLines {
    quiet: bool,
    tty: bool,
    current: std::sync::Mutex<Option<(indicatif::ProgressBar, String, std::time::Instant)>>,
}

impl StageLines {
    /// A progress sink; `quiet` silences it.
    pub fn new(quiet: bool) -> StageLines {
        StageLines {
            quiet,
            tty: std::io::stderr().is_terminal(),
            current: std::sync::Mutex::new(None),
        }
    }

    /// Closes the last stage's spinner.
    pub fn finish(&self) {
        if let Ok(mut cur) = self.current.lock() {
            if let Some((bar, name, start)) = cur.take() {
                bar.finish_with_message(format!("{name} ({:.1}s)", start.elapsed().as_secs_f64()));
            }
        }
    }
}

impl Progress for StageLines {
    fn note(&self, text: &str) {
        if self.quiet {
            return;
        }
        if let Ok(cur) = self.current.lock() {
            if let Some((bar, _, _)) = cur.as_ref() {
                bar.println(text);
                return;
            }
        }
        eprintln!("{text}");
    }

    fn stage(&self, name: &str) {
        if self.quiet {
            return;
        }
        if !self.tty {
            eprintln!("stage: {name}");
            return;
        }
        self.finish();
        let bar = indicatif::ProgressBar::new_spinner();
        bar.set_style(
            indicatif::ProgressStyle::with_template("{spinner} {msg} {elapsed}")
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_spinner()),
        );
        bar.set_message(name.to_string());
        bar.enable_steady_tick(std::time::Duration::from_millis(120));
        if let Ok(mut cur) = self.current.lock() {
            *cur = Some((bar, name.to_string(), std::time::Instant::now()));
        }
    }
}

/// Prints warnings on stderr (they hold counts, never record values).
pub fn print_warnings(warnings: &[String], quiet: bool) {
    if quiet {
        return;
    }
    // Error-level findings first, then the rest in the order they were found.
    let serious = |w: &&String| w.starts_with(dovetail::pipeline::SERIOUS_PREFIX);
    for w in warnings.iter().filter(serious) {
        let text = &w[dovetail::pipeline::SERIOUS_PREFIX.len()..];
        eprintln!("warning (serious): {text}");
    }
    for w in warnings.iter().filter(|w| !serious(w)) {
        eprintln!("warning: {w}");
    }
}
