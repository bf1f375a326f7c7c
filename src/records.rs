//! The two tables' compared values, cleaned once per record and interned.
//!
//! In: the two [`Table`]s and the field specs. Out: [`Records`], where each field holds one
//! dictionary of distinct cleaned values shared by both sides and, per record, an index into it
//! (or [`MISSING`]). Exact agreement is then an integer comparison, value frequencies come for
//! free, and memory is one `u32` per record and field plus the distinct values. Dates and
//! numbers are parsed once per distinct value; text that does not parse is an error naming the
//! file, line and column.

use crate::config::{FieldSpec, Method};
use crate::error::{Error, Result};
use crate::io::Table;
use crate::text::{self, Date, DateOrder};
use rayon::prelude::*;
use std::collections::HashMap;

/// Marks a missing value in [`FieldValues::left`] and [`FieldValues::right`].
pub const MISSING: u32 = u32::MAX;

/// One field's values on both sides.
#[derive(Debug, Clone)]
pub struct FieldValues {
    /// The field's spec from the config.
    pub spec: FieldSpec,
    /// Distinct cleaned values, in first-seen order (left table first).
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
    pub left_ids: Vec<String>,
    /// Right record ids in row order.
    pub right_ids: Vec<String>,
    /// One entry per configured field, in config order.
    pub fields: Vec<FieldValues>,
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
}

/// Cleans, interns and parses every configured field of both tables (fields in parallel).
///
/// When several fields hold bad values, the error is that of the first field in config order.
pub fn build(left: &Table, right: &Table, specs: &[FieldSpec]) -> Result<Records> {
    let (fields, (left_ids, right_ids)) = rayon::join(
        || {
            specs
                .par_iter()
                .map(|spec| build_field(left, right, spec))
                .collect::<Vec<Result<FieldValues>>>()
        },
        || rayon::join(|| left.ids.clone(), || right.ids.clone()),
    );
    Ok(Records {
        left_ids,
        right_ids,
        fields: fields.into_iter().collect::<Result<Vec<_>>>()?,
    })
}

/// A fast hash with a fixed seed: the keys come from the user's own files, and a fixed seed
/// keeps runs repeatable.
type FastMap<K, V> = HashMap<K, V, foldhash::fast::FixedState>;

fn build_field(left: &Table, right: &Table, spec: &FieldSpec) -> Result<FieldValues> {
    let how = spec.normalize();
    let lraw = left.values(spec.left_column());
    let rraw = right.values(spec.right_column());
    // The raw texts are interned first (left rows, then right rows) and each distinct one is
    // cleaned once: names, dates and codes repeat, so this cleans a fraction of the cells. The
    // cleaned dictionary is then built in raw first-seen order, which is the cleaned values'
    // own first-seen order over the rows (a cleaned value first appears with the raw text that
    // first gives it). The two sides are interned at the same time, then the right side's
    // texts not seen on the left are appended in their right first-seen order.
    let ((left_index, mut raw, lraw_ids), (_, right_raw, right_local)) =
        rayon::join(|| intern_raw(&lraw), || intern_raw(&rraw));
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
    let rraw_ids: Vec<u32> = right_local
        .iter()
        .map(|&r| right_to_raw[r as usize])
        .collect();
    let cleaned: Vec<String> = raw
        .par_iter()
        .with_min_len(256)
        .map(|v| text::clean(v, how, &spec.drop_tokens))
        .collect();
    let mut index: FastMap<&str, u32> = FastMap::default();
    let mut dict: Vec<String> = Vec::new();
    let clean_id: Vec<u32> = cleaned
        .iter()
        .map(|c| {
            if c.is_empty() {
                return MISSING;
            }
            *index.entry(c.as_str()).or_insert_with(|| {
                dict.push(c.clone());
                (dict.len() - 1) as u32
            })
        })
        .collect();
    let mut left_counts = vec![0u32; dict.len()];
    let mut right_counts = vec![0u32; dict.len()];
    let ids = |raw_ids: &[u32], counts: &mut [u32]| -> Vec<u32> {
        raw_ids
            .iter()
            .map(|&r| {
                let id = clean_id[r as usize];
                if id != MISSING {
                    counts[id as usize] += 1;
                }
                id
            })
            .collect()
    };
    let l = ids(&lraw_ids, &mut left_counts);
    let r = ids(&rraw_ids, &mut right_counts);
    let mut fv = FieldValues {
        spec: spec.clone(),
        dict,
        dates: Vec::new(),
        numbers: Vec::new(),
        left: l,
        right: r,
        left_counts,
        right_counts,
    };
    match spec.method {
        Method::Date => {
            let order = DateOrder::from_config(spec.date_order.as_deref());
            let parsed: Vec<Option<Date>> = fv
                .dict
                .par_iter()
                .with_min_len(1024)
                .map(|v| text::parse_date(v, order))
                .collect();
            if let Some(bad) = parsed.iter().position(Option::is_none) {
                return Err(parse_error(
                    &fv,
                    left,
                    right,
                    bad,
                    "not a date (expected e.g. 1984-07-21, 19840721, 1984-07 or 1984)",
                ));
            }
            fv.dates = parsed.into_iter().flatten().collect();
        }
        Method::Number => {
            let parsed: Vec<Option<f64>> = fv
                .dict
                .par_iter()
                .with_min_len(1024)
                .map(|v| v.parse::<f64>().ok().filter(|x| x.is_finite()))
                .collect();
            if let Some(bad) = parsed.iter().position(Option::is_none) {
                return Err(parse_error(&fv, left, right, bad, "not a finite number"));
            }
            fv.numbers = parsed.into_iter().flatten().collect();
        }
        _ => {}
    }
    Ok(fv)
}

/// Interns raw texts in first-seen order: the index, the distinct texts, and each value's id.
fn intern_raw(vals: &[String]) -> (FastMap<&str, u32>, Vec<&str>, Vec<u32>) {
    let mut index: FastMap<&str, u32> = FastMap::default();
    let mut raw: Vec<&str> = Vec::new();
    let ids = vals
        .iter()
        .map(|v| {
            *index.entry(v.as_str()).or_insert_with(|| {
                raw.push(v);
                (raw.len() - 1) as u32
            })
        })
        .collect();
    (index, raw, ids)
}

fn parse_error(fv: &FieldValues, left: &Table, right: &Table, bad: usize, what: &str) -> Error {
    let bad = bad as u32;
    if let Some(i) = fv.left.iter().position(|&v| v == bad) {
        Error::input(what)
            .with_file(&left.path)
            .with_line(left.lines[i])
            .with_column(fv.spec.left_column())
    } else {
        let j = fv.right.iter().position(|&v| v == bad).unwrap_or(0);
        Error::input(what)
            .with_file(&right.path)
            .with_line(right.lines.get(j).copied().unwrap_or(0))
            .with_column(fv.spec.right_column())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Normalize;

    #[test]
    fn dictionary_in_cleaned_first_seen_order() {
        // Raw texts that clean to one value share its id; ids follow the first row (left
        // table first) that gives each cleaned value, as a row-by-row interning would.
        let column = |vals: &[&str]| -> Table {
            let mut columns = HashMap::new();
            columns.insert(
                "a".to_string(),
                vals.iter().map(|v| v.to_string()).collect(),
            );
            Table {
                path: "t".into(),
                ids: (0..vals.len()).map(|i| i.to_string()).collect(),
                columns,
                lines: (0..vals.len() as u64).map(|i| i + 2).collect(),
                bytes: 0,
                sha256: String::new(),
            }
        };
        let left = column(&["Bo", "", "ANN", "bo", "..."]);
        let right = column(&["ann", "Cy", "Ann", "BO"]);
        let spec = FieldSpec {
            name: "a".into(),
            left: None,
            right: None,
            method: Method::Exact,
            bands: None,
            relative: false,
            frequency: false,
            normalize: Some(Normalize::Name),
            drop_tokens: vec![],
            date_order: None,
        };
        let r = build(&left, &right, &[spec]).unwrap();
        let f = &r.fields[0];
        assert_eq!(f.dict, vec!["bo", "ann", "cy"]);
        assert_eq!(f.left, vec![0, MISSING, 1, 0, MISSING]);
        assert_eq!(f.right, vec![1, 2, 1, 0]);
        assert_eq!(f.left_counts, vec![2, 1, 0]);
        assert_eq!(f.right_counts, vec![1, 2, 1]);
    }
}
