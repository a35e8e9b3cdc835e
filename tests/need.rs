//! Integration tests of `convchain need`, driving the built binary on short chains.

mod common;

use std::fs;
use std::path::Path;

use common::{json, ok, run_in, stderr, stdout};

/// A filter (far above the tone) then a unity-gain amplifier limited by its slew rate: nothing else in the
/// chain bends a sine, and there are no converter steps.
const SLEW_CHAIN: &str = r#"
name = "slew"
description = "a filter, then an amplifier limited by its slew rate"
[simulation]
analog_rate = "4 MHz"
duration = "4 ms"
settle = "1 ms"
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
[[stage]]
kind = "filter"
order = 2
cutoff = "400 kHz"
[[stage]]
kind = "amplifier"
gain = 1
slew_rate = "0.05 V/us"
[analysis]
band = "200 kHz"
"#;

/// A sample-and-hold with aperture jitter before a 16-bit converter (quantization SNR about 98 dB, far
/// below the jitter's at 60 dB).
const JITTER_CHAIN: &str = r#"
name = "jitter"
description = "a sample-and-hold with aperture jitter before a 16-bit converter"
[simulation]
analog_rate = "10 MHz"
duration = "20 ms"
settle = "1 ms"
seed = 3
[source]
waveform = "sine"
frequency = "20 kHz"
amplitude = "2.4 V"
offset = "2.5 V"
[[stage]]
kind = "sample_hold"
aperture_jitter = "20 ns"
[[stage]]
kind = "sar_adc"
bits = 16
range = ["0 V", "5 V"]
clock = "10 MHz"
sample_rate = "200 kHz"
input = "held"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
"#;

fn need(dir: &Path, scenario: &str, args: &[&str]) -> serde_json::Value {
    fs::write(dir.join("s.toml"), scenario).unwrap();
    let mut all = vec!["need", "s.toml", "--out", "o", "--force"];
    all.extend_from_slice(args);
    let o = run_in(dir, &all);
    ok(&o);
    json(&dir.join("o/need.json"))
}

fn row(j: &serde_json::Value) -> &serde_json::Value {
    &j["need"]["rows"][0]
}

/// Whether the chain as written (with `from` replaced by `to` in the text) meets the requirement.
fn written_passes(dir: &Path, scenario: &str, from: &str, to: &str, args: &[&str]) -> bool {
    assert!(scenario.contains(from), "{from}");
    let j = need(dir, &scenario.replace(from, to), args);
    j["written"]["pass"].as_bool().unwrap()
}

const SLEW_ARGS: [&str; 7] = [
    "--vary",
    "stage.2.slew_rate=0.02 V/us..1 V/us",
    "--log",
    "--up-to",
    "20 kHz",
    "--criterion",
    "level",
];

#[test]
fn slew_rate_needed_against_full_power_bandwidth_and_minimal() {
    let d = tempfile::tempdir().unwrap();
    let fpbw = 2.0 * std::f64::consts::PI * 20e3 * 1.0; // SR = 2 pi f Vp, V/s
    // A small gain drop: the criterion tolerates only 0.01 dB of lost fundamental, so the answer sits just
    // below the full-power-bandwidth slew rate 2 pi f Vp (common practice, no source): slewing at a rate a
    // few % short of it clips only the tops of the sine and costs less than 0.01 dB.
    let mut args = SLEW_ARGS.to_vec();
    args.extend(["--gain-drop", "0.01"]);
    let j = need(d.path(), SLEW_CHAIN, &args);
    let r = row(&j);
    let v = r["value"].as_f64().unwrap();
    assert_eq!(r["direction"], "rise");
    assert!(r["found"].as_bool().unwrap());
    assert!(
        v > 0.93 * fpbw && v < 1.01 * fpbw,
        "needed {v} V/s, full power bandwidth {fpbw} V/s"
    );
    // Minimality: the value passes, 5 % short of it (towards the written 0.05 V/us) fails.
    let sr = |x: f64| format!("slew_rate = {x}");
    assert!(written_passes(
        d.path(),
        SLEW_CHAIN,
        "slew_rate = \"0.05 V/us\"",
        &sr(v),
        &args
    ));
    assert!(!written_passes(
        d.path(),
        SLEW_CHAIN,
        "slew_rate = \"0.05 V/us\"",
        &sr(v * 0.95),
        &args
    ));
    // The default 3 dB drop lets the amplifier slew all the time: the output is a triangle of peak
    // SR / (4 f), whose fundamental is 8 / pi^2 of the peak (Fourier series of a triangle wave, from memory),
    // so the gain is 3 dB down at SR = 10^(-3/20) (pi / 4) 2 pi f Vp = 0.556 of the full-power slew rate.
    let j = need(d.path(), SLEW_CHAIN, &SLEW_ARGS);
    let v3 = row(&j)["value"].as_f64().unwrap();
    let expect = 10f64.powf(-3.0 / 20.0) * std::f64::consts::FRAC_PI_4 * fpbw;
    assert!(
        (v3 / expect - 1.0).abs() < 0.03,
        "needed {v3} V/s, triangle-wave estimate {expect} V/s"
    );
    // The plot of the key is written.
    assert!(d.path().join("o/need-1.png").exists());
}

#[test]
fn aperture_jitter_needed_against_the_jitter_bound_and_minimal() {
    let d = tempfile::tempdir().unwrap();
    let args = [
        "--vary",
        "stage.1.aperture_jitter=0.5 ns..100 ns",
        "--log",
        "--require",
        "adc.snr_db>=60",
    ];
    let j = need(d.path(), JITTER_CHAIN, &args);
    let r = row(&j);
    let v = r["value"].as_f64().unwrap();
    assert_eq!(r["direction"], "fall");
    // sigma <= 1 / (2 pi f 10^(SNR/20)) for a full-scale sine (the jitter bound, from memory): 7.96 ns at
    // 20 kHz and 60 dB. The sine is 2.4 V of the 2.5 V half range; the bound does not depend on the level.
    // Within 5 %: the 1 % bracket plus the spread of one record's SNR estimate.
    let bound = 1.0 / (2.0 * std::f64::consts::PI * 20e3 * 1e3);
    assert!(
        (v / bound - 1.0).abs() < 0.05,
        "needed {v} s, bound {bound} s"
    );
    let jit = |x: f64| format!("aperture_jitter = {x}");
    assert!(written_passes(
        d.path(),
        JITTER_CHAIN,
        "aperture_jitter = \"20 ns\"",
        &jit(v),
        &args
    ));
    assert!(!written_passes(
        d.path(),
        JITTER_CHAIN,
        "aperture_jitter = \"20 ns\"",
        &jit(v * 1.05),
        &args
    ));
}

#[test]
fn a_response_that_passes_only_in_the_middle_is_reported_as_ranges() {
    // SINAD against the sine's amplitude: too small drowns in quantization noise, above the 2.5 V half range
    // the converter clips. The written 3 V clips.
    let d = tempfile::tempdir().unwrap();
    let sc = JITTER_CHAIN
        .replace(
            "aperture_jitter = \"20 ns\"",
            "aperture_jitter = \"0.1 ns\"",
        )
        .replace("amplitude = \"2.4 V\"", "amplitude = \"3 V\"");
    let j = need(
        d.path(),
        &sc,
        &[
            "--vary",
            "source.amplitude=1 mV..4 V",
            "--log",
            "--require",
            "adc.sinad_db>=70",
        ],
    );
    let r = row(&j);
    assert_eq!(r["monotone"], false);
    let ranges = r["ranges"].as_array().unwrap();
    assert_eq!(ranges.len(), 1, "{ranges:?}");
    let (lo, hi) = (
        ranges[0][0].as_f64().unwrap(),
        ranges[0][1].as_f64().unwrap(),
    );
    assert!(lo > 1e-3 && hi < 4.0 && hi < 2.5, "{lo}..{hi}");
    assert!(r["note"].as_str().unwrap().contains("not monotone"));
    assert_eq!(r["direction"], "fall");
    let v = r["value"].as_f64().unwrap();
    assert!(v > 2.0 && v <= 2.5, "{v}");
}

#[test]
fn with_no_vary_the_candidates_come_from_the_diagnosis() {
    let d = tempfile::tempdir().unwrap();
    let j = need(
        d.path(),
        SLEW_CHAIN,
        &["--up-to", "20 kHz", "--criterion", "level"],
    );
    let rows = j["need"]["rows"].as_array().unwrap();
    // Only the amplifier's slew rate is to blame (the filter's removal changes nothing at 20 kHz).
    assert_eq!(rows.len(), 1, "{rows:?}");
    assert_eq!(rows[0]["key"], "stage.2.slew_rate");
    assert!(rows[0]["source"].as_str().unwrap().starts_with("diagnosis"));
    assert_eq!(j["need"]["key"], "stage.2.slew_rate");
}

#[test]
fn bad_input_exits_2_with_a_located_message() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("s.toml"), SLEW_CHAIN).unwrap();
    for (args, want) in [
        (vec!["--vary", "stage.2.slew_rate=1..2"], "--up-to"),
        (
            vec![
                "--vary",
                "stage.2.slew_rate=1..2",
                "--up-to",
                "1 kHz",
                "--require",
                "output.snr_db>=1",
            ],
            "not both",
        ),
        (
            vec![
                "--vary",
                "stage.2.slew_rate",
                "--up-to",
                "10 kHz",
                "--criterion",
                "level",
            ],
            "--vary",
        ),
        (
            vec![
                "--vary",
                "stage.9.slew_rate=1..2",
                "--up-to",
                "10 kHz",
                "--criterion",
                "level",
            ],
            "stage 9",
        ),
        (vec!["--require", "output.snr>=3"], "output.snr_db"),
        (
            vec!["--require", "static.dac.inl_max_lsb<=1"],
            "static.dac.inl_max_lsb",
        ),
        (
            vec!["--up-to", "10 kHz", "--criterion", "speed"],
            "--criterion",
        ),
        (
            vec!["--up-to", "10 kHz", "--criterion", "accuracy"],
            "no converter",
        ),
        (
            vec![
                "--up-to",
                "10 kHz",
                "--criterion",
                "level",
                "--tolerance",
                "80",
            ],
            "--tolerance",
        ),
    ] {
        let mut all = vec!["need", "s.toml", "--out", "o"];
        all.extend_from_slice(&args);
        let o = run_in(d.path(), &all);
        assert_eq!(
            o.status.code(),
            Some(2),
            "{args:?}: {}{}",
            stdout(&o),
            stderr(&o)
        );
        assert!(stderr(&o).contains(want), "{args:?}: {}", stderr(&o));
        assert!(!stderr(&o).contains("panicked"), "{args:?}");
    }
}

/// The one-bit listening demo (scenarios/one-bit-listen.toml) with a shorter chord: the built-in chord through
/// a 1-bit, second-order delta-sigma converter at 8 x 48 kHz.
const CHORD_CHAIN: &str = r#"
name = "chord"
description = "a chord through a 1-bit delta-sigma converter"
[simulation]
analog_rate = "768 kHz"
duration = "0.4 s"
settle = "50 ms"
seed = 1
[source]
waveform = "chord"
amplitude = "0.5 V"
beat = "0.1 s"
[[stage]]
kind = "filter"
family = "bessel"
order = 4
cutoff = "40 kHz"
[[stage]]
kind = "delta_sigma_adc"
bits = 16
range = ["-1 V", "1 V"]
sample_rate = "48 kHz"
oversampling = 8
order = 2
quantizer_bits = 1
zeros = "dc"
[[stage]]
kind = "dac"
[[stage]]
kind = "filter"
family = "butterworth"
order = 6
cutoff = "18 kHz"
"#;

#[test]
fn chord_sources_are_answered_with_a_test_sine_and_by_requirements() {
    let d = tempfile::tempdir().unwrap();
    // --up-to: judged with a test sine of the chord's peak in the chord's place.
    let up = ["--up-to", "20 kHz"];
    let j = need(d.path(), CHORD_CHAIN, &up);
    let notes = j["notes"].to_string();
    assert!(notes.contains("test sine"), "{notes}");
    assert_eq!(j["written"]["pass"], false);
    let rows = j["need"]["rows"].as_array().unwrap();
    let cutoff = rows
        .iter()
        .find(|r| r["key"] == "stage.4.cutoff")
        .unwrap_or_else(|| panic!("{rows:?}"));
    assert_eq!(cutoff["direction"], "rise");
    let v = cutoff["value"].as_f64().unwrap();
    // Minimality (the issue's check): the value passes, 5 % short of it fails. Judged as `need` judges every
    // value, with the written chain's reference frequency (the low end is a fiftieth of the chain's lowest
    // rate, which this cutoff is: written into the file it would move the reference).
    let range = format!("stage.4.cutoff={}..{v}", 0.95 * v);
    let mut args = up.to_vec();
    args.extend(["--vary", &range, "--points", "3"]);
    let m = need(d.path(), CHORD_CHAIN, &args);
    let runs = row(&m)["runs"].as_array().unwrap();
    assert_eq!(runs.first().unwrap()["pass"], false, "{runs:?}");
    assert_eq!(runs.last().unwrap()["pass"], true, "{runs:?}");
    // The stand-in is what the note says: the same chain with that sine written in place of the chord, on
    // the record the note states (settle + 20 cycles at the low end, 18 kHz / 50), judges the same.
    let sine = CHORD_CHAIN
        .replace(
            "waveform = \"chord\"",
            "waveform = \"sine\"\nfrequency = \"1 kHz\"",
        )
        .replace("beat = \"0.1 s\"", "")
        .replace(
            "duration = \"0.4 s\"",
            &format!("duration = {}", 0.05 + 20.0 / (18e3 / 50.0)),
        );
    let s = need(d.path(), &sine, &up);
    let (a, b) = (
        j["written"]["metric"].as_f64().unwrap(),
        s["written"]["metric"].as_f64().unwrap(),
    );
    assert!((a - b).abs() < 1e-9, "chord stand-in {a}, sine {b}");
    // `limit` judges a chord source the same way.
    fs::write(d.path().join("s.toml"), CHORD_CHAIN).unwrap();
    let o = run_in(
        d.path(),
        &["limit", "s.toml", "--out", "lim", "--quiet", "--force"],
    );
    ok(&o);
    let l = json(&d.path().join("lim/limit.json"));
    assert!(
        l["notes"].to_string().contains("test sine"),
        "{}",
        l["notes"]
    );
    assert!(l["limit"]["frequency_hz"].as_f64().is_some());
    // --require: the chord itself is measured (its waveform fidelity); every candidate answers.
    let j = need(
        d.path(),
        CHORD_CHAIN,
        &["--require", "output.fidelity_db>=20", "--points", "5"],
    );
    assert!(j["written"]["metric"].as_f64().unwrap() < 20.0);
    let rows = j["need"]["rows"].as_array().unwrap();
    assert!(!rows.is_empty());
    assert!(rows.iter().any(|r| r["found"] == true), "{rows:?}");
    assert!(j["need"]["key"].is_string(), "{}", j["need"]);
}

#[test]
fn need_json_is_byte_identical_at_one_and_two_threads() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("s.toml"), JITTER_CHAIN).unwrap();
    let mut files = Vec::new();
    for t in ["1", "2"] {
        let out = format!("o{t}");
        let o = run_in(
            d.path(),
            &[
                "need",
                "s.toml",
                "--require",
                "adc.snr_db>=60",
                "--points",
                "5",
                "--threads",
                t,
                "--out",
                &out,
            ],
        );
        ok(&o);
        files.push(fs::read(d.path().join(out).join("need.json")).unwrap());
    }
    assert!(
        files[0] == files[1],
        "need.json differs between 1 and 2 threads"
    );
    // Something was solved (not a run of nothing).
    let j: serde_json::Value = serde_json::from_slice(&files[0]).unwrap();
    assert!(!j["need"]["rows"].as_array().unwrap().is_empty());
    assert!(j["need"]["rows"][0]["runs"].as_array().unwrap().len() >= 5);
}

#[test]
fn ctrl_c_stops_need_removes_its_temporaries_and_exits_130() {
    let d = tempfile::tempdir().unwrap();
    // Long runs: each of the study's runs simulates 2 s on a 4 MHz grid.
    let long = SLEW_CHAIN.replace("duration = \"4 ms\"", "duration = \"2 s\"");
    fs::write(d.path().join("s.toml"), long).unwrap();
    let out = d.path().join("o");
    let (status, err) = common::interrupt_after(
        common::bin()
            .current_dir(d.path())
            .args([
                "need",
                "s.toml",
                "--require",
                "output.sinad_db>=60",
                "--threads",
                "1",
                "--out",
            ])
            .arg(&out),
        std::time::Duration::from_millis(500),
    );
    assert_eq!(status.code(), Some(130), "{err}");
    assert!(err.contains("interrupt"), "{err}");
    assert!(!err.contains("panicked"), "{err}");
    if out.exists() {
        for e in fs::read_dir(&out).unwrap() {
            let n = e.unwrap().file_name().to_string_lossy().to_string();
            assert!(!n.ends_with(".tmp"), "left {n}");
        }
    }
}

#[test]
fn with_no_vary_a_converters_bits_are_a_candidate() {
    // The jitter chain with negligible jitter and 8 bits: SNR = 6.02 N + 1.76 dB for a full-scale sine
    // (common practice, no source), 0.35 dB less at 2.4 V of the 2.5 V half range: 49.6 dB at 8 bits,
    // 55.6 dB at 9. So 52 dB needs 9 bits.
    let d = tempfile::tempdir().unwrap();
    let sc = JITTER_CHAIN
        .replace("aperture_jitter = \"20 ns\"", "aperture_jitter = \"1 ps\"")
        .replace("bits = 16", "bits = 8");
    let j = need(d.path(), &sc, &["--require", "adc.snr_db>=52"]);
    let rows = j["need"]["rows"].as_array().unwrap();
    let bits = rows
        .iter()
        .find(|r| r["key"] == "stage.2.bits")
        .unwrap_or_else(|| panic!("{rows:?}"));
    assert_eq!(bits["direction"], "rise");
    assert_eq!(bits["value"].as_f64().unwrap(), 9.0);
    let snr = bits["metric_at_value"].as_f64().unwrap();
    assert!((snr - 55.6).abs() < 1.0, "{snr}");
}
