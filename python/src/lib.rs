//! The Python module `convchain._convchain`: the engine's runs, sweep points and Monte-Carlo runs for
//! `convchain/__init__.py`.
//! Every call releases the GIL while the engine works ([`Python::detach`]).

use std::path::{Path, PathBuf};

use convchain::Error;
use convchain::report::wav::WavOptions;
use convchain::runner::{RunOptions, run_in_memory};
use convchain::scenario::overrides::ScenarioText;
use convchain::study::montecarlo::{self, McOptions, McPlan, Requirement};
use convchain::study::shard::{Shard, fingerprint};
use convchain::study::sweep::{
    self, METRIC_COLUMNS, SweepResult, SweepRow, SweepSpec, axis_values, grid, parse_vary,
};
use numpy::{IntoPyArray, PyArray1};
use pyo3::create_exception;
use pyo3::exceptions::PyException;
use pyo3::prelude::*;
use pyo3::types::{PyDict, PyList};
use serde_json::Value;

create_exception!(
    _convchain,
    ScenarioError,
    PyException,
    "The scenario or a value given is wrong (the CLI's exit code 2); the message names where and how to fix it."
);
create_exception!(
    _convchain,
    RunError,
    PyException,
    "The run could not be completed (the CLI's exit code 1)."
);

fn to_py(e: Error) -> PyErr {
    if e.is_bad_input() {
        ScenarioError::new_err(e.to_string())
    } else {
        RunError::new_err(e.to_string())
    }
}

/// Where the scenario comes from: a file's path, or TOML text (its relative file names then resolve from
/// `base_dir`), or neither (the embedded default). Owned, so that it can cross into `Python::detach`.
struct ScenarioSource {
    path: Option<String>,
    text: Option<String>,
    base_dir: Option<String>,
}

impl ScenarioSource {
    fn new(path: Option<&str>, text: Option<&str>, base_dir: Option<&str>) -> ScenarioSource {
        ScenarioSource {
            path: path.map(str::to_owned),
            text: text.map(str::to_owned),
            base_dir: base_dir.map(str::to_owned),
        }
    }

    fn load(&self) -> Result<ScenarioText, Error> {
        match (&self.path, &self.text) {
            (Some(p), _) => ScenarioText::load(Path::new(p)),
            (None, Some(t)) => ScenarioText::new(
                t.clone(),
                "<scenario text>".into(),
                PathBuf::from(self.base_dir.as_deref().unwrap_or(".")),
            ),
            (None, None) => ScenarioText::load_or_default(None),
        }
    }
}

/// Run a scenario in memory: (report as JSON text, waveform columns, ADC codes or None).
#[pyfunction]
#[pyo3(signature = (path, text, base_dir, overrides, wav=true))]
#[allow(clippy::type_complexity)]
fn run_scenario<'py>(
    py: Python<'py>,
    path: Option<&str>,
    text: Option<&str>,
    base_dir: Option<&str>,
    overrides: Vec<(String, f64)>,
    wav: bool,
) -> PyResult<(
    String,
    Bound<'py, PyDict>,
    Option<Bound<'py, PyArray1<u32>>>,
)> {
    let src = ScenarioSource::new(path, text, base_dir);
    let run = py
        .detach(move || {
            let st = src.load()?;
            let sc = st.with(&overrides)?;
            let opts = RunOptions {
                wav: wav.then(WavOptions::default),
                ..RunOptions::default()
            };
            let run = run_in_memory(&sc, &opts)?;
            let json = serde_json::to_string(&run.report).map_err(|e| Error::Run(e.to_string()))?;
            Ok::<_, Error>((json, run))
        })
        .map_err(to_py)?;
    let (json, run) = run;
    let w = PyDict::new(py);
    w.set_item("time_s", run.waveforms.time_s.into_pyarray(py))?;
    for (name, v) in run.waveforms.analog {
        w.set_item(name, v.into_pyarray(py))?;
    }
    for (name, v) in run.waveforms.codes {
        w.set_item(name, v.into_pyarray(py))?;
    }
    let codes = run.adc_codes.map(|c| c.into_pyarray(py));
    Ok((json, w, codes))
}

/// One sweep point's numbers: a dict of `frequency_requested_hz`, `frequency_used_hz`, the sweep's metric
/// columns and `error` (None, or why the point could not be simulated or measured).
#[pyfunction]
fn point<'py>(
    py: Python<'py>,
    path: Option<&str>,
    text: Option<&str>,
    base_dir: Option<&str>,
    overrides: Vec<(String, f64)>,
) -> PyResult<Bound<'py, PyDict>> {
    let src = ScenarioSource::new(path, text, base_dir);
    let row = py
        .detach(move || {
            let st = src.load()?;
            let sc = st.with(&overrides)?;
            convchain::engine::plan::Plan::new(&sc)?;
            Ok::<_, Error>(sweep::run_point(&sc, None, 0, Vec::new()))
        })
        .map_err(to_py)?;
    row_to_dict(py, &row)
}

fn row_to_dict<'py>(py: Python<'py>, row: &SweepRow) -> PyResult<Bound<'py, PyDict>> {
    let d = PyDict::new(py);
    d.set_item("frequency_requested_hz", row.frequency_requested_hz)?;
    d.set_item("frequency_used_hz", row.frequency_used_hz)?;
    for (name, v) in METRIC_COLUMNS.iter().zip(&row.metrics) {
        d.set_item(*name, *v)?;
    }
    d.set_item("error", row.error.clone())?;
    Ok(d)
}

fn spec_of(vary: &[String], points: usize, log: bool) -> Result<SweepSpec, Error> {
    let vary = vary
        .iter()
        .map(|v| parse_vary(v))
        .collect::<Result<Vec<_>, _>>()?;
    sweep::check_distinct(&vary)?;
    Ok(SweepSpec {
        vary,
        points,
        log,
        audio_band_hz: None,
    })
}

/// A sweep's points in grid order: a list of (index, [(key, value), ...]).
#[pyfunction]
#[allow(clippy::type_complexity)]
fn sweep_points(
    vary: Vec<String>,
    points: usize,
    log: bool,
) -> PyResult<Vec<(u64, Vec<(String, f64)>)>> {
    let spec = spec_of(&vary, points, log).map_err(to_py)?;
    let axes = spec
        .vary
        .iter()
        .map(|v| axis_values(v, points, log))
        .collect::<Result<Vec<_>, _>>()
        .map_err(to_py)?;
    Ok(grid(&axes)
        .into_iter()
        .enumerate()
        .map(|(i, p)| {
            let ov = spec
                .vary
                .iter()
                .zip(p)
                .map(|(v, x)| (v.key.clone(), x))
                .collect();
            (i as u64, ov)
        })
        .collect())
}

/// Write a sweep's folder (`rows.json`, `sweep.csv`, `sweep.json`, plots) from points computed elsewhere:
/// `results` is a list of (index, the dict [`point`] returned); `shard` ("K/N" or "1/1") says which points
/// they are.
#[pyfunction]
#[allow(clippy::too_many_arguments)]
#[pyo3(signature = (path, text, base_dir, vary, points, log, results, dir, shard="1/1", force=false))]
fn write_sweep(
    py: Python<'_>,
    path: Option<&str>,
    text: Option<&str>,
    base_dir: Option<&str>,
    vary: Vec<String>,
    points: usize,
    log: bool,
    results: &Bound<'_, PyList>,
    dir: &str,
    shard: &str,
    force: bool,
) -> PyResult<()> {
    let st = ScenarioSource::new(path, text, base_dir)
        .load()
        .map_err(to_py)?;
    let spec = spec_of(&vary, points, log).map_err(to_py)?;
    let shard = Shard::parse(shard).map_err(to_py)?;
    let axes = spec
        .vary
        .iter()
        .map(|v| axis_values(v, points, log))
        .collect::<Result<Vec<_>, _>>()
        .map_err(to_py)?;
    let all = grid(&axes);
    let mut rows = Vec::with_capacity(results.len());
    for item in results.iter() {
        let (index, d): (u64, Bound<'_, PyDict>) = item.extract()?;
        let values = all
            .get(index as usize)
            .ok_or_else(|| {
                ScenarioError::new_err(format!(
                    "point index {index} is outside the sweep's {} points",
                    all.len()
                ))
            })?
            .clone();
        let get = |k: &str| -> PyResult<Option<f64>> {
            match d.get_item(k)? {
                Some(v) => v.extract(),
                None => Err(ScenarioError::new_err(format!(
                    "point {index}: the result has no `{k}` (give what convchain.point returned)"
                ))),
            }
        };
        let metrics = METRIC_COLUMNS
            .iter()
            .map(|c| get(c))
            .collect::<PyResult<Vec<_>>>()?;
        let error: Option<String> = match d.get_item("error")? {
            Some(v) => v.extract()?,
            None => None,
        };
        rows.push(SweepRow {
            index,
            values,
            frequency_requested_hz: get("frequency_requested_hz")?,
            frequency_used_hz: get("frequency_used_hz")?,
            metrics,
            error,
        });
    }
    rows.sort_by_key(|r| r.index);
    let name = st.scenario().map_err(to_py)?.name;
    let result = SweepResult {
        scenario: name,
        scenario_hash: fingerprint(st.text.as_bytes()),
        spec,
        axes,
        shard,
        rows,
        interrupted: None,
    };
    let dir = PathBuf::from(dir);
    py.detach(move || sweep::write_sweep(&result, &dir, force))
        .map_err(to_py)
}

/// The options of a Monte-Carlo study, as `convchain montecarlo` takes them.
#[allow(clippy::too_many_arguments)]
fn mc_options(
    runs: u64,
    seed: Option<u64>,
    require: &[String],
    static_only: bool,
    no_static: bool,
    audio_band_hz: Option<(f64, f64)>,
    shard: &str,
) -> Result<McOptions, Error> {
    if static_only && no_static {
        return Err(Error::BadInput(
            "static_only and no_static together leave nothing to run; give one of them".into(),
        ));
    }
    let mut o = McOptions::new(runs);
    o.seed = seed;
    o.requires = require
        .iter()
        .map(|r| Requirement::parse(r))
        .collect::<Result<_, _>>()?;
    o.dynamic = !static_only;
    o.static_tests = !no_static;
    o.audio_band_hz = audio_band_hz;
    o.shard = Shard::parse(shard)?;
    o.threads = Some(1);
    Ok(o)
}

/// The runs of a Monte-Carlo study's shard: a list of (index, the run's seed). Checks the study first, as
/// `convchain montecarlo` does before its first run.
#[pyfunction]
#[allow(clippy::too_many_arguments, clippy::type_complexity)]
#[pyo3(signature = (path, text, base_dir, runs, seed, require, static_only, no_static, audio_band_hz, shard="1/1"))]
fn montecarlo_runs(
    py: Python<'_>,
    path: Option<&str>,
    text: Option<&str>,
    base_dir: Option<&str>,
    runs: u64,
    seed: Option<u64>,
    require: Vec<String>,
    static_only: bool,
    no_static: bool,
    audio_band_hz: Option<(f64, f64)>,
    shard: &str,
) -> PyResult<Vec<(u64, u64)>> {
    let src = ScenarioSource::new(path, text, base_dir);
    let shard = shard.to_owned();
    py.detach(move || {
        let st = src.load()?;
        let opts = mc_options(
            runs,
            seed,
            &require,
            static_only,
            no_static,
            audio_band_hz,
            &shard,
        )?;
        let plan = McPlan::new(&st, &opts)?;
        Ok::<_, Error>(
            (0..runs)
                .filter(|i| opts.shard.contains(*i))
                .map(|i| (i, montecarlo::run_seed(plan.base_seed(), i)))
                .collect(),
        )
    })
    .map_err(to_py)
}

/// Run `index` of a Monte-Carlo study: a dict of the row's columns (`index`, `seed`, the drawn `[spread]`
/// values, the metrics, `error`) with the numbers of that row of `convchain montecarlo`'s output.
#[pyfunction]
#[allow(clippy::too_many_arguments)]
fn montecarlo_run<'py>(
    py: Python<'py>,
    path: Option<&str>,
    text: Option<&str>,
    base_dir: Option<&str>,
    index: u64,
    seed: Option<u64>,
    static_only: bool,
    no_static: bool,
    audio_band_hz: Option<(f64, f64)>,
) -> PyResult<Bound<'py, PyDict>> {
    let src = ScenarioSource::new(path, text, base_dir);
    if index >= 1 << 40 {
        return Err(ScenarioError::new_err(format!(
            "index {index}: a Monte-Carlo study has at most 2^40 runs, numbered from 0"
        )));
    }
    let (columns, row) = py
        .detach(move || {
            let st = src.load()?;
            // A row does not depend on the study's run count or requirements: a study of index + 1 runs has it.
            let opts = mc_options(
                index + 1,
                seed,
                &[],
                static_only,
                no_static,
                audio_band_hz,
                "1/1",
            )?;
            let plan = McPlan::new(&st, &opts)?;
            Ok::<_, Error>((plan.columns().to_vec(), plan.run_one(index)))
        })
        .map_err(to_py)?;
    let d = PyDict::new(py);
    for (name, v) in columns.iter().zip(&row) {
        match v {
            Value::Null => d.set_item(name, py.None())?,
            Value::String(s) => d.set_item(name, s)?,
            Value::Number(n) => match n.as_u64() {
                Some(u) => d.set_item(name, u)?,
                None => d.set_item(name, n.as_f64())?,
            },
            other => d.set_item(name, other.to_string())?,
        }
    }
    Ok(d)
}

/// Write a Monte-Carlo study's folder (`rows.json`, `montecarlo.csv`, `montecarlo.json`, histograms) from
/// runs computed elsewhere: `results` is a list of the dicts [`montecarlo_run`] returned, for every run of
/// `shard`. Returns `montecarlo.json` as JSON text.
#[pyfunction]
#[allow(clippy::too_many_arguments)]
#[pyo3(signature = (path, text, base_dir, runs, seed, require, static_only, no_static, audio_band_hz, results, dir, shard="1/1", force=false))]
fn write_montecarlo(
    py: Python<'_>,
    path: Option<&str>,
    text: Option<&str>,
    base_dir: Option<&str>,
    runs: u64,
    seed: Option<u64>,
    require: Vec<String>,
    static_only: bool,
    no_static: bool,
    audio_band_hz: Option<(f64, f64)>,
    results: &Bound<'_, PyList>,
    dir: &str,
    shard: &str,
    force: bool,
) -> PyResult<String> {
    let st = ScenarioSource::new(path, text, base_dir)
        .load()
        .map_err(to_py)?;
    let opts = mc_options(
        runs,
        seed,
        &require,
        static_only,
        no_static,
        audio_band_hz,
        shard,
    )
    .map_err(to_py)?;
    let plan = McPlan::new(&st, &opts).map_err(to_py)?;
    let columns = plan.columns();
    let last = columns.len() - 1;
    let mut rows = Vec::with_capacity(results.len());
    for (k, item) in results.iter().enumerate() {
        let d: Bound<'_, PyDict> = item.extract().map_err(|_| {
            ScenarioError::new_err(format!(
                "results[{k}] is not a dict (give what convchain.montecarlo_run returned)"
            ))
        })?;
        let mut row = Vec::with_capacity(columns.len());
        for (c, name) in columns.iter().enumerate() {
            let v = d.get_item(name)?.ok_or_else(|| {
                ScenarioError::new_err(format!(
                    "results[{k}] has no `{name}` (give what convchain.montecarlo_run returned for this study)"
                ))
            })?;
            row.push(if c < 2 {
                Value::from(v.extract::<u64>()?)
            } else if c == last {
                v.extract::<Option<String>>()?
                    .map_or(Value::Null, Value::String)
            } else {
                v.extract::<Option<f64>>()?
                    .and_then(serde_json::Number::from_f64)
                    .map_or(Value::Null, Value::Number)
            });
        }
        rows.push(row);
    }
    let dir = PathBuf::from(dir);
    py.detach(move || {
        let set = plan.rows(opts.shard, rows, None)?;
        let summary = montecarlo::write_rows(&set, &dir, force)?;
        serde_json::to_string(&summary).map_err(|e| Error::Run(e.to_string()))
    })
    .map_err(to_py)
}

#[pymodule]
fn _convchain(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("ScenarioError", m.py().get_type::<ScenarioError>())?;
    m.add("RunError", m.py().get_type::<RunError>())?;
    m.add("METRIC_COLUMNS", METRIC_COLUMNS.to_vec())?;
    m.add_function(wrap_pyfunction!(run_scenario, m)?)?;
    m.add_function(wrap_pyfunction!(point, m)?)?;
    m.add_function(wrap_pyfunction!(sweep_points, m)?)?;
    m.add_function(wrap_pyfunction!(write_sweep, m)?)?;
    m.add_function(wrap_pyfunction!(montecarlo_runs, m)?)?;
    m.add_function(wrap_pyfunction!(montecarlo_run, m)?)?;
    m.add_function(wrap_pyfunction!(write_montecarlo, m)?)?;
    m.add("MONTECARLO_METRICS", montecarlo::METRICS.to_vec())?;
    Ok(())
}
