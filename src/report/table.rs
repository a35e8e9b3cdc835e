//! Readable summary tables for the terminal.

use std::fmt::Write;

use crate::engine::pipeline::si;
use crate::engine::static_bench::StaticReport;
use crate::report::json::Report;

fn db(x: Option<f64>) -> String {
    x.map(|v| format!("{v:.2} dB"))
        .unwrap_or_else(|| "-".into())
}
fn bits(x: Option<f64>) -> String {
    x.map(|v| format!("{v:.2} bits"))
        .unwrap_or_else(|| "-".into())
}

/// The summary printed by `convchain run`.
pub fn summary(r: &Report) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{}  ({})", r.scenario.name, r.scenario.origin);
    for note in r.tone_notes() {
        let _ = writeln!(s, "  {note}");
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "  {:<14}{:>14}{:>14}", "", "ADC codes", "analog output");
    let a = r.adc.as_ref().map(|a| &a.metrics);
    let o = &r.output;
    let row = |s: &mut String, name: &str, x: String, y: String| {
        let _ = writeln!(s, "  {name:<14}{x:>14}{y:>14}");
    };
    row(&mut s, "SNR", db(a.and_then(|a| a.snr_db)), db(o.snr_db));
    row(
        &mut s,
        "SINAD",
        db(a.and_then(|a| a.sinad_db)),
        db(o.sinad_db),
    );
    row(
        &mut s,
        "ENOB",
        bits(a.and_then(|a| a.enob_bits)),
        bits(o.enob_bits),
    );
    row(
        &mut s,
        "ENOB (fit)",
        bits(a.and_then(|a| a.enob_sinefit_bits)),
        "".into(),
    );
    row(&mut s, "THD", db(a.and_then(|a| a.thd_db)), db(o.thd_db));
    row(
        &mut s,
        "SFDR",
        a.and_then(|a| a.sfdr_dbc)
            .map(|v| format!("{v:.2} dBc"))
            .unwrap_or("-".into()),
        o.sfdr_dbc
            .map(|v| format!("{v:.2} dBc"))
            .unwrap_or("-".into()),
    );
    row(&mut s, "gain", "".into(), db(o.gain_db));
    row(
        &mut s,
        "fidelity",
        "".into(),
        format!("{:.2} dB", o.fidelity_db),
    );
    if let Some(a) = a {
        let _ = writeln!(
            s,
            "\n  ADC: {} bits at {}, conversion {}, {} codes clipped",
            a.bits,
            si(a.sample_rate_hz, "Hz"),
            si(a.conversion_time_s, "s"),
            a.codes_clipped,
        );
        if a.codes_clipped > 0 {
            let _ = writeln!(
                s,
                "  {} codes clipped: the input overdrives the ADC's range, and the metrics include the clipping",
                a.codes_clipped
            );
        }
        if let Some(n) = a.modulator_overloads.filter(|&n| n > 0) {
            let _ = writeln!(
                s,
                "  the noise-shaping loop overloaded {n} times: the input exceeds its largest stable level (see max_stable_input_v), and the metrics include the overloads"
            );
        }
    }
    if let Some(n) = r.output.dac_modulator_overloads.filter(|&n| n > 0) {
        let _ = writeln!(
            s,
            "  the DAC's noise-shaping loop overloaded {n} times: its input exceeds the loop's largest stable level, and the output metrics include the overloads"
        );
    }
    let _ = writeln!(s, "  {}", r.band_note());
    if let Some(m) = &r.imd {
        let _ = writeln!(
            s,
            "\n  two-tone IMD at the output (tones {} and {}; dBc of the tone at {})",
            si(m.f1_hz, "Hz"),
            si(m.f2_hz, "Hz"),
            si(m.f1_hz, "Hz")
        );
        for p in &m.products {
            let level = match (p.level_dbc, &p.note) {
                (Some(v), _) => format!("{v:.2} dBc"),
                (None, Some(n)) => n.clone(),
                (None, None) => "-".into(),
            };
            let _ = writeln!(
                s,
                "    {:<8}{:>14}  {level}",
                p.product,
                si(p.frequency_hz, "Hz")
            );
        }
        let dbc = |x: Option<f64>| x.map_or("-".into(), |v| format!("{v:.2} dBc"));
        let _ = writeln!(
            s,
            "    IM2 {}   IM3 {}   total {}",
            dbc(m.im2_dbc),
            dbc(m.im3_dbc),
            dbc(m.total_dbc)
        );
    }
    if let Some(m) = &r.step {
        let t = |x: Option<f64>| x.map_or("-".into(), |v| si(v, "s"));
        let _ = writeln!(
            s,
            "\n  step at {} (output {} to {})",
            si(m.at_s, "s"),
            si(m.initial_v, "V"),
            si(m.final_v, "V")
        );
        let _ = writeln!(
            s,
            "    {:<40}{:>14}",
            "rise time (10-90 %)",
            t(m.rise_time_s)
        );
        let _ = writeln!(s, "    {:<40}{:>14}", "delay to 50 %", t(m.delay_50_s));
        let _ = writeln!(
            s,
            "    {:<40}{:>14}",
            "overshoot",
            format!("{:.2} %", m.overshoot_percent)
        );
        let _ = writeln!(
            s,
            "    {:<40}{:>14}",
            format!(
                "settling time (to {} % of the step)",
                100.0 * m.settling_band
            ),
            m.settling_time_s
                .map_or("not settled".into(), |v| si(v, "s"))
        );
    }
    if let Some(note) = r.audio_note() {
        let _ = writeln!(s, "\n  {note}");
        let _ = writeln!(
            s,
            "    {:<28}{:>24}{:>24}",
            "", "ADC codes", "analog output"
        );
        for (name, a, o) in r.audio_rows() {
            let _ = writeln!(s, "    {name:<28}{a:>24}{o:>24}");
        }
    }
    if let Some(c) = &r.compare {
        let _ = writeln!(s, "\n  {}", c.note());
        let _ = writeln!(
            s,
            "    {:<14}{:>16}{:>16}{:>22}",
            "", "simulated", "captured", "captured - simulated"
        );
        for [name, a, b, d, v] in c.rows() {
            let line = format!("    {name:<14}{a:>16}{b:>16}{d:>22}  {v}");
            let _ = writeln!(s, "{}", line.trim_end());
        }
    }
    if o.bits_flipped > 0 {
        let _ = writeln!(s, "  link: {} bits flipped", o.bits_flipped);
    }
    if let Some(line) = slip_line(&r.latency) {
        let _ = writeln!(s, "  {line}");
    }
    if r.latency.packets_lost > 0 {
        let _ = writeln!(s, "  {}", packets_lost_line(&r.latency));
    }
    let l = &r.latency;
    let _ = writeln!(s, "\n  latency budget");
    // The label column is as wide as its longest label (at least 52), so a long stage label never pushes its
    // value out of the column.
    let w = l
        .budget
        .iter()
        .map(|b| b.stage.chars().count() + 1)
        .chain(
            r.hops
                .iter()
                .flatten()
                .enumerate()
                .map(|(i, h)| crate::report::document::hop_line(i, h).chars().count() + 1),
        )
        .max()
        .unwrap_or(0)
        .max(52);
    for b in &l.budget {
        let _ = writeln!(s, "    {:<w$}{:>14}", b.stage, si(b.seconds, "s"));
    }
    let _ = writeln!(s, "    {:<w$}{:>14}", "total (budget)", si(l.budget_s, "s"));
    for (i, h) in r.hops.iter().flatten().enumerate() {
        let _ = writeln!(
            s,
            "    {:<w$}{:>14}",
            crate::report::document::hop_line(i, h),
            si(h.budget_s, "s")
        );
    }
    let _ = writeln!(
        s,
        "    {:<w$}{:>14}",
        "measured (cross-correlation)",
        si(l.measured_s, "s")
    );
    if let Some(p) = l.phase_delay_s {
        let _ = writeln!(
            s,
            "    {:<w$}{:>14}",
            "phase delay at the fundamental",
            si(p, "s")
        );
    }
    let _ = writeln!(
        s,
        "    {:<w$}{:>14}{}",
        "measured - budget",
        si(l.difference_s, "s"),
        if l.flagged {
            "  <- large: check the model"
        } else {
            ""
        }
    );
    if let Some(t) = &l.over_time {
        let _ = writeln!(
            s,
            "    over the run ({} blocks of {}):",
            t.blocks.len(),
            si(t.block_s, "s")
        );
        for (what, v) in [
            ("min", t.min_s),
            ("max", t.max_s),
            ("final", t.final_s),
            ("spread (max - min)", t.spread_s),
        ] {
            let _ = writeln!(s, "      {what:<width$}{:>14}", si(v, "s"), width = w - 2);
        }
    }
    paths_table(&mut s, r);
    for w in &r.scenario.warnings {
        let _ = writeln!(s, "  warning: {w}");
    }
    s
}

/// The paths of a `[[path]]` scenario: each path's latency against its budget and its headline figures, then
/// the delay between every two paths.
fn paths_table(s: &mut String, r: &Report) {
    let Some(paths) = &r.paths else {
        return;
    };
    let _ = writeln!(
        s,
        "\n  paths (the figures above are the first path's, \"{}\")",
        paths.0.first().map_or("", |p| p.0.as_str())
    );
    let w = paths
        .0
        .iter()
        .map(|(n, _)| n.chars().count() + 2)
        .max()
        .unwrap_or(0)
        .max(14);
    let _ = writeln!(
        s,
        "    {:<w$}{:>14}{:>14}{:>14}{:>14}{:>14}",
        "", "budget", "measured", "difference", "SINAD", "ENOB"
    );
    for (name, p) in &paths.0 {
        let l = &p.latency;
        let _ = writeln!(
            s,
            "    {name:<w$}{:>14}{:>14}{:>14}{:>14}{:>14}",
            si(l.budget_s, "s"),
            si(l.measured_s, "s"),
            si(l.difference_s, "s"),
            db(p.output.sinad_db),
            bits(p.output.enob_bits)
        );
        if let Some(t) = &l.over_time {
            let _ = writeln!(
                s,
                "    {:<w$}  over the run: min {}, max {}, final {}, spread {}",
                "",
                si(t.min_s, "s"),
                si(t.max_s, "s"),
                si(t.final_s, "s"),
                si(t.spread_s, "s")
            );
        }
        if l.packets_lost > 0 {
            let _ = writeln!(s, "    {:<w$}  packets lost: {}", "", l.packets_lost);
        }
    }
    if let Some(delays) = r.path_delays.as_ref().filter(|d| !d.is_empty()) {
        let _ = writeln!(
            s,
            "\n  delay between paths (switching from one to the other, the programme moves by)"
        );
        let _ = writeln!(
            s,
            "    {:<32}{:>20}{:>20}{:>20}",
            "", "latency difference", "cross-correlated", "budget difference"
        );
        for d in delays {
            let _ = writeln!(
                s,
                "    {:<32}{:>20}{:>20}{:>20}",
                format!("{} -> {}", d.from, d.to),
                si(d.latency_difference_s, "s"),
                si(d.cross_correlated_s, "s"),
                si(d.budget_difference_s, "s")
            );
        }
    }
}

/// The line on the FIFO between clocks, when the DAC reads through one: "clock crossing: 44 slips (first at
/// 1.234 s, last at 9.876 s)".
pub fn slip_line(l: &crate::measure::chain::LatencyMetrics) -> Option<String> {
    let n = l.slips?;
    let times = l.slip_times_s.as_deref().unwrap_or(&[]);
    let when = match (times.first(), times.last()) {
        (Some(a), _) if n > times.len() as u64 => format!(
            " (first at {}; the first {} listed in report.json)",
            si(*a, "s"),
            times.len()
        ),
        (Some(a), Some(b)) if n > 1 => {
            format!(" (first at {}, last at {})", si(*a, "s"), si(*b, "s"))
        }
        (Some(a), _) => format!(" (at {})", si(*a, "s")),
        _ => String::new(),
    };
    Some(format!(
        "clock crossing: {n} slip{} of one sample{when}",
        if n == 1 { "" } else { "s" }
    ))
}

/// The note on slips inside the analysis record, when there are any: each slip is a one-sample phase step of
/// the output, so a record holding slips measures them as noise and distortion (a SINAD of tens of dB where
/// the converters alone give far more).
pub fn record_slips_note(l: &crate::measure::chain::LatencyMetrics) -> Option<String> {
    let n = l.slips_in_record.filter(|n| *n > 0)?;
    let (s, them) = if n == 1 && !l.slips_in_record_at_least {
        ("", "it")
    } else {
        ("s", "them")
    };
    Some(format!(
        "{}{n} clock slip{s} inside the analysis record: each is a one-sample phase step of the output, and the \
         output's SNR, SINAD, ENOB and THD include {them}; put a resample with mode = \"async\" before the \
         DAC, give the converters the same clock_ppm, or choose simulation.settle and duration so the record \
         holds no slip",
        if l.slips_in_record_at_least {
            "at least "
        } else {
            ""
        }
    ))
}

/// The summary printed by `convchain static`.
pub fn static_summary(r: &StaticReport) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{}  static tests", r.scenario);
    if r.stat.adc.is_some() || r.stat.dac.is_some() {
        let _ = writeln!(
            s,
            "  {:<22}{:>12}{:>12}{:>10}{:>11}",
            "", "DNL max", "INL max", "missing", "monotonic"
        );
    }
    let mut row = |name: &str, x: &crate::measure::static_test::StaticResult| {
        let _ = writeln!(
            s,
            "  {:<22}{:>8.3} LSB{:>8.3} LSB{:>10}{:>11}",
            name,
            x.dnl_max_lsb,
            x.inl_max_lsb,
            x.missing_codes,
            if x.monotonic { "yes" } else { "no" }
        );
    };
    if let Some(a) = &r.stat.adc {
        row("ADC (code density)", &a.code_density);
        row("ADC (slow ramp)", &a.ramp);
    }
    if let Some(d) = &r.stat.dac {
        row("DAC (every code)", &d.result);
    }
    for (name, d) in [
        ("ADC", &r.stat.adc_dc_transfer),
        ("DAC", &r.stat.dac_dc_transfer),
    ] {
        if let Some(d) = d {
            dc_transfer_lines(&mut s, name, d);
        }
    }
    if let Some(a) = &r.stat.adc
        && a.code_density.missing_codes > 0
    {
        let _ = writeln!(
            s,
            "\n  why codes are missing (each change made alone, code-density test):"
        );
        if a.missing_code_causes.is_empty() {
            let _ = writeln!(
                s,
                "    no single change to the hold or the converter clears or halves them"
            );
        }
        for c in &a.missing_code_causes {
            let _ = writeln!(
                s,
                "    {}: {} missing (instead of {})",
                c.change, c.missing_codes, a.code_density.missing_codes
            );
        }
    }
    s
}

/// The lines of a delta-sigma converter's DC-transfer test.
fn dc_transfer_lines(s: &mut String, name: &str, d: &crate::engine::static_bench::DcTransfer) {
    let l = &d.linearity;
    let what = if d.code.is_empty() {
        "DC levels"
    } else {
        "held codes"
    };
    let _ = writeln!(
        s,
        "  {name} (DC transfer): {} {what} within +-{} of mid-range, {} words averaged each",
        d.level_v.len() + d.overloaded_levels_v.len(),
        si(d.stable_half_span_v, "V"),
        d.average_words
    );
    let _ = writeln!(
        s,
        "    offset {:+.3} ppm FS ({:+.2} LSB), gain error {:+.3} ppm",
        l.offset_ppm, l.offset_lsb, l.gain_error_ppm
    );
    let _ = writeln!(
        s,
        "    INL max {:.3} ppm FS ({:.1} LSB) best fit, {:.3} ppm FS ({:.1} LSB) end point",
        l.inl_max_ppm, l.inl_max_lsb, l.inl_endpoint_max_ppm, l.inl_endpoint_max_lsb
    );
    let err = d.mean_error_lsb.iter().fold(0.0f64, |a, &b| a.max(b));
    let _ = writeln!(
        s,
        "    each level's mean known to {err:.1} LSB (standard error, largest)"
    );
    if let (Some(n), Some(e), Some(f)) = (
        d.noise_rms_max_lsb,
        d.effective_resolution_bits,
        d.noise_free_bits,
    ) {
        let _ = writeln!(
            s,
            "    noise {n:.2} LSB rms (largest): {e:.1} effective bits, {f:.1} noise-free bits"
        );
    }
    if d.overloads > 0 {
        let lv: Vec<String> = d.overloaded_levels_v.iter().map(|v| si(*v, "V")).collect();
        let _ = writeln!(
            s,
            "    the loop overloaded {} times, at {} (left out of the fit)",
            d.overloads,
            lv.join(", ")
        );
    }
    let _ = writeln!(s, "    DNL and missing codes: {}", d.dnl_and_missing_codes);
}

/// "network: N packets lost (concealed), the first at T": for the table and the reports.
pub fn packets_lost_line(l: &crate::measure::chain::LatencyMetrics) -> String {
    let first = l
        .packet_loss_times_s
        .first()
        .map(|t| format!(", the first at {}", si(*t, "s")))
        .unwrap_or_default();
    format!(
        "network: {} packet{} lost (late for the jitter buffer, concealed){first}",
        l.packets_lost,
        if l.packets_lost == 1 { "" } else { "s" }
    )
}
