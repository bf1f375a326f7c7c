//! Honest numbers where the two-class model is strained (issue 16): the thin config of the
//! issue's first measurement, movers, and an extract without names. The yardstick is the truth
//! of the synthetic tables (which records are the same invented person) and, for recall, the
//! linkage the truth's own m and u give (`scenarios::use_truth_laws`). The tolerances are the
//! issue's: estimated precision and recall among candidates within 0.02 of the actual values,
//! the forecast within max(0.01, 0.3 x actual), "feasible" only where at most 5% of the
//! findable true pairs are lost; where the model check flags misfit, a verdict other than
//! feasible and intervals that hold the actual values instead.

use crate::scenarios::{self, Case, Outcome};

/// The criteria. Recall over all true pairs rests on a sample of about 100 left records
/// compared with every right record, so here its interval must hold the actual value; the
/// issue's 0.03 is left to benches/honesty.sh, which reports where it is missed.
fn assert_honest(name: &str, o: &Outcome) {
    let misses: Vec<String> = scenarios::misses(o)
        .into_iter()
        .filter(|m| !m.starts_with("recall over all"))
        .collect();
    assert!(misses.is_empty(), "{name}: {misses:?} in {o:?}");
    let (_, [lo, hi]) = o
        .est_recall_all
        .expect("recall over all true pairs reported");
    assert!(
        lo <= o.recall_all && o.recall_all <= hi,
        "{name}: recall over all {} outside [{lo}, {hi}]",
        o.recall_all
    );
}

fn case(name: &str) -> Case {
    scenarios::matrix()
        .into_iter()
        .find(|c| c.name == name)
        .expect("a scenario of the matrix")
}

/// The criteria, and recall among candidates within 0.01 of what the truth's own laws give
/// (the criterion for the thin and mover cases).
fn honest_and_like_the_truths_laws(name: &str, seed: u64) {
    let c = case(name);
    let o = scenarios::run(&c, seed, false, false).0;
    let truth_laws = scenarios::run(&c, seed, true, false).0;
    eprintln!(
        "{name}: {o:?}\ntruth's laws: recall {:.4}",
        truth_laws.recall_cand
    );
    assert_honest(name, &o);
    assert!(
        (o.recall_cand - truth_laws.recall_cand).abs() <= 0.01,
        "{name}: recall {} against {} with the truth's laws",
        o.recall_cand,
        truth_laws.recall_cand
    );
}

#[test]
fn thin_config_recall_and_forecast_are_honest() {
    // Synth 20,000 rows, noise 1.0, seed 31, with given, surname, birth, sex and town and two
    // passes on a name's sound and the birth year: the issue measured recall among candidates
    // 0.9385 against an estimate of 0.9916 and a forecast of 0.45% against 6.15% lost.
    honest_and_like_the_truths_laws("thin n1.0", 31);
}

#[test]
fn movers_are_linked_as_the_truths_laws_link_them() {
    // 15% of the right table's people moved: the town disagrees for them. Before the
    // leave-one-field-out fit, m of the town's disagreement sat at the floor and every mover
    // was left unlinked.
    honest_and_like_the_truths_laws("thin movers .15", 7);
}

#[test]
fn without_names_the_tool_says_it_cannot_tell() {
    // Birth date, sex and postcode, blocked on the birth date and on the postcode: within each
    // set of passes only sex varies, so the two classes are not identified. The issue measured
    // 61% lost against a 6% forecast. The tool must not say feasible, and its intervals must
    // hold the actual values.
    let c = case("no names n0.5");
    let o = scenarios::run(&c, 3, false, false).0;
    eprintln!("no names: {o:?}");
    assert!(o.misfit, "the model check must flag the fit");
    assert_ne!(o.verdict.as_str(), "feasible");
    assert_honest("no names", &o);
}

#[test]
fn duplicates_inside_a_table_are_counted_and_flagged() {
    // 5% of each table's 20,000 records get a second, re-keyed record of the same person:
    // 1,000 duplicate pairs per table, 2,000 in all (synth's own count). The run must find
    // about that many (within 15%), say the one-to-one assumption fails, and keep its
    // intervals honest.
    let c = case("full duplicates .05");
    let o = scenarios::run(&c, 4, false, false).0;
    eprintln!("duplicates: {o:?}");
    assert!(
        (o.duplicates - 2000.0).abs() <= 300.0,
        "{} duplicate pairs estimated",
        o.duplicates
    );
    assert!(o.misfit);
    assert_ne!(o.verdict.as_str(), "feasible");
    assert_honest("duplicates", &o);
    // Without duplicates the estimate is near zero (synth makes none; twins and same-name
    // relatives differ in birth date or given name).
    let clean = scenarios::run(&case("full n0.5"), 4, false, false).0;
    assert!(clean.duplicates < 20.0, "{}", clean.duplicates);
}
