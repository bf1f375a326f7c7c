//! Matching benchmark: times `max_weight_matching` on generated instances and reports the peak
//! resident memory of this process. Run one case per process (so the peak is the case's own):
//! `cargo bench --bench matching -- CASE` with CASE one of `million`, `million-mixed`, `giant`,
//! `sparse20k`,
//! or `all` to run every case in turn in child processes. See benches/matching.sh.

use dovetail::matching::max_weight_matching;
use dovetail::rng::Rng;
use std::time::Instant;

/// Peak resident set size of this process in MiB (Linux VmHWM).
fn peak_rss_mib() -> f64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find(|l| l.starts_with("VmHWM:"))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|kb| kb.parse::<f64>().ok())
        .map_or(0.0, |kb| kb / 1024.0)
}

/// n x n records, each left record with `degree` random right neighbours, weights uniform
/// on (lo, 1): lo = 0 makes every pair worth taking (the hardest case: nearly every record
/// wants a partner); lo = -1 makes half of them not worth it, closer to linkage weights.
fn random_sparse(n: usize, degree: usize, lo: f64, seed: u64) -> (Vec<u32>, Vec<u32>, Vec<f64>) {
    let mut rng = Rng::new(seed);
    let m = n * degree;
    let (mut l, mut r, mut w) = (
        Vec::with_capacity(m),
        Vec::with_capacity(m),
        Vec::with_capacity(m),
    );
    for a in 0..n {
        for _ in 0..degree {
            l.push(a as u32);
            r.push(rng.below(n) as u32);
            w.push(lo + (1.0 - lo) * rng.uniform());
        }
    }
    (l, r, w)
}

fn time_case(name: &str, n: usize, degree: usize, lo: f64) {
    let (l, r, w) = random_sparse(n, degree, lo, 42);
    let t = Instant::now();
    let m = max_weight_matching(n, &l, &r, &w);
    let secs = t.elapsed().as_secs_f64();
    println!(
        "{name}: {n} x {n}, {} pairs, weights U({lo}, 1): {secs:.2} s, {} links, total {:.3}, {} components, largest {} records, peak RSS {:.0} MiB",
        l.len(),
        m.chosen.len(),
        m.total,
        m.components,
        m.largest_component,
        peak_rss_mib()
    );
}

fn main() {
    let case = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .unwrap_or_else(|| "all".into());
    match case.as_str() {
        // 1,000,000 x 1,000,000, mean degree 10.
        "million" => time_case("million", 1_000_000, 10, 0.0),
        "million-mixed" => time_case("million-mixed", 1_000_000, 10, -1.0),
        // One connected component of 200,000 x 200,000, degree 8 (random graphs of degree 8
        // have one giant component holding almost every record).
        "giant" => time_case("giant", 200_000, 8, 0.0),
        "sparse20k" => time_case("sparse20k", 20_000, 8, 0.0),
        "all" => {
            let exe = std::env::current_exe().expect("own path");
            for c in ["sparse20k", "giant", "million-mixed", "million"] {
                let status = std::process::Command::new(&exe)
                    .arg(c)
                    .status()
                    .expect("child");
                assert!(status.success());
            }
        }
        other => eprintln!("unknown case {other}"),
    }
}
