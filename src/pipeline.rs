//! The stages in order: read, block, compare, fit, assess, match, score confidence, decide.
//!
//! This module holds no math of its own: it passes each stage's output to the next and
//! collects warnings and timings. Subcommands call [`prepare`] and then [`link`] or only
//! [`assess_only`].

use crate::block::{self, Candidates, Pass, PassStats};
use crate::budget::{Budget, PassLabel};
use crate::codings;
use crate::compare::{self, Comparison, PatternCounts, MISSING_LEVEL};
use crate::config::Config;
use crate::error::{Error, Result};
use crate::fit::{self, pair_weights, Fitted, ONE_TO_ONE_ROUNDS, REFINEMENT_BP};
use crate::io::{self, Encoding, ReadSpec, Table};
use crate::matching::{self, Matching};
use crate::model::check::ModelCheck;
use crate::model::{self, Fit, PairPatterns, Strata, ValueFrequency};
use crate::posterior::{self as confidence, BpOptions, Marginals};
use crate::records::{self, Records};
use crate::reliability::forecast::{self, ForecastOptions};
use crate::reliability::separation::{self, FieldSeparation};
use crate::reliability::{self, AssessInput, Assessment, VerdictRule};
use crate::texts::Texts;
use std::path::PathBuf;
use std::time::Instant;

/// Receives stage names as they start (for progress lines); the core never prints.
pub trait Progress: Sync {
    /// A stage starts.
    fn stage(&self, name: &str);
    /// A line of news for the user (counts only, never record values).
    fn note(&self, _text: &str) {}
    /// Whether the caller asked the run to stop (e.g. Ctrl-C in a notebook); the stages
    /// look before each starts and the run then ends with an error of kind
    /// [`crate::ErrorKind::Cancelled`].
    fn cancelled(&self) -> bool {
        false
    }
}

/// Starts stage `name` on `progress`, unless the caller asked the run to stop.
fn begin(progress: &dyn Progress, name: &str) -> Result<()> {
    if progress.cancelled() {
        return Err(Error::new(
            crate::ErrorKind::Cancelled,
            format!("the run was stopped before its {name} stage"),
        ));
    }
    progress.stage(name);
    Ok(())
}

/// A progress sink that says nothing.
///
/// [`Progress::note`] gives a line of news before a long stage (the blocking plan's pairs
/// and memory); sinks that print nothing ignore it.
pub struct Silent;

impl Progress for Silent {
    fn stage(&self, _name: &str) {}
}

/// The run's memory, estimated before any pair is made from the input size and the passes'
/// pair counts (from their key counts; see [`block::Plan`]).
///
/// The peak resident memory of `link` is about [`MEMORY_BASE`] + [`MEMORY_PER_INPUT_BYTE`] x the
/// input files' bytes + [`MEMORY_PER_PAIR`] x the candidate pairs; fitted to synth tables
/// (6 fields, 2 passes; GNU time's maximum resident set) at 100,000 to 1,000,000 records a side
/// with loose and tight blocking (`benches/scale.sh`): 164, 448, 2,145 and 7,545 MB (loose,
/// 100k to 1M) and 104, 266 and 824 MB (tight, 100k, 300k, 1M) against 169, 456, 2,128,
/// 7,690, 101, 263 and 833 MB from the formula. The pairs are bounded by the sum of the passes' pairs, which counts a pair found by
/// two passes twice, so the estimate errs high where the passes overlap.
#[derive(Debug, Clone, serde::Serialize)]
pub struct MemoryEstimate {
    /// Per pass, its pairs before the union.
    pub pairs_per_pass: Vec<u64>,
    /// Their sum: an upper bound of the candidate pairs.
    pub pairs_bound: u64,
    /// Estimated peak resident bytes.
    pub peak_bytes: u64,
}

/// Fixed part of the peak memory (see [`MemoryEstimate`]).
pub const MEMORY_BASE: f64 = 20e6;
/// Peak memory per byte of the input files (the records, cleaned, interned and their keys).
pub const MEMORY_PER_INPUT_BYTE: f64 = 4.5;
/// Peak memory per candidate pair (the pairs, patterns, weights, BP graphs and messages).
pub const MEMORY_PER_PAIR: f64 = 64.0;

impl MemoryEstimate {
    /// The estimate for input files of `input_bytes` and passes of these pair counts.
    pub fn new(input_bytes: u64, pairs_per_pass: Vec<u64>) -> MemoryEstimate {
        let pairs_bound: u64 = pairs_per_pass.iter().sum();
        let peak = MEMORY_BASE
            + MEMORY_PER_INPUT_BYTE * input_bytes as f64
            + MEMORY_PER_PAIR * pairs_bound as f64;
        MemoryEstimate {
            pairs_per_pass,
            pairs_bound,
            peak_bytes: peak as u64,
        }
    }

    /// One line for the user: the pairs and memory the blocking will take.
    pub fn text(&self) -> String {
        format!(
            "blocking will make at most {} candidate pairs ({} by pass); estimated peak memory {}",
            self.pairs_bound,
            self.pairs_per_pass
                .iter()
                .map(u64::to_string)
                .collect::<Vec<_>>()
                .join(" + "),
            human_bytes(self.peak_bytes)
        )
    }
}

/// The start of a warning that is an error-level finding: the run went on, but its results
/// cannot be trusted until the user acts (for instance a field whose two sides never agree).
/// The terminal and the report show these first and set apart.
pub const SERIOUS_PREFIX: &str = "serious: ";

/// A count for messages: rounded to a whole number, thousands separated by commas
/// ("3,412").
pub fn count_text(x: f64) -> String {
    let digits = format!("{:.0}", x.max(0.0));
    let mut out = String::new();
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// Bytes in MB or GB, for messages.
pub fn human_bytes(b: u64) -> String {
    if b >= 1_000_000_000 {
        format!("{:.1} GB", b as f64 / 1e9)
    } else {
        format!("{:.0} MB", b as f64 / 1e6)
    }
}

/// Everything computed before matching.
pub struct Prepared {
    /// The memory estimate made before blocking.
    pub memory: MemoryEstimate,
    /// The config.
    pub config: Config,
    /// The left table as read.
    pub left: Table,
    /// The right table as read.
    pub right: Table,
    /// Cleaned, interned values.
    pub records: Records,
    /// Per-pass statistics.
    pub pass_stats: Vec<PassStats>,
    /// Candidate pairs.
    pub cands: Candidates,
    /// The comparators. Its per-pair codes are freed once `patterns` indexes them (8 bytes
    /// a pair at the fit's peak): read a pair's levels through `patterns`.
    pub comparison: Comparison,
    /// Pattern counts.
    pub counts: PatternCounts,
    /// The fitted laws.
    pub fit: Fit,
    /// The laws from plain EM, before the one-to-one refinement.
    pub plain_fit: Fit,
    /// Dependence between every pair of fields within each class.
    pub dependence: Vec<model::Dependence>,
    /// One fit per set of passes that found a pair, when there are several such sets; the
    /// pairs' weights come from these, the reported laws are `fit`.
    pub strata: Option<Strata>,
    /// Prior log odds of a link under the one-to-one model, one per stratum when `strata`
    /// is set, else one pooled value; empty without candidates (see
    /// [`confidence::LinkPrior::step`]).
    pub link_log_odds: Vec<f64>,
    /// The pooled prior log odds of a link (the last pooled round's when the strata have
    /// their own); None without candidates.
    pub pooled_link_log_odds: Option<f64>,
    /// Value-frequency tables of fields with `frequency = true`.
    pub frequency: Vec<Option<ValueFrequency>>,
    /// Per pair: the Fellegi–Sunter weight (sum of log-likelihood ratios).
    pub weight: Vec<f64>,
    /// Per pair: weight plus the prior log odds of a link (the log posterior odds).
    pub theta: Vec<f64>,
    /// Per pair: its pattern's index in `counts`.
    pub patterns: PairPatterns,
    /// Per-field separation.
    pub separations: Vec<FieldSeparation>,
    /// Per field: agreement on the candidate pairs and values in common between the sides.
    pub agreement: Vec<codings::FieldAgreement>,
    /// The model check of the final laws (None without candidates).
    pub check: Option<ModelCheck>,
    /// Expected duplicate pairs inside each table (None without candidates).
    pub duplicates: Option<crate::duplicates::Duplicates>,
    /// The clerks' decisions in force, as candidate pairs (None without `link.decisions`).
    pub decisions: Option<crate::review::Applied>,
    /// Warnings for the user, in plain words (counts only, never record values).
    pub warnings: Vec<String>,
    /// Seconds per stage.
    pub timings: Vec<(String, f64)>,
}

/// The result of a full run.
pub struct Linkage {
    /// The optimum one-to-one matching on theta.
    pub matching: Matching,
    /// Per-pair confidence under the one-to-one constraint.
    pub confidence: Marginals,
    /// The feasibility assessment.
    pub assessment: Assessment,
    /// Pair indices written as links (chosen and at or above the cut-off), ascending.
    pub links: Vec<usize>,
    /// The confidence cut-off in force.
    pub cutoff: f64,
    /// The estimated precision of the links and its interval (see [`estimate_intervals`]).
    pub precision: Option<Estimate>,
    /// The estimated recall among the candidate pairs and its interval.
    pub recall: Option<Estimate>,
    /// The estimated share of all true pairs that blocking made candidates (against no
    /// blocking on a sample of left records; see [`crate::tune::completeness`]).
    pub completeness: Option<crate::tune::Completeness>,
    /// The estimated recall over all true pairs: recall among candidates times completeness,
    /// the interval the product of the two intervals' ends.
    pub recall_all: Option<Estimate>,
}

/// An estimate with a 95% interval that also holds the model check's misfit.
#[derive(Debug, Clone, Copy, serde::Serialize)]
pub struct Estimate {
    /// The estimate.
    pub value: f64,
    /// Lower and upper ends.
    pub interval: [f64; 2],
}

struct Clock {
    start: Instant,
}

impl Clock {
    fn new() -> Clock {
        Clock {
            start: Instant::now(),
        }
    }
    fn lap(&mut self, name: &str, timings: &mut Vec<(String, f64)>) {
        timings.push((name.to_string(), self.start.elapsed().as_secs_f64()));
        crate::budget::trace_memory(name);
        self.start = Instant::now();
    }
}

/// Reads one side's table (`left` or not) from the path its config gives.
pub fn read_side(cfg: &Config, left: bool) -> Result<Table> {
    let spec = if left { &cfg.left } else { &cfg.right };
    io::read_table(&cfg.resolve(&spec.path), &read_spec(cfg, left)?)
}

/// What to read from one side's table (`left` or not): its id column, the compared columns
/// and the key-only columns, with the encoding and delimiter of a CSV file.
pub fn read_spec(cfg: &Config, left: bool) -> Result<ReadSpec> {
    let spec = if left { &cfg.left } else { &cfg.right };
    let key = if left { "left" } else { "right" };
    let encoding = Encoding::parse(spec.encoding.as_deref()).ok_or_else(|| {
        Error::config(format!(
            "`{key}.encoding`: unknown encoding `{}`; use utf-8, latin1 or windows-1252",
            spec.encoding.as_deref().unwrap_or("")
        ))
    })?;
    let delimiter = match spec.delimiter.as_deref() {
        None => b',',
        Some(d) if d.len() == 1 => d.as_bytes()[0],
        Some("\\t") | Some("tab") => b'\t',
        Some(d) => {
            return Err(Error::config(format!(
                "`{key}.delimiter`: `{d}` is not one character"
            )))
        }
    };
    // A column spec may join several columns with `+` (one grouped comparison).
    let split =
        |spec: &str| -> Vec<String> { spec.split('+').map(|c| c.trim().to_string()).collect() };
    let columns = cfg
        .field
        .iter()
        .flat_map(|f| {
            split(if left {
                f.left_column()
            } else {
                f.right_column()
            })
        })
        .collect();
    // Key-only columns are read where present; `check_key_columns` then names the absent.
    let optional = cfg.key_columns.iter().flat_map(|c| split(c)).collect();
    Ok(ReadSpec {
        id: spec.id.clone(),
        columns,
        optional,
        section: key.to_string(),
        encoding,
        delimiter,
    })
}

/// Checks that both tables hold every key-only column (see `Config::key_columns`): a name
/// that neither table has is taken for a misspelt field or column (a config error naming the
/// key and the nearest field or column of both tables); a column one table lacks is that
/// table's missing-column error.
fn check_key_columns(cfg: &Config, left: &Table, right: &Table) -> Result<()> {
    for name in &cfg.key_columns {
        let (at, key) = cfg.first_key_naming(name).unwrap_or_default();
        let has = |t: &Table| {
            name.split('+')
                .all(|c| t.header.iter().any(|h| h == c.trim()))
        };
        match (has(left), has(right)) {
            (true, true) => {}
            (false, false) => {
                let mut known: Vec<&str> = cfg.field.iter().map(|f| f.name.as_str()).collect();
                known.extend(
                    left.header
                        .iter()
                        .filter(|h| right.header.contains(h))
                        .map(String::as_str),
                );
                let hint = crate::config::nearest(name, &known)
                    .map(|n| format!("; did you mean `{n}`?"))
                    .unwrap_or_default();
                return Err(Error::config(format!(
                    "`{at}`: key `{key}` names `{name}`, which is neither a [[field]] nor a column of both tables{hint}"
                )));
            }
            (in_left, _) => {
                let (t, section) = if in_left {
                    (right, "right")
                } else {
                    (left, "left")
                };
                let why = format!(" (for key `{key}` of `{at}`)");
                let e = io::column_not_found(&t.header, name, &why, section);
                let e = if t.place == "line" { e.with_line(1) } else { e };
                return Err(e.with_file(&t.path));
            }
        }
    }
    Ok(())
}

/// Ready-to-run passes from a list of pass specs (`at` names the list in errors).
pub fn passes_from(
    config: &Config,
    blocks: &[crate::config::BlockSpec],
    at: &str,
) -> Result<Vec<Pass>> {
    let specs = config.parse_blocks(blocks, at)?;
    if specs.len() > block::MAX_PASSES {
        return Err(Error::config(format!(
            "{} blocking passes given; at most {} are supported",
            specs.len(),
            block::MAX_PASSES
        )));
    }
    Ok(specs
        .into_iter()
        .zip(blocks)
        .enumerate()
        .map(|(i, (parts, b))| Pass {
            name: b.name.clone().unwrap_or_else(|| format!("pass {}", i + 1)),
            parts,
            max_block_pairs: b.max_block_pairs.unwrap_or(block::DEFAULT_MAX_BLOCK_PAIRS),
            window: b.window,
        })
        .collect())
}

/// The passes as the memory budget's message names them (`blocks` and `passes` in the same
/// order, as [`passes_from`] gives them).
pub fn pass_labels(blocks: &[crate::config::BlockSpec], passes: &[Pass]) -> Vec<PassLabel> {
    passes
        .iter()
        .zip(blocks)
        .map(|(p, b)| PassLabel {
            name: p.name.clone(),
            keys: b.keys.join(" + "),
            window: p.window.is_some(),
        })
        .collect()
}

/// Leaves out every field that is empty in every row of one table (it could carry no
/// evidence and would only confuse the fit), and every blocking pass that uses one or a
/// key-only column empty in one table, with a warning for each.
fn drop_empty_fields(
    mut config: Config,
    left: &Table,
    right: &Table,
    warnings: &mut Vec<String>,
) -> Result<Config> {
    let all_empty = |t: &Table, col: &str| t.values(col).iter().all(|v| v.is_empty());
    let mut empty: Vec<String> = Vec::new();
    for f in &config.field {
        for (t, col, side) in [
            (left, f.left_column(), "left"),
            (right, f.right_column(), "right"),
        ] {
            if all_empty(t, col) && !empty.contains(&f.name) {
                warnings.push(format!(
                    "field `{}` is empty in every row of the {side} table; it is left out",
                    f.name
                ));
                empty.push(f.name.clone());
            }
        }
    }
    for c in &config.key_columns {
        for (t, side) in [(left, "left"), (right, "right")] {
            if all_empty(t, c) && !empty.contains(c) {
                warnings.push(format!(
                    "column `{c}` (used for blocking only) is empty in every row of the {side} table; the passes that use it are skipped"
                ));
                empty.push(c.clone());
            }
        }
    }
    if empty.is_empty() {
        return Ok(config);
    }
    config.field.retain(|f| !empty.contains(&f.name));
    if config.field.is_empty() {
        return Err(Error::input(
            "every compared field is empty in one of the tables: nothing to compare",
        ));
    }
    let mut kept = Vec::new();
    for (i, b) in config.block.drain(..).enumerate() {
        let uses = b
            .keys
            .iter()
            .any(|k| empty.iter().any(|e| crate::config::key_name(k) == e));
        if uses {
            warnings.push(format!(
                "{} uses a field or column that is left out; the pass is skipped",
                b.name.clone().unwrap_or_else(|| format!("pass {}", i + 1))
            ));
        } else {
            kept.push(b);
        }
    }
    config.block = kept;
    Ok(config)
}

/// Reads, blocks, compares and fits, with no memory budget.
pub fn prepare(config: Config, progress: &dyn Progress) -> Result<Prepared> {
    prepare_within(config, progress, &Budget::Off)
}

/// The records and candidate pairs of a config's blocking, without comparing or fitting
/// (the reference for a distributed blocking; `given` as in [`prepare_given`]).
pub fn block_only(config: Config, given: Option<(Table, Table)>) -> Result<(Records, Candidates)> {
    let (left, right) = match given {
        Some(tables) => tables,
        None => (read_side(&config, true)?, read_side(&config, false)?),
    };
    check_key_columns(&config, &left, &right)?;
    let config = drop_empty_fields(config, &left, &right, &mut Vec::new())?;
    let records = records::build(&left, &right, &config.field, &config.key_columns)?;
    let passes = passes_from(&config, &config.block, "block")?;
    let (cands, _) = block::plan(&records, &passes).candidates(&records);
    Ok((records, cands))
}

/// The agreement-pattern counts of some pairs of records of two tables (pair i is row
/// `left[i]` of `left_table` with row `right[i]` of `right_table`): a pair's levels depend
/// only on its two records, so counts of disjoint sets of pairs add up to those of their
/// union (a distributed comparison's per-partition piece). Fields are those of the config
/// as given: a field empty in a whole table, which a single-machine run drops, must be taken
/// out of the config first.
pub fn pair_pattern_counts(
    config: &Config,
    left_table: &Table,
    right_table: &Table,
    left: Vec<u32>,
    right: Vec<u32>,
) -> Result<PatternCounts> {
    Ok(pair_comparison(config, left_table, right_table, left, right)?.pattern_counts())
}

/// The pattern code of each of some pairs (as [`pair_pattern_counts`] takes them): a code
/// depends only on the config's fields, so codes from different pieces of a distributed run
/// compare ([`crate::compare::Comparison::levels_of`] gives the levels back).
pub fn pair_codes(
    config: &Config,
    left_table: &Table,
    right_table: &Table,
    left: Vec<u32>,
    right: Vec<u32>,
) -> Result<Vec<u64>> {
    Ok(pair_comparison(config, left_table, right_table, left, right)?.codes)
}

fn pair_comparison(
    config: &Config,
    left_table: &Table,
    right_table: &Table,
    left: Vec<u32>,
    right: Vec<u32>,
) -> Result<compare::Comparison> {
    let records = records::build(left_table, right_table, &config.field, &config.key_columns)?;
    let (nl, nr) = (records.n_left() as u32, records.n_right() as u32);
    if let Some(i) = (0..left.len()).find(|&i| left[i] >= nl || right[i] >= nr) {
        return Err(Error::input(format!(
            "pair {i} names row {} of {nl} left and row {} of {nr} right records",
            left[i], right[i]
        )));
    }
    let passes = vec![0u16; left.len()];
    let cands = Candidates {
        left,
        right,
        passes,
    };
    Ok(compare::compare(&records, &cands))
}

/// The config's comparators over no records: their levels and pattern codes, which depend
/// only on the config (a distributed run's driver has no records).
fn config_comparison(config: &Config) -> Result<compare::Comparison> {
    let empty = empty_table();
    let records = records::build(&empty, &empty, &config.field, &config.key_columns)?;
    Ok(compare::compare(&records, &Candidates::default()))
}

/// The number of agreement levels of each of the config's fields.
pub fn field_levels(config: &Config) -> Result<Vec<usize>> {
    Ok(config_comparison(config)?.level_counts())
}

/// The levels of each field of each pattern code of the config's fields (an error names a
/// code that does not fit them).
pub fn code_levels(config: &Config, codes: &[u64]) -> Result<Vec<Vec<u8>>> {
    let comparison = config_comparison(config)?;
    codes
        .iter()
        .map(|&code| {
            let levels = comparison.levels_of(code);
            if comparison.encode(&levels) != code {
                return Err(Error::input(format!(
                    "{code} is not a pattern code of the config's fields"
                )));
            }
            Ok(levels)
        })
        .collect()
}

/// The fit's first step, EM over the agreement-pattern counts (`patterns`: levels and pairs,
/// in any order, each pattern once), for tables of `n_left` and `n_right` records: the same
/// call, on the same counts in the same order, as a single-machine run's first fit (its
/// `plain_fit`), so a driver holding only the counts gets the same laws. Labelled pairs,
/// `u_from = "random"` and clerical decisions need records, not counts: refused here.
pub fn fit_from_counts(
    config: &Config,
    patterns: Vec<(Vec<u8>, f64)>,
    n_left: usize,
    n_right: usize,
) -> Result<Fit> {
    if config.model.labelled.is_some()
        || config.model.u_from.as_deref() == Some("random")
        || config.link.decisions.is_some()
    {
        return Err(Error::config(
            "`model.labelled`, `model.u_from = \"random\"` and `link.decisions` need the records, not only the pattern counts; they are not available here yet",
        ));
    }
    let comparison = config_comparison(config)?;
    let levels = comparison.level_counts();
    for (p, _) in &patterns {
        let bad = p.len() != levels.len()
            || p.iter()
                .zip(&levels)
                .any(|(&l, &n)| l != MISSING_LEVEL && l as usize >= n);
        if bad {
            return Err(Error::input(format!(
                "pattern {p:?} does not fit the config's fields ({} fields with {levels:?} levels)",
                levels.len()
            )));
        }
    }
    let mut patterns = patterns;
    patterns.sort_by_key(|(p, _)| comparison.encode(p));
    let total: f64 = patterns.iter().map(|(_, n)| n).sum();
    let counts = PatternCounts {
        levels,
        patterns: patterns.iter().map(|(p, _)| p.clone()).collect(),
        counts: patterns.iter().map(|&(_, n)| n).collect(),
    };
    if total <= 0.0 {
        return Ok(model::null_fit(&counts.levels));
    }
    Ok(model::fit(
        &counts,
        &model::EmOptions {
            max_iterations: config.model.max_iterations,
            tolerance: config.model.tolerance,
            p_hint: n_left.min(n_right) as f64 / total,
            known: model::Known::default(),
        },
    ))
}

/// A table of no records, for the side a piece of a distributed run does not see.
fn empty_table() -> Table {
    Table {
        path: PathBuf::new(),
        ids: Texts::new(),
        columns: Default::default(),
        header: Vec::new(),
        lines: Vec::new(),
        bytes: 0,
        sha256: String::new(),
        place: "row",
    }
}

/// One table's blocking keys (see [`side_keys`]).
pub struct SideKeys {
    /// The records' ids, in row order.
    pub ids: Texts,
    /// The config's passes.
    pub passes: Vec<Pass>,
    /// Per pass, each record's key text (`None` where a part is missing).
    pub keys: Vec<Vec<Option<String>>>,
}

/// One table's records and the key texts of every pass ([`block::key_texts`]), in pass
/// order, with the passes; the other table is taken as empty. A sorted-neighbourhood pass is
/// an error: its pairs come from an order over both tables, not from equal keys.
pub fn side_keys(config: &Config, table: &Table, left: bool) -> Result<SideKeys> {
    let empty = empty_table();
    let (l, r) = if left {
        (table, &empty)
    } else {
        (&empty, table)
    };
    let records = records::build(l, r, &config.field, &config.key_columns)?;
    let passes = passes_from(config, &config.block, "block")?;
    if let Some(p) = passes.iter().find(|p| p.window.is_some()) {
        return Err(Error::config(format!(
            "{} is a sorted-neighbourhood pass (`window`), which is made from an order over both tables, not from equal keys; give it keys only to block by joins",
            p.name
        )));
    }
    let keys = passes
        .iter()
        .map(|p| block::key_texts(&records, p, left))
        .collect();
    let ids = if left {
        records.left_ids
    } else {
        records.right_ids
    };
    Ok(SideKeys { ids, passes, keys })
}

/// Reads, blocks, compares and fits; with a budget, stops before making any pair when the
/// blocking plan's memory estimate is over it (see [`crate::budget::MemoryBudget::check`]).
pub fn prepare_within(
    config: Config,
    progress: &dyn Progress,
    budget: &Budget,
) -> Result<Prepared> {
    prepare_given(config, progress, budget, None)
}

/// [`prepare_within`] with the two tables already read (`given`, e.g. from data frames by
/// [`crate::tabular::table_from_batches`] with [`read_spec`]) instead of read from the
/// config's paths.
pub fn prepare_given(
    config: Config,
    progress: &dyn Progress,
    budget: &Budget,
    given: Option<(Table, Table)>,
) -> Result<Prepared> {
    let mut timings = Vec::new();
    let mut warnings = Vec::new();
    let mut clock = Clock::new();
    begin(progress, "reading")?;
    let (left, right) = match given {
        Some(tables) => tables,
        None => {
            // Both tables at once; the left table's error first when both fail.
            let (left, right) =
                rayon::join(|| read_side(&config, true), || read_side(&config, false));
            (left?, right?)
        }
    };
    check_key_columns(&config, &left, &right)?;
    let config = drop_empty_fields(config, &left, &right, &mut warnings)?;
    let records = records::build(&left, &right, &config.field, &config.key_columns)?;
    for fv in &records.fields {
        warnings.extend(
            [true, false]
                .into_iter()
                .filter_map(|l| fv.unparsed_warning(l)),
        );
    }
    clock.lap("reading", &mut timings);

    begin(progress, "blocking")?;
    let passes = passes_from(&config, &config.block, "block")?;
    let plan = block::plan(&records, &passes);
    let memory = MemoryEstimate::new(left.bytes + right.bytes, plan.pairs_per_pass());
    progress.note(&memory.text());
    if let Some(budget) = budget.resolve() {
        budget.check(&memory, &pass_labels(&config.block, &passes))?;
    }
    let (cands, pass_stats) = plan.candidates(&records);
    for s in &pass_stats {
        for (key, size) in &s.skipped {
            warnings.push(format!(
                "{}: block with key `{key}` would give {size} pairs, over the cap of {}; it was skipped (set `max_block_pairs` or add a key part to split it)",
                s.name,
                passes.iter().find(|p| p.name == s.name).map_or(0, |p| p.max_block_pairs)
            ));
        }
    }
    if cands.is_empty() {
        warnings.push("no candidate pairs: no pass gave any two records the same key; every record stays unlinked".into());
    }
    let decisions = match &config.link.decisions {
        Some(path) => {
            let path = config.resolve(path);
            let d = crate::review::apply(&path, &records, &cands.left, &cands.right)?;
            if d.not_candidates > 0 {
                warnings.push(format!(
                    "{} decided pair(s) in the decisions file are not candidate pairs of this run (has the blocking changed since the review?); they are not applied",
                    d.not_candidates
                ));
            }
            Some(d)
        }
        None => None,
    };
    clock.lap("blocking", &mut timings);

    begin(progress, "comparing")?;
    let mut comparison = compare::compare(&records, &cands);
    let counts = comparison.pattern_counts();
    let patterns = PairPatterns::new(&comparison, &counts);
    // Every later stage reads a pair's levels through its pattern; the codes (8 bytes a pair)
    // go before the fit, whose peak is the run's.
    comparison.codes = Vec::new();
    let agreement = codings::agreement(&records, &counts);
    warnings.extend(codings::warnings(&records, &agreement));
    clock.lap("comparing", &mut timings);

    begin(progress, "fitting")?;
    let Fitted {
        fit,
        plain_fit,
        dependence,
        strata,
        link_log_odds,
        pooled_link_log_odds,
        frequency,
        weight,
        theta,
    } = fit::fit(
        &fit::Input {
            config: &config,
            records: &records,
            cands: &cands,
            comparison: &comparison,
            counts: &counts,
            patterns: &patterns,
            decided_same: decisions.as_ref().map_or(&[][..], |d| &d.same_records[..]),
        },
        &mut warnings,
        &|| progress.cancelled(),
    )?;
    let names: Vec<String> = config.field.iter().map(|f| f.name.clone()).collect();
    let split: Vec<Option<f64>> = frequency
        .iter()
        .enumerate()
        .map(|(k, vf)| {
            vf.as_ref().map(|vf| {
                separation::split_bhattacharyya(
                    &fit.m[k],
                    &fit.u[k],
                    fit.m_missing[k],
                    fit.u_missing[k],
                    &vf.m_shares,
                    &vf.u_shares,
                )
            })
        })
        .collect();
    let separations = separation::field_separations(&fit, &names, &split);
    if !cands.is_empty() {
        for s in &separations {
            if s.adds_nothing {
                warnings.push(format!(
                    "field `{}` adds nothing: its m- and u-probabilities are nearly equal (B = {:.4})",
                    s.name, s.bhattacharyya
                ));
            }
        }
    }
    let check = fit::check(
        &records,
        &cands,
        &patterns,
        &passes,
        &fit,
        strata.as_ref(),
        &link_log_odds,
    );
    clock.lap("fitting", &mut timings);
    let mut prep = Prepared {
        memory,
        config,
        left,
        right,
        records,
        pass_stats,
        cands,
        comparison,
        counts,
        fit,
        plain_fit,
        dependence,
        strata,
        link_log_odds,
        pooled_link_log_odds,
        frequency,
        weight,
        theta,
        patterns,
        separations,
        agreement,
        check,
        duplicates: None,
        decisions,
        warnings,
        timings,
    };
    if !prep.cands.is_empty() {
        let mut clock = Clock::new();
        begin(progress, "duplicates")?;
        let d = crate::duplicates::estimate(&prep)?;
        for (pairs, n, side) in [
            (d.left_pairs, prep.records.n_left(), "left"),
            (d.right_pairs, prep.records.n_right(), "right"),
        ] {
            if pairs >= crate::duplicates::WARN_SHARE * n as f64 {
                prep.warnings.push(format!(
                    "about {pairs:.0} pairs of records inside the {side} table look like the same person under the fitted model ({:.1}% of its records): either the table holds duplicates, which one-to-one linkage does not expect (remove them first), or the model takes relatives at one address for the same person; the estimates carry wider intervals",
                    100.0 * pairs / n.max(1) as f64
                ));
            }
        }
        prep.duplicates = Some(d);
        clock.lap("duplicates", &mut prep.timings);
    }
    Ok(prep)
}

/// The share of the larger table's records in likely duplicate pairs, when it is at least
/// [`crate::duplicates::WARN_SHARE`].
pub fn duplicate_share(prep: &Prepared) -> Option<f64> {
    let d = prep.duplicates?;
    let share = (d.left_pairs / prep.records.n_left().max(1) as f64)
        .max(d.right_pairs / prep.records.n_right().max(1) as f64);
    (share >= crate::duplicates::WARN_SHARE).then_some(share)
}

/// Left records compared with every right record to estimate the run's pair completeness,
/// capped so that sample x right records stays below [`COMPLETENESS_PAIRS`].
const COMPLETENESS_SAMPLE: usize = 2000;

/// Most pairs compared for the run's completeness: 500 left records at 20,000 x 20,000
/// (0.8 s on 2 cores, an interval of about +-0.03, the honesty matrix's tolerance; 2M pairs
/// gave 100 records and +-0.07), 50 at 200,000 (0.3 s). Its cost does not grow with the
/// tables, but its sample shrinks as the right table grows. The reference is built one
/// sampled record at a time, so its memory is a row of weights per thread.
const COMPLETENESS_PAIRS: usize = 10_000_000;

/// The forecast's bootstrap subsamples above this many candidate pairs. A replicate draws only
/// the false pairs whose weight can be positive, so its cost follows those, not the pairs:
/// at 200,000 x 200,000 records loosely blocked (4.5M pairs) the whole graph took 1.6 s
/// against 3.8 s for a 2M-pair subsample, which costs more to build than it saves; at
/// 1,000,000 x 1,000,000 (108M pairs) 6.2 s against 21.6 s for a 50M-pair one, at the same
/// peak memory (the fit's).
const FORECAST_PAIRS: usize = 200_000_000;

/// Share of true pairs lost in blocking from which the run warns.
const COMPLETENESS_WARN: f64 = 0.02;

/// Theta of every pair of another candidate set, with this run's pooled laws and
/// value-frequency tables and a one-to-one link prior fitted on that set's graph (as many
/// steps as the refinement's pooled rounds, from this run's pooled prior); also that prior
/// log odds. `tune` links each scheme with it.
pub fn score_one_to_one(prep: &Prepared, cands: &Candidates) -> (Vec<f64>, f64) {
    let (weight, mut theta) = pooled_weights(prep, cands);
    let mut link_log_odds = vec![prep
        .pooled_link_log_odds
        .unwrap_or_else(|| prep.fit.prior_log_odds())];
    if cands.is_empty() {
        return (theta, link_log_odds[0]);
    }
    let mut prior =
        confidence::LinkPrior::new(prep.records.n_left(), &cands.left, &cands.right, |_| 0);
    for _ in 0..ONE_TO_ONE_ROUNDS {
        let marg = confidence::marginals(
            prep.records.n_left(),
            &cands.left,
            &cands.right,
            &theta,
            &REFINEMENT_BP,
        );
        prior.step(&mut link_log_odds, &marg.p, &REFINEMENT_BP);
        for (t, w) in theta.iter_mut().zip(&weight) {
            *t = w + link_log_odds[0];
        }
    }
    (theta, link_log_odds[0])
}

/// Theta (log posterior odds) of every pair of another candidate set, with this run's fitted
/// laws and value-frequency tables and the pairwise prior ln(p / (1 - p)).
pub fn score(prep: &Prepared, cands: &Candidates) -> Vec<f64> {
    pooled_weights(prep, cands).1
}

/// Weights and pairwise-prior theta of another candidate set under the pooled laws.
fn pooled_weights(prep: &Prepared, cands: &Candidates) -> (Vec<f64>, Vec<f64>) {
    let comparison = compare::compare(&prep.records, cands);
    pair_weights(
        &prep.records,
        cands,
        &comparison,
        &prep.fit,
        None,
        &prep.frequency,
        None,
    )
}

/// False candidates per record: its candidates minus its expected true pair (the pairwise
/// posteriors of its pairs, summed and capped at one).
fn false_degrees(prep: &Prepared) -> (Vec<f64>, Vec<f64>) {
    let mut ldeg = vec![0.0f64; prep.records.n_left()];
    let mut rdeg = vec![0.0f64; prep.records.n_right()];
    let mut ltrue = vec![0.0f64; prep.records.n_left()];
    let mut rtrue = vec![0.0f64; prep.records.n_right()];
    for i in 0..prep.cands.len() {
        let (a, b) = (prep.cands.left[i] as usize, prep.cands.right[i] as usize);
        let q = confidence::pairwise(prep.theta[i]);
        ldeg[a] += 1.0;
        rdeg[b] += 1.0;
        ltrue[a] += q;
        rtrue[b] += q;
    }
    let l = ldeg
        .iter()
        .zip(&ltrue)
        .map(|(d, t)| (d - t.min(1.0)).max(0.0))
        .collect();
    let r = rdeg
        .iter()
        .zip(&rtrue)
        .map(|(d, t)| (d - t.min(1.0)).max(0.0))
        .collect();
    (l, r)
}

/// The run's forecast of the mismatch rate of the matching `chosen` (pair indices into
/// `left` / `right`, pairs in the run's order): the bootstrap bracketed by the refined laws
/// `fit` and plain EM's `plain_fit`, with the config's replicates and seed, at the prior the
/// run links with (`pooled_link_log_odds`). A distributed run calls it with the same pairs in
/// the same order.
#[allow(clippy::too_many_arguments)]
pub fn run_forecast(
    config: &Config,
    n_left: usize,
    left: &[u32],
    right: &[u32],
    chosen: &[usize],
    fit: &Fit,
    plain_fit: &Fit,
    pooled_link_log_odds: Option<f64>,
) -> Option<forecast::Forecast> {
    forecast::bracketed(
        n_left,
        left,
        right,
        chosen,
        fit,
        plain_fit,
        &ForecastOptions {
            replicates: config.assess.replicates,
            seed: config.assess.seed,
            max_pairs: FORECAST_PAIRS,
            prior_shift: pooled_link_log_odds.map_or(0.0, |l| l - fit.prior_log_odds()),
        },
    )
}

/// The config's verdict thresholds.
pub fn verdict_rule(cfg: &Config) -> VerdictRule {
    VerdictRule {
        feasible_margin: cfg.assess.feasible_margin,
        infeasible_margin: cfg.assess.infeasible_margin,
        feasible_error: cfg.assess.feasible_error,
        infeasible_error: cfg.assess.infeasible_error,
    }
}

/// Matches on theta and assesses feasibility (with the bootstrap forecast).
fn match_and_assess(
    prep: &mut Prepared,
    progress: &dyn Progress,
) -> Result<(Matching, Assessment)> {
    let mut clock = Clock::new();
    begin(progress, "matching")?;
    let n_left = prep.records.n_left();
    let matching =
        matching::max_weight_matching(n_left, &prep.cands.left, &prep.cands.right, &prep.theta);
    clock.lap("matching", &mut prep.timings);
    begin(progress, "assessing")?;
    let fc = run_forecast(
        &prep.config,
        n_left,
        &prep.cands.left,
        &prep.cands.right,
        &matching.chosen,
        &prep.fit,
        &prep.plain_fit,
        prep.pooled_link_log_odds,
    );
    let (ld, rd) = false_degrees(prep);
    let assessment = reliability::assess(
        &prep.fit,
        AssessInput {
            n_left,
            n_right: prep.records.n_right(),
            n_pairs: prep.cands.len(),
            fields: prep.separations.clone(),
            left_false_degree: &ld,
            right_false_degree: &rd,
            forecast: fc,
        },
        &verdict_rule(&prep.config),
    );
    let mut assessment = assessment;
    if let Some(check) = prep.check.as_ref().filter(|c| c.flagged()) {
        apply_check(prep, check, &matching, &mut assessment);
    }
    if let Some(share) = duplicate_share(prep) {
        // Each duplicate record can take a link from its twin record's partner, or leave one.
        assessment.reasons.push(format!(
            "{:.1}% of the records of one table look like duplicates of another record of the same table; one-to-one linkage assumes one record per person",
            100.0 * share
        ));
        if assessment.verdict == crate::reliability::Verdict::Feasible {
            assessment.verdict = crate::reliability::Verdict::Borderline;
        }
        if let Some(f) = assessment.forecast.as_mut() {
            f.interval = [
                (f.interval[0] - 2.0 * share).max(0.0),
                (f.interval[1] + 2.0 * share).min(1.0),
            ];
        }
    }
    clock.lap("assessing", &mut prep.timings);
    Ok((matching, assessment))
}

/// A flagged model check makes a feasible verdict borderline, says why in plain words, and
/// widens the forecast interval by the misplaced pairs over the chosen pairs (to [0, 1] where
/// a stratum's fit is not identified).
fn apply_check(
    prep: &Prepared,
    check: &ModelCheck,
    matching: &Matching,
    a: &mut reliability::Assessment,
) {
    use crate::model::check::Signature;
    use crate::reliability::Verdict;
    let names: Vec<&str> = prep.config.field.iter().map(|f| f.name.as_str()).collect();
    let found_by = |s: usize| prep.found_by(s).join(" + ");
    for sig in &check.signatures {
        a.reasons.push(match sig {
            Signature::Unidentified { stratum, varying } => format!(
                "the model check: among the pairs found by {} only {varying} field(s) vary (the others are fixed by the blocking keys); two classes need at least three, so the fit there is not determined by the data",
                found_by(*stratum)
            ),
            Signature::Inverted { stratum, field, m, u } => format!(
                "the model check: among the pairs found by {}, agreement on `{}` is likelier in the class taken for false pairs ({u:.3}) than for true pairs ({m:.3}): the two classes are mixed up",
                found_by(*stratum),
                names[*field]
            ),
        });
    }
    if check.misfit_matters >= crate::model::check::MISFIT_FLAG {
        let worst = check.worst.first().map_or(String::new(), |w| {
            let fields: Vec<&str> = w
                .levels
                .iter()
                .enumerate()
                .filter(|(_, &l)| l == 0)
                .map(|(k, _)| names[k])
                .collect();
            format!(
                "; the largest gap: {:.0} pairs found by {} agree on {} where the model expects {:.0}",
                w.observed,
                found_by(w.stratum),
                if fields.is_empty() { "nothing".to_string() } else { fields.join(", ") },
                w.expected
            )
        });
        a.reasons.push(format!(
            "the model check: {:.0}% of the pairs that can be linked are not where the fitted model expects them (fields that move together, relatives or neighbours in the other table){worst}; the estimates carry wider intervals",
            100.0 * check.misfit_matters
        ));
    }
    let unidentified = check.unidentified();
    if a.verdict == Verdict::Feasible {
        a.verdict = Verdict::Borderline;
    }
    let widen = if unidentified {
        1.0
    } else {
        (check.misplaced() / matching.chosen.len().max(1) as f64).min(1.0)
    };
    if let Some(f) = a.forecast.as_mut() {
        f.interval = [
            (f.interval[0] - widen).max(0.0),
            (f.interval[1] + widen).min(1.0),
        ];
    }
}

/// The estimated precision of the links (their mean confidence) and recall among the
/// candidate pairs (their confidences over all candidates' confidences), with 95% intervals:
/// the sampling part from the confidences themselves (the sum of c (1 - c) is the variance of
/// the number of true pairs among independent pairs; normal approximation, common practice),
/// widened, when the model check flags the fit, by the pairs it finds misplaced among those
/// that can be linked, over the links (or the expected true pairs): the error were each of
/// them a link labelled wrongly; an unidentified fit gives [0, 1]; likely duplicates inside a table widen them by twice their
/// share (each can take a link or leave one).
fn estimate_intervals(
    prep: &Prepared,
    links: &[usize],
    confidence: &[f64],
) -> (Option<Estimate>, Option<Estimate>) {
    let n = links.len() as f64;
    let sum: f64 = links.iter().map(|&i| confidence[i]).sum();
    let var: f64 = links
        .iter()
        .map(|&i| confidence[i] * (1.0 - confidence[i]))
        .sum();
    let expected_true: f64 = confidence.iter().sum();
    let var_all: f64 = confidence.iter().map(|c| c * (1.0 - c)).sum();
    let check = prep.check.as_ref().filter(|c| c.flagged());
    let unidentified = check.is_some_and(|c| c.unidentified());
    let misplaced = check.map_or(0.0, |c| c.misplaced());
    let dup = 2.0 * duplicate_share(prep).unwrap_or(0.0);
    let interval = |value: f64, se: f64, widen: f64| Estimate {
        value,
        interval: if unidentified {
            [0.0, 1.0]
        } else {
            [
                (value - 1.96 * se - widen - dup).max(0.0),
                (value + 1.96 * se + widen + dup).min(1.0),
            ]
        },
    };
    let precision = (n > 0.0).then(|| interval(sum / n, var.sqrt() / n, (misplaced / n).min(1.0)));
    let recall = (expected_true > 0.0).then(|| {
        let value = (sum / expected_true).min(1.0);
        interval(
            value,
            var_all.sqrt() / expected_true,
            (misplaced / expected_true).min(1.0),
        )
    });
    (precision, recall)
}

/// The feasibility assessment without writing links.
pub fn assess_only(prep: &mut Prepared, progress: &dyn Progress) -> Result<Assessment> {
    Ok(match_and_assess(prep, progress)?.1)
}

/// The lowest cut-off whose estimated precision (mean confidence of the links at or above it)
/// meets `target`; 1.0 when none does.
pub fn cutoff_for_precision(confidences: &[f64], target: f64) -> f64 {
    let mut c: Vec<f64> = confidences.to_vec();
    c.sort_by(|a, b| b.total_cmp(a));
    let mut best = 1.0;
    let mut sum = 0.0;
    let mut i = 0;
    while i < c.len() {
        // Take every link tied at this confidence together.
        let v = c[i];
        while i < c.len() && c[i] == v {
            sum += c[i];
            i += 1;
        }
        if sum / i as f64 >= target {
            best = v;
        }
    }
    best
}

/// The full run after [`prepare`]: match, assess, score confidence, decide.
pub fn link(prep: &mut Prepared, progress: &dyn Progress) -> Result<Linkage> {
    if let Some(d) = &prep.decisions {
        // Decided pairs are known: the matching and the confidences take them as given.
        crate::review::force(&mut prep.theta, &prep.cands.left, &prep.cands.right, d);
    }
    let (matching, assessment) = match_and_assess(prep, progress)?;
    let mut clock = Clock::new();
    begin(progress, "confidence")?;
    let confidence = confidence::marginals(
        prep.records.n_left(),
        &prep.cands.left,
        &prep.cands.right,
        &prep.theta,
        &BpOptions::default(),
    );
    if confidence.not_converged > 0 {
        prep.warnings.push(format!(
            "belief propagation hit its iteration cap in {} component(s); their confidences are approximate",
            confidence.not_converged
        ));
    }
    let chosen_conf: Vec<f64> = matching.chosen.iter().map(|&i| confidence.p[i]).collect();
    let cutoff = match prep.config.link.target_precision {
        Some(t) => cutoff_for_precision(&chosen_conf, t),
        None => prep.config.link.min_confidence,
    };
    let identified = reliability::identification_problems(&prep.fit, &prep.separations).is_empty();
    let mut links: Vec<usize> = if identified {
        matching
            .chosen
            .iter()
            .copied()
            .filter(|&i| confidence.p[i] >= cutoff)
            .collect()
    } else {
        // The classes are not identified: no link can be reported with any confidence.
        Vec::new()
    };
    if let Some(d) = &prep.decisions {
        // A clerk's "same person" is a link whatever the model says.
        links.extend(d.same.iter().copied());
        links.sort_unstable();
        links.dedup();
    }
    let (precision, recall) = estimate_intervals(prep, &links, &confidence.p);
    clock.lap("confidence", &mut prep.timings);
    begin(progress, "completeness")?;
    let completeness = if prep.cands.is_empty() {
        None
    } else {
        crate::tune::completeness_given(
            prep,
            &prep.cands,
            &confidence.p,
            COMPLETENESS_SAMPLE,
            COMPLETENESS_PAIRS,
            prep.config.assess.seed,
        )
    };
    // The reference rests on the same laws. A flagged check widens its lower end as it
    // widens the recall's, and takes its upper end to 1: laws that take relatives or
    // look-alikes for the same person find such "partners" outside the blocks too and count
    // them as pairs the blocking lost, so the reference can say little of how many were (in
    // every flagged case of benches/honesty.sh the reference fell far below the truth: 0.22
    // against 0.97 at an overlap of 0.1).
    let completeness = completeness.map(|mut c| {
        if let Some(r) = recall.filter(|_| prep.check.as_ref().is_some_and(|k| k.flagged())) {
            let w = (r.interval[1] - r.interval[0]) / 2.0;
            c.interval = [(c.interval[0] - w).max(0.0), 1.0];
        }
        c
    });
    let recall_all = recall.zip(completeness).map(|(r, c)| Estimate {
        value: r.value * c.value,
        interval: [r.interval[0] * c.interval[0], r.interval[1] * c.interval[1]],
    });
    if let Some(c) = completeness.filter(|c| c.value < 1.0 - COMPLETENESS_WARN) {
        prep.warnings.push(format!(
            "blocking is estimated to miss {:.1}% of the true pairs (between {:.1}% and {:.1}%, from {} left records compared with every right record): no pass gave them the same key; loosen blocking or add a pass to find them",
            100.0 * (1.0 - c.value),
            100.0 * (1.0 - c.interval[1]),
            100.0 * (1.0 - c.interval[0]),
            c.sampled
        ));
    }
    clock.lap("completeness", &mut prep.timings);
    Ok(Linkage {
        matching,
        confidence,
        assessment,
        links,
        cutoff,
        precision,
        recall,
        completeness,
        recall_all,
    })
}

impl Prepared {
    /// The names of the passes that found the pairs of stratum `s` (every pass without
    /// strata).
    pub fn found_by(&self, s: usize) -> Vec<String> {
        let mask = self.strata.as_ref().map_or(u16::MAX, |st| st.masks[s]);
        self.pass_stats
            .iter()
            .enumerate()
            .filter(|(j, _)| mask & (1 << j) != 0)
            .map(|(_, p)| p.name.clone())
            .collect()
    }

    /// The name of level `l` of field `k` ("missing" for a missing value).
    pub fn level_name(&self, k: usize, l: u8) -> String {
        if l == MISSING_LEVEL {
            return "missing".to_string();
        }
        self.comparison.comparators[k]
            .level_names()
            .get(l as usize)
            .cloned()
            .unwrap_or_default()
    }
}

/// The level of field `k` for pair `i`, as written in outputs: the level number, or
/// "missing".
pub fn level_text(prep: &Prepared, i: usize, k: usize) -> String {
    match prep.patterns.patterns[prep.patterns.of_pair[i] as usize][k] {
        MISSING_LEVEL => "missing".to_string(),
        l => l.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn precision_cutoff() {
        // Means of the top k: 0.99, 0.97, 0.9, 0.825, 0.76.
        let c = [0.6, 0.99, 0.95, 0.76, 0.5];
        assert_eq!(cutoff_for_precision(&c, 0.89), 0.76);
        assert_eq!(cutoff_for_precision(&c, 0.96), 0.95);
        assert_eq!(cutoff_for_precision(&c, 0.8), 0.6);
        assert_eq!(cutoff_for_precision(&c, 0.999), 1.0);
        assert_eq!(cutoff_for_precision(&c, 0.5), 0.5);
    }

    #[test]
    fn counts_in_words() {
        assert_eq!(count_text(0.4), "0");
        assert_eq!(count_text(999.0), "999");
        assert_eq!(count_text(3411.6), "3,412");
        assert_eq!(count_text(1_234_567.0), "1,234,567");
    }

    /// Stops the run as soon as the stage named `after` has started.
    struct StopAfter {
        after: &'static str,
        seen: std::sync::Mutex<Vec<String>>,
    }

    impl Progress for StopAfter {
        fn stage(&self, name: &str) {
            self.seen.lock().expect("lock").push(name.to_string());
        }
        fn cancelled(&self) -> bool {
            self.seen
                .lock()
                .expect("lock")
                .iter()
                .any(|s| s == self.after)
        }
    }

    #[test]
    fn a_cancelled_run_stops_before_the_next_stage() {
        let path =
            std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config-examples/sample.toml");
        let stop = StopAfter {
            after: "blocking",
            seen: Default::default(),
        };
        let cfg = Config::from_path(&path).expect("sample config");
        let e = match prepare(cfg, &stop) {
            Ok(_) => panic!("a cancelled run went on"),
            Err(e) => e,
        };
        assert_eq!(e.kind(), crate::ErrorKind::Cancelled);
        assert_eq!(*stop.seen.lock().expect("lock"), ["reading", "blocking"]);
        // Stopped inside the fitting stage: the fit asks before each of its rounds.
        let inside = StopAfter {
            after: "fitting",
            seen: Default::default(),
        };
        let e = match prepare(Config::from_path(&path).expect("config"), &inside) {
            Ok(_) => panic!("a run cancelled in fitting went on"),
            Err(e) => e,
        };
        assert_eq!(e.kind(), crate::ErrorKind::Cancelled);
        assert!(
            e.to_string().contains("round 1 of the fitting stage"),
            "{e}"
        );
        // Not cancelled: the same run reaches the last stage.
        let late = StopAfter {
            after: "never",
            seen: Default::default(),
        };
        let mut prep = prepare(Config::from_path(&path).expect("config"), &late).expect("prepare");
        link(&mut prep, &late).expect("link");
        assert!(late
            .seen
            .lock()
            .expect("lock")
            .iter()
            .any(|s| s == "confidence"));
    }
}
