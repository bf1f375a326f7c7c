//! The one-to-one posterior: per-pair marginals under the constraint that each record has at
//! most one partner (per-link confidence), and the one-to-one prior of a link. It sits below
//! the fit stage (whose refinement and link prior use it) and the confidence step of the
//! link stage, so neither reaches sideways into the other.
//!
//! The posterior over one-to-one linkages is proportional to prod_{(a,b) in M} exp(theta_ab),
//! theta being the pair's weight plus the prior log odds of a link; the confidence of a link is
//! its marginal P((a,b) in M). A record with two good candidates can be linked to only one, so
//! this is lower than 1 / (1 + exp(-theta)). The prior log odds are fitted for the one-to-one
//! model itself ([`link_prior_step`]); with the pairwise share's ln(p / (1 - p)) instead, the
//! constraint's explanation of false pairs is counted twice and uncontested pairs come out
//! under-confident (measured: on synth data at noise 0.5, 241 of the 258 pairs with confidence
//! in [0.1, 0.9) were true against 133 expected; with the fitted prior, 53 against 43).
//!
//! Components whose linkages can be counted (at most [`EXACT_LIMIT`] of them) are enumerated
//! exactly. Larger ones use sum-product belief propagation in ratio form and log domain, with
//! damping (Bayati, Shah & Sharma 2008; Chertkov, Kroc & Vergassola 2008):
//!
//! ```text
//! L(a->ab) = -ln(1 + sum_{b' != b} exp(theta_ab' + R(b'->ab')))
//! P(ab)    = 1 / (1 + exp(-(theta_ab + L(a->ab) + R(b->ab))))
//! ```
//!
//! BP is exact on trees; on graphs with cycles it is an approximation. Components in parallel;
//! each is computed sequentially, so the result does not depend on the thread count.

use crate::matching::{components, Components};
use rayon::prelude::*;

/// Components with at most this many one-to-one linkages (bounded through the product of
/// left degrees + 1) are enumerated exactly.
pub const EXACT_LIMIT: u64 = 20_000;

/// Pairs with theta below this are left out of the graph: exp(-14) is about 8e-7, so such a
/// pair neither takes nor changes probability mass that matters for a confidence printed to
/// six decimals; its confidence is reported as the pairwise posterior. Leaving them out keeps
/// the components small: most candidate pairs are clear false pairs.
pub const THETA_CUTOFF: f64 = -14.0;

/// Sweeps of the prior's BP in [`link_prior_step`]. Measured on synth data (20,000 x 20,000
/// records): on a loosely blocked run of 3M pairs, 5 sweeps instead of 40 moved the fitted
/// prior log odds by at most 0.05 and left the links unchanged, and each sweep over the
/// giant component takes about 0.23 s; on the default blocking at noise 0.5 and 1.0, 5 sweeps
/// and 40 gave the same links.
pub const PRIOR_BP_ITERATIONS: usize = 8;

/// Settings of belief propagation.
#[derive(Debug, Clone)]
pub struct BpOptions {
    /// Iteration cap.
    pub max_iterations: usize,
    /// Weight of the old message in each update (0 = none).
    pub damping: f64,
    /// Largest change of a log message that counts as converged.
    pub tolerance: f64,
    /// Pairs with theta at or below this are left out of the graph (see [`THETA_CUTOFF`]).
    pub theta_cutoff: f64,
}

impl Default for BpOptions {
    fn default() -> Self {
        BpOptions {
            max_iterations: 300,
            damping: 0.5,
            tolerance: 1e-7,
            theta_cutoff: THETA_CUTOFF,
        }
    }
}

/// Marginals of every pair, and how they were obtained.
#[derive(Debug, Clone, PartialEq)]
pub struct Marginals {
    /// P(pair in the linkage), per input pair.
    pub p: Vec<f64>,
    /// Components enumerated exactly.
    pub exact_components: usize,
    /// Components solved by belief propagation.
    pub bp_components: usize,
    /// BP components that hit the iteration cap.
    pub not_converged: usize,
    /// The most iterations any BP component used.
    pub max_iterations_used: usize,
}

/// The pairwise posterior 1 / (1 + exp(-theta)), which ignores the one-to-one constraint.
pub fn pairwise(theta: f64) -> f64 {
    1.0 / (1.0 + (-theta).exp())
}

/// Marginal link probabilities of all pairs under the one-to-one posterior.
pub fn marginals(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    theta: &[f64],
    opts: &BpOptions,
) -> Marginals {
    let comps = components(n_left, left, right, |i| theta[i] > opts.theta_cutoff);
    let solved: Vec<(Vec<(usize, f64)>, Method)> = (0..comps.pairs.len())
        .into_par_iter()
        .map(|c| component_marginals(&comps, c, left, right, theta, opts))
        .collect();
    let mut p: Vec<f64> = theta.iter().map(|&t| pairwise(t)).collect();
    let mut out = Marginals {
        p: Vec::new(),
        exact_components: 0,
        bp_components: 0,
        not_converged: 0,
        max_iterations_used: 0,
    };
    for (values, method) in solved {
        for (i, v) in values {
            p[i] = v;
        }
        match method {
            Method::Exact => out.exact_components += 1,
            Method::Bp {
                iterations,
                converged,
            } => {
                out.bp_components += 1;
                out.max_iterations_used = out.max_iterations_used.max(iterations);
                if !converged {
                    out.not_converged += 1;
                }
            }
        }
    }
    out.p = p;
    out
}

/// One update of the per-link prior log odds, one value per group of pairs.
///
/// The one-to-one model gives a linkage M of the candidate graph the prior weight
/// prod_{(a,b) in M} w_g(ab), with one w = exp(lambda) per group g (a set of blocking passes).
/// This is an exponential family in the link counts K_g, so its maximum-likelihood lambda sets
/// each group's expected link count under the posterior equal to that under the prior:
/// `E_post[K_g] = E_prior[K_g]` (common practice for exponential families; the M-step of EM in
/// Dempster, Laird & Rubin 1977 §2 has the same form). The step is
/// `lambda_g += ln(E_post[K_g] / E_prior[K_g])`, with `E_post[K_g]` the sum of `posterior` over the
/// group and `E_prior[K_g]` the sum of the marginals of a graph whose every pair has
/// theta = lambda_g. It differs from ln(p / (1 - p)), the pairwise share of true pairs: where
/// records compete for one another, the one-to-one constraint already explains many false
/// pairs, and an uncontested pair deserves higher prior odds than the share says.
///
/// The prior's BP stops after [`PRIOR_BP_ITERATIONS`] sweeps: only the groups' sums are
/// needed, and the prior's graph holds every candidate pair, clear false pairs included.
///
/// Returns the prior expected link count of each group.
pub fn link_prior_step(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    group: &[u32],
    link_log_odds: &mut [f64],
    posterior: &[f64],
    opts: &BpOptions,
) -> Vec<f64> {
    let prior_theta: Vec<f64> = group.iter().map(|&g| link_log_odds[g as usize]).collect();
    let prior_opts = BpOptions {
        max_iterations: opts.max_iterations.min(PRIOR_BP_ITERATIONS),
        ..opts.clone()
    };
    let prior = marginals(n_left, left, right, &prior_theta, &prior_opts);
    let n = link_log_odds.len();
    let (mut post_k, mut prior_k) = (vec![0.0f64; n], vec![0.0f64; n]);
    for ((&g, &q), &r) in group.iter().zip(posterior).zip(&prior.p) {
        post_k[g as usize] += q;
        prior_k[g as usize] += r;
    }
    for g in 0..n {
        if post_k[g] > 0.0 && prior_k[g] > 0.0 {
            link_log_odds[g] =
                (link_log_odds[g] + (post_k[g] / prior_k[g]).ln()).clamp(-30.0, 30.0);
        }
    }
    prior_k
}

enum Method {
    Exact,
    Bp { iterations: usize, converged: bool },
}

/// A component in local indices.
struct Graph {
    n_left: usize,
    n_right: usize,
    a: Vec<usize>,
    b: Vec<usize>,
    theta: Vec<f64>,
    by_left: Vec<Vec<usize>>,
    by_right: Vec<Vec<usize>>,
}

impl Graph {
    fn new(n_left: usize, n_right: usize, a: Vec<usize>, b: Vec<usize>, theta: Vec<f64>) -> Graph {
        let mut by_left = vec![Vec::new(); n_left];
        let mut by_right = vec![Vec::new(); n_right];
        for e in 0..a.len() {
            by_left[a[e]].push(e);
            by_right[b[e]].push(e);
        }
        Graph {
            n_left,
            n_right,
            a,
            b,
            theta,
            by_left,
            by_right,
        }
    }
}

fn local_graph(comps: &Components, c: usize, left: &[u32], right: &[u32], theta: &[f64]) -> Graph {
    let pairs = &comps.pairs[c];
    let a = pairs
        .iter()
        .map(|&i| comps.local_left[left[i] as usize] as usize)
        .collect();
    let b = pairs
        .iter()
        .map(|&i| comps.local_right[right[i] as usize] as usize)
        .collect();
    let (nl, nr) = comps.sizes[c];
    Graph::new(
        nl as usize,
        nr as usize,
        a,
        b,
        pairs.iter().map(|&i| theta[i]).collect(),
    )
}

fn component_marginals(
    comps: &Components,
    c: usize,
    left: &[u32],
    right: &[u32],
    theta: &[f64],
    opts: &BpOptions,
) -> (Vec<(usize, f64)>, Method) {
    let pairs = &comps.pairs[c];
    let g = local_graph(comps, c, left, right, theta);
    let linkages_bound = g.by_left.iter().try_fold(1u64, |acc, e| {
        acc.checked_mul(e.len() as u64 + 1)
            .filter(|&v| v <= EXACT_LIMIT)
    });
    let (p, method) = if linkages_bound.is_some() {
        (exact(&g), Method::Exact)
    } else {
        let (p, iterations, converged) = belief_propagation(&g, opts);
        (
            p,
            Method::Bp {
                iterations,
                converged,
            },
        )
    };
    (pairs.iter().copied().zip(p).collect(), method)
}

/// For terms t_1..t_k: out_i = ln(1 + sum_{j != i} exp(t_j)). The sums run over
/// exp(t_j - base) with base = max(0, max t), so nothing overflows, and leave-one-out uses
/// prefix and suffix sums rather than a subtraction, so nothing cancels: one exp and one ln
/// per term.
fn leave_one_out(terms: &[f64], out: &mut Vec<f64>, scratch: &mut Vec<f64>) {
    let k = terms.len();
    let base = terms.iter().copied().fold(0.0f64, f64::max);
    scratch.clear();
    scratch.extend(terms.iter().map(|t| (t - base).exp()));
    out.clear();
    out.resize(k, 0.0);
    // out temporarily holds suffix sums of scratch[i + 1..].
    let mut suffix = 0.0;
    for i in (0..k).rev() {
        out[i] = suffix;
        suffix += scratch[i];
    }
    let mut prefix = (-base).exp(); // the "stay unlinked" option, exp(0 - base)
    for i in 0..k {
        let excl = prefix + out[i];
        out[i] = base + excl.ln();
        prefix += scratch[i];
    }
}

/// Sum-product BP on a graph in local indices; returns marginals, iterations used and whether
/// it converged.
pub fn belief_propagation_raw(
    n_left: usize,
    n_right: usize,
    a: &[usize],
    b: &[usize],
    theta: &[f64],
    opts: &BpOptions,
) -> (Vec<f64>, usize, bool) {
    let g = Graph::new(n_left, n_right, a.to_vec(), b.to_vec(), theta.to_vec());
    belief_propagation(&g, opts)
}

fn belief_propagation(g: &Graph, opts: &BpOptions) -> (Vec<f64>, usize, bool) {
    belief_propagation_sweeps(g, opts, g.theta.len() >= PARALLEL_SWEEP_PAIRS)
}

fn belief_propagation_sweeps(
    g: &Graph,
    opts: &BpOptions,
    parallel: bool,
) -> (Vec<f64>, usize, bool) {
    let n = g.theta.len();
    let mut lmsg = vec![0.0f64; n]; // from the left record into the pair
    let mut rmsg = vec![0.0f64; n]; // from the right record into the pair
    let mut buf = Buffers::default();
    let mut iterations = 0;
    let mut converged = false;
    while iterations < opts.max_iterations {
        iterations += 1;
        let mut change = 0.0f64;
        for side in 0..2 {
            let (edges_of, target, incoming) = if side == 0 {
                (&g.by_left, &mut lmsg, &rmsg)
            } else {
                (&g.by_right, &mut rmsg, &lmsg)
            };
            if parallel {
                // A record's new messages read only the other side's messages and its own
                // old ones, so the records of one side are independent: computed in
                // parallel, then written in record order, the sweep gives the same numbers
                // as the sequential one.
                let new: Vec<Vec<f64>> = edges_of
                    .par_iter()
                    .map_init(Buffers::default, |b, edges| {
                        b.sweep(edges, &g.theta, incoming, target, opts.damping);
                        std::mem::take(&mut b.new)
                    })
                    .collect();
                for (edges, values) in edges_of.iter().zip(&new) {
                    for (&e, &v) in edges.iter().zip(values) {
                        change = change.max((v - target[e]).abs());
                        target[e] = v;
                    }
                }
            } else {
                for edges in edges_of.iter() {
                    buf.sweep(edges, &g.theta, incoming, target, opts.damping);
                    for (&e, &v) in edges.iter().zip(&buf.new) {
                        change = change.max((v - target[e]).abs());
                        target[e] = v;
                    }
                }
            }
        }
        if change <= opts.tolerance {
            converged = true;
            break;
        }
    }
    let p = (0..n)
        .map(|e| pairwise(g.theta[e] + lmsg[e] + rmsg[e]))
        .collect();
    let _ = (g.n_left, g.n_right, &g.a, &g.b);
    (p, iterations, converged)
}

/// Components with at least this many pairs sweep each side's records in parallel (the
/// result is the same; see [`belief_propagation_sweeps`]).
const PARALLEL_SWEEP_PAIRS: usize = 50_000;

/// Scratch space of one record's message update.
#[derive(Default)]
struct Buffers {
    terms: Vec<f64>,
    excl: Vec<f64>,
    scratch: Vec<f64>,
    new: Vec<f64>,
}

impl Buffers {
    /// The damped new messages from one record into each of its pairs, into `self.new`.
    fn sweep(&mut self, edges: &[usize], theta: &[f64], incoming: &[f64], old: &[f64], damp: f64) {
        self.terms.clear();
        self.terms
            .extend(edges.iter().map(|&e| theta[e] + incoming[e]));
        leave_one_out(&self.terms, &mut self.excl, &mut self.scratch);
        self.new.clear();
        self.new.extend(
            edges
                .iter()
                .zip(&self.excl)
                .map(|(&e, &x)| damp * old[e] + (1.0 - damp) * (-x)),
        );
    }
}

/// Exact marginals by enumerating every one-to-one linkage of the component.
fn exact(g: &Graph) -> Vec<f64> {
    // Two passes: the largest log-weight first, so the sums below never overflow.
    let mut used = vec![false; g.n_right];
    let mut chosen = Vec::new();
    let mut max_lw = f64::NEG_INFINITY;
    enumerate(g, 0, 0.0, &mut used, &mut chosen, &mut |lw, _| {
        max_lw = max_lw.max(lw);
    });
    let mut z = 0.0;
    let mut per_edge = vec![0.0; g.theta.len()];
    enumerate(g, 0, 0.0, &mut used, &mut chosen, &mut |lw, set| {
        let w = (lw - max_lw).exp();
        z += w;
        for &e in set {
            per_edge[e] += w;
        }
    });
    per_edge.iter().map(|w| w / z).collect()
}

fn enumerate<F: FnMut(f64, &[usize])>(
    g: &Graph,
    a: usize,
    lw: f64,
    used: &mut [bool],
    chosen: &mut Vec<usize>,
    visit: &mut F,
) {
    if a == g.n_left {
        visit(lw, chosen);
        return;
    }
    enumerate(g, a + 1, lw, used, chosen, visit);
    for &e in &g.by_left[a] {
        let b = g.b[e];
        if !used[b] {
            used[b] = true;
            chosen.push(e);
            enumerate(g, a + 1, lw + g.theta[e], used, chosen, visit);
            chosen.pop();
            used[b] = false;
        }
    }
}

/// Exact marginals of a small graph given in local indices (for tests and checks).
pub fn exact_marginals(
    n_left: usize,
    n_right: usize,
    a: &[usize],
    b: &[usize],
    theta: &[f64],
) -> Vec<f64> {
    exact(&Graph::new(
        n_left,
        n_right,
        a.to_vec(),
        b.to_vec(),
        theta.to_vec(),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    fn random_tree(
        rng: &mut Rng,
        nodes: usize,
    ) -> (usize, usize, Vec<usize>, Vec<usize>, Vec<f64>) {
        // A random bipartite tree: each new node attaches to an earlier node of the other side.
        let mut side = vec![0usize];
        let mut idx = vec![0usize];
        let (mut nl, mut nr) = (1usize, 0usize);
        let (mut a, mut b, mut t) = (vec![], vec![], vec![]);
        for _ in 1..nodes {
            let parent = rng.below(side.len());
            let theta = rng.normal() * 2.0 + 0.5;
            if side[parent] == 0 {
                a.push(idx[parent]);
                b.push(nr);
                side.push(1);
                idx.push(nr);
                nr += 1;
            } else {
                a.push(nl);
                b.push(idx[parent]);
                side.push(0);
                idx.push(nl);
                nl += 1;
            }
            t.push(theta);
        }
        (nl, nr, a, b, t)
    }

    #[test]
    fn bp_is_exact_on_trees() {
        // Sum-product BP is exact on trees (Pearl 1988; for matchings, Bayati, Shah & Sharma
        // 2008); the oracle is exact enumeration.
        let mut rng = Rng::new(21);
        for _ in 0..200 {
            let nodes = 2 + rng.below(12);
            let (nl, nr, a, b, t) = random_tree(&mut rng, nodes);
            // Converged far below the test's tolerance.
            let tight = BpOptions {
                max_iterations: 5000,
                damping: 0.5,
                tolerance: 1e-13,
                theta_cutoff: THETA_CUTOFF,
            };
            let (bp, _, converged) = belief_propagation_raw(nl, nr, &a, &b, &t, &tight);
            assert!(converged);
            let ex = exact_marginals(nl, nr, &a, &b, &t);
            for (x, y) in bp.iter().zip(&ex) {
                assert!((x - y).abs() < 1e-9, "{x} vs {y}");
            }
        }
    }

    #[test]
    fn bp_close_to_exact_with_cycles() {
        // On small graphs with cycles BP is an approximation; the issue asks within 0.02 of
        // exact enumeration on random graphs of moderate weights.
        let mut rng = Rng::new(5);
        let mut worst = 0.0f64;
        for _ in 0..200 {
            let (nl, nr) = (2 + rng.below(4), 2 + rng.below(4));
            let (mut a, mut b, mut t) = (vec![], vec![], vec![]);
            for i in 0..nl {
                for j in 0..nr {
                    if rng.chance(0.5) {
                        a.push(i);
                        b.push(j);
                        // Linkage-like weights: mostly clear, some close calls.
                        t.push(if rng.chance(0.3) {
                            rng.normal() * 4.0 + 3.0
                        } else {
                            -6.0 + rng.normal()
                        });
                    }
                }
            }
            if a.is_empty() {
                continue;
            }
            let (bp, _, _) = belief_propagation_raw(nl, nr, &a, &b, &t, &BpOptions::default());
            let ex = exact_marginals(nl, nr, &a, &b, &t);
            for (x, y) in bp.iter().zip(&ex) {
                worst = worst.max((x - y).abs());
            }
        }
        assert!(worst < 0.02, "worst difference {worst}");
    }

    #[test]
    fn two_candidates_share_the_mass() {
        // One left record, two right ones, theta = ln 9 each: the posterior over {none, b0, b1}
        // is (1, 9, 9) / 19, so each link has 9/19 (direct computation), where the pairwise
        // posterior would say 0.9.
        let t = 9f64.ln();
        let m = marginals(1, &[0, 0], &[0, 1], &[t, t], &BpOptions::default());
        assert!((m.p[0] - 9.0 / 19.0).abs() < 1e-12);
        assert!((pairwise(t) - 0.9).abs() < 1e-12);
    }

    #[test]
    fn link_prior_meets_the_moment_condition_on_stars() {
        // Stars: one left record with k right candidates, four stars per k = 1..4, the
        // stars of one k forming one group. A k-star's linkages are the empty one (weight 1)
        // and k single links (weight w each), so E_prior[K] = k w / (1 + k w) per star, and
        // the maximum-likelihood condition E_prior[K] = E_post[K] (exponential-family moment
        // matching, common practice) gives w = T / (k (1 - T)) for a posterior link mass T
        // per star. Derived by hand; the code computes it by exact enumeration.
        let (mut left, mut right, mut group, mut post) = (vec![], vec![], vec![], vec![]);
        let mut n_right = 0u32;
        let mut star = 0u32;
        let mass = [0.3, 0.55, 0.7, 0.9];
        for (g, &t) in mass.iter().enumerate() {
            let k = g + 1;
            for _ in 0..4 {
                for j in 0..k {
                    left.push(star);
                    right.push(n_right);
                    n_right += 1;
                    group.push(g as u32);
                    // Uneven within a star; only the star's total matters.
                    post.push(t * (j + 1) as f64 / (k * (k + 1) / 2) as f64);
                }
                star += 1;
            }
        }
        let mut lambda = vec![-2.0; mass.len()];
        for _ in 0..200 {
            link_prior_step(
                star as usize,
                &left,
                &right,
                &group,
                &mut lambda,
                &post,
                &BpOptions::default(),
            );
        }
        for (g, &t) in mass.iter().enumerate() {
            let k = (g + 1) as f64;
            let expected = (t / (k * (1.0 - t))).ln();
            assert!(
                (lambda[g] - expected).abs() < 1e-6,
                "k = {k}: {} against {expected}",
                lambda[g]
            );
        }
    }

    #[test]
    fn parallel_sweeps_give_the_sequential_numbers() {
        // Bit for bit: the parallel sweep only reorders independent record updates.
        let mut rng = Rng::new(17);
        let (nl, nr) = (3000usize, 3000usize);
        let (mut a, mut b, mut t) = (vec![], vec![], vec![]);
        for i in 0..nl {
            for _ in 0..8 {
                a.push(i);
                b.push(rng.below(nr));
                t.push(rng.normal() * 3.0 - 2.0);
            }
        }
        let g = Graph::new(nl, nr, a, b, t);
        let opts = BpOptions {
            max_iterations: 30,
            ..BpOptions::default()
        };
        let seq = belief_propagation_sweeps(&g, &opts, false);
        let par = belief_propagation_sweeps(&g, &opts, true);
        assert_eq!(seq.1, par.1);
        assert!(seq
            .0
            .iter()
            .zip(&par.0)
            .all(|(x, y)| x.to_bits() == y.to_bits()));
    }
}
