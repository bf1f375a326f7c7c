//! Hostile and huge inputs (issue 19): each gets a clear one-line error naming the file (and
//! the line and column where there is one) or a correct result; never a panic, never a hang.

use crate::common::*;
use std::path::Path;
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

/// Writes the small config with `left` as the left table and the small right table.
fn setup(dir: &Path, config: &str, left: &[u8]) {
    write(dir, "config.toml", config);
    std::fs::write(dir.join("left.csv"), left).expect("write left");
    write(dir, "right.csv", SMALL_RIGHT);
}

fn link(dir: &Path, extra: &[&str]) -> Output {
    run_link(&dir.join("config.toml"), &dir.join("out"), extra)
}

/// No panic, whatever the outcome.
fn no_panic(o: &Output) {
    let e = stderr(o);
    assert!(!e.contains("panicked"), "{e}");
    assert!(o.status.code().is_some(), "killed by a signal: {e}");
}

/// Exit 1, one `error:` line holding every `want`, no outputs.
fn refused(dir: &Path, o: &Output, want: &[&str]) {
    no_panic(o);
    let e = stderr(o);
    assert_eq!(o.status.code(), Some(1), "{e}");
    assert_eq!(e.lines().count(), 1, "one line: {e}");
    assert!(e.starts_with("error: "), "{e}");
    for w in want {
        assert!(e.contains(w), "want {w:?} in {e}");
    }
    assert!(files_in(&dir.join("out")).is_empty(), "no outputs");
}

fn left_refused(left: &[u8], want: &[&str]) {
    let dir = tempfile::tempdir().unwrap();
    setup(dir.path(), SMALL_CONFIG, left);
    let o = link(dir.path(), &["--quiet"]);
    refused(dir.path(), &o, want);
}

#[test]
fn hundred_megabyte_cell_is_refused_quickly() {
    // Generated here, never committed: one cell of 100 MB, far over io::MAX_CELL_BYTES.
    let size = 100_000_000;
    let mut left = b"id,name,birth,town\n1,".to_vec();
    left.resize(left.len() + size, b'x');
    left.extend_from_slice(b",1980-01-02,Orlow\n");
    let t = Instant::now();
    left_refused(
        &left,
        &[&format!(
            "left.csv: line 2: column name: value is {size} bytes long, over the limit of {}",
            dovetail::io::MAX_CELL_BYTES
        )],
    );
    assert!(t.elapsed() < Duration::from_secs(60), "{:?}", t.elapsed());
}

#[test]
fn ten_thousand_columns_read() {
    let dir = tempfile::tempdir().unwrap();
    let extra: Vec<String> = (0..9_996).map(|i| format!("c{i}")).collect();
    let widen = |table: &str| -> String {
        let mut out = String::new();
        for (k, line) in table.lines().enumerate() {
            out.push_str(line);
            for c in &extra {
                out.push(',');
                if k == 0 {
                    out.push_str(c);
                } else {
                    out.push('v');
                }
            }
            out.push('\n');
        }
        out
    };
    write(dir.path(), "config.toml", SMALL_CONFIG);
    write(dir.path(), "left.csv", &widen(SMALL_LEFT));
    write(dir.path(), "right.csv", &widen(SMALL_RIGHT));
    let o = link(dir.path(), &["--quiet"]);
    no_panic(&o);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_conservation(
        &dir.path().join("out"),
        &["1".into(), "2".into(), "3".into()],
        &["a".into(), "b".into(), "c".into()],
    );
}

#[test]
fn nul_byte_in_a_cell_is_refused() {
    let left = SMALL_LEFT.replace("Bram Tell", "Bram\0Tell");
    left_refused(
        left.as_bytes(),
        &["left.csv: line 3: column name: value holds a NUL byte"],
    );
}

/// The small left table in UTF-16 little-endian, with or without its byte-order mark.
fn utf16le(text: &str, bom: bool) -> Vec<u8> {
    let mut out = if bom { vec![0xFF, 0xFE] } else { Vec::new() };
    for u in text.encode_utf16() {
        out.extend_from_slice(&u.to_le_bytes());
    }
    out
}

#[test]
fn utf16_is_named_and_refused() {
    // Read as Latin-1 too: the byte-order mark wins over a wrong `encoding`.
    left_refused(
        &utf16le(SMALL_LEFT, true),
        &["left.csv: the file is UTF-16 text", "convert it to UTF-8"],
    );
    let dir = tempfile::tempdir().unwrap();
    let cfg = SMALL_CONFIG.replace(
        "path = \"left.csv\"",
        "path = \"left.csv\"\nencoding = \"latin1\"",
    );
    setup(dir.path(), &cfg, &utf16le(SMALL_LEFT, true));
    let o = link(dir.path(), &["--quiet"]);
    refused(dir.path(), &o, &["left.csv: the file is UTF-16 text"]);
    // Without a mark, its NUL bytes give it away.
    left_refused(
        &utf16le(SMALL_LEFT, false),
        &["left.csv: line 1: the header holds NUL bytes", "UTF-16"],
    );
}

#[test]
fn cr_only_line_endings_read_with_right_lines() {
    // Old Mac files end lines with a lone CR: read them, and count their lines.
    let dir = tempfile::tempdir().unwrap();
    let cr = |t: &str| t.replace('\n', "\r");
    write(dir.path(), "config.toml", SMALL_CONFIG);
    write(dir.path(), "left.csv", &cr(SMALL_LEFT));
    write(dir.path(), "right.csv", &cr(SMALL_RIGHT));
    let o = link(dir.path(), &["--quiet"]);
    no_panic(&o);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_conservation(
        &dir.path().join("out"),
        &["1".into(), "2".into(), "3".into()],
        &["a".into(), "b".into(), "c".into()],
    );
    left_refused(
        cr(&format!("{SMALL_LEFT}1,Ann Oskar,1980-01-02,Orlow\n")).as_bytes(),
        &["left.csv: line 5: column id: duplicate id (first seen on line 2)"],
    );
}

#[test]
fn id_column_entirely_empty() {
    let left = "id,name,birth,town\n,Ann Oskar,1980-01-02,Orlow\n,Bram Tell,1975-06-30,Selwick\n";
    left_refused(left.as_bytes(), &["left.csv: line 2: column id: empty id"]);
}

#[test]
fn gzip_and_spreadsheets_are_named() {
    // The gzip signature, deflate, no flags (RFC 1952); what follows does not matter.
    let mut gz = vec![0x1F, 0x8B, 0x08, 0, 0, 0, 0, 0, 0, 3];
    gz.extend_from_slice(&[0x4B, 0xCB, 0xCF, 0x07, 0x00, 0x21, 0x65, 0x73, 0x8C]);
    left_refused(&gz, &["left.csv: the file is gzip-compressed", "gunzip"]);
    // An .xlsx is a zip archive: local file header signature "PK\x03\x04".
    let mut xlsx = b"PK\x03\x04\x14\x00\x06\x00\x08\x00".to_vec();
    xlsx.extend_from_slice(b"[Content_Types].xml");
    xlsx.extend_from_slice(&[0u8; 64]);
    left_refused(
        &xlsx,
        &["left.csv: the file is a zip archive", ".xlsx", "CSV"],
    );
    // The same for the scored pairs of `match` and the known pairs of `score`.
    let dir = tempfile::tempdir().unwrap();
    let pairs = dir.path().join("pairs.csv");
    std::fs::write(&pairs, &gz).unwrap();
    let out = dir.path().join("out");
    let o = run(&[
        "match",
        "--pairs",
        pairs.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    refused(dir.path(), &o, &["pairs.csv: the file is gzip-compressed"]);
    setup(dir.path(), SMALL_CONFIG, SMALL_LEFT.as_bytes());
    let o = link(dir.path(), &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let known = dir.path().join("known.csv");
    std::fs::write(&known, &xlsx).unwrap();
    let o = run(&[
        "score",
        "--run",
        out.to_str().unwrap(),
        "--known",
        known.to_str().unwrap(),
    ]);
    no_panic(&o);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("known.csv: the file is a zip archive"),
        "{}",
        stderr(&o)
    );
}

#[test]
fn config_with_a_thousand_fields_runs() {
    let dir = tempfile::tempdir().unwrap();
    let n = 1_000;
    let mut header = String::from("id");
    for k in 0..n {
        header.push_str(&format!(",f{k}"));
    }
    let table = |prefix: &str| -> String {
        let mut t = format!("{header}\n");
        for r in 0..4 {
            t.push_str(&format!("{prefix}{r}"));
            for k in 0..n {
                t.push_str(&format!(",v{}", (k * 7 + r) % 5));
            }
            t.push('\n');
        }
        t
    };
    let mut cfg = String::from(
        "[left]\npath = \"left.csv\"\nid = \"id\"\n[right]\npath = \"right.csv\"\nid = \"id\"\n",
    );
    for k in 0..n {
        cfg.push_str(&format!("[[field]]\nname = \"f{k}\"\nmethod = \"exact\"\n"));
    }
    cfg.push_str("[[block]]\nkeys = [\"f0\"]\n");
    write(dir.path(), "config.toml", &cfg);
    write(dir.path(), "left.csv", &table("l"));
    write(dir.path(), "right.csv", &table("r"));
    let o = link(dir.path(), &["--quiet"]);
    no_panic(&o);
    assert!(o.status.success(), "{}", stderr(&o));
    let ids = |p: &str| (0..4).map(|r| format!("{p}{r}")).collect::<Vec<_>>();
    assert_conservation(&dir.path().join("out"), &ids("l"), &ids("r"));
}

#[test]
fn deeply_nested_config_is_refused_without_overflow() {
    // A table nested ten levels under a known section: the unknown key is named.
    let dir = tempfile::tempdir().unwrap();
    let cfg = format!("{SMALL_CONFIG}[model.a.b.c.d.e.f.g.h.i.j]\nx = 1\n");
    setup(dir.path(), &cfg, SMALL_LEFT.as_bytes());
    let o = link(dir.path(), &["--quiet"]);
    refused(dir.path(), &o, &["config.toml: unknown key `model.a`"]);
    // Ten levels of tables at the top.
    let cfg = format!("{SMALL_CONFIG}[a.b.c.d.e.f.g.h.i.j]\nx = 1\n");
    setup(dir.path(), &cfg, SMALL_LEFT.as_bytes());
    let o = link(dir.path(), &["--quiet"]);
    refused(dir.path(), &o, &["config.toml: unknown key `a`"]);
    // 100,000 nested arrays and inline tables: the TOML parser's depth limit, not the stack.
    for value in [
        format!("{}{}", "[".repeat(100_000), "]".repeat(100_000)),
        format!("{}1{}", "{ a = ".repeat(100_000), "}".repeat(100_000)),
    ] {
        let cfg = format!("{SMALL_CONFIG}x = {value}\n");
        setup(dir.path(), &cfg, SMALL_LEFT.as_bytes());
        let o = link(dir.path(), &["--quiet"]);
        refused(dir.path(), &o, &["config.toml: line ", "recursion limit"]);
    }
}

#[test]
fn table_path_that_is_a_folder() {
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), "config.toml", SMALL_CONFIG);
    std::fs::create_dir(dir.path().join("left.csv")).unwrap();
    write(dir.path(), "right.csv", SMALL_RIGHT);
    let o = link(dir.path(), &["--quiet"]);
    refused(dir.path(), &o, &["left.csv: is a folder, not a file"]);
}

#[test]
fn table_path_that_is_a_fifo_is_refused_without_hanging() {
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), "config.toml", SMALL_CONFIG);
    write(dir.path(), "right.csv", SMALL_RIGHT);
    let fifo = dir.path().join("left.csv");
    let made = Command::new("mkfifo").arg(&fifo).status();
    if !made.is_ok_and(|s| s.success()) {
        eprintln!("skipped: mkfifo is not available");
        return;
    }
    let cfg = dir.path().join("config.toml");
    let out = dir.path().join("out");
    let mut child = Command::new(bin())
        .args(["link", "--config", cfg.to_str().unwrap()])
        .args(["--out", out.to_str().unwrap(), "--quiet"])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("run dovetail");
    let start = Instant::now();
    while child.try_wait().expect("wait").is_none() {
        if start.elapsed() > Duration::from_secs(60) {
            let _ = child.kill();
            panic!("dovetail hung on a FIFO");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    let o = child.wait_with_output().expect("output");
    refused(
        dir.path(),
        &o,
        &["left.csv: is a named pipe (FIFO), not a regular file"],
    );
}

#[test]
fn a_million_identical_rows_a_side_make_one_skipped_block() {
    // One giant block of 10^12 pairs: the max_block_pairs guard skips it and says so, and the
    // run finishes with everyone unlinked (about 6 s and 0.8 GB in a release build).
    let n = 1_000_000;
    let dir = tempfile::tempdir().unwrap();
    let table = |prefix: &str| -> Vec<u8> {
        let mut t = b"id,name,birth,town\n".to_vec();
        for i in 0..n {
            t.extend_from_slice(format!("{prefix}{i},Ann Oskar,1980-01-02,Orlow\n").as_bytes());
        }
        t
    };
    write(dir.path(), "config.toml", SMALL_CONFIG);
    std::fs::write(dir.path().join("left.csv"), table("l")).unwrap();
    std::fs::write(dir.path().join("right.csv"), table("r")).unwrap();
    let o = link(dir.path(), &[]);
    no_panic(&o);
    let e = stderr(&o);
    assert!(o.status.success(), "{e}");
    assert!(
        e.contains("pass 1: block with key `a` would give 1000000000000 pairs, over the cap of"),
        "{e}"
    );
    let out = dir.path().join("out");
    assert!(read_csv(&out.join("links.csv")).1.is_empty());
    assert_eq!(read_csv(&out.join("unlinked_left.csv")).1.len(), n);
    assert_eq!(read_csv(&out.join("unlinked_right.csv")).1.len(), n);
}
