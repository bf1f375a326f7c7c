//! What a new user meets first: the bundled demo, the README's commands, the commented
//! example config, the CI script.

use super::common::*;

#[test]
fn the_demo_warns_about_nothing_of_its_own_design() {
    // The README's first command runs this config; a warning to drop one of its own
    // fields would undermine the user's trust in everything after it.
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out");
    let o = run_link(&root().join("config-examples/sample.toml"), &out, &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(!stderr(&o).contains("warning"), "{}", stderr(&o));
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["warnings"].as_array().map(Vec::len), Some(0));
}

#[test]
fn ci_script_works_with_any_target_dir() {
    // CARGO_TARGET_DIR may move the build anywhere: the CI script must not write into a
    // fixed `target/` path.
    let text = std::fs::read_to_string(root().join(".ci/run")).unwrap();
    for line in text.lines().filter(|l| !l.trim_start().starts_with('#')) {
        assert!(!line.contains("target/"), "{line}");
    }
    assert!(text.contains("cargo test --release"));
}

/// Rewrites a synth table as another office would keep it: renamed columns, its own codes
/// for sex, its own date format and delimiter. `cols` maps (old column, new column); `cell`
/// rewrites one value of a column.
fn reshape(
    src: &std::path::Path,
    dst: &std::path::Path,
    cols: &[(&str, &str)],
    delimiter: char,
    cell: &dyn Fn(&str, &str, usize) -> String,
) {
    let (head, rows) = read_csv(src);
    let at: Vec<usize> = cols
        .iter()
        .map(|(old, _)| head.iter().position(|h| h == old).unwrap())
        .collect();
    let d = delimiter.to_string();
    let mut text = cols
        .iter()
        .map(|(_, new)| *new)
        .collect::<Vec<_>>()
        .join(&d);
    text.push('\n');
    for (r, row) in rows.iter().enumerate() {
        let cells: Vec<String> = cols
            .iter()
            .zip(&at)
            .map(|((old, _), &i)| cell(old, &row[i], r))
            .collect();
        text.push_str(&cells.join(&d));
        text.push('\n');
    }
    std::fs::write(dst, text).unwrap();
}

/// "1984-07-21" as day/month/year or month/day/year.
fn date_as(iso: &str, dmy: bool) -> String {
    let p: Vec<&str> = iso.split('-').collect();
    if p.len() != 3 {
        return iso.to_string();
    }
    if dmy {
        format!("{}/{}/{}", p[2], p[1], p[0])
    } else {
        format!("{}/{}/{}", p[1], p[2], p[0])
    }
}

/// "1984-07-21" as "21 July 1984".
fn in_words(iso: &str) -> String {
    let p: Vec<&str> = iso.split('-').collect();
    match p.get(1).and_then(|m| m.parse::<usize>().ok()) {
        Some(m) if p.len() == 3 && (1..=12).contains(&m) => {
            format!(
                "{} {} {}",
                p[2].trim_start_matches('0'),
                MONTHS[m - 1],
                p[0]
            )
        }
        _ => iso.to_string(),
    }
}

#[test]
fn two_offices_extracts_link_without_editing_them() {
    // The same invented people as a census (sex coded 1/2, dates day/month/year, commas) and
    // a survey (Male/Female, month/day/year, semicolons, two dates written out in words and
    // one unreadable), each with its own column names. Linked with value maps and per-side
    // date orders, as the README describes, they must link as well as the tidy originals.
    let dir = tempfile::tempdir().unwrap();
    let data = dir.path().join("data");
    let o = run(&[
        "synth",
        "--rows",
        "800",
        "--seed",
        "11",
        "--noise",
        "0.5",
        "--out",
        data.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    reshape(
        &data.join("left.csv"),
        &dir.path().join("census.csv"),
        &[
            ("rec_id", "person_id"),
            ("given_name", "forename"),
            ("surname", "family_name"),
            ("birth_date", "born"),
            ("sex", "sex_code"),
            ("postcode", "postcode"),
        ],
        ',',
        &|col, v, _| match col {
            "sex" => match v {
                "M" => "1".into(),
                "F" => "2".into(),
                _ => "9".into(),
            },
            "birth_date" => date_as(v, true),
            _ => v.to_string(),
        },
    );
    reshape(
        &data.join("right.csv"),
        &dir.path().join("survey.csv"),
        &[
            ("rec_id", "resp_id"),
            ("first_name", "first"),
            ("last_name", "last"),
            ("dob", "date_of_birth"),
            ("sex", "gender"),
            ("postcode", "postcode"),
        ],
        ';',
        &|col, v, r| match col {
            "sex" => match v {
                "M" => "Male".into(),
                "F" => "Female".into(),
                _ => String::new(),
            },
            "dob" if r == 3 => "not known".into(),
            "dob" if r == 5 || r == 8 => in_words(v),
            "dob" => date_as(v, false),
            _ => v.to_string(),
        },
    );
    let config = r#"
[left]
path = "census.csv"
id = "person_id"
[right]
path = "survey.csv"
id = "resp_id"
delimiter = ";"
[[field]]
name = "given"
left = "forename"
right = "first"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "surname"
left = "family_name"
right = "last"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "birth"
left = "born"
right = "date_of_birth"
method = "date"
left_date_order = "dmy"
right_date_order = "mdy"
[[field]]
name = "sex"
left = "sex_code"
right = "gender"
method = "exact"
left_recode = { "1" = "M", "2" = "F", "9" = "" }
right_recode = { "Male" = "M", "Female" = "F" }
[[field]]
name = "postcode"
method = "exact"
normalize = "code"
[[block]]
keys = ["surname:soundex", "birth:year"]
[[block]]
keys = ["postcode", "given:first:1"]
"#;
    let cfg = write(dir.path(), "offices.toml", config);
    let out = dir.path().join("out");
    let o = run_link(&cfg, &out, &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    let err = stderr(&o);
    assert!(!err.contains("serious"), "{err}");
    // The unreadable date is taken as missing and said so, with its line (row 3 is line 5).
    assert!(err.contains("taken as missing (line 5)"), "{err}");
    // The report tells a board how each side's values were read.
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(
        html.contains("left dates dmy, right dates mdy"),
        "date orders"
    );
    assert!(html.contains("left values mapped: 1 → M, 2 → F, 9 → (missing)"));
    assert!(html.contains("is not a date and was taken as missing"));

    // The tidy originals with the same fields, for comparison.
    let tidy = config
        .replace("census.csv", "data/left.csv")
        .replace("survey.csv", "data/right.csv")
        .replace("\"person_id\"", "\"rec_id\"")
        .replace("\"resp_id\"", "\"rec_id\"")
        .replace("delimiter = \";\"\n", "")
        .replace("left = \"forename\"\nright = \"first\"", "left = \"given_name\"\nright = \"first_name\"")
        .replace("left = \"family_name\"\nright = \"last\"", "left = \"surname\"\nright = \"last_name\"")
        .replace("left = \"born\"\nright = \"date_of_birth\"", "left = \"birth_date\"\nright = \"dob\"")
        .replace("left_date_order = \"dmy\"\nright_date_order = \"mdy\"\n", "")
        .replace("left = \"sex_code\"\nright = \"gender\"\n", "")
        .replace("left_recode = { \"1\" = \"M\", \"2\" = \"F\", \"9\" = \"\" }\nright_recode = { \"Male\" = \"M\", \"Female\" = \"F\" }\n", "");
    let tidy_cfg = write(dir.path(), "tidy.toml", &tidy);
    let tidy_out = dir.path().join("tidy-out");
    let o = run_link(&tidy_cfg, &tidy_out, &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let truth = truth_pairs(&std::fs::read_to_string(data.join("truth.csv")).unwrap());
    let f1 = |dir: &std::path::Path| {
        let (_, links) = read_csv(&dir.join("links.csv"));
        let (p, r) = precision_recall(&links, &truth);
        2.0 * p * r / (p + r)
    };
    let (messy, clean) = (f1(&out), f1(&tidy_out));
    assert!(clean > 0.95, "tidy F1 {clean}");
    assert!(
        messy > clean - 0.01,
        "messy F1 {messy} against tidy {clean}"
    );
}

#[test]
fn the_commented_example_shows_every_option() {
    // config-examples/customers.toml is "a commented example of every option": it must
    // parse, and every key the config accepts must appear in it (as `key =`, or as a
    // `[table]` header), commented out at most where it names a file that is not shipped.
    let text = std::fs::read_to_string(root().join("config-examples/customers.toml")).unwrap();
    dovetail::config::Config::from_text(&text, std::path::Path::new("/nowhere"))
        .unwrap_or_else(|e| panic!("customers.toml: {e}"));
    let readme = std::fs::read_to_string(root().join("README.md")).unwrap();
    for (table, keys) in dovetail::config::ALL_KEYS {
        for key in *keys {
            let shown = text.contains(&format!("{key} ="))
                || text.contains(&format!("[{key}]"))
                || text.contains(&format!("[[{key}]]"));
            assert!(shown, "customers.toml lacks `{key}` ({table})");
            assert!(
                readme.contains(&format!("`{key}")) || readme.contains(&format!("\n{key} =")),
                "the README never names `{key}` ({table})"
            );
        }
    }
}
