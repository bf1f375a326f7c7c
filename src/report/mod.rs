//! Outputs: links, unlinked records, the clerical-review list and summary.json.
//!
//! In: a [`Prepared`] run and, for `link`, its [`Linkage`]. Out: files in the output folder,
//! written through [`OutputSet`] so that either all of them appear or none. Every input record
//! ends up in exactly one of links.csv / unlinked_left.csv (left) and links.csv /
//! unlinked_right.csv (right). Numbers are printed with fixed rules so that a rerun gives the
//! same bytes.

pub mod html;

use crate::error::Result;
use crate::io::OutputSet;
use crate::pipeline::{level_text, Linkage, Prepared};
use crate::reliability::forecast::Forecast;
use crate::reliability::{Assessment, DegreeStats, Verdict};
use serde::Serialize;
use std::io::Write;
use std::path::{Path, PathBuf};

/// The tool's version, as written in outputs.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// Formats a probability or weight with a fixed number of decimals.
fn num(x: f64) -> String {
    format!("{x:.6}")
}

fn csv_writer(w: &mut dyn Write) -> csv::Writer<&mut dyn Write> {
    csv::WriterBuilder::new().from_writer(w)
}

fn to_io(e: csv::Error) -> std::io::Error {
    std::io::Error::other(e.to_string())
}

/// Per field in summary.json.
#[derive(Debug, Serialize)]
pub struct FieldSummary {
    /// Field label.
    pub name: String,
    /// Comparison method.
    pub method: String,
    /// Level names, strongest agreement first.
    pub levels: Vec<String>,
    /// m-probabilities per level.
    pub m: Vec<f64>,
    /// u-probabilities per level.
    pub u: Vec<f64>,
    /// Share of true pairs with the field missing.
    pub m_missing: f64,
    /// Share of false pairs with the field missing.
    pub u_missing: f64,
    /// B_k.
    pub bhattacharyya: f64,
    /// -ln B_k.
    pub separation_nats: f64,
    /// True when the field adds (almost) nothing.
    pub adds_nothing: bool,
    /// Share of left records with the field missing.
    pub missing_left: f64,
    /// Share of right records with the field missing.
    pub missing_right: f64,
    /// Whether value-frequency weighting is on.
    pub frequency: bool,
    /// Share of the candidate pairs holding both values whose values agree at the top level
    /// (identical after cleaning); null without such pairs.
    pub top_agreement: Option<f64>,
    /// Share of the left records with a value whose value some right record holds too.
    pub left_values_shared: Option<f64>,
    /// Share of the right records with a value whose value some left record holds too.
    pub right_values_shared: Option<f64>,
    /// Left values that are not dates (or numbers) and were taken as missing.
    pub unparsed_left: u64,
    /// The lines of the first five of them.
    pub unparsed_left_lines: Vec<u64>,
    /// Right values that are not dates (or numbers) and were taken as missing.
    pub unparsed_right: u64,
    /// The lines of the first five of them.
    pub unparsed_right_lines: Vec<u64>,
}

/// Per pass in summary.json.
#[derive(Debug, Serialize)]
pub struct PassSummary {
    /// Pass label.
    pub name: String,
    /// Key parts.
    pub keys: Vec<String>,
    /// Pairs produced by this pass alone.
    pub pairs: u64,
    /// Blocks with records on both sides.
    pub blocks: u64,
    /// Largest kept block, in pairs.
    pub largest_block: u64,
    /// Share of this pass's pairs that come from blocks of more than 1,000 pairs.
    pub share_in_large_blocks: f64,
    /// Blocks skipped by the cap.
    pub skipped_blocks: usize,
}

/// One pair of fields in summary.json's `field_dependence`.
#[derive(Debug, Serialize)]
pub struct DependenceSummary {
    /// First field.
    pub a: String,
    /// Second field.
    pub b: String,
    /// Phi among true pairs.
    pub phi_m: f64,
    /// Phi among false pairs.
    pub phi_u: f64,
    /// Expected true pairs on the rarer side of the table behind `phi_m`.
    pub support_m: f64,
    /// Expected false pairs on the rarer side of the table behind `phi_u`.
    pub support_u: f64,
    /// True when both are above 0.25 in size, or either above 0.75, counting only a class
    /// with at least 50 pairs on the rarer side.
    pub strong: bool,
}

/// The EM fit in summary.json.
#[derive(Debug, Serialize)]
pub struct FitSummary {
    /// Estimated share of candidate pairs that are true.
    pub p: f64,
    /// Log-likelihood at the fit.
    pub loglik: f64,
    /// EM iterations.
    pub iterations: usize,
    /// Whether EM converged.
    pub converged: bool,
    /// Whether the label-switching guard swapped the classes.
    pub label_switch_corrected: bool,
    /// Distinct agreement patterns.
    pub patterns: usize,
    /// Prior log odds of a link under the one-to-one model, fitted so that the expected
    /// number of links is the same before and after seeing the comparisons; pooled over the
    /// passes (the sets of passes have their own in `per_pass`); null without candidates.
    pub link_log_odds: Option<f64>,
    /// The fits of each set of passes that found a pair (empty when the laws are pooled: one
    /// pass, `per_pass = false`, or m or u held fixed); pairs are weighed with their set's laws.
    pub per_pass: Vec<PassSetFit>,
}

/// One set of passes' own fit in summary.json.
#[derive(Debug, Serialize)]
pub struct PassSetFit {
    /// The passes that found these pairs (all of them, none other).
    pub found_by: Vec<String>,
    /// Candidate pairs in the set.
    pub pairs: usize,
    /// Estimated share of them that are true.
    pub p: f64,
    /// The set's prior log odds of a link under the one-to-one model.
    pub link_log_odds: f64,
}

/// summary.json.
#[derive(Debug, Serialize)]
pub struct Summary {
    /// Tool name.
    pub tool: &'static str,
    /// Tool version.
    pub version: &'static str,
    /// Which subcommand wrote this.
    pub command: &'static str,
    /// Left records read.
    pub left_records: usize,
    /// Right records read.
    pub right_records: usize,
    /// Candidate pairs after blocking.
    pub candidate_pairs: usize,
    /// The pairs and peak memory estimated before blocking, from the passes' key counts.
    pub memory_estimate: crate::pipeline::MemoryEstimate,
    /// d = estimated false candidates / sqrt(|L| |R|).
    pub mean_false_degree: f64,
    /// B = prod_k B_k.
    pub bhattacharyya: f64,
    /// sqrt(d) B, against the threshold 1.
    pub margin: f64,
    /// (1/2) ln d: the separation the threshold sqrt(d)·B <= 1 asks for; negative when
    /// d < 1 (any fields meet the threshold then), null when d = 0 (minus infinity).
    pub separation_needed_nats: f64,
    /// sum_k -ln B_k.
    pub separation_supplied_nats: f64,
    /// feasible | borderline | infeasible.
    pub verdict: Verdict,
    /// Why.
    pub verdict_reasons: Vec<String>,
    /// Bootstrap forecast of the share of true pairs not linked to their partner.
    pub forecast_error_rate: Option<f64>,
    /// Its interval (2.5% and 97.5% points of the replicates).
    pub forecast_interval: Option<[f64; 2]>,
    /// Details of the forecast.
    pub forecast: Option<Forecast>,
    /// True when `stop_if_infeasible` stopped the run on an infeasible verdict: no links,
    /// unlinked or review file was written, only summary.json and report.html.
    pub stopped_infeasible: bool,
    /// Links written.
    pub links: Option<usize>,
    /// Pairs in the optimum matching left out by the cut-off.
    pub links_below_cutoff: Option<usize>,
    /// The confidence cut-off in force.
    pub confidence_cutoff: Option<f64>,
    /// Mean confidence of the links written.
    pub estimated_precision: Option<f64>,
    /// Its 95% interval, widened by the model check's misfit ([0, 1] when the fit is not
    /// identified).
    pub estimated_precision_interval: Option<[f64; 2]>,
    /// Sum of link confidences over the estimated number of true pairs among candidates.
    pub estimated_recall: Option<f64>,
    /// Its 95% interval, widened by the model check's misfit.
    pub estimated_recall_interval: Option<[f64; 2]>,
    /// Observed against expected pattern counts under the fitted model.
    pub model_check: Option<CheckSummary>,
    /// Estimated share of all true pairs that blocking made candidates, with its interval
    /// (against no blocking on a sample of left records).
    pub estimated_pair_completeness: Option<crate::tune::Completeness>,
    /// Estimated recall over all true pairs (recall among candidates x completeness).
    pub estimated_recall_all: Option<f64>,
    /// Its interval.
    pub estimated_recall_all_interval: Option<[f64; 2]>,
    /// Expected pairs of records inside each table that are the same person.
    pub duplicates: Option<crate::duplicates::Duplicates>,
    /// p |C|.
    pub estimated_true_pairs: f64,
    /// The false-degree distribution.
    pub false_degree: DegreeStats,
    /// The EM fit.
    pub fit: FitSummary,
    /// Per field.
    pub fields: Vec<FieldSummary>,
    /// Per pass.
    pub passes: Vec<PassSummary>,
    /// Per pair of fields: the phi coefficient of top-level agreement within each class
    /// (near 0 when the fields are conditionally independent, as the model assumes).
    pub field_dependence: Vec<DependenceSummary>,
    /// How confidences were computed: components enumerated exactly and by belief propagation.
    pub confidence_components: Option<[usize; 3]>,
    /// Per side, why records stayed unlinked: each reason of [`UnlinkedReason`] with its
    /// count (zeros included); the counts add up to the side's unlinked records. Null for
    /// `assess` and for a run stopped by `stop_if_infeasible`.
    pub unlinked_reasons: Option<UnlinkedCounts>,
    /// The clerks' decisions applied (`link.decisions`), by kind.
    pub decisions: Option<crate::review::Applied>,
    /// The audit sample drawn into audit.csv (`link.audit_sample`).
    pub audit: Option<AuditSummary>,
    /// What to do next, derived from this run (the list report.html shows).
    pub next_steps: Vec<String>,
    /// Warnings, in plain words.
    pub warnings: Vec<String>,
    /// How the run was made.
    pub manifest: Manifest,
}

/// The audit sample in summary.json.
#[derive(Debug, Clone, Serialize)]
pub struct AuditSummary {
    /// Links asked for.
    pub sample: usize,
    /// The seed (`assess.seed`).
    pub seed: u64,
    /// The confidence bands, their links and the links drawn from each.
    pub bands: Vec<crate::review::AuditBand>,
}

/// The model check in summary.json.
#[derive(Debug, Serialize)]
pub struct CheckSummary {
    /// Whether the misfit is large enough to move links (the verdict is then not feasible).
    pub flagged: bool,
    /// Deviance G^2 over every pattern of every set of passes.
    pub deviance: f64,
    /// Patterns in the table.
    pub cells: usize,
    /// Total variation between observed and expected pattern shares, all candidate pairs.
    pub misfit_all: f64,
    /// The same among the pairs that can be linked (pairwise link probability >= 0.05).
    pub misfit_linkable: f64,
    /// Those pairs.
    pub linkable_pairs: f64,
    /// The patterns with the largest Pearson residuals among those pairs, worst first.
    pub worst_patterns: Vec<PatternSummary>,
    /// The known failures found, in plain words.
    pub findings: Vec<String>,
}

/// One agreement pattern in the model check (levels and counts, never values).
#[derive(Debug, Serialize)]
pub struct PatternSummary {
    /// The passes that found its pairs.
    pub found_by: Vec<String>,
    /// Per field, the level's name (or "missing").
    pub levels: Vec<String>,
    /// Pairs with the pattern.
    pub observed: f64,
    /// Pairs the model expects.
    pub expected: f64,
    /// (observed - expected) / sqrt(expected).
    pub pearson_residual: f64,
}

fn check_summary(prep: &Prepared, a: &Assessment) -> Option<CheckSummary> {
    let c = prep.check.as_ref()?;
    Some(CheckSummary {
        flagged: c.flagged(),
        deviance: c.deviance,
        cells: c.cells,
        misfit_all: c.misfit_all,
        misfit_linkable: c.misfit_matters,
        linkable_pairs: c.pairs_matter,
        worst_patterns: c
            .worst
            .iter()
            .map(|w| PatternSummary {
                found_by: prep.found_by(w.stratum),
                levels: w
                    .levels
                    .iter()
                    .enumerate()
                    .map(|(k, &l)| prep.level_name(k, l))
                    .collect(),
                observed: w.observed,
                expected: w.expected,
                pearson_residual: w.residual,
            })
            .collect(),
        findings: a
            .reasons
            .iter()
            .filter(|r| r.starts_with("the model check"))
            .cloned()
            .collect(),
    })
}

/// One input file in the manifest.
#[derive(Debug, Serialize)]
pub struct InputFile {
    /// Path as resolved from the config.
    pub path: String,
    /// Size in bytes.
    pub bytes: u64,
    /// Records read.
    pub rows: usize,
    /// SHA-256 of the file.
    pub sha256: String,
}

/// The run manifest: enough to repeat the run and check its inputs. `run_date`, `threads` and
/// `seconds` describe this run only (report.html shows the date too); every other output byte
/// is the same for any thread count, and with `SOURCE_DATE_EPOCH` set the date is too.
#[derive(Debug, Serialize)]
pub struct Manifest {
    /// Tool version.
    pub version: &'static str,
    /// When the run was made, UTC, RFC 3339 to the second (`2024-05-01T09:30:00Z`): from the
    /// `SOURCE_DATE_EPOCH` environment variable (seconds since 1970-01-01 UTC, the
    /// reproducible-builds convention) when set, else the clock. Run-specific, like `threads`
    /// and `seconds`.
    pub run_date: String,
    /// The config as read (after defaults).
    pub config: crate::config::Config,
    /// The left table.
    pub left: InputFile,
    /// The right table.
    pub right: InputFile,
    /// The seed of the bootstrap and samples.
    pub seed: u64,
    /// Worker threads of this run.
    pub threads: usize,
    /// Seconds per stage of this run.
    pub seconds: Vec<(String, f64)>,
}

fn manifest(prep: &Prepared, run_date: &str) -> Manifest {
    let file = |t: &crate::io::Table| InputFile {
        path: t.path.display().to_string(),
        bytes: t.bytes,
        rows: t.len(),
        sha256: t.sha256.clone(),
    };
    Manifest {
        version: VERSION,
        run_date: run_date.to_string(),
        config: prep.config.clone(),
        left: file(&prep.left),
        right: file(&prep.right),
        seed: prep.config.assess.seed,
        threads: rayon::current_num_threads(),
        seconds: prep
            .timings
            .iter()
            .map(|(s, t)| (s.clone(), (t * 1000.0).round() / 1000.0))
            .collect(),
    }
}

fn per_pass_fits(prep: &Prepared) -> Vec<PassSetFit> {
    let Some(strata) = &prep.strata else {
        return Vec::new();
    };
    let mut pairs = vec![0usize; strata.masks.len()];
    for &g in &strata.of_pair {
        pairs[g as usize] += 1;
    }
    strata
        .masks
        .iter()
        .zip(&strata.fits)
        .zip(pairs)
        .zip(&prep.link_log_odds)
        .enumerate()
        .map(|(g, (((_, fit), pairs), &link_log_odds))| PassSetFit {
            found_by: prep.found_by(g),
            pairs,
            p: fit.p,
            link_log_odds,
        })
        .collect()
}

/// The estimated precision of the links and their estimated recall among the candidate
/// pairs (see `pipeline::link`); None where there is nothing to divide by.
pub fn estimates(l: &Linkage) -> (Option<f64>, Option<f64>) {
    (l.precision.map(|e| e.value), l.recall.map(|e| e.value))
}

/// What summary.json needs beyond the run: the date, and for `link` the outcome per record.
struct SummaryExtra<'a> {
    run_date: &'a str,
    audit: Option<AuditSummary>,
    outcomes: Option<&'a Outcomes>,
    next_steps: Vec<String>,
    stopped: bool,
}

fn summary(
    prep: &Prepared,
    a: &Assessment,
    link: Option<&Linkage>,
    command: &'static str,
    extra: SummaryExtra<'_>,
) -> Summary {
    let fields = prep
        .records
        .fields
        .iter()
        .enumerate()
        .map(|(k, fv)| FieldSummary {
            name: fv.spec.name.clone(),
            method: format!("{:?}", fv.spec.method).to_lowercase(),
            levels: prep.comparison.comparators[k].level_names(),
            m: prep.fit.m[k].clone(),
            u: prep.fit.u[k].clone(),
            m_missing: prep.fit.m_missing[k],
            u_missing: prep.fit.u_missing[k],
            bhattacharyya: a.fields[k].bhattacharyya,
            separation_nats: a.fields[k].nats,
            adds_nothing: a.fields[k].adds_nothing,
            missing_left: fv.left_missing_rate(),
            missing_right: fv.right_missing_rate(),
            frequency: fv.spec.frequency,
            top_agreement: prep.agreement[k].top_agreement,
            left_values_shared: prep.agreement[k].left_shared,
            right_values_shared: prep.agreement[k].right_shared,
            unparsed_left: fv.left_unparsed.count,
            unparsed_left_lines: fv.left_unparsed.first_lines.clone(),
            unparsed_right: fv.right_unparsed.count,
            unparsed_right_lines: fv.right_unparsed.first_lines.clone(),
        })
        .collect();
    let passes = prep
        .pass_stats
        .iter()
        .zip(&prep.config.block)
        .map(|(s, b)| PassSummary {
            name: s.name.clone(),
            keys: b.keys.clone(),
            pairs: s.pairs,
            blocks: s.blocks,
            largest_block: s.largest_block,
            share_in_large_blocks: if s.pairs > 0 {
                s.pairs_in_large_blocks as f64 / s.pairs as f64
            } else {
                0.0
            },
            skipped_blocks: s.skipped.len(),
        })
        .collect();
    let (links, below, cutoff, precision, recall, comps) = match link {
        Some(l) => {
            let (precision, recall) = estimates(l);
            (
                Some(l.links.len()),
                Some(l.matching.chosen.len() - l.links.len()),
                Some(l.cutoff),
                precision,
                recall,
                Some([
                    l.confidence.exact_components,
                    l.confidence.bp_components,
                    l.confidence.not_converged,
                ]),
            )
        }
        None => (None, None, None, None, None, None),
    };
    Summary {
        tool: "dovetail",
        version: VERSION,
        command,
        left_records: prep.records.n_left(),
        right_records: prep.records.n_right(),
        candidate_pairs: prep.cands.len(),
        memory_estimate: prep.memory.clone(),
        mean_false_degree: a.mean_false_degree,
        bhattacharyya: a.bhattacharyya,
        margin: a.margin,
        separation_needed_nats: a.nats_needed,
        separation_supplied_nats: a.nats_supplied,
        verdict: a.verdict,
        verdict_reasons: a.reasons.clone(),
        stopped_infeasible: extra.stopped,
        forecast_error_rate: a.forecast.as_ref().map(|f| f.error_rate),
        forecast_interval: a.forecast.as_ref().map(|f| f.interval),
        forecast: a.forecast.clone(),
        links,
        links_below_cutoff: below,
        confidence_cutoff: cutoff,
        estimated_precision: precision,
        estimated_precision_interval: link.and_then(|l| l.precision.map(|e| e.interval)),
        estimated_recall: recall,
        estimated_recall_interval: link.and_then(|l| l.recall.map(|e| e.interval)),
        model_check: check_summary(prep, a),
        estimated_pair_completeness: link.and_then(|l| l.completeness),
        estimated_recall_all: link.and_then(|l| l.recall_all.map(|e| e.value)),
        estimated_recall_all_interval: link.and_then(|l| l.recall_all.map(|e| e.interval)),
        duplicates: prep.duplicates,
        estimated_true_pairs: a.estimated_true_pairs,
        false_degree: a.false_degree.clone(),
        fit: FitSummary {
            p: prep.fit.p,
            loglik: prep.fit.loglik,
            iterations: prep.fit.iterations,
            converged: prep.fit.converged,
            label_switch_corrected: prep.fit.switched,
            patterns: prep.counts.patterns.len(),
            link_log_odds: prep.pooled_link_log_odds,
            per_pass: per_pass_fits(prep),
        },
        fields,
        passes,
        field_dependence: prep
            .dependence
            .iter()
            .map(|d| DependenceSummary {
                a: prep.config.field[d.a].name.clone(),
                b: prep.config.field[d.b].name.clone(),
                phi_m: d.phi_m,
                phi_u: d.phi_u,
                support_m: d.support_m,
                support_u: d.support_u,
                strong: d.is_strong(),
            })
            .collect(),
        confidence_components: comps,
        unlinked_reasons: extra.outcomes.map(|o| UnlinkedCounts {
            left: o.counts(true),
            right: o.counts(false),
        }),
        decisions: prep.decisions.clone(),
        audit: extra.audit,
        next_steps: extra.next_steps,
        warnings: prep.warnings.clone(),
        manifest: manifest(prep, extra.run_date),
    }
}

fn write_summary(out: &mut OutputSet, s: &Summary) -> Result<()> {
    out.write("summary.json", |w| {
        serde_json::to_writer_pretty(&mut *w, s).map_err(std::io::Error::other)?;
        w.write_all(b"\n")
    })
}

/// Writes summary.json for `assess`.
pub fn write_assessment(dir: &Path, prep: &Prepared, a: &Assessment) -> Result<Vec<PathBuf>> {
    render_assessment(prep, a)?.write_to(dir, false)
}

/// The outputs of `assess` (summary.json) in memory; [`crate::folder::Rendered::write_to`]
/// lands them as [`write_assessment`] does.
pub fn render_assessment(prep: &Prepared, a: &Assessment) -> Result<crate::folder::Rendered> {
    let run_date = run_date()?;
    let mut out = OutputSet::in_memory(crate::folder::stamp_of(prep, "assess"));
    let extra = SummaryExtra {
        run_date: &run_date,
        audit: None,
        outcomes: None,
        next_steps: next_steps(prep, a, None),
        stopped: false,
    };
    write_summary(&mut out, &summary(prep, a, None, "assess", extra))?;
    Ok(out.into_rendered())
}

/// The table of an earlier `dovetail tune --out DIR`, when DIR/tune.csv is there, reads, and
/// came from the same config and inputs as this run.
fn read_tune(dir: &Path, prep: &Prepared) -> Option<Vec<html::TuneRow>> {
    let stamp = crate::folder::stamp_of(prep, "link");
    if !crate::folder::file_matches(dir, "tune.csv", stamp.fingerprint.as_deref()?) {
        return None;
    }
    let mut r = csv::Reader::from_path(dir.join("tune.csv")).ok()?;
    r.deserialize()
        .collect::<std::result::Result<Vec<html::TuneRow>, _>>()
        .ok()
}

/// The passes that produced pair `i`, joined with "+".
fn found_by(prep: &Prepared, i: usize) -> String {
    let mask = prep.cands.passes[i];
    prep.pass_stats
        .iter()
        .enumerate()
        .filter(|(p, _)| mask & (1 << p) != 0)
        .map(|(_, s)| s.name.as_str())
        .collect::<Vec<_>>()
        .join("+")
}

/// A candidate whose one-to-one confidence is below this is not a plausible partner: an
/// unlinked record whose every candidate is below it has "no plausible candidate", not a
/// partner it lost. 0.05 is one chance in twenty, the usual "unlikely" of common practice;
/// the model check counts pairs as linkable from the same value.
pub const PLAUSIBLE_CONFIDENCE: f64 = 0.05;

/// Why a record stayed unlinked (unlinked_left.csv and unlinked_right.csv, `reason`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UnlinkedReason {
    /// No blocking pass gave the record a candidate.
    NoCandidate,
    /// Every candidate's confidence is below [`PLAUSIBLE_CONFIDENCE`].
    NoPlausibleCandidate,
    /// Its most likely candidate's other record went to another record in the one-to-one
    /// optimum.
    LostToBetter,
    /// Chosen by the one-to-one optimum, but with a confidence under the cut-off.
    BelowCutoff,
    /// Neither the record nor its most likely candidate's other record is in the optimum: no
    /// candidate pair has even posterior odds (weight plus prior above 0), so the optimum
    /// leaves both unlinked.
    OnlyWeakCandidates,
    /// The fit cannot tell true from false pairs, so no link was written at all.
    NotIdentified,
}

impl UnlinkedReason {
    /// Every reason, in the order the report lists them.
    pub const ALL: [UnlinkedReason; 6] = [
        UnlinkedReason::NoCandidate,
        UnlinkedReason::NoPlausibleCandidate,
        UnlinkedReason::LostToBetter,
        UnlinkedReason::BelowCutoff,
        UnlinkedReason::OnlyWeakCandidates,
        UnlinkedReason::NotIdentified,
    ];

    /// The reason as written in the unlinked files and summary.json.
    pub fn as_str(self) -> &'static str {
        match self {
            UnlinkedReason::NoCandidate => "no candidate pair",
            UnlinkedReason::NoPlausibleCandidate => "no plausible candidate",
            UnlinkedReason::LostToBetter => "lost to a better candidate",
            UnlinkedReason::BelowCutoff => "below the confidence cut-off",
            UnlinkedReason::OnlyWeakCandidates => "only weak candidates",
            UnlinkedReason::NotIdentified => "model not identified",
        }
    }

    /// What the reason means, in plain words (report.html).
    pub fn meaning(self) -> String {
        match self {
            UnlinkedReason::NoCandidate => "no blocking pass gave the record the same key as any record of the other table, so it was never compared: it may have no partner there, or blocking missed it".into(),
            UnlinkedReason::NoPlausibleCandidate => format!("it was compared, but every candidate's confidence is below {}: most likely its person is not in the other table", crate::numbers::cutoff(PLAUSIBLE_CONFIDENCE)),
            UnlinkedReason::LostToBetter => "its most likely partner was given to another record that fits it better (each record links to at most one)".into(),
            UnlinkedReason::BelowCutoff => "the one-to-one optimum chose a partner for it, but the link's confidence is under the cut-off, so it was not written".into(),
            UnlinkedReason::OnlyWeakCandidates => "it has candidates with some chance, but none likelier to be its partner than not, and its best one's other record is not taken either".into(),
            UnlinkedReason::NotIdentified => "the fit cannot tell true from false pairs, so no link was written for anyone".into(),
        }
    }
}

/// summary.json's `unlinked_reasons`: per side, each reason with its count.
#[derive(Debug, Serialize)]
pub struct UnlinkedCounts {
    /// Left records.
    pub left: std::collections::BTreeMap<String, usize>,
    /// Right records.
    pub right: std::collections::BTreeMap<String, usize>,
}

/// What became of each record and pair: its side's reason when unlinked, its most likely
/// candidate, and each pair's status.
pub struct Outcomes {
    /// Per left record: None when linked, else why not.
    pub left: Vec<Option<UnlinkedReason>>,
    /// Per right record.
    pub right: Vec<Option<UnlinkedReason>>,
    /// Per left record, its candidate pair of highest confidence (the first such pair).
    pub best_left: Vec<Option<usize>>,
    /// Per right record.
    pub best_right: Vec<Option<usize>>,
    /// Per pair: written as a link.
    pub is_link: Vec<bool>,
    /// Per pair: chosen by the one-to-one optimum.
    pub in_optimum: Vec<bool>,
    /// Whether the fit is identified (without it no link is written).
    pub identified: bool,
}

impl Outcomes {
    /// Works out every record's outcome from the run.
    pub fn new(prep: &Prepared, l: &Linkage) -> Outcomes {
        let n_pairs = prep.cands.len();
        let nl = prep.records.n_left();
        let nr = prep.records.n_right();
        let p = &l.confidence.p;
        let mut best_left: Vec<Option<usize>> = vec![None; nl];
        let mut best_right: Vec<Option<usize>> = vec![None; nr];
        let better = |i: usize, cur: Option<usize>| cur.is_none_or(|j| p[i] > p[j]);
        for i in 0..n_pairs {
            let (a, b) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
            if better(i, best_left[a]) {
                best_left[a] = Some(i);
            }
            if better(i, best_right[b]) {
                best_right[b] = Some(i);
            }
        }
        let mut is_link = vec![false; n_pairs];
        let mut in_optimum = vec![false; n_pairs];
        let (mut linked_l, mut linked_r) = (vec![false; nl], vec![false; nr]);
        let (mut opt_l, mut opt_r) = (vec![false; nl], vec![false; nr]);
        for &i in &l.links {
            is_link[i] = true;
            linked_l[prep.cands.left[i] as usize] = true;
            linked_r[prep.cands.right[i] as usize] = true;
        }
        for &i in &l.matching.chosen {
            in_optimum[i] = true;
            opt_l[prep.cands.left[i] as usize] = true;
            opt_r[prep.cands.right[i] as usize] = true;
        }
        let identified =
            crate::reliability::identification_problems(&prep.fit, &prep.separations).is_empty();
        let reason =
            |linked: bool, opt: bool, best: Option<usize>, other_opt: &dyn Fn(usize) -> bool| {
                if linked {
                    return None;
                }
                let Some(i) = best else {
                    return Some(UnlinkedReason::NoCandidate);
                };
                Some(if !identified {
                    UnlinkedReason::NotIdentified
                } else if opt {
                    UnlinkedReason::BelowCutoff
                } else if p[i] < PLAUSIBLE_CONFIDENCE {
                    UnlinkedReason::NoPlausibleCandidate
                } else if other_opt(i) {
                    UnlinkedReason::LostToBetter
                } else {
                    UnlinkedReason::OnlyWeakCandidates
                })
            };
        let left = (0..nl)
            .map(|a| {
                reason(linked_l[a], opt_l[a], best_left[a], &|i| {
                    opt_r[prep.cands.right[i] as usize]
                })
            })
            .collect();
        let right = (0..nr)
            .map(|b| {
                reason(linked_r[b], opt_r[b], best_right[b], &|i| {
                    opt_l[prep.cands.left[i] as usize]
                })
            })
            .collect();
        Outcomes {
            left,
            right,
            best_left,
            best_right,
            is_link,
            in_optimum,
            identified,
        }
    }

    /// Per reason, the count of one side's unlinked records, in [`UnlinkedReason::ALL`] order.
    pub fn count_list(&self, left: bool) -> Vec<(UnlinkedReason, usize)> {
        let side = if left { &self.left } else { &self.right };
        UnlinkedReason::ALL
            .iter()
            .map(|&r| (r, side.iter().filter(|x| **x == Some(r)).count()))
            .collect()
    }

    /// The same keyed by the reasons' text, for summary.json.
    pub fn counts(&self, left: bool) -> std::collections::BTreeMap<String, usize> {
        self.count_list(left)
            .into_iter()
            .map(|(r, n)| (r.as_str().to_string(), n))
            .collect()
    }

    /// The status of pair `i` as review.csv writes it.
    pub fn status(&self, i: usize) -> PairStatus {
        if self.is_link[i] {
            PairStatus::Linked
        } else if !self.identified {
            PairStatus::NotIdentified
        } else if self.in_optimum[i] {
            PairStatus::BelowCutoff
        } else {
            PairStatus::RunnerUp
        }
    }
}

/// A candidate pair's outcome (review.csv's `status`; report.html says it in words).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PairStatus {
    /// Written to links.csv.
    Linked,
    /// Chosen by the one-to-one optimum, confidence under the cut-off: not written.
    BelowCutoff,
    /// Not chosen: its records went to other pairs or stay unlinked.
    RunnerUp,
    /// The fit is not identified: no link is written.
    NotIdentified,
}

impl PairStatus {
    /// The status as written in review.csv.
    pub fn as_str(self) -> &'static str {
        match self {
            PairStatus::Linked => "linked",
            PairStatus::BelowCutoff => "below cut-off",
            PairStatus::RunnerUp => "runner-up",
            PairStatus::NotIdentified => "not identified",
        }
    }

    /// The status in plain words, for report.html.
    pub fn words(self) -> &'static str {
        match self {
            PairStatus::Linked => "linked",
            PairStatus::BelowCutoff => "not linked: below the cut-off",
            PairStatus::RunnerUp => "not linked: not chosen one-to-one",
            PairStatus::NotIdentified => "not linked: model not identified",
        }
    }
}

/// The run date, UTC, RFC 3339 to the second: from `SOURCE_DATE_EPOCH` when set (the
/// reproducible-builds convention: whole seconds since 1970-01-01 UTC), else the clock.
pub fn run_date() -> Result<String> {
    let secs = match std::env::var("SOURCE_DATE_EPOCH") {
        Ok(v) => v.trim().parse::<u64>().map_err(|_| {
            crate::error::Error::config(format!(
                "SOURCE_DATE_EPOCH is `{v}`; it must be a whole number of seconds since 1970-01-01 UTC"
            ))
        })?,
        Err(_) => std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_secs()),
    };
    Ok(rfc3339(secs))
}

/// Seconds since 1970-01-01 UTC as `YYYY-MM-DDTHH:MM:SSZ` (proleptic Gregorian calendar;
/// the days-to-civil conversion by 400-year eras, common practice).
pub fn rfc3339(secs: u64) -> String {
    let days = (secs / 86_400) as i64;
    let rem = secs % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem / 60 % 60,
        rem % 60
    )
}

/// Candidate pairs agreeing at the strongest level, per field.
fn top_agreements(prep: &Prepared) -> Vec<f64> {
    let mut top = vec![0.0; prep.config.field.len()];
    for (pat, &n) in prep.counts.patterns.iter().zip(&prep.counts.counts) {
        for (k, &l) in pat.iter().enumerate() {
            if l == 0 {
                top[k] += n;
            }
        }
    }
    top
}

/// What to do next, derived from the run: only the items that apply, each with its number.
/// `link` is None for `assess`; with `outcomes` None and `link` set, the run was stopped.
fn next_steps(
    prep: &Prepared,
    a: &Assessment,
    link: Option<(&Linkage, &Outcomes, usize)>,
) -> Vec<String> {
    use crate::numbers::{cutoff, percent, ratio};
    let mut out = Vec::new();
    let serious = prep
        .warnings
        .iter()
        .filter(|w| w.starts_with(crate::pipeline::SERIOUS_PREFIX))
        .count();
    if serious > 0 {
        out.push(format!(
            "Resolve the {serious} serious warning(s) listed first under Warnings before using any link: until then the results cannot be trusted."
        ));
    }
    match a.verdict {
        Verdict::Infeasible => out.push(format!(
            "The verdict is infeasible (margin sqrt(d)·B = {}): do not act on links from these fields and this blocking. Add a field that tells people apart, tighten blocking so each record has fewer false candidates, or clean the data, then run again.",
            ratio(a.margin)
        )),
        Verdict::Borderline => out.push(format!(
            "The verdict is borderline (margin sqrt(d)·B = {}, forecast mismatch rate {}): expect a noticeable share of wrong links. Review more pairs (widen `review_band`), and consider a further distinguishing field or tighter blocking.",
            ratio(a.margin),
            a.forecast.as_ref().map_or("not computed".to_string(), |f| percent(f.error_rate))
        )),
        Verdict::Feasible => {}
    }
    if let Some(c) = prep.check.as_ref().filter(|c| c.flagged()) {
        out.push(format!(
            "The model check finds {} of the {:.0} linkable pairs away from where the model expects them: look for relatives or neighbours in the other table, duplicates inside a table, or fields that move together, before trusting the estimates.",
            percent(c.misfit_matters),
            c.pairs_matter
        ));
    }
    if let Some((l, o, review)) = link {
        if review > 0 {
            let [lo, hi] = prep.config.link.review_band;
            out.push(format!(
                "Review the {review} pair(s) in review.csv (confidence from {} to {}) before acting on them.",
                cutoff(lo),
                cutoff(hi)
            ));
        }
        let below = l.matching.chosen.len().saturating_sub(l.links.len());
        if below > 0 && o.identified {
            out.push(format!(
                "{below} pair(s) chosen by the one-to-one optimum fell below the confidence cut-off {} and were not written; those in the review band are in review.csv. Lower the cut-off only after reviewing them.",
                cutoff(l.cutoff)
            ));
        }
        let none = |left: bool| {
            o.count_list(left)
                .iter()
                .find(|(r, _)| *r == UnlinkedReason::NoCandidate)
                .map_or(0, |x| x.1)
        };
        let (nl, nr) = (none(true), none(false));
        if nl + nr > 0 {
            let why = match l.completeness {
                Some(c) if c.value < 0.98 => format!(
                    "blocking is estimated to miss {} of the true pairs, so loosen blocking or add a pass (`dovetail tune` compares schemes)",
                    percent(1.0 - c.value)
                ),
                Some(c) => format!(
                    "blocking is estimated to keep {} of the true pairs, so most of them probably have no partner in the other table; to check, compare looser schemes with `dovetail tune`",
                    percent(c.value)
                ),
                None => "loosen blocking if they should have partners (`dovetail tune` compares schemes)".to_string(),
            };
            out.push(format!(
                "{nl} left and {nr} right record(s) had no candidate pair: {why}."
            ));
        }
    }
    let top = top_agreements(prep);
    if !prep.cands.is_empty() {
        for (k, f) in prep.config.field.iter().enumerate() {
            if top[k] == 0.0 {
                out.push(format!(
                    "Field `{}` never agreed on any of the {} candidate pairs: check its codings on both sides (formats, code lists, columns) or leave it out.",
                    f.name,
                    prep.cands.len()
                ));
            } else if a.fields.get(k).is_some_and(|s| s.adds_nothing) {
                out.push(format!(
                    "Field `{}` adds nothing (B_k = {}, where 1 means no help): check its codings on both sides or leave it out.",
                    f.name,
                    ratio(a.fields[k].bhattacharyya)
                ));
            }
        }
    }
    if let Some(d) = prep.duplicates {
        for (side, pairs, n) in [
            ("left", d.left_pairs, prep.records.n_left()),
            ("right", d.right_pairs, prep.records.n_right()),
        ] {
            if n > 0 && pairs / n as f64 > crate::duplicates::WARN_SHARE {
                out.push(format!(
                    "About {pairs:.0} pairs of records inside the {side} table look like the same person: remove duplicates from it first, or check for relatives at one address."
                ));
            }
        }
    }
    let other = prep.warnings.len() - serious;
    if other > 0 {
        out.push(format!(
            "Read the {other} other warning(s) under Warnings: each says what it affects."
        ));
    }
    if out.is_empty() {
        out.push("Nothing in this run stands out. Before acting on the links, check a random sample of them by hand (a clerical audit) to confirm the estimated precision.".into());
    }
    out
}

/// Writes links.csv, unlinked_left.csv, unlinked_right.csv, review.csv, report.html and
/// summary.json.
pub fn write_linkage(
    dir: &Path,
    prep: &Prepared,
    l: &Linkage,
    parquet: bool,
) -> Result<Vec<PathBuf>> {
    let mut out = OutputSet::for_run(dir, crate::folder::stamp_of(prep, "link"))?;
    let tune = read_tune(dir, prep);
    emit_linkage(&mut out, tune.as_deref(), prep, l, parquet)?;
    out.commit()
}

/// The files [`write_linkage`] writes, in memory (the report has no tune table: there is no
/// folder to find one in).
pub fn render_linkage(prep: &Prepared, l: &Linkage) -> Result<crate::folder::Rendered> {
    let mut out = OutputSet::in_memory(crate::folder::stamp_of(prep, "link"));
    emit_linkage(&mut out, None, prep, l, false)?;
    Ok(out.into_rendered())
}

/// The output of `match` in memory: links.csv (`left_id,right_id,weight`, the chosen pairs
/// in the order given).
pub fn render_matching(
    p: &crate::io::ScoredPairs,
    m: &crate::matching::Matching,
) -> Result<crate::folder::Rendered> {
    let stamp = crate::folder::Stamp {
        command: "match",
        fingerprint: None,
    };
    let mut out = OutputSet::in_memory(stamp);
    out.write("links.csv", |f| {
        writeln!(f, "left_id,right_id,weight")?;
        let mut wr = csv::Writer::from_writer(f);
        for &i in &m.chosen {
            wr.write_record([
                p.left_ids[p.left[i] as usize].as_str(),
                p.right_ids[p.right[i] as usize].as_str(),
                &p.weight[i].to_string(),
            ])
            .map_err(|e| std::io::Error::other(e.to_string()))?;
        }
        wr.flush()
    })?;
    Ok(out.into_rendered())
}

/// Writes one output table through `fill`; with `parquet`, also as Parquet beside it.
fn write_table<F>(out: &mut OutputSet, name: &str, parquet: bool, fill: F) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> std::io::Result<()>,
{
    if !parquet {
        return out.write(name, fill);
    }
    let mut bytes = Vec::new();
    fill(&mut bytes).map_err(|e| crate::Error::output(format!("cannot render {name}: {e}")))?;
    out.write(name, |w| w.write_all(&bytes))?;
    out.parquet_beside(name, &bytes)
}

/// The outputs of `link` into `out`: the four tables, report.html and summary.json.
fn emit_linkage(
    out: &mut OutputSet,
    tune: Option<&[html::TuneRow]>,
    prep: &Prepared,
    l: &Linkage,
    parquet: bool,
) -> Result<()> {
    let run_date = run_date()?;
    let names: Vec<&str> = prep.config.field.iter().map(|f| f.name.as_str()).collect();
    let outcomes = Outcomes::new(prep, l);

    write_table(out, "links.csv", parquet, |w| {
        let mut c = csv_writer(w);
        let mut head = vec!["left_id", "right_id", "weight", "confidence"];
        head.extend(names.iter().copied());
        c.write_record(&head).map_err(to_io)?;
        for &i in &l.links {
            let mut row = vec![
                prep.records.left_ids[prep.cands.left[i] as usize].to_string(),
                prep.records.right_ids[prep.cands.right[i] as usize].to_string(),
                num(prep.weight[i]),
                confidence_csv(l.confidence.p[i], l.cutoff),
            ];
            row.extend((0..names.len()).map(|k| level_text(prep, i, k)));
            c.write_record(&row).map_err(to_io)?;
        }
        c.flush()
    })?;

    let unlinked = |out: &mut OutputSet, name: &str, left: bool| {
        write_table(out, name, parquet, |w| {
            let mut c = csv_writer(w);
            c.write_record(["id", "reason", "best_candidate", "best_confidence"])
                .map_err(to_io)?;
            let (ids, reasons, best) = if left {
                (&prep.records.left_ids, &outcomes.left, &outcomes.best_left)
            } else {
                (
                    &prep.records.right_ids,
                    &outcomes.right,
                    &outcomes.best_right,
                )
            };
            for r in 0..ids.len() {
                let Some(reason) = reasons[r] else {
                    continue;
                };
                let (other, conf) = match best[r] {
                    Some(i) => {
                        let other = if left {
                            &prep.records.right_ids[prep.cands.right[i] as usize]
                        } else {
                            &prep.records.left_ids[prep.cands.left[i] as usize]
                        };
                        (
                            other.to_string(),
                            confidence_csv(l.confidence.p[i], l.cutoff),
                        )
                    }
                    None => (String::new(), String::new()),
                };
                c.write_record([&ids[r], reason.as_str(), &other, &conf])
                    .map_err(to_io)?;
            }
            c.flush()
        })
    };
    unlinked(out, "unlinked_left.csv", true)?;
    unlinked(out, "unlinked_right.csv", false)?;

    let review = review_pairs(prep, l);
    let status = |i: usize| outcomes.status(i).as_str().to_string();
    write_table(out, "review.csv", parquet, |w| {
        pair_rows(w, prep, l, "status", review.iter().map(|&i| (i, status(i))))
    })?;
    let audit = prep.config.link.audit_sample.map(|n| {
        let s = crate::review::draw_audit(
            &l.links,
            &l.confidence.p,
            l.cutoff,
            n,
            prep.config.assess.seed,
        );
        (n, s)
    });
    if let Some((_, s)) = &audit {
        write_table(out, crate::review::AUDIT_FILE, parquet, |w| {
            pair_rows(
                w,
                prep,
                l,
                "band",
                s.pairs.iter().map(|&(i, h)| (i, h.to_string())),
            )
        })?;
    }
    // The page's "other candidates": for each record of a pair to review or audit, its
    // likeliest candidate pairs.
    let mut shown: Vec<usize> = review.clone();
    if let Some((_, s)) = &audit {
        shown.extend(s.pairs.iter().map(|p| p.0));
    }
    let context = context_pairs(prep, l, &shown);
    write_table(out, crate::review::CONTEXT_FILE, parquet, |w| {
        pair_rows(
            w,
            prep,
            l,
            "status",
            context.iter().map(|&i| (i, status(i))),
        )
    })?;

    let steps = next_steps(prep, &l.assessment, Some((l, &outcomes, review.len())));
    let page = html::page(&html::Context {
        prep,
        linkage: l,
        review: &review,
        tune,
        outcomes: Some(&outcomes),
        next_steps: &steps,
        run_date: &run_date,
    });
    out.write("report.html", |w| w.write_all(page.as_bytes()))?;
    let extra = SummaryExtra {
        run_date: &run_date,
        audit: audit.map(|(n, s)| AuditSummary {
            sample: n,
            seed: prep.config.assess.seed,
            bands: s.bands,
        }),
        outcomes: Some(&outcomes),
        next_steps: steps,
        stopped: false,
    };
    write_summary(out, &summary(prep, &l.assessment, Some(l), "link", extra))
}

/// For a run that `stop_if_infeasible` stopped: writes only summary.json and report.html,
/// which say that no links were written because the verdict is infeasible, and why.
pub fn write_stopped(dir: &Path, prep: &Prepared, l: &Linkage) -> Result<Vec<PathBuf>> {
    let mut out = OutputSet::for_run(dir, crate::folder::stamp_of(prep, "link"))?;
    let tune = read_tune(dir, prep);
    fill_stopped(&mut out, prep, l, tune.as_deref())?;
    out.commit()
}

/// The outputs of a run stopped as infeasible, in memory (no tune table: there is no folder
/// to read one from); [`write_stopped`] writes the same into a folder.
pub fn render_stopped(prep: &Prepared, l: &Linkage) -> Result<crate::folder::Rendered> {
    let mut out = OutputSet::in_memory(crate::folder::stamp_of(prep, "link"));
    fill_stopped(&mut out, prep, l, None)?;
    Ok(out.into_rendered())
}

fn fill_stopped(
    out: &mut OutputSet,
    prep: &Prepared,
    l: &Linkage,
    tune: Option<&[html::TuneRow]>,
) -> Result<()> {
    let run_date = run_date()?;
    let mut steps = vec![STOPPED_STEP.to_string()];
    steps.extend(next_steps(prep, &l.assessment, None));
    let page = html::page(&html::Context {
        prep,
        linkage: l,
        review: &[],
        tune,
        outcomes: None,
        next_steps: &steps,
        run_date: &run_date,
    });
    out.write("report.html", |w| w.write_all(page.as_bytes()))?;
    let extra = SummaryExtra {
        run_date: &run_date,
        audit: None,
        outcomes: None,
        next_steps: steps,
        stopped: true,
    };
    write_summary(out, &summary(prep, &l.assessment, None, "link", extra))
}

/// The first step of a run stopped by `stop_if_infeasible`.
const STOPPED_STEP: &str = "No links were written: the verdict is infeasible and `stop_if_infeasible` is set. Improve the fields or the blocking as the verdict's reasons say and run again; without `--stop-if-infeasible` the links would be written with their confidences, but they could not be relied on.";

/// A confidence in the CSV files: six decimals, never on the wrong side of the cut-off.
fn confidence_csv(p: f64, cut: f64) -> String {
    crate::numbers::confidence(p, cut, 6)
}

/// Writes `dovetail audit`'s audit.json into a run folder and puts the audit into its
/// report.html (between [`html::AUDIT_MARK`] and [`html::AUDIT_END`]), both landing at once
/// with the folder's record.
pub fn write_audit(dir: &Path, a: &crate::review::AuditResult) -> Result<Vec<PathBuf>> {
    let page_path = dir.join("report.html");
    let page = std::fs::read_to_string(&page_path)
        .map_err(|e| crate::Error::input(format!("cannot read it: {e}")).with_file(&page_path))?;
    let page = match (page.find(html::AUDIT_MARK), page.find(html::AUDIT_END)) {
        (Some(s), Some(e)) if s < e => format!(
            "{}{}{}",
            &page[..s + html::AUDIT_MARK.len()],
            html::audit_section(a),
            &page[e..]
        ),
        _ => {
            return Err(crate::Error::input(
                "this report.html has no place for an audit (written by an older version?); run `dovetail link` again",
            )
            .with_file(&page_path))
        }
    };
    let stamp = crate::folder::Stamp {
        command: "audit",
        fingerprint: None,
    };
    let mut out = OutputSet::for_run(dir, stamp)?;
    let json = serde_json::to_string_pretty(a).map_err(|e| crate::Error::output(e.to_string()))?;
    out.write(crate::review::AUDIT_RESULT_FILE, |w| writeln!(w, "{json}"))?;
    out.write("report.html", |w| w.write_all(page.as_bytes()))?;
    out.commit()
}

/// Candidate pairs kept per record in review_context.csv (loose blocking gives a record
/// hundreds; a clerk looks at the first few).
const CONTEXT_PER_RECORD: usize = 6;

/// For every record of the pairs `shown`, its [`CONTEXT_PER_RECORD`] likeliest candidate
/// pairs (by confidence, then weight, then input order), ascending.
fn context_pairs(prep: &Prepared, l: &Linkage, shown: &[usize]) -> Vec<usize> {
    use std::collections::HashMap;
    let mut by_left: HashMap<u32, Vec<usize>> = shown
        .iter()
        .map(|&i| (prep.cands.left[i], Vec::new()))
        .collect();
    let mut by_right: HashMap<u32, Vec<usize>> = shown
        .iter()
        .map(|&i| (prep.cands.right[i], Vec::new()))
        .collect();
    for i in 0..prep.cands.len() {
        if let Some(v) = by_left.get_mut(&prep.cands.left[i]) {
            v.push(i);
        }
        if let Some(v) = by_right.get_mut(&prep.cands.right[i]) {
            v.push(i);
        }
    }
    let mut out: Vec<usize> = Vec::new();
    for v in by_left.values_mut().chain(by_right.values_mut()) {
        v.sort_by(|&x, &y| {
            l.confidence.p[y]
                .total_cmp(&l.confidence.p[x])
                .then_with(|| prep.weight[y].total_cmp(&prep.weight[x]))
                .then(x.cmp(&y))
        });
        out.extend(v.iter().take(CONTEXT_PER_RECORD));
    }
    out.sort_unstable();
    out.dedup();
    out
}

/// Writes candidate pairs as review.csv does: ids, `third` (the pair's status or audit
/// band), confidence, weight, the passes, then per field its level and both values.
fn pair_rows(
    w: &mut dyn Write,
    prep: &Prepared,
    l: &Linkage,
    third: &str,
    rows: impl Iterator<Item = (usize, String)>,
) -> std::io::Result<()> {
    let mut c = csv_writer(w);
    let mut head: Vec<String> = [
        "left_id",
        "right_id",
        third,
        "confidence",
        "weight",
        "found_by",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    for f in &prep.config.field {
        head.push(format!("{}_level", f.name));
        head.push(format!("{}_left", f.name));
        head.push(format!("{}_right", f.name));
    }
    c.write_record(&head).map_err(to_io)?;
    for (i, tag) in rows {
        let (a, b) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
        let mut row = vec![
            prep.records.left_ids[a].to_string(),
            prep.records.right_ids[b].to_string(),
            tag,
            confidence_csv(l.confidence.p[i], l.cutoff),
            num(prep.weight[i]),
            found_by(prep, i),
        ];
        for (k, f) in prep.config.field.iter().enumerate() {
            row.push(level_text(prep, i, k));
            row.push(prep.left.value(f.left_column(), a));
            row.push(prep.right.value(f.right_column(), b));
        }
        c.write_record(&row).map_err(to_io)?;
    }
    c.flush()
}

/// The pairs in the review band, most useful first: those whose confidence is closest to
/// even odds, where a clerk's decision changes the most; then by weight, then by input order.
fn review_pairs(prep: &Prepared, l: &Linkage) -> Vec<usize> {
    let [lo, hi] = prep.config.link.review_band;
    let mut review: Vec<usize> = (0..prep.cands.len())
        .filter(|&i| (lo..=hi).contains(&l.confidence.p[i]))
        .collect();
    review.sort_by(|&x, &y| {
        let dx = (l.confidence.p[x] - 0.5).abs();
        let dy = (l.confidence.p[y] - 0.5).abs();
        dx.total_cmp(&dy)
            .then_with(|| prep.weight[y].total_cmp(&prep.weight[x]))
            .then(x.cmp(&y))
    });
    review
}

/// The feasibility verdict and per-field table as plain text for the terminal.
pub fn assessment_text(prep: &Prepared, a: &Assessment) -> String {
    use crate::numbers::{nats, percent, ratio};
    let mut t = String::new();
    t.push_str(&format!(
        "records: {} left, {} right; candidate pairs: {}; estimated true pairs: {:.0}\n",
        prep.records.n_left(),
        prep.records.n_right(),
        prep.cands.len(),
        a.estimated_true_pairs
    ));
    t.push_str(&format!(
        "false candidates per record d = {}; needed separation (1/2) ln d = {} nats{}\n\n",
        ratio(a.mean_false_degree),
        nats(a.nats_needed),
        if a.mean_false_degree < 1.0 {
            " (below 0 since d < 1: any fields meet the threshold)"
        } else {
            ""
        }
    ));
    let width = prep
        .config
        .field
        .iter()
        .map(|f| f.name.len())
        .max()
        .unwrap_or(5)
        .max(5);
    t.push_str(&format!(
        "  {:<width$}  {:>9}  {:>8}  {:>8}  {:>8}\n",
        "field", "B_k", "nats", "miss L", "miss R"
    ));
    for (k, f) in a.fields.iter().enumerate() {
        let fv = &prep.records.fields[k];
        t.push_str(&format!(
            "  {:<width$}  {:>9}  {:>8}  {:>8}  {:>8}{}\n",
            f.name,
            ratio(f.bhattacharyya),
            nats(f.nats),
            percent(fv.left_missing_rate()),
            percent(fv.right_missing_rate()),
            if f.adds_nothing {
                "  (adds nothing)"
            } else {
                ""
            }
        ));
    }
    t.push_str(&format!(
        "  {:<width$}  {:>9}  {:>8}\n\n",
        "total",
        ratio(a.bhattacharyya),
        nats(a.nats_supplied)
    ));
    t.push_str(&format!(
        "margin sqrt(d)·B = {} (threshold 1)\n",
        ratio(a.margin)
    ));
    match &a.forecast {
        Some(f) => t.push_str(&format!(
            "forecast mismatch rate: {} (interval {} to {}, {} replicates{})\n",
            percent(f.error_rate),
            percent(f.interval[0]),
            percent(f.interval[1]),
            f.replicates,
            if f.subsampled { ", subsampled" } else { "" }
        )),
        None => t.push_str("forecast mismatch rate: not computed\n"),
    }
    t.push_str(&format!("verdict: {}\n", a.verdict.as_str().to_uppercase()));
    for r in &a.reasons {
        t.push_str(&format!("  - {r}\n"));
    }
    if a.verdict != Verdict::Feasible {
        t.push_str(
            "\nWARNING: these fields may not support reliable one-to-one linkage at this degree. \
             Links written now will include a noticeable share of wrong ones. To improve: add a \
             distinguishing field, tighten blocking so each record has fewer false candidates, or \
             clean the data (fewer missing or mistyped values).\n",
        );
    }
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rfc3339_dates() {
        // Epoch 0, a leap day and a well-known timestamp (date -u -d @SECONDS, GNU coreutils).
        assert_eq!(rfc3339(0), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(rfc3339(1_700_000_000), "2023-11-14T22:13:20Z");
        assert_eq!(rfc3339(4_102_444_799), "2099-12-31T23:59:59Z");
    }
}
