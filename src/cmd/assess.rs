//! `dovetail assess`: can these fields support one-to-one linkage? Without writing links.

use dovetail::{pipeline, report, Result};
use std::process::ExitCode;

/// Assess feasibility only: block, compare, fit, and report per-field separation, the margin
/// sqrt(d)·B and the forecast mismatch rate; writes summary.json.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(flatten)]
    run: super::RunArgs,
}

pub fn run(args: Args) -> Result<ExitCode> {
    let (config, progress) = args.run.start()?;
    let _claim = dovetail::folder::claim(&args.run.out)?;
    let mut prep = pipeline::prepare_within(config, &progress, &args.run.budget())?;
    let assessment = pipeline::assess_only(&mut prep, &progress)?;
    progress.finish();
    super::print_warnings(&prep.warnings, args.run.quiet);
    if !args.run.quiet {
        println!("{}", report::assessment_text(&prep, &assessment));
    }
    report::write_assessment(&args.run.out, &prep, &assessment)?;
    Ok(ExitCode::SUCCESS)
}
