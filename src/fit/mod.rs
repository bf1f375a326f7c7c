//! The fit stage: the laws of the two classes and the weight of every candidate pair.
//!
//! In: the config (model settings, labelled pairs, random-pair u), the interned records, the
//! candidate pairs and their agreement patterns. Out: a [`Fitted`]: the refined laws (pooled,
//! and per set of passes that found a pair), the laws of plain EM, the one-to-one prior log
//! odds of a link, value-frequency tables, each pair's weight and log posterior odds, and the
//! dependence between fields; [`check`] then gives the model check of those laws.
//!
//! The order: plain EM on the pattern counts ([`model::fit`]); then rounds of the one-to-one
//! refinement, each taking link probabilities from a loose BP on the candidate graph
//! ([`crate::posterior::marginals`]), m from the pairs the other fields identify
//! ([`model::leave_one_out_m`]), u and p by the M-step ([`model::fit_from_shares`]), and a step
//! of the link prior ([`crate::posterior::LinkPrior`], its messages kept from round to round); with
//! two or more passes, further rounds refit each set of passes ([`model::Strata`]);
//! value-frequency tables from the final link probabilities. Pattern counts stay the sufficient statistic of every M-step.

use crate::block::{Candidates, Pass};
use crate::compare::{self, Comparison, PatternCounts};
use crate::config::{Config, KeySource};
use crate::error::{Error, Result};
use crate::io;
use crate::model::check::ModelCheck;
use crate::model::{self, EmOptions, Fit, PairPatterns, Strata, ValueFrequency};
use crate::posterior::BpOptions;
use crate::records::{Records, MISSING};
use std::collections::HashMap;

pub mod rounds;

/// What the fit stage gives the stages after it.
pub struct Fitted {
    /// The refined pooled laws (the ones reported).
    pub fit: Fit,
    /// The laws of plain EM, before the one-to-one refinement.
    pub plain_fit: Fit,
    /// Dependence between every pair of fields within each class.
    pub dependence: Vec<model::Dependence>,
    /// One fit per set of passes that found a pair, when there are several.
    pub strata: Option<Strata>,
    /// Prior log odds of a link, per stratum (or one pooled value).
    pub link_log_odds: Vec<f64>,
    /// The pooled prior log odds of a link.
    pub pooled_link_log_odds: Option<f64>,
    /// Value-frequency tables of fields with `frequency = true`.
    pub frequency: Vec<Option<ValueFrequency>>,
    /// Per pair: the weight.
    pub weight: Vec<f64>,
    /// Per pair: weight plus the prior log odds of a link.
    pub theta: Vec<f64>,
}

/// What the fit reads.
#[derive(Clone, Copy)]
pub struct Input<'a> {
    /// The config (model settings, labelled pairs, random-pair u).
    pub config: &'a Config,
    /// The interned records.
    pub records: &'a Records,
    /// The candidate pairs.
    pub cands: &'a Candidates,
    /// Their comparators (the pairs' codes may be gone: `patterns` holds each pair's).
    pub comparison: &'a Comparison,
    /// The pattern counts.
    pub counts: &'a PatternCounts,
    /// Each pair's pattern, indexed into `counts`.
    pub patterns: &'a PairPatterns,
    /// Pairs a clerk decided are the same person, as (left, right) record indices: labelled
    /// true pairs, like `[model] labelled`.
    pub decided_same: &'a [(u32, u32)],
}

/// Fits the laws and weighs every candidate pair (see the module doc); warnings in plain words
/// go to `warnings`. `cancelled` is asked before each refinement round (a round of a loose
/// million-record run takes tens of seconds); when it says yes the fit ends with an error of
/// kind [`crate::ErrorKind::Cancelled`].
pub fn fit(
    input: &Input<'_>,
    warnings: &mut Vec<String>,
    cancelled: &dyn Fn() -> bool,
) -> Result<Fitted> {
    let Input {
        config,
        records,
        cands,
        comparison,
        counts,
        patterns: pp,
        decided_same,
    } = *input;
    let known = known_laws(config, records, comparison, counts, decided_same)?;
    let fit = if cands.is_empty() {
        model::null_fit(&counts.levels)
    } else {
        let p_hint = records.n_left().min(records.n_right()) as f64 / cands.len() as f64;
        let f = model::fit(
            counts,
            &EmOptions {
                max_iterations: config.model.max_iterations,
                tolerance: config.model.tolerance,
                p_hint,
                known: known.clone(),
            },
        );
        if !f.converged {
            warnings.push(format!(
                "EM stopped at the cap of {} iterations before converging; fields: {}",
                config.model.max_iterations,
                config
                    .field
                    .iter()
                    .map(|f| f.name.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
        }
        f
    };
    // The fit and its one-to-one refinement use field-level weights; value-frequency tables
    // are then estimated from the refined link probabilities of the candidate pairs.
    let strata = Some(Strata::new(&cands.passes))
        .filter(|s| config.model.per_pass && s.masks.len() > 1 && !known.any_fixed());
    let plain_fit = fit.clone();
    let (of_pair, masks) = match strata {
        Some(s) => (Some(s.of_pair), Some(s.masks)),
        None => (None, None),
    };
    let mut refine = rounds::Refinement::new(counts.clone(), fit, masks, known);
    let link_prob: Vec<f64> = if cands.is_empty() {
        Vec::new()
    } else {
        // The pooled refinement first; the strata start from its link probabilities (from
        // plain EM's, a stratum holding few false pairs can take true pairs' leftover mass
        // for its false law and never recover).
        let piece = rounds::Piece {
            n_left: records.n_left(),
            left: &cands.left,
            right: &cands.right,
            pattern: &pp.of_pair,
            stratum: of_pair.as_deref(),
        };
        refine.run_on(&piece, cancelled)?
    };
    let rounds::Refinement {
        fit,
        strata,
        link_log_odds,
        pooled_link_log_odds,
        gamma,
        ..
    } = refine;
    let strata = strata.map(|mut s| {
        s.of_pair = of_pair.unwrap_or_default();
        s
    });
    let dependence = if gamma.is_empty() {
        Vec::new()
    } else {
        model::dependence(counts, &gamma)
    };
    for d in &dependence {
        if d.is_strong() {
            warnings.push(format!(
                "fields `{}` and `{}` move together among candidate pairs (phi {:.2} among true pairs, from about {} pairs on the rarer side; {:.2} among false pairs, from about {}): the model counts their evidence twice; compare only one of them, or join them into one field (`left = \"a+b\"`)",
                config.field[d.a].name,
                config.field[d.b].name,
                d.phi_m,
                crate::pipeline::count_text(d.support_m),
                d.phi_u,
                crate::pipeline::count_text(d.support_u)
            ));
        }
    }
    let frequency: Vec<Option<ValueFrequency>> = records
        .fields
        .iter()
        .enumerate()
        .map(|(k, fv)| {
            fv.spec.frequency.then(|| {
                let agreeing = (0..cands.len())
                    .filter(|&i| pp.levels_of(i)[k] == 0)
                    .map(|i| (fv.left[cands.left[i] as usize], link_prob[i]));
                model::value_frequency_on_candidates(&fv.left_counts, &fv.right_counts, agreeing)
            })
        })
        .collect();
    let (weight, theta) = pair_weights_indexed(
        records,
        cands,
        pp,
        &fit,
        strata.as_ref(),
        &frequency,
        (!link_log_odds.is_empty()).then_some(&link_log_odds[..]),
    );
    Ok(Fitted {
        fit,
        plain_fit,
        dependence,
        strata,
        link_log_odds,
        pooled_link_log_odds,
        frequency,
        weight,
        theta,
    })
}

/// The model check of the fitted laws (None without candidates).
pub fn check(
    records: &Records,
    cands: &Candidates,
    pp: &PairPatterns,
    passes: &[Pass],
    fit: &Fit,
    strata: Option<&Strata>,
    link_log_odds: &[f64],
) -> Option<ModelCheck> {
    (!cands.is_empty()).then(|| {
        let fits: Vec<&Fit> = match strata {
            Some(s) => s.fits.iter().collect(),
            None => vec![&fit],
        };
        let prior: Vec<f64> = if link_log_odds.len() == fits.len() {
            link_log_odds.to_vec()
        } else {
            fits.iter().map(|f| f.prior_log_odds()).collect()
        };
        let mut free = vec![true; records.fields.len()];
        for p in passes {
            for part in &p.parts {
                if let KeySource::Field(k) = part.source {
                    free[k] = false;
                }
            }
        }
        model::check::check(
            pp,
            &model::check::CheckStrata { fits, prior, free },
            |i| strata.map_or(0, |s| s.stratum_of(i)),
            CHECK_MIN_TRUE,
        )
    })
}

/// Laws known from outside the EM: m from the labelled pairs (the config's file and the
/// clerks' "same person" decisions) and u from random pairs, as the config asks.
fn known_laws(
    config: &Config,
    records: &Records,
    comparison: &Comparison,
    counts: &PatternCounts,
    decided_same: &[(u32, u32)],
) -> Result<model::Known> {
    let levels_of = |cands: &Candidates| -> Vec<Vec<u8>> {
        let c = compare::compare(records, cands);
        c.codes
            .iter()
            .map(|&code| comparison.levels_of(code))
            .collect()
    };
    let mut known = model::Known::default();
    let mut labelled = Candidates::default();
    for &(l, r) in decided_same {
        labelled.left.push(l);
        labelled.right.push(r);
        labelled.passes.push(0);
    }
    if let Some(path) = &config.model.labelled {
        let path = config.resolve(path);
        let lmap: HashMap<&str, u32> = records
            .left_ids
            .iter()
            .enumerate()
            .map(|(i, s)| (s, i as u32))
            .collect();
        let rmap: HashMap<&str, u32> = records
            .right_ids
            .iter()
            .enumerate()
            .map(|(i, s)| (s, i as u32))
            .collect();
        let cands = &mut labelled;
        let before = cands.len();
        for (l, r, line) in io::read_id_pairs(&path)? {
            let find = |map: &HashMap<&str, u32>, id: &str, col: &str| {
                map.get(id).copied().ok_or_else(|| {
                    Error::input(format!(
                        "id `{id}` is not in the {} table",
                        &col[..col.len() - 3]
                    ))
                    .with_file(&path)
                    .with_line(line)
                    .with_column(col)
                })
            };
            cands.left.push(find(&lmap, &l, "left_id")?);
            cands.right.push(find(&rmap, &r, "right_id")?);
            cands.passes.push(0);
        }
        if cands.len() == before {
            return Err(Error::input("no labelled pairs in the file").with_file(&path));
        }
        known.fix_m = config.model.labelled_use.as_deref() == Some("fix");
    }
    if !labelled.is_empty() {
        known.m = Some(model::law_of(&counts.levels, &levels_of(&labelled)));
    }
    if config.model.u_from.as_deref() == Some("random")
        && records.n_left() > 0
        && records.n_right() > 0
    {
        let n = config.model.random_pairs.unwrap_or(200_000);
        let mut rng = crate::rng::Rng::new(config.assess.seed ^ 0x0A11);
        let mut cands = Candidates::default();
        for _ in 0..n {
            cands.left.push(rng.below(records.n_left()) as u32);
            cands.right.push(rng.below(records.n_right()) as u32);
            cands.passes.push(0);
        }
        known.u = Some(model::law_of(&counts.levels, &levels_of(&cands)));
    }
    Ok(known)
}

/// Expected true pairs a stratum needs before the model check reads its laws.
const CHECK_MIN_TRUE: f64 = 100.0;

/// The looser BP of the one-to-one refinement and the link prior's fit.
pub const REFINEMENT_BP: BpOptions = BpOptions {
    max_iterations: 40,
    damping: 0.5,
    tolerance: 1e-4,
    theta_cutoff: -9.0,
};

/// Rounds of the one-to-one refinement of the fit (see [`model::fit_from_shares`]).
pub const ONE_TO_ONE_ROUNDS: usize = 3;

/// Further rounds that refit each stratum of pass sets (see [`model::Strata`]).
pub const STRATA_ROUNDS: usize = 2;

/// Per pair: the weight (sum of per-field log-likelihood ratios, value-frequency adjusted) and
/// theta = weight + the prior log odds, from the pair's stratum fit when `strata` is given. The
/// prior log odds are `link_log_odds` (one per stratum, or one pooled value; see
/// [`crate::posterior::LinkPrior::step`]) when given, else ln(p / (1 - p)) of the fit.
/// `comparison` must still hold its codes (a run's `Prepared` has freed them: use
/// [`pair_weights_indexed`] with its `patterns`).
pub fn pair_weights(
    records: &Records,
    cands: &Candidates,
    comparison: &Comparison,
    fit: &Fit,
    strata: Option<&Strata>,
    frequency: &[Option<ValueFrequency>],
    link_log_odds: Option<&[f64]>,
) -> (Vec<f64>, Vec<f64>) {
    let pp = PairPatterns::new(comparison, &comparison.pattern_counts());
    pair_weights_indexed(records, cands, &pp, fit, strata, frequency, link_log_odds)
}

/// The weight and theta of any pair, from tables built once.
struct Weigher<'a> {
    records: &'a Records,
    cands: &'a Candidates,
    pp: &'a PairPatterns,
    strata: Option<&'a Strata>,
    frequency: &'a [Option<ValueFrequency>],
    /// The weight of every (stratum, pattern) and the prior log odds per stratum.
    weighing: rounds::Weighing,
    /// The fields with value-frequency tables.
    adjusted: Vec<usize>,
}

impl<'a> Weigher<'a> {
    fn new(
        records: &'a Records,
        cands: &'a Candidates,
        pp: &'a PairPatterns,
        fit: &Fit,
        strata: Option<&'a Strata>,
        frequency: &'a [Option<ValueFrequency>],
        link_log_odds: Option<&[f64]>,
    ) -> Weigher<'a> {
        let fits: Vec<&Fit> = match strata {
            Some(s) => s.fits.iter().collect(),
            None => vec![fit],
        };
        let weighing = rounds::Weighing::new(&fits, &pp.patterns, link_log_odds);
        let adjusted: Vec<usize> = (0..frequency.len())
            .filter(|&k| frequency[k].is_some())
            .collect();
        Weigher {
            records,
            cands,
            pp,
            strata,
            frequency,
            weighing,
            adjusted,
        }
    }

    fn stratum(&self, i: usize) -> u16 {
        self.strata.map_or(0, |s| s.of_pair[i])
    }

    fn weight(&self, i: usize) -> f64 {
        let j = self.pp.of_pair[i];
        let mut w = self.weighing.weight(j, self.stratum(i));
        for &k in &self.adjusted {
            if let Some(vf) = &self.frequency[k] {
                if self.pp.patterns[j as usize][k] == 0 {
                    let v = self.records.fields[k].left[self.cands.left[i] as usize];
                    if v != MISSING {
                        w += vf.adjustment[v as usize];
                    }
                }
            }
        }
        w
    }

    fn theta(&self, i: usize, weight: f64) -> f64 {
        self.weighing.theta(self.stratum(i), weight)
    }
}

/// [`pair_weights`] of pairs whose patterns are indexed already.
pub fn pair_weights_indexed(
    records: &Records,
    cands: &Candidates,
    pp: &PairPatterns,
    fit: &Fit,
    strata: Option<&Strata>,
    frequency: &[Option<ValueFrequency>],
    link_log_odds: Option<&[f64]>,
) -> (Vec<f64>, Vec<f64>) {
    use rayon::prelude::*;
    let wg = Weigher::new(records, cands, pp, fit, strata, frequency, link_log_odds);
    let weight: Vec<f64> = (0..cands.len())
        .into_par_iter()
        .map(|i| wg.weight(i))
        .collect();
    let theta: Vec<f64> = weight
        .par_iter()
        .enumerate()
        .map(|(i, &w)| wg.theta(i, w))
        .collect();
    (weight, theta)
}
