//! Belief propagation over many pairs at once, in flat arrays.
//!
//! In: a set of candidate pairs (indices into the run's `left` / `right` record lists) and, per
//! sweep, each pair's weight w = exp(theta). Out: per pair the marginal P(pair in the linkage)
//! of the one-to-one posterior, by the message passing of the module above, in ratio form and
//! the linear domain:
//!
//! ```text
//! l(a->ab) = 1 / (1 + sum_{b' != b} w_ab' r(b'->ab'))        (= exp L(a->ab))
//! P(ab)    = w_ab l(a->ab) r(b->ab) / (1 + w_ab l(a->ab) r(b->ab))
//! ```
//!
//! Messages live in two flat arrays: the left records' messages in left order (a record's
//! pairs contiguous), the right records' in right order, with the position of each pair in
//! the other order beside it. A half-sweep updates every record of one side from the other
//! side's messages; the records of one side are independent, so they are updated in place in
//! parallel chunks, and the numbers do not depend on the thread count. No exp or ln is taken
//! in a sweep: the weights are exponentiated once. Each record's leave-one-out sums keep its
//! largest term apart (the sum of the others, plus the largest for every other term), so no
//! sum cancels: a term that dominates its record's sum is never subtracted from it.
//!
//! Right records are numbered in order of first appearance along the left order, so that a
//! block of similar records on the left reads a nearby stretch of right messages.
//!
//! Memory: 28 bytes per pair plus the weights (8 bytes per pair in each order, or 2 bytes in
//! each order with one weight per group of pairs) and 8 bytes per record.

use rayon::prelude::*;

/// Positions per chunk of a parallel half-sweep.
const CHUNK_POSITIONS: usize = 8192;

/// Graphs with fewer positions are swept on one thread (same numbers, less overhead).
pub(crate) const PARALLEL_POSITIONS: usize = 50_000;

/// A set of pairs in left order and right order.
pub struct FlatGraph {
    /// Per local left record: its first position in left order (one more entry at the end).
    left_start: Vec<u32>,
    /// Per local right record: its first position in right order.
    right_start: Vec<u32>,
    /// Per left-order position: the pair's position in right order.
    l2r: Vec<u32>,
    /// Per right-order position: the pair's position in left order.
    r2l: Vec<u32>,
    /// Per left-order position: the caller's pair index (None: position = pair index).
    pair: Option<Vec<u32>>,
    /// Record boundaries of the parallel chunks of each side.
    left_chunks: Vec<usize>,
    right_chunks: Vec<usize>,
}

impl FlatGraph {
    /// The graph of pairs `sel` (ascending indices into `left` / `right`), or of every pair
    /// when `sel` is None.
    pub fn new(
        n_left: usize,
        n_right: usize,
        left: &[u32],
        right: &[u32],
        sel: Option<Vec<u32>>,
    ) -> FlatGraph {
        let n = sel.as_ref().map_or(left.len(), Vec::len);
        let at = |pos: usize| -> u32 { sel.as_ref().map_or(pos as u32, |s| s[pos]) };
        // Each side's pairs by record (counting sort, input order within a record).
        let by = |side: &[u32], records: usize| -> (Vec<u32>, Vec<u32>) {
            let mut start = vec![0u32; records + 1];
            for pos in 0..n {
                start[side[at(pos) as usize] as usize + 1] += 1;
            }
            for r in 0..records {
                start[r + 1] += start[r];
            }
            let mut fill = start.clone();
            let mut pairs = vec![0u32; n];
            for pos in 0..n {
                let i = at(pos);
                let r = side[i as usize] as usize;
                pairs[fill[r] as usize] = i;
                fill[r] += 1;
            }
            (start, pairs)
        };
        let (ls, lp) = by(left, n_left);
        let (rs, rp) = by(right, n_right);
        // Breadth-first numbering of the records: neighbours get nearby numbers, so a sweep
        // reads the other side's messages from nearby memory.
        const RIGHT: u32 = 1 << 31;
        let mut local_l = vec![u32::MAX; n_left];
        let mut local_r = vec![u32::MAX; n_right];
        let mut order_l: Vec<u32> = Vec::new();
        let mut order_r: Vec<u32> = Vec::new();
        let mut queue: std::collections::VecDeque<u32> = std::collections::VecDeque::new();
        for a0 in 0..n_left {
            if ls[a0] == ls[a0 + 1] || local_l[a0] != u32::MAX {
                continue;
            }
            local_l[a0] = order_l.len() as u32;
            order_l.push(a0 as u32);
            queue.push_back(a0 as u32);
            while let Some(x) = queue.pop_front() {
                if x & RIGHT == 0 {
                    let a = x as usize;
                    for &i in &lp[ls[a] as usize..ls[a + 1] as usize] {
                        let b = right[i as usize] as usize;
                        if local_r[b] == u32::MAX {
                            local_r[b] = order_r.len() as u32;
                            order_r.push(b as u32);
                            queue.push_back(b as u32 | RIGHT);
                        }
                    }
                } else {
                    let b = (x & !RIGHT) as usize;
                    for &i in &rp[rs[b] as usize..rs[b + 1] as usize] {
                        let a = left[i as usize] as usize;
                        if local_l[a] == u32::MAX {
                            local_l[a] = order_l.len() as u32;
                            order_l.push(a as u32);
                            queue.push_back(a as u32);
                        }
                    }
                }
            }
        }
        drop(rp);
        let mut left_start = Vec::with_capacity(order_l.len() + 1);
        let mut pair = Vec::with_capacity(n);
        for &a in &order_l {
            left_start.push(pair.len() as u32);
            pair.extend_from_slice(&lp[ls[a as usize] as usize..ls[a as usize + 1] as usize]);
        }
        left_start.push(pair.len() as u32);
        drop(lp);
        let mut right_start = Vec::with_capacity(order_r.len() + 1);
        let mut acc = 0u32;
        for &b in &order_r {
            right_start.push(acc);
            acc += rs[b as usize + 1] - rs[b as usize];
        }
        right_start.push(acc);
        let mut fill: Vec<u32> = right_start[..order_r.len()].to_vec();
        let mut l2r = vec![0u32; n];
        let mut r2l = vec![0u32; n];
        for (pos, &i) in pair.iter().enumerate() {
            let b = local_r[right[i as usize] as usize] as usize;
            let q = fill[b];
            fill[b] += 1;
            l2r[pos] = q;
            r2l[q as usize] = pos as u32;
        }
        let identity = pair.iter().enumerate().all(|(p, &i)| p as u32 == i);
        let left_chunks = chunks(&left_start);
        let right_chunks = chunks(&right_start);
        FlatGraph {
            left_start,
            right_start,
            l2r,
            r2l,
            pair: (!identity).then_some(pair),
            left_chunks,
            right_chunks,
        }
    }

    /// Number of pairs.
    pub fn len(&self) -> usize {
        self.l2r.len()
    }

    /// True without pairs.
    pub fn is_empty(&self) -> bool {
        self.l2r.is_empty()
    }

    /// Local left records.
    pub fn n_left(&self) -> usize {
        self.left_start.len().saturating_sub(1)
    }

    /// Local right records.
    pub fn n_right(&self) -> usize {
        self.right_start.len().saturating_sub(1)
    }

    /// The left-order position of the first pair of a local left record.
    pub fn left_first(&self, r: usize) -> usize {
        self.left_start[r] as usize
    }

    /// The left-order position of the first pair of a local right record.
    pub fn right_first(&self, r: usize) -> usize {
        self.r2l[self.right_start[r] as usize] as usize
    }

    /// The caller's pair index at a left-order position.
    pub fn pair(&self, pos: usize) -> usize {
        self.pair.as_ref().map_or(pos, |s| s[pos] as usize)
    }

    /// The left-order position of the pair at a right-order position.
    pub fn left_position(&self, right_pos: usize) -> usize {
        self.r2l[right_pos] as usize
    }

    /// Per right-order position, the same value as `by_left` holds at the left-order position.
    pub fn to_right_order<T: Copy + Send + Sync + Default>(&self, by_left: &[T]) -> Vec<T> {
        self.r2l.par_iter().map(|&p| by_left[p as usize]).collect()
    }
}

/// Record boundaries (indices into `start`'s records) of chunks of about
/// [`CHUNK_POSITIONS`] positions.
fn chunks(start: &[u32]) -> Vec<usize> {
    let records = start.len().saturating_sub(1);
    let mut out = vec![0usize];
    let mut last = 0u32;
    for r in 0..records {
        if (start[r + 1] - last) as usize >= CHUNK_POSITIONS {
            out.push(r + 1);
            last = start[r + 1];
        }
    }
    if *out.last().unwrap_or(&0) != records {
        out.push(records);
    }
    out
}

/// Pair weights at each position of each order.
pub trait Weights: Sync {
    /// The weight at a left-order position.
    fn left(&self, pos: usize) -> f64;
    /// The weight at a right-order position.
    fn right(&self, pos: usize) -> f64;
}

/// One weight per pair, stored in both orders.
pub struct PairWeights {
    pub left: Vec<f64>,
    pub right: Vec<f64>,
}

impl Weights for PairWeights {
    fn left(&self, pos: usize) -> f64 {
        self.left[pos]
    }
    fn right(&self, pos: usize) -> f64 {
        self.right[pos]
    }
}

/// One weight per group of pairs; each position holds its pair's group (`u8` when there are
/// at most 256 groups: one byte a position in each order).
pub struct GroupWeights<T> {
    pub left: Vec<T>,
    pub right: Vec<T>,
    pub w: Vec<f64>,
}

impl<T: Copy + Into<usize> + Sync> Weights for GroupWeights<T> {
    fn left(&self, pos: usize) -> f64 {
        self.w[self.left[pos].into()]
    }
    fn right(&self, pos: usize) -> f64 {
        self.w[self.right[pos].into()]
    }
}

/// The same weight for every pair.
pub struct OneWeight(pub f64);

impl Weights for OneWeight {
    fn left(&self, _: usize) -> f64 {
        self.0
    }
    fn right(&self, _: usize) -> f64 {
        self.0
    }
}

/// Messages of BP on a [`FlatGraph`], kept between runs so that a run with slightly changed
/// weights starts from the last fixed point.
pub struct Messages {
    /// From each left record into its pairs, in left order.
    pub lm: Vec<f64>,
    /// From each right record into its pairs, in right order.
    pub rm: Vec<f64>,
    /// Per local left record, the largest change of its pairs' marginals in the last sweep.
    pub left_change: Vec<f32>,
    /// The same per local right record.
    pub right_change: Vec<f32>,
}

impl Messages {
    /// The starting messages: 1 (log 0) everywhere.
    pub fn new(g: &FlatGraph) -> Messages {
        Messages {
            lm: vec![1.0; g.len()],
            rm: vec![1.0; g.len()],
            left_change: vec![0.0; g.left_start.len().saturating_sub(1)],
            right_change: vec![0.0; g.right_start.len().saturating_sub(1)],
        }
    }
}

/// Outcome of [`run`].
pub struct Run {
    /// Sweeps made (each updates both sides).
    pub iterations: usize,
    /// True when the largest change of a marginal fell to the tolerance.
    pub converged: bool,
}

/// Sweeps until the largest change of any pair's marginal in a half-sweep is at most
/// `tolerance` (to first order, bounded above: q (1 - q) <= min(o, 1 / o) times the change of
/// the log message) or `max_iterations` sweeps are made; `damping` is the weight of the old
/// message in each update. With a tolerance of 0 no change is measured: exactly
/// `max_iterations` sweeps.
pub fn run<W: Weights>(
    g: &FlatGraph,
    w: &W,
    msg: &mut Messages,
    max_iterations: usize,
    damping: f64,
    tolerance: f64,
) -> Run {
    run_with(
        g,
        w,
        msg,
        max_iterations,
        damping,
        tolerance,
        g.len() >= PARALLEL_POSITIONS,
    )
}

/// [`run`], on several threads or one (the same numbers either way).
pub(crate) fn run_with<W: Weights>(
    g: &FlatGraph,
    w: &W,
    msg: &mut Messages,
    max_iterations: usize,
    damping: f64,
    tolerance: f64,
    parallel: bool,
) -> Run {
    let track = tolerance > 0.0;
    let mut iterations = 0;
    let mut converged = false;
    // Records still to update: all at first; then, when measuring, only those whose log
    // messages moved by more than the tolerance in their last update or whose other-side
    // neighbour's did. A record left out has quiet inputs and had itself settled (its
    // messages, not only its marginals: a message into a pair of marginal 0 still feeds the
    // other record's sums). Late sweeps on a large graph then touch only the region still
    // settling.
    let mut active_l = vec![true; g.n_left()];
    let mut active_r = vec![true; g.n_right()];
    // Never updated counts as moved, so every record is updated at least once.
    let mut left_moved = vec![f32::INFINITY; g.n_left()];
    let mut right_moved = vec![f32::INFINITY; g.n_right()];
    while iterations < max_iterations {
        iterations += 1;
        let a = half_sweep(
            &g.left_start,
            &g.left_chunks,
            &g.l2r,
            |p| w.left(p),
            &msg.rm,
            &mut msg.lm,
            &mut msg.left_change,
            &mut left_moved,
            &active_l,
            damping,
            parallel,
            track,
        );
        if track {
            next_active(
                &right_moved,
                &left_moved,
                &g.left_start,
                &g.l2r,
                &g.right_start,
                tolerance,
                &mut active_r,
            );
        }
        let b = half_sweep(
            &g.right_start,
            &g.right_chunks,
            &g.r2l,
            |p| w.right(p),
            &msg.lm,
            &mut msg.rm,
            &mut msg.right_change,
            &mut right_moved,
            &active_r,
            damping,
            parallel,
            track,
        );
        if track && a.max(b) <= tolerance {
            converged = true;
            break;
        }
        if track {
            next_active(
                &left_moved,
                &right_moved,
                &g.right_start,
                &g.r2l,
                &g.left_start,
                tolerance,
                &mut active_l,
            );
        }
    }
    Run {
        iterations,
        converged,
    }
}

/// The records of one side to update next: those whose own last change exceeded the
/// tolerance, and the neighbours of the other side's records that just did. `own` and
/// `other` are the two sides' last changes; `other_start` and `cross` the other side's
/// positions and their positions on this side, whose records `start` delimits.
fn next_active(
    own: &[f32],
    other: &[f32],
    other_start: &[u32],
    cross: &[u32],
    start: &[u32],
    tolerance: f64,
    active: &mut [bool],
) {
    let moved: Vec<usize> = (0..other.len())
        .filter(|&r| other[r] as f64 > tolerance)
        .collect();
    if moved.len() * 8 > other.len() {
        active.iter_mut().for_each(|a| *a = true);
        return;
    }
    for (a, &c) in active.iter_mut().zip(own) {
        *a = c as f64 > tolerance;
    }
    for r in moved {
        for &pos in &cross[other_start[r] as usize..other_start[r + 1] as usize] {
            let rec = start.partition_point(|&s| s <= pos) - 1;
            active[rec] = true;
        }
    }
}

/// Per left-order position, w l r: the odds of the pair's marginal.
pub fn odds<W: Weights>(g: &FlatGraph, w: &W, msg: &Messages) -> Vec<f64> {
    (0..g.len())
        .into_par_iter()
        .map(|pos| odds_at(g, w, msg, pos))
        .collect()
}

/// The odds of the pair at one left-order position (see [`odds`]).
pub fn odds_at<W: Weights>(g: &FlatGraph, w: &W, msg: &Messages, pos: usize) -> f64 {
    w.left(pos) * msg.lm[pos] * msg.rm[g.l2r[pos] as usize]
}

/// Updates one side's messages in place; returns the largest change of a marginal.
#[allow(clippy::too_many_arguments)]
fn half_sweep<F: Fn(usize) -> f64 + Sync>(
    start: &[u32],
    chunk_bounds: &[usize],
    cross: &[u32],
    weight: F,
    incoming: &[f64],
    out: &mut [f64],
    rec_change: &mut [f32],
    rec_moved: &mut [f32],
    active: &[bool],
    damping: f64,
    parallel: bool,
    track: bool,
) -> f64 {
    let update = |records: std::ops::Range<usize>,
                  slice: &mut [f64],
                  changes: &mut [f32],
                  moved: &mut [f32],
                  base: usize|
     -> f64 {
        let mut change = 0.0f64;
        let mut terms: Vec<f64> = Vec::new();
        let first = records.start;
        for r in records {
            if !active[r] {
                changes[r - first] = 0.0;
                moved[r - first] = 0.0;
                continue;
            }
            let mut rec = 0.0f64;
            let mut rec_m = 0.0f64;
            let (s, e) = (start[r] as usize, start[r + 1] as usize);
            terms.clear();
            let mut top = 0usize;
            let mut top_v = f64::NEG_INFINITY;
            for (j, pos) in (s..e).enumerate() {
                let x = weight(pos) * incoming[cross[pos] as usize];
                if x > top_v {
                    top_v = x;
                    top = j;
                }
                terms.push(x);
            }
            // The sum of all terms but the largest, in order.
            let rest: f64 = terms
                .iter()
                .enumerate()
                .filter(|&(j, _)| j != top)
                .map(|(_, x)| x)
                .sum();
            for (j, &x) in terms.iter().enumerate() {
                let excl = if j == top {
                    1.0 + rest
                } else {
                    1.0 + top_v + (rest - x)
                };
                let new = 1.0 / excl;
                let slot = &mut slice[s + j - base];
                let next = damping * *slot + (1.0 - damping) * new;
                if track {
                    // The change of the pair's marginal q: about q (1 - q) times that of the
                    // log message, which is at most |next - old| / min(next, old); and
                    // q (1 - q) = o / (1 + o)^2 <= min(o, 1 / o) for the odds o.
                    let o = x * next;
                    let f = if o < 1.0 { o } else { 1.0 / o };
                    let m = (next - *slot).abs() / next.min(*slot);
                    rec = rec.max(m * f);
                    rec_m = rec_m.max(m);
                }
                *slot = next;
            }
            changes[r - first] = rec as f32;
            moved[r - first] = rec_m as f32;
            change = change.max(rec);
        }
        change
    };
    if !parallel {
        let records = start.len().saturating_sub(1);
        return update(0..records, out, rec_change, rec_moved, 0);
    }
    type Piece<'a> = (
        std::ops::Range<usize>,
        &'a mut [f64],
        &'a mut [f32],
        &'a mut [f32],
        usize,
    );
    let mut pieces: Vec<Piece> = Vec::with_capacity(chunk_bounds.len());
    let mut rest: &mut [f64] = out;
    let mut rest_c: &mut [f32] = rec_change;
    let mut rest_m: &mut [f32] = rec_moved;
    for w in chunk_bounds.windows(2) {
        let (lo, hi) = (start[w[0]] as usize, start[w[1]] as usize);
        let (head, tail) = rest.split_at_mut(hi - lo);
        let (head_c, tail_c) = rest_c.split_at_mut(w[1] - w[0]);
        let (head_m, tail_m) = rest_m.split_at_mut(w[1] - w[0]);
        pieces.push((w[0]..w[1], head, head_c, head_m, lo));
        rest_m = tail_m;
        rest = tail;
        rest_c = tail_c;
    }
    pieces
        .into_par_iter()
        .map(|(records, slice, changes, moved, base)| update(records, slice, changes, moved, base))
        .reduce(|| 0.0, f64::max)
}
