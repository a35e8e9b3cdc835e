//! `convchain analyze` driven like a user would: captures written by the tool itself (or by hound, for the
//! formats the tool does not write), analysed by the built binary, `analysis.json` read back.

mod common;

use std::f64::consts::TAU;
use std::fs;
use std::path::{Path, PathBuf};

use common::{json, ok, run, stderr, stdout};
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

/// `a sin(2 pi f i / fs + phase)` plus Gaussian noise of standard deviation `sigma` from a seeded ChaCha RNG.
fn noisy_sine(n: usize, fs: f64, f: f64, a: f64, sigma: f64, seed: u64) -> Vec<f64> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let noise = Normal::new(0.0, sigma).unwrap();
    (0..n)
        .map(|i| a * (TAU * f * i as f64 / fs + 0.7).sin() + noise.sample(&mut rng))
        .collect()
}

fn analyze(args: &[&str]) -> std::process::Output {
    run(args)
}

fn capture_json(out: &Path) -> serde_json::Value {
    json(&out.join("analysis.json"))["capture"].clone()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

#[test]
fn a_sine_of_known_snr_written_by_the_tool_reads_back_its_snr() {
    // SNR = (A^2 / 2) / sigma^2 for a sine of amplitude A in white Gaussian noise of variance sigma^2 over the
    // Nyquist band (IEEE Std 1241 definition of SNR). The estimate's statistical spread with 2^16 samples and
    // the Blackman-Harris window is about 0.03 dB (relative sd sqrt(2 sum w^4) / sum w^2); the 24-bit
    // format's quantization noise (q^2/12, q = 2^-23) is 40 dB or more below the noise added. Tolerance
    // 0.2 dB. The tone is not coherent with the record, as in a real recording: 100 dB is beyond what the
    // window's leakage alone would allow (about 88 dB, see measure::sine_record).
    let d = tempfile::tempdir().unwrap();
    let (n, fs, f, a) = (1usize << 16, 48_000.0, 1_001.7, 0.5);
    for (seed, snr_db) in [(1u64, 60.0f64), (2, 80.0), (3, 100.0)] {
        let sigma = (a * a / 2.0 / 10f64.powf(snr_db / 10.0)).sqrt();
        let x = noisy_sine(n, fs, f, a, sigma, seed);
        let wav = d.path().join(format!("sine-{seed}.wav"));
        convchain::report::demo_audio::write_file(&wav, &x, fs as u32, 24, false, 1).unwrap();
        let out = d.path().join(format!("out-{seed}"));
        let o = analyze(&["analyze", s(&wav), "--out", s(&out)]);
        ok(&o);
        assert!(stdout(&o).contains("SNR"), "{}", stdout(&o));
        let c = capture_json(&out);
        let got = c["snr_db"].as_f64().unwrap();
        assert!(
            (got - snr_db).abs() < 0.2,
            "SNR {got} dB, expected {snr_db} dB"
        );
        // No distortion was added: SINAD is SNR within the same statistics.
        assert!((c["sinad_db"].as_f64().unwrap() - snr_db).abs() < 0.2);
        // ENOB from SINAD against the format's full scale: (SINAD - 1.76 + 20 log10(1 / A)) / 6.02 (IEEE Std
        // 1241), and the fit-residual ENOB against 24 bits, which sees the same noise.
        let enob = (snr_db - 1.76 + 20.0 * (1.0 / a).log10()) / 6.02;
        assert!((c["enob_bits"].as_f64().unwrap() - enob).abs() < 0.2 / 6.02 + 0.01);
        assert!((c["enob_sinefit_bits"].as_f64().unwrap() - enob).abs() < 0.2 / 6.02 + 0.01);
        assert_eq!(c["bits"], 24);
        assert_eq!(c["full_scale_from"], "format");
        assert!((c["fundamental_hz"].as_f64().unwrap() - f).abs() < 1e-3);
        assert!((c["amplitude"].as_f64().unwrap() - a).abs() < 1e-3);
        assert_eq!(c["samples"], n);
        assert_eq!(c["sample_rate_hz"], fs);
        for k in [
            "file",
            "thd_db",
            "sfdr_dbc",
            "noise_floor_dbfs",
            "sample_rate_hz",
            "samples",
        ] {
            assert!(c.get(k).is_some(), "analysis.json lacks capture.{k}");
        }
        for f in [
            "analysis_spectrum.png",
            "analysis_spectrum.svg",
            "analysis_waveform.png",
            "analysis_residual.svg",
        ] {
            assert!(out.join(f).is_file(), "{f} not written");
        }
    }
}

/// Write `channels` interleaved with hound in `format` (`bits`, float or integer).
fn write_wav(path: &Path, channels: &[Vec<f64>], rate: u32, bits: u16, float: bool) {
    let spec = hound::WavSpec {
        channels: channels.len() as u16,
        sample_rate: rate,
        bits_per_sample: bits,
        sample_format: if float {
            hound::SampleFormat::Float
        } else {
            hound::SampleFormat::Int
        },
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    let scale = f64::powi(2.0, i32::from(bits) - 1);
    for i in 0..channels[0].len() {
        for ch in channels {
            let v = ch[i];
            match (float, bits) {
                (true, _) => w.write_sample(v as f32).unwrap(),
                (false, 8) => w.write_sample((v * scale).round() as i8).unwrap(),
                (false, 16) => w.write_sample((v * scale).round() as i16).unwrap(),
                (false, _) => w
                    .write_sample((v * scale).round().min(scale - 1.0) as i32)
                    .unwrap(),
            }
        }
    }
    w.finalize().unwrap();
}

#[test]
fn every_wav_format_reads_to_the_same_fundamental_and_amplitude() {
    // The same sine in every format hound writes; the fit's spread is bounded by the coarsest format's
    // quantization noise (8 bits: q/sqrt(12) = 2.3e-3 rms, so sd(A) = 2.3e-3 sqrt(2/N) = 5e-5 and sd(f) well
    // under 1e-3 Hz by the Cramer-Rao bounds, S. M. Kay 1993, Fundamentals of Statistical Signal Processing:
    // Estimation Theory, ch. 3). Tolerances: 1e-3 of amplitude and 0.01 Hz, ten of those spreads or more.
    let d = tempfile::tempdir().unwrap();
    let (n, fs, f, a) = (8192usize, 48_000.0, 3_210.5, 0.6);
    // A little noise so the 8-bit quantization error is noise-like rather than harmonics of the tone.
    let x = noisy_sine(n, fs, f, a, 2e-3, 9);
    let other: Vec<f64> = (0..n)
        .map(|i| 0.3 * (TAU * 700.0 * i as f64 / fs).sin())
        .collect();
    let mut seen = Vec::new();
    for (bits, float, stereo) in [
        (8u16, false, false),
        (16, false, false),
        (24, false, false),
        (32, false, false),
        (32, true, false),
        (16, false, true),
    ] {
        let name = format!(
            "f{bits}{}{}.wav",
            if float { "f" } else { "i" },
            if stereo { "s" } else { "" }
        );
        let p = d.path().join(&name);
        let chans = if stereo {
            vec![other.clone(), x.clone()]
        } else {
            vec![x.clone()]
        };
        write_wav(&p, &chans, fs as u32, bits, float);
        let out = d.path().join(format!("out-{name}"));
        let mut args = vec!["analyze", s(&p), "--out", s(&out), "--no-plots"];
        if stereo {
            args.extend(["--channel", "2"]);
        }
        let o = analyze(&args);
        ok(&o);
        let c = capture_json(&out);
        let got_f = c["fundamental_hz"].as_f64().unwrap();
        let got_a = c["amplitude"].as_f64().unwrap();
        assert!((got_f - f).abs() < 0.01, "{name}: f {got_f}");
        assert!((got_a - a).abs() < 1e-3, "{name}: A {got_a}");
        assert_eq!(c["sample_rate_hz"], fs, "{name}");
        if float {
            assert!(
                c["bits"].is_null() && c["enob_sinefit_bits"].is_null(),
                "{name}"
            );
        } else {
            assert_eq!(c["bits"], bits, "{name}");
        }
        seen.push((got_f, got_a));
    }
    // The 16-bit file, mono and as channel 2 of a stereo file, gives identical numbers.
    assert_eq!(seen[1], seen[5]);
}

#[test]
fn a_stereo_file_needs_its_channel_and_a_channel_beyond_the_file_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let x = noisy_sine(1024, 8000.0, 440.0, 0.5, 1e-3, 3);
    let p = d.path().join("st.wav");
    write_wav(&p, &[x.clone(), x], 8000, 16, false);
    let o = analyze(&["analyze", s(&p), "--out", s(&d.path().join("o"))]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("st.wav") && stderr(&o).contains("--channel"),
        "{}",
        stderr(&o)
    );
    let o = analyze(&[
        "analyze",
        s(&p),
        "--channel",
        "3",
        "--out",
        s(&d.path().join("o")),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("2 channel(s)"), "{}", stderr(&o));
    let o = analyze(&[
        "analyze",
        s(&p),
        "--column",
        "CH1",
        "--out",
        s(&d.path().join("o")),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        !d.path().join("o").exists(),
        "a refused analysis wrote its folder"
    );
}

/// A scope-style CSV: time, then CH1 (a sine at `f1`) and CH2 (a sine at `f2`), 1 MHz sampling.
fn scope_csv(n: usize, f1: f64, f2: f64, skip_row: Option<usize>) -> String {
    let mut s = String::from("# exported by a scope\nTime (s),CH1,CH2\n");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
    let noise = Normal::new(0.0, 1e-3).unwrap();
    for i in 0..n {
        if Some(i) == skip_row {
            continue;
        }
        let t = -5e-3 + i as f64 * 1e-6;
        let v1 = 1.1 * (TAU * f1 * t).sin() + noise.sample(&mut rng);
        let v2 = 0.4 * (TAU * f2 * t).cos();
        s.push_str(&format!("{t:.9e},{v1:.6},{v2:.6}\n"));
    }
    s
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    fs::write(&p, text).unwrap();
    p
}

#[test]
fn a_csv_column_is_chosen_by_name_or_by_number() {
    let d = tempfile::tempdir().unwrap();
    let p = write(
        d.path(),
        "scope.csv",
        &scope_csv(20_000, 5_123.0, 11_000.0, None),
    );
    let by_name = d.path().join("by-name");
    ok(&analyze(&[
        "analyze",
        s(&p),
        "--column",
        "CH2",
        "--out",
        s(&by_name),
    ]));
    let by_number = d.path().join("by-number");
    ok(&analyze(&[
        "analyze",
        s(&p),
        "--column",
        "3",
        "--out",
        s(&by_number),
        "--no-plots",
    ]));
    let (a, b) = (capture_json(&by_name), capture_json(&by_number));
    assert_eq!(a["column"], "CH2");
    assert_eq!(b["column"], "CH2");
    for k in ["fundamental_hz", "amplitude", "snr_db", "sinad_db"] {
        assert_eq!(a[k], b[k], "{k}");
    }
    // The rate comes from the time column (1 us steps), the start from its first time.
    assert!((a["sample_rate_hz"].as_f64().unwrap() - 1e6).abs() < 1e-3);
    assert!((a["start_s"].as_f64().unwrap() + 5e-3).abs() < 1e-12);
    assert!((a["fundamental_hz"].as_f64().unwrap() - 11_000.0).abs() < 0.01);
    assert!((a["amplitude"].as_f64().unwrap() - 0.4).abs() < 1e-4);
    // CH1 by its number is the other sine. Without a full scale, ENOB is referred to the sine itself.
    let ch1 = d.path().join("ch1");
    let o = analyze(&[
        "analyze",
        s(&p),
        "--column",
        "2",
        "--out",
        s(&ch1),
        "--no-plots",
    ]);
    ok(&o);
    let c = capture_json(&ch1);
    assert!((c["fundamental_hz"].as_f64().unwrap() - 5_123.0).abs() < 0.01);
    assert_eq!(c["full_scale_from"], "signal");
    assert!(c["enob_sinefit_bits"].is_null());
    // With a full scale and a resolution both ENOBs are given, referred to that full scale: the noise added
    // (1 mV rms) against a 1.5 V peak full scale gives a fit ENOB of 16 - log2(1e-3 / (q / sqrt 12)),
    // q = 3 V / 2^16 (IEEE Std 1241's fit ENOB, computed by hand).
    let fsd = d.path().join("fs");
    ok(&analyze(&[
        "analyze",
        s(&p),
        "--column",
        "CH1",
        "--full-scale",
        "1.5 V",
        "--bits",
        "16",
        "--out",
        s(&fsd),
        "--no-plots",
    ]));
    let c = capture_json(&fsd);
    let q = 3.0 / 65536.0;
    let expect = 16.0 - (1e-3 / (q / 12f64.sqrt())).log2();
    let got = c["enob_sinefit_bits"].as_f64().unwrap();
    assert!((got - expect).abs() < 0.05, "{got} vs {expect}");
    // Without a column, a file with two value columns is refused with their list.
    let o = analyze(&["analyze", s(&p), "--out", s(&d.path().join("none"))]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("2 \"CH1\", 3 \"CH2\""),
        "{}",
        stderr(&o)
    );
    // --bits without --full-scale cannot give a code width for a CSV.
    let o = analyze(&[
        "analyze",
        s(&p),
        "--column",
        "CH1",
        "--bits",
        "12",
        "--out",
        s(&d.path().join("b")),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("--bits needs --full-scale"),
        "{}",
        stderr(&o)
    );
}

#[test]
fn a_csv_with_a_non_uniform_time_column_is_refused_naming_the_row() {
    let d = tempfile::tempdir().unwrap();
    // Row 700 (from 0) missing: the step from row 699 to row 701 is two periods. Rows start on line 3 (a
    // comment, then the header), so row 699 is on line 702 and row 701, the one named, on line 703.
    let p = write(
        d.path(),
        "gap.csv",
        &scope_csv(2_000, 5_123.0, 11_000.0, Some(700)),
    );
    let out = d.path().join("o");
    let o = analyze(&["analyze", s(&p), "--column", "CH1", "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(e.contains("gap.csv:703:"), "{e}");
    assert!(
        e.contains("time steps by 2.0") && e.contains("uniform within 1 %"),
        "{e}"
    );
    assert!(!out.exists(), "a refused analysis wrote its folder");
    // A text cell names its line and column.
    let p = write(d.path(), "text.csv", "t,v\n0,1\n1e-3,oops\n");
    let o = analyze(&["analyze", s(&p), "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("text.csv:3: column 2 (\"v\"): \"oops\" is not a number"),
        "{}",
        stderr(&o)
    );
}

#[test]
fn analyze_never_writes_into_a_folder_of_foreign_files() {
    let d = tempfile::tempdir().unwrap();
    let x = noisy_sine(4096, 48_000.0, 1000.0, 0.5, 1e-3, 5);
    let wav = d.path().join("a.wav");
    convchain::report::demo_audio::write_file(&wav, &x, 48_000, 16, false, 1).unwrap();
    let out = d.path().join("mine");
    fs::create_dir(&out).unwrap();
    fs::write(out.join("analysis.json"), "my own file").unwrap();
    let o = analyze(&["analyze", s(&wav), "--out", s(&out)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("did not make"), "{}", stderr(&o));
    assert_eq!(
        fs::read_to_string(out.join("analysis.json")).unwrap(),
        "my own file"
    );
    // Its own folder is reused: a second analysis replaces the first's files.
    let own = d.path().join("own");
    ok(&analyze(&["analyze", s(&wav), "--out", s(&own)]));
    ok(&analyze(&["analyze", s(&wav), "--out", s(&own), "--json"]));
    assert!(own.join("analysis.json").is_file());
}
