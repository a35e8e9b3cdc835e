//! The search over one key: the coarse scan (or the outward scan from the written value), then the bisection of
//! the pass boundary closest to the written value (see the method in [`super`]).

use rayon::prelude::*;

use super::{Eval, Goal, NeedRow, NeedSpec, show_range, show_value};
use crate::error::Result;
use crate::scenario::overrides::{Edit, ScenarioText, is_integer_key};
use crate::study::sweep::{Vary, axis_values};

/// Points of a candidate's outward scan run together (fixed, so the points run do not depend on the threads).
const OUTWARD_BATCH: usize = 4;

/// Distance between two values of a key (log ratio with `log` and positive values).
pub(super) fn distance(a: f64, b: f64, log: bool) -> f64 {
    if log && a > 0.0 && b > 0.0 {
        (a / b).ln().abs()
    } else {
        (a - b).abs()
    }
}

#[allow(clippy::too_many_arguments)]
pub(super) fn solve_key(
    text: &ScenarioText,
    goal: &Goal,
    v: &Vary,
    log: bool,
    source: &str,
    spec: &NeedSpec,
    written_eval: &Eval,
    higher_is_better: bool,
    threshold: f64,
    scan: bool,
    bar: Option<&indicatif::ProgressBar>,
) -> Result<NeedRow> {
    let last = v.key.rsplit('.').next().unwrap_or(&v.key);
    let integer = is_integer_key(last);
    let mut grid = axis_values(v, spec.points.max(3), log)?;
    grid.sort_by(f64::total_cmp);
    grid.dedup();
    if !scan {
        grid.clear();
    }
    let written = text.get(&v.key);
    // The diagnosis's candidates (no --vary) are scanned outward from the written value, a fixed batch of
    // points at a time (the same points at any thread count), stopping after the batch that holds the first
    // passing value: the answer is the passing value closest to the written one, and the far ends of a
    // candidate's wide range (a sample rate thirty times the written one) cost the most to run. Keys the user
    // names are scanned whole, for every passing range.
    let outward = spec.vary.is_empty() && !grid.is_empty();
    if let Some(b) = bar
        && !outward
    {
        b.inc_length(grid.len() as u64);
    }
    let eval = |x: f64| {
        let e = goal.eval(text, x, &[Edit::Set(v.key.clone(), x)]);
        if let Some(b) = bar {
            b.inc(1);
        }
        e
    };
    let mut stopped = false;
    let mut runs: Vec<Eval> = if outward {
        let centre = written.unwrap_or(grid[0]);
        let mut order = grid.clone();
        order.sort_by(|a, b| {
            distance(*a, centre, log)
                .total_cmp(&distance(*b, centre, log))
                .then(a.total_cmp(b))
        });
        let mut done: Vec<Eval> = Vec::new();
        for batch in order.chunks(OUTWARD_BATCH) {
            if let Some(b) = bar {
                b.inc_length(batch.len() as u64);
            }
            let got: Vec<Eval> = batch.par_iter().map(|&x| eval(x)).collect();
            let passed = got.iter().any(|e| e.pass);
            done.extend(got);
            if passed {
                stopped = done.len() < grid.len();
                break;
            }
        }
        done.sort_by(|a, b| a.value.total_cmp(&b.value));
        done
    } else {
        grid.par_iter().map(|&x| eval(x)).collect()
    };
    let (lowest, highest) = (
        runs.first().map_or(f64::NAN, |e| e.value),
        runs.last().map_or(f64::NAN, |e| e.value),
    );
    // Passing ranges of the scan.
    let mut ranges: Vec<[f64; 2]> = Vec::new();
    let mut open: Option<f64> = None;
    for (i, e) in runs.iter().enumerate() {
        match (e.pass, open) {
            (true, None) => open = Some(e.value),
            (false, Some(lo)) => {
                ranges.push([lo, runs[i - 1].value]);
                open = None;
            }
            _ => {}
        }
    }
    if let Some(lo) = open {
        ranges.push([lo, runs.last().map_or(lo, |e| e.value)]);
    }
    let monotone = ranges.len() <= 1
        && ranges
            .first()
            .is_none_or(|r| r[0] == lowest || r[1] == highest);
    let margin = |e: &Eval| {
        e.metric.map(|m| {
            if higher_is_better {
                m - threshold
            } else {
                threshold - m
            }
        })
    };
    let mut row = NeedRow {
        key: v.key.clone(),
        source: source.to_string(),
        written,
        from: v.from.min(v.to),
        to: v.from.max(v.to),
        value: None,
        found: false,
        direction: "none".into(),
        ranges: ranges.clone(),
        metric_at_value: None,
        margin: None,
        monotone,
        note: String::new(),
        runs: Vec::new(),
    };
    let ranges_text = || {
        ranges
            .iter()
            .map(|r| show_range(&v.key, r[0], r[1]))
            .collect::<Vec<_>>()
            .join(", ")
    };
    if !monotone {
        row.note = format!("not monotone: passes in {}", ranges_text());
    }
    if stopped {
        let scanned = format!(
            "scanned outward from the written value over {} (stopped at the first passing value; --vary \
             {}=FROM..TO scans a whole range)",
            show_range(&v.key, lowest, highest),
            v.key
        );
        row.note = [row.note.clone(), scanned]
            .into_iter()
            .filter(|s| !s.is_empty())
            .collect::<Vec<_>>()
            .join("; ");
    }
    if written_eval.pass {
        row.value = written;
        row.found = true;
        row.direction = "already passes".into();
        row.metric_at_value = written_eval.metric;
        row.margin = margin(written_eval);
        row.runs = runs;
        return Ok(row);
    }
    if ranges.is_empty() {
        row.note = format!(
            "no value in {} passes{}",
            show_range(&v.key, row.from, row.to),
            {
                let failed: Vec<&Eval> = runs.iter().filter(|e| e.error.is_some()).collect();
                match failed.first() {
                    Some(first) => format!(
                        " ({} of {} runs could not be judged, the first at {}: {})",
                        failed.len(),
                        runs.len(),
                        show_value(&v.key, first.value),
                        first.error.as_deref().unwrap_or_default()
                    ),
                    None => String::new(),
                }
            }
        );
        row.runs = runs;
        return Ok(row);
    }
    // The reference: the written value, or the low end when the key is not written.
    let reference = written.unwrap_or(grid[0]);
    let (pi, _) = runs
        .iter()
        .enumerate()
        .filter(|(_, e)| e.pass)
        .map(|(i, e)| (i, distance(e.value, reference, log)))
        .min_by(|a, b| a.1.total_cmp(&b.1))
        .expect("a passing point");
    let p0 = runs[pi].value;
    // The failing end of the bracket: the neighbour towards the reference, or the reference itself (it fails)
    // when it lies nearer.
    let toward_low = reference < p0;
    let neighbour = if toward_low {
        pi.checked_sub(1).map(|j| runs[j].value)
    } else {
        runs.get(pi + 1).map(|e| e.value)
    };
    let q0 = match (neighbour, written) {
        (Some(n), Some(w)) => {
            if (toward_low && w > n) || (!toward_low && w < n) {
                Some(w)
            } else {
                Some(n)
            }
        }
        (Some(n), None) => Some(n),
        (None, Some(w)) if w != p0 => Some(w),
        _ => None,
    };
    let (mut p, mut q) = (p0, q0);
    let mut best = runs[pi].clone();
    // The failing end's run (a scan point, or the chain as written).
    let mut failing: Option<Eval> = q0.and_then(|qv| {
        runs.iter()
            .find(|e| e.value == qv)
            .cloned()
            .or_else(|| (Some(qv) == written).then(|| written_eval.clone()))
    });
    // The metric's slope over the first bracket (per unit of `distance`): what a smooth response changes by.
    let slope = match (&failing, best.metric) {
        (Some(f), Some(mp)) => f
            .metric
            .map(|mq| (mp - mq).abs() / distance(p0, f.value, log).max(f64::MIN_POSITIVE)),
        _ => None,
    };
    if let Some(mut qv) = q {
        loop {
            let done = if integer {
                (p - qv).abs() <= 1.0
            } else {
                (p - qv).abs() <= spec.tolerance * p.abs()
            };
            if done {
                break;
            }
            let mut m = if log && p > 0.0 && qv > 0.0 {
                (p * qv).sqrt()
            } else {
                0.5 * (p + qv)
            };
            if integer {
                m = m.round();
                if m == p || m == qv {
                    break;
                }
            }
            if let Some(b) = bar {
                b.inc_length(1);
            }
            let e = eval(m);
            let pass = e.pass;
            runs.push(e.clone());
            if pass {
                p = m;
                best = e;
            } else {
                qv = m;
                failing = Some(e);
            }
        }
        q = Some(qv);
        // A smooth response changes across the final bracket by about the first bracket's slope times its
        // width; a change ten times that is a step the scan could not see (for example the products of a
        // distortion landing on or off the tone as a rate moves): the answer holds at this value but may not
        // hold beyond it.
        if let (Some(f), Some(mp), Some(slope)) = (&failing, best.metric, slope)
            && !integer
            && let Some(mq) = f.metric
        {
            let jump = (mp - mq).abs();
            let expected = slope * distance(p, qv, log);
            if jump > 10.0 * expected {
                let step = format!(
                    "the metric steps from {mq:.3} to {mp:.3} {} between {} and {}, far more than its trend \
                     (the response is not smooth here; values beyond the answer may fail: check the plot)",
                    goal.metric().1,
                    show_value(&v.key, qv),
                    show_value(&v.key, p)
                );
                row.note = [row.note.clone(), step]
                    .into_iter()
                    .filter(|s| !s.is_empty())
                    .collect::<Vec<_>>()
                    .join("; ");
                row.monotone = false;
            }
        }
    } else {
        row.note = [
            row.note.clone(),
            "the answer is at the end of the range scanned; widen FROM..TO to refine it".into(),
        ]
        .into_iter()
        .filter(|s| !s.is_empty())
        .collect::<Vec<_>>()
        .join("; ");
    }
    let _ = q;
    runs.sort_by(|a, b| a.value.total_cmp(&b.value));
    row.value = Some(p);
    row.found = true;
    row.metric_at_value = best.metric;
    row.margin = margin(&best);
    row.direction = if p > reference { "rise" } else { "fall" }.into();
    row.runs = runs;
    Ok(row)
}
