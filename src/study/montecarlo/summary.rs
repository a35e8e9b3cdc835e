//! A Monte-Carlo study's summary and files: per-metric percentiles, the fractions and the yield against the
//! requirements, montecarlo.csv, montecarlo.json and the histograms.

use serde::Serialize;
use serde_json::Value;

use super::{METRICS, PERCENTILE_RULE, PLOTTED, Requirement};
use crate::error::{Error, Result};
use crate::format::units::format_si_table;
use crate::report::OutputDir;
use crate::report::plot::{HistogramPlot, Plot, PlotFormat, render};
use crate::study::shard::{ROWS_FILE, RowSet};
use crate::study::sweep::AUDIO_COLUMNS;

/// Percentiles and extremes of the values a metric took.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Stats {
    pub name: String,
    /// Runs that gave a value.
    pub runs: u64,
    pub p5: Option<f64>,
    pub median: Option<f64>,
    pub p95: Option<f64>,
    pub mean: Option<f64>,
    pub min: Option<f64>,
    pub max: Option<f64>,
}

/// The `q` quantile (0..1) of sorted values (see the module notes).
pub fn percentile(sorted: &[f64], q: f64) -> Option<f64> {
    let n = sorted.len();
    if n == 0 {
        return None;
    }
    let h = (n - 1) as f64 * q.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(n - 1);
    Some(sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo]))
}

fn stats(name: &str, values: &[Option<f64>]) -> Stats {
    let mut v: Vec<f64> = values.iter().flatten().copied().collect();
    v.sort_by(f64::total_cmp);
    Stats {
        name: name.to_string(),
        runs: v.len() as u64,
        p5: percentile(&v, 0.05),
        median: percentile(&v, 0.5),
        p95: percentile(&v, 0.95),
        mean: (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64),
        min: v.first().copied(),
        max: v.last().copied(),
    }
}

/// Fractions of converters passing the static pass/fail checks, over the runs with static results.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Fractions {
    pub dac_tested: u64,
    pub dac_monotonic: Option<f64>,
    pub adc_tested: u64,
    pub adc_without_missing_codes: Option<f64>,
}

/// Yield against one requirement.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct YieldLine {
    pub require: String,
    pub passed: u64,
    /// Runs in this folder (failed runs count as not passing).
    pub runs: u64,
    #[serde(rename = "yield")]
    pub fraction: Option<f64>,
}

/// A run that failed.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Failure {
    pub index: u64,
    pub seed: u64,
    pub error: String,
}

/// What `montecarlo.json` holds.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Summary {
    /// The study header (scenario, hash, base seed, runs, options, spreads, requirements).
    pub study: Value,
    /// The slice of runs this folder was made for (`1/1`: all).
    pub shard: String,
    pub runs_done: u64,
    pub runs_failed: u64,
    /// `interrupted after M of N runs` when cut short.
    pub interrupted: Option<String>,
    pub percentiles: String,
    pub metrics: Vec<Stats>,
    /// The drawn `[spread]` values.
    pub drawn: Vec<Stats>,
    pub fractions: Fractions,
    #[serde(rename = "yield")]
    pub yields: Vec<YieldLine>,
    /// The first 20 failed runs.
    pub failures: Vec<Failure>,
}

fn column(set: &RowSet, name: &str) -> Result<Vec<Option<f64>>> {
    let c = set
        .columns
        .iter()
        .position(|n| n == name)
        .ok_or_else(|| Error::BadInput(format!("the rows have no column `{name}`")))?;
    Ok(set
        .rows
        .iter()
        .map(|r| r.get(c).and_then(Value::as_f64))
        .collect())
}

/// The summary of a Monte-Carlo row set.
pub fn summarize(set: &RowSet) -> Result<Summary> {
    let err_col = set.columns.len() - 1;
    let failures: Vec<Failure> = set
        .rows
        .iter()
        .filter_map(|r| {
            let e = r.get(err_col)?.as_str()?;
            Some(Failure {
                index: r[0].as_u64().unwrap_or(0),
                seed: r[1].as_u64().unwrap_or(0),
                error: e.to_string(),
            })
        })
        .collect();
    let audio: &[&str] = if set.study.get("audio_band_hz").is_some() {
        AUDIO_COLUMNS
    } else {
        &[]
    };
    let mut metrics = Vec::with_capacity(METRICS.len() + audio.len());
    for m in METRICS.iter().chain(audio) {
        metrics.push(stats(m, &column(set, m)?));
    }
    let n_metrics = METRICS.len() + audio.len();
    let spreads: Vec<String> = set
        .columns
        .get(2..set.columns.len().saturating_sub(1 + n_metrics))
        .unwrap_or_default()
        .to_vec();
    let mut drawn = Vec::with_capacity(spreads.len());
    for s in &spreads {
        drawn.push(stats(s, &column(set, s)?));
    }
    let frac = |name: &str, pass: &dyn Fn(f64) -> bool| -> Result<(u64, Option<f64>)> {
        let v: Vec<f64> = column(set, name)?.into_iter().flatten().collect();
        let k = v.iter().filter(|x| pass(**x)).count();
        Ok((
            v.len() as u64,
            (!v.is_empty()).then(|| k as f64 / v.len() as f64),
        ))
    };
    let (dac_tested, dac_monotonic) = frac("static.dac.monotonic", &|x| x == 1.0)?;
    let (adc_tested, adc_without_missing_codes) = frac("static.adc.missing_codes", &|x| x == 0.0)?;
    let requires: Vec<Requirement> = set
        .study
        .get("require")
        .and_then(Value::as_array)
        .map(|a| {
            a.iter()
                .filter_map(Value::as_str)
                .map(Requirement::parse)
                .collect()
        })
        .transpose()?
        .unwrap_or_default();
    let mut yields = Vec::with_capacity(requires.len());
    let n = set.rows.len() as u64;
    for r in &requires {
        let passed = column(set, &r.metric)?
            .into_iter()
            .filter(|v| r.passes(*v))
            .count() as u64;
        yields.push(YieldLine {
            require: r.text.clone(),
            passed,
            runs: n,
            fraction: (n > 0).then(|| passed as f64 / n as f64),
        });
    }
    Ok(Summary {
        study: set.study.clone(),
        shard: set.shard.to_string(),
        runs_done: n,
        runs_failed: failures.len() as u64,
        interrupted: set.interrupted.clone(),
        percentiles: PERCENTILE_RULE.into(),
        metrics,
        drawn,
        fractions: Fractions {
            dac_tested,
            dac_monotonic,
            adc_tested,
            adc_without_missing_codes,
        },
        yields,
        failures: failures.into_iter().take(20).collect(),
    })
}

/// `montecarlo.csv`: the header row (the set's columns) and one row per run; numbers in Rust's shortest
/// round-trip form, empty cells for missing values.
pub fn csv_bytes(set: &RowSet) -> Result<Vec<u8>> {
    let mut w = csv::Writer::from_writer(Vec::new());
    let io = |e: csv::Error| Error::Run(format!("csv: {e}"));
    w.write_record(&set.columns).map_err(io)?;
    for r in &set.rows {
        let cells = r.iter().map(|v| match v {
            Value::Null => String::new(),
            Value::String(s) => s.clone(),
            Value::Number(n) => match n.as_u64() {
                Some(u) => u.to_string(),
                None => n.as_f64().map_or(String::new(), |x| format!("{x}")),
            },
            other => other.to_string(),
        });
        w.write_record(cells).map_err(io)?;
    }
    w.into_inner().map_err(|e| Error::Run(format!("csv: {e}")))
}

/// Axis label of a plotted metric in words, with its unit: "measured latency (s)", "worst ADC DNL (LSB)".
fn axis_label(name: &str) -> String {
    let words = match name {
        "output.enob_bits" => "output ENOB (bits)",
        "adc.enob_bits" => "ADC ENOB (bits)",
        "output.sinad_db" => "output SINAD (dB)",
        "output.gain_db" => "output gain (dB)",
        "latency.measured_s" => "measured latency (s)",
        "latency.slips" => "clock slips",
        "latency.packets_lost" => "packets lost",
        "static.dac.dnl_max_lsb" => "worst DAC DNL (LSB)",
        "static.dac.inl_max_lsb" => "worst DAC INL (LSB)",
        "static.adc.dnl_max_lsb" => "worst ADC DNL (LSB)",
        "static.adc.inl_max_lsb" => "worst ADC INL (LSB)",
        _ => "",
    };
    if !words.is_empty() {
        return words.to_string();
    }
    for (suffix, unit) in [
        ("_s", "s"),
        ("_db", "dB"),
        ("_dbc", "dBc"),
        ("_bits", "bits"),
        ("_lsb", "LSB"),
    ] {
        if let Some(stem) = name.strip_suffix(suffix) {
            return format!("{} ({unit})", stem.replace(['.', '_'], " "));
        }
    }
    name.to_string()
}

/// A histogram of `bins` equal bins between the extremes: (edges, counts), `bins` + 1 edges; None when the
/// values do not spread.
pub fn histogram_bins(values: &[f64], bins: usize) -> Option<(Vec<f64>, Vec<f64>)> {
    let lo = values.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if values.is_empty() || hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater) || bins == 0 {
        return None;
    }
    let w = (hi - lo) / bins as f64;
    let mut counts = vec![0.0; bins];
    for v in values {
        let b = (((v - lo) / w) as usize).min(bins - 1);
        counts[b] += 1.0;
    }
    let mut edges: Vec<f64> = (0..bins).map(|b| lo + b as f64 * w).collect();
    edges.push(hi);
    Some((edges, counts))
}

/// Write `montecarlo.csv`, `montecarlo.json`, `rows.json` and histograms (`hist-<metric>.png/.svg`) of the
/// main metrics that vary. The same rows always give the same csv and json bytes.
pub fn write_outputs(out: &OutputDir, set: &RowSet) -> Result<Summary> {
    let summary = summarize(set)?;
    out.write("montecarlo.csv", &csv_bytes(set)?)?;
    let mut json = serde_json::to_vec_pretty(&summary).map_err(|e| Error::Run(e.to_string()))?;
    json.push(b'\n');
    out.write("montecarlo.json", &json)?;
    out.write(ROWS_FILE, &set.to_json()?)?;
    let requires: Vec<Requirement> = summary
        .yields
        .iter()
        .filter_map(|y| Requirement::parse(&y.require).ok())
        .collect();
    for m in PLOTTED {
        let values: Vec<f64> = column(set, m)?.into_iter().flatten().collect();
        let bins = ((values.len() as f64).sqrt().ceil() as usize).clamp(5, 50);
        let Some((edges, counts)) = histogram_bins(&values, bins) else {
            continue;
        };
        let st = summary
            .metrics
            .iter()
            .find(|s| s.name == m)
            .expect("every metric is summarised");
        let mut markers = Vec::new();
        let x_label = axis_label(m);
        let (_, unit) = crate::report::plot::split_label_unit(&x_label);
        for (label, v) in [("5 %", st.p5), ("median", st.median), ("95 %", st.p95)] {
            if let Some(v) = v {
                markers.push((v, format!("{label} {}", format_si_table(v, unit))));
            }
        }
        for r in requires.iter().filter(|r| r.metric == m) {
            markers.push((r.threshold, format!("require {}", r.text)));
        }
        let (words, _) = crate::report::plot::split_label_unit(&x_label);
        let plot = Plot::Histogram(HistogramPlot {
            title: format!(
                "{words} ({m}): {} runs ({} with a value)",
                set.rows.len(),
                values.len()
            ),
            x_label: x_label.clone(),
            edges: &edges,
            counts: &counts,
            markers,
        });
        for fmt in [PlotFormat::Png, PlotFormat::Svg] {
            let (bytes, _) = render(&plot, fmt, 1000, 620)?;
            out.write(&format!("hist-{m}.{}", fmt.extension()), &bytes)?;
        }
    }
    Ok(summary)
}
