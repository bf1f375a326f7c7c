//! The two tables' compared values, cleaned once per record and interned.
//!
//! In: the two [`Table`]s, the field specs and the key-only columns. Out: [`Records`], where
//! each field holds one dictionary of distinct values shared by both sides and, per record, an
//! index into it (or [`MISSING`]). Exact agreement is then an integer comparison, value
//! frequencies come for free, and memory is one `u32` per record and field plus the distinct
//! values. Each side's value map (`left_recode`, `right_recode`) applies after cleaning; dates
//! are parsed with each side's own order and interned in their ISO form, so equal dates agree
//! whatever each side's format. Dates and numbers that do not parse are missing (counted per
//! side with their first lines) or, with `unparsed = "stop"`, an error naming the file, line
//! and column.

use crate::config::{FieldSpec, KeySource, Method};
use crate::error::{Error, Result};
use crate::io::Table;
use crate::text::{self, Date, DateOrder};
use crate::texts::Texts;
use rayon::prelude::*;
use std::collections::HashMap;

/// Marks a missing value in [`FieldValues::left`] and [`FieldValues::right`].
pub const MISSING: u32 = u32::MAX;

/// Most line numbers kept per side for values that did not parse.
pub const UNPARSED_LINES: usize = 5;

/// Values of one side that are not dates (or not numbers) and were taken as missing.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Unparsed {
    /// How many records hold such a value.
    pub count: u64,
    /// The lines of the first [`UNPARSED_LINES`] of them.
    pub first_lines: Vec<u64>,
    /// What the numbers count: "line" (CSV) or "row" (Parquet, frame).
    pub place: &'static str,
}

/// One field's values on both sides.
#[derive(Debug, Clone)]
pub struct FieldValues {
    /// The field's spec from the config.
    pub spec: FieldSpec,
    /// Distinct values (cleaned and mapped; dates in ISO form), in first-seen order (left
    /// table first).
    pub dict: Vec<String>,
    /// Parsed dates per dictionary entry (date fields only).
    pub dates: Vec<Date>,
    /// Parsed numbers per dictionary entry (number fields only).
    pub numbers: Vec<f64>,
    /// Per left record: index into `dict`, or [`MISSING`].
    pub left: Vec<u32>,
    /// Per right record: index into `dict`, or [`MISSING`].
    pub right: Vec<u32>,
    /// Per dictionary entry: how many left records hold it.
    pub left_counts: Vec<u32>,
    /// Per dictionary entry: how many right records hold it.
    pub right_counts: Vec<u32>,
    /// Left values that did not parse (taken as missing).
    pub left_unparsed: Unparsed,
    /// Right values that did not parse (taken as missing).
    pub right_unparsed: Unparsed,
}

impl FieldValues {
    /// Share of left records with this field missing.
    pub fn left_missing_rate(&self) -> f64 {
        missing_rate(&self.left)
    }

    /// Share of right records with this field missing.
    pub fn right_missing_rate(&self) -> f64 {
        missing_rate(&self.right)
    }

    /// The cleaned value of a left record, or "" when missing.
    pub fn left_value(&self, i: usize) -> &str {
        self.value(self.left[i])
    }

    /// The cleaned value of a right record, or "" when missing.
    pub fn right_value(&self, j: usize) -> &str {
        self.value(self.right[j])
    }

    fn value(&self, v: u32) -> &str {
        if v == MISSING {
            ""
        } else {
            &self.dict[v as usize]
        }
    }

    /// The warning for one side's values that did not parse, if any (counts and lines only).
    pub fn unparsed_warning(&self, left: bool) -> Option<String> {
        let (u, side) = if left {
            (&self.left_unparsed, "left")
        } else {
            (&self.right_unparsed, "right")
        };
        if u.count == 0 {
            return None;
        }
        let kind = if self.spec.method == Method::Date {
            ("a date", "dates")
        } else {
            ("a number", "numbers")
        };
        let lines: Vec<String> = u.first_lines.iter().map(u64::to_string).collect();
        let (what, lines_word) = match (u.count, lines.len()) {
            (1, _) => (
                format!("1 value in the {side} table is not {} and was", kind.0),
                u.place.to_string(),
            ),
            (n, k) if n as usize > k => (
                format!("{n} values in the {side} table are not {} and were", kind.1),
                format!("first {}s", u.place),
            ),
            (n, _) => (
                format!("{n} values in the {side} table are not {} and were", kind.1),
                format!("{}s", u.place),
            ),
        };
        Some(format!(
            "field `{}`: {what} taken as missing ({lines_word} {}); set `unparsed = \"stop\"` to stop instead",
            self.spec.name,
            lines.join(", ")
        ))
    }
}

impl Default for Unparsed {
    fn default() -> Unparsed {
        Unparsed {
            count: 0,
            first_lines: Vec::new(),
            place: "line",
        }
    }
}

fn missing_rate(ids: &[u32]) -> f64 {
    if ids.is_empty() {
        return 0.0;
    }
    ids.iter().filter(|&&v| v == MISSING).count() as f64 / ids.len() as f64
}

/// Both tables' ids and compared values.
#[derive(Debug, Clone)]
pub struct Records {
    /// Left record ids in row order.
    pub left_ids: Texts,
    /// Right record ids in row order.
    pub right_ids: Texts,
    /// One entry per configured field, in config order.
    pub fields: Vec<FieldValues>,
    /// One entry per key-only column (`Config::key_columns`): values for blocking only.
    pub key_columns: Vec<FieldValues>,
}

impl Records {
    /// Number of left records.
    pub fn n_left(&self) -> usize {
        self.left_ids.len()
    }

    /// Number of right records.
    pub fn n_right(&self) -> usize {
        self.right_ids.len()
    }

    /// The values a blocking key part reads.
    pub fn key_values(&self, source: KeySource) -> &FieldValues {
        match source {
            KeySource::Field(k) => &self.fields[k],
            KeySource::Column(c) => &self.key_columns[c],
        }
    }
}

/// Cleans, interns and parses every configured field and key-only column of both tables
/// (fields in parallel). Key-only columns are read under [`FieldSpec::key_column`]; both
/// tables must hold them.
///
/// When several fields hold bad values, the error is that of the first field in config order.
pub fn build(
    left: &Table,
    right: &Table,
    specs: &[FieldSpec],
    key_columns: &[String],
) -> Result<Records> {
    let key_specs: Vec<FieldSpec> = key_columns
        .iter()
        .map(|c| FieldSpec::key_column(c))
        .collect();
    let all: Vec<&FieldSpec> = specs.iter().chain(&key_specs).collect();
    let (built, (left_ids, right_ids)) = rayon::join(
        || {
            all.par_iter()
                .map(|spec| build_field(left, right, spec))
                .collect::<Vec<Result<FieldValues>>>()
        },
        || rayon::join(|| left.ids.clone(), || right.ids.clone()),
    );
    let mut fields = built.into_iter().collect::<Result<Vec<_>>>()?;
    let key_columns = fields.split_off(specs.len());
    Ok(Records {
        left_ids,
        right_ids,
        fields,
        key_columns,
    })
}

/// A number field's value: a decimal or scientific number (`42`, `-1.5`, `2e3`) that is
/// finite; `None` for anything else (text, `inf`, `NaN`, out of range).
pub fn parse_number(v: &str) -> Option<f64> {
    v.parse::<f64>().ok().filter(|x| x.is_finite())
}

/// A fast hash with a fixed seed: the keys come from the user's own files, and a fixed seed
/// keeps runs repeatable.
type FastMap<K, V> = HashMap<K, V, foldhash::fast::FixedState>;

/// Marks a distinct text that did not parse, before the rows are mapped.
const UNPARSED: u32 = u32::MAX - 1;

/// How one side's cleaned texts become values: its value map, then, for dates and numbers,
/// parsing (dates with the side's order).
#[derive(PartialEq)]
struct SideCoding {
    method: Method,
    recode: HashMap<String, String>,
    order: DateOrder,
}

/// One distinct text after a side's coding.
enum Coded<'a> {
    Missing,
    Unparsed,
    Text(&'a str),
    /// A date with its ISO form.
    Date(String, Date),
    Number(&'a str, f64),
}

impl SideCoding {
    fn new(spec: &FieldSpec, left: bool) -> Result<SideCoding> {
        let recode = spec.cleaned_recode(left).map_err(|e| {
            let side = if left { "left" } else { "right" };
            Error::config(format!("field `{}`: `{side}_recode`: {e}", spec.name))
        })?;
        Ok(SideCoding {
            method: spec.method,
            recode,
            order: spec.date_order_of(left),
        })
    }

    fn code<'a>(&'a self, cleaned: &'a str) -> Coded<'a> {
        let v = self.recode.get(cleaned).map_or(cleaned, String::as_str);
        if v.is_empty() {
            return Coded::Missing;
        }
        match self.method {
            Method::Date => match text::parse_date(v, self.order) {
                Some(d) => Coded::Date(d.iso(), d),
                None => Coded::Unparsed,
            },
            Method::Number => match parse_number(v) {
                Some(x) => Coded::Number(v, x),
                None => Coded::Unparsed,
            },
            _ => Coded::Text(v),
        }
    }

    /// Codes many cleaned texts (in parallel).
    fn code_all<'a>(&'a self, cleaned: &[&'a str]) -> Vec<Coded<'a>> {
        cleaned
            .par_iter()
            .with_min_len(256)
            .map(|c| self.code(c))
            .collect()
    }
}

/// A field's dictionary as it is built: distinct values in first-seen order, with their
/// parsed dates or numbers.
#[derive(Default)]
struct Dictionary<'a> {
    index: FastMap<&'a str, u32>,
    dict: Vec<String>,
    dates: Vec<Date>,
    numbers: Vec<f64>,
}

impl<'a> Dictionary<'a> {
    /// The id of each coded text (interned in order), [`MISSING`] or [`UNPARSED`].
    fn intern_all(&mut self, coded: &'a [Coded<'a>]) -> Vec<u32> {
        coded
            .iter()
            .map(|c| {
                let (text, date, number) = match c {
                    Coded::Missing => return MISSING,
                    Coded::Unparsed => return UNPARSED,
                    Coded::Text(t) => (*t, None, None),
                    Coded::Date(iso, d) => (iso.as_str(), Some(*d), None),
                    Coded::Number(t, x) => (*t, None, Some(*x)),
                };
                *self.index.entry(text).or_insert_with(|| {
                    self.dict.push(text.to_string());
                    self.dates.extend(date);
                    self.numbers.extend(number);
                    (self.dict.len() - 1) as u32
                })
            })
            .collect()
    }
}

fn build_field(left: &Table, right: &Table, spec: &FieldSpec) -> Result<FieldValues> {
    let how = spec.normalize();
    let lraw = left.values(spec.left_column());
    let rraw = right.values(spec.right_column());
    // The raw texts are interned first (left rows, then right rows) and each distinct one is
    // cleaned once: names, dates and codes repeat, so this cleans a fraction of the cells.
    // The two sides are interned at the same time, then the right side's texts not seen on
    // the left are appended in their right first-seen order.
    let ((left_index, mut raw, lraw_ids), (_, right_raw, right_local)) =
        rayon::join(|| intern_raw(&lraw), || intern_raw(&rraw));
    let n_left_raw = raw.len();
    let right_to_raw: Vec<u32> = right_raw
        .iter()
        .map(|v| match left_index.get(v) {
            Some(&id) => id,
            None => {
                raw.push(v);
                (raw.len() - 1) as u32
            }
        })
        .collect();
    drop(left_index);
    let cleaned: Vec<String> = raw
        .par_iter()
        .with_min_len(256)
        .map(|v| text::clean(v, how, &spec.drop_tokens))
        .collect();
    let cleaned: Vec<&str> = cleaned.iter().map(String::as_str).collect();
    let (lcode, rcode) = (SideCoding::new(spec, true)?, SideCoding::new(spec, false)?);
    // Values are interned in first-seen order over the rows, left table first (a value first
    // appears with the raw text that first gives it). When both sides code alike, each
    // distinct raw text is coded once; otherwise the right side's distinct texts are coded
    // again with the right side's coding.
    let same = lcode == rcode;
    let left_coded = lcode.code_all(if same {
        &cleaned
    } else {
        &cleaned[..n_left_raw]
    });
    let right_coded = if same {
        Vec::new()
    } else {
        let texts: Vec<&str> = right_to_raw.iter().map(|&r| cleaned[r as usize]).collect();
        rcode.code_all(&texts)
    };
    let mut dict = Dictionary::default();
    let left_of_raw = dict.intern_all(&left_coded);
    let right_of_local = if same {
        right_to_raw
            .iter()
            .map(|&r| left_of_raw[r as usize])
            .collect()
    } else {
        dict.intern_all(&right_coded)
    };
    let mut left_counts = vec![0u32; dict.dict.len()];
    let mut right_counts = vec![0u32; dict.dict.len()];
    let (l, left_unparsed) = side_ids(&lraw_ids, &left_of_raw, &mut left_counts, left);
    let (r, right_unparsed) = side_ids(&right_local, &right_of_local, &mut right_counts, right);
    let fv = FieldValues {
        spec: spec.clone(),
        dict: dict.dict,
        dates: dict.dates,
        numbers: dict.numbers,
        left: l,
        right: r,
        left_counts,
        right_counts,
        left_unparsed,
        right_unparsed,
    };
    if spec.stops_on_unparsed() {
        stop_on_unparsed(&fv, left, right)?;
    }
    Ok(fv)
}

/// Each row's value id from its distinct text's id (`of`), with the counts per value and the
/// rows whose text did not parse (made missing).
fn side_ids(rows: &[u32], of: &[u32], counts: &mut [u32], table: &Table) -> (Vec<u32>, Unparsed) {
    let lines = &table.lines;
    let mut unparsed = Unparsed {
        place: table.place,
        ..Unparsed::default()
    };
    let ids = rows
        .iter()
        .enumerate()
        .map(|(row, &r)| match of[r as usize] {
            UNPARSED => {
                unparsed.count += 1;
                if unparsed.first_lines.len() < UNPARSED_LINES {
                    unparsed
                        .first_lines
                        .push(lines.get(row).copied().unwrap_or(0));
                }
                MISSING
            }
            MISSING => MISSING,
            id => {
                counts[id as usize] += 1;
                id
            }
        })
        .collect();
    (ids, unparsed)
}

/// Interns raw texts in first-seen order: the index, the distinct texts, and each value's id.
fn intern_raw(vals: &Texts) -> (FastMap<&str, u32>, Vec<&str>, Vec<u32>) {
    let mut index: FastMap<&str, u32> = FastMap::default();
    let mut raw: Vec<&str> = Vec::new();
    let ids = vals
        .iter()
        .map(|v| {
            *index.entry(v).or_insert_with(|| {
                raw.push(v);
                (raw.len() - 1) as u32
            })
        })
        .collect();
    (index, raw, ids)
}

/// With `unparsed = "stop"`: the error for the first value that did not parse (left table
/// first), naming the file, line and column, with examples in that side's date order.
fn stop_on_unparsed(fv: &FieldValues, left: &Table, right: &Table) -> Result<()> {
    for (u, table, column, is_left) in [
        (&fv.left_unparsed, left, fv.spec.left_column(), true),
        (&fv.right_unparsed, right, fv.spec.right_column(), false),
    ] {
        let Some(&line) = u.first_lines.first() else {
            continue;
        };
        let what = if fv.spec.method == Method::Date {
            format!(
                "not a date (expected e.g. {})",
                fv.spec.date_order_of(is_left).examples()
            )
        } else {
            "not a finite number".to_string()
        };
        return Err(table
            .locate(Error::input(what), line)
            .with_file(&table.path)
            .with_column(column));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn column(vals: &[&str]) -> Table {
        let mut columns = HashMap::new();
        columns.insert(
            "a".to_string(),
            vals.iter().map(|v| v.to_string()).collect(),
        );
        Table {
            path: "t".into(),
            ids: (0..vals.len()).map(|i| i.to_string()).collect(),
            columns,
            header: vec!["a".into()],
            lines: (0..vals.len() as u64).map(|i| i + 2).collect(),
            bytes: 0,
            sha256: String::new(),
            place: "line",
        }
    }

    #[test]
    fn recodes_apply_per_side_after_cleaning() {
        // The left side's "1"/"2" and the right side's words meet as one dictionary of codes;
        // "9" maps to "" and so is missing.
        let spec = FieldSpec {
            left_recode: [("1", "M"), ("2", "F"), ("9", "")]
                .iter()
                .map(|(a, b)| (a.to_string(), b.to_string()))
                .collect(),
            right_recode: [("Male", "m"), ("FEMALE", "f")]
                .iter()
                .map(|(a, b)| (a.to_string(), b.to_string()))
                .collect(),
            ..FieldSpec::key_column("a")
        };
        let r = build(
            &column(&["1", "2", "9", " 1 ", "m"]),
            &column(&["female", "Male", "1", "M"]),
            &[spec],
            &[],
        )
        .unwrap();
        let f = &r.fields[0];
        assert_eq!(f.dict, vec!["m", "f", "1"]);
        assert_eq!(f.left, vec![0, 1, MISSING, 0, 0]);
        assert_eq!(f.right, vec![1, 0, 2, 0]);
    }

    #[test]
    fn dates_per_side_meet_in_iso_form() {
        // 3 April 1980 is 03/04/1980 on the dmy left and 04/03/1980 on the mdy right.
        let spec = FieldSpec {
            method: Method::Date,
            normalize: None,
            left_date_order: Some("dmy".into()),
            right_date_order: Some("mdy".into()),
            ..FieldSpec::key_column("a")
        };
        let r = build(
            &column(&["03/04/1980", "21/07/1984", "soon", "1975", "x"]),
            &column(&["04/03/1980", "07/21/1984", "April 3, 1980", "later"]),
            &[spec],
            &[],
        )
        .unwrap();
        let f = &r.fields[0];
        assert_eq!(f.dict, vec!["1980-04-03", "1984-07-21", "1975"]);
        assert_eq!(f.left, vec![0, 1, MISSING, 2, MISSING]);
        assert_eq!(f.right, vec![0, 1, 0, MISSING]);
        assert_eq!(f.dates.len(), f.dict.len());
        assert_eq!(
            f.left_unparsed,
            Unparsed {
                count: 2,
                first_lines: vec![4, 6],
                place: "line",
            }
        );
        assert_eq!(f.right_unparsed.count, 1);
        assert_eq!(
            f.unparsed_warning(true).as_deref(),
            Some("field `a`: 2 values in the left table are not dates and were taken as missing (lines 4, 6); set `unparsed = \"stop\"` to stop instead")
        );
        assert_eq!(
            f.unparsed_warning(false).as_deref().map(|w| w.contains(
                "1 value in the right table is not a date and was taken as missing (line 5)"
            )),
            Some(true)
        );
    }

    #[test]
    fn unparsed_stop_names_the_first_bad_cell() {
        let spec = FieldSpec {
            method: Method::Number,
            normalize: None,
            unparsed: Some("stop".into()),
            ..FieldSpec::key_column("a")
        };
        let e = build(&column(&["1", "2"]), &column(&["3", "many"]), &[spec], &[])
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert_eq!(e, "t: line 3: column a: not a finite number");
    }

    #[test]
    fn dictionary_in_cleaned_first_seen_order() {
        // Raw texts that clean to one value share its id; ids follow the first row (left
        // table first) that gives each cleaned value, as a row-by-row interning would.
        let left = column(&["Bo", "", "ANN", "bo", "..."]);
        let right = column(&["ann", "Cy", "Ann", "BO"]);
        let spec = FieldSpec {
            method: Method::Exact,
            ..FieldSpec::key_column("a")
        };
        let r = build(&left, &right, &[spec], &[]).unwrap();
        let f = &r.fields[0];
        assert_eq!(f.dict, vec!["bo", "ann", "cy"]);
        assert_eq!(f.left, vec![0, MISSING, 1, 0, MISSING]);
        assert_eq!(f.right, vec![1, 2, 1, 0]);
        assert_eq!(f.left_counts, vec![2, 1, 0]);
        assert_eq!(f.right_counts, vec![1, 2, 1]);
    }
}
