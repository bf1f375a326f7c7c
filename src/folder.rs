//! A run's output folder: which files in it belong together.
//!
//! In: the files a command has just written, the command's name and the fingerprint of its
//! config and inputs. Out: the folder's record, `outputs.json` (each file with the command
//! that wrote it, its size and SHA-256), and no file of an earlier run left beside the new
//! ones. The rules, so that a folder never mixes two runs:
//!
//! - `link`, `assess` and `match` own the folder: every dovetail output they do not write
//!   is removed, except `tune.csv` when it came from the same config and inputs (the report
//!   shows it);
//! - `tune` keeps the other outputs only when they came from the same config and inputs;
//! - `score` adds `score.json` beside the links it scored and keeps everything else.
//!
//! Only the file names dovetail writes ([`OWNED`]) are ever removed; anything else in the
//! folder is left alone.

use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};
use std::path::Path;

/// The folder's record of its outputs.
pub const RECORD: &str = "outputs.json";

/// Every file name a dovetail command writes into an output folder.
pub const OWNED: &[&str] = &[
    "links.csv",
    "unlinked_left.csv",
    "unlinked_right.csv",
    "review.csv",
    "summary.json",
    "report.html",
    "tune.csv",
    "score.json",
    RECORD,
];

/// Who writes a set of outputs: the command and the fingerprint of its config and inputs
/// (None for commands without a config, such as `match`).
#[derive(Debug, Clone)]
pub struct Stamp {
    /// The subcommand's name.
    pub command: &'static str,
    /// See [`fingerprint`].
    pub fingerprint: Option<String>,
}

/// One output file in the record.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct OutputFile {
    /// File name inside the folder.
    pub name: String,
    /// The command that wrote it.
    pub command: String,
    /// Size in bytes.
    pub bytes: u64,
    /// SHA-256 of its content.
    pub sha256: String,
}

/// The content of `outputs.json`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Record {
    /// The tool that wrote the folder.
    pub tool: String,
    /// Its version.
    pub version: String,
    /// The fingerprint of the config and inputs the files came from.
    pub fingerprint: Option<String>,
    /// The files, in name order.
    pub files: Vec<OutputFile>,
}

/// SHA-256 over the tool's version, the config as read (after defaults) and both inputs'
/// SHA-256: two runs with the same fingerprint give the same outputs.
pub fn fingerprint(
    config: &crate::config::Config,
    left_sha256: &str,
    right_sha256: &str,
) -> String {
    let config = serde_json::to_string(config).unwrap_or_default();
    let text = format!(
        "dovetail {}\n{config}\n{left_sha256}\n{right_sha256}\n",
        env!("CARGO_PKG_VERSION")
    );
    crate::io::sha256_hex(text.as_bytes())
}

/// The folder's record, when it has a readable one.
pub fn read_record(dir: &Path) -> Option<Record> {
    let text = std::fs::read_to_string(dir.join(RECORD)).ok()?;
    serde_json::from_str(&text).ok()
}

/// True when the folder's `name` was written from the config and inputs of `fingerprint`.
pub fn file_matches(dir: &Path, name: &str, fingerprint: &str) -> bool {
    read_record(dir).is_some_and(|r| {
        r.fingerprint.as_deref() == Some(fingerprint) && r.files.iter().any(|f| f.name == name)
    })
}

/// Whether a file an earlier command wrote stays beside the outputs of `stamp`.
fn keeps(stamp: &Stamp, earlier: &Record, name: &str) -> bool {
    let same = stamp.fingerprint.is_some() && earlier.fingerprint == stamp.fingerprint;
    match stamp.command {
        "score" => true,
        "tune" => same,
        _ => same && name == "tune.csv",
    }
}

/// After `stamp`'s files have been moved into place: removes the earlier outputs it does not
/// keep and writes the folder's record. `written` holds the new files.
pub fn settle(dir: &Path, stamp: &Stamp, written: Vec<OutputFile>) -> Result<Vec<String>> {
    let earlier = read_record(dir);
    let mut files = written;
    let mut removed = Vec::new();
    for &name in OWNED {
        if name == RECORD || files.iter().any(|f| f.name == name) {
            continue;
        }
        let path = dir.join(name);
        if !path.is_file() {
            continue;
        }
        let kept = earlier.as_ref().and_then(|e| {
            e.files
                .iter()
                .find(|f| f.name == name)
                .filter(|_| keeps(stamp, e, name))
        });
        match kept {
            Some(f) => files.push(f.clone()),
            None => {
                std::fs::remove_file(&path).map_err(|e| {
                    Error::output(format!("cannot remove an earlier run's output ({e})"))
                        .with_file(&path)
                })?;
                removed.push(name.to_string());
            }
        }
    }
    files.sort_by(|a, b| a.name.cmp(&b.name));
    let fingerprint = match (stamp.command, &earlier) {
        ("score", Some(e)) => e.fingerprint.clone(),
        _ => stamp.fingerprint.clone(),
    };
    let record = Record {
        tool: "dovetail".into(),
        version: env!("CARGO_PKG_VERSION").into(),
        fingerprint,
        files,
    };
    let text = serde_json::to_string_pretty(&record).map_err(|e| Error::output(e.to_string()))?;
    let tmp = dir.join(format!(".{RECORD}.tmp-{}", std::process::id()));
    let target = dir.join(RECORD);
    std::fs::write(&tmp, format!("{text}\n"))
        .and_then(|_| std::fs::rename(&tmp, &target))
        .map_err(|e| {
            let _ = std::fs::remove_file(&tmp);
            Error::output(format!("cannot write the folder's record ({e})")).with_file(&target)
        })?;
    Ok(removed)
}

/// The stamp of a config-driven command's outputs.
pub fn stamp_of(prep: &crate::pipeline::Prepared, command: &'static str) -> Stamp {
    Stamp {
        command,
        fingerprint: Some(fingerprint(
            &prep.config,
            &prep.left.sha256,
            &prep.right.sha256,
        )),
    }
}
