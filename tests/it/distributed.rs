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
