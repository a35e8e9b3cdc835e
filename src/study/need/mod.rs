//! What must change, and by how much: for each varied key on its own (the others as written), the value
//! closest to the written one that meets a requirement (`convchain need`).
//!
//! Requirements: the chain keeps up to a frequency by one of the limit finder's criteria
//! ([`UpToCheck`](crate::study::limit::UpToCheck)), or `--require METRIC>=X` as in `montecarlo`, met at the
//! scenario's frequency (or another).
//!
//! Method, per key: a coarse scan over FROM..TO (linear, or logarithmic with `log`) finds every passing range
//! (several ranges: the response is not monotone); the pass boundary closest to the written value is then
//! bisected (geometric mid-points with `log`) until the bracket is narrower than `tolerance` of the answer
//! (whole-number keys: until the two ends are neighbours). The answer is the passing end of the bracket.
//!
//! With no key given, the candidates are the non-idealities the limit finder's diagnosis ablates
//! ([`candidates`]), each whose ablation meets the requirement (or, when none does, improves the metric) and
//! that is written as a number, over a range around the written value.

use rayon::prelude::*;
use serde::Serialize;

use crate::error::{Error, Result};
use crate::scenario::overrides::{Edit, ScenarioText, candidates, is_integer_key};
use crate::study::limit::UpToCheck;
use crate::study::montecarlo::{Cmp, Requirement};
use crate::study::sweep::{
    METRIC_COLUMNS, Vary, axis_values, metric_values, progress_bar, simulate, thread_pool,
};

mod output;
mod search;
pub use output::{folder_producer, table, write_need};
use search::{distance, solve_key};

/// What the chain must meet.
#[derive(Debug, Clone)]
pub enum Goal {
    /// Keep up to a frequency by a limit criterion.
    UpTo(Box<UpToCheck>),
    /// Every requirement at `at_hz` (None: the scenario's frequency).
    Require {
        reqs: Vec<Requirement>,
        at_hz: Option<f64>,
    },
}

/// How to solve.
#[derive(Debug, Clone)]
pub struct NeedSpec {
    /// The keys to solve for; empty: candidates from the diagnosis.
    pub vary: Vec<Vary>,
    pub log: bool,
    /// Relative width of the final bracket (0.01 = 1 %).
    pub tolerance: f64,
    /// Points of the coarse scan.
    pub points: usize,
    pub threads: Option<usize>,
    /// A progress bar on standard error (when it is a terminal): the runs done of those known so far.
    pub progress: bool,
}

/// One run of the requirement.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Eval {
    pub value: f64,
    pub pass: bool,
    pub metric: Option<f64>,
    pub error: Option<String>,
}

/// The answer for one key.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NeedRow {
    pub key: String,
    /// Where the key came from: "--vary" or the diagnosis's change.
    pub source: String,
    /// The value written in the scenario (None: not written, the scenario's default applies).
    pub written: Option<f64>,
    pub from: f64,
    pub to: f64,
    /// The value needed (the written one when it already passes); None when no value in the range passes.
    pub value: Option<f64>,
    pub found: bool,
    /// "rise", "fall", "already passes" or "none".
    pub direction: String,
    /// Every passing range of the coarse scan, [low, high] in scanned values.
    pub ranges: Vec<[f64; 2]>,
    pub metric_at_value: Option<f64>,
    /// The written chain's margin over the threshold when it already passes (in the metric's unit).
    pub margin: Option<f64>,
    pub monotone: bool,
    pub note: String,
    /// The coarse scan and the bisection's runs, in order of value.
    pub runs: Vec<Eval>,
}

/// The headline and the rows: `need` in need.json.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Need {
    /// The key whose needed change is the smallest (relative); None when none is found or all already pass.
    pub key: Option<String>,
    pub value: Option<f64>,
    pub rows: Vec<NeedRow>,
}

/// Everything `need` found.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NeedReport {
    pub scenario: String,
    /// With `[[path]]` tables: the path judged (the first).
    pub path: Option<String>,
    /// The requirement in words.
    pub requirement: String,
    /// The metric followed and its threshold.
    pub metric: String,
    pub metric_unit: String,
    pub threshold: f64,
    /// True when the metric must stay at or above the threshold.
    pub higher_is_better: bool,
    pub tolerance: f64,
    /// The chain as written.
    pub written: Eval,
    pub need: Need,
    pub notes: Vec<String>,
}

impl Goal {
    /// The metric followed, its unit, its threshold and whether higher is better (the first requirement's for
    /// `Require`).
    fn metric(&self) -> (String, String, f64, bool) {
        match self {
            Goal::UpTo(c) => {
                let (name, unit) = match c.criterion {
                    crate::study::limit::Criterion::Accuracy => ("ENOB drop", "bits"),
                    crate::study::limit::Criterion::Level => ("gain drop", "dB"),
                    _ => ("lowest fidelity", "dB"),
                };
                (name.into(), unit.into(), c.threshold, c.higher_is_better)
            }
            Goal::Require { reqs, .. } => {
                let r = &reqs[0];
                let unit = match r.metric.rsplit('_').next().unwrap_or("") {
                    "db" => "dB",
                    "dbc" => "dBc",
                    "dbfs" => "dBFS",
                    "s" => "s",
                    "bits" => "bits",
                    "lsb" => "LSB",
                    "v" => "V",
                    "hz" => "Hz",
                    _ => "",
                }
                .to_string();
                (
                    r.metric.clone(),
                    unit,
                    r.threshold,
                    matches!(r.cmp, Cmp::Ge | Cmp::Gt),
                )
            }
        }
    }

    /// Words for the report.
    fn describe(&self) -> String {
        match self {
            Goal::UpTo(c) => format!(
                "{} holds up to {} (judged at {} frequencies from {})",
                c.criterion.name(),
                crate::format::units::format_si(c.up_to_hz, "Hz"),
                c.frequencies_hz().len(),
                crate::format::units::format_si(c.from_hz, "Hz")
            ),
            Goal::Require { reqs, at_hz } => {
                let r: Vec<&str> = reqs.iter().map(|r| r.text.as_str()).collect();
                format!(
                    "{} at {}",
                    r.join(" and "),
                    at_hz.map_or("the scenario's frequency".to_string(), |f| {
                        crate::format::units::format_si(f, "Hz")
                    })
                )
            }
        }
    }

    /// Run the chain with `edits` and judge it.
    pub fn eval(&self, text: &ScenarioText, value: f64, edits: &[Edit]) -> Eval {
        match self {
            Goal::UpTo(c) => {
                let r = c.check(text, edits);
                Eval {
                    value,
                    pass: r.pass,
                    metric: r.metric,
                    error: r.error,
                }
            }
            Goal::Require { reqs, at_hz } => {
                let mut all: Vec<Edit> = at_hz
                    .map(|f| Edit::Set("source.frequency".into(), f))
                    .into_iter()
                    .collect();
                all.extend_from_slice(edits);
                let fail = |e: Error| Eval {
                    value,
                    pass: false,
                    metric: None,
                    error: Some(e.to_string()),
                };
                let sc = match text.with_edits(&all) {
                    Ok(s) => s,
                    Err(e) => return fail(e),
                };
                let m = match simulate(&sc) {
                    Ok((_, _, m)) => m,
                    Err(e) => return fail(e),
                };
                let vals = metric_values(&m);
                let get = |name: &str| {
                    METRIC_COLUMNS
                        .iter()
                        .position(|c| *c == name)
                        .and_then(|i| vals[i])
                };
                Eval {
                    value,
                    pass: reqs.iter().all(|r| r.passes(get(&r.metric))),
                    metric: get(&reqs[0].metric),
                    error: None,
                }
            }
        }
    }
}

/// Refuse requirements `need` cannot judge from one run (the static tests' metrics).
pub fn check_requirements(reqs: &[Requirement]) -> Result<()> {
    for r in reqs {
        if !METRIC_COLUMNS.contains(&r.metric.as_str()) {
            return Err(Error::BadInput(format!(
                "--require {}: `{}` is not measured by a run of the chain (need judges one run per value); \
                 use one of {}",
                r.text,
                r.metric,
                crate::study::montecarlo::METRICS
                    .iter()
                    .filter(|m| METRIC_COLUMNS.contains(m))
                    .copied()
                    .collect::<Vec<_>>()
                    .join(", ")
            )));
        }
    }
    Ok(())
}

/// A value of `key` as a table prints it, through the crate's SI formatter ([`SiStyle::Table`]: at most 5
/// significant digits) with the unit the scenario writes: `"20.78 kHz"`, `"450 µs"`; slew rates in V/us as
/// scenarios write them (`"15.658 V/us"`), ratios in percent (`"0.6 %"`); whole numbers and plain numbers
/// without a unit.
pub fn show_value(key: &str, v: f64) -> String {
    use crate::format::units::{Dimension, SiStyle, format_si_as, round_significant};
    let plain = |x: f64| {
        let x = round_significant(x, 5);
        let x = if x == 0.0 { 0.0 } else { x };
        format!("{x}")
    };
    match crate::study::sweep::key_dimension(key) {
        Some(Dimension::Frequency) => format_si_as(v, "Hz", SiStyle::Table),
        Some(Dimension::Time) => format_si_as(v, "s", SiStyle::Table),
        Some(Dimension::Voltage) => format_si_as(v, "V", SiStyle::Table),
        Some(Dimension::SlewRate) => format!("{} V/us", plain(v / 1e6)),
        // Tolerances, mismatches and gain errors; a bit error rate and a dither in LSB stay plain numbers.
        Some(Dimension::Ratio) if !key.ends_with("bit_error_rate") && !key.ends_with("_lsb") => {
            format!("{} %", plain(v * 100.0))
        }
        _ => plain(v),
    }
}

/// `from..to` of `key`, each end as [`show_value`] prints it.
pub fn show_range(key: &str, from: f64, to: f64) -> String {
    format!("{}..{}", show_value(key, from), show_value(key, to))
}

/// The ranges of a key that the diagnosis's candidates get: whole numbers from half to twice (and four more)
/// the written value; others from a thirtieth to thirty times it, logarithmically.
fn candidate_range(key: &str, written: f64) -> (f64, f64, bool) {
    let last = key.rsplit('.').next().unwrap_or(key);
    if is_integer_key(last) {
        ((written / 2.0).floor().max(1.0), written * 2.0 + 4.0, false)
    } else {
        (written / 30.0, written * 30.0, true)
    }
}

/// When the scenario refuses `key` = `end`: the value between the written `w` (which it takes) and `end`
/// closest to `end` that it takes, found by bisection (geometric with `log`) to 0.1 % (whole-number keys: to
/// neighbours). None when it takes `end`.
fn edge_of_allowed(text: &ScenarioText, key: &str, w: f64, end: f64, log: bool) -> Option<f64> {
    let takes = |x: f64| text.with_edits(&[Edit::Set(key.to_string(), x)]).is_ok();
    if takes(end) {
        return None;
    }
    let integer = is_integer_key(key.rsplit('.').next().unwrap_or(key));
    let (mut ok, mut bad) = (w, end);
    for _ in 0..60 {
        if integer {
            if (bad - ok).abs() <= 1.0 {
                break;
            }
        } else if (bad - ok).abs() <= 1e-3 * ok.abs().max(bad.abs()) {
            break;
        }
        let mut m = if log && ok > 0.0 && bad > 0.0 {
            (ok * bad).sqrt()
        } else {
            0.5 * (ok + bad)
        };
        if integer {
            m = m.round();
            if m == ok || m == bad {
                break;
            }
        }
        if takes(m) {
            ok = m;
        } else {
            bad = m;
        }
    }
    Some(ok)
}

/// A key written with a stage kind (`dac.slew_rate`) as the key of that stage (`stage.5.slew_rate`), when the
/// chain has exactly one stage of that kind; other keys as given.
pub fn resolve_key(sc: &crate::scenario::Scenario, key: &str) -> Result<String> {
    let Some((head, rest)) = key.split_once('.') else {
        return Ok(key.to_string());
    };
    if matches!(
        head,
        "stage" | "source" | "simulation" | "analysis" | "spread" | "compare"
    ) {
        return Ok(key.to_string());
    }
    let of_kind: Vec<usize> = sc
        .stages
        .iter()
        .enumerate()
        .filter(|(_, st)| st.kind.kind_name() == head)
        .map(|(i, _)| i + 1)
        .collect();
    match of_kind.as_slice() {
        [n] => Ok(format!("stage.{n}.{rest}")),
        [] => Ok(key.to_string()),
        many => Err(Error::BadInput(format!(
            "--vary {key}: the chain has {} `{head}` stages (stages {}); name one as stage.N.{rest}",
            many.len(),
            many.iter()
                .map(|n| n.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ))),
    }
}

/// Solve `spec` for the scenario `text`.
pub fn solve(
    text: &ScenarioText,
    goal_of: &dyn Fn(&ScenarioText) -> Result<Goal>,
    spec: &NeedSpec,
) -> Result<NeedReport> {
    if !(spec.tolerance > 0.0 && spec.tolerance < 0.5) {
        return Err(Error::BadInput(format!(
            "--tolerance must be above 0 % and below 50 %, found {} %",
            spec.tolerance * 100.0
        )));
    }
    let mut notes = Vec::new();
    let (text, path) = match text.first_path_only()? {
        Some((t, name)) => {
            notes.push(format!(
                "the scenario has [[path]] tables: the first path, \"{name}\", is judged; stage.N keys number \
                 its stages"
            ));
            (t, Some(name))
        }
        None => (text.clone(), None),
    };
    let text = &text;
    let base = text.scenario()?;
    let goal = goal_of(text)?;
    if let Goal::UpTo(c) = &goal {
        notes.extend(c.source_note.clone());
    }
    let pool = thread_pool(spec.threads)?;
    let (metric, metric_unit, threshold, higher_is_better) = goal.metric();
    // The bar's length grows as runs become known: the chain as written, the diagnosis's ablations, each
    // key's scan, each bisection step.
    let bar = progress_bar(1, spec.progress, "need");
    let bar = bar.as_ref();
    let written_eval = pool.install(|| goal.eval(text, f64::NAN, &[]));
    if let Some(b) = bar {
        b.inc(1);
    }
    if let Some(e) = &written_eval.error {
        return Err(Error::Run(format!(
            "the chain as written could not be judged: {e}"
        )));
    }
    // The keys: given, or the diagnosis's candidates written as numbers.
    let keys: Vec<(Vary, bool, String)> = if spec.vary.is_empty() {
        let mut cands = candidates(&base);
        // How many bits: the diagnosis never removes quantization (every converter has it), but the
        // resolution is a question `need` answers. Each converter with `bits` written is a candidate, judged
        // like an ablation with 4 bits more.
        for (i, st) in base.stages.iter().enumerate() {
            let key = format!("stage.{}.bits", i + 1);
            if st.kind.role() != crate::stages::kind::Role::Quantizer {
                continue;
            }
            if let Some(w) = text.get(&key) {
                cands.push(crate::scenario::overrides::Candidate {
                    stage_index: i,
                    mechanism: format!("{}.bits", st.kind.kind_name()),
                    stage: st.label.clone(),
                    change: format!("{}: bits raised to {}", st.label, w + 4.0),
                    edits: vec![Edit::Set(key, w + 4.0)],
                });
            }
        }
        let mut found = Vec::new();
        for c in &cands {
            let param = c.mechanism.split('.').nth(1).unwrap_or("cutoff");
            let key = format!("stage.{}.{param}", c.stage_index + 1);
            match text.get(&key).filter(|w| *w > 0.0) {
                Some(w) => {
                    if !found.iter().any(|(k, _, _): &(String, _, _)| *k == key) {
                        found.push((key, w, c.clone()));
                    }
                }
                None => notes.push(format!(
                    "{}: no number `{key}` written to vary; not a candidate",
                    c.change
                )),
            }
        }
        // The diagnosis: each candidate's ablation judged like a value.
        if let Some(b) = bar {
            b.inc_length(found.len() as u64);
        }
        let ablated: Vec<Eval> = pool.install(|| {
            found
                .par_iter()
                .map(|(_, w, c)| {
                    let e = goal.eval(text, *w, &c.edits);
                    if let Some(b) = bar {
                        b.inc(1);
                    }
                    e
                })
                .collect()
        });
        let better = |e: &Eval| match (e.metric, written_eval.metric) {
            (Some(a), Some(b)) => {
                if higher_is_better {
                    a > b + 1e-9
                } else {
                    a < b - 1e-9
                }
            }
            _ => false,
        };
        let any_pass = ablated.iter().any(|e| e.pass);
        let keep: Vec<bool> = ablated
            .iter()
            .map(|e| if any_pass { e.pass } else { better(e) })
            .collect();
        let keep_any = keep.iter().any(|k| *k);
        let mut out = Vec::new();
        for ((key, w, c), k) in found.into_iter().zip(keep) {
            if keep_any && !k {
                notes.push(format!(
                    "{}: making it ideal does not {}; not a candidate",
                    c.change,
                    if any_pass {
                        "meet the requirement"
                    } else {
                        "improve the metric"
                    }
                ));
                continue;
            }
            let (mut from, mut to, log) = candidate_range(&key, w);
            // Ends the scenario cannot take (a sample rate the converter's clock cannot reach) are drawn in to
            // the last value it takes (the written value is one).
            for end in [&mut from, &mut to] {
                if let Some(edge) = edge_of_allowed(text, &key, w, *end, log) {
                    notes.push(format!(
                        "{key}: range drawn in to {} (the scenario refuses {})",
                        show_value(&key, edge),
                        show_value(&key, *end)
                    ));
                    *end = edge;
                }
            }
            out.push((
                Vary { key, from, to },
                log,
                format!("diagnosis: {}", c.change),
            ));
        }
        if out.is_empty() {
            return Err(Error::BadInput(format!(
                "{}: the diagnosis found no non-ideality written as a number to vary; give --vary KEY=FROM..TO",
                base.origin
            )));
        }
        out
    } else {
        spec.vary
            .iter()
            .map(|v| {
                let key = resolve_key(&base, &v.key)?;
                let source = if key == v.key {
                    "--vary".to_string()
                } else {
                    format!("--vary {}", v.key)
                };
                Ok((Vary { key, ..v.clone() }, spec.log, source))
            })
            .collect::<Result<Vec<_>>>()?
    };
    // Every key's values must be ones the scenario can take: checked before anything long runs.
    for (v, log, _) in &keys {
        for x in axis_values(v, 2, *log)? {
            text.with_edits(&[Edit::Set(v.key.clone(), x)])?;
        }
    }
    // With no key given and the chain already passing there is nothing to solve: the rows say so without a
    // scan (a scan is run when the user named the keys: its plot shows the margin along the range).
    let scan = !(spec.vary.is_empty() && written_eval.pass);
    let rows: Vec<NeedRow> = pool.install(|| {
        keys.par_iter()
            .map(|(v, log, source)| {
                solve_key(
                    text,
                    &goal,
                    v,
                    *log,
                    source,
                    spec,
                    &written_eval,
                    higher_is_better,
                    threshold,
                    scan,
                    bar,
                )
            })
            .collect::<Result<Vec<_>>>()
    })?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let head = rows
        .iter()
        .filter(|r| r.found && r.direction != "already passes")
        .filter_map(|r| {
            let w = r.written?;
            let v = r.value?;
            Some((
                r,
                distance(v, w, w > 0.0 && v > 0.0)
                    / if w > 0.0 && v > 0.0 {
                        1.0
                    } else {
                        w.abs().max(1e-300)
                    },
            ))
        })
        .min_by(|a, b| a.1.total_cmp(&b.1));
    if written_eval.pass {
        notes.push("the chain as written already meets the requirement".into());
    }
    Ok(NeedReport {
        scenario: base.name.clone(),
        path,
        requirement: goal.describe(),
        metric,
        metric_unit,
        threshold,
        higher_is_better,
        tolerance: spec.tolerance,
        written: written_eval,
        need: Need {
            key: head.map(|h| h.0.key.clone()),
            value: head.and_then(|h| h.0.value),
            rows,
        },
        notes,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An 8-bit SAR on a 20 kHz bit clock: one conversion takes 9 cycles, 450 us, so the scenario takes a
    /// sample rate of at most 20 kHz / 9 = 2.222 kHz (the reader's own rule, src/stages/sar_adc.rs).
    const SAR: &str = r#"
name = "t"
description = ""
[simulation]
analog_rate = "100 kHz"
duration = "100 ms"
settle = "10 ms"
[source]
waveform = "sine"
frequency = "5 Hz"
amplitude = "1 V"
offset = "1.65 V"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "3.3 V"]
clock = "20 kHz"
sample_rate = "1 kHz"
input = "live"
[[stage]]
kind = "dac"
range = ["0 V", "3.3 V"]
"#;

    fn text(s: &str) -> ScenarioText {
        ScenarioText::new(s.to_string(), "test".into(), ".".into()).unwrap()
    }

    #[test]
    fn a_range_end_the_scenario_refuses_is_drawn_in_to_the_last_value_it_takes() {
        let t = text(SAR);
        let key = "stage.1.sample_rate";
        let max = 20e3 / 9.0;
        for log in [true, false] {
            let edge = edge_of_allowed(&t, key, 1e3, 30e3, log).unwrap();
            assert!(
                edge <= max && edge > max * (1.0 - 1e-3),
                "log {log}: {edge}"
            );
            assert!(t.with_edits(&[Edit::Set(key.into(), edge)]).is_ok());
        }
        // An end it takes is kept.
        assert_eq!(edge_of_allowed(&t, key, 1e3, 2e3, true), None);
        // Whole-number keys end on a whole number, the last one taken: at 1 kHz the clock gives 20 cycles a
        // sample, so at most 19 bits (bits + 1 cycles per conversion, src/stages/sar_adc.rs).
        let edge = edge_of_allowed(&t, "stage.1.bits", 8.0, 400.0, false).unwrap();
        assert_eq!(edge, 19.0);
        assert!(
            t.with_edits(&[Edit::Set("stage.1.bits".into(), edge)])
                .is_ok()
        );
        assert!(
            t.with_edits(&[Edit::Set("stage.1.bits".into(), edge + 1.0)])
                .is_err()
        );
    }

    #[test]
    fn values_print_through_the_si_formatter() {
        assert_eq!(show_value("stage.2.sample_rate", 2221.1), "2.2211 kHz");
        assert_eq!(show_value("stage.4.cutoff", 20_780.0), "20.78 kHz");
        assert_eq!(show_value("stage.1.aperture_jitter", 7.96e-9), "7.96 ns");
        assert_eq!(show_value("stage.5.slew_rate", 15.657_49e6), "15.657 V/us");
        assert_eq!(show_value("stage.2.quantizer_bits", 2.0), "2");
        assert_eq!(show_value("stage.4.tolerance", 0.006_068), "0.6068 %");
        assert_eq!(show_value("stage.3.bit_error_rate", 1e-5), "0.00001");
        assert_eq!(
            show_range("stage.2.sample_rate", 1600.0, 73_431.329_987),
            "1.6 kHz..73.431 kHz"
        );
    }
}
