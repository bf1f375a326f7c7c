//! The output folder: files written so that a reader never sees two runs mixed.
//!
//! In: the files a command writes, the command's name and the fingerprint of its config and
//! inputs. Out: the folder holding exactly one command's complete set, and its record,
//! `outputs.json` (each file with the command that wrote it, its size and SHA-256).
//!
//! **Which files belong together.** So that a folder never mixes two runs:
//! - `link`, `assess` and `match` own the folder: every dovetail output they do not write
//!   is dropped, except `tune.csv` when it came from the same config and inputs (the report
//!   shows it);
//! - `tune` keeps the other outputs only when they came from the same config and inputs;
//! - `score` adds `score.json` beside the links it scored and keeps everything else;
//!   `audit` likewise adds `audit.json` and rewrites report.html with the audit in it.
//!   The clerks' `decisions.csv` is not a dovetail output: it is always carried over.
//!
//! Only the file names dovetail writes ([`OWNED`]) are ever dropped; anything else in the
//! folder is carried over.
//!
//! **How the set lands at once.** A run's set is assembled in a hidden sibling folder
//! (`.NAME.dovetail-new-PID`): the new files, hard links to the earlier files it keeps and
//! to the user's own files, and the user's subfolders moved in last; `outputs.json` is
//! written there last, then the two folders are exchanged in one atomic step (Linux
//! `renameat2` with `RENAME_EXCHANGE`), and the old one is removed. A kill at any moment
//! leaves either the earlier folder or the new one under the folder's name, never a mix;
//! the next run removes what a killed run left beside it (moving back any subfolder of the
//! user's). Where the exchange is not available (another system, a file system without it),
//! the files are renamed into place one by one and `outputs.json`, written last, is the
//! commit mark: trust a file only when its hash matches it.
//!
//! **One run at a time.** [`claim`] locks the folder for a whole run; a second run into the
//! same folder stops at once with a clear error.

use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

/// The folder's record of its outputs.
pub const RECORD: &str = "outputs.json";

/// Every file name a dovetail command writes into an output folder.
pub const OWNED: &[&str] = &[
    "links.csv",
    "unlinked_left.csv",
    "unlinked_right.csv",
    "review.csv",
    "links.parquet",
    "unlinked_left.parquet",
    "unlinked_right.parquet",
    "review.parquet",
    "summary.json",
    "report.html",
    "tune.csv",
    "score.json",
    "audit.csv",
    "audit.parquet",
    "review_context.csv",
    "review_context.parquet",
    "audit.json",
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
        "score" | "audit" => true,
        "tune" => same,
        _ => same && name == "tune.csv",
    }
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

/// What becomes of an earlier file of the folder when a new set lands.
#[derive(Debug, PartialEq)]
enum Fate {
    /// An earlier dovetail output the new set does not keep.
    Drop,
    /// An earlier dovetail output the new set keeps (its record entry goes along).
    Keep(OutputFile),
    /// The user's own file or folder: always carried over.
    Carry,
}

/// Decides, for every entry of `dir` the new set does not write itself, what becomes of it.
fn fates(dir: &Path, stamp: &Stamp, written: &[OutputFile]) -> Vec<(String, Fate)> {
    let earlier = read_record(dir);
    let Ok(entries) = std::fs::read_dir(dir) else {
        return Vec::new();
    };
    let mut out: Vec<(String, Fate)> = entries
        .filter_map(|e| e.ok())
        .filter_map(|e| e.file_name().to_str().map(str::to_string))
        .filter(|name| name != RECORD && !written.iter().any(|f| &f.name == name))
        .map(|name| {
            let fate = if is_leftover(&name) {
                Fate::Drop
            } else if OWNED.contains(&name.as_str()) {
                earlier
                    .as_ref()
                    .and_then(|e| {
                        e.files
                            .iter()
                            .find(|f| f.name == name)
                            .filter(|_| keeps(stamp, e, &name))
                    })
                    .map_or(Fate::Drop, |f| Fate::Keep(f.clone()))
            } else {
                Fate::Carry
            };
            (name, fate)
        })
        .collect();
    out.sort_by(|a, b| a.0.cmp(&b.0));
    out
}

/// A temporary file a killed run of an earlier version left in the folder itself
/// (`.links.csv.tmp-PID`).
fn is_leftover(name: &str) -> bool {
    OWNED.iter().any(|o| {
        name.strip_prefix('.')
            .and_then(|r| r.strip_prefix(o))
            .and_then(|r| r.strip_prefix(".tmp-"))
            .is_some_and(|pid| !pid.is_empty() && pid.bytes().all(|b| b.is_ascii_digit()))
    })
}

fn output_error(what: &str, e: std::io::Error, path: &Path) -> Error {
    Error::output(format!("{what} ({e}); the folder was left as it was")).with_file(path)
}

/// The folder's name and its parent, where the hidden siblings live.
fn parent_and_name(dir: &Path) -> Result<(PathBuf, String)> {
    let name = dir
        .file_name()
        .and_then(|n| n.to_str())
        .ok_or_else(|| Error::output("the output folder needs a plain name").with_file(dir))?
        .to_string();
    let parent = dir
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from("."));
    Ok((parent, name))
}

/// The hidden sibling where a run assembles its set.
fn staging_path(dir: &Path) -> Result<PathBuf> {
    let (parent, name) = parent_and_name(dir)?;
    Ok(parent.join(format!(".{name}.dovetail-new-{}", std::process::id())))
}

/// Removes what killed runs left beside `dir` (their staging folders), moving back into
/// `dir` any entry of the user's that a staging folder holds and `dir` lacks. Call it only
/// while holding the folder's [`claim`]: no live run then has a staging folder there.
pub fn clean_leftovers(dir: &Path) {
    let Ok((parent, name)) = parent_and_name(dir) else {
        return;
    };
    let prefix = format!(".{name}.dovetail-new-");
    let Ok(entries) = std::fs::read_dir(&parent) else {
        return;
    };
    for e in entries.filter_map(|e| e.ok()) {
        let Some(n) = e.file_name().to_str().map(str::to_string) else {
            continue;
        };
        if !n.starts_with(&prefix) || !e.path().is_dir() {
            continue;
        }
        if let Ok(inner) = std::fs::read_dir(e.path()) {
            for f in inner.filter_map(|f| f.ok()) {
                let fname = f.file_name();
                let owned = fname.to_str().is_some_and(|s| OWNED.contains(&s));
                if !owned && !dir.join(&fname).exists() {
                    let _ = std::fs::rename(f.path(), dir.join(&fname));
                }
            }
        }
        let _ = std::fs::remove_dir_all(e.path());
    }
}

/// A run's hold on its output folder, released when dropped.
#[derive(Debug)]
pub struct Claim {
    _lock: Option<File>,
}

/// Locks the output folder `dir` (creating it) for one run, then removes what killed runs
/// left beside it. A second run into the same folder gets an error while the first holds it.
pub fn claim(dir: &Path) -> Result<Claim> {
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::output(format!("cannot create output folder: {e}")).with_file(dir))?;
    // The lock is on the folder itself (no lock file to leave behind); where a folder cannot
    // be opened as a file (Windows), runs are not kept apart.
    let lock = File::open(dir).ok();
    if let Some(f) = &lock {
        if let Err(std::fs::TryLockError::WouldBlock) = f.try_lock() {
            return Err(Error::output(
                "another dovetail run is writing to this folder; wait for it to finish or choose another --out",
            )
            .with_file(dir));
        }
    }
    clean_leftovers(dir);
    Ok(Claim { _lock: lock })
}

/// Exchanges two paths in one atomic step.
#[cfg(all(target_os = "linux", target_env = "gnu"))]
fn exchange(a: &Path, b: &Path) -> std::io::Result<()> {
    use std::ffi::CString;
    use std::os::unix::ffi::OsStrExt;
    let a = CString::new(a.as_os_str().as_bytes())?;
    let b = CString::new(b.as_os_str().as_bytes())?;
    // SAFETY: both arguments are valid NUL-terminated paths that outlive the call, and
    // AT_FDCWD makes them relative to the working folder as any path is.
    let r = unsafe {
        libc::renameat2(
            libc::AT_FDCWD,
            a.as_ptr(),
            libc::AT_FDCWD,
            b.as_ptr(),
            libc::RENAME_EXCHANGE,
        )
    };
    if r == 0 {
        Ok(())
    } else {
        Err(std::io::Error::last_os_error())
    }
}

#[cfg(not(all(target_os = "linux", target_env = "gnu")))]
fn exchange(_: &Path, _: &Path) -> std::io::Result<()> {
    Err(std::io::Error::from(std::io::ErrorKind::Unsupported))
}

/// Makes a folder's entries durable (its renames and new names).
fn sync_dir(dir: &Path) {
    if let Ok(f) = File::open(dir) {
        let _ = f.sync_all();
    }
}

/// A writer that hashes and counts what passes through it.
struct Hashing<W: Write> {
    inner: W,
    hasher: sha2::Sha256,
    bytes: u64,
}

impl<W: Write> Write for Hashing<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        use sha2::Digest;
        let n = self.inner.write(buf)?;
        self.hasher.update(&buf[..n]);
        self.bytes += n as u64;
        Ok(n)
    }
    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// A set of output files that lands in its folder at once, or not at all.
///
/// [`OutputSet::new`] writes each file to a temporary name beside its target and renames
/// them into place together on [`OutputSet::commit`]. [`OutputSet::for_run`] assembles a
/// command's whole set in a hidden sibling folder and exchanges it with the output folder
/// (see the module doc). Dropping a set without committing removes what it wrote, so a
/// failure midway leaves no partial outputs.
#[derive(Debug)]
pub struct OutputSet {
    dir: PathBuf,
    /// Where the files are written: the folder itself, or the run's staging folder.
    into: PathBuf,
    pending: Vec<(PathBuf, PathBuf)>,
    files: Vec<OutputFile>,
    stamp: Option<Stamp>,
    /// In memory only ([`OutputSet::in_memory`]): each file's name and bytes.
    memory: Option<Vec<(String, Vec<u8>)>>,
}

/// A whole set of outputs held in memory: the files a command writes, in order, with the
/// command's stamp; [`Rendered::write_to`] lands them in a folder as the command would.
#[derive(Debug, Clone)]
pub struct Rendered {
    /// Who made the set.
    pub stamp: Stamp,
    /// Each file's name and content, in the order written.
    pub files: Vec<(String, Vec<u8>)>,
}

impl Rendered {
    /// The content of the file `name`, when the set has it.
    pub fn file(&self, name: &str) -> Option<&[u8]> {
        self.files
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, b)| b.as_slice())
    }

    /// Lands the set in `dir` as one run's outputs (see [`OutputSet::for_run`]); with
    /// `parquet`, each table also as Parquet beside its CSV, as `link --parquet` writes it.
    pub fn write_to(&self, dir: &Path, parquet: bool) -> Result<Vec<PathBuf>> {
        let mut out = OutputSet::for_run(dir, self.stamp.clone())?;
        for (name, bytes) in &self.files {
            out.write(name, |w| w.write_all(bytes))?;
            if parquet {
                out.parquet_beside(name, bytes)?;
            }
        }
        out.commit()
    }
}

/// The output tables that `link --parquet` also writes as Parquet.
pub const PARQUET_TABLES: &[&str] = &[
    "links.csv",
    "unlinked_left.csv",
    "unlinked_right.csv",
    "review.csv",
];

impl OutputSet {
    /// Starts a set of outputs that stays in memory (see [`OutputSet::into_rendered`]).
    pub fn in_memory(stamp: Stamp) -> OutputSet {
        OutputSet {
            dir: PathBuf::new(),
            into: PathBuf::new(),
            pending: Vec::new(),
            files: Vec::new(),
            stamp: Some(stamp),
            memory: Some(Vec::new()),
        }
    }

    /// The files of an in-memory set (empty for a set written to a folder).
    pub fn into_rendered(mut self) -> Rendered {
        Rendered {
            stamp: self.stamp.clone().unwrap_or(Stamp {
                command: "",
                fingerprint: None,
            }),
            files: self.memory.take().unwrap_or_default(),
        }
    }

    /// When `name` is one of [`PARQUET_TABLES`], writes its CSV content `csv` again as a
    /// Parquet file of the same name (numeric columns as floats, empty cells as nulls).
    pub fn parquet_beside(&mut self, name: &str, csv: &[u8]) -> Result<()> {
        let Some(stem) = PARQUET_TABLES
            .contains(&name)
            .then(|| name.trim_end_matches(".csv"))
        else {
            return Ok(());
        };
        let batch = crate::tabular::csv_to_batch(csv, crate::tabular::NUMERIC_COLUMNS)?;
        let bytes = crate::tabular::parquet_bytes(&batch)?;
        self.write(&format!("{stem}.parquet"), |w| w.write_all(&bytes))
    }

    /// Starts a set of outputs in `dir`, creating it if needed.
    pub fn new(dir: &Path) -> Result<OutputSet> {
        std::fs::create_dir_all(dir).map_err(|e| {
            Error::output(format!("cannot create output folder: {e}")).with_file(dir)
        })?;
        Ok(OutputSet {
            dir: dir.to_path_buf(),
            into: dir.to_path_buf(),
            pending: Vec::new(),
            files: Vec::new(),
            stamp: None,
            memory: None,
        })
    }

    /// Starts the outputs of one command's run in `dir`: they are assembled apart and land
    /// together with what the folder keeps, and the folder's record.
    pub fn for_run(dir: &Path, stamp: Stamp) -> Result<OutputSet> {
        std::fs::create_dir_all(dir).map_err(|e| {
            Error::output(format!("cannot create output folder: {e}")).with_file(dir)
        })?;
        // The real folder, so that a symbolic link to it stays a link to the new set.
        let dir = std::fs::canonicalize(dir)
            .map_err(|e| Error::output(format!("cannot open output folder: {e}")).with_file(dir))?;
        let into = staging_path(&dir)?;
        let _ = std::fs::remove_dir_all(&into);
        std::fs::create_dir(&into).map_err(|e| {
            Error::output(format!(
                "cannot create a folder beside the output folder: {e}"
            ))
            .with_file(&into)
        })?;
        Ok(OutputSet {
            dir,
            into,
            pending: Vec::new(),
            files: Vec::new(),
            stamp: Some(stamp),
            memory: None,
        })
    }

    /// The output folder.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Writes one file's full content through `fill`, not yet under its final name in the
    /// folder.
    pub fn write<F>(&mut self, name: &str, fill: F) -> Result<()>
    where
        F: FnOnce(&mut dyn Write) -> std::io::Result<()>,
    {
        if let Some(memory) = &mut self.memory {
            let mut bytes = Vec::new();
            fill(&mut bytes).map_err(|e| Error::output(format!("cannot render {name}: {e}")))?;
            memory.push((name.to_string(), bytes));
            return Ok(());
        }
        let target = self.dir.join(name);
        let tmp = if self.stamp.is_some() {
            self.into.join(name)
        } else {
            self.dir.join(format!(".{name}.tmp-{}", std::process::id()))
        };
        let fail = |e: std::io::Error, path: &Path| {
            let _ = std::fs::remove_file(path);
            Error::output(format!(
                "cannot write ({e}); no output files were left in place"
            ))
            .with_file(&target)
        };
        let file = File::create(&tmp).map_err(|e| fail(e, &tmp))?;
        let mut w = Hashing {
            inner: BufWriter::new(file),
            hasher: sha2::Digest::new(),
            bytes: 0,
        };
        fill(&mut w).map_err(|e| fail(e, &tmp))?;
        let Hashing {
            inner,
            hasher,
            bytes,
        } = w;
        let file = inner.into_inner().map_err(|e| fail(e.into_error(), &tmp))?;
        file.sync_all().map_err(|e| fail(e, &tmp))?;
        let digest = sha2::Digest::finalize(hasher);
        self.files.push(OutputFile {
            name: name.to_string(),
            command: self.stamp.as_ref().map_or("", |s| s.command).to_string(),
            bytes,
            sha256: digest.iter().map(|b| format!("{b:02x}")).collect(),
        });
        self.pending.push((tmp, target));
        Ok(())
    }

    /// Puts the whole set in place.
    pub fn commit(mut self) -> Result<Vec<PathBuf>> {
        if self.memory.is_some() {
            // An in-memory set has no folder to land in; see `into_rendered`.
            return Ok(Vec::new());
        }
        // A target that is a folder cannot be replaced: find out before moving anything.
        if let Some((_, target)) = self.pending.iter().find(|(_, t)| t.is_dir()) {
            return Err(Error::output(
                "a folder of that name is in the way; no output files were left in place",
            )
            .with_file(target));
        }
        let written: Vec<PathBuf> = self.pending.iter().map(|(_, t)| t.clone()).collect();
        match self.stamp.clone() {
            Some(stamp) => self.land(&stamp)?,
            None => self.rename_each()?,
        }
        Ok(written)
    }

    /// Renames every temporary file into place, taking back what was moved on failure.
    fn rename_each(&mut self) -> Result<()> {
        let pending = std::mem::take(&mut self.pending);
        let mut done: Vec<PathBuf> = Vec::new();
        for (k, (tmp, target)) in pending.iter().enumerate() {
            if let Err(e) = std::fs::rename(tmp, target) {
                for moved in &done {
                    let _ = std::fs::remove_file(moved);
                }
                for (rest, _) in &pending[k..] {
                    let _ = std::fs::remove_file(rest);
                }
                return Err(Error::output(format!(
                    "cannot move output into place ({e}); no output files were left in place"
                ))
                .with_file(target));
            }
            done.push(target.clone());
        }
        Ok(())
    }

    /// Completes the staging folder (kept and carried entries, the record) and exchanges it
    /// with the output folder; falls back to renaming file by file where exchange fails.
    fn land(&mut self, stamp: &Stamp) -> Result<()> {
        let fates = fates(&self.dir, stamp, &self.files);
        let mut files = std::mem::take(&mut self.files);
        let mut moved: Vec<String> = Vec::new();
        let carry = |name: &str, moved: &mut Vec<String>| -> Result<()> {
            let (from, to) = (self.dir.join(name), self.into.join(name));
            let meta = std::fs::symlink_metadata(&from)
                .map_err(|e| output_error("cannot read an entry of the folder", e, &from))?;
            if meta.is_file() {
                std::fs::hard_link(&from, &to)
                    .or_else(|_| std::fs::copy(&from, &to).map(|_| ()))
                    .map_err(|e| output_error("cannot carry a file over", e, &from))
            } else {
                std::fs::rename(&from, &to)
                    .map_err(|e| output_error("cannot carry a folder over", e, &from))?;
                moved.push(name.to_string());
                Ok(())
            }
        };
        // Files first; the user's subfolders are moved in last, just before the exchange.
        let mut result = Ok(());
        for (name, fate) in &fates {
            match fate {
                Fate::Keep(f) => {
                    files.push(f.clone());
                    result = result.and_then(|_| carry(name, &mut moved));
                }
                Fate::Carry if !self.dir.join(name).is_dir() => {
                    result = result.and_then(|_| carry(name, &mut moved));
                }
                _ => {}
            }
        }
        for (name, fate) in &fates {
            if *fate == Fate::Carry && self.dir.join(name).is_dir() {
                result = result.and_then(|_| carry(name, &mut moved));
            }
        }
        files.sort_by(|a, b| a.name.cmp(&b.name));
        let fingerprint = match (stamp.command, read_record(&self.dir)) {
            ("score" | "audit", Some(e)) => e.fingerprint,
            _ => stamp.fingerprint.clone(),
        };
        let record = Record {
            tool: "dovetail".into(),
            version: env!("CARGO_PKG_VERSION").into(),
            fingerprint,
            files,
        };
        result = result.and_then(|_| {
            let text =
                serde_json::to_string_pretty(&record).map_err(|e| Error::output(e.to_string()))?;
            let path = self.into.join(RECORD);
            std::fs::write(&path, format!("{text}\n"))
                .and_then(|_| File::open(&path)?.sync_all())
                .map_err(|e| output_error("cannot write the folder's record", e, &path))
        });
        let undo = |moved: &[String]| {
            for name in moved {
                let _ = std::fs::rename(self.into.join(name), self.dir.join(name));
            }
        };
        if let Err(e) = result {
            undo(&moved);
            return Err(e);
        }
        sync_dir(&self.into);
        match exchange(&self.into, &self.dir) {
            Ok(()) => {
                self.pending.clear();
                if let Some(parent) = self.dir.parent() {
                    sync_dir(parent);
                }
                // The old folder is now at the staging path.
                let _ = std::fs::remove_dir_all(&self.into);
                Ok(())
            }
            Err(_) => {
                // No atomic exchange here: new files by renames, then the record last.
                undo(&moved);
                self.rename_each()?;
                for (name, fate) in &fates {
                    if *fate == Fate::Drop {
                        let _ = std::fs::remove_file(self.dir.join(name));
                    }
                }
                let from = self.into.join(RECORD);
                let to = self.dir.join(RECORD);
                std::fs::rename(&from, &to)
                    .map_err(|e| output_error("cannot write the folder's record", e, &to))?;
                let _ = std::fs::remove_dir_all(&self.into);
                Ok(())
            }
        }
    }
}

impl Drop for OutputSet {
    fn drop(&mut self) {
        for (tmp, _) in &self.pending {
            let _ = std::fs::remove_file(tmp);
        }
        if self.memory.is_none() && self.stamp.is_some() && self.into != self.dir {
            let _ = std::fs::remove_dir_all(&self.into);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn output_set_leaves_nothing_on_failure() {
        let dir = tempfile::tempdir().unwrap();
        {
            let mut out = OutputSet::new(dir.path()).unwrap();
            out.write("a.csv", |w| w.write_all(b"x")).unwrap();
            let failed = out.write("b.csv", |_| Err(std::io::Error::other("disk full")));
            assert!(failed.is_err());
        }
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
        let mut out = OutputSet::new(dir.path()).unwrap();
        out.write("a.csv", |w| w.write_all(b"x")).unwrap();
        out.commit().unwrap();
        assert_eq!(std::fs::read(dir.path().join("a.csv")).unwrap(), b"x");
    }

    fn stamp(command: &'static str, fp: &str) -> Stamp {
        Stamp {
            command,
            fingerprint: Some(fp.to_string()),
        }
    }

    #[test]
    fn a_run_replaces_the_set_and_carries_the_users_entries() {
        let root = tempfile::tempdir().unwrap();
        let dir = root.path().join("out");
        std::fs::create_dir_all(dir.join("notes")).unwrap();
        std::fs::write(dir.join("notes/a.txt"), "mine").unwrap();
        std::fs::write(dir.join("readme.txt"), "mine too").unwrap();
        std::fs::write(dir.join(".links.csv.tmp-4242"), "left by a killed run").unwrap();
        let mut out = OutputSet::for_run(&dir, stamp("link", "f1")).unwrap();
        out.write("links.csv", |w| w.write_all(b"old")).unwrap();
        out.write("review.csv", |w| w.write_all(b"old")).unwrap();
        out.commit().unwrap();
        let mut out = OutputSet::for_run(&dir, stamp("assess", "f2")).unwrap();
        out.write("summary.json", |w| w.write_all(b"{}")).unwrap();
        out.commit().unwrap();
        let mut names: Vec<String> = std::fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
            .collect();
        names.sort();
        assert_eq!(
            names,
            ["notes", "outputs.json", "readme.txt", "summary.json"]
        );
        assert_eq!(
            std::fs::read_to_string(dir.join("notes/a.txt")).unwrap(),
            "mine"
        );
        let r = read_record(&dir).unwrap();
        assert_eq!(r.files.len(), 1);
        assert_eq!(r.files[0].sha256, crate::io::sha256_hex(b"{}"));
        // Nothing is left beside the folder.
        let beside: Vec<_> = std::fs::read_dir(root.path()).unwrap().collect();
        assert_eq!(beside.len(), 1);
    }

    #[test]
    fn leftovers_of_a_killed_run_are_cleaned_and_the_users_folder_comes_back() {
        // A run killed after moving the user's subfolder into its staging folder but before
        // the exchange: the next claim moves the subfolder back and removes the rest.
        let root = tempfile::tempdir().unwrap();
        let dir = root.path().join("out");
        std::fs::create_dir_all(&dir).unwrap();
        let staging = root.path().join(".out.dovetail-new-99999");
        std::fs::create_dir_all(staging.join("notes")).unwrap();
        std::fs::write(staging.join("links.csv"), "half").unwrap();
        std::fs::write(staging.join("notes/a.txt"), "mine").unwrap();
        let claim = claim(&dir).unwrap();
        assert!(!staging.exists());
        assert_eq!(
            std::fs::read_to_string(dir.join("notes/a.txt")).unwrap(),
            "mine"
        );
        assert!(!dir.join("links.csv").exists());
        // A second claim while the first holds the folder is refused.
        let e = super::claim(&dir).unwrap_err().to_string();
        assert!(e.contains("another dovetail run"), "{e}");
        drop(claim);
        assert!(super::claim(&dir).is_ok());
    }

    #[test]
    fn leftover_names() {
        assert!(is_leftover(".links.csv.tmp-123"));
        assert!(!is_leftover(".links.csv.tmp-"));
        assert!(!is_leftover("links.csv"));
        assert!(!is_leftover(".notes.tmp-1"));
    }
}
