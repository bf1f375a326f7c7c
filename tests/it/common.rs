//! Helpers shared by the integration tests.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// The binary under test.
pub fn bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_dovetail"))
}

/// The repository root.
pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Runs the binary with arguments.
pub fn run(args: &[&str]) -> Output {
    Command::new(bin())
        .args(args)
        .output()
        .expect("run dovetail")
}

/// Runs `dovetail link --config CONFIG --out OUT` with extra arguments.
pub fn run_link(config: &Path, out: &Path, extra: &[&str]) -> Output {
    let mut args = vec![
        "link",
        "--config",
        config.to_str().expect("utf-8 path"),
        "--out",
        out.to_str().expect("utf-8 path"),
    ];
    args.extend_from_slice(extra);
    run(&args)
}

/// The text of stderr.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).to_string()
}

/// Reads a CSV into its header and rows.
pub fn read_csv(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let mut r = csv::Reader::from_path(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let head = r
        .headers()
        .expect("header")
        .iter()
        .map(String::from)
        .collect();
    let rows = r
        .records()
        .map(|x| x.expect("row").iter().map(String::from).collect())
        .collect();
    (head, rows)
}

/// The ids of a table's id column.
pub fn ids_of(table: &Path, id: &str) -> Vec<String> {
    let (head, rows) = read_csv(table);
    let k = head.iter().position(|h| h == id).expect("id column");
    rows.into_iter().map(|r| r[k].trim().to_string()).collect()
}

/// Conservation (issue 8): every input id appears exactly once across links.csv and the
/// unlinked file of its side.
pub fn assert_conservation(out: &Path, left_ids: &[String], right_ids: &[String]) {
    let (_, links) = read_csv(&out.join("links.csv"));
    let (_, ul) = read_csv(&out.join("unlinked_left.csv"));
    let (_, ur) = read_csv(&out.join("unlinked_right.csv"));
    let mut seen_l: HashMap<&str, usize> = HashMap::new();
    let mut seen_r: HashMap<&str, usize> = HashMap::new();
    for r in &links {
        *seen_l.entry(r[0].as_str()).or_default() += 1;
        *seen_r.entry(r[1].as_str()).or_default() += 1;
    }
    for r in &ul {
        *seen_l.entry(r[0].as_str()).or_default() += 1;
    }
    for r in &ur {
        *seen_r.entry(r[0].as_str()).or_default() += 1;
    }
    for id in left_ids {
        assert_eq!(seen_l.get(id.as_str()), Some(&1), "left id {id}");
    }
    for id in right_ids {
        assert_eq!(seen_r.get(id.as_str()), Some(&1), "right id {id}");
    }
    assert_eq!(seen_l.len(), left_ids.len(), "no unknown left ids");
    assert_eq!(seen_r.len(), right_ids.len(), "no unknown right ids");
}

/// The demo config's text with the sample tables' paths made absolute, to edit and write
/// elsewhere.
pub fn sample_config_text() -> String {
    std::fs::read_to_string(root().join("config-examples/sample.toml"))
        .expect("sample config")
        .replace(
            "../sample-tables/",
            &format!("{}/sample-tables/", root().display()),
        )
}

/// The (left id, right id) pairs of a truth.csv text.
pub fn truth_pairs(text: &str) -> std::collections::HashSet<(String, String)> {
    text.lines()
        .skip(1)
        .filter_map(|l| l.split_once(','))
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .collect()
}

/// Precision and recall of links.csv rows against a truth.
pub fn precision_recall(
    links: &[Vec<String>],
    truth: &std::collections::HashSet<(String, String)>,
) -> (f64, f64) {
    let correct = links
        .iter()
        .filter(|r| truth.contains(&(r[0].clone(), r[1].clone())))
        .count();
    (
        correct as f64 / links.len() as f64,
        correct as f64 / truth.len() as f64,
    )
}

/// Files in a folder (names), sorted.
pub fn files_in(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = match std::fs::read_dir(dir) {
        Ok(rd) => rd
            .map(|e| e.expect("entry").file_name().to_string_lossy().to_string())
            .collect(),
        Err(_) => Vec::new(),
    };
    v.sort();
    v
}

/// Writes a file in `dir`.
pub fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).expect("write fixture");
    p
}

/// A small config over `left.csv` and `right.csv` with three fields and one pass.
pub const SMALL_CONFIG: &str = r#"
[left]
path = "left.csv"
id = "id"
[right]
path = "right.csv"
id = "id"
[[field]]
name = "name"
method = "jaro-winkler"
[[field]]
name = "birth"
method = "date"
[[field]]
name = "town"
method = "exact"
[[block]]
keys = ["name:first:1"]
"#;

/// Tables that go with [`SMALL_CONFIG`].
pub const SMALL_LEFT: &str = "id,name,birth,town\n1,Ann Oskar,1980-01-02,Orlow\n2,Bram Tell,1975-06-30,Selwick\n3,Cara Venn,1990-11-11,Orlow\n";
/// The right table for [`SMALL_CONFIG`].
pub const SMALL_RIGHT: &str = "id,name,birth,town\na,Ann Oskar,1980-01-02,Orlow\nb,Bram Tel,1975-06-30,Selwick\nc,Dov Ash,1961-03-03,Fenmouth\n";

/// English month names, for dates written out in words.
pub const MONTHS: [&str; 12] = [
    "January",
    "February",
    "March",
    "April",
    "May",
    "June",
    "July",
    "August",
    "September",
    "October",
    "November",
    "December",
];
