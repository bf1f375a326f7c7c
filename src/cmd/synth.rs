//! `dovetail synth`: invented demo data with known truth.

use dovetail::io::OutputSet;
use dovetail::synth::{self, SynthOptions};
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
    /// Output folder.
    #[arg(long)]
    out: PathBuf,
}

pub fn run(args: Args) -> Result<ExitCode> {
    if args.rows == 0 {
        return Err(Error::config("--rows must be at least 1"));
    }
    if [args.overlap, args.noise, args.twins]
        .iter()
        .any(|v| !(0.0..=1.0).contains(v))
    {
        return Err(Error::config(
            "--overlap, --noise and --twins must lie within [0, 1]",
        ));
    }
    let s = synth::generate(&SynthOptions {
        rows: args.rows,
        overlap: args.overlap,
        noise: args.noise,
        seed: args.seed,
        twins: args.twins,
    });
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
        args.rows,
        args.rows,
        s.true_pairs,
        args.out.display()
    );
    Ok(ExitCode::SUCCESS)
}
