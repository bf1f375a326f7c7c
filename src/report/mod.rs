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
    /// (1/2) ln d.
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
    /// Warnings, in plain words.
    pub warnings: Vec<String>,
    /// How the run was made.
    pub manifest: Manifest,
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

/// The run manifest: enough to repeat the run and check its inputs. `threads` and `seconds`
/// describe this run only; every other output byte is the same for any thread count.
#[derive(Debug, Serialize)]
pub struct Manifest {
    /// Tool version.
    pub version: &'static str,
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

fn manifest(prep: &Prepared) -> Manifest {
    let file = |t: &crate::io::Table| InputFile {
        path: t.path.display().to_string(),
        bytes: t.bytes,
        rows: t.len(),
        sha256: t.sha256.clone(),
    };
    Manifest {
        version: VERSION,
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

fn summary(
    prep: &Prepared,
    a: &Assessment,
    link: Option<&Linkage>,
    command: &'static str,
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
        warnings: prep.warnings.clone(),
        manifest: manifest(prep),
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
    let mut out = OutputSet::for_run(dir, crate::folder::stamp_of(prep, "assess"))?;
    write_summary(&mut out, &summary(prep, a, None, "assess"))?;
    out.commit()
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

/// Why a record stays unlinked.
fn unlinked_reason(has_candidate: bool, in_optimum: bool) -> &'static str {
    match (has_candidate, in_optimum) {
        (false, _) => "no candidate pair",
        (true, true) => "below the confidence cut-off",
        (true, false) => "not chosen by the one-to-one optimum",
    }
}

/// Writes links.csv, unlinked_left.csv, unlinked_right.csv, review.csv and summary.json.
pub fn write_linkage(dir: &Path, prep: &Prepared, l: &Linkage) -> Result<Vec<PathBuf>> {
    let n_pairs = prep.cands.len();
    let names: Vec<&str> = prep.config.field.iter().map(|f| f.name.as_str()).collect();
    let mut out = OutputSet::for_run(dir, crate::folder::stamp_of(prep, "link"))?;

    out.write("links.csv", |w| {
        let mut c = csv_writer(w);
        let mut head = vec!["left_id", "right_id", "weight", "confidence"];
        head.extend(names.iter().copied());
        c.write_record(&head).map_err(to_io)?;
        for &i in &l.links {
            let mut row = vec![
                prep.records.left_ids[prep.cands.left[i] as usize].clone(),
                prep.records.right_ids[prep.cands.right[i] as usize].clone(),
                num(prep.weight[i]),
                num(l.confidence.p[i]),
            ];
            row.extend((0..names.len()).map(|k| level_text(prep, i, k)));
            c.write_record(&row).map_err(to_io)?;
        }
        c.flush()
    })?;

    // Best candidate of every record, and membership of the optimum and of the links.
    let nl = prep.records.n_left();
    let nr = prep.records.n_right();
    let mut best_l: Vec<Option<usize>> = vec![None; nl];
    let mut best_r: Vec<Option<usize>> = vec![None; nr];
    let better = |i: usize, cur: Option<usize>| match cur {
        None => true,
        Some(j) => l.confidence.p[i] > l.confidence.p[j],
    };
    for i in 0..n_pairs {
        let (a, b) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
        if better(i, best_l[a]) {
            best_l[a] = Some(i);
        }
        if better(i, best_r[b]) {
            best_r[b] = Some(i);
        }
    }
    let mut linked_l = vec![false; nl];
    let mut linked_r = vec![false; nr];
    let mut opt_l = vec![false; nl];
    let mut opt_r = vec![false; nr];
    let mut is_link = vec![false; n_pairs];
    for &i in &l.links {
        linked_l[prep.cands.left[i] as usize] = true;
        linked_r[prep.cands.right[i] as usize] = true;
        is_link[i] = true;
    }
    for &i in &l.matching.chosen {
        opt_l[prep.cands.left[i] as usize] = true;
        opt_r[prep.cands.right[i] as usize] = true;
    }
    let unlinked = |out: &mut OutputSet, name: &str, left: bool| {
        out.write(name, |w| {
            let mut c = csv_writer(w);
            c.write_record(["id", "reason", "best_candidate", "best_confidence"])
                .map_err(to_io)?;
            let (ids, linked, opt, best) = if left {
                (&prep.records.left_ids, &linked_l, &opt_l, &best_l)
            } else {
                (&prep.records.right_ids, &linked_r, &opt_r, &best_r)
            };
            for r in 0..ids.len() {
                if linked[r] {
                    continue;
                }
                let (other, conf) = match best[r] {
                    Some(i) => {
                        let other = if left {
                            &prep.records.right_ids[prep.cands.right[i] as usize]
                        } else {
                            &prep.records.left_ids[prep.cands.left[i] as usize]
                        };
                        (other.clone(), num(l.confidence.p[i]))
                    }
                    None => (String::new(), String::new()),
                };
                c.write_record([
                    ids[r].as_str(),
                    unlinked_reason(best[r].is_some(), opt[r]),
                    &other,
                    &conf,
                ])
                .map_err(to_io)?;
            }
            c.flush()
        })
    };
    unlinked(&mut out, "unlinked_left.csv", true)?;
    unlinked(&mut out, "unlinked_right.csv", false)?;

    let [lo, hi] = prep.config.link.review_band;
    let mut review: Vec<usize> = (0..n_pairs)
        .filter(|&i| (lo..=hi).contains(&l.confidence.p[i]))
        .collect();
    // Most useful first: the pairs whose confidence is closest to even odds, where a clerk's
    // decision changes the most; then by weight, then by input order.
    review.sort_by(|&x, &y| {
        let dx = (l.confidence.p[x] - 0.5).abs();
        let dy = (l.confidence.p[y] - 0.5).abs();
        dx.total_cmp(&dy)
            .then_with(|| prep.weight[y].total_cmp(&prep.weight[x]))
            .then(x.cmp(&y))
    });
    out.write("review.csv", |w| {
        let mut c = csv_writer(w);
        let mut head: Vec<String> = [
            "left_id",
            "right_id",
            "status",
            "confidence",
            "weight",
            "found_by",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        for n in &names {
            head.push(format!("{n}_level"));
            head.push(format!("{n}_left"));
            head.push(format!("{n}_right"));
        }
        c.write_record(&head).map_err(to_io)?;
        for &i in &review {
            let (a, b) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
            let status = if is_link[i] {
                "linked"
            } else if l.matching.chosen.binary_search(&i).is_ok() {
                "below cut-off"
            } else {
                "runner-up"
            };
            let mut row = vec![
                prep.records.left_ids[a].clone(),
                prep.records.right_ids[b].clone(),
                status.to_string(),
                num(l.confidence.p[i]),
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
    })?;

    let tune = read_tune(dir, prep);
    let page = html::page(prep, l, &review, tune.as_deref());
    out.write("report.html", |w| w.write_all(page.as_bytes()))?;
    write_summary(&mut out, &summary(prep, &l.assessment, Some(l), "link"))?;
    out.commit()
}

/// The feasibility verdict and per-field table as plain text for the terminal.
pub fn assessment_text(prep: &Prepared, a: &Assessment) -> String {
    let mut t = String::new();
    t.push_str(&format!(
        "records: {} left, {} right; candidate pairs: {}; estimated true pairs: {:.0}\n",
        prep.records.n_left(),
        prep.records.n_right(),
        prep.cands.len(),
        a.estimated_true_pairs
    ));
    t.push_str(&format!(
        "false candidates per record d = {:.3}; needed separation (1/2) ln d = {:.2} nats\n\n",
        a.mean_false_degree, a.nats_needed
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
            "  {:<width$}  {:>9.4}  {:>8.2}  {:>7.1}%  {:>7.1}%{}\n",
            f.name,
            f.bhattacharyya,
            f.nats,
            fv.left_missing_rate() * 100.0,
            fv.right_missing_rate() * 100.0,
            if f.adds_nothing {
                "  (adds nothing)"
            } else {
                ""
            }
        ));
    }
    t.push_str(&format!(
        "  {:<width$}  {:>9.3e}  {:>8.2}\n\n",
        "total", a.bhattacharyya, a.nats_supplied
    ));
    t.push_str(&format!(
        "margin sqrt(d)·B = {:.4} (threshold 1)\n",
        a.margin
    ));
    match &a.forecast {
        Some(f) => t.push_str(&format!(
            "forecast mismatch rate: {:.2}% (interval {:.2}% to {:.2}%, {} replicates{})\n",
            f.error_rate * 100.0,
            f.interval[0] * 100.0,
            f.interval[1] * 100.0,
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
