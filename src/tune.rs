//! Tuning blocking: the trade between pair completeness and the false degree, per scheme.
//!
//! In: a [`Prepared`] run (its records and its fitted laws) and blocking schemes. Out: per
//! scheme the pairs, d, the share of left records with a candidate, the estimated pair
//! completeness, the margin, the forecast error and the expected share of true pairs linked
//! correctly (completeness x (1 - forecast error)).
//!
//! Pair completeness is measured against the loosest reference there is, no blocking at all,
//! on a seeded sample of left records: each sampled record is compared with every right record,
//! and the fitted model gives each pair its probability of being the record's true partner. A
//! record has at most one partner: with chance pi it has one, equally likely to be any of the
//! nr right records a priori, so a pair's posterior is pi LR / (pi sum LR' + (1 - pi) nr), with
//! pi fitted by EM on the sample. The likelihood ratios take the fitted m-law, the u-law of the
//! reference's own (random) pairs, and each right record's chance of being free, 1 minus the
//! run's confidence that another left record holds it. A scheme's completeness is the expected
//! number of true pairs among the sample's candidates under the scheme over the expected number
//! of the sample's true pairs (sum of the posteriors). The sample is capped so that sample x
//! right records stays below [`MAX_REFERENCE_PAIRS`].
//!
//! The miss this replaced (2000 synth rows, overlap 0.5, noise 0.8, seed 3, all passes): 54.8%
//! against a true 92.8%. The reference then took theta with the pairwise prior ln(p / (1 - p))
//! of the candidates (p about 0.5), nr times too high for a record's pairs with every right
//! record, so the records with no partner put most of a partner's mass in the denominator (1638
//! true pairs expected among 2000 records, against 1000). With the prior alone fixed, the
//! blocked u-law undervalued agreement (770 of the 1000 found), and without the right records'
//! claims a partnerless record took its relative's right record (69 false pairs' mass, 33 of
//! them on right records whose own partner held them). Now 91.7% (mass 1017). What is left is
//! mostly household members of partnerless records (same surname, address and phone) whose
//! right record nobody else holds: the model takes them for true pairs, so at low overlap and
//! high noise (4000 rows, overlap 0.2, noise 0.8, seed 8) the estimate is 76.6% against about
//! 91%.

use crate::block::{self, Candidates, Pass};
use crate::compare::{self, Comparison, MISSING_LEVEL};
use crate::fit::pair_weights;
use crate::matching;
use crate::model;
use crate::pipeline::{score_one_to_one, Prepared};
use crate::posterior as confidence;
use crate::reliability::forecast::{self, ForecastOptions};
use crate::rng::Rng;
use serde::Serialize;
use std::collections::HashMap;
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
    /// Estimated pair completeness: the share of the true pairs that are candidates.
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

fn reference(prep: &Prepared, opts: &TuneOptions, max_pairs: usize) -> Reference {
    let (nl, nr) = (prep.records.n_left(), prep.records.n_right());
    let cap = (max_pairs / nr.max(1)).max(1);
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
    // The weights with the u-law of random pairs: the reference's pairs are nearly all false
    // (at most one true pair per sampled record among nr), so each field's level shares among
    // them are the u-probabilities of two records drawn at random. The fitted u-law describes
    // the false candidates of blocking, which agree far more often (on the blocking keys
    // above all) and would undervalue agreement here.
    let comparison = compare::compare(&prep.records, &cands);
    let mut fit = prep.fit.clone();
    fit.u = random_pair_u(&comparison);
    let (mut weight, _) = pair_weights(
        &prep.records,
        &cands,
        &comparison,
        &fit,
        None,
        &prep.frequency,
        None,
    );
    // One-to-one from the right side too: a right record is free for a sampled record only
    // when no other left record has it, and the run's confidences say how likely that is.
    // Without it, a record whose partner is missing takes a relative's right record (same
    // surname, address and phone) for its own even when that relative's own record holds it.
    let marg = confidence::marginals(
        nl,
        &prep.cands.left,
        &prep.cands.right,
        &prep.theta,
        &crate::fit::REFINEMENT_BP,
    );
    let mut claim = vec![0.0f64; nr];
    for (&b, &p) in prep.cands.right.iter().zip(&marg.p) {
        claim[b as usize] += p;
    }
    let free = |q: f64| (1.0 - q).max(1e-12).ln();
    let free_of_all: Vec<f64> = claim.iter().map(|&q| free(q)).collect();
    for (k, &a) in sampled.iter().enumerate() {
        let w = &mut weight[k * nr..(k + 1) * nr];
        for (x, f) in w.iter_mut().zip(&free_of_all) {
            *x += f;
        }
        let lo = prep.cands.left.partition_point(|&x| x < a);
        let hi = prep.cands.left.partition_point(|&x| x <= a);
        for i in lo..hi {
            let b = prep.cands.right[i] as usize;
            w[b] += free(claim[b] - marg.p[i]) - free_of_all[b];
        }
    }
    // Per sampled record: the log of its likelihood ratios' sum over all right records.
    let log_sum: Vec<f64> = (0..sampled.len())
        .map(|k| {
            let w = &weight[k * nr..(k + 1) * nr];
            let hi = w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            hi + w.iter().map(|x| (x - hi).exp()).sum::<f64>().ln()
        })
        .collect();
    let has_partner = partner_share(&log_sum, nr);
    let offset = (has_partner / (1.0 - has_partner)).ln() - (nr as f64).ln();
    let partners = (0..sampled.len())
        .map(|k| {
            let w = &weight[k * nr..(k + 1) * nr];
            // The record's chance of having a partner at all, then each right record's share.
            let any = 1.0 / (1.0 + (-(log_sum[k] + offset)).exp());
            w.iter()
                .enumerate()
                .map(|(b, x)| (b as u32, any * (x - log_sum[k]).exp()))
                .filter(|&(_, p)| p > 1e-9)
                .collect()
        })
        .collect();
    Reference { sampled, partners }
}

/// Per field, the shares of its observed levels among the pairs of `comparison`, floored at
/// [`model::FLOOR`] as the fit's laws are.
fn random_pair_u(comparison: &Comparison) -> Vec<Vec<f64>> {
    let mut counts: Vec<Vec<f64>> = comparison
        .level_counts()
        .iter()
        .map(|&n| vec![0.0; n])
        .collect();
    let mut by_code: HashMap<u64, usize> = HashMap::new();
    for &code in &comparison.codes {
        *by_code.entry(code).or_default() += 1;
    }
    // Whole counts, so the order of the sums cannot change a bit of the result.
    for (&code, &n) in &by_code {
        let n = n as f64;
        for (k, &l) in comparison.levels_of(code).iter().enumerate() {
            if l != MISSING_LEVEL {
                counts[k][l as usize] += n;
            }
        }
    }
    for c in &mut counts {
        let total: f64 = c.iter().sum();
        let n = c.len() as f64;
        for x in c.iter_mut() {
            *x = if total > 0.0 { *x / total } else { 1.0 / n };
            *x = x.max(model::FLOOR);
        }
        let total: f64 = c.iter().sum();
        c.iter_mut().for_each(|x| *x /= total);
    }
    counts
}

/// The share of left records that have a partner, fitted by EM on the reference: a record has
/// a partner with chance `pi`, uniform over the `nr` right records, so given its likelihood
/// ratios (log of their sum `log_sum[k]`) its chance of having one is
/// pi L / (pi L + (1 - pi) nr); `pi` is the mean of these at the fixed point.
fn partner_share(log_sum: &[f64], nr: usize) -> f64 {
    if log_sum.is_empty() || nr == 0 {
        return 0.0;
    }
    let ln_nr = (nr as f64).ln();
    let mut pi = 0.5f64;
    for _ in 0..200 {
        let offset = (pi / (1.0 - pi)).ln() - ln_nr;
        let next = log_sum
            .iter()
            .map(|l| 1.0 / (1.0 + (-(l + offset)).exp()))
            .sum::<f64>()
            / log_sum.len() as f64;
        let next = next.clamp(1e-9, 1.0 - 1e-9);
        let done = (next - pi).abs() < 1e-9;
        pi = next;
        if done {
            break;
        }
    }
    pi
}

/// The expected true pairs of each sampled record that `cands` keeps.
fn kept_per_record(reference: &Reference, cands: &Candidates) -> Vec<f64> {
    reference
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
        .collect()
}

/// Pair completeness of a candidate set with a 95% interval.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Completeness {
    /// Expected true pairs kept over expected true pairs, in the sample.
    pub value: f64,
    /// The ratio estimator's 95% interval (delta method over the sampled records: variance
    /// of kept - R mass per record over n mean(mass)^2; Cochran, Sampling Techniques, for the
    /// ratio estimator; normal approximation).
    pub interval: [f64; 2],
    /// Left records sampled.
    pub sampled: usize,
    /// Expected true pairs of the sampled records.
    pub expected_true: f64,
}

/// The pair completeness of `cands` (the run's own candidates, say) against no blocking on a
/// seeded sample of `sample` left records, each compared with every right record, with at
/// most `max_pairs` pairs compared in all; None when no sampled record has a partner.
pub fn completeness(
    prep: &Prepared,
    cands: &Candidates,
    sample: usize,
    max_pairs: usize,
    seed: u64,
) -> Option<Completeness> {
    let reference = reference(
        prep,
        &TuneOptions {
            sample,
            seed,
            replicates: 0,
        },
        max_pairs,
    );
    let mass: Vec<f64> = reference
        .partners
        .iter()
        .map(|p| p.iter().map(|x| x.1).sum())
        .collect();
    let kept = kept_per_record(&reference, cands);
    let n = mass.len() as f64;
    let total: f64 = mass.iter().sum();
    if total <= 0.0 || n < 2.0 {
        return None;
    }
    let r = (kept.iter().sum::<f64>() / total).min(1.0);
    let mean = total / n;
    let var = kept
        .iter()
        .zip(&mass)
        .map(|(k, m)| (k - r * m).powi(2))
        .sum::<f64>()
        / (n - 1.0);
    let se = (var / n).sqrt() / mean;
    Some(Completeness {
        value: r,
        interval: [(r - 1.96 * se).max(0.0), (r + 1.96 * se).min(1.0)],
        sampled: reference.sampled.len(),
        expected_true: total,
    })
}

/// Evaluates each named scheme (a list of passes) against the reference.
pub fn evaluate(
    prep: &Prepared,
    schemes: &[(String, Vec<Pass>)],
    opts: &TuneOptions,
) -> Vec<SchemeResult> {
    let reference = reference(prep, opts, MAX_REFERENCE_PAIRS);
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
            let kept: f64 = kept_per_record(&reference, &cands).iter().sum();
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
