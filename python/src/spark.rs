//! The native pieces of the Spark entry point (`dovetail/spark.py`): each one works on one
//! partition's Arrow batch and gives back Arrow, so that Spark does the distribution and the
//! library does each piece exactly as a single-machine run would.
//!
//! - [`block_keys`]: one table's records' key text per blocking pass (the core's own
//!   transforms), for Spark to join on;
//! - [`block_passes`]: each pass's name and block cap;
//! - [`candidate_pairs`]: the single-machine blocking's pairs, the reference the Spark join is
//!   tested against;
//! - [`read_columns`]: the columns each table needs;
//! - [`pattern_counts`]: one partition's pairs compared, as agreement-pattern counts (they
//!   add across partitions); [`local_pattern_counts`]: the single machine's, the reference.

use crate::{config_for, errors, frames};
use arrow_array::{ArrayRef, Int16Array, Int64Array, RecordBatch, StringArray};
use dovetail::block::Candidates;
use dovetail::io::Table;
use dovetail::pipeline;
use dovetail::records::Records;
use pyo3::prelude::*;
use std::path::PathBuf;
use std::sync::Arc;

/// One table's blocking keys: a table of `id` (text), `pass` (the pass's position, from 0)
/// and `key` (its text), one row per record and pass with a key. `left` says which table of
/// the config the frame is.
#[pyfunction]
#[pyo3(signature = (table, config_path, config_json, left))]
pub fn block_keys(
    py: Python<'_>,
    table: &Bound<'_, PyAny>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
    left: bool,
) -> PyResult<frames::Stream> {
    let source = Some(frames::source(py, table, left)?);
    let (l, r) = if left {
        (&source, &None)
    } else {
        (&None, &source)
    };
    let config = config_for(config_path, config_json, l, r).map_err(errors::to_py)?;
    let batch = py
        .detach(move || -> dovetail::Result<RecordBatch> {
            let table = frames::table(source, &config, left)?;
            let pipeline::SideKeys { ids, keys, .. } = pipeline::side_keys(&config, &table, left)?;
            let (mut id, mut pass, mut key) = (Vec::new(), Vec::new(), Vec::new());
            for (p, texts) in keys.iter().enumerate() {
                for (r, k) in texts.iter().enumerate() {
                    if let Some(k) = k {
                        id.push(&ids[r]);
                        pass.push(p as i16);
                        key.push(k.as_str());
                    }
                }
            }
            let columns: Vec<(&str, ArrayRef)> = vec![
                ("id", Arc::new(StringArray::from(id))),
                ("pass", Arc::new(Int16Array::from(pass))),
                ("key", Arc::new(StringArray::from(key))),
            ];
            RecordBatch::try_from_iter(columns)
                .map_err(|e| dovetail::Error::input(format!("cannot build the key table: {e}")))
        })
        .map_err(errors::to_py)?;
    Ok(frames::Stream::new(batch))
}

/// Each blocking pass of the config: (name, the cap on one block's pairs).
#[pyfunction]
#[pyo3(signature = (config_path, config_json))]
pub fn block_passes(
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
) -> PyResult<Vec<(String, u64)>> {
    let placeholder = Some(frames::Source::Path(PathBuf::new()));
    let config =
        config_for(config_path, config_json, &placeholder, &placeholder).map_err(errors::to_py)?;
    let passes = pipeline::passes_from(&config, &config.block, "block").map_err(errors::to_py)?;
    Ok(passes
        .into_iter()
        .map(|p| (p.name, p.max_block_pairs))
        .collect())
}

/// The candidate pairs of the config's blocking on one machine: a table of `left_id`,
/// `right_id` and `passes` (bit p set when pass p found the pair).
#[pyfunction]
#[pyo3(signature = (left, right, config_path, config_json))]
pub fn candidate_pairs(
    py: Python<'_>,
    left: Option<&Bound<'_, PyAny>>,
    right: Option<&Bound<'_, PyAny>>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
) -> PyResult<frames::Stream> {
    let batch = local_blocking(
        py,
        left,
        right,
        config_path,
        config_json,
        |records, cands| {
            let lid: Vec<&str> = cands
                .left
                .iter()
                .map(|&a| &records.left_ids[a as usize])
                .collect();
            let rid: Vec<&str> = cands
                .right
                .iter()
                .map(|&b| &records.right_ids[b as usize])
                .collect();
            let mask: Vec<i64> = cands.passes.iter().map(|&m| m as i64).collect();
            let columns: Vec<(&str, ArrayRef)> = vec![
                ("left_id", Arc::new(StringArray::from(lid))),
                ("right_id", Arc::new(StringArray::from(rid))),
                ("passes", Arc::new(Int64Array::from(mask))),
            ];
            RecordBatch::try_from_iter(columns)
                .map_err(|e| dovetail::Error::input(format!("cannot build the pair table: {e}")))
        },
    )?;
    Ok(frames::Stream::new(batch))
}

/// The single machine's blocking of the two tables (frames, paths, or the config's paths),
/// then `then` on its records and pairs, on a thread without the GIL.
fn local_blocking<T: Send>(
    py: Python<'_>,
    left: Option<&Bound<'_, PyAny>>,
    right: Option<&Bound<'_, PyAny>>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
    then: impl FnOnce(Records, Candidates) -> dovetail::Result<T> + Send,
) -> PyResult<T> {
    local_tables(py, left, right, config_path, config_json, |config, l, r| {
        let (records, cands) = pipeline::block_only(config, Some((l, r)))?;
        then(records, cands)
    })
}

/// The two tables (frames, paths, or the config's paths) read as the CLI reads them, then
/// `then` on the config and the tables, on a thread without the GIL.
fn local_tables<T: Send>(
    py: Python<'_>,
    left: Option<&Bound<'_, PyAny>>,
    right: Option<&Bound<'_, PyAny>>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
    then: impl FnOnce(dovetail::config::Config, Table, Table) -> dovetail::Result<T> + Send,
) -> PyResult<T> {
    let left = left.map(|x| frames::source(py, x, true)).transpose()?;
    let right = right.map(|x| frames::source(py, x, false)).transpose()?;
    let config = config_for(config_path, config_json, &left, &right).map_err(errors::to_py)?;
    py.detach(move || {
        let l = frames::table(left, &config, true)?;
        let r = frames::table(right, &config, false)?;
        then(config, l, r)
    })
    .map_err(errors::to_py)
}

/// The columns each table needs (its id first): ([left], [right]).
#[pyfunction]
#[pyo3(signature = (config_path, config_json))]
pub fn read_columns(
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
) -> PyResult<(Vec<String>, Vec<String>)> {
    let placeholder = Some(frames::Source::Path(PathBuf::new()));
    let config =
        config_for(config_path, config_json, &placeholder, &placeholder).map_err(errors::to_py)?;
    let side = |left: bool| -> PyResult<Vec<String>> {
        let spec = pipeline::read_spec(&config, left).map_err(errors::to_py)?;
        let mut cols = vec![spec.id];
        for c in spec.columns.into_iter().chain(spec.optional) {
            if !cols.contains(&c) {
                cols.push(c);
            }
        }
        Ok(cols)
    };
    Ok((side(true)?, side(false)?))
}

/// A pattern as a text key: its levels joined with `,`, `m` for a missing value.
fn pattern_key(levels: &[u8]) -> String {
    levels
        .iter()
        .map(|&l| {
            if l == dovetail::compare::MISSING_LEVEL {
                "m".to_string()
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join(",")
}

fn keyed(counts: dovetail::compare::PatternCounts) -> Vec<(String, f64)> {
    counts
        .patterns
        .iter()
        .map(|p| pattern_key(p))
        .zip(counts.counts)
        .collect()
}

/// One partition's pairs compared: pair i is row `left_rows[i]` of `left` with row
/// `right_rows[i]` of `right` (each table holding every record once); returns (pattern key,
/// pairs) for each pattern seen.
#[pyfunction]
#[pyo3(signature = (left, right, left_rows, right_rows, config_json))]
pub fn pattern_counts(
    py: Python<'_>,
    left: &Bound<'_, PyAny>,
    right: &Bound<'_, PyAny>,
    left_rows: Vec<u32>,
    right_rows: Vec<u32>,
    config_json: &str,
) -> PyResult<Vec<(String, f64)>> {
    partition_tables(py, left, right, config_json, move |config, l, r| {
        let counts = pipeline::pair_pattern_counts(config, l, r, left_rows, right_rows)?;
        Ok(keyed(counts))
    })
}

/// One partition's two tables (frames) read as tables of the config given as JSON, then
/// `then` on them, on a thread without the GIL.
pub fn partition_tables<T: Send>(
    py: Python<'_>,
    left: &Bound<'_, PyAny>,
    right: &Bound<'_, PyAny>,
    config_json: &str,
    then: impl FnOnce(&dovetail::config::Config, &Table, &Table) -> dovetail::Result<T> + Send,
) -> PyResult<T> {
    let left = Some(frames::source(py, left, true)?);
    let right = Some(frames::source(py, right, false)?);
    let config = config_for(None, Some(config_json), &left, &right).map_err(errors::to_py)?;
    py.detach(move || {
        let l = frames::table(left, &config, true)?;
        let r = frames::table(right, &config, false)?;
        then(&config, &l, &r)
    })
    .map_err(errors::to_py)
}

/// The single machine's pattern counts of the config's candidate pairs.
#[pyfunction]
#[pyo3(signature = (left, right, config_path, config_json))]
pub fn local_pattern_counts(
    py: Python<'_>,
    left: Option<&Bound<'_, PyAny>>,
    right: Option<&Bound<'_, PyAny>>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
) -> PyResult<Vec<(String, f64)>> {
    local_blocking(
        py,
        left,
        right,
        config_path,
        config_json,
        |records, cands| {
            Ok(keyed(
                dovetail::compare::compare(&records, &cands).pattern_counts(),
            ))
        },
    )
}

/// A pattern key of [`pattern_key`] back as levels.
fn levels_of_key(key: &str) -> dovetail::Result<Vec<u8>> {
    key.split(',')
        .map(|x| match x {
            "m" => Ok(dovetail::compare::MISSING_LEVEL),
            x => x
                .parse::<u8>()
                .map_err(|_| dovetail::Error::input(format!("`{key}` is not a pattern key"))),
        })
        .collect()
}

/// The fit's first step (EM) on the driver from the summed pattern counts, for tables of
/// `n_left` and `n_right` records: the fitted laws as JSON (p, m, u, missing shares,
/// log-likelihood, iterations).
#[pyfunction]
#[pyo3(signature = (patterns, n_left, n_right, config_json))]
pub fn fit_counts(
    py: Python<'_>,
    patterns: Vec<(String, f64)>,
    n_left: usize,
    n_right: usize,
    config_json: &str,
) -> PyResult<String> {
    let placeholder = Some(frames::Source::Path(PathBuf::new()));
    let config =
        config_for(None, Some(config_json), &placeholder, &placeholder).map_err(errors::to_py)?;
    py.detach(move || -> dovetail::Result<String> {
        let patterns = patterns
            .into_iter()
            .map(|(k, n)| Ok((levels_of_key(&k)?, n)))
            .collect::<dovetail::Result<Vec<_>>>()?;
        let fit = pipeline::fit_from_counts(&config, patterns, n_left, n_right)?;
        serde_json::to_string(&fit)
            .map_err(|e| dovetail::Error::input(format!("cannot write the fit: {e}")))
    })
    .map_err(errors::to_py)
}

/// The single machine's first fit (`plain_fit`, before the one-to-one refinement) as JSON:
/// the reference of [`fit_counts`].
#[pyfunction]
#[pyo3(signature = (left, right, config_path, config_json))]
pub fn local_plain_fit(
    py: Python<'_>,
    left: Option<&Bound<'_, PyAny>>,
    right: Option<&Bound<'_, PyAny>>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
) -> PyResult<String> {
    local_tables(py, left, right, config_path, config_json, |config, l, r| {
        let budget = dovetail::budget::Budget::Off;
        let prep = pipeline::prepare_given(config, &pipeline::Silent, &budget, Some((l, r)))?;
        serde_json::to_string(&prep.plain_fit)
            .map_err(|e| dovetail::Error::input(format!("cannot write the fit: {e}")))
    })
}
