//! report.html: one self-contained page (inline CSS and SVG, no scripts, fonts, images or
//! network references) for colleagues and approval boards.
//!
//! Charts are drawn with plotters' SVG backend. The design is our own: a warm paper
//! background, ink-blue text, teal for the true-pair law and evidence, rust for the false-pair
//! law and warnings; dark text on light ground throughout (contrast above 7:1), and a print
//! style sheet. Every record value is HTML-escaped.

use crate::numbers::{cutoff, nats, percent, ratio, setting};
use crate::pipeline::{Linkage, Prepared};
use crate::reliability::Verdict;
use plotters::prelude::*;
use std::fmt::Write as _;

const INK: RGBColor = RGBColor(0x1d, 0x2b, 0x3a);
const TEAL: RGBColor = RGBColor(0x1f, 0x6f, 0x68);
const RUST: RGBColor = RGBColor(0xa8, 0x4a, 0x24);
const SAND: RGBColor = RGBColor(0xd9, 0xc9, 0xa8);
const PAPER: RGBColor = RGBColor(0xfb, 0xf8, 0xf1);

/// Where `dovetail audit` puts the measured precision (replaced atomically, the rest of the
/// page kept as it is).
pub const AUDIT_MARK: &str = "<!-- dovetail:audit -->";
/// The end of the audit's place.
pub const AUDIT_END: &str = "<!-- /dovetail:audit -->";

/// The audit's section of report.html.
pub fn audit_section(a: &crate::review::AuditResult) -> String {
    let mut h = String::new();
    let _ = write!(
        h,
        "<section id=\"audit\"><h2>Precision measured by clerical review</h2>"
    );
    let f4 = |x: f64| format!("{x:.4}");
    match a.measured {
        None => {
            let _ = write!(
                h,
                "<p>An audit sample of {} links was drawn; none is decided yet.</p>",
                a.sampled
            );
        }
        Some(m) => {
            let verdict = match (a.estimated_precision, a.estimate_inside) {
                (Some(_), Some(true)) => "The run's estimated precision lies <b>inside</b> the measured interval.".to_string(),
                (Some(e), _) if e > m.interval[1] => "The run's estimated precision lies <b>above</b> the measured interval: the run overstates how many links are right. Trust the measured figure.".to_string(),
                (Some(_), _) => "The run's estimated precision lies <b>below</b> the measured interval.".to_string(),
                (None, _) => String::new(),
            };
            let _ = write!(
                h,
                "<p>Clerks decided {} of {} links drawn at random, stratified by confidence band ({} could not tell, {} not decided). Measured precision <b>{}</b>, 95% interval {} to {} (stratified estimate, Wilson interval at an effective sample size of {:.0}); estimated by the run: {}. {}</p>",
                m.decided,
                a.sampled,
                a.unsure,
                a.undecided,
                f4(m.precision),
                f4(m.interval[0]),
                f4(m.interval[1]),
                m.effective_n,
                a.estimated_precision.map_or("–".into(), f4),
                verdict
            );
        }
    }
    let _ = write!(h, "<table><tr><th>confidence</th><th>links</th><th>sampled</th><th>same person</th><th>different people</th><th>can't tell</th><th>not decided</th></tr>");
    for b in &a.bands {
        let _ = write!(
            h,
            "<tr><td>{} to {}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
            b.band.from, b.band.to, b.band.links, b.band.sampled, b.tally.same, b.tally.different, b.tally.unsure, b.tally.undecided
        );
    }
    let _ = write!(h, "</table><p>A clerk's judgement is itself fallible; it measures agreement with people, who see only these fields.</p></section>");
    h
}

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
        let top = values.iter().copied().fold(needed.max(0.0), f64::max) * 1.15 + 0.1;
        // A negative need (d < 1) is drawn below the bars' base, unless it is far below.
        let bottom = if needed.is_finite() && needed < 0.0 && needed > -top {
            needed * 1.3
        } else {
            0.0
        };
        let n = labels.len();
        let mut c = ChartBuilder::on(root)
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(48)
            .build_cartesian_2d(0f64..n as f64, bottom..top)?;
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
        let shown = if needed >= bottom { needed } else { bottom };
        let note = if needed < 0.0 {
            " (below 0: d < 1)"
        } else {
            ""
        };
        c.draw_series([PathElement::new(
            vec![(0.0, shown), (n as f64, shown)],
            RUST.stroke_width(3),
        )])?
        .label(format!(
            "needed: (1/2) ln d = {} nats{note}",
            crate::numbers::nats(needed)
        ))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], RUST.stroke_width(3)));
        c.configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
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
            .y_label_formatter(&|y| format!("{y:.0}"))
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
                    .y_label_formatter(&|y| format!("{y:.0}"))
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
.tiles { display:grid; grid-template-columns:repeat(4, 1fr); gap:12px; }
.tile { border:1px solid var(--line); background:#fff; padding:10px 14px; }
.tile b { display:block; font:600 24px/1.2 "DejaVu Sans", Verdana, sans-serif; }
.verdict { padding:14px 18px; border:2px solid var(--ink); background:#fff; }
.verdict.feasible { border-color:var(--teal); }
.verdict.borderline { border-color:#7a5b12; }
.verdict.infeasible { border-color:var(--rust); }
.verdict strong { font:700 22px/1.2 "DejaVu Sans", Verdana, sans-serif; text-transform:uppercase; }
table { border-collapse:collapse; width:100%; background:#fff; font-size:14px; }
th, td { border:1px solid var(--line); padding:4px 8px; text-align:left; vertical-align:top; }
th { background:#efe7d6; }
td.num { text-align:right; font-variant-numeric: tabular-nums; white-space:nowrap; }
.caution { border:2px solid var(--rust); background:#fff; padding:12px 18px; }
.note { font-style:italic; }
h3 { font:600 16px/1.3 "DejaVu Sans", Verdana, sans-serif; margin:18px 0 6px; }
.small { font-size:14px; }
.serious { border:3px solid var(--rust); background:#fff3ee; padding:6px 18px; margin-bottom:10px; }
.serious b { color:var(--rust); }
ul.warn { border-left:4px solid var(--sand); padding:6px 10px 6px 34px; background:#fff; }
ol.steps { background:#fff; border:1px solid var(--line); padding:10px 18px 10px 40px; }
ol.steps li { margin:4px 0; }
.stopped { border:3px solid var(--rust); background:#fff; padding:4px 18px; }
table.estimates, table.terms { margin-top:12px; }
.hash { font:12px/1.4 "DejaVu Sans Mono", monospace; overflow-wrap:anywhere; }
td.path { overflow-wrap:anywhere; }
tr.total td { font-weight:600; border-top:2px solid var(--ink); }
table.review td.status { font-size:13px; }
table.review td.value { white-space:nowrap; }
table.review tr.linked td.status { color:var(--teal); font-weight:600; }
table.review tr.not-linked td.status { color:var(--rust); }
code { font:14px "DejaVu Sans Mono", monospace; }
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

/// Everything the page shows besides the run itself.
pub struct Context<'a> {
    /// The prepared run.
    pub prep: &'a Prepared,
    /// Its linkage.
    pub linkage: &'a Linkage,
    /// The pairs of review.csv, most useful first.
    pub review: &'a [usize],
    /// An earlier `dovetail tune` run's table, if any.
    pub tune: Option<&'a [TuneRow]>,
    /// Every record's outcome; None when `stop_if_infeasible` stopped the run and no link
    /// file was written.
    pub outcomes: Option<&'a super::Outcomes>,
    /// What to do next.
    pub next_steps: &'a [String],
    /// The run date (RFC 3339, UTC).
    pub run_date: &'a str,
}

/// Escapes plain text and shows each `quoted` name (between backticks) as code.
fn prose(text: &str) -> String {
    let mut out = String::new();
    for (k, part) in escape(text).split('`').enumerate() {
        if k % 2 == 1 {
            let _ = write!(out, "<code>{part}</code>");
        } else {
            out.push_str(part);
        }
    }
    // An unpaired backtick would leave a code span open: fall back to the plain text.
    if text.matches('`').count() % 2 == 1 {
        return escape(text);
    }
    out
}

/// A table row of text cells (each escaped); cells starting with `#` are numbers (aligned
/// right, the `#` dropped).
fn row(h: &mut String, cells: &[&str]) {
    h.push_str("<tr>");
    for c in cells {
        match c.strip_prefix('#') {
            Some(n) => {
                let _ = write!(h, "<td class=\"num\">{}</td>", escape(n));
            }
            None => {
                let _ = write!(h, "<td>{}</td>", escape(c));
            }
        }
    }
    h.push_str("</tr>");
}

fn head_row(h: &mut String, cells: &[&str]) {
    h.push_str("<tr>");
    for c in cells {
        let _ = write!(h, "<th>{c}</th>");
    }
    h.push_str("</tr>");
}

/// A field's per-side settings in words: its cleaning, each side's date order and value map
/// (the config's own codes, at most 12 entries a side shown), what unreadable values become.
fn reading_of(f: &crate::config::FieldSpec) -> String {
    let mut parts = Vec::new();
    let cleaning = serde_json::to_value(f.normalize())
        .ok()
        .and_then(|v| v.as_str().map(str::to_string))
        .unwrap_or_default();
    parts.push(format!("cleaning {cleaning}"));
    if f.method == crate::config::Method::Date {
        let order = |o: crate::text::DateOrder| format!("{o:?}").to_lowercase();
        let (l, r) = (order(f.date_order_of(true)), order(f.date_order_of(false)));
        if l == r {
            parts.push(format!("dates {l}"));
        } else {
            parts.push(format!("left dates {l}, right dates {r}"));
        }
    }
    for (side, map) in [("left", &f.left_recode), ("right", &f.right_recode)] {
        if map.is_empty() {
            continue;
        }
        let shown: Vec<String> = map
            .iter()
            .take(12)
            .map(|(k, v)| {
                let v = if v.is_empty() { "(missing)" } else { v };
                format!("{k} → {v}")
            })
            .collect();
        let more = if map.len() > 12 {
            format!(" and {} more", map.len() - 12)
        } else {
            String::new()
        };
        parts.push(format!("{side} values mapped: {}{more}", shown.join(", ")));
    }
    if matches!(
        f.method,
        crate::config::Method::Date | crate::config::Method::Number
    ) {
        parts.push(if f.stops_on_unparsed() {
            "an unreadable value stops the run".into()
        } else {
            "unreadable values taken as missing".into()
        });
    }
    parts.join("; ")
}

/// The warnings box: serious ones first and set apart, their prefix dropped; without
/// warnings it says so, since a reader cannot tell an empty box from a missing one.
fn warnings_section(h: &mut String, warnings: &[String]) {
    let prefix = crate::pipeline::SERIOUS_PREFIX;
    let serious: Vec<&str> = warnings
        .iter()
        .filter_map(|w| w.strip_prefix(prefix))
        .collect();
    let other: Vec<&String> = warnings.iter().filter(|w| !w.starts_with(prefix)).collect();
    let _ = write!(h, "<section id=\"warnings\"><h2>Warnings</h2>");
    if !serious.is_empty() {
        let _ = write!(
            h,
            "<div class=\"serious\"><p><b>Serious: {} finding(s) that make the results untrustworthy until dealt with</b></p><ul>",
            serious.len()
        );
        for w in &serious {
            let _ = write!(h, "<li>{}</li>", prose(w));
        }
        let _ = write!(h, "</ul></div>");
    }
    if !other.is_empty() {
        let _ = write!(h, "<ul class=\"warn\">");
        for w in &other {
            let _ = write!(h, "<li>{}</li>", prose(w));
        }
        let _ = write!(h, "</ul>");
    }
    if serious.is_empty() && other.is_empty() {
        let _ = write!(h, "<p>None: the run raised no warnings.</p>");
    }
    let _ = write!(h, "</section>");
}

/// The separation the degree needs, in words beside its value.
fn needed_words(a: &crate::reliability::Assessment, feasible_margin: f64) -> String {
    let d = a.mean_false_degree;
    if d >= 1.0 {
        format!(
            "With d = {} false candidates per record, telling the true partner from them needs (1/2) ln d = {} nats of separation (the margin sqrt(d)·B below 1). The fields supply {} nats.",
            ratio(d),
            nats(a.nats_needed),
            nats(a.nats_supplied)
        )
    } else {
        let verdict_needs = a.nats_needed - feasible_margin.ln();
        format!(
            "With d = {} (fewer than one false candidate per record), the needed separation (1/2) ln d = {} nats is {}: every set of fields meets the threshold sqrt(d)·B below 1, since B is at most 1, so no separation is needed for it. The margin still measures how safely: the verdict's own setting, a margin of at most {} for \"feasible\", asks for {} nats. The fields supply {} nats.",
            ratio(d),
            nats(a.nats_needed),
            if d > 0.0 { "negative" } else { "minus infinity (no false candidates at all)" },
            setting(feasible_margin),
            if verdict_needs > 0.0 { nats(verdict_needs) } else { "none".to_string() },
            nats(a.nats_supplied)
        )
    }
}

/// The whole page.
pub fn page(ctx: &Context<'_>) -> String {
    let prep = ctx.prep;
    let l = ctx.linkage;
    let review = ctx.review;
    let stopped = ctx.outcomes.is_none();
    let a = &l.assessment;
    let mut h = String::new();
    let verdict = a.verdict.as_str();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>dovetail linkage report</title><style>{STYLE}</style></head><body>"
    );
    let _ = write!(
        h,
        "<header><h1>dovetail linkage report</h1><p>Run on {} (UTC) with dovetail {} &middot; {} left records &middot; {} right records &middot; seed {}</p></header><main>",
        escape(&ctx.run_date.replace('T', " ").replace('Z', "")),
        super::VERSION,
        prep.records.n_left(),
        prep.records.n_right(),
        prep.config.assess.seed
    );
    if stopped {
        let _ = write!(
            h,
            "<section class=\"stopped\"><h2>No links were written</h2><p>The verdict is <b>infeasible</b> and <code>stop_if_infeasible</code> is set, so the run stopped before writing links.csv, unlinked_left.csv, unlinked_right.csv or review.csv. Why the verdict is infeasible:</p><ul>"
        );
        for r in &a.reasons {
            let _ = write!(h, "<li>{}</li>", escape(r));
        }
        let _ = write!(h, "</ul></section>");
    }
    warnings_section(&mut h, &prep.warnings);
    let _ = write!(
        h,
        "<section id=\"next\"><h2>What to do next</h2><ol class=\"steps\">"
    );
    for s in ctx.next_steps {
        let _ = write!(h, "<li>{}</li>", prose(s));
    }
    let _ = write!(h, "</ol></section>");

    // The run in numbers.
    let _ = write!(
        h,
        "<section><h2>The run in numbers</h2><div class=\"tiles\">"
    );
    let value =
        |e: Option<crate::pipeline::Estimate>| e.map_or("n/a".to_string(), |e| percent(e.value));
    let mut tiles: Vec<(String, String)> =
        vec![("candidate pairs".into(), prep.cands.len().to_string())];
    if let Some(o) = ctx.outcomes {
        let unlinked = |side: &[Option<super::UnlinkedReason>]| {
            side.iter().filter(|x| x.is_some()).count().to_string()
        };
        tiles.extend([
            ("links written".to_string(), l.links.len().to_string()),
            ("left unlinked".to_string(), unlinked(&o.left)),
            ("right unlinked".to_string(), unlinked(&o.right)),
            ("for review".to_string(), review.len().to_string()),
            ("estimated precision".to_string(), value(l.precision)),
            (
                "estimated recall among candidates".to_string(),
                value(l.recall),
            ),
            (
                "estimated recall, all true pairs".to_string(),
                value(l.recall_all),
            ),
        ]);
    } else {
        tiles.push(("links written".to_string(), "none".to_string()));
    }
    for (label, value) in tiles {
        let _ = write!(
            h,
            "<div class=\"tile\"><b>{}</b>{}</div>",
            escape(&value),
            escape(&label)
        );
    }
    let _ = write!(h, "</div>");
    if !stopped {
        let _ = write!(h, "<table class=\"estimates\">");
        head_row(
            &mut h,
            &["estimate", "value", "95% interval", "in plain words"],
        );
        let est = |e: Option<crate::pipeline::Estimate>| match e {
            Some(e) => (
                percent(e.value),
                format!("{}–{}", percent(e.interval[0]), percent(e.interval[1])),
            ),
            None => ("n/a".to_string(), "n/a".to_string()),
        };
        let completeness = l.completeness.map(|c| crate::pipeline::Estimate {
            value: c.value,
            interval: c.interval,
        });
        for (name, e, words) in [
            ("precision", l.precision, "of the links written, the share expected to be the same person"),
            ("recall among candidates", l.recall, "of the true pairs that blocking made candidates, the share linked"),
            ("pair completeness", completeness, "of all true pairs, the share that blocking made candidates (from a sample of left records compared with every right record)"),
            ("recall over all true pairs", l.recall_all, "of all true pairs, the share linked: recall among candidates times pair completeness"),
        ] {
            let (v, i) = est(e);
            row(&mut h, &[name, &format!("#{v}"), &format!("#{i}"), words]);
        }
        let _ = write!(h, "</table><p class=\"small\">The intervals hold the sampling error and, when the model check flags the fit, its misfit; they rest on the fitted model, which can itself be wrong for these data. Confidence cut-off in force: {}.</p>", cutoff(l.cutoff));
    }
    let _ = write!(h, "</section>");

    let forecast = a.forecast.as_ref().map_or("not computed".to_string(), |f| {
        format!(
            "{} (between {} and {} over {} replicates)",
            percent(f.error_rate),
            percent(f.interval[0]),
            percent(f.interval[1]),
            f.replicates
        )
    });
    let _ = write!(
        h,
        "<section><h2>Can these fields support one-to-one linkage?</h2><div class=\"verdict {verdict}\"><strong>{verdict}</strong><p>Margin sqrt(d)·B = {} against the threshold 1; forecast share of true pairs not linked correctly: {}.</p><ul>",
        ratio(a.margin),
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
    let _ = write!(h, "<table class=\"terms\">");
    head_row(&mut h, &["figure", "value", "in plain words"]);
    let b_total = ratio(a.bhattacharyya);
    let forecast_value = a
        .forecast
        .as_ref()
        .map_or("not computed".to_string(), |f| percent(f.error_rate));
    for (name, value, words) in [
        ("d", ratio(a.mean_false_degree), "false candidates per record: on average, how many records of the other table each record is compared with that are not its partner".to_string()),
        ("B", b_total, "how much the agreement patterns of true and false pairs overlap, all fields together (the product of the fields' B_k): 1 means they look alike, 0 that they never do".to_string()),
        ("separation", format!("{} nats", nats(a.nats_supplied)), "the same overlap on a log scale, -ln B, summed over the fields: more nats, better told apart; each nat divides the overlap by e (about 2.7)".to_string()),
        ("needed separation", format!("{} nats", nats(a.nats_needed)), "(1/2) ln d: the separation at which the margin is exactly 1; negative when d is below 1".to_string()),
        ("margin", ratio(a.margin), "sqrt(d)·B: the false candidates' chance to pass for the partner; below 1 one-to-one linkage can recover almost every true pair, at 1 or above it cannot".to_string()),
        ("forecast mismatch rate", forecast_value, "from simulated runs on this candidate graph: the share of true pairs expected not to be linked to their partner".to_string()),
    ] {
        row(&mut h, &[name, &format!("#{value}"), &words]);
    }
    let _ = write!(h, "</table>");
    let _ = write!(
        h,
        "<p>{}</p>",
        escape(&needed_words(a, prep.config.assess.feasible_margin))
    );
    let names: Vec<String> = a.fields.iter().map(|f| f.name.clone()).collect();
    let field_nats: Vec<f64> = a.fields.iter().map(|f| f.nats).collect();
    h.push_str(&separation_chart(&names, &field_nats, a.nats_needed));
    let _ = write!(h, "<p class=\"small\">B<sub>k</sub>: how alike a field's agreement pattern is among true and false pairs (1 = no help, 0 = tells them apart perfectly). Nats: -ln B<sub>k</sub>, the field's share of the separation.</p><table>");
    head_row(
        &mut h,
        &[
            "field",
            "B<sub>k</sub>",
            "nats",
            "missing, left",
            "missing, right",
            "note",
        ],
    );
    for (k, f) in a.fields.iter().enumerate() {
        let fv = &prep.records.fields[k];
        row(
            &mut h,
            &[
                &f.name,
                &format!("#{}", ratio(f.bhattacharyya)),
                &format!("#{}", nats(f.nats)),
                &format!("#{}", percent(fv.left_missing_rate())),
                &format!("#{}", percent(fv.right_missing_rate())),
                if f.adds_nothing { "adds nothing" } else { "" },
            ],
        );
    }
    let _ = write!(h, "</table></section>");
    if let Some(c) = &prep.check {
        let _ = write!(
            h,
            "<section><h2>Does the model fit?</h2><p>Every number on this page rests on a statistical model of the candidate pairs: two kinds of pair, the same person or not, with fields that agree independently within each kind. The check compares how many candidate pairs show each pattern of agreement with how many the fitted model expects. Among the {:.0} pairs that could be linked, {} are not where the model expects them{}.</p>",
            c.pairs_matter,
            percent(c.misfit_matters),
            if c.flagged() {
                ": too many to trust the estimates as they stand, so the verdict is not feasible and the intervals are wide; look for relatives or neighbours in the other table, duplicates inside a table, or fields that move together"
            } else {
                ": few enough for the estimates to stand"
            }
        );
        if !c.worst.is_empty() {
            let _ = write!(h, "<table>");
            head_row(
                &mut h,
                &["pattern (levels per field)", "pairs seen", "pairs expected"],
            );
            for w in &c.worst {
                let levels: Vec<String> = w
                    .levels
                    .iter()
                    .enumerate()
                    .map(|(k, &l)| {
                        format!("{}: {}", prep.config.field[k].name, prep.level_name(k, l))
                    })
                    .collect();
                row(
                    &mut h,
                    &[
                        &levels.join("; "),
                        &format!("#{:.0}", w.observed),
                        &format!("#{:.1}", w.expected),
                    ],
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
    let _ = write!(h, "<section><h2>False candidates per record</h2><p>Left records by their number of false candidates (mean {}, 95th percentile {:.0}, largest {:.0}). A long tail means some blocks are too loose.</p>", ratio(a.false_degree.mean_left), a.false_degree.p95_left, a.false_degree.max_left);
    h.push_str(&bar_chart(
        &labels,
        &values,
        "false candidates of a left record",
        "left records",
        INK,
        false,
    ));
    let _ = write!(h, "</section>");

    if !stopped {
        let conf = histogram(l.links.iter().map(|&i| l.confidence.p[i]), 0.0, 1.0, 10);
        let labels: Vec<String> = (0..10).map(|k| format!("{:.1}", k as f64 / 10.0)).collect();
        let _ = write!(h, "<section><h2>Confidence of the links written</h2><p>The chance that each link is right, given the other candidates of its records (under the one-to-one constraint). Cut-off in force: {}.</p>", cutoff(l.cutoff));
        h.push_str(&bar_chart(
            &labels,
            &conf,
            "confidence (bin start)",
            "links (log scale)",
            TEAL,
            true,
        ));
        let _ = write!(h, "</section>");
    }

    if let Some(rows) = ctx.tune.filter(|r| !r.is_empty()) {
        let _ = write!(h, "<section><h2>Blocking trade-off (from dovetail tune)</h2><p>Looser blocking keeps more true pairs but gives each record more false candidates; the dark bars are what is left after the forecast mismatches.</p>");
        h.push_str(&tune_chart(rows));
        let _ = write!(h, "<table>");
        head_row(
            &mut h,
            &[
                "scheme",
                "name",
                "pairs",
                "d",
                "completeness",
                "forecast error",
                "expected correct",
            ],
        );
        for (k, r) in rows.iter().enumerate() {
            row(
                &mut h,
                &[
                    &format!("#{}", k + 1),
                    &r.scheme,
                    &format!("#{}", r.pairs),
                    &format!("#{}", ratio(r.d)),
                    &format!("#{}", percent(r.completeness)),
                    &format!("#{}", r.forecast_error.map_or("-".to_string(), percent)),
                    &format!("#{}", percent(r.expected_correct)),
                ],
            );
        }
        let _ = write!(h, "</table></section>");
    }

    if let Some(o) = ctx.outcomes {
        let _ = write!(h, "<section id=\"unlinked\"><h2>Why records stayed unlinked</h2><p>Every record is either in links.csv or in unlinked_left.csv / unlinked_right.csv with one of these reasons (and its most likely candidate, for review).</p><table>");
        head_row(
            &mut h,
            &["reason", "left records", "right records", "what it means"],
        );
        let (left, right) = (o.count_list(true), o.count_list(false));
        let (mut tl, mut tr) = (0, 0);
        for ((r, nl), (_, nr)) in left.iter().zip(&right) {
            if *nl + *nr == 0 && *r == super::UnlinkedReason::NotIdentified {
                continue;
            }
            tl += nl;
            tr += nr;
            row(
                &mut h,
                &[
                    r.as_str(),
                    &format!("#{nl}"),
                    &format!("#{nr}"),
                    &r.meaning(),
                ],
            );
        }
        let _ = write!(
            h,
            "<tr class=\"total\"><td>all unlinked</td><td class=\"num\">{tl}</td><td class=\"num\">{tr}</td><td>of {} left and {} right records; {} linked</td></tr></table></section>",
            prep.records.n_left(),
            prep.records.n_right(),
            l.links.len()
        );

        let _ = write!(h, "<section><h2>First pairs for clerical review</h2>");
        if review.is_empty() {
            let _ = write!(h, "<p>No pair falls in the review band.</p>");
        } else {
            let _ = write!(h, "<p>The pairs closest to even odds, where a clerk's decision matters most (all {} of them are in review.csv). Confidences are rounded down, so none looks above the cut-off {} unless it is; the status says what was done.</p><table class=\"review\"><tr><th>left id</th><th>right id</th><th>confidence</th><th>status</th>", review.len(), cutoff(l.cutoff));
            for f in &prep.config.field {
                let _ = write!(h, "<th>{}</th>", escape(&f.name));
            }
            let _ = write!(h, "</tr>");
            for &i in review.iter().take(15) {
                let (la, rb) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
                let status = o.status(i);
                let class = if status == super::PairStatus::Linked {
                    "linked"
                } else {
                    "not-linked"
                };
                let _ = write!(
                    h,
                    "<tr class=\"{class}\"><td>{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"status\">{}</td>",
                    escape(&prep.records.left_ids[la]),
                    escape(&prep.records.right_ids[rb]),
                    crate::numbers::confidence(l.confidence.p[i], l.cutoff, 3),
                    escape(status.words())
                );
                for f in &prep.config.field {
                    let lv = prep.left.value(f.left_column(), la);
                    let rv = prep.right.value(f.right_column(), rb);
                    let _ = write!(
                        h,
                        "<td class=\"value\">{}<br>{}</td>",
                        escape(&lv),
                        escape(&rv)
                    );
                }
                let _ = write!(h, "</tr>");
            }
            let _ = write!(h, "</table>");
        }
        let _ = write!(h, "<p>To decide them one at a time in a browser, run <code>dovetail review</code> on this folder; the decisions go to decisions.csv, and a run with <code>decisions</code> set under [link] applies them.</p></section>");
    }
    if let Some(d) = &prep.decisions {
        let _ = write!(
            h,
            "<section id=\"decisions\"><h2>Clerical decisions applied</h2><p>From the decisions file ({} lines, the last per pair in force): {} pair(s) decided the same person are links whatever their weight, and their records take no other link; {} pair(s) decided different people are never linked; {} left undecided (can't tell). The decided pairs also labelled the fit, as known true pairs. {}No conflict was found: no record is the same person as two others.</p></section>",
            d.lines,
            d.same_count,
            d.different_count,
            d.unsure_count,
            if d.not_candidates > 0 {
                format!("{} decided pair(s) are not candidate pairs of this run and were not applied. ", d.not_candidates)
            } else {
                String::new()
            }
        );
    }
    let _ = write!(h, "{AUDIT_MARK}{AUDIT_END}");

    inputs_section(&mut h, prep);

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

/// The inputs (path, rows, bytes, SHA-256) and the config's fields, passes and settings.
fn inputs_section(h: &mut String, prep: &Prepared) {
    let _ = write!(h, "<section id=\"inputs\"><h2>Inputs and settings</h2><p>Enough to repeat the run and to check that the same files were used (summary.json's manifest holds the whole config).</p><table class=\"inputs\">");
    head_row(h, &["side", "file and its SHA-256", "records", "bytes"]);
    for (side, t) in [("left", &prep.left), ("right", &prep.right)] {
        let _ = write!(
            h,
            "<tr><td>{side}</td><td class=\"path\">{}<br><span class=\"hash\">SHA-256 {}</span></td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
            escape(&t.path.display().to_string()),
            escape(&t.sha256),
            t.len(),
            t.bytes
        );
    }
    let _ = write!(h, "</table><h3>Compared fields</h3><table>");
    head_row(
        h,
        &[
            "field",
            "left column",
            "right column",
            "method",
            "bands",
            "value frequency",
            "how the values are read",
        ],
    );
    for f in &prep.config.field {
        let bands = f.bands();
        let bands = if bands.is_empty() {
            "-".to_string()
        } else {
            bands
                .iter()
                .map(|&b| setting(b))
                .collect::<Vec<_>>()
                .join(", ")
        };
        // The method as the config spells it.
        let method = serde_json::to_value(f.method)
            .ok()
            .and_then(|v| v.as_str().map(str::to_string))
            .unwrap_or_default();
        row(
            h,
            &[
                &f.name,
                f.left_column(),
                f.right_column(),
                &method,
                &bands,
                if f.frequency { "yes" } else { "no" },
                &reading_of(f),
            ],
        );
    }
    let _ = write!(h, "</table><h3>Blocking passes</h3><table>");
    head_row(
        h,
        &["pass", "keys", "pairs made", "blocks", "blocks skipped"],
    );
    for (s, b) in prep.pass_stats.iter().zip(&prep.config.block) {
        let mut keys = b.keys.join(" + ");
        if let Some(w) = b.window {
            keys.push_str(&format!(" (sorted neighbourhood, window {w})"));
        }
        row(
            h,
            &[
                &s.name,
                &keys,
                &format!("#{}", s.pairs),
                &format!("#{}", s.blocks),
                &format!("#{}", s.skipped.len()),
            ],
        );
    }
    let link = &prep.config.link;
    let _ = write!(
        h,
        "</table><p class=\"small\">Candidate pairs after joining the passes: {}. Links: confidence cut-off {}{}; review band {} to {}. Seed {}; {} bootstrap replicates.</p></section>",
        prep.cands.len(),
        cutoff(link.min_confidence),
        link.target_precision
            .map_or(String::new(), |t| format!(" (replaced by the cut-off that meets the target precision {})", percent(t))),
        cutoff(link.review_band[0]),
        cutoff(link.review_band[1]),
        prep.config.assess.seed,
        prep.config.assess.replicates
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backticks_become_code() {
        assert_eq!(
            prose("field `a<b` never agreed"),
            "field <code>a&lt;b</code> never agreed"
        );
        assert_eq!(prose("one ` only"), "one ` only");
    }

    #[test]
    fn escapes_markup() {
        // The five characters HTML requires escaping in text and attributes (WHATWG HTML).
        assert_eq!(
            escape("<script>\"a\" & 'b'</script>"),
            "&lt;script&gt;&quot;a&quot; &amp; &#39;b&#39;&lt;/script&gt;"
        );
    }
}
