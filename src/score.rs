//! Scoring a finished run against pairs known to be true.
//!
//! In: the links of a run (links.csv: `left_id`, `right_id`, `confidence`) and a file of known
//! true pairs (`left_id,right_id`: a clerk's gold-standard subset, or synth's truth.csv). Out:
//! a [`Score`]: precision, recall and F1 of the links, and a calibration table of the links'
//! confidence against the share of them that is true, with a Wilson interval per band. This
//! module only reads; `dovetail score` prints the result and writes it as JSON.

use crate::error::{Error, Result};
use serde::Serialize;
use std::collections::{HashMap, HashSet};
use std::path::Path;

/// The upper bounds of the calibration table's confidence bands (the last one closed at 1):
/// finer near 1, where most links lie.
pub const BAND_TOPS: [f64; 8] = [0.5, 0.7, 0.8, 0.9, 0.95, 0.99, 0.999, 1.0];

/// The 97.5% quantile of the standard normal law, for 95% intervals.
const Z95: f64 = 1.959_963_984_540_054;

/// One link read from links.csv.
#[derive(Debug, Clone, PartialEq)]
pub struct Link {
    /// Left record id.
    pub left: String,
    /// Right record id.
    pub right: String,
    /// The run's one-to-one confidence.
    pub confidence: f64,
}

/// One confidence band of the calibration table.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Band {
    /// Lowest confidence in the band (inclusive).
    pub low: f64,
    /// Highest confidence in the band (exclusive, except 1 for the last band).
    pub high: f64,
    /// Links scored in the band.
    pub links: usize,
    /// Their mean confidence: the share the run expects to be true.
    pub mean_confidence: f64,
    /// The share of them that is among the known pairs.
    pub share_true: f64,
    /// Wilson 95% interval of `share_true`.
    pub interval: [f64; 2],
}

/// A run's links scored against known pairs.
#[derive(Debug, Clone, Serialize)]
pub struct Score {
    /// Known true pairs read.
    pub known_pairs: usize,
    /// Links read.
    pub links: usize,
    /// Links scored: all of them, or with `partial` those touching a record of a known pair.
    pub links_scored: usize,
    /// Scored links that are known pairs.
    pub true_links: usize,
    /// True links over links scored (None without links scored).
    pub precision: Option<f64>,
    /// True links over known pairs (None without known pairs).
    pub recall: Option<f64>,
    /// The harmonic mean of precision and recall.
    pub f1: Option<f64>,
    /// The known pairs cover only the records they name.
    pub partial: bool,
    /// Confidence against the share true, bands with at least one link.
    pub calibration: Vec<Band>,
    /// Sum of the scored links' confidences: the true links the run expects among them.
    pub expected_true_links: f64,
}

/// Wilson's score interval for `k` successes in `n` trials at 95% (Wilson 1927).
pub fn wilson(k: usize, n: usize) -> [f64; 2] {
    if n == 0 {
        return [0.0, 1.0];
    }
    wilson_share(k as f64 / n as f64, n as f64)
}

/// Wilson's score interval at 95% for an observed share `p` over a (possibly effective,
/// so not whole) sample size `n`; [0, 1] when `n` is not positive.
pub fn wilson_share(p: f64, n: f64) -> [f64; 2] {
    if n.is_nan() || n <= 0.0 {
        return [0.0, 1.0];
    }
    let z2 = Z95 * Z95;
    let den = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / den;
    let half = Z95 * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt() / den;
    [(centre - half).max(0.0), (centre + half).min(1.0)]
}

/// Scores `links` against `known` true pairs. With `partial`, the known pairs are taken to
/// cover only the records they name: a link counts only when its left or its right record
/// appears in a known pair (a link between two records the known pairs never name can be
/// neither confirmed nor refuted).
pub fn score(links: &[Link], known: &[(String, String)], partial: bool) -> Score {
    let truth: HashSet<(&str, &str)> = known
        .iter()
        .map(|(l, r)| (l.as_str(), r.as_str()))
        .collect();
    let named_left: HashSet<&str> = known.iter().map(|(l, _)| l.as_str()).collect();
    let named_right: HashSet<&str> = known.iter().map(|(_, r)| r.as_str()).collect();
    let scored: Vec<(&Link, bool)> = links
        .iter()
        .filter(|l| {
            !partial
                || named_left.contains(l.left.as_str())
                || named_right.contains(l.right.as_str())
        })
        .map(|l| (l, truth.contains(&(l.left.as_str(), l.right.as_str()))))
        .collect();
    let true_links = scored.iter().filter(|(_, t)| *t).count();
    let precision = (!scored.is_empty()).then(|| true_links as f64 / scored.len() as f64);
    let recall = (!truth.is_empty()).then(|| true_links as f64 / truth.len() as f64);
    let f1 = match (precision, recall) {
        (Some(p), Some(r)) if p + r > 0.0 => Some(2.0 * p * r / (p + r)),
        (Some(_), Some(_)) => Some(0.0),
        _ => None,
    };
    Score {
        known_pairs: truth.len(),
        links: links.len(),
        links_scored: scored.len(),
        true_links,
        precision,
        recall,
        f1,
        partial,
        calibration: calibration(&scored),
        expected_true_links: scored.iter().map(|(l, _)| l.confidence).sum(),
    }
}

fn calibration(scored: &[(&Link, bool)]) -> Vec<Band> {
    let mut out = Vec::new();
    let mut low = 0.0;
    for (b, &high) in BAND_TOPS.iter().enumerate() {
        let last = b + 1 == BAND_TOPS.len();
        let inside: Vec<&(&Link, bool)> = scored
            .iter()
            .filter(|(l, _)| l.confidence >= low && (l.confidence < high || last))
            .collect();
        if !inside.is_empty() {
            let n = inside.len();
            let k = inside.iter().filter(|(_, t)| *t).count();
            out.push(Band {
                low,
                high,
                links: n,
                mean_confidence: inside.iter().map(|(l, _)| l.confidence).sum::<f64>() / n as f64,
                share_true: k as f64 / n as f64,
                interval: wilson(k, n),
            });
        }
        low = high;
    }
    out
}

/// Reads a run's links.csv from its bytes (the `left_id`, `right_id` and `confidence`
/// columns); `path` names it in errors.
pub fn read_links_from(bytes: &[u8], path: &Path) -> Result<Vec<Link>> {
    let data = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let mut rdr = csv::ReaderBuilder::new().flexible(true).from_reader(data);
    let at = |e: Error| e.with_file(path);
    let header = rdr
        .headers()
        .map_err(|e| at(Error::input(format!("cannot read the header: {e}")).with_line(1)))?
        .clone();
    let col = |want: &str| {
        header.iter().position(|h| h.trim() == want).ok_or_else(|| {
            at(Error::input(format!(
                "column `{want}` not found in the header; is this a links.csv from `dovetail link`?"
            ))
            .with_line(1))
        })
    };
    let (li, ri, ci) = (col("left_id")?, col("right_id")?, col("confidence")?);
    let mut out = Vec::new();
    for (row, record) in rdr.records().enumerate() {
        let line = row as u64 + 2;
        let record = record.map_err(|e| at(Error::input(format!("{e}")).with_line(line)))?;
        let get = |i: usize| record.get(i).unwrap_or("").trim();
        let confidence = get(ci)
            .parse::<f64>()
            .ok()
            .filter(|c| (0.0..=1.0).contains(c))
            .ok_or_else(|| {
                at(Error::input("not a confidence between 0 and 1")
                    .with_line(line)
                    .with_column("confidence"))
            })?;
        out.push(Link {
            left: get(li).to_string(),
            right: get(ri).to_string(),
            confidence,
        });
    }
    Ok(out)
}

/// Reads known true pairs (`left_id,right_id`); a pair given twice is an error naming both
/// lines.
pub fn read_known(path: &Path) -> Result<Vec<(String, String)>> {
    let rows = crate::io::read_id_pairs(path)?;
    let mut first: HashMap<(&str, &str), u64> = HashMap::new();
    for (l, r, line) in &rows {
        if let Some(was) = first.insert((l.as_str(), r.as_str()), *line) {
            return Err(
                Error::input(format!("known pair given twice (first on line {was})"))
                    .with_file(path)
                    .with_line(*line),
            );
        }
    }
    Ok(rows.into_iter().map(|(l, r, _)| (l, r)).collect())
}

/// The score as a terminal table: the headline figures, then the calibration bands.
pub fn text(s: &Score) -> String {
    let f = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{v:.4}"));
    let mut out = format!(
        "links scored: {} of {}{}; known pairs: {}; true links: {}\nprecision {}   recall {}   F1 {}\nthe links' confidences add up to {:.1} expected true links; {} are known true\n\nconfidence band   links   mean confidence   share true   95% interval\n",
        s.links_scored,
        s.links,
        if s.partial {
            " (only links touching a record the known pairs name)"
        } else {
            ""
        },
        s.known_pairs,
        s.true_links,
        f(s.precision),
        f(s.recall),
        f(s.f1),
        s.expected_true_links,
        s.true_links
    );
    for b in &s.calibration {
        out.push_str(&format!(
            "[{:.3}, {:.3}{}  {:>6}   {:>15.4}   {:>10.4}   [{:.4}, {:.4}]\n",
            b.low,
            b.high,
            if b.high >= 1.0 { "]" } else { ")" },
            b.links,
            b.mean_confidence,
            b.share_true,
            b.interval[0],
            b.interval[1]
        ));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn link(l: &str, r: &str, c: f64) -> Link {
        Link {
            left: l.into(),
            right: r.into(),
            confidence: c,
        }
    }

    fn pairs(p: &[(&str, &str)]) -> Vec<(String, String)> {
        p.iter()
            .map(|(l, r)| (l.to_string(), r.to_string()))
            .collect()
    }

    #[test]
    fn wilson_matches_scipy() {
        // Fixtures from scipy.stats.binomtest(k, n).proportion_ci(method="wilson"), written
        // by tests/reference/score_fixtures.py.
        let text = include_str!("../tests/reference/score_fixtures.json");
        let doc: serde_json::Value = serde_json::from_str(text).unwrap();
        let rows = doc["wilson_95"].as_array().unwrap();
        assert!(rows.len() >= 8);
        for r in rows {
            let (k, n) = (r["true"].as_u64().unwrap(), r["links"].as_u64().unwrap());
            let got = wilson(k as usize, n as usize);
            for (g, want) in got.iter().zip([r["low"].as_f64(), r["high"].as_f64()]) {
                assert!((g - want.unwrap()).abs() < 1e-9, "{k}/{n}: {got:?}");
            }
        }
    }

    #[test]
    fn precision_recall_f1_by_hand() {
        // Five links, three of them among four known pairs: precision 3/5, recall 3/4, F1 the
        // harmonic mean 2·0.6·0.75/1.35 = 2/3 (the usual definitions; common practice).
        let links = [
            link("a", "1", 0.99),
            link("b", "2", 0.97),
            link("c", "3", 0.92),
            link("d", "9", 0.6),
            link("x", "8", 0.55),
        ];
        let known = pairs(&[("a", "1"), ("b", "2"), ("c", "3"), ("e", "5")]);
        let s = score(&links, &known, false);
        assert_eq!((s.links_scored, s.true_links), (5, 3));
        assert!((s.precision.unwrap() - 0.6).abs() < 1e-12);
        assert!((s.recall.unwrap() - 0.75).abs() < 1e-12);
        assert!((s.f1.unwrap() - 2.0 / 3.0).abs() < 1e-12);
        assert!((s.expected_true_links - 4.03).abs() < 1e-12);
        // Partial known pairs: the link x-8 names no known record and is not scored; d-9
        // names neither "d" nor "9" either, so only the three true links are scored.
        let s = score(&links, &known, true);
        assert_eq!((s.links_scored, s.true_links), (3, 3));
        assert_eq!(s.precision, Some(1.0));
        // A link that takes a known left record to the wrong right record is scored false.
        let s = score(&[link("e", "6", 0.7)], &known, true);
        assert_eq!(
            (s.links_scored, s.true_links, s.precision),
            (1, 0, Some(0.0))
        );
    }

    #[test]
    fn calibration_bands_hold_every_scored_link_once() {
        let links = [
            link("a", "1", 1.0),
            link("b", "2", 0.9995),
            link("c", "3", 0.95),
            link("d", "4", 0.9499),
            link("e", "5", 0.5),
            link("f", "6", 0.2),
        ];
        let known = pairs(&[("a", "1"), ("c", "3"), ("e", "5")]);
        let s = score(&links, &known, false);
        let total: usize = s.calibration.iter().map(|b| b.links).sum();
        assert_eq!(total, links.len());
        let band = |c: f64| {
            s.calibration
                .iter()
                .find(|b| c >= b.low && (c < b.high || b.high >= 1.0))
                .unwrap()
        };
        assert_eq!(band(1.0).links, 2); // 0.9995 and 1 share the last band
        assert_eq!(band(1.0).share_true, 0.5);
        assert_eq!(band(0.95).links, 1); // 0.95 opens its band; 0.9499 is in the one below
        assert_eq!(band(0.2).low, 0.0);
        assert_eq!(band(0.2).interval, wilson(0, 1));
    }
}
