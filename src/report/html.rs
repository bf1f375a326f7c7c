//! report.html: one self-contained page (inline CSS and SVG, no scripts, fonts, images or
//! network references) for colleagues and approval boards.
//!
//! Charts are drawn with plotters' SVG backend. The design is our own: a warm paper
//! background, ink-blue text, teal for the true-pair law and evidence, rust for the false-pair
//! law and warnings; dark text on light ground throughout (contrast above 7:1), and a print
//! style sheet. Every record value is HTML-escaped.

use crate::pipeline::{Linkage, Prepared};
use crate::reliability::Verdict;
use plotters::prelude::*;
use std::fmt::Write as _;

const INK: RGBColor = RGBColor(0x1d, 0x2b, 0x3a);
const TEAL: RGBColor = RGBColor(0x1f, 0x6f, 0x68);
const RUST: RGBColor = RGBColor(0xa8, 0x4a, 0x24);
const SAND: RGBColor = RGBColor(0xd9, 0xc9, 0xa8);
const PAPER: RGBColor = RGBColor(0xfb, 0xf8, 0xf1);

/// Escapes text for HTML element content and attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// Runs a plotters drawing into an SVG string; a drawing error gives a short note instead.
fn svg<F>(w: u32, h: u32, draw: F) -> String
where
    F: FnOnce(
        &DrawingArea<SVGBackend, plotters::coord::Shift>,
    ) -> Result<(), Box<dyn std::error::Error>>,
{
    let mut s = String::new();
    let result = {
        let root = SVGBackend::with_string(&mut s, (w, h)).into_drawing_area();
        root.fill(&PAPER)
            .map_err(|e| Box::new(e) as Box<dyn std::error::Error>)
            .and_then(|_| draw(&root))
            .and_then(|_| {
                root.present()
                    .map_err(|e| Box::new(e) as Box<dyn std::error::Error>)
            })
    };
    match result {
        Ok(()) => s,
        Err(e) => format!(
            "<p class=\"note\">chart not drawn: {}</p>",
            escape(&e.to_string())
        ),
    }
}

fn font(size: u32) -> TextStyle<'static> {
    ("sans-serif", size).into_font().color(&INK)
}

/// Histogram counts of `values` over `bins` equal bins of [lo, hi].
fn histogram(values: impl Iterator<Item = f64>, lo: f64, hi: f64, bins: usize) -> Vec<f64> {
    let mut h = vec![0.0; bins];
    let width = (hi - lo) / bins as f64;
    for v in values {
        let k = (((v - lo) / width) as usize).min(bins - 1);
        h[k] += 1.0;
    }
    h
}

/// The margin against the thresholds, on a log scale.
fn margin_chart(margin: f64, feasible: f64, infeasible: f64) -> String {
    svg(640, 120, |root| {
        let lo = 1e-4f64;
        let hi = 10f64;
        let m = margin.clamp(lo * 1.01, hi * 0.99);
        let mut c = ChartBuilder::on(root)
            .margin(12)
            .x_label_area_size(28)
            .build_cartesian_2d((lo..hi).log_scale(), 0f64..1f64)?;
        c.configure_mesh()
            .disable_y_mesh()
            .disable_y_axis()
            .x_desc("margin sqrt(d)·B (log scale); recovery needs it below 1")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()?;
        c.draw_series([
            Rectangle::new([(lo, 0.25), (feasible, 0.75)], TEAL.mix(0.25).filled()),
            Rectangle::new([(feasible, 0.25), (infeasible, 0.75)], SAND.filled()),
            Rectangle::new([(infeasible, 0.25), (hi, 0.75)], RUST.mix(0.25).filled()),
        ])?;
        c.draw_series([PathElement::new(
            vec![(infeasible, 0.1), (infeasible, 0.9)],
            INK.stroke_width(2),
        )])?;
        c.draw_series([
            Circle::new((m, 0.5), 8, INK.filled()),
            Circle::new((m, 0.5), 4, PAPER.filled()),
        ])?;
        Ok(())
    })
}

/// Separation per field (nats) against what the degree needs.
fn separation_chart(names: &[String], nats: &[f64], needed: f64) -> String {
    let total: f64 = nats.iter().sum();
    let mut labels: Vec<String> = names.to_vec();
    labels.push("all fields".into());
    let mut values = nats.to_vec();
    values.push(total);
    svg(640, 300, |root| {
        let top = values.iter().copied().fold(needed, f64::max) * 1.15 + 0.1;
        let n = labels.len();
        let mut c = ChartBuilder::on(root)
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(48)
            .build_cartesian_2d(0f64..n as f64, 0f64..top)?;
        let lab = labels.clone();
        c.configure_mesh()
            .disable_x_mesh()
            .x_labels(n * 2 + 1)
            .x_label_formatter(&move |x| {
                let k = x.floor() as usize;
                if (x - k as f64 - 0.5).abs() < 1e-6 && k < lab.len() {
                    lab[k].clone()
                } else {
                    String::new()
                }
            })
            .y_desc("separation, nats")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()?;
        c.draw_series(values.iter().enumerate().map(|(k, &v)| {
            let colour = if k + 1 == n { INK } else { TEAL };
            Rectangle::new(
                [(k as f64 + 0.15, 0.0), (k as f64 + 0.85, v)],
                colour.filled(),
            )
        }))?;
        c.draw_series([PathElement::new(
            vec![(0.0, needed), (n as f64, needed)],
            RUST.stroke_width(3),
        )])?
        .label(format!("needed: (1/2) ln d = {needed:.2} nats"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], RUST.stroke_width(3)));
        c.configure_series_labels()
            .background_style(PAPER)
            .border_style(SAND)
            .label_font(font(12))
            .draw()?;
        Ok(())
    })
}

/// Candidate weights with the fitted laws' expected counts over them.
fn weight_chart(prep: &Prepared) -> String {
    let w = &prep.weight;
    if w.is_empty() {
        return "<p class=\"note\">no candidate pairs</p>".into();
    }
    let lo = w.iter().copied().fold(f64::INFINITY, f64::min).floor();
    let hi = w
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max)
        .ceil()
        .max(lo + 1.0);
    let bins = 48;
    let width = (hi - lo) / bins as f64;
    let observed = histogram(w.iter().copied(), lo, hi, bins);
    let fit = &prep.fit;
    let n = w.len() as f64;
    let (mut m_exp, mut u_exp) = (vec![0.0; bins], vec![0.0; bins]);
    for pat in &prep.counts.patterns {
        let (mut pm, mut pu) = (1.0, 1.0);
        for (k, &l) in pat.iter().enumerate() {
            if l == crate::compare::MISSING_LEVEL {
                pm *= fit.m_missing[k];
                pu *= fit.u_missing[k];
            } else {
                pm *= (1.0 - fit.m_missing[k]) * fit.m[k][l as usize];
                pu *= (1.0 - fit.u_missing[k]) * fit.u[k][l as usize];
            }
        }
        let x = fit.pattern_weight(pat);
        let b = (((x - lo) / width).max(0.0) as usize).min(bins - 1);
        m_exp[b] += n * fit.p * pm;
        u_exp[b] += n * (1.0 - fit.p) * pu;
    }
    let top = observed
        .iter()
        .chain(&m_exp)
        .chain(&u_exp)
        .copied()
        .fold(1.0, f64::max)
        * 2.0;
    svg(640, 320, |root| {
        let mut c = ChartBuilder::on(root)
            .margin(12)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(lo..hi, (0.5f64..top).log_scale())?;
        c.configure_mesh()
            .x_desc("weight: sum of ln(m/u) over fields")
            .y_desc("pairs (log scale)")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()?;
        c.draw_series(
            observed
                .iter()
                .enumerate()
                .filter(|(_, &v)| v > 0.0)
                .map(|(k, &v)| {
                    let x0 = lo + k as f64 * width;
                    Rectangle::new([(x0, 0.5), (x0 + width * 0.92, v)], SAND.filled())
                }),
        )?
        .label("candidate pairs")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], SAND.filled()));
        let mid = |k: usize| lo + (k as f64 + 0.5) * width;
        c.draw_series(LineSeries::new(
            m_exp
                .iter()
                .enumerate()
                .filter(|(_, &v)| v > 0.5)
                .map(|(k, &v)| (mid(k), v)),
            TEAL.stroke_width(3),
        ))?
        .label("fitted true-pair law (m)")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], TEAL.stroke_width(3)));
        c.draw_series(LineSeries::new(
            u_exp
                .iter()
                .enumerate()
                .filter(|(_, &v)| v > 0.5)
                .map(|(k, &v)| (mid(k), v)),
            RUST.stroke_width(3),
        ))?
        .label("fitted false-pair law (u)")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], RUST.stroke_width(3)));
        c.configure_series_labels()
            .position(SeriesLabelPosition::UpperMiddle)
            .background_style(PAPER)
            .border_style(SAND)
            .label_font(font(12))
            .draw()?;
        Ok(())
    })
}

/// Bars of counts with text labels under them.
fn bar_chart(
    labels: &[String],
    values: &[f64],
    x_desc: &str,
    y_desc: &str,
    colour: RGBColor,
    log: bool,
) -> String {
    svg(640, 260, |root| {
        let n = labels.len().max(1);
        let top = values.iter().copied().fold(1.0, f64::max) * if log { 3.0 } else { 1.15 };
        let lab = labels.to_vec();
        let fmt = move |x: &f64| {
            let k = x.floor() as usize;
            if (x - k as f64 - 0.5).abs() < 1e-6 && k < lab.len() {
                lab[k].clone()
            } else {
                String::new()
            }
        };
        let mut b = ChartBuilder::on(root);
        b.margin(12).x_label_area_size(36).y_label_area_size(56);
        // The same axes and bars for a linear or a log count axis (two coordinate types).
        macro_rules! draw {
            ($c:expr, $base:expr) => {{
                let mut c = $c;
                c.configure_mesh()
                    .disable_x_mesh()
                    .x_labels(n * 2 + 1)
                    .x_label_formatter(&fmt)
                    .x_desc(x_desc)
                    .y_desc(y_desc)
                    .label_style(font(12))
                    .axis_desc_style(font(13))
                    .draw()?;
                c.draw_series(values.iter().enumerate().filter(|(_, &v)| v > 0.0).map(
                    |(k, &v)| {
                        Rectangle::new(
                            [(k as f64 + 0.12, $base), (k as f64 + 0.88, v)],
                            colour.filled(),
                        )
                    },
                ))?;
            }};
        }
        if log {
            draw!(
                b.build_cartesian_2d(0f64..n as f64, (0.5f64..top).log_scale())?,
                0.5
            );
        } else {
            draw!(b.build_cartesian_2d(0f64..n as f64, 0f64..top)?, 0.0);
        }
        Ok(())
    })
}

const STYLE: &str = r#"
:root { --ink:#1d2b3a; --teal:#1f6f68; --rust:#a84a24; --sand:#d9c9a8; --paper:#fbf8f1; --line:#c9bfae; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink); font:16px/1.5 Georgia, "DejaVu Serif", serif; }
header { padding:28px 40px 18px; border-bottom:6px double var(--line); }
header h1 { margin:0; font:600 30px/1.2 "DejaVu Sans", Verdana, sans-serif; letter-spacing:.02em; }
header p { margin:4px 0 0; }
main { max-width:1040px; margin:0 auto; padding:10px 40px 40px; }
section { margin:26px 0; }
h2 { font:600 20px/1.3 "DejaVu Sans", Verdana, sans-serif; border-left:8px solid var(--teal); padding-left:10px; }
.tiles { display:flex; flex-wrap:wrap; gap:12px; }
.tile { flex:1 1 150px; border:1px solid var(--line); background:#fff; padding:10px 14px; }
.tile b { display:block; font:600 24px/1.2 "DejaVu Sans", Verdana, sans-serif; }
.verdict { padding:14px 18px; border:2px solid var(--ink); background:#fff; }
.verdict.feasible { border-color:var(--teal); }
.verdict.borderline { border-color:#7a5b12; }
.verdict.infeasible { border-color:var(--rust); }
.verdict strong { font:700 22px/1.2 "DejaVu Sans", Verdana, sans-serif; text-transform:uppercase; }
table { border-collapse:collapse; width:100%; background:#fff; font-size:14px; }
th, td { border:1px solid var(--line); padding:4px 8px; text-align:left; vertical-align:top; }
th { background:#efe7d6; }
td.num { text-align:right; font-variant-numeric: tabular-nums; }
.caution { border:2px solid var(--rust); background:#fff; padding:12px 18px; }
.note { font-style:italic; }
svg { max-width:100%; height:auto; display:block; }
@media print { body { background:#fff; } header { border-bottom:2px solid #000; } section { break-inside: avoid; } .tile, .verdict, .caution, table { background:#fff; } }
"#;

/// One scheme of an earlier `dovetail tune` run, as read back from tune.csv.
#[derive(Debug, Clone, serde::Deserialize)]
pub struct TuneRow {
    /// Scheme label.
    pub scheme: String,
    /// Candidate pairs.
    pub pairs: usize,
    /// The false degree.
    pub d: f64,
    /// Estimated pair completeness.
    pub completeness: f64,
    /// Forecast error, when computed.
    pub forecast_error: Option<f64>,
    /// completeness x (1 - forecast error).
    pub expected_correct: f64,
}

/// Completeness and expected correct links per scheme: the blocking trade-off.
fn tune_chart(rows: &[TuneRow]) -> String {
    svg(640, 280, |root| {
        let n = rows.len().max(1);
        let mut c = ChartBuilder::on(root)
            .margin(12)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(0f64..n as f64, 0f64..105f64)?;
        c.configure_mesh()
            .disable_x_mesh()
            .x_labels(n * 2 + 1)
            .x_label_formatter(&|x| {
                let k = x.floor() as usize;
                if (x - k as f64 - 0.5).abs() < 1e-6 {
                    format!("scheme {}", k + 1)
                } else {
                    String::new()
                }
            })
            .y_desc("% of true pairs")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()?;
        c.draw_series(rows.iter().enumerate().map(|(k, r)| {
            Rectangle::new(
                [
                    (k as f64 + 0.1, 0.0),
                    (k as f64 + 0.48, r.completeness * 100.0),
                ],
                TEAL.filled(),
            )
        }))?
        .label("pair completeness")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], TEAL.filled()));
        c.draw_series(rows.iter().enumerate().map(|(k, r)| {
            Rectangle::new(
                [
                    (k as f64 + 0.52, 0.0),
                    (k as f64 + 0.9, r.expected_correct * 100.0),
                ],
                INK.filled(),
            )
        }))?
        .label("expected linked correctly")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], INK.filled()));
        c.configure_series_labels()
            .position(SeriesLabelPosition::LowerRight)
            .background_style(PAPER)
            .border_style(SAND)
            .label_font(font(12))
            .draw()?;
        Ok(())
    })
}

/// The whole page; `tune` holds an earlier `dovetail tune` run's table, if any.
pub fn page(prep: &Prepared, l: &Linkage, review: &[usize], tune: Option<&[TuneRow]>) -> String {
    let a = &l.assessment;
    let mut h = String::new();
    let verdict = a.verdict.as_str();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>dovetail linkage report</title><style>{STYLE}</style></head><body>"
    );
    let _ = write!(
        h,
        "<header><h1>dovetail linkage report</h1><p>{} left records &middot; {} right records &middot; dovetail {}</p></header><main>",
        prep.records.n_left(),
        prep.records.n_right(),
        super::VERSION
    );
    let unlinked_l = prep.records.n_left() - l.links.len();
    let unlinked_r = prep.records.n_right() - l.links.len();
    // A tile's value, and its label with the 95% interval.
    let with_interval = |e: Option<crate::pipeline::Estimate>, label: &str| match e {
        Some(e) => (
            format!("{:.1}%", 100.0 * e.value),
            format!(
                "{label} ({:.1}–{:.1}%)",
                100.0 * e.interval[0],
                100.0 * e.interval[1]
            ),
        ),
        None => ("n/a".to_string(), label.to_string()),
    };
    let (est_precision, precision_label) = with_interval(l.precision, "estimated precision");
    let (est_recall_all, recall_all_label) =
        with_interval(l.recall_all, "estimated recall, all true pairs");
    let _ = write!(
        h,
        "<section><h2>The run in numbers</h2><div class=\"tiles\">"
    );
    for (label, value) in [
        ("candidate pairs".to_string(), prep.cands.len().to_string()),
        ("links written".to_string(), l.links.len().to_string()),
        ("left unlinked".to_string(), unlinked_l.to_string()),
        ("right unlinked".to_string(), unlinked_r.to_string()),
        ("for review".to_string(), review.len().to_string()),
        (precision_label, est_precision),
        (recall_all_label, est_recall_all),
    ] {
        let _ = write!(
            h,
            "<div class=\"tile\"><b>{}</b>{}</div>",
            escape(&value),
            escape(&label)
        );
    }
    let _ = write!(h, "</div></section>");

    let forecast = a.forecast.as_ref().map_or("not computed".to_string(), |f| {
        format!(
            "{:.2}% (between {:.2}% and {:.2}% over {} replicates)",
            f.error_rate * 100.0,
            f.interval[0] * 100.0,
            f.interval[1] * 100.0,
            f.replicates
        )
    });
    let _ = write!(
        h,
        "<section><h2>Can these fields support one-to-one linkage?</h2><div class=\"verdict {verdict}\"><strong>{verdict}</strong><p>Margin sqrt(d)&middot;B = {:.4} against the threshold 1; forecast share of true pairs not linked correctly: {}.</p><ul>",
        a.margin,
        escape(&forecast)
    );
    for r in &a.reasons {
        let _ = write!(h, "<li>{}</li>", escape(r));
    }
    let _ = write!(h, "</ul>");
    if a.verdict != Verdict::Feasible {
        let _ = write!(h, "<p><b>What to do:</b> add a field that tells people apart, tighten blocking so each record has fewer false candidates, or clean the data.</p>");
    }
    let _ = write!(h, "</div>");
    h.push_str(&margin_chart(
        a.margin,
        prep.config.assess.feasible_margin,
        prep.config.assess.infeasible_margin,
    ));
    let _ = write!(
        h,
        "<p>Each record has on average d = {:.3} false candidates; telling the true partner from them needs (1/2) ln d = {:.2} nats of separation. The fields supply {:.2} nats.</p>",
        a.mean_false_degree, a.nats_needed, a.nats_supplied
    );
    let names: Vec<String> = a.fields.iter().map(|f| f.name.clone()).collect();
    let nats: Vec<f64> = a.fields.iter().map(|f| f.nats).collect();
    h.push_str(&separation_chart(&names, &nats, a.nats_needed));
    let _ = write!(h, "<table><tr><th>field</th><th>B<sub>k</sub></th><th>nats</th><th>missing, left</th><th>missing, right</th><th>note</th></tr>");
    for (k, f) in a.fields.iter().enumerate() {
        let fv = &prep.records.fields[k];
        let _ = write!(
            h,
            "<tr><td>{}</td><td class=\"num\">{:.4}</td><td class=\"num\">{:.2}</td><td class=\"num\">{:.1}%</td><td class=\"num\">{:.1}%</td><td>{}</td></tr>",
            escape(&f.name),
            f.bhattacharyya,
            f.nats,
            fv.left_missing_rate() * 100.0,
            fv.right_missing_rate() * 100.0,
            if f.adds_nothing { "adds nothing" } else { "" }
        );
    }
    let _ = write!(h, "</table></section>");
    if let Some(c) = &prep.check {
        let _ = write!(
            h,
            "<section><h2>Does the model fit?</h2><p>Every number on this page rests on a statistical model of the candidate pairs: two kinds of pair, the same person or not, with fields that agree independently within each kind. The check compares how many candidate pairs show each pattern of agreement with how many the fitted model expects. Among the {:.0} pairs that could be linked, {:.1}% are not where the model expects them{}.</p>",
            c.pairs_matter,
            100.0 * c.misfit_matters,
            if c.flagged() {
                ": too many to trust the estimates as they stand, so the verdict is not feasible and the intervals are wide; look for relatives or neighbours in the other table, duplicates inside a table, or fields that move together"
            } else {
                ": few enough for the estimates to stand"
            }
        );
        if !c.worst.is_empty() {
            let _ = write!(h, "<table><tr><th>pattern (levels per field)</th><th>pairs seen</th><th>pairs expected</th></tr>");
            for w in &c.worst {
                let levels: Vec<String> = w
                    .levels
                    .iter()
                    .enumerate()
                    .map(|(k, &l)| {
                        format!("{}: {}", prep.config.field[k].name, prep.level_name(k, l))
                    })
                    .collect();
                let _ = write!(
                    h,
                    "<tr><td>{}</td><td class=\"num\">{:.0}</td><td class=\"num\">{:.1}</td></tr>",
                    escape(&levels.join("; ")),
                    w.observed,
                    w.expected
                );
            }
            let _ = write!(h, "</table>");
        }
        let _ = write!(h, "</section>");
    }

    let _ = write!(h, "<section><h2>Weights of the candidate pairs</h2><p>Bars: the candidate pairs by weight. Lines: the counts the fitted laws expect, true pairs (m) and false pairs (u). Two well separated humps mean the fields tell the classes apart.</p>");
    h.push_str(&weight_chart(prep));
    let _ = write!(h, "</section>");

    let hist = &a.false_degree.histogram_left;
    let labels: Vec<String> = (0..hist.len())
        .map(|k| match k {
            0 => "0".to_string(),
            1 => "1".to_string(),
            k => format!("{}-{}", 1u64 << (k - 1), (1u64 << k) - 1),
        })
        .collect();
    let values: Vec<f64> = hist.iter().map(|&c| c as f64).collect();
    let _ = write!(h, "<section><h2>False candidates per record</h2><p>Left records by their number of false candidates (mean {:.2}, 95th percentile {:.0}, largest {:.0}). A long tail means some blocks are too loose.</p>", a.false_degree.mean_left, a.false_degree.p95_left, a.false_degree.max_left);
    h.push_str(&bar_chart(
        &labels,
        &values,
        "false candidates of a left record",
        "left records",
        INK,
        false,
    ));
    let _ = write!(h, "</section>");

    let conf = histogram(l.links.iter().map(|&i| l.confidence.p[i]), 0.0, 1.0, 10);
    let labels: Vec<String> = (0..10).map(|k| format!("{:.1}", k as f64 / 10.0)).collect();
    let _ = write!(h, "<section><h2>Confidence of the links written</h2><p>The chance that each link is right, given the other candidates of its records (under the one-to-one constraint). Cut-off in force: {:.3}.</p>", l.cutoff);
    h.push_str(&bar_chart(
        &labels,
        &conf,
        "confidence (bin start)",
        "links (log scale)",
        TEAL,
        true,
    ));
    let _ = write!(h, "</section>");

    if let Some(rows) = tune.filter(|r| !r.is_empty()) {
        let _ = write!(h, "<section><h2>Blocking trade-off (from dovetail tune)</h2><p>Looser blocking keeps more true pairs but gives each record more false candidates; the dark bars are what is left after the forecast mismatches.</p>");
        h.push_str(&tune_chart(rows));
        let _ = write!(h, "<table><tr><th>scheme</th><th>name</th><th>pairs</th><th>d</th><th>completeness</th><th>forecast error</th><th>expected correct</th></tr>");
        for (k, r) in rows.iter().enumerate() {
            let _ = write!(
                h,
                "<tr><td class=\"num\">{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{:.3}</td><td class=\"num\">{:.1}%</td><td class=\"num\">{}</td><td class=\"num\">{:.1}%</td></tr>",
                k + 1,
                escape(&r.scheme),
                r.pairs,
                r.d,
                r.completeness * 100.0,
                r.forecast_error.map_or("-".to_string(), |e| format!("{:.2}%", e * 100.0)),
                r.expected_correct * 100.0
            );
        }
        let _ = write!(h, "</table></section>");
    }

    let _ = write!(h, "<section><h2>First pairs for clerical review</h2>");
    if review.is_empty() {
        let _ = write!(h, "<p>No pair falls in the review band.</p>");
    } else {
        let _ = write!(h, "<p>The pairs closest to even odds, where a clerk's decision matters most (all of them are in review.csv).</p><table><tr><th>left id</th><th>right id</th><th>confidence</th>");
        for f in &prep.config.field {
            let _ = write!(h, "<th>{}</th>", escape(&f.name));
        }
        let _ = write!(h, "</tr>");
        for &i in review.iter().take(15) {
            let (la, rb) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
            let _ = write!(
                h,
                "<tr><td>{}</td><td>{}</td><td class=\"num\">{:.3}</td>",
                escape(&prep.records.left_ids[la]),
                escape(&prep.records.right_ids[rb]),
                l.confidence.p[i]
            );
            for f in &prep.config.field {
                let lv = prep.left.value(f.left_column(), la);
                let rv = prep.right.value(f.right_column(), rb);
                let _ = write!(h, "<td>{}<br>{}</td>", escape(&lv), escape(&rv));
            }
            let _ = write!(h, "</tr>");
        }
        let _ = write!(h, "</table>");
    }
    let _ = write!(h, "</section>");

    let _ = write!(
        h,
        "<section class=\"caution\"><h2>Before anyone acts on these links</h2><ul>\
         <li>Links are probabilistic and some are wrong: the confidence and the forecast say how many, under a model that can itself be wrong for these data.</li>\
         <li>An automated link is not a basis for a decision about a person. Review the uncertain pairs (review.csv) before acting on anyone.</li>\
         <li>Follow the data-protection law, the approvals and the disclosure rules that apply where the data is held. This report shows record values: keep it as protected as the data.</li>\
         </ul></section>"
    );
    let _ = writeln!(h, "</main></body></html>");
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escapes_markup() {
        // The five characters HTML requires escaping in text and attributes (WHATWG HTML).
        assert_eq!(
            escape("<script>\"a\" & 'b'</script>"),
            "&lt;script&gt;&quot;a&quot; &amp; &#39;b&#39;&lt;/script&gt;"
        );
    }
}
