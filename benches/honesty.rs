//! The honesty matrix (issue 16): every scenario of tests/it/scenarios.rs, linked for each
//! seed, with what the tool reported beside what the truth says, and the recall the truth's
//! own m and u give. `cargo bench --bench honesty -- [seeds] [rows] [name filter]`
//! (defaults: "1 2", 20000, all); benches/honesty.sh runs it.

#[path = "../tests/it/scenarios.rs"]
mod scenarios;

use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let seeds: Vec<u64> = args
        .first()
        .map_or("1 2", String::as_str)
        .split_whitespace()
        .filter_map(|s| s.parse().ok())
        .collect();
    let rows: usize = args.get(1).and_then(|r| r.parse().ok()).unwrap_or(20_000);
    let filter = args.get(2).cloned().unwrap_or_default();
    println!(
        "| scenario | seed | links | prec (est) [truth laws] | recall cand (est) [truth laws] | recall all (est) | lost / forecast | verdict / band | check (misfit share/signatures/duplicate pairs) | misses |"
    );
    println!("|---|---|---|---|---|---|---|---|---|");
    let (mut runs, mut bad) = (0, 0);
    let start = Instant::now();
    for case in scenarios::matrix() {
        if !case.name.contains(filter.as_str()) {
            continue;
        }
        let case = scenarios::Case { rows, ..case };
        for &seed in &seeds {
            let laws = std::env::var_os("HONESTY_LAWS").is_some();
            let (o, fitted) = scenarios::run(&case, seed, false, laws);
            let (oracle, truth_laws) = scenarios::run(&case, seed, true, laws);
            if laws {
                println!("fitted laws:\n{fitted}truth's laws:\n{truth_laws}");
            }
            let misses = scenarios::misses(&o);
            runs += 1;
            bad += usize::from(!misses.is_empty());
            let check = format!(
                "{} {:.3}/{}/{:.0}",
                if o.misfit { "misfit" } else { "ok" },
                o.misfit_matters,
                o.signatures,
                o.duplicates
            );
            let all_est = o
                .est_recall_all
                .map_or("-".to_string(), |(r, _)| format!("{r:.3}"));
            println!(
                "| {} | {seed} | {} | {:.3} ({:.3}) [{:.3}] | {:.3} ({:.3}) [{:.3}] | {:.3} ({all_est}) | {:.1}% / {:.1}% | {} / {} | {} | {} |",
                case.name,
                o.links,
                o.precision,
                o.est_precision,
                oracle.precision,
                o.recall_cand,
                o.est_recall_cand,
                oracle.recall_cand,
                o.recall_all,
                100.0 * o.lost(),
                100.0 * o.forecast,
                o.verdict.as_str(),
                o.actual_band().as_str(),
                check,
                if misses.is_empty() { "-".to_string() } else { misses.join("; ") },
            );
        }
    }
    println!(
        "\n{runs} runs, {bad} with a miss, {:.0} s",
        start.elapsed().as_secs_f64()
    );
}
