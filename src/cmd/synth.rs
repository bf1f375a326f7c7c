//! `dovetail synth`: invented demo data with known truth.

use dovetail::io::OutputSet;
use dovetail::synth::{self, Scenario, SynthOptions};
use dovetail::{Error, Result};
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
    if args.rows == 0 {
        return Err(Error::config("--rows must be at least 1"));
    }
    let shares = [
        args.overlap,
        args.noise,
        args.twins,
        args.movers.unwrap_or(0.0),
        args.household_moves,
        args.relatives,
        args.duplicates,
    ];
    if shares.iter().any(|v| !(0.0..=1.0).contains(v)) {
        return Err(Error::config(
            "--overlap, --noise, --twins, --movers, --household-moves, --relatives and --duplicates must lie within [0, 1]",
        ));
    }
    let mut blank = Vec::new();
    for b in &args.blank {
        let parsed = Scenario::parse_blank(b)
            .filter(|(col, _)| Scenario::blank_columns().contains(&col.as_str()));
        match parsed {
            Some(p) => blank.push(p),
            None => {
                return Err(Error::config(format!(
                "--blank `{b}`: give COLUMN=RATE with a rate in [0, 1] and one of the columns {}",
                Scenario::blank_columns().join(", ")
            )))
            }
        }
    }
    let s = synth::generate_scenario(
        &SynthOptions {
            rows: args.rows,
            overlap: args.overlap,
            noise: args.noise,
            seed: args.seed,
            twins: args.twins,
        },
        &Scenario {
            movers: args.movers,
            household_moves: args.household_moves,
            relatives: args.relatives,
            duplicates: args.duplicates,
            blank,
        },
    );
    let mut out = OutputSet::new(&args.out)?;
    for (name, text) in [
        ("left.csv", &s.left_csv),
        ("right.csv", &s.right_csv),
        ("truth.csv", &s.truth_csv),
        ("config.toml", &s.config_toml),
    ] {
        out.write(name, |w| w.write_all(text.as_bytes()))?;
    }
    out.commit()?;
    println!(
        "wrote {} left and {} right records ({} true pairs) to {}",
        s.left_csv.lines().count().saturating_sub(1),
        s.right_csv.lines().count().saturating_sub(1),
        s.true_pairs,
        args.out.display()
    );
    Ok(ExitCode::SUCCESS)
}
