//! Integration tests of the meters a run adds for particular sources: two-tone IMD and step metrics.

mod common;

use std::fs;

use common::{json, ok, run_in, stdout};

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
