//! Integration tests of the meters a run adds for particular sources: two-tone IMD and step metrics.

mod common;

use std::fs;

use common::{csv_rows, json, ok, run_in, stdout};

/// An ideal 12-bit chain (0..5 V) at 48 kHz, driven by two tones of 1 V at 1 kHz and 1.2 kHz; `level` writes
/// the tones as -7.96 dBFS (1 V peak in a 2.5 V full-scale peak).
const TWO_TONE: &str = r#"
name = "two-tone"
[simulation]
analog_rate = "4.8 MHz"
duration = "60 ms"
settle = "10 ms"
seed = 3
[source]
waveform = "multitone"
offset = "2.5 V"
tones = [{ frequency = "1 kHz", level = "-7.9588 dBFS" }, { frequency = "1.2 kHz", amplitude = "1 V" }]
[[stage]]
kind = "sar_adc"
bits = 12
range = ["0 V", "5 V"]
sample_rate = "48 kHz"
conversion_time = "2 us"
[[stage]]
kind = "dac"
[analysis]
band = "20 kHz"
"#;

#[test]
fn the_two_tone_imd_of_an_ideal_chain_is_below_the_quantization_floor() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("two.toml"), TWO_TONE).unwrap();
    let o = run_in(d.path(), &["run", "two.toml", "--no-plots", "--no-wav"]);
    ok(&o);
    let table = stdout(&o);
    assert!(table.contains("two-tone IMD"), "{table}");
    let r = json(&d.path().join("out/two-tone/report.json"));
    let m = &r["imd"];
    assert_eq!(m["f1_hz"].as_f64(), Some(1000.0));
    assert_eq!(m["f2_hz"].as_f64(), Some(1200.0));
    let a1 = m["tone1_amplitude_v"].as_f64().unwrap();
    assert!((a1 - 1.0).abs() < 0.01, "tone 1 at {a1} V");
    // Ideal quantization noise is q^2/12 in total (W. R. Bennett, BSTJ 1948): no product of a linear chain may
    // hold more power than all of it, relative to the tone at f1.
    let q: f64 = 5.0 / 4096.0;
    let floor_dbc = 10.0 * ((q * q / 12.0) / (a1 * a1 / 2.0)).log10();
    let products = m["products"].as_array().unwrap();
    assert_eq!(products.len(), 4);
    for p in products {
        let level = p["level_dbc"].as_f64().unwrap_or_else(|| panic!("{p}"));
        assert!(level < floor_dbc, "{p} above the floor {floor_dbc:.1} dBc");
    }
    let total = m["total_dbc"].as_f64().unwrap();
    assert!(total < floor_dbc, "total {total} vs floor {floor_dbc}");
    // The report of a one-tone source carries no imd entry.
    let one = TWO_TONE.replace(
        "waveform = \"multitone\"",
        "waveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"",
    );
    let one = one.replace(
        "tones = [{ frequency = \"1 kHz\", level = \"-7.9588 dBFS\" }, { frequency = \"1.2 kHz\", amplitude = \"1 V\" }]\n",
        "",
    );
    fs::write(d.path().join("one.toml"), one).unwrap();
    let o = run_in(
        d.path(),
        &[
            "run",
            "one.toml",
            "--quiet",
            "--no-plots",
            "--no-wav",
            "--out",
            "one",
        ],
    );
    ok(&o);
    let r = json(&d.path().join("one/report.json"));
    assert!(r.get("imd").is_none());
}

/// An analog-only chain: a 1 V step at 2 ms through one filter stage with a 1 kHz cutoff.
fn step_through(family: &str, order: u32, band: &str) -> serde_json::Value {
    let text = format!(
        r#"
name = "step"
[simulation]
analog_rate = "10 MHz"
duration = "10 ms"
settle = "1 ms"
[source]
waveform = "step"
at = "2 ms"
level = "1 Vpp"
[[stage]]
kind = "filter"
family = "{family}"
order = {order}
cutoff = "1 kHz"
[analysis]
{band}
"#
    );
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("step.toml"), text).unwrap();
    let o = run_in(d.path(), &["run", "step.toml", "--no-plots", "--no-wav"]);
    ok(&o);
    let table = stdout(&o);
    assert!(table.contains("rise time (10-90 %)"), "{table}");
    json(&d.path().join("out/step/report.json"))["step"].clone()
}

#[test]
fn a_first_order_rc_steps_with_rise_tau_ln_9_and_no_overshoot() {
    // Single pole, tau = 1/(2 pi fc): 10-90 % rise tau ln 9, within 1 % after tau ln 100, no overshoot
    // (textbook, from memory).
    let tau = 1.0 / (2.0 * std::f64::consts::PI * 1e3);
    let m = step_through("rc", 1, "");
    let rise = m["rise_time_s"].as_f64().unwrap();
    assert!(
        (rise / (tau * 9f64.ln()) - 1.0).abs() < 0.002,
        "rise {rise}"
    );
    let over = m["overshoot_percent"].as_f64().unwrap();
    assert!(over < 1e-6, "overshoot {over} %");
    assert_eq!(m["settling_band"].as_f64(), Some(0.01));
    let settle = m["settling_time_s"].as_f64().unwrap();
    assert!(
        (settle / (tau * 100f64.ln()) - 1.0).abs() < 0.002,
        "settle {settle}"
    );
    let (a, b) = (
        m["initial_v"].as_f64().unwrap(),
        m["final_v"].as_f64().unwrap(),
    );
    assert!(a.abs() < 1e-9 && (b - 1.0).abs() < 1e-6, "{a} {b}");
    // A wider band settles sooner: 5 % after tau ln 20.
    let m = step_through("rc", 1, "settling_band = \"5%\"");
    let settle = m["settling_time_s"].as_f64().unwrap();
    assert!(
        (settle / (tau * 20f64.ln()) - 1.0).abs() < 0.002,
        "settle {settle}"
    );
}

#[test]
fn a_second_order_butterworth_overshoots_by_4_3_percent() {
    // Second-order Butterworth, damping 1/sqrt 2: overshoot exp(-pi) = 4.32 % (handbook value, from memory).
    let m = step_through("butterworth", 2, "");
    let over = m["overshoot_percent"].as_f64().unwrap();
    assert!(
        (over - 100.0 * (-std::f64::consts::PI).exp()).abs() < 0.02,
        "overshoot {over}"
    );
    // Bessel of the same order barely overshoots (about 0.4 %, under 1 %; from memory).
    let m = step_through("bessel", 2, "");
    let over = m["overshoot_percent"].as_f64().unwrap();
    assert!(over < 1.0, "bessel overshoot {over}");
}

/// `sweep.csv` as rows of (column name -> cell).
fn sweep_rows(path: &std::path::Path) -> Vec<std::collections::HashMap<String, String>> {
    let (header, rows) = csv_rows(path);
    rows.into_iter()
        .map(|r| header.iter().cloned().zip(r).collect())
        .collect()
}

#[test]
fn a_frequency_sweep_carries_the_phase_unwrapped_beyond_minus_180_degrees() {
    // The analog prototype's phase, -sum of arg(j w - p_k) over the Butterworth poles
    // p_k = exp(j pi (2k + n - 1) / (2n)), k = 1..n, at w = f / fc (textbook pole positions, from memory);
    // order 1 is the RC's -atan(f / fc). An analog-only chain adds no pure delay.
    let analog_phase_deg = |order: u32, x: f64| {
        let n = order as f64;
        -(1..=order)
            .map(|k| {
                let a = std::f64::consts::PI * (2.0 * k as f64 + n - 1.0) / (2.0 * n);
                (x - a.sin()).atan2(-a.cos())
            })
            .sum::<f64>()
            .to_degrees()
    };
    for (order, family) in [(1, "rc"), (4, "butterworth")] {
        let text = format!(
            "name = \"ph\"\n[simulation]\nanalog_rate = \"2 MHz\"\nduration = \"40 ms\"\nsettle = \"10 ms\"\n\
             [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\nlevel = \"1 Vrms\"\n\
             [[stage]]\nkind = \"filter\"\nfamily = \"{family}\"\norder = {order}\ncutoff = \"1 kHz\"\n"
        );
        let d = tempfile::tempdir().unwrap();
        fs::write(d.path().join("ph.toml"), text).unwrap();
        let o = run_in(
            d.path(),
            &[
                "sweep",
                "ph.toml",
                "--vary",
                "source.frequency=300 Hz..5 kHz",
                "--points",
                "6",
                "--out",
                "sw",
            ],
        );
        ok(&o);
        let mut seen = 0;
        let mut last = f64::INFINITY;
        for r in sweep_rows(&d.path().join("sw/sweep.csv")) {
            let Ok(f) = r["output.fundamental_hz"].parse::<f64>() else {
                continue;
            };
            let got: f64 = r["output.phase_deg"].parse().unwrap();
            let want = analog_phase_deg(order, f / 1e3);
            assert!(
                (got - want).abs() < 0.1,
                "order {order} at {f} Hz: {got} vs {want}"
            );
            assert!(got < last, "the phase falls along the sweep");
            last = got;
            seen += 1;
        }
        assert!(seen >= 5, "{seen} points measured");
        if order == 4 {
            assert!(last < -270.0, "unwrapped: {last}");
        }
    }
}

#[test]
fn report_md_and_html_carry_the_imd_figures_the_terminal_prints() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("two.toml"), TWO_TONE).unwrap();
    let o = run_in(d.path(), &["run", "two.toml", "--no-wav"]);
    ok(&o);
    let dir = d.path().join("out/two-tone");
    let r = json(&dir.join("report.json"));
    let im3 = format!("IM3 {:.2} dBc", r["imd"]["im3_dbc"].as_f64().unwrap());
    assert!(stdout(&o).contains(&im3), "{}", stdout(&o));
    for f in ["report.md", "report.html"] {
        let text = fs::read_to_string(dir.join(f)).unwrap();
        assert!(
            text.contains("Two-tone IMD at the output") && text.contains(&im3),
            "{f}: {text}"
        );
    }
}
