//! `dovetail review` in a real browser (issue 21): headless Debian chromium driven through
//! chromedriver (the W3C WebDriver protocol, spoken over plain HTTP), keyboard decisions,
//! the decisions file, resuming after a restart, the server's refusals, and a `link` that
//! applies the decisions.

use crate::common::*;
use dovetail::review::{in_force, read_decisions, Decision};
use std::collections::{HashMap, HashSet};
use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// A review run of the sample tables with a band wide enough for 34 pairs.
fn review_run(dir: &Path, extra: &str) -> PathBuf {
    let cfg = sample_config_text().replace(
        "min_confidence = 0.5",
        &format!("min_confidence = 0.5\nreview_band = [0.05, 0.995]\n{extra}"),
    );
    let config = write(dir, "config.toml", &cfg);
    let out = dir.join("out");
    let o = run_link(&config, &out, &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    out
}

/// A running `dovetail review` and the address it printed.
struct Served {
    child: Child,
    url: String,
    port: u16,
    token: String,
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn serve(folder: &Path, log: &Path, extra: &[&str]) -> Served {
    let log = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(log)
        .unwrap();
    let mut child = Command::new(bin())
        .arg("review")
        .arg(folder)
        .args(["--reviewer", "tester"])
        .args(extra)
        .stdout(Stdio::piped())
        .stderr(Stdio::from(log))
        .spawn()
        .expect("start dovetail review");
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let url = loop {
        let line = lines.next().expect("the address").unwrap();
        if line.starts_with("http://") {
            break line;
        }
    };
    // Keep reading stdout in the background so the server never blocks on it.
    std::thread::spawn(move || for _ in lines {});
    let rest = url
        .strip_prefix("http://127.0.0.1:")
        .expect("a loopback address");
    let (port, token) = rest.split_once("/?t=").expect("port and token");
    Served {
        port: port.parse().unwrap(),
        token: token.to_string(),
        url: url.clone(),
        child,
    }
}

/// One HTTP request over a fresh connection; returns the status and the body. The body is
/// read by its Content-Length (chromedriver keeps connections open), else to the end.
fn http(port: u16, head: &str, body: &str) -> (u16, String) {
    let mut s = TcpStream::connect(("127.0.0.1", port)).expect("connect");
    s.set_read_timeout(Some(Duration::from_secs(60))).unwrap();
    let req = format!(
        "{head}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        body.len()
    );
    s.write_all(req.as_bytes()).unwrap();
    let mut reader = BufReader::new(s);
    let mut status_line = String::new();
    let _ = reader.read_line(&mut status_line);
    let status = status_line
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let (mut length, mut chunked) = (None, false);
    loop {
        let mut h = String::new();
        if reader.read_line(&mut h).unwrap_or(0) == 0 {
            break;
        }
        let h = h.trim_end();
        if h.is_empty() {
            break;
        }
        let lower = h.to_ascii_lowercase();
        if let Some(v) = lower.strip_prefix("content-length:") {
            length = v.trim().parse::<usize>().ok();
        }
        if lower.starts_with("transfer-encoding:") && lower.contains("chunked") {
            chunked = true;
        }
    }
    let mut raw = Vec::new();
    if chunked {
        loop {
            let mut size = String::new();
            let _ = reader.read_line(&mut size);
            let n = usize::from_str_radix(size.trim(), 16).unwrap_or(0);
            if n == 0 {
                break;
            }
            let mut chunk = vec![0; n + 2];
            reader.read_exact(&mut chunk).unwrap();
            raw.extend_from_slice(&chunk[..n]);
        }
    } else if let Some(n) = length {
        raw = vec![0; n];
        reader.read_exact(&mut raw).unwrap();
    } else {
        let _ = reader.read_to_end(&mut raw);
    }
    (status, String::from_utf8_lossy(&raw).to_string())
}

/// A minimal WebDriver client.
struct Driver {
    child: Child,
    port: u16,
    session: String,
}

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = http(
            self.port,
            &format!(
                "DELETE /session/{} HTTP/1.1\r\nHost: 127.0.0.1:{}",
                self.session, self.port
            ),
            "",
        );
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

impl Driver {
    fn start(browser: &str, driver: &str, profile: &Path) -> Driver {
        let port = free_port();
        let child = Command::new(driver)
            .arg(format!("--port={port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start chromedriver");
        let t0 = Instant::now();
        while TcpStream::connect(("127.0.0.1", port)).is_err() {
            assert!(
                t0.elapsed() < Duration::from_secs(30),
                "chromedriver did not start"
            );
            std::thread::sleep(Duration::from_millis(100));
        }
        let caps = serde_json::json!({"capabilities": {"alwaysMatch": {
            "browserName": "chrome",
            "goog:chromeOptions": {"binary": browser, "args": [
                "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--no-first-run", "--disable-background-networking", "--disable-sync",
                "--disable-component-update", "--window-size=1200,900",
                format!("--user-data-dir={}", profile.display()),
            ]}
        }}});
        let mut d = Driver {
            child,
            port,
            session: String::new(),
        };
        let v = d.call("POST", "/session", &caps);
        d.session = v["value"]["sessionId"]
            .as_str()
            .unwrap_or_else(|| panic!("no session: {v}"))
            .to_string();
        d
    }

    fn call(&self, method: &str, path: &str, body: &serde_json::Value) -> serde_json::Value {
        let body = if method == "GET" {
            String::new()
        } else {
            body.to_string()
        };
        let (status, text) = http(
            self.port,
            &format!(
                "{method} {path} HTTP/1.1\r\nHost: 127.0.0.1:{}\r\nContent-Type: application/json",
                self.port
            ),
            &body,
        );
        let v: serde_json::Value = serde_json::from_str(&text)
            .unwrap_or_else(|_| panic!("webdriver {path}: {status} {text}"));
        assert_eq!(status, 200, "webdriver {path}: {v}");
        v
    }

    fn at(&self, path: &str) -> String {
        format!("/session/{}{path}", self.session)
    }

    fn go(&self, url: &str) {
        self.call("POST", &self.at("/url"), &serde_json::json!({ "url": url }));
    }

    fn js(&self, script: &str) -> serde_json::Value {
        let v = self.call(
            "POST",
            &self.at("/execute/sync"),
            &serde_json::json!({"script": script, "args": []}),
        );
        v["value"].clone()
    }

    fn key(&self, k: &str) {
        self.call(
            "POST",
            &self.at("/actions"),
            &serde_json::json!({"actions": [{"type": "key", "id": "keyboard", "actions": [
                {"type": "keyDown", "value": k}, {"type": "keyUp", "value": k}]}]}),
        );
    }

    /// Waits until `script` returns `want`.
    fn wait_for(&self, script: &str, want: &serde_json::Value) {
        let t0 = Instant::now();
        loop {
            let got = self.js(script);
            if &got == want {
                return;
            }
            assert!(
                t0.elapsed() < Duration::from_secs(20),
                "{script}: {got} instead of {want}"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    fn current_pair(&self) -> (String, String) {
        let v = self.js(
            "return [document.getElementById('left-id').textContent, document.getElementById('right-id').textContent]",
        );
        (
            v[0].as_str().unwrap().to_string(),
            v[1].as_str().unwrap().to_string(),
        )
    }

    fn saved(&self) -> u64 {
        self.js("return Number(document.body.dataset.saved || 0)")
            .as_u64()
            .unwrap()
    }

    fn screenshot(&self) -> Vec<u8> {
        let v = self.call("GET", &self.at("/screenshot"), &serde_json::Value::Null);
        base64_decode(v["value"].as_str().unwrap())
    }
}

fn base64_decode(s: &str) -> Vec<u8> {
    let val = |c: u8| match c {
        b'A'..=b'Z' => c - b'A',
        b'a'..=b'z' => c - b'a' + 26,
        b'0'..=b'9' => c - b'0' + 52,
        b'+' => 62,
        _ => 63,
    };
    let bytes: Vec<u8> = s.bytes().filter(|&c| c != b'=' && c != b'\n').collect();
    let mut out = Vec::with_capacity(bytes.len() * 3 / 4);
    for chunk in bytes.chunks(4) {
        let mut acc = 0u32;
        for (i, &c) in chunk.iter().enumerate() {
            acc |= (val(c) as u32) << (18 - 6 * i);
        }
        for i in 0..chunk.len() - 1 {
            out.push((acc >> (16 - 8 * i)) as u8);
        }
    }
    out
}

fn tool(paths: &[&'static str]) -> Option<&'static str> {
    paths.iter().copied().find(|p| Path::new(p).exists())
}

/// The server's non-loopback IPv4 addresses, as `hostname -I` lists them.
fn other_addresses() -> Vec<std::net::IpAddr> {
    let Ok(o) = Command::new("hostname").arg("-I").output() else {
        return Vec::new();
    };
    String::from_utf8_lossy(&o.stdout)
        .split_whitespace()
        .filter_map(|a| a.parse().ok())
        .filter(|a: &std::net::IpAddr| !a.is_loopback())
        .collect()
}

#[test]
fn refuses_requests_without_the_token_from_elsewhere_or_cross_origin() {
    let dir = tempfile::tempdir().unwrap();
    let out = review_run(dir.path(), "");
    let log = dir.path().join("server.log");
    let s = serve(&out, &log, &[]);
    let p = s.port;
    let host = format!("Host: 127.0.0.1:{p}");
    let get =
        |path: &str, extra: &str| http(p, &format!("GET {path} HTTP/1.1\r\n{host}{extra}"), "").0;
    assert_eq!(get("/", ""), 403, "the page without the token");
    assert_eq!(
        get("/?t=0123456789abcdef0123456789abcdef", ""),
        403,
        "a wrong token"
    );
    assert_eq!(get(&format!("/?t={}", s.token), ""), 200);
    // Self-contained: nothing on the page names another address or loads a file.
    let (_, page) = http(p, &format!("GET /?t={} HTTP/1.1\r\n{host}", s.token), "");
    for bad in ["http:", "https:", "src=", "<link", "@import", "url("] {
        assert!(!page.contains(bad), "the page holds {bad}");
    }
    assert!(page.contains("same person") && page.contains("<script nonce="));
    assert_eq!(get("/api/run", ""), 403, "the API without the token header");
    let tok = format!("\r\nX-Dovetail-Token: {}", s.token);
    assert_eq!(get("/api/run", &tok), 200);
    // DNS rebinding: the right token but another name in Host.
    let (status, _) = http(
        p,
        &format!("GET /?t={} HTTP/1.1\r\nHost: rebind.example:{p}", s.token),
        "",
    );
    assert_eq!(status, 403);
    let (rows_head, rows) = read_csv(&out.join("review.csv"));
    assert_eq!(rows_head[0], "left_id");
    let body = format!(
        "{{\"left_id\":\"{}\",\"right_id\":\"{}\",\"decision\":\"same\"}}",
        rows[0][0], rows[0][1]
    );
    let post = |extra: &str| {
        http(
            p,
            &format!("POST /api/decide HTTP/1.1\r\n{host}{tok}{extra}"),
            &body,
        )
        .0
    };
    assert_eq!(
        post("\r\nContent-Type: application/json\r\nOrigin: http://attacker.example"),
        403,
        "a cross-origin post"
    );
    assert_eq!(
        post("\r\nContent-Type: text/plain"),
        403,
        "a post a plain form could send"
    );
    assert_eq!(
        post("\r\nContent-Type: application/json\r\nSec-Fetch-Site: cross-site"),
        403
    );
    assert!(
        !out.join("decisions.csv").exists()
            || read_decisions(&out.join("decisions.csv"))
                .unwrap()
                .is_empty(),
        "nothing refused was saved"
    );
    assert_eq!(
        post(&format!(
            "\r\nContent-Type: application/json\r\nOrigin: http://127.0.0.1:{p}"
        )),
        200
    );
    assert_eq!(read_decisions(&out.join("decisions.csv")).unwrap().len(), 1);
    // Loopback only: no other address of this machine reaches the port.
    for a in other_addresses() {
        let r =
            TcpStream::connect_timeout(&std::net::SocketAddr::new(a, p), Duration::from_secs(2));
        assert!(r.is_err(), "the server answered on {a}");
    }
}

#[test]
fn keyboard_review_in_chromium_saves_resumes_and_feeds_back() {
    let dir = tempfile::tempdir().unwrap();
    let out = review_run(dir.path(), "");
    let (Some(browser), Some(driver)) = (
        tool(&["/usr/bin/chromium", "/usr/bin/chromium-browser"]),
        tool(&["/usr/bin/chromedriver"]),
    ) else {
        // .ci/run installs Debian's chromium and chromium-driver; elsewhere this is skipped.
        assert!(
            std::env::var("CI").is_err(),
            "CI must have chromium and chromedriver (see .ci/run)"
        );
        eprintln!("chromium or chromedriver not installed: the review page is not checked");
        return;
    };
    let truth =
        truth_pairs(&std::fs::read_to_string(root().join("sample-tables/truth.csv")).unwrap());
    let (_, rows) = read_csv(&out.join("review.csv"));
    let order: Vec<(String, String)> = rows.iter().map(|r| (r[0].clone(), r[1].clone())).collect();
    assert!(order.len() >= 30, "{} pairs to review", order.len());
    let log = dir.path().join("server.log");
    let served = serve(&out, &log, &[]);
    let d = Driver::start(browser, driver, &dir.path().join("profile"));
    d.go(&served.url);
    d.wait_for(
        "return document.body.dataset.ready",
        &serde_json::json!("yes"),
    );
    assert_eq!(d.current_pair(), order[0], "starts at the first pair");

    // A scripted clerk answers from the truth, with "can't tell" now and then.
    let mut expected: HashMap<(String, String), &str> = HashMap::new();
    let mut presses = 0;
    let decide = |d: &Driver, step: usize, expected: &mut HashMap<_, _>| {
        let pair = d.current_pair();
        let (k, word) = if step % 7 == 3 {
            ("c", "unsure")
        } else if truth.contains(&pair) {
            ("s", "same")
        } else {
            ("d", "different")
        };
        let before = d.saved();
        d.key(k);
        d.wait_for(
            "return Number(document.body.dataset.saved || 0)",
            &(before + 1).into(),
        );
        expected.insert(pair, word);
    };
    for step in 0..22 {
        decide(&d, step, &mut expected);
        presses += 1;
        if step == 10 {
            // Undo: back to the pair just decided, its decision taken back.
            let last = order[10].clone();
            let before = d.saved();
            d.key("\u{E003}");
            d.wait_for(
                "return Number(document.body.dataset.saved || 0)",
                &(before + 1).into(),
            );
            assert_eq!(d.current_pair(), last, "undo goes back to the pair");
            expected.remove(&last);
            d.wait_for(
                "return document.getElementById('verdict').textContent",
                &serde_json::json!(""),
            );
            presses += 1;
            // Decided again, this time from the truth.
            decide(&d, step + 1, &mut expected);
            presses += 1;
        }
    }
    assert!(presses >= 24);
    assert_eq!(
        d.js("return document.body.dataset.decided"),
        serde_json::json!("22")
    );
    // The other candidates are one key away.
    d.key("o");
    d.wait_for(
        "return document.getElementById('others').classList.contains('open')",
        &serde_json::json!(true),
    );
    let png = d.screenshot();
    assert!(png.starts_with(b"\x89PNG"), "a PNG screenshot");
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root().join("target"));
    let _ = std::fs::create_dir_all(&target);
    let _ = std::fs::write(target.join("review-page.png"), &png);

    // The decisions file holds every keystroke, the last word per pair as the clerk meant.
    let path = out.join("decisions.csv");
    let lines = read_decisions(&path).unwrap();
    assert_eq!(lines.len(), 24, "22 decisions, one undo, one decided again");
    assert!(lines.iter().any(|l| l.decision == Decision::Withdrawn));
    assert!(lines
        .iter()
        .all(|l| l.reviewer == "tester" && l.decided_at.ends_with('Z')));
    let force: HashMap<(String, String), &str> = in_force(&lines)
        .into_iter()
        .map(|l| ((l.left_id.clone(), l.right_id.clone()), l.decision.word()))
        .collect();
    assert_eq!(force, expected);

    // Killed and started again: nothing lost, and the page resumes at the first undecided
    // pair. The old token no longer works.
    let old_token = served.token.clone();
    drop(served);
    let served = serve(&out, &log, &[]);
    assert_ne!(served.token, old_token);
    let (status, _) = http(
        served.port,
        &format!(
            "GET /?t={old_token} HTTP/1.1\r\nHost: 127.0.0.1:{}",
            served.port
        ),
        "",
    );
    assert_eq!(status, 403);
    d.go(&served.url);
    d.wait_for(
        "return document.body.dataset.ready",
        &serde_json::json!("yes"),
    );
    let first_open = order
        .iter()
        .position(|p| !expected.contains_key(p))
        .unwrap();
    assert_eq!(
        d.js("return Number(document.body.dataset.index)"),
        serde_json::json!(first_open)
    );
    assert_eq!(d.current_pair(), order[first_open]);
    assert_eq!(
        d.js("return document.body.dataset.decided"),
        serde_json::json!("22")
    );
    drop(served);

    // The server's log lines say method, path and status, never a value, id or token.
    let log_text = std::fs::read_to_string(&log).unwrap();
    assert!(log_text.lines().count() >= 25, "{log_text}");
    let mut secrets: HashSet<String> = HashSet::new();
    let (head, _) = read_csv(&out.join("review.csv"));
    for r in &rows {
        secrets.insert(r[0].clone());
        secrets.insert(r[1].clone());
        for (c, v) in r.iter().enumerate() {
            if (head[c].ends_with("_left") || head[c].ends_with("_right")) && v.len() >= 3 {
                secrets.insert(v.clone());
            }
        }
    }
    secrets.insert(old_token);
    for line in log_text.lines() {
        let parts: Vec<&str> = line.split(' ').collect();
        assert_eq!(parts.len(), 4, "{line}");
        assert!(!parts[2].contains('?'), "{line}");
        for s in &secrets {
            assert!(!line.contains(s.as_str()), "the log shows a value: {line}");
        }
    }

    // A link run given the decisions applies them.
    let cfg = sample_config_text().replace(
        "min_confidence = 0.5",
        &format!(
            "min_confidence = 0.5\nreview_band = [0.05, 0.995]\ndecisions = \"{}\"",
            path.display()
        ),
    );
    let config = write(dir.path(), "config2.toml", &cfg);
    let out2 = dir.path().join("out2");
    let o = run_link(&config, &out2, &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let (_, links) = read_csv(&out2.join("links.csv"));
    let linked: HashSet<(String, String)> =
        links.iter().map(|r| (r[0].clone(), r[1].clone())).collect();
    let (mut same, mut different) = (0, 0);
    for (pair, word) in &expected {
        match *word {
            "same" => {
                same += 1;
                assert!(linked.contains(pair), "{pair:?} decided same is a link");
            }
            "different" => {
                different += 1;
                assert!(
                    !linked.contains(pair),
                    "{pair:?} decided different is no link"
                );
            }
            _ => {}
        }
    }
    assert!(
        same > 0 && different > 0,
        "{same} same, {different} different"
    );
    let summary: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out2.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["decisions"]["same_count"], same);
    assert_eq!(summary["decisions"]["different_count"], different);
    assert_eq!(summary["decisions"]["conflicts"], 0);
    let html = std::fs::read_to_string(out2.join("report.html")).unwrap();
    assert!(html.contains("Clerical decisions applied"));
}

#[test]
fn conflicting_decisions_stop_the_link_naming_both_lines() {
    let dir = tempfile::tempdir().unwrap();
    let (_, truth) = read_csv(&root().join("sample-tables/truth.csv"));
    let text = format!(
        "left_id,right_id,decision,reviewer,decided_at\n{},{},same,a,t\n{},{},same,a,t\n",
        truth[0][0], truth[0][1], truth[0][0], truth[1][1]
    );
    let path = write(dir.path(), "decisions.csv", &text);
    let cfg = sample_config_text().replace(
        "min_confidence = 0.5",
        &format!("min_confidence = 0.5\ndecisions = \"{}\"", path.display()),
    );
    let config = write(dir.path(), "config.toml", &cfg);
    let o = run_link(&config, &dir.path().join("out"), &["--quiet"]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(
        e.contains("decisions.csv") && e.contains("(line 2)") && e.contains("(line 3)"),
        "{e}"
    );
    assert_eq!(e.trim().lines().count(), 1, "one line: {e}");
    // An id that is not in its table names the line and column.
    let text = "left_id,right_id,decision\nNOPE,R0000001,different\n";
    write(dir.path(), "decisions.csv", text);
    let o = run_link(&config, &dir.path().join("out"), &["--quiet"]);
    let e = stderr(&o);
    assert!(
        e.contains("line 2") && e.contains("left_id") && e.contains("`NOPE`"),
        "{e}"
    );
}

/// A scripted clerk posts an answer from the truth for each pair, as the page would.
fn clerk_decides(s: &Served, pairs: &[(String, String)], truth: &HashSet<(String, String)>) {
    for (l, r) in pairs {
        let word = if truth.contains(&(l.clone(), r.clone())) {
            "same"
        } else {
            "different"
        };
        let body = serde_json::json!({"left_id": l, "right_id": r, "decision": word}).to_string();
        let (status, text) = http(
            s.port,
            &format!(
                "POST /api/decide HTTP/1.1\r\nHost: 127.0.0.1:{}\r\nX-Dovetail-Token: {}\r\nContent-Type: application/json",
                s.port, s.token
            ),
            &body,
        );
        assert_eq!(status, 200, "{text}");
    }
}

fn f1_of(links: &Path, truth: &HashSet<(String, String)>) -> f64 {
    let (_, rows) = read_csv(links);
    let (p, r) = precision_recall(&rows, truth);
    2.0 * p * r / (p + r)
}

#[test]
fn scripted_clerk_audit_holds_the_true_precision_and_decisions_improve_the_links() {
    // Issue 21's done-when on synth data: 20,000 noisy rows, a wide review band.
    let dir = tempfile::tempdir().unwrap();
    let syn = dir.path().join("syn");
    let o = run(&[
        "synth",
        "--rows",
        "20000",
        "--noise",
        "1.0",
        "--seed",
        "5",
        "--out",
        syn.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let cfg = std::fs::read_to_string(syn.join("config.toml"))
        .unwrap()
        .replace(
            "[link]",
            "[link]\nreview_band = [0.02, 0.98]\naudit_sample = 200",
        );
    let config = write(&syn, "config.toml", &cfg);
    let out = dir.path().join("out");
    let o = run_link(&config, &out, &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let truth = truth_pairs(&std::fs::read_to_string(syn.join("truth.csv")).unwrap());
    let (_, links) = read_csv(&out.join("links.csv"));
    let (true_precision, _) = precision_recall(&links, &truth);
    let f1_before = f1_of(&out.join("links.csv"), &truth);

    // The audit: 200 links, each answered from the truth through the audit page's server.
    let log = dir.path().join("audit.log");
    let (_, sample) = read_csv(&out.join("audit.csv"));
    assert_eq!(sample.len(), 200);
    let sample: Vec<(String, String)> = sample
        .iter()
        .map(|r| (r[0].clone(), r[1].clone()))
        .collect();
    let s = serve(&out, &log, &["--audit"]);
    clerk_decides(&s, &sample, &truth);
    drop(s);
    let o = run(&["audit", out.to_str().unwrap()]);
    assert!(o.status.success(), "{}", stderr(&o));
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(text.contains("Measured precision"), "{text}");
    let a: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("audit.json")).unwrap()).unwrap();
    let iv = &a["measured"]["interval"];
    let (lo, hi) = (iv[0].as_f64().unwrap(), iv[1].as_f64().unwrap());
    assert!(
        lo <= true_precision && true_precision <= hi,
        "true precision {true_precision} outside the measured interval [{lo}, {hi}]"
    );
    assert_eq!(a["measured"]["decided"], 200);
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("Precision measured by clerical review"));
    // The folder's record still vouches for every file it lists.
    let record: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("outputs.json")).unwrap()).unwrap();
    for f in record["files"].as_array().unwrap() {
        let name = f["name"].as_str().unwrap();
        let bytes = std::fs::read(out.join(name)).unwrap();
        assert_eq!(
            f["sha256"].as_str().unwrap(),
            dovetail::io::sha256_hex(&bytes),
            "{name}"
        );
    }

    // 300 review pairs decided from the truth (in a decisions file of their own), then a
    // re-link with the decisions.
    std::fs::rename(
        out.join("decisions.csv"),
        dir.path().join("audit-decisions.csv"),
    )
    .unwrap();
    let (_, review) = read_csv(&out.join("review.csv"));
    assert!(review.len() >= 300, "{} review pairs", review.len());
    let review: Vec<(String, String)> = review[..300]
        .iter()
        .map(|r| (r[0].clone(), r[1].clone()))
        .collect();
    let s = serve(&out, &log, &[]);
    clerk_decides(&s, &review, &truth);
    drop(s);
    let decisions = out.join("decisions.csv");
    let cfg2 = cfg.replace(
        "[link]",
        &format!("[link]\ndecisions = \"{}\"", decisions.display()),
    );
    let config2 = write(&syn, "config2.toml", &cfg2);
    let out2 = dir.path().join("out2");
    let o = run_link(&config2, &out2, &["--quiet"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let f1_after = f1_of(&out2.join("links.csv"), &truth);
    assert!(
        f1_after >= f1_before,
        "F1 {f1_before} before, {f1_after} after"
    );
    let (_, links2) = read_csv(&out2.join("links.csv"));
    let linked: HashSet<(String, String)> = links2
        .iter()
        .map(|r| (r[0].clone(), r[1].clone()))
        .collect();
    for pair in &review {
        assert_eq!(
            linked.contains(pair),
            truth.contains(pair),
            "{pair:?} not as decided"
        );
    }
    eprintln!("F1 {f1_before:.5} -> {f1_after:.5}; true precision {true_precision:.4} in [{lo:.4}, {hi:.4}]");
}

#[test]
fn two_tabs_posting_at_once_lose_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let out = review_run(dir.path(), "");
    let (_, rows) = read_csv(&out.join("review.csv"));
    let pairs: Vec<(String, String)> = rows.iter().map(|r| (r[0].clone(), r[1].clone())).collect();
    let s = serve(&out, &dir.path().join("log"), &[]);
    let (port, token) = (s.port, s.token.clone());
    // Two "tabs" post every pair's decision 5 times each, interleaved.
    let tabs: Vec<_> = ["same", "different"]
        .into_iter()
        .map(|word| {
            let (pairs, token) = (pairs.clone(), token.clone());
            std::thread::spawn(move || {
                for _ in 0..5 {
                    for (l, r) in &pairs {
                        let body = serde_json::json!({"left_id": l, "right_id": r, "decision": word});
                        let (status, _) = http(
                            port,
                            &format!("POST /api/decide HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\nX-Dovetail-Token: {token}\r\nContent-Type: application/json"),
                            &body.to_string(),
                        );
                        assert_eq!(status, 200);
                    }
                }
            })
        })
        .collect();
    for t in tabs {
        t.join().unwrap();
    }
    let lines = read_decisions(&out.join("decisions.csv")).unwrap();
    assert_eq!(
        lines.len(),
        2 * 5 * pairs.len(),
        "every post is one whole line"
    );
    assert_eq!(in_force(&lines).len(), pairs.len());
}
