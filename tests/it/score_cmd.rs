//! `dovetail score`: a run's links against known pairs.

use super::common::*;
use std::path::Path;

/// Runs `dovetail score --run RUN --known KNOWN` with extra arguments.
fn score(run_dir: &Path, known: &Path, extra: &[&str]) -> std::process::Output {
    let mut args = vec![
        "score",
        "--run",
        run_dir.to_str().unwrap(),
        "--known",
        known.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    run(&args)
}

#[test]
fn score_agrees_with_counting_by_hand() {
    // The sample run scored against synth's truth: precision and recall are the plain
    // counts (links that are known pairs over links, and over known pairs; common practice),
    // counted here independently from links.csv and truth.csv.
    let dir = tempfile::tempdir().unwrap();
    let cfg = write(dir.path(), "config.toml", &sample_config_text());
    let out = dir.path().join("run");
    assert!(run_link(&cfg, &out, &["--quiet"]).status.success());
    let truth_path = root().join("sample-tables/truth.csv");
    let o = score(&out, &truth_path, &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    let printed = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(printed.contains("precision") && printed.contains("share true"));
    let (_, links) = read_csv(&out.join("links.csv"));
    let truth = truth_pairs(&std::fs::read_to_string(&truth_path).unwrap());
    let (p, r) = precision_recall(&links, &truth);
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("score.json")).unwrap()).unwrap();
    assert!((s["precision"].as_f64().unwrap() - p).abs() < 1e-12);
    assert!((s["recall"].as_f64().unwrap() - r).abs() < 1e-12);
    let f1 = 2.0 * p * r / (p + r);
    assert!((s["f1"].as_f64().unwrap() - f1).abs() < 1e-12);
    let bands = s["calibration"].as_array().unwrap();
    let in_bands: u64 = bands.iter().map(|b| b["links"].as_u64().unwrap()).sum();
    assert_eq!(in_bands as usize, links.len());
    // The run's own estimate sits beside the measured precision.
    assert!(s["run_estimates"]["precision"].as_f64().is_some());

    // A gold-standard subset: the first 100 known pairs. Only links touching their records
    // are scored; every such link that is true is among them.
    let subset: Vec<String> = std::fs::read_to_string(&truth_path)
        .unwrap()
        .lines()
        .take(101)
        .map(str::to_string)
        .collect();
    let known = write(dir.path(), "gold.csv", &(subset.join("\n") + "\n"));
    let json = dir.path().join("gold-score.json");
    let o = score(
        &out,
        &known,
        &["--partial", "--json", json.to_str().unwrap(), "--quiet"],
    );
    assert!(o.status.success(), "{}", stderr(&o));
    let g: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(g["known_pairs"].as_u64(), Some(100));
    let scored = g["links_scored"].as_u64().unwrap();
    assert!((95..=105).contains(&scored), "{scored}");
    assert!(g["precision"].as_f64().unwrap() > 0.97);
}

#[test]
fn score_errors_name_the_file_line_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let known = write(dir.path(), "known.csv", "left_id,right_id\na,1\n");
    let o = score(dir.path(), &known, &[]);
    assert!(!o.status.success());
    assert!(stderr(&o).contains("no links.csv here"), "{}", stderr(&o));
    write(
        dir.path(),
        "links.csv",
        "left_id,right_id,weight,confidence\na,1,3.2,0.97\nb,2,1.0,high\n",
    );
    let o = score(dir.path(), &known, &[]);
    let e = stderr(&o);
    assert!(!o.status.success());
    assert!(
        e.contains("links.csv") && e.contains("line 3") && e.contains("confidence"),
        "{e}"
    );
    assert_eq!(e.trim().lines().count(), 1, "{e}");
    write(dir.path(), "known.csv", "left_id,right_id\na,1\nb,2\na,1\n");
    write(
        dir.path(),
        "links.csv",
        "left_id,right_id,weight,confidence\na,1,3.2,0.97\n",
    );
    let o = score(dir.path(), &known, &[]);
    let e = stderr(&o);
    assert!(
        e.contains("given twice (first on line 2)") && e.contains("line 4"),
        "{e}"
    );
}
