//! The one-to-one refinement of the fit as rounds that split over pieces of the candidate
//! graph.
//!
//! Each round has a global side, held by [`Refinement`] (the laws, the strata's laws, the
//! prior log odds of a link), and a per-pair side, done by each [`Piece`]: a set of
//! candidate pairs holding whole connected components, so that BP on a piece is BP on those
//! components. A round is two steps:
//!
//! 1. [`Refinement::round_a`] → [`Piece::round_a`] on every piece → [`Refinement::take_a`]:
//!    the pieces weigh their pairs, take rough one-to-one link probabilities by BP, and sum
//!    them per pattern (and per stratum and pattern), with the bins of the leave-one-field-out
//!    m; the refinement refits m, u and p from the sums;
//! 2. [`Refinement::take_a`]'s [`RoundB`] → [`Piece::round_b`] → [`Refinement::take_b`]: a
//!    step of the link prior, whose BP messages each piece keeps from round to round.
//!
//! Every sum is mergeable ([`SumsA::add`], [`SumsB::add`]): one machine runs one piece, the
//! whole graph, and a distributed run many, with their sums added. The inputs and sums are
//! plain numbers (serde), for a driver to send to its workers and back.

use crate::compare::PatternCounts;
use crate::model::{self, Fit, Known, Strata};
use crate::posterior::{self as confidence, LinkPrior};
use serde::{Deserialize, Serialize};

use super::{ONE_TO_ONE_ROUNDS, REFINEMENT_BP, STRATA_ROUNDS};

/// The pattern table every piece indexes into, and the strata's pass masks.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Shape {
    /// Observed levels per field.
    pub levels: Vec<usize>,
    /// The patterns, in the order of the pattern counts (sorted by code).
    pub patterns: Vec<Vec<u8>>,
    /// The pass mask of each stratum, ascending (empty without strata).
    pub masks: Vec<u16>,
}

impl Shape {
    /// The stratum of a pair found by the passes of `mask` (0 without strata or for a mask not
    /// seen by the driver).
    pub fn stratum_of_mask(&self, mask: u16) -> u16 {
        self.masks.binary_search(&mask).map_or(0, |s| s as u16)
    }
}

/// How every pair is weighed: a weight per (fit, pattern) and prior log odds per fit.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Weighing {
    /// The weight of pattern j under fit g, at `g * patterns + j`.
    pub table: Vec<f64>,
    /// The prior log odds of a link per fit.
    pub prior: Vec<f64>,
    /// Patterns per fit.
    pub patterns: usize,
    /// A pair takes the fit of its stratum (else fit 0).
    pub by_stratum: bool,
}

impl Weighing {
    /// The weighing by `fits` (one pooled fit, or one per stratum) of `patterns`, with the
    /// prior log odds `link_log_odds` when given, else each fit's ln(p / (1 - p)) (0 where p is
    /// 0 or 1).
    pub fn new(fits: &[&Fit], patterns: &[Vec<u8>], link_log_odds: Option<&[f64]>) -> Weighing {
        let table = fits
            .iter()
            .flat_map(|f| patterns.iter().map(|pat| f.pattern_weight(pat)))
            .collect();
        let prior = match link_log_odds {
            Some(l) => l.to_vec(),
            None => fits
                .iter()
                .map(|f| {
                    if f.p > 0.0 && f.p < 1.0 {
                        f.prior_log_odds()
                    } else {
                        0.0
                    }
                })
                .collect(),
        };
        Weighing {
            table,
            prior,
            patterns: patterns.len(),
            by_stratum: fits.len() > 1,
        }
    }

    /// The fit a pair of `stratum` takes.
    pub fn fit_of(&self, stratum: u16) -> usize {
        if self.by_stratum {
            stratum as usize
        } else {
            0
        }
    }

    /// The field-level weight of a pair (no value-frequency adjustment).
    pub fn weight(&self, pattern: u32, stratum: u16) -> f64 {
        self.table[self.fit_of(stratum) * self.patterns + pattern as usize]
    }

    /// Weight plus the prior log odds of its fit.
    pub fn theta(&self, stratum: u16, weight: f64) -> f64 {
        weight + self.prior[self.fit_of(stratum)]
    }
}

/// The leave-one-field-out m of some fits: their level weights, and whether a pair takes the
/// fit of its stratum (else the first).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct LooPlan {
    /// Per fit, per field, per level: the weight.
    pub weights: Vec<Vec<Vec<f64>>>,
    /// A pair takes the fit of its stratum.
    pub by_stratum: bool,
}

/// The first step of a round, for every piece.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct RoundA {
    /// The round (from 0).
    pub round: usize,
    /// How the pairs are weighed for this round's BP.
    pub weighing: Weighing,
    /// The pooled fit's leave-one-field-out m, then the strata's in their rounds.
    pub loo: Vec<LooPlan>,
    /// Whether to sum the link probabilities per stratum and pattern (the strata's rounds).
    pub strata_sums: bool,
    /// Strata (for the per-stratum sums).
    pub strata: usize,
}

/// A piece's sums of the first step (they add over pieces).
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct SumsA {
    /// Per pattern: the sum of its pairs' link probabilities.
    pub pattern_p: Vec<f64>,
    /// Per [`LooPlan`]: the bins of [`model::leave_one_out_bins`].
    pub loo: Vec<Vec<f64>>,
    /// Per (stratum, pattern): pairs and their link probabilities' sum.
    pub strata: Vec<(f64, f64)>,
}

impl SumsA {
    /// Adds another piece's sums.
    pub fn add(&mut self, other: &SumsA) {
        add_into(&mut self.pattern_p, &other.pattern_p);
        if self.loo.len() < other.loo.len() {
            self.loo.resize(other.loo.len(), Vec::new());
        }
        for (a, b) in self.loo.iter_mut().zip(&other.loo) {
            add_into(a, b);
        }
        if self.strata.len() < other.strata.len() {
            self.strata.resize(other.strata.len(), (0.0, 0.0));
        }
        for (a, b) in self.strata.iter_mut().zip(&other.strata) {
            a.0 += b.0;
            a.1 += b.1;
        }
    }
}

fn add_into(a: &mut Vec<f64>, b: &[f64]) {
    if a.len() < b.len() {
        a.resize(b.len(), 0.0);
    }
    for (x, y) in a.iter_mut().zip(b) {
        *x += y;
    }
}

/// The second step of a round (the link prior's), for every piece.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RoundB {
    /// The round (from 0): the prior's BP starts from fresh messages in round 0 only.
    pub round: usize,
    /// The prior log odds of a link, per group of pairs.
    pub link_log_odds: Vec<f64>,
    /// A pair's group is its stratum (else 0).
    pub by_stratum: bool,
}

/// A piece's sums of the link prior's step (they add over pieces).
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct SumsB {
    /// Per group: the sum of the link probabilities.
    pub post: Vec<f64>,
    /// Per group: the prior's expected link count.
    pub prior: Vec<f64>,
}

impl SumsB {
    /// Adds another piece's sums.
    pub fn add(&mut self, other: &SumsB) {
        add_into(&mut self.post, &other.post);
        add_into(&mut self.prior, &other.prior);
    }
}

/// A set of candidate pairs holding whole connected components of the candidate graph.
#[derive(Clone, Copy)]
pub struct Piece<'a> {
    /// Left records (indices in `left` are below it).
    pub n_left: usize,
    /// Per pair: its left record.
    pub left: &'a [u32],
    /// Per pair: its right record.
    pub right: &'a [u32],
    /// Per pair: its pattern, an index into the [`Shape`]'s patterns.
    pub pattern: &'a [u32],
    /// Per pair: its stratum (None without strata).
    pub stratum: Option<&'a [u16]>,
}

/// A piece's link prior: its BP state, and how its pairs are grouped.
pub struct PiecePrior {
    prior: LinkPrior,
    by_stratum: bool,
}

impl PiecePrior {
    /// The messages per pair (see [`LinkPrior::messages_by_pair`]).
    pub fn messages_by_pair(&self, pairs: usize) -> (Vec<f64>, Vec<f64>) {
        self.prior.messages_by_pair(pairs)
    }

    /// Messages of an earlier round taken back (see [`LinkPrior::set_messages_by_pair`]).
    pub fn set_messages_by_pair(&mut self, lm: &[f64], rm: &[f64]) {
        self.prior.set_messages_by_pair(lm, rm);
    }
}

impl<'a> Piece<'a> {
    /// Pairs in the piece.
    pub fn len(&self) -> usize {
        self.left.len()
    }

    /// True without pairs.
    pub fn is_empty(&self) -> bool {
        self.left.is_empty()
    }

    /// The stratum of pair i.
    pub fn stratum(&self, i: usize) -> u16 {
        self.stratum.map_or(0, |s| s[i])
    }

    /// Every pair's theta under `w`, written into `theta` (as long as the piece).
    pub fn thetas_into(&self, w: &Weighing, theta: &mut [f64]) {
        use rayon::prelude::*;
        theta.par_iter_mut().enumerate().for_each(|(i, t)| {
            let (j, s) = (self.pattern[i], self.stratum(i));
            *t = w.theta(s, w.weight(j, s));
        });
    }

    /// The first step of a round on this piece's pairs of thetas `theta` (from
    /// [`Piece::thetas_into`] with the round's weighing): the rough one-to-one link
    /// probabilities and the piece's sums.
    pub fn round_a(&self, shape: &Shape, input: &RoundA, theta: &[f64]) -> (Vec<f64>, SumsA) {
        let marg = confidence::marginals(self.n_left, self.left, self.right, theta, &REFINEMENT_BP);
        let p = marg.p;
        let mut pattern_p = vec![0.0f64; shape.patterns.len()];
        for (&j, &q) in self.pattern.iter().zip(&p) {
            pattern_p[j as usize] += q;
        }
        let loo = input
            .loo
            .iter()
            .map(|plan| {
                let by = plan.by_stratum;
                model::leave_one_out_bins(
                    &shape.patterns,
                    &shape.levels,
                    &plan.weights,
                    self.pattern,
                    |i| if by { self.stratum(i) as usize } else { 0 },
                    &p,
                )
            })
            .collect();
        let strata = match (input.strata_sums, self.stratum) {
            (true, Some(s)) => {
                model::stratum_sums(self.pattern, s, &p, input.strata, shape.patterns.len())
            }
            _ => Vec::new(),
        };
        (
            p,
            SumsA {
                pattern_p,
                loo,
                strata,
            },
        )
    }

    /// The link prior's graph of this piece, its pairs in group 0.
    pub fn link_prior(&self) -> PiecePrior {
        PiecePrior {
            prior: LinkPrior::new(self.n_left, self.left, self.right, |_| 0),
            by_stratum: false,
        }
    }

    /// The link prior's step on this piece (messages kept in `prior`), from the round's link
    /// probabilities `p`.
    pub fn round_b(&self, prior: &mut PiecePrior, input: &RoundB, p: &[f64]) -> SumsB {
        if input.by_stratum != prior.by_stratum {
            let by = input.by_stratum;
            prior
                .prior
                .regroup(|i| if by { self.stratum(i) as u32 } else { 0 });
            prior.by_stratum = by;
        }
        let (post, prior_k) = prior.prior.sums(&input.link_log_odds, p, &REFINEMENT_BP);
        SumsB {
            post,
            prior: prior_k,
        }
    }
}

/// The global side of the refinement (see the module doc).
pub struct Refinement {
    /// The pattern table and the strata's masks.
    pub shape: Shape,
    counts: PatternCounts,
    known: Known,
    /// The pooled laws, refined round by round.
    pub fit: Fit,
    /// The strata's laws (`of_pair` is the caller's; left empty here).
    pub strata: Option<Strata>,
    /// The prior log odds of a link, per group (empty before the first round).
    pub link_log_odds: Vec<f64>,
    /// The pooled rounds' prior log odds, kept when the strata take over.
    pub pooled_link_log_odds: Option<f64>,
    /// The last round's mean link probability per pattern.
    pub gamma: Vec<f64>,
    round: usize,
    next: Weighing,
}

impl Refinement {
    /// The refinement of plain EM's `fit` over pattern counts `counts`, with strata of pass
    /// masks `masks` (ascending; None or fewer than two: no strata) and laws `known`.
    pub fn new(counts: PatternCounts, fit: Fit, masks: Option<Vec<u16>>, known: Known) -> Self {
        let strata = masks.filter(|m| m.len() > 1).map(|masks| Strata {
            masks,
            of_pair: Vec::new(),
            fits: Vec::new(),
        });
        let shape = Shape {
            levels: counts.levels.clone(),
            patterns: counts.patterns.clone(),
            masks: strata.as_ref().map(|s| s.masks.clone()).unwrap_or_default(),
        };
        let next = Weighing::new(&[&fit], &shape.patterns, None);
        Refinement {
            shape,
            counts,
            known,
            fit,
            strata,
            link_log_odds: Vec::new(),
            pooled_link_log_odds: None,
            gamma: Vec::new(),
            round: 0,
            next,
        }
    }

    /// Candidate pairs (the sum of the pattern counts).
    pub fn pairs(&self) -> f64 {
        self.counts.counts.iter().sum()
    }

    /// Rounds in all.
    pub fn rounds(&self) -> usize {
        ONE_TO_ONE_ROUNDS
            + if self.strata.is_some() {
                STRATA_ROUNDS
            } else {
                0
            }
    }

    /// The round under way (from 0); [`Refinement::rounds`] once done.
    pub fn round(&self) -> usize {
        self.round
    }

    fn stratified(&self) -> bool {
        self.round >= ONE_TO_ONE_ROUNDS && self.strata.is_some()
    }

    /// How the pairs are weighed now: for the next round's BP, or, after the last round, for
    /// the stages after the fit.
    pub fn weighing(&self) -> &Weighing {
        &self.next
    }

    /// The first step of the round under way.
    pub fn round_a(&self) -> RoundA {
        let stratified = self.stratified();
        let mut loo = vec![LooPlan {
            weights: vec![self.fit.level_weights()],
            by_stratum: false,
        }];
        if let Some(s) = self
            .strata
            .as_ref()
            .filter(|s| stratified && !s.fits.is_empty())
        {
            loo.push(LooPlan {
                weights: s.fits.iter().map(|f| f.level_weights()).collect(),
                by_stratum: true,
            });
        }
        RoundA {
            round: self.round,
            weighing: self.next.clone(),
            loo,
            strata_sums: stratified,
            strata: self.shape.masks.len(),
        }
    }

    /// The round's second step, when it is known before the first step's sums: in every
    /// round whose first step leaves the link prior's log odds as they are (all but the first
    /// round and the first stratified round, which start them). A distributed run then makes
    /// both steps in one pass over its pieces.
    pub fn early_b(&self) -> Option<RoundB> {
        let stratified = self.stratified();
        let groups = if stratified {
            self.shape.masks.len()
        } else {
            1
        };
        (!self.link_log_odds.is_empty() && self.link_log_odds.len() == groups).then(|| RoundB {
            round: self.round,
            link_log_odds: self.link_log_odds.clone(),
            by_stratum: stratified,
        })
    }

    /// The laws refitted from the pieces' summed first-step sums; returns the round's second
    /// step.
    pub fn take_a(&mut self, sums: &SumsA) -> RoundB {
        let stratified = self.stratified();
        self.gamma = sums
            .pattern_p
            .iter()
            .zip(&self.counts.counts)
            .map(|(s, &n)| s / n)
            .collect();
        let pooled_fits = [&self.fit];
        let pooled_m = sums.loo.first().map(|b| {
            model::leave_one_out_finish(b, &self.shape.levels, &pooled_fits)
                .into_iter()
                .next()
                .unwrap_or_default()
        });
        let strata_m = match (sums.loo.get(1), self.strata.as_ref()) {
            (Some(b), Some(s)) if stratified => {
                let fits: Vec<&Fit> = s.fits.iter().collect();
                Some(model::leave_one_out_finish(b, &self.shape.levels, &fits))
            }
            _ => None,
        };
        let mut fit = model::fit_from_shares(&self.counts, &self.gamma, &self.fit, &self.known);
        fit.m = pooled_m.unwrap_or_default();
        self.known.apply_m(&mut fit.m);
        self.fit = fit;
        if let (Some(s), true) = (self.strata.as_mut(), stratified) {
            s.refit_from_sums(
                &self.shape.patterns,
                &self.shape.levels,
                &sums.strata,
                &self.fit,
            );
            if let Some(ms) = strata_m {
                for (f, m) in s.fits.iter_mut().zip(ms) {
                    f.m = m;
                }
            }
        }
        let groups = match self.strata.as_ref().filter(|_| stratified) {
            Some(s) => s.fits.len(),
            None => 1,
        };
        if self.link_log_odds.len() != groups {
            // The pooled rounds' prior, kept when the strata take over.
            self.pooled_link_log_odds = self.link_log_odds.first().copied();
            // Each stratum starts from its share's log odds, moved as far as the pooled prior
            // has moved from the pooled share's.
            let shift = self
                .pooled_link_log_odds
                .map_or(0.0, |l| l - self.fit.prior_log_odds());
            self.link_log_odds = match self.strata.as_ref().filter(|_| stratified) {
                Some(s) => s.fits.iter().map(|f| f.prior_log_odds() + shift).collect(),
                None => vec![self.fit.prior_log_odds() + shift],
            };
        }
        RoundB {
            round: self.round,
            link_log_odds: self.link_log_odds.clone(),
            by_stratum: stratified,
        }
    }

    /// The link prior's update from the pieces' summed second-step sums; the round ends.
    pub fn take_b(&mut self, sums: &SumsB) {
        confidence::apply_prior_step(&mut self.link_log_odds, &sums.post, &sums.prior);
        let stratified = self.stratified();
        let fits: Vec<&Fit> = match self.strata.as_ref().filter(|_| stratified) {
            Some(s) => s.fits.iter().collect(),
            None => vec![&self.fit],
        };
        self.next = Weighing::new(&fits, &self.shape.patterns, Some(&self.link_log_odds));
        self.round += 1;
        if self.round == self.rounds() && self.link_log_odds.len() == 1 {
            self.pooled_link_log_odds = self.link_log_odds.first().copied();
        }
    }

    /// Runs every round on one piece (one machine: the whole graph); returns the last round's
    /// link probabilities. `cancelled` is asked before each round.
    pub fn run_on(
        &mut self,
        piece: &Piece<'_>,
        cancelled: &dyn Fn() -> bool,
    ) -> crate::error::Result<Vec<f64>> {
        crate::budget::trace_memory("fit: before the prior's graph");
        let mut prior = piece.link_prior();
        crate::budget::trace_memory("fit: the prior's graph");
        let mut theta = vec![0.0f64; piece.len()];
        let mut p = Vec::new();
        while self.round < self.rounds() {
            if cancelled() {
                return Err(crate::error::Error::new(
                    crate::ErrorKind::Cancelled,
                    format!(
                        "the run was stopped in round {} of the fitting stage",
                        self.round + 1
                    ),
                ));
            }
            // Only the last round's link probabilities are kept (8 bytes a pair less at the
            // fit's peak).
            drop(std::mem::take(&mut p));
            crate::budget::trace_memory("fit: round start");
            let a = self.round_a();
            piece.thetas_into(&a.weighing, &mut theta);
            let (q, sums) = piece.round_a(&self.shape, &a, &theta);
            crate::budget::trace_memory("fit: rough marginals");
            let b = self.take_a(&sums);
            let sums = piece.round_b(&mut prior, &b, &q);
            crate::budget::trace_memory("fit: link prior");
            self.take_b(&sums);
            p = q;
        }
        Ok(p)
    }
}
