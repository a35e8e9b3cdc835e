//! Integration tests of the oversampling converter: the real binary on the field-recorder demo and variants.

mod common;

use std::fs;

use common::{json, ok, repo, run, stderr, stdout};

/// The demo scenario with every `from` replaced by `to` (each must occur), written into `dir`.
fn variant(dir: &std::path::Path, edits: &[(&str, &str)]) -> std::path::PathBuf {
    let mut text = fs::read_to_string(repo("scenarios/field-recorder.toml")).unwrap();
    for (from, to) in edits {
        assert!(text.contains(from), "{from}");
        text = text.replace(from, to);
    }
    let p = dir.join("variant.toml");
    fs::write(&p, text).unwrap();
    p
}

fn ds_stage(r: &serde_json::Value) -> serde_json::Value {
    r["chain"]["stages"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["kind"] == "delta_sigma_adc")
        .cloned()
        .unwrap()
}

#[test]
fn the_demo_measures_the_decimation_delay_it_states() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("o");
    let o = run(&[
        "run",
        "--quiet",
        repo("scenarios/field-recorder.toml").to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    ok(&o);
    let r = json(&out.join("report.json"));
    let st = ds_stage(&r);
    // The decimation filter meets what the keys ask (measured on the designed taps).
    assert!(st["decimation"]["ripple_db"].as_f64().unwrap() <= 0.01);
    assert!(st["decimation"]["attenuation_db"].as_f64().unwrap() >= 100.0);
    // The end-to-end delay measured by cross-correlation agrees with the budget, whose largest line is the
    // decimation filter (a linear-phase FIR delays by (taps - 1)/2 samples: Oppenheim and Schafer 2010, 5.7).
    let lat = &r["latency"];
    let measured = lat["measured_s"].as_f64().unwrap();
    let budget = lat["budget_s"].as_f64().unwrap();
    assert!((measured - budget).abs() < 200e-9, "{measured} vs {budget}");
    let filt = lat["budget"]
        .as_array()
        .unwrap()
        .iter()
        .find(|l| l["stage"].as_str().unwrap().contains("decimation filter"))
        .expect("a decimation line");
    let taps = st["decimation"]["fir_taps"].as_f64().unwrap();
    let fir_s = (taps - 1.0) / 2.0 / (4.0 * 48_000.0);
    let cic_s = 5.0 * 15.0 / 2.0 / 3.072e6;
    assert!((filt["seconds"].as_f64().unwrap() - fir_s - cic_s).abs() < 1e-12);
    assert_eq!(r["adc"]["modulator_overloads"], 0);
    assert!(r["adc"]["snr_db"].as_f64().unwrap() > 95.0);
    assert_eq!(r["adc"]["codes_clipped"], 0);
}

#[test]
fn minimum_phase_is_far_earlier_and_as_clean() {
    let d = tempfile::tempdir().unwrap();
    let sc = variant(
        d.path(),
        &[("filter_phase = \"linear\"", "filter_phase = \"minimum\"")],
    );
    let out = d.path().join("o");
    ok(&run(&[
        "run",
        "--quiet",
        sc.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]));
    let r = json(&out.join("report.json"));
    let measured = r["latency"]["measured_s"].as_f64().unwrap();
    assert!(measured < 250e-6, "{measured}");
    let budget = r["latency"]["budget_s"].as_f64().unwrap();
    assert!((measured - budget).abs() < 200e-9, "{measured} vs {budget}");
    assert!(r["adc"]["snr_db"].as_f64().unwrap() > 95.0);
}

#[test]
fn overdriving_the_loop_is_counted_and_said() {
    let d = tempfile::tempdir().unwrap();
    let sc = variant(
        d.path(),
        &[("amplitude = \"1 V\"", "amplitude = \"1.9 V\"")],
    );
    let out = d.path().join("o");
    let o = run(&["run", sc.to_str().unwrap(), "--out", out.to_str().unwrap()]);
    ok(&o);
    let r = json(&out.join("report.json"));
    let st = ds_stage(&r);
    assert!(st["max_stable_input_v"].as_f64().unwrap() < 1.9);
    assert!(r["adc"]["modulator_overloads"].as_u64().unwrap() > 0);
    assert!(
        stdout(&o).contains("noise-shaping loop overloaded"),
        "{}",
        stdout(&o)
    );
}

#[test]
fn an_inconsistent_clock_is_refused_with_its_location() {
    let d = tempfile::tempdir().unwrap();
    let sc = variant(
        d.path(),
        &[(
            "oversampling = 64",
            "oversampling = 64\nmodulator_clock = \"3 MHz\"",
        )],
    );
    let o = run(&["check", sc.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(
        e.contains("modulator_clock") && e.contains("variant.toml:"),
        "{e}"
    );
}
