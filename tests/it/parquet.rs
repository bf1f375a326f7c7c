//! Parquet tables in and out. The fixtures are written by pyarrow
//! (tests/reference/parquet_fixtures.py), a Parquet writer independent of the one the tool
//! uses; the expected text of each typed value is in tests/reference/parquet/types.json.

use crate::common::{root, run_link, stderr, write};
use std::path::{Path, PathBuf};

fn fixture(name: &str) -> PathBuf {
    root().join("tests/reference/parquet").join(name)
}

/// The sample config with its two tables replaced by `left` and `right`.
fn config_with(dir: &Path, left: &Path, right: &Path) -> PathBuf {
    let text = std::fs::read_to_string(root().join("config-examples/sample.toml"))
        .expect("sample config")
        .replace("../sample-tables/left.csv", left.to_str().expect("path"))
        .replace("../sample-tables/right.csv", right.to_str().expect("path"));
    write(dir, "run.toml", &text)
}

/// summary.json without what describes the inputs rather than the answer: the manifest
/// (paths, hashes, sizes, times) and the memory estimate (which counts the input files'
/// bytes, and a Parquet file is smaller than its CSV).
pub fn answer_of(summary: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(summary).expect("summary.json");
    let mut v: serde_json::Value = serde_json::from_str(&text).expect("json");
    let obj = v.as_object_mut().expect("object");
    obj.remove("manifest");
    obj.remove("memory_estimate");
    v
}

#[test]
fn parquet_tables_give_the_csv_answers() {
    let dir = tempfile::tempdir().unwrap();
    let csv_out = dir.path().join("csv");
    let pq_out = dir.path().join("pq");
    let o = run_link(
        &root().join("config-examples/sample.toml"),
        &csv_out,
        &["--quiet"],
    );
    assert!(o.status.success(), "{}", stderr(&o));
    let cfg = config_with(
        dir.path(),
        &fixture("sample_left.parquet"),
        &fixture("sample_right.parquet"),
    );
    let o = run_link(&cfg, &pq_out, &["--quiet", "--parquet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    for f in [
        "links.csv",
        "unlinked_left.csv",
        "unlinked_right.csv",
        "review.csv",
    ] {
        assert_eq!(
            std::fs::read(csv_out.join(f)).unwrap(),
            std::fs::read(pq_out.join(f)).unwrap(),
            "{f} differs between CSV and Parquet inputs"
        );
    }
    assert_eq!(
        answer_of(&csv_out.join("summary.json")),
        answer_of(&pq_out.join("summary.json"))
    );
}

/// Reads a Parquet file written by `--parquet` back with the parquet crate.
fn read_back(path: &Path) -> Vec<arrow_array::RecordBatch> {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let file = std::fs::File::open(path).unwrap();
    ParquetRecordBatchReaderBuilder::try_new(file)
        .unwrap()
        .build()
        .unwrap()
        .map(|b| b.unwrap())
        .collect()
}

/// Links the sample tables into `dir/out` with `--parquet`; returns the folder.
fn sample_with_parquet_outputs(dir: &Path) -> PathBuf {
    let out = dir.join("out");
    let o = run_link(
        &root().join("config-examples/sample.toml"),
        &out,
        &["--quiet", "--parquet"],
    );
    assert!(o.status.success(), "{}", stderr(&o));
    out
}

#[test]
fn parquet_outputs_hold_the_csv_rows_with_numbers_as_floats() {
    use arrow_array::cast::AsArray;
    use arrow_array::types::Float64Type;
    let dir = tempfile::tempdir().unwrap();
    let out = sample_with_parquet_outputs(dir.path());
    let (head, rows) = crate::common::read_csv(&out.join("links.csv"));
    let batches = read_back(&out.join("links.parquet"));
    let n: usize = batches.iter().map(|b| b.num_rows()).sum();
    assert_eq!(n, rows.len());
    let b = &batches[0];
    let names: Vec<String> = b
        .schema()
        .fields()
        .iter()
        .map(|f| f.name().clone())
        .collect();
    assert_eq!(names, head);
    let ci = head.iter().position(|h| h == "confidence").unwrap();
    let conf = b.column(ci).as_primitive::<Float64Type>();
    let ids = b.column(0).as_string::<i32>();
    for (r, row) in rows.iter().enumerate().take(b.num_rows().min(200)) {
        assert_eq!(ids.value(r), row[0]);
        assert_eq!(conf.value(r), row[ci].parse::<f64>().unwrap());
    }
    // Every Parquet file is in the folder's record with its hash.
    let record = std::fs::read_to_string(out.join("outputs.json")).unwrap();
    for f in [
        "links.parquet",
        "unlinked_left.parquet",
        "unlinked_right.parquet",
        "review.parquet",
    ] {
        assert!(record.contains(f), "{f} missing from outputs.json");
    }
}

#[test]
fn typed_columns_read_as_their_csv_text() {
    // Expected texts written by hand in the fixture script (types.json).
    let expected: std::collections::BTreeMap<String, Vec<String>> =
        serde_json::from_str(&std::fs::read_to_string(fixture("types.json")).unwrap()).unwrap();
    let spec = dovetail::io::ReadSpec {
        id: "id".into(),
        columns: expected.keys().filter(|k| *k != "id").cloned().collect(),
        optional: vec![],
        section: "left".into(),
        encoding: dovetail::io::Encoding::Utf8,
        delimiter: b',',
    };
    let t = dovetail::io::read_table(&fixture("types.parquet"), &spec).unwrap();
    assert_eq!(t.ids.to_strings(), expected["id"]);
    for (name, want) in &expected {
        if name != "id" {
            assert_eq!(t.column(name).to_strings(), *want, "column {name}");
        }
    }
    assert_eq!(t.place, "row");
}

/// Runs the sample config with its left table replaced by `left`; returns the error line.
fn left_error(left: &Path) -> String {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config_with(dir.path(), left, &fixture("sample_right.parquet"));
    let o = run_link(&cfg, &dir.path().join("out"), &["--quiet"]);
    assert!(!o.status.success(), "a bad table must fail");
    assert!(!dir.path().join("out/links.csv").exists());
    let err = stderr(&o);
    assert_eq!(err.trim().lines().count(), 1, "one line: {err}");
    err
}

#[test]
fn truncated_and_fake_parquet_files_are_one_line_errors() {
    let dir = tempfile::tempdir().unwrap();
    let bytes = std::fs::read(fixture("sample_left.parquet")).unwrap();
    let cut = dir.path().join("cut.parquet");
    std::fs::write(&cut, &bytes[..bytes.len() / 2]).unwrap();
    let err = left_error(&cut);
    assert!(
        err.contains("cut.parquet: not a readable Parquet file"),
        "{err}"
    );
    // The footer intact but a data page damaged in the middle.
    let mut hurt = bytes.clone();
    for b in &mut hurt[2_000..6_000] {
        *b ^= 0x5A;
    }
    let damaged = dir.path().join("damaged.parquet");
    std::fs::write(&damaged, &hurt).unwrap();
    let err = left_error(&damaged);
    assert!(err.contains("damaged.parquet: "), "{err}");
    let fake = dir.path().join("fake.parquet");
    std::fs::copy(root().join("sample-tables/left.csv"), &fake).unwrap();
    let err = left_error(&fake);
    assert!(err.contains("fake.parquet: not a Parquet file"), "{err}");
}

#[test]
fn parquet_errors_name_the_row_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = write(
        dir.path(),
        "dup.toml",
        &format!(
            "[left]\npath = \"{}\"\nid = \"id\"\n[right]\npath = \"{}\"\nid = \"id\"\n[[field]]\nname = \"v\"\nmethod = \"exact\"\n[[block]]\nkeys = [\"v\"]\n",
            fixture("duplicate_ids.parquet").display(),
            fixture("duplicate_ids.parquet").display()
        ),
    );
    let o = run_link(&cfg, &dir.path().join("out"), &["--quiet"]);
    let err = stderr(&o);
    assert!(
        err.contains("duplicate_ids.parquet: row 3: column id: duplicate id (first seen on row 1)"),
        "{err}"
    );
    let cfg = write(
        dir.path(),
        "list.toml",
        &format!(
            "[left]\npath = \"{}\"\nid = \"id\"\n[right]\npath = \"{}\"\nid = \"id\"\n[[field]]\nname = \"v\"\nmethod = \"exact\"\n[[block]]\nkeys = [\"v\"]\n",
            fixture("list_column.parquet").display(),
            fixture("list_column.parquet").display()
        ),
    );
    let o = run_link(&cfg, &dir.path().join("out"), &["--quiet"]);
    let err = stderr(&o);
    assert!(err.contains("column v: holds values of type List"), "{err}");
    // A missing column: the CSV reader's message, with the closest name.
    let text = std::fs::read_to_string(root().join("config-examples/sample.toml"))
        .unwrap()
        .replace(
            "../sample-tables/left.csv",
            fixture("sample_left.parquet").to_str().unwrap(),
        )
        .replace(
            "../sample-tables/right.csv",
            fixture("sample_right.parquet").to_str().unwrap(),
        )
        .replace("left = \"surname\"", "left = \"surnme\"");
    let cfg = write(dir.path(), "miss.toml", &text);
    let o = run_link(&cfg, &dir.path().join("out"), &["--quiet"]);
    let err = stderr(&o);
    assert!(
        err.contains("sample_left.parquet: ") && err.contains("surname"),
        "{err}"
    );
}

#[test]
fn match_reads_scored_pairs_from_parquet_as_from_csv() {
    let dir = tempfile::tempdir().unwrap();
    let out = sample_with_parquet_outputs(dir.path());
    let mut said = Vec::new();
    for name in ["links.csv", "links.parquet"] {
        let to = dir.path().join(format!("match-{name}"));
        let o = crate::common::run(&[
            "match",
            "--pairs",
            out.join(name).to_str().unwrap(),
            "--out",
            to.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", stderr(&o));
        said.push((
            String::from_utf8_lossy(&o.stdout).into_owned(),
            std::fs::read(to.join("links.csv")).unwrap(),
        ));
    }
    assert!(said[0].0.contains("links: "), "{}", said[0].0);
    assert_eq!(
        said[0], said[1],
        "match gave different answers on CSV and Parquet pairs"
    );
}
