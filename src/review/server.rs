//! The review page's web server: std only, loopback only, one thread per connection.
//!
//! In: a finished run's folder (review.csv or audit.csv, review_context.csv, summary.json)
//! and its decisions file. Out: the page (`page.html`, served by the binary: nothing is
//! fetched from the network), the pairs as JSON, and each decision appended, flushed and
//! synced to the decisions file before the answer goes back.
//!
//! Guards, each answered with 403: the socket is bound to 127.0.0.1 only; every request needs
//! the random token printed at start (`?t=` for the page, the `X-Dovetail-Token` header for
//! the API); the Host header must name the loopback address and the port (a DNS-rebinding
//! page has its own name there); a post must be JSON and come from the page's own origin.
//! Responses forbid framing, caching and referrers; the page's CSP allows only its own
//! nonce'd script and style and requests to itself.
//!
//! Log lines say the method, the path without its query, and the status; never a token, an
//! id or a value.

use super::{append_decision, read_decisions, Decision, DecisionLine};
use crate::{Error, Result};
use std::collections::{HashMap, HashSet};
use std::io::{BufRead, BufReader, Read, Write};
use std::net::{Ipv4Addr, SocketAddr, TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// The page, its style and its script, in one file.
const PAGE: &str = include_str!("page.html");
/// The largest request head and body read.
const MAX_HEAD: usize = 16 * 1024;
const MAX_BODY: usize = 64 * 1024;

/// What to serve.
#[derive(Debug, Clone)]
pub struct Options {
    /// The run folder.
    pub dir: PathBuf,
    /// Serve the audit sample (audit.csv) instead of the review list.
    pub audit: bool,
    /// The name written beside each decision.
    pub reviewer: String,
    /// The port (0: any free one).
    pub port: u16,
}

/// A bound server, ready to [`Server::serve`].
pub struct Server {
    listener: TcpListener,
    state: Arc<State>,
}

struct State {
    token: String,
    port: u16,
    /// The pairs, fields and context as JSON, without the decisions.
    payload: serde_json::Value,
    /// The pairs a decision may name.
    allowed: HashSet<(String, String)>,
    reviewer: String,
    decisions: Mutex<Decisions>,
    log: Mutex<Box<dyn Write + Send>>,
}

struct Decisions {
    file: std::fs::File,
    /// The decision in force per pair (withdrawn ones removed).
    in_force: HashMap<(String, String), Decision>,
    lines: usize,
}

fn input_err(path: &Path, what: impl Into<String>) -> Error {
    Error::input(what).with_file(path)
}

/// A random token of 32 hex digits from the system's random source.
fn token() -> Result<String> {
    let mut bytes = [0u8; 16];
    std::fs::File::open("/dev/urandom")
        .and_then(|mut f| f.read_exact(&mut bytes))
        .map_err(|e| Error::output(format!("cannot read /dev/urandom for the token: {e}")))?;
    Ok(bytes.iter().map(|b| format!("{b:02x}")).collect())
}

/// Reads a pairs table (review.csv or audit.csv) into JSON rows: ids, the fixed columns, and
/// per field its level and both values.
fn read_pairs(path: &Path, fields: &[String]) -> Result<Vec<serde_json::Value>> {
    let bytes = std::fs::read(path).map_err(|e| {
        input_err(
            path,
            format!("cannot read it ({e}); is this a finished run's folder?"),
        )
    })?;
    let mut rdr = csv::ReaderBuilder::new().from_reader(bytes.as_slice());
    let header = rdr
        .headers()
        .map_err(|e| input_err(path, e.to_string()))?
        .clone();
    let at = |name: &str| header.iter().position(|h| h == name);
    let need = |name: &str| {
        at(name).ok_or_else(|| {
            input_err(path, format!("column `{name}` not found in the header")).with_line(1)
        })
    };
    let (li, ri) = (need("left_id")?, need("right_id")?);
    let cols: Vec<[usize; 3]> = fields
        .iter()
        .map(|f| {
            Ok([
                need(&format!("{f}_level"))?,
                need(&format!("{f}_left"))?,
                need(&format!("{f}_right"))?,
            ])
        })
        .collect::<Result<_>>()?;
    let opt = |name: &str| at(name);
    let (ci, wi, fi, si, bi) = (
        opt("confidence"),
        opt("weight"),
        opt("found_by"),
        opt("status"),
        opt("band"),
    );
    let mut out = Vec::new();
    for rec in rdr.records() {
        let rec = rec.map_err(|e| {
            input_err(path, e.to_string()).with_line(e.position().map_or(0, |p| p.line()))
        })?;
        let get = |i: Option<usize>| i.and_then(|i| rec.get(i)).unwrap_or("").to_string();
        let values: Vec<serde_json::Value> = cols
            .iter()
            .map(|c| serde_json::json!([get(Some(c[0])), get(Some(c[1])), get(Some(c[2]))]))
            .collect();
        out.push(serde_json::json!({
            "left_id": get(Some(li)),
            "right_id": get(Some(ri)),
            "confidence": get(ci),
            "weight": get(wi),
            "found_by": get(fi),
            "status": get(si),
            "band": get(bi),
            "values": values,
        }));
    }
    Ok(out)
}

impl Server {
    /// Reads the run folder and binds 127.0.0.1 on `opts.port`; log lines go to `log`.
    pub fn bind(opts: &Options, log: Box<dyn Write + Send>) -> Result<Server> {
        let dir = &opts.dir;
        let summary_path = dir.join("summary.json");
        let summary: serde_json::Value = std::fs::read(&summary_path)
            .map_err(|e| {
                input_err(
                    &summary_path,
                    format!(
                        "cannot read it ({e}); give the folder of a finished `dovetail link` run"
                    ),
                )
            })
            .and_then(|b| {
                serde_json::from_slice(&b).map_err(|e| input_err(&summary_path, e.to_string()))
            })?;
        let fields: Vec<serde_json::Value> = summary["fields"]
            .as_array()
            .cloned()
            .unwrap_or_default()
            .into_iter()
            .map(|f| serde_json::json!({"name": f["name"], "levels": f["levels"]}))
            .collect();
        let names: Vec<String> = fields
            .iter()
            .filter_map(|f| f["name"].as_str().map(str::to_string))
            .collect();
        let file = if opts.audit {
            super::AUDIT_FILE
        } else {
            "review.csv"
        };
        let pairs_path = dir.join(file);
        if opts.audit && !pairs_path.exists() {
            return Err(input_err(
                &pairs_path,
                "no audit sample in this run: set `audit_sample = 200` under [link] and run `dovetail link` again",
            ));
        }
        let pairs = read_pairs(&pairs_path, &names)?;
        let context_path = dir.join(super::CONTEXT_FILE);
        let context = if context_path.exists() {
            read_pairs(&context_path, &names)?
        } else {
            Vec::new()
        };
        let allowed: HashSet<(String, String)> = pairs
            .iter()
            .map(|p| {
                (
                    p["left_id"].as_str().unwrap_or("").to_string(),
                    p["right_id"].as_str().unwrap_or("").to_string(),
                )
            })
            .collect();
        let decisions_path = dir.join(super::DECISIONS_FILE);
        let earlier = if decisions_path.exists() {
            read_decisions(&decisions_path)?
        } else {
            Vec::new()
        };
        let in_force: HashMap<(String, String), Decision> = super::in_force(&earlier)
            .into_iter()
            .map(|d| ((d.left_id.clone(), d.right_id.clone()), d.decision))
            .collect();
        let file = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&decisions_path)
            .map_err(|e| {
                Error::output(format!("cannot open the decisions file: {e}"))
                    .with_file(&decisions_path)
            })?;
        let listener = TcpListener::bind(SocketAddr::from((Ipv4Addr::LOCALHOST, opts.port)))
            .map_err(|e| {
                Error::output(format!(
                    "cannot listen on 127.0.0.1 port {}: {e}",
                    opts.port
                ))
            })?;
        let port = listener
            .local_addr()
            .map_err(|e| Error::output(e.to_string()))?
            .port();
        let payload = serde_json::json!({
            "mode": if opts.audit { "audit" } else { "review" },
            "fields": fields,
            "pairs": pairs,
            "context": context,
            "reviewer": opts.reviewer,
            "verdict": summary["verdict"],
            "cutoff": summary["cutoff"],
        });
        Ok(Server {
            listener,
            state: Arc::new(State {
                token: token()?,
                port,
                payload,
                allowed,
                reviewer: opts.reviewer.clone(),
                decisions: Mutex::new(Decisions {
                    file,
                    in_force,
                    lines: earlier.len(),
                }),
                log: Mutex::new(log),
            }),
        })
    }

    /// The address it listens on (always 127.0.0.1).
    pub fn local_addr(&self) -> Result<SocketAddr> {
        self.listener
            .local_addr()
            .map_err(|e| Error::output(e.to_string()))
    }

    /// The page's address, with the token.
    pub fn url(&self) -> String {
        format!(
            "http://127.0.0.1:{}/?t={}",
            self.state.port, self.state.token
        )
    }

    /// Pairs on the page and decisions already in force among them.
    pub fn progress(&self) -> (usize, usize) {
        let n = self.state.allowed.len();
        let done = self
            .state
            .decisions
            .lock()
            .map(|d| {
                d.in_force
                    .keys()
                    .filter(|k| self.state.allowed.contains(*k))
                    .count()
            })
            .unwrap_or(0);
        (n, done)
    }

    /// Answers requests until the process ends.
    pub fn serve(self) -> Result<()> {
        for stream in self.listener.incoming() {
            let Ok(stream) = stream else { continue };
            let state = Arc::clone(&self.state);
            std::thread::spawn(move || {
                let _ = handle(&state, stream);
            });
        }
        Ok(())
    }
}

/// A parsed request.
struct Request {
    method: String,
    path: String,
    query: String,
    headers: HashMap<String, String>,
    body: Vec<u8>,
}

fn read_request(stream: &TcpStream) -> Option<Request> {
    let mut reader = BufReader::new(stream.take((MAX_HEAD + MAX_BODY) as u64));
    let mut line = String::new();
    reader.read_line(&mut line).ok()?;
    let mut parts = line.split_whitespace();
    let method = parts.next()?.to_string();
    let target = parts.next()?.to_string();
    let mut headers = HashMap::new();
    let mut head = line.len();
    loop {
        let mut h = String::new();
        if reader.read_line(&mut h).ok()? == 0 {
            return None;
        }
        head += h.len();
        if head > MAX_HEAD {
            return None;
        }
        let h = h.trim_end();
        if h.is_empty() {
            break;
        }
        let (k, v) = h.split_once(':')?;
        headers.insert(k.trim().to_ascii_lowercase(), v.trim().to_string());
    }
    let len: usize = headers
        .get("content-length")
        .and_then(|v| v.parse().ok())
        .unwrap_or(0);
    if len > MAX_BODY {
        return None;
    }
    let mut body = vec![0; len];
    reader.read_exact(&mut body).ok()?;
    let (path, query) = match target.split_once('?') {
        Some((p, q)) => (p.to_string(), q.to_string()),
        None => (target, String::new()),
    };
    Some(Request {
        method,
        path,
        query,
        headers,
        body,
    })
}

/// Compares without stopping at the first difference, so timing tells nothing of the token.
fn same_token(a: &str, b: &str) -> bool {
    a.len() == b.len()
        && a.bytes()
            .zip(b.bytes())
            .fold(0u8, |acc, (x, y)| acc | (x ^ y))
            == 0
}

fn query_value<'a>(query: &'a str, key: &str) -> Option<&'a str> {
    query
        .split('&')
        .filter_map(|kv| kv.split_once('='))
        .find(|(k, _)| *k == key)
        .map(|(_, v)| v)
}

struct Response {
    status: u16,
    content_type: &'static str,
    body: Vec<u8>,
    csp: Option<String>,
}

fn text(status: u16, body: &str) -> Response {
    Response {
        status,
        content_type: "text/plain; charset=utf-8",
        body: body.as_bytes().to_vec(),
        csp: None,
    }
}

fn json(status: u16, v: &serde_json::Value) -> Response {
    Response {
        status,
        content_type: "application/json",
        body: v.to_string().into_bytes(),
        csp: None,
    }
}

fn reason(status: u16) -> &'static str {
    match status {
        200 => "OK",
        400 => "Bad Request",
        403 => "Forbidden",
        404 => "Not Found",
        405 => "Method Not Allowed",
        _ => "Internal Server Error",
    }
}

fn handle(state: &State, mut stream: TcpStream) -> std::io::Result<()> {
    stream.set_read_timeout(Some(Duration::from_secs(10)))?;
    let Some(req) = read_request(&stream) else {
        return write_response(&mut stream, &text(400, "bad request\n"));
    };
    let resp = route(state, &req);
    if let Ok(mut log) = state.log.lock() {
        let now = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_secs());
        // Method and path only: the query holds the token, the body holds ids.
        let path: String = req
            .path
            .chars()
            .take(64)
            .filter(|c| c.is_ascii_graphic())
            .collect();
        let method: String = req.method.chars().take(8).collect();
        let _ = writeln!(
            log,
            "{} {method} {path} {}",
            crate::report::rfc3339(now),
            resp.status
        );
    }
    write_response(&mut stream, &resp)
}

fn write_response(stream: &mut TcpStream, r: &Response) -> std::io::Result<()> {
    let mut head = format!(
        "HTTP/1.1 {} {}\r\nContent-Type: {}\r\nContent-Length: {}\r\nConnection: close\r\nCache-Control: no-store\r\nX-Content-Type-Options: nosniff\r\nX-Frame-Options: DENY\r\nReferrer-Policy: no-referrer\r\nCross-Origin-Resource-Policy: same-origin\r\n",
        r.status,
        reason(r.status),
        r.content_type,
        r.body.len()
    );
    let csp = r.csp.clone().unwrap_or_else(|| {
        "default-src 'none'; frame-ancestors 'none'; base-uri 'none'; form-action 'none'".into()
    });
    head.push_str(&format!("Content-Security-Policy: {csp}\r\n\r\n"));
    stream.write_all(head.as_bytes())?;
    stream.write_all(&r.body)?;
    stream.flush()
}

fn route(state: &State, req: &Request) -> Response {
    // DNS rebinding: a page served from another name that resolves to 127.0.0.1 sends its
    // own name as Host.
    let host = req.headers.get("host").map(String::as_str).unwrap_or("");
    let port = state.port;
    if host != format!("127.0.0.1:{port}") && host != format!("localhost:{port}") {
        return text(
            403,
            "forbidden: the Host header must be 127.0.0.1 and this port\n",
        );
    }
    match (req.method.as_str(), req.path.as_str()) {
        ("GET", "/") => {
            let ok = query_value(&req.query, "t").is_some_and(|t| same_token(t, &state.token));
            if !ok {
                return text(
                    403,
                    "forbidden: open the address with the token that `dovetail review` printed\n",
                );
            }
            page()
        }
        (_, "/api/run") | (_, "/api/decide") => {
            let ok = req
                .headers
                .get("x-dovetail-token")
                .is_some_and(|t| same_token(t, &state.token));
            if !ok {
                return text(403, "forbidden: no token\n");
            }
            match (req.method.as_str(), req.path.as_str()) {
                ("GET", "/api/run") => run_data(state),
                ("POST", "/api/decide") => decide(state, req),
                _ => text(405, "method not allowed\n"),
            }
        }
        _ => text(404, "not found\n"),
    }
}

fn page() -> Response {
    let nonce = match token() {
        Ok(t) => t,
        Err(_) => return text(500, "no random source\n"),
    };
    let body = PAGE.replace("{{NONCE}}", &nonce);
    Response {
        status: 200,
        content_type: "text/html; charset=utf-8",
        body: body.into_bytes(),
        csp: Some(format!(
            "default-src 'none'; script-src 'nonce-{nonce}'; style-src 'nonce-{nonce}'; connect-src 'self'; img-src 'self' data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
        )),
    }
}

fn run_data(state: &State) -> Response {
    let Ok(d) = state.decisions.lock() else {
        return text(500, "decisions unavailable\n");
    };
    let mut v = state.payload.clone();
    let decided: Vec<serde_json::Value> = d
        .in_force
        .iter()
        .filter(|(k, _)| state.allowed.contains(*k))
        .map(|((l, r), dec)| serde_json::json!([l, r, dec.word()]))
        .collect();
    v["decisions"] = serde_json::Value::Array(decided);
    v["lines"] = serde_json::json!(d.lines);
    json(200, &v)
}

fn decide(state: &State, req: &Request) -> Response {
    // A cross-site form or fetch cannot send this content type without a preflight, which
    // the server never answers; a same-origin page sends its own origin or none.
    let ct = req
        .headers
        .get("content-type")
        .map(String::as_str)
        .unwrap_or("");
    if !ct.starts_with("application/json") {
        return text(403, "forbidden: decisions are posted as JSON by the page\n");
    }
    let port = state.port;
    if let Some(origin) = req.headers.get("origin") {
        if origin != &format!("http://127.0.0.1:{port}")
            && origin != &format!("http://localhost:{port}")
        {
            return text(403, "forbidden: cross-origin post\n");
        }
    }
    if let Some(site) = req.headers.get("sec-fetch-site") {
        if site != "same-origin" && site != "none" {
            return text(403, "forbidden: cross-site post\n");
        }
    }
    let Ok(v) = serde_json::from_slice::<serde_json::Value>(&req.body) else {
        return text(400, "not JSON\n");
    };
    let (Some(l), Some(r), Some(word)) = (
        v["left_id"].as_str(),
        v["right_id"].as_str(),
        v["decision"].as_str(),
    ) else {
        return text(400, "left_id, right_id and decision are needed\n");
    };
    let Some(decision) = Decision::parse(word) else {
        return text(400, "not a decision\n");
    };
    let key = (l.to_string(), r.to_string());
    if !state.allowed.contains(&key) {
        return text(400, "not a pair of this page\n");
    }
    let Ok(mut d) = state.decisions.lock() else {
        return text(500, "decisions unavailable\n");
    };
    let now = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    let line = DecisionLine {
        left_id: key.0.clone(),
        right_id: key.1.clone(),
        decision,
        reviewer: state.reviewer.clone(),
        decided_at: crate::report::rfc3339(now),
        line: 0,
    };
    if append_decision(&mut d.file, &line).is_err() {
        return text(500, "the decision could not be saved\n");
    }
    d.lines += 1;
    if decision == Decision::Withdrawn {
        d.in_force.remove(&key);
    } else {
        d.in_force.insert(key, decision);
    }
    let done = d
        .in_force
        .keys()
        .filter(|k| state.allowed.contains(*k))
        .count();
    json(200, &serde_json::json!({"saved": true, "decided": done}))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn binds_the_loopback_address_only() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("summary.json"), r#"{"fields": []}"#).unwrap();
        std::fs::write(dir.path().join("review.csv"), "left_id,right_id\nL1,R1\n").unwrap();
        let opts = Options {
            dir: dir.path().to_path_buf(),
            audit: false,
            reviewer: "t".into(),
            port: 0,
        };
        let s = Server::bind(&opts, Box::new(std::io::sink())).unwrap();
        let addr = s.local_addr().unwrap();
        assert!(addr.ip().is_loopback(), "{addr}");
        assert_eq!(addr.ip(), std::net::IpAddr::from(Ipv4Addr::LOCALHOST));
        assert!(s
            .url()
            .starts_with(&format!("http://127.0.0.1:{}/?t=", addr.port())));
        // The token: 32 hex digits, new for every server.
        let t = s.url().rsplit("t=").next().unwrap().to_string();
        assert!(t.len() == 32 && t.bytes().all(|b| b.is_ascii_hexdigit()));
        let s2 = Server::bind(&opts, Box::new(std::io::sink())).unwrap();
        assert_ne!(
            s.url().rsplit("t=").next().unwrap(),
            s2.url().rsplit("t=").next().unwrap()
        );
        assert_eq!(s.progress(), (1, 0));
    }

    #[test]
    fn token_comparison_and_queries() {
        assert!(same_token("abc", "abc"));
        assert!(!same_token("abc", "abd") && !same_token("abc", "abcd"));
        assert_eq!(query_value("a=1&t=xyz", "t"), Some("xyz"));
        assert_eq!(query_value("tt=1", "t"), None);
    }
}
