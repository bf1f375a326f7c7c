//! Real extracts' codings and formats (issue 18): two invented tables with different column
//! names, codes and date formats link with no edits to the files.

use crate::common::*;
use std::collections::HashSet;
use std::path::Path;

const SYLLABLES: [&str; 16] = [
    "ka", "lo", "mir", "ten", "sa", "vel", "dor", "ni", "ra", "bek", "ul", "fen", "ta", "gor",
    "is", "wen",
];

/// One invented person.
struct Person {
    given: String,
    surname: String,
    /// (year, month, day)
    birth: (u32, u32, u32),
    female: bool,
    postcode: String,
}

fn capitalised(s: String) -> String {
    let mut c = s.chars();
    c.next()
        .map(|f| f.to_uppercase().chain(c).collect())
        .unwrap_or_default()
}

/// `n` invented people from a small fixed generator (a linear congruential one).
fn people(n: usize) -> Vec<Person> {
    let mut state: u64 = 0x5eed;
    let mut next = move |m: u64| {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (state >> 33) % m
    };
    (0..n)
        .map(|_| {
            let mut name = |parts: u64| {
                let s: String = (0..parts).map(|_| SYLLABLES[next(16) as usize]).collect();
                capitalised(s)
            };
            let given = name(2);
            let surname = name(3);
            Person {
                given,
                surname,
                birth: (
                    1930 + next(70) as u32,
                    1 + next(12) as u32,
                    1 + next(28) as u32,
                ),
                female: next(2) == 0,
                postcode: format!("KV{} {}Q{}", next(9) + 1, next(9), next(9)),
            }
        })
        .collect()
}

/// People only in the right table (the last ones).
const RIGHT_ONLY: usize = 20;

/// The left table: a census-like extract of all but the last [`RIGHT_ONLY`] people, dates
/// day first, sex coded 1 (male) / 2 (female).
fn left_csv(p: &[Person]) -> String {
    let mut s = String::from("pid,forename,family_name,born,sex,postcode\n");
    for (i, q) in p[..p.len() - RIGHT_ONLY].iter().enumerate() {
        let (y, m, d) = q.birth;
        s.push_str(&format!(
            "L{i:03},{},{},{d:02}/{m:02}/{y},{},{}\n",
            q.given,
            q.surname,
            if q.female { 2 } else { 1 },
            q.postcode
        ));
    }
    s
}

/// The right table: a survey-like extract of the first `shared` people and the last
/// [`RIGHT_ONLY`], rows in another order, dates month first (every fifth written out), sex in
/// words.
fn right_csv(p: &[Person], shared: usize) -> String {
    let mut s = String::from("ref,first,last,dob,gender,postcode\n");
    for (i, q) in p.iter().enumerate().rev() {
        if i >= shared && i < p.len() - RIGHT_ONLY {
            continue;
        }
        let (y, m, d) = q.birth;
        let dob = if i % 5 == 0 {
            format!("\"{} {d}, {y}\"", MONTHS[m as usize - 1])
        } else {
            format!("{m:02}/{d:02}/{y}")
        };
        s.push_str(&format!(
            "R{i:03},{},{},{dob},{},{}\n",
            q.given,
            q.surname,
            if q.female { "Female" } else { "Male" },
            q.postcode
        ));
    }
    s
}

/// The true pairs: the first `shared` people.
fn truth(shared: usize) -> HashSet<(String, String)> {
    (0..shared)
        .map(|i| (format!("L{i:03}"), format!("R{i:03}")))
        .collect()
}

const PEOPLE: usize = 140;
const SHARED: usize = 100;

fn config(fields_extra: &str, blocks: &str) -> String {
    format!(
        r#"
[left]
path = "left.csv"
id = "pid"
[right]
path = "right.csv"
id = "ref"
[[field]]
name = "given"
left = "forename"
right = "first"
method = "jaro-winkler"
[[field]]
name = "surname"
left = "family_name"
right = "last"
method = "jaro-winkler"
[[field]]
name = "birth"
left = "born"
right = "dob"
method = "date"
left_date_order = "dmy"
right_date_order = "mdy"
[[field]]
name = "sex"
right = "gender"
method = "exact"
{fields_extra}
{blocks}
"#
    )
}

const RECODES: &str = r#"left_recode = { "1" = "M", "2" = "F", "9" = "" }
right_recode = { "Male" = "M", "Female" = "F" }"#;

const SURNAME_PASS: &str = "[[block]]\nkeys = [\"surname:first:1\"]\n";

fn setup(dir: &Path, config: &str, left: &str, right: &str) {
    write(dir, "config.toml", config);
    write(dir, "left.csv", left);
    write(dir, "right.csv", right);
}

fn link(dir: &Path, extra: &[&str]) -> std::process::Output {
    run_link(&dir.join("config.toml"), &dir.join("out"), extra)
}

fn summary(dir: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(dir.join("out/summary.json")).expect("summary.json");
    serde_json::from_str(&text).expect("json")
}

fn warnings(s: &serde_json::Value) -> Vec<String> {
    s["warnings"]
        .as_array()
        .expect("warnings")
        .iter()
        .filter_map(|w| w.as_str().map(String::from))
        .collect()
}

fn field<'a>(s: &'a serde_json::Value, name: &str) -> &'a serde_json::Value {
    s["fields"]
        .as_array()
        .expect("fields")
        .iter()
        .find(|f| f["name"] == name)
        .expect("field")
}

fn links(dir: &Path) -> HashSet<(String, String)> {
    let (_, rows) = read_csv(&dir.join("out/links.csv"));
    rows.into_iter()
        .map(|r| (r[0].clone(), r[1].clone()))
        .collect()
}

#[test]
fn recodes_make_sex_agree() {
    let p = people(PEOPLE);
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        &config(RECODES, SURNAME_PASS),
        &left_csv(&p),
        &right_csv(&p, SHARED),
    );
    let o = link(dir.path(), &[]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(!stderr(&o).contains("serious"), "{}", stderr(&o));
    let s = summary(dir.path());
    assert!(warnings(&s).iter().all(|w| !w.starts_with("serious: ")));
    let sex = field(&s, "sex");
    assert_eq!(sex["left_values_shared"], 1.0);
    assert!(sex["top_agreement"].as_f64().expect("share") > 0.3, "{sex}");
    let found = links(dir.path());
    let t = truth(SHARED);
    assert!(found.intersection(&t).count() >= 95, "{found:?}");
}

#[test]
fn different_codings_without_recodes_are_serious() {
    let p = people(PEOPLE);
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        &config("", SURNAME_PASS),
        &left_csv(&p),
        &right_csv(&p, SHARED),
    );
    let o = link(dir.path(), &[]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let err = stderr(&o);
    // The serious finding is printed before the other warnings.
    let first = err
        .lines()
        .find(|l| l.starts_with("warning"))
        .unwrap_or_default();
    assert!(
        first.starts_with("warning (serious): field `sex` agreed on none of the "),
        "{err}"
    );
    assert!(
        first.contains("its two sides share no values: check its codings (left: 1, 2; right: female, male) or map them with `left_recode`/`right_recode`"),
        "{first}"
    );
    let s = summary(dir.path());
    let sex = field(&s, "sex");
    assert_eq!(sex["top_agreement"], 0.0);
    assert_eq!(sex["left_values_shared"], 0.0);
    assert_eq!(sex["right_values_shared"], 0.0);
    // Only the field with different codings is named; names are never listed.
    let serious: Vec<String> = warnings(&s)
        .into_iter()
        .filter(|w| w.starts_with("serious: "))
        .collect();
    assert_eq!(serious.len(), 1, "{serious:?}");
}

#[test]
fn day_first_left_links_month_first_right() {
    let p = people(PEOPLE);
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        &config(RECODES, SURNAME_PASS),
        &left_csv(&p),
        &right_csv(&p, SHARED),
    );
    let o = link(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(links(dir.path()), truth(SHARED));
    // Every link's birth dates are the same date (level 0), whatever each side's format.
    let (head, rows) = read_csv(&dir.path().join("out/links.csv"));
    let birth = head.iter().position(|h| h == "birth").expect("birth level");
    assert!(rows.iter().all(|r| r[birth] == "0"), "{rows:?}");
    let s = summary(dir.path());
    assert_eq!(field(&s, "birth")["unparsed_left"], 0);
    assert_eq!(field(&s, "birth")["unparsed_right"], 0);
}

#[test]
fn the_same_links_for_any_thread_count() {
    let p = people(PEOPLE);
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        &config(RECODES, SURNAME_PASS),
        &left_csv(&p),
        &right_csv(&p, SHARED),
    );
    let mut outs = Vec::new();
    for threads in ["1", "2"] {
        let o = link(dir.path(), &["--quiet", "--threads", threads]);
        assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
        outs.push(std::fs::read(dir.path().join("out/links.csv")).expect("links.csv"));
    }
    assert_eq!(outs[0], outs[1]);
}

/// A table with the date (the fourth cell, on either side) of line `line` replaced (the
/// header is line 1; the line's date must not be written out with a comma).
fn with_bad_date(left: &str, line: usize, bad: &str) -> String {
    left.lines()
        .enumerate()
        .map(|(i, l)| {
            if i + 1 == line {
                let mut cells: Vec<&str> = l.split(',').collect();
                cells[3] = bad;
                cells.join(",")
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
        + "\n"
}

#[test]
fn unparseable_dates_become_missing_or_stop() {
    let p = people(PEOPLE);
    let left = with_bad_date(&left_csv(&p), 14, "unknown");
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        &config(RECODES, SURNAME_PASS),
        &left,
        &right_csv(&p, SHARED),
    );
    let o = link(dir.path(), &[]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let want = "field `birth`: 1 value in the left table is not a date and was taken as missing (line 14); set `unparsed = \"stop\"` to stop instead";
    assert!(stderr(&o).contains(want), "{}", stderr(&o));
    let s = summary(dir.path());
    assert!(warnings(&s).iter().any(|w| w == want));
    let birth = field(&s, "birth");
    assert_eq!(birth["unparsed_left"], 1);
    assert_eq!(birth["unparsed_left_lines"], serde_json::json!([14]));
    assert_eq!(birth["unparsed_right"], 0);

    // With `unparsed = "stop"`: the one-line error, its examples in the side's own order.
    let stop = config(&format!("{RECODES}\n"), SURNAME_PASS).replace(
        "right_date_order = \"mdy\"",
        "right_date_order = \"mdy\"\nunparsed = \"stop\"",
    );
    let dir = tempfile::tempdir().unwrap();
    setup(dir.path(), &stop, &left, &right_csv(&p, SHARED));
    let o = link(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = stderr(&o);
    assert_eq!(e.lines().count(), 1, "{e}");
    assert!(
        e.starts_with("error: ")
            && e.contains("left.csv: line 14: column born: not a date (expected e.g. 21/07/1984,"),
        "{e}"
    );
    assert!(files_in(&dir.path().join("out")).is_empty());
    let right = with_bad_date(&right_csv(&p, SHARED), 2, "13/13/1990");
    setup(dir.path(), &stop, &left_csv(&p), &right);
    let e = stderr(&link(dir.path(), &["--quiet"]));
    assert!(
        e.contains("right.csv: line 2: column dob: not a date (expected e.g. 07/21/1984,"),
        "{e}"
    );
}

#[test]
fn semicolon_file_gets_the_delimiter_hint() {
    let p = people(60);
    let right = right_csv(&p, 30).replace(',', ";");
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        &config(RECODES, SURNAME_PASS),
        &left_csv(&p),
        &right,
    );
    let o = link(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = stderr(&o);
    assert_eq!(e.lines().count(), 1, "{e}");
    assert!(
        e.contains("right.csv: line 1: column `ref` not found in the header")
            && e.ends_with(
                "the header reads as one column; the file looks `;`-delimited: set `delimiter = \";\"` under [right]\n"
            ),
        "{e}"
    );
    let fixed =
        config(RECODES, SURNAME_PASS).replace("id = \"ref\"", "id = \"ref\"\ndelimiter = \";\"");
    write(dir.path(), "config.toml", &fixed);
    let o = link(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
}

#[test]
fn pass_on_a_column_that_is_not_compared() {
    // The postcode is in both tables but no [[field]] compares it: it only blocks.
    let p = people(PEOPLE);
    let dir = tempfile::tempdir().unwrap();
    let cfg = config(
        RECODES,
        "[[block]]\nkeys = [\"postcode:first:3\", \"sex\"]\n",
    );
    setup(dir.path(), &cfg, &left_csv(&p), &right_csv(&p, SHARED));
    let o = link(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let found = links(dir.path());
    assert!(
        found.intersection(&truth(SHARED)).count() >= 95,
        "{found:?}"
    );
    let s = summary(dir.path());
    let names: Vec<&str> = s["fields"]
        .as_array()
        .expect("fields")
        .iter()
        .filter_map(|f| f["name"].as_str())
        .collect();
    assert_eq!(names, vec!["given", "surname", "birth", "sex"]);

    // A column one table lacks: that table's missing-column error.
    let right = right_csv(&p, SHARED).replace(",postcode\n", ",zip\n");
    setup(dir.path(), &cfg, &left_csv(&p), &right);
    let e = stderr(&link(dir.path(), &["--quiet"]));
    assert_eq!(e.lines().count(), 1, "{e}");
    assert!(
        e.contains("right.csv: line 1: column `postcode` (for key `postcode:first:3` of `block[1].keys`) not found in the header"),
        "{e}"
    );
    // A name that is neither a field nor a column of both tables.
    setup(
        dir.path(),
        &cfg.replace("postcode:first:3", "postcod:first:3"),
        &left_csv(&p),
        &right_csv(&p, SHARED),
    );
    let e = stderr(&link(dir.path(), &["--quiet"]));
    assert!(
        e.contains("`block[1].keys`: key `postcod:first:3` names `postcod`, which is neither a [[field]] nor a column of both tables; did you mean `postcode`?"),
        "{e}"
    );
}
