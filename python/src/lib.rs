//! The `pathfold._pathfold` extension module: pathfold's pricing, checks, comparisons,
//! partial runs and merge, called from Python. Results cross as JSON text (the same JSON
//! as the command line's `--format json`), which `pathfold/__init__.py` turns into dicts;
//! floats print as the shortest digits that read back to the same double, so nothing is
//! lost. Errors raise `pathfold.PathfoldError` with `file:line:col: message (fix: ...)`.

use std::path::{Path, PathBuf};

use pyo3::create_exception;
use pyo3::exceptions::PyException;
use pyo3::prelude::*;

use pathfold::batch::{self, Request};
use pathfold::typing::Override;
use pathfold::pricing::{self, Failure};
use pathfold::partial::{self, Part};
use pathfold::output::{self, Format};
use pathfold::sim::{self, Settings};

create_exception!(_pathfold, PathfoldError, PyException, "A payoff, market or argument pathfold refuses.");

/// Runs `f` without the GIL on a thread pool of its own, dropped when `f` returns. Not
/// rayon's global pool: a process forked after a call (a `multiprocessing` pool on Linux)
/// inherits that pool's state without its threads, and would hang on its next call.
fn pooled<T: Send>(py: Python<'_>, f: impl FnOnce() -> T + Send) -> PyResult<T> {
    py.allow_threads(|| rayon::ThreadPoolBuilder::new().build().map(|pool| pool.install(f)))
        .map_err(|e| refused(format!("could not start the worker threads: {e}")))
}

fn refused(message: impl Into<String>) -> PyErr {
    PathfoldError::new_err(message.into().trim_end().to_string())
}

fn failure(f: &Failure) -> PyErr {
    refused(pricing::one_line(f))
}

fn settings(paths: u64, seed: u64, antithetic: bool, control_variates: bool) -> PyResult<Settings> {
    let s = Settings { paths, seed, antithetic, control_variates, ..Settings::default() };
    s.validate().map_err(refused)?;
    Ok(s)
}

/// [`settings`] with the sampler named as on the command line (`random` or `sobol`).
fn sampled(paths: u64, seed: u64, antithetic: bool, control_variates: bool, sampler: &str) -> PyResult<Settings> {
    let Some(sampler) = sim::Sampler::from_name(sampler) else {
        return Err(refused(format!("sampler {sampler:?}: name \"random\" or \"sobol\"")));
    };
    let s = Settings { sampler, ..settings(paths, seed, antithetic, control_variates)? };
    s.validate().map_err(refused)?;
    Ok(s)
}

fn overrides(set: &[String]) -> PyResult<Vec<Override>> {
    set.iter().map(|s| Override::parse(s).map_err(|d| refused(d.render(None)))).collect()
}

fn json_text(write: impl FnOnce(&mut Vec<u8>) -> std::io::Result<()>) -> PyResult<String> {
    let mut out = Vec::new();
    write(&mut out).map_err(|e| refused(format!("could not write the result: {e}")))?;
    String::from_utf8(out).map_err(|e| refused(e.to_string()))
}

fn priced_json(p: &pricing::Priced) -> PyResult<String> {
    json_text(|w| output::write_one(w, p, Format::Json))
}

/// Prices one payoff file; the JSON of `pathfold price FILE --format json`.
#[pyfunction]
#[pyo3(signature = (file, market=None, paths=sim::DEFAULT_PATHS, seed=sim::DEFAULT_SEED, set=Vec::new(), antithetic=true, control_variates=true, sampler="random"))]
fn price(
    py: Python<'_>,
    file: PathBuf,
    market: Option<PathBuf>,
    paths: u64,
    seed: u64,
    set: Vec<String>,
    antithetic: bool,
    control_variates: bool,
    sampler: &str,
) -> PyResult<String> {
    let settings = sampled(paths, seed, antithetic, control_variates, sampler)?;
    let overrides = overrides(&set)?;
    let priced = pooled(py, || pricing::price_file(&file, market.as_deref(), &overrides, &settings))?;
    priced_json(&priced.map_err(|f| failure(&f))?)
}

/// Prices a payoff given as text; `name` stands for it in messages, and a market file the
/// payoff names is looked for in the current folder.
#[pyfunction]
#[pyo3(signature = (text, market=None, name=String::from("<text>"), paths=sim::DEFAULT_PATHS, seed=sim::DEFAULT_SEED, set=Vec::new(), antithetic=true, control_variates=true, sampler="random"))]
fn price_text(
    py: Python<'_>,
    text: String,
    market: Option<PathBuf>,
    name: String,
    paths: u64,
    seed: u64,
    set: Vec<String>,
    antithetic: bool,
    control_variates: bool,
    sampler: &str,
) -> PyResult<String> {
    let settings = sampled(paths, seed, antithetic, control_variates, sampler)?;
    let overrides = overrides(&set)?;
    let priced = pooled(py, || {
        let compiled = pricing::compile_source(Path::new(&name), text, market.as_deref(), &overrides)?;
        let estimate = sim::simulate(&compiled.program, &settings);
        compiled.priced(estimate, &settings, &overrides, None)
    })?;
    priced_json(&priced.map_err(|f| failure(&f))?)
}

/// Prices the validation set; the JSON of `pathfold check --format json`.
#[pyfunction]
#[pyo3(signature = (folder=PathBuf::from("payoffs/validation"), paths=sim::DEFAULT_PATHS, seed=sim::DEFAULT_SEED))]
fn check(py: Python<'_>, folder: PathBuf, paths: u64, seed: u64) -> PyResult<String> {
    let settings = settings(paths, seed, true, true)?;
    let outcomes = pooled(py, || pathfold::validation::run(&folder, &settings))?.map_err(|d| {
        refused(
            d.render(pathfold::files::read_regular_file(d.file.as_deref().unwrap_or(&folder)).ok().as_deref()),
        )
    })?;
    json_text(|w| output::checks::write_checks(w, &outcomes, Format::Json))
}

/// Compares a price list with pathfold's prices; the JSON of `pathfold compare --format json`.
#[pyfunction]
#[pyo3(signature = (prices, files=Vec::new(), max_z=3.0, market=None, paths=sim::DEFAULT_PATHS, seed=sim::DEFAULT_SEED, set=Vec::new(), antithetic=true, control_variates=true, sampler="random"))]
fn compare(
    py: Python<'_>,
    prices: PathBuf,
    files: Vec<PathBuf>,
    max_z: f64,
    market: Option<PathBuf>,
    paths: u64,
    seed: u64,
    set: Vec<String>,
    antithetic: bool,
    control_variates: bool,
    sampler: &str,
) -> PyResult<String> {
    if !(max_z.is_finite() && max_z > 0.0) {
        return Err(refused(format!("max_z must be a positive number, not {max_z}")));
    }
    let settings = sampled(paths, seed, antithetic, control_variates, sampler)?;
    let overrides = overrides(&set)?;
    let list = pathfold::comparison::read_list(&prices)
        .map_err(|d| refused(d.render(pathfold::files::read_regular_file(&prices).ok().as_deref())))?;
    let inputs = if files.is_empty() {
        vec![prices.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new(".")).to_path_buf()]
    } else {
        files
    };
    let request = Request { market, overrides, settings, target: None, max_paths: pricing::DEFAULT_MAX_PATHS };
    let rows = pooled(py, || {
        let files = batch::collect_files(&inputs);
        batch::price_all(files, &request, &|_: &str| {})
    })?;
    let lines = pathfold::comparison::compare(&list, &rows, max_z);
    json_text(|w| output::comparison::write(w, &lines, Format::Json))
}

/// Runs part `part` ("K/N") of the run of one payoff; the partial result's JSON, as
/// `pathfold price FILE --part K/N` writes it.
#[pyfunction]
#[pyo3(signature = (file, part, market=None, paths=sim::DEFAULT_PATHS, seed=sim::DEFAULT_SEED, set=Vec::new(), antithetic=true, control_variates=true))]
fn price_part(
    py: Python<'_>,
    file: PathBuf,
    part: String,
    market: Option<PathBuf>,
    paths: u64,
    seed: u64,
    set: Vec<String>,
    antithetic: bool,
    control_variates: bool,
) -> PyResult<String> {
    let part = Part::parse(&part).map_err(refused)?;
    let settings = settings(paths, seed, antithetic, control_variates)?;
    let overrides = overrides(&set)?;
    let result =
        pooled(py, || partial::run_part(&file, market.as_deref(), &overrides, &settings, part))?.map_err(refused)?;
    let record = result.map_err(|f| failure(&f))?;
    serde_json::to_string_pretty(&record).map_err(|e| refused(e.to_string()))
}

/// Merges partial results given as JSON texts (`names` label them in messages) into the
/// full run's JSON, as `pathfold merge --format json` does.
#[pyfunction]
fn merge(py: Python<'_>, texts: Vec<String>, names: Vec<String>) -> PyResult<String> {
    let names: Vec<PathBuf> = names.into_iter().map(PathBuf::from).collect();
    if names.len() != texts.len() {
        return Err(refused("one name per part"));
    }
    let priced = pooled(py, || {
        let load = |i: usize| partial::parse_part(&names[i], &texts[i]);
        partial::merge_parts(&names, &load, &|_, _| Ok(()))
    })?;
    let priced = priced.map_err(refused)?.map_err(|f| failure(&f))?;
    priced_json(&priced)
}

#[pymodule]
fn _pathfold(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("PathfoldError", m.py().get_type_bound::<PathfoldError>())?;
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    m.add_function(wrap_pyfunction!(price, m)?)?;
    m.add_function(wrap_pyfunction!(price_text, m)?)?;
    m.add_function(wrap_pyfunction!(check, m)?)?;
    m.add_function(wrap_pyfunction!(compare, m)?)?;
    m.add_function(wrap_pyfunction!(price_part, m)?)?;
    m.add_function(wrap_pyfunction!(merge, m)?)?;
    Ok(())
}
