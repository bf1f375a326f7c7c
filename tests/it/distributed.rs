//! The pieces a distributed run is made of (the Spark entry point's, issue 22), against the
//! single-machine run on the sample tables: blocking keys joined give the same pairs, pattern
//! counts of parts of the pairs add up to the whole's, and the fit from the counts alone is
//! the run's first fit. The Python package's tests check the same through Spark.

use super::common::root;
use dovetail::compare::PatternCounts;
use dovetail::config::Config;
use dovetail::pipeline;
use std::collections::{BTreeMap, BTreeSet};

fn sample() -> Config {
    Config::from_path(&root().join("config-examples/sample.toml")).expect("sample config")
}

fn as_map(c: &PatternCounts) -> BTreeMap<Vec<u8>, f64> {
    c.patterns
        .iter()
        .cloned()
        .zip(c.counts.iter().copied())
        .collect()
}

#[test]
fn keys_joined_give_the_single_machine_pairs() {
    let cfg = sample();
    let left = pipeline::read_side(&cfg, true).unwrap();
    let right = pipeline::read_side(&cfg, false).unwrap();
    let (records, cands) = pipeline::block_only(cfg.clone(), None).unwrap();
    let want: BTreeSet<(String, String, u16)> = (0..cands.len())
        .map(|i| {
            (
                records.left_ids[cands.left[i] as usize].to_string(),
                records.right_ids[cands.right[i] as usize].to_string(),
                cands.passes[i],
            )
        })
        .collect();
    let lk = pipeline::side_keys(&cfg, &left, true).unwrap();
    let rk = pipeline::side_keys(&cfg, &right, false).unwrap();
    // A hash join per pass on the key texts, blocks over the cap dropped.
    let mut got: BTreeMap<(String, String), u16> = BTreeMap::new();
    for (p, pass) in lk.passes.iter().enumerate() {
        let mut by_key: BTreeMap<&str, (Vec<usize>, Vec<usize>)> = BTreeMap::new();
        for (r, k) in lk.keys[p].iter().enumerate() {
            if let Some(k) = k {
                by_key.entry(k).or_default().0.push(r);
            }
        }
        for (r, k) in rk.keys[p].iter().enumerate() {
            if let Some(k) = k {
                by_key.entry(k).or_default().1.push(r);
            }
        }
        for (ls, rs) in by_key.values() {
            if (ls.len() * rs.len()) as u64 > pass.max_block_pairs {
                continue;
            }
            for &a in ls {
                for &b in rs {
                    let key = (lk.ids[a].to_string(), rk.ids[b].to_string());
                    *got.entry(key).or_default() |= 1 << p;
                }
            }
        }
    }
    let got: BTreeSet<(String, String, u16)> =
        got.into_iter().map(|((a, b), m)| (a, b, m)).collect();
    assert!(want.len() > 100);
    assert_eq!(got, want);
}

#[test]
fn pattern_counts_of_parts_add_up_and_fit_as_one_machine() {
    let cfg = sample();
    let left = pipeline::read_side(&cfg, true).unwrap();
    let right = pipeline::read_side(&cfg, false).unwrap();
    let (_, cands) = pipeline::block_only(cfg.clone(), None).unwrap();
    let whole =
        pipeline::pair_pattern_counts(&cfg, &left, &right, cands.left.clone(), cands.right.clone())
            .unwrap();
    let cut = cands.len() / 3;
    let mut total: BTreeMap<Vec<u8>, f64> = BTreeMap::new();
    for range in [0..cut, cut..cands.len()] {
        let part = pipeline::pair_pattern_counts(
            &cfg,
            &left,
            &right,
            cands.left[range.clone()].to_vec(),
            cands.right[range].to_vec(),
        )
        .unwrap();
        for (p, n) in as_map(&part) {
            *total.entry(p).or_default() += n;
        }
    }
    assert!(whole.patterns.len() > 10);
    assert_eq!(total, as_map(&whole));
    // The driver's fit from the counts alone, in reverse order, is the run's first fit.
    let prep = pipeline::prepare(cfg.clone(), &pipeline::Silent).unwrap();
    let counts: Vec<(Vec<u8>, f64)> = total.into_iter().rev().collect();
    let fit = pipeline::fit_from_counts(&cfg, counts, left.len(), right.len()).unwrap();
    assert_eq!(fit, prep.plain_fit);
}

/// The pairs of `cands` split into pieces that hold whole components (by union-find; each
/// piece's pairs keep the run's order), `parts` pieces in all, components dealt in turn.
fn pieces_by_component(
    n_left: usize,
    left: &[u32],
    right: &[u32],
    parts: usize,
) -> Vec<Vec<usize>> {
    let n_right = right.iter().map(|&r| r as usize + 1).max().unwrap_or(0);
    let mut parent: Vec<usize> = (0..n_left + n_right).collect();
    fn find(p: &mut [usize], mut x: usize) -> usize {
        while p[x] != x {
            p[x] = p[p[x]];
            x = p[x];
        }
        x
    }
    for i in 0..left.len() {
        let (a, b) = (
            find(&mut parent, left[i] as usize),
            find(&mut parent, n_left + right[i] as usize),
        );
        parent[a.max(b)] = a.min(b);
    }
    let mut piece_of_root = BTreeMap::new();
    let mut pieces = vec![Vec::new(); parts];
    for (i, &l) in left.iter().enumerate() {
        let r = find(&mut parent, l as usize);
        let next = piece_of_root.len() % parts;
        let k = *piece_of_root.entry(r).or_insert(next);
        pieces[k].push(i);
    }
    pieces
}

#[test]
fn the_fit_in_rounds_over_pieces_is_the_single_machines_fit() {
    // One machine's prepared run (its fit is the reference), then the same refinement with the
    // pairs split into three pieces of whole components, their sums added: the same laws up
    // to the order of the additions (expected: agreement to about 1e-12; common practice for
    // sums reordered), and the early second step of every round it offers equal to the one
    // the first step's sums then give.
    use dovetail::fit::rounds::{Piece, Refinement, SumsA, SumsB};
    let prep = pipeline::prepare(sample(), &pipeline::Silent).unwrap();
    let strata = dovetail::model::Strata::new(&prep.cands.passes);
    let mut r = Refinement::new(
        prep.counts.clone(),
        prep.plain_fit.clone(),
        Some(strata.masks.clone()),
        Default::default(),
    );
    let split = pieces_by_component(
        prep.records.n_left(),
        &prep.cands.left,
        &prep.cands.right,
        3,
    );
    assert!(
        split.iter().all(|p| p.len() > 100),
        "three pieces of the sample's pairs"
    );
    let take =
        |v: &Vec<usize>, of: &dyn Fn(usize) -> u32| v.iter().map(|&i| of(i)).collect::<Vec<u32>>();
    type PiecePairs = (Vec<u32>, Vec<u32>, Vec<u32>, Vec<u16>);
    let data: Vec<PiecePairs> = split
        .iter()
        .map(|v| {
            (
                take(v, &|i| prep.cands.left[i]),
                take(v, &|i| prep.cands.right[i]),
                take(v, &|i| prep.patterns.of_pair[i]),
                v.iter().map(|&i| strata.of_pair[i]).collect(),
            )
        })
        .collect();
    let pieces: Vec<Piece<'_>> = data
        .iter()
        .map(|(l, rr, pat, st)| Piece {
            n_left: prep.records.n_left(),
            left: l,
            right: rr,
            pattern: pat,
            stratum: Some(st),
        })
        .collect();
    let mut priors: Vec<_> = pieces.iter().map(|p| p.link_prior()).collect();
    let mut early_seen = 0;
    while r.round() < r.rounds() {
        let a = r.round_a();
        let early = r.early_b();
        let mut sums = SumsA::default();
        let mut ps = Vec::new();
        for piece in &pieces {
            let mut theta = vec![0.0; piece.len()];
            piece.thetas_into(&a.weighing, &mut theta);
            let (p, s) = piece.round_a(&r.shape, &a, &theta);
            sums.add(&s);
            ps.push(p);
        }
        let b = r.take_a(&sums);
        if let Some(e) = early {
            assert_eq!(e, b, "round {}", r.round());
            early_seen += 1;
        }
        let mut sb = SumsB::default();
        for ((piece, prior), p) in pieces.iter().zip(&mut priors).zip(&ps) {
            sb.add(&piece.round_b(prior, &b, p));
        }
        r.take_b(&sb);
    }
    assert_eq!(
        early_seen, 3,
        "rounds 2, 3 and 5 of 5 offer their second step early"
    );
    assert!(
        (r.fit.p - prep.fit.p).abs() < 1e-12,
        "{} against {}",
        r.fit.p,
        prep.fit.p
    );
    for (a, b) in r.fit.m.iter().flatten().zip(prep.fit.m.iter().flatten()) {
        assert!((a - b).abs() < 1e-9, "m {a} against {b}");
    }
    let want: Vec<f64> = prep.link_log_odds.clone();
    assert_eq!(r.link_log_odds.len(), want.len());
    for (a, b) in r.link_log_odds.iter().zip(&want) {
        assert!((a - b).abs() < 1e-9, "prior log odds {a} against {b}");
    }
}
