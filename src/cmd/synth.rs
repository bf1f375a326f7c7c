//! `dovetail synth`: invented demo data with known truth.

use dovetail::synth::{self, Scenario, SynthOptions};
use dovetail::Result;
use std::path::PathBuf;
use std::process::ExitCode;

/// Generate two invented extracts of the people of a fictional region, with their truth and a
/// ready config: left.csv, right.csv, truth.csv and config.toml.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Records in each table.
    #[arg(long)]
    rows: usize,
    /// Share of the left table's people who also appear in the right table.
    #[arg(long, default_value_t = 0.7)]
    overlap: f64,
    /// Recording noise from 0 (clean) to 1 (very noisy).
    #[arg(long, default_value_t = 0.3)]
    noise: f64,
    /// Seed; the same seed gives the same files.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Chance that a child is the twin of the child born before it (the default is about the
    /// real rate; 0.5 makes the household confusions ten times commoner, a stress case).
    #[arg(long, default_value_t = synth::TWIN_CHANCE)]
    twins: f64,
    /// Share of the right table's people who moved (new address, no landline); the default
    /// is 0.3 x noise.
    #[arg(long)]
    movers: Option<f64>,
    /// Share of movers whose whole household moved with them, to one new address.
    #[arg(long, default_value_t = 0.0)]
    household_moves: f64,
    /// Share of the right table's extra people (those not in the left table) who are instead
    /// relatives or neighbours of left people: household members, same-name juniors, twins.
    #[arg(long, default_value_t = 0.0)]
    relatives: f64,
    /// Share of each table's records that get a second, re-keyed record of the same person.
    #[arg(long, default_value_t = 0.0)]
    duplicates: f64,
    /// Blank a column at a rate, `COLUMN=RATE` (e.g. `dob=0.5`); may be repeated.
    #[arg(long, value_name = "COLUMN=RATE")]
    blank: Vec<String>,
    /// Output folder.
    #[arg(long)]
    out: PathBuf,
}

pub fn run(args: Args) -> Result<ExitCode> {
    let opts = SynthOptions {
        rows: args.rows,
        overlap: args.overlap,
        noise: args.noise,
        seed: args.seed,
        twins: args.twins,
    };
    let mut scenario = Scenario {
        movers: args.movers,
        household_moves: args.household_moves,
        relatives: args.relatives,
        duplicates: args.duplicates,
        blank: Vec::new(),
    };
    scenario.check(&opts, &args.blank)?;
    let s = synth::generate_scenario(&opts, &scenario);
    s.write_to(&args.out)?;
    println!(
        "wrote {} left and {} right records ({} true pairs) to {}",
        s.left_csv.lines().count().saturating_sub(1),
        s.right_csv.lines().count().saturating_sub(1),
        s.true_pairs,
        args.out.display()
    );
    Ok(ExitCode::SUCCESS)
}
