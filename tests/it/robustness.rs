//! Bad input and faults (issue 8): clear errors, nothing lost, no partial outputs, no panics.

use crate::common::*;
use dovetail::config::Config;
use dovetail::io::{read_table_from, Encoding, ReadSpec};
use dovetail::pipeline::{self, Silent};
use proptest::prelude::*;
use std::path::Path;

fn link_in(dir: &Path, extra_args: &[&str]) -> std::process::Output {
    let out = dir.join("out");
    let cfg = dir.join("config.toml");
    let mut args = vec![
        "link",
        "--config",
        cfg.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra_args);
    run(&args)
}

fn setup(dir: &Path, config: &str, left: &[u8], right: &[u8]) {
    write(dir, "config.toml", config);
    std::fs::write(dir.join("left.csv"), left).unwrap();
    std::fs::write(dir.join("right.csv"), right).unwrap();
}

#[test]
fn latin1_needs_the_option_and_then_reads() {
    let dir = tempfile::tempdir().unwrap();
    // "Zoë" in ISO-8859-1: 0xEB is ë.
    let left =
        b"id,name,birth,town\n1,Zo\xEB Ash,1980-01-02,Orlow\n2,Bram Tell,1975-06-30,Selwick\n";
    setup(dir.path(), SMALL_CONFIG, left, SMALL_RIGHT.as_bytes());
    let o = link_in(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = stderr(&o);
    assert!(
        e.contains("left.csv: line 2: column name: text is not valid UTF-8")
            && e.contains("encoding = \"latin1\""),
        "{e}"
    );
    let cfg = SMALL_CONFIG.replace(
        "path = \"left.csv\"",
        "path = \"left.csv\"\nencoding = \"latin1\"",
    );
    write(dir.path(), "config.toml", &cfg);
    let o = link_in(dir.path(), &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_conservation(
        &dir.path().join("out"),
        &["1".into(), "2".into()],
        &["a".into(), "b".into(), "c".into()],
    );
}

#[test]
fn oversized_value_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let big = "x".repeat(70_000);
    let left = format!("id,name,birth,town\n1,{big},1980-01-02,Orlow\n");
    setup(
        dir.path(),
        SMALL_CONFIG,
        left.as_bytes(),
        SMALL_RIGHT.as_bytes(),
    );
    let o = link_in(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        stderr(&o).contains("left.csv: line 2: column name: value is 70000 bytes long"),
        "{}",
        stderr(&o)
    );
    assert!(files_in(&dir.path().join("out")).is_empty());
}

#[test]
fn field_empty_everywhere_is_dropped_with_a_warning() {
    let dir = tempfile::tempdir().unwrap();
    let blank = |t: &str| {
        t.replace("Orlow", "")
            .replace("Selwick", "")
            .replace("Fenmouth", "")
    };
    setup(
        dir.path(),
        SMALL_CONFIG,
        blank(SMALL_LEFT).as_bytes(),
        SMALL_RIGHT.as_bytes(),
    );
    let o = link_in(dir.path(), &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("field `town` is empty in every row of the left table; it is left out")
    );
    let (head, _) = read_csv(&dir.path().join("out/links.csv"));
    assert!(!head.contains(&"town".to_string()));
    let summary = std::fs::read_to_string(dir.path().join("out/summary.json")).unwrap();
    assert!(!summary.contains("NaN") && !summary.contains("null,\n  \"bhattacharyya\""));
}

#[test]
fn no_candidate_pairs_leaves_everyone_unlinked() {
    let dir = tempfile::tempdir().unwrap();
    let right = "id,name,birth,town\nx,Zed Orr,1980-01-02,Orlow\ny,Yan Pask,1975-06-30,Selwick\n";
    setup(
        dir.path(),
        SMALL_CONFIG,
        SMALL_LEFT.as_bytes(),
        right.as_bytes(),
    );
    let o = link_in(dir.path(), &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stderr(&o).contains("no candidate pairs"), "{}", stderr(&o));
    let out = dir.path().join("out");
    assert!(read_csv(&out.join("links.csv")).1.is_empty());
    assert_conservation(
        &out,
        &["1".into(), "2".into(), "3".into()],
        &["x".into(), "y".into()],
    );
}

#[test]
fn one_giant_block_makes_the_guard_speak() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = SMALL_CONFIG.replace(
        "keys = [\"name:first:1\"]",
        "keys = [\"town\"]\nmax_block_pairs = 3",
    );
    let left = "id,name,birth,town\n1,Ann Oskar,1980-01-02,Orlow\n2,Bram Tell,1975-06-30,Orlow\n";
    let right = "id,name,birth,town\na,Ann Oskar,1980-01-02,Orlow\nb,Bram Tel,1975-06-30,Orlow\n";
    setup(dir.path(), &cfg, left.as_bytes(), right.as_bytes());
    let o = link_in(dir.path(), &[]);
    assert!(o.status.success(), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(
        e.contains("pass 1: block with key `orlow` would give 4 pairs, over the cap of 3"),
        "{e}"
    );
}

#[test]
fn wrong_type_in_config_names_the_key() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = format!("{SMALL_CONFIG}[link]\nmin_confidence = \"high\"\n");
    setup(
        dir.path(),
        &cfg,
        SMALL_LEFT.as_bytes(),
        SMALL_RIGHT.as_bytes(),
    );
    let o = link_in(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = stderr(&o);
    assert_eq!(e.lines().count(), 1, "{e}");
    assert!(
        e.contains("config.toml: line") && e.contains("key `min_confidence`"),
        "{e}"
    );
}

#[test]
fn failure_while_writing_leaves_no_partial_outputs() {
    // A folder named like an output makes the last step fail after the other files were
    // written to temporary names: none of them may be left behind.
    let dir = tempfile::tempdir().unwrap();
    setup(
        dir.path(),
        SMALL_CONFIG,
        SMALL_LEFT.as_bytes(),
        SMALL_RIGHT.as_bytes(),
    );
    let out = dir.path().join("out");
    std::fs::create_dir_all(out.join("summary.json")).unwrap();
    let o = link_in(dir.path(), &["--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = stderr(&o);
    assert!(
        e.contains("summary.json") && e.contains("no output files were left in place"),
        "{e}"
    );
    assert_eq!(files_in(&out), ["summary.json"]);
    // An output folder that cannot be created at all.
    let o = run(&[
        "link",
        "--config",
        dir.path().join("config.toml").to_str().unwrap(),
        "--out",
        "/dev/full/out",
        "--quiet",
    ]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        stderr(&o).contains("cannot create output folder"),
        "{}",
        stderr(&o)
    );
}

fn spec() -> ReadSpec {
    ReadSpec {
        id: "id".into(),
        columns: vec!["name".into()],
        optional: Vec::new(),
        section: "left".into(),
        encoding: Encoding::Utf8,
        delimiter: b',',
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    // Random bytes shaped like CSV: the reader returns a table or a clean error.
    #[test]
    fn random_csv_never_panics(body in proptest::collection::vec(prop_oneof![
        Just(b','), Just(b'\n'), Just(b'\r'), Just(b'"'), Just(b'a'), Just(b'1'), Just(0xFFu8), Just(b' ')
    ], 0..200)) {
        let mut bytes = b"id,name\n".to_vec();
        bytes.extend(body);
        let _ = read_table_from(&bytes, Path::new("t.csv"), &spec());
    }

    // Random config text built from real keys and junk: parsed or rejected, never a panic,
    // and any error is one line.
    #[test]
    fn random_config_never_panics(parts in proptest::collection::vec(prop_oneof![
        Just("[left]\npath = \"l.csv\"\nid = \"id\"\n"), Just("[right]\npath = \"r.csv\"\nid = \"id\"\n"),
        Just("[[field]]\nname = \"a\"\nmethod = \"exact\"\n"), Just("[[field]]\nname = \"b\"\nmethod = \"date\"\nbands = [0.5]\n"),
        Just("[[block]]\nkeys = [\"a:first:2\"]\n"), Just("[[block]]\nkeys = [\"zz\"]\n"), Just("[link]\nmin_confidence = 2\n"),
        Just("method = 3\n"), Just("[[field]]\nname = \"c\"\nmethod = \"number\"\nbands = [3, 1]\n"), Just("=\n"), Just("[assess]\nseed = -1\n"),
    ], 0..8)) {
        let text: String = parts.concat();
        if let Err(e) = Config::from_text(&text, Path::new(".")) {
            prop_assert!(!e.to_string().contains('\n'));
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(40))]

    // Random small tables through the whole pipeline: it finishes, and every record is
    // accounted for exactly once.
    #[test]
    fn random_tables_run_through(
        l in proptest::collection::vec((0usize..5, 0usize..4, 0usize..3), 1..15),
        r in proptest::collection::vec((0usize..5, 0usize..4, 0usize..3), 1..15),
    ) {
        let names = ["Ann Oskar", "Ann Osker", "Bram Tell", "", "Cara Venn"];
        let births = ["1980-01-02", "1980-02-01", "", "1975"];
        let towns = ["Orlow", "", "Selwick"];
        let table = |rows: &[(usize, usize, usize)], p: &str| {
            let mut t = String::from("id,name,birth,town\n");
            for (i, &(n, b, w)) in rows.iter().enumerate() {
                t.push_str(&format!("{p}{i},{},{},{}\n", names[n], births[b], towns[w]));
            }
            t
        };
        let dir = tempfile::tempdir().unwrap();
        write(dir.path(), "left.csv", &table(&l, "l"));
        write(dir.path(), "right.csv", &table(&r, "r"));
        let config = Config::from_text(SMALL_CONFIG, dir.path()).unwrap();
        match pipeline::prepare(config, &Silent) {
            Ok(mut prep) => {
                let link = pipeline::link(&mut prep, &Silent).expect("link");
                let mut seen_l = vec![0; l.len()];
                let mut seen_r = vec![0; r.len()];
                for &i in &link.links {
                    seen_l[prep.cands.left[i] as usize] += 1;
                    seen_r[prep.cands.right[i] as usize] += 1;
                    prop_assert!(link.confidence.p[i].is_finite());
                }
                prop_assert!(seen_l.iter().all(|&c| c <= 1) && seen_r.iter().all(|&c| c <= 1));
                prop_assert!(prep.weight.iter().all(|w| w.is_finite()));
            }
            Err(e) => prop_assert!(!e.to_string().contains('\n')),
        }
    }
}
