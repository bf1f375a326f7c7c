//! Reading tables and writing outputs: the only stage besides `report` that touches files.
//!
//! In: CSV bytes with a header row. Out: a [`Table`] holding the ids and the raw (trimmed)
//! values of the columns the config needs. Every error names the file, the line and the column.
//! Outputs go through [`OutputSet`], which writes temporary files and renames them into place
//! only when all of them are complete, so a failed run leaves no partial outputs.

use crate::error::{Error, Result};
use crate::texts::Texts;
use rayon::prelude::*;
use std::collections::HashMap;
use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

/// Largest accepted value of one cell, in bytes; bigger cells are an error, not a slowdown.
pub const MAX_CELL_BYTES: usize = 65_536;

/// One input table: ids in row order and the needed columns' trimmed values.
#[derive(Debug, Clone)]
pub struct Table {
    /// The file the table was read from (as given), for messages.
    pub path: PathBuf,
    /// Record ids in row order.
    pub ids: Texts,
    /// The needed columns, by name, each with one trimmed value per row ("" = missing).
    pub columns: HashMap<String, Texts>,
    /// Every column name of the header, trimmed, in file order.
    pub header: Vec<String>,
    /// The 1-based line on which each row starts, for messages.
    pub lines: Vec<u64>,
    /// Size of the file in bytes.
    pub bytes: u64,
    /// SHA-256 of the file's bytes, in hex (of a data frame: of its needed values, see
    /// [`crate::tabular`]).
    pub sha256: String,
    /// What `lines` count: "line" (of a CSV file) or "row" (of a Parquet file or a frame).
    pub place: &'static str,
}

impl Table {
    /// Number of records.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// True when the table has no records.
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// Tags an error with the line (CSV) or row (Parquet, frame) `at`, as this table counts.
    pub fn locate(&self, e: Error, at: u64) -> Error {
        if self.place == "row" {
            e.with_row(at)
        } else {
            e.with_line(at)
        }
    }

    /// The values of a needed column.
    pub fn column(&self, name: &str) -> &Texts {
        self.columns.get(name).unwrap_or(&crate::texts::EMPTY)
    }

    /// One row's value of a field's column spec: a column name, or several joined with `+`
    /// (a grouped comparison), whose non-empty values are joined with a space.
    pub fn value(&self, spec: &str, row: usize) -> String {
        if !spec.contains('+') {
            return self.column(spec).get(row).unwrap_or_default().to_string();
        }
        let parts: Vec<&str> = spec
            .split('+')
            .filter_map(|c| self.column(c.trim()).get(row))
            .filter(|v| !v.is_empty())
            .collect();
        parts.join(" ")
    }

    /// Every row's value of a column spec (see [`Table::value`]).
    pub fn values(&self, spec: &str) -> std::borrow::Cow<'_, Texts> {
        if spec.contains('+') {
            std::borrow::Cow::Owned((0..self.len()).map(|r| self.value(spec, r)).collect())
        } else {
            std::borrow::Cow::Borrowed(self.column(spec))
        }
    }
}

/// Text encodings accepted for input tables.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Encoding {
    /// UTF-8 (a byte-order mark is skipped).
    Utf8,
    /// ISO-8859-1: each byte is the code point of the same number.
    Latin1,
    /// Windows-1252: Latin-1 with printable characters in 0x80..=0x9F.
    Windows1252,
}

impl Encoding {
    /// From the config spelling; `None` for an unknown name.
    pub fn parse(name: Option<&str>) -> Option<Encoding> {
        match name.map(|s| s.to_ascii_lowercase()) {
            None => Some(Encoding::Utf8),
            Some(s) => match s.as_str() {
                "utf-8" | "utf8" => Some(Encoding::Utf8),
                "latin1" | "latin-1" | "iso-8859-1" => Some(Encoding::Latin1),
                "windows-1252" | "cp1252" => Some(Encoding::Windows1252),
                _ => None,
            },
        }
    }
}

// Windows-1252 0x80..=0x9F (the WHATWG encoding index); the five undefined bytes map to the
// C1 controls of the same number, as WHATWG does.
const CP1252_HIGH: [char; 32] = [
    '\u{20AC}', '\u{0081}', '\u{201A}', '\u{0192}', '\u{201E}', '\u{2026}', '\u{2020}', '\u{2021}',
    '\u{02C6}', '\u{2030}', '\u{0160}', '\u{2039}', '\u{0152}', '\u{008D}', '\u{017D}', '\u{008F}',
    '\u{0090}', '\u{2018}', '\u{2019}', '\u{201C}', '\u{201D}', '\u{2022}', '\u{2013}', '\u{2014}',
    '\u{02DC}', '\u{2122}', '\u{0161}', '\u{203A}', '\u{0153}', '\u{009D}', '\u{017E}', '\u{0178}',
];

fn transcode(bytes: &[u8], enc: Encoding) -> Vec<u8> {
    let text: String = bytes
        .iter()
        .map(|&b| match enc {
            Encoding::Windows1252 if (0x80..=0x9F).contains(&b) => CP1252_HIGH[(b - 0x80) as usize],
            _ => b as char,
        })
        .collect();
    text.into_bytes()
}

/// What to read from a table: the id column, the other needed columns, encoding, delimiter.
#[derive(Debug, Clone)]
pub struct ReadSpec {
    /// The id column.
    pub id: String,
    /// The compared columns needed besides the id.
    pub columns: Vec<String>,
    /// Columns read when the header has them (the caller checks for the absent ones).
    pub optional: Vec<String>,
    /// The config section that describes the table (`left` or `right`), for hints.
    pub section: String,
    /// The text encoding.
    pub encoding: Encoding,
    /// The delimiter byte.
    pub delimiter: u8,
}

/// Reads a table from a file: Parquet when [`crate::tabular::is_parquet`] says so, else CSV
/// (see [`read_table_from`]). The file is read once; its bytes are
/// hashed and parsed from memory.
pub fn read_table(path: &Path, spec: &ReadSpec) -> Result<Table> {
    let bytes = read_file(path, false)?;
    if crate::tabular::is_parquet(path, &bytes) {
        return crate::tabular::read_parquet(bytes, path, spec);
    }
    read_table_from(&bytes, path, spec)
}

/// The whole content of an input file. A folder is refused; so is a named pipe, socket or
/// device unless `pipes` (opening a named pipe waits for a writer, which would hang a run
/// whose config names one by mistake; `--pairs <(...)` on the command line is a pipe with a
/// writer already).
fn read_file(path: &Path, pipes: bool) -> Result<Vec<u8>> {
    let fail = |m: String| Error::input(m).with_file(path);
    let meta = std::fs::metadata(path).map_err(|e| fail(format!("cannot open: {e}")))?;
    let kind = meta.file_type();
    if kind.is_dir() {
        return Err(fail(
            "is a folder, not a file: give the path of the CSV file itself".to_string(),
        ));
    }
    if !(kind.is_file() || pipes && is_pipe(&kind)) {
        let why = if pipes {
            ""
        } else {
            ": tables are read from regular files"
        };
        return Err(fail(format!(
            "is {}, not a regular file{why}",
            special_kind(&kind)
        )));
    }
    let mut file = File::open(path).map_err(|e| fail(format!("cannot open: {e}")))?;
    let mut bytes = Vec::new();
    file.read_to_end(&mut bytes)
        .map_err(|e| fail(format!("cannot read: {e}")))?;
    Ok(bytes)
}

#[cfg(unix)]
fn is_pipe(kind: &std::fs::FileType) -> bool {
    std::os::unix::fs::FileTypeExt::is_fifo(kind)
}

#[cfg(not(unix))]
fn is_pipe(_: &std::fs::FileType) -> bool {
    false
}

/// What a file that is neither a folder nor a regular file is, for messages.
fn special_kind(kind: &std::fs::FileType) -> &'static str {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt;
        if kind.is_fifo() {
            return "a named pipe (FIFO)";
        }
        if kind.is_socket() {
            return "a socket";
        }
        if kind.is_block_device() || kind.is_char_device() {
            return "a device";
        }
    }
    let _ = kind;
    "a special file"
}

/// The error for bytes that are plainly not a CSV text file (a compressed file, a
/// spreadsheet, UTF-16 text), from their first bytes; `None` when they may be CSV.
fn not_csv(bytes: &[u8]) -> Option<Error> {
    let msg = if bytes.starts_with(&[0x1F, 0x8B]) {
        "the file is gzip-compressed (it starts with the gzip signature); decompress it first (`gunzip`)"
    } else if bytes.starts_with(b"PK\x03\x04") || bytes.starts_with(b"PK\x05\x06") {
        "the file is a zip archive, as an .xlsx or .ods spreadsheet is; export the sheet as CSV (or unzip the archive)"
    } else if bytes.starts_with(&[0xD0, 0xCF, 0x11, 0xE0, 0xA1, 0xB1, 0x1A, 0xE1]) {
        "the file is an old-style Office document (an .xls spreadsheet?); save the sheet as CSV"
    } else if bytes.starts_with(&[0xFF, 0xFE]) || bytes.starts_with(&[0xFE, 0xFF]) {
        "the file is UTF-16 text (it starts with a UTF-16 byte-order mark), which is not read; convert it to UTF-8 (e.g. `iconv -f UTF-16 -t UTF-8`) or save it as \"CSV UTF-8\""
    } else if bytes.starts_with(b"BZh") && bytes.get(3).is_some_and(u8::is_ascii_digit) {
        "the file is bzip2-compressed; decompress it first (`bunzip2`)"
    } else if bytes.starts_with(&[0xFD, b'7', b'z', b'X', b'Z', 0x00]) {
        "the file is xz-compressed; decompress it first (`unxz`)"
    } else if bytes.starts_with(&[0x28, 0xB5, 0x2F, 0xFD]) {
        "the file is zstd-compressed; decompress it first (`unzstd`)"
    } else {
        return None;
    };
    Some(Error::input(msg))
}

/// The error for a header holding a NUL byte: text files have none, so the file is binary or
/// UTF-16 without a byte-order mark.
fn nul_in_header() -> Error {
    Error::input(
        "the header holds NUL bytes: the file is binary or UTF-16 text without a byte-order mark; convert it to UTF-8 CSV",
    )
    .with_line(1)
}

/// Reads a table from CSV bytes; `label` names the source in errors.
///
/// The header row is required; the id column must exist, and every id must be non-empty and
/// unique. Values are trimmed; an empty value means missing. Rows with a different number of
/// cells than the header are an error.
///
/// The SHA-256 of the bytes is computed on another thread while the rows are parsed (the two
/// take about as long as each other), and the needed cells are checked and turned into strings
/// per column in parallel. The error reported is the one a row-by-row reading would meet
/// first, whatever the thread count.
pub fn read_table_from(bytes: &[u8], label: &Path, spec: &ReadSpec) -> Result<Table> {
    let (sha256, parsed) = rayon::join(|| sha256_hex(bytes), || parse_table(bytes, label, spec));
    let (ids, columns, header, lines) = parsed?;
    Ok(Table {
        path: label.to_path_buf(),
        ids,
        columns,
        header,
        lines,
        bytes: bytes.len() as u64,
        sha256,
        place: "line",
    })
}

/// The ids, needed columns, header names and row lines of a table read from CSV bytes (see
/// [`read_table_from`]).
type Parsed = (Texts, HashMap<String, Texts>, Vec<String>, Vec<u64>);

/// The error for a column the header lacks: the columns present, the nearest name and, when
/// the header reads as one column holding `;`, a tab or `|`, the delimiter to set under
/// `[section]`; `why` follows the column's name (e.g. what needs it). Tag it with the file
/// and line 1.
pub fn column_not_found(header: &[String], col: &str, why: &str, section: &str) -> Error {
    let present: Vec<&str> = header.iter().map(String::as_str).collect();
    let mut hint = crate::config::nearest(col, &present)
        .map(|n| format!("; closest is `{n}`"))
        .unwrap_or_default();
    if let [only] = present.as_slice() {
        let count = |c: char| only.matches(c).count();
        let likely = [(';', ";"), ('\t', "tab"), ('|', "|")]
            .into_iter()
            .filter(|(c, _)| count(*c) > 0)
            .max_by_key(|(c, _)| count(*c));
        if let Some((c, name)) = likely {
            let shown = if c == '\t' {
                "tab".to_string()
            } else {
                format!("`{c}`")
            };
            hint.push_str(&format!(
                "; the header reads as one column; the file looks {shown}-delimited: set `delimiter = \"{name}\"` under [{section}]"
            ));
        }
    }
    Error::input(format!(
        "column `{col}`{why} not found in the header (columns: {}){hint}",
        present.join(", ")
    ))
}

/// The raw cells of one column, in row order, packed into one buffer.
#[derive(Default)]
struct CellColumn {
    bytes: Vec<u8>,
    /// Per row: where the cell ends in `bytes` (it starts where the previous one ends).
    ends: Vec<usize>,
}

impl CellColumn {
    fn push(&mut self, raw: &[u8]) {
        self.bytes.extend_from_slice(raw);
        self.ends.push(self.bytes.len());
    }

    fn raw(&self, row: usize) -> &[u8] {
        let start = if row == 0 { 0 } else { self.ends[row - 1] };
        &self.bytes[start..self.ends[row]]
    }

    /// The trimmed text of a cell; `None` when it is too long, holds a NUL byte or is not
    /// UTF-8.
    fn text(&self, row: usize) -> Option<&str> {
        let raw = self.raw(row);
        if raw.len() > MAX_CELL_BYTES || raw.contains(&0) {
            return None;
        }
        std::str::from_utf8(raw).ok().map(str::trim)
    }

    /// Every cell's trimmed text, and the first row whose cell is too long or not UTF-8 (its
    /// text is left empty). The cells are checked in parallel, then copied in row order.
    fn texts(&self) -> (Texts, Option<usize>) {
        let bad = (0..self.ends.len())
            .into_par_iter()
            .with_min_len(4096)
            .find_first(|&r| self.text(r).is_none());
        let mut out = Texts::with_capacity(self.ends.len(), self.bytes.len());
        for r in 0..self.ends.len() {
            out.push(self.text(r).unwrap_or_default());
        }
        (out, bad)
    }

    /// The error for a cell that [`CellColumn::text`] refused.
    fn error(&self, row: usize, line: u64, col: &str) -> Error {
        let raw = self.raw(row);
        if raw.len() > MAX_CELL_BYTES {
            Error::input(format!(
                "value is {} bytes long, over the limit of {MAX_CELL_BYTES}",
                raw.len()
            ))
            .with_line(line)
            .with_column(col)
        } else if raw.contains(&0) {
            nul_in_cell(line, col)
        } else {
            not_utf8(line, col)
        }
    }
}

fn parse_table(bytes: &[u8], label: &Path, spec: &ReadSpec) -> Result<Parsed> {
    let at = |e: Error| e.with_file(label);
    if let Some(e) = not_csv(bytes) {
        return Err(at(e));
    }
    let owned;
    let mut data: &[u8] = match spec.encoding {
        Encoding::Utf8 => bytes,
        enc => {
            owned = transcode(bytes, enc);
            &owned
        }
    };
    if let Some(rest) = data.strip_prefix(b"\xEF\xBB\xBF") {
        data = rest;
    }
    if data.iter().all(|b| b.is_ascii_whitespace()) {
        return Err(at(Error::input(
            "the file is empty: a header row naming the columns is needed",
        )));
    }
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .delimiter(spec.delimiter)
        .from_reader(data);
    let header = rdr.byte_headers().map_err(|e| at(csv_error(e)))?.clone();
    let mut names = Vec::with_capacity(header.len());
    for (i, h) in header.iter().enumerate() {
        if h.contains(&0) {
            return Err(at(nul_in_header()));
        }
        let name = std::str::from_utf8(h).map_err(|_| at(not_utf8(1, &format!("#{}", i + 1))))?;
        names.push(name.trim().to_string());
    }
    let (id_at, wanted) = needed_columns(&names, spec).map_err(|e| at(e.with_line(1)))?;
    // One pass over the rows copies the needed cells (the id first, then the wanted columns)
    // into one buffer per column; it stops at the first row that cannot be read.
    let take: Vec<usize> = std::iter::once(id_at)
        .chain(wanted.iter().map(|(_, i)| *i))
        .collect();
    let mut cells: Vec<CellColumn> = take.iter().map(|_| CellColumn::default()).collect();
    let mut lines = Vec::new();
    let mut record = csv::ByteRecord::new();
    let mut lines_at = LineCounter::default();
    let mut stop = None;
    loop {
        match next_row(&mut rdr, &mut record, data, &mut lines_at, names.len()) {
            Ok(Some(line)) => {
                for (col, &i) in cells.iter_mut().zip(&take) {
                    col.push(record.get(i).unwrap_or(b""));
                }
                lines.push(line);
            }
            Ok(None) => break,
            Err(e) => {
                stop = Some(e);
                break;
            }
        }
    }
    let checked: Vec<(Texts, Option<usize>)> = cells.par_iter().map(CellColumn::texts).collect();
    // Candidate errors as (row, order within the row, error); the least is the one a
    // row-by-row reading meets first: a row that cannot be read stops before its cells are
    // looked at; then the id cell, the id's emptiness and uniqueness, and the wanted cells in
    // order.
    let mut first: Option<(usize, usize, Error)> = None;
    let mut consider = |row: usize, order: usize, e: Error| {
        if first
            .as_ref()
            .is_none_or(|(r, o, _)| (row, order) < (*r, *o))
        {
            first = Some((row, order, e));
        }
    };
    if let Some(e) = stop {
        consider(lines.len(), 0, e);
    }
    let names_of = std::iter::once(spec.id.as_str()).chain(wanted.iter().map(|(n, _)| n.as_str()));
    for (k, (((_, bad), col), name)) in checked.iter().zip(&cells).zip(names_of).enumerate() {
        if let Some(r) = *bad {
            let order = if k == 0 { 1 } else { 2 + k };
            consider(r, order, col.error(r, lines[r], name));
        }
    }
    if let Some((r, msg)) = id_problem(&checked[0].0, &lines, "line") {
        consider(
            r,
            2,
            Error::input(msg).with_line(lines[r]).with_column(&spec.id),
        );
    }
    if let Some((_, _, e)) = first {
        return Err(at(e));
    }
    if lines.is_empty() {
        return Err(at(Error::input("the table has a header but no records")));
    }
    let mut checked = checked.into_iter().map(|(v, _)| v);
    let ids = checked.next().unwrap_or_default();
    let columns = wanted.into_iter().map(|(n, _)| n).zip(checked).collect();
    Ok((ids, columns, names, lines))
}

/// Where the needed columns sit in a header: the id's position, then each compared column
/// (every column `spec` names, in order, once) and each optional column the header has. A
/// needed column the header lacks is an error with the closest names as suggestions.
pub(crate) fn needed_columns(
    names: &[String],
    spec: &ReadSpec,
) -> Result<(usize, Vec<(String, usize)>)> {
    let find = |col: &str| -> Result<usize> {
        names
            .iter()
            .position(|n| n == col)
            .ok_or_else(|| column_not_found(names, col, "", &spec.section))
    };
    let id_at = find(&spec.id)?;
    let mut wanted: Vec<(String, usize)> = Vec::new();
    for c in &spec.columns {
        if !wanted.iter().any(|(n, _)| n == c) {
            wanted.push((c.clone(), find(c)?));
        }
    }
    for c in &spec.optional {
        if let Some(i) = names.iter().position(|n| n == c) {
            if !wanted.iter().any(|(n, _)| n == c) {
                wanted.push((c.clone(), i));
            }
        }
    }
    Ok((id_at, wanted))
}

/// The first row whose id is empty or seen before, with the message; `lines` number the rows
/// as `place` says ("line" or "row").
pub(crate) fn id_problem(ids: &Texts, lines: &[u64], place: &str) -> Option<(usize, String)> {
    let mut seen: HashMap<&str, u64, foldhash::fast::FixedState> =
        HashMap::with_capacity_and_hasher(ids.len(), Default::default());
    for (r, id) in ids.iter().enumerate() {
        if id.is_empty() {
            return Some((r, "empty id".to_string()));
        }
        if let Some(before) = seen.insert(id, lines[r]) {
            return Some((r, format!("duplicate id (first seen on {place} {before})")));
        }
    }
    None
}

/// Reads the next record into `record` and returns its line, or `None` at the end; a row
/// whose cell count differs from the header's is an error.
fn next_row(
    rdr: &mut csv::Reader<&[u8]>,
    record: &mut csv::ByteRecord,
    data: &[u8],
    lines: &mut LineCounter,
    width: usize,
) -> Result<Option<u64>> {
    if !rdr.read_byte_record(record).map_err(csv_error)? {
        return Ok(None);
    }
    let line = lines.line(data, record.position());
    if record.len() != width {
        return Err(Error::input(format!(
            "row has {} cells but the header has {width}",
            record.len()
        ))
        .with_line(line));
    }
    Ok(Some(line))
}

/// Line numbers of records from their byte offsets, counted incrementally. The csv crate's
/// own line count is one short after a CRLF header and ignores lone `\r` endings, so we count
/// line breaks ourselves.
#[derive(Default)]
struct LineCounter {
    offset: usize,
    line: u64,
}

impl LineCounter {
    fn line(&mut self, data: &[u8], pos: Option<&csv::Position>) -> u64 {
        let Some(pos) = pos else {
            return 0;
        };
        let mut start = pos.byte() as usize;
        while start < data.len() && (data[start] == b'\r' || data[start] == b'\n') {
            start += 1;
        }
        let start = start.min(data.len());
        if start >= self.offset {
            self.line += line_breaks(&data[self.offset..start]);
            self.offset = start;
        }
        self.line + 1
    }
}

/// Line breaks in some bytes: `\n`, `\r\n` and a lone `\r` (old Mac files, which the csv
/// reader also takes as ends of records) each count once.
fn line_breaks(bytes: &[u8]) -> u64 {
    let lf = bytes.iter().filter(|&&b| b == b'\n').count();
    if !bytes.contains(&b'\r') {
        return lf as u64;
    }
    let lone_cr = bytes
        .iter()
        .enumerate()
        .filter(|&(i, &b)| b == b'\r' && bytes.get(i + 1) != Some(&b'\n'))
        .count();
    (lf + lone_cr) as u64
}

/// SHA-256 of some bytes, in lower-case hex.
pub fn sha256_hex(bytes: &[u8]) -> String {
    use sha2::{Digest, Sha256};
    let digest = Sha256::digest(bytes);
    digest.iter().map(|b| format!("{b:02x}")).collect()
}

fn nul_in_cell(line: u64, col: &str) -> Error {
    Error::input(
        "value holds a NUL byte (0x00), which text never does: the file may be binary, UTF-16 or damaged",
    )
    .with_line(line)
    .with_column(col)
}

fn not_utf8(line: u64, col: &str) -> Error {
    Error::input(
        "text is not valid UTF-8; if the file is in another encoding, set `encoding = \"latin1\"` or `\"windows-1252\"` for this table",
    )
    .with_line(line)
    .with_column(col)
}

fn csv_error(e: csv::Error) -> Error {
    let line = e.position().map(|p| p.line());
    let msg = match e.kind() {
        csv::ErrorKind::Io(io) => format!("cannot read: {io}"),
        csv::ErrorKind::Utf8 { .. } => "text is not valid UTF-8".to_string(),
        _ => format!("malformed CSV: {e}"),
    };
    let err = Error::input(msg);
    match line {
        Some(l) => err.with_line(l),
        None => err,
    }
}

/// Scored pairs for `dovetail match`: ids interned in first-seen order.
#[derive(Debug, Clone, Default)]
pub struct ScoredPairs {
    /// Distinct left ids, in first-seen order.
    pub left_ids: Vec<String>,
    /// Distinct right ids, in first-seen order.
    pub right_ids: Vec<String>,
    /// Per pair: index into `left_ids`.
    pub left: Vec<u32>,
    /// Per pair: index into `right_ids`.
    pub right: Vec<u32>,
    /// Per pair: the weight.
    pub weight: Vec<f64>,
}

/// Reads a CSV (or Parquet) file of scored pairs with columns `left_id,right_id,weight`
/// (others ignored).
pub fn read_scored_pairs(path: &Path) -> Result<ScoredPairs> {
    let bytes = read_file(path, true)?;
    if crate::tabular::is_parquet(path, &bytes) {
        return crate::tabular::read_scored_pairs_parquet(bytes, path);
    }
    read_scored_pairs_from(&bytes, path)
}

/// Reads scored pairs from CSV bytes; `label` names the source in errors.
pub fn read_scored_pairs_from(bytes: &[u8], label: &Path) -> Result<ScoredPairs> {
    let at = |e: Error| e.with_file(label);
    if let Some(e) = not_csv(bytes) {
        return Err(at(e));
    }
    let data = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    if data.iter().all(|b| b.is_ascii_whitespace()) {
        return Err(at(Error::input(
            "the file is empty: a header `left_id,right_id,weight` is needed",
        )));
    }
    let mut rdr = csv::ReaderBuilder::new().flexible(true).from_reader(data);
    let header = rdr.byte_headers().map_err(|e| at(csv_error(e)))?.clone();
    if header.iter().any(|h| h.contains(&0)) {
        return Err(at(nul_in_header()));
    }
    let names: Vec<String> = header
        .iter()
        .map(|h| String::from_utf8_lossy(h).trim().to_string())
        .collect();
    let col = |want: &str| -> Result<usize> {
        names.iter().position(|n| n == want).ok_or_else(|| {
            let present: Vec<&str> = names.iter().map(String::as_str).collect();
            at(Error::input(format!(
                "column `{want}` not found in the header (columns: {}); the header must name left_id, right_id and weight",
                present.join(", ")
            ))
            .with_line(1))
        })
    };
    let (li, ri, wi) = (col("left_id")?, col("right_id")?, col("weight")?);
    let mut pairs = PairsBuilder::new("line");
    let mut record = csv::ByteRecord::new();
    let mut lines_at = LineCounter::default();
    while let Some(line) =
        next_row(&mut rdr, &mut record, data, &mut lines_at, names.len()).map_err(at)?
    {
        let text = |i: usize, c: &str| -> Result<&str> {
            let raw = record.get(i).unwrap_or(b"");
            let s = std::str::from_utf8(raw).map_err(|_| at(not_utf8(line, c)))?;
            Ok(s.trim())
        };
        let (l, r, w) = (
            text(li, "left_id")?,
            text(ri, "right_id")?,
            text(wi, "weight")?,
        );
        pairs.push(l, r, w, line).map_err(at)?;
    }
    pairs.finish().map_err(at)
}

/// Scored pairs gathered one at a time, checked as they come (non-empty ids, a finite
/// weight) and at the end (no pair given twice); `place` says what the numbers passed to
/// [`PairsBuilder::push`] count ("line" of a CSV file or "row" of a Parquet file or frame).
pub(crate) struct PairsBuilder {
    out: ScoredPairs,
    lmap: IdMap,
    rmap: IdMap,
    /// (pair key, line) of every pair; duplicates are found by sorting once at the end.
    keys: Vec<(u64, u64)>,
    place: &'static str,
}

impl PairsBuilder {
    pub(crate) fn new(place: &'static str) -> PairsBuilder {
        PairsBuilder {
            out: ScoredPairs::default(),
            lmap: IdMap::default(),
            rmap: IdMap::default(),
            keys: Vec::new(),
            place,
        }
    }

    fn mark(&self, e: Error, at: u64) -> Error {
        if self.place == "row" {
            e.with_row(at)
        } else {
            e.with_line(at)
        }
    }

    /// Adds the pair on line (or row) `at`: ids `l` and `r` and the weight's text `w`.
    pub(crate) fn push(&mut self, l: &str, r: &str, w: &str, at: u64) -> Result<()> {
        for (v, c) in [(l, "left_id"), (r, "right_id")] {
            if v.is_empty() {
                return Err(self.mark(Error::input("empty id"), at).with_column(c));
            }
        }
        let weight: f64 = w.parse().map_err(|_| {
            self.mark(Error::input(format!("`{w}` is not a number")), at)
                .with_column("weight")
        })?;
        if !weight.is_finite() {
            return Err(self
                .mark(Error::input(format!("weight `{w}` is not finite")), at)
                .with_column("weight"));
        }
        let a = self.lmap.intern(l, &mut self.out.left_ids);
        let b = self.rmap.intern(r, &mut self.out.right_ids);
        self.keys.push(((a as u64) << 32 | b as u64, at));
        self.out.left.push(a);
        self.out.right.push(b);
        self.out.weight.push(weight);
        Ok(())
    }

    /// The pairs, or an error at the earliest pair that repeats one given before.
    pub(crate) fn finish(mut self) -> Result<ScoredPairs> {
        self.keys.sort_unstable();
        let repeat = self
            .keys
            .windows(2)
            .filter(|k| k[0].0 == k[1].0)
            .min_by_key(|k| k[1].1);
        if let Some(k) = repeat {
            let e = Error::input(format!(
                "duplicate pair (first given on {} {})",
                self.place, k[0].1
            ));
            return Err(self.mark(e, k[1].1));
        }
        Ok(self.out)
    }
}

/// Ids interned in first-seen order (a fast, fixed-seed hash: the ids come from a local file).
#[derive(Default)]
struct IdMap(HashMap<Box<str>, u32, foldhash::fast::FixedState>);

impl IdMap {
    fn intern(&mut self, id: &str, ids: &mut Vec<String>) -> u32 {
        if let Some(&k) = self.0.get(id) {
            return k;
        }
        let k = ids.len() as u32;
        ids.push(id.to_string());
        self.0.insert(id.into(), k);
        k
    }
}

/// Reads known pairs (`left_id,right_id`, other columns ignored) with the line of each.
pub fn read_id_pairs(path: &Path) -> Result<Vec<(String, String, u64)>> {
    let bytes = read_file(path, true)?;
    read_id_pairs_from(&bytes, path)
}

/// Reads known pairs from CSV bytes (see [`read_id_pairs`]); `label` names the source in
/// errors.
pub fn read_id_pairs_from(bytes: &[u8], label: &Path) -> Result<Vec<(String, String, u64)>> {
    let at = |e: Error| e.with_file(label);
    if let Some(e) = not_csv(bytes) {
        return Err(at(e));
    }
    let data = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let mut rdr = csv::ReaderBuilder::new().flexible(true).from_reader(data);
    let header = rdr.byte_headers().map_err(|e| at(csv_error(e)))?.clone();
    if header.iter().any(|h| h.contains(&0)) {
        return Err(at(nul_in_header()));
    }
    let col = |want: &str| {
        header
            .iter()
            .position(|h| h.trim_ascii() == want.as_bytes())
            .ok_or_else(|| {
                at(Error::input(format!(
                    "column `{want}` not found in the header; it must name left_id and right_id"
                ))
                .with_line(1))
            })
    };
    let (li, ri) = (col("left_id")?, col("right_id")?);
    let mut out = Vec::new();
    let mut lines_at = LineCounter::default();
    let mut record = csv::ByteRecord::new();
    while rdr
        .read_byte_record(&mut record)
        .map_err(|e| at(csv_error(e)))?
    {
        let line = lines_at.line(data, record.position());
        let get = |i: usize, c: &str| -> Result<String> {
            let raw = record.get(i).unwrap_or(b"");
            let s = std::str::from_utf8(raw).map_err(|_| at(not_utf8(line, c)))?;
            Ok(s.trim().to_string())
        };
        out.push((get(li, "left_id")?, get(ri, "right_id")?, line));
    }
    Ok(out)
}

pub use crate::folder::OutputSet;

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(cols: &[&str]) -> ReadSpec {
        ReadSpec {
            id: "id".into(),
            columns: cols.iter().map(|s| s.to_string()).collect(),
            optional: vec!["extra".into()],
            section: "left".into(),
            encoding: Encoding::Utf8,
            delimiter: b',',
        }
    }

    fn read(text: &[u8], cols: &[&str]) -> Result<Table> {
        read_table_from(text, Path::new("t.csv"), &spec(cols))
    }

    fn err(text: &[u8], cols: &[&str]) -> String {
        read(text, cols)
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default()
    }

    #[test]
    fn reads_bom_crlf_and_quoted_newlines() {
        let t = read(
            b"\xEF\xBB\xBFid,name\r\n1, Ann \r\n2,\"Bo\nB\"\r\n",
            &["name"],
        )
        .unwrap();
        assert_eq!(t.ids.to_strings(), vec!["1", "2"]);
        assert_eq!(t.column("name").to_strings(), ["Ann", "Bo\nB"]);
        assert_eq!(t.lines, vec![2, 3]);
        assert_eq!(t.header, vec!["id", "name"]);
        // An optional column is read when the header has it and left out when not.
        assert!(!t.columns.contains_key("extra"));
        let t = read(b"id,extra\n1, x\n", &[]).unwrap();
        assert_eq!(t.column("extra").to_strings(), ["x"]);
    }

    #[test]
    fn errors_name_line_and_column() {
        assert_eq!(
            err(b"id,name\n1,a\n1,b\n", &["name"]),
            "t.csv: line 3: column id: duplicate id (first seen on line 2)"
        );
        assert_eq!(
            err(b"id,name\n,a\n", &["name"]),
            "t.csv: line 2: column id: empty id"
        );
        assert_eq!(
            err(b"id,name\n1,a,x\n", &["name"]),
            "t.csv: line 2: row has 3 cells but the header has 2"
        );
        let e = err(b"id,surname\n1,a\n", &["surnme"]);
        assert!(
            e.contains("column `surnme` not found") && e.contains("closest is `surname`"),
            "{e}"
        );
        assert!(err(b"", &[]).contains("empty"));
        // A `;`-delimited file read with commas: one column whose name holds the delimiter.
        let e = err(b"id;surname;town\n1;a;b\n", &["surname"]);
        assert!(
            e.ends_with("the header reads as one column; the file looks `;`-delimited: set `delimiter = \";\"` under [left]"),
            "{e}"
        );
        let e = err(b"id\tsurname\n1\ta\n", &["surname"]);
        assert!(
            e.contains("looks tab-delimited: set `delimiter = \"tab\"`"),
            "{e}"
        );
        assert!(!err(b"id,name\n1,a\n", &["town"]).contains("delimited"));
        assert!(err(b"id,name\n", &["name"]).contains("no records"));
        let e = err(b"id,name\n1,caf\xE9\n", &["name"]);
        assert!(
            e.starts_with("t.csv: line 2: column name: text is not valid UTF-8"),
            "{e}"
        );
        assert!(e.contains("latin1"));
    }

    #[test]
    fn first_error_in_row_order_wins() {
        // A row-by-row reading meets the bad cell of line 3 before the duplicate of line 4,
        // the duplicate id before a bad cell of the same row, and a bad cell before a later
        // row of the wrong width.
        assert_eq!(
            err(b"id,name\n1,a\n2,caf\xE9\n1,b\n", &["name"]),
            err(b"id,name\n1,a\n2,caf\xE9\n", &["name"])
        );
        assert!(err(b"id,name\n1,a\n2,caf\xE9\n1,b\n", &["name"]).starts_with("t.csv: line 3:"));
        assert_eq!(
            err(b"id,name\n1,a\n1,caf\xE9\n", &["name"]),
            "t.csv: line 3: column id: duplicate id (first seen on line 2)"
        );
        assert!(err(b"id,name,x\n1,caf\xE9,1\n2,b\n", &["name"])
            .starts_with("t.csv: line 2: column name:"));
        assert_eq!(
            err(b"id,name,x\n1,a,1\n2,b\n3,caf\xE9,1\n", &["name"]),
            "t.csv: line 3: row has 2 cells but the header has 3"
        );
        assert!(err(b"id,name\n\xE9,a\n", &["name"]).starts_with("t.csv: line 2: column id: text"));
        let long = format!("id,name\n1,{}\n", "x".repeat(MAX_CELL_BYTES + 1));
        assert_eq!(
            err(long.as_bytes(), &["name"]),
            format!("t.csv: line 2: column name: value is {} bytes long, over the limit of {MAX_CELL_BYTES}", MAX_CELL_BYTES + 1)
        );
    }

    #[test]
    fn lone_cr_endings_count_as_lines() {
        // The csv reader ends records at a lone CR (old Mac files); lines counted by LF alone
        // made every row of such a file "line 1".
        let t = read(b"id,name\r1,a\r2,\"b\rc\"\r\r3,d\n4,e\r\n5,f", &["name"]).unwrap();
        assert_eq!(t.ids.to_strings(), vec!["1", "2", "3", "4", "5"]);
        assert_eq!(t.lines, vec![2, 3, 6, 7, 8]);
        assert_eq!(
            err(b"id,name\r1,a\r1,b\r", &["name"]),
            "t.csv: line 3: column id: duplicate id (first seen on line 2)"
        );
        let k = read_id_pairs_from(b"left_id,right_id\ra,b\rc,d\r", Path::new("k")).unwrap();
        assert_eq!(
            k,
            vec![("a".into(), "b".into(), 2), ("c".into(), "d".into(), 3)]
        );
    }

    #[test]
    fn binary_files_and_nul_bytes_are_named() {
        assert!(err(b"\x1F\x8B\x08\x00rest", &[]).starts_with("t.csv: the file is gzip"));
        assert!(err(b"PK\x03\x04rest", &[]).contains("zip archive, as an .xlsx"));
        assert!(err(b"\xFF\xFEi\x00d\x00", &[]).contains("UTF-16"));
        assert!(err(b"i\x00d\x00\n\x00", &[]).starts_with("t.csv: line 1: the header holds NUL"));
        assert!(err(b"id,name\n1,a\x00b\n", &["name"])
            .starts_with("t.csv: line 2: column name: value holds a NUL byte"));
        let p = |b: &[u8]| {
            read_scored_pairs_from(b, Path::new("p"))
                .err()
                .map(|e| e.to_string())
        };
        assert!(p(b"PK\x03\x04").is_some_and(|e| e.contains("zip archive")));
        let k = |b: &[u8]| {
            read_id_pairs_from(b, Path::new("k"))
                .err()
                .map(|e| e.to_string())
        };
        assert!(k(b"\x1F\x8B\x08").is_some_and(|e| e.contains("gzip")));
        assert!(k(b"left_id,right_id\r\na,b\r\n\xE9,c\r\n")
            .is_some_and(|e| e.starts_with("k: line 3: column left_id: text is not valid UTF-8")));
    }

    #[test]
    fn folders_and_pipes_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let e = read_table(dir.path(), &spec(&[])).unwrap_err().to_string();
        assert!(
            e.ends_with("is a folder, not a file: give the path of the CSV file itself"),
            "{e}"
        );
    }

    #[test]
    fn sha256_of_abc() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn latin1_and_cp1252() {
        // 0xE9 is é in ISO-8859-1; 0x80 is the euro sign in Windows-1252 (WHATWG index).
        let mut s = spec(&["name"]);
        s.encoding = Encoding::Latin1;
        let t = read_table_from(b"id,name\n1,caf\xE9\n", Path::new("t"), &s).unwrap();
        assert_eq!(&t.column("name")[0], "café");
        s.encoding = Encoding::Windows1252;
        let t = read_table_from(b"id,name\n1,\x80 5\n", Path::new("t"), &s).unwrap();
        assert_eq!(&t.column("name")[0], "€ 5");
    }

    #[test]
    fn scored_pairs_errors() {
        let e = |t: &[u8]| {
            read_scored_pairs_from(t, Path::new("p.csv"))
                .err()
                .map(|e| e.to_string())
                .unwrap_or_default()
        };
        assert_eq!(
            e(b"left_id,right_id,weight\na,b,1\na,b,2\n"),
            "p.csv: line 3: duplicate pair (first given on line 2)"
        );
        assert_eq!(
            e(b"left_id,right_id,weight\na,b,x\n"),
            "p.csv: line 2: column weight: `x` is not a number"
        );
        assert_eq!(
            e(b"left_id,right_id,weight\na,b,NaN\n"),
            "p.csv: line 2: column weight: weight `NaN` is not finite"
        );
        assert!(e(b"left,right,weight\n").contains("column `left_id` not found"));
        let p = read_scored_pairs_from(
            b"left_id,right_id,weight,note\nx,y,1.5,hi\nz,y,2,\n",
            Path::new("p"),
        )
        .unwrap();
        assert_eq!(p.left_ids, vec!["x", "z"]);
        assert_eq!(p.right, vec![0, 0]);
        assert_eq!(p.weight, vec![1.5, 2.0]);
    }
}
