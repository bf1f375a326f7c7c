//! The run configuration: a TOML file read with serde.
//!
//! In: the text of a config file and the folder it lives in. Out: a checked [`Config`] whose
//! paths are resolved against that folder. Unknown keys are rejected with the nearest valid key
//! suggested; every error names the key. This module never reads a table.

use crate::error::{Error, Result};
use crate::text::{self, DateOrder};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

/// A whole run: two tables, the fields compared, the blocking passes and the decision settings.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    /// The left table.
    pub left: TableSpec,
    /// The right table.
    pub right: TableSpec,
    /// The compared fields, in output order.
    #[serde(default)]
    pub field: Vec<FieldSpec>,
    /// Blocking passes; a pair is a candidate when any pass gives both records the same key.
    #[serde(default)]
    pub block: Vec<BlockSpec>,
    /// How links are chosen and reported.
    #[serde(default)]
    pub link: LinkSpec,
    /// EM settings.
    #[serde(default)]
    pub model: ModelSpec,
    /// Feasibility settings.
    #[serde(default)]
    pub assess: AssessSpec,
    /// Extra blocking schemes for `dovetail tune`.
    #[serde(default)]
    pub scheme: Vec<SchemeSpec>,
    /// The folder the config file is in; relative paths are taken from here.
    #[serde(skip)]
    pub base_dir: PathBuf,
    /// The names in pass keys (of [[block]] and [[scheme]]) that no [[field]] defines, in
    /// order of first use: columns of both tables read for blocking only, never compared.
    /// Set by [`Config::from_text`]; whether the tables have them is checked when reading.
    #[serde(skip)]
    pub key_columns: Vec<String>,
}

/// Where a table is and which column holds its record id.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct TableSpec {
    /// Path of the CSV file, relative to the config file.
    pub path: PathBuf,
    /// Column holding the record id (required, unique, non-empty).
    pub id: String,
    /// Text encoding of the file: utf-8 (default), latin1 or windows-1252.
    #[serde(default)]
    pub encoding: Option<String>,
    /// Field delimiter, one character (default `,`).
    #[serde(default)]
    pub delimiter: Option<String>,
}

/// How a field's two values are compared.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// Agree or disagree.
    Exact,
    /// Jaro–Winkler similarity, banded.
    JaroWinkler,
    /// Normalised Levenshtein similarity, banded.
    Levenshtein,
    /// Calendar dates: same, day and month swapped, one digit off, same year, other.
    Date,
    /// Numbers: equal, then difference bands.
    Number,
}

/// The cleaning applied to a field's values before comparing and blocking.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Normalize {
    /// Compatibility fold, accents stripped, lower case, punctuation dropped, spaces collapsed.
    Name,
    /// Compatibility fold and lower case, spaces collapsed; punctuation kept.
    Text,
    /// Digits only (phones, postcodes written with spaces or dashes).
    Digits,
    /// Letters and digits only, upper case, no spaces (codes such as postcodes).
    Code,
    /// Trimmed only.
    None,
}

/// One compared field.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct FieldSpec {
    /// Label used in outputs and in blocking keys.
    pub name: String,
    /// Column in the left table (defaults to `name`). Several columns joined with `+`
    /// (e.g. "street+postcode") make one grouped comparison of their values joined by a space,
    /// for fields that move together.
    #[serde(default)]
    pub left: Option<String>,
    /// Column in the right table (defaults to `name`).
    #[serde(default)]
    pub right: Option<String>,
    /// Comparison method.
    pub method: Method,
    /// Cut points: similarities highest first for string methods, differences lowest first
    /// for numbers. Method defaults when absent.
    #[serde(default)]
    pub bands: Option<Vec<f64>>,
    /// Number bands are relative differences |a-b| / max(|a|,|b|) instead of absolute ones.
    #[serde(default)]
    pub relative: bool,
    /// Value-frequency weighting of exact agreement.
    #[serde(default)]
    pub frequency: bool,
    /// Cleaning before comparison (default: `name` for string methods, `none` otherwise).
    #[serde(default)]
    pub normalize: Option<Normalize>,
    /// Whole words removed after cleaning (e.g. titles such as "mr", "dr").
    #[serde(default)]
    pub drop_tokens: Vec<String>,
    /// Order of day, month and year in dates written with separators: "ymd" (default),
    /// "dmy" or "mdy".
    #[serde(default)]
    pub date_order: Option<String>,
    /// `date_order` for the left table only.
    #[serde(default)]
    pub left_date_order: Option<String>,
    /// `date_order` for the right table only.
    #[serde(default)]
    pub right_date_order: Option<String>,
    /// Value map for the left table's values, e.g. `{ "1" = "M", "2" = "F", "9" = "" }`:
    /// keys and replacements are matched after the field's cleaning, a replacement of ""
    /// makes the value missing; applied before comparing and blocking (for dates and
    /// numbers, before parsing).
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub left_recode: BTreeMap<String, String>,
    /// Value map for the right table's values (see `left_recode`).
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub right_recode: BTreeMap<String, String>,
    /// Dates and numbers that do not parse: "missing" (default: taken as missing, counted
    /// and warned about) or "stop" (the run stops with the file, line and column).
    #[serde(default)]
    pub unparsed: Option<String>,
}

/// One blocking pass.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct BlockSpec {
    /// Key parts `<field>:<transform>`, joined into one key.
    pub keys: Vec<String>,
    /// Label for reports (default `pass N`).
    #[serde(default)]
    pub name: Option<String>,
    /// Largest number of pairs one block may produce; bigger blocks are skipped with a warning.
    #[serde(default)]
    pub max_block_pairs: Option<u64>,
    /// Makes the pass a sorted-neighbourhood pass (Hernandez & Stolfo 1995): both tables
    /// sorted together by the key, each record paired with the other table's records among
    /// the next `window - 1` places.
    #[serde(default)]
    pub window: Option<usize>,
}

/// An extra blocking scheme for `dovetail tune` to compare.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct SchemeSpec {
    /// Label in the tune table.
    pub name: String,
    /// The scheme's passes.
    pub block: Vec<BlockSpec>,
}

/// Decision settings.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct LinkSpec {
    /// Links below this confidence are not written (default 0.5).
    #[serde(default = "default_min_confidence")]
    pub min_confidence: f64,
    /// When set, the lowest cut-off whose estimated precision meets it replaces `min_confidence`.
    #[serde(default)]
    pub target_precision: Option<f64>,
    /// Pairs whose confidence falls in [low, high] go to review.csv (default [0.2, 0.9]).
    #[serde(default = "default_review_band")]
    pub review_band: [f64; 2],
    /// Stop with exit status 3 instead of writing links when the verdict is infeasible.
    #[serde(default)]
    pub stop_if_infeasible: bool,
    /// A clerks' decisions file (`decisions.csv` as `dovetail review` writes it), relative
    /// to the config file: "same person" pairs are kept as links and label the fit,
    /// "different people" pairs are never linked.
    #[serde(default)]
    pub decisions: Option<PathBuf>,
    /// Links to draw into audit.csv for `dovetail review --audit` and `dovetail audit`: a
    /// seeded sample stratified by confidence band (default: none).
    #[serde(default)]
    pub audit_sample: Option<usize>,
}

/// EM settings.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct ModelSpec {
    /// Iteration cap per start (default 500).
    #[serde(default = "default_max_iterations")]
    pub max_iterations: usize,
    /// Stop when the log-likelihood changes by less than this (default 1e-9, relative).
    #[serde(default = "default_tolerance")]
    pub tolerance: f64,
    /// A CSV of known true pairs (`left_id,right_id`), relative to the config file: their
    /// agreement levels give m.
    #[serde(default)]
    pub labelled: Option<PathBuf>,
    /// "start" (default): EM starts from the labelled m; "fix": m stays as labelled.
    #[serde(default)]
    pub labelled_use: Option<String>,
    /// "em" (default) or "random": u from random pairs of records, kept fixed.
    #[serde(default)]
    pub u_from: Option<String>,
    /// Random pairs drawn for `u_from = "random"` (default 200,000).
    #[serde(default)]
    pub random_pairs: Option<usize>,
    /// Fit the laws apart for each set of passes that found a pair (default true; it only
    /// applies with two or more passes and neither m nor u held fixed).
    #[serde(default = "default_true")]
    pub per_pass: bool,
}

/// Feasibility settings.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct AssessSpec {
    /// Margins up to this are "feasible" (default 0.5).
    #[serde(default = "default_feasible_margin")]
    pub feasible_margin: f64,
    /// Margins from this on are "infeasible" (default 1.0, the planted-matching threshold).
    #[serde(default = "default_infeasible_margin")]
    pub infeasible_margin: f64,
    /// Forecast error rates up to this are "feasible" (default 0.02).
    #[serde(default = "default_feasible_error")]
    pub feasible_error: f64,
    /// Forecast error rates from this on are "infeasible" (default 0.10).
    #[serde(default = "default_infeasible_error")]
    pub infeasible_error: f64,
    /// Bootstrap replicates for the error forecast (default 10; 0 switches it off).
    #[serde(default = "default_replicates")]
    pub replicates: usize,
    /// Seed for the bootstrap and samples (default 1).
    #[serde(default = "default_seed")]
    pub seed: u64,
}

fn default_min_confidence() -> f64 {
    0.5
}
fn default_review_band() -> [f64; 2] {
    [0.2, 0.9]
}
fn default_true() -> bool {
    true
}
fn default_max_iterations() -> usize {
    500
}
fn default_tolerance() -> f64 {
    1e-9
}
fn default_feasible_margin() -> f64 {
    0.5
}
fn default_infeasible_margin() -> f64 {
    1.0
}
fn default_feasible_error() -> f64 {
    0.02
}
fn default_infeasible_error() -> f64 {
    0.10
}
fn default_replicates() -> usize {
    10
}
fn default_seed() -> u64 {
    1
}

impl Default for LinkSpec {
    fn default() -> Self {
        LinkSpec {
            min_confidence: default_min_confidence(),
            target_precision: None,
            review_band: default_review_band(),
            stop_if_infeasible: false,
            decisions: None,
            audit_sample: None,
        }
    }
}

impl Default for ModelSpec {
    fn default() -> Self {
        ModelSpec {
            max_iterations: default_max_iterations(),
            tolerance: default_tolerance(),
            labelled: None,
            labelled_use: None,
            u_from: None,
            random_pairs: None,
            per_pass: true,
        }
    }
}

impl Default for AssessSpec {
    fn default() -> Self {
        AssessSpec {
            feasible_margin: default_feasible_margin(),
            infeasible_margin: default_infeasible_margin(),
            feasible_error: default_feasible_error(),
            infeasible_error: default_infeasible_error(),
            replicates: default_replicates(),
            seed: default_seed(),
        }
    }
}

/// A blocking-key transform.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Transform {
    /// The cleaned value itself.
    Exact,
    /// American Soundex (NARA rules).
    Soundex,
    /// The first N characters.
    First(usize),
    /// The last N characters.
    Last(usize),
    /// The year of a date.
    Year,
    /// Year and month of a date.
    YearMonth,
    /// Digits only.
    Digits,
    /// The first N digits.
    DigitsN(usize),
    /// First letter of each word.
    Initials,
    /// Words sorted alphabetically.
    SortedTokens,
    /// NYSIIS name code (Taft 1970).
    Nysiis,
}

/// Where a blocking key part takes its values from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum KeySource {
    /// A compared field: an index into [`Config::field`].
    Field(usize),
    /// A column of both tables that is only used for blocking: an index into
    /// [`Config::key_columns`].
    Column(usize),
}

/// One part of a blocking key: where its values come from and a transform.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct KeyPart {
    /// The field or key-only column.
    pub source: KeySource,
    /// The transform applied to the cleaned value.
    pub transform: Transform,
}

const TOP_KEYS: &[&str] = &[
    "left", "right", "field", "block", "link", "model", "assess", "scheme",
];
const SCHEME_KEYS: &[&str] = &["name", "block"];
const TABLE_KEYS: &[&str] = &["path", "id", "encoding", "delimiter"];
const FIELD_KEYS: &[&str] = &[
    "name",
    "left",
    "right",
    "method",
    "bands",
    "relative",
    "frequency",
    "normalize",
    "drop_tokens",
    "date_order",
    "left_date_order",
    "right_date_order",
    "left_recode",
    "right_recode",
    "unparsed",
];
const BLOCK_KEYS: &[&str] = &["keys", "name", "max_block_pairs", "window"];
const LINK_KEYS: &[&str] = &[
    "min_confidence",
    "target_precision",
    "review_band",
    "stop_if_infeasible",
    "decisions",
    "audit_sample",
];
const MODEL_KEYS: &[&str] = &[
    "max_iterations",
    "tolerance",
    "labelled",
    "labelled_use",
    "u_from",
    "random_pairs",
    "per_pass",
];
const ASSESS_KEYS: &[&str] = &[
    "feasible_margin",
    "infeasible_margin",
    "feasible_error",
    "infeasible_error",
    "replicates",
    "seed",
];
/// Every key the config accepts, by the table that holds it (`field` for `[[field]]`, and
/// so on): the contract the example configs and the README document.
pub const ALL_KEYS: &[(&str, &[&str])] = &[
    ("", TOP_KEYS),
    ("left/right", TABLE_KEYS),
    ("field", FIELD_KEYS),
    ("block", BLOCK_KEYS),
    ("scheme", SCHEME_KEYS),
    ("link", LINK_KEYS),
    ("model", MODEL_KEYS),
    ("assess", ASSESS_KEYS),
];

const METHODS: &[&str] = &["exact", "jaro-winkler", "levenshtein", "date", "number"];
const TRANSFORMS: &[&str] = &[
    "exact",
    "soundex",
    "first:N",
    "last:N",
    "year",
    "year-month",
    "digits",
    "digits:N",
    "initials",
    "sorted-tokens",
    "nysiis",
];

/// The valid key nearest to `key` by Levenshtein distance, if any is reasonably close.
pub fn nearest<'a>(key: &str, valid: &[&'a str]) -> Option<&'a str> {
    valid
        .iter()
        .map(|v| (strsim::levenshtein(key, v), *v))
        .filter(|(d, v)| *d <= (v.len().max(key.len()) / 2).max(2))
        .min()
        .map(|(_, v)| v)
}

fn unknown_key(path: &str, key: &str, valid: &[&str]) -> Error {
    let hint = match nearest(key, valid) {
        Some(n) => format!("; did you mean `{n}`?"),
        None => format!("; valid keys: {}", valid.join(", ")),
    };
    Error::config(format!("unknown key `{path}{key}`{hint}"))
}

fn check_table(value: &toml::Value, path: &str, valid: &[&str]) -> Result<()> {
    if let toml::Value::Table(t) = value {
        for k in t.keys() {
            if !valid.contains(&k.as_str()) {
                return Err(unknown_key(path, k, valid));
            }
        }
    }
    Ok(())
}

/// Rejects unknown keys anywhere in the document, naming the nearest valid one.
fn check_keys(doc: &toml::Value) -> Result<()> {
    check_table(doc, "", TOP_KEYS)?;
    let Some(t) = doc.as_table() else {
        return Ok(());
    };
    for side in ["left", "right"] {
        if let Some(v) = t.get(side) {
            check_table(v, &format!("{side}."), TABLE_KEYS)?;
        }
    }
    for (name, valid) in [("field", FIELD_KEYS), ("block", BLOCK_KEYS)] {
        if let Some(toml::Value::Array(items)) = t.get(name) {
            for (i, item) in items.iter().enumerate() {
                check_table(item, &format!("{name}[{}].", i + 1), valid)?;
            }
        }
    }
    if let Some(toml::Value::Array(items)) = t.get("scheme") {
        for (i, item) in items.iter().enumerate() {
            check_table(item, &format!("scheme[{}].", i + 1), SCHEME_KEYS)?;
            if let Some(toml::Value::Array(blocks)) = item.get("block") {
                for (j, b) in blocks.iter().enumerate() {
                    check_table(
                        b,
                        &format!("scheme[{}].block[{}].", i + 1, j + 1),
                        BLOCK_KEYS,
                    )?;
                }
            }
        }
    }
    for (name, valid) in [
        ("link", LINK_KEYS),
        ("model", MODEL_KEYS),
        ("assess", ASSESS_KEYS),
    ] {
        if let Some(v) = t.get(name) {
            check_table(v, &format!("{name}."), valid)?;
        }
    }
    Ok(())
}

fn line_of(text: &str, offset: usize) -> u64 {
    text[..offset.min(text.len())].matches('\n').count() as u64 + 1
}

/// Turns serde's message into a one-line hint, adding the nearest method name when a method
/// is misspelt.
fn explain_toml(e: &toml::de::Error) -> String {
    let msg = e.message().replace('\n', " ");
    if let Some(rest) = msg.strip_prefix("unknown variant `") {
        let bad = rest.split('`').next().unwrap_or("");
        if let Some(n) = nearest(bad, METHODS) {
            return format!("{msg}; did you mean `{n}`?");
        }
    }
    msg
}

/// A TOML error as one line with its line number and, when the line assigns a key, the key.
fn toml_error(e: &toml::de::Error, text: &str) -> Error {
    let mut msg = explain_toml(e);
    let Some(span) = e.span() else {
        return Error::config(msg);
    };
    let line = line_of(text, span.start);
    let line_text = text.lines().nth(line as usize - 1).unwrap_or("");
    if let Some((key, _)) = line_text.split_once('=') {
        let key = key.trim();
        if !key.is_empty() && !key.starts_with('[') && !msg.contains(&format!("`{key}`")) {
            msg = format!("key `{key}`: {msg}");
        }
    }
    Error::config(msg).with_line(line)
}

impl Config {
    /// Reads and checks a config file; relative paths are resolved against its folder.
    pub fn from_path(path: &Path) -> Result<Config> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| Error::config(format!("cannot read config: {e}")).with_file(path))?;
        let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
        Config::from_text(&text, &base).map_err(|e| e.with_file(path))
    }

    /// Parses and checks config text; `base_dir` is where relative paths start.
    pub fn from_text(text: &str, base_dir: &Path) -> Result<Config> {
        let doc: toml::Value = toml::from_str(text).map_err(|e| toml_error(&e, text))?;
        check_keys(&doc)?;
        let mut cfg: Config = toml::from_str(text).map_err(|e| toml_error(&e, text))?;
        cfg.base_dir = base_dir.to_path_buf();
        cfg.key_columns = cfg.find_key_columns();
        cfg.validate()?;
        Ok(cfg)
    }

    /// Resolves a path from the config against the config's folder.
    pub fn resolve(&self, p: &Path) -> PathBuf {
        if p.is_absolute() {
            p.to_path_buf()
        } else {
            self.base_dir.join(p)
        }
    }

    /// Index of the field with this name.
    pub fn field_index(&self, name: &str) -> Option<usize> {
        self.field.iter().position(|f| f.name == name)
    }

    /// The names used by pass keys that are not fields (see [`Config::key_columns`]).
    fn find_key_columns(&self) -> Vec<String> {
        let mut found: Vec<String> = Vec::new();
        let blocks = self
            .block
            .iter()
            .chain(self.scheme.iter().flat_map(|s| &s.block));
        for key in blocks.flat_map(|b| &b.keys) {
            let name = key_name(key);
            if !name.is_empty()
                && self.field_index(name).is_none()
                && !found.iter().any(|c| c == name)
            {
                found.push(name.to_string());
            }
        }
        found
    }

    /// The first pass key naming `name` ([[block]] first, then [[scheme]]), with where it is
    /// (e.g. `block[2].keys`).
    pub fn first_key_naming(&self, name: &str) -> Option<(String, String)> {
        let blocks = self
            .block
            .iter()
            .enumerate()
            .map(|(i, b)| (format!("block[{}].keys", i + 1), b));
        let schemes = self.scheme.iter().enumerate().flat_map(|(i, sc)| {
            sc.block
                .iter()
                .enumerate()
                .map(move |(j, b)| (format!("scheme[{}].block[{}].keys", i + 1, j + 1), b))
        });
        blocks.chain(schemes).find_map(|(at, b)| {
            b.keys
                .iter()
                .find(|k| key_name(k) == name)
                .map(|k| (at, k.clone()))
        })
    }

    /// Parses every pass's keys into field indices and transforms.
    pub fn passes(&self) -> Result<Vec<Vec<KeyPart>>> {
        self.parse_blocks(&self.block, "block")
    }

    /// Parses the keys of a list of passes; `at` names the list in errors.
    pub fn parse_blocks(&self, blocks: &[BlockSpec], at: &str) -> Result<Vec<Vec<KeyPart>>> {
        blocks
            .iter()
            .enumerate()
            .map(|(i, b)| {
                let here = format!("{at}[{}].keys", i + 1);
                b.keys
                    .iter()
                    .map(|k| self.parse_key(k, &here))
                    .collect::<Result<Vec<_>>>()
            })
            .collect()
    }

    fn parse_key(&self, key: &str, at: &str) -> Result<KeyPart> {
        let (name, transform) = match key.split_once(':') {
            Some((n, t)) => (n, t),
            None => (key, "exact"),
        };
        let column = || {
            self.key_columns
                .iter()
                .position(|c| c == name)
                .map(KeySource::Column)
        };
        let source = self.field_index(name).map(KeySource::Field).or_else(column);
        let source = source.ok_or_else(|| {
            let names: Vec<&str> = self.field.iter().map(|f| f.name.as_str()).collect();
            let hint = nearest(name, &names)
                .map(|n| format!("; did you mean `{n}`?"))
                .unwrap_or_default();
            Error::config(format!(
                "`{at}`: key `{key}` uses field `{name}`, which no [[field]] defines{hint}"
            ))
        })?;
        let transform = parse_transform(transform).ok_or_else(|| {
            let hint = nearest(transform, TRANSFORMS)
                .map(|n| format!("; did you mean `{n}`?"))
                .unwrap_or_else(|| format!("; valid transforms: {}", TRANSFORMS.join(", ")));
            Error::config(format!(
                "`{at}`: unknown transform `{transform}` in key `{key}`{hint}"
            ))
        })?;
        Ok(KeyPart { source, transform })
    }

    fn validate(&self) -> Result<()> {
        if self.field.is_empty() {
            return Err(Error::config(
                "no [[field]] given: at least one compared field is needed",
            ));
        }
        if self.block.is_empty() {
            return Err(Error::config(
                "no [[block]] pass given: at least one blocking pass is needed",
            ));
        }
        for (i, f) in self.field.iter().enumerate() {
            let at = format!("field[{}]", i + 1);
            if f.name.trim().is_empty() {
                return Err(Error::config(format!("`{at}.name` is empty")));
            }
            if self.field[..i].iter().any(|g| g.name == f.name) {
                return Err(Error::config(format!(
                    "`{at}.name`: field `{}` is defined twice",
                    f.name
                )));
            }
            if let Some(bands) = &f.bands {
                check_bands(f.method, bands, &format!("{at}.bands"))?;
            }
            for (key, order) in [
                ("date_order", &f.date_order),
                ("left_date_order", &f.left_date_order),
                ("right_date_order", &f.right_date_order),
            ] {
                if let Some(order) = order {
                    if !["ymd", "dmy", "mdy"].contains(&order.as_str()) {
                        return Err(Error::config(format!(
                            "`{at}.{key}`: `{order}` is not one of ymd, dmy, mdy"
                        )));
                    }
                }
            }
            for (key, left) in [("left_recode", true), ("right_recode", false)] {
                f.cleaned_recode(left)
                    .map_err(|e| Error::config(format!("`{at}.{key}`: {e}")))?;
            }
            if let Some(u) = f.unparsed.as_deref() {
                if u != "missing" && u != "stop" {
                    return Err(Error::config(format!(
                        "`{at}.unparsed`: `{u}` is not one of missing, stop"
                    )));
                }
            }
        }
        for (i, b) in self.block.iter().enumerate() {
            if b.keys.is_empty() {
                return Err(Error::config(format!("`block[{}].keys` is empty", i + 1)));
            }
            if b.window.is_some_and(|w| w < 2) {
                return Err(Error::config(format!(
                    "`block[{}].window` must be at least 2",
                    i + 1
                )));
            }
        }
        self.passes()?;
        for (i, sc) in self.scheme.iter().enumerate() {
            if sc.block.is_empty() || sc.block.iter().any(|b| b.keys.is_empty()) {
                return Err(Error::config(format!(
                    "`scheme[{}]`: every scheme needs passes with keys",
                    i + 1
                )));
            }
            self.parse_blocks(&sc.block, &format!("scheme[{}].block", i + 1))?;
        }
        let l = &self.link;
        if !(0.0..=1.0).contains(&l.min_confidence) {
            return Err(Error::config("`link.min_confidence` must be within [0, 1]"));
        }
        if let Some(t) = l.target_precision {
            if !(t > 0.0 && t <= 1.0) {
                return Err(Error::config(
                    "`link.target_precision` must be within (0, 1]",
                ));
            }
        }
        let [lo, hi] = l.review_band;
        if !(0.0..=1.0).contains(&lo) || !(0.0..=1.0).contains(&hi) || lo > hi {
            return Err(Error::config(
                "`link.review_band` must be [low, high] with 0 <= low <= high <= 1",
            ));
        }
        let a = &self.assess;
        if !(a.feasible_margin > 0.0 && a.feasible_margin <= a.infeasible_margin) {
            return Err(Error::config(
                "`assess.feasible_margin` must be positive and at most `assess.infeasible_margin`",
            ));
        }
        if !(a.feasible_error >= 0.0 && a.feasible_error <= a.infeasible_error) {
            return Err(Error::config(
                "`assess.feasible_error` must be at least 0 and at most `assess.infeasible_error`",
            ));
        }
        if let Some(u) = self.model.labelled_use.as_deref() {
            if u != "start" && u != "fix" {
                return Err(Error::config(format!(
                    "`model.labelled_use`: `{u}` is not one of start, fix"
                )));
            }
        }
        if let Some(u) = self.model.u_from.as_deref() {
            if u != "em" && u != "random" {
                return Err(Error::config(format!(
                    "`model.u_from`: `{u}` is not one of em, random"
                )));
            }
        }
        if self.model.max_iterations == 0 {
            return Err(Error::config("`model.max_iterations` must be at least 1"));
        }
        Ok(())
    }
}

fn check_bands(method: Method, bands: &[f64], at: &str) -> Result<()> {
    match method {
        Method::JaroWinkler | Method::Levenshtein => {
            if bands.iter().any(|b| !(0.0..=1.0).contains(b)) {
                return Err(Error::config(format!(
                    "`{at}`: similarity cut points must lie within [0, 1]"
                )));
            }
            if bands.windows(2).any(|w| w[0] <= w[1]) {
                return Err(Error::config(format!(
                    "`{at}`: similarity cut points must be strictly decreasing (highest first)"
                )));
            }
        }
        Method::Number => {
            if bands.iter().any(|b| !b.is_finite() || *b < 0.0) {
                return Err(Error::config(format!(
                    "`{at}`: difference cut points must be finite and at least 0"
                )));
            }
            if bands.windows(2).any(|w| w[0] >= w[1]) {
                return Err(Error::config(format!(
                    "`{at}`: difference cut points must be strictly increasing (smallest first)"
                )));
            }
        }
        Method::Exact | Method::Date => {
            if !bands.is_empty() {
                return Err(Error::config(format!(
                    "`{at}`: bands do not apply to this method"
                )));
            }
        }
    }
    Ok(())
}

/// The field or column a pass key names: the part before the first `:`.
pub fn key_name(key: &str) -> &str {
    key.split_once(':').map_or(key, |(n, _)| n)
}

/// Parses a transform name such as `soundex` or `first:3`.
pub fn parse_transform(t: &str) -> Option<Transform> {
    let (head, arg) = match t.split_once(':') {
        Some((h, a)) => (h, Some(a)),
        None => (t, None),
    };
    let n = || arg.and_then(|a| a.parse::<usize>().ok()).filter(|&n| n > 0);
    Some(match (head, arg) {
        ("exact", None) => Transform::Exact,
        ("soundex", None) => Transform::Soundex,
        ("first", Some(_)) => Transform::First(n()?),
        ("last", Some(_)) => Transform::Last(n()?),
        ("year", None) => Transform::Year,
        ("year-month", None) => Transform::YearMonth,
        ("digits", None) => Transform::Digits,
        ("digits", Some(_)) => Transform::DigitsN(n()?),
        ("initials", None) => Transform::Initials,
        ("sorted-tokens", None) => Transform::SortedTokens,
        ("nysiis", None) => Transform::Nysiis,
        _ => return None,
    })
}

impl FieldSpec {
    /// Column name in the left table.
    pub fn left_column(&self) -> &str {
        self.left.as_deref().unwrap_or(&self.name)
    }

    /// Column name in the right table.
    pub fn right_column(&self) -> &str {
        self.right.as_deref().unwrap_or(&self.name)
    }

    /// The cleaning in force: the configured one or the method's default.
    pub fn normalize(&self) -> Normalize {
        self.normalize.unwrap_or(match self.method {
            Method::JaroWinkler | Method::Levenshtein | Method::Exact => Normalize::Name,
            Method::Date | Method::Number => Normalize::None,
        })
    }

    /// The spec under which a key-only column (see [`Config::key_columns`]) is read: cleaned
    /// as names are (accents and punctuation dropped, lower case), for blocking only.
    pub fn key_column(name: &str) -> FieldSpec {
        FieldSpec {
            name: name.to_string(),
            left: None,
            right: None,
            method: Method::Exact,
            bands: None,
            relative: false,
            frequency: false,
            normalize: Some(Normalize::Name),
            drop_tokens: Vec::new(),
            date_order: None,
            left_date_order: None,
            right_date_order: None,
            left_recode: BTreeMap::new(),
            right_recode: BTreeMap::new(),
            unparsed: None,
        }
    }

    /// The date order of one side: its own key, else `date_order`, else ymd.
    pub fn date_order_of(&self, left: bool) -> DateOrder {
        let own = if left {
            &self.left_date_order
        } else {
            &self.right_date_order
        };
        DateOrder::from_config(own.as_deref().or(self.date_order.as_deref()))
    }

    /// One side's value map with its keys and replacements cleaned as the field's values are;
    /// an error (in words, without the key's location) for a key that cleans to nothing or
    /// two keys that clean alike but map to different values.
    pub fn cleaned_recode(
        &self,
        left: bool,
    ) -> std::result::Result<HashMap<String, String>, String> {
        let map = if left {
            &self.left_recode
        } else {
            &self.right_recode
        };
        let how = self.normalize();
        let mut out: HashMap<String, String> = HashMap::with_capacity(map.len());
        let mut first_key: HashMap<String, &str> = HashMap::with_capacity(map.len());
        for (key, to) in map {
            let k = text::clean(key, how, &self.drop_tokens);
            if k.is_empty() {
                return Err(format!(
                    "key `{key}` is empty after the field's cleaning, so no value can match it"
                ));
            }
            let to = text::clean(to, how, &self.drop_tokens);
            if let Some(before) = out.get(&k).filter(|b| **b != to) {
                let other = first_key.get(&k).copied().unwrap_or("");
                return Err(format!(
                    "keys `{other}` and `{key}` are the same after the field's cleaning but map to different values (`{before}`, `{to}`)"
                ));
            }
            first_key.entry(k.clone()).or_insert(key);
            out.insert(k, to);
        }
        Ok(out)
    }

    /// True when an unparseable date or number stops the run (`unparsed = "stop"`).
    pub fn stops_on_unparsed(&self) -> bool {
        self.unparsed.as_deref() == Some("stop")
    }

    /// The cut points in force: the configured ones or the method's defaults.
    pub fn bands(&self) -> Vec<f64> {
        if let Some(b) = &self.bands {
            return b.clone();
        }
        match self.method {
            // Jaro–Winkler cut points near 0.94 and 0.88 are common practice in the trade.
            Method::JaroWinkler => vec![0.94, 0.88],
            Method::Levenshtein => vec![0.8, 0.6],
            Method::Number => vec![1.0],
            Method::Exact | Method::Date => vec![],
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const PINNED: &str = r#"
[left]
path = "left.csv"
id = "rec_id"
[right]
path = "right.csv"
id = "rec_id"
[[field]]
name = "surname"
left = "last_name"
right = "last_name"
method = "jaro-winkler"
bands = [0.94, 0.85]
[[field]]
name = "birth"
method = "date"
[[block]]
keys = ["surname:soundex", "birth:year"]
[link]
min_confidence = 0.5
"#;

    fn err_of(text: &str) -> String {
        Config::from_text(text, Path::new("/cfg"))
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default()
    }

    #[test]
    fn pinned_contract_parses() {
        let c = Config::from_text(PINNED, Path::new("/cfg")).expect("pinned config");
        assert_eq!(c.field[0].left_column(), "last_name");
        assert_eq!(c.field[1].left_column(), "birth");
        assert_eq!(c.resolve(&c.left.path), PathBuf::from("/cfg/left.csv"));
        let passes = c.passes().expect("passes");
        assert_eq!(passes[0][0].transform, Transform::Soundex);
        assert_eq!(passes[0][1].transform, Transform::Year);
    }

    #[test]
    fn unknown_key_suggests_nearest() {
        let e = err_of(&PINNED.replace("method = \"date\"", "mehtod = \"date\""));
        assert!(e.contains("unknown key `field[2].mehtod`"), "{e}");
        assert!(e.contains("did you mean `method`"), "{e}");
        let e = err_of(&PINNED.replace("min_confidence", "min_confidense"));
        assert!(e.contains("did you mean `min_confidence`"), "{e}");
    }

    #[test]
    fn bad_values_name_the_key() {
        let e = err_of(&PINNED.replace("[0.94, 0.85]", "[0.85, 0.94]"));
        assert!(
            e.contains("field[1].bands") && e.contains("decreasing"),
            "{e}"
        );
        let e = err_of(&PINNED.replace("[0.94, 0.85]", "[1.5, 0.85]"));
        assert!(e.contains("within [0, 1]"), "{e}");
        let e = err_of(&PINNED.replace("\"jaro-winkler\"", "\"jaro-winkle\""));
        assert!(e.contains("did you mean `jaro-winkler`"), "{e}");
        let e = err_of(&PINNED.replace("birth:year", "birth:yeer"));
        assert!(
            e.contains("unknown transform `yeer`") && e.contains("`year`"),
            "{e}"
        );
        let e = err_of(&PINNED.replace(
            "method = \"date\"",
            "method = \"date\"\nleft_date_order = \"ydm\"",
        ));
        assert!(
            e.contains("`field[2].left_date_order`: `ydm` is not one of"),
            "{e}"
        );
        let e = err_of(&PINNED.replace(
            "method = \"date\"",
            "method = \"date\"\nunparsed = \"skip\"",
        ));
        assert!(
            e.contains("`field[2].unparsed`: `skip` is not one of missing, stop"),
            "{e}"
        );
        let e = err_of(&PINNED.replace("min_confidence = 0.5", "min_confidence = \"x\""));
        assert!(e.starts_with("line 20: key `min_confidence`: "), "{e}");
        assert!(!e.contains('\n'));
    }

    #[test]
    fn keys_on_columns_that_are_not_fields() {
        // A key naming no field is a key-only column, checked against the tables later.
        let c = Config::from_text(
            &PINNED.replace("\"birth:year\"]", "\"birth:year\", \"postcode:first:3\"]"),
            Path::new("/cfg"),
        )
        .expect("config");
        assert_eq!(c.key_columns, vec!["postcode"]);
        let parts = &c.passes().expect("passes")[0];
        assert_eq!(parts[0].source, KeySource::Field(0));
        assert_eq!(parts[2].source, KeySource::Column(0));
        assert_eq!(parts[2].transform, Transform::First(3));
        assert_eq!(
            c.first_key_naming("postcode"),
            Some(("block[1].keys".to_string(), "postcode:first:3".to_string()))
        );
    }

    #[test]
    fn recodes_are_cleaned_and_checked() {
        let with = |recode: &str| {
            PINNED.replace(
                "bands = [0.94, 0.85]",
                &format!("bands = [0.94, 0.85]\n{recode}"),
            )
        };
        let c = Config::from_text(
            &with("left_recode = { \" Smith \" = \"SMYTH\", \"x\" = \"\" }"),
            Path::new("/cfg"),
        )
        .expect("config");
        let map = c.field[0].cleaned_recode(true).expect("map");
        assert_eq!(map.get("smith").map(String::as_str), Some("smyth"));
        assert_eq!(map.get("x").map(String::as_str), Some(""));
        assert!(c.field[0].cleaned_recode(false).expect("map").is_empty());
        let e = err_of(&with("right_recode = { \"..\" = \"M\" }"));
        assert!(
            e.contains("`field[1].right_recode`: key `..` is empty after the field's cleaning"),
            "{e}"
        );
        let e = err_of(&with("left_recode = { \"M\" = \"male\", \"m\" = \"man\" }"));
        assert!(
            e.contains("keys `M` and `m` are the same after the field's cleaning"),
            "{e}"
        );
        let e = err_of(&with("left_recodes = { \"M\" = \"male\" }"));
        assert!(e.contains("did you mean `left_recode`"), "{e}");
    }

    #[test]
    fn date_order_per_side() {
        let c = Config::from_text(
            &PINNED.replace(
                "method = \"date\"",
                "method = \"date\"\ndate_order = \"dmy\"\nright_date_order = \"mdy\"",
            ),
            Path::new("/cfg"),
        )
        .expect("config");
        assert_eq!(c.field[1].date_order_of(true), DateOrder::Dmy);
        assert_eq!(c.field[1].date_order_of(false), DateOrder::Mdy);
        assert_eq!(c.field[0].date_order_of(false), DateOrder::Ymd);
    }

    #[test]
    fn transforms_parse() {
        assert_eq!(parse_transform("first:3"), Some(Transform::First(3)));
        assert_eq!(parse_transform("digits:2"), Some(Transform::DigitsN(2)));
        assert_eq!(parse_transform("first:0"), None);
        assert_eq!(parse_transform("first"), None);
        assert_eq!(parse_transform("soundex:2"), None);
    }
}
