//! Blocking: the sparse bipartite graph of candidate pairs.
//!
//! In: [`Records`] and the passes (each a list of key parts, each reading a field or a
//! key-only column). Out: [`Candidates`], the union
//! of the pairs that share a key in at least one pass, each pair once, sorted by (left, right),
//! with a bit mask of the passes that found it. A block that would produce more pairs than the
//! pass's cap is skipped with a warning naming the pass, the key and its size, never silently.
//! This module never compares values beyond building keys.

use crate::config::{KeyPart, Transform};
use crate::records::{FieldValues, Records, MISSING};
use crate::text;
use rayon::prelude::*;
use std::collections::HashMap;

/// A fast hash with a fixed seed (key ids are assigned in insertion order, never by iterating
/// a map, so the hash does not change the result).
type FastMap<K, V> = HashMap<K, V, foldhash::fast::FixedState>;

/// Default cap on the pairs one block may produce.
pub const DEFAULT_MAX_BLOCK_PAIRS: u64 = 2_000_000;

/// Most passes one run may have (the pass mask is 16 bits).
pub const MAX_PASSES: usize = 16;

/// The candidate pairs, sorted by (left, right), each once.
#[derive(Debug, Clone, Default)]
pub struct Candidates {
    /// Left record index of each pair.
    pub left: Vec<u32>,
    /// Right record index of each pair.
    pub right: Vec<u32>,
    /// Bit p set when pass p produced the pair.
    pub passes: Vec<u16>,
}

impl Candidates {
    /// Number of candidate pairs.
    pub fn len(&self) -> usize {
        self.left.len()
    }

    /// True when there is no candidate pair.
    pub fn is_empty(&self) -> bool {
        self.left.is_empty()
    }
}

/// What one pass produced, for the run summary.
#[derive(Debug, Clone)]
pub struct PassStats {
    /// The pass's label.
    pub name: String,
    /// Pairs this pass produced (before the union).
    pub pairs: u64,
    /// Blocks with records on both sides.
    pub blocks: u64,
    /// Largest block, in pairs, among those kept.
    pub largest_block: u64,
    /// Pairs produced by blocks of more than [`LARGE_BLOCK`] pairs.
    pub pairs_in_large_blocks: u64,
    /// Blocks skipped by the cap, with their key and pair count.
    pub skipped: Vec<(String, u64)>,
}

/// A block of more pairs than this counts as large in the statistics (a common surname in a
/// town-sized table gives blocks of this order).
pub const LARGE_BLOCK: u64 = 1000;

/// A pass ready to run: its label, key parts and cap.
#[derive(Debug, Clone)]
pub struct Pass {
    /// Label for messages.
    pub name: String,
    /// Key parts, joined into one key.
    pub parts: Vec<KeyPart>,
    /// Largest number of pairs one block may produce.
    pub max_block_pairs: u64,
    /// Sorted-neighbourhood window, when the pass is one.
    pub window: Option<usize>,
}

/// Builds the candidate pairs of all passes; returns them with per-pass statistics.
///
/// Cost: O(records + pairs) per pass for the keys and blocks, a parallel sort of each pass's
/// pairs, O(P log P) for P pairs, and a merge of the sorted passes into the union.
pub fn candidates(records: &Records, passes: &[Pass]) -> (Candidates, Vec<PassStats>) {
    plan(records, passes).candidates(records)
}

/// The passes' keys and blocks, before any pair is made: the pair count of every pass is
/// known from its key counts (the sum over kept blocks of left x right records), so a run can
/// say how many pairs, and how much memory, its blocking will take before it makes them.
pub struct Plan {
    passes: Vec<PassPlan>,
}

struct PassPlan {
    pass: Pass,
    keys: Keys,
    stats: PassStats,
    /// Window passes only: an upper bound of their pairs (records x window).
    window_bound: u64,
}

/// Builds every pass's keys and counts its pairs (see [`Plan`]).
pub fn plan(records: &Records, passes: &[Pass]) -> Plan {
    Plan {
        passes: passes.par_iter().map(|p| plan_pass(records, p)).collect(),
    }
}

impl Plan {
    /// Per pass: its pairs before the union (an upper bound for window passes).
    pub fn pairs_per_pass(&self) -> Vec<u64> {
        self.passes
            .iter()
            .map(|p| {
                if p.pass.window.is_some() {
                    p.window_bound
                } else {
                    p.stats.pairs
                }
            })
            .collect()
    }

    /// An upper bound of the candidate pairs: the sum of the passes' pairs (a pair found by
    /// two passes counts twice here, once in the candidates).
    pub fn pairs_bound(&self) -> u64 {
        self.pairs_per_pass().iter().sum()
    }

    /// Makes the pairs: the union of the passes, with their statistics.
    pub fn candidates(self, records: &Records) -> (Candidates, Vec<PassStats>) {
        let outputs: Vec<(Vec<u64>, PassStats)> =
            self.passes.into_par_iter().map(emit_pass).collect();
        let (lists, stats): (Vec<Vec<u64>>, Vec<PassStats>) = outputs.into_iter().unzip();
        (merge(&lists, records.n_left()), stats)
    }
}

/// The union of the passes' sorted pair lists, each pair once with the mask of the passes
/// that gave it. Runs of left records are merged in parallel and joined in order.
fn merge(lists: &[Vec<u64>], n_left: usize) -> Candidates {
    const RUN: usize = 4096;
    let runs = n_left.div_ceil(RUN).max(1);
    let (left, (right, passes)): (Vec<u32>, (Vec<u32>, Vec<u16>)) = (0..runs)
        .into_par_iter()
        .flat_map_iter(|run| {
            let from = ((run * RUN) as u64) << 32;
            let to = if run + 1 == runs {
                u64::MAX
            } else {
                (((run + 1) * RUN) as u64) << 32
            };
            let parts: Vec<&[u64]> = lists
                .iter()
                .map(|l| {
                    let lo = if run == 0 {
                        0
                    } else {
                        l.partition_point(|&c| c < from)
                    };
                    let hi = if run + 1 == runs {
                        l.len()
                    } else {
                        l.partition_point(|&c| c < to)
                    };
                    &l[lo..hi]
                })
                .collect();
            merge_run(parts).into_iter()
        })
        .unzip();
    Candidates {
        left,
        right,
        passes,
    }
}

/// Merges sorted pair lists (list p is pass p) into (left, (right, mask)) triples.
fn merge_run(lists: Vec<&[u64]>) -> Vec<(u32, (u32, u16))> {
    let mut out = Vec::with_capacity(lists.iter().map(|l| l.len()).sum());
    let mut heads = vec![0usize; lists.len()];
    loop {
        let mut next: Option<u64> = None;
        for (list, &h) in lists.iter().zip(&heads) {
            if let Some(&code) = list.get(h) {
                next = Some(next.map_or(code, |n| n.min(code)));
            }
        }
        let Some(code) = next else {
            break;
        };
        let mut mask = 0u16;
        for (p, (list, h)) in lists.iter().zip(heads.iter_mut()).enumerate() {
            while list.get(*h) == Some(&code) {
                mask |= 1 << p;
                *h += 1;
            }
        }
        out.push(((code >> 32) as u32, (code as u32, mask)));
    }
    out
}

/// Per-record key ids of one side for a pass ([`MISSING`] when any part is missing), and how
/// each key id was built, from which its text (for messages) is made on demand.
struct Keys {
    left: Vec<u32>,
    right: Vec<u32>,
    /// Per key id: the key of the parts before the last ([`EMPTY_KEY`] for none), the last
    /// part's position in the pass and its value id.
    origin: Vec<(u32, usize, u32)>,
    /// Per part: the text of each transformed value id.
    part_text: Vec<Vec<String>>,
}

/// The key of no parts, the start of every key.
const EMPTY_KEY: u32 = u32::MAX - 1;

impl Keys {
    fn len(&self) -> usize {
        self.origin.len()
    }

    /// The key's text: its parts' texts joined with `|`.
    fn text(&self, k: u32) -> String {
        let (prefix, p, part) = self.origin[k as usize];
        let last = &self.part_text[p][part as usize];
        if prefix == EMPTY_KEY {
            last.clone()
        } else {
            format!("{}|{last}", self.text(prefix))
        }
    }
}

fn transform_value(fv: &FieldValues, v: u32, t: Transform) -> String {
    let s = &fv.dict[v as usize];
    let date = || {
        fv.dates
            .get(v as usize)
            .copied()
            .or_else(|| text::parse_date(s, text::DateOrder::Ymd))
    };
    match t {
        Transform::Exact => s.clone(),
        Transform::Soundex => text::soundex(s),
        Transform::First(n) => s.chars().take(n).collect(),
        Transform::Last(n) => {
            let chars: Vec<char> = s.chars().collect();
            chars[chars.len().saturating_sub(n)..].iter().collect()
        }
        Transform::Year => date().map(|d| format!("{:04}", d.year)).unwrap_or_default(),
        Transform::YearMonth => date()
            .and_then(|d| d.month.map(|m| format!("{:04}-{:02}", d.year, m)))
            .unwrap_or_default(),
        Transform::Digits => s.chars().filter(char::is_ascii_digit).collect(),
        Transform::DigitsN(n) => s.chars().filter(char::is_ascii_digit).take(n).collect(),
        Transform::Initials => s
            .split_whitespace()
            .filter_map(|w| w.chars().next())
            .collect(),
        Transform::Nysiis => text::nysiis(s),
        Transform::SortedTokens => {
            let mut w: Vec<&str> = s.split_whitespace().collect();
            w.sort_unstable();
            w.join(" ")
        }
    }
}

fn build_keys(records: &Records, parts: &[KeyPart]) -> Keys {
    // A key is built by folding its parts: (key so far, next part's transformed value id) ->
    // new key id. Ids are assigned in a fixed order (left rows, then right rows), so they do not
    // depend on the thread count.
    let mut part_ids: Vec<Vec<u32>> = Vec::with_capacity(parts.len());
    let mut part_text: Vec<Vec<String>> = Vec::with_capacity(parts.len());
    for part in parts {
        let fv = records.key_values(part.source);
        let mut seen: FastMap<String, u32> = FastMap::default();
        let mut texts = Vec::new();
        let transformed: Vec<String> = (0..fv.dict.len() as u32)
            .into_par_iter()
            .map(|v| transform_value(fv, v, part.transform))
            .collect();
        let ids = transformed
            .into_iter()
            .map(|t| {
                if t.is_empty() {
                    return MISSING;
                }
                let next = seen.len() as u32;
                *seen.entry(t.clone()).or_insert_with(|| {
                    texts.push(t);
                    next
                })
            })
            .collect();
        part_ids.push(ids);
        part_text.push(texts);
    }
    let mut combos: FastMap<(u32, u32), u32> = FastMap::default();
    let mut origin: Vec<(u32, usize, u32)> = Vec::new();
    let mut key_of = |side: &[&[u32]]| -> Vec<u32> {
        let n = side.first().map_or(0, |v| v.len());
        (0..n)
            .map(|i| {
                let mut key = EMPTY_KEY;
                for (p, values) in side.iter().enumerate() {
                    let v = values[i];
                    let part = if v == MISSING {
                        MISSING
                    } else {
                        part_ids[p][v as usize]
                    };
                    if part == MISSING {
                        return MISSING;
                    }
                    let next = origin.len() as u32;
                    key = *combos.entry((key, part)).or_insert_with(|| {
                        origin.push((key, p, part));
                        next
                    });
                }
                key
            })
            .collect()
    };
    let left_side: Vec<&[u32]> = parts
        .iter()
        .map(|p| records.key_values(p.source).left.as_slice())
        .collect();
    let right_side: Vec<&[u32]> = parts
        .iter()
        .map(|p| records.key_values(p.source).right.as_slice())
        .collect();
    let left = key_of(&left_side);
    let right = key_of(&right_side);
    Keys {
        left,
        right,
        origin,
        part_text,
    }
}

/// Each record's key text for `pass` (its parts' transformed values joined with `|`, as in
/// messages), on the left side or the right; `None` where a part is missing. Two records share
/// a block of the pass exactly when their texts are equal, so a join on these texts (a
/// distributed engine's) makes the pass's pairs, before its `max_block_pairs` cap.
pub fn key_texts(records: &Records, pass: &Pass, left: bool) -> Vec<Option<String>> {
    let keys = build_keys(records, &pass.parts);
    let side = if left { &keys.left } else { &keys.right };
    side.par_iter()
        .map(|&k| (k != MISSING).then(|| keys.text(k)))
        .collect()
}

/// Groups record indices by key id: (offsets, members) in counting-sort layout.
fn group(keys: &[u32], n_keys: usize) -> (Vec<u32>, Vec<u32>) {
    let mut start = vec![0u32; n_keys + 1];
    for &k in keys {
        if k != MISSING {
            start[k as usize + 1] += 1;
        }
    }
    for i in 0..n_keys {
        start[i + 1] += start[i];
    }
    let mut fill = start.clone();
    let mut members = vec![0u32; start[n_keys] as usize];
    for (i, &k) in keys.iter().enumerate() {
        if k != MISSING {
            members[fill[k as usize] as usize] = i as u32;
            fill[k as usize] += 1;
        }
    }
    (start, members)
}

/// Sorted neighbourhood (Hernandez & Stolfo 1995): both tables' records with a key, sorted
/// together by (key text, side, record index); each record is paired with the records of the
/// other table among the next `window - 1` places. Cost O(n log n + n w).
fn sorted_neighbourhood(keys: &Keys, window: usize) -> Vec<u64> {
    let text: Vec<String> = (0..keys.len() as u32)
        .into_par_iter()
        .map(|k| keys.text(k))
        .collect();
    let mut merged: Vec<(&str, u8, u32)> = Vec::with_capacity(keys.left.len() + keys.right.len());
    for (side, ks) in [(0u8, &keys.left), (1u8, &keys.right)] {
        for (i, &k) in ks.iter().enumerate() {
            if k != MISSING {
                merged.push((text[k as usize].as_str(), side, i as u32));
            }
        }
    }
    merged.par_sort_unstable();
    let mut pairs = Vec::new();
    for i in 0..merged.len() {
        for j in i + 1..(i + window).min(merged.len()) {
            let (a, b) = (merged[i], merged[j]);
            if a.1 != b.1 {
                let (l, r) = if a.1 == 0 { (a.2, b.2) } else { (b.2, a.2) };
                pairs.push(((l as u64) << 32) | r as u64);
            }
        }
    }
    pairs.par_sort_unstable();
    pairs
}

fn plan_pass(records: &Records, pass: &Pass) -> PassPlan {
    let keys = build_keys(records, &pass.parts);
    let mut stats = PassStats {
        name: pass.name.clone(),
        pairs: 0,
        blocks: 0,
        largest_block: 0,
        pairs_in_large_blocks: 0,
        skipped: Vec::new(),
    };
    if let Some(w) = pass.window {
        let with_key = keys
            .left
            .iter()
            .chain(&keys.right)
            .filter(|&&k| k != MISSING);
        let window_bound = with_key.count() as u64 * w as u64;
        return PassPlan {
            pass: pass.clone(),
            keys,
            stats,
            window_bound,
        };
    }
    let n_keys = keys.len();
    let mut nl = vec![0u64; n_keys];
    let mut nr = vec![0u64; n_keys];
    for &k in keys.left.iter().filter(|&&k| k != MISSING) {
        nl[k as usize] += 1;
    }
    for &k in keys.right.iter().filter(|&&k| k != MISSING) {
        nr[k as usize] += 1;
    }
    for k in 0..n_keys {
        let size = nl[k] * nr[k];
        if size == 0 {
            continue;
        }
        if size > pass.max_block_pairs {
            stats.skipped.push((keys.text(k as u32), size));
            continue;
        }
        stats.blocks += 1;
        stats.pairs += size;
        stats.largest_block = stats.largest_block.max(size);
        if size > LARGE_BLOCK {
            stats.pairs_in_large_blocks += size;
        }
    }
    PassPlan {
        pass: pass.clone(),
        keys,
        stats,
        window_bound: 0,
    }
}

fn emit_pass(plan: PassPlan) -> (Vec<u64>, PassStats) {
    let PassPlan {
        pass, keys, stats, ..
    } = plan;
    if let Some(w) = pass.window {
        let pairs = sorted_neighbourhood(&keys, w);
        let stats = PassStats {
            pairs: pairs.len() as u64,
            ..stats
        };
        return (pairs, stats);
    }
    let n_keys = keys.len();
    let (ls, _) = group(&keys.left, n_keys);
    let (rs, rm) = group(&keys.right, n_keys);
    let mut keep = vec![false; n_keys];
    for k in 0..n_keys {
        let size = (ls[k + 1] - ls[k]) as u64 * (rs[k + 1] - rs[k]) as u64;
        keep[k] = size > 0 && size <= pass.max_block_pairs;
    }
    // Each left record is in one block of the pass, whose right records are in increasing
    // order: going through the left records in order gives the pairs sorted, with no sort.
    let pairs: Vec<u64> = keys
        .left
        .par_iter()
        .enumerate()
        .with_min_len(1024)
        .flat_map_iter(|(a, &k)| {
            let right: &[u32] = if k != MISSING && keep[k as usize] {
                &rm[rs[k as usize] as usize..rs[k as usize + 1] as usize]
            } else {
                &[]
            };
            right.iter().map(move |&b| ((a as u64) << 32) | b as u64)
        })
        .collect();
    (pairs, stats)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{FieldSpec, KeySource};
    use crate::io::Table;
    use proptest::prelude::*;

    fn table(name: &str, vals: &[(&str, &str)]) -> Table {
        let mut columns = HashMap::new();
        columns.insert(
            "a".to_string(),
            vals.iter().map(|v| v.0.to_string()).collect(),
        );
        columns.insert(
            "b".to_string(),
            vals.iter().map(|v| v.1.to_string()).collect(),
        );
        Table {
            path: name.into(),
            ids: (0..vals.len()).map(|i| format!("{name}{i}")).collect(),
            columns,
            header: vec!["a".into(), "b".into()],
            lines: (0..vals.len() as u64).map(|i| i + 2).collect(),
            bytes: 0,
            sha256: String::new(),
            place: "line",
        }
    }

    fn spec(name: &str) -> FieldSpec {
        FieldSpec {
            normalize: None,
            ..FieldSpec::key_column(name)
        }
    }

    fn pass(parts: &[(usize, Transform)]) -> Pass {
        Pass {
            name: "p".into(),
            parts: parts
                .iter()
                .map(|&(field, transform)| KeyPart {
                    source: KeySource::Field(field),
                    transform,
                })
                .collect(),
            max_block_pairs: DEFAULT_MAX_BLOCK_PAIRS,
            window: None,
        }
    }

    proptest! {
        // Oracle: brute force over all pairs, a pair kept when any pass gives both records the
        // same non-empty key (the definition of blocking, METHOD §1).
        #[test]
        fn union_equals_brute_force(
            l in proptest::collection::vec((0u8..4, 0u8..3), 0..12),
            r in proptest::collection::vec((0u8..4, 0u8..3), 0..12),
        ) {
            let names = ["", "ab", "ac", "bd"];
            let lv: Vec<(&str, &str)> = l.iter().map(|&(a, b)| (names[a as usize], ["x", "y", ""][b as usize])).collect();
            let rv: Vec<(&str, &str)> = r.iter().map(|&(a, b)| (names[a as usize], ["x", "y", ""][b as usize])).collect();
            let lt = table("l", &lv);
            let rt = table("r", &rv);
            let recs = crate::records::build(&lt, &rt, &[spec("a"), spec("b")], &[]).unwrap();
            let passes = [pass(&[(0, Transform::First(1)), (1, Transform::Exact)]), pass(&[(0, Transform::Exact)])];
            let (c, _) = candidates(&recs, &passes);
            let mut want = Vec::new();
            for (i, a) in lv.iter().enumerate() {
                for (j, b) in rv.iter().enumerate() {
                    let p1 = !a.0.is_empty() && !a.1.is_empty() && &a.0[..1] == b.0.get(..1).unwrap_or("") && a.1 == b.1;
                    let p2 = !a.0.is_empty() && a.0 == b.0;
                    if p1 || p2 {
                        want.push((i as u32, j as u32, (p1 as u16) | ((p2 as u16) << 1)));
                    }
                }
            }
            let got: Vec<(u32, u32, u16)> = (0..c.len()).map(|k| (c.left[k], c.right[k], c.passes[k])).collect();
            // The plan's pair counts, made before any pair, are the brute-force counts of
            // each pass's pairs.
            let plan = plan(&recs, &passes);
            let per_pass: Vec<u64> = (0..2)
                .map(|p| want.iter().filter(|w| w.2 & (1 << p) != 0).count() as u64)
                .collect();
            prop_assert_eq!(plan.pairs_per_pass(), per_pass);
            prop_assert_eq!(got, want);
        }
    }

    proptest! {
        // Oracle for the sorted-neighbourhood window: sort all records by (key, side, index)
        // by brute force and keep every cross-table pair less than w places apart
        // (Hernandez & Stolfo 1995).
        #[test]
        fn sorted_neighbourhood_equals_brute_force(
            l in proptest::collection::vec(0u8..6, 0..12),
            r in proptest::collection::vec(0u8..6, 0..12),
            w in 2usize..5,
        ) {
            let names = ["", "ab", "ac", "bd", "ba", "ca"];
            let lv: Vec<(&str, &str)> = l.iter().map(|&a| (names[a as usize], "x")).collect();
            let rv: Vec<(&str, &str)> = r.iter().map(|&a| (names[a as usize], "x")).collect();
            let recs = crate::records::build(&table("l", &lv), &table("r", &rv), &[spec("a"), spec("b")], &[]).unwrap();
            let mut p = pass(&[(0, Transform::Exact)]);
            p.window = Some(w);
            let (c, _) = candidates(&recs, &[p]);
            let mut order: Vec<(&str, u8, usize)> = Vec::new();
            for (i, a) in lv.iter().enumerate() { if !a.0.is_empty() { order.push((a.0, 0, i)); } }
            for (j, b) in rv.iter().enumerate() { if !b.0.is_empty() { order.push((b.0, 1, j)); } }
            order.sort();
            let pos = |side: u8, i: usize| order.iter().position(|o| o.1 == side && o.2 == i);
            let mut want = Vec::new();
            for i in 0..lv.len() {
                for j in 0..rv.len() {
                    if let (Some(x), Some(y)) = (pos(0, i), pos(1, j)) {
                        if x.abs_diff(y) < w {
                            want.push((i as u32, j as u32));
                        }
                    }
                }
            }
            let got: Vec<(u32, u32)> = (0..c.len()).map(|k| (c.left[k], c.right[k])).collect();
            prop_assert_eq!(got, want);
        }
    }

    #[test]
    fn giant_block_is_skipped_and_reported() {
        let lv = vec![("ab", "x"); 30];
        let rv = vec![("ab", "x"); 30];
        let recs = crate::records::build(
            &table("l", &lv),
            &table("r", &rv),
            &[spec("a"), spec("b")],
            &[],
        )
        .unwrap();
        let mut p = pass(&[(0, Transform::Exact)]);
        p.max_block_pairs = 100;
        let (c, stats) = candidates(&recs, &[p]);
        assert!(c.is_empty());
        assert_eq!(stats[0].skipped, vec![("ab".to_string(), 900)]);
    }
}
