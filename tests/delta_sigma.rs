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
    // The DAC's loop reports its own overloads beside the output figures.
    assert_eq!(r["output"]["dac_modulator_overloads"], 0);
    assert!(r["adc"]["snr_db"].as_f64().unwrap() > 95.0);
    assert_eq!(r["adc"]["codes_clipped"], 0);
    // The loop's own output is drawn (the bit-stream spectrum), beside the code spectrum.
    assert!(out.join("spectrum_modulator.png").exists());
    assert!(out.join("spectrum_modulator.svg").exists());
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
    // The report says how much minimum phase saves: the budget lines quote the linear-phase delay, and the
    // stage's echo gives it.
    let lines = r["latency"]["budget"].as_array().unwrap();
    let quoting = lines
        .iter()
        .filter(|l| l["stage"].as_str().unwrap().contains("linear phase: "))
        .count();
    assert_eq!(quoting, 2);
    let lin = ds_stage(&r)["decimation"]["delay_linear_phase_s"]
        .as_f64()
        .unwrap();
    assert!(lin > 5.0 * measured / 2.0, "{lin}");
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

#[test]
fn static_tests_measure_its_dc_transfer() {
    // The DC-transfer test replaces the per-code ones: static.json holds adc_dc_transfer and dac_dc_transfer,
    // with no DNL or missing codes (they do not apply), and the INL plots are written.
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("s");
    let o = run(&[
        "static",
        repo("scenarios/field-recorder.toml").to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let table = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(
        table.contains("ADC (DC transfer)")
            && table.contains("DNL and missing codes: do not apply"),
        "{table}"
    );
    let j: serde_json::Value =
        serde_json::from_str(&fs::read_to_string(out.join("static.json")).unwrap()).unwrap();
    let s = &j["static"];
    assert!(s["adc"].is_null() && s["dac"].is_null());
    for k in ["adc_dc_transfer", "dac_dc_transfer"] {
        let t = &s[k];
        let n = t["level_v"].as_array().unwrap().len();
        assert!(n >= 25, "{k}: {n} levels");
        assert_eq!(t["inl_bestfit_ppm"].as_array().unwrap().len(), n);
        assert!(t["inl_max_ppm"].as_f64().unwrap().is_finite());
        assert!(t.get("dnl_max_lsb").is_none() && t.get("missing_codes").is_none());
    }
    assert!(s["adc_dc_transfer"]["noise_free_bits"].as_f64().unwrap() > 10.0);
    assert!(out.join("static_adc_dc.png").exists() && out.join("static_dac_dc.png").exists());
}

#[test]
fn an_oversampling_ratio_that_is_not_a_multiple_of_four_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let sc = variant(
        d.path(),
        &[(
            "oversampling = 64\norder = 4",
            "oversampling = 30\norder = 4",
        )],
    );
    let o = run(&["check", sc.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("multiple of 4"), "{}", stderr(&o));
}

#[test]
fn a_sweep_of_the_oversampling_ratio_shows_the_noise_falling() {
    // Each doubling of OSR lowers the in-band noise of an order-L loop by about 6 L + 3 dB (Schreier and Temes
    // 2005, section 4.1) until something else (the preamp's noise, the filter) sets the floor: ask only that
    // the SNR rises with every doubling from 16 to 64.
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("sw");
    let o = run(&[
        "sweep",
        repo("scenarios/field-recorder.toml").to_str().unwrap(),
        "--vary",
        "stage.2.oversampling=16..128",
        "--points",
        "4",
        "--log",
        "--out",
        out.to_str().unwrap(),
    ]);
    ok(&o);
    let (header, rows) = common::csv_rows(&out.join("sweep.csv"));
    let col = |name: &str| -> Vec<f64> {
        let i = header.iter().position(|h| h == name).unwrap();
        rows.iter().map(|r| r[i].parse().unwrap()).collect()
    };
    let snr = col("adc.snr_db");
    let osr = col("stage.2.oversampling");
    assert_eq!(osr, vec![16.0, 32.0, 64.0, 128.0]);
    assert!(snr[1] > snr[0] + 10.0 && snr[2] > snr[1] + 10.0, "{snr:?}");
}
