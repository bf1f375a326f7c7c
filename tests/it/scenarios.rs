//! The honesty matrix: synth scenarios of the hard cases of real extracts (few fields, movers,
//! relatives in the other table, no names, duplicates inside a table, blocking losses),
//! linked in process and scored against their truth. Shared by the integration tests
//! (tests/it/honesty.rs) and the bench (benches/honesty.rs, run by benches/honesty.sh).
//!
//! The yardstick of each number is the truth of the synthetic tables: which left and right
//! records are the same invented person.

#![allow(dead_code)]

use dovetail::config::Config;
use dovetail::matching::max_weight_matching;
use dovetail::model::{self, Fit};
use dovetail::pipeline::{self, Prepared, Silent};
use dovetail::posterior as confidence;
use dovetail::reliability::Verdict;
use dovetail::report;
use dovetail::synth::{generate_scenario, Scenario, SynthOptions};
use std::collections::HashSet;
use std::path::Path;

/// Synth's own config (names, birth, sex, postcode, phone; passes on surname sound and birth
/// year, and on postcode and initial): its fields and passes, without the tables and the
/// link settings.
pub fn full() -> &'static str {
    static FULL: std::sync::OnceLock<String> = std::sync::OnceLock::new();
    FULL.get_or_init(|| {
        let c = dovetail::synth::CONFIG;
        let start = c.find("[[field]]").expect("synth's config has fields");
        let end = c.find("[link]").expect("synth's config has link settings");
        c[start..end].to_string()
    })
}

/// The thin config of issue 16's first measurement: two names, birth, sex and town; passes on
/// a name's sound and the birth year.
pub const THIN: &str = r#"
[[field]]
name = "given"
left = "given_name"
right = "first_name"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "surname"
left = "surname"
right = "last_name"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "birth"
left = "birth_date"
right = "dob"
method = "date"
[[field]]
name = "sex"
method = "exact"
[[field]]
name = "town"
method = "jaro-winkler"
bands = [0.9]
[[block]]
keys = ["surname:soundex", "birth:year"]
[[block]]
keys = ["given:soundex", "birth:year"]
"#;

/// One name dropped: surname, birth, sex and town; passes on surname sound and year, and on
/// birth date and sex.
pub const ONE_NAME: &str = r#"
[[field]]
name = "surname"
left = "surname"
right = "last_name"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "birth"
left = "birth_date"
right = "dob"
method = "date"
[[field]]
name = "sex"
method = "exact"
[[field]]
name = "town"
method = "jaro-winkler"
bands = [0.9]
[[block]]
keys = ["surname:soundex", "birth:year"]
[[block]]
keys = ["birth", "sex"]
"#;

/// No names, as in pseudonymised health extracts: birth date, sex, postcode; passes on the
/// birth date and on the postcode.
pub const NO_NAMES: &str = r#"
[[field]]
name = "birth"
left = "birth_date"
right = "dob"
method = "date"
[[field]]
name = "sex"
method = "exact"
[[field]]
name = "postcode"
method = "exact"
normalize = "code"
[[block]]
keys = ["birth"]
[[block]]
keys = ["postcode"]
"#;

/// Names and birth date alone, one pass on the surname's sound and the birth year.
pub const NAMES_BIRTH: &str = r#"
[[field]]
name = "given"
left = "given_name"
right = "first_name"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "surname"
left = "surname"
right = "last_name"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "birth"
left = "birth_date"
right = "dob"
method = "date"
[[block]]
keys = ["surname:soundex", "birth:year"]
"#;

/// A scenario: synth settings and the fields and passes to link with.
#[derive(Debug, Clone)]
pub struct Case {
    /// Short name for tables.
    pub name: &'static str,
    /// Records per table (before duplicates).
    pub rows: usize,
    /// Share of left people also in the right table.
    pub overlap: f64,
    /// Recording noise.
    pub noise: f64,
    /// The hard-case knobs.
    pub scenario: Scenario,
    /// Fields and passes (one of the texts above).
    pub fields: &'static str,
}

impl Case {
    fn new(name: &'static str, fields: &'static str, noise: f64) -> Case {
        Case {
            name,
            rows: 20_000,
            overlap: 0.7,
            noise,
            scenario: Scenario::default(),
            fields,
        }
    }
}

/// The matrix of benches/honesty.sh: the full-field demo at several noise levels and the
/// hard cases of issue 16, in the order of how common they are in real extracts.
pub fn matrix() -> Vec<Case> {
    let movers = |share: f64| Scenario {
        movers: Some(share),
        ..Scenario::default()
    };
    vec![
        Case::new("full n0.2", full(), 0.2),
        Case::new("full n0.5", full(), 0.5),
        Case::new("full n1.0", full(), 1.0),
        Case::new("thin n1.0", THIN, 1.0),
        Case {
            scenario: movers(0.15),
            ..Case::new("thin movers .15", THIN, 0.5)
        },
        Case {
            overlap: 0.5,
            scenario: Scenario {
                household_moves: 0.6,
                relatives: 0.3,
                ..movers(0.15)
            },
            ..Case::new("thin hh-movers+rel", THIN, 0.5)
        },
        Case {
            scenario: movers(0.15),
            ..Case::new("full movers .15", full(), 0.5)
        },
        Case::new("one name n1.0", ONE_NAME, 1.0),
        Case::new("names+birth n0.8", NAMES_BIRTH, 0.8),
        Case {
            overlap: 0.2,
            scenario: Scenario {
                relatives: 0.6,
                ..Scenario::default()
            },
            ..Case::new("full relatives ov.2", full(), 0.5)
        },
        Case {
            overlap: 0.2,
            scenario: Scenario {
                relatives: 0.6,
                ..Scenario::default()
            },
            ..Case::new("thin relatives ov.2", THIN, 0.5)
        },
        Case::new("no names n0.5", NO_NAMES, 0.5),
        Case {
            scenario: Scenario {
                duplicates: 0.05,
                ..Scenario::default()
            },
            ..Case::new("full duplicates .05", full(), 0.5)
        },
        Case {
            overlap: 0.1,
            ..Case::new("full overlap .1", full(), 0.5)
        },
        Case {
            scenario: Scenario {
                blank: vec![("dob".into(), 0.5)],
                ..Scenario::default()
            },
            ..Case::new("full dob blank .5", full(), 0.5)
        },
        Case {
            scenario: Scenario {
                blank: vec![("dob".into(), 0.5)],
                ..Scenario::default()
            },
            ..Case::new("thin dob blank .5", THIN, 0.5)
        },
        Case {
            overlap: 0.5,
            scenario: Scenario {
                relatives: 0.5,
                ..movers(0.1)
            },
            ..Case::new("full rel+movers ov.5", full(), 1.0)
        },
    ]
}

/// What a run reported and what the truth says.
#[derive(Debug, Clone)]
pub struct Outcome {
    pub links: usize,
    /// Links that are true pairs.
    pub true_links: usize,
    /// True pairs among the candidates that a one-to-one linkage can hold at once.
    pub findable: usize,
    /// True pairs that a one-to-one linkage can hold at once, over all records.
    pub all_true: usize,
    pub precision: f64,
    pub est_precision: f64,
    /// Recall among the findable true pairs.
    pub recall_cand: f64,
    pub est_recall_cand: f64,
    /// Recall over all true pairs.
    pub recall_all: f64,
    /// The reported recall over all true pairs, with its interval, when reported.
    pub est_recall_all: Option<(f64, [f64; 2])>,
    /// The forecast mismatch rate and its interval.
    pub forecast: f64,
    pub forecast_interval: [f64; 2],
    /// The verdict and whether the model check (or the duplicates inside a table) flagged
    /// misfit.
    pub verdict: Verdict,
    pub misfit: bool,
    /// Expected duplicate pairs inside the two tables, as the run estimated them.
    pub duplicates: f64,
    /// The check's misfit share among the pairs that matter, and its signatures found.
    pub misfit_matters: f64,
    pub signatures: usize,
    /// The reported interval of the precision, when reported.
    pub precision_interval: Option<[f64; 2]>,
    /// The reported interval of the recall among candidates, when reported.
    pub recall_interval: Option<[f64; 2]>,
}

impl Outcome {
    /// Share of the findable true pairs left unlinked.
    pub fn lost(&self) -> f64 {
        1.0 - self.recall_cand
    }

    /// The verdict the truth calls for: at most 5% of findable true pairs lost is feasible,
    /// over 25% infeasible, borderline between (the bands of issue 16).
    pub fn actual_band(&self) -> Verdict {
        match self.lost() {
            l if l <= 0.05 => Verdict::Feasible,
            l if l > 0.25 => Verdict::Infeasible,
            _ => Verdict::Borderline,
        }
    }
}

/// Maximum number of pairs of `pairs` that can be held one-to-one at once.
fn one_to_one_size(n_left: usize, pairs: &[(u32, u32)]) -> usize {
    let l: Vec<u32> = pairs.iter().map(|p| p.0).collect();
    let r: Vec<u32> = pairs.iter().map(|p| p.1).collect();
    max_weight_matching(n_left, &l, &r, &vec![1.0; pairs.len()])
        .chosen
        .len()
}

/// Generates the case's tables into `dir` and prepares the run.
pub fn prepare(case: &Case, seed: u64, dir: &Path) -> (Prepared, HashSet<(u32, u32)>) {
    let s = generate_scenario(
        &SynthOptions {
            rows: case.rows,
            overlap: case.overlap,
            noise: case.noise,
            seed,
            twins: dovetail::synth::TWIN_CHANCE,
        },
        &case.scenario,
    );
    std::fs::write(dir.join("left.csv"), &s.left_csv).expect("write left");
    std::fs::write(dir.join("right.csv"), &s.right_csv).expect("write right");
    let text = format!(
        "[left]\npath = \"left.csv\"\nid = \"rec_id\"\n[right]\npath = \"right.csv\"\nid = \"rec_id\"\n{}\n[link]\nmin_confidence = 0.5\n",
        case.fields
    );
    let config = Config::from_text(&text, dir).expect("scenario config");
    let prep = pipeline::prepare(config, &Silent).expect("prepare");
    let li: std::collections::HashMap<&str, u32> = prep
        .records
        .left_ids
        .iter()
        .enumerate()
        .map(|(i, s)| (s, i as u32))
        .collect();
    let ri: std::collections::HashMap<&str, u32> = prep
        .records
        .right_ids
        .iter()
        .enumerate()
        .map(|(i, s)| (s, i as u32))
        .collect();
    let truth = s
        .truth_csv
        .lines()
        .skip(1)
        .filter_map(|l| l.split_once(','))
        .map(|(a, b)| (li[a], ri[b]))
        .collect();
    (prep, truth)
}

/// Links a prepared run and scores it against the truth.
pub fn score(prep: &mut Prepared, truth: &HashSet<(u32, u32)>) -> Outcome {
    let l = pipeline::link(prep, &Silent).expect("link");
    let n_left = prep.records.n_left();
    let true_cands: Vec<(u32, u32)> = (0..prep.cands.len())
        .map(|i| (prep.cands.left[i], prep.cands.right[i]))
        .filter(|p| truth.contains(p))
        .collect();
    let all: Vec<(u32, u32)> = truth.iter().copied().collect();
    let findable = one_to_one_size(n_left, &true_cands);
    let all_true = one_to_one_size(n_left, &all);
    let true_links = l
        .links
        .iter()
        .filter(|&&i| truth.contains(&(prep.cands.left[i], prep.cands.right[i])))
        .count();
    let (ep, er) = report::estimates(&l);
    let fc = l.assessment.forecast.as_ref();
    let ratio = |a: usize, b: usize| if b == 0 { 1.0 } else { a as f64 / b as f64 };
    Outcome {
        links: l.links.len(),
        true_links,
        findable,
        all_true,
        precision: ratio(true_links, l.links.len()),
        est_precision: ep.unwrap_or(1.0),
        recall_cand: ratio(true_links, findable),
        est_recall_cand: er.unwrap_or(1.0),
        recall_all: ratio(true_links, all_true),
        est_recall_all: l.recall_all.map(|e| (e.value, e.interval)),
        forecast: fc.map_or(0.0, |f| f.error_rate),
        forecast_interval: fc.map_or([0.0, 0.0], |f| f.interval),
        verdict: l.assessment.verdict,
        misfit: prep.check.as_ref().is_some_and(|c| c.flagged())
            || pipeline::duplicate_share(prep).is_some(),
        duplicates: prep
            .duplicates
            .map_or(0.0, |d| d.left_pairs + d.right_pairs),
        misfit_matters: prep.check.as_ref().map_or(0.0, |c| c.misfit_matters),
        signatures: prep.check.as_ref().map_or(0, |c| c.signatures.len()),
        precision_interval: l.precision.map(|e| e.interval),
        recall_interval: l.recall.map(|e| e.interval),
    }
}

/// The laws the truth gives: per stratum of pass sets (or pooled), m from the true candidate
/// pairs and u from the false ones; the prior log odds of a link then fitted on the graph as
/// the pipeline fits it. Replaces the run's laws, weights and priors, so that
/// [`score`] links with the truth's own m and u.
pub fn use_truth_laws(prep: &mut Prepared, truth: &HashSet<(u32, u32)>) {
    let is_true: Vec<f64> = (0..prep.cands.len())
        .map(|i| {
            f64::from(u8::from(
                truth.contains(&(prep.cands.left[i], prep.cands.right[i])),
            ))
        })
        .collect();
    let shares_of = |pairs: &[usize]| -> (dovetail::compare::PatternCounts, Vec<f64>) {
        let mut sums: std::collections::BTreeMap<u64, (f64, f64)> = Default::default();
        for &i in pairs {
            let e = sums
                .entry(prep.patterns.codes[prep.patterns.of_pair[i] as usize])
                .or_default();
            e.0 += 1.0;
            e.1 += is_true[i];
        }
        let pc = dovetail::compare::PatternCounts {
            levels: prep.comparison.level_counts(),
            patterns: sums.keys().map(|&c| prep.comparison.levels_of(c)).collect(),
            counts: sums.values().map(|e| e.0).collect(),
        };
        let gamma = sums.values().map(|e| e.1 / e.0).collect();
        (pc, gamma)
    };
    let every: Vec<usize> = (0..prep.cands.len()).collect();
    let (pc, gamma) = shares_of(&every);
    let pooled: Fit = model::fit_from_shares(&pc, &gamma, &prep.fit, &Default::default());
    let mut groups: Vec<u32> = vec![0; prep.cands.len()];
    if let Some(st) = prep.strata.as_mut() {
        let mut fits = Vec::new();
        for g in 0..st.masks.len() {
            let pairs: Vec<usize> = every
                .iter()
                .copied()
                .filter(|&i| st.stratum_of(i) == g)
                .collect();
            let (pc, gamma) = shares_of(&pairs);
            fits.push(model::fit_from_shares(
                &pc,
                &gamma,
                &pooled,
                &Default::default(),
            ));
        }
        st.fits = fits;
        groups = st.of_pair.iter().map(|&g| g as u32).collect();
    }
    let fits: Vec<Fit> = match &prep.strata {
        Some(st) => st.fits.clone(),
        None => vec![pooled.clone()],
    };
    let mut odds: Vec<f64> = fits.iter().map(Fit::prior_log_odds).collect();
    let no_frequency = vec![None; prep.records.fields.len()];
    let rough = dovetail::fit::REFINEMENT_BP;
    for _ in 0..6 {
        let (_, theta) = dovetail::fit::pair_weights_indexed(
            &prep.records,
            &prep.cands,
            &prep.patterns,
            &pooled,
            prep.strata.as_ref(),
            &no_frequency,
            Some(&odds),
        );
        let marg = confidence::marginals(
            prep.records.n_left(),
            &prep.cands.left,
            &prep.cands.right,
            &theta,
            &rough,
        );
        confidence::link_prior_step(
            prep.records.n_left(),
            &prep.cands.left,
            &prep.cands.right,
            &groups,
            &mut odds,
            &marg.p,
            &rough,
        );
    }
    let (w, t) = dovetail::fit::pair_weights_indexed(
        &prep.records,
        &prep.cands,
        &prep.patterns,
        &pooled,
        prep.strata.as_ref(),
        &no_frequency,
        Some(&odds),
    );
    prep.weight = w;
    prep.theta = t;
    prep.fit = pooled.clone();
    prep.plain_fit = pooled;
    prep.link_log_odds = odds;
}

/// The laws of a prepared run as text: per stratum (or pooled) p, and per field m and u.
pub fn laws_text(prep: &Prepared) -> String {
    let mut out = String::new();
    let fits: Vec<(String, &Fit)> = match &prep.strata {
        Some(st) if !st.fits.is_empty() => st
            .masks
            .iter()
            .zip(&st.fits)
            .map(|(m, f)| (format!("passes {m:#b}"), f))
            .collect(),
        _ => vec![("pooled".to_string(), &prep.fit)],
    };
    if let Some(c) = &prep.check {
        out.push_str(&format!("  check: {:?}\n", c.signatures));
    }
    for (name, f) in fits {
        out.push_str(&format!("  {name}: p {:.4}\n", f.p));
        for (k, fv) in prep.records.fields.iter().enumerate() {
            let v = |x: &[f64]| {
                x.iter()
                    .map(|a| format!("{a:.4}"))
                    .collect::<Vec<_>>()
                    .join(" ")
            };
            out.push_str(&format!(
                "    {:<9} m [{}]  u [{}]\n",
                fv.spec.name,
                v(&f.m[k]),
                v(&f.u[k])
            ));
        }
    }
    out
}

/// Runs a case for one seed in a temporary folder; with `truth_laws`, links with the
/// truth's own m and u instead of the fitted ones. With `laws`, also the laws as text.
pub fn run(case: &Case, seed: u64, truth_laws: bool, laws: bool) -> (Outcome, String) {
    let dir = tempfile::tempdir().expect("temp dir");
    let (mut prep, truth) = prepare(case, seed, dir.path());
    if truth_laws {
        use_truth_laws(&mut prep, &truth);
    }
    let text = if laws {
        laws_text(&prep)
    } else {
        String::new()
    };
    (score(&mut prep, &truth), text)
}

/// The criteria of issue 16 for one outcome; an empty list when all hold. Where the model
/// check flags misfit, a verdict other than feasible and intervals that hold the actual values
/// are enough.
pub fn misses(o: &Outcome) -> Vec<String> {
    let mut m = Vec::new();
    if o.verdict == Verdict::Feasible && o.lost() > 0.05 {
        m.push(format!("feasible with {:.1}% lost", 100.0 * o.lost()));
    }
    let inside =
        |iv: Option<[f64; 2]>, x: f64| iv.is_some_and(|[a, b]| a - 1e-9 <= x && x <= b + 1e-9);
    let excused = o.misfit && o.verdict != Verdict::Feasible;
    if (o.est_precision - o.precision).abs() > 0.02
        && !(excused && inside(o.precision_interval, o.precision))
    {
        m.push(format!(
            "precision {:.3} est {:.3}",
            o.precision, o.est_precision
        ));
    }
    if (o.est_recall_cand - o.recall_cand).abs() > 0.02
        && !(excused && inside(o.recall_interval, o.recall_cand))
    {
        m.push(format!(
            "recall {:.3} est {:.3}",
            o.recall_cand, o.est_recall_cand
        ));
    }
    match o.est_recall_all {
        Some((r, iv)) => {
            if (r - o.recall_all).abs() > 0.03 && !(excused && inside(Some(iv), o.recall_all)) {
                m.push(format!("recall over all {:.3} est {:.3}", o.recall_all, r));
            }
        }
        None => m.push("no recall over all pairs".into()),
    }
    let tol = (0.3 * o.lost()).max(0.01);
    if (o.forecast - o.lost()).abs() > tol
        && !(excused && inside(Some(o.forecast_interval), o.lost()))
    {
        m.push(format!("forecast {:.3} actual {:.3}", o.forecast, o.lost()));
    }
    m
}
