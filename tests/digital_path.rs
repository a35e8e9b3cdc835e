//! The code stages between ADC and DAC (`buffer`, `codec`, `network`) driven through the binary like a user
//! would: the delay each states against the delay measured end to end, the codec's coding noise at the output,
//! the network's lost packets in report.json and on the terminal, and located errors for bad values.

mod common;

use std::fs;
use std::path::Path;

use common::{ok, run_in, stderr, stdout};

/// A 16-bit converter at 48 kHz straight into an ideal 16-bit DAC, with `code` (stage tables) between them.
fn chain(name: &str, duration: &str, code: &str) -> String {
    format!(
        r#"name = "{name}"
[simulation]
analog_rate = "960 kHz"
duration = "{duration}"
settle = "20 ms"
seed = 11

[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"

[[stage]]
kind = "sar_adc"
bits = 16
range = ["-2.5 V", "2.5 V"]
sample_rate = "48 kHz"
conversion_time = "10 us"

{code}
[[stage]]
kind = "dac"
"#
    )
}

/// Run `text` as `name.toml` in `dir`; return the report and the terminal table.
fn run_report(dir: &Path, name: &str, text: &str) -> (serde_json::Value, String) {
    fs::write(dir.join(format!("{name}.toml")), text).unwrap();
    let o = run_in(
        dir,
        &[
            "run",
            &format!("{name}.toml"),
            "--no-plots",
            "--no-wav",
            "--out",
            name,
        ],
    );
    ok(&o);
    let r = common::json(&dir.join(name).join("report.json"));
    (r, stdout(&o))
}

fn latency(r: &serde_json::Value, key: &str) -> f64 {
    r["latency"][key]
        .as_f64()
        .unwrap_or_else(|| panic!("latency.{key}: {}", r["latency"]))
}

const FS: f64 = 48e3;

/// The stage's own delay, measured: the chain's measured latency with the stage less the same chain's without
/// it; and the run's measured latency against its budget. Both within one output sample (1/fs: common
/// practice, no source).
fn check_adds(dir: &Path, name: &str, stage: &str, want_s: f64) -> serde_json::Value {
    let (plain, _) = run_report(dir, &format!("{name}-plain"), &chain("plain", "150 ms", ""));
    let (with, table) = run_report(dir, name, &chain(name, "150 ms", stage));
    let added = latency(&with, "measured_s") - latency(&plain, "measured_s");
    assert!(
        (added - want_s).abs() < 1.0 / FS,
        "{name}: adds {added} s, expected {want_s} s"
    );
    let (m, b) = (latency(&with, "measured_s"), latency(&with, "budget_s"));
    assert!(
        (m - b).abs() < 1.0 / FS,
        "{name}: measured {m} s against a budget of {b} s"
    );
    // The stage's budget line states exactly its delay.
    let line = with["latency"]["budget"]
        .as_array()
        .unwrap()
        .iter()
        .find(|l| l["stage"].as_str().unwrap().contains(name))
        .unwrap_or_else(|| panic!("{name}: no budget line: {}", with["latency"]["budget"]))
        .clone();
    assert!((line["seconds"].as_f64().unwrap() - want_s).abs() < 1e-12);
    assert!(table.contains(line["stage"].as_str().unwrap()), "{table}");
    line
}

#[test]
fn a_buffer_of_b_blocks_of_n_adds_exactly_b_n_over_fs() {
    // B = 3 blocks of N = 64 at 48 kHz: 192 / 48000 = 4 ms.
    let d = tempfile::tempdir().unwrap();
    let stage = "[[stage]]\nname = \"buf\"\nkind = \"buffer\"\nblock = 64\nblocks = 3\n";
    let line = check_adds(d.path(), "buf", stage, 3.0 * 64.0 / FS);
    assert!(
        line["stage"]
            .as_str()
            .unwrap()
            .contains("3 blocks of 64 samples")
    );
}

#[test]
fn a_codec_adds_its_frame_and_look_ahead_and_says_when_it_is_transparent() {
    // Frame F = 480 and look-ahead L = 120 at 48 kHz: (F + L) / fs = 12.5 ms, the algorithmic delay of a
    // frame-based codec (common practice, no source).
    let d = tempfile::tempdir().unwrap();
    let stage = "[[stage]]\nname = \"cod\"\nkind = \"codec\"\nframe = 480\nlookahead = 120\n";
    let line = check_adds(d.path(), "cod", stage, 600.0 / FS);
    assert!(line["stage"].as_str().unwrap().contains("transparent"));
    let (r, _) = run_report(d.path(), "cod2", &chain("cod2", "150 ms", stage));
    let echo = r["chain"]["stages"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s.to_string().contains("lookahead"))
        .cloned()
        .unwrap_or_else(|| panic!("no codec entry in {}", r["chain"]));
    assert!(echo.to_string().contains("\"transparent\":true"), "{echo}");
}

#[test]
fn a_codec_at_40_db_coding_snr_gives_about_40_db_at_the_output() {
    // White coding noise at 40 dB below the signal (frames of 480 hold whole periods of the 1 kHz tone, so
    // every frame's rms is the tone's). The output SNR is measured over the converter's Nyquist band (0 ..
    // 24 kHz) after the DAC's zero-order hold, which weights the flat noise by sinc^2(f/fs) over that band and
    // the tone by sinc^2(f0/fs) (the hold's response: common practice, no source): expected
    // 40 dB + 10 log10(sinc^2(f0/fs)) - 10 log10(mean of sinc^2 over 0..fs/2) = 40 + 1.11 dB. The 16-bit
    // converter's own noise (about 98 dB below) does not count. Allowed: 0.5 dB (the noise estimate of a few
    // thousand bins is good to about 0.1 dB).
    let d = tempfile::tempdir().unwrap();
    let stage = "[[stage]]\nkind = \"codec\"\nframe = 480\ncoding_snr = \"40 dB\"\n";
    let (r, _) = run_report(d.path(), "noisy", &chain("noisy", "300 ms", stage));
    let sinc2 = |x: f64| {
        if x == 0.0 {
            1.0
        } else {
            let a = std::f64::consts::PI * x;
            (a.sin() / a).powi(2)
        }
    };
    let n = 10_000;
    let mean = (0..n)
        .map(|i| sinc2((i as f64 + 0.5) / n as f64 * 0.5))
        .sum::<f64>()
        / n as f64;
    let f0 = r["output"]["fundamental_hz"].as_f64().unwrap();
    let want = 40.0 + 10.0 * sinc2(f0 / FS).log10() - 10.0 * mean.log10();
    let snr = r["output"]["snr_db"].as_f64().unwrap();
    assert!(
        (snr - want).abs() < 0.5,
        "output SNR {snr} dB, expected {want} dB"
    );
    // The ADC's record is untouched by the codec.
    assert!(r["adc"]["snr_db"].as_f64().unwrap() > 85.0);
}

/// The normal tail Q(x) = erfc(x / sqrt 2) / 2 for x >= 0, with erfc by M. Abramowitz and I. A. Stegun,
/// "Handbook of Mathematical Functions", 1964, formula 7.1.26 (absolute error below 1.5e-7).
fn q_tail(x: f64) -> f64 {
    let z = x / 2f64.sqrt();
    let t = 1.0 / (1.0 + 0.327_591_1 * z);
    let poly = t
        * (0.254_829_592
            + t * (-0.284_496_736
                + t * (1.421_413_741 + t * (-1.453_152_027 + t * 1.061_405_429))));
    0.5 * poly * (-z * z).exp()
}

#[test]
fn late_packets_are_counted_timed_and_reported() {
    // Normal jitter sigma = 1 ms, a buffer D = 1 ms beyond the mean delay. A packet is lost when its extra
    // delay J ~ N(0, sigma^2) exceeds D: p = P(J > D) = Q(D / sigma) = Q(1) = 0.1587, independently for each
    // packet, so the count lost out of n packets is binomial(n, p) with standard error sqrt(n p (1 - p)).
    // 1 s at 48 kHz in 1 ms packets: n = 1000 packets, 158.7 +- 11.6 lost; allowed 3 standard errors
    // (common practice, no source).
    let d = tempfile::tempdir().unwrap();
    let stage = r#"[[stage]]
name = "net"
kind = "network"
packet = "1 ms"
delay = "5 ms"
jitter = "1 ms"
jitter_law = "normal"
jitter_buffer = "1 ms"
concealment = "silence"
"#;
    let text = chain("net", "1 s", stage).replace("960 kHz", "240 kHz");
    let (r, table) = run_report(d.path(), "net", &text);
    let lost = r["latency"]["packets_lost"].as_u64().unwrap() as f64;
    let (n, p) = (1000.0, q_tail(1.0));
    let se = (n * p * (1.0 - p)).sqrt();
    assert!(
        (lost - n * p).abs() < 3.0 * se,
        "{lost} lost, expected {} +- {se}",
        n * p
    );
    let times: Vec<f64> = r["latency"]["packet_loss_times_s"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t.as_f64().unwrap())
        .collect();
    assert_eq!(times.len() as f64, lost);
    assert!(times.windows(2).all(|w| w[0] < w[1]));
    // Each lost packet should have played at its first code's arrival + (P - 1)/fs + delay + buffer: its
    // instant sits on the packet grid (k x 1 ms + the conversion time + 47/48 ms + 6 ms).
    for t in &times {
        let k = (t - 10e-6 - 47.0 / FS - 6e-3) / 1e-3;
        assert!(
            (k - k.round()).abs() < 1e-6,
            "loss at {t} s is off the packet grid"
        );
    }
    assert!(
        table.contains(&format!("network: {} packets lost", lost as u64)),
        "{table}"
    );
    // Budget lines: the packet fill, the mean delay and the jitter buffer.
    let budget = r["latency"]["budget"].to_string();
    for part in [
        "net: packet fill",
        "net: one-way delay",
        "net: jitter buffer",
    ] {
        assert!(budget.contains(part), "{budget}");
    }
}

#[test]
fn a_network_without_jitter_loses_nothing_and_adds_fill_delay_and_buffer() {
    // packet 0.5 ms = 24 codes: (24 - 1)/48000 + 3 ms + 0.5 ms.
    let d = tempfile::tempdir().unwrap();
    let stage = "[[stage]]\nname = \"lan\"\nkind = \"network\"\npacket = \"0.5 ms\"\ndelay = \"3 ms\"\n\
                 jitter_buffer = \"0.5 ms\"\n";
    let want = 23.0 / FS + 3e-3 + 0.5e-3;
    let (r, _) = run_report(d.path(), "lan", &chain("lan", "150 ms", stage));
    assert_eq!(r["latency"]["packets_lost"], 0);
    let (m, b) = (latency(&r, "measured_s"), latency(&r, "budget_s"));
    assert!((m - b).abs() < 1.0 / FS, "measured {m} s, budget {b} s");
    let lines: f64 = r["latency"]["budget"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|l| l["stage"].as_str().unwrap().starts_with("lan:"))
        .map(|l| l["seconds"].as_f64().unwrap())
        .sum();
    assert!((lines - want).abs() < 1e-12, "{lines} against {want}");
}

#[test]
fn bad_values_are_refused_at_their_key() {
    let d = tempfile::tempdir().unwrap();
    for (stage, key, says) in [
        (
            "[[stage]]\nkind = \"network\"\npacket = \"10 us\"\n",
            "stage.2.packet",
            "shorter than one sample",
        ),
        (
            "[[stage]]\nkind = \"network\"\npacket = \"1 ms\"\njitter = \"1 ms\"\njitter_buffer = \"-1 ms\"\n",
            "stage.2.jitter_buffer",
            "must not be negative",
        ),
        (
            "[[stage]]\nkind = \"network\"\npacket = \"1 ms\"\njitter = \"1 ms\"\n",
            "stage.2.jitter_buffer",
            "jitter_buffer",
        ),
        (
            "[[stage]]\nkind = \"network\"\npacket = \"1 ms\"\njitter = \"1 ms\"\njitter_law = \"fixed\"\n",
            "stage.2.jitter",
            "a fixed law has no spread",
        ),
        (
            "[[stage]]\nkind = \"network\"\npacket = \"1 ms\"\njitter_law = \"cauchy\"\n",
            "stage.2.jitter_law",
            "cauchy",
        ),
        (
            "[[stage]]\nkind = \"network\"\npacket = \"1 ms\"\njitter = \"1 ms\"\njitter_buffer = \"2 ms\"\n\
             jitter_law = \"pareto\"\njitter_shape = 1.5\n",
            "stage.2.jitter_shape",
            "above 2",
        ),
        (
            "[[stage]]\nkind = \"codec\"\nframe = 0\n",
            "stage.2.frame",
            "from 1",
        ),
        (
            "[[stage]]\nkind = \"codec\"\nframe = 480\ncoding_snr = \"-3 dB\"\n",
            "stage.2.coding_snr",
            "above 0 dB",
        ),
        (
            "[[stage]]\nkind = \"network\"\npacket = \"1 ms\"\ndelay = \"200 ms\"\n",
            "stage.2.delay",
            "the code stages' delays",
        ),
        (
            "[[stage]]\nkind = \"buffer\"\nblock = 9600\nblocks = 1\n",
            "stage.2.block",
            "leave 0 of the",
        ),
        (
            "[[stage]]\nkind = \"buffer\"\nblocks = 2\n",
            "stage.2.block",
            "block",
        ),
    ] {
        fs::write(d.path().join("bad.toml"), chain("bad", "150 ms", stage)).unwrap();
        let o = run_in(d.path(), &["check", "bad.toml"]);
        assert_eq!(o.status.code(), Some(2), "{stage}");
        let e = stderr(&o);
        assert!(e.contains("bad.toml:"), "{stage}: not located: {e}");
        assert!(e.contains(key), "{stage}: does not name {key}: {e}");
        assert!(e.contains(says), "{stage}: does not say `{says}`: {e}");
    }
}

#[test]
fn the_monitoring_loop_demo_answers_how_late_and_why() {
    let d = tempfile::tempdir().unwrap();
    let sc = common::repo("scenarios/monitor-loop.toml");
    let o = run_in(
        d.path(),
        &[
            "run",
            sc.to_str().unwrap(),
            "--no-plots",
            "--no-wav",
            "--out",
            "o",
        ],
    );
    ok(&o);
    let table = stdout(&o);
    for part in ["input buffer", "DSP", "output buffer", "total (budget)"] {
        assert!(table.contains(part), "{part}: {table}");
    }
    let r = common::json(&d.path().join("o/report.json"));
    let (m, b) = (latency(&r, "measured_s"), latency(&r, "budget_s"));
    assert!((m - b).abs() < 1.0 / FS, "measured {m} s, budget {b} s");
    assert!(m > 2e-3 && m < 10e-3, "a few ms: {m} s");
}
