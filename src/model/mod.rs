//! The Fellegi–Sunter model: the true-pair law m, the false-pair law u and the true share p,
//! fitted by EM over agreement-pattern counts.
//!
//! In: [`PatternCounts`]. Out: a [`Fit`] and the log-likelihood-ratio weights. This module sees
//! agreement patterns only, never record values or files.
//!
//! EM for the two-class latent model with conditionally independent fields (Winkler 1988; Jaro
//! 1989, JASA 84:414). A missing field is left out of both classes' likelihoods, so it carries
//! no evidence; the share of missing values in each class is estimated afterwards for the
//! feasibility assessment. Several deterministic starts are run and the best likelihood kept; a
//! floor keeps every cell positive, and a guard swaps the classes when EM has put the
//! agreeing pairs in u (label switching).
//!
//! Refinements on top: the M-step from given per-pattern link shares ([`fit_from_shares`],
//! for the one-to-one refinement), one fit per set of blocking passes ([`Strata`]), and the
//! per-value weights of value-frequency weighting ([`ValueFrequency`], from value counts).

use crate::compare::{Comparison, PatternCounts, MISSING_LEVEL};

pub mod check;

/// Smallest probability a cell of m or u may take, so that no weight is infinite.
pub const FLOOR: f64 = 1e-6;

/// The fitted laws.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Fit {
    /// Share of candidate pairs that are true pairs.
    pub p: f64,
    /// m-probabilities: per field, per observed level, summing to 1.
    pub m: Vec<Vec<f64>>,
    /// u-probabilities: per field, per observed level, summing to 1.
    pub u: Vec<Vec<f64>>,
    /// Per field: share of true pairs with the field missing.
    pub m_missing: Vec<f64>,
    /// Per field: share of false pairs with the field missing.
    pub u_missing: Vec<f64>,
    /// Log-likelihood of the pattern counts at the fit.
    pub loglik: f64,
    /// Iterations used by the kept start.
    pub iterations: usize,
    /// False when the kept start hit the iteration cap.
    pub converged: bool,
    /// True when the label-switching guard swapped the classes.
    pub switched: bool,
}

/// EM settings.
#[derive(Debug, Clone)]
pub struct EmOptions {
    /// Iteration cap per start.
    pub max_iterations: usize,
    /// Relative change of the log-likelihood that counts as converged.
    pub tolerance: f64,
    /// A first guess of p (e.g. the smaller table's size over the number of candidates).
    pub p_hint: f64,
    /// Laws held fixed or used as a start (from labelled pairs or random pairs).
    pub known: Known,
}

/// Laws known from outside the EM: m from labelled true pairs, u from random pairs.
#[derive(Debug, Clone, Default)]
pub struct Known {
    /// m estimated from labelled pairs.
    pub m: Option<Vec<Vec<f64>>>,
    /// Keep `m` fixed (true) or only start from it (false).
    pub fix_m: bool,
    /// u estimated from random pairs, kept fixed.
    pub u: Option<Vec<Vec<f64>>>,
}

impl Known {
    fn apply(&self, s: &mut State) {
        if let (Some(m), true) = (&self.m, self.fix_m) {
            s.m = m.clone();
        }
        if let Some(u) = &self.u {
            s.u = u.clone();
        }
    }

    /// Puts back a fixed m (from labelled pairs) over an estimate.
    pub fn apply_m(&self, m: &mut Vec<Vec<f64>>) {
        if let (Some(known), true) = (&self.m, self.fix_m) {
            m.clone_from(known);
        }
    }

    /// Whether m or u is held fixed.
    pub fn any_fixed(&self) -> bool {
        (self.m.is_some() && self.fix_m) || self.u.is_some()
    }
}

/// Level frequencies of a set of patterns (missing left out), floored: the law of a sample
/// of pairs known to be true (labelled) or almost all false (random pairs).
pub fn law_of(levels: &[usize], patterns: &[Vec<u8>]) -> Vec<Vec<f64>> {
    let mut law: Vec<Vec<f64>> = levels.iter().map(|&l| vec![0.0; l]).collect();
    for pat in patterns {
        for (k, &l) in pat.iter().enumerate() {
            if l != MISSING_LEVEL {
                law[k][l as usize] += 1.0;
            }
        }
    }
    law.iter_mut().for_each(|v| normalise_with_floor(v));
    law
}

impl Fit {
    /// Log-likelihood-ratio weight of each field's levels: ln(m / u).
    pub fn level_weights(&self) -> Vec<Vec<f64>> {
        self.m
            .iter()
            .zip(&self.u)
            .map(|(m, u)| m.iter().zip(u).map(|(a, b)| (a / b).ln()).collect())
            .collect()
    }

    /// The log prior odds ln(p / (1 - p)) of a candidate pair being true.
    pub fn prior_log_odds(&self) -> f64 {
        (self.p / (1.0 - self.p)).ln()
    }

    /// The weight of a pattern: the sum over observed fields of ln(m / u).
    pub fn pattern_weight(&self, pattern: &[u8]) -> f64 {
        pattern
            .iter()
            .enumerate()
            .filter(|(_, &l)| l != MISSING_LEVEL)
            .map(|(k, &l)| (self.m[k][l as usize] / self.u[k][l as usize]).ln())
            .sum()
    }
}

struct State {
    p: f64,
    m: Vec<Vec<f64>>,
    u: Vec<Vec<f64>>,
}

fn normalise_with_floor(v: &mut [f64]) {
    let total: f64 = v.iter().sum();
    if total <= 0.0 {
        let n = v.len() as f64;
        v.iter_mut().for_each(|x| *x = 1.0 / n);
        return;
    }
    v.iter_mut().for_each(|x| *x = (*x / total).max(FLOOR));
    let total: f64 = v.iter().sum();
    v.iter_mut().for_each(|x| *x /= total);
}

/// Per pattern: (ln P(pattern, M), ln P(pattern, U)).
fn joint_logs(s: &State, pc: &PatternCounts) -> Vec<(f64, f64)> {
    pc.patterns
        .iter()
        .map(|g| {
            let mut lm = s.p.ln();
            let mut lu = (1.0 - s.p).ln();
            for (k, &l) in g.iter().enumerate() {
                if l != MISSING_LEVEL {
                    lm += s.m[k][l as usize].ln();
                    lu += s.u[k][l as usize].ln();
                }
            }
            (lm, lu)
        })
        .collect()
}

fn log_sum_exp(a: f64, b: f64) -> f64 {
    let hi = a.max(b);
    hi + ((a - hi).exp() + (b - hi).exp()).ln()
}

/// Log-likelihood of pattern counts under (p, m, u).
pub fn log_likelihood(p: f64, m: &[Vec<f64>], u: &[Vec<f64>], pc: &PatternCounts) -> f64 {
    let s = State {
        p,
        m: m.to_vec(),
        u: u.to_vec(),
    };
    joint_logs(&s, pc)
        .iter()
        .zip(&pc.counts)
        .map(|(&(lm, lu), &n)| n * log_sum_exp(lm, lu))
        .sum()
}

/// Posterior share of each pattern's pairs that are true pairs.
fn responsibilities(s: &State, pc: &PatternCounts) -> (Vec<f64>, f64) {
    let logs = joint_logs(s, pc);
    let mut ll = 0.0;
    let g = logs
        .iter()
        .zip(&pc.counts)
        .map(|(&(lm, lu), &n)| {
            ll += n * log_sum_exp(lm, lu);
            1.0 / (1.0 + (lu - lm).exp())
        })
        .collect();
    (g, ll)
}

/// Per field and level, the pairs' mass in each class (pattern counts weighted by gamma and
/// 1 - gamma), added to the starting masses; with the true and total masses.
fn class_masses(
    g: &[f64],
    pc: &PatternCounts,
    mut m: Vec<Vec<f64>>,
    mut u: Vec<Vec<f64>>,
) -> (Vec<Vec<f64>>, Vec<Vec<f64>>, f64, f64) {
    let (mut true_mass, mut total) = (0.0, 0.0);
    for ((pat, &n), &gg) in pc.patterns.iter().zip(&pc.counts).zip(g) {
        true_mass += n * gg;
        total += n;
        for (k, &l) in pat.iter().enumerate() {
            if l != MISSING_LEVEL {
                m[k][l as usize] += n * gg;
                u[k][l as usize] += n * (1.0 - gg);
            }
        }
    }
    m.iter_mut().for_each(|v| normalise_with_floor(v));
    u.iter_mut().for_each(|v| normalise_with_floor(v));
    (m, u, true_mass, total)
}

fn m_step(g: &[f64], pc: &PatternCounts) -> State {
    let zero: Vec<Vec<f64>> = pc.levels.iter().map(|&l| vec![0.0; l]).collect();
    let (m, u, true_mass, total) = class_masses(g, pc, zero.clone(), zero);
    let p = (true_mass / total).clamp(1e-9, 1.0 - 1e-9);
    State { p, m, u }
}

fn run_em(mut s: State, pc: &PatternCounts, opts: &EmOptions) -> (State, f64, usize, bool) {
    let mut prev = f64::NEG_INFINITY;
    for it in 1..=opts.max_iterations {
        let (g, ll) = responsibilities(&s, pc);
        // EM never lowers the likelihood (Dempster, Laird & Rubin 1977), so the change is
        // a safe convergence measure.
        if (ll - prev).abs() <= opts.tolerance * (ll.abs() + 1.0) {
            return (s, ll, it, true);
        }
        prev = ll;
        s = m_step(&g, pc);
        opts.known.apply(&mut s);
    }
    let (_, ll) = responsibilities(&s, pc);
    (s, ll, opts.max_iterations, false)
}

/// Marginal distribution of each field's observed levels over all pairs; most candidate
/// pairs are false, so this is a good start for u.
fn marginals(pc: &PatternCounts) -> Vec<Vec<f64>> {
    let mut u: Vec<Vec<f64>> = pc.levels.iter().map(|&l| vec![0.0; l]).collect();
    for (pat, &n) in pc.patterns.iter().zip(&pc.counts) {
        for (k, &l) in pat.iter().enumerate() {
            if l != MISSING_LEVEL {
                u[k][l as usize] += n;
            }
        }
    }
    u.iter_mut().for_each(|v| normalise_with_floor(v));
    u
}

/// A start for m: `top` on full agreement, the rest falling geometrically.
fn m_start(levels: &[usize], top: f64) -> Vec<Vec<f64>> {
    levels
        .iter()
        .map(|&l| {
            let mut v = vec![top];
            let mut rest = 1.0 - top;
            for i in 1..l {
                let share = if i + 1 == l { rest } else { rest * 0.6 };
                v.push(share);
                rest -= share;
            }
            normalise_with_floor(&mut v);
            v
        })
        .collect()
}

/// Fits p, m and u by EM from several deterministic starts; keeps the best likelihood.
///
/// Cost: O(iterations x patterns x fields) per start; patterns are at most the product of the
/// fields' level counts and in practice a few hundred.
pub fn fit(pc: &PatternCounts, opts: &EmOptions) -> Fit {
    let hint = opts.p_hint.clamp(1e-4, 0.5);
    let u0 = marginals(pc);
    let starts = [
        (hint, 0.9),
        (hint * 0.25, 0.95),
        ((hint * 2.0).min(0.6), 0.7),
    ];
    let mut best: Option<(State, f64, usize, bool)> = None;
    for &(p, top) in &starts {
        let mut s = State {
            p,
            m: opts
                .known
                .m
                .clone()
                .unwrap_or_else(|| m_start(&pc.levels, top)),
            u: u0.clone(),
        };
        opts.known.apply(&mut s);
        let run = run_em(s, pc, opts);
        if best.as_ref().is_none_or(|b| run.1 > b.1 + 1e-9 * b.1.abs()) {
            best = Some(run);
        }
    }
    let (mut s, loglik, iterations, converged) = best.expect("at least one EM start");
    // Label-switching guard: the true-pair class is the one that agrees more often on the top
    // level in most fields.
    let agreeing = s.m.iter().zip(&s.u).filter(|(m, u)| m[0] > u[0]).count();
    let switched = 2 * agreeing < s.m.len() && !opts.known.any_fixed();
    if switched {
        std::mem::swap(&mut s.m, &mut s.u);
        s.p = 1.0 - s.p;
    }
    let (g, _) = responsibilities(&s, pc);
    let (m_missing, u_missing) = missing_shares(&g, pc);
    Fit {
        p: s.p,
        m: s.m,
        u: s.u,
        m_missing,
        u_missing,
        loglik,
        iterations,
        converged,
        switched,
    }
}

/// The M-step alone, from given per-pattern true-pair shares `gamma` (e.g. the mean
/// one-to-one link probability of each pattern's pairs): m, u and p as EM would set them.
///
/// Used for the one-to-one refinement: plain EM treats each pair on its own, so the members
/// of one household, who agree on surname, address and phone, are all counted as likely true
/// pairs of the same record; weighting each pair by its probability under the constraint that
/// a record has at most one true partner removes that double counting (the idea behind
/// Jaro 1989's use of the assignment problem and Sadinle 2017's bipartite matching model).
pub fn fit_from_shares(pc: &PatternCounts, gamma: &[f64], previous: &Fit, known: &Known) -> Fit {
    let mut s = m_step(gamma, pc);
    known.apply(&mut s);
    let (m_missing, u_missing) = missing_shares(gamma, pc);
    let ll = log_likelihood(s.p, &s.m, &s.u, pc);
    Fit {
        p: s.p,
        m: s.m,
        u: s.u,
        m_missing,
        u_missing,
        loglik: ll,
        iterations: previous.iterations,
        converged: previous.converged,
        switched: previous.switched,
    }
}

/// [`fit_from_shares`] for one stratum of the candidate pairs, its counts smoothed towards the
/// pooled fit `pooled` with the weight of `prior_pairs` pairs in each class (and in p), so a
/// thin stratum falls back on the pooled laws.
pub fn fit_stratum(pc: &PatternCounts, gamma: &[f64], pooled: &Fit, prior_pairs: f64) -> Fit {
    let scaled = |laws: &[Vec<f64>]| -> Vec<Vec<f64>> {
        laws.iter()
            .map(|v| v.iter().map(|x| x * prior_pairs).collect())
            .collect()
    };
    let (m, u, true_mass, total) = class_masses(gamma, pc, scaled(&pooled.m), scaled(&pooled.u));
    let p = ((true_mass + prior_pairs * pooled.p) / (total + prior_pairs)).clamp(1e-9, 1.0 - 1e-9);
    let (m_missing, u_missing) = missing_shares(gamma, pc);
    Fit {
        p,
        loglik: log_likelihood(p, &m, &u, pc),
        m,
        u,
        m_missing,
        u_missing,
        iterations: pooled.iterations,
        converged: pooled.converged,
        switched: pooled.switched,
    }
}

/// Pairs' worth of the pooled fit in each stratum's fit ([`fit_stratum`]).
pub const STRATUM_PRIOR_PAIRS: f64 = 50.0;

/// The candidate pairs split by the set of blocking passes that found them, with one fit per
/// set.
///
/// Blocking breaks conditional independence among false pairs: the false pairs of a pass on
/// surname code and birth year all agree on those, the false pairs of a pass on postcode all
/// agree on the address, so one u-law pooled over the passes expects too many false pairs that
/// agree on both and too few that agree on one. Within the pairs found by one set of passes the
/// blocking keys are held fixed, and the fields are much closer to independent given the class
/// (the reason for fitting each blocking pass on its own, Fellegi & Sunter 1969 §4; Jaro 1989).
#[derive(Debug, Clone)]
pub struct Strata {
    /// The pass mask of each stratum, ascending.
    pub masks: Vec<u16>,
    /// The stratum of each pair (at most 65,536 masks, so two bytes a pair).
    pub of_pair: Vec<u16>,
    /// The fit of each stratum (empty until [`Strata::refit`]).
    pub fits: Vec<Fit>,
}

impl Strata {
    /// Strata from each pair's pass mask.
    pub fn new(passes: &[u16]) -> Strata {
        use rayon::prelude::*;
        let mut seen = vec![false; 1 << 16];
        for &m in passes {
            seen[m as usize] = true;
        }
        let masks: Vec<u16> = (0..1usize << 16)
            .filter(|&m| seen[m])
            .map(|m| m as u16)
            .collect();
        let mut index = vec![0u16; 1 << 16];
        for (j, &m) in masks.iter().enumerate() {
            index[m as usize] = j as u16;
        }
        let of_pair = passes.par_iter().map(|&m| index[m as usize]).collect();
        Strata {
            masks,
            of_pair,
            fits: Vec::new(),
        }
    }

    /// Refits every stratum from the pairs' link probabilities `p`, towards `pooled`.
    pub fn refit(&mut self, pp: &PairPatterns, p: &[f64], pooled: &Fit) {
        let sums = stratum_sums(
            &pp.of_pair,
            &self.of_pair,
            p,
            self.masks.len(),
            pp.patterns.len(),
        );
        self.refit_from_sums(&pp.patterns, &pp.levels, &sums, pooled);
    }

    /// [`Strata::refit`] from [`stratum_sums`] (summed over pieces of the pairs, if split).
    pub fn refit_from_sums(
        &mut self,
        patterns: &[Vec<u8>],
        levels: &[usize],
        sums: &[(f64, f64)],
        pooled: &Fit,
    ) {
        let np = patterns.len();
        self.fits = sums
            .chunks(np.max(1))
            .take(self.masks.len())
            .map(|per| {
                let seen: Vec<usize> = (0..per.len()).filter(|&j| per[j].0 > 0.0).collect();
                let pc = PatternCounts {
                    levels: levels.to_vec(),
                    patterns: seen.iter().map(|&j| patterns[j].clone()).collect(),
                    counts: seen.iter().map(|&j| per[j].0).collect(),
                };
                let gamma: Vec<f64> = seen.iter().map(|&j| per[j].1 / per[j].0).collect();
                fit_stratum(&pc, &gamma, pooled, STRATUM_PRIOR_PAIRS)
            })
            .collect();
    }

    /// The stratum of pair `i` (an index into `masks` and `fits`).
    pub fn stratum_of(&self, i: usize) -> usize {
        self.of_pair[i] as usize
    }
}

/// Per (stratum, pattern), the pairs and their link probabilities' sum (at
/// `stratum * patterns + pattern`), for [`Strata::refit_from_sums`]; pair i has pattern
/// `pattern_of[i]` and stratum `stratum_of[i]`.
pub fn stratum_sums(
    pattern_of: &[u32],
    stratum_of: &[u16],
    p: &[f64],
    strata: usize,
    patterns: usize,
) -> Vec<(f64, f64)> {
    let mut sums = vec![(0.0f64, 0.0f64); strata * patterns];
    for (i, &j) in pattern_of.iter().enumerate() {
        let e = &mut sums[stratum_of[i] as usize * patterns + j as usize];
        e.0 += 1.0;
        e.1 += p[i];
    }
    sums
}

/// Each candidate pair's agreement pattern as an index into the patterns of a
/// [`PatternCounts`] (which are sorted by code), so that per-pair loops look a pattern up in
/// an array instead of hashing its code.
pub struct PairPatterns {
    /// Per pair: its pattern's index.
    pub of_pair: Vec<u32>,
    /// Per pattern: one level per field ([`MISSING_LEVEL`] for missing).
    pub patterns: Vec<Vec<u8>>,
    /// Per pattern: its code.
    pub codes: Vec<u64>,
    /// Observed levels per field.
    pub levels: Vec<usize>,
}

/// Code spaces up to this size are indexed by a dense table, larger ones by binary search.
const DENSE_CODES: u64 = 1 << 20;

impl PairPatterns {
    /// The index of every pair of `comparison` into `counts` (its pattern counts).
    pub fn new(comparison: &Comparison, counts: &PatternCounts) -> PairPatterns {
        use rayon::prelude::*;
        let codes: Vec<u64> = counts
            .patterns
            .iter()
            .map(|p| comparison.encode(p))
            .collect();
        let space = codes.last().map_or(0, |&c| c + 1);
        let of_pair: Vec<u32> = if space <= DENSE_CODES {
            let mut table = vec![u32::MAX; space as usize];
            for (j, &c) in codes.iter().enumerate() {
                table[c as usize] = j as u32;
            }
            comparison
                .codes
                .par_iter()
                .map(|&c| table[c as usize])
                .collect()
        } else {
            comparison
                .codes
                .par_iter()
                .map(|c| codes.binary_search(c).map_or(u32::MAX, |j| j as u32))
                .collect()
        };
        PairPatterns {
            of_pair,
            patterns: counts.patterns.clone(),
            codes,
            levels: counts.levels.clone(),
        }
    }

    /// Number of pairs.
    pub fn len(&self) -> usize {
        self.of_pair.len()
    }

    /// True without pairs.
    pub fn is_empty(&self) -> bool {
        self.of_pair.is_empty()
    }

    /// The levels of pair i's pattern.
    pub fn levels_of(&self, i: usize) -> &[u8] {
        &self.patterns[self.of_pair[i] as usize]
    }
}

/// Bins of the leave-one-field-out log odds in [`leave_one_out_m`]: 0.05 wide over [-30, 30].
const LOO_BINS: usize = 1200;
const LOO_BIN_WIDTH: f64 = 0.05;

/// Each field's m from the pairs that the other fields identify (leave-one-field-out).
///
/// Fitting m of field k from link probabilities that field k's own weight helped make is a
/// trap: a level whose m starts too low (a new town for a mover, a birth date off within the
/// year) gives its true pairs low probabilities, which keep its m low, round after round.
/// Here a pair's evidence on field k is weighed against its probability had field k not been
/// seen: the log odds of its link probability `p[i]` minus field k's weight in the pair's fit,
/// pi_i. Given those, m_k is the maximum of sum_i ln(pi_i m_k,l_i + (1 - pi_i) u_k,l_i) with
/// u_k held at the fit's: a concave problem in m_k alone, solved by EM from the plain
/// pi-weighted level shares. Pairs are binned by their log odds (0.05 wide), so the cost is
/// one pass over the pairs and the fields, then iterations over bins.
///
/// In: the pairs' patterns, their fits (by stratum), link probabilities. Out: per fit,
/// per field, per level, the m estimate (floored, summing to 1).
pub fn leave_one_out_m(
    pp: &PairPatterns,
    fits: &[&Fit],
    stratum_of: impl Fn(usize) -> usize + Sync,
    p: &[f64],
) -> Vec<Vec<Vec<f64>>> {
    let weights: Vec<Vec<Vec<f64>>> = fits.iter().map(|f| f.level_weights()).collect();
    let bins = leave_one_out_bins(
        &pp.patterns,
        &pp.levels,
        &weights,
        &pp.of_pair,
        stratum_of,
        p,
    );
    leave_one_out_finish(&bins, &pp.levels, fits)
}

/// Where each (fit, field, level)'s run of bins starts, and how many runs there are.
fn loo_slots(levels: &[usize], fits: usize) -> (Vec<Vec<usize>>, usize) {
    let mut slot: Vec<Vec<usize>> = Vec::with_capacity(fits);
    let mut n_slots = 0usize;
    for _ in 0..fits {
        slot.push(
            levels
                .iter()
                .map(|&l| {
                    n_slots += l;
                    n_slots - l
                })
                .collect(),
        );
    }
    (slot, n_slots)
}

/// The first half of [`leave_one_out_m`]: pair counts per bin of the leave-one-field-out log
/// odds, per (fit, field, level). Whole counts (as f64, exact below 2^53), so the bins of
/// disjoint sets of pairs add up to those of their union in any order. `weights` are the
/// fits' [`Fit::level_weights`]; pair i has pattern `pattern_of[i]` (into `patterns`) and fit
/// `stratum_of(i)`.
pub fn leave_one_out_bins(
    patterns: &[Vec<u8>],
    levels: &[usize],
    weights: &[Vec<Vec<f64>>],
    pattern_of: &[u32],
    stratum_of: impl Fn(usize) -> usize + Sync,
    p: &[f64],
) -> Vec<f64> {
    use rayon::prelude::*;
    // Flat bins: one run of LOO_BINS per (fit, field, level), at `slot[g][k] + l`.
    let (slot, n_slots) = loo_slots(levels, weights.len());
    // Per (fit, pattern): the (bin run offset, field weight) of each observed field.
    let np = patterns.len();
    let cell: Vec<Vec<(usize, f64)>> = (0..weights.len() * np)
        .map(|c| {
            let (g, j) = (c / np, c % np);
            patterns[j]
                .iter()
                .enumerate()
                .filter(|(_, &l)| l != MISSING_LEVEL)
                .map(|(k, &l)| {
                    (
                        (slot[g][k] + l as usize) * LOO_BINS,
                        weights[g][k][l as usize],
                    )
                })
                .collect()
        })
        .collect();
    let half = (LOO_BINS / 2) as f64;
    let per_width = 1.0 / LOO_BIN_WIDTH;
    // Pair counts per bin of the leave-one-out log odds, in a few large chunks (whole
    // counts: the sum over chunks does not depend on their order).
    let n = pattern_of.len();
    let chunk = n.div_ceil(8).max(1);
    let partial: Vec<Vec<u32>> = (0..n.div_ceil(chunk))
        .into_par_iter()
        .map(|c| {
            let mut bins = vec![0u32; n_slots * LOO_BINS];
            for i in c * chunk..((c + 1) * chunk).min(n) {
                let q = p[i].clamp(1e-12, 1.0 - 1e-12);
                let logit = (q / (1.0 - q)).ln();
                for &(off, w) in &cell[stratum_of(i) * np + pattern_of[i] as usize] {
                    let b =
                        ((logit - w) * per_width + half).clamp(0.0, LOO_BINS as f64 - 1.0) as usize;
                    bins[off + b] += 1;
                }
            }
            bins
        })
        .collect();
    let mut bins = vec![0f64; n_slots * LOO_BINS];
    for part in partial {
        for (x, y) in bins.iter_mut().zip(part) {
            *x += y as f64;
        }
    }
    bins
}

/// The second half of [`leave_one_out_m`]: per fit, per field, per level, the m estimate
/// from the bins of [`leave_one_out_bins`] (summed over pieces of the pairs, if split) and
/// each fit's u.
pub fn leave_one_out_finish(bins: &[f64], levels: &[usize], fits: &[&Fit]) -> Vec<Vec<Vec<f64>>> {
    let (slot, _) = loo_slots(levels, fits.len());
    let half = (LOO_BINS / 2) as f64;
    let pi: Vec<f64> = (0..LOO_BINS)
        .map(|b| {
            let x = (b as f64 + 0.5 - half) * LOO_BIN_WIDTH;
            1.0 / (1.0 + (-x).exp())
        })
        .collect();
    fits.iter()
        .enumerate()
        .map(|(g, fit)| {
            levels
                .iter()
                .enumerate()
                .map(|(k, &nl)| {
                    let u = &fit.u[k];
                    // Each level's occupied bins: (pairs, pi).
                    let per_level: Vec<Vec<(f64, f64)>> = (0..nl)
                        .map(|l| {
                            let run = &bins[(slot[g][k] + l) * LOO_BINS..][..LOO_BINS];
                            run.iter()
                                .zip(&pi)
                                .filter(|(n, _)| **n > 0.0)
                                .map(|(&n, &q)| (n, q))
                                .collect()
                        })
                        .collect();
                    let mut m: Vec<f64> = per_level
                        .iter()
                        .map(|h| h.iter().map(|(n, q)| n * q).sum())
                        .collect();
                    normalise_with_floor(&mut m);
                    for _ in 0..LOO_EM_ITERATIONS {
                        let mut next: Vec<f64> = per_level
                            .iter()
                            .zip(&m)
                            .zip(u)
                            .map(|((h, &ml), &ul)| {
                                h.iter()
                                    .map(|(n, q)| n * q * ml / (q * ml + (1.0 - q) * ul))
                                    .sum()
                            })
                            .collect();
                        normalise_with_floor(&mut next);
                        let change: f64 = next.iter().zip(&m).map(|(a, b)| (a - b).abs()).sum();
                        m = next;
                        if change < 1e-7 {
                            break;
                        }
                    }
                    m
                })
                .collect()
        })
        .collect()
}

/// EM iterations of each field's m in [`leave_one_out_m`].
const LOO_EM_ITERATIONS: usize = 200;

fn missing_shares(g: &[f64], pc: &PatternCounts) -> (Vec<f64>, Vec<f64>) {
    let k = pc.levels.len();
    let (mut mm, mut um) = (vec![0.0; k], vec![0.0; k]);
    let (mut mt, mut ut) = (0.0, 0.0);
    for ((pat, &n), &gg) in pc.patterns.iter().zip(&pc.counts).zip(g) {
        mt += n * gg;
        ut += n * (1.0 - gg);
        for (f, &l) in pat.iter().enumerate() {
            if l == MISSING_LEVEL {
                mm[f] += n * gg;
                um[f] += n * (1.0 - gg);
            }
        }
    }
    let share = |v: Vec<f64>, t: f64| {
        v.into_iter()
            .map(|x| if t > 0.0 { x / t } else { 0.0 })
            .collect()
    };
    (share(mm, mt), share(um, ut))
}

/// Value-frequency weighting of exact agreement (Fellegi & Sunter 1969 §3; Winkler 1989).
///
/// With f_L(v), f_R(v) the shares of value v among each side's non-missing values and
/// S = sum_v f_L(v) f_R(v): u(v) = u_agree f_L(v) f_R(v) / S and m(v) = m_agree f(v), with f(v)
/// the value's share over both sides. The weight of agreeing on v is then
/// ln(m_agree / u_agree) + ln(f(v) S / (f_L(v) f_R(v))): positive extra weight for rare values,
/// negative for common ones. The field's m_agree and u_agree stay the reported ones.
#[derive(Debug, Clone)]
pub struct ValueFrequency {
    /// Per dictionary entry: the added weight when both records hold that value.
    pub adjustment: Vec<f64>,
    /// Per value present on both sides: its share among true pairs, f(v) renormalised.
    pub m_shares: Vec<f64>,
    /// Per value present on both sides: its share among false agreeing pairs, f_L f_R / S.
    pub u_shares: Vec<f64>,
}

/// Builds the value-frequency adjustments from per-value counts on each side.
pub fn value_frequency(left_counts: &[u32], right_counts: &[u32]) -> ValueFrequency {
    let nl: f64 = left_counts.iter().map(|&c| c as f64).sum();
    let nr: f64 = right_counts.iter().map(|&c| c as f64).sum();
    let mut adjustment = vec![0.0; left_counts.len()];
    let (mut m_shares, mut u_shares) = (Vec::new(), Vec::new());
    if nl == 0.0 || nr == 0.0 {
        return ValueFrequency {
            adjustment,
            m_shares,
            u_shares,
        };
    }
    let s: f64 = left_counts
        .iter()
        .zip(right_counts)
        .map(|(&a, &b)| (a as f64 / nl) * (b as f64 / nr))
        .sum();
    let both: Vec<usize> = (0..left_counts.len())
        .filter(|&v| left_counts[v] > 0 && right_counts[v] > 0)
        .collect();
    let f_total: f64 = both
        .iter()
        .map(|&v| (left_counts[v] + right_counts[v]) as f64 / (nl + nr))
        .sum();
    for &v in &both {
        let fl = left_counts[v] as f64 / nl;
        let fr = right_counts[v] as f64 / nr;
        let f = (left_counts[v] + right_counts[v]) as f64 / (nl + nr) / f_total;
        adjustment[v] = (f * s / (fl * fr)).ln();
        m_shares.push(f);
        u_shares.push(fl * fr / s);
    }
    ValueFrequency {
        adjustment,
        m_shares,
        u_shares,
    }
}

/// Pairs' worth of the value-frequency prior in [`value_frequency_on_candidates`].
pub const FREQUENCY_PRIOR_PAIRS: f64 = 20.0;

/// Value-frequency weighting with the true pairs' value shares estimated on the candidates.
///
/// Each value's share among agreeing true pairs is estimated from the candidate pairs that
/// agree exactly on it, each counted with its link probability (`agreeing` gives the value
/// and the probability), and smoothed towards its frequency share f(v) with the weight of
/// [`FREQUENCY_PRIOR_PAIRS`] pairs, so rare values fall back on their frequencies. The false
/// agreeing pairs keep the random-pair shares f_L f_R / S: two records drawn at random hold
/// the same value that way, and blocking on a code of the value or on an unrelated key keeps
/// the shape. (Estimating the false shares on the candidates as well was tried and was worse:
/// false candidates that agree on a value are often household members, who share a rare
/// surname as readily as a common one, and their share washed the signal out.)
pub fn value_frequency_on_candidates(
    left_counts: &[u32],
    right_counts: &[u32],
    agreeing: impl Iterator<Item = (u32, f64)>,
) -> ValueFrequency {
    let prior = value_frequency(left_counts, right_counts);
    let nv = left_counts.len();
    let mut gm = vec![0.0; nv];
    for (v, g) in agreeing {
        if (v as usize) < nv {
            gm[v as usize] += g;
        }
    }
    let tm: f64 = gm.iter().sum();
    let mut adjustment = vec![0.0; nv];
    let mut m_shares = Vec::with_capacity(prior.m_shares.len());
    let a = FREQUENCY_PRIOR_PAIRS;
    let both = (0..nv).filter(|&v| left_counts[v] > 0 && right_counts[v] > 0);
    for (k, v) in both.enumerate() {
        let ms = (gm[v] + a * prior.m_shares[k]) / (tm + a);
        adjustment[v] = (ms / prior.u_shares[k]).ln();
        m_shares.push(ms);
    }
    ValueFrequency {
        adjustment,
        m_shares,
        u_shares: prior.u_shares,
    }
}

/// How strongly two fields move together within each class.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Dependence {
    /// First field (index into the fields).
    pub a: usize,
    /// Second field.
    pub b: usize,
    /// Phi coefficient of "top-level agreement" of the two fields among true pairs.
    pub phi_m: f64,
    /// The same among false pairs.
    pub phi_u: f64,
    /// The expected number of true pairs on the rarer side of the 2×2 table behind `phi_m`
    /// (the smallest of its four margins): how many pairs the coefficient rests on.
    pub support_m: f64,
    /// The same for `phi_u` among false pairs.
    pub support_u: f64,
}

/// A pair of fields with |phi| above this in both classes is reported as strongly dependent.
/// Both, because blocking alone makes the false pairs of one pass agree together on its key
/// fields; dependence in both classes (postcode and phone: one move changes both) is what
/// makes the model count one piece of evidence twice.
pub const STRONG_DEPENDENCE: f64 = 0.25;

/// A |phi| above this in either class is strong on its own: the two fields are then nearly
/// one (street and postcode among households).
pub const NEARLY_ONE_FIELD: f64 = 0.75;

/// A class's phi counts only when its 2×2 table has at least this many (expected) pairs on
/// the rarer side of each field: a coefficient of 1.00 from five same-household pairs says
/// nothing about the extracts. 50 is our choice, the usual order of a cell count for a
/// stable correlation (common practice: a few dozen per cell).
pub const MIN_DEPENDENCE_SUPPORT: f64 = 50.0;

impl Dependence {
    /// Strong in both classes, or nearly one field in either, counting only the classes
    /// with enough pairs behind them (see [`MIN_DEPENDENCE_SUPPORT`]).
    pub fn is_strong(&self) -> bool {
        let sized = |phi: f64, support: f64| {
            if support >= MIN_DEPENDENCE_SUPPORT {
                phi.abs()
            } else {
                0.0
            }
        };
        let (m, u) = (
            sized(self.phi_m, self.support_m),
            sized(self.phi_u, self.support_u),
        );
        m.min(u) > STRONG_DEPENDENCE || m.max(u) > NEARLY_ONE_FIELD
    }
}

/// Measures, for every pair of fields, the phi coefficient (Pearson's correlation of two
/// 0/1 variables; common practice) between "agrees at the top level" on each field, within
/// the true-pair class and within the false-pair class, each pattern weighted by its count
/// times its true-pair share `gamma` (or one minus it). Conditional independence, which the
/// Fellegi–Sunter weights assume, makes both near zero; fields that move together (town and
/// postcode, street and postcode) give large values, and their evidence is counted twice.
pub fn dependence(pc: &PatternCounts, gamma: &[f64]) -> Vec<Dependence> {
    let k = pc.levels.len();
    // Phi and the smallest margin of the 2×2 table it comes from.
    let phi = |a: usize, b: usize, w: &dyn Fn(usize) -> f64| -> (f64, f64) {
        let mut t = [[0.0f64; 2]; 2];
        for (g, pat) in pc.patterns.iter().enumerate() {
            let (x, y) = (pat[a], pat[b]);
            if x == MISSING_LEVEL || y == MISSING_LEVEL {
                continue;
            }
            t[(x == 0) as usize][(y == 0) as usize] += w(g);
        }
        let (r1, r0) = (t[1][0] + t[1][1], t[0][0] + t[0][1]);
        let (c1, c0) = (t[0][1] + t[1][1], t[0][0] + t[1][0]);
        let den = (r1 * r0 * c1 * c0).sqrt();
        let support = r1.min(r0).min(c1).min(c0);
        if den > 0.0 {
            ((t[1][1] * t[0][0] - t[1][0] * t[0][1]) / den, support)
        } else {
            (0.0, support)
        }
    };
    let wm = |g: usize| pc.counts[g] * gamma[g];
    let wu = |g: usize| pc.counts[g] * (1.0 - gamma[g]);
    let mut out = Vec::new();
    for a in 0..k {
        for b in a + 1..k {
            let (phi_m, support_m) = phi(a, b, &wm);
            let (phi_u, support_u) = phi(a, b, &wu);
            out.push(Dependence {
                a,
                b,
                phi_m,
                phi_u,
                support_m,
                support_u,
            });
        }
    }
    out
}

/// A fit that says nothing: flat laws and p = 0, for runs without candidate pairs.
pub fn null_fit(levels: &[usize]) -> Fit {
    let flat: Vec<Vec<f64>> = levels.iter().map(|&l| vec![1.0 / l as f64; l]).collect();
    Fit {
        p: 0.0,
        m: flat.clone(),
        u: flat,
        m_missing: vec![0.0; levels.len()],
        u_missing: vec![0.0; levels.len()],
        loglik: 0.0,
        iterations: 0,
        converged: true,
        switched: false,
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::rng::Rng;
    use std::collections::BTreeMap;

    /// Simulates `n` pairs from known laws (missing with probability `miss` per field) and
    /// returns their pattern counts.
    pub(crate) fn simulate(
        p: f64,
        m: &[Vec<f64>],
        u: &[Vec<f64>],
        miss: f64,
        n: usize,
        seed: u64,
    ) -> PatternCounts {
        let mut rng = Rng::new(seed);
        let cum = |v: &Vec<f64>| {
            v.iter()
                .scan(0.0, |acc, x| {
                    *acc += x;
                    Some(*acc)
                })
                .collect::<Vec<f64>>()
        };
        let mc: Vec<Vec<f64>> = m.iter().map(cum).collect();
        let uc: Vec<Vec<f64>> = u.iter().map(cum).collect();
        let mut counts: BTreeMap<Vec<u8>, f64> = BTreeMap::new();
        for _ in 0..n {
            let laws = if rng.chance(p) { &mc } else { &uc };
            let pat: Vec<u8> = laws
                .iter()
                .map(|c| {
                    if rng.chance(miss) {
                        MISSING_LEVEL
                    } else {
                        rng.pick_cumulative(c) as u8
                    }
                })
                .collect();
            *counts.entry(pat).or_default() += 1.0;
        }
        PatternCounts {
            levels: m.iter().map(Vec::len).collect(),
            patterns: counts.keys().cloned().collect(),
            counts: counts.values().copied().collect(),
        }
    }

    fn opts() -> EmOptions {
        EmOptions {
            max_iterations: 2000,
            tolerance: 1e-12,
            p_hint: 0.1,
            known: Known::default(),
        }
    }

    #[test]
    fn em_recovers_known_laws() {
        // Simulation from known laws: with 400,000 pairs the maximum-likelihood estimates lie
        // within a few standard errors (about 0.002 here) of the truth (consistency of the MLE,
        // common practice).
        let m = vec![
            vec![0.85, 0.10, 0.05],
            vec![0.90, 0.10],
            vec![0.70, 0.20, 0.10],
            vec![0.95, 0.05],
        ];
        let u = vec![
            vec![0.05, 0.15, 0.80],
            vec![0.30, 0.70],
            vec![0.02, 0.08, 0.90],
            vec![0.10, 0.90],
        ];
        let pc = simulate(0.08, &m, &u, 0.1, 400_000, 11);
        let fit = fit(&pc, &opts());
        assert!(fit.converged);
        assert!(!fit.switched);
        assert!((fit.p - 0.08).abs() < 0.005, "p = {}", fit.p);
        for k in 0..m.len() {
            for l in 0..m[k].len() {
                assert!(
                    (fit.m[k][l] - m[k][l]).abs() < 0.02,
                    "m[{k}][{l}] = {}",
                    fit.m[k][l]
                );
                assert!(
                    (fit.u[k][l] - u[k][l]).abs() < 0.01,
                    "u[{k}][{l}] = {}",
                    fit.u[k][l]
                );
            }
            assert!((fit.m_missing[k] - 0.1).abs() < 0.01);
            assert!((fit.u_missing[k] - 0.1).abs() < 0.01);
        }
        let w = fit.level_weights();
        assert!(w[0][0] > 2.0 && w[0][2] < -2.0);
    }

    #[test]
    fn value_frequency_weights_match_simulated_ratios() {
        // Values with Zipf shares (s = 1 over 200 values), the skew of real surnames. True pairs
        // keep the value with probability 0.9; false pairs draw both values independently.
        // The weight of agreeing on v, ln(m_agree/u_agree) + adjustment(v), must match the
        // simulated ln(P(agree on v | true) / P(agree on v | false)) (Fellegi & Sunter 1969
        // §3; Winkler 1989), within sampling error, for the common values.
        let mut rng = Rng::new(1989);
        let nvals = 200;
        let cum: Vec<f64> = (1..=nvals)
            .scan(0.0, |a, k| {
                *a += 1.0 / k as f64;
                Some(*a)
            })
            .collect();
        let n = 200_000;
        let (mut lc, mut rc) = (vec![0u32; nvals], vec![0u32; nvals]);
        let (mut agree_true, mut agree_false) = (vec![0.0; nvals], vec![0.0; nvals]);
        let (mut n_true, mut n_false) = (0.0, 0.0);
        for i in 0..n {
            let a = rng.pick_cumulative(&cum);
            let truth = i % 2 == 0;
            let b = if truth && rng.chance(0.9) {
                a
            } else {
                rng.pick_cumulative(&cum)
            };
            lc[a] += 1;
            rc[b] += 1;
            if truth {
                n_true += 1.0;
                if a == b {
                    agree_true[a] += 1.0;
                }
            } else {
                n_false += 1.0;
                if a == b {
                    agree_false[a] += 1.0;
                }
            }
        }
        let vf = value_frequency(&lc, &rc);
        let m_agree = agree_true.iter().sum::<f64>() / n_true;
        let u_agree = agree_false.iter().sum::<f64>() / n_false;
        let base = (m_agree / u_agree).ln();
        for v in 0..5 {
            let want = ((agree_true[v] / n_true) / (agree_false[v] / n_false)).ln();
            let got = base + vf.adjustment[v];
            assert!(
                (got - want).abs() < 0.15,
                "value rank {}: weight {got}, simulated {want}",
                v + 1
            );
        }
        // The rarest values agreed on weigh more than the commonest.
        assert!(vf.adjustment[150] > vf.adjustment[0] + 3.0);
    }

    #[test]
    fn strata_recover_their_own_laws() {
        // Two strata simulated from known laws that differ (as blocking passes make them), with
        // the classes given: each stratum's fit must be the M-step of its own pairs (Dempster,
        // Laird & Rubin 1977) with STRATUM_PRIOR_PAIRS pairs of the pooled fit added to each
        // class, exactly, and so near the generating laws.
        use crate::compare::{Comparator, Comparison};
        use crate::config::Method;
        let mut rng = Rng::new(1977);
        let laws = [
            (0.2, [0.9, 0.8, 0.3], [0.05, 0.6, 0.1]),
            (0.6, [0.95, 0.2, 0.9], [0.3, 0.05, 0.7]),
        ];
        let comparators: Vec<Comparator> = (0..3)
            .map(|_| Comparator {
                method: Method::Exact,
                bands: Vec::new(),
                relative: false,
            })
            .collect();
        let place = vec![1, 3, 9];
        let (mut codes, mut passes, mut truth) = (Vec::new(), Vec::new(), Vec::new());
        for (g, (p, m, u)) in laws.iter().enumerate() {
            for _ in 0..4000 {
                let t = rng.chance(*p);
                let code: u64 = (0..3)
                    .map(|k| {
                        let agree = rng.chance(if t { m[k] } else { u[k] });
                        place[k] * u64::from(!agree)
                    })
                    .sum();
                codes.push(code);
                passes.push(1u16 << g);
                truth.push(if t { 1.0 } else { 0.0 });
            }
        }
        let comparison = Comparison {
            comparators,
            place,
            codes,
        };
        let pooled = fit_from_shares(
            &comparison.pattern_counts(),
            &{
                let pc = comparison.pattern_counts();
                let mut sum: BTreeMap<u64, f64> = BTreeMap::new();
                for (i, &c) in comparison.codes.iter().enumerate() {
                    *sum.entry(c).or_default() += truth[i];
                }
                pc.patterns
                    .iter()
                    .zip(&pc.counts)
                    .map(|(pat, n)| sum[&comparison.encode(pat)] / n)
                    .collect::<Vec<f64>>()
            },
            &null_fit(&[2, 2, 2]),
            &Known::default(),
        );
        let mut strata = Strata::new(&passes);
        assert_eq!(strata.masks, vec![1, 2]);
        strata.refit(
            &PairPatterns::new(&comparison, &comparison.pattern_counts()),
            &truth,
            &pooled,
        );
        let a = STRATUM_PRIOR_PAIRS;
        for (g, (p, m, u)) in laws.iter().enumerate() {
            let fit = &strata.fits[g];
            let rows: Vec<usize> = (g * 4000..(g + 1) * 4000).collect();
            let n_true: f64 = rows.iter().map(|&i| truth[i]).sum();
            let want_p = (n_true + a * pooled.p) / (4000.0 + a);
            assert!((fit.p - want_p).abs() < 1e-9, "stratum {g}: p {}", fit.p);
            assert!((fit.p - p).abs() < 0.03, "stratum {g}: p {}", fit.p);
            for k in 0..3 {
                let agree = |i: &usize| comparison.level(comparison.codes[*i], k) == 0;
                let m_agree: f64 = rows.iter().filter(|i| agree(i)).map(|&i| truth[i]).sum();
                let u_agree: f64 = rows
                    .iter()
                    .filter(|i| agree(i))
                    .map(|&i| 1.0 - truth[i])
                    .sum();
                let want_m = (m_agree + a * pooled.m[k][0]) / (n_true + a);
                let want_u = (u_agree + a * pooled.u[k][0]) / (4000.0 - n_true + a);
                assert!(
                    (fit.m[k][0] - want_m).abs() < 1e-9,
                    "stratum {g}: m {:?}",
                    fit.m
                );
                assert!(
                    (fit.u[k][0] - want_u).abs() < 1e-9,
                    "stratum {g}: u {:?}",
                    fit.u
                );
                // And near the generating laws (sampling error and the pooled pull).
                assert!(
                    (fit.m[k][0] - m[k]).abs() < 0.06,
                    "stratum {g}: m {:?}",
                    fit.m
                );
                assert!(
                    (fit.u[k][0] - u[k]).abs() < 0.06,
                    "stratum {g}: u {:?}",
                    fit.u
                );
            }
        }
        assert_eq!(strata.stratum_of(0), 0);
        assert_eq!(strata.stratum_of(7999), 1);
    }

    #[test]
    fn candidate_estimate_keeps_the_random_pair_false_shares() {
        // Fellegi & Sunter 1969 §3: the false agreeing pairs hold value v with share
        // f_L(v) f_R(v) / S. True agreeing pairs drawn with Zipf shares (s = 1 over 100 values)
        // and given link probability 1 must give back those shares as m(v), up to sampling
        // error and the FREQUENCY_PRIOR_PAIRS pull towards f(v); false candidates (probability
        // 0) must not move anything.
        let mut rng = Rng::new(1969);
        let cum: Vec<f64> = (1..=100)
            .scan(0.0, |a, k| {
                *a += 1.0 / k as f64;
                Some(*a)
            })
            .collect();
        let (mut lc, mut rc) = (vec![0u32; 100], vec![0u32; 100]);
        let mut agreeing = Vec::new();
        for _ in 0..50_000 {
            let v = rng.pick_cumulative(&cum);
            lc[v] += 1;
            rc[rng.pick_cumulative(&cum)] += 1;
            agreeing.push((v as u32, 1.0));
        }
        // Household members agreeing on rare values, known to be false.
        agreeing.extend((0..5000).map(|i| (90 + (i % 10) as u32, 0.0)));
        let vf = value_frequency_on_candidates(&lc, &rc, agreeing.into_iter());
        let plain = value_frequency(&lc, &rc);
        // Every value is on both sides, so shares are indexed like the values.
        assert_eq!(vf.m_shares.len(), 100);
        assert_eq!(vf.u_shares, plain.u_shares);
        for v in [0usize, 1, 9, 50, 95] {
            let want = lc[v] as f64 / 50_000.0;
            let ms = vf.m_shares[v];
            assert!(
                (ms - want).abs() < 0.002 + 0.05 * want,
                "value {v}: m {ms}, drawn {want}"
            );
            assert!((vf.adjustment[v] - (ms / vf.u_shares[v]).ln()).abs() < 1e-12);
        }
        assert!(vf.adjustment[95] > vf.adjustment[0] + 3.0);
    }

    #[test]
    fn rare_values_weigh_more() {
        // Fellegi & Sunter 1969 §3: agreement on a rare value is stronger evidence. Uniform
        // values get no adjustment (S = 1/N, f = 1/N).
        let vf = value_frequency(&[50, 5, 1, 0], &[40, 6, 2, 3]);
        assert!(vf.adjustment[2] > vf.adjustment[1] && vf.adjustment[1] > vf.adjustment[0]);
        assert!(vf.adjustment[0] < 0.0 && vf.adjustment[2] > 0.0);
        assert_eq!(vf.adjustment[3], 0.0);
        assert!((vf.m_shares.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!((vf.u_shares.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        let flat = value_frequency(&[3, 3, 3], &[2, 2, 2]);
        assert!(flat.adjustment.iter().all(|a| a.abs() < 1e-12));
    }

    #[test]
    fn em_fixed_point_equals_direct_maximum_likelihood() {
        // Fixtures from tests/reference/em_fixtures.py: the mixture's log-likelihood maximised
        // directly by scipy.optimize.minimize (BFGS) on the same pattern counts.
        let doc: serde_json::Value =
            serde_json::from_str(include_str!("../../tests/reference/em_fixtures.json"))
                .expect("fixtures");
        for (c, case) in doc["cases"].as_array().expect("cases").iter().enumerate() {
            let levels: Vec<usize> = case["levels"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_u64().unwrap() as usize)
                .collect();
            let patterns: Vec<Vec<u8>> = case["patterns"]
                .as_array()
                .unwrap()
                .iter()
                .map(|p| {
                    p.as_array()
                        .unwrap()
                        .iter()
                        .map(|l| {
                            l.as_i64().map_or(MISSING_LEVEL, |v| {
                                if v < 0 {
                                    MISSING_LEVEL
                                } else {
                                    v as u8
                                }
                            })
                        })
                        .collect()
                })
                .collect();
            let counts: Vec<f64> = case["counts"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_f64().unwrap())
                .collect();
            let pc = PatternCounts {
                levels,
                patterns,
                counts,
            };
            let f = fit(
                &pc,
                &EmOptions {
                    max_iterations: 100_000,
                    tolerance: 1e-15,
                    p_hint: 0.1,
                    known: Known::default(),
                },
            );
            let close = |a: f64, b: &serde_json::Value, what: &str| {
                let b = b.as_f64().unwrap();
                assert!((a - b).abs() < 1e-4, "case {c} {what}: EM {a}, direct {b}");
            };
            close(f.p, &case["p"], "p");
            for k in 0..f.m.len() {
                for l in 0..f.m[k].len() {
                    close(f.m[k][l], &case["m"][k][l], &format!("m[{k}][{l}]"));
                    close(f.u[k][l], &case["u"][k][l], &format!("u[{k}][{l}]"));
                }
            }
        }
    }

    #[test]
    fn dependence_finds_fields_that_move_together() {
        // Independent fields give phi near 0; a field copied from another among false pairs
        // (a shared household address, say) gives a large phi among false pairs. The phi
        // coefficient is Pearson's correlation of two 0/1 variables (common practice).
        let m = vec![vec![0.9, 0.1], vec![0.85, 0.15], vec![0.8, 0.2]];
        let u = vec![vec![0.1, 0.9], vec![0.2, 0.8], vec![0.15, 0.85]];
        let pc = simulate(0.2, &m, &u, 0.0, 200_000, 8);
        let f = fit(&pc, &opts());
        let (g, _) = responsibilities(
            &State {
                p: f.p,
                m: f.m.clone(),
                u: f.u.clone(),
            },
            &pc,
        );
        assert!(dependence(&pc, &g)
            .iter()
            .all(|d| d.phi_m.abs() < 0.03 && d.phi_u.abs() < 0.03));
        // Now field 1 repeats field 0 among false pairs.
        let mut rng = Rng::new(4);
        let mut counts: BTreeMap<Vec<u8>, f64> = BTreeMap::new();
        for _ in 0..100_000 {
            let x = rng.chance(0.1) as u8 ^ 1; // 0 = agree with probability 0.1
            let y = if rng.chance(0.9) {
                x
            } else {
                rng.chance(0.2) as u8 ^ 1
            };
            let z = rng.chance(0.15) as u8 ^ 1;
            *counts.entry(vec![x, y, z]).or_default() += 1.0;
        }
        let pc = PatternCounts {
            levels: vec![2, 2, 2],
            patterns: counts.keys().cloned().collect(),
            counts: counts.values().copied().collect(),
        };
        let zero = vec![0.0; pc.patterns.len()];
        let d = dependence(&pc, &zero);
        assert!(d[0].phi_u > 0.7, "phi {}", d[0].phi_u);
        assert!(d[1].phi_u.abs() < 0.03 && d[2].phi_u.abs() < 0.03);
        // Field 0 agrees in about 10% of the 100,000 pairs: the rarer side holds about
        // 10,000 of them, and the dependence is strong.
        assert!(
            (d[0].support_u - 10_000.0).abs() < 500.0,
            "{}",
            d[0].support_u
        );
        assert!(d[0].is_strong());
    }

    #[test]
    fn dependence_needs_pairs_behind_it() {
        // Five pairs agreeing on both fields among 10,000 that agree on neither: phi is 1.00
        // exactly (Pearson's correlation of two 0/1 variables; common practice), but it rests
        // on five pairs and is not called strong.
        let pc = PatternCounts {
            levels: vec![2, 2],
            patterns: vec![vec![0, 0], vec![1, 1]],
            counts: vec![5.0, 10_000.0],
        };
        let d = dependence(&pc, &[0.0, 0.0]);
        assert!((d[0].phi_u - 1.0).abs() < 1e-12, "{}", d[0].phi_u);
        assert_eq!(d[0].support_u, 5.0);
        assert!(!d[0].is_strong());
        // The same proportions with 100 times the pairs are strong.
        let pc = PatternCounts {
            counts: vec![500.0, 1_000_000.0],
            ..pc
        };
        assert!(dependence(&pc, &[0.0, 0.0])[0].is_strong());
    }

    #[test]
    fn fixed_laws_stay_fixed_and_help() {
        // u held at the truth (as random pairs give it) and m started from labelled pairs:
        // EM must keep u exactly and recover m and p (simulation from known laws).
        let m = vec![vec![0.85, 0.1, 0.05], vec![0.9, 0.1], vec![0.7, 0.3]];
        let u = vec![vec![0.05, 0.15, 0.8], vec![0.3, 0.7], vec![0.2, 0.8]];
        let pc = simulate(0.1, &m, &u, 0.0, 200_000, 17);
        let mut o = opts();
        o.known = Known {
            m: Some(vec![vec![0.6, 0.2, 0.2], vec![0.7, 0.3], vec![0.5, 0.5]]),
            fix_m: false,
            u: Some(u.clone()),
        };
        let f = fit(&pc, &o);
        assert_eq!(f.u, u);
        assert!((f.p - 0.1).abs() < 0.005, "p {}", f.p);
        assert!((f.m[0][0] - 0.85).abs() < 0.02 && (f.m[2][0] - 0.7).abs() < 0.02);
        o.known.fix_m = true;
        let f = fit(&pc, &o);
        assert_eq!(f.m, o.known.m.clone().unwrap());
    }

    #[test]
    fn em_never_lowers_the_likelihood() {
        // The EM monotonicity property (Dempster, Laird & Rubin 1977).
        let m = vec![vec![0.8, 0.2], vec![0.7, 0.2, 0.1]];
        let u = vec![vec![0.2, 0.8], vec![0.1, 0.3, 0.6]];
        let pc = simulate(0.3, &m, &u, 0.0, 20_000, 5);
        let mut s = State {
            p: 0.5,
            m: m_start(&pc.levels, 0.6),
            u: marginals(&pc),
        };
        let mut prev = f64::NEG_INFINITY;
        for _ in 0..50 {
            let (g, ll) = responsibilities(&s, &pc);
            assert!(ll >= prev - 1e-9 * ll.abs());
            prev = ll;
            s = m_step(&g, &pc);
        }
    }

    #[test]
    fn label_switching_guard_keeps_agreement_in_m() {
        // Even when true pairs are the majority (p = 0.7), m must hold the agreement.
        let m = vec![vec![0.9, 0.1], vec![0.85, 0.15], vec![0.8, 0.2]];
        let u = vec![vec![0.1, 0.9], vec![0.2, 0.8], vec![0.15, 0.85]];
        let pc = simulate(0.7, &m, &u, 0.0, 100_000, 3);
        let f = fit(&pc, &opts());
        assert!((f.p - 0.7).abs() < 0.02, "p = {}", f.p);
        assert!(f.m.iter().zip(&f.u).all(|(m, u)| m[0] > u[0]));
    }

    #[test]
    fn leave_one_out_m_escapes_a_trapped_level() {
        // Four fields simulated from known laws under conditional independence; the true-pair
        // law of field 3 puts 0.15 on its disagreement level (movers). The fit handed in has
        // that m at the floor, as the one-to-one refinement left it, and link probabilities
        // from that fit. Each field's m from the other fields' evidence must come back to the
        // generating law (maximum likelihood with the others' posterior as prior: consistent
        // under conditional independence; Fellegi & Sunter 1969 for the model), within
        // sampling error (n = 30,000, true share 0.2: sd of an m cell about 0.005).
        use crate::compare::{Comparator, Comparison};
        use crate::config::Method;
        let mut rng = Rng::new(1969);
        let m = [0.95, 0.9, 0.85, 0.85];
        let u = [0.05, 0.1, 0.2, 0.3];
        let comparators: Vec<Comparator> = (0..4)
            .map(|_| Comparator {
                method: Method::Exact,
                bands: Vec::new(),
                relative: false,
            })
            .collect();
        let place = vec![1, 3, 9, 27];
        let codes: Vec<u64> = (0..30_000)
            .map(|_| {
                let t = rng.chance(0.2);
                (0..4)
                    .map(|k| place[k] * u64::from(!rng.chance(if t { m[k] } else { u[k] })))
                    .sum()
            })
            .collect();
        let comparison = Comparison {
            comparators,
            place,
            codes,
        };
        let mut trapped = null_fit(&[2, 2, 2, 2]);
        trapped.p = 0.2;
        trapped.m = m.iter().map(|&a| vec![a, 1.0 - a]).collect();
        trapped.u = u.iter().map(|&a| vec![a, 1.0 - a]).collect();
        trapped.m[3] = vec![1.0 - FLOOR, FLOOR];
        let post: Vec<f64> = comparison
            .codes
            .iter()
            .map(|&c| {
                let w = trapped.pattern_weight(&comparison.levels_of(c)) + trapped.prior_log_odds();
                1.0 / (1.0 + (-w).exp())
            })
            .collect();
        let pp = PairPatterns::new(&comparison, &comparison.pattern_counts());
        let est = leave_one_out_m(&pp, &[&trapped], |_| 0, &post);
        for k in 0..4 {
            assert!(
                (est[0][k][0] - m[k]).abs() < 0.02,
                "field {k}: m agree {} against {}",
                est[0][k][0],
                m[k]
            );
        }
        // The plain M-step from the same probabilities stays trapped.
        let pc = comparison.pattern_counts();
        let gamma: Vec<f64> = pc
            .patterns
            .iter()
            .map(|pat| {
                let w = trapped.pattern_weight(pat) + trapped.prior_log_odds();
                1.0 / (1.0 + (-w).exp())
            })
            .collect();
        let plain = fit_from_shares(&pc, &gamma, &trapped, &Known::default());
        assert!(plain.m[3][1] < 0.01, "{}", plain.m[3][1]);
    }
}
