//! What the limit finder writes: the terminal table, `limit.json` and the plot of the coarse sweep.

use std::path::Path;

use crate::report::Producer;

use super::*;

fn opt(v: Option<f64>, unit: &str) -> String {
    v.map_or("-".into(), |x| format_si(x, unit))
}

/// A readable table of the limits: the reference values at the low end, one row per criterion, and for each
/// criterion with a diagnosis what each ablation wins back, ties named.
pub fn table(r: &LimitReport) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{}: limits from {} to {} (ENOB of the {}; drop {} bit, gain drop {} dB, fidelity under {} dB)",
        r.scenario,
        format_si(r.from_hz, "Hz"),
        format_si(r.to_hz, "Hz"),
        r.enob_source,
        r.enob_drop_bits,
        r.gain_drop_db,
        r.fidelity_min_db
    );
    if let Some(p) = r.coarse.first() {
        let _ = writeln!(
            s,
            "  reference at {}: ENOB {}, gain {}, fidelity {}",
            format_si(p.frequency_hz, "Hz"),
            fixed(p.enob_bits, "bits"),
            fixed(p.gain_db, "dB"),
            fixed(p.fidelity_db, "dB")
        );
    }
    let mech = |c: &CriterionResult| match (&c.mechanism, &c.mechanism_stage) {
        (Some(m), Some(st)) if !st.is_empty() => format!("{m} ({st})"),
        (Some(m), _) => m.clone(),
        _ => "-".into(),
    };
    let unit = |c: Criterion| match c {
        Criterion::Accuracy => "bits",
        _ => "dB",
    };
    let rows: Vec<[String; 5]> = r
        .limit
        .criteria
        .iter()
        .map(|c| {
            [
                c.criterion.name().to_string(),
                opt(c.frequency_hz, "Hz"),
                fixed(c.value, unit(c.criterion)),
                fixed(c.threshold, unit(c.criterion)),
                mech(c),
            ]
        })
        .collect();
    let head = ["criterion", "frequency", "value", "threshold", "mechanism"];
    let width = |k: usize| {
        rows.iter()
            .map(|r| r[k].chars().count())
            .chain([head[k].len()])
            .max()
            .unwrap_or(0)
    };
    let w: Vec<usize> = (0..5).map(width).collect();
    let line = |s: &mut String, c: [&str; 5], note: &str| {
        let _ = writeln!(
            s,
            "  {:<w0$}  {:>w1$}  {:>w2$}  {:>w3$}  {:<w4$}  {note}",
            c[0],
            c[1],
            c[2],
            c[3],
            c[4],
            w0 = w[0],
            w1 = w[1],
            w2 = w[2],
            w3 = w[3],
            w4 = w[4]
        );
    };
    line(&mut s, head, "note");
    for (c, row) in r.limit.criteria.iter().zip(&rows) {
        line(
            &mut s,
            [&row[0], &row[1], &row[2], &row[3], &row[4]],
            &c.note,
        );
    }
    for c in &r.limit.criteria {
        if c.ablation.is_empty() {
            continue;
        }
        let _ = writeln!(
            s,
            "\n  {} at {}: what each change wins back ({})",
            c.criterion.name(),
            opt(c.frequency_hz, "Hz"),
            unit(c.criterion)
        );
        let wc = c
            .ablation
            .iter()
            .map(|a| a.change.chars().count())
            .max()
            .unwrap_or(0);
        for a in &c.ablation {
            let mark = if c.mechanism.as_deref() == Some(a.mechanism.as_str()) {
                "chosen"
            } else if c.ties.contains(&a.mechanism) {
                "tie: cannot be told apart from the chosen one"
            } else {
                ""
            };
            let won = match (&a.error, a.recovery) {
                (Some(_), _) => "failed".to_string(),
                (None, Some(x)) => format!("{x:+.2}"),
                (None, None) => "-".into(),
            };
            let _ = writeln!(s, "    {:<wc$}  {:>7}  {mark}", a.change, won);
        }
    }
    match (r.limit.frequency_hz, r.limit.criterion) {
        (Some(f), Some(c)) => {
            let _ = writeln!(
                s,
                "\nlimit: {} ({}{})",
                format_si(f, "Hz"),
                c.name(),
                r.limit
                    .mechanism
                    .as_ref()
                    .map(|m| format!(", {m}"))
                    .unwrap_or_default()
            );
        }
        _ => {
            let _ = writeln!(s, "\nlimit: not reached below {}", format_si(r.to_hz, "Hz"));
        }
    }
    for n in &r.notes {
        let _ = writeln!(s, "note: {n}");
    }
    s
}

/// A value with two decimals and its unit, or "-".
fn fixed(v: Option<f64>, unit: &str) -> String {
    v.map_or("-".into(), |x| format!("{x:.2} {unit}"))
}

/// Who writes the limit search of the scenario named `scenario` with `opts` into a folder: a study whose
/// definition is the options as given (FROM and TO as given or defaulted, the criteria), known before the
/// search runs so a folder holding another study is refused at once.
pub fn folder_producer(scenario: &str, opts: &LimitOptions, force: bool) -> Producer {
    let hz = |f: Option<f64>| f.map_or_else(|| "default".to_string(), |f| format_si(f, "Hz"));
    let definition = serde_json::json!({
        "scenario": scenario,
        "from_hz": opts.from_hz,
        "to_hz": opts.to_hz,
        "enob_drop_bits": opts.enob_drop_bits,
        "gain_drop_db": opts.gain_drop_db,
        "fidelity_min_db": opts.fidelity_min_db,
    });
    let describe = format!(
        "a limit search of \"{}\" (--from {}, --to {})",
        crate::text::clip(scenario),
        hz(opts.from_hz),
        hz(opts.to_hz)
    );
    Producer::study("limit", definition, describe, force)
}

/// Write `limit.json` and the plot of the coarse sweep (`limit.png`, `limit.svg`) atomically into `dir` for
/// `producer` ([`folder_producer`]).
pub fn write_limit(r: &LimitReport, dir: &Path, producer: &Producer) -> Result<()> {
    let out = OutputDir::create(dir, producer)?;
    let res = (|| -> Result<()> {
        let json = serde_json::to_vec_pretty(r).map_err(|e| Error::Run(e.to_string()))?;
        out.write("limit.json", &json)?;
        let cols = LimitColumns::of(r);
        let p = Plot::Panels(limit_panels(r, &cols));
        let (png, _) = plot::render_png(&p, 1000, 900)?;
        out.write("limit.png", &png)?;
        let (svg, _) = plot::render_svg(&p)?;
        out.write("limit.svg", svg.as_bytes())?;
        Ok(())
    })();
    if let Err(e) = res {
        out.abandon();
        return Err(e);
    }
    out.finish()?;
    Ok(())
}

/// The coarse sweep's metrics as columns (frequency used, value), one per criterion with a metric.
struct LimitColumns {
    enob: (Vec<f64>, Vec<f64>),
    gain: (Vec<f64>, Vec<f64>),
    fidelity: (Vec<f64>, Vec<f64>),
}

impl LimitColumns {
    fn of(r: &LimitReport) -> LimitColumns {
        let col = |f: fn(&LimitPoint) -> Option<f64>| -> (Vec<f64>, Vec<f64>) {
            r.coarse
                .iter()
                .filter(|p| p.error.is_none())
                .filter_map(|p| f(p).map(|y| (p.frequency_hz, y)))
                .unzip()
        };
        LimitColumns {
            enob: col(|p| p.enob_bits),
            gain: col(|p| p.gain_db),
            fidelity: col(|p| p.fidelity_db),
        }
    }
}

/// `limit.png`: one panel per criterion with a metric (its threshold dashed, where it is met marked), the
/// limit across all of them, and the ablation at the limit in a table below.
fn limit_panels<'a>(r: &LimitReport, cols: &'a LimitColumns) -> plot::PanelsPlot<'a> {
    let mut panels = Vec::new();
    for c in &r.limit.criteria {
        let (what, unit, (x, y)) = match c.criterion {
            Criterion::Accuracy => (format!("ENOB of the {}", r.enob_source), "bits", &cols.enob),
            Criterion::Level => ("gain".to_string(), "dB", &cols.gain),
            Criterion::Shape => ("waveform fidelity".to_string(), "dB", &cols.fidelity),
            Criterion::Aliasing => continue,
        };
        let threshold = c
            .threshold
            .map_or(String::new(), |t| format!(", threshold {t:.2} {unit}"));
        let met = match c.frequency_hz {
            Some(f) => format!("met at {}", format_si(f, "Hz")),
            None => format!("not reached below {}", format_si(r.to_hz, "Hz")),
        };
        panels.push(plot::Panel {
            heading: format!("{}: {what}{threshold}; {met}", c.criterion.name()),
            y_label: format!("{what} ({unit})"),
            x,
            y,
            threshold: c.threshold,
            met_at: c.frequency_hz,
        });
    }
    let limiting = r
        .limit
        .criteria
        .iter()
        .find(|c| Some(c.criterion) == r.limit.criterion && !c.ablation.is_empty());
    let mut table = Vec::new();
    let mut table_title = String::new();
    if let Some(c) = limiting {
        let unit = if c.criterion == Criterion::Accuracy {
            "bits"
        } else {
            "dB"
        };
        table_title = format!(
            "At the limit ({}, {}): each non-ideality removed in turn, and what it wins back",
            c.criterion.name(),
            c.frequency_hz.map_or("-".into(), |f| format_si(f, "Hz"))
        );
        // Two decimals; a value that rounds to zero is written without a sign ("0.00", not "-0.00").
        let two = |x: f64, signed: bool| {
            let t = if signed {
                format!("{x:+.2}")
            } else {
                format!("{x:.2}")
            };
            if t.trim_start_matches(['+', '-']) == "0.00" {
                "0.00".to_string()
            } else {
                t
            }
        };
        let num = |v: Option<f64>| v.map_or("-".to_string(), |x| two(x, false));
        table.push(vec![
            "change".to_string(),
            "ENOB (bits)".to_string(),
            "gain (dB)".to_string(),
            "fidelity (dB)".to_string(),
            format!("wins back ({unit})"),
        ]);
        for a in &c.ablation {
            if a.error.is_some() {
                table.push(vec![
                    a.change.clone(),
                    "failed".into(),
                    "-".into(),
                    "-".into(),
                    "-".into(),
                ]);
                continue;
            }
            table.push(vec![
                a.change.clone(),
                num(a.enob_bits),
                num(a.gain_db),
                num(a.fidelity_db),
                a.recovery.map_or("-".to_string(), |x| two(x, true)),
            ]);
        }
    }
    let mut headline = match (r.limit.frequency_hz, r.limit.criterion) {
        (Some(f), Some(c)) => format!("limit {} ({})", format_si(f, "Hz"), c.name()),
        _ => format!("no limit below {}", format_si(r.to_hz, "Hz")),
    };
    // The aliasing criterion has no metric to draw: its frequency is said in the title.
    if let Some(f) = r
        .limit
        .criteria
        .iter()
        .find(|c| c.criterion == Criterion::Aliasing)
        .and_then(|c| c.frequency_hz)
    {
        headline.push_str(&format!("; aliasing from {}", format_si(f, "Hz")));
    }
    plot::PanelsPlot {
        title: format!("{}: {headline}", r.scenario),
        x_label: "input frequency (Hz)".into(),
        log_x: true,
        panels,
        limit: r.limit.frequency_hz,
        table_title,
        table,
    }
}
