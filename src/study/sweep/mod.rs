//! Parameter sweeps: run a scenario at every point of a one- or many-dimensional grid of values of numeric
//! keys (`source.frequency`, `stage.3.slew_rate`, ...) and tabulate every metric of the report.
//!
//! Each point is an ordinary run of the scenario with the values set through
//! [`ScenarioText::with`], so it is checked like a file and keeps the scenario's seed unless
//! `simulation.seed` is itself varied: the results do not depend on how many threads run the points.
//!
//! Point `i` (from 0, in grid order) is run `i` of the study: a shard `K/N` runs the points with
//! `i % N == K - 1`, and its rows are kept in `rows.json` (a [`RowSet`] of kind [`KIND`]) so that
//! `convchain merge` can join shards into exactly the files one machine writes. Every file of a sweep is
//! written from its row set, whether it came from one run or from merged shards.
//!
//! A sweep stops cleanly when asked (Ctrl-C in `convchain sweep`): no new point starts, the points in
//! progress finish, and the finished points are kept, the result marked [`SweepResult::interrupted`].

use std::sync::atomic::AtomicBool;

use serde::Serialize;
use serde_json::{Value, json};

use super::shard::{
    ROWS_FILE, ROWS_FORMAT, RowSet, Shard, StudyKind, fingerprint, interrupted_note, run_in_order,
    study_producer,
};
use crate::engine::pipeline;
use crate::engine::plan::Plan;
use crate::error::{Error, Result};
use crate::format::units::{Dimension, parse_quantity};
use crate::measure::chain::{ChainMetrics, measure_run};
use crate::report::plot::{self, Plot, XyPlot};
use crate::report::{OutputDir, Producer};
use crate::scenario::Scenario;
use crate::scenario::overrides::{ScenarioText, is_integer_key};

/// `kind` of a sweep's [`RowSet`].
pub const KIND: &str = "sweep";

/// The sweep as a study of row files (for shards and `merge`).
pub const STUDY: StudyKind = StudyKind {
    kind: KIND,
    item: "point",
    items: "points",
    shard_options: "--vary, --points and --log",
    write: |o, s| write_outputs(o, s).map(|_| ()),
};

/// One varied key: `KEY=FROM..TO` on the command line.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Vary {
    /// Key path, e.g. `source.frequency` or `stage.3.slew_rate`.
    pub key: String,
    /// First and last value, in the key's base unit (SI; degrees for `phase`).
    pub from: f64,
    pub to: f64,
}

/// The dimension a key's value has, from the key's name (the last part of the path), as the scenario's key
/// lists give it. `None`: a plain number.
pub fn key_dimension(key: &str) -> Option<Dimension> {
    crate::scenario::keys::quantity_dimension(key)
}

/// Parse one value of `key` ("1 kHz", "4.7k", "1%", "13 V/us", 12) into the number written to the scenario.
fn parse_value(key: &str, text: &str) -> std::result::Result<f64, String> {
    let t = text.trim();
    match key_dimension(key) {
        Some(Dimension::Angle) => parse_quantity(t, Dimension::Angle)
            .map(f64::to_degrees)
            .map_err(|e| e.message),
        Some(d) => parse_quantity(t, d).map_err(|e| match e.hint {
            Some(h) => format!("{} ({h})", e.message),
            None => e.message,
        }),
        None => t
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite())
            .ok_or_else(|| format!("expected a plain number, found \"{t}\"")),
    }
}

/// Parse `KEY=FROM..TO` (units as in the scenario: `source.frequency=1 kHz..20 kHz`).
pub fn parse_vary(spec: &str) -> Result<Vary> {
    let bad = |why: String| {
        Error::BadInput(format!(
            "--vary \"{}\": {why}; write KEY=FROM..TO, e.g. --vary \"source.frequency=1 kHz..20 kHz\" or \
             --vary stage.3.slew_rate=1e6..2e7",
            crate::text::clip(spec)
        ))
    };
    let (key, range) = spec
        .split_once('=')
        .ok_or_else(|| bad("no `=` between the key and the range".into()))?;
    let key = key.trim();
    let parts: Vec<&str> = key.split('.').collect();
    if parts.len() < 2 || parts.iter().any(|p| p.trim().is_empty()) {
        return Err(bad(format!(
            "`{key}` is not a key path such as `source.frequency` or `stage.3.slew_rate`"
        )));
    }
    let (from, to) = range
        .split_once("..")
        .ok_or_else(|| bad("no `..` between FROM and TO".into()))?;
    // "1 kHz...2 kHz" would otherwise read TO as ".2 kHz".
    if to.starts_with('.') || to.contains("..") {
        return Err(bad(
            "more than two dots between FROM and TO; separate them with exactly `..`".into(),
        ));
    }
    let key_name = key.rsplit('.').next().unwrap_or(key);
    let from = parse_value(key, from).map_err(|m| bad(format!("FROM: {m}")))?;
    let to = parse_value(key, to).map_err(|m| bad(format!("TO: {m}")))?;
    if is_integer_key(key_name) {
        for (which, v) in [("FROM", from), ("TO", to)] {
            if v.fract() != 0.0 {
                return Err(bad(format!(
                    "{which} = {v}, but `{key_name}` takes whole numbers; give whole FROM and TO"
                )));
            }
        }
    }
    Ok(Vary {
        key: key.to_string(),
        from,
        to,
    })
}

/// Refuse a key given twice among the `--vary` options (the grid would hold each point several times, with
/// the last value winning).
pub fn check_distinct(vary: &[Vary]) -> Result<()> {
    for (i, v) in vary.iter().enumerate() {
        if vary[..i].iter().any(|w| w.key == v.key) {
            return Err(Error::BadInput(format!(
                "--vary {}: this key is given twice; give each key once (several --vary make a grid of \
                 different keys)",
                crate::text::clip(&v.key)
            )));
        }
    }
    Ok(())
}

/// What to sweep.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepSpec {
    /// One or more keys; several make a grid of all combinations (the last key varies fastest).
    pub vary: Vec<Vary>,
    /// Values per key (at least 2 unless FROM = TO).
    pub points: usize,
    /// Space the values logarithmically (FROM and TO must then have the same sign and not be zero).
    pub log: bool,
    /// Measure the audio figures of every point over this band (Hz), adding [`AUDIO_COLUMNS`] (`--audio`).
    pub audio_band_hz: Option<(f64, f64)>,
}

impl SweepSpec {
    /// The metric columns of this sweep: [`METRIC_COLUMNS`], then [`AUDIO_COLUMNS`] with `--audio`.
    pub fn metric_columns(&self) -> Vec<&'static str> {
        let mut c = METRIC_COLUMNS.to_vec();
        if self.audio_band_hz.is_some() {
            c.extend_from_slice(AUDIO_COLUMNS);
        }
        c
    }
}

/// The audio figures of a point (`sweep --audio`), in the order of [`audio_values`]: for the analog output,
/// then the ADC's codes, as report.json's `audio` object names them (`response_min_db` and `response_max_db`
/// are its `response_db.min` and `.max`).
pub const AUDIO_COLUMNS: &[&str] = &[
    "audio.output.thd_n_db",
    "audio.output.dynamic_range_db",
    "audio.output.noise_a_dbfs",
    "audio.output.noise_dbfs",
    "audio.output.response_min_db",
    "audio.output.response_max_db",
    "audio.adc.thd_n_db",
    "audio.adc.dynamic_range_db",
    "audio.adc.noise_a_dbfs",
    "audio.adc.noise_dbfs",
    "audio.adc.response_min_db",
    "audio.adc.response_max_db",
];

/// The values of [`AUDIO_COLUMNS`].
pub fn audio_values(a: &crate::engine::audio::AudioReport) -> Vec<Option<f64>> {
    let mut v = Vec::with_capacity(AUDIO_COLUMNS.len());
    for f in [&a.output, &a.adc] {
        v.extend([
            f.thd_n_db,
            f.dynamic_range_db,
            f.noise_a_dbfs,
            f.noise_dbfs,
            f.response_db.as_ref().map(|r| r.min),
            f.response_db.as_ref().map(|r| r.max),
        ]);
    }
    v
}

/// The values of one key: `points` values from `from` to `to`, rounded and de-duplicated for integer keys.
pub fn axis_values(v: &Vary, points: usize, log: bool) -> Result<Vec<f64>> {
    let bad = |m: String| Error::BadInput(format!("--vary {}: {m}", v.key));
    if points == 0 {
        return Err(bad("--points must be at least 1".into()));
    }
    if points == 1 && v.from != v.to {
        return Err(bad(
            "one point cannot span FROM..TO; give --points 2 or more, or FROM = TO".into(),
        ));
    }
    if log && (v.from == 0.0 || v.to == 0.0 || v.from.signum() != v.to.signum()) {
        return Err(bad(format!(
            "--log needs FROM and TO of the same sign and not zero (found {}..{})",
            v.from, v.to
        )));
    }
    let n = points;
    let mut out: Vec<f64> = (0..n)
        .map(|i| {
            if n == 1 {
                return v.from;
            }
            let u = i as f64 / (n - 1) as f64;
            if i == n - 1 {
                v.to
            } else if log {
                v.from * (v.to / v.from).powf(u)
            } else {
                v.from + (v.to - v.from) * u
            }
        })
        .collect();
    let last = v.key.rsplit('.').next().unwrap_or(&v.key);
    if is_integer_key(last) {
        for x in &mut out {
            *x = x.round();
        }
        out.dedup();
    }
    Ok(out)
}

/// Every combination of the axes' values (the last axis varies fastest).
pub fn grid(axes: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let mut pts: Vec<Vec<f64>> = vec![Vec::new()];
    for axis in axes {
        pts = pts
            .into_iter()
            .flat_map(|p| {
                axis.iter().map(move |&x| {
                    let mut q = p.clone();
                    q.push(x);
                    q
                })
            })
            .collect();
    }
    pts
}

/// Names of the metric columns, in the order of [`metric_values`].
pub const METRIC_COLUMNS: &[&str] = &[
    "adc.bits",
    "adc.sample_rate_hz",
    "adc.conversion_time_s",
    "adc.codes_clipped",
    "adc.record_length",
    "adc.fundamental_hz",
    "adc.amplitude_v",
    "adc.snr_db",
    "adc.sinad_db",
    "adc.enob_bits",
    "adc.enob_sinefit_bits",
    "adc.thd_db",
    "adc.sfdr_dbc",
    "adc.noise_floor_dbfs",
    "adc.harmonics_counted",
    "output.analysis_rate_hz",
    "output.band_hz",
    "output.record_length",
    "output.fundamental_hz",
    "output.amplitude_v",
    "output.snr_db",
    "output.sinad_db",
    "output.enob_bits",
    "output.thd_db",
    "output.sfdr_dbc",
    "output.gain_db",
    "output.fidelity_db",
    "output.bits_flipped",
    "latency.measured_s",
    "latency.budget_s",
    "latency.packets_lost",
    "latency.slips",
    "output.phase_deg",
];

/// Every number of a report's `adc` and `output` sections, and the measured and budgeted latency, in the
/// order of [`METRIC_COLUMNS`] (`None` where the report has no value, or no ADC).
pub fn metric_values(m: &ChainMetrics) -> Vec<Option<f64>> {
    let mut v = Vec::with_capacity(METRIC_COLUMNS.len());
    match &m.adc {
        Some(a) => v.extend([
            Some(a.bits as f64),
            Some(a.sample_rate_hz),
            Some(a.conversion_time_s),
            Some(a.codes_clipped as f64),
            Some(a.record_length as f64),
            a.fundamental_hz,
            a.amplitude_v,
            a.snr_db,
            a.sinad_db,
            a.enob_bits,
            a.enob_sinefit_bits,
            a.thd_db,
            a.sfdr_dbc,
            a.noise_floor_dbfs,
            Some(a.harmonics_counted as f64),
        ]),
        None => v.extend([None; 15]),
    }
    let o = &m.output;
    v.extend([
        Some(o.analysis_rate_hz),
        Some(o.band_hz),
        Some(o.record_length as f64),
        o.fundamental_hz,
        o.amplitude_v,
        o.snr_db,
        o.sinad_db,
        o.enob_bits,
        o.thd_db,
        o.sfdr_dbc,
        o.gain_db,
        Some(o.fidelity_db),
        Some(o.bits_flipped as f64),
        Some(m.latency.measured_s),
        Some(m.latency.budget_s),
        Some(m.latency.packets_lost as f64),
        Some(m.latency.slip_count() as f64),
        phase_deg(m),
    ]);
    v
}

/// The chain's phase at the fundamental (degrees, output against source): from the three-parameter sine fits
/// of both records (the latency's phase delay), unwrapped at each point by the cross-correlation delay, so it
/// runs on continuously along a frequency sweep without needing the neighbouring points (and shards agree).
/// The chain's latency is not removed: a pure delay tau contributes -360 f tau.
fn phase_deg(m: &ChainMetrics) -> Option<f64> {
    let f = m.output.fundamental_hz?;
    let tau = m.latency.phase_delay_s?;
    Some(-360.0 * f * tau)
}

/// One point of a sweep.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SweepRow {
    /// Position of the point in the whole grid (from 0; see [`grid`]).
    pub index: u64,
    /// The varied values, in the order of [`SweepSpec::vary`].
    pub values: Vec<f64>,
    /// Sine sources: the frequency asked for and the one the run used (moved for coherent sampling).
    pub frequency_requested_hz: Option<f64>,
    pub frequency_used_hz: Option<f64>,
    /// In the order of [`METRIC_COLUMNS`].
    pub metrics: Vec<Option<f64>>,
    /// Why the point could not be simulated or measured (its metrics are then empty).
    pub error: Option<String>,
}

/// A whole sweep, or the points of one shard of it.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepResult {
    pub scenario: String,
    /// Fingerprint of the scenario's text ([`fingerprint`]), so shards of different files do not merge.
    pub scenario_hash: String,
    pub spec: SweepSpec,
    /// The values of each key.
    pub axes: Vec<Vec<f64>>,
    /// The slice of the grid these rows are ([`Shard::WHOLE`]: every point).
    pub shard: Shard,
    /// The points of [`Self::shard`], in grid order.
    pub rows: Vec<SweepRow>,
    /// `Some("interrupted after M of N points")` when the sweep was stopped before every point of its shard
    /// ran; [`Self::rows`] then holds the first `M` of them.
    pub interrupted: Option<String>,
}

/// How to run a sweep.
#[derive(Debug, Clone, Copy, Default)]
pub struct SweepOptions {
    /// Worker threads (None: all cores).
    pub threads: Option<usize>,
    /// Show a progress bar on standard error when it is a terminal.
    pub progress: bool,
    /// Run only the points of this shard (default: all).
    pub shard: Shard,
}

/// A point's requested and used frequencies and its metric values.
pub type PointValues = (Option<f64>, Option<f64>, Vec<Option<f64>>);

/// [`simulate`], then the audio figures over `band_hz` (three more runs): (requested frequency, used
/// frequency, the values of [`METRIC_COLUMNS`] and [`AUDIO_COLUMNS`]).
pub fn simulate_audio(sc: &Scenario, band_hz: (f64, f64)) -> Result<PointValues> {
    let run = pipeline::run_lean(sc)?;
    let m = measure_run(&run.records())?;
    let audio = crate::engine::audio::audio_figures(&run, &m, band_hz)?;
    let freqs = (run.plan.requested_frequency_hz, run.plan.frequency_hz);
    run.recycle();
    let mut v = metric_values(&m);
    v.extend(audio_values(&audio));
    Ok((freqs.0, freqs.1, v))
}

/// Simulate and measure one checked scenario: (requested frequency, used frequency, metrics).
pub fn simulate(sc: &Scenario) -> Result<(Option<f64>, Option<f64>, ChainMetrics)> {
    let run = pipeline::run_lean(sc)?;
    let m = measure_run(&run.records())?;
    let freqs = (run.plan.requested_frequency_hz, run.plan.frequency_hz);
    run.recycle();
    Ok((freqs.0, freqs.1, m))
}

/// Simulate and measure one point of a sweep, its scenario `sc` already checked (with the audio figures over
/// `audio_band_hz` when given), as the row of grid position `index` with the varied `values`. A point that
/// fails while running is kept as a row with its error and no metrics.
pub fn run_point(
    sc: &Scenario,
    audio_band_hz: Option<(f64, f64)>,
    index: u64,
    values: Vec<f64>,
) -> SweepRow {
    let finite = |x: Option<f64>| x.filter(|v| v.is_finite());
    let measured = match audio_band_hz {
        Some(band) => simulate_audio(sc, band),
        None => simulate(sc).map(|(fr, fu, m)| (fr, fu, metric_values(&m))),
    };
    match measured {
        Ok((fr, fu, m)) => SweepRow {
            index,
            values,
            frequency_requested_hz: finite(fr),
            frequency_used_hz: finite(fu),
            // Non-finite values are kept as missing, as rows.json holds them.
            metrics: m.into_iter().map(finite).collect(),
            error: None,
        },
        Err(e) => SweepRow {
            index,
            values,
            frequency_requested_hz: finite(sc.source.waveform.fundamental_hz()),
            frequency_used_hz: None,
            metrics: vec![
                None;
                METRIC_COLUMNS.len() + audio_band_hz.map_or(0, |_| AUDIO_COLUMNS.len())
            ],
            error: Some(e.to_string()),
        },
    }
}

/// A rayon pool of `threads` workers (None or 0: one per core).
pub fn thread_pool(threads: Option<usize>) -> Result<rayon::ThreadPool> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads.unwrap_or(0))
        .build()
        .map_err(|e| Error::Run(format!("cannot start worker threads: {e}")))
}

/// A progress bar for `n` items, shown only when asked and standard error is a terminal.
pub fn progress_bar(n: usize, show: bool, what: &str) -> Option<indicatif::ProgressBar> {
    (show && std::io::IsTerminal::is_terminal(&std::io::stderr())).then(|| {
        let b = indicatif::ProgressBar::new(n as u64);
        b.set_style(
            indicatif::ProgressStyle::with_template(&format!(
                "  {what} [{{bar:40}}] {{pos}}/{{len}}  {{elapsed}}"
            ))
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        b
    })
}

/// Run every point of the sweep. Every point's scenario is checked (and planned) before any runs, so a value
/// the scenario cannot take is reported as bad input at once; a point that fails while running is kept as a
/// row with its error.
pub fn run_sweep(
    text: &ScenarioText,
    spec: &SweepSpec,
    opts: &SweepOptions,
) -> Result<SweepResult> {
    run_sweep_until(text, spec, opts, &AtomicBool::new(false))
}

/// [`run_sweep`], stopping when `cancel` becomes true: no new point starts, the points in progress finish,
/// and the result holds the points finished (the first ones of the shard, in grid order) with
/// [`SweepResult::interrupted`] set. The flag is read only once the points are checked.
pub fn run_sweep_until(
    text: &ScenarioText,
    spec: &SweepSpec,
    opts: &SweepOptions,
    cancel: &AtomicBool,
) -> Result<SweepResult> {
    if spec.vary.is_empty() {
        return Err(Error::BadInput(
            "give at least one --vary KEY=FROM..TO".into(),
        ));
    }
    let axes = spec
        .vary
        .iter()
        .map(|v| axis_values(v, spec.points, spec.log))
        .collect::<Result<Vec<_>>>()?;
    let points = grid(&axes);
    let pool = thread_pool(opts.threads)?;
    // Check every point (on the pool: with fast points the checks are a visible share of a sweep); the first
    // bad point in grid order is the one reported, whatever the thread count.
    let checked: Vec<Result<Scenario>> = pool.install(|| {
        use rayon::prelude::*;
        points
            .par_iter()
            .map(|p| {
                let ov: Vec<(String, f64)> = spec
                    .vary
                    .iter()
                    .zip(p)
                    .map(|(v, x)| (v.key.clone(), *x))
                    .collect();
                let sc = text.with(&ov)?;
                let (plan, _) = Plan::new(&sc)?;
                if let Some(band) = spec.audio_band_hz {
                    crate::engine::audio::check(&sc, &plan, band)?;
                }
                Ok(sc)
            })
            .collect()
    });
    let scenarios = checked.into_iter().collect::<Result<Vec<Scenario>>>()?;
    let name = scenarios
        .first()
        .map(|s| s.name.clone())
        .unwrap_or_default();
    // Every point is checked above, so each shard refuses a bad sweep alike; only the shard's points run.
    let mine: Vec<(u64, &Scenario, &Vec<f64>)> = scenarios
        .iter()
        .zip(&points)
        .enumerate()
        .map(|(i, (sc, p))| (i as u64, sc, p))
        .filter(|(i, _, _)| opts.shard.contains(*i))
        .collect();
    let bar = progress_bar(mine.len(), opts.progress, "sweeping");
    // Points start in grid order, so an interrupted sweep holds the first points of its shard.
    let rows: Vec<SweepRow> = run_in_order(&pool, mine.len(), cancel, bar.as_ref(), |j| {
        let (index, sc, p) = mine[j];
        run_point(sc, spec.audio_band_hz, index, p.clone())
    });
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let interrupted =
        (rows.len() < mine.len()).then(|| interrupted_note(&STUDY, rows.len(), mine.len()));
    Ok(SweepResult {
        scenario: name,
        scenario_hash: fingerprint(text.text.as_bytes()),
        spec: spec.clone(),
        axes,
        shard: opts.shard,
        rows,
        interrupted,
    })
}

mod output;

pub use output::{folder_producer, write_outputs, write_sweep};

#[cfg(test)]
mod tests {
    use super::*;

    /// A scenario text from an embedded file, relative paths from the working folder.
    fn text_of(toml: &str, origin: &str) -> ScenarioText {
        ScenarioText::new(toml.to_string(), origin.into(), ".".into()).unwrap()
    }

    #[test]
    fn vary_specs_take_units_of_the_key() {
        let v = parse_vary("source.frequency=1 kHz..20 kHz").unwrap();
        assert_eq!((v.from, v.to), (1e3, 20e3));
        let v = parse_vary("stage.3.slew_rate=1 V/us..13 V/us").unwrap();
        assert_eq!((v.from, v.to), (1e6, 13e6));
        let v = parse_vary("stage.2.bits=8..12").unwrap();
        assert_eq!((v.from, v.to), (8.0, 12.0));
        let v = parse_vary("source.phase=0 deg..90 deg").unwrap();
        assert!((v.to - 90.0).abs() < 1e-12);
    }

    #[test]
    fn bad_vary_specs_are_bad_input_with_the_form_to_use() {
        for s in [
            "source.frequency",
            "source.frequency=1 kHz",
            "frequency=1..2",
            "source.frequency=1 kV..2 kV",
            "stage.2.bits=eight..12",
        ] {
            let e = parse_vary(s).unwrap_err();
            assert!(e.is_bad_input(), "{s}");
            assert!(e.to_string().contains("KEY=FROM..TO"), "{s}: {e}");
        }
    }

    #[test]
    fn axes_are_linear_logarithmic_and_whole_for_integer_keys() {
        let v = Vary {
            key: "source.frequency".into(),
            from: 10.0,
            to: 1000.0,
        };
        let lin = axis_values(&v, 3, false).unwrap();
        assert_eq!(lin, vec![10.0, 505.0, 1000.0]);
        let log = axis_values(&v, 3, true).unwrap();
        assert!((log[1] - 100.0).abs() < 1e-9);
        let b = Vary {
            key: "stage.2.bits".into(),
            from: 8.0,
            to: 10.0,
        };
        assert_eq!(axis_values(&b, 5, false).unwrap(), vec![8.0, 9.0, 10.0]);
        let z = Vary {
            key: "source.offset".into(),
            from: 0.0,
            to: 1.0,
        };
        assert!(axis_values(&z, 3, true).unwrap_err().is_bad_input());
        assert!(axis_values(&z, 1, false).unwrap_err().is_bad_input());
    }

    #[test]
    fn a_grid_holds_every_combination_with_the_last_key_fastest() {
        let g = grid(&[vec![1.0, 2.0], vec![10.0, 20.0, 30.0]]);
        assert_eq!(g.len(), 6);
        assert_eq!(g[0], vec![1.0, 10.0]);
        assert_eq!(g[1], vec![1.0, 20.0]);
        assert_eq!(g[5], vec![2.0, 30.0]);
    }

    #[test]
    fn a_study_point_measures_exactly_what_a_run_measures() {
        // A study's lean run (source left off the grid, buffers reused) must give the run's numbers bit for bit:
        // a sine (source skipped) and a multitone (source kept for the group delay), twice each on one thread
        // so the second lean run works in the first one's recycled buffers.
        // The speed reference chain: a closed-form source straight into the hold.
        let text = text_of(
            include_str!("../../../benches/reference-chain.toml"),
            "reference",
        );
        let sine = text
            .with(&[
                ("simulation.duration".into(), 0.012),
                ("simulation.settle".into(), 0.002),
            ])
            .unwrap();
        let mut multi = sine.clone();
        multi.source.waveform = crate::scenario::Waveform::Multitone {
            tones: [(1000.0, 0.3), (3100.0, 0.2), (7300.0, 0.1)]
                .iter()
                .map(|&(f, a)| crate::scenario::Tone {
                    frequency_hz: f,
                    amplitude_v: a,
                    phase_rad: 0.4,
                })
                .collect(),
        };
        for sc in [&sine, &multi, &sine, &multi] {
            let full = pipeline::run(sc, None, &mut |_| {}).unwrap();
            let want = metric_values(&measure_run(&full.records()).unwrap());
            let want_gd = measure_run(&full.records()).unwrap().latency.group_delay_s;
            let lean = pipeline::run_lean(sc).unwrap();
            assert_eq!(lean.capture.source().is_some(), sc == &multi);
            let m = measure_run(&lean.records()).unwrap();
            lean.recycle();
            let got = metric_values(&m);
            for (i, (a, b)) in want.iter().zip(&got).enumerate() {
                assert_eq!(
                    a.map(f64::to_bits),
                    b.map(f64::to_bits),
                    "{}",
                    METRIC_COLUMNS[i]
                );
            }
            assert_eq!(want_gd, m.latency.group_delay_s);
        }
    }

    #[test]
    fn every_number_of_the_report_sections_has_a_column() {
        // Guards the explicit column list against fields added to the report later.
        let sc =
            crate::scenario::parse_str(crate::DEFAULT_SCENARIO, "demo", std::path::Path::new("."))
                .unwrap();
        let text = text_of(crate::DEFAULT_SCENARIO, "demo");
        let short = text
            .with(&[
                ("simulation.duration".into(), 0.012),
                ("simulation.settle".into(), 0.002),
            ])
            .unwrap();
        assert_eq!(short.name, sc.name);
        let (_, _, m) = simulate(&short).unwrap();
        let vals = metric_values(&m);
        assert_eq!(vals.len(), METRIC_COLUMNS.len());
        let j = serde_json::to_value(&m).unwrap();
        for section in ["adc", "output"] {
            for (k, v) in j[section].as_object().unwrap() {
                if v.is_number() || v.is_null() {
                    let col = format!("{section}.{k}");
                    let i = METRIC_COLUMNS
                        .iter()
                        .position(|c| *c == col)
                        .unwrap_or_else(|| panic!("no column for {col}"));
                    assert_eq!(vals[i], v.as_f64(), "{col}");
                }
            }
        }
    }

    fn synthetic(shard: Shard) -> SweepResult {
        let spec = SweepSpec {
            vary: vec![
                Vary {
                    key: "source.frequency".into(),
                    from: 1e3,
                    to: 4e3,
                },
                Vary {
                    key: "stage.2.bits".into(),
                    from: 8.0,
                    to: 10.0,
                },
            ],
            points: 3,
            log: true,
            audio_band_hz: None,
        };
        let axes: Vec<Vec<f64>> = spec
            .vary
            .iter()
            .map(|v| axis_values(v, spec.points, spec.log).unwrap())
            .collect();
        let rows = grid(&axes)
            .into_iter()
            .enumerate()
            .filter(|(i, _)| shard.contains(*i as u64))
            .map(|(i, values)| {
                let failed = i % 4 == 3;
                SweepRow {
                    index: i as u64,
                    frequency_requested_hz: Some(values[0]),
                    frequency_used_hz: (!failed).then(|| values[0] * (1.0 + 1e-3 / 3.0)),
                    values,
                    metrics: (0..METRIC_COLUMNS.len())
                        .map(|m| (!failed && m % 5 != 2).then(|| 0.1 * (i * m) as f64 + 1.0 / 3.0))
                        .collect(),
                    error: failed.then(|| format!("point {i}: a \"quoted\", two-line\nmessage")),
                }
            })
            .collect();
        SweepResult {
            scenario: "synthetic".into(),
            scenario_hash: fingerprint(b"synthetic"),
            spec,
            axes,
            shard,
            rows,
            interrupted: None,
        }
    }

    #[test]
    fn a_sweep_survives_a_round_trip_through_its_rows() {
        for shard in [Shard::WHOLE, Shard { k: 2, n: 4 }] {
            let r = synthetic(shard);
            let set = r.to_rows();
            assert_eq!(set.total_runs(), Some(9));
            assert_eq!(set.rows.len(), shard.count(9) as usize);
            let back: RowSet = serde_json::from_slice(&set.to_json().unwrap()).unwrap();
            assert_eq!(SweepResult::from_rows(&back).unwrap(), r);
        }
    }

    #[test]
    fn plot_series_are_named_in_words_and_hold_each_x_once() {
        let mut r = synthetic(Shard::WHOLE);
        // The second requested frequency ran at the first one's frequency (as coherent sampling may move two
        // close requests to one frequency): its points are drawn once, at that frequency.
        let (f0, f1) = (r.axes[0][0], r.axes[0][1]);
        let used0 = f0 * (1.0 + 1e-3 / 3.0);
        for row in &mut r.rows {
            if row.values[0] == f1 && row.frequency_used_hz.is_some() {
                row.frequency_used_hz = Some(used0);
            }
        }
        let series = r.plot_series(&["adc.enob_bits", "output.enob_bits"]);
        assert!(!series.is_empty());
        for (name, x, _) in &series {
            assert!(
                name.starts_with("ADC codes, stage 2 bits ")
                    || name.starts_with("analog output, stage 2 bits "),
                "{name}"
            );
            for (i, a) in x.iter().enumerate() {
                assert!(!x[i + 1..].contains(a), "{name}: {x:?}");
            }
        }
        assert_eq!(SweepResult::metric_words("output.gain_db"), "analog output");
        assert_eq!(output::key_words("stage.3.slew_rate"), "stage 3 slew rate");
    }

    #[test]
    fn an_interrupted_sweep_keeps_its_note_through_its_rows_and_files() {
        let mut r = synthetic(Shard::WHOLE);
        r.rows.truncate(4);
        r.interrupted = Some(interrupted_note(&STUDY, 4, 9));
        let set = r.to_rows();
        assert_eq!(
            set.interrupted.as_deref(),
            Some("interrupted after 4 of 9 points")
        );
        let back: RowSet = serde_json::from_slice(&set.to_json().unwrap()).unwrap();
        assert_eq!(SweepResult::from_rows(&back).unwrap(), r);
        let j = r.to_json();
        assert_eq!(j["interrupted"], "interrupted after 4 of 9 points");
        assert_eq!(j["points_done"], 4);
        assert!(
            synthetic(Shard::WHOLE)
                .to_json()
                .get("interrupted")
                .is_none()
        );
        // An interrupted whole sweep does not merge as the whole study, and says why.
        let e = crate::study::shard::merge(vec![("a".into(), set)], crate::study::STUDIES)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("5 of 9 points are in no folder") && e.contains("interrupted after 4 of 9"),
            "{e}"
        );
    }

    #[test]
    fn a_raised_stop_flag_runs_no_point_and_marks_the_sweep_partial() {
        let text = text_of(crate::DEFAULT_SCENARIO, "demo");
        let spec = SweepSpec {
            vary: vec![Vary {
                key: "source.frequency".into(),
                from: 1e3,
                to: 2e3,
            }],
            points: 3,
            log: false,
            audio_band_hz: None,
        };
        let cancel = AtomicBool::new(true);
        for (shard, of) in [(Shard::WHOLE, 3), (Shard { k: 2, n: 2 }, 1)] {
            let opts = SweepOptions {
                threads: Some(2),
                progress: false,
                shard,
            };
            let r = run_sweep_until(&text, &spec, &opts, &cancel).unwrap();
            assert!(r.rows.is_empty());
            assert_eq!(
                r.interrupted,
                Some(format!("interrupted after 0 of {of} points"))
            );
            assert_eq!(r.total_points(), 3);
        }
        // The files are still written (a header-only table, empty plots).
        let opts = SweepOptions {
            threads: Some(1),
            progress: false,
            shard: Shard::WHOLE,
        };
        let r = run_sweep_until(&text, &spec, &opts, &cancel).unwrap();
        let d = tempfile::tempdir().unwrap();
        let dir = d.path().join("s");
        write_sweep(&r, &dir, false).unwrap();
        let csv = std::fs::read_to_string(dir.join("sweep.csv")).unwrap();
        assert_eq!(csv.lines().count(), 1);
        assert!(dir.join("sweep-enob.svg").exists());
        // Bad values are still refused before the flag is looked at.
        let mut bad = spec.clone();
        bad.vary[0].from = -1e3;
        assert!(
            run_sweep_until(&text, &bad, &opts, &cancel)
                .unwrap_err()
                .is_bad_input()
        );
    }

    #[test]
    fn the_first_bad_point_in_grid_order_is_reported_whatever_the_threads() {
        // Every duration from 0.2 ms to 0.3 ms is too short for the demo's analysis window; the points are
        // checked in parallel, and the message must name the first one (0.2 ms) on 1 and on 2 threads.
        let text = text_of(crate::DEFAULT_SCENARIO, "demo");
        let spec = SweepSpec {
            vary: vec![parse_vary("simulation.duration=0.2 ms..0.3 ms").unwrap()],
            points: 16,
            log: false,
            audio_band_hz: None,
        };
        let mut messages = Vec::new();
        for threads in [1, 2] {
            let opts = SweepOptions {
                threads: Some(threads),
                progress: false,
                shard: Shard::WHOLE,
            };
            let e = run_sweep(&text, &spec, &opts).unwrap_err();
            assert!(e.is_bad_input(), "{e}");
            messages.push(e.to_string());
        }
        assert_eq!(messages[0], messages[1]);
        let first = match text.with(&[("simulation.duration".into(), 0.2e-3)]) {
            Ok(sc) => Plan::new(&sc).unwrap_err().to_string(),
            Err(e) => e.to_string(),
        };
        assert_eq!(messages[0], first);
        assert!(first.contains("simulation.duration=0.0002)"), "{first}");
    }

    #[test]
    fn merged_shard_rows_give_the_whole_sweep() {
        let whole = synthetic(Shard::WHOLE);
        let parts = [3, 1, 2]
            .iter()
            .map(|k| {
                let s = synthetic(Shard { k: *k, n: 3 }).to_rows();
                (std::path::PathBuf::from(format!("s{k}")), s)
            })
            .collect();
        let merged = crate::study::shard::merge(parts, crate::study::STUDIES).unwrap();
        assert_eq!(merged, whole.to_rows());
        let back = SweepResult::from_rows(&merged).unwrap();
        assert_eq!(back.to_csv().unwrap(), whole.to_csv().unwrap());
        assert_eq!(back.to_json(), whole.to_json());
        assert!(whole.to_json().get("shard").is_none());
        assert_eq!(
            synthetic(Shard { k: 1, n: 3 }).to_json()["shard"]["shard"],
            "1/3"
        );
    }

    #[test]
    fn rows_that_do_not_fit_the_sweep_are_bad_input() {
        let good = synthetic(Shard::WHOLE).to_rows();
        let mut wrong_kind = good.clone();
        wrong_kind.kind = "montecarlo".into();
        let mut wrong_columns = good.clone();
        wrong_columns.columns[1] = "source.amplitude".into();
        let mut wrong_runs = good.clone();
        wrong_runs.study["runs"] = json!(10);
        let mut short_row = good.clone();
        short_row.rows[4].pop();
        let mut text_value = good.clone();
        text_value.rows[0][1] = json!("1 kHz");
        for (name, set) in [
            ("kind", wrong_kind),
            ("columns", wrong_columns),
            ("runs", wrong_runs),
            ("short row", short_row),
            ("text value", text_value),
        ] {
            let e = SweepResult::from_rows(&set).unwrap_err();
            assert!(e.is_bad_input(), "{name}: {e}");
        }
    }
}
