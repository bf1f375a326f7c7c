//! Tuning blocking: the trade between pair completeness and the false degree, per scheme.
//!
//! In: a [`Prepared`] run (its records and its fitted laws) and blocking schemes. Out: per
//! scheme the pairs, d, the share of left records with a candidate, the estimated pair
//! completeness, the margin, the forecast error and the expected share of true pairs linked
//! correctly (completeness x (1 - forecast error)).
//!
//! Pair completeness is measured against the loosest reference there is, no blocking at all,
//! on a seeded sample of left records: each sampled record is compared with every right record,
//! and the fitted model gives each pair its probability of being the record's true partner
//! (one-to-one from the record's side: exp(theta) / (1 + sum exp(theta'))). A scheme's
//! completeness is the share of that probability mass its candidate pairs keep. The sample is
//! capped so that sample x right records stays below [`MAX_REFERENCE_PAIRS`].

use crate::block::{self, Candidates, Pass};
use crate::matching;
use crate::pipeline::{score, score_one_to_one, Prepared};
use crate::reliability::forecast::{self, ForecastOptions};
use crate::rng::Rng;
use serde::Serialize;
use std::time::Instant;

/// Most pairs compared for the reference sample.
pub const MAX_REFERENCE_PAIRS: usize = 5_000_000;

/// One row of the tune table.
#[derive(Debug, Clone, Serialize)]
pub struct SchemeResult {
    /// Scheme label.
    pub scheme: String,
    /// Candidate pairs.
    pub pairs: usize,
    /// Estimated false candidates over sqrt(|L| |R|).
    pub d: f64,
    /// Share of left records with at least one candidate.
    pub left_with_candidate: f64,
    /// Estimated share of true pairs among the candidates.
    pub completeness: f64,
    /// sqrt(d) B.
    pub margin: f64,
    /// Bootstrap forecast of the share of candidate true pairs not linked correctly.
    pub forecast_error: Option<f64>,
    /// completeness x (1 - forecast error).
    pub expected_correct: f64,
    /// Seconds to block, compare, match and forecast this scheme.
    pub seconds: f64,
}

/// Settings of the evaluation.
#[derive(Debug, Clone)]
pub struct TuneOptions {
    /// Left records in the reference sample (capped by [`MAX_REFERENCE_PAIRS`]).
    pub sample: usize,
    /// Seed of the sample and the bootstrap.
    pub seed: u64,
    /// Bootstrap replicates per scheme.
    pub replicates: usize,
}

/// The reference: sampled left records and, per sampled record, each right record's
/// probability of being its true partner (sparse: only above 1e-9).
struct Reference {
    sampled: Vec<u32>,
    partners: Vec<Vec<(u32, f64)>>,
}

fn reference(prep: &Prepared, opts: &TuneOptions) -> Reference {
    let (nl, nr) = (prep.records.n_left(), prep.records.n_right());
    let cap = (MAX_REFERENCE_PAIRS / nr.max(1)).max(1);
    let size = opts.sample.min(cap).min(nl);
    let mut order: Vec<u32> = (0..nl as u32).collect();
    Rng::new(opts.seed ^ 0x7E57).shuffle(&mut order);
    let mut sampled: Vec<u32> = order[..size].to_vec();
    sampled.sort_unstable();
    let cands = Candidates {
        left: sampled
            .iter()
            .flat_map(|&a| std::iter::repeat_n(a, nr))
            .collect(),
        right: (0..sampled.len()).flat_map(|_| 0..nr as u32).collect(),
        passes: vec![0; sampled.len() * nr],
    };
    let theta = score(prep, &cands);
    let partners = (0..sampled.len())
        .map(|k| {
            let t = &theta[k * nr..(k + 1) * nr];
            let hi = t.iter().copied().fold(0.0f64, f64::max);
            let z: f64 = (-hi).exp() + t.iter().map(|x| (x - hi).exp()).sum::<f64>();
            t.iter()
                .enumerate()
                .map(|(b, x)| (b as u32, (x - hi).exp() / z))
                .filter(|&(_, p)| p > 1e-9)
                .collect()
        })
        .collect();
    Reference { sampled, partners }
}

/// Evaluates each named scheme (a list of passes) against the reference.
pub fn evaluate(
    prep: &Prepared,
    schemes: &[(String, Vec<Pass>)],
    opts: &TuneOptions,
) -> Vec<SchemeResult> {
    let reference = reference(prep, opts);
    let mass: f64 = reference.partners.iter().flatten().map(|p| p.1).sum();
    let (nl, nr) = (prep.records.n_left(), prep.records.n_right());
    let true_pairs_total = if reference.sampled.is_empty() {
        0.0
    } else {
        mass / reference.sampled.len() as f64 * nl as f64
    };
    let b: f64 = prep.separations.iter().map(|f| f.bhattacharyya).product();
    schemes
        .iter()
        .map(|(name, passes)| {
            let clock = Instant::now();
            let (cands, _) = block::candidates(&prep.records, passes);
            let kept: f64 = reference
                .sampled
                .iter()
                .zip(&reference.partners)
                .map(|(&a, partners)| {
                    let lo = cands.left.partition_point(|&x| x < a);
                    let hi = cands.left.partition_point(|&x| x <= a);
                    let rights = &cands.right[lo..hi];
                    partners
                        .iter()
                        .filter(|(b, _)| rights.binary_search(b).is_ok())
                        .map(|p| p.1)
                        .sum::<f64>()
                })
                .sum();
            let completeness = if mass > 0.0 {
                (kept / mass).min(1.0)
            } else {
                0.0
            };
            let (theta, link_log_odds) = score_one_to_one(prep, &cands);
            let m = matching::max_weight_matching(nl, &cands.left, &cands.right, &theta);
            let fc = forecast::bracketed(
                nl,
                &cands.left,
                &cands.right,
                &m.chosen,
                &prep.fit,
                &prep.plain_fit,
                &ForecastOptions {
                    replicates: opts.replicates,
                    seed: opts.seed,
                    max_pairs: 2_000_000,
                    prior_shift: link_log_odds - prep.fit.prior_log_odds(),
                },
            );
            let true_in_c = completeness * true_pairs_total;
            let scale = ((nl as f64) * (nr as f64)).sqrt();
            let d = ((cands.len() as f64 - true_in_c).max(0.0)) / scale.max(1.0);
            let mut has = vec![false; nl];
            for &a in &cands.left {
                has[a as usize] = true;
            }
            let forecast_error = fc.map(|f| f.error_rate);
            SchemeResult {
                scheme: name.clone(),
                pairs: cands.len(),
                d,
                left_with_candidate: has.iter().filter(|&&h| h).count() as f64 / nl.max(1) as f64,
                completeness,
                margin: d.sqrt() * b,
                forecast_error,
                expected_correct: completeness * (1.0 - forecast_error.unwrap_or(0.0)),
                seconds: clock.elapsed().as_secs_f64(),
            }
        })
        .collect()
}

/// The table as aligned text.
pub fn table_text(rows: &[SchemeResult]) -> String {
    let w = rows
        .iter()
        .map(|r| r.scheme.len())
        .max()
        .unwrap_or(6)
        .max(6);
    let mut t = format!(
        "{:<w$}  {:>10}  {:>8}  {:>9}  {:>12}  {:>8}  {:>9}  {:>9}  {:>7}\n",
        "scheme",
        "pairs",
        "d",
        "with cand",
        "completeness",
        "margin",
        "forecast",
        "expected",
        "seconds"
    );
    for r in rows {
        t.push_str(&format!(
            "{:<w$}  {:>10}  {:>8.3}  {:>8.1}%  {:>11.1}%  {:>8.4}  {:>9}  {:>8.1}%  {:>7.2}\n",
            r.scheme,
            r.pairs,
            r.d,
            r.left_with_candidate * 100.0,
            r.completeness * 100.0,
            r.margin,
            r.forecast_error
                .map_or("-".to_string(), |e| format!("{:.2}%", e * 100.0)),
            r.expected_correct * 100.0,
            r.seconds
        ));
    }
    t
}
