//! Integration tests of `convchain sweep` and `convchain limit`, driving the built binary.

mod common;

use std::fs;
use std::process::Output;
use std::time::Duration;

use common::{bin, csv_rows, interrupt_after, json, ok, run_in, stderr, stdout};

/// A short 10-bit chain on a 1 MHz grid: hold, SAR at 50 kSPS, DAC with slew and settling, 2nd-order filter.
const SMALL_CHAIN: &str = r#"
name = "small-chain"
description = "short chain for sweep tests"
[simulation]
analog_rate = "1 MHz"
duration = "22 ms"
settle = "2 ms"
seed = 4
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sample_hold"
aperture_jitter = "2 ns"
[[stage]]
kind = "sar_adc"
bits = 10
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "12 us"
comparator_noise = "1 mV"
[[stage]]
kind = "dac"
ladder = "r2r"
tolerance = "1%"
range = ["0 V", "5 V"]
slew_rate = "1 V/us"
settling = "1 us"
[[stage]]
kind = "filter"
order = 2
cutoff = "10 kHz"
[analysis]
band = "10 kHz"
coherent = true
"#;

fn col(header: &[String], name: &str) -> usize {
    header
        .iter()
        .position(|h| h == name)
        .unwrap_or_else(|| panic!("no column {name}"))
}

#[test]
fn a_log_sweep_has_the_points_asked_for_and_every_metric() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    let o = run_in(
        d.path(),
        &[
            "sweep",
            "c.toml",
            "--vary",
            "source.frequency=1 kHz..8 kHz",
            "--points",
            "5",
            "--log",
            "--quiet",
        ],
    );
    ok(&o);
    let out = d.path().join("out/small-chain-sweep");
    let (h, rows) = csv_rows(&out.join("sweep.csv"));
    assert_eq!(rows.len(), 5);
    let f = col(&h, "source.frequency");
    let want = [1000.0, 1681.792831, 2828.427125, 4756.828460, 8000.0];
    for (r, w) in rows.iter().zip(want) {
        let v: f64 = r[f].parse().unwrap();
        assert!((v / w - 1.0).abs() < 1e-6, "{v} vs {w}");
    }
    // The frequency used sits beside the one asked for, moved for coherent sampling by at most a few cycles
    // of the 20 ms window (an odd count coprime with the record length).
    let used = col(&h, "frequency_used_hz");
    assert_eq!(used, col(&h, "frequency_requested_hz") + 1);
    let err = col(&h, "error");
    for r in &rows {
        assert_eq!(r[err], "", "{r:?}");
        let (a, u): (f64, f64) = (r[f].parse().unwrap(), r[used].parse().unwrap());
        assert!((u - a).abs() <= 150.0, "{a} -> {u}");
    }
    for name in [
        "adc.enob_bits",
        "adc.sinad_db",
        "adc.thd_db",
        "output.enob_bits",
        "output.gain_db",
        "output.fidelity_db",
        "output.sinad_db",
        "latency.measured_s",
        "latency.budget_s",
    ] {
        let i = col(&h, name);
        assert!(rows.iter().all(|r| r[i].parse::<f64>().is_ok()), "{name}");
    }
    let j = json(&out.join("sweep.json"));
    assert_eq!(j["rows"].as_array().unwrap().len(), 5);
    assert!(j["rows"][0]["output.enob_bits"].is_number());
    for stem in ["sweep-enob", "sweep-sinad", "sweep-gain", "sweep-fidelity"] {
        for ext in ["png", "svg"] {
            assert!(out.join(format!("{stem}.{ext}")).exists(), "{stem}.{ext}");
        }
    }
}

#[test]
fn a_forty_point_log_sweep_keeps_forty_distinct_increasing_tones_each_within_a_thousandth() {
    // Coherent placement moves a tone by at most 0.1 % (our bound, `measure::coherent::PLACEMENT_TOLERANCE`),
    // choosing the record length as well as the cycle count (IEEE Std 1241 asks only for a whole, odd number of
    // cycles coprime with the record length). Before, 114, 130 and 149 Hz all became 102.04 Hz.
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    let o = run_in(
        d.path(),
        &[
            "sweep",
            "c.toml",
            "--vary",
            "source.frequency=100 Hz..9 kHz",
            "--points",
            "40",
            "--log",
            "--quiet",
        ],
    );
    ok(&o);
    let (h, rows) = csv_rows(&d.path().join("out/small-chain-sweep/sweep.csv"));
    assert_eq!(rows.len(), 40);
    let (asked, used, err) = (
        col(&h, "frequency_requested_hz"),
        col(&h, "frequency_used_hz"),
        col(&h, "error"),
    );
    let mut last = 0.0;
    for r in &rows {
        assert_eq!(r[err], "", "{r:?}");
        let (a, u): (f64, f64) = (r[asked].parse().unwrap(), r[used].parse().unwrap());
        assert!((u / a - 1.0).abs() <= 1e-3, "{a} -> {u}");
        assert!(u > last, "{u} after {last}");
        last = u;
    }
}

#[test]
fn two_keys_make_a_grid_and_the_results_do_not_depend_on_the_thread_count() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    let args = |out: &'static str, threads: &'static str| {
        vec![
            "sweep",
            "c.toml",
            "--vary",
            "source.frequency=1 kHz..4 kHz",
            "--vary",
            "stage.3.slew_rate=0.2 V/us..1 V/us",
            "--points",
            "3",
            "--threads",
            threads,
            "--out",
            out,
            "--quiet",
        ]
    };
    let o1 = run_in(d.path(), &args("one", "1"));
    ok(&o1);
    let o2 = run_in(d.path(), &args("two", "2"));
    ok(&o2);
    let a = fs::read(d.path().join("one/sweep.csv")).unwrap();
    let b = fs::read(d.path().join("two/sweep.csv")).unwrap();
    assert_eq!(a, b, "sweep.csv differs between 1 and 2 threads");
    let (h, rows) = csv_rows(&d.path().join("one/sweep.csv"));
    assert_eq!(rows.len(), 9);
    let (f, s) = (col(&h, "source.frequency"), col(&h, "stage.3.slew_rate"));
    let mut pairs: Vec<(f64, f64)> = rows
        .iter()
        .map(|r| (r[f].parse().unwrap(), r[s].parse().unwrap()))
        .collect();
    pairs.dedup();
    assert_eq!(pairs.len(), 9, "every combination once");
    assert_eq!(pairs[0], (1000.0, 0.2e6));
    assert_eq!(pairs[1], (1000.0, 0.6e6));
    assert_eq!(pairs[8], (4000.0, 1e6));
    // A slower DAC output stage cannot raise the output's fidelity at 4 kHz (same seed, same codes): its
    // staircase slews on every step larger than SR x tau (common practice, no source).
    let fid = col(&h, "output.fidelity_db");
    let at4k: Vec<f64> = rows[6..9].iter().map(|r| r[fid].parse().unwrap()).collect();
    assert!(at4k[0] <= at4k[2] + 0.5, "{at4k:?}");
}

#[test]
fn bad_vary_syntax_exits_2_with_the_form_to_use() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    for bad in [
        "source.frequency",
        "source.frequency=1 kHz",
        "source.frequency=1 kV..2 kV",
        "frequency=1..2",
    ] {
        let o = run_in(d.path(), &["sweep", "c.toml", "--vary", bad]);
        assert_eq!(o.status.code(), Some(2), "{bad}: {}", stderr(&o));
        assert!(stderr(&o).contains("KEY=FROM..TO"), "{bad}: {}", stderr(&o));
        assert!(!d.path().join("out").exists());
    }
    // A key the scenario does not know is bad input too, named with a suggestion.
    let o = run_in(
        d.path(),
        &["sweep", "c.toml", "--vary", "stage.3.slew_rat=1..2"],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("slew_rate"), "{}", stderr(&o));
}

/// A unity-gain follower slew-limited at SR = 2 pi x 1000 V/s with Vp = 1 V: full-power bandwidth
/// SR/(2 pi Vp) = 1 kHz (W. G. Jung (ed.), Op Amp Applications Handbook, 2005, ch. 1 (from memory)).
const SLEW_AMP: &str = r#"
name = "slew-amp"
description = "slew-limited follower"
[simulation]
analog_rate = "1 MHz"
duration = "40 ms"
settle = "5 ms"
seed = 1
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
[[stage]]
kind = "amplifier"
gain = 1
slew_rate = "6.283185 mV/us"
settling = "1 us"
[analysis]
band = "50 kHz"
coherent = true
"#;

fn criterion<'a>(j: &'a serde_json::Value, name: &str) -> &'a serde_json::Value {
    j["limit"]["criteria"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["criterion"] == name)
        .unwrap_or_else(|| panic!("no {name} row"))
}

#[test]
fn a_slew_limited_amplifier_loses_3_db_near_1_8_times_its_full_power_bandwidth() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("amp.toml"), SLEW_AMP).unwrap();
    let o = run_in(
        d.path(),
        &["limit", "amp.toml", "--from", "100 Hz", "--to", "10 kHz"],
    );
    ok(&o);
    let table = stdout(&o);
    assert!(
        table.contains("level") && table.contains("amplifier.slew_rate"),
        "{table}"
    );
    let j = json(&d.path().join("out/slew-amp-limit/limit.json"));
    let level = criterion(&j, "level");
    let f = level["frequency_hz"].as_f64().unwrap();
    let fpbw = 6.283185e3 / (2.0 * std::f64::consts::PI * 1.0);
    // Where the gain is down 3 dB: once the follower slews all the time its output is a triangle of slope SR
    // and peak SR/(4 f), whose fundamental is 8/pi^2 of that peak (Fourier series of a triangle wave, any
    // signals text): gain = (4/pi) FPBW/f, so -3 dB at f = 4/(pi 10^(-3/20)) FPBW = 1.7985 FPBW. A direct
    // simulation of the slew-limited follower gives 1.7984 (computed with numpy 2.4.6,
    // tests/reference/slew_fpbw.py), confirming that the output is fully triangular there.
    let expected = 1.7984 * fpbw;
    // Tolerance 5 %: the bisection stops within 2 %, the coherent move of the frequency is about 1 % with 100
    // cycles, and the 1 us settling adds a negligible lag at 1.8 kHz.
    assert!(
        (f / expected - 1.0).abs() < 0.05,
        "level limit {f} Hz, expected about {expected} Hz"
    );
    assert_eq!(level["mechanism"], "amplifier.slew_rate", "{level}");
    // The slew-rate change wins back the whole 3 dB; the settling change next to nothing.
    let abl = level["ablation"].as_array().unwrap();
    let rec = |m: &str| {
        abl.iter().find(|a| a["mechanism"] == m).unwrap()["recovery"]
            .as_f64()
            .unwrap()
    };
    assert!(rec("amplifier.slew_rate") > 2.5, "{abl:?}");
    assert!(rec("amplifier.settling").abs() < 0.1, "{abl:?}");
    // The table's other rows: no converter, so no aliasing frequency.
    assert!(criterion(&j, "aliasing")["frequency_hz"].is_null());
    assert!(d.path().join("out/slew-amp-limit/limit.png").exists());
    assert!(d.path().join("out/slew-amp-limit/limit.svg").exists());
}

/// An 8-bit SAR comparing a live input during a 100 us conversion (9 trials at 90 kHz), 5 kSPS.
const LIVE_ADC: &str = r#"
name = "live-adc"
description = "8-bit SAR without a hold, long conversion"
[simulation]
analog_rate = "100 kHz"
duration = "200 ms"
settle = "20 ms"
seed = 2
[source]
waveform = "sine"
frequency = "10 Hz"
amplitude = "2.45 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "5 V"]
clock = "90 kHz"
sample_rate = "5 kHz"
input = "live"
comparator_noise = "1 mV"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
[[stage]]
kind = "filter"
family = "butterworth"
order = 2
cutoff = "2 kHz"
[analysis]
band = "2 kHz"
coherent = true
"#;

#[test]
fn an_adc_without_a_hold_loses_accuracy_far_below_nyquist_and_the_live_input_is_named() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("live.toml"), LIVE_ADC).unwrap();
    let o = run_in(
        d.path(),
        &[
            "limit",
            "live.toml",
            "--from",
            "1 Hz",
            "--to",
            "1 kHz",
            "--quiet",
        ],
    );
    ok(&o);
    let j = json(&d.path().join("out/live-adc-limit/limit.json"));
    let acc = criterion(&j, "accuracy");
    let f = acc["frequency_hz"].as_f64().unwrap();
    let t_conv = 9.0 / 90e3;
    // The input moves by 1 LSB during one conversion at f0 = 1/(2^N pi t_conv) for a full-scale sine (common
    // practice, no source): 12.4 Hz here. That is where the error starts; a 1-bit ENOB drop needs the extra
    // error's rms to reach sqrt(3) q/sqrt(12) = q/2. If the error were spread evenly over the input's movement
    // in a conversion, that happens at sqrt(6) f0; the binary search corrects much of the movement in its
    // later trials, so the drop comes later still. Accept f0 .. 10 f0.
    let f0 = 1.0 / (256.0 * std::f64::consts::PI * t_conv);
    assert!(f > f0 && f < 10.0 * f0, "accuracy limit {f} Hz, f0 {f0} Hz");
    let nyquist = criterion(&j, "aliasing")["frequency_hz"].as_f64().unwrap();
    assert_eq!(nyquist, 2500.0);
    assert!(f < nyquist / 10.0, "{f} vs Nyquist {nyquist}");
    assert_eq!(acc["mechanism"], "sar_adc.input", "{acc}");
    assert_eq!(j["limit"]["criterion"], "accuracy");
    assert_eq!(j["limit"]["mechanism"], "sar_adc.input");
    assert!((j["limit"]["frequency_hz"].as_f64().unwrap() - f).abs() < 1e-9);
    // Level and shape hold up to the top of the range: said so, with no frequency.
    for name in ["level", "shape"] {
        let c = criterion(&j, name);
        assert!(c["frequency_hz"].is_null(), "{c}");
        assert!(
            c["note"].as_str().unwrap().contains("not reached below"),
            "{c}"
        );
    }
}

#[test]
fn limit_prints_its_reference_values_and_every_ablation_with_ties_named() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("live.toml"), LIVE_ADC).unwrap();
    let o = run_in(
        d.path(),
        &["limit", "live.toml", "--from", "1 Hz", "--to", "1 kHz"],
    );
    ok(&o);
    let out = stdout(&o);
    let j = json(&d.path().join("out/live-adc-limit/limit.json"));
    let first = &j["coarse"][0];
    // The low end, as run (a coherent tone moves by at most 0.1 %).
    assert!(
        out.contains(&format!(
            ": ENOB {:.2} bits, gain {:.2} dB",
            first["enob_bits"].as_f64().unwrap(),
            first["gain_db"].as_f64().unwrap()
        )) && out.contains("  reference at 999.9 mHz"),
        "{out}"
    );
    // The criteria table has a value and a threshold column; the accuracy row shows both.
    let acc = criterion(&j, "accuracy");
    let row = out
        .lines()
        .find(|l| l.trim_start().starts_with("accuracy "))
        .unwrap();
    assert!(
        row.contains(&format!("{:.2} bits", acc["threshold"].as_f64().unwrap())),
        "{row}"
    );
    // Every ablation of every diagnosed criterion is on the terminal, the chosen one and any tie marked.
    for c in j["limit"]["criteria"].as_array().unwrap() {
        let ties: Vec<&str> = c["ties"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t.as_str().unwrap())
            .collect();
        for a in c["ablation"].as_array().unwrap() {
            let line = out
                .lines()
                .find(|l| l.trim_start().starts_with(a["change"].as_str().unwrap()))
                .unwrap_or_else(|| panic!("no line for {a} in\n{out}"));
            let m = a["mechanism"].as_str().unwrap();
            if c["mechanism"].as_str() == Some(m) {
                assert!(line.ends_with("chosen"), "{line}");
            } else if ties.contains(&m) {
                assert!(line.contains("tie"), "{line}");
            }
        }
    }
    assert!(out.contains("accuracy at "), "{out}");
}

#[test]
fn limit_needs_a_sine_source() {
    let d = tempfile::tempdir().unwrap();
    fs::write(
        d.path().join("sq.toml"),
        LIVE_ADC.replace("waveform = \"sine\"", "waveform = \"square\""),
    )
    .unwrap();
    let o = run_in(d.path(), &["limit", "sq.toml"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("sine"), "{}", stderr(&o));
}

#[test]
fn merged_sweep_shards_equal_one_run_and_foreign_or_missing_shards_are_refused() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    let sweep = |to: &str, extra: &[&str]| -> Output {
        let range = format!("source.frequency=1 kHz..{to}");
        let mut args = vec![
            "sweep",
            "c.toml",
            "--vary",
            &range,
            "--vary",
            "stage.3.slew_rate=0.2 V/us..1 V/us",
            "--points",
            "3",
            "--quiet",
        ];
        args.extend(extra);
        run_in(d.path(), &args)
    };
    let o = sweep("4 kHz", &["--out", "one"]);
    ok(&o);
    for k in 1..=3 {
        let shard = format!("{k}/3");
        let o = sweep("4 kHz", &["--shard", &shard, "--threads", "1"]);
        assert!(o.status.success(), "{shard}: {}", stderr(&o));
    }
    let shard_dir = |k: u32| format!("out/small-chain-sweep-shard-{k}-of-3");
    // A shard holds only its points (grid index % 3 == K-1) and says so in its sweep.json.
    let (_, rows2) = csv_rows(&d.path().join(shard_dir(2)).join("sweep.csv"));
    let (_, all) = csv_rows(&d.path().join("one/sweep.csv"));
    assert_eq!(rows2, vec![all[1].clone(), all[4].clone(), all[7].clone()]);
    let j2 = json(&d.path().join(shard_dir(2)).join("sweep.json"));
    assert_eq!(j2["shard"]["shard"], "2/3");
    assert_eq!(j2["shard"]["of_points"], 9);
    assert!(
        json(&d.path().join("one/sweep.json"))
            .get("shard")
            .is_none()
    );

    // Merged in a shuffled order: the very files one machine writes.
    let (s1, s2, s3) = (shard_dir(1), shard_dir(2), shard_dir(3));
    let o = run_in(d.path(), &["merge", &s3, &s1, &s2, "--out", "merged"]);
    ok(&o);
    assert!(
        stdout(&o).contains("9 points; wrote merged"),
        "{}",
        stdout(&o)
    );
    for f in ["sweep.csv", "sweep.json", "rows.json"] {
        let one = fs::read(d.path().join("one").join(f)).unwrap();
        let merged = fs::read(d.path().join("merged").join(f)).unwrap();
        assert!(one == merged, "{f}: merged shards differ from one run");
    }
    for stem in ["sweep-enob", "sweep-sinad", "sweep-gain", "sweep-fidelity"] {
        assert!(
            d.path().join(format!("merged/{stem}.svg")).exists(),
            "{stem}"
        );
    }

    // A missing shard: the points it holds are named, nothing is written.
    let o = run_in(d.path(), &["merge", &s1, &s3, "--out", "bad1"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("3 of 9 points are in no folder (points 1, 4, 7)"),
        "{}",
        stderr(&o)
    );
    assert!(!d.path().join("bad1").exists());
    // A shard given twice: the point it holds twice is named.
    let o = run_in(d.path(), &["merge", &s1, &s2, &s3, &s1, "--out", "bad0"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("merge: point 0 is in both"),
        "{}",
        stderr(&o)
    );
    assert!(!d.path().join("bad0").exists());
    // A shard of another sweep (a different range): refused, naming what differs.
    let o = sweep("5 kHz", &["--shard", "2/3", "--out", "other"]);
    ok(&o);
    let o = run_in(d.path(), &["merge", &s1, "other", &s3, "--out", "bad2"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(
        e.contains("not shards of the same study") && e.contains("vary:"),
        "{e}"
    );
    assert!(!d.path().join("bad2").exists());
    // A Monte-Carlo shard is not a sweep shard.
    let mc = d.path().join("mc");
    fs::create_dir(&mc).unwrap();
    let mut rows = json(&d.path().join(&s2).join("rows.json"));
    rows["kind"] = "montecarlo".into();
    fs::write(mc.join("rows.json"), rows.to_string()).unwrap();
    let o = run_in(d.path(), &["merge", &s1, "mc", &s3, "--out", "bad3"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("a `montecarlo` study"),
        "{}",
        stderr(&o)
    );
}

#[test]
fn ctrl_c_stops_a_sweep_keeping_the_first_points_and_says_how_many() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    let n = 3000u64;
    let points = n.to_string();
    // A point takes a few milliseconds: after 1.5 s some are done and most are not.
    let (status, err) = interrupt_after(
        bin().current_dir(d.path()).args([
            "sweep",
            "c.toml",
            "--vary",
            "source.frequency=1 kHz..4 kHz",
            "--points",
            &points,
            "--threads",
            "1",
            "--quiet",
            "--out",
            "o",
        ]),
        Duration::from_millis(1500),
    );
    assert_eq!(status.code(), Some(130), "{err}");
    let out = d.path().join("o");
    let j = json(&out.join("sweep.json"));
    let m = j["points_done"].as_u64().unwrap();
    assert!((1..n).contains(&m), "{m}");
    let note = format!("interrupted after {m} of {n} points");
    assert_eq!(j["interrupted"], note.as_str());
    assert!(err.contains(&note), "{err}");
    assert_eq!(j["rows"].as_array().unwrap().len() as u64, m);
    // The finished points are the first ones of the grid, in order.
    let (header, rows) = csv_rows(&out.join("sweep.csv"));
    assert_eq!(rows.len() as u64, m);
    let f = col(&header, "source.frequency");
    for (i, r) in rows.iter().enumerate() {
        let want = 1e3 + 3e3 * i as f64 / (n - 1) as f64;
        let got: f64 = r[f].parse().unwrap();
        assert!(
            (got - want).abs() <= 1e-9 * want,
            "row {i}: {got} against {want}"
        );
    }
    for stem in ["sweep-enob", "sweep-sinad", "sweep-gain", "sweep-fidelity"] {
        assert!(out.join(format!("{stem}.svg")).exists(), "{stem}");
    }
    // An interrupted folder does not merge as a whole sweep.
    let o = run_in(d.path(), &["merge", "o", "--out", "m"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(
        e.contains(&format!("{} of {n} points are in no folder", n - m)) && e.contains(&note),
        "{e}"
    );
    assert!(!d.path().join("m").exists());
}
