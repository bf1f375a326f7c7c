//! `dovetail match`: the one-to-one optimum of pairs scored elsewhere.

use dovetail::io;
use dovetail::{matching, Error, Result};
use std::path::PathBuf;
use std::process::ExitCode;

/// Find the maximum-weight one-to-one set of scored pairs (each record linked at most once,
/// any record may stay unlinked). Reads a CSV with header left_id,right_id,weight (other
/// columns ignored); writes DIR/links.csv and prints the total weight.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// CSV of scored pairs.
    #[arg(long)]
    pairs: PathBuf,
    /// Output folder.
    #[arg(long, default_value = "dovetail-out")]
    out: PathBuf,
    /// Only pairs with weight above this are used (pairs of negative weight never improve
    /// the total, so they are never chosen).
    #[arg(long, default_value_t = 0.0, allow_negative_numbers = true)]
    min_weight: f64,
    /// Worker threads (0 = one per core).
    #[arg(long, default_value_t = 0)]
    threads: usize,
}

pub fn run(args: Args) -> Result<ExitCode> {
    super::set_threads(args.threads)?;
    let _claim = dovetail::folder::claim(&args.out)?;
    if !args.min_weight.is_finite() {
        return Err(Error::config("--min-weight must be a finite number"));
    }
    let clock = std::time::Instant::now();
    let p = io::read_scored_pairs(&args.pairs)?;
    let read_secs = clock.elapsed().as_secs_f64();
    let w: Vec<f64> = p
        .weight
        .iter()
        .map(|&x| if x > args.min_weight { x } else { f64::NAN })
        .collect();
    let clock = std::time::Instant::now();
    let m = matching::max_weight_matching(p.left_ids.len(), &p.left, &p.right, &w);
    let solve_secs = clock.elapsed().as_secs_f64();
    dovetail::report::render_matching(&p, &m)?.write_to(&args.out, false)?;
    println!("links: {}", m.chosen.len());
    println!("total weight: {}", m.total);
    eprintln!("time: reading {read_secs:.3}s, matching {solve_secs:.3}s");
    Ok(ExitCode::SUCCESS)
}
