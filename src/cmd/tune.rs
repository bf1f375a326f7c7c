//! `dovetail tune`: compare blocking schemes before committing to one.

use dovetail::io::OutputSet;
use dovetail::pipeline::Progress;
use dovetail::tune::{self, TuneOptions};
use dovetail::{pipeline, Result};
use std::process::ExitCode;

/// Compare blocking schemes: each configured pass alone, all passes together, and every
/// [[scheme]] of the config. For each: pairs, d, share of left records with a candidate, pair
/// completeness (estimated against no blocking at all on a seeded sample of left records, with
/// the fitted model), margin, forecast error, expected correct links and seconds. Prints the
/// table and writes DIR/tune.csv (a later `link --out DIR` shows it in report.html).
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(flatten)]
    run: super::RunArgs,
    /// Left records in the completeness sample.
    #[arg(long, default_value_t = 2000)]
    sample: usize,
    /// Bootstrap replicates per scheme.
    #[arg(long, default_value_t = 5)]
    replicates: usize,
}

pub fn run(args: Args) -> Result<ExitCode> {
    let (config, progress) = args.run.start()?;
    let _claim = dovetail::folder::claim(&args.run.out)?;
    let prep = pipeline::prepare_within(config, &progress, &args.run.budget())?;
    progress.stage("tuning");
    let schemes = tune::schemes_of(&prep, &args.run.budget())?;
    let cfg = &prep.config;
    let rows = tune::evaluate(
        &prep,
        &schemes,
        &TuneOptions {
            sample: args.sample,
            seed: cfg.assess.seed,
            replicates: args.replicates,
        },
    );
    progress.finish();
    super::print_warnings(&prep.warnings, args.run.quiet);
    if !args.run.quiet {
        print!("{}", tune::table_text(&rows));
    }
    let mut out = OutputSet::for_run(&args.run.out, dovetail::folder::stamp_of(&prep, "tune"))?;
    let text = tune::csv_bytes(&rows)?;
    out.write("tune.csv", |w| w.write_all(&text))?;
    out.commit()?;
    Ok(ExitCode::SUCCESS)
}
