//! Converter clocks, slips and sample-rate conversion, through the binary: `clock_ppm` on the converters, the
//! FIFO a DAC on its own clock reads through, and the `resample` stage.

mod common;

use std::path::Path;

use common::{json, ok, run_in};

/// A 16-bit SAR at `adc_rate` (and `adc_ppm`), optional extra stages, and a DAC on `dac_ppm`, driven by a 1 kHz
/// (or `f_hz`) sine for `duration_s`, analysed after `settle_s`.
fn scenario(
    adc_rate: &str,
    adc_ppm: f64,
    middle: &str,
    dac_ppm: f64,
    f_hz: f64,
    (settle_s, duration_s): (f64, f64),
    analog_rate: &str,
) -> String {
    format!(
        "name = \"clocks\"\n\
         [simulation]\nanalog_rate = \"{analog_rate}\"\nduration = {duration_s}\nsettle = {settle_s}\nseed = 1\n\
         [source]\nwaveform = \"sine\"\nfrequency = {f_hz}\namplitude = \"1 V\"\n\
         [[stage]]\nkind = \"sar_adc\"\nbits = 16\nrange = [\"-2.5 V\", \"2.5 V\"]\nconversion_time = \"10 us\"\n\
         sample_rate = \"{adc_rate}\"\nclock_ppm = {adc_ppm}\n\
         {middle}\
         [[stage]]\nkind = \"dac\"\nclock_ppm = {dac_ppm}\n"
    )
}

/// Run `text` in `dir` as `name`; return report.json.
fn run(dir: &Path, name: &str, text: &str) -> serde_json::Value {
    let path = dir.join(format!("{name}.toml"));
    std::fs::write(&path, text).unwrap();
    let out = dir.join(name);
    let o = run_in(
        dir,
        &[
            "run",
            path.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "-q",
            "--no-wav",
            "--no-plots",
        ],
    );
    ok(&o);
    json(&out.join("report.json"))
}

#[test]
fn a_dac_100_ppm_off_the_adc_slips_once_per_sample_of_drift() {
    // By construction (see src/engine/clock.rs): two clocks d ppm apart drift by d 1e-6 f T samples over T
    // seconds at rate f; the FIFO (8 codes, read from 4 in) absorbs its headroom, 3 codes when the DAC is fast
    // (it runs empty) and 4 when it is slow (it fills), and each further sample of drift is one slip of one
    // sample. 100 ppm x 10 s x 48 kHz = 48 samples.
    let tmp = tempfile::tempdir().unwrap();
    for (dac_ppm, headroom) in [(100.0, 3.0), (-100.0, 4.0)] {
        let text = scenario("48 kHz", 0.0, "", dac_ppm, 1000.0, (9.0, 10.0), "192 kHz");
        let r = run(tmp.path(), &format!("slip{}", dac_ppm as i32), &text);
        let slips = r["latency"]["slips"].as_u64().expect("latency.slips");
        let drift = 100e-6 * 10.0 * 48e3 / 1.0; // |offset| x duration x rate / slip size (one sample)
        let want = drift - headroom;
        assert!(
            (slips as f64 - want).abs() <= 1.0,
            "DAC at {dac_ppm} ppm: {slips} slips, {want} expected"
        );
        // A latency far from its budget is blamed on the clocks, not on the analog stages.
        for w in r["warnings"].as_array().unwrap() {
            if w["message"].as_str().unwrap().contains("measured latency") {
                assert_eq!(w["key"].as_str(), Some("stage.2.clock_ppm"), "{w}");
            }
        }
        let times = r["latency"]["slip_times_s"].as_array().unwrap();
        assert_eq!(times.len() as u64, slips);
        // Slips come at the drift's pace: one every 1 / (d 1e-6 f) = 208.3 ms once the headroom is used up.
        let t: Vec<f64> = times.iter().map(|v| v.as_f64().unwrap()).collect();
        for w in t.windows(2) {
            assert!(((w[1] - w[0]) - 1.0 / 4.8).abs() < 1e-3, "{:?}", w);
        }
    }
    // Equal clocks: no FIFO, so no slips reported at all.
    let text = scenario("48 kHz", 50.0, "", 50.0, 1000.0, (0.1, 1.0), "192 kHz");
    let r = run(tmp.path(), "same", &text);
    assert!(r["latency"].get("slips").is_none());
}

#[test]
fn an_async_resampler_between_clocks_200_ppm_apart_never_slips_and_holds_its_delay() {
    // The ADC runs 100 ppm fast, the DAC 100 ppm slow; an asynchronous resample at 48 kHz stands between them.
    // The measured delay over three one-second windows of a 10 s run (each a run to the window's end, measured
    // after settle) must agree within one sample period, and with the budget (common practice, no source: an
    // asynchronous rate converter's delay is steady once its ratio estimate has settled).
    let tmp = tempfile::tempdir().unwrap();
    let middle = "[[stage]]\nkind = \"resample\"\nrate = \"48 kHz\"\nmode = \"async\"\n";
    let mut delays = Vec::new();
    for (i, end) in [2.0, 6.0, 10.0].into_iter().enumerate() {
        let text = scenario(
            "48 kHz",
            100.0,
            middle,
            -100.0,
            1000.0,
            (end - 1.0, end),
            "192 kHz",
        );
        let r = run(tmp.path(), &format!("async{i}"), &text);
        assert!(
            r["latency"].get("slips").is_none(),
            "the DAC reads the resampler's output directly"
        );
        let measured = r["latency"]["measured_s"].as_f64().unwrap();
        let budget = r["latency"]["budget_s"].as_f64().unwrap();
        assert!(
            (measured - budget).abs() < 1.0 / 48e3,
            "{measured} vs {budget}"
        );
        delays.push(measured);
    }
    let spread = delays.iter().cloned().fold(f64::MIN, f64::max)
        - delays.iter().cloned().fold(f64::MAX, f64::min);
    assert!(spread < 1.0 / 48e3, "{delays:?}");
}

#[test]
fn resampling_44k1_to_48k_passes_in_band_sines_within_a_tenth_of_a_db_at_its_stated_delay() {
    // Common practice, no source: a rate converter's passband is flat to 0.1 dB. The gain is compared with the
    // same chain without the converter, its ADC at 48 kHz (the DAC's hold then droops alike in both).
    let tmp = tempfile::tempdir().unwrap();
    let middle = "[[stage]]\nkind = \"resample\"\nrate = \"48 kHz\"\nmode = \"sync\"\n";
    for f in [1000.0, 15000.0] {
        let a = run(
            tmp.path(),
            &format!("rs{f}"),
            &scenario("44.1 kHz", 0.0, middle, 0.0, f, (0.1, 0.5), "1.92 MHz"),
        );
        let b = run(
            tmp.path(),
            &format!("direct{f}"),
            &scenario("48 kHz", 0.0, "", 0.0, f, (0.1, 0.5), "1.92 MHz"),
        );
        let ga = a["output"]["gain_db"].as_f64().unwrap();
        let gb = b["output"]["gain_db"].as_f64().unwrap();
        assert!((ga - gb).abs() < 0.1, "{f} Hz: {ga} dB vs {gb} dB");
        // The stated delay: its budget line, half the kernel at the input rate (64 taps: 32 / 44.1 kHz).
        let lines = a["latency"]["budget"].as_array().unwrap();
        let stated = lines
            .iter()
            .find(|l| l["stage"].as_str().unwrap().contains("rate converter"))
            .unwrap()["seconds"]
            .as_f64()
            .unwrap();
        assert!((stated - 32.0 / 44_100.0).abs() < 1e-12);
        // Measured end to end against the whole budget: the converter adds exactly its stated delay, within a
        // hundredth of an output sample (the rest of the chain is exact, see the test below).
        let measured = a["latency"]["measured_s"].as_f64().unwrap();
        let budget = a["latency"]["budget_s"].as_f64().unwrap();
        assert!(
            (measured - budget).abs() < 0.01 / 48e3,
            "{f} Hz: {measured} vs {budget}"
        );
    }
}

#[test]
fn the_dac_updates_at_its_exact_instants_whatever_the_grid_rate() {
    // By construction (src/stages/dac.rs, `render_cells`): each grid sample holds the hold's average over its
    // cell, so every update keeps its instant; the measured delay of a 48 kHz chain whose conversion (10 us)
    // ends 0.2, 0.8 or 0.25 of a grid step past a grid instant agrees with its budget to a thousandth of a grid
    // step at every grid rate. Sampling the hold at the grid instants erred by up to a grid step (-625 ns at
    // 480 kHz, +156 ns at 1.92 MHz).
    let tmp = tempfile::tempdir().unwrap();
    for (i, (rate, rate_hz)) in [
        ("480 kHz", 480e3),
        ("1.92 MHz", 1.92e6),
        ("2 MHz", 2e6),
        ("10 MHz", 10e6),
    ]
    .into_iter()
    .enumerate()
    {
        let r = run(
            tmp.path(),
            &format!("grid{i}"),
            &scenario("48 kHz", 0.0, "", 0.0, 1000.0, (0.1, 0.5), rate),
        );
        let diff = r["latency"]["difference_s"].as_f64().unwrap();
        assert!(
            diff.abs() < 1e-3 / rate_hz,
            "{rate}: measured - budget = {diff}"
        );
    }
}

#[test]
fn a_sweep_over_the_dac_clock_counts_the_slips_in_its_own_column() {
    // The sweep's `latency.slips` column carries report.json's `latency.slips` (0 where no FIFO is needed):
    // 2 s at 48 kHz with the DAC d ppm fast drifts d 1e-6 x 2 x 48e3 samples, less the FIFO's 3-code headroom
    // (the construction the test above checks): 0 ppm -> no FIFO, 0; 100 ppm -> 9.6 - 3; 200 ppm -> 19.2 - 3.
    let tmp = tempfile::tempdir().unwrap();
    let text = scenario("48 kHz", 0.0, "", 0.0, 1000.0, (1.9, 2.0), "192 kHz");
    let path = tmp.path().join("sweepclock.toml");
    std::fs::write(&path, text).unwrap();
    let out = tmp.path().join("sweepclock");
    let o = run_in(
        tmp.path(),
        &[
            "sweep",
            path.to_str().unwrap(),
            "--vary",
            "stage.2.clock_ppm=0..200",
            "--points",
            "3",
            "--out",
            out.to_str().unwrap(),
            "-q",
        ],
    );
    ok(&o);
    let (head, rows) = common::csv_rows(&out.join("sweep.csv"));
    let col = head
        .iter()
        .position(|c| c == "latency.slips")
        .expect("latency.slips column");
    let lost = head
        .iter()
        .position(|c| c == "latency.packets_lost")
        .unwrap();
    assert_eq!(col, lost + 1, "slips sit beside the packets lost");
    let slips: Vec<f64> = rows.iter().map(|r| r[col].parse().unwrap()).collect();
    for (got, ppm) in slips.iter().zip([0.0, 100.0, 200.0]) {
        let want = if ppm == 0.0 {
            0.0
        } else {
            ppm * 1e-6 * 2.0 * 48e3 - 3.0
        };
        assert!(
            (got - want).abs() <= 1.0,
            "DAC at +{ppm} ppm: {got} slips, {want} expected"
        );
    }
}

#[test]
fn a_monte_carlo_over_the_dac_clock_counts_each_runs_slips_from_its_drawn_offset() {
    // Each run draws the DAC's clock offset d (uniform within +-200 ppm around 0) and its `latency.slips` must
    // follow the construction checked above: |d| 1e-6 x 2 s x 48 kHz samples of drift, less the FIFO's headroom
    // (3 codes when the DAC is fast, 4 when slow), never below 0.
    let tmp = tempfile::tempdir().unwrap();
    let mut text = scenario("48 kHz", 0.0, "", 0.0, 1000.0, (1.9, 2.0), "192 kHz");
    text.push_str("[spread]\n\"stage.2.clock_ppm\" = { uniform = 200 }\n");
    let path = tmp.path().join("mcclock.toml");
    std::fs::write(&path, text).unwrap();
    let out = tmp.path().join("mcclock");
    let o = run_in(
        tmp.path(),
        &[
            "montecarlo",
            path.to_str().unwrap(),
            "--runs",
            "6",
            "--no-static",
            "--require",
            "latency.slips<=0",
            "--out",
            out.to_str().unwrap(),
            "-q",
        ],
    );
    ok(&o);
    let (head, rows) = common::csv_rows(&out.join("montecarlo.csv"));
    let ppm_col = head
        .iter()
        .position(|c| c == "stage.2.clock_ppm")
        .expect("drawn column");
    let col = head
        .iter()
        .position(|c| c == "latency.slips")
        .expect("latency.slips column");
    let mut passing = 0;
    for r in &rows {
        let d: f64 = r[ppm_col].parse().unwrap();
        let got: f64 = r[col].parse().unwrap();
        let headroom = if d > 0.0 { 3.0 } else { 4.0 };
        let want = (d.abs() * 1e-6 * 2.0 * 48e3 - headroom).max(0.0);
        assert!(
            (got - want).abs() <= 1.0,
            "DAC at {d} ppm: {got} slips, {want} expected"
        );
        passing += (got <= 0.0) as usize;
    }
    assert!(
        rows.iter().any(|r| r[col] != "0"),
        "some draw must slip: {rows:?}"
    );
    let summary = json(&out.join("montecarlo.json"));
    let y = &summary["yield"][0];
    assert_eq!(y["require"], "latency.slips<=0");
    assert_eq!(y["passed"].as_u64(), Some(passing as u64), "{y}");
}
