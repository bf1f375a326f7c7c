//! `dovetail link`: the whole job, from two tables to links with confidences.

use dovetail::error::{Error, ErrorKind};
use dovetail::reliability::Verdict;
use dovetail::{pipeline, report, Result};
use std::process::ExitCode;

/// Link two tables one-to-one: block, compare, fit, assess feasibility, match, score
/// confidence, and write links.csv, unlinked_left.csv, unlinked_right.csv, review.csv and
/// summary.json.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(flatten)]
    run: super::RunArgs,
    /// Stop with exit status 3 instead of writing links when the verdict is infeasible
    /// (summary.json and report.html are still written, saying why).
    #[arg(long)]
    stop_if_infeasible: bool,
    /// Also write links, unlinked records and review pairs as Parquet files (links.parquet,
    /// unlinked_left.parquet, unlinked_right.parquet, review.parquet) beside the CSV files.
    #[arg(long)]
    parquet: bool,
}

pub fn run(args: Args) -> Result<ExitCode> {
    let (config, progress) = args.run.start()?;
    let _claim = dovetail::folder::claim(&args.run.out)?;
    let stop = args.stop_if_infeasible || config.link.stop_if_infeasible;
    let mut prep = pipeline::prepare_within(config, &progress, &args.run.budget())?;
    let linkage = pipeline::link(&mut prep, &progress)?;
    progress.finish();
    super::print_warnings(&prep.warnings, args.run.quiet);
    if !args.run.quiet {
        println!("{}", report::assessment_text(&prep, &linkage.assessment));
    }
    if stop && linkage.assessment.verdict == Verdict::Infeasible {
        report::write_stopped(&args.run.out, &prep, &linkage)?;
        return Err(Error::new(
            ErrorKind::Infeasible,
            "the linkage is infeasible; no links were written (stop_if_infeasible is set); summary.json and report.html say why",
        ));
    }
    let written = report::write_linkage(&args.run.out, &prep, &linkage, args.parquet)?;
    if !args.run.quiet {
        println!(
            "links: {} (confidence cut-off {}); outputs in {}",
            linkage.links.len(),
            dovetail::numbers::cutoff(linkage.cutoff),
            args.run.out.display()
        );
        for (stage, secs) in &prep.timings {
            eprintln!("time: {stage} {secs:.2}s");
        }
        let _ = written;
    }
    Ok(ExitCode::SUCCESS)
}
