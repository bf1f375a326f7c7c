use super::*;
use std::path::PathBuf;

fn parse(text: &str) -> Result<Vec<DecisionLine>> {
    read_decisions_from(text.as_bytes(), &PathBuf::from("decisions.csv"))
}

const FILE: &str = "left_id,right_id,decision,reviewer,decided_at
L1,R1,same,ana,2026-12-01T10:00:00Z
L2,R2,different,ana,2026-12-01T10:00:05Z
L3,R3,same,ana,2026-12-01T10:00:09Z
L3,R3,withdrawn,ana,2026-12-01T10:00:12Z
L2,R2,unsure,ben,2026-12-01T10:01:00Z
";

#[test]
fn last_line_per_pair_is_in_force() {
    let lines = parse(FILE).unwrap();
    assert_eq!(lines.len(), 5);
    assert_eq!(lines[0].line, 2);
    let f = in_force(&lines);
    // L3–R3 was withdrawn; L2–R2's last word is "unsure".
    let got: Vec<(&str, Decision)> = f.iter().map(|d| (d.left_id.as_str(), d.decision)).collect();
    assert_eq!(got, vec![("L1", Decision::Same), ("L2", Decision::Unsure)]);
}

#[test]
fn bad_words_and_missing_columns_name_the_place() {
    let e = parse("left_id,right_id,decision\nA,B,maybe\n").unwrap_err();
    assert_eq!(e.line(), Some(2));
    assert_eq!(e.column(), Some("decision"));
    assert!(e.to_string().contains("`maybe` is not a decision"), "{e}");
    let e = parse("left_id,decision\nA,same\n").unwrap_err();
    assert!(e.to_string().contains("column `right_id` not found"), "{e}");
    let e = parse("left_id,right_id,decision\n,B,same\n").unwrap_err();
    assert_eq!(e.column(), Some("left_id"));
    assert!(parse("").unwrap().is_empty());
    assert!(parse(DECISIONS_HEADER).unwrap().is_empty());
}

#[test]
fn a_record_same_as_two_others_is_an_error_naming_both_lines() {
    let text = "left_id,right_id,decision\nL1,R1,same\nL2,R2,same\nL1,R9,same\n";
    let lines = parse(text).unwrap();
    let e = check_conflicts(&in_force(&lines), Path::new("d.csv")).unwrap_err();
    let s = e.to_string();
    assert!(s.contains("left id `L1`"), "{s}");
    assert!(
        s.contains("`R1` (line 2)") && s.contains("`R9` (line 4)"),
        "{s}"
    );
    assert_eq!(e.line(), Some(4));
    // The right side too.
    let text = "left_id,right_id,decision\nL1,R1,same\nL2,R1,same\n";
    let e = check_conflicts(&in_force(&parse(text).unwrap()), Path::new("d")).unwrap_err();
    assert!(e.to_string().contains("right id `R1`"), "{e}");
    // Withdrawing one of them, or changing it to "different", ends the conflict.
    let text = "left_id,right_id,decision\nL1,R1,same\nL1,R9,same\nL1,R9,withdrawn\n";
    check_conflicts(&in_force(&parse(text).unwrap()), Path::new("d")).unwrap();
    let text = "left_id,right_id,decision\nL1,R1,same\nL1,R9,same\nL1,R1,different\n";
    check_conflicts(&in_force(&parse(text).unwrap()), Path::new("d")).unwrap();
}

#[test]
fn appended_lines_read_back() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join(DECISIONS_FILE);
    let mut f = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(&path)
        .unwrap();
    let d = |l: &str, dec| DecisionLine {
        left_id: l.into(),
        right_id: "R,\"x\"".into(),
        decision: dec,
        reviewer: "ana".into(),
        decided_at: "2026-12-01T10:00:00Z".into(),
        line: 0,
    };
    append_decision(&mut f, &d("L1", Decision::Same)).unwrap();
    append_decision(&mut f, &d("L2", Decision::Withdrawn)).unwrap();
    let back = read_decisions(&path).unwrap();
    assert_eq!(back.len(), 2);
    assert_eq!(back[0].right_id, "R,\"x\"");
    assert_eq!(back[1].decision, Decision::Withdrawn);
    assert_eq!(back[1].line, 3);
    let text = std::fs::read_to_string(&path).unwrap();
    assert!(text.starts_with(DECISIONS_HEADER));
}

#[test]
fn forcing_takes_both_records_of_a_same_pair() {
    // Pairs: 0 = (0,0), 1 = (0,1), 2 = (1,0), 3 = (1,1), 4 = (2,2).
    let left = [0, 0, 1, 1, 2];
    let right = [0, 1, 0, 1, 2];
    let applied = Applied {
        same: vec![0],
        different: vec![4],
        ..Applied::default()
    };
    let mut theta = vec![5.0, 9.0, 9.0, 1.0, 30.0];
    force(&mut theta, &left, &right, &applied);
    assert_eq!(theta, vec![FORCED, -FORCED, -FORCED, 1.0, -FORCED]);
    // The optimum matching then takes pair 0 and pair 3 (common practice: forced pairs are
    // fixed before the assignment).
    let m = crate::matching::max_weight_matching(3, &left, &right, &theta);
    assert_eq!(m.chosen, vec![0, 3]);
}

#[test]
fn audit_allocation_is_equal_capped_and_seeded() {
    // 1,000 links: 10 in [0.5, 0.9), 40 in [0.9, 0.99), 150 in [0.99, 0.999), 800 at the top.
    let mut conf = Vec::new();
    conf.extend(std::iter::repeat_n(0.7, 10));
    conf.extend(std::iter::repeat_n(0.95, 40));
    conf.extend(std::iter::repeat_n(0.995, 150));
    conf.extend(std::iter::repeat_n(0.9999, 800));
    let links: Vec<usize> = (0..conf.len()).collect();
    let s = draw_audit(&links, &conf, 0.5, 200, 7);
    let sampled: Vec<usize> = s.bands.iter().map(|b| b.sampled).collect();
    // 50 each; the first band has only 10, its 40 go to the other three.
    assert_eq!(sampled.iter().sum::<usize>(), 200);
    assert_eq!(sampled[0], 10);
    assert_eq!(sampled[1], 40);
    assert!(sampled[2] >= 70 && sampled[3] >= 70, "{sampled:?}");
    let counts: Vec<usize> = s.bands.iter().map(|b| b.links).collect();
    assert_eq!(counts, vec![10, 40, 150, 800]);
    // No pair twice; every pair in its band; the same seed gives the same sample.
    let mut ids: Vec<usize> = s.pairs.iter().map(|p| p.0).collect();
    ids.sort_unstable();
    ids.dedup();
    assert_eq!(ids.len(), 200);
    for &(i, h) in &s.pairs {
        assert!(conf[i] >= s.bands[h].from && (conf[i] < s.bands[h].to || h == 3));
    }
    assert_eq!(s, draw_audit(&links, &conf, 0.5, 200, 7));
    assert_ne!(s.pairs, draw_audit(&links, &conf, 0.5, 200, 8).pairs);
    // A cut-off above an edge drops the bands below it; asking for more than there is
    // takes every link.
    let above: Vec<usize> = links.iter().copied().filter(|&i| conf[i] >= 0.95).collect();
    let s = draw_audit(&above, &conf, 0.95, 5000, 7);
    assert_eq!(s.bands.len(), 3);
    assert_eq!(s.bands[0].from, 0.95);
    assert_eq!(s.pairs.len(), 990);
}

#[test]
fn one_band_is_plain_wilson_as_scipy_computes_it() {
    // Fixtures from scipy.stats.binomtest(k, n).proportion_ci(method="wilson"), written by
    // tests/reference/score_fixtures.py; a band of 10^12 links makes the finite-population
    // correction 1 to within 1e-9.
    let text = include_str!("../../tests/reference/score_fixtures.json");
    let doc: serde_json::Value = serde_json::from_str(text).unwrap();
    for row in doc["wilson_95"].as_array().unwrap() {
        let k = row["true"].as_u64().unwrap() as usize;
        let n = row["links"].as_u64().unwrap() as usize;
        let m = measure(&[BandTally {
            links: 1_000_000_000_000,
            same: k,
            different: n - k,
            ..BandTally::default()
        }])
        .unwrap();
        let want = [row["low"].as_f64().unwrap(), row["high"].as_f64().unwrap()];
        for (g, w) in m.interval.iter().zip(want) {
            assert!(
                (g - w).abs() < 1e-6,
                "k={k} n={n}: {:?} vs {want:?}",
                m.interval
            );
        }
    }
}

#[test]
fn stratified_estimate_by_the_handbook_formula() {
    // Two bands, N = (100, 900), n = (50, 50), 40 and 49 right. By Cochran §5.3 (from
    // memory): p = 0.1·0.8 + 0.9·0.98 = 0.962; var = 0.1²·0.8·0.2/50·(1 − 50/100) +
    // 0.9²·0.98·0.02/50·(1 − 50/900).
    let m = measure(&[
        BandTally {
            links: 100,
            same: 40,
            different: 10,
            ..BandTally::default()
        },
        BandTally {
            links: 900,
            same: 49,
            different: 1,
            unsure: 3,
            undecided: 7,
        },
    ])
    .unwrap();
    // Kish's effective size: 1 / (0.1²·(1 − 50/100)/50 + 0.9²·(1 − 50/900)/50).
    let var: f64 = 0.01 * 0.8 * 0.2 / 50.0 * 0.5 + 0.81 * 0.98 * 0.02 / 50.0 * (1.0 - 50.0 / 900.0);
    let n_eff = 1.0 / (0.01 * 0.5 / 50.0 + 0.81 * (1.0 - 50.0 / 900.0) / 50.0);
    assert!((m.precision - 0.962).abs() < 1e-12);
    assert!((m.std_error - var.sqrt()).abs() < 1e-12);
    assert!((m.effective_n - n_eff).abs() < 1e-9);
    assert_eq!(m.decided, 100);
    let w = crate::score::wilson_share(0.962, n_eff);
    assert!((m.interval[0] - w[0]).abs() < 1e-12 && (m.interval[1] - w[1]).abs() < 1e-12);
    assert!(m.interval[0] < 0.962 && 0.962 < m.interval[1]);
    // A band nobody reviewed widens the interval by its whole weight.
    let m2 = measure(&[
        BandTally {
            links: 100,
            same: 40,
            different: 10,
            ..BandTally::default()
        },
        BandTally {
            links: 100,
            undecided: 20,
            ..BandTally::default()
        },
    ])
    .unwrap();
    assert_eq!(m2.links_unreviewed, 100);
    assert!(m2.interval[1] > 0.5 + 0.5 * 0.8 && m2.interval[0] < 0.5 * 0.8);
    // A census is exact.
    let m3 = measure(&[BandTally {
        links: 10,
        same: 9,
        different: 1,
        ..BandTally::default()
    }])
    .unwrap();
    assert_eq!(m3.interval, [0.9, 0.9]);
    assert!(measure(&[BandTally::default()]).is_none());
}

/// The share of `reps` stratified samples (`n` per band, without replacement) whose
/// interval holds the population's precision; and the mean width.
fn coverage(sizes: &[usize], rights: &[usize], n: usize, reps: usize) -> (f64, f64) {
    let truth = rights.iter().sum::<usize>() as f64 / sizes.iter().sum::<usize>() as f64;
    let mut rng = crate::rng::Rng::new(11);
    let (mut covered, mut width) = (0, 0.0);
    for _ in 0..reps {
        let bands: Vec<BandTally> = sizes
            .iter()
            .zip(rights)
            .map(|(&size, &right)| {
                let n = n.min(size);
                let mut pop: Vec<bool> = (0..size).map(|i| i < right).collect();
                for j in 0..n {
                    let k = j + rng.below(pop.len() - j);
                    pop.swap(j, k);
                }
                let same = pop[..n].iter().filter(|&&t| t).count();
                BandTally {
                    links: size,
                    same,
                    different: n - same,
                    ..BandTally::default()
                }
            })
            .collect();
        let m = measure(&bands).unwrap();
        if m.interval[0] <= truth && truth <= m.interval[1] {
            covered += 1;
        }
        width += m.interval[1] - m.interval[0];
    }
    (covered as f64 / reps as f64, width / reps as f64)
}

#[test]
fn stratified_interval_covers_the_truth_at_least_95_percent_of_the_time() {
    // The meaning of a 95% interval (common practice): over repeated samples of a known
    // population, at least about 95% of intervals contain its precision. Populations shaped
    // like a run's links: most in the top band, nearly all right; few, often wrong, below.
    for (sizes, rights) in [
        (vec![300, 1000, 20000], vec![210, 950, 19980]),
        (vec![100, 1000, 5000, 50000], vec![60, 900, 4950, 49990]),
        (vec![400, 3000, 20000], vec![340, 2900, 19900]),
    ] {
        let (cov, width) = coverage(&sizes, &rights, 67, 2000);
        assert!(cov >= 0.94, "{sizes:?}: coverage {cov}");
        assert!(width < 0.1, "{sizes:?}: mean width {width}");
    }
    // Equal bands with different precisions: conservative, but not [0, 1].
    let (cov, width) = coverage(&[200, 200, 200, 200], &[150, 180, 195, 199], 50, 2000);
    assert!((0.94..=0.995).contains(&cov), "coverage {cov}");
    assert!(width < 0.08, "mean width {width}");
}
