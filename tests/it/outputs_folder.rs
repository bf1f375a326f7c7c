//! A run owns its output folder: outputs of different runs or commands never mix.

use super::common::*;
use std::path::Path;

fn record(out: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(out.join("outputs.json")).unwrap()).unwrap()
}

/// The folder's record lists exactly the dovetail files present, each with its true hash.
fn assert_record_true(out: &Path) {
    let r = record(out);
    let mut listed: Vec<String> = r["files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| {
            let name = f["name"].as_str().unwrap().to_string();
            let bytes = std::fs::read(out.join(&name)).unwrap();
            assert_eq!(f["bytes"].as_u64(), Some(bytes.len() as u64), "{name}");
            assert_eq!(
                f["sha256"].as_str().unwrap(),
                dovetail::io::sha256_hex(&bytes),
                "{name}"
            );
            name
        })
        .collect();
    listed.push("outputs.json".into());
    listed.sort();
    let mut present = files_in(out);
    present.retain(|n| n != "notes.txt");
    assert_eq!(listed, present);
}

fn run_cmd(cmd: &str, cfg: &Path, out: &Path) {
    let o = run(&[
        cmd,
        "--config",
        cfg.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{cmd}: {}", stderr(&o));
}

#[test]
fn a_run_owns_its_folder() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = write(dir.path(), "sample.toml", &sample_config_text());
    let other = write(
        dir.path(),
        "other.toml",
        &sample_config_text().replace("min_confidence = 0.5", "min_confidence = 0.6"),
    );
    let out = dir.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    // A file of the user's own is never touched.
    write(&out, "notes.txt", "mine\n");

    // tune, then link with the same config and inputs: the tune table stays and the report
    // shows it.
    run_cmd("tune", &cfg, &out);
    run_cmd("link", &cfg, &out);
    assert!(files_in(&out).contains(&"tune.csv".to_string()));
    let report = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(report.contains("from dovetail tune"));
    assert_record_true(&out);
    let r = record(&out);
    let tune = r["files"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["name"] == "tune.csv")
        .unwrap();
    assert_eq!(tune["command"], "tune");

    // score adds score.json beside the links and keeps everything else.
    let truth = root().join("sample-tables/truth.csv");
    let o = run(&[
        "score",
        "--run",
        out.to_str().unwrap(),
        "--known",
        truth.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(files_in(&out).contains(&"score.json".to_string()));
    assert!(files_in(&out).contains(&"tune.csv".to_string()));
    assert_record_true(&out);

    // link with another config: the tune table and the score of the earlier links go, and
    // the report shows no tune table.
    run_cmd("link", &other, &out);
    let files = files_in(&out);
    assert!(!files.contains(&"tune.csv".to_string()), "{files:?}");
    assert!(!files.contains(&"score.json".to_string()), "{files:?}");
    let report = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(!report.contains("from dovetail tune"));
    assert_record_true(&out);

    // assess into a link folder: no links of the earlier run are left beside its summary.
    run_cmd("assess", &other, &out);
    let files = files_in(&out);
    for gone in [
        "links.csv",
        "unlinked_left.csv",
        "unlinked_right.csv",
        "review.csv",
    ] {
        assert!(!files.contains(&gone.to_string()), "{gone} left: {files:?}");
    }
    assert!(files.contains(&"notes.txt".to_string()));
    assert_eq!(
        std::fs::read_to_string(out.join("notes.txt")).unwrap(),
        "mine\n"
    );
    assert_record_true(&out);
}
