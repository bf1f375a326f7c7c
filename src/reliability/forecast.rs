//! A forecast of the mismatch rate by parametric bootstrap on the real candidate graph.
//!
//! The margin sqrt(d) B is asymptotic and assumes an even graph; blocking makes degrees uneven.
//! So we keep the real candidate graph, plant the found matching as the true pairs, redraw
//! every pair's agreement pattern from m (planted pairs) or u (all others), recompute the
//! weights, re-solve the one-to-one matching, and count the planted pairs that are not linked
//! to their planted partner. Replicates are seeded and independent; the forecast is their mean,
//! with the 2.5% and 97.5% points of the replicate rates as the interval.
//!
//! Only what can change the matching is drawn. The matching lets every record stay unlinked,
//! so a pair whose theta (prior log odds plus pattern weight) is not positive is never chosen
//! and does not enter the problem (see [`max_weight_matching`]). The patterns of positive
//! theta are enumerated once with their m- and u-masses (the positive tail; under the u-law
//! of a loose blocking about 1.5 in 10,000 false pairs land there). Per replicate, the false
//! pairs whose pattern lands in the tail are found by geometric gaps of that u-mass (the
//! positions of the successes of independent Bernoulli trials) and their patterns drawn from
//! u given the tail; the planted pairs that fall out of the tail are found the same way with
//! the m-mass. A planted pair in the tail that shares no record with a drawn false pair is a
//! component of one pair and always linked; the rest (the drawn false pairs and the planted
//! pairs they touch, with their patterns drawn from m given the tail) is solved exactly, in
//! the same order of records and pairs as the whole graph, so the matching is the one the whole
//! graph would give with these draws. Cost per replicate: proportional to the drawn pairs,
//! not to the candidate pairs. When the tail holds more than [`MAX_TAIL`] patterns (a positive
//! prior, few fields), every pair's pattern is drawn as a whole instead (the same law).
//!
//! Two sets of laws bracket the truth, and [`bracketed`] runs the bootstrap with both: the
//! laws after the one-to-one refinement, whose true-pair law leaves out true pairs that lose to
//! a rival (too clean: the forecast errs low), and the plain EM laws, whose true-pair law still
//! holds near-matches such as household members (too dirty: it errs high). The forecast is the
//! mean of the two; the interval runs from the lower end of the first to the upper end of the
//! second, and both means are reported.
//!
//! Graphs of more than `max_pairs` pairs are subsampled around planted pairs (see
//! [`subsample`]); then only the sampled planted pairs are counted.

use crate::matching::max_weight_matching;
use crate::model::Fit;
use crate::rng::Rng;
use rayon::prelude::*;
use serde::Serialize;

/// Settings of the bootstrap.
#[derive(Debug, Clone)]
pub struct ForecastOptions {
    /// Number of replicates.
    pub replicates: usize,
    /// Seed; the same seed gives the same forecast.
    pub seed: u64,
    /// Subsample to about this many pairs when the graph is larger.
    pub max_pairs: usize,
    /// Added to the fit's ln(p / (1 - p)) to give the prior log odds the run links with (the
    /// one-to-one prior's distance from the pairwise one; 0 for the pairwise prior).
    pub prior_shift: f64,
}

/// The forecast.
#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct Forecast {
    /// Mean share of planted pairs not recovered.
    pub error_rate: f64,
    /// 2.5% and 97.5% points of the replicate rates.
    pub interval: [f64; 2],
    /// Replicates run.
    pub replicates: usize,
    /// Planted pairs counted per replicate (in the subsample: the sampled ones).
    pub planted: usize,
    /// Candidate pairs used (in the subsample).
    pub pairs_used: usize,
    /// True when the graph was subsampled.
    pub subsampled: bool,
    /// The means from the refined laws and from the plain EM laws, when bracketed.
    pub bracket: Option<[f64; 2]>,
}

/// The forecast as the midpoint of the refined-law and plain-law bootstraps (module doc).
pub fn bracketed(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    planted: &[usize],
    refined: &Fit,
    plain: &Fit,
    opts: &ForecastOptions,
) -> Option<Forecast> {
    let low = forecast(n_left, left, right, planted, refined, opts)?;
    let high = forecast(n_left, left, right, planted, plain, opts)?;
    Some(Forecast {
        error_rate: 0.5 * (low.error_rate + high.error_rate),
        interval: [
            low.interval[0].min(high.interval[0]),
            low.interval[1].max(high.interval[1]),
        ],
        replicates: low.replicates + high.replicates,
        planted: low.planted,
        pairs_used: low.pairs_used,
        subsampled: low.subsampled,
        bracket: Some([low.error_rate, high.error_rate]),
    })
}

/// Most patterns of positive theta enumerated; beyond, every pattern is drawn whole.
pub const MAX_TAIL: usize = 1 << 16;

const NONE: u32 = u32::MAX;

/// One field's law as points: the observed levels scaled by the share observed, then
/// "missing" (weight 0).
fn points(levels: &[f64], missing: f64) -> Vec<f64> {
    let mut v: Vec<f64> = levels.iter().map(|x| x * (1.0 - missing)).collect();
    v.push(missing);
    v
}

/// Draws level indices from a law with "missing" as its last point.
struct Sampler {
    cum: Vec<Vec<f64>>,
    weights: Vec<Vec<f64>>,
}

impl Sampler {
    fn new(levels: &[Vec<f64>], missing: &[f64], weights: &[Vec<f64>]) -> Sampler {
        let cum = levels
            .iter()
            .zip(missing)
            .map(|(l, &miss)| {
                let mut acc = 0.0;
                let mut v: Vec<f64> = l
                    .iter()
                    .map(|x| {
                        acc += x * (1.0 - miss);
                        acc
                    })
                    .collect();
                v.push(1.0);
                v
            })
            .collect();
        Sampler {
            cum,
            weights: weights.to_vec(),
        }
    }

    /// A random pattern's weight.
    fn draw_weight(&self, rng: &mut Rng) -> f64 {
        let mut w = 0.0;
        for (cum, wk) in self.cum.iter().zip(&self.weights) {
            let x = rng.uniform();
            let l = cum.partition_point(|&c| c <= x);
            if l < wk.len() {
                w += wk[l];
            }
        }
        w
    }
}

/// The patterns with positive theta = `c` + weight: their theta and cumulative m- and
/// u-masses, in enumeration order.
#[derive(Debug, Clone)]
pub struct Tail {
    /// Theta of each tail pattern.
    pub theta: Vec<f64>,
    /// Running sums of the patterns' m-masses.
    pub cum_m: Vec<f64>,
    /// Running sums of the patterns' u-masses.
    pub cum_u: Vec<f64>,
}

impl Tail {
    /// The chance that a true pair's theta is positive.
    pub fn m_mass(&self) -> f64 {
        self.cum_m.last().copied().unwrap_or(0.0)
    }

    /// The chance that a false pair's theta is positive.
    pub fn u_mass(&self) -> f64 {
        self.cum_u.last().copied().unwrap_or(0.0)
    }

    /// Theta of a pattern drawn from the law with running sums `cum` given the tail.
    fn draw(&self, cum: &[f64], rng: &mut Rng) -> f64 {
        self.theta[rng.pick_cumulative(cum).min(self.theta.len() - 1)]
    }
}

/// Enumerates the patterns of positive theta = `c` + sum of the fields' weights (missing
/// weighs 0), depth first with a bound: a partial pattern is left when even the best levels of
/// the remaining fields cannot make theta positive. Each pattern's theta is summed in field
/// order, as a whole draw sums it, so the tail is exactly the set a whole draw would find
/// positive. `m` and `u` give each field's points (levels, then missing); `w` the weights of
/// the observed levels. None when there are more than `max` such patterns.
pub fn positive_tail(
    m: &[Vec<f64>],
    u: &[Vec<f64>],
    w: &[Vec<f64>],
    c: f64,
    max: usize,
) -> Option<Tail> {
    let k = w.len();
    let weight = |f: usize, p: usize| w[f].get(p).copied();
    // best[f]: the largest weight fields f.. can add.
    let mut best = vec![0.0f64; k + 1];
    for f in (0..k).rev() {
        let top = (0..u[f].len())
            .filter(|&p| m[f][p] > 0.0 || u[f][p] > 0.0)
            .map(|p| weight(f, p).unwrap_or(0.0))
            .fold(f64::NEG_INFINITY, f64::max);
        best[f] = best[f + 1] + top;
    }
    let mut tail = Tail {
        theta: Vec::new(),
        cum_m: Vec::new(),
        cum_u: Vec::new(),
    };
    // Explicit stack of (field, partial weight, m-mass, u-mass).
    let mut stack: Vec<(usize, f64, f64, f64)> = vec![(0, 0.0, 1.0, 1.0)];
    let (mut sum_m, mut sum_u) = (0.0f64, 0.0f64);
    while let Some((f, s, pm, pu)) = stack.pop() {
        if f == k {
            let theta = c + s;
            if theta > 0.0 {
                if tail.theta.len() >= max {
                    return None;
                }
                sum_m += pm;
                sum_u += pu;
                tail.theta.push(theta);
                tail.cum_m.push(sum_m);
                tail.cum_u.push(sum_u);
            }
            continue;
        }
        let bound = c + s + best[f];
        if bound < -1e-9 * (1.0 + c.abs() + s.abs() + best[f].abs()) {
            continue;
        }
        // Pushed in reverse so patterns come out in level order.
        for p in (0..u[f].len()).rev() {
            if m[f][p] <= 0.0 && u[f][p] <= 0.0 {
                continue;
            }
            let s2 = match weight(f, p) {
                Some(x) => s + x,
                None => s,
            };
            stack.push((f + 1, s2, pm * m[f][p], pu * u[f][p]));
        }
    }
    Some(tail)
}

/// Positions `0..n` of the successes of `n` independent trials of chance `q`, in order, found
/// by geometric gaps: the failures before the next success number floor(ln V / ln(1 - q)) for
/// V uniform on (0, 1] (inversion of the geometric law; Devroye 1986, Non-Uniform Random
/// Variate Generation, §X.2). Cost proportional to the successes.
pub fn bernoulli_hits(n: usize, q: f64, rng: &mut Rng, mut hit: impl FnMut(usize)) {
    if n == 0 || q.is_nan() || q <= 0.0 {
        return;
    }
    if q >= 1.0 {
        (0..n).for_each(hit);
        return;
    }
    let denom = (-q).ln_1p();
    let mut pos = 0usize;
    loop {
        let v = 1.0 - rng.uniform();
        let gap = (v.ln() / denom).floor();
        // A NaN gap (never, for q in (0, 1)) ends the draws too.
        if gap.is_nan() || gap >= (n - pos) as f64 {
            return;
        }
        pos += gap as usize;
        hit(pos);
        pos += 1;
        if pos >= n {
            return;
        }
    }
}

/// How patterns are drawn.
enum Draws {
    /// Through the positive tail (module doc).
    Tail(Tail),
    /// Every pair whole.
    Whole { m: Sampler, u: Sampler, c: f64 },
}

/// The graph the replicates run on, in subsample indices.
struct Graph {
    left: Vec<u32>,
    right: Vec<u32>,
    /// Pair index of each planted pair, ascending.
    planted: Vec<usize>,
    /// Per planted pair: counted in the rate.
    counted: Vec<bool>,
    /// Pair index of each other pair, ascending.
    others: Vec<usize>,
    /// Per left record: its planted pair's position in `planted`, or NONE.
    planted_of_left: Vec<u32>,
    /// Per right record: the same.
    planted_of_right: Vec<u32>,
}

/// One replicate: how many counted planted pairs the matching links to their planted partner.
fn replicate(g: &Graph, draws: &Draws, rng: &mut Rng) -> usize {
    let np = g.planted.len();
    // Theta of each planted pair (NaN: in the tail, not drawn yet), and whether it is positive.
    let mut theta_planted = vec![f64::NAN; np];
    let mut alive = vec![true; np];
    let mut positive_others: Vec<(usize, f64)> = Vec::new();
    match draws {
        Draws::Tail(t) => {
            bernoulli_hits(np, 1.0 - t.m_mass(), rng, |i| alive[i] = false);
            bernoulli_hits(g.others.len(), t.u_mass(), rng, |i| {
                positive_others.push((g.others[i], 0.0));
            });
            for x in &mut positive_others {
                x.1 = t.draw(&t.cum_u, rng);
            }
        }
        Draws::Whole { m, u, c } => {
            for i in 0..np {
                let th = c + m.draw_weight(rng);
                theta_planted[i] = th;
                alive[i] = th > 0.0;
            }
            for &i in &g.others {
                let th = c + u.draw_weight(rng);
                if th > 0.0 {
                    positive_others.push((i, th));
                }
            }
        }
    }
    // The planted pairs in the tail that share a record with a positive other pair.
    let mut involved: Vec<u32> = Vec::with_capacity(2 * positive_others.len());
    for &(i, _) in &positive_others {
        for p in [
            g.planted_of_left[g.left[i] as usize],
            g.planted_of_right[g.right[i] as usize],
        ] {
            if p != NONE && alive[p as usize] {
                involved.push(p);
            }
        }
    }
    involved.sort_unstable();
    involved.dedup();
    if let Draws::Tail(t) = draws {
        for &p in &involved {
            theta_planted[p as usize] = t.draw(&t.cum_m, rng);
        }
    }
    let counted_alive = (0..np).filter(|&i| alive[i] && g.counted[i]).count();
    let counted_involved = involved.iter().filter(|&&p| g.counted[p as usize]).count();
    if positive_others.is_empty() {
        return counted_alive;
    }
    // The rest of the positive graph, in pair order, records renumbered in order: its
    // components, their rows and their ties are those of the whole graph.
    let mut pairs: Vec<(usize, f64, u32)> = positive_others
        .iter()
        .map(|&(i, th)| (i, th, NONE))
        .chain(
            involved
                .iter()
                .map(|&p| (g.planted[p as usize], theta_planted[p as usize], p)),
        )
        .collect();
    pairs.sort_unstable_by_key(|x| x.0);
    let renumber = |ids: Vec<u32>| -> (Vec<u32>, usize) {
        let mut sorted = ids.clone();
        sorted.sort_unstable();
        sorted.dedup();
        let local = ids
            .iter()
            .map(|x| sorted.partition_point(|y| y < x) as u32)
            .collect();
        (local, sorted.len())
    };
    let (ll, nl) = renumber(pairs.iter().map(|x| g.left[x.0]).collect());
    let (rr, _) = renumber(pairs.iter().map(|x| g.right[x.0]).collect());
    let th: Vec<f64> = pairs.iter().map(|x| x.1).collect();
    let m = max_weight_matching(nl, &ll, &rr, &th);
    let found_involved = m
        .chosen
        .iter()
        .filter(|&&k| pairs[k].2 != NONE && g.counted[pairs[k].2 as usize])
        .count();
    counted_alive - counted_involved + found_involved
}

/// Forecasts the mismatch rate; `planted` holds pair indices of the found matching. Returns
/// `None` when nothing is planted or no replicate is asked for.
pub fn forecast(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    planted: &[usize],
    fit: &Fit,
    opts: &ForecastOptions,
) -> Option<Forecast> {
    if planted.is_empty() || opts.replicates == 0 {
        return None;
    }
    let (use_pairs, counted, subsampled) = subsample(n_left, left, right, planted, opts);
    let mut is_planted = vec![false; left.len()];
    for &i in planted {
        is_planted[i] = true;
    }
    let mut is_counted = vec![false; left.len()];
    for &i in &counted {
        is_counted[i] = true;
    }
    let sub_left: Vec<u32> = use_pairs.iter().map(|&i| left[i]).collect();
    let sub_right: Vec<u32> = use_pairs.iter().map(|&i| right[i]).collect();
    let n_right = sub_right.iter().map(|&b| b as usize + 1).max().unwrap_or(0);
    let mut graph = Graph {
        planted: Vec::new(),
        counted: Vec::new(),
        others: Vec::new(),
        planted_of_left: vec![NONE; n_left],
        planted_of_right: vec![NONE; n_right],
        left: sub_left,
        right: sub_right,
    };
    for (k, &i) in use_pairs.iter().enumerate() {
        if is_planted[i] {
            let p = graph.planted.len() as u32;
            graph.planted_of_left[left[i] as usize] = p;
            graph.planted_of_right[right[i] as usize] = p;
            graph.planted.push(k);
            graph.counted.push(is_counted[i]);
        } else {
            graph.others.push(k);
        }
    }
    let n_counted = graph.counted.iter().filter(|&&c| c).count();
    if n_counted == 0 {
        return None;
    }
    let w = fit.level_weights();
    let c = fit.prior_log_odds() + opts.prior_shift;
    let m_points: Vec<Vec<f64>> = fit
        .m
        .iter()
        .zip(&fit.m_missing)
        .map(|(l, &x)| points(l, x))
        .collect();
    let u_points: Vec<Vec<f64>> = fit
        .u
        .iter()
        .zip(&fit.u_missing)
        .map(|(l, &x)| points(l, x))
        .collect();
    let draws = match positive_tail(&m_points, &u_points, &w, c, MAX_TAIL) {
        Some(t) => Draws::Tail(t),
        None => Draws::Whole {
            m: Sampler::new(&fit.m, &fit.m_missing, &w),
            u: Sampler::new(&fit.u, &fit.u_missing, &w),
            c,
        },
    };
    // One random stream per replicate, each replicate drawn in one thread: the draws do not
    // depend on the thread count.
    let rates: Vec<f64> = (0..opts.replicates)
        .into_par_iter()
        .map(|r| {
            let mut rng = Rng::stream(opts.seed, r as u64);
            let found = replicate(&graph, &draws, &mut rng);
            1.0 - found as f64 / n_counted as f64
        })
        .collect();
    let mean = rates.iter().sum::<f64>() / rates.len() as f64;
    let mut sorted = rates.clone();
    sorted.sort_by(f64::total_cmp);
    let q = |f: f64| sorted[((sorted.len() - 1) as f64 * f).round() as usize];
    Some(Forecast {
        error_rate: mean,
        interval: [q(0.025), q(0.975)],
        replicates: rates.len(),
        planted: n_counted,
        pairs_used: use_pairs.len(),
        subsampled,
        bracket: None,
    })
}

/// Pair indices in compressed rows: `start[x]..start[x + 1]` of `items` are record x's pairs.
fn rows(keys: &[u32], n: usize) -> (Vec<usize>, Vec<usize>) {
    let mut start = vec![0usize; n + 1];
    for &k in keys {
        start[k as usize + 1] += 1;
    }
    for x in 0..n {
        start[x + 1] += start[x];
    }
    let mut fill = start.clone();
    let mut items = vec![0usize; keys.len()];
    for (i, &k) in keys.iter().enumerate() {
        items[fill[k as usize]] = i;
        fill[k as usize] += 1;
    }
    (start, items)
}

/// The pairs the bootstrap runs on and the planted pairs it counts: all of them when there are
/// at most `max_pairs` pairs; else planted pairs taken in seeded random order, each with its
/// neighbourhood, until `max_pairs` pairs are kept.
///
/// A sampled planted pair (a, b) keeps every pair of a and every pair of b, and the planted
/// pair of every record those pairs reach (the rival's own partner, its anchor). So each
/// counted pair meets every rival it has in the whole graph, and each rival keeps the partner
/// that holds it back: a counted pair is lost in the subsample, as in the whole graph, when one
/// rival pair's theta beats both its own and the rival's anchor. What is cut is the anchors'
/// other pairs: a chain of two or more positive false pairs (an anchor pulled away by a third
/// record, which frees or takes a rival) is seen only in part. Under the u-law a false pair is
/// positive with chance q (about 1.5e-4 in loose blocking) and a record has d of them, so the
/// cut events are of order (d q)^2 per counted pair against d q for those kept: the forecast
/// is biased by that relative share (either way; a freed rival's partner can also take an
/// anchor). The interval comes from fewer counted pairs than the whole graph has: it is wider
/// by about the square root of their ratio, which also covers the error of taking a sample of
/// pairs rather than all of them (of the same order; Cochran, Sampling Techniques, for a mean
/// of a simple random sample).
fn subsample(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    planted: &[usize],
    opts: &ForecastOptions,
) -> (Vec<usize>, Vec<usize>, bool) {
    if left.len() <= opts.max_pairs {
        return ((0..left.len()).collect(), planted.to_vec(), false);
    }
    let n_right = right.iter().map(|&b| b as usize + 1).max().unwrap_or(0);
    let (ls, li) = rows(left, n_left);
    let (rs, ri) = rows(right, n_right);
    let mut planted_of_left = vec![usize::MAX; n_left];
    let mut planted_of_right = vec![usize::MAX; n_right];
    for &i in planted {
        planted_of_left[left[i] as usize] = i;
        planted_of_right[right[i] as usize] = i;
    }
    let mut order = planted.to_vec();
    order.sort_unstable();
    Rng::new(opts.seed ^ 0x5EED).shuffle(&mut order);
    let mut keep = vec![false; left.len()];
    let mut kept = 0usize;
    let add = |i: usize, keep: &mut Vec<bool>, kept: &mut usize| {
        if i != usize::MAX && !keep[i] {
            keep[i] = true;
            *kept += 1;
        }
    };
    let mut counted = Vec::new();
    for &i in &order {
        let (a, b) = (left[i] as usize, right[i] as usize);
        for &j in &li[ls[a]..ls[a + 1]] {
            add(j, &mut keep, &mut kept);
            add(planted_of_right[right[j] as usize], &mut keep, &mut kept);
        }
        for &j in &ri[rs[b]..rs[b + 1]] {
            add(j, &mut keep, &mut kept);
            add(planted_of_left[left[j] as usize], &mut keep, &mut kept);
        }
        counted.push(i);
        if kept >= opts.max_pairs {
            break;
        }
    }
    counted.sort_unstable();
    let chosen: Vec<usize> = (0..left.len()).filter(|&i| keep[i]).collect();
    (chosen, counted, true)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// All patterns by brute force: (theta, m-mass, u-mass), theta summed in field order.
    fn all_patterns(
        m: &[Vec<f64>],
        u: &[Vec<f64>],
        w: &[Vec<f64>],
        c: f64,
    ) -> Vec<(f64, f64, f64)> {
        let mut out = vec![(0.0, 1.0, 1.0)];
        for f in 0..w.len() {
            let mut next = Vec::new();
            for &(s, pm, pu) in &out {
                for p in 0..u[f].len() {
                    let s2 = if p < w[f].len() { s + w[f][p] } else { s };
                    next.push((s2, pm * m[f][p], pu * u[f][p]));
                }
            }
            out = next;
        }
        out.into_iter().map(|(s, a, b)| (c + s, a, b)).collect()
    }

    /// Per field: points or weights.
    type Table = Vec<Vec<f64>>;

    fn laws() -> (Table, Table, Table) {
        // Three fields: a name-like field (4 levels), a date (5 levels), an exact field.
        let m_obs: [Vec<f64>; 3] = [
            vec![0.85, 0.08, 0.04, 0.03],
            vec![0.9, 0.02, 0.03, 0.03, 0.02],
            vec![0.97, 0.03],
        ];
        let u_obs: [Vec<f64>; 3] = [
            vec![0.01, 0.02, 0.07, 0.9],
            vec![0.001, 0.0005, 0.002, 0.05, 0.9465],
            vec![0.002, 0.998],
        ];
        let miss = [0.02, 0.1, 0.3];
        let w: Vec<Vec<f64>> = m_obs
            .iter()
            .zip(&u_obs)
            .map(|(m, u)| m.iter().zip(u).map(|(a, b)| (a / b).ln()).collect())
            .collect();
        let m = m_obs.iter().zip(miss).map(|(l, x)| points(l, x)).collect();
        let u = u_obs.iter().zip(miss).map(|(l, x)| points(l, x)).collect();
        (m, u, w)
    }

    #[test]
    fn tail_masses_equal_brute_force() {
        // Oracle: every pattern enumerated and its theta tested, no bound.
        let (m, u, w) = laws();
        for c in [-14.0, -9.0, -5.0, -1.0, 0.5, 3.0] {
            let all = all_patterns(&m, &u, &w, c);
            let want_m: f64 = all.iter().filter(|x| x.0 > 0.0).map(|x| x.1).sum();
            let want_u: f64 = all.iter().filter(|x| x.0 > 0.0).map(|x| x.2).sum();
            let n = all.iter().filter(|x| x.0 > 0.0).count();
            let t = positive_tail(&m, &u, &w, c, MAX_TAIL).expect("small tail");
            assert_eq!(t.theta.len(), n, "c = {c}");
            assert!((t.m_mass() - want_m).abs() < 1e-12, "c = {c}");
            assert!((t.u_mass() - want_u).abs() < 1e-15, "c = {c}");
            assert!(t.theta.iter().all(|&x| x > 0.0));
        }
        // Over the cap: no tail.
        assert!(positive_tail(&m, &u, &w, 30.0, 10).is_none());
    }

    #[test]
    fn bernoulli_hits_count_and_spacing() {
        // n trials of chance q: the count is Binomial(n, q), mean n q and sd sqrt(n q (1 - q));
        // the hits are distinct and ascending.
        let (n, q) = (2_000_000usize, 5e-4);
        let mut total = 0usize;
        for s in 0..10u64 {
            let mut rng = Rng::new(s);
            let mut hits = Vec::new();
            bernoulli_hits(n, q, &mut rng, |i| hits.push(i));
            assert!(hits.windows(2).all(|p| p[0] < p[1]));
            assert!(hits.iter().all(|&i| i < n));
            total += hits.len();
        }
        let mean = 10.0 * n as f64 * q;
        let sd = (10.0 * n as f64 * q * (1.0 - q)).sqrt();
        assert!((total as f64 - mean).abs() < 4.0 * sd, "{total} vs {mean}");
        // A share of hits in the first tenth near a tenth (positions uniform).
        let mut rng = Rng::new(99);
        let mut first = 0usize;
        let mut all = 0usize;
        bernoulli_hits(n, 0.01, &mut rng, |i| {
            all += 1;
            first += (i < n / 10) as usize;
        });
        let share = first as f64 / all as f64;
        assert!((share - 0.1).abs() < 4.0 * (0.1f64 * 0.9 / all as f64).sqrt());
        let mut hits = 0;
        bernoulli_hits(7, 1.0, &mut rng, |_| hits += 1);
        assert_eq!(hits, 7);
        bernoulli_hits(7, 0.0, &mut rng, |_| hits += 1);
        assert_eq!(hits, 7);
    }

    /// A random bipartite graph with a planted matching on pairs (i, i).
    /// The whole graph with every planted pair counted, `n` records a side.
    fn whole_graph(left: &[u32], right: &[u32], planted: &[usize], n: usize) -> Graph {
        let mut g = Graph {
            left: left.to_vec(),
            right: right.to_vec(),
            planted: planted.to_vec(),
            counted: vec![true; planted.len()],
            others: (0..left.len())
                .filter(|i| planted.binary_search(i).is_err())
                .collect(),
            planted_of_left: vec![NONE; n],
            planted_of_right: vec![NONE; n],
        };
        for (p, &i) in planted.iter().enumerate() {
            g.planted_of_left[left[i] as usize] = p as u32;
            g.planted_of_right[right[i] as usize] = p as u32;
        }
        g
    }

    fn graph(n: usize, deg: usize, seed: u64) -> (Vec<u32>, Vec<u32>, Vec<usize>) {
        let mut rng = Rng::new(seed);
        let mut pairs: Vec<(u32, u32)> = Vec::new();
        for a in 0..n as u32 {
            pairs.push((a, a));
            for _ in 0..deg {
                pairs.push((a, rng.below(n) as u32));
            }
        }
        pairs.sort_unstable();
        pairs.dedup();
        let planted = pairs
            .iter()
            .enumerate()
            .filter(|(_, p)| p.0 == p.1)
            .map(|(i, _)| i)
            .collect();
        (
            pairs.iter().map(|p| p.0).collect(),
            pairs.iter().map(|p| p.1).collect(),
            planted,
        )
    }

    #[test]
    fn replicate_equals_matching_on_whole_graph() {
        // Oracle: the exact matching of the whole graph with the same draws, every pair left
        // out of the reduced problem given theta -1 (never chosen) and every planted pair in
        // the tail that the replicate did not need a theta for given theta 1 (it is alone in
        // its component, so any positive theta links it).
        let (m, u, w) = laws();
        let (left, right, planted) = graph(3000, 6, 5);
        let c = -4.0;
        let t = positive_tail(&m, &u, &w, c, MAX_TAIL).expect("tail");
        for r in 0..20u64 {
            let g = whole_graph(&left, &right, &planted, 3000);
            let draws = Draws::Tail(t.clone());
            let got = replicate(&g, &draws, &mut Rng::new(r));
            // The same draws again, written into a whole theta vector.
            let mut rng = Rng::new(r);
            let mut theta = vec![-1.0; left.len()];
            let mut alive = vec![true; planted.len()];
            bernoulli_hits(planted.len(), 1.0 - t.m_mass(), &mut rng, |i| {
                alive[i] = false
            });
            let mut hits = Vec::new();
            bernoulli_hits(g.others.len(), t.u_mass(), &mut rng, |i| {
                hits.push(g.others[i])
            });
            for &i in &hits {
                theta[i] = t.draw(&t.cum_u, &mut rng);
            }
            let mut inv: Vec<usize> = Vec::new();
            for &i in &hits {
                for p in [
                    g.planted_of_left[left[i] as usize],
                    g.planted_of_right[right[i] as usize],
                ] {
                    if p != NONE && alive[p as usize] {
                        inv.push(p as usize);
                    }
                }
            }
            inv.sort_unstable();
            inv.dedup();
            for (p, &i) in planted.iter().enumerate() {
                if alive[p] {
                    theta[i] = 1.0;
                }
            }
            for &p in &inv {
                theta[planted[p]] = t.draw(&t.cum_m, &mut rng);
            }
            let whole = max_weight_matching(3000, &left, &right, &theta);
            let want = whole
                .chosen
                .iter()
                .filter(|i| planted.binary_search(i).is_ok())
                .count();
            assert_eq!(got, want, "replicate {r}");
            assert!(!hits.is_empty());
        }
    }

    #[test]
    fn tail_draws_match_whole_draws_in_law() {
        // The same graph under both ways of drawing: the mean rates over 200 replicates each
        // must agree within 4 standard errors of their difference (the rates' spread measured
        // from the replicates themselves).
        let (m_pts, u_pts, w) = laws();
        let (left, right, planted) = graph(4000, 8, 11);
        let unpoint = |pts: &Vec<Vec<f64>>| -> (Vec<Vec<f64>>, Vec<f64>) {
            let miss: Vec<f64> = pts.iter().map(|p| p[p.len() - 1]).collect();
            let obs = pts
                .iter()
                .zip(&miss)
                .map(|(p, x)| p[..p.len() - 1].iter().map(|v| v / (1.0 - x)).collect())
                .collect();
            (obs, miss)
        };
        let (mo, mm) = unpoint(&m_pts);
        let (uo, um) = unpoint(&u_pts);
        let c = -3.0;
        let g = whole_graph(&left, &right, &planted, 4000);
        let tail = Draws::Tail(positive_tail(&m_pts, &u_pts, &w, c, MAX_TAIL).expect("tail"));
        let whole = Draws::Whole {
            m: Sampler::new(&mo, &mm, &w),
            u: Sampler::new(&uo, &um, &w),
            c,
        };
        let n = planted.len() as f64;
        let stats = |d: &Draws, seed: u64| -> (f64, f64) {
            let r: Vec<f64> = (0..200u64)
                .into_par_iter()
                .map(|k| 1.0 - replicate(&g, d, &mut Rng::stream(seed, k)) as f64 / n)
                .collect();
            let mean = r.iter().sum::<f64>() / r.len() as f64;
            let var = r.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (r.len() - 1) as f64;
            (mean, var / r.len() as f64)
        };
        let (a, va) = stats(&tail, 1);
        let (b, vb) = stats(&whole, 2);
        assert!(a > 0.001, "a rate worth testing: {a}");
        assert!((a - b).abs() < 4.0 * (va + vb).sqrt(), "{a} vs {b}");
    }

    #[test]
    fn subsample_keeps_each_counted_pairs_rivals() {
        // One giant component: every counted planted pair keeps all pairs of both its records,
        // and every kept pair's records keep their planted pair (checked by brute force over
        // the pairs).
        let (left, right, planted) = graph(5000, 10, 3);
        let opts = ForecastOptions {
            replicates: 1,
            seed: 4,
            max_pairs: left.len() / 5,
            prior_shift: 0.0,
        };
        let (used, counted, sub) = subsample(5000, &left, &right, &planted, &opts);
        assert!(sub);
        assert!(used.len() >= opts.max_pairs && used.len() < left.len() / 2);
        assert!(counted.len() > 20 && counted.len() < planted.len() / 4);
        let kept = |i: usize| used.binary_search(&i).is_ok();
        for &p in &counted {
            for i in 0..left.len() {
                if left[i] == left[p] || right[i] == right[p] {
                    assert!(kept(i), "pair {i} of counted {p}");
                    for &q in &planted {
                        if left[q] == left[i] || right[q] == right[i] {
                            assert!(kept(q), "anchor {q} of {i}");
                        }
                    }
                }
            }
        }
    }
}
