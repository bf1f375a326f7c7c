//! `dovetail assess`: can these fields support one-to-one linkage? Without writing links.

use dovetail::config::Config;
use dovetail::{pipeline, report, Result};
use std::path::PathBuf;
use std::process::ExitCode;

/// Assess feasibility only: block, compare, fit, and report per-field separation, the margin
/// sqrt(d)·B and the forecast mismatch rate; writes summary.json.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The run's config file (TOML).
    #[arg(long)]
    config: PathBuf,
    /// Output folder for summary.json.
    #[arg(long, default_value = "dovetail-out")]
    out: PathBuf,
    /// Worker threads (0 = one per core).
    #[arg(long, default_value_t = 0)]
    threads: usize,
    /// Print nothing but errors.
    #[arg(long)]
    quiet: bool,
}

pub fn run(args: Args) -> Result<ExitCode> {
    super::set_threads(args.threads)?;
    let config = Config::from_path(&args.config)?;
    let progress = super::StageLines::new(args.quiet);
    let mut prep = pipeline::prepare(config, &progress)?;
    let assessment = pipeline::assess_only(&mut prep, &progress);
    progress.finish();
    super::print_warnings(&prep.warnings, args.quiet);
    if !args.quiet {
        println!("{}", report::assessment_text(&prep, &assessment));
    }
    report::write_assessment(&args.out, &prep, &assessment)?;
    Ok(ExitCode::SUCCESS)
}
