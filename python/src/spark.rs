//! The native pieces of the Spark entry point (`dovetail/spark.py`): each one works on one
//! partition's Arrow batch and gives back Arrow, so that Spark does the distribution and the
//! library does each piece exactly as a single-machine run would.
//!
//! - [`block_keys`]: one table's records' key text per blocking pass (the core's own
//!   transforms), for Spark to join on;
//! - [`block_passes`]: each pass's name and block cap;
//! - [`candidate_pairs`]: the single-machine blocking's pairs, the reference the Spark join is
//!   tested against.

use crate::{config_for, errors, frames};
use arrow_array::{ArrayRef, Int16Array, Int64Array, RecordBatch, StringArray};
use dovetail::pipeline;
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
    let left = left.map(|x| frames::source(py, x, true)).transpose()?;
    let right = right.map(|x| frames::source(py, x, false)).transpose()?;
    let config = config_for(config_path, config_json, &left, &right).map_err(errors::to_py)?;
    let batch = py
        .detach(move || -> dovetail::Result<RecordBatch> {
            let l = frames::table(left, &config, true)?;
            let r = frames::table(right, &config, false)?;
            let (records, cands) = pipeline::block_only(config, Some((l, r)))?;
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
        })
        .map_err(errors::to_py)?;
    Ok(frames::Stream::new(batch))
}
