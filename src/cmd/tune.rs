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
    let cfg = &prep.config;
    let all = pipeline::passes_from(cfg, &cfg.block, "block")?;
    let mut schemes = Vec::new();
    for (i, p) in all.iter().enumerate() {
        let keys = cfg.block[i].keys.join(" + ");
        schemes.push((format!("{}: {keys}", p.name), vec![p.clone()]));
    }
    if all.len() > 1 {
        schemes.push(("all passes".to_string(), all.clone()));
    }
    let budget = args.run.budget();
    for (i, sc) in cfg.scheme.iter().enumerate() {
        let passes = pipeline::passes_from(cfg, &sc.block, &format!("scheme[{}].block", i + 1))?;
        // The configured passes were checked by `prepare`; each extra scheme is checked
        // alone, as `link` would check it, before any scheme is evaluated.
        if let Some(budget) = budget.resolve() {
            let plan = dovetail::block::plan(&prep.records, &passes);
            let memory = pipeline::MemoryEstimate::new(
                prep.left.bytes + prep.right.bytes,
                plan.pairs_per_pass(),
            );
            let mut labels = pipeline::pass_labels(&sc.block, &passes);
            for l in &mut labels {
                l.name = format!("{} of scheme `{}`", l.name, sc.name);
            }
            budget.check(&memory, &labels)?;
        }
        schemes.push((sc.name.clone(), passes));
    }
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
    out.write("tune.csv", |w| {
        let mut c = csv::Writer::from_writer(w);
        for r in &rows {
            c.serialize(r)
                .map_err(|e| std::io::Error::other(e.to_string()))?;
        }
        c.flush()
    })?;
    out.commit()?;
    Ok(ExitCode::SUCCESS)
}
