//! A forecast of the mismatch rate by parametric bootstrap on the real candidate graph.
//!
//! The margin sqrt(d) B is asymptotic and assumes an even graph; blocking makes degrees uneven.
//! So we keep the real candidate graph, plant the found matching as the true pairs, redraw
//! every pair's agreement pattern from m (planted pairs) or u (all others), recompute the
//! weights, re-solve the one-to-one matching, and count the planted pairs that are not linked
//! to their planted partner. Replicates are seeded and independent; the forecast is their mean,
//! with the 2.5% and 97.5% points of the replicate rates as the interval.
//!
//! Two sets of laws bracket the truth, and [`bracketed`] runs the bootstrap with both: the
//! laws after the one-to-one refinement, whose true-pair law leaves out true pairs that lose to
//! a rival (too clean: the forecast errs low), and the plain EM laws, whose true-pair law still
//! holds near-matches such as household members (too dirty: it errs high). The forecast is the
//! mean of the two; the interval runs from the lower end of the first to the upper end of the
//! second, and both means are reported.
//!
//! Very large graphs are subsampled by whole connected components of the candidate graph (so
//! no record loses any of its candidates) until `max_pairs` pairs are reached.

use crate::matching::{components, max_weight_matching};
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
#[derive(Debug, Clone, Serialize)]
pub struct Forecast {
    /// Mean share of planted pairs not recovered.
    pub error_rate: f64,
    /// 2.5% and 97.5% points of the replicate rates.
    pub interval: [f64; 2],
    /// Replicates run.
    pub replicates: usize,
    /// Planted pairs per replicate (in the subsample).
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
    let (use_pairs, subsampled) = subsample(n_left, left, right, opts);
    let mut is_planted = vec![false; left.len()];
    for &i in planted {
        is_planted[i] = true;
    }
    let sub_left: Vec<u32> = use_pairs.iter().map(|&i| left[i]).collect();
    let sub_right: Vec<u32> = use_pairs.iter().map(|&i| right[i]).collect();
    let sub_planted: Vec<bool> = use_pairs.iter().map(|&i| is_planted[i]).collect();
    let n_planted = sub_planted.iter().filter(|&&p| p).count();
    if n_planted == 0 {
        return None;
    }
    let w = fit.level_weights();
    let c = fit.prior_log_odds() + opts.prior_shift;
    let m_draw = Sampler::new(&fit.m, &fit.m_missing, &w);
    let u_draw = Sampler::new(&fit.u, &fit.u_missing, &w);
    const CHUNK: usize = 4096;
    let rates: Vec<f64> = (0..opts.replicates)
        .map(|r| {
            // One random stream per (replicate, chunk): the draws do not depend on threads.
            let theta: Vec<f64> = sub_planted
                .par_chunks(CHUNK)
                .enumerate()
                .flat_map_iter(|(k, chunk)| {
                    let mut rng = Rng::stream(opts.seed, ((r as u64) << 32) | k as u64);
                    let m_draw = &m_draw;
                    let u_draw = &u_draw;
                    chunk
                        .iter()
                        .map(move |&p| {
                            c + if p {
                                m_draw.draw_weight(&mut rng)
                            } else {
                                u_draw.draw_weight(&mut rng)
                            }
                        })
                        .collect::<Vec<f64>>()
                })
                .collect();
            let m = max_weight_matching(n_left, &sub_left, &sub_right, &theta);
            let found = m.chosen.iter().filter(|&&i| sub_planted[i]).count();
            1.0 - found as f64 / n_planted as f64
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
        planted: n_planted,
        pairs_used: use_pairs.len(),
        subsampled,
        bracket: None,
    })
}

/// All pair indices, or whole components drawn in seeded random order up to `max_pairs`.
fn subsample(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    opts: &ForecastOptions,
) -> (Vec<usize>, bool) {
    if left.len() <= opts.max_pairs {
        return ((0..left.len()).collect(), false);
    }
    let comps = components(n_left, left, right, |_| true);
    let mut order: Vec<usize> = (0..comps.pairs.len()).collect();
    Rng::new(opts.seed ^ 0x5EED).shuffle(&mut order);
    let mut chosen = Vec::new();
    for c in order {
        if chosen.len() >= opts.max_pairs {
            break;
        }
        chosen.extend_from_slice(&comps.pairs[c]);
    }
    chosen.sort_unstable();
    (chosen, true)
}
