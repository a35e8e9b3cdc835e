//! Integration tests: they run the built `convchain` binary like a user would.

mod common;

use std::fs;

use common::{json, ok, repo, run_in, stderr, stdout};

#[test]
fn run_with_no_scenario_writes_the_report_and_the_waveforms() {
    let d = tempfile::tempdir().unwrap();
    let o = run_in(d.path(), &["run", "--quiet"]);
    ok(&o);
    let out = d.path().join("out/studio-interface");
    let r = json(&out.join("report.json"));
    for key in ["scenario", "chain", "adc", "output", "latency"] {
        assert!(r.get(key).is_some(), "report.json lacks {key}");
    }
    for key in [
        "sample_rate_hz",
        "conversion_time_s",
        "codes_clipped",
        "snr_db",
        "sinad_db",
        "enob_bits",
        "thd_db",
        "sfdr_dbc",
    ] {
        assert!(r["adc"].get(key).is_some(), "adc lacks {key}");
    }
    for key in [
        "snr_db",
        "sinad_db",
        "enob_bits",
        "thd_db",
        "sfdr_dbc",
        "gain_db",
        "fidelity_db",
        "fundamental_hz",
    ] {
        assert!(r["output"].get(key).is_some(), "output lacks {key}");
    }
    for key in ["measured_s", "phase_delay_s", "budget_s", "budget"] {
        assert!(r["latency"].get(key).is_some(), "latency lacks {key}");
    }
    // A 16-bit converter driven near full scale keeps well over 12 effective bits.
    let enob = r["adc"]["enob_bits"].as_f64().unwrap();
    assert!(enob > 12.0 && enob < 16.5, "adc enob {enob}");
    let csv = fs::read_to_string(out.join("waveforms.csv")).unwrap();
    let header = csv.lines().next().unwrap();
    assert!(header.starts_with("time_s,source_v,"), "{header}");
    assert!(csv.lines().count() > 1000);
    // No temporary files are left behind.
    for e in fs::read_dir(&out).unwrap() {
        let n = e.unwrap().file_name().to_string_lossy().to_string();
        assert!(!n.ends_with(".tmp"), "left {n}");
    }
}

#[test]
fn the_same_scenario_and_seed_give_byte_identical_outputs() {
    let d = tempfile::tempdir().unwrap();
    let sc = repo("scenarios/radio-stl.toml");
    let sc = sc.to_str().unwrap();
    for out in ["a", "b"] {
        let o = run_in(d.path(), &["run", sc, "--quiet", "--out", out]);
        ok(&o);
    }
    for f in ["report.json", "waveforms.csv", "waveforms.npy"] {
        let a = fs::read(d.path().join("a").join(f)).unwrap();
        let b = fs::read(d.path().join("b").join(f)).unwrap();
        assert!(a == b, "{f} differs between identical runs");
    }
}

#[test]
fn every_demo_scenario_runs_and_reports_a_latency() {
    let d = tempfile::tempdir().unwrap();
    for name in ["river-gauge", "studio-interface", "radio-stl"] {
        let sc = repo(&format!("scenarios/{name}.toml"));
        let start = std::time::Instant::now();
        let o = run_in(d.path(), &["run", sc.to_str().unwrap(), "--quiet"]);
        assert!(o.status.success(), "{name}: {}", stderr(&o));
        let r = json(&d.path().join("out").join(name).join("report.json"));
        assert!(r["latency"]["measured_s"].as_f64().unwrap() > 0.0, "{name}");
        assert!(r["output"]["fidelity_db"].as_f64().is_some(), "{name}");
        eprintln!("{name}: {:.2} s", start.elapsed().as_secs_f64());
    }
}

const IDEAL_CHAIN: &str = r#"
name = "ideal"
[simulation]
analog_rate = "10 MHz"
duration = "30 ms"
settle = "5 ms"
seed = 1
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2.4 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 12
range = ["0 V", "5 V"]
sample_rate = "100 kHz"
conversion_time = "8 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
[analysis]
harmonics = 9
"#;

#[test]
fn ideal_chain_latency_is_conversion_time_plus_half_a_sample_period() {
    // A zero-order hold delays by half its update period, T/2 (A. V. Oppenheim and R. W. Schafer, Discrete-Time
    // Signal Processing, 3rd ed., section 4.8.3, the ideal reconstruction with a zero-order hold); the code is
    // available one conversion time after the sampling instant (the definition of conversion time).
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("ideal.toml"), IDEAL_CHAIN).unwrap();
    let o = run_in(d.path(), &["run", "ideal.toml", "--quiet"]);
    ok(&o);
    let r = json(&d.path().join("out/ideal/report.json"));
    let expect = 8e-6 + 0.5 / 100e3;
    let period = 1.0 / 100e3;
    for key in ["measured_s", "phase_delay_s", "budget_s"] {
        let got = r["latency"][key].as_f64().unwrap();
        assert!(
            (got - expect).abs() < 0.01 * period,
            "{key}: {got} vs {expect}"
        );
    }
    // Bennett (BSTJ 1948): an ideal 12-bit quantizer of a near-full-scale sine gives SNR ~ 6.02 N + 1.76 dB
    // less 20 log10(FS/A); the ENOB (full-scale corrected) is then close to 12.
    let enob = r["adc"]["enob_bits"].as_f64().unwrap();
    assert!((enob - 12.0).abs() < 0.15, "enob {enob}");
    let fit = r["adc"]["enob_sinefit_bits"].as_f64().unwrap();
    assert!((fit - enob).abs() < 0.1, "sine-fit {fit} vs FFT {enob}");
}

#[test]
fn bad_input_exits_2_names_the_place_and_writes_nothing() {
    let d = tempfile::tempdir().unwrap();
    let text = IDEAL_CHAIN.replace("bits = 12", "bitz = 12");
    fs::write(d.path().join("bad.toml"), text).unwrap();
    let o = run_in(d.path(), &["run", "bad.toml"]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("bad.toml:"), "{e}");
    assert!(e.contains("bitz"), "{e}");
    assert!(e.contains("bits"), "should suggest the right key: {e}");
    assert!(
        !d.path().join("out").exists(),
        "nothing may be written on bad input"
    );
}

#[test]
fn a_missing_scenario_file_exits_2() {
    let d = tempfile::tempdir().unwrap();
    let o = run_in(d.path(), &["run", "nope.toml"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
}

#[test]
fn an_unknown_option_exits_2() {
    let d = tempfile::tempdir().unwrap();
    let o = run_in(d.path(), &["run", "--frobnicate"]);
    assert_eq!(o.status.code(), Some(2));
}

#[test]
fn check_validates_without_writing() {
    let d = tempfile::tempdir().unwrap();
    let sc = repo("scenarios/river-gauge.toml");
    let o = run_in(d.path(), &["check", sc.to_str().unwrap()]);
    ok(&o);
    assert!(String::from_utf8_lossy(&o.stdout).contains("ok"));
    assert_eq!(fs::read_dir(d.path()).unwrap().count(), 0);
}

#[test]
fn init_writes_a_starter_that_checks_and_never_overwrites() {
    let d = tempfile::tempdir().unwrap();
    let o = run_in(d.path(), &["init", "mine.toml", "--out", "work"]);
    ok(&o);
    let path = d.path().join("work/mine.toml");
    assert!(path.exists());
    let o = run_in(d.path(), &["check", path.to_str().unwrap()]);
    ok(&o);
    fs::write(&path, "my own notes").unwrap();
    let o = run_in(d.path(), &["init", "mine.toml", "--out", "work"]);
    assert_eq!(o.status.code(), Some(2));
    assert_eq!(fs::read_to_string(&path).unwrap(), "my own notes");
}

#[test]
fn a_folder_holding_foreign_files_is_refused() {
    let d = tempfile::tempdir().unwrap();
    fs::create_dir(d.path().join("mine")).unwrap();
    fs::write(d.path().join("mine/report.json"), "keep").unwrap();
    let o = run_in(d.path(), &["run", "--quiet", "--out", "mine"]);
    assert_eq!(o.status.code(), Some(2));
    assert_eq!(
        fs::read_to_string(d.path().join("mine/report.json")).unwrap(),
        "keep"
    );
}

#[test]
fn json_flag_prints_the_report() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("ideal.toml"), IDEAL_CHAIN).unwrap();
    let o = run_in(d.path(), &["run", "ideal.toml", "--json"]);
    ok(&o);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["scenario"]["name"], "ideal");
}

#[test]
fn static_measures_the_adc_and_the_dac() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("ideal.toml"), IDEAL_CHAIN).unwrap();
    let o = run_in(d.path(), &["static", "ideal.toml", "--quiet"]);
    ok(&o);
    let r = json(&d.path().join("out/ideal/static.json"));
    for part in ["adc", "dac"] {
        let s = &r["static"][part];
        for key in ["dnl_max_lsb", "inl_max_lsb", "missing_codes", "monotonic"] {
            assert!(!s[key].is_null(), "static.{part} lacks {key}");
        }
    }
    // An ideal DAC: DNL and INL zero to rounding (IEEE Std 1658 definitions of DNL and INL).
    assert!(r["static"]["dac"]["dnl_max_lsb"].as_f64().unwrap() < 1e-9);
    assert_eq!(r["static"]["dac"]["monotonic"], true);
    // An ideal ADC through the code-density test: |DNL| small (IEEE Std 1241 code-density test).
    assert!(r["static"]["adc"]["dnl_max_lsb"].as_f64().unwrap() < 0.1);
    assert_eq!(r["static"]["adc"]["missing_codes"], 0);
}

#[test]
fn static_headline_reads_a_comparator_offset_with_ieee_1241_sign() {
    // 6 bits over 0..5 V: q = 78.125 mV, so a +100 mV comparator offset (the converter reads its input 100 mV
    // high) is +1.28 LSB with IEEE Std 1241's sign (offset = ideal transition less the actual one). The headline
    // is the code-density test with the bench's known sine (IEEE Std 1241 histogram test with a known input);
    // the slow ramp must agree. Tolerance 0.05 LSB: common practice, no source.
    let d = tempfile::tempdir().unwrap();
    let six = IDEAL_CHAIN.replace("bits = 12", "bits = 6");
    for (name, offset, want) in [
        ("plain", "", 0.0),
        ("offset", "comparator_offset = \"100 mV\"\n", 1.28),
    ] {
        let text = six
            .replace(
                "conversion_time = \"8 us\"\n",
                &format!("conversion_time = \"8 us\"\n{offset}"),
            )
            .replace("name = \"ideal\"", &format!("name = \"{name}\""));
        fs::write(d.path().join(format!("{name}.toml")), text).unwrap();
        let o = run_in(d.path(), &["static", &format!("{name}.toml"), "--quiet"]);
        ok(&o);
        let r = json(&d.path().join(format!("out/{name}/static.json")));
        let adc = &r["static"]["adc"];
        let headline = adc["offset_lsb"].as_f64().unwrap();
        let ramp = adc["ramp"]["offset_lsb"].as_f64().unwrap();
        assert!(
            (headline - want).abs() < 0.05,
            "{name}: headline offset {headline} LSB, want {want}"
        );
        assert!(
            (ramp - want).abs() < 0.05,
            "{name}: ramp offset {ramp} LSB, want {want}"
        );
        // An offset alone leaves the span: gain error about 0 in both tests.
        for g in [
            adc["gain_error_lsb"].as_f64().unwrap(),
            adc["ramp"]["gain_error_lsb"].as_f64().unwrap(),
        ] {
            assert!(g.abs() < 0.1, "{name}: gain error {g} LSB");
        }
    }
}

#[test]
fn a_run_too_big_for_memory_is_refused_with_advice() {
    let d = tempfile::tempdir().unwrap();
    let text = IDEAL_CHAIN.replace("duration = \"30 ms\"", "duration = \"2000 s\"");
    fs::write(d.path().join("huge.toml"), text).unwrap();
    let o = run_in(d.path(), &["run", "huge.toml"]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("GiB") && e.contains("simulation.duration"),
        "{e}"
    );
    assert!(!d.path().join("out").exists());
}

#[test]
fn a_live_input_converter_budget_matches_the_measured_delay() {
    // No outside source: the budget's own model of a converter without a hold (the code follows the input at
    // the finer bit trials) against the measured delay of the same chain. The river-gauge demo: 8 bits, 50 us per
    // trial, a framed link and an RC filter; the budget must land within 3 % of the conversion time. The model
    // weights the trials as if thresholds were crossed evenly; a sine crosses some faster than others, so the
    // measured delay depends on where the sine's mean sits in the threshold tree: shifting the offset by quarter
    // LSBs moved measured - budget between -12.1 us and +3.5 us (450 us conversion) with either transfer.
    let d = tempfile::tempdir().unwrap();
    let sc = repo("scenarios/river-gauge.toml");
    let o = run_in(
        d.path(),
        &[
            "run",
            sc.to_str().unwrap(),
            "--json",
            "--no-plots",
            "--no-wav",
            "--out",
            "o",
        ],
    );
    ok(&o);
    let r: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let diff = r["latency"]["difference_s"].as_f64().unwrap();
    assert!(diff.abs() < 0.03 * 450e-6, "measured - budget = {diff:e} s");
    assert_eq!(r["latency"]["flagged"], false);
}

/// An 8-bit converter at 20 kHz and a DAC with no reconstruction filter: the hold's images reach the output.
const UNFILTERED: &str = r#"
name = "unfiltered"
[simulation]
analog_rate = "2 MHz"
duration = "60 ms"
settle = "5 ms"
seed = 3
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "5 V"]
sample_rate = "20 kHz"
conversion_time = "20 us"
[[stage]]
kind = "dac"
"#;

#[test]
fn output_figures_default_to_the_converters_nyquist_band_and_the_wideband_ones_are_reported_beside()
{
    // Without analysis.band the output metrics use the converter's Nyquist band (our default; IEEE Std 1241
    // measures a converter's SINAD up to fs/2); the zero-order hold's images above it appear only in the
    // wideband figures.
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("u.toml"), UNFILTERED).unwrap();
    let o = run_in(d.path(), &["run", "u.toml", "--no-plots", "--no-wav"]);
    ok(&o);
    let j = json(&d.path().join("out/unfiltered/report.json"));
    assert_eq!(j["output"]["band_hz"].as_f64().unwrap(), 10e3);
    assert_eq!(j["run"]["output_band_rule"], "converter_nyquist");
    let wide = &j["output"]["wideband"];
    assert!(wide["band_hz"].as_f64().unwrap() > 10e3, "{wide}");
    let (sinad, sinad_wide) = (
        j["output"]["sinad_db"].as_f64().unwrap(),
        wide["sinad_db"].as_f64().unwrap(),
    );
    // An 8-bit converter: about 49.9 dB in its Nyquist band (Bennett); the images of an unfiltered hold carry
    // far more power than the quantization noise, so the wideband SINAD is much lower.
    assert!((sinad - 49.9).abs() < 1.5, "{sinad}");
    assert!(sinad_wide < sinad - 10.0, "{sinad_wide} vs {sinad}");
    let out = stdout(&o);
    assert!(
        out.contains("output figures over 0 .. 10 kHz (the converter's Nyquist band); over 0 .. "),
        "{out}"
    );
}

#[test]
fn static_names_the_hold_droop_as_the_cause_of_missing_codes() {
    // A hold that sags 5 V/ms over an 8 us conversion loses 40 mV (2 LSB of an 8-bit, 5 V converter) while the
    // SAR decides its bits: codes go missing (the physics of the models here, no outside source). Removing the
    // droop alone clears them; the tool says so.
    let d = tempfile::tempdir().unwrap();
    fs::write(
        d.path().join("dr.toml"),
        r#"
name = "drooping-hold"
[simulation]
analog_rate = "10 MHz"
duration = "10 ms"
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sample_hold"
droop = "5 V/ms"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "5 V"]
sample_rate = "100 kHz"
conversion_time = "8 us"
[[stage]]
kind = "dac"
"#,
    )
    .unwrap();
    let o = run_in(d.path(), &["static", "dr.toml"]);
    ok(&o);
    let j = json(&d.path().join("out/drooping-hold/static.json"));
    let adc = &j["static"]["adc"];
    assert!(adc["missing_codes"].as_u64().unwrap() > 0, "{adc}");
    let causes = adc["missing_code_causes"].as_array().unwrap();
    let droop = causes
        .iter()
        .find(|c| c["mechanism"] == "sample_hold.droop")
        .unwrap_or_else(|| panic!("{causes:?}"));
    assert_eq!(droop["missing_codes"], 0);
    assert!(
        stdout(&o).contains("why codes are missing") && stdout(&o).contains("droop = 0: 0 missing"),
        "{}",
        stdout(&o)
    );
    // Without missing codes the field is absent and nothing is said.
    let text = fs::read_to_string(d.path().join("dr.toml")).unwrap();
    fs::write(
        d.path().join("ideal.toml"),
        text.replace("droop = \"5 V/ms\"", ""),
    )
    .unwrap();
    let o = run_in(d.path(), &["static", "ideal.toml", "--out", "ideal"]);
    ok(&o);
    assert!(!stdout(&o).contains("why codes are missing"));
}

/// A 12-bit chain at 48 kSPS on a 4.8 MHz grid whose DAC output slews at `slew`.
fn slewing_chain(slew: &str) -> String {
    format!(
        "name = \"slip\"\n[simulation]\nanalog_rate = \"4.8 MHz\"\nduration = \"60 ms\"\nsettle = \"10 ms\"\n\
         [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"2 V\"\n\
         [[stage]]\nkind = \"sar_adc\"\nbits = 12\nrange = [\"-2.5 V\", \"2.5 V\"]\n\
         conversion_time = \"10 us\"\nsample_rate = \"48 kHz\"\n\
         [[stage]]\nkind = \"dac\"\nslew_rate = \"{slew}\"\n"
    )
}

#[test]
fn a_slew_rate_slip_is_warned_by_check_and_run_and_listed_in_report_json_with_its_latency() {
    let d = tempfile::tempdir().unwrap();
    let text = slewing_chain("0.5 V/s");
    let line = text
        .lines()
        .position(|l| l.starts_with("slew_rate"))
        .unwrap()
        + 1;
    fs::write(d.path().join("s.toml"), &text).unwrap();
    let o = run_in(d.path(), &["check", "s.toml"]);
    ok(&o);
    let err = stderr(&o);
    let want = format!("warning: s.toml:{line}:13: stage.2.slew_rate: a slew rate of 500 mV/s");
    assert!(err.contains(&want), "{err}");
    assert!(err.contains("probably slew_rate = \"0.5 V/us\""), "{err}");
    assert!(String::from_utf8_lossy(&o.stdout).contains("ok"));

    let o = run_in(
        d.path(),
        &["run", "s.toml", "--out", "o", "--no-plots", "--no-wav"],
    );
    ok(&o);
    assert!(stderr(&o).contains(&want), "{}", stderr(&o));
    let r = json(&d.path().join("o/report.json"));
    let w = r["warnings"].as_array().unwrap();
    assert_eq!(w.len(), 2, "{w:?}");
    assert_eq!(w[0]["key"], "stage.2.slew_rate");
    assert_eq!(w[0]["location"], format!("s.toml:{line}:13"));
    // After the run: the latency is nowhere near the budget (the output barely moves), pointed at the same key.
    assert_eq!(w[1]["key"], "stage.2.slew_rate");
    assert!(
        w[1]["message"]
            .as_str()
            .unwrap()
            .contains("the measured latency"),
        "{w:?}"
    );
    assert!(r["latency"]["flagged"].as_bool().unwrap());

    // The value meant: no warning before or after the run.
    fs::write(d.path().join("t.toml"), slewing_chain("0.5 V/us")).unwrap();
    let o = run_in(
        d.path(),
        &["run", "t.toml", "--out", "p", "--no-plots", "--no-wav"],
    );
    ok(&o);
    assert!(!stderr(&o).contains("warning"), "{}", stderr(&o));
    let r = json(&d.path().join("p/report.json"));
    assert_eq!(r["warnings"].as_array().unwrap().len(), 0);
}

#[test]
fn a_grid_too_coarse_for_the_converter_is_warned_by_check_at_the_analog_rate() {
    let d = tempfile::tempdir().unwrap();
    let text = slewing_chain("13 V/us").replace("4.8 MHz", "150 kHz");
    fs::write(d.path().join("s.toml"), &text).unwrap();
    let o = run_in(d.path(), &["check", "s.toml"]);
    ok(&o);
    let err = stderr(&o);
    assert!(
        err.contains("warning: s.toml:3:15: simulation.analog_rate: the analog grid (150 kHz) has 3.125 steps"),
        "{err}"
    );
    assert!(err.contains("probably analog_rate = \"192 kHz\""), "{err}");
}
