//! `convchain delay` driven like a user would, on recordings the test makes itself (by construction: a known
//! delay, drift and gain put into a closed-form broadband signal).

mod common;

use std::f64::consts::TAU;
use std::path::Path;

use common::{json, ok, run, stderr};
use rand::{RngExt, SeedableRng};

/// A broadband signal in closed form (so it can be read at any instant): 300 tones of random frequencies up
/// to 0.45 of the sample rate and random phases; `t` in samples.
fn broadband(seed: u64) -> impl Fn(f64) -> f64 {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let tones: Vec<(f64, f64)> = (0..300)
        .map(|_| (rng.random::<f64>() * 0.45, rng.random::<f64>() * TAU))
        .collect();
    move |t: f64| {
        tones
            .iter()
            .map(|(f, p)| (TAU * f * t + p).sin())
            .sum::<f64>()
            / 40.0
    }
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn write_wav(path: &Path, x: &[f64], rate: u32) {
    convchain::report::demo_audio::write_file(path, x, rate, 32, true, 1).unwrap();
}

#[test]
fn a_fractional_delay_and_a_gain_between_two_channels_are_found() {
    // By construction: channel 2 is channel 1 read 12.4 samples later at half the level (-6.02 dB).
    let d = tempfile::tempdir().unwrap();
    let sig = broadband(1);
    let (n, fs, lag) = (48_000usize, 48_000.0, 12.4);
    let path = d.path().join("both.wav");
    let spec = hound::WavSpec {
        channels: 2,
        sample_rate: fs as u32,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(&path, spec).unwrap();
    for i in 0..n {
        w.write_sample(sig(i as f64) as f32).unwrap();
        w.write_sample((0.5 * sig(i as f64 - lag)) as f32).unwrap();
    }
    w.finalize().unwrap();
    let out = d.path().join("out");
    let o = run(&[
        "delay",
        s(&path),
        "--reference",
        "1",
        "--capture",
        "2",
        "--out",
        s(&out),
    ]);
    ok(&o);
    let r = json(&out.join("delay.json"))["delay"].clone();
    for k in ["start_s", "end_s"] {
        let got = r[k].as_f64().unwrap() * fs;
        assert!((got - lag).abs() < 0.1, "{k}: {got} samples");
    }
    assert!(
        (r["gain_db"].as_f64().unwrap() + 6.0206).abs() < 0.1,
        "{}",
        r["gain_db"]
    );
    assert!(r["confidence"].as_f64().unwrap() > 0.9);
    assert!(r["drift_ppm"].as_f64().unwrap().abs() < 2.0);
    assert!(r["windows"].as_array().unwrap().len() >= 3);
    assert!(out.join("delay.png").is_file() && out.join("delay.svg").is_file());
}

#[test]
fn a_fifty_ppm_drift_between_two_recordings_is_recovered_within_two_ppm() {
    // By construction: the capture's delay shrinks from 3 ms by 50 us per second, the drift of two clocks
    // 50 ppm apart (positive: the delay shrinks).
    let d = tempfile::tempdir().unwrap();
    let sig = broadband(2);
    let fs = 48_000.0;
    let n = (4.0 * fs) as usize;
    let x: Vec<f64> = (0..n).map(|i| sig(i as f64)).collect();
    let y: Vec<f64> = (0..n)
        .map(|i| {
            let t = i as f64 / fs;
            sig(i as f64 - (3e-3 - 50e-6 * t) * fs)
        })
        .collect();
    let (rp, cp) = (d.path().join("ref.wav"), d.path().join("cap.wav"));
    write_wav(&rp, &x, fs as u32);
    write_wav(&cp, &y, fs as u32);
    let out = d.path().join("out");
    ok(&run(&[
        "delay",
        s(&rp),
        s(&cp),
        "--out",
        s(&out),
        "--no-plots",
    ]));
    let r = json(&out.join("delay.json"))["delay"].clone();
    let drift = r["drift_ppm"].as_f64().unwrap();
    assert!((drift - 50.0).abs() < 2.0, "drift {drift} ppm");
    let last_s = (n - 1) as f64 / fs;
    assert!((r["start_s"].as_f64().unwrap() - 3e-3).abs() < 0.1 / fs);
    assert!((r["end_s"].as_f64().unwrap() - (3e-3 - 50e-6 * last_s)).abs() < 0.1 / fs);
    // The same level: 0 dB within 0.1 dB despite the drift within each window.
    assert!(
        r["gain_db"].as_f64().unwrap().abs() < 0.1,
        "{}",
        r["gain_db"]
    );
}

#[test]
fn unrelated_recordings_are_refused_with_exit_1_and_no_number() {
    let d = tempfile::tempdir().unwrap();
    let (a, b) = (broadband(5), broadband(6));
    let x: Vec<f64> = (0..20_000).map(|i| a(i as f64)).collect();
    let y: Vec<f64> = (0..20_000).map(|i| b(i as f64)).collect();
    let (rp, cp) = (d.path().join("a.wav"), d.path().join("b.wav"));
    write_wav(&rp, &x, 48_000);
    write_wav(&cp, &y, 48_000);
    let out = d.path().join("out");
    let o = run(&["delay", s(&rp), s(&cp), "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    assert!(stderr(&o).contains("do not correlate"), "{}", stderr(&o));
    assert!(!out.exists());
    // Different rates are refused as bad input.
    let cp2 = d.path().join("c.wav");
    write_wav(&cp2, &x, 44_100);
    let o = run(&["delay", s(&rp), s(&cp2), "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("resample"), "{}", stderr(&o));
}

#[test]
fn two_columns_of_one_csv_with_phat() {
    // By construction: column B is column A 7 samples later (1 us steps: 7 us).
    let d = tempfile::tempdir().unwrap();
    let sig = broadband(7);
    let mut text = String::from("time,A,B\n");
    for i in 0..20_000 {
        let t = i as f64 * 1e-6;
        text.push_str(&format!(
            "{t:.9e},{:.6},{:.6}\n",
            sig(i as f64),
            sig(i as f64 - 7.0)
        ));
    }
    let p = d.path().join("two.csv");
    std::fs::write(&p, text).unwrap();
    let out = d.path().join("out");
    ok(&run(&[
        "delay",
        s(&p),
        "--reference",
        "A",
        "--capture",
        "B",
        "--method",
        "phat",
        "--out",
        s(&out),
        "--no-plots",
    ]));
    let r = json(&out.join("delay.json"))["delay"].clone();
    assert!(
        (r["start_s"].as_f64().unwrap() - 7e-6).abs() < 0.1e-6,
        "{}",
        r["start_s"]
    );
    assert_eq!(r["method"], "phat");
    // One file needs both columns named.
    let o = run(&["delay", s(&p), "--reference", "A", "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(2));
}
