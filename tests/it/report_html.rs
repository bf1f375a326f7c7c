//! report.html: self-contained, escaped, and rendered by a real browser (issue 9).

use crate::common::*;
use std::path::Path;
use std::process::Command;

fn link(config: &Path, out: &Path) {
    let o = run_link(config, out, &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
}

/// Fails on anything that would make the page load something from elsewhere.
fn assert_self_contained(html: &str) {
    for bad in [
        "<script", "<link", "<img", "<iframe", "src=", "href=", "url(", "@import",
    ] {
        assert!(!html.contains(bad), "report.html contains {bad}");
    }
    // The only address allowed is the SVG namespace name, which is never fetched.
    let rest = html.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    assert!(
        !rest.contains("http:") && !rest.contains("https:"),
        "report.html names an address"
    );
}

#[test]
fn record_values_are_escaped() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = format!("{SMALL_CONFIG}[link]\nreview_band = [0.0, 1.0]\n");
    write(dir.path(), "config.toml", &cfg);
    let left = "id,name,birth,town\n1,<script>alert(1)</script>,1980-01-02,\"Orlow & \"\"Sons\"\"\"\n2,Bram Tell,1975-06-30,Selwick\n";
    let right = "id,name,birth,town\na,<script>alert(1)</script>,1980-01-02,\"Orlow & \"\"Sons\"\"\"\nb,Bram Tel,1975-06-30,Selwick\n";
    write(dir.path(), "left.csv", left);
    write(dir.path(), "right.csv", right);
    let out = dir.path().join("out");
    link(&dir.path().join("config.toml"), &out);
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert_self_contained(&html);
    assert!(
        html.contains("&lt;script&gt;alert(1)&lt;/script&gt;"),
        "escaped value shown"
    );
    assert!(html.contains("Orlow &amp; &quot;Sons&quot;"));
}

fn chromium() -> Option<&'static str> {
    ["/usr/bin/chromium", "/usr/bin/chromium-browser"]
        .into_iter()
        .find(|p| Path::new(p).exists())
}

#[test]
fn sample_report_renders_in_a_real_browser() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out");
    link(&root().join("config-examples/sample.toml"), &out);
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert_self_contained(&html);
    for part in [
        "Can these fields support one-to-one linkage?",
        "<svg",
        "Before anyone acts on these links",
    ] {
        assert!(html.contains(part), "missing {part}");
    }
    let Some(browser) = chromium() else {
        // .ci/run installs Debian's chromium; elsewhere the browser check is skipped.
        assert!(
            std::env::var("CI").is_err(),
            "CI must have chromium (see .ci/run)"
        );
        eprintln!("chromium not installed: browser rendering not checked");
        return;
    };
    let png = dir.path().join("report.png");
    let status = Command::new(browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
            "--window-size=1100,2400",
        ])
        .arg(format!(
            "--user-data-dir={}",
            dir.path().join("profile").display()
        ))
        .arg(format!("--screenshot={}", png.display()))
        .arg(format!("file://{}", out.join("report.html").display()))
        .output()
        .expect("run chromium");
    assert!(
        status.status.success(),
        "{}",
        String::from_utf8_lossy(&status.stderr)
    );
    let decoder = png::Decoder::new(std::fs::File::open(&png).expect("screenshot written"));
    let mut reader = decoder.read_info().expect("a PNG");
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).expect("a frame");
    assert_eq!((info.width, info.height), (1100, 2400));
    // Not blank: a good share of pixels differ from the page background.
    let channels = info.color_type.samples();
    let background = &buf[..channels];
    let pixels = buf.len() / channels;
    let differing = buf.chunks(channels).filter(|p| p != &background).count();
    assert!(
        differing * 20 > pixels,
        "only {differing} of {pixels} pixels differ from the background"
    );
    // Kept for people to look at: report-sample.png in the target folder (CARGO_TARGET_DIR
    // when set, else target/).
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(|| root().join("target"));
    let _ = std::fs::create_dir_all(&target);
    let _ = std::fs::copy(&png, target.join("report-sample.png"));
}

/// `dovetail link --quiet` on a config with the run date fixed by SOURCE_DATE_EPOCH.
fn link_at(config: &Path, out: &Path, epoch: &str, extra: &[&str]) -> std::process::Output {
    Command::new(bin())
        .args(["link", "--quiet", "--config"])
        .arg(config)
        .arg("--out")
        .arg(out)
        .args(extra)
        .env("SOURCE_DATE_EPOCH", epoch)
        .output()
        .expect("run dovetail")
}

/// The page's text outside its charts and tags, for checks on the prose.
fn prose_of(html: &str) -> String {
    let mut text = String::new();
    let mut rest = html;
    while let Some(start) = rest.find("<svg") {
        text.push_str(&rest[..start]);
        rest = rest[start..]
            .find("</svg>")
            .map_or("", |e| &rest[start + e + 6..]);
    }
    text.push_str(rest);
    let mut out = String::new();
    let mut in_tag = false;
    for c in text.chars() {
        match c {
            '<' => in_tag = true,
            '>' => {
                in_tag = false;
                out.push(' ');
            }
            _ if !in_tag => out.push(c),
            _ => {}
        }
    }
    out
}

/// Any number written with an exponent (1.36e-2, 2E+5) in the text.
fn exponent_numbers(text: &str) -> Vec<String> {
    let b = text.as_bytes();
    let mut found = Vec::new();
    for i in 1..b.len().saturating_sub(1) {
        if (b[i] == b'e' || b[i] == b'E')
            && b[i - 1].is_ascii_digit()
            && (b[i + 1].is_ascii_digit()
                || ((b[i + 1] == b'-' || b[i + 1] == b'+')
                    && b.get(i + 2).is_some_and(u8::is_ascii_digit)))
        {
            found.push(text[i.saturating_sub(8)..(i + 4).min(text.len())].to_string());
        }
    }
    found
}

#[test]
fn report_stands_alone_for_a_board() {
    // Issue 18: the page carries the warnings, inputs, config, date, recall, the reasons
    // records stayed unlinked and what to do next; the sample run (made by `dovetail synth`)
    // has d < 1.
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out");
    let o = link_at(
        &root().join("config-examples/sample.toml"),
        &out,
        "1700000000",
        &[],
    );
    assert!(o.status.success(), "{}", stderr(&o));
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert_self_contained(&html);
    let s: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("summary.json")).unwrap()).unwrap();
    // The date: 1,700,000,000 s after the epoch (date -u -d @1700000000, GNU coreutils).
    assert_eq!(s["manifest"]["run_date"], "2023-11-14T22:13:20Z");
    assert!(html.contains("Run on 2023-11-14 22:13:20 (UTC)"));
    assert!(html.contains(&format!("dovetail {}", s["version"].as_str().unwrap())));
    // The inputs with their hashes, rows and bytes.
    for side in ["left", "right"] {
        let m = &s["manifest"][side];
        assert!(html.contains(m["sha256"].as_str().unwrap()), "{side} hash");
        assert!(html.contains(&format!("<td class=\"num\">{}</td>", m["bytes"])));
    }
    // The config: fields with their columns, method and bands; passes with keys and pairs.
    assert!(html.contains(
        "<td>given_name</td><td>first_name</td><td>jaro-winkler</td><td>0.94, 0.85</td>"
    ));
    for p in s["passes"].as_array().unwrap() {
        let keys: Vec<&str> = p["keys"]
            .as_array()
            .unwrap()
            .iter()
            .map(|k| k.as_str().unwrap())
            .collect();
        assert!(
            html.contains(&format!(
                "<td>{}</td><td>{}</td><td class=\"num\">{}</td>",
                p["name"].as_str().unwrap(),
                keys.join(" + "),
                p["pairs"]
            )),
            "pass {p}"
        );
    }
    // The warnings: the sample raises none, and the page says so.
    let warnings = s["warnings"].as_array().unwrap();
    assert!(warnings.is_empty());
    assert!(html.contains("<h2>Warnings</h2>"));
    assert!(html.contains("None: the run raised no warnings."));
    // The estimates with their intervals.
    for part in [
        "recall among candidates",
        "pair completeness",
        "recall over all true pairs",
        "95% interval",
    ] {
        assert!(html.contains(part), "missing {part}");
    }
    let rec = s["estimated_recall_interval"].as_array().unwrap();
    let pct = |x: &serde_json::Value| dovetail::numbers::percent(x.as_f64().unwrap());
    assert!(html.contains(&format!("{}–{}", pct(&rec[0]), pct(&rec[1]))));
    // The reasons records stayed unlinked: per side they add up to the unlinked file's rows
    // and to the records not linked.
    let links = s["links"].as_u64().unwrap() as usize;
    for (side, file, n) in [
        (
            "left",
            "unlinked_left.csv",
            s["left_records"].as_u64().unwrap(),
        ),
        (
            "right",
            "unlinked_right.csv",
            s["right_records"].as_u64().unwrap(),
        ),
    ] {
        let counts = s["unlinked_reasons"][side].as_object().unwrap();
        let total: u64 = counts.values().map(|v| v.as_u64().unwrap()).sum();
        let (_, rows) = read_csv(&out.join(file));
        assert_eq!(total as usize, rows.len(), "{side}");
        assert_eq!(total as usize + links, n as usize, "{side}");
        for r in &rows {
            assert_eq!(
                counts[&r[1]].as_u64().map(|_| ()),
                Some(()),
                "unknown reason {}",
                r[1]
            );
        }
        // The old catch-all is gone: a record whose candidates are all implausible says so.
        assert!(counts["no plausible candidate"].as_u64().unwrap() > 0);
        assert!(!counts.contains_key("not chosen by the one-to-one optimum"));
    }
    assert!(html.contains("<h2>Why records stayed unlinked</h2>"));
    let left = &s["unlinked_reasons"]["left"];
    let right = &s["unlinked_reasons"]["right"];
    assert!(html.contains(&format!(
        "<td>no plausible candidate</td><td class=\"num\">{}</td><td class=\"num\">{}</td>",
        left["no plausible candidate"], right["no plausible candidate"]
    )));
    // What to do next, in the page and in summary.json, each item with its number.
    let steps = s["next_steps"].as_array().unwrap();
    assert!(html.contains("<h2>What to do next</h2>"));
    let review = read_csv(&out.join("review.csv")).1.len();
    assert!(steps.iter().any(|x| x
        .as_str()
        .unwrap()
        .contains(&format!("Review the {review} pair(s)"))));
    for x in steps {
        let text = x.as_str().unwrap();
        let shown: String = escape_for_test(text)
            .split('`')
            .enumerate()
            .map(|(k, part)| {
                if k % 2 == 1 {
                    format!("<code>{part}</code>")
                } else {
                    part.to_string()
                }
            })
            .collect();
        assert!(html.contains(&format!("<li>{shown}</li>")), "{text}");
    }
    // The review table has a status column; its confidences never cross the cut-off.
    assert!(html.contains("<th>confidence</th><th>status</th>"));
    let cutoff = s["confidence_cutoff"].as_f64().unwrap();
    let (head, rows) = read_csv(&out.join("review.csv"));
    let (ks, kc) = (
        head.iter().position(|h| h == "status").unwrap(),
        head.iter().position(|h| h == "confidence").unwrap(),
    );
    for r in &rows {
        let c: f64 = r[kc].parse().unwrap();
        assert_eq!(r[ks] == "linked", c >= cutoff, "{r:?}");
    }
    // d < 1: the needed separation is negative, shown and explained.
    let d = s["mean_false_degree"].as_f64().unwrap();
    assert!(d < 1.0, "the sample's d is {d}");
    let needed = s["separation_needed_nats"].as_f64().unwrap();
    assert!((needed - 0.5 * d.ln()).abs() < 1e-12 && needed < 0.0);
    let shown = dovetail::numbers::nats(needed);
    assert!(shown.starts_with('−'), "{shown}");
    assert!(html.contains(&format!("(1/2) ln d = {shown} nats is negative")));
    assert!(html.contains("no separation is needed"));
    // One formatter per kind: no exponents in the prose, and the margin printed one way.
    let mut text = prose_of(&html);
    for side in ["left", "right"] {
        // Hex digits are not numbers with exponents.
        text = text.replace(s["manifest"][side]["sha256"].as_str().unwrap(), "");
    }
    assert!(
        exponent_numbers(&text).is_empty(),
        "{:?}",
        exponent_numbers(&text)
    );
    let margin = dovetail::numbers::ratio(s["margin"].as_f64().unwrap());
    assert!(
        text.matches(&format!("sqrt(d)·B = {margin}")).count() >= 2,
        "{margin}"
    );
    for r in s["verdict_reasons"].as_array().unwrap() {
        assert!(exponent_numbers(r.as_str().unwrap()).is_empty(), "{r}");
    }
    // The cautions stay.
    assert!(html.contains("Before anyone acts on these links"));
    assert!(html.contains("data-protection law"));
}

/// The page's escaping of plain text, for comparing prose.
fn escape_for_test(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
        .replace('\'', "&#39;")
}

#[test]
fn serious_warnings_come_first_and_set_apart() {
    // Run in process so that a serious finding can be planted among the warnings.
    use dovetail::pipeline::{self, Silent, SERIOUS_PREFIX};
    let dir = tempfile::tempdir().unwrap();
    let cfg = write(dir.path(), "config.toml", &sample_config_text());
    let config = dovetail::config::Config::from_path(&cfg).unwrap();
    let mut prep = pipeline::prepare(config, &Silent).unwrap();
    prep.warnings
        .push("fields `postcode` and `phone` move together among candidate pairs (planted)".into());
    prep.warnings.push(format!(
        "{SERIOUS_PREFIX}field `sex` is coded M/F on one side and 1/2 on the other"
    ));
    let linkage = pipeline::link(&mut prep, &Silent).expect("link");
    let out = dir.path().join("out");
    dovetail::report::write_linkage(&out, &prep, &linkage, false).unwrap();
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    let serious = html
        .find("field <code>sex</code> is coded M/F")
        .expect("serious warning shown");
    let other = html
        .find("move together among candidate pairs")
        .expect("other warning");
    assert!(serious < other, "serious first");
    assert!(!html.contains("serious: field"), "prefix stripped");
    let box_start = html.find("<div class=\"serious\">").unwrap();
    assert!(box_start < serious && html[box_start..serious].find("</div>").is_none());
    assert!(html.contains("Resolve the 1 serious warning(s)"));
}
