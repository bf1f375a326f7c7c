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

pub mod flat;

use petgraph::unionfind::UnionFind;
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

/// Sweeps of the prior's BP in each [`LinkPrior::step`] after the first, from the last step's
/// messages: the prior log odds move little between the fit's rounds, so the messages track
/// them, and over the rounds the prior gets more sweeps than one cold start would give.
pub const PRIOR_WARM_SWEEPS: usize = 2;

/// Settings of belief propagation.
#[derive(Debug, Clone)]
pub struct BpOptions {
    /// Iteration cap.
    pub max_iterations: usize,
    /// Weight of the old message in each update (0 = none).
    pub damping: f64,
    /// Largest change of a pair's marginal in a sweep that counts as converged (to first
    /// order; see [`flat::run`]).
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
///
/// Pairs with theta at or below the cut-off keep the pairwise posterior. The others are split
/// into connected components (union-find); components with few linkages are enumerated
/// exactly, one per task, and all the others are solved together by BP on one flat graph
/// ([`flat`]), until every message has converged or the cap is reached.
pub fn marginals(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    theta: &[f64],
    opts: &BpOptions,
) -> Marginals {
    let n_right = right.iter().map(|&r| r as usize + 1).max().unwrap_or(0);
    let mut p: Vec<f64> = theta.par_iter().map(|&t| pairwise(t)).collect();
    let split = Split::new(n_left, n_right, left, right, |i| {
        theta[i] > opts.theta_cutoff
    });
    for (i, v) in split.exact(left, right, theta) {
        p[i] = v;
    }
    let (label, bp_sel) = (split.label, split.bp);
    let mut out = Marginals {
        p: Vec::new(),
        exact_components: split.ranges.len(),
        bp_components: 0,
        not_converged: 0,
        max_iterations_used: 0,
    };
    if !bp_sel.is_empty() {
        let g = flat::FlatGraph::new(n_left, n_right, left, right, Some(bp_sel));
        let (marg, run, msg) = solve_flat(&g, theta, opts, None);
        for (pos, q) in marg.into_iter().enumerate() {
            p[g.pair(pos)] = q;
        }
        // Components, and those with a record still moving at the cap.
        let mut seen = vec![0u8; n_left + n_right];
        for r in 0..g.n_left() {
            let root = label[left[g.pair(g.left_first(r))] as usize] as usize;
            if seen[root] == 0 {
                seen[root] = 1;
                out.bp_components += 1;
            }
            if !run.converged && msg.left_change[r] as f64 > opts.tolerance {
                seen[root] = 2;
            }
        }
        if !run.converged {
            for r in 0..g.n_right() {
                let root = label[left[g.pair(g.right_first(r))] as usize] as usize;
                if msg.right_change[r] as f64 > opts.tolerance {
                    seen[root] = 2;
                }
            }
        }
        out.not_converged = seen.iter().filter(|&&s| s == 2).count();
        out.max_iterations_used = run.iterations;
    }
    out.p = p;
    out
}

/// The kept pairs of a graph split into small components, enumerated exactly, and the rest,
/// for BP.
struct Split {
    /// Per record (left, then right): its union-find representative.
    label: Vec<u32>,
    /// Pairs of the small components, component after component (input order within one).
    exact_pairs: Vec<u32>,
    /// Each small component's run in `exact_pairs`, in order of its first pair.
    ranges: Vec<std::ops::Range<usize>>,
    /// The other kept pairs, ascending.
    bp: Vec<u32>,
}

impl Split {
    fn new(
        n_left: usize,
        n_right: usize,
        left: &[u32],
        right: &[u32],
        keep: impl Fn(usize) -> bool,
    ) -> Split {
        let mut uf: UnionFind<u32> = UnionFind::new(n_left + n_right);
        let mut degree = vec![0u32; n_left];
        for i in 0..left.len() {
            if keep(i) {
                uf.union(left[i], n_left as u32 + right[i]);
                degree[left[i] as usize] += 1;
            }
        }
        let label = uf.into_labeling();
        // A bound on each component's linkages: the product of its left degrees + 1.
        let mut bound = vec![1u64; n_left + n_right];
        for (a, &d) in degree.iter().enumerate() {
            if d > 0 {
                let r = label[a] as usize;
                bound[r] = bound[r].saturating_mul(d as u64 + 1).min(EXACT_LIMIT + 1);
            }
        }
        let mut comp_of = vec![u32::MAX; n_left + n_right];
        let mut comp_len: Vec<u32> = Vec::new();
        let mut bp: Vec<u32> = Vec::new();
        let mut exact_sel: Vec<(u32, u32)> = Vec::new();
        for i in 0..left.len() {
            if !keep(i) {
                continue;
            }
            let r = label[left[i] as usize] as usize;
            if bound[r] > EXACT_LIMIT {
                bp.push(i as u32);
                continue;
            }
            if comp_of[r] == u32::MAX {
                comp_of[r] = comp_len.len() as u32;
                comp_len.push(0);
            }
            comp_len[comp_of[r] as usize] += 1;
            exact_sel.push((comp_of[r], i as u32));
        }
        exact_sel.sort_by_key(|e| e.0); // stable: pairs stay in input order within a component
        let mut ranges = Vec::with_capacity(comp_len.len());
        let mut acc = 0usize;
        for &c in &comp_len {
            ranges.push(acc..acc + c as usize);
            acc += c as usize;
        }
        Split {
            label,
            exact_pairs: exact_sel.into_iter().map(|e| e.1).collect(),
            ranges,
            bp,
        }
    }

    /// (pair, exact marginal) of every pair of the small components, under `theta`.
    fn exact(&self, left: &[u32], right: &[u32], theta: &[f64]) -> Vec<(usize, f64)> {
        let values = self.exact_with(left, right, |j| theta[self.exact_pairs[j] as usize]);
        self.exact_pairs
            .iter()
            .map(|&i| i as usize)
            .zip(values)
            .collect()
    }

    /// The exact marginals of the pairs of `exact_pairs`, in its order, the pair at position
    /// j having theta `theta_at(j)`.
    fn exact_with(
        &self,
        left: &[u32],
        right: &[u32],
        theta_at: impl Fn(usize) -> f64 + Sync,
    ) -> Vec<f64> {
        self.ranges
            .par_iter()
            .flat_map_iter(|r| {
                let pairs: Vec<usize> = self.exact_pairs[r.clone()]
                    .iter()
                    .map(|&i| i as usize)
                    .collect();
                let t: Vec<f64> = r.clone().map(&theta_at).collect();
                exact_component(&pairs, left, right, t)
            })
            .collect()
    }
}

/// BP on a flat graph of pairs with thetas `theta` (by input index): the marginal at each
/// left-order position, the run, and the final messages. `parallel` forces the choice of
/// threads (the same numbers either way).
fn solve_flat(
    g: &flat::FlatGraph,
    theta: &[f64],
    opts: &BpOptions,
    parallel: Option<bool>,
) -> (Vec<f64>, flat::Run, flat::Messages) {
    let wl: Vec<f64> = (0..g.len())
        .into_par_iter()
        .map(|pos| weight_of(theta[g.pair(pos)]))
        .collect();
    let wr = g.to_right_order(&wl);
    let w = flat::PairWeights {
        left: wl,
        right: wr,
    };
    let mut msg = flat::Messages::new(g);
    let run = flat::run_with(
        g,
        &w,
        &mut msg,
        opts.max_iterations,
        opts.damping,
        opts.tolerance,
        parallel.unwrap_or(g.len() >= flat::PARALLEL_POSITIONS),
    );
    let marg = flat::odds(g, &w, &msg)
        .into_iter()
        .map(|o| o / (1.0 + o))
        .collect();
    (marg, run, msg)
}

/// exp(theta), kept finite: sums of a record's terms never overflow.
fn weight_of(theta: f64) -> f64 {
    theta.clamp(-300.0, 300.0).exp()
}

/// Exact marginals of one small component given as pair indices, with their thetas.
fn exact_component(pairs: &[usize], left: &[u32], right: &[u32], t: Vec<f64>) -> Vec<f64> {
    if let [t] = t[..] {
        return vec![pairwise(t)];
    }
    let pairs: Vec<u32> = pairs.iter().map(|&i| i as u32).collect();
    let (nl, nr, a, b) = local_indices(&pairs, left, right);
    exact(&Graph::new(nl, nr, a, b, t))
}

/// A small component's records in local indices: (left records, right records, each pair's
/// local left, each pair's local right).
fn local_indices(
    pairs: &[u32],
    left: &[u32],
    right: &[u32],
) -> (usize, usize, Vec<usize>, Vec<usize>) {
    let local = |ids: &mut Vec<u32>, x: u32| -> usize {
        match ids.iter().position(|&v| v == x) {
            Some(j) => j,
            None => {
                ids.push(x);
                ids.len() - 1
            }
        }
    };
    let (mut ls, mut rs) = (Vec::new(), Vec::new());
    let a: Vec<usize> = pairs
        .iter()
        .map(|&i| local(&mut ls, left[i as usize]))
        .collect();
    let b: Vec<usize> = pairs
        .iter()
        .map(|&i| local(&mut rs, right[i as usize]))
        .collect();
    (ls.len(), rs.len(), a, b)
}

/// The one-to-one link prior's BP state over every candidate pair, kept across the rounds of
/// the fit so that each [`LinkPrior::step`] starts from the last round's messages (the prior
/// moves little between rounds).
pub struct LinkPrior {
    /// Small components, enumerated exactly at every step: each as a graph in local indices
    /// (its thetas rewritten at each step), with the input index of each of its pairs.
    small: Vec<(Graph, Vec<u32>)>,
    /// The group of each pair of each small component.
    small_group: Vec<Vec<u16>>,
    /// The graph of the other pairs, for BP.
    graph: flat::FlatGraph,
    messages: flat::Messages,
    /// The group of the pair at each position of `graph`.
    groups: Groups,
    fresh: bool,
}

/// The group of the pair at each position of the prior's graph, in left order and in right
/// order: nothing stored when every pair is in group 0 (the pooled rounds), one byte a
/// position and order for up to 256 groups, two beyond (groups past 65,535 share the last).
enum Groups {
    One,
    Narrow(Vec<u8>, Vec<u8>),
    Wide(Vec<u16>, Vec<u16>),
}

impl LinkPrior {
    /// The prior's graph: every pair of `left` / `right`, pair i in group `group(i)`.
    pub fn new(
        n_left: usize,
        left: &[u32],
        right: &[u32],
        group: impl Fn(usize) -> u32 + Sync,
    ) -> LinkPrior {
        let n_right = right.iter().map(|&r| r as usize + 1).max().unwrap_or(0);
        let mut split = Split::new(n_left, n_right, left, right, |_| true);
        let bp = std::mem::take(&mut split.bp);
        let graph = flat::FlatGraph::new(n_left, n_right, left, right, Some(bp));
        let messages = flat::Messages::new(&graph);
        let small = split
            .ranges
            .par_iter()
            .map(|r| {
                let pairs = split.exact_pairs[r.clone()].to_vec();
                let (nl, nr, a, b) = local_indices(&pairs, left, right);
                let t = vec![0.0; pairs.len()];
                (Graph::new(nl, nr, a, b, t), pairs)
            })
            .collect();
        let mut prior = LinkPrior {
            small,
            small_group: Vec::new(),
            graph,
            messages,
            groups: Groups::One,
            fresh: true,
        };
        prior.regroup(group);
        prior
    }

    /// New groups of the pairs (the messages are kept).
    pub fn regroup(&mut self, group: impl Fn(usize) -> u32 + Sync) {
        let g = &self.graph;
        let clip = |x: u32| x.min(u16::MAX as u32) as u16;
        let widest = (0..g.len())
            .into_par_iter()
            .map(|pos| group(g.pair(pos)))
            .max()
            .unwrap_or(0);
        self.groups = match widest {
            0 => Groups::One,
            1..=255 => {
                let gl: Vec<u8> = (0..g.len()).map(|pos| group(g.pair(pos)) as u8).collect();
                let gr = g.to_right_order(&gl);
                Groups::Narrow(gl, gr)
            }
            _ => {
                let gl: Vec<u16> = (0..g.len()).map(|pos| clip(group(g.pair(pos)))).collect();
                let gr = g.to_right_order(&gl);
                Groups::Wide(gl, gr)
            }
        };
        self.small_group = self
            .small
            .iter()
            .map(|(_, pairs)| pairs.iter().map(|&i| clip(group(i as usize))).collect())
            .collect();
    }

    /// One update of the per-link prior log odds, one value per group of pairs.
    ///
    /// The one-to-one model gives a linkage M of the candidate graph the prior weight
    /// prod_{(a,b) in M} w_g(ab), with one w = exp(lambda) per group g (a set of blocking
    /// passes). This is an exponential family in the link counts K_g, so its
    /// maximum-likelihood lambda sets each group's expected link count under the posterior
    /// equal to that under the prior: `E_post[K_g] = E_prior[K_g]` (common practice for
    /// exponential families; the M-step of EM in Dempster, Laird & Rubin 1977 §2 has the same
    /// form). The step is `lambda_g += ln(E_post[K_g] / E_prior[K_g])`, with `E_post[K_g]` the
    /// sum of `posterior` over the group and `E_prior[K_g]` the sum of the marginals of a
    /// graph whose every pair has theta = lambda_g. It differs from ln(p / (1 - p)), the
    /// pairwise share of true pairs: where records compete for one another, the one-to-one
    /// constraint already explains many false pairs, and an uncontested pair deserves higher
    /// prior odds than the share says.
    ///
    /// The prior's BP makes [`PRIOR_BP_ITERATIONS`] sweeps from fresh messages and
    /// [`PRIOR_WARM_SWEEPS`] from the last step's: only the groups' sums are needed, and the
    /// prior's graph holds every candidate pair, clear false pairs included.
    ///
    /// Returns the prior expected link count of each group.
    pub fn step(
        &mut self,
        link_log_odds: &mut [f64],
        posterior: &[f64],
        opts: &BpOptions,
    ) -> Vec<f64> {
        let (post_k, prior_k) = self.sums(link_log_odds, posterior, opts);
        apply_prior_step(link_log_odds, &post_k, &prior_k);
        prior_k
    }

    /// The sums of [`LinkPrior::step`] before its update: per group, the posterior's sum and
    /// the prior's expected link count. Sums of pieces of the graph that hold whole
    /// components add up to the whole graph's (up to the order of the additions).
    pub fn sums(
        &mut self,
        link_log_odds: &[f64],
        posterior: &[f64],
        opts: &BpOptions,
    ) -> (Vec<f64>, Vec<f64>) {
        let n = link_log_odds.len();
        let w: Vec<f64> = link_log_odds.iter().map(|&l| weight_of(l)).collect();
        // From fresh messages PRIOR_BP_ITERATIONS sweeps, then PRIOR_WARM_SWEEPS per step
        // from the last step's messages.
        let sweeps = opts.max_iterations.min(if self.fresh {
            PRIOR_BP_ITERATIONS
        } else {
            PRIOR_WARM_SWEEPS
        });
        self.fresh = false;
        let (g, msg) = (&self.graph, &mut self.messages);
        let (mut post_k, mut prior_k) = match std::mem::replace(&mut self.groups, Groups::One) {
            Groups::One => {
                let w = flat::OneWeight(w.first().copied().unwrap_or(1.0));
                group_sums(g, msg, &w, |_| 0, n, posterior, sweeps, opts)
            }
            Groups::Narrow(left, right) => {
                let w = flat::GroupWeights { left, right, w };
                let sums = group_sums(g, msg, &w, |p| w.left[p].into(), n, posterior, sweeps, opts);
                self.groups = Groups::Narrow(w.left, w.right);
                sums
            }
            Groups::Wide(left, right) => {
                let w = flat::GroupWeights { left, right, w };
                let sums = group_sums(g, msg, &w, |p| w.left[p].into(), n, posterior, sweeps, opts);
                self.groups = Groups::Wide(w.left, w.right);
                sums
            }
        };
        let lambda: &[f64] = link_log_odds;
        let exact: Vec<Vec<f64>> = self
            .small
            .par_iter_mut()
            .zip(&self.small_group)
            .map(|((graph, _), groups)| {
                for (t, &k) in graph.theta.iter_mut().zip(groups) {
                    *t = lambda[k as usize];
                }
                if let [t] = graph.theta[..] {
                    vec![pairwise(t)]
                } else {
                    exact(graph)
                }
            })
            .collect();
        for (((_, pairs), groups), q) in self.small.iter().zip(&self.small_group).zip(exact) {
            for ((&i, &k), q) in pairs.iter().zip(groups).zip(q) {
                post_k[k as usize] += posterior[i as usize];
                prior_k[k as usize] += q;
            }
        }
        (post_k, prior_k)
    }

    /// The BP messages of the prior's graph per pair (indices of the `left` / `right` given
    /// to [`LinkPrior::new`]): the left record's and the right record's message into the
    /// pair; NaN for pairs enumerated exactly (they have none). A distributed run keeps them
    /// between rounds beside its pairs.
    pub fn messages_by_pair(&self, pairs: usize) -> (Vec<f64>, Vec<f64>) {
        let g = &self.graph;
        let (mut lm, mut rm) = (vec![f64::NAN; pairs], vec![f64::NAN; pairs]);
        for pos in 0..g.len() {
            lm[g.pair(pos)] = self.messages.lm[pos];
        }
        for (q, &m) in self.messages.rm.iter().enumerate() {
            rm[g.pair(g.left_position(q))] = m;
        }
        (lm, rm)
    }

    /// Messages of [`LinkPrior::messages_by_pair`] taken back (the same pairs in the same
    /// order): the next step starts warm from them, as if this prior had made the last step.
    pub fn set_messages_by_pair(&mut self, lm: &[f64], rm: &[f64]) {
        let g = &self.graph;
        for pos in 0..g.len() {
            self.messages.lm[pos] = lm[g.pair(pos)];
        }
        for q in 0..self.messages.rm.len() {
            self.messages.rm[q] = rm[g.pair(g.left_position(q))];
        }
        self.fresh = false;
    }
}

/// The update of [`LinkPrior::step`] from its (summed) [`LinkPrior::sums`]:
/// `lambda_g += ln(E_post[K_g] / E_prior[K_g])`, clamped to [-30, 30].
pub fn apply_prior_step(link_log_odds: &mut [f64], post_k: &[f64], prior_k: &[f64]) {
    for k in 0..link_log_odds.len() {
        if post_k[k] > 0.0 && prior_k[k] > 0.0 {
            link_log_odds[k] =
                (link_log_odds[k] + (post_k[k] / prior_k[k]).ln()).clamp(-30.0, 30.0);
        }
    }
}

/// The prior's BP sweeps on `g` from `msg`, then per group the posterior's sum and the
/// prior's marginals' sum over the graph's pairs (`group_at` gives a left-order position's
/// group), each added in left order, one position at a time (no per-pair buffer).
#[allow(clippy::too_many_arguments)]
fn group_sums<W: flat::Weights>(
    g: &flat::FlatGraph,
    msg: &mut flat::Messages,
    w: &W,
    group_at: impl Fn(usize) -> usize,
    n: usize,
    posterior: &[f64],
    sweeps: usize,
    opts: &BpOptions,
) -> (Vec<f64>, Vec<f64>) {
    let mut post_k = vec![0.0f64; n];
    for pos in 0..g.len() {
        post_k[group_at(pos)] += posterior[g.pair(pos)];
    }
    flat::run(g, w, msg, sweeps, opts.damping, 0.0);
    let mut prior_k = vec![0.0f64; n];
    for pos in 0..g.len() {
        let o = flat::odds_at(g, w, msg, pos);
        prior_k[group_at(pos)] += o / (1.0 + o);
    }
    (post_k, prior_k)
}

/// One step of the link prior from fresh messages (see [`LinkPrior::step`]); callers that
/// step repeatedly on one graph keep a [`LinkPrior`] instead.
pub fn link_prior_step(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    group: &[u32],
    link_log_odds: &mut [f64],
    posterior: &[f64],
    opts: &BpOptions,
) -> Vec<f64> {
    LinkPrior::new(n_left, left, right, |i| group[i]).step(link_log_odds, posterior, opts)
}

/// A small component in local indices, for exact enumeration.
struct Graph {
    n_left: usize,
    n_right: usize,
    b: Vec<usize>,
    theta: Vec<f64>,
    by_left: Vec<Vec<usize>>,
}

impl Graph {
    fn new(n_left: usize, n_right: usize, a: Vec<usize>, b: Vec<usize>, theta: Vec<f64>) -> Graph {
        let mut by_left = vec![Vec::new(); n_left];
        for (e, &x) in a.iter().enumerate() {
            by_left[x].push(e);
        }
        Graph {
            n_left,
            n_right,
            b,
            theta,
            by_left,
        }
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
    bp_local(
        n_left,
        n_right,
        a,
        b,
        theta,
        opts,
        a.len() >= flat::PARALLEL_POSITIONS,
    )
}

fn bp_local(
    n_left: usize,
    n_right: usize,
    a: &[usize],
    b: &[usize],
    theta: &[f64],
    opts: &BpOptions,
    parallel: bool,
) -> (Vec<f64>, usize, bool) {
    let left: Vec<u32> = a.iter().map(|&x| x as u32).collect();
    let right: Vec<u32> = b.iter().map(|&x| x as u32).collect();
    let g = flat::FlatGraph::new(n_left, n_right, &left, &right, None);
    let (marg, run, _) = solve_flat(&g, theta, opts, Some(parallel));
    let mut p = vec![0.0; theta.len()];
    for (pos, q) in marg.into_iter().enumerate() {
        p[g.pair(pos)] = q;
    }
    (p, run.iterations, run.converged)
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
        // Kept across steps, as the fit keeps it: BP is exact on these trees once converged.
        let mut prior = LinkPrior::new(star as usize, &left, &right, |i| group[i]);
        for _ in 0..200 {
            prior.step(&mut lambda, &post, &BpOptions::default());
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
        // Bit for bit: the parallel sweep only splits independent record updates.
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
        let opts = BpOptions {
            max_iterations: 30,
            ..BpOptions::default()
        };
        let seq = bp_local(nl, nr, &a, &b, &t, &opts, false);
        let par = bp_local(nl, nr, &a, &b, &t, &opts, true);
        assert_eq!(seq.1, par.1);
        assert!(seq
            .0
            .iter()
            .zip(&par.0)
            .all(|(x, y)| x.to_bits() == y.to_bits()));
    }
}
