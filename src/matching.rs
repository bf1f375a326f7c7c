//! One-to-one matching: the exact maximum-weight bipartite matching in which every record may
//! stay unlinked.
//!
//! In: a sparse list of weighted pairs (left index, right index, weight). Out: the chosen pair
//! indices, the total weight and component statistics. It never sees record values, and never
//! builds a dense matrix: memory is O(records + pairs).
//!
//! # Algorithm
//! The graph is split into connected components of its positive-weight pairs (union-find);
//! components are independent problems, solved in parallel with rayon. Within a component we
//! run the Hungarian method in its shortest-augmenting-path form (Kuhn 1955; the sparse
//! row-by-row scheme of Jonker & Volgenant 1987, Computing 38:325), adapted so that "stay
//! unlinked" is always an option: left records are added one at a time; for each, a Dijkstra
//! search over reduced costs `y_a + z_b - w_ab >= 0` finds the best alternating path, which may
//! end at a free right record, or at a left record that gives up its partner and stays
//! unlinked, or nowhere (the new record stays unlinked). The duals then satisfy the LP
//! optimality conditions of `max sum w x` subject to degree <= 1 (y, z >= 0, feasible on every
//! pair, tight on matched pairs, zero on unlinked records), which certify the optimum because
//! the bipartite matching polytope is integral.
//!
//! Why this and not auction or a dense solver: it is exact with floating-point weights (no
//! epsilon to choose), it needs no dummy rows or columns, and each search stops at the first
//! terminal it settles, so on the sparse graphs that blocking produces a search touches only
//! the records near the new one. Cost: O(E log V) per search in the worst case, far less in
//! practice.
//!
//! # Ties
//! Among optima of equal total, the result is the one this procedure reaches with left
//! records taken in index order, the search settling lower distances first and, at equal
//! distance, lower right indices first, and preferring "stay unlinked" at exact ties. The
//! order of work between threads never enters, so the output is the same for any thread count.

use petgraph::unionfind::UnionFind;
use rayon::prelude::*;
use std::cmp::Ordering;
use std::collections::BinaryHeap;

const NONE: u32 = u32::MAX;

/// The result of [`max_weight_matching`].
#[derive(Debug, Clone, PartialEq)]
pub struct Matching {
    /// Indices (into the input pairs) of the chosen pairs, ascending.
    pub chosen: Vec<usize>,
    /// Sum of the chosen pairs' weights.
    pub total: f64,
    /// Number of connected components with at least one positive pair.
    pub components: usize,
    /// Left plus right records of the largest component.
    pub largest_component: usize,
}

/// The components of a sparse bipartite graph: for each component its pair indices.
#[derive(Debug, Clone)]
pub struct Components {
    /// Pair indices of each component, in input order; components ordered by their first pair.
    pub pairs: Vec<Vec<usize>>,
}

/// Splits pairs with `keep(i)` true into connected components (union-find, near-linear).
pub fn components<F>(n_left: usize, left: &[u32], right: &[u32], keep: F) -> Components
where
    F: Fn(usize) -> bool,
{
    let n_right = right.iter().map(|&r| r as usize + 1).max().unwrap_or(0);
    let mut uf: UnionFind<u32> = UnionFind::new(n_left + n_right);
    for i in 0..left.len() {
        if keep(i) {
            uf.union(left[i], n_left as u32 + right[i]);
        }
    }
    let mut comp_of_root: Vec<u32> = vec![NONE; n_left + n_right];
    let mut pairs: Vec<Vec<usize>> = Vec::new();
    for (i, &a) in left.iter().enumerate() {
        if !keep(i) {
            continue;
        }
        let root = uf.find(a) as usize;
        if comp_of_root[root] == NONE {
            comp_of_root[root] = pairs.len() as u32;
            pairs.push(Vec::new());
        }
        pairs[comp_of_root[root] as usize].push(i);
    }
    Components { pairs }
}

/// Exact maximum-weight one-to-one matching; pairs with weight <= 0 or NaN are never chosen
/// (a pair of negative weight can only lower the total).
///
/// `left[i]`, `right[i]`, `weight[i]` describe pair i; indices need not be dense, and a pair
/// listed twice is allowed (the better copy wins).
pub fn max_weight_matching(n_left: usize, left: &[u32], right: &[u32], weight: &[f64]) -> Matching {
    let positive = |i: usize| weight[i] > 0.0;
    let comps = components(n_left, left, right, positive);
    let solved: Vec<(Vec<usize>, usize)> = comps
        .pairs
        .par_iter()
        .map(|pairs| solve_component(pairs, left, right, weight))
        .collect();
    let mut chosen: Vec<usize> = solved.iter().flat_map(|(c, _)| c.iter().copied()).collect();
    chosen.sort_unstable();
    // Summed in index order, so the total does not depend on the thread count.
    let total = chosen.iter().map(|&i| weight[i]).sum();
    Matching {
        chosen,
        total,
        components: comps.pairs.len(),
        largest_component: solved.iter().map(|s| s.1).max().unwrap_or(0),
    }
}

/// A distance with a total order, for the heap (min-heap through reversed comparison).
#[derive(Debug, Clone, Copy, PartialEq)]
struct Entry {
    dist: f64,
    node: u32,
}

impl Eq for Entry {}

impl Ord for Entry {
    fn cmp(&self, other: &Self) -> Ordering {
        other
            .dist
            .total_cmp(&self.dist)
            .then_with(|| other.node.cmp(&self.node))
    }
}

impl PartialOrd for Entry {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

/// A component in local indices, with left adjacency in compressed rows.
struct Local {
    n_left: usize,
    n_right: usize,
    start: Vec<u32>,
    to: Vec<u32>,
    w: Vec<f64>,
    pair: Vec<usize>,
}

fn localise(pairs: &[usize], left: &[u32], right: &[u32], weight: &[f64]) -> (Local, usize) {
    // Local ids follow the global order, so the tie rule reads in input indices.
    let ls = crate::reliability::confidence::distinct(pairs.iter().map(|&i| left[i]));
    let rs = crate::reliability::confidence::distinct(pairs.iter().map(|&i| right[i]));
    let lid = |g: u32| ls.binary_search(&g).expect("left id of the component") as u32;
    let rid = |g: u32| rs.binary_search(&g).expect("right id of the component") as u32;
    let mut order: Vec<(u32, u32, usize)> = pairs
        .iter()
        .map(|&i| (lid(left[i]), rid(right[i]), i))
        .collect();
    order.sort_unstable();
    let mut start = vec![0u32; ls.len() + 1];
    for &(a, _, _) in &order {
        start[a as usize + 1] += 1;
    }
    for a in 0..ls.len() {
        start[a + 1] += start[a];
    }
    let local = Local {
        n_left: ls.len(),
        n_right: rs.len(),
        start,
        to: order.iter().map(|o| o.1).collect(),
        w: order.iter().map(|o| weight[o.2]).collect(),
        pair: order.iter().map(|o| o.2).collect(),
    };
    let size = ls.len() + rs.len();
    (local, size)
}

/// Solves one component; returns the chosen global pair indices and the component's size.
fn solve_component(
    pairs: &[usize],
    left: &[u32],
    right: &[u32],
    weight: &[f64],
) -> (Vec<usize>, usize) {
    if pairs.len() == 1 {
        return (pairs.to_vec(), 2);
    }
    let (g, size) = localise(pairs, left, right, weight);
    let mate = hungarian(&g);
    let chosen = mate
        .iter()
        .enumerate()
        .filter(|(_, &e)| e != NONE)
        .map(|(_, &e)| g.pair[e as usize])
        .collect();
    (chosen, size)
}

enum Terminal {
    StayUnlinked,
    FreeRight(u32),
    Unlink { left: u32, right: u32 },
}

/// The Hungarian method with "stay unlinked"; returns, per local left record, the local index
/// of its chosen edge or NONE.
fn hungarian(g: &Local) -> Vec<u32> {
    let mut y = vec![0.0f64; g.n_left];
    let mut z = vec![0.0f64; g.n_right];
    let mut mate_l = vec![NONE; g.n_left]; // edge index
    let mut mate_r = vec![NONE; g.n_right]; // left index
    let mut dist = vec![f64::INFINITY; g.n_right];
    let mut pred = vec![NONE; g.n_right]; // edge index that reached the right record
    let mut stamp = vec![0u32; g.n_right];
    let mut settled = vec![0u32; g.n_right];
    let mut heap: BinaryHeap<Entry> = BinaryHeap::new();
    let mut tree_left: Vec<(u32, f64)> = Vec::new();
    let mut tree_right: Vec<u32> = Vec::new();
    let edges = |a: usize| g.start[a] as usize..g.start[a + 1] as usize;

    for (round, a0) in (0..g.n_left).enumerate() {
        let epoch = round as u32 + 1;
        y[a0] = edges(a0)
            .map(|e| g.w[e] - z[g.to[e] as usize])
            .fold(0.0, f64::max);
        heap.clear();
        tree_left.clear();
        tree_right.clear();
        tree_left.push((a0 as u32, 0.0));
        let mut best = (y[a0], Terminal::StayUnlinked);
        let relax = |a: usize,
                     da: f64,
                     heap: &mut BinaryHeap<Entry>,
                     dist: &mut [f64],
                     pred: &mut [u32],
                     stamp: &mut [u32],
                     settled: &[u32]| {
            for e in edges(a) {
                let b = g.to[e] as usize;
                if settled[b] == epoch {
                    continue;
                }
                let rc = (y[a] + z[b] - g.w[e]).max(0.0);
                let nd = da + rc;
                if stamp[b] != epoch || nd < dist[b] {
                    stamp[b] = epoch;
                    dist[b] = nd;
                    pred[b] = e as u32;
                    heap.push(Entry {
                        dist: nd,
                        node: b as u32,
                    });
                }
            }
        };
        relax(
            a0, 0.0, &mut heap, &mut dist, &mut pred, &mut stamp, &settled,
        );
        while let Some(Entry { dist: d, node }) = heap.pop() {
            let b = node as usize;
            if settled[b] == epoch || d > dist[b] {
                continue;
            }
            if d >= best.0 {
                break;
            }
            settled[b] = epoch;
            tree_right.push(node);
            let a = mate_r[b];
            if a == NONE {
                best = (d, Terminal::FreeRight(node));
                break;
            }
            tree_left.push((a, d));
            let unlink = d + y[a as usize];
            if unlink < best.0 {
                best = (
                    unlink,
                    Terminal::Unlink {
                        left: a,
                        right: node,
                    },
                );
            }
            relax(
                a as usize, d, &mut heap, &mut dist, &mut pred, &mut stamp, &settled,
            );
        }
        let total = best.0;
        for &b in &tree_right {
            z[b as usize] += (total - dist[b as usize]).max(0.0);
        }
        for &(a, da) in &tree_left {
            y[a as usize] = (y[a as usize] - (total - da)).max(0.0);
        }
        let mut b = match best.1 {
            Terminal::StayUnlinked => continue,
            Terminal::FreeRight(b) => b,
            Terminal::Unlink { left, right } => {
                mate_l[left as usize] = NONE;
                mate_r[right as usize] = NONE;
                y[left as usize] = 0.0;
                right
            }
        };
        loop {
            let e = pred[b as usize];
            let a = left_of(g, e);
            let next = mate_l[a];
            mate_l[a] = e;
            mate_r[b as usize] = a as u32;
            if a == a0 {
                break;
            }
            b = g.to[next as usize];
        }
    }
    mate_l
}

/// The left endpoint of local edge `e` (binary search over the row starts).
fn left_of(g: &Local, e: u32) -> usize {
    g.start.partition_point(|&s| s <= e) - 1
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Oracle: the best total over every subset of pairs that is a one-to-one matching.
    fn brute_force(left: &[u32], right: &[u32], w: &[f64]) -> f64 {
        let n = left.len();
        let mut best = 0.0f64;
        for mask in 0u32..(1 << n) {
            let mut used_l = 0u64;
            let mut used_r = 0u64;
            let mut total = 0.0;
            let mut ok = true;
            for i in 0..n {
                if mask & (1 << i) != 0 {
                    if used_l & (1 << left[i]) != 0 || used_r & (1 << right[i]) != 0 {
                        ok = false;
                        break;
                    }
                    used_l |= 1 << left[i];
                    used_r |= 1 << right[i];
                    total += w[i];
                }
            }
            if ok {
                best = best.max(total);
            }
        }
        best
    }

    fn is_matching(m: &Matching, left: &[u32], right: &[u32], w: &[f64]) -> bool {
        let mut l: Vec<u32> = m.chosen.iter().map(|&i| left[i]).collect();
        let mut r: Vec<u32> = m.chosen.iter().map(|&i| right[i]).collect();
        l.sort_unstable();
        r.sort_unstable();
        let distinct = l.windows(2).all(|x| x[0] != x[1]) && r.windows(2).all(|x| x[0] != x[1]);
        distinct && m.chosen.iter().all(|&i| w[i] > 0.0)
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2000))]
        // The oracle is brute-force enumeration, as petgraph tests its matchings.
        #[test]
        fn equals_brute_force(
            edges in proptest::collection::vec((0u32..6, 0u32..6, -3i32..8, any::<bool>()), 0..13)
        ) {
            // Integer weights (many ties) or fractional ones.
            let left: Vec<u32> = edges.iter().map(|e| e.0).collect();
            let right: Vec<u32> = edges.iter().map(|e| e.1).collect();
            let w: Vec<f64> = edges.iter().map(|e| if e.3 { e.2 as f64 } else { e.2 as f64 * 0.37 + 0.011 * e.0 as f64 }).collect();
            let m = max_weight_matching(6, &left, &right, &w);
            prop_assert!(is_matching(&m, &left, &right, &w));
            let want = brute_force(&left, &right, &w);
            prop_assert!((m.total - want).abs() < 1e-9, "got {} want {}", m.total, want);
        }
    }

    #[test]
    fn stays_unlinked_rather_than_lose_weight() {
        // a0-b0 = 5, a1-b0 = 4, a1-b1 = 0.5: best is a0-b0 and a1-b1 (5.5), not a1-b0 alone.
        let m = max_weight_matching(2, &[0, 1, 1], &[0, 0, 1], &[5.0, 4.0, 0.5]);
        assert_eq!(m.chosen, vec![0, 2]);
        // Only negative pairs: nothing is linked.
        let m = max_weight_matching(2, &[0, 1], &[0, 0], &[-1.0, -2.0]);
        assert!(m.chosen.is_empty() && m.total == 0.0);
    }

    #[test]
    fn same_result_for_any_thread_count() {
        let mut rng = crate::rng::Rng::new(9);
        let n = 3000;
        let (mut l, mut r, mut w) = (vec![], vec![], vec![]);
        for a in 0..n {
            for _ in 0..4 {
                l.push(a as u32);
                r.push(rng.below(n) as u32);
                w.push((rng.below(5) as f64) - 1.0);
            }
        }
        let run = |threads| {
            rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap()
                .install(|| max_weight_matching(n, &l, &r, &w))
        };
        assert_eq!(run(1), run(2));
    }
}
