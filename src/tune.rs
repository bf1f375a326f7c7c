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
use crate::compare::{self, Comparator, DATE_LEVELS, MISSING_LEVEL};
use crate::config::Method;
use crate::matching;
use crate::model;
use crate::pipeline::{score_one_to_one, Prepared};
use crate::posterior as confidence;
use crate::records::MISSING;
use crate::reliability::forecast::{self, ForecastOptions};
use crate::rng::Rng;
use crate::text::Date;
use rayon::prelude::*;
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
    /// Peak memory a `link` run with this scheme is estimated to take, in bytes (from its
    /// passes' pair counts, before any pair is made; see [`crate::pipeline::MemoryEstimate`]).
    pub memory_bytes: u64,
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
    reference_with(prep, opts, max_pairs, &run_claims(prep))
}

/// The run's one-to-one link probabilities of its candidate pairs, by the refinement's BP.
fn run_claims(prep: &Prepared) -> Vec<f64> {
    confidence::marginals(
        prep.records.n_left(),
        &prep.cands.left,
        &prep.cands.right,
        &prep.theta,
        &crate::fit::REFINEMENT_BP,
    )
    .p
}

/// The reference, given the run's one-to-one link probabilities of its candidate pairs
/// (`claims`, in candidate order).
///
/// A pair's levels depend only on the two records' dictionary entries, so each sampled record
/// is compared once with each distinct value the right table holds, and each right record
/// reads its levels from that table: the same levels, weights and level counts as comparing
/// every pair, at the cost of the distinct values instead of the right records.
/// How far below a sampled record's log sum of likelihood ratios a right record's weight may
/// be and still give a share above 1e-9 (e^-21 < 1e-9, and the chance of any partner is at
/// most 1).
const PARTNER_SPAN: f64 = 21.0;

fn reference_with(
    prep: &Prepared,
    opts: &TuneOptions,
    max_pairs: usize,
    claims: &[f64],
) -> Reference {
    let (nl, nr) = (prep.records.n_left(), prep.records.n_right());
    let cap = (max_pairs / nr.max(1)).max(1);
    let size = opts.sample.min(cap).min(nl);
    let mut order: Vec<u32> = (0..nl as u32).collect();
    Rng::new(opts.seed ^ 0x7E57).shuffle(&mut order);
    let mut sampled: Vec<u32> = order[..size].to_vec();
    sampled.sort_unstable();
    let fields = &prep.records.fields;
    let comparators: Vec<Comparator> = fields.iter().map(Comparator::for_field).collect();
    // levels[k][f][v]: the level of sampled record k against dictionary value v of field f
    // (values no right record holds are skipped).
    let levels: Vec<Vec<Vec<u8>>> = sampled
        .par_iter()
        .map(|&a| {
            fields
                .iter()
                .zip(&comparators)
                .map(|(fv, c)| {
                    let x = fv.left[a as usize];
                    (0..fv.dict.len())
                        .map(|v| {
                            if fv.right_counts[v] == 0 {
                                MISSING_LEVEL
                            } else if c.method == Method::Date && x != MISSING {
                                quick_date_level(fv.dates[x as usize], fv.dates[v])
                            } else {
                                c.level(fv, x, v as u32)
                            }
                        })
                        .collect()
                })
                .collect()
        })
        .collect();
    // The weights with the u-law of random pairs: the reference's pairs are nearly all false
    // (at most one true pair per sampled record among nr), so each field's level shares among
    // them are the u-probabilities of two records drawn at random. The fitted u-law describes
    // the false candidates of blocking, which agree far more often (on the blocking keys
    // above all) and would undervalue agreement here.
    let mut counts: Vec<Vec<f64>> = comparators.iter().map(|c| vec![0.0; c.levels()]).collect();
    for lv in &levels {
        for (f, fv) in fields.iter().enumerate() {
            // Whole counts, so the order of the sums cannot change a bit of the result.
            for (v, &l) in lv[f].iter().enumerate() {
                if l != MISSING_LEVEL {
                    counts[f][l as usize] += fv.right_counts[v] as f64;
                }
            }
        }
    }
    let mut fit = prep.fit.clone();
    fit.u = random_pair_u(counts);
    let level_weight: Vec<Vec<f64>> = fit
        .m
        .iter()
        .zip(&fit.u)
        .map(|(m, u)| m.iter().zip(u).map(|(a, b)| (a / b).ln()).collect())
        .collect();
    let frequency = &prep.frequency;
    // One-to-one from the right side too: a right record is free for a sampled record only
    // when no other left record has it, and the run's confidences say how likely that is.
    // Without it, a record whose partner is missing takes a relative's right record (same
    // surname, address and phone) for its own even when that relative's own record holds it.
    let mut claim = vec![0.0f64; nr];
    for (&b, &p) in prep.cands.right.iter().zip(claims) {
        claim[b as usize] += p;
    }
    let free = |q: f64| (1.0 - q).max(1e-12).ln();
    let free_of_all: Vec<f64> = claim.iter().map(|&q| free(q)).collect();
    // Per sampled record, one row of weights against every right record at a time (memory
    // per thread, not per sample): the log of its likelihood ratios' sum, and the right
    // records within [`PARTNER_SPAN`] of it, the only ones that can get a share above 1e-9.
    let rows: Vec<(f64, Vec<(u32, f64)>)> = sampled
        .par_iter()
        .zip(&levels)
        .map(|(&a, lv)| {
            // The pattern's weight in field order, then the value-frequency terms, as the run
            // weighs its pairs; one field at a time over every right record, through a table
            // of the weight by right value (the same sums, term for term, as pair by pair).
            let mut w = vec![0.0f64; nr];
            let mut by_value: Vec<f64> = Vec::new();
            for (f, fv) in fields.iter().enumerate() {
                by_value.clear();
                by_value.extend(lv[f].iter().map(|&l| {
                    if l == MISSING_LEVEL {
                        0.0
                    } else {
                        level_weight[f][l as usize]
                    }
                }));
                // Adding 0 for a missing level leaves a sum as it was (never -0: it starts at
                // +0 and round-to-nearest cancels to +0).
                for (x, &y) in w.iter_mut().zip(&fv.right) {
                    if y != MISSING {
                        *x += by_value[y as usize];
                    }
                }
            }
            for (f, vf) in frequency.iter().enumerate() {
                let (Some(vf), x) = (vf, fields[f].left[a as usize]) else {
                    continue;
                };
                if x == MISSING {
                    continue;
                }
                let adjust = vf.adjustment[x as usize];
                for (w, &y) in w.iter_mut().zip(&fields[f].right) {
                    if y != MISSING && lv[f][y as usize] == 0 {
                        *w += adjust;
                    }
                }
            }
            for (x, f) in w.iter_mut().zip(&free_of_all) {
                *x += f;
            }
            let lo = prep.cands.left.partition_point(|&x| x < a);
            let hi = prep.cands.left.partition_point(|&x| x <= a);
            for (&b, &c) in prep.cands.right[lo..hi].iter().zip(&claims[lo..hi]) {
                let b = b as usize;
                w[b] += free(claim[b] - c) - free_of_all[b];
            }
            let top = w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            let log_sum = top + w.iter().map(|x| (x - top).exp()).sum::<f64>().ln();
            let near = w
                .iter()
                .enumerate()
                .filter(|&(_, &x)| x - log_sum > -PARTNER_SPAN)
                .map(|(b, &x)| (b as u32, x))
                .collect();
            (log_sum, near)
        })
        .collect();
    let log_sum: Vec<f64> = rows.iter().map(|r| r.0).collect();
    let has_partner = partner_share(&log_sum, nr);
    let offset = (has_partner / (1.0 - has_partner)).ln() - (nr as f64).ln();
    let partners = rows
        .iter()
        .map(|(ls, near)| {
            // The record's chance of having a partner at all, then each right record's share.
            let any = 1.0 / (1.0 + (-(ls + offset)).exp());
            near.iter()
                .map(|&(b, x)| (b, any * (x - ls).exp()))
                .filter(|&(_, p)| p > 1e-9)
                .collect()
        })
        .collect();
    Reference { sampled, partners }
}

/// [`compare::date_level`] without its digit comparison where it cannot matter: two dates of
/// different years whose (month, day) differ too differ in two or more of the eight digits of
/// YYYYMMDD (or one of them has no month or day), are not a day-month swap (which keeps the
/// year) and are not of the same year, so they are "different". Nearly all of a reference's
/// random pairs are such; the rest go to `date_level`.
fn quick_date_level(a: Date, b: Date) -> u8 {
    if a.year != b.year && (a.month, a.day) != (b.month, b.day) {
        (DATE_LEVELS.len() - 1) as u8
    } else {
        compare::date_level(a, b)
    }
}

/// Per field, the shares of its observed levels among the reference's pairs (`counts`, whole
/// pair counts per level), floored at [`model::FLOOR`] as the fit's laws are.
fn random_pair_u(mut counts: Vec<Vec<f64>>) -> Vec<Vec<f64>> {
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
    let marg = run_claims(prep);
    completeness_given(prep, cands, &marg, sample, max_pairs, seed)
}

/// [`completeness`] given the run's one-to-one link probabilities of its candidate pairs
/// (`claims`, in candidate order; the confidence stage's marginals, say), which it would
/// otherwise compute by belief propagation over every candidate pair.
pub fn completeness_given(
    prep: &Prepared,
    cands: &Candidates,
    claims: &[f64],
    sample: usize,
    max_pairs: usize,
    seed: u64,
) -> Option<Completeness> {
    let reference = reference_with(
        prep,
        &TuneOptions {
            sample,
            seed,
            replicates: 0,
        },
        max_pairs,
        claims,
    );
    ratio(&reference, cands)
}

/// The ratio estimator of completeness from a reference.
fn ratio(reference: &Reference, cands: &Candidates) -> Option<Completeness> {
    let mass: Vec<f64> = reference
        .partners
        .iter()
        .map(|p| p.iter().map(|x| x.1).sum())
        .collect();
    let kept = kept_per_record(reference, cands);
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
            let plan = block::plan(&prep.records, passes);
            let memory = crate::pipeline::MemoryEstimate::new(
                prep.left.bytes + prep.right.bytes,
                plan.pairs_per_pass(),
            );
            let (cands, _) = plan.candidates(&prep.records);
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
                memory_bytes: memory.peak_bytes,
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

/// The schemes `dovetail tune` compares: each configured pass alone, all passes together
/// (when there are several), then each `[[scheme]]` of the config. With a budget, every extra
/// scheme's blocking plan is checked against it first, as `link` would check it, before any
/// scheme is evaluated (the configured passes were checked when the run was prepared).
pub fn schemes_of(
    prep: &Prepared,
    budget: &crate::budget::Budget,
) -> crate::Result<Vec<(String, Vec<Pass>)>> {
    use crate::pipeline::{pass_labels, passes_from, MemoryEstimate};
    let cfg = &prep.config;
    let all = passes_from(cfg, &cfg.block, "block")?;
    let mut schemes = Vec::new();
    for (i, p) in all.iter().enumerate() {
        let keys = cfg.block[i].keys.join(" + ");
        schemes.push((format!("{}: {keys}", p.name), vec![p.clone()]));
    }
    if all.len() > 1 {
        schemes.push(("all passes".to_string(), all.clone()));
    }
    for (i, sc) in cfg.scheme.iter().enumerate() {
        let passes = passes_from(cfg, &sc.block, &format!("scheme[{}].block", i + 1))?;
        if let Some(budget) = budget.resolve() {
            let plan = block::plan(&prep.records, &passes);
            let memory =
                MemoryEstimate::new(prep.left.bytes + prep.right.bytes, plan.pairs_per_pass());
            let mut labels = pass_labels(&sc.block, &passes);
            for l in &mut labels {
                l.name = format!("{} of scheme `{}`", l.name, sc.name);
            }
            budget.check(&memory, &labels)?;
        }
        schemes.push((sc.name.clone(), passes));
    }
    Ok(schemes)
}

/// The rows as tune.csv: a header, then one line per scheme.
pub fn csv_bytes(rows: &[SchemeResult]) -> crate::Result<Vec<u8>> {
    let mut c = csv::Writer::from_writer(Vec::new());
    for r in rows {
        c.serialize(r)
            .map_err(|e| crate::Error::output(format!("cannot render tune.csv: {e}")))?;
    }
    c.into_inner()
        .map_err(|e| crate::Error::output(format!("cannot render tune.csv: {e}")))
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
        "{:<w$}  {:>10}  {:>8}  {:>8}  {:>9}  {:>12}  {:>8}  {:>9}  {:>9}  {:>7}\n",
        "scheme",
        "pairs",
        "memory",
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
            "{:<w$}  {:>10}  {:>8}  {:>8.3}  {:>8.1}%  {:>11.1}%  {:>8.4}  {:>9}  {:>8.1}%  {:>7.2}\n",
            r.scheme,
            r.pairs,
            crate::pipeline::human_bytes(r.memory_bytes),
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quick_date_level_equals_date_level() {
        // Oracle: `compare::date_level` itself on every pair of a grid of dates (years one
        // digit apart or not, months and days swapped or equal, dates known to the year only).
        let mut dates = Vec::new();
        for year in [1979, 1980, 1981, 1990, 2080] {
            dates.push(Date {
                year,
                month: None,
                day: None,
            });
            for (m, d) in [(3, 7), (7, 3), (3, 8), (4, 7), (12, 12), (1, 1)] {
                dates.push(Date {
                    year,
                    month: Some(m),
                    day: Some(d),
                });
            }
            dates.push(Date {
                year,
                month: Some(3),
                day: None,
            });
        }
        for &a in &dates {
            for &b in &dates {
                assert_eq!(
                    quick_date_level(a, b),
                    compare::date_level(a, b),
                    "{a:?} {b:?}"
                );
            }
        }
    }
}
