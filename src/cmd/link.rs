//! `dovetail link`: the whole job, from two tables to links with confidences.

use dovetail::config::Config;
use dovetail::error::{Error, ErrorKind};
use dovetail::reliability::Verdict;
use dovetail::{pipeline, report, Result};
use std::path::PathBuf;
use std::process::ExitCode;

/// Link two tables one-to-one: block, compare, fit, assess feasibility, match, score
/// confidence, and write links.csv, unlinked_left.csv, unlinked_right.csv, review.csv and
/// summary.json.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The run's config file (TOML); table paths in it are relative to it.
    #[arg(long)]
    config: PathBuf,
    /// Output folder.
    #[arg(long, default_value = "dovetail-out")]
    out: PathBuf,
    /// Worker threads (0 = one per core); outputs do not depend on it.
    #[arg(long, default_value_t = 0)]
    threads: usize,
    /// Stop with exit status 3 instead of writing links when the verdict is infeasible.
    #[arg(long)]
    stop_if_infeasible: bool,
    /// Print nothing but errors.
    #[arg(long)]
    quiet: bool,
}

pub fn run(args: Args) -> Result<ExitCode> {
    super::set_threads(args.threads)?;
    let config = Config::from_path(&args.config)?;
    let stop = args.stop_if_infeasible || config.link.stop_if_infeasible;
    let progress = super::StageLines::new(args.quiet);
    let mut prep = pipeline::prepare(config, &progress)?;
    let linkage = pipeline::link(&mut prep, &progress);
    progress.finish();
    super::print_warnings(&prep.warnings, args.quiet);
    if !args.quiet {
        println!("{}", report::assessment_text(&prep, &linkage.assessment));
    }
    if stop && linkage.assessment.verdict == Verdict::Infeasible {
        return Err(Error::new(
            ErrorKind::Infeasible,
            "the linkage is infeasible; no links were written (stop_if_infeasible is set)",
        ));
    }
    let written = report::write_linkage(&args.out, &prep, &linkage)?;
    if !args.quiet {
        println!(
            "links: {} (confidence cut-off {:.3}); outputs in {}",
            linkage.links.len(),
            linkage.cutoff,
            args.out.display()
        );
        for (stage, secs) in &prep.timings {
            eprintln!("time: {stage} {secs:.2}s");
        }
        let _ = written;
    }
    Ok(ExitCode::SUCCESS)
}
