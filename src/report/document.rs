//! report.md (plots beside a summary table) and report.html (self-contained: inline SVG, inline style, no
//! scripts, no network).

use std::fmt::Write;

use crate::engine::pipeline::si;
use crate::report::figures::Figure;
use crate::report::json::Report;

fn opt(v: Option<f64>, unit: &str) -> String {
    v.map(|x| format!("{x:.2} {unit}"))
        .unwrap_or_else(|| "–".into())
}

/// Rows of the metrics table: (name, ADC codes, analog output).
fn metric_rows(r: &Report) -> Vec<(&'static str, String, String)> {
    let a = r.adc.as_ref().map(|a| &a.metrics);
    let o = &r.output;
    vec![
        (
            "SNR",
            opt(a.and_then(|a| a.snr_db), "dB"),
            opt(o.snr_db, "dB"),
        ),
        (
            "SINAD",
            opt(a.and_then(|a| a.sinad_db), "dB"),
            opt(o.sinad_db, "dB"),
        ),
        (
            "ENOB (SINAD)",
            opt(a.and_then(|a| a.enob_bits), "bits"),
            opt(o.enob_bits, "bits"),
        ),
        (
            "ENOB (sine fit)",
            opt(a.and_then(|a| a.enob_sinefit_bits), "bits"),
            "".into(),
        ),
        (
            "THD",
            opt(a.and_then(|a| a.thd_db), "dB"),
            opt(o.thd_db, "dB"),
        ),
        (
            "SFDR",
            opt(a.and_then(|a| a.sfdr_dbc), "dBc"),
            opt(o.sfdr_dbc, "dBc"),
        ),
        ("gain", "".into(), opt(o.gain_db, "dB")),
        ("fidelity", "".into(), format!("{:.2} dB", o.fidelity_db)),
    ]
}

/// The label of hop `i`'s line under the budget's total (its subtotal is the value).
pub(crate) fn hop_line(i: usize, h: &crate::engine::pipeline::HopSummary) -> String {
    let mut counts = format!("{} codes clipped", h.codes_clipped);
    if let Some(n) = h.slips {
        counts += &format!(", {n} slip{}", if n == 1 { "" } else { "s" });
    }
    if h.packets_lost > 0 {
        let s = if h.packets_lost == 1 { "" } else { "s" };
        counts += &format!(", {} packet{s} lost", h.packets_lost);
    }
    format!(
        "hop {}: {} -> {} ({}, {counts}), subtotal",
        i + 1,
        h.adc,
        h.dac,
        si(h.sample_rate_hz, "Hz"),
    )
}

fn latency_rows(r: &Report) -> Vec<(String, String)> {
    let l = &r.latency;
    let mut rows: Vec<(String, String)> = l
        .budget
        .iter()
        .map(|b| (b.stage.clone(), si(b.seconds, "s")))
        .collect();
    rows.push(("total (budget)".into(), si(l.budget_s, "s")));
    for (i, h) in r.hops.iter().flatten().enumerate() {
        rows.push((hop_line(i, h), si(h.budget_s, "s")));
    }
    rows.push(("measured (cross-correlation)".into(), si(l.measured_s, "s")));
    if let Some(p) = l.phase_delay_s {
        rows.push(("phase delay at the fundamental".into(), si(p, "s")));
    }
    rows.push((
        format!(
            "measured - budget{}",
            if l.flagged { " (large)" } else { "" }
        ),
        si(l.difference_s, "s"),
    ));
    if let Some(t) = &l.over_time {
        let over = format!(
            "over the run ({} blocks of {})",
            t.blocks.len(),
            si(t.block_s, "s")
        );
        rows.push((format!("{over}: min"), si(t.min_s, "s")));
        rows.push((format!("{over}: max"), si(t.max_s, "s")));
        rows.push((format!("{over}: final"), si(t.final_s, "s")));
        rows.push((format!("{over}: spread (max - min)"), si(t.spread_s, "s")));
    }
    rows
}

/// The paths of a `[[path]]` scenario as tables (first row the header): each path's latency with its budget
/// and its headline figures, then the delay between every two paths. None for a one-chain scenario.
type Rows = Vec<Vec<String>>;
fn path_tables(r: &Report) -> Option<(Rows, Rows)> {
    let paths = r.paths.as_ref()?;
    let mut each = vec![
        [
            "path",
            "budget",
            "measured",
            "measured - budget",
            "over the run (min .. max)",
            "SINAD",
            "ENOB",
        ]
        .map(String::from)
        .to_vec(),
    ];
    for (name, p) in &paths.0 {
        let l = &p.latency;
        each.push(vec![
            name.clone(),
            si(l.budget_s, "s"),
            si(l.measured_s, "s"),
            si(l.difference_s, "s"),
            l.over_time.as_ref().map_or("-".into(), |t| {
                format!("{} .. {}", si(t.min_s, "s"), si(t.max_s, "s"))
            }),
            opt(p.output.sinad_db, "dB"),
            opt(p.output.enob_bits, "bits"),
        ]);
    }
    let mut between = vec![
        [
            "switching",
            "latency difference",
            "cross-correlated",
            "budget difference",
        ]
        .map(String::from)
        .to_vec(),
    ];
    for d in r.path_delays.iter().flatten() {
        between.push(vec![
            format!("{} -> {}", d.from, d.to),
            si(d.latency_difference_s, "s"),
            si(d.cross_correlated_s, "s"),
            si(d.budget_difference_s, "s"),
        ]);
    }
    Some((each, between))
}

const PATHS_NOTE: &str = "The figures above are the first path's. A listener switching from one path to another hears \
                          the programme move by the delay between them (positive: the second path is later).";

/// What the terminal's summary says beside the metrics ([`crate::report::table::summary`]), as sentences for
/// report.md and report.html: the source moved for coherent sampling, the converter with its clipped codes
/// (an input overdriving the range), the output band, the bits a link flipped, and error.wav's gain when it
/// was lowered.
pub fn run_facts(r: &Report) -> Vec<String> {
    let mut f = Vec::new();
    for note in r.tone_notes() {
        f.push(format!("{}.", capitalise(&note)));
    }
    if let Some(a) = r.adc.as_ref().map(|a| &a.metrics) {
        f.push(format!(
            "ADC: {} bits at {}, conversion {}; {} codes clipped.",
            a.bits,
            si(a.sample_rate_hz, "Hz"),
            si(a.conversion_time_s, "s"),
            a.codes_clipped,
        ));
        if a.codes_clipped > 0 {
            f.push(format!(
                "{} codes clipped: the input overdrives the ADC's range, and the metrics include the clipping.",
                a.codes_clipped
            ));
        }
        if let Some(n) = a.modulator_overloads.filter(|&n| n > 0) {
            f.push(format!(
                "The noise-shaping loop overloaded {n} times: the input exceeds its largest stable level (see max_stable_input_v), and the metrics include the overloads."
            ));
        }
    }
    if let Some(n) = r.output.dac_modulator_overloads.filter(|&n| n > 0) {
        f.push(format!(
            "The DAC's noise-shaping loop overloaded {n} times: its input exceeds the loop's largest stable level, and the output metrics include the overloads."
        ));
    }
    f.push(format!("{}.", capitalise(&r.band_note())));
    if let Some(m) = &r.imd {
        let dbc = |x: Option<f64>| x.map_or("-".into(), |v| format!("{v:.2} dBc"));
        f.push(format!(
            "Two-tone IMD at the output (tones {} and {}, dBc of the tone at {}): IM2 {}, IM3 {}, total {}.",
            si(m.f1_hz, "Hz"),
            si(m.f2_hz, "Hz"),
            si(m.f1_hz, "Hz"),
            dbc(m.im2_dbc),
            dbc(m.im3_dbc),
            dbc(m.total_dbc)
        ));
    }
    if let Some(m) = &r.step {
        let t = |x: Option<f64>| x.map_or("-".into(), |v| si(v, "s"));
        f.push(format!(
            "Step at {} (output {} to {}): rise time (10-90 %) {}, delay to 50 % {}, overshoot {:.2} %, settling \
             time (to {} % of the step) {}.",
            si(m.at_s, "s"),
            si(m.initial_v, "V"),
            si(m.final_v, "V"),
            t(m.rise_time_s),
            t(m.delay_50_s),
            m.overshoot_percent,
            100.0 * m.settling_band,
            m.settling_time_s.map_or("not settled".into(), |v| si(v, "s"))
        ));
    }
    if r.output.bits_flipped > 0 {
        f.push(format!("Link: {} bits flipped.", r.output.bits_flipped));
    }
    if let Some(line) = crate::report::table::slip_line(&r.latency) {
        f.push(format!("C{}.", &line[1..]));
    }
    if r.latency.packets_lost > 0 {
        let line = crate::report::table::packets_lost_line(&r.latency);
        let mut chars = line.chars();
        let cap: String = chars
            .next()
            .map(|c| c.to_uppercase().collect())
            .unwrap_or_default();
        f.push(format!("{cap}{}.", chars.as_str()));
    }
    f
}

/// Markdown report; images are referenced as `<name>.png` beside it.
pub fn markdown(r: &Report, figures: &[Figure]) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "# {}\n", r.scenario.name);
    if !r.scenario.description.is_empty() {
        let _ = writeln!(s, "{}\n", r.scenario.description);
    }
    let _ = writeln!(
        s,
        "Scenario: `{}`, seed {}.\n",
        r.scenario.origin, r.scenario.seed
    );
    for fact in run_facts(r) {
        let _ = writeln!(s, "{fact}\n");
    }
    let _ = writeln!(
        s,
        "## Metrics\n\n| | ADC codes | analog output |\n|---|---:|---:|"
    );
    for (n, a, o) in metric_rows(r) {
        let _ = writeln!(s, "| {n} | {a} | {o} |");
    }
    if let Some(note) = r.audio_note() {
        let _ = writeln!(
            s,
            "\n## Audio figures\n\n{}.\n\n| | ADC codes | analog output |\n|---|---:|---:|",
            capitalise(&note)
        );
        for (n, a, o) in r.audio_rows() {
            let _ = writeln!(s, "| {n} | {a} | {o} |");
        }
    }
    if let Some(c) = &r.compare {
        let _ = writeln!(
            s,
            "\n## Capture beside the simulation\n\n{}.\n\n| | simulated | captured | captured - simulated | |\n|---|---:|---:|---:|---|",
            capitalise(&c.note())
        );
        for [n, a, b, d, v] in c.rows() {
            let _ = writeln!(s, "| {n} | {a} | {b} | {d} | {v} |");
        }
    }
    let _ = writeln!(s, "\n## Latency\n\n| stage | delay |\n|---|---:|");
    for (n, v) in latency_rows(r) {
        let _ = writeln!(s, "| {n} | {v} |");
    }
    if let Some((each, between)) = path_tables(r) {
        let _ = writeln!(s, "\n## Paths\n\n{PATHS_NOTE}\n");
        for t in [each, between].into_iter().filter(|t| t.len() > 1) {
            for (i, row) in t.iter().enumerate() {
                let _ = writeln!(s, "| {} |", row.join(" | "));
                if i == 0 {
                    let _ = writeln!(s, "|---|{}", "---:|".repeat(row.len().saturating_sub(1)));
                }
            }
            let _ = writeln!(s);
        }
    }
    if let Some(l) = &r.listening {
        let _ = writeln!(
            s,
            "\n## Listening\n\n`input.wav`, `output.wav` and `error.wav` at {} Hz; input and output share one scale \
             ({} full scale); the error file is amplified {:.1}x. Play them at low volume first.",
            l.rate_hz,
            si(l.full_scale_v, "V"),
            l.error_gain_used
        );
    }
    let _ = writeln!(s, "\n## Figures\n");
    for f in figures {
        let _ = writeln!(s, "![{}]({}.png)\n\n{}\n", f.caption, f.name, f.caption);
    }
    for w in &r.scenario.warnings {
        let _ = writeln!(s, "> warning: {w}\n");
    }
    s
}

fn esc(t: &str) -> String {
    t.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

/// Self-contained HTML report with the figures inline as SVG.
pub fn html(r: &Report, figures: &[Figure]) -> String {
    let mut s = String::new();
    let _ = write!(
        s,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>{}</title>\n<style>\
body{{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#111;background:#fff}}\
table{{border-collapse:collapse;margin:1em 0}}td,th{{border:1px solid #bbb;padding:.3em .7em}}\
td.n{{text-align:right;font-variant-numeric:tabular-nums}}figure{{margin:2em 0}}svg{{max-width:100%;height:auto}}\
figcaption{{color:#444}}</style></head><body>\n",
        esc(&r.scenario.name)
    );
    let _ = writeln!(s, "<h1>{}</h1>", esc(&r.scenario.name));
    if !r.scenario.description.is_empty() {
        let _ = writeln!(s, "<p>{}</p>", esc(&r.scenario.description));
    }
    let _ = writeln!(
        s,
        "<p>Scenario <code>{}</code>, seed {}.</p>",
        esc(&r.scenario.origin),
        r.scenario.seed
    );
    for fact in run_facts(r) {
        let _ = writeln!(s, "<p>{}</p>", esc(&fact));
    }
    let _ = writeln!(
        s,
        "<h2>Metrics</h2><table><tr><th></th><th>ADC codes</th><th>analog output</th></tr>"
    );
    for (n, a, o) in metric_rows(r) {
        let _ = writeln!(
            s,
            "<tr><td>{n}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>",
            esc(&a),
            esc(&o)
        );
    }
    let _ = writeln!(s, "</table>");
    if let Some(note) = r.audio_note() {
        let _ = writeln!(
            s,
            "<h2>Audio figures</h2><p>{}.</p><table><tr><th></th><th>ADC codes</th><th>analog output</th></tr>",
            esc(&capitalise(&note))
        );
        for (n, a, o) in r.audio_rows() {
            let _ = writeln!(
                s,
                "<tr><td>{n}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>",
                esc(&a),
                esc(&o)
            );
        }
        let _ = writeln!(s, "</table>");
    }
    if let Some(c) = &r.compare {
        let _ = writeln!(
            s,
            "<h2>Capture beside the simulation</h2><p>{}.</p><table><tr><th></th><th>simulated</th>\
             <th>captured</th><th>captured - simulated</th><th></th></tr>",
            esc(&capitalise(&c.note()))
        );
        for [n, a, b, d, v] in c.rows() {
            let _ = writeln!(
                s,
                "<tr><td>{n}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td>{v}</td></tr>",
                esc(&a),
                esc(&b),
                esc(&d)
            );
        }
        let _ = writeln!(s, "</table>");
    }
    let _ = writeln!(
        s,
        "<h2>Latency</h2><table><tr><th>stage</th><th>delay</th></tr>"
    );
    for (n, v) in latency_rows(r) {
        let _ = writeln!(
            s,
            "<tr><td>{}</td><td class=\"n\">{}</td></tr>",
            esc(&n),
            esc(&v)
        );
    }
    let _ = writeln!(s, "</table>");
    if let Some((each, between)) = path_tables(r) {
        let _ = writeln!(s, "<h2>Paths</h2><p>{}</p>", esc(PATHS_NOTE));
        for t in [each, between].into_iter().filter(|t| t.len() > 1) {
            let _ = write!(s, "<table>");
            for (i, row) in t.iter().enumerate() {
                let _ = write!(s, "<tr>");
                for (j, cell) in row.iter().enumerate() {
                    let (tag, class) = match (i, j) {
                        (0, _) => ("th", ""),
                        (_, 0) => ("td", ""),
                        _ => ("td", " class=\"n\""),
                    };
                    let _ = write!(s, "<{tag}{class}>{}</{tag}>", esc(cell));
                }
                let _ = writeln!(s, "</tr>");
            }
            let _ = writeln!(s, "</table>");
        }
    }
    if let Some(l) = &r.listening {
        let _ = writeln!(
            s,
            "<p>Listening files: <code>input.wav</code>, <code>output.wav</code>, <code>error.wav</code> at {} Hz; \
             input and output share one scale ({} full scale); the error file is amplified {:.1}x. Play them at \
             low volume first.</p>",
            l.rate_hz,
            esc(&si(l.full_scale_v, "V")),
            l.error_gain_used
        );
    }
    for f in figures {
        let svg = match f.svg.find("<svg") {
            Some(i) => &f.svg[i..],
            None => &f.svg[..],
        };
        let _ = writeln!(
            s,
            "<figure>{svg}<figcaption>{}</figcaption></figure>",
            esc(&f.caption)
        );
    }
    for w in &r.scenario.warnings {
        let _ = writeln!(s, "<p><strong>warning:</strong> {}</p>", esc(w));
    }
    s.push_str("</body></html>\n");
    s
}

/// The sentence with its first letter in upper case.
fn capitalise(s: &str) -> String {
    let mut c = s.chars();
    c.next()
        .map(|f| f.to_uppercase().collect::<String>() + c.as_str())
        .unwrap_or_default()
}
