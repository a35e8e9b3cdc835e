//! What `need` writes: the terminal table, `need.json` and a plot per key (`need-N.png`, `.svg`).

use std::path::Path;

use crate::error::{Error, Result};
use crate::report::plot::{self, Plot, XyPlot};
use crate::report::{OutputDir, Producer};
use crate::study::sweep::key_dimension;

use super::{NeedReport, NeedRow};

use super::show_value as show;

fn factor(r: &NeedRow) -> String {
    match (r.written, r.value) {
        (Some(w), Some(v)) if w != 0.0 && r.direction != "already passes" => {
            format!("x{:.3}", v / w)
        }
        _ => "-".into(),
    }
}

/// The table: one row per key (key, written, needed, factor, the metric at that value).
pub fn table(r: &NeedReport) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{}{}: need {} ({} {} {} {})",
        r.scenario,
        r.path
            .as_ref()
            .map(|p| format!(" (path \"{p}\")"))
            .unwrap_or_default(),
        r.requirement,
        r.metric,
        if r.higher_is_better { ">=" } else { "<" },
        r.threshold,
        r.metric_unit
    );
    let _ = writeln!(
        s,
        "  as written: {} {}",
        if r.written.pass { "passes" } else { "fails" },
        r.written.metric.map_or("-".into(), |m| format!(
            "({} {:.3} {})",
            r.metric, m, r.metric_unit
        ))
    );
    let head = [
        "key".to_string(),
        "written".into(),
        "needed".into(),
        "factor".into(),
        format!("{} ({})", r.metric, r.metric_unit),
        "answer".into(),
    ];
    let rows: Vec<[String; 6]> = r
        .need
        .rows
        .iter()
        .map(|row| {
            let answer = match row.direction.as_str() {
                "rise" => "must rise".to_string(),
                "fall" => "must fall".to_string(),
                "already passes" => format!(
                    "already passes (margin {})",
                    row.margin
                        .map_or("-".into(), |m| format!("{m:.3} {}", r.metric_unit))
                ),
                _ => "no value in range passes".to_string(),
            };
            let answer = if row.note.is_empty() {
                answer
            } else {
                format!("{answer}; {}", row.note)
            };
            let key = match row.source.strip_prefix("--vary ") {
                Some(given) => format!("{} ({given})", row.key),
                None => row.key.clone(),
            };
            [
                key,
                row.written
                    .map_or("(default)".into(), |w| show(&row.key, w)),
                row.value.map_or("-".into(), |v| show(&row.key, v)),
                factor(row),
                row.metric_at_value
                    .map_or("-".into(), |m| format!("{m:.3}")),
                answer,
            ]
        })
        .collect();
    let w: Vec<usize> = (0..5)
        .map(|k| {
            rows.iter()
                .map(|r| r[k].chars().count())
                .chain([head[k].chars().count()])
                .max()
                .unwrap_or(0)
        })
        .collect();
    let line = |s: &mut String, c: &[String; 6]| {
        let _ = writeln!(
            s,
            "  {:<w0$}  {:>w1$}  {:>w2$}  {:>w3$}  {:>w4$}  {}",
            c[0],
            c[1],
            c[2],
            c[3],
            c[4],
            c[5],
            w0 = w[0],
            w1 = w[1],
            w2 = w[2],
            w3 = w[3],
            w4 = w[4]
        );
    };
    line(&mut s, &head);
    for row in &rows {
        line(&mut s, row);
    }
    match (&r.need.key, r.need.value) {
        (Some(k), Some(v)) => {
            let _ = writeln!(
                s,
                "  smallest change: {k} = {} (any one row suffices)",
                show(k, v)
            );
        }
        _ if r.written.pass => {
            let _ = writeln!(s, "  the chain as written already meets the requirement");
        }
        _ => {
            let _ = writeln!(s, "  no key in its range meets the requirement");
        }
    }
    for n in &r.notes {
        let _ = writeln!(s, "  note: {n}");
    }
    s
}

/// The folder's owner: a `need` study of `scenario` with its definition.
pub fn folder_producer(scenario: &str, definition: serde_json::Value, force: bool) -> Producer {
    let describe = format!("a need study of \"{}\"", crate::text::clip(scenario));
    Producer::study("need", definition, describe, force)
}

/// The plot of one key: the metric against the key, the threshold and the answer.
fn key_plot<'a>(
    r: &'a NeedReport,
    row: &NeedRow,
    xs: &'a [f64],
    ys: &'a [f64],
    thr: &'a [f64; 2],
    tx: &'a [f64; 2],
    log: bool,
) -> Plot<'a> {
    let unit = match key_dimension(&row.key) {
        Some(crate::format::units::Dimension::Frequency) => " (Hz)",
        Some(crate::format::units::Dimension::Time) => " (s)",
        Some(crate::format::units::Dimension::Voltage) => " (V)",
        Some(crate::format::units::Dimension::SlewRate) => " (V/s)",
        _ => "",
    };
    let mut markers = Vec::new();
    if let Some(v) = row.value.filter(|_| row.direction != "already passes") {
        markers.push((v, format!("needed {}", show(&row.key, v))));
    }
    if let Some(w) = row.written {
        markers.push((w, "written".to_string()));
    }
    let _ = thr;
    Plot::Xy(XyPlot {
        title: format!("{}: {} ({})", r.scenario, row.key, r.requirement),
        x_label: format!("{}{unit}", row.key),
        y_label: format!("{} ({})", r.metric, r.metric_unit),
        series: vec![(r.metric.as_str(), xs, ys), ("threshold", tx, thr)],
        log_x: log,
        markers,
    })
}

/// Write `need.json` and the plots atomically into `dir`.
pub fn write_need(r: &NeedReport, dir: &Path, producer: &Producer) -> Result<()> {
    let out = OutputDir::create(dir, producer)?;
    let res = (|| -> Result<()> {
        let json = serde_json::to_vec_pretty(r).map_err(|e| Error::Run(e.to_string()))?;
        out.write("need.json", &json)?;
        for (i, row) in r.need.rows.iter().enumerate() {
            let pts: Vec<(f64, f64)> = row
                .runs
                .iter()
                .filter_map(|e| e.metric.map(|m| (e.value, m)))
                .collect();
            if pts.len() < 2 {
                continue;
            }
            let xs: Vec<f64> = pts.iter().map(|p| p.0).collect();
            let ys: Vec<f64> = pts.iter().map(|p| p.1).collect();
            let log = row.from > 0.0 && row.to / row.from > 20.0;
            let tx = [row.from, row.to];
            let thr = [r.threshold, r.threshold];
            let p = key_plot(r, row, &xs, &ys, &thr, &tx, log);
            let (png, _) = plot::render_png(&p, 900, 600)?;
            out.write(&format!("need-{}.png", i + 1), &png)?;
            let (svg, _) = plot::render_svg(&p)?;
            out.write(&format!("need-{}.svg", i + 1), svg.as_bytes())?;
        }
        Ok(())
    })();
    if let Err(e) = res {
        out.abandon();
        return Err(e);
    }
    out.finish()?;
    Ok(())
}
