//! Likely duplicate people inside one table, which the one-to-one model does not expect.
//!
//! In: a prepared run (its tables, fields, passes and pooled fitted laws). Out: per table the
//! expected number of pairs of its records that are the same person, with a 95% interval. The
//! run's blocking passes are run on the table against itself; each pair of two different
//! records is weighed with the run's pooled m and u (the same laws describe two records of one
//! person, and two records of two people, whichever tables they come from); the share of such
//! pairs that are duplicates is fitted by EM with m and u held (one parameter), and the
//! expected count is the sum of the pairs' posteriors. Counts only: no value leaves this
//! module.
//!
//! Large tables are estimated from a seeded sample of s of their n records: the passes pair
//! each sampled record with every record of its table (the same blocks as the whole table
//! gives it), and with X_a the sum of the posteriors of record a's pairs, the count of
//! unordered pairs is n / (2 s) sum over the sample of X_a (each pair is counted from both of
//! its records; expansion estimator of a total from a simple random sample of records, with
//! the variance (1 - s / n) S^2 n^2 / (4 s) from the sample variance S^2 of X_a; Cochran,
//! Sampling Techniques, for a total from a simple random sample; normal approximation). The
//! duplicate share is fitted on the sampled records' pairs, a sample of all the pairs. The
//! sample is as large as fits [`MAX_PAIRS`] pairs at the run's mean candidates per record;
//! small tables take every record, and the count is then the whole table's (interval of width
//! 0). A sorted-neighbourhood pass pairs a record's left copy with another's right copy, not
//! always both ways round; a pair is taken when either way round is found (the whole-table
//! count took only the way with the lower record first, a few pairs fewer).

use crate::block::{self, Candidates};
use crate::compare::{Comparator, MISSING_LEVEL};
use crate::config::KeySource;
use crate::error::Result;
use crate::pipeline::{self, Prepared};
use crate::records::{FieldValues, Records};
use crate::rng::Rng;
use crate::texts::Texts;
use rayon::prelude::*;

/// Expected duplicate pairs in each table.
#[derive(Debug, Clone, Copy, serde::Serialize)]
pub struct Duplicates {
    /// Expected pairs of left records that are one person.
    pub left_pairs: f64,
    /// Expected pairs of right records that are one person.
    pub right_pairs: f64,
    /// 95% interval of `left_pairs` (from the sample of records; a point when all are taken).
    pub left_interval: [f64; 2],
    /// 95% interval of `right_pairs`.
    pub right_interval: [f64; 2],
}

/// Share of a table's records in duplicate pairs from which the run warns and the model check
/// counts the one-to-one assumption as broken.
pub const WARN_SHARE: f64 = 0.01;

/// About the most within-table pairs weighed per table (record pairs counted from each side).
pub const MAX_PAIRS: usize = 150_000;

/// One table's values of a field as a self-join's record set: the `sample` rows of `all` on
/// the left, every row on the right; an empty copy when no pass reads the field (`on`).
fn self_join_copy(fv: &FieldValues, all: &[u32], sample: &[u32], on: bool) -> FieldValues {
    FieldValues {
        spec: fv.spec.clone(),
        dict: if on { fv.dict.clone() } else { Vec::new() },
        dates: if on { fv.dates.clone() } else { Vec::new() },
        numbers: if on { fv.numbers.clone() } else { Vec::new() },
        left: if on {
            sample.iter().map(|&a| all[a as usize]).collect()
        } else {
            Vec::new()
        },
        right: if on { all.to_vec() } else { Vec::new() },
        left_counts: Vec::new(),
        right_counts: Vec::new(),
        left_unparsed: Default::default(),
        right_unparsed: Default::default(),
    }
}

/// One table's estimate: the count and its interval.
struct Within {
    pairs: f64,
    interval: [f64; 2],
}

fn within(prep: &Prepared, left_side: bool) -> Result<Within> {
    fn side(fv: &FieldValues, left_side: bool) -> &[u32] {
        if left_side {
            &fv.left
        } else {
            &fv.right
        }
    }
    let values = |fv| side(fv, left_side);
    let n = if left_side {
        prep.records.n_left()
    } else {
        prep.records.n_right()
    };
    let passes = pipeline::passes_from(&prep.config, &prep.config.block, "block")?;
    let zero = Within {
        pairs: 0.0,
        interval: [0.0, 0.0],
    };
    if n < 2 || passes.is_empty() {
        return Ok(zero);
    }
    // The sample: at the run's mean candidates per record, about MAX_PAIRS pairs.
    let degree = (prep.cands.len() as f64 / n as f64).max(1.0);
    let s = ((MAX_PAIRS as f64 / degree).ceil() as usize).clamp(2.min(n), n);
    let sample: Vec<u32> = if s >= n {
        (0..n as u32).collect()
    } else {
        let mut order: Vec<u32> = (0..n as u32).collect();
        Rng::new(prep.config.assess.seed ^ if left_side { 0xD0B1 } else { 0xD0B2 })
            .shuffle(&mut order);
        let mut v = order[..s].to_vec();
        v.sort_unstable();
        v
    };
    // The table's interned values on both sides of a new record set, the sampled records on
    // the left: only the dictionaries of the fields and key-only columns the passes read are
    // copied.
    let used = |s: KeySource| passes.iter().any(|p| p.parts.iter().any(|q| q.source == s));
    let copy = |fvs: &[FieldValues], source: fn(usize) -> KeySource| -> Vec<FieldValues> {
        fvs.iter()
            .enumerate()
            .map(|(k, fv)| self_join_copy(fv, side(fv, left_side), &sample, used(source(k))))
            .collect()
    };
    let windowed = passes.iter().any(|p| p.window.is_some());
    let recs = Records {
        left_ids: Texts::blank(sample.len()),
        right_ids: Texts::blank(n),
        fields: copy(&prep.records.fields, KeySource::Field),
        key_columns: copy(&prep.records.key_columns, KeySource::Column),
    };
    // Key passes give a sampled record the same blocks whatever else is on its side; a
    // sorted-neighbourhood window does not, so window passes run on the whole table and keep
    // the sampled records' pairs.
    let key_passes: Vec<block::Pass> = passes
        .iter()
        .filter(|p| p.window.is_none())
        .cloned()
        .collect();
    let (mut cands, _) = block::candidates(&recs, &key_passes);
    if windowed {
        let mut whole = recs;
        whole.left_ids = Texts::blank(n);
        for copied in whole.fields.iter_mut().chain(whole.key_columns.iter_mut()) {
            copied.left = copied.right.clone();
        }
        let window_passes: Vec<block::Pass> = passes
            .iter()
            .filter(|p| p.window.is_some())
            .cloned()
            .collect();
        let (w, _) = block::candidates(&whole, &window_passes);
        let mut merged: Vec<(u32, u32)> = (0..cands.len())
            .map(|i| (cands.left[i], cands.right[i]))
            .collect();
        // A window pairs a left copy with a right copy, not always both ways round: a pair
        // counts when either way round is found.
        for i in 0..w.len() {
            for (x, y) in [(w.left[i], w.right[i]), (w.right[i], w.left[i])] {
                if let Ok(k) = sample.binary_search(&x) {
                    merged.push((k as u32, y));
                }
            }
        }
        merged.sort_unstable();
        merged.dedup();
        cands = Candidates {
            left: merged.iter().map(|p| p.0).collect(),
            right: merged.iter().map(|p| p.1).collect(),
            passes: vec![0; merged.len()],
        };
    }
    // Weights straight from the interned values: the pooled laws' ln(m / u) per level.
    let comparators: Vec<Comparator> = prep
        .records
        .fields
        .iter()
        .map(Comparator::for_field)
        .collect();
    let level_weights = prep.fit.level_weights();
    let fields = &prep.records.fields;
    let weigh = |a: usize, b: usize| -> f64 {
        let mut w = 0.0;
        for ((c, fv), lw) in comparators.iter().zip(fields).zip(&level_weights) {
            let ids = values(fv);
            let l = c.level(fv, ids[a], ids[b]);
            if l != MISSING_LEVEL {
                w += lw[l as usize];
            }
        }
        w
    };
    // Per sampled record, its pairs' weights (itself left out).
    let starts: Vec<usize> = (0..=sample.len())
        .map(|k| cands.left.partition_point(|&x| (x as usize) < k))
        .collect();
    let per_record: Vec<Vec<f64>> = (0..sample.len())
        .into_par_iter()
        .map(|k| {
            let a = sample[k] as usize;
            cands.right[starts[k]..starts[k + 1]]
                .iter()
                .filter(|&&b| b as usize != a)
                .map(|&b| weigh(a, b as usize))
                .collect()
        })
        .collect();
    let n_pairs: usize = per_record.iter().map(Vec::len).sum();
    if n_pairs == 0 {
        return Ok(zero);
    }
    // EM for the duplicate share alone: p <- mean posterior at p.
    let posterior = |w: f64, logit: f64| 1.0 / (1.0 + (-(w + logit)).exp());
    let mut p = 1e-3f64;
    for _ in 0..200 {
        let logit = (p / (1.0 - p)).ln();
        let sum: f64 = per_record
            .iter()
            .flatten()
            .map(|&w| posterior(w, logit))
            .sum();
        let next = (sum / n_pairs as f64).clamp(1e-12, 0.5);
        if (next - p).abs() < 1e-12 + 1e-6 * p {
            break;
        }
        p = next;
    }
    let logit = (p / (1.0 - p)).ln();
    let x: Vec<f64> = per_record
        .iter()
        .map(|ws| ws.iter().map(|&w| posterior(w, logit)).sum())
        .collect();
    let (total, se) = expansion(&x, n);
    Ok(Within {
        pairs: total,
        interval: [(total - 1.96 * se).max(0.0), total + 1.96 * se],
    })
}

/// The count of unordered pairs from per-record sums `x` of a simple random sample of the
/// table's `n` records (each pair counted from both records): n / (2 s) sum x, with its
/// standard error (n / 2) sqrt((1 - s / n) S^2 / s) from the sample variance S^2 (module doc).
fn expansion(x: &[f64], n: usize) -> (f64, f64) {
    let s = x.len() as f64;
    let nf = n as f64;
    if x.is_empty() {
        return (0.0, 0.0);
    }
    let sum: f64 = x.iter().sum();
    let total = nf / (2.0 * s) * sum;
    let mean = sum / s;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (s - 1.0).max(1.0);
    let se = nf / 2.0 * ((1.0 - s / nf).max(0.0) * var / s).sqrt();
    (total, se)
}

/// The expected duplicate pairs inside each table.
pub fn estimate(prep: &Prepared) -> Result<Duplicates> {
    let l = within(prep, true)?;
    let r = within(prep, false)?;
    Ok(Duplicates {
        left_pairs: l.pairs,
        right_pairs: r.pairs,
        left_interval: l.interval,
        right_interval: r.interval,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn expansion_is_unbiased_with_unbiased_variance() {
        // Oracle: every sample of 3 of 8 records enumerated. Under simple random sampling the
        // estimator's mean over all samples is the population total sum(x) / 2, and the mean
        // of its estimated variance equals its variance over the samples (the sample variance
        // is unbiased for S^2 with divisor n - 1; Cochran, Sampling Techniques).
        let pop = [0.0, 0.2, 1.9, 0.0, 0.7, 3.1, 0.05, 1.0];
        let n = pop.len();
        let want = pop.iter().sum::<f64>() / 2.0;
        let mut totals = Vec::new();
        let mut vars = Vec::new();
        for i in 0..n {
            for j in i + 1..n {
                for k in j + 1..n {
                    let (t, se) = expansion(&[pop[i], pop[j], pop[k]], n);
                    totals.push(t);
                    vars.push(se * se);
                }
            }
        }
        let m = totals.len() as f64;
        let mean = totals.iter().sum::<f64>() / m;
        let var = totals.iter().map(|t| (t - mean).powi(2)).sum::<f64>() / m;
        let mean_var = vars.iter().sum::<f64>() / m;
        assert!((mean - want).abs() < 1e-12, "{mean} vs {want}");
        assert!((mean_var - var).abs() < 1e-12, "{mean_var} vs {var}");
        // The whole table: the exact sum of the pairs and no sampling error.
        assert_eq!(expansion(&pop, n), (want, 0.0));
    }
}
