//! Monte-Carlo studies: the same scenario run many times, each run with its own seed (so the ladder resistors,
//! capacitor mismatch, comparator noise and link bit errors are drawn afresh) and its own draw of every
//! `[spread]` value; the metrics of every run, their percentiles, and the yield against requirements.
//!
//! Seeds: run `i` (from 0) of a study with base seed `S` uses [`run_seed`]`(S, i)`, the `(i + 1)`-th output of
//! the SplitMix64 generator started at state `S`, shifted right by 11 bits (53 bits, so the seed is exact in a
//! TOML integer and in an `f64`). The `[spread]` values of the run are drawn, in file order, from a ChaCha8
//! stream seeded with the run's seed on stream `u64::MAX` (the stages use streams 0 and `index + 1`), so a
//! run's results depend only on `S` and `i`: not on the thread count, the shard, or which runs went before.
//!
//! Percentiles: linear interpolation between order statistics at rank `(n - 1) q` (the default of numpy's
//! `percentile`), over the runs that gave a value.

use std::io::IsTerminal;
use std::path::Path;
use std::sync::atomic::AtomicBool;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::{Value, json};

use super::shard::{
    ROWS_FORMAT, RowSet, Shard, StudyKind, fingerprint, interrupted_note, run_in_order,
    study_producer,
};
use crate::engine::pipeline;
use crate::engine::static_bench::{Static, static_tests};
use crate::error::{Error, Result};
use crate::measure::chain::{ChainMetrics, measure_run};
use crate::report::OutputDir;
use crate::scenario::overrides::ScenarioText;
use crate::scenario::{Scenario, Spread, SpreadLaw};
use crate::study::sweep::{AUDIO_COLUMNS, audio_values};

/// `kind` of a Monte-Carlo [`RowSet`].
pub const KIND: &str = "montecarlo";

/// The Monte-Carlo study as a study of row files (for shards and `merge`).
pub const STUDY: StudyKind = StudyKind {
    kind: KIND,
    item: "run",
    items: "runs",
    shard_options: "--runs and --seed",
    write: |o, s| write_outputs(o, s).map(|_| ()),
};

/// How each run's seed is made (written into the study header).
pub const SEED_RULE: &str =
    "run i uses the (i+1)-th output of SplitMix64 started at the base seed, >> 11";

/// How percentiles are computed (written into the summary).
pub const PERCENTILE_RULE: &str =
    "linear interpolation between order statistics at rank (n-1)q over the runs that gave a value";

/// Metrics recorded for every run, as named in reports and in `--require`. `static.*` come from the static
/// tests, the others from the simulated run. `static.adc.missing_codes` counts codes; `static.dac.monotonic`
/// and `static.adc.monotonic` are 1 (yes) or 0 (no).
pub const METRICS: [&str; 23] = [
    "adc.enob_bits",
    "adc.sinad_db",
    "adc.snr_db",
    "adc.thd_db",
    "adc.sfdr_dbc",
    "output.enob_bits",
    "output.sinad_db",
    "output.snr_db",
    "output.thd_db",
    "output.sfdr_dbc",
    "output.gain_db",
    "output.fidelity_db",
    "latency.measured_s",
    "latency.packets_lost",
    "latency.slips",
    "static.adc.dnl_max_lsb",
    "static.adc.inl_max_lsb",
    "static.adc.missing_codes",
    "static.adc.monotonic",
    "static.dac.dnl_max_lsb",
    "static.dac.inl_max_lsb",
    "static.dac.monotonic",
    "static.dac.missing_codes",
];

/// Metrics drawn as histograms (when they vary).
const PLOTTED: [&str; 9] = [
    "output.enob_bits",
    "adc.enob_bits",
    "output.sinad_db",
    "output.gain_db",
    "latency.measured_s",
    "static.dac.dnl_max_lsb",
    "static.dac.inl_max_lsb",
    "static.adc.dnl_max_lsb",
    "static.adc.inl_max_lsb",
];

fn is_static(metric: &str) -> bool {
    metric.starts_with("static.")
}

fn is_audio(metric: &str) -> bool {
    metric.starts_with("audio.")
}

/// The seed of run `index` of a study with base seed `base` (see the module notes): 53 bits.
pub fn run_seed(base: u64, index: u64) -> u64 {
    let mut z = base.wrapping_add((index.wrapping_add(1)).wrapping_mul(0x9E37_79B9_7F4A_7C15));
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    (z ^ (z >> 31)) >> 11
}

/// The values of the `[spread]` entries for the run with seed `seed`, in file order (SI base units):
/// Gaussian `nominal + sigma z`, uniform `nominal + a (2u - 1)`.
pub fn draw_spread(spreads: &[Spread], seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(u64::MAX);
    spreads
        .iter()
        .map(|s| {
            let a = s.absolute_amount();
            match s.law {
                SpreadLaw::Gaussian => {
                    let z: f64 = StandardNormal.sample(&mut rng);
                    s.nominal + a * z
                }
                SpreadLaw::Uniform => s.nominal + a * (2.0 * rng.random::<f64>() - 1.0),
            }
        })
        .collect()
}

/// Comparison of a `--require`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Cmp {
    Ge,
    Le,
    Gt,
    Lt,
}

/// A requirement `METRIC>=X` (or `<=`, `>`, `<`) that each run passes or fails.
#[derive(Debug, Clone, PartialEq)]
pub struct Requirement {
    /// As given (spaces removed).
    pub text: String,
    pub metric: String,
    pub cmp: Cmp,
    pub threshold: f64,
}

impl Requirement {
    /// Parse `METRIC>=X`; an unknown metric or bad syntax is [`Error::BadInput`] listing the metrics.
    pub fn parse(text: &str) -> Result<Requirement> {
        let compact: String = text.chars().filter(|c| !c.is_whitespace()).collect();
        let list = || {
            format!(
                "metrics: {}; with --audio: {}",
                METRICS.join(", "),
                AUDIO_COLUMNS.join(", ")
            )
        };
        let bad = |why: String| {
            Error::BadInput(format!(
                "--require {text:?}: {why}\n  hint: write METRIC>=X, METRIC<=X, METRIC>X or METRIC<X, e.g. \
                 --require \"output.enob_bits>=7.5\"; {}",
                list()
            ))
        };
        let pos = compact
            .find(['<', '>'])
            .ok_or_else(|| bad("no comparison (>=, <=, > or <)".into()))?;
        let (metric, rest) = compact.split_at(pos);
        let (cmp, value) = if let Some(v) = rest.strip_prefix(">=") {
            (Cmp::Ge, v)
        } else if let Some(v) = rest.strip_prefix("<=") {
            (Cmp::Le, v)
        } else if let Some(v) = rest.strip_prefix('>') {
            (Cmp::Gt, v)
        } else {
            (Cmp::Lt, &rest[1..])
        };
        let known: Vec<&str> = METRICS.iter().chain(AUDIO_COLUMNS).copied().collect();
        if !known.contains(&metric) {
            let near = (!metric.is_empty())
                .then(|| known.iter().find(|m| m.starts_with(metric)).copied())
                .flatten()
                .or_else(|| crate::format::reader::did_you_mean(metric, &known))
                .map(|m| format!(" (did you mean `{m}`?)"))
                .unwrap_or_default();
            return Err(bad(format!("unknown metric `{metric}`{near}")));
        }
        let threshold: f64 = value
            .parse()
            .ok()
            .filter(|x: &f64| x.is_finite())
            .ok_or_else(|| bad(format!("`{value}` is not a number")))?;
        Ok(Requirement {
            text: compact.clone(),
            metric: metric.to_string(),
            cmp,
            threshold,
        })
    }

    /// Whether a run's value passes; a run without a value (failed run, metric not defined) fails.
    pub fn passes(&self, value: Option<f64>) -> bool {
        let Some(v) = value else { return false };
        match self.cmp {
            Cmp::Ge => v >= self.threshold,
            Cmp::Le => v <= self.threshold,
            Cmp::Gt => v > self.threshold,
            Cmp::Lt => v < self.threshold,
        }
    }
}

/// What to run.
#[derive(Debug, Clone)]
pub struct McOptions {
    /// Runs in the whole study.
    pub runs: u64,
    /// Base seed; None = the scenario's `simulation.seed`.
    pub seed: Option<u64>,
    pub requires: Vec<Requirement>,
    /// Worker threads; None = one per core.
    pub threads: Option<usize>,
    pub shard: Shard,
    /// Simulate and measure the chain.
    pub dynamic: bool,
    /// Run the static tests of the ADC and DAC (skipped when the chain has neither).
    pub static_tests: bool,
    /// Show a progress bar on standard error when it is a terminal.
    pub progress: bool,
    /// Write into a folder that holds another study (replacing it): `--force`.
    pub force: bool,
    /// Measure the audio figures of every run over this band (Hz), adding [`AUDIO_COLUMNS`] (`--audio`).
    pub audio_band_hz: Option<(f64, f64)>,
}

impl McOptions {
    /// Defaults: both kinds of measurement, all runs, one thread per core, no progress bar.
    pub fn new(runs: u64) -> McOptions {
        McOptions {
            runs,
            seed: None,
            requires: Vec::new(),
            threads: None,
            shard: Shard::WHOLE,
            dynamic: true,
            static_tests: true,
            progress: false,
            force: false,
            audio_band_hz: None,
        }
    }
}

/// A Monte-Carlo study ready to run: the scenario text, the study header (what `rows.json` says about the
/// study) and the columns of its rows. `convchain montecarlo` and the Python module both compute runs with
/// [`McPlan::run_one`], assemble them with [`McPlan::rows`] and write them with [`write_rows`], so a study's
/// runs can be computed anywhere (threads, shards, a distributed executor) and give the same files.
pub struct McPlan<'a> {
    text: &'a ScenarioText,
    spreads: Vec<Spread>,
    base_seed: u64,
    runs: u64,
    dynamic: bool,
    statics: bool,
    audio_band_hz: Option<(f64, f64)>,
    header: Value,
    columns: Vec<String>,
}

fn has_converter(sc: &Scenario) -> bool {
    sc.stages.iter().any(|s| s.kind.has_static_levels())
}

impl<'a> McPlan<'a> {
    /// Check the options against the nominal scenario and build the study header and columns. Bad options
    /// or a bad nominal scenario are [`Error::BadInput`].
    pub fn new(text: &'a ScenarioText, opts: &McOptions) -> Result<McPlan<'a>> {
        prepare(text, opts)
    }

    /// The study header of `rows.json` (`runs`, `scenario`, `scenario_hash`, `seed`, options, spreads,
    /// requirements).
    pub fn header(&self) -> &Value {
        &self.header
    }

    /// Column names of a row: `index`, `seed`, the `[spread]` paths, [`METRICS`], the audio columns with
    /// `--audio`, `error`.
    pub fn columns(&self) -> &[String] {
        &self.columns
    }

    /// The base seed (`--seed`, else the scenario's `simulation.seed`).
    pub fn base_seed(&self) -> u64 {
        self.base_seed
    }

    /// Runs in the whole study.
    pub fn runs(&self) -> u64 {
        self.runs
    }

    /// Run `index` of the study: draw, check, simulate and measure. A failure is kept in the row's `error`
    /// cell, so this never fails; the row depends on the study and `index` only.
    pub fn run_one(&self, index: u64) -> Vec<Value> {
        one_run(self, index)
    }

    /// The rows of `shard` as a [`RowSet`], from rows made by [`McPlan::run_one`] in any order. Without
    /// `interrupted` every run of the shard must be there; a row of another shard or study, a repeated or
    /// missing run, or a row of the wrong shape is [`Error::BadInput`] naming the run.
    pub fn rows(
        &self,
        shard: Shard,
        mut rows: Vec<Vec<Value>>,
        interrupted: Option<String>,
    ) -> Result<RowSet> {
        let bad = |why: String| {
            Error::BadInput(format!(
                "Monte-Carlo rows of \"{}\" ({} runs, base seed {}, shard {shard}): {why}\n  hint: give the rows \
                 that the runs of this study returned, with the same scenario, --runs, --seed and options",
                crate::text::clip(self.header["scenario"].as_str().unwrap_or("?")),
                self.runs,
                self.base_seed,
            ))
        };
        let n = self.columns.len();
        for r in &rows {
            let Some(index) = RowSet::index_of(r) else {
                return Err(bad(format!(
                    "a row's first cell {} is not a run index",
                    r.first().map_or("(none)".into(), Value::to_string)
                )));
            };
            if r.len() != n {
                return Err(bad(format!(
                    "run {index} has {} cells, the study's rows have {n} ({})",
                    r.len(),
                    self.columns.join(", ")
                )));
            }
            if index >= self.runs || !shard.contains(index) {
                return Err(bad(format!("run {index} is not a run of this shard")));
            }
            if r[1].as_u64() != Some(run_seed(self.base_seed, index)) {
                return Err(bad(format!(
                    "run {index} has seed {}, this study's run {index} has seed {}",
                    r[1],
                    run_seed(self.base_seed, index)
                )));
            }
            let numbers_ok = r[2..n - 1].iter().all(|v| v.is_null() || v.is_f64());
            let error_ok = r[n - 1].is_null() || r[n - 1].is_string();
            if !numbers_ok || !error_ok {
                return Err(bad(format!(
                    "run {index}: the values must be numbers or null and `error` text or null"
                )));
            }
        }
        rows.sort_by_key(|r| RowSet::index_of(r));
        if let Some(w) = rows.windows(2).find(|w| w[0][0] == w[1][0]) {
            return Err(bad(format!("run {} is given twice", w[0][0])));
        }
        if interrupted.is_none() && (rows.len() as u64) < shard.count(self.runs) {
            let have: std::collections::BTreeSet<u64> =
                rows.iter().filter_map(|r| RowSet::index_of(r)).collect();
            let missing = (0..self.runs)
                .find(|i| shard.contains(*i) && !have.contains(i))
                .unwrap_or(0);
            return Err(bad(format!(
                "{} of the shard's {} runs are given; run {missing} is missing",
                rows.len(),
                shard.count(self.runs)
            )));
        }
        Ok(RowSet {
            format: ROWS_FORMAT.into(),
            kind: KIND.into(),
            study: self.header.clone(),
            shard,
            interrupted,
            columns: self.columns.clone(),
            rows,
        })
    }
}

fn prepare<'a>(text: &'a ScenarioText, opts: &McOptions) -> Result<McPlan<'a>> {
    let sc = text.scenario()?;
    if opts.runs == 0 {
        return Err(Error::BadInput("--runs 0: give at least one run".into()));
    }
    if opts.runs > 1 << 40 {
        return Err(Error::BadInput(format!(
            "--runs {}: at most 2^40 runs",
            opts.runs
        )));
    }
    let (plan, _) = crate::engine::plan::Plan::new(&sc)?;
    if let Some(band) = opts.audio_band_hz {
        if !opts.dynamic {
            return Err(Error::BadInput(
                "--audio: --static-only skips the simulated run the audio figures come from".into(),
            ));
        }
        crate::engine::audio::check(&sc, &plan, band)?;
    }
    let statics = opts.static_tests && has_converter(&sc);
    if !opts.dynamic && !statics {
        return Err(Error::BadInput(format!(
            "{}: --static-only needs a sar_adc or dac of at least 2 bits in the chain",
            sc.origin
        )));
    }
    for r in &opts.requires {
        if is_static(&r.metric) && !statics {
            return Err(Error::BadInput(format!(
                "--require {}: the static tests are not run (no converter in the chain, or --no-static)",
                r.text
            )));
        }
        if is_audio(&r.metric) && opts.audio_band_hz.is_none() {
            return Err(Error::BadInput(format!(
                "--require {}: the audio figures are measured only with --audio",
                r.text
            )));
        }
        if !is_static(&r.metric) && !opts.dynamic {
            return Err(Error::BadInput(format!(
                "--require {}: --static-only skips the simulated run this metric comes from",
                r.text
            )));
        }
    }
    let base_seed = opts.seed.unwrap_or(sc.simulation.seed);
    let spreads = sc.spread.clone();
    let spread_json: Vec<Value> = spreads
        .iter()
        .map(|s| {
            json!({
                "path": s.path,
                "law": match s.law { SpreadLaw::Gaussian => "gaussian", SpreadLaw::Uniform => "uniform" },
                "amount": s.amount,
                "relative": s.relative,
                "nominal": crate::format::units::round_significant(s.nominal, crate::format::units::ECHO_DIGITS),
            })
        })
        .collect();
    let mut header = json!({
        "runs": opts.runs,
        "scenario": sc.name,
        "scenario_hash": fingerprint(text.text.as_bytes()),
        "seed": base_seed,
        "seed_rule": SEED_RULE,
        "dynamic": opts.dynamic,
        "static_tests": statics,
        "spread": spread_json,
        "require": opts.requires.iter().map(|r| r.text.clone()).collect::<Vec<_>>(),
    });
    if let Some((low, high)) = opts.audio_band_hz {
        header["audio_band_hz"] = json!([low, high]);
    }
    let mut columns = vec!["index".to_string(), "seed".to_string()];
    columns.extend(spreads.iter().map(|s| s.path.clone()));
    columns.extend(METRICS.iter().map(|m| m.to_string()));
    if opts.audio_band_hz.is_some() {
        columns.extend(AUDIO_COLUMNS.iter().map(|m| m.to_string()));
    }
    columns.push("error".into());
    Ok(McPlan {
        text,
        spreads,
        base_seed,
        runs: opts.runs,
        dynamic: opts.dynamic,
        statics,
        audio_band_hz: opts.audio_band_hz,
        header,
        columns,
    })
}

/// The metrics of one run in [`METRICS`] order (non-finite values become None).
fn metric_values(chain: Option<&ChainMetrics>, stat: Option<&Static>) -> Vec<Option<f64>> {
    let b = |x: bool| Some(if x { 1.0 } else { 0.0 });
    let adc = chain.and_then(|c| c.adc.as_ref());
    let out = chain.map(|c| &c.output);
    let sa = stat.and_then(|s| s.adc.as_ref());
    let sd = stat.and_then(|s| s.dac.as_ref());
    let v = [
        adc.and_then(|a| a.enob_bits),
        adc.and_then(|a| a.sinad_db),
        adc.and_then(|a| a.snr_db),
        adc.and_then(|a| a.thd_db),
        adc.and_then(|a| a.sfdr_dbc),
        out.and_then(|o| o.enob_bits),
        out.and_then(|o| o.sinad_db),
        out.and_then(|o| o.snr_db),
        out.and_then(|o| o.thd_db),
        out.and_then(|o| o.sfdr_dbc),
        out.and_then(|o| o.gain_db),
        out.map(|o| o.fidelity_db),
        chain.map(|c| c.latency.measured_s),
        chain.map(|c| c.latency.packets_lost as f64),
        chain.map(|c| c.latency.slip_count() as f64),
        sa.map(|a| a.code_density.dnl_max_lsb),
        sa.map(|a| a.code_density.inl_max_lsb),
        sa.map(|a| a.code_density.missing_codes as f64),
        sa.and_then(|a| b(a.code_density.monotonic)),
        sd.map(|d| d.result.dnl_max_lsb),
        sd.map(|d| d.result.inl_max_lsb),
        sd.and_then(|d| b(d.result.monotonic)),
        sd.map(|d| d.result.missing_codes as f64),
    ];
    v.into_iter().map(|x| x.filter(|x| x.is_finite())).collect()
}

fn num(x: f64) -> Value {
    serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)
}

/// One run: draw, check, simulate and measure; a failure is kept in the row's `error` cell.
fn one_run(p: &McPlan<'_>, index: u64) -> Vec<Value> {
    let seed = run_seed(p.base_seed, index);
    let drawn = draw_spread(&p.spreads, seed);
    let mut overrides: Vec<(String, f64)> = vec![("simulation.seed".into(), seed as f64)];
    overrides.extend(
        p.spreads
            .iter()
            .zip(&drawn)
            .map(|(s, v)| (s.path.clone(), *v)),
    );
    let result = (|| -> Result<Vec<Option<f64>>> {
        let sc = p.text.with(&overrides)?;
        let mut audio = None;
        let chain = if p.dynamic {
            let run = pipeline::run_lean(&sc)?;
            let m = measure_run(&run.records())?;
            if let Some(band) = p.audio_band_hz {
                audio = Some(crate::engine::audio::audio_figures(&run, &m, band)?);
            }
            run.recycle();
            Some(m)
        } else {
            None
        };
        let stat = if p.statics {
            Some(static_tests(&sc)?)
        } else {
            None
        };
        let mut v = metric_values(chain.as_ref(), stat.as_ref());
        if let Some(a) = &audio {
            v.extend(
                audio_values(a)
                    .into_iter()
                    .map(|x| x.filter(|x| x.is_finite())),
            );
        }
        Ok(v)
    })();
    let mut row = vec![json!(index), json!(seed)];
    row.extend(drawn.iter().map(|v| num(*v)));
    match result {
        Ok(m) => {
            row.extend(m.into_iter().map(|v| v.map_or(Value::Null, num)));
            row.push(Value::Null);
        }
        Err(e) => {
            let n = METRICS.len() + p.audio_band_hz.map_or(0, |_| AUDIO_COLUMNS.len());
            row.extend((0..n).map(|_| Value::Null));
            // One line: the origin of a drawn scenario lists every override, which the row already holds.
            let msg = e.to_string().replace('\n', " ");
            row.push(Value::String(msg));
        }
    }
    row
}

/// Run the study's runs (those of `opts.shard`) on `opts.threads` threads. When `cancel` becomes true no new
/// run starts; the runs in progress finish and the set is marked interrupted. Bad options or a bad nominal
/// scenario are [`Error::BadInput`]; a run that fails (e.g. a drawn value out of range) is a row with an error.
pub fn run_rows(text: &ScenarioText, opts: &McOptions, cancel: &AtomicBool) -> Result<RowSet> {
    run_plan(&prepare(text, opts)?, opts, cancel)
}

fn run_plan(p: &McPlan<'_>, opts: &McOptions, cancel: &AtomicBool) -> Result<RowSet> {
    let indices: Vec<u64> = (0..opts.runs).filter(|i| opts.shard.contains(*i)).collect();
    let mut builder = rayon::ThreadPoolBuilder::new();
    if let Some(t) = opts.threads {
        builder = builder.num_threads(t.max(1));
    }
    let pool = builder
        .build()
        .map_err(|e| Error::Run(format!("cannot start worker threads: {e}")))?;
    let bar = (opts.progress && std::io::stderr().is_terminal()).then(|| {
        let b = indicatif::ProgressBar::new(indices.len() as u64);
        b.set_style(
            indicatif::ProgressStyle::with_template(
                "  runs [{bar:40}] {pos}/{len}  {elapsed} (about {eta} left)",
            )
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        b
    });
    // Workers take the next index in order, so an interrupted study holds the first runs.
    let rows = run_in_order(&pool, indices.len(), cancel, bar.as_ref(), |j| {
        p.run_one(indices[j])
    });
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let interrupted =
        (rows.len() < indices.len()).then(|| interrupted_note(&STUDY, rows.len(), indices.len()));
    p.rows(opts.shard, rows, interrupted)
}

/// Run a Monte-Carlo study (or one shard of it) and write its files into `dir`. Returns the summary; its
/// `interrupted` is set when `cancel` stopped the study (the finished rows are still written).
pub fn montecarlo_to_dir(
    text: &ScenarioText,
    opts: &McOptions,
    dir: &Path,
    cancel: &AtomicBool,
) -> Result<Summary> {
    let plan = prepare(text, opts)?;
    // Refuse a folder holding another study before spending the runs.
    OutputDir::check(
        dir,
        &study_producer(KIND, plan.header(), opts.shard, opts.force),
    )?;
    let set = run_plan(&plan, opts, cancel)?;
    write_rows(&set, dir, opts.force)
}

/// Write a Monte-Carlo row set's files into `dir` ([`write_outputs`] through an [`OutputDir`] made for the
/// study and shard of `set`), as `convchain montecarlo` does after its runs. `force` replaces another study's
/// files there.
pub fn write_rows(set: &RowSet, dir: &Path, force: bool) -> Result<Summary> {
    if set.kind != KIND {
        return Err(Error::BadInput(format!(
            "rows of a {} study, not of a Monte-Carlo study",
            set.kind
        )));
    }
    let producer = study_producer(KIND, &set.study, set.shard, force);
    let out = OutputDir::create(dir, &producer)?;
    match write_outputs(&out, set) {
        Ok(s) => {
            out.finish()?;
            Ok(s)
        }
        Err(e) => {
            out.abandon();
            Err(e)
        }
    }
}

mod summary;
pub use summary::{
    Failure, Fractions, Stats, Summary, YieldLine, csv_bytes, histogram_bins, percentile,
    summarize, write_outputs,
};

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn run_seeds_are_splitmix64_outputs_cut_to_53_bits() {
        // SplitMix64 started at state 0 gives 0xe220a8397b1dcdaf first (the reference output of
        // Vigna's splitmix64.c; from memory).
        assert_eq!(run_seed(0, 0), 0xe220_a839_7b1d_cdaf >> 11);
        let s: Vec<u64> = (0..1000).map(|i| run_seed(42, i)).collect();
        assert!(s.iter().all(|x| *x < 1 << 53));
        let mut d = s.clone();
        d.sort();
        d.dedup();
        assert_eq!(d.len(), s.len());
    }

    #[test]
    fn percentiles_interpolate_between_order_statistics() {
        // numpy.percentile([1, 2, 3, 4, 5], [5, 50, 95]) = [1.2, 3.0, 4.8] (linear method, numpy's default;
        // worked by hand: rank (n-1)q = 0.2, 2, 3.8).
        let v = [1.0, 2.0, 3.0, 4.0, 5.0];
        let close = |a: Option<f64>, b: f64| (a.unwrap() - b).abs() < 1e-12;
        assert!(close(percentile(&v, 0.05), 1.2));
        assert!(close(percentile(&v, 0.5), 3.0));
        assert!(close(percentile(&v, 0.95), 4.8));
        assert_eq!(percentile(&[7.0], 0.95), Some(7.0));
        assert_eq!(percentile(&[], 0.5), None);
    }

    #[test]
    fn requirements_parse_and_compare() {
        let r = Requirement::parse(" output.enob_bits >= 7.5 ").unwrap();
        assert_eq!(
            (r.metric.as_str(), r.cmp, r.threshold),
            ("output.enob_bits", Cmp::Ge, 7.5)
        );
        assert!(r.passes(Some(7.5)) && !r.passes(Some(7.49)) && !r.passes(None));
        let r = Requirement::parse("latency.measured_s<1e-3").unwrap();
        assert!(r.passes(Some(0.5e-3)) && !r.passes(Some(1e-3)));
        assert_eq!(
            Requirement::parse("static.dac.monotonic>0").unwrap().cmp,
            Cmp::Gt
        );
        assert_eq!(
            Requirement::parse("output.thd_db<=-60").unwrap().threshold,
            -60.0
        );
        for bad in [
            "output.enob>=7",
            "output.enob_bits=7",
            "output.enob_bits>=x",
            ">=3",
            "adc.enob_bits>=inf",
        ] {
            let e = Requirement::parse(bad).unwrap_err();
            assert!(
                e.is_bad_input() && e.to_string().contains("adc.sinad_db"),
                "{bad}: {e}"
            );
        }
        assert!(
            Requirement::parse("output.enob>=7")
                .unwrap_err()
                .to_string()
                .contains("did you mean `output.enob_bits`")
        );
    }

    #[test]
    fn gaussian_and_uniform_draws_have_their_spread() {
        let g = Spread {
            path: "a.b".into(),
            law: SpreadLaw::Gaussian,
            amount: 0.01,
            relative: true,
            nominal: 2.0,
        };
        let u = Spread {
            law: SpreadLaw::Uniform,
            amount: 0.5,
            relative: false,
            nominal: -1.0,
            ..g.clone()
        };
        let n = 20_000;
        let draws: Vec<Vec<f64>> = (0..n)
            .map(|i| draw_spread(&[g.clone(), u.clone()], run_seed(1, i)))
            .collect();
        let mean = |k: usize| draws.iter().map(|d| d[k]).sum::<f64>() / n as f64;
        let var = |k: usize, m: f64| {
            draws.iter().map(|d| (d[k] - m).powi(2)).sum::<f64>() / (n - 1) as f64
        };
        let (mg, mu) = (mean(0), mean(1));
        // Standard errors: mean sigma/sqrt(n); sample sd about sd/sqrt(2n) (Gaussian) -- 5 of them allowed.
        assert!((mg - 2.0).abs() < 5.0 * 0.02 / (n as f64).sqrt(), "{mg}");
        assert!((var(0, mg).sqrt() - 0.02).abs() < 5.0 * 0.02 / (2.0 * n as f64).sqrt());
        // Uniform on [-1.5, -0.5]: variance a^2/3 = 1/12 (common practice, no source).
        assert!(draws.iter().all(|d| (-1.5..=-0.5).contains(&d[1])));
        assert!((mu + 1.0).abs() < 5.0 * (1.0f64 / 12.0 / n as f64).sqrt());
        // Sd of the sample variance: sqrt((mu4 - sigma^4)/n) with mu4 = a^4/5 = 1/80, i.e. 5.3e-4.
        assert!((var(1, mu) - 1.0 / 12.0).abs() < 0.003);
    }

    #[test]
    fn histogram_bins_count_every_value_once() {
        let v: Vec<f64> = (0..100).map(|i| i as f64).collect();
        let (edges, counts) = histogram_bins(&v, 10).unwrap();
        assert_eq!(edges.len(), counts.len() + 1);
        assert_eq!(counts.iter().sum::<f64>(), 100.0);
        // 0..99 in ten bins 9.9 wide: 10 values in each, the maximum in the last.
        assert!(counts.iter().all(|&c| c == 10.0), "{counts:?}");
        assert_eq!((edges[0], edges[10]), (0.0, 99.0));
        assert!(histogram_bins(&[1.0, 1.0], 5).is_none());
    }
}
