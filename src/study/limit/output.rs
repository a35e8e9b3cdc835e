//! What the limit finder writes: the terminal table, `limit.json` and the plot of the coarse sweep.

use std::path::Path;

use crate::report::Producer;

use super::*;

fn opt(v: Option<f64>, unit: &str) -> String {
    v.map_or("-".into(), |x| format_si(x, unit))
}

/// A readable table of the limits.
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
    let _ = writeln!(
        s,
        "  {:<10} {:>12}  {:<28} note",
        "criterion", "frequency", "mechanism"
    );
    for c in &r.limit.criteria {
        let mech = match (&c.mechanism, &c.mechanism_stage) {
            (Some(m), Some(st)) if !st.is_empty() => format!("{m} ({st})"),
            (Some(m), _) => m.clone(),
            _ => "-".into(),
        };
        let _ = writeln!(
            s,
            "  {:<10} {:>12}  {:<28} {}",
            c.criterion.name(),
            opt(c.frequency_hz, "Hz"),
            mech,
            c.note
        );
    }
    match (r.limit.frequency_hz, r.limit.criterion) {
        (Some(f), Some(c)) => {
            let _ = writeln!(
                s,
                "limit: {} ({}{})",
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
            let _ = writeln!(s, "limit: not reached below {}", format_si(r.to_hz, "Hz"));
        }
    }
    for n in &r.notes {
        let _ = writeln!(s, "note: {n}");
    }
    s
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
        let ok: Vec<&LimitPoint> = r.coarse.iter().filter(|p| p.error.is_none()).collect();
        let col = |f: fn(&LimitPoint) -> Option<f64>| -> (Vec<f64>, Vec<f64>) {
            ok.iter()
                .filter_map(|p| f(p).map(|y| (p.frequency_hz, y)))
                .unzip()
        };
        let enob = col(|p| p.enob_bits);
        let gain = col(|p| p.gain_db);
        let fid = col(|p| p.fidelity_db);
        let enob_name = format!("ENOB of the {} (bits)", r.enob_source);
        let markers: Vec<(f64, String)> = r
            .limit
            .criteria
            .iter()
            .filter_map(|c| c.frequency_hz.map(|f| (f, c.criterion.name().to_string())))
            .filter(|(f, _)| *f >= r.from_hz * 0.5 && *f <= r.to_hz * 2.0)
            .collect();
        let p = Plot::Xy(XyPlot {
            title: format!("{}: ENOB, gain and fidelity against frequency", r.scenario),
            x_label: "input frequency (Hz)".into(),
            y_label: "bits / dB".into(),
            series: vec![
                (enob_name.as_str(), &enob.0, &enob.1),
                ("gain (dB)", &gain.0, &gain.1),
                ("fidelity (dB)", &fid.0, &fid.1),
            ],
            log_x: true,
            markers,
        });
        let (png, _) = plot::render_png(&p, 1000, 620)?;
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
