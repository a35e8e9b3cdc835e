//! `convchain run --compare CAPTURE` driven like a user would: a recording of the built chain beside its
//! simulation, report.json's `compare` object read back.

mod common;

use std::f64::consts::TAU;
use std::fs;
use std::path::Path;

use common::{json, ok, repo, run, stderr, stdout};
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The studio-interface demo: a 1 kHz sine through a 16-bit chain, output band 20 kHz.
fn scenario() -> String {
    repo("scenarios/studio-interface.toml")
        .to_str()
        .unwrap()
        .to_string()
}

/// Write a scope-style CSV export: a time column, then one value column named `CH1`.
fn write_csv(path: &Path, fs: f64, x: &[f64]) {
    let mut t = String::from("time_s,CH1\n");
    for (i, v) in x.iter().enumerate() {
        t.push_str(&format!("{:.12e},{v:.12e}\n", i as f64 / fs));
    }
    fs::write(path, t).unwrap();
}

#[test]
fn a_capture_of_known_noise_and_distortion_reads_back_beside_the_simulation() {
    // The capture: A sin(w t) + h2 sin(2 w t) + h3 sin(3 w t) + white Gaussian noise of standard deviation
    // sigma, sampled at 200 kHz. By the IEEE Std 1241 definitions, THD = 20 log10(sqrt(h2^2 + h3^2) / A) and,
    // over a band B of the Nyquist band fs/2, SNR = 10 log10((A^2 / 2) / (sigma^2 B / (fs / 2))) (white noise
    // spreads evenly over the Nyquist band). 40 000 samples: the SNR estimate's spread is a few hundredths of
    // a dB; tolerance 0.3 dB. THD from two lines 60 dB above the noise: within 0.1 dB.
    let d = tempfile::tempdir().unwrap();
    let (fs, n, f, a, h2, h3, sigma) = (200e3, 40_000usize, 1_000.0, 2.0, 2e-3, 8e-4, 2e-4);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let noise = Normal::new(0.0, sigma).unwrap();
    let x: Vec<f64> = (0..n)
        .map(|i| {
            let w = TAU * f * i as f64 / fs + 0.3;
            a * w.sin() + h2 * (2.0 * w).sin() + h3 * (3.0 * w).sin() + noise.sample(&mut rng)
        })
        .collect();
    let cap = d.path().join("scope.csv");
    write_csv(&cap, fs, &x);
    let out = d.path().join("out");
    let o = run(&[
        "run",
        &scenario(),
        "--out",
        s(&out),
        "--no-wav",
        "--compare",
        s(&cap),
    ]);
    ok(&o);
    let text = stdout(&o);
    assert!(text.contains("captured - simulated"), "{text}");
    assert!(text.contains("worse"), "{text}");
    let r = json(&out.join("report.json"));
    let c = &r["compare"];
    let band = c["band_hz"].as_f64().unwrap();
    assert_eq!(band, r["output"]["band_hz"].as_f64().unwrap());
    let snr_expected = 10.0 * ((a * a / 2.0) / (sigma * sigma * band / (fs / 2.0))).log10();
    let thd_expected = 20.0 * ((h2 * h2 + h3 * h3).sqrt() / a).log10();
    let got = &c["captured"];
    let snr = got["snr_db"].as_f64().unwrap();
    let thd = got["thd_db"].as_f64().unwrap();
    assert!(
        (snr - snr_expected).abs() < 0.3,
        "SNR {snr} vs {snr_expected} dB"
    );
    assert!(
        (thd - thd_expected).abs() < 0.1,
        "THD {thd} vs {thd_expected} dB"
    );
    assert!((got["amplitude_v"].as_f64().unwrap() - a).abs() < 1e-4 * a);
    // The difference column is the captured figure less the simulated one.
    let sim = &c["simulated"];
    let diff = c["captured_minus_simulated"]["sinad_db"].as_f64().unwrap();
    let expect = got["sinad_db"].as_f64().unwrap() - sim["sinad_db"].as_f64().unwrap();
    assert!((diff - expect).abs() < 1e-9, "{diff} vs {expect}");
    // The simulated column is the run's own output measured by the sine-fit meter; the run's coherent meter
    // reads the same record within a fraction of a dB (both IEEE Std 1241 definitions on one record).
    let run_sinad = r["output"]["sinad_db"].as_f64().unwrap();
    let sim_sinad = sim["sinad_db"].as_f64().unwrap();
    assert!(
        (run_sinad - sim_sinad).abs() < 0.5,
        "{run_sinad} vs {sim_sinad}"
    );
    // The overlaid spectra are drawn, and the reports carry the section.
    for f in ["spectrum_compare.png", "spectrum_compare.svg"] {
        assert!(out.join(f).is_file(), "{f}");
    }
    let html = fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("Capture beside the simulation"));
    let md = fs::read_to_string(out.join("report.md")).unwrap();
    assert!(md.contains("| SINAD |"), "{md}");
}

#[test]
fn the_chains_own_output_as_a_capture_reads_the_same_as_its_simulation() {
    // By construction: the capture is the simulated output itself, as waveforms.csv wrote it (the whole run,
    // start-up included, at the grid rate), so every difference is the meter's spread between two records of
    // one signal: under 0.5 dB in SINAD and 0.01 dB in level.
    let d = tempfile::tempdir().unwrap();
    let first = d.path().join("first");
    ok(&run(&[
        "run",
        &scenario(),
        "--out",
        s(&first),
        "--no-wav",
        "--no-plots",
        "-q",
    ]));
    let (header, _) = common::csv_rows(&first.join("waveforms.csv"));
    let last_analog = header
        .iter()
        .rev()
        .find(|h| h.ends_with("_v"))
        .unwrap()
        .clone();
    let out = d.path().join("second");
    let o = run(&[
        "run",
        &scenario(),
        "--out",
        s(&out),
        "--no-wav",
        "--no-plots",
        "--compare",
        s(&first.join("waveforms.csv")),
        "--compare-column",
        &last_analog,
    ]);
    ok(&o);
    let c = json(&out.join("report.json"))["compare"].clone();
    let dd = &c["captured_minus_simulated"];
    assert!(dd["sinad_db"].as_f64().unwrap().abs() < 0.5, "{c}");
    assert!(dd["amplitude_db"].as_f64().unwrap().abs() < 0.01, "{c}");
    assert!(dd["fundamental_hz"].as_f64().unwrap().abs() < 0.01, "{c}");
    assert!(!stdout(&o).contains("worse"), "{}", stdout(&o));
}

#[test]
fn a_wav_capture_is_read_in_volts_through_its_full_scale() {
    // Sample value 1.0 stands for --compare-full-scale volts (as the source's `wav` waveform reads a file): a
    // sine of 0.5 of full scale on channel 2 with a 2 V full scale is a 1 V sine.
    let d = tempfile::tempdir().unwrap();
    let (fs, n) = (96_000u32, 1usize << 15);
    let x: Vec<f64> = (0..n)
        .map(|i| 0.5 * (TAU * 1_000.0 * i as f64 / f64::from(fs)).sin())
        .collect();
    // The tool's writer puts the samples on channel 1 and their inverse on channel 2.
    let wav = d.path().join("card.wav");
    convchain::report::demo_audio::write_file(&wav, &x, fs, 24, false, 2).unwrap();
    let out = d.path().join("out");
    ok(&run(&[
        "run",
        &scenario(),
        "--out",
        s(&out),
        "--no-wav",
        "--no-plots",
        "-q",
        "--compare",
        s(&wav),
        "--compare-channel",
        "2",
        "--compare-full-scale",
        "2 V",
    ]));
    let c = json(&out.join("report.json"))["compare"].clone();
    let amp = c["captured"]["amplitude_v"].as_f64().unwrap();
    assert!((amp - 1.0).abs() < 1e-4, "{amp}");
    assert_eq!(c["volts_per_unit"].as_f64().unwrap(), 2.0);
}

#[test]
fn bad_captures_and_sources_are_refused_before_anything_is_written() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("out");
    // A missing file: bad input (exit 2), the file named, no folder made.
    let missing = d.path().join("nothing-here.csv");
    let o = run(&[
        "run",
        &scenario(),
        "--out",
        s(&out),
        "--compare",
        s(&missing),
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("nothing-here.csv"), "{}", stderr(&o));
    assert!(!out.exists());
    // A CSV asked for a channel.
    let cap = d.path().join("scope.csv");
    write_csv(&cap, 100e3, &vec![0.0; 100]);
    let o = run(&[
        "run",
        &scenario(),
        "--out",
        s(&out),
        "--compare",
        s(&cap),
        "--compare-channel",
        "1",
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("--column"), "{}", stderr(&o));
    // A source that is not a sine cannot be compared tone for tone.
    let noise = d.path().join("noise.toml");
    let text = fs::read_to_string(scenario()).unwrap();
    let text = text.replace(
        "waveform = \"sine\"",
        "waveform = \"chirp\"\nstart = \"100 Hz\"\nstop = \"5 kHz\"\nsweep_time = \"20 ms\"",
    );
    let text = text.replace("frequency = \"1 kHz\"\n", "");
    fs::write(&noise, text).unwrap();
    let o = run(&["run", s(&noise), "--out", s(&out), "--compare", s(&cap)]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("sine"), "{}", stderr(&o));
    assert!(!out.exists());
    // The capture's options need --compare.
    let o = run(&[
        "run",
        &scenario(),
        "--out",
        s(&out),
        "--compare-column",
        "CH1",
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
}

#[test]
fn a_compare_table_in_the_scenario_names_the_capture_beside_it() {
    // `[compare]` with a path relative to the scenario's folder; `channel` would count from 0 as the source's.
    let d = tempfile::tempdir().unwrap();
    let (fs, n) = (100e3, 20_000usize);
    let x: Vec<f64> = (0..n)
        .map(|i| 1.5 * (TAU * 1_000.0 * i as f64 / fs).sin())
        .collect();
    write_csv(&d.path().join("take.csv"), fs, &x);
    let text = fs::read_to_string(scenario()).unwrap();
    let sc = d.path().join("with-take.toml");
    fs::write(
        &sc,
        format!("{text}\n[compare]\nfile = \"take.csv\"\ncolumn = \"CH1\"\n"),
    )
    .unwrap();
    let out = d.path().join("out");
    ok(&run(&[
        "run",
        s(&sc),
        "--out",
        s(&out),
        "--no-wav",
        "--no-plots",
        "-q",
    ]));
    let c = json(&out.join("report.json"))["compare"].clone();
    assert!(
        (c["captured"]["amplitude_v"].as_f64().unwrap() - 1.5).abs() < 1e-6,
        "{c}"
    );
    assert!(c["file"].as_str().unwrap().ends_with("take.csv"));
    // A file that is not there: located at the key, exit 2.
    let bad = d.path().join("bad.toml");
    fs::write(&bad, format!("{text}\n[compare]\nfile = \"gone.csv\"\n")).unwrap();
    let o = run(&["run", s(&bad), "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(e.contains("compare.file") && e.contains("gone.csv"), "{e}");
}
