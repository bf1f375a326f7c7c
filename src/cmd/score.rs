//! `dovetail score`: a finished run's links against pairs known to be true.

use dovetail::io::{sha256_hex, OutputSet};
use dovetail::score::{self, Score};
use dovetail::{Error, Result};
use serde::Serialize;
use std::path::PathBuf;
use std::process::ExitCode;

/// Score a run's links against known true pairs (a clerk's gold-standard subset, or synth's
/// truth.csv): precision, recall, F1 and a table of confidence against the share true, beside
/// the run's own estimates. Prints the table and writes score.json (into the run's folder
/// unless --json says elsewhere).
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The run's output folder (it must hold links.csv; summary.json, when there, gives the
    /// run's own estimates).
    #[arg(long)]
    run: PathBuf,
    /// CSV of known true pairs with columns left_id and right_id.
    #[arg(long)]
    known: PathBuf,
    /// The known pairs cover only the records they name: links between two records they
    /// never name are not scored.
    #[arg(long)]
    partial: bool,
    /// Where to write the JSON (default: score.json in the run's folder).
    #[arg(long)]
    json: Option<PathBuf>,
    /// Print nothing but errors.
    #[arg(long)]
    quiet: bool,
}

/// What the run said of itself, from its summary.json.
#[derive(Debug, Default, Serialize)]
struct RunEstimates {
    precision: Option<f64>,
    precision_interval: Option<[f64; 2]>,
    recall_among_candidates: Option<f64>,
    recall_all: Option<f64>,
    recall_all_interval: Option<[f64; 2]>,
}

#[derive(Debug, Serialize)]
struct ScoreFile<'a> {
    tool: &'static str,
    version: &'static str,
    /// SHA-256 of the links.csv scored: ties this file to its run.
    links_sha256: String,
    known_pairs_file: String,
    #[serde(flatten)]
    score: &'a Score,
    run_estimates: RunEstimates,
}

fn run_estimates(dir: &std::path::Path) -> RunEstimates {
    let Ok(text) = std::fs::read_to_string(dir.join("summary.json")) else {
        return RunEstimates::default();
    };
    let Ok(v) = serde_json::from_str::<serde_json::Value>(&text) else {
        return RunEstimates::default();
    };
    let pair = |key: &str| -> Option<[f64; 2]> {
        let a = v.get(key)?.as_array()?;
        Some([a.first()?.as_f64()?, a.get(1)?.as_f64()?])
    };
    RunEstimates {
        precision: v.get("estimated_precision").and_then(|x| x.as_f64()),
        precision_interval: pair("estimated_precision_interval"),
        recall_among_candidates: v.get("estimated_recall").and_then(|x| x.as_f64()),
        recall_all: v.get("estimated_recall_all").and_then(|x| x.as_f64()),
        recall_all_interval: pair("estimated_recall_all_interval"),
    }
}

pub fn run(args: Args) -> Result<ExitCode> {
    let links_path = args.run.join("links.csv");
    if !links_path.is_file() {
        return Err(Error::input(
            "no links.csv here: --run must name the output folder of `dovetail link`",
        )
        .with_file(&args.run));
    }
    // Scored into the run's folder: hold it, so no run replaces the links under us.
    let _claim = if args.json.is_none() {
        Some(dovetail::folder::claim(&args.run)?)
    } else {
        None
    };
    let bytes = std::fs::read(&links_path)
        .map_err(|e| Error::input(format!("cannot read: {e}")).with_file(&links_path))?;
    let links = score::read_links_from(&bytes, &links_path)?;
    let known = score::read_known(&args.known)?;
    let s = score::score(&links, &known, args.partial);
    let est = run_estimates(&args.run);
    if !args.quiet {
        print!("{}", score::text(&s));
        let f = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{v:.4}"));
        println!(
            "\nthe run's own estimates: precision {}, recall over all true pairs {}{}",
            f(est.precision),
            f(est.recall_all),
            if args.partial {
                " (partial known pairs measure recall over the pairs they name only)"
            } else {
                ""
            }
        );
    }
    let file = ScoreFile {
        tool: "dovetail",
        version: env!("CARGO_PKG_VERSION"),
        links_sha256: sha256_hex(&bytes),
        known_pairs_file: args.known.display().to_string(),
        score: &s,
        run_estimates: est,
    };
    let into_run = args.json.is_none();
    let json = args.json.unwrap_or_else(|| args.run.join("score.json"));
    let dir = json
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("."));
    let name = json
        .file_name()
        .and_then(|n| n.to_str())
        .ok_or_else(|| Error::config("--json must name a file").with_file(&json))?
        .to_string();
    // Into the run's folder, score.json joins its record; elsewhere it is a file alone.
    let mut out = if into_run {
        let stamp = dovetail::folder::Stamp {
            command: "score",
            fingerprint: None,
        };
        OutputSet::for_run(&dir, stamp)?
    } else {
        OutputSet::new(&dir)?
    };
    out.write(&name, |w| {
        serde_json::to_writer_pretty(&mut *w, &file).map_err(std::io::Error::other)?;
        w.write_all(b"\n")
    })?;
    out.commit()?;
    Ok(ExitCode::SUCCESS)
}
