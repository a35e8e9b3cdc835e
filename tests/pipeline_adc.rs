//! Integration tests of the `pipeline_adc` stage kind: they run the built `convchain` binary like a user would.

mod common;

use std::fs;

use common::{json, ok, run_in};

/// sine (0.999 of full scale, centred half an LSB low) -> 12-bit pipeline at 10 MHz -> ideal DAC, on a grid of
/// 20 x the conversion rate; `extra` goes into the pipeline's table.
fn scenario(name: &str, extra: &str) -> String {
    let q = 2.0 / 4096.0;
    format!(
        r#"
name = "{name}"
[simulation]
analog_rate = 2e8
duration = 4e-3
settle = 4e-4
seed = 9
[source]
waveform = "sine"
frequency = 1.37e5
amplitude = 0.999
offset = {offset}
[[stage]]
kind = "pipeline_adc"
bits = 12
range = ["-1 V", "1 V"]
sample_rate = "10 MHz"
{extra}
[[stage]]
kind = "dac"
[analysis]
harmonics = 9
"#,
        offset = -0.5 * q
    )
}

#[test]
fn an_ideal_pipeline_reaches_the_ideal_sinad_and_states_its_latency_in_clocks() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("pipe.toml"), scenario("pipe", "")).unwrap();
    let o = run_in(
        d.path(),
        &["run", "pipe.toml", "--quiet", "--no-plots", "--no-wav"],
    );
    ok(&o);
    let r = json(&d.path().join("out/pipe/report.json"));
    // IEEE Std 1241 (and W. R. Bennett, BSTJ 1948): an ideal N-bit quantizer of a full-scale sine gives SINAD =
    // 6.02 N + 1.76 dB; the sine is 0.999 of full scale (-0.009 dB). An ideal pipeline is that quantizer code for
    // code (unit test beside the kind), so the flash's and the SAR's 0.2 dB allowance applies (36k conversions).
    let adc = &r["adc"];
    let sinad = adc["sinad_db"].as_f64().unwrap();
    let expect = 6.02 * 12.0 + 1.76 + 20.0 * 0.999f64.log10();
    assert!(
        (sinad - expect).abs() < 0.2,
        "SINAD {sinad:.3} dB vs {expect:.3} dB"
    );
    let enob = adc["enob_bits"].as_f64().unwrap();
    assert!((enob - 12.0).abs() < 0.05, "ENOB {enob}");
    assert_eq!(adc["codes_clipped"], 0);
    // 12 bits of 1.5-bit stages: 10 stages and a 2-bit flash, so 10 + 1 clocks of 100 ns (the kind's formula);
    // the budget adds half an update period of the DAC's zero-order hold (common practice, no source), and the
    // cross-correlation agrees within 1 %.
    let budget = r["latency"]["budget"].as_array().unwrap();
    let line = budget
        .iter()
        .find(|l| {
            l["stage"]
                .as_str()
                .unwrap()
                .contains("pipeline latency (11 sample clocks")
        })
        .unwrap_or_else(|| panic!("no pipeline line in {budget:?}"));
    assert!((line["seconds"].as_f64().unwrap() - 1.1e-6).abs() < 1e-15);
    let budget_s = r["latency"]["budget_s"].as_f64().unwrap();
    assert!((budget_s - 1.15e-6).abs() < 1e-12, "{budget_s}");
    let measured = r["latency"]["measured_s"].as_f64().unwrap();
    assert!(
        (measured / budget_s - 1.0).abs() < 0.01,
        "measured {measured} vs budget {budget_s}"
    );
    let echo = &r["chain"]["stages"][0];
    assert_eq!(
        (echo["stages"].as_u64(), echo["final_flash_bits"].as_u64()),
        (Some(10), Some(2)),
        "{echo}"
    );
}

#[test]
fn static_finds_the_missing_codes_of_a_stage_gain_error_and_names_it() {
    // A 1 % gain sigma on a 12-bit pipeline shifts its first stages' transitions by several LSB (e 2^(N-2) LSB for
    // stage 1; derived in the kind's unit tests): the code-density test (IEEE Std 1241) finds missing codes,
    // and the bench's ablation of the gain error removes them. Without it, none (the redundancy).
    let d = tempfile::tempdir().unwrap();
    for (name, extra, missing) in [
        ("gain", "stage_gain_error = 0.01", true),
        ("offsets", "comparator_offset = \"20 mV\"", false),
    ] {
        fs::write(d.path().join(format!("{name}.toml")), scenario(name, extra)).unwrap();
        let o = run_in(d.path(), &["static", &format!("{name}.toml"), "--quiet"]);
        ok(&o);
        let r = json(&d.path().join(format!("out/{name}/static.json")));
        let adc = &r["static"]["adc"];
        let n = adc["missing_codes"].as_u64().unwrap();
        if missing {
            assert!(n > 10, "{name}: {n} missing codes");
            let causes = adc["missing_code_causes"].as_array().unwrap();
            let cause = causes
                .iter()
                .find(|c| c["mechanism"] == "pipeline_adc.stage_gain_error")
                .unwrap_or_else(|| panic!("{causes:?}"));
            assert_eq!(cause["missing_codes"], 0);
        } else {
            // 20 mV of sigma on a 1 V reference: the stages' offsets are absorbed (Vref/4 = 12 sigma), the final
            // flash's reach the input divided by 2^10 (0.02 LSB sigma): no missing code, DNL small.
            assert_eq!(n, 0, "{name}");
            let dnl = adc["dnl_max_lsb"].as_f64().unwrap();
            assert!(dnl < 0.2, "{name}: DNL {dnl}");
        }
    }
}

#[test]
fn a_stage_resolution_the_kind_lacks_or_too_few_bits_exit_2_at_the_key() {
    let d = tempfile::tempdir().unwrap();
    for (name, extra, bits, want) in [
        (
            "half",
            "stage_bits = 2",
            12,
            "stage.1.stage_bits: must be 1.5, 2.5 or 3.5, found 2",
        ),
        (
            "few",
            "stage_bits = 2.5",
            3,
            "stage.1.bits: a pipeline of 2.5-bit stages needs at least 4 bits",
        ),
    ] {
        let text = scenario(name, extra).replace("bits = 12", &format!("bits = {bits}"));
        fs::write(d.path().join(format!("{name}.toml")), text).unwrap();
        let o = run_in(d.path(), &["check", &format!("{name}.toml")]);
        assert_eq!(o.status.code(), Some(2), "{name}");
        let e = common::stderr(&o);
        assert!(
            e.contains(&format!("{name}.toml:")) && e.contains(want),
            "{e}"
        );
    }
}

/// The demo scenario scenarios/ultrasound-pipeline.toml runs clean with every artefact (WAV files resampled from a
/// 200 MHz analysis grid to 48 kHz included; budget: about a second on the project's machine, see BENCHMARKS.md)
/// and its ADC's SINAD is what its bits and stage noise give.
#[test]
fn the_ultrasound_demo_runs_with_every_artefact_and_its_sinad_follows_its_bits_and_stage_noise() {
    let d = tempfile::tempdir().unwrap();
    let scen =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/ultrasound-pipeline.toml");
    fs::copy(&scen, d.path().join("us.toml")).unwrap();
    let o = run_in(d.path(), &["run", "us.toml", "--quiet", "--out", "res"]);
    ok(&o);
    for f in ["report.json", "output.wav", "input.wav", "error.wav"] {
        assert!(d.path().join("res").join(f).exists(), "{f} missing");
    }
    let r = json(&d.path().join("res/report.json"));
    let sinad = r["adc"]["sinad_db"].as_f64().unwrap();
    // Quantization q / sqrt(12) with q = 2 V / 2^12 (W. R. Bennett, BSTJ 1948) and 150 uV rms at each 1.5-bit
    // stage's input, referred to the converter's input through the gains of 2 before it: 150 uV x sqrt(1 + 1/4 +
    // 1/16 + ...) = 150 uV x sqrt(4/3) (noise powers add; common practice, no source). With the 0.9 V sine:
    // SINAD = 20 log10((0.9 / sqrt 2) / sqrt(q^2 / 12 + (4/3) 150e-6^2)) = 69.1 dB. Allowance 0.6 dB for the
    // comparator offsets (absorbed by the correction) and the estimate's spread over 15k conversions.
    let q = 2.0 / 4096.0;
    let noise = (q * q / 12.0 + 4.0 / 3.0 * 150e-6f64.powi(2)).sqrt();
    let expect = 20.0 * ((0.9 / 2f64.sqrt()) / noise).log10();
    assert!(
        (sinad - expect).abs() < 0.6,
        "SINAD {sinad:.2} dB vs {expect:.2} dB"
    );
    assert_eq!(r["adc"]["codes_clipped"], 0);
    assert_eq!(r["listening"]["rate_hz"], 48_000);
}
