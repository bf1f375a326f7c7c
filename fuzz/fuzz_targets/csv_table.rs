//! The table reader over every encoding and delimiter: never a panic; a table read has one
//! line per row, lines rising from 2, ids non-empty and unique, every needed column full; an
//! error prints as one line naming the file.
#![no_main]

use dovetail::io::{read_table_from, Encoding, ReadSpec};
use libfuzzer_sys::fuzz_target;
use std::collections::HashSet;
use std::path::Path;

const DELIMITERS: [u8; 6] = [b',', b';', b'\t', b'|', b' ', b':'];

fuzz_target!(|data: &[u8]| {
    let Some((&mode, body)) = data.split_first() else {
        return;
    };
    let encoding = match mode % 3 {
        0 => Encoding::Utf8,
        1 => Encoding::Latin1,
        _ => Encoding::Windows1252,
    };
    let delimiter = DELIMITERS[(mode / 3) as usize % DELIMITERS.len()];
    let spec = ReadSpec {
        id: "id".into(),
        columns: vec!["name".into()],
        optional: vec!["town".into(), "id".into()],
        section: "left".into(),
        encoding,
        delimiter,
    };
    match read_table_from(body, Path::new("t.csv"), &spec) {
        Ok(t) => {
            assert_eq!(t.ids.len(), t.lines.len(), "one line per row");
            assert!(
                t.lines.iter().all(|&l| l >= 2),
                "rows start after the header"
            );
            assert!(t.lines.windows(2).all(|w| w[0] < w[1]), "lines rise");
            let mut seen = HashSet::new();
            for id in &t.ids {
                assert!(!id.is_empty(), "empty id accepted");
                assert!(seen.insert(id.as_str()), "duplicate id accepted");
                assert_eq!(id.trim(), id, "ids are trimmed");
            }
            for (name, col) in &t.columns {
                assert_eq!(
                    col.len(),
                    t.ids.len(),
                    "column {name} has one value per row"
                );
                assert!(col.iter().all(|v| !v.contains('\0')), "NUL accepted");
            }
            assert!(t.columns.contains_key("name"));
            assert_eq!(t.bytes, body.len() as u64);
        }
        Err(e) => {
            let shown = e.to_string();
            assert!(!shown.contains('\n'), "one line: {shown:?}");
            assert!(shown.starts_with("t.csv: "), "names the file: {shown:?}");
        }
    }
});
