//! `dovetail._dovetail`: the native half of the Python package.
//!
//! The Python half (`dovetail/__init__.py`) turns what the user gives (pandas, polars,
//! pyarrow, file paths, a dict) into what these functions take: a path string or an object
//! with `__arrow_c_stream__` per table, and the config as a path or as JSON text. Each
//! function runs the library's stages on a worker thread with the GIL released
//! ([`run::detached`]) and returns an [`Outputs`]: the files the CLI would write, held in
//! memory, whose tables cross back to Python by the Arrow C stream interface.
//!
//! Data flow: `frames::source` (Arrow C stream -> record batches, with the GIL) ->
//! [`dovetail::tabular::table_from_batches`] (on the worker) -> the CLI's stages ->
//! [`dovetail::folder::Rendered`] -> [`Outputs`].

mod errors;
mod frames;
mod run;
mod spark;
mod spark_fit;

use dovetail::budget::Budget;
use dovetail::config::Config;
use dovetail::folder::Rendered;
use dovetail::pipeline::Progress as _;
use dovetail::tune as tuning;
use dovetail::{pipeline, report, tabular, Error, Result};
use frames::Source;
use pyo3::prelude::*;
use run::Relay;
use std::path::{Path, PathBuf};

/// The files of one command's outputs, in memory, with what the command printed.
#[pyclass(module = "dovetail._dovetail", frozen)]
struct Outputs {
    rendered: Rendered,
    /// The run's warnings, as the CLI prints them (without the `warning:` prefix).
    #[pyo3(get)]
    warnings: Vec<String>,
    /// What the CLI prints on stdout for the command (the assessment, the tune table).
    #[pyo3(get)]
    text: String,
    /// Numeric columns of the tables, by file name.
    numeric: &'static [&'static str],
    /// The run stopped as infeasible (`stop_if_infeasible`): only summary.json and
    /// report.html, which say why, as the CLI writes them with exit status 3.
    #[pyo3(get)]
    stopped: bool,
}

#[pymethods]
impl Outputs {
    /// The names of the files, in the order the command writes them.
    fn names(&self) -> Vec<String> {
        self.rendered.files.iter().map(|(n, _)| n.clone()).collect()
    }

    /// The bytes of file `name`.
    fn file<'py>(&self, py: Python<'py>, name: &str) -> PyResult<Bound<'py, pyo3::types::PyBytes>> {
        let bytes = self.rendered.file(name).ok_or_else(|| {
            pyo3::exceptions::PyKeyError::new_err(format!("no output named {name}"))
        })?;
        Ok(pyo3::types::PyBytes::new(py, bytes))
    }

    /// The CSV file `name` as an Arrow stream (an object with `__arrow_c_stream__`): text
    /// columns, with the command's numeric columns as floats and empty cells as nulls.
    fn table(&self, name: &str) -> PyResult<frames::Stream> {
        let csv = self.rendered.file(name).ok_or_else(|| {
            pyo3::exceptions::PyKeyError::new_err(format!("no output named {name}"))
        })?;
        let batch = tabular::csv_to_batch(csv, self.numeric).map_err(errors::to_py)?;
        Ok(frames::Stream::new(batch))
    }

    /// Writes the files into `folder` as the CLI does (atomically, all or none); with
    /// `parquet`, the link tables also as Parquet. Returns the paths written.
    #[pyo3(signature = (folder, parquet = false))]
    fn write(&self, py: Python<'_>, folder: PathBuf, parquet: bool) -> PyResult<Vec<PathBuf>> {
        let rendered = &self.rendered;
        py.detach(|| {
            let _claim = dovetail::folder::claim(&folder)?;
            rendered.write_to(&folder, parquet)
        })
        .map_err(errors::to_py)
    }
}

/// The config and the two tables of a config-driven command, as given from Python.
struct RunInput {
    config: Config,
    left: Option<Source>,
    right: Option<Source>,
    threads: Option<usize>,
    budget: Budget,
}

/// Reads the config (a path, or JSON text from a dict) and points its tables at what was
/// given: a frame gets a label for messages (`<left table>`), a path replaces the config's.
fn config_for(
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
    left: &Option<Source>,
    right: &Option<Source>,
) -> Result<Config> {
    let (l, r) = (left.is_some(), right.is_some());
    let mut cfg = match (config_path, config_json) {
        (Some(p), _) => config_from_file(&p, l, r)?,
        (None, Some(json)) => config_from_json(json, l, r)?,
        (None, None) => return Err(Error::config("no config given")),
    };
    for (side, given) in [(true, left), (false, right)] {
        let spec = if side { &mut cfg.left } else { &mut cfg.right };
        match given {
            Some(Source::Path(p)) => spec.path = absolute(p),
            Some(Source::Frame { .. }) => spec.path = frames::label(side),
            None => {}
        }
    }
    Ok(cfg)
}

fn absolute(p: &Path) -> PathBuf {
    std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf())
}

/// A config file, as the CLI reads it; a table given from Python may leave out its `path`.
fn config_from_file(path: &Path, left_given: bool, right_given: bool) -> Result<Config> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| Error::config(format!("cannot read config: {e}")).with_file(path))?;
    let mut value: toml::Value = match toml::from_str(&text) {
        Ok(v) => v,
        // The CLI's own message, with its line.
        Err(_) => return Config::from_path(path),
    };
    if !placeholder_paths(&mut value, left_given, right_given) {
        return Config::from_path(path);
    }
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let text = toml::to_string(&value)
        .map_err(|e| Error::config(format!("the config cannot be read: {e}")).with_file(path))?;
    Config::from_text(&text, &base).map_err(|e| e.without_line().with_file(path))
}

/// Gives each table given from Python a `path` key (replaced by the frame or path later);
/// true when one was missing.
fn placeholder_paths(value: &mut toml::Value, left_given: bool, right_given: bool) -> bool {
    let mut changed = false;
    for (key, given) in [("left", left_given), ("right", right_given)] {
        if let Some(toml::Value::Table(t)) = value.get_mut(key) {
            if given && !t.contains_key("path") {
                t.insert("path".into(), toml::Value::String(String::new()));
                changed = true;
            }
        }
    }
    changed
}

/// A config from the JSON text of a Python dict: the same keys as the TOML file. A table
/// given as a frame or path needs no `path` key. Relative paths in it are taken from the
/// current folder. Errors name the key, never a line of the TOML rendered on the way.
fn config_from_json(json: &str, left_given: bool, right_given: bool) -> Result<Config> {
    let value: serde_json::Value = serde_json::from_str(json)
        .map_err(|e| Error::config(format!("the config is not a plain dict: {e}")))?;
    let mut value = toml_value(value, "")?;
    if !value.is_table() {
        return Err(Error::config("the config must be a dict"));
    }
    placeholder_paths(&mut value, left_given, right_given);
    let text = toml::to_string(&value)
        .map_err(|e| Error::config(format!("the config cannot be read: {e}")))?;
    Config::from_text(&text, Path::new("")).map_err(Error::without_line)
}

/// JSON to TOML: nulls are refused by key (TOML has none); everything else maps one to one.
fn toml_value(v: serde_json::Value, key: &str) -> Result<toml::Value> {
    use serde_json::Value as J;
    Ok(match v {
        J::Null => {
            return Err(Error::config(format!(
                "key `{key}`: None is not a value; leave the key out instead"
            )))
        }
        J::Bool(b) => toml::Value::Boolean(b),
        J::Number(n) => match n.as_i64() {
            Some(i) => toml::Value::Integer(i),
            None => toml::Value::Float(n.as_f64().unwrap_or(f64::NAN)),
        },
        J::String(s) => toml::Value::String(s),
        J::Array(a) => toml::Value::Array(
            a.into_iter()
                .map(|x| toml_value(x, key))
                .collect::<Result<_>>()?,
        ),
        J::Object(o) => {
            let mut t = toml::map::Map::new();
            for (k, x) in o {
                let path = if key.is_empty() {
                    k.clone()
                } else {
                    format!("{key}.{k}")
                };
                t.insert(k, toml_value(x, &path)?);
            }
            toml::Value::Table(t)
        }
    })
}

impl RunInput {
    #[allow(clippy::too_many_arguments)]
    fn new(
        py: Python<'_>,
        left: Option<&Bound<'_, PyAny>>,
        right: Option<&Bound<'_, PyAny>>,
        config_path: Option<PathBuf>,
        config_json: Option<&str>,
        threads: Option<usize>,
        memory_budget: Option<&str>,
    ) -> PyResult<RunInput> {
        let left = left.map(|x| frames::source(py, x, true)).transpose()?;
        let right = right.map(|x| frames::source(py, x, false)).transpose()?;
        let config = config_for(config_path, config_json, &left, &right).map_err(errors::to_py)?;
        let budget = match memory_budget {
            None => Budget::Default,
            Some(text) => {
                let arg = dovetail::budget::parse_size(text)
                    .map_err(|e| errors::to_py(Error::config(format!("memory_budget: {e}"))))?;
                dovetail::budget::budget_for(Some(arg), Some(text))
            }
        };
        Ok(RunInput {
            config,
            left,
            right,
            threads,
            budget,
        })
    }

    /// Reads (or converts) the tables and prepares the run, on the worker.
    fn prepare(self, progress: &dyn pipeline::Progress) -> Result<pipeline::Prepared> {
        let RunInput {
            config,
            left,
            right,
            budget,
            ..
        } = self;
        let framed = |s: &Option<Source>| matches!(s, Some(Source::Frame { .. }));
        let given = if framed(&left) || framed(&right) {
            let l = frames::table(left, &config, true)?;
            let r = frames::table(right, &config, false)?;
            Some((l, r))
        } else {
            None
        };
        pipeline::prepare_given(config, progress, &budget, given)
    }
}

/// The numeric columns of tune.csv.
const TUNE_NUMERIC: &[&str] = &[
    "pairs",
    "d",
    "left_with_candidate",
    "completeness",
    "margin",
    "forecast_error",
    "expected_correct",
    "seconds",
    "memory_bytes",
];

/// A config-driven command: `command` is "link" (the whole job; the outputs `dovetail link`
/// writes), "assess" (the verdict without links; summary.json) or "tune" (blocking schemes
/// compared on `sample` left records; tune.csv). `sample` and `replicates` are tune's.
#[pyfunction]
#[pyo3(signature = (command, left, right, config_path, config_json, threads, progress, memory_budget, sample, replicates))]
#[allow(clippy::too_many_arguments)]
fn run_config(
    py: Python<'_>,
    command: &str,
    left: Option<&Bound<'_, PyAny>>,
    right: Option<&Bound<'_, PyAny>>,
    config_path: Option<PathBuf>,
    config_json: Option<&str>,
    threads: Option<usize>,
    progress: Option<Py<PyAny>>,
    memory_budget: Option<&str>,
    sample: usize,
    replicates: usize,
) -> PyResult<Outputs> {
    let job: fn(pipeline::Prepared, &Relay, &Budget, usize, usize) -> Result<Outputs> =
        match command {
            "link" => |prep, p, _, _, _| link(prep, p),
            "assess" => |prep, p, _, _, _| assess(prep, p),
            "tune" => tune,
            other => {
                return Err(pyo3::exceptions::PyValueError::new_err(format!(
                    "unknown command {other}"
                )))
            }
        };
    let input = RunInput::new(
        py,
        left,
        right,
        config_path,
        config_json,
        threads,
        memory_budget,
    )?;
    let threads = input.threads;
    let budget = input.budget.clone();
    run::detached(py, threads, progress, move |p| {
        let prep = input.prepare(p)?;
        job(prep, p, &budget, sample, replicates)
    })
}

fn link(mut prep: pipeline::Prepared, p: &Relay) -> Result<Outputs> {
    let stop = prep.config.link.stop_if_infeasible;
    let linkage = pipeline::link(&mut prep, p)?;
    let text = report::assessment_text(&prep, &linkage.assessment);
    let stopped = stop && linkage.assessment.verdict == dovetail::reliability::Verdict::Infeasible;
    Ok(Outputs {
        rendered: if stopped {
            report::render_stopped(&prep, &linkage)?
        } else {
            report::render_linkage(&prep, &linkage)?
        },
        warnings: prep.warnings.clone(),
        text,
        numeric: tabular::NUMERIC_COLUMNS,
        stopped,
    })
}

fn assess(mut prep: pipeline::Prepared, p: &Relay) -> Result<Outputs> {
    let assessment = pipeline::assess_only(&mut prep, p)?;
    Ok(Outputs {
        rendered: report::render_assessment(&prep, &assessment)?,
        warnings: prep.warnings.clone(),
        text: report::assessment_text(&prep, &assessment),
        numeric: &[],
        stopped: false,
    })
}

fn tune(
    prep: pipeline::Prepared,
    p: &Relay,
    budget: &Budget,
    sample: usize,
    replicates: usize,
) -> Result<Outputs> {
    p.stage("tuning");
    let schemes = tuning::schemes_of(&prep, budget)?;
    let rows = tuning::evaluate(
        &prep,
        &schemes,
        &tuning::TuneOptions {
            sample,
            seed: prep.config.assess.seed,
            replicates,
        },
    );
    let mut out = dovetail::folder::OutputSet::in_memory(dovetail::folder::stamp_of(&prep, "tune"));
    let csv = tuning::csv_bytes(&rows)?;
    out.write("tune.csv", |w| w.write_all(&csv))?;
    Ok(Outputs {
        rendered: out.into_rendered(),
        warnings: prep.warnings.clone(),
        text: tuning::table_text(&rows),
        numeric: TUNE_NUMERIC,
        stopped: false,
    })
}

/// `match`: the maximum-weight one-to-one set of scored pairs; links.csv as `dovetail match`.
#[pyfunction]
#[pyo3(signature = (pairs, min_weight, threads))]
fn match_pairs(
    py: Python<'_>,
    pairs: &Bound<'_, PyAny>,
    min_weight: f64,
    threads: Option<usize>,
) -> PyResult<Outputs> {
    if !min_weight.is_finite() {
        return Err(errors::to_py(Error::config(
            "min_weight must be a finite number",
        )));
    }
    let source = frames::source(py, pairs, true)?;
    run::detached(py, threads, None, move |_| {
        let p = match source {
            Source::Path(path) => dovetail::io::read_scored_pairs(&path)?,
            Source::Frame { schema, batches } => {
                tabular::scored_pairs_from_batches(&schema, &batches, Path::new("<pairs>"))?
            }
        };
        let w: Vec<f64> = p
            .weight
            .iter()
            .map(|&x| if x > min_weight { x } else { f64::NAN })
            .collect();
        let m = dovetail::matching::max_weight_matching(p.left_ids.len(), &p.left, &p.right, &w);
        Ok(Outputs {
            rendered: report::render_matching(&p, &m)?,
            warnings: Vec::new(),
            text: format!("links: {}\ntotal weight: {}\n", m.chosen.len(), m.total),
            numeric: &["weight"],
            stopped: false,
        })
    })
}

/// `synth`: invented demo tables with their truth and a ready config, as `dovetail synth`.
#[pyfunction]
#[pyo3(signature = (rows, overlap, noise, seed, twins, movers, household_moves, relatives, duplicates, blank))]
#[allow(clippy::too_many_arguments)]
fn synth(
    py: Python<'_>,
    rows: usize,
    overlap: f64,
    noise: f64,
    seed: u64,
    twins: Option<f64>,
    movers: Option<f64>,
    household_moves: f64,
    relatives: f64,
    duplicates: f64,
    blank: Vec<String>,
) -> PyResult<(Outputs, String)> {
    let opts = dovetail::synth::SynthOptions {
        rows,
        overlap,
        noise,
        seed,
        twins: twins.unwrap_or(dovetail::synth::TWIN_CHANCE),
    };
    let mut scenario = dovetail::synth::Scenario {
        movers,
        household_moves,
        relatives,
        duplicates,
        blank: Vec::new(),
    };
    scenario.check(&opts, &blank).map_err(errors::to_py)?;
    run::detached(py, None, None, move |_| {
        let s = dovetail::synth::generate_scenario(&opts, &scenario);
        let files = s
            .files()
            .iter()
            .map(|(n, t)| (n.to_string(), t.as_bytes().to_vec()))
            .collect();
        let config: toml::Value = toml::from_str(&s.config_toml)
            .map_err(|e| Error::config(format!("synth's config does not read back: {e}")))?;
        let json = serde_json::to_string(&config)
            .map_err(|e| Error::config(format!("synth's config does not convert: {e}")))?;
        Ok((
            Outputs {
                rendered: Rendered {
                    stamp: dovetail::folder::Stamp {
                        command: "synth",
                        fingerprint: None,
                    },
                    files,
                },
                warnings: Vec::new(),
                text: format!(
                    "{} left and {} right records ({} true pairs)\n",
                    s.left_csv.lines().count().saturating_sub(1),
                    s.right_csv.lines().count().saturating_sub(1),
                    s.true_pairs
                ),
                numeric: &[],
                stopped: false,
            },
            json,
        ))
    })
}

/// Writes synth's files into `folder` as `dovetail synth` does (not as a run's outputs).
#[pyfunction]
fn write_plain(py: Python<'_>, outputs: &Outputs, folder: PathBuf) -> PyResult<Vec<PathBuf>> {
    let files = &outputs.rendered.files;
    py.detach(|| -> Result<Vec<PathBuf>> {
        let mut out = dovetail::folder::OutputSet::new(&folder)?;
        for (name, bytes) in files {
            out.write(name, |w| w.write_all(bytes))?;
        }
        out.commit()
    })
    .map_err(errors::to_py)
}

/// Measures a finished run folder's precision from the decisions on its audit sample, as
/// `dovetail audit`: writes audit.json and the report's audit section; returns audit.json's
/// text.
#[pyfunction]
fn audit(py: Python<'_>, folder: PathBuf) -> PyResult<String> {
    py.detach(|| -> Result<String> {
        let _claim = dovetail::folder::claim(&folder)?;
        let result = dovetail::review::audit_folder(&folder)?;
        dovetail::report::write_audit(&folder, &result)?;
        serde_json::to_string(&result).map_err(|e| dovetail::Error::output(e.to_string()))
    })
    .map_err(errors::to_py)
}

#[pymodule]
fn _dovetail(m: &Bound<'_, PyModule>) -> PyResult<()> {
    errors::register(m)?;
    m.add_class::<Outputs>()?;
    m.add_class::<frames::Stream>()?;
    m.add_function(wrap_pyfunction!(run_config, m)?)?;
    m.add_function(wrap_pyfunction!(match_pairs, m)?)?;
    m.add_function(wrap_pyfunction!(synth, m)?)?;
    m.add_function(wrap_pyfunction!(write_plain, m)?)?;
    m.add_function(wrap_pyfunction!(audit, m)?)?;
    m.add_function(wrap_pyfunction!(spark::block_keys, m)?)?;
    m.add_function(wrap_pyfunction!(spark::block_passes, m)?)?;
    m.add_function(wrap_pyfunction!(spark::candidate_pairs, m)?)?;
    m.add_function(wrap_pyfunction!(spark::read_columns, m)?)?;
    m.add_function(wrap_pyfunction!(spark::pattern_counts, m)?)?;
    m.add_function(wrap_pyfunction!(spark::local_pattern_counts, m)?)?;
    m.add_function(wrap_pyfunction!(spark::fit_counts, m)?)?;
    m.add_function(wrap_pyfunction!(spark::local_plain_fit, m)?)?;
    m.add_class::<spark_fit::Refiner>()?;
    m.add_function(wrap_pyfunction!(spark_fit::piece_round_a, m)?)?;
    m.add_function(wrap_pyfunction!(spark_fit::piece_round_b, m)?)?;
    m.add_function(wrap_pyfunction!(spark_fit::piece_round_ab, m)?)?;
    m.add_function(wrap_pyfunction!(spark_fit::piece_finish, m)?)?;
    m.add_function(wrap_pyfunction!(spark_fit::pair_codes, m)?)?;
    m.add_function(wrap_pyfunction!(spark_fit::union_find_components, m)?)?;
    m.add_function(wrap_pyfunction!(spark_fit::forecast_pairs, m)?)?;
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    Ok(())
}
