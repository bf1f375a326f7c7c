//! Bad input gets one `error:` line naming file, line and column, a non-zero exit and no
//! output files.

use crate::common::*;
use std::path::Path;

fn run_small(
    dir: &Path,
    config: &str,
    left: &str,
    right: &str,
) -> (Option<i32>, String, Vec<String>) {
    write(dir, "config.toml", config);
    write(dir, "left.csv", left);
    write(dir, "right.csv", right);
    let out = dir.join("out");
    let o = run_link(&dir.join("config.toml"), &out, &["--quiet"]);
    (o.status.code(), stderr(&o), files_in(&out))
}

fn check_error(config: &str, left: &str, right: &str, want: &[&str]) {
    let dir = tempfile::tempdir().unwrap();
    let (code, err, files) = run_small(dir.path(), config, left, right);
    assert_eq!(code, Some(1), "{err}");
    assert_eq!(err.lines().count(), 1, "one line: {err}");
    assert!(err.starts_with("error: "), "{err}");
    for w in want {
        assert!(err.contains(w), "want {w:?} in {err}");
    }
    assert!(files.is_empty(), "no outputs: {files:?}");
}

#[test]
fn small_tables_link() {
    let dir = tempfile::tempdir().unwrap();
    let (code, err, files) = run_small(dir.path(), SMALL_CONFIG, SMALL_LEFT, SMALL_RIGHT);
    assert_eq!(code, Some(0), "{err}");
    assert!(files.contains(&"links.csv".to_string()));
    assert_conservation(
        &dir.path().join("out"),
        &["1".into(), "2".into(), "3".into()],
        &["a".into(), "b".into(), "c".into()],
    );
}

#[test]
fn missing_file() {
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), "config.toml", SMALL_CONFIG);
    write(dir.path(), "right.csv", SMALL_RIGHT);
    let out = dir.path().join("out");
    let o = run_link(&dir.path().join("config.toml"), &out, &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = stderr(&o);
    assert!(
        e.starts_with("error: ") && e.contains("left.csv: cannot open"),
        "{e}"
    );
    assert!(files_in(&out).is_empty());
}

#[test]
fn missing_column() {
    check_error(
        SMALL_CONFIG,
        &SMALL_LEFT.replace("id,name,birth,town", "id,nme,birth,town"),
        SMALL_RIGHT,
        &[
            "left.csv: line 1: column `name` not found",
            "closest is `nme`",
        ],
    );
}

#[test]
fn duplicate_id() {
    check_error(
        SMALL_CONFIG,
        &format!("{SMALL_LEFT}2,Bo Tell,1975-06-30,Selwick\n"),
        SMALL_RIGHT,
        &["left.csv: line 5: column id: duplicate id (first seen on line 3)"],
    );
}

#[test]
fn empty_id() {
    check_error(
        SMALL_CONFIG,
        SMALL_LEFT,
        &format!("{SMALL_RIGHT},Eli Moor,1970-01-01,Orlow\n"),
        &["right.csv: line 5: column id: empty id"],
    );
}

#[test]
fn ragged_row() {
    check_error(
        SMALL_CONFIG,
        &format!("{SMALL_LEFT}4,Eli Moor,1970-01-01\n"),
        SMALL_RIGHT,
        &["left.csv: line 5: row has 3 cells but the header has 4"],
    );
}

#[test]
fn empty_table() {
    check_error(
        SMALL_CONFIG,
        "id,name,birth,town\n",
        SMALL_RIGHT,
        &["left.csv: the table has a header but no records"],
    );
    check_error(
        SMALL_CONFIG,
        SMALL_LEFT,
        "",
        &["right.csv: the file is empty"],
    );
}

#[test]
fn bad_date() {
    check_error(
        &SMALL_CONFIG.replace(
            "method = \"date\"",
            "method = \"date\"\nunparsed = \"stop\"",
        ),
        &SMALL_LEFT.replace("1990-11-11", "soon"),
        SMALL_RIGHT,
        &["left.csv: line 4: column birth: not a date"],
    );
}

#[test]
fn config_errors_name_the_key() {
    check_error(
        &SMALL_CONFIG.replace("method = \"date\"", "methd = \"date\""),
        SMALL_LEFT,
        SMALL_RIGHT,
        &[
            "config.toml",
            "unknown key `field[2].methd`",
            "did you mean `method`",
        ],
    );
    check_error(
        &SMALL_CONFIG.replace("name:first:1", "nam:first:1"),
        SMALL_LEFT,
        SMALL_RIGHT,
        &[
            "`block[1].keys`: key `nam:first:1` names `nam`, which is neither a [[field]] nor a column of both tables",
            "did you mean `name`",
        ],
    );
}

#[test]
fn every_config_example_parses() {
    for entry in std::fs::read_dir(root().join("config-examples")).unwrap() {
        let path = entry.unwrap().path();
        let text = std::fs::read_to_string(&path).unwrap();
        if let Err(e) = dovetail::config::Config::from_text(&text, Path::new(".")) {
            panic!("{}: {e}", path.display());
        }
    }
}
