//! Likely duplicate people inside one table, which the one-to-one model does not expect.
//!
//! In: a prepared run (its tables, fields, passes and pooled fitted laws). Out: per table the
//! expected number of pairs of its records that are the same person. The run's blocking
//! passes are run on the table against itself; each pair of two different records is
//! weighed with the run's pooled m and u (the same laws describe two records of one person,
//! and two records of two people, whichever tables they come from); the share of such pairs
//! that are duplicates is fitted by EM with m and u held (one parameter), and the expected
//! count is the sum of the pairs' posteriors. Counts only: no value leaves this module.

use crate::block::{self, Candidates};
use crate::compare;
use crate::error::Result;
use crate::pipeline::{self, Prepared};
use crate::records::{FieldValues, Records};

/// Expected duplicate pairs in each table.
#[derive(Debug, Clone, Copy, serde::Serialize)]
pub struct Duplicates {
    /// Expected pairs of left records that are one person.
    pub left_pairs: f64,
    /// Expected pairs of right records that are one person.
    pub right_pairs: f64,
}

/// Share of a table's records in duplicate pairs from which the run warns and the model check
/// counts the one-to-one assumption as broken.
pub const WARN_SHARE: f64 = 0.01;

fn within(prep: &Prepared, left_side: bool) -> Result<f64> {
    // The run's cleaned, interned values of one side on both sides of a new record set: no
    // value is cleaned again.
    let pick = |fv: &FieldValues| -> FieldValues {
        let (ids, counts) = if left_side {
            (&fv.left, &fv.left_counts)
        } else {
            (&fv.right, &fv.right_counts)
        };
        FieldValues {
            spec: fv.spec.clone(),
            dict: fv.dict.clone(),
            dates: fv.dates.clone(),
            numbers: fv.numbers.clone(),
            left: ids.clone(),
            right: ids.clone(),
            left_counts: counts.clone(),
            right_counts: counts.clone(),
        }
    };
    let ids = if left_side {
        &prep.records.left_ids
    } else {
        &prep.records.right_ids
    };
    let recs = Records {
        left_ids: ids.clone(),
        right_ids: ids.clone(),
        fields: prep.records.fields.iter().map(pick).collect(),
    };
    let passes = pipeline::passes_from(&prep.config, &prep.config.block, "block")?;
    let (all, _) = block::candidates(&recs, &passes);
    let mut cands = Candidates::default();
    for i in 0..all.len() {
        if all.left[i] < all.right[i] {
            cands.left.push(all.left[i]);
            cands.right.push(all.right[i]);
            cands.passes.push(all.passes[i]);
        }
    }
    if cands.is_empty() {
        return Ok(0.0);
    }
    let comparison = compare::compare(&recs, &cands);
    let no_frequency = vec![None; recs.fields.len()];
    let (weight, _) = crate::fit::pair_weights(
        &recs,
        &cands,
        &comparison,
        &prep.fit,
        None,
        &no_frequency,
        Some(&[0.0]),
    );
    // EM for the duplicate share alone: p <- mean posterior at p.
    let mut p = 1e-3f64;
    let mut sum = 0.0;
    for _ in 0..200 {
        let logit = (p / (1.0 - p)).ln();
        sum = weight
            .iter()
            .map(|w| 1.0 / (1.0 + (-(w + logit)).exp()))
            .sum::<f64>();
        let next = (sum / weight.len() as f64).clamp(1e-12, 0.5);
        if (next - p).abs() < 1e-12 + 1e-6 * p {
            break;
        }
        p = next;
    }
    Ok(sum)
}

/// The expected duplicate pairs inside each table.
pub fn estimate(prep: &Prepared) -> Result<Duplicates> {
    Ok(Duplicates {
        left_pairs: within(prep, true)?,
        right_pairs: within(prep, false)?,
    })
}
