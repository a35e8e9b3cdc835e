//! `run --audio` through the binary: the audio figures of an ideal dithered converter against their values
//! computed here from the dither's noise power, the weighting and the zero-order hold.

mod common;

use std::f64::consts::PI;
use std::fs;

use common::*;

/// An ideal 16-bit converter at 48 kHz with TPDF dither, straight into an ideal DAC: its only noise is the
/// dithered quantization error, white over the Nyquist band.
const DITHERED_16: &str = r#"
name = "dithered-16"
[simulation]
analog_rate = "480 kHz"
duration = "0.6 s"
settle = "10 ms"
seed = 11
[source]
waveform = "sine"
frequency = "997 Hz"
level = "-1 dBFS"
[[stage]]
kind = "sar_adc"
bits = 16
range = ["-1 V", "1 V"]
sample_rate = "48 kHz"
conversion_time = "10 us"
dither = "tpdf"
[[stage]]
kind = "dac"
[analysis]
coherent = true
"#;

/// A-weighting's magnitude, IEC 61672-1's analytic form (poles at 20.598997, 107.65265, 737.86223 and
/// 12194.217 Hz), normalised to 1 at 1 kHz: written out here again so the check does not read the meter.
fn a_weight(f: f64) -> f64 {
    let r = |f: f64| {
        let f2 = f * f;
        let p = |x: f64| x * x;
        p(12194.217) * f2 * f2
            / ((f2 + p(20.598997))
                * ((f2 + p(107.65265)) * (f2 + p(737.86223))).sqrt()
                * (f2 + p(12194.217)))
    };
    r(f) / r(1000.0)
}

/// A zero-order hold's magnitude at f for update rate fs, |sin(pi f/fs) / (pi f/fs)| (A. V. Oppenheim and R. W.
/// Schafer, Discrete-Time Signal Processing, 3rd ed., section 4.8.3).
fn zoh(f: f64, fs: f64) -> f64 {
    let x = PI * f / fs;
    (x.sin() / x).abs()
}

/// Simpson's rule of `g` over [a, b] with `n` (even) intervals.
fn integrate(g: impl Fn(f64) -> f64, a: f64, b: f64, n: usize) -> f64 {
    let h = (b - a) / n as f64;
    let mut s = g(a) + g(b);
    for i in 1..n {
        s += g(a + i as f64 * h) * if i % 2 == 1 { 4.0 } else { 2.0 };
    }
    s * h / 3.0
}

#[test]
fn a_dithered_16_bit_converter_gives_the_figures_of_its_dither_noise() {
    // Non-subtractive TPDF dither of 2 LSB peak to peak makes the total error power q^2/12 + q^2/6 = q^2/4,
    // independent of the signal and white over the Nyquist band (S. P. Lipshitz, R. A. Wannamaker and
    // J. Vanderkooy, "Quantization and dither: a theoretical survey", JAES 40(5), 1992). Its density is then
    // (q^2/4) / (fs/2); over 20 Hz..20 kHz, weighted with A (IEC 61672-1) or not, its power is the density
    // times the integral of the weighting's power gain. Full scale is a sine of 1 V peak (half the range).
    // At the analog output the zero-order hold shapes the same noise by |sinc(f/fs)|^2, and the output's
    // full scale is referred through the chain's gain at the tone (the hold's droop there). Within 0.5 dB.
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("d16.toml"), DITHERED_16).unwrap();
    let o = run_in(
        d.path(),
        &[
            "run",
            "d16.toml",
            "--quiet",
            "--no-wav",
            "--no-plots",
            "--audio",
        ],
    );
    ok(&o);
    let r = json(&d.path().join("out/dithered-16/report.json"));
    let a = &r["audio"];
    assert_eq!(a["band_hz"][0].as_f64(), Some(20.0));
    assert_eq!(a["band_hz"][1].as_f64(), Some(20_000.0));
    assert_eq!(a["dynamic_range_level_dbfs"].as_f64(), Some(-60.0));

    let fs_hz = 48_000.0;
    let q = 2.0 / 65536.0;
    let density = q * q / 4.0 / (fs_hz / 2.0);
    let full_scale_v2 = 0.5; // (1 V)^2 / 2
    let f0 = r["run"]["frequency_hz"].as_f64().unwrap();
    let tone_v2 = |dbfs: f64| full_scale_v2 * 10f64.powf(dbfs / 10.0);
    let db = |x: f64| 10.0 * x.log10();
    let n = 200_000;
    for (record, shape) in [
        ("adc", &(|_: f64| 1.0) as &dyn Fn(f64) -> f64),
        ("output", &|f: f64| (zoh(f, fs_hz) / zoh(f0, fs_hz)).powi(2)),
    ] {
        let flat = density * integrate(shape, 20.0, 20_000.0, n);
        let weighted = density * integrate(|f| a_weight(f).powi(2) * shape(f), 20.0, 20_000.0, n);
        let fig = &a[record];
        let got = |k: &str| {
            fig[k]
                .as_f64()
                .unwrap_or_else(|| panic!("{record}.{k} missing: {fig}"))
        };
        let checks = [
            ("noise_dbfs", db(flat / full_scale_v2)),
            ("noise_a_dbfs", db(weighted / full_scale_v2)),
            ("thd_n_db", db(flat / (tone_v2(-1.0) + flat))),
            (
                "dynamic_range_db",
                60.0 - db(weighted / (tone_v2(-60.0) + weighted)),
            ),
        ];
        for (key, want) in checks {
            let v = got(key);
            assert!(
                (v - want).abs() < 0.5,
                "{record}.{key}: {v:.3} vs {want:.3} computed from the dither's noise"
            );
        }
    }
    // The response: the converter alone is flat; the output follows the hold's droop, relative to 1 kHz
    // (ZOH as above), 20 log10(sinc(20 kHz / 48 kHz) / sinc(1 kHz / 48 kHz)) = -2.6 dB at the top. Within
    // 0.05 dB: the response comes from least-squares fits of tones far above the noise.
    let adc = &a["adc"]["response_db"];
    assert!(
        adc["min"].as_f64().unwrap() > -0.05 && adc["max"].as_f64().unwrap() < 0.05,
        "{adc}"
    );
    let out = &a["output"]["response_db"];
    let droop = 20.0 * (zoh(20_000.0, fs_hz) / zoh(1000.0, fs_hz)).log10();
    assert!(
        (out["min"].as_f64().unwrap() - droop).abs() < 0.05,
        "{out} vs {droop}"
    );
    assert_eq!(out["reference_hz"].as_f64(), Some(1000.0));
    let points = out["points"].as_array().unwrap();
    assert_eq!(points.len(), 12);
    // The phase of the output is that of a pure delay, -360 f tau: the conversion time and half an update
    // period (the hold's delay, Oppenheim and Schafer as above), to within half a step of the 480 kHz grid the
    // DAC's updates are rendered on; the same delay at every tone (to 0.03 degree: 0.01 for the fits of tones
    // 36 dB above the noise, and 0.02 for the grid: each hold is rendered as its average over the grid cells
    // (src/stages/dac.rs), which keeps each update's instant exactly but weighs a hold's two end cells by the
    // fractions it covers (0.2 and 0.8 here), a kernel that is not quite symmetric; its phase departs from a pure
    // delay by 0.016 degree at 20 kHz on this 480 kHz grid, 2 ns, a thousandth of a grid step).
    let tau = 10e-6 + 0.5 / fs_hz;
    let grid_s = 1.0 / 480e3;
    let delays: Vec<f64> = points
        .iter()
        .map(|p| -p["phase_deg"].as_f64().unwrap() / (360.0 * p["frequency_hz"].as_f64().unwrap()))
        .collect();
    let reference = delays[6];
    for (p, t) in points.iter().zip(&delays) {
        assert!((t - tau).abs() < 0.5 * grid_s, "{t} vs {tau}");
        let f = p["frequency_hz"].as_f64().unwrap();
        assert!((360.0 * f * (t - reference)).abs() < 0.03, "{p} {delays:?}");
    }
}

#[test]
fn audio_figures_need_a_sine_and_a_converter_and_a_band_that_parses() {
    let d = tempfile::tempdir().unwrap();
    let square = DITHERED_16.replace("waveform = \"sine\"", "waveform = \"square\"");
    fs::write(d.path().join("sq.toml"), square).unwrap();
    let o = run_in(d.path(), &["run", "sq.toml", "--quiet", "--audio"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("sine source"), "{}", stderr(&o));
    assert!(!d.path().join("out").exists());
    fs::write(d.path().join("d16.toml"), DITHERED_16).unwrap();
    for (band, says) in [
        ("20 Hz", "no `..`"),
        ("20 kHz..20 Hz", "after the start"),
        ("20 Hz..20 kV", "frequency"),
        ("30 kHz..40 kHz", "Nyquist"),
        ("2 kHz..20 kHz", "does not hold the source's tone"),
        ("-5 Hz..20 kHz", "must not be negative"),
    ] {
        let arg = format!("--audio-band={band}");
        let o = run_in(d.path(), &["run", "d16.toml", "--quiet", &arg]);
        assert_eq!(o.status.code(), Some(2), "{band}: {}", stderr(&o));
        assert!(stderr(&o).contains(says), "{band}: {}", stderr(&o));
    }
    // A chain without a converter has no full scale for dBFS.
    let analog = "name = \"analog\"\n[simulation]\nanalog_rate = \"480 kHz\"\nduration = \"20 ms\"\n\
                  [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"\n\
                  [[stage]]\nkind = \"amplifier\"\ngain = 2\n";
    fs::write(d.path().join("analog.toml"), analog).unwrap();
    let o = run_in(d.path(), &["run", "analog.toml", "--quiet", "--audio"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("needs a converter"), "{}", stderr(&o));
    // Without --audio there is no audio object.
    let o = run_in(
        d.path(),
        &["run", "d16.toml", "--quiet", "--no-wav", "--no-plots"],
    );
    ok(&o);
    let r = json(&d.path().join("out/dithered-16/report.json"));
    assert!(r.get("audio").is_none());
}

#[test]
fn a_sweep_with_audio_gives_each_point_the_figures_run_gives() {
    // The same scenario and seed give the same figures (the engine is deterministic): the sweep's point with
    // the scenario's own seed reads what `run --audio` reports.
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("d16.toml"), DITHERED_16).unwrap();
    let o = run_in(
        d.path(),
        &[
            "run",
            "d16.toml",
            "--quiet",
            "--no-wav",
            "--no-plots",
            "--audio",
        ],
    );
    ok(&o);
    let r = json(&d.path().join("out/dithered-16/report.json"));
    let o = run_in(
        d.path(),
        &[
            "sweep",
            "d16.toml",
            "--vary",
            "simulation.seed=11..12",
            "--points",
            "2",
            "--quiet",
            "--audio",
            "--out",
            "sw",
        ],
    );
    ok(&o);
    let s = json(&d.path().join("sw/sweep.json"));
    let row = &s["rows"][0];
    assert_eq!(row["simulation.seed"].as_f64(), Some(11.0), "{row}");
    for record in ["output", "adc"] {
        for key in ["thd_n_db", "dynamic_range_db", "noise_a_dbfs", "noise_dbfs"] {
            let col = format!("audio.{record}.{key}");
            assert_eq!(
                row[&col].as_f64(),
                r["audio"][record][key].as_f64(),
                "{col}"
            );
            assert!(row[&col].as_f64().is_some(), "{col}");
        }
        for (col, key) in [("response_min_db", "min"), ("response_max_db", "max")] {
            let col = format!("audio.{record}.{col}");
            assert_eq!(
                row[&col].as_f64(),
                r["audio"][record]["response_db"][key].as_f64(),
                "{col}"
            );
        }
    }
    let second = &s["rows"][1];
    assert!(second["audio.adc.noise_a_dbfs"].as_f64().is_some());
    assert_ne!(
        second["audio.adc.noise_a_dbfs"],
        row["audio.adc.noise_a_dbfs"]
    );
    // The header says the band, and a sweep without --audio has no audio columns.
    let o = run_in(
        d.path(),
        &[
            "sweep",
            "d16.toml",
            "--vary",
            "simulation.seed=11..12",
            "--points",
            "2",
            "--quiet",
            "--out",
            "plain",
        ],
    );
    ok(&o);
    let plain = fs::read_to_string(d.path().join("plain/sweep.csv")).unwrap();
    assert!(!plain.contains("audio."));
    let with = fs::read_to_string(d.path().join("sw/sweep.csv")).unwrap();
    assert!(
        with.lines()
            .next()
            .unwrap()
            .contains("audio.adc.response_max_db")
    );
}

#[test]
fn a_monte_carlo_study_with_audio_takes_requirements_on_the_audio_figures() {
    // Each run's audio figures are those `run --audio` gives for its seed; here the study checks the columns,
    // the yield of a requirement on them, and that such a requirement without --audio is bad input.
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("d16.toml"), DITHERED_16).unwrap();
    let args = [
        "montecarlo",
        "d16.toml",
        "--runs",
        "2",
        "--no-static",
        "--quiet",
        "--require",
        "audio.adc.dynamic_range_db>=90",
        "--out",
        "mc",
    ];
    let o = run_in(d.path(), &args);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("only with --audio"), "{}", stderr(&o));
    let mut with_audio = args.to_vec();
    with_audio.push("--audio");
    let o = run_in(d.path(), &with_audio);
    ok(&o);
    let s = json(&d.path().join("mc/montecarlo.json"));
    assert_eq!(s["yield"][0]["passed"].as_u64(), Some(2), "{}", s["yield"]);
    let names: Vec<&str> = s["metrics"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|m| m["name"].as_str())
        .collect();
    assert!(names.contains(&"audio.output.noise_a_dbfs"), "{names:?}");
    let csv = fs::read_to_string(d.path().join("mc/montecarlo.csv")).unwrap();
    assert!(csv.lines().next().unwrap().contains("audio.adc.thd_n_db"));
}
