//! `dovetail audit`: the precision of a run's links, measured from the clerks' decisions on
//! its audit sample.

use dovetail::Result;
use std::path::PathBuf;
use std::process::ExitCode;

/// Measures the precision of a finished run's links from the decisions on its audit
/// sample (drawn with `audit_sample` under [link], decided with `dovetail review --audit`):
/// a stratified estimate with a 95% Wilson interval, beside the run's own estimated
/// precision. Writes FOLDER/audit.json and adds the audit to FOLDER/report.html.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The output folder of a finished `dovetail link` run.
    pub folder: PathBuf,
    /// Print nothing but errors.
    #[arg(long)]
    pub quiet: bool,
}

pub fn run(args: Args) -> Result<ExitCode> {
    // Hold the folder, so no run replaces the links while they are audited.
    let _claim = dovetail::folder::claim(&args.folder)?;
    let result = dovetail::review::audit_folder(&args.folder)?;
    dovetail::report::write_audit(&args.folder, &result)?;
    if !args.quiet {
        print!("{}", result.text());
    }
    Ok(ExitCode::SUCCESS)
}
