//! Reliability: can these fields support one-to-one linkage at this degree, how many links
//! will be wrong, and how far to trust each link.
//!
//! In: the fit, the candidate graph and (for the forecast) the found matching. Out: an
//! [`Assessment`] with per-field separation, the margin sqrt(d)·B against the planted-matching
//! threshold 1, a bootstrap forecast of the mismatch rate and a verdict; and per-pair
//! confidences under the one-to-one constraint ([`confidence`]). Never reads or writes files.

/// The one-to-one posterior, kept under its old name for the stages that score confidence.
pub use crate::posterior as confidence;
pub mod forecast;
pub mod separation;

use crate::model::Fit;
use crate::numbers::{nats, percent, ratio};
use forecast::Forecast;
use separation::FieldSeparation;
use serde::Serialize;

/// The feasibility verdict.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Verdict {
    /// The fields separate true from false pairs well enough for this degree.
    Feasible,
    /// Close to the threshold: expect a noticeable share of wrong links.
    Borderline,
    /// The fields cannot support one-to-one linkage at this degree.
    Infeasible,
}

impl Verdict {
    /// The verdict as written in outputs.
    pub fn as_str(&self) -> &'static str {
        match self {
            Verdict::Feasible => "feasible",
            Verdict::Borderline => "borderline",
            Verdict::Infeasible => "infeasible",
        }
    }
}

/// Thresholds of the verdict.
#[derive(Debug, Clone)]
pub struct VerdictRule {
    /// Margins up to this are feasible.
    pub feasible_margin: f64,
    /// Margins from this on are infeasible.
    pub infeasible_margin: f64,
    /// Forecast error rates up to this are feasible.
    pub feasible_error: f64,
    /// Forecast error rates from this on are infeasible.
    pub infeasible_error: f64,
}

/// The distribution of false candidates per record.
#[derive(Debug, Clone, Serialize)]
pub struct DegreeStats {
    /// Mean false candidates per left record.
    pub mean_left: f64,
    /// Mean false candidates per right record.
    pub mean_right: f64,
    /// 95th percentile per left record.
    pub p95_left: f64,
    /// 95th percentile per right record.
    pub p95_right: f64,
    /// Largest per left record.
    pub max_left: f64,
    /// Largest per right record.
    pub max_right: f64,
    /// Histogram of left records' false degree: counts for 0, 1, 2-3, 4-7, 8-15, ... .
    pub histogram_left: Vec<u64>,
}

/// Everything the feasibility check says.
#[derive(Debug, Clone, Serialize)]
pub struct Assessment {
    /// Per-field separation.
    pub fields: Vec<FieldSeparation>,
    /// B = prod_k B_k.
    pub bhattacharyya: f64,
    /// sum_k -ln B_k.
    pub nats_supplied: f64,
    /// (1/2) ln d: the separation the threshold sqrt(d)·B <= 1 asks for. Negative when d < 1
    /// (fewer than one false candidate per record: any fields meet the threshold), minus
    /// infinity when d = 0.
    pub nats_needed: f64,
    /// Estimated true pairs among the candidates: p |C|.
    pub estimated_true_pairs: f64,
    /// Estimated false candidates |F| = |C| - p |C|.
    pub false_pairs: f64,
    /// d = |F| / sqrt(|L| |R|).
    pub mean_false_degree: f64,
    /// The false-degree distribution.
    pub false_degree: DegreeStats,
    /// sqrt(d) B; recovery needs it below 1.
    pub margin: f64,
    /// The bootstrap forecast, when run.
    pub forecast: Option<Forecast>,
    /// The verdict.
    pub verdict: Verdict,
    /// Plain-language reasons for the verdict.
    pub reasons: Vec<String>,
}

/// Why the fit itself cannot be trusted, if it cannot: a list of plain-language reasons.
pub fn identification_problems(fit: &Fit, fields: &[FieldSeparation]) -> Vec<String> {
    let mut out = Vec::new();
    if fields.len() < 3 {
        out.push(format!(
            "only {} compared field(s): a two-class mixture of independent fields needs at least three to be identified (common practice for latent class models)",
            fields.len()
        ));
    }
    if !fields.is_empty() && fields.iter().all(|f| f.adds_nothing) {
        out.push(
            "no field separates true from false pairs: m and u are nearly equal on every field"
                .into(),
        );
    }
    if fit.p < 1e-5 || fit.p > 0.99 {
        out.push(format!(
            "the fit found a degenerate share of true pairs (p = {}) and cannot tell the two classes apart",
            crate::numbers::ratio(fit.p)
        ));
    }
    if fit.switched {
        let agreeing = fit
            .m
            .iter()
            .zip(&fit.u)
            .filter(|(m, u)| m[0] > u[0])
            .count();
        if 2 * agreeing <= fit.m.len() {
            out.push("the fit put agreement in the false-pair class on most fields (label switching), so the classes are not identified".into());
        }
    }
    out
}

/// The false-degree distribution from per-record candidate counts and the estimated number of
/// true pairs of each record (at most one).
pub fn degree_stats(left_deg: &[f64], right_deg: &[f64]) -> DegreeStats {
    let stats = |v: &[f64]| -> (f64, f64, f64) {
        if v.is_empty() {
            return (0.0, 0.0, 0.0);
        }
        let mut s = v.to_vec();
        s.sort_by(f64::total_cmp);
        let mean = s.iter().sum::<f64>() / s.len() as f64;
        let p95 = s[((s.len() - 1) as f64 * 0.95).round() as usize];
        (mean, p95, s[s.len() - 1])
    };
    let (ml, pl, xl) = stats(left_deg);
    let (mr, pr, xr) = stats(right_deg);
    let mut histogram_left = vec![0u64; 1];
    for &d in left_deg {
        let d = d.round().max(0.0) as u64;
        let bin = if d == 0 {
            0
        } else {
            64 - d.leading_zeros() as usize
        };
        if histogram_left.len() <= bin {
            histogram_left.resize(bin + 1, 0);
        }
        histogram_left[bin] += 1;
    }
    DegreeStats {
        mean_left: ml,
        mean_right: mr,
        p95_left: pl,
        p95_right: pr,
        max_left: xl,
        max_right: xr,
        histogram_left,
    }
}

/// Inputs to [`assess`] besides the fit.
pub struct AssessInput<'a> {
    /// Records on the left.
    pub n_left: usize,
    /// Records on the right.
    pub n_right: usize,
    /// Candidate pairs.
    pub n_pairs: usize,
    /// Per-field separation.
    pub fields: Vec<FieldSeparation>,
    /// False candidates per left record.
    pub left_false_degree: &'a [f64],
    /// False candidates per right record.
    pub right_false_degree: &'a [f64],
    /// The bootstrap forecast, if run.
    pub forecast: Option<Forecast>,
}

/// The separation figures of a fit: what the verdict weighs besides the forecast. They need
/// only the laws and the counts of records and pairs (a distributed run's driver has them).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Separation {
    /// B = prod_k B_k.
    pub bhattacharyya: f64,
    /// sum_k -ln B_k.
    pub nats_supplied: f64,
    /// (1/2) ln d (see [`Assessment::nats_needed`]).
    pub nats_needed: f64,
    /// p |C|.
    pub estimated_true_pairs: f64,
    /// |C| - p |C|.
    pub false_pairs: f64,
    /// d = |F| / sqrt(|L| |R|).
    pub mean_false_degree: f64,
    /// sqrt(d) B.
    pub margin: f64,
}

/// The separation figures of `fit` and its fields for tables of `n_left` and `n_right`
/// records and `n_pairs` candidate pairs.
pub fn separation(
    fit: &Fit,
    fields: &[FieldSeparation],
    n_left: usize,
    n_right: usize,
    n_pairs: usize,
) -> Separation {
    let b: f64 = fields.iter().map(|f| f.bhattacharyya).product();
    let supplied: f64 = fields.iter().map(|f| f.nats).sum();
    let true_pairs = fit.p * n_pairs as f64;
    let false_pairs = (n_pairs as f64 - true_pairs).max(0.0);
    let scale = ((n_left as f64) * (n_right as f64)).sqrt();
    let d = if scale > 0.0 {
        false_pairs / scale
    } else {
        0.0
    };
    // The threshold sqrt(d) B <= 1 in nats: -ln B >= (1/2) ln d. Below d = 1 the right side
    // is negative, so any fields meet it (B <= 1); the true value is kept (minus infinity at
    // d = 0) and the report says what it means.
    Separation {
        bhattacharyya: b,
        nats_supplied: supplied,
        nats_needed: 0.5 * d.ln(),
        estimated_true_pairs: true_pairs,
        false_pairs,
        mean_false_degree: d,
        margin: d.sqrt() * b,
    }
}

/// Combines separation, degree and forecast into the verdict.
pub fn assess(fit: &Fit, input: AssessInput<'_>, rule: &VerdictRule) -> Assessment {
    let sep = separation(
        fit,
        &input.fields,
        input.n_left,
        input.n_right,
        input.n_pairs,
    );
    let forecast_rate = input.forecast.as_ref().map(|f| f.error_rate);
    let (verdict, reasons) = verdict_of(
        &sep,
        identification_problems(fit, &input.fields),
        forecast_rate,
        rule,
    );
    Assessment {
        fields: input.fields,
        bhattacharyya: sep.bhattacharyya,
        nats_supplied: sep.nats_supplied,
        nats_needed: sep.nats_needed,
        estimated_true_pairs: sep.estimated_true_pairs,
        false_pairs: sep.false_pairs,
        mean_false_degree: sep.mean_false_degree,
        false_degree: degree_stats(input.left_false_degree, input.right_false_degree),
        margin: sep.margin,
        forecast: input.forecast,
        verdict,
        reasons,
    }
}

/// The verdict from the separation figures, the reasons the fit cannot be trusted
/// (`problems`: [`identification_problems`]) and the forecast mismatch rate, with the
/// reasons in plain words.
pub fn verdict_of(
    sep: &Separation,
    problems: Vec<String>,
    forecast_rate: Option<f64>,
    rule: &VerdictRule,
) -> (Verdict, Vec<String>) {
    let (margin, supplied, needed) = (sep.margin, sep.nats_supplied, sep.nats_needed);
    let mut reasons = problems;
    let verdict = if !reasons.is_empty() {
        Verdict::Infeasible
    } else if margin >= rule.infeasible_margin
        || forecast_rate.is_some_and(|e| e >= rule.infeasible_error)
    {
        if margin >= rule.infeasible_margin {
            reasons.push(format!(
                "the margin sqrt(d)·B = {} is at or above {}: the fields supply {} nats of separation where this degree needs {}",
                ratio(margin),
                crate::numbers::setting(rule.infeasible_margin),
                nats(supplied),
                nats(needed - rule.infeasible_margin.ln())
            ));
        }
        if let Some(e) = forecast_rate.filter(|&e| e >= rule.infeasible_error) {
            reasons.push(format!(
                "the forecast mismatch rate {} is at or above {}",
                percent(e),
                percent(rule.infeasible_error)
            ));
        }
        Verdict::Infeasible
    } else if margin <= rule.feasible_margin
        && forecast_rate.is_none_or(|e| e <= rule.feasible_error)
    {
        reasons.push(format!(
            "the margin sqrt(d)·B = {} is well below 1 and the forecast mismatch rate is {}",
            ratio(margin),
            forecast_rate.map_or("not computed".to_string(), percent)
        ));
        Verdict::Feasible
    } else {
        reasons.push(format!(
            "margin sqrt(d)·B = {}, forecast mismatch rate {}: between the feasible and infeasible settings",
            ratio(margin),
            forecast_rate.map_or("not computed".to_string(), percent)
        ));
        Verdict::Borderline
    };
    (verdict, reasons)
}
