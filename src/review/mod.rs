//! Clerical review: the decisions file, the audit sample and the precision it measures.
//!
//! In: a finished run's candidate pairs, links and confidences (for the audit sample), and
//! the clerks' decisions (`decisions.csv`: `left_id,right_id,decision,reviewer,decided_at`,
//! one line per keystroke, appended by [`server`]). Out: the decisions in force (the last
//! line per pair; "withdrawn" takes a decision back), checked for conflicts; the candidate
//! pairs they name ([`Applied`]), which `pipeline::link` forces and `fit` uses as labelled
//! pairs; a seeded audit sample of the links stratified by confidence band; and the measured
//! precision of the links with a Wilson interval from the stratified estimator.
//!
//! Never reads the tables' values: pairs are named by their ids only. The server, in
//! [`server`], shows values to the clerk but never writes them to its log.

pub mod server;

use crate::records::Records;
use crate::texts::Texts;
use crate::{Error, Result};
use std::collections::{BTreeMap, HashMap};
use std::io::Write;
use std::path::Path;

/// The decisions file's name in a run folder.
pub const DECISIONS_FILE: &str = "decisions.csv";
/// The audit sample's file name in a run folder.
pub const AUDIT_FILE: &str = "audit.csv";
/// The other candidates of every pair to review or audit (review.csv's columns).
pub const CONTEXT_FILE: &str = "review_context.csv";
/// The measured precision, written by `dovetail audit`.
pub const AUDIT_RESULT_FILE: &str = "audit.json";
/// The decisions file's header.
pub const DECISIONS_HEADER: &str = "left_id,right_id,decision,reviewer,decided_at";

/// A clerk's answer for one pair.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Decision {
    /// The two records are the same person.
    Same,
    /// The two records are different people.
    Different,
    /// The clerk cannot tell.
    Unsure,
    /// An earlier decision on the pair is taken back (the page's undo).
    Withdrawn,
}

impl Decision {
    /// The word in the decisions file.
    pub fn word(self) -> &'static str {
        match self {
            Decision::Same => "same",
            Decision::Different => "different",
            Decision::Unsure => "unsure",
            Decision::Withdrawn => "withdrawn",
        }
    }

    /// The decision a word names.
    pub fn parse(word: &str) -> Option<Decision> {
        Some(match word {
            "same" => Decision::Same,
            "different" => Decision::Different,
            "unsure" => Decision::Unsure,
            "withdrawn" => Decision::Withdrawn,
            _ => return None,
        })
    }
}

/// One line of the decisions file.
#[derive(Debug, Clone, PartialEq)]
pub struct DecisionLine {
    /// The left record's id.
    pub left_id: String,
    /// The right record's id.
    pub right_id: String,
    /// The decision.
    pub decision: Decision,
    /// Who decided.
    pub reviewer: String,
    /// When (RFC 3339, UTC).
    pub decided_at: String,
    /// The line in the file (1 is the header).
    pub line: u64,
}

/// Reads a decisions file (see [`read_decisions_from`]).
pub fn read_decisions(path: &Path) -> Result<Vec<DecisionLine>> {
    let bytes = std::fs::read(path).map_err(|e| {
        Error::input(format!("cannot read the decisions file: {e}")).with_file(path)
    })?;
    read_decisions_from(&bytes, path)
}

/// Parses a decisions file; `label` names it in errors. An empty file has no decisions.
pub fn read_decisions_from(bytes: &[u8], label: &Path) -> Result<Vec<DecisionLine>> {
    let at = |e: Error| e.with_file(label);
    if bytes.is_empty() {
        return Ok(Vec::new());
    }
    let data = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let mut rdr = csv::ReaderBuilder::new().flexible(true).from_reader(data);
    let header = rdr
        .headers()
        .map_err(|e| at(Error::input(format!("not a decisions file: {e}")).with_line(1)))?
        .clone();
    let col = |want: &str| {
        header.iter().position(|h| h.trim() == want).ok_or_else(|| {
            at(Error::input(format!(
                "column `{want}` not found in the header; a decisions file has {DECISIONS_HEADER}"
            ))
            .with_line(1))
        })
    };
    let (li, ri, di) = (col("left_id")?, col("right_id")?, col("decision")?);
    let (wi, ti) = (
        header.iter().position(|h| h.trim() == "reviewer"),
        header.iter().position(|h| h.trim() == "decided_at"),
    );
    let mut out = Vec::new();
    let mut record = csv::StringRecord::new();
    loop {
        let more = rdr.read_record(&mut record).map_err(|e| {
            let line = e.position().map_or(0, |p| p.line());
            at(Error::input(format!("not a decisions file: {e}")).with_line(line))
        })?;
        if !more {
            break;
        }
        let line = record.position().map_or(0, |p| p.line());
        let get = |i: Option<usize>| i.and_then(|i| record.get(i)).unwrap_or("").trim();
        let word = get(Some(di));
        let decision = Decision::parse(word).ok_or_else(|| {
            at(Error::input(format!(
                "`{word}` is not a decision: use same, different, unsure or withdrawn"
            ))
            .with_line(line)
            .with_column("decision"))
        })?;
        for (i, c) in [(li, "left_id"), (ri, "right_id")] {
            if get(Some(i)).is_empty() {
                return Err(at(Error::input("empty id").with_line(line).with_column(c)));
            }
        }
        out.push(DecisionLine {
            left_id: get(Some(li)).to_string(),
            right_id: get(Some(ri)).to_string(),
            decision,
            reviewer: get(wi).to_string(),
            decided_at: get(ti).to_string(),
            line,
        });
    }
    Ok(out)
}

/// The decisions in force: the last line of each pair, without the withdrawn ones, in the
/// order of (left id, right id).
pub fn in_force(lines: &[DecisionLine]) -> Vec<&DecisionLine> {
    let mut last: BTreeMap<(&str, &str), &DecisionLine> = BTreeMap::new();
    for d in lines {
        last.insert((d.left_id.as_str(), d.right_id.as_str()), d);
    }
    last.into_values()
        .filter(|d| d.decision != Decision::Withdrawn)
        .collect()
}

/// Checks that no record is the same person as two others among the decisions in force; the
/// error names both lines.
pub fn check_conflicts(force: &[&DecisionLine], label: &Path) -> Result<()> {
    for left in [true, false] {
        let mut seen: HashMap<&str, &DecisionLine> = HashMap::new();
        for d in force.iter().filter(|d| d.decision == Decision::Same) {
            let (id, other) = if left {
                (&d.left_id, &d.right_id)
            } else {
                (&d.right_id, &d.left_id)
            };
            if let Some(first) = seen.insert(id.as_str(), d) {
                let (side, other_side) = if left {
                    ("left", "right")
                } else {
                    ("right", "left")
                };
                let first_other = if left {
                    &first.right_id
                } else {
                    &first.left_id
                };
                let (a, b) = if first.line < d.line {
                    (first, *d)
                } else {
                    (*d, first)
                };
                let (oa, ob) = if std::ptr::eq(a, first) {
                    (first_other, other)
                } else {
                    (other, first_other)
                };
                return Err(Error::input(format!(
                    "conflicting decisions: {side} id `{id}` is marked the same person as {other_side} id `{oa}` (line {}) and as {other_side} id `{ob}` (line {}); withdraw or change one of them",
                    a.line, b.line
                ))
                .with_file(label)
                .with_line(b.line)
                .with_column(if left { "left_id" } else { "right_id" }));
            }
        }
    }
    Ok(())
}

/// The decisions in force as candidate pairs of a run.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Applied {
    /// Candidate pairs decided "same person", ascending.
    #[serde(skip)]
    pub same: Vec<usize>,
    /// Candidate pairs decided "different people", ascending.
    #[serde(skip)]
    pub different: Vec<usize>,
    /// Every "same person" pair as (left, right) record indices, candidates or not (the
    /// labelled pairs of the fit).
    #[serde(skip)]
    pub same_records: Vec<(u32, u32)>,
    /// "Same person" decisions applied.
    pub same_count: usize,
    /// "Different people" decisions applied.
    pub different_count: usize,
    /// "Can't tell" decisions (they change nothing).
    pub unsure_count: usize,
    /// Same or different decisions on pairs that are not candidates of this run (blocking
    /// changed since the review); they are not applied.
    pub not_candidates: usize,
    /// Lines in the file, withdrawn decisions and replaced ones included.
    pub lines: usize,
    /// Conflicts found (always 0: a conflict stops the run with an error).
    pub conflicts: usize,
}

/// Reads a decisions file and finds its pairs among a run's records and candidates; an id
/// not in its table or a conflict is an error naming the line.
pub fn apply(path: &Path, records: &Records, left: &[u32], right: &[u32]) -> Result<Applied> {
    let lines = read_decisions(path)?;
    apply_lines(&lines, path, records, left, right)
}

/// [`apply`] on parsed lines.
pub fn apply_lines(
    lines: &[DecisionLine],
    label: &Path,
    records: &Records,
    left: &[u32],
    right: &[u32],
) -> Result<Applied> {
    let force = in_force(lines);
    check_conflicts(&force, label)?;
    let (lmap, rmap) = (index(&records.left_ids), index(&records.right_ids));
    let mut wanted: HashMap<(u32, u32), Decision> = HashMap::new();
    let mut out = Applied {
        lines: lines.len(),
        ..Applied::default()
    };
    for d in &force {
        let find = |map: &HashMap<&str, u32>, id: &str, side: &str| {
            map.get(id).copied().ok_or_else(|| {
                Error::input(format!("id `{id}` is not in the {side} table"))
                    .with_file(label)
                    .with_line(d.line)
                    .with_column(format!("{side}_id"))
            })
        };
        let (l, r) = (
            find(&lmap, &d.left_id, "left")?,
            find(&rmap, &d.right_id, "right")?,
        );
        match d.decision {
            Decision::Unsure => out.unsure_count += 1,
            Decision::Same => {
                out.same_records.push((l, r));
                wanted.insert((l, r), Decision::Same);
            }
            Decision::Different => {
                wanted.insert((l, r), Decision::Different);
            }
            Decision::Withdrawn => {}
        }
    }
    let decided = wanted.len();
    for (i, (&l, &r)) in left.iter().zip(right).enumerate() {
        match wanted.get(&(l, r)) {
            Some(Decision::Same) => out.same.push(i),
            Some(Decision::Different) => out.different.push(i),
            _ => {}
        }
    }
    out.same_count = out.same.len();
    out.different_count = out.different.len();
    out.not_candidates = decided - out.same.len() - out.different.len();
    Ok(out)
}

fn index(ids: &Texts) -> HashMap<&str, u32> {
    ids.iter().enumerate().map(|(i, s)| (s, i as u32)).collect()
}

/// The log posterior odds given to decided pairs: a "same person" pair gets +FORCED, a
/// "different people" pair and every other pair of a record decided "same" get −FORCED.
/// Large enough that no sum of weights outweighs it, small enough that exp() stays finite.
pub const FORCED: f64 = 60.0;

/// Forces the decisions onto the pairs' log posterior odds (see [`FORCED`]).
pub fn force(theta: &mut [f64], left: &[u32], right: &[u32], applied: &Applied) {
    if applied.same.is_empty() && applied.different.is_empty() {
        return;
    }
    let taken_l: std::collections::HashSet<u32> = applied.same.iter().map(|&i| left[i]).collect();
    let taken_r: std::collections::HashSet<u32> = applied.same.iter().map(|&i| right[i]).collect();
    for i in 0..theta.len() {
        if taken_l.contains(&left[i]) || taken_r.contains(&right[i]) {
            theta[i] = -FORCED;
        }
    }
    for &i in &applied.different {
        theta[i] = -FORCED;
    }
    for &i in &applied.same {
        theta[i] = FORCED;
    }
}

/// Appends one decision to a decisions file, writing the header first when the file is new
/// or empty, and makes it durable (flushed and synced) before returning.
pub fn append_decision(file: &mut std::fs::File, d: &DecisionLine) -> std::io::Result<()> {
    let empty = file.metadata()?.len() == 0;
    let mut buf = Vec::new();
    if empty {
        buf.extend_from_slice(DECISIONS_HEADER.as_bytes());
        buf.push(b'\n');
    }
    {
        let mut w = csv::WriterBuilder::new()
            .has_headers(false)
            .from_writer(&mut buf);
        w.write_record([
            d.left_id.as_str(),
            d.right_id.as_str(),
            d.decision.word(),
            d.reviewer.as_str(),
            d.decided_at.as_str(),
        ])
        .map_err(|e| std::io::Error::other(e.to_string()))?;
        w.flush()?;
    }
    // One write of the whole line, so a line is either all there or not at all.
    file.write_all(&buf)?;
    file.flush()?;
    file.sync_data()
}

/// The lower edges of the audit's confidence bands (the first band starts at the cut-off).
pub const BAND_EDGES: [f64; 3] = [0.9, 0.99, 0.999];

/// One confidence band of the audit.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AuditBand {
    /// Lowest confidence in the band.
    pub from: f64,
    /// Highest confidence (exclusive, but 1 is in the last band).
    pub to: f64,
    /// Links in the band.
    pub links: usize,
    /// Links sampled from it.
    pub sampled: usize,
}

/// A seeded sample of a run's links, stratified by confidence band.
#[derive(Debug, Clone, PartialEq)]
pub struct AuditSample {
    /// The bands, from the lowest confidence.
    pub bands: Vec<AuditBand>,
    /// (pair index, band) in the order to show them (shuffled, so the order gives no hint of
    /// the band).
    pub pairs: Vec<(usize, usize)>,
}

/// The band of confidence `p` among bands starting at `from`.
fn band_of(starts: &[f64], p: f64) -> usize {
    starts.iter().rposition(|&s| p >= s).unwrap_or(0)
}

/// Draws `n` of `links` (pair indices, with their confidences `conf[i]`) for the audit: equal
/// allocation across the bands (the low bands hold the errors, so they get as many looks as
/// the crowded top band), capped at each band's size, what a small band cannot take going
/// to the others; within a band a seeded simple random sample without replacement.
pub fn draw_audit(links: &[usize], conf: &[f64], cutoff: f64, n: usize, seed: u64) -> AuditSample {
    let mut starts = vec![cutoff.clamp(0.0, 1.0)];
    starts.extend(BAND_EDGES.iter().copied().filter(|&e| e > cutoff));
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); starts.len()];
    for &i in links {
        members[band_of(&starts, conf[i])].push(i);
    }
    // Equal allocation with leftovers passed on: repeatedly share what is left equally
    // among the bands that still have unsampled links.
    let mut take = vec![0usize; starts.len()];
    let mut left = n.min(links.len());
    while left > 0 {
        let open: Vec<usize> = (0..starts.len())
            .filter(|&h| take[h] < members[h].len())
            .collect();
        let share = (left / open.len()).max(1);
        for &h in &open {
            let t = share.min(members[h].len() - take[h]).min(left);
            take[h] += t;
            left -= t;
            if left == 0 {
                break;
            }
        }
    }
    let mut rng = crate::rng::Rng::new(seed ^ 0xA0D1);
    let mut pairs = Vec::with_capacity(n);
    for (h, m) in members.iter_mut().enumerate() {
        m.sort_unstable();
        // A partial Fisher–Yates shuffle: the first take[h] are the sample.
        for j in 0..take[h] {
            let k = j + rng.below(m.len() - j);
            m.swap(j, k);
        }
        pairs.extend(m[..take[h]].iter().map(|&i| (i, h)));
    }
    rng.shuffle(&mut pairs);
    let bands = starts
        .iter()
        .enumerate()
        .map(|(h, &from)| AuditBand {
            from,
            to: starts.get(h + 1).copied().unwrap_or(1.0),
            links: members[h].len(),
            sampled: take[h],
        })
        .collect();
    AuditSample { bands, pairs }
}

/// The reviewed sample of one band.
#[derive(Debug, Clone, Copy, Default, PartialEq, serde::Serialize)]
pub struct BandTally {
    /// Links in the band (N_h).
    pub links: usize,
    /// Sampled links decided "same person".
    pub same: usize,
    /// Sampled links decided "different people".
    pub different: usize,
    /// Sampled links the clerk could not tell (left out of the estimate).
    pub unsure: usize,
    /// Sampled links not decided yet.
    pub undecided: usize,
}

/// The measured precision of the links.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Measured {
    /// The stratified estimate Σ W_h p̂_h over the bands with decisions.
    pub precision: f64,
    /// The 95% interval: Wilson's at Kish's effective sample size, widened by the full
    /// weight of any band without a decision (its precision could be anything).
    pub interval: [f64; 2],
    /// The estimate's standard error from the stratified variance.
    pub std_error: f64,
    /// Decided pairs (same or different).
    pub decided: usize,
    /// Kish's effective sample size of the stratified sample.
    pub effective_n: f64,
    /// Links in bands without any decision.
    pub links_unreviewed: usize,
}

/// The stratified estimate of precision from the reviewed sample of each band: p̂ = Σ W_h
/// p̂_h with W_h = N_h / N, its variance Σ W_h² p̂_h (1 − p̂_h) / n_h · (1 − n_h / N_h)
/// (Cochran, Sampling Techniques, 3rd ed. 1977, §5.3 with the finite-population
/// correction; from memory), and Wilson's interval at Kish's effective sample size for
/// unequal weights, n_eff = 1 / Σ W_h² (1 − f_h) / n_h (Kish, Survey Sampling, 1965, the
/// design effect of disproportionate allocation; from memory). The effective size is taken
/// from the weights, not from the estimated variance: the top band's sample is usually all
/// right, its estimated variance 0, and an effective size from it made intervals that held
/// the true precision only 83–89% of the time in our simulations (those from the weights:
/// 97–99.9%; see the tests). A single band is plain Wilson (with the finite-population
/// correction when the band is not a census); a census is exact. "Can't tell" answers are
/// left out. None when nothing is decided.
pub fn measure(bands: &[BandTally]) -> Option<Measured> {
    let total: usize = bands.iter().map(|b| b.links).sum();
    let decided: usize = bands.iter().map(|b| b.same + b.different).sum();
    if total == 0 || decided == 0 {
        return None;
    }
    let covered: f64 = bands
        .iter()
        .filter(|b| b.same + b.different > 0)
        .map(|b| b.links as f64)
        .sum();
    let (mut p, mut var, mut inv_n) = (0.0, 0.0, 0.0);
    let mut unreviewed = 0;
    for b in bands {
        let n_h = (b.same + b.different) as f64;
        if n_h == 0.0 {
            unreviewed += b.links;
            continue;
        }
        // Weights among the covered bands.
        let w = b.links as f64 / covered;
        let ph = b.same as f64 / n_h;
        let fpc = (1.0 - n_h / b.links as f64).max(0.0);
        p += w * ph;
        var += w * w * ph * (1.0 - ph) / n_h * fpc;
        inv_n += w * w * fpc / n_h;
    }
    let (effective_n, [lo, hi]) = if inv_n > 0.0 {
        let n = 1.0 / inv_n;
        (n, crate::score::wilson_share(p, n))
    } else {
        // Every covered band reviewed in full: known exactly.
        (f64::INFINITY, [p, p])
    };
    let w_cov = covered / total as f64;
    Some(Measured {
        precision: p,
        interval: [lo * w_cov, hi * w_cov + (1.0 - w_cov)],
        std_error: var.sqrt(),
        decided,
        effective_n,
        links_unreviewed: unreviewed,
    })
}

/// One band of a finished audit.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct AuditedBand {
    /// The band's confidences and sizes as drawn.
    #[serde(flatten)]
    pub band: AuditBand,
    /// What the clerks said about its sampled links.
    #[serde(flatten)]
    pub tally: BandTally,
}

/// The outcome of an audit (audit.json).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct AuditResult {
    /// Links in the run.
    pub links: usize,
    /// Links sampled.
    pub sampled: usize,
    /// The measured precision (None before any decision).
    pub measured: Option<Measured>,
    /// Sampled links the clerks could not tell.
    pub unsure: usize,
    /// Sampled links not decided yet.
    pub undecided: usize,
    /// The run's estimated precision and its interval.
    pub estimated_precision: Option<f64>,
    /// Its interval.
    pub estimated_interval: Option<[f64; 2]>,
    /// Whether the estimated precision lies inside the measured interval.
    pub estimate_inside: Option<bool>,
    /// Per band.
    pub bands: Vec<AuditedBand>,
    /// Who decided the sampled pairs.
    pub reviewers: Vec<String>,
}

/// Reads a run folder's audit sample (audit.csv, summary.json's `audit`) and decisions and
/// measures the precision of its links.
pub fn audit_folder(dir: &Path) -> Result<AuditResult> {
    let summary_path = dir.join("summary.json");
    let summary: serde_json::Value = std::fs::read(&summary_path)
        .map_err(|e| Error::input(format!("cannot read it: {e}")).with_file(&summary_path))
        .and_then(|b| {
            serde_json::from_slice(&b)
                .map_err(|e| Error::input(e.to_string()).with_file(&summary_path))
        })?;
    let bands: Vec<AuditBand> = serde_json::from_value(summary["audit"]["bands"].clone())
        .map_err(|_| {
            Error::input(
                "this run drew no audit sample: set `audit_sample = 200` under [link] and run `dovetail link` again",
            )
            .with_file(&summary_path)
        })?;
    let audit_path = dir.join(AUDIT_FILE);
    let bytes = std::fs::read(&audit_path)
        .map_err(|e| Error::input(format!("cannot read it: {e}")).with_file(&audit_path))?;
    let mut rdr = csv::Reader::from_reader(bytes.as_slice());
    let mut sample: Vec<(String, String, usize, u64)> = Vec::new();
    for rec in rdr.records() {
        let rec = rec.map_err(|e| Error::input(e.to_string()).with_file(&audit_path))?;
        let line = rec.position().map_or(0, |p| p.line());
        let band = rec
            .get(2)
            .and_then(|b| b.parse::<usize>().ok())
            .filter(|&b| b < bands.len())
            .ok_or_else(|| {
                Error::input("not a band of summary.json's audit")
                    .with_file(&audit_path)
                    .with_line(line)
                    .with_column("band")
            })?;
        sample.push((
            rec.get(0).unwrap_or("").to_string(),
            rec.get(1).unwrap_or("").to_string(),
            band,
            line,
        ));
    }
    let decisions_path = dir.join(DECISIONS_FILE);
    let lines = if decisions_path.exists() {
        read_decisions(&decisions_path)?
    } else {
        Vec::new()
    };
    let force = in_force(&lines);
    let by_pair: HashMap<(&str, &str), &DecisionLine> = force
        .iter()
        .map(|d| ((d.left_id.as_str(), d.right_id.as_str()), *d))
        .collect();
    let mut tallies: Vec<BandTally> = bands
        .iter()
        .map(|b| BandTally {
            links: b.links,
            ..BandTally::default()
        })
        .collect();
    let mut reviewers = std::collections::BTreeSet::new();
    for (l, r, h, _) in &sample {
        let t = &mut tallies[*h];
        match by_pair.get(&(l.as_str(), r.as_str())) {
            Some(d) => {
                reviewers.insert(d.reviewer.clone());
                match d.decision {
                    Decision::Same => t.same += 1,
                    Decision::Different => t.different += 1,
                    _ => t.unsure += 1,
                }
            }
            None => t.undecided += 1,
        }
    }
    let measured = measure(&tallies);
    let estimated_precision = summary["estimated_precision"].as_f64();
    let estimated_interval: Option<[f64; 2]> =
        serde_json::from_value(summary["estimated_precision_interval"].clone()).ok();
    let estimate_inside = measured
        .zip(estimated_precision)
        .map(|(m, e)| m.interval[0] <= e && e <= m.interval[1]);
    Ok(AuditResult {
        links: bands.iter().map(|b| b.links).sum(),
        sampled: sample.len(),
        measured,
        unsure: tallies.iter().map(|t| t.unsure).sum(),
        undecided: tallies.iter().map(|t| t.undecided).sum(),
        estimated_precision,
        estimated_interval,
        estimate_inside,
        bands: bands
            .into_iter()
            .zip(tallies)
            .map(|(band, tally)| AuditedBand { band, tally })
            .collect(),
        reviewers: reviewers.into_iter().collect(),
    })
}

impl AuditResult {
    /// The outcome in plain words, one sentence per line.
    pub fn text(&self) -> String {
        let mut t = format!(
            "Audit of {} of the run's {} links: {} decided, {} can't tell, {} not decided yet.\n",
            self.sampled,
            self.links,
            self.measured.map_or(0, |m| m.decided),
            self.unsure,
            self.undecided
        );
        let Some(m) = self.measured else {
            t.push_str("No pair of the sample is decided yet: run `dovetail review --audit` on this folder first.\n");
            return t;
        };
        t.push_str(&format!(
            "Measured precision {:.4} (95% interval {:.4} to {:.4}; stratified by confidence band, Wilson interval at an effective sample size of {:.0}).\n",
            m.precision, m.interval[0], m.interval[1], m.effective_n
        ));
        if m.links_unreviewed > 0 {
            t.push_str(&format!(
                "{} links sit in bands with no decision yet; the interval counts them as anything from all wrong to all right.\n",
                m.links_unreviewed
            ));
        }
        if let Some(e) = self.estimated_precision {
            t.push_str(&format!("The run estimated {e:.4}.\n"));
            t.push_str(if self.estimate_inside == Some(true) {
                "The estimate lies inside the measured interval: the clerks' judgement does not contradict the run's own figure.\n"
            } else if e > m.interval[1] {
                "The estimate lies ABOVE the measured interval: the run overstates how many of its links are right. Trust the measured figure, and review more links before using them.\n"
            } else {
                "The estimate lies below the measured interval: the run understates how many of its links are right.\n"
            });
        }
        t
    }
}

#[cfg(test)]
mod tests;
