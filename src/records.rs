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
pub fn build(left: &Table, right: &Table, specs: &[FieldSpec]) -> Result<Records> {
    let fields = specs
        .par_iter()
        .map(|spec| build_field(left, right, spec))
        .collect::<Result<Vec<_>>>()?;
    Ok(Records {
        left_ids: left.ids.clone(),
        right_ids: right.ids.clone(),
        fields,
    })
}

fn build_field(left: &Table, right: &Table, spec: &FieldSpec) -> Result<FieldValues> {
    let how = spec.normalize();
    let clean_all = |t: &Table, col: &str| -> Vec<String> {
        t.values(col)
            .par_iter()
            .map(|v| text::clean(v, how, &spec.drop_tokens))
            .collect()
    };
    let lvals = clean_all(left, spec.left_column());
    let rvals = clean_all(right, spec.right_column());
    let mut index: HashMap<&str, u32> = HashMap::new();
    let mut dict: Vec<String> = Vec::new();
    let mut counts: Vec<[u32; 2]> = Vec::new();
    let l = intern(&lvals, &mut index, &mut dict, &mut counts, 0);
    let r = intern(&rvals, &mut index, &mut dict, &mut counts, 1);
    let mut fv = FieldValues {
        spec: spec.clone(),
        dict,
        dates: Vec::new(),
        numbers: Vec::new(),
        left: l,
        right: r,
        left_counts: counts.iter().map(|c| c[0]).collect(),
        right_counts: counts.iter().map(|c| c[1]).collect(),
    };
    match spec.method {
        Method::Date => {
            let order = DateOrder::from_config(spec.date_order.as_deref());
            let parsed: Vec<Option<Date>> =
                fv.dict.iter().map(|v| text::parse_date(v, order)).collect();
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
                .iter()
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

/// Maps each value to its dictionary index (adding new ones), counting per side.
fn intern<'a>(
    vals: &'a [String],
    index: &mut HashMap<&'a str, u32>,
    dict: &mut Vec<String>,
    counts: &mut Vec<[u32; 2]>,
    side: usize,
) -> Vec<u32> {
    let mut out = Vec::with_capacity(vals.len());
    for v in vals {
        if v.is_empty() {
            out.push(MISSING);
            continue;
        }
        let id = *index.entry(v.as_str()).or_insert_with(|| {
            dict.push(v.clone());
            counts.push([0, 0]);
            (dict.len() - 1) as u32
        });
        counts[id as usize][side] += 1;
        out.push(id);
    }
    out
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
