//! Hops in series (`[hold] ADC [links] DAC` groups one after another, with analog stages between them), driven
//! like a user would: the scenarios are written here, run by the built binary, and report.json and
//! waveforms.csv are read back.

mod common;

use std::path::Path;

use common::{json, ok, repo, run};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

const HEAD: &str = r#"name = "hops"
[simulation]
analog_rate = "960 kHz"
duration = "120 ms"
settle = "20 ms"
seed = 7

[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1.5 V"
"#;

const TAIL: &str = r#"
[analysis]
band = "15 kHz"
"#;

/// One hop: a `bits`-bit SAR at 48 kSPS, a link of `delay`, a DAC and a Butterworth filter after it.
fn hop(bits: u32, delay: &str) -> String {
    format!(
        r#"
[[stage]]
kind = "sar_adc"
bits = {bits}
range = ["-2 V", "2 V"]
clock = "960 kHz"
sample_rate = "48 kHz"

[[stage]]
kind = "link"
delay = "{delay}"

[[stage]]
kind = "dac"

[[stage]]
kind = "filter"
family = "butterworth"
order = 4
cutoff = "20 kHz"
"#
    )
}

const FS_HZ: f64 = 48e3;

/// Run the scenario made of `hops` in `dir` and return report.json.
fn run_hops(dir: &Path, hops: &[String], extra: &[&str]) -> serde_json::Value {
    std::fs::create_dir_all(dir).unwrap();
    let path = dir.join("s.toml");
    std::fs::write(&path, format!("{HEAD}{}{TAIL}", hops.concat())).unwrap();
    let out = dir.join("out");
    let mut args = vec![
        "run",
        s(&path),
        "--out",
        s(&out),
        "-q",
        "--no-wav",
        "--no-plots",
    ];
    args.extend_from_slice(extra);
    ok(&run(&args));
    json(&out.join("report.json"))
}

fn measured_s(r: &serde_json::Value) -> f64 {
    r["latency"]["measured_s"].as_f64().unwrap()
}

/// Noise and distortion power at the output in the analysis band (V^2): the fitted tone's power over SINAD.
fn noise_power_v2(r: &serde_json::Value) -> f64 {
    let a = r["output"]["amplitude_v"].as_f64().unwrap();
    let sinad_db = r["output"]["sinad_db"].as_f64().unwrap();
    a * a / 2.0 / 10f64.powf(sinad_db / 10.0)
}

#[test]
fn the_delays_of_hops_in_series_add() {
    // Delays of systems in cascade add (the phase delay of a cascade at one frequency is the sum of the
    // stages' phase delays: common practice, no source). Two hops in series must be measured as late as the
    // two hops run alone, summed, within 0.05 of a sample period of the converters.
    let d = tempfile::tempdir().unwrap();
    let (a, b) = (hop(16, "2 ms"), hop(16, "1.5 ms"));
    let one_a = run_hops(&d.path().join("a"), std::slice::from_ref(&a), &[]);
    let one_b = run_hops(&d.path().join("b"), std::slice::from_ref(&b), &[]);
    let two = run_hops(&d.path().join("ab"), &[a, b], &[]);
    let (la, lb, lab) = (measured_s(&one_a), measured_s(&one_b), measured_s(&two));
    eprintln!("one hop {la} s, the other {lb} s, both in series {lab} s");
    assert!(la > 2e-3 && lb > 1.5e-3, "{la} {lb}");
    assert!(
        (lab - (la + lb)).abs() < 0.05 / FS_HZ,
        "two hops {lab} s against {la} + {lb} = {} s",
        la + lb
    );
    // The budget lists every hop's lines in order, and agrees with the measurement.
    let lines: Vec<&str> = two["latency"]["budget"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["stage"].as_str().unwrap())
        .collect();
    assert_eq!(
        lines
            .iter()
            .filter(|l| l.contains("conversion time"))
            .count(),
        2,
        "{lines:?}"
    );
    let budget = two["latency"]["budget_s"].as_f64().unwrap();
    assert!(
        (lab - budget).abs() < 0.05 / FS_HZ,
        "{lab} vs budget {budget}"
    );
}

#[test]
fn the_noise_powers_of_hops_in_series_add() {
    // The powers of independent noises add (common practice, no source): with two coarse (8-bit) hops, whose
    // quantization errors are independent of each other, the output's noise-and-distortion power is the sum of
    // the two hops' powers run alone, within 0.5 dB.
    let d = tempfile::tempdir().unwrap();
    let (a, b) = (hop(8, "1 ms"), hop(8, "2 ms"));
    let n_a = noise_power_v2(&run_hops(
        &d.path().join("a"),
        std::slice::from_ref(&a),
        &[],
    ));
    let n_b = noise_power_v2(&run_hops(
        &d.path().join("b"),
        std::slice::from_ref(&b),
        &[],
    ));
    let n_ab = noise_power_v2(&run_hops(&d.path().join("ab"), &[a, b], &[]));
    let err_db = 10.0 * (n_ab / (n_a + n_b)).log10();
    eprintln!(
        "noise powers: {n_a:e} + {n_b:e} V^2 alone, {n_ab:e} V^2 in series ({err_db:+.3} dB)"
    );
    assert!(
        err_db.abs() < 0.5,
        "two hops {n_ab:e} V^2 against {n_a:e} + {n_b:e} V^2 ({err_db:+.2} dB)"
    );
}

#[test]
fn the_waveform_csv_has_every_hops_streams_and_codes() {
    let d = tempfile::tempdir().unwrap();
    let hops = [hop(12, "1 ms"), hop(12, "1 ms"), hop(12, "1 ms")];
    let r = run_hops(d.path(), &hops, &["--full"]);
    assert_eq!(r["hops"].as_array().map(Vec::len), Some(3));
    let csv = std::fs::read_to_string(d.path().join("out/waveforms.csv")).unwrap();
    let header = csv.lines().next().unwrap();
    let cols: Vec<&str> = header.split(',').collect();
    // source, then per hop: its DAC, its filter; then per hop: its ADC's and its DAC's codes.
    assert_eq!(cols.len(), 1 + 1 + 3 * 2 + 3 * 2, "{header}");
    for i in [1, 5, 9] {
        assert!(
            header.contains(&format!("stage{i}_sar_adc_code")),
            "{header}"
        );
        assert!(
            header.contains(&format!("stage{}_dac_v", i + 2)),
            "{header}"
        );
        assert!(
            header.contains(&format!("stage{}_dac_code", i + 2)),
            "{header}"
        );
    }
    // Every row has every column.
    assert!(
        csv.lines()
            .skip(1)
            .take(1000)
            .all(|l| l.split(',').count() == cols.len())
    );
}

#[test]
fn the_relay_demo_runs_clean() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("out");
    let sc = repo("scenarios/relay-hops.toml");
    ok(&run(&[
        "run",
        s(&sc),
        "--out",
        s(&out),
        "-q",
        "--no-wav",
        "--no-plots",
    ]));
    let r = json(&out.join("report.json"));
    assert_eq!(
        r["warnings"].as_array().map(Vec::len),
        Some(0),
        "{}",
        r["warnings"]
    );
    assert_eq!(r["adc"]["codes_clipped"].as_u64(), Some(0));
    assert!(r["latency"]["slips"].is_null() || r["latency"]["slips"].as_u64() == Some(0));
    // The measured delay agrees with the budget summed over both hops within a fifth of a grid step (4.8 MHz).
    // report.json's `hops`: one summary per hop, in order, whose subtotals are the budget after the studio's
    // anti-alias filter.
    let hops = r["hops"].as_array().expect("hops");
    assert_eq!(hops.len(), 2);
    assert_eq!(hops[0]["adc"].as_str(), Some("studio SAR"));
    assert_eq!(hops[1]["dac"].as_str(), Some("transmitter DAC"));
    let budget = r["latency"]["budget"].as_array().unwrap();
    let first_line = budget[0]["seconds"].as_f64().unwrap();
    let subtotals: f64 = hops.iter().map(|h| h["budget_s"].as_f64().unwrap()).sum();
    let total = r["latency"]["budget_s"].as_f64().unwrap();
    assert!(
        (first_line + subtotals - total).abs() < 1e-12,
        "{subtotals} + {first_line} vs {total}"
    );
    let diff = r["latency"]["difference_s"].as_f64().unwrap();
    assert!(diff.abs() < 0.2 / 4.8e6, "{diff}");
}

#[test]
fn each_hop_on_its_own_clocks_counts_its_own_slips() {
    // Two hops whose DACs run on their own clocks: hop 1's DAC 80 ppm fast against the first SAR, hop 2's DAC
    // 100 ppm slow against a second SAR itself 30 ppm fast (130 ppm apart). Each FIFO slips once per sample of
    // drift after its headroom (3 codes when the DAC is fast, 4 when slow; the construction tests/clocks.rs
    // checks): over 2 s at 48 kHz, 80e-6 x 2 x 48e3 - 3 = 4.68 and 130e-6 x 2 x 48e3 - 4 = 8.48.
    let tmp = tempfile::tempdir().unwrap();
    let dac = |ppm: i32| format!("kind = \"dac\"\nclock_ppm = {ppm}\n");
    let h1 = hop(16, "1 ms").replace("kind = \"dac\"\n", &dac(80));
    let h2 = hop(16, "1 ms")
        .replace("kind = \"dac\"\n", &dac(-100))
        .replace(
            "kind = \"sar_adc\"\n",
            "kind = \"sar_adc\"\nclock_ppm = 30\n",
        );
    let path = tmp.path().join("s.toml");
    let head = HEAD
        .replace("duration = \"120 ms\"", "duration = \"2 s\"")
        .replace("settle = \"20 ms\"", "settle = \"1.9 s\"");
    std::fs::write(&path, format!("{head}{h1}{h2}{TAIL}")).unwrap();
    let out = tmp.path().join("out");
    ok(&run(&[
        "run",
        s(&path),
        "--out",
        s(&out),
        "-q",
        "--no-wav",
        "--no-plots",
    ]));
    let r = json(&out.join("report.json"));
    let hops = r["hops"].as_array().unwrap();
    let per_hop: Vec<f64> = hops
        .iter()
        .map(|h| h["slips"].as_f64().expect("slips"))
        .collect();
    for (got, want) in per_hop.iter().zip([4.68, 8.48]) {
        assert!((got - want).abs() <= 1.0, "{per_hop:?}: {want} expected");
    }
    assert_eq!(r["latency"]["slips"].as_f64(), Some(per_hop.iter().sum()));
    // The second SAR's clock is meant to be off: no warning that the grid is not a whole multiple of its rate.
    for w in r["warnings"].as_array().unwrap() {
        assert!(!w["message"].as_str().unwrap().contains("whole"), "{w}");
    }
}

/// Two hops whose DACs run `ppm` off their SARs' clocks, over `duration` with `settle`, run like a user would;
/// with plots (report.md and report.html are written with them); returns report.json.
fn run_drifting(dir: &Path, ppm: [i32; 2], duration: &str, settle: &str) -> serde_json::Value {
    let dac = |ppm: i32| format!("kind = \"dac\"\nclock_ppm = {ppm}\n");
    let hops: Vec<String> = ppm
        .iter()
        .map(|&p| hop(16, "1 ms").replace("kind = \"dac\"\n", &dac(p)))
        .collect();
    std::fs::create_dir_all(dir).unwrap();
    let path = dir.join("s.toml");
    let head = HEAD
        .replace(
            "duration = \"120 ms\"",
            &format!("duration = \"{duration}\""),
        )
        .replace("settle = \"20 ms\"", &format!("settle = \"{settle}\""));
    std::fs::write(&path, format!("{head}{}{TAIL}", hops.concat())).unwrap();
    let out = dir.join("out");
    ok(&run(&["run", s(&path), "--out", s(&out), "-q", "--no-wav"]));
    json(&out.join("report.json"))
}

#[test]
fn slips_inside_the_record_are_counted_and_explained() {
    let tmp = tempfile::tempdir().unwrap();
    // Hop 1's DAC 2000 ppm fast, hop 2's 1500 ppm slow: 96 and 72 slips a second once the FIFOs' headroom is
    // used up (drift |ppm| 1e-6 x 48 kSPS, one slip per sample of drift: the construction tests/clocks.rs
    // checks), so a record of L seconds late in the run holds 168 L slips, within one per hop.
    let r = run_drifting(&tmp.path().join("a"), [2000, -1500], "400 ms", "300 ms");
    let l = &r["latency"];
    let inside = l["slips_in_record"].as_u64().expect("slips_in_record");
    let len_s = r["output"]["record_length"].as_f64().unwrap()
        / r["run"]["output_analysis_rate_hz"].as_f64().unwrap();
    let want = 168.0 * len_s;
    eprintln!("{inside} slips inside a record of {len_s} s ({want} expected)");
    assert!((inside as f64 - want).abs() <= 2.0, "{inside} vs {want}");
    assert!(inside <= l["slips"].as_u64().unwrap());
    let warnings: Vec<&str> = r["scenario"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap())
        .collect();
    let note = warnings
        .iter()
        .find(|w| w.contains("inside the analysis record"))
        .unwrap_or_else(|| panic!("{warnings:?}"));
    assert!(note.starts_with(&format!("{inside} clock slips")), "{note}");
    assert!(
        note.contains("SINAD") && note.contains("mode = \"async\""),
        "{note}"
    );
    let md = std::fs::read_to_string(tmp.path().join("a/out/report.md")).unwrap();
    assert!(md.contains("inside the analysis record"));
    let html = std::fs::read_to_string(tmp.path().join("a/out/report.html")).unwrap();
    assert!(html.contains("inside the analysis record"));
    assert!(tmp.path().join("a/out/fifo_fill.png").exists());

    let sinad_slipping = r["output"]["sinad_db"].as_f64().unwrap();

    // Hop 1's DAC 300 ppm fast alone: its first slip (after 3 codes of headroom, 3 / (300e-6 x 48e3) = 0.21 s
    // after the FIFO starts) comes before a record starting at 225 ms and the next 69 ms later, after the run
    // ends: one slip, none inside, no note; and the record's SINAD is the converters', not the slips'.
    let r = run_drifting(&tmp.path().join("b"), [300, 0], "270 ms", "225 ms");
    let sinad_clean = r["output"]["sinad_db"].as_f64().unwrap();
    eprintln!("SINAD {sinad_slipping} dB with the slips in the record, {sinad_clean} dB without");
    assert_eq!(r["latency"]["slips"].as_u64(), Some(1));
    assert_eq!(r["latency"]["slips_in_record"].as_u64(), Some(0));
    assert!(sinad_clean > sinad_slipping + 20.0);
    assert!(
        r["scenario"]["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .all(|w| !w.as_str().unwrap().contains("inside the analysis record"))
    );
}
