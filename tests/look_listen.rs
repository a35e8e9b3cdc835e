//! Plots, listening files and reports of a run, checked through the files a user gets (and the library for
//! what pictures contain).

mod common;

use std::fs;
use std::path::Path;

use common::{json, ok, repo, run_in};

/// An ideal N-bit chain at 48 kSPS on a 4.8 MHz grid: sine -> sar_adc -> dac (zero-order hold), nothing else.
fn ideal_chain(bits: u32, amplitude_v: f64, extra_adc: &str) -> String {
    ideal_chain_at(bits, amplitude_v, 0.0, extra_adc)
}

fn ideal_chain_at(bits: u32, amplitude_v: f64, offset_v: f64, extra_adc: &str) -> String {
    format!(
        r#"
name = "ideal{bits}"
[simulation]
analog_rate = "4.8 MHz"
duration = "150 ms"
settle = "10 ms"
seed = 3
[source]
waveform = "sine"
frequency = "1.1 kHz"
amplitude = "{amplitude_v} V"
offset = "{offset_v} V"
[[stage]]
kind = "sar_adc"
bits = {bits}
range = ["-1 V", "1 V"]
sample_rate = "48 kHz"
conversion_time = "10 us"
{extra_adc}
[[stage]]
kind = "dac"
"#
    )
}

fn read_wav(path: &Path) -> (hound::WavSpec, Vec<f64>) {
    let mut r = hound::WavReader::open(path).unwrap();
    let spec = r.spec();
    let v: Vec<f64> = match spec.sample_format {
        hound::SampleFormat::Float => r.samples::<f32>().map(|s| s.unwrap() as f64).collect(),
        hound::SampleFormat::Int => {
            let scale = f64::powi(2.0, spec.bits_per_sample as i32 - 1);
            r.samples::<i32>()
                .map(|s| s.unwrap() as f64 / scale)
                .collect()
        }
    };
    (spec, v)
}

fn rms(x: &[f64]) -> f64 {
    (x.iter().map(|v| v * v).sum::<f64>() / x.len() as f64).sqrt()
}

#[test]
fn a_run_writes_plots_reports_and_three_wav_files() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("s.toml"), ideal_chain(8, 0.9, "")).unwrap();
    ok(&run_in(
        d.path(),
        &["run", "s.toml", "--quiet", "--out", "o"],
    ));
    let o = d.path().join("o");
    for stem in ["waveform", "spectrum_output", "spectrum_adc", "latency"] {
        let png = fs::read(o.join(format!("{stem}.png"))).unwrap();
        let decoder = png::Decoder::new(std::io::Cursor::new(png));
        let reader = decoder.read_info().expect("PNG decodes");
        assert_eq!(
            (reader.info().width, reader.info().height),
            (1200, 750),
            "{stem}"
        );
        let svg = fs::read_to_string(o.join(format!("{stem}.svg"))).unwrap();
        assert!(
            svg.contains("<svg") && svg.trim_end().ends_with("</svg>"),
            "{stem}"
        );
    }
    let md = fs::read_to_string(o.join("report.md")).unwrap();
    assert!(
        md.contains("](waveform.png)") && md.contains("| SINAD |"),
        "{md}"
    );
    let html = fs::read_to_string(o.join("report.html")).unwrap();
    assert!(html.contains("<svg") && html.contains("SINAD"));
    // Self-contained: no scripts, nothing fetched (the SVG namespace URI is a name, not a fetch).
    assert!(!html.contains("<script"));
    assert!(
        !html.contains("src=\"http") && !html.contains("href=\"http") && !html.contains("url(http")
    );
    let mut lengths = Vec::new();
    for f in ["input.wav", "output.wav", "error.wav"] {
        let (spec, v) = read_wav(&o.join(f));
        assert_eq!(spec.sample_rate, 48000, "{f}");
        assert_eq!(
            (spec.bits_per_sample, spec.sample_format),
            (24, hound::SampleFormat::Int),
            "{f}"
        );
        assert_eq!(spec.channels, 1);
        assert!(v.iter().all(|s| s.abs() < 1.0), "{f} clips");
        lengths.push(v.len());
    }
    assert!(
        lengths.iter().all(|&l| l == lengths[0] && l > 4000),
        "{lengths:?}"
    );
}

#[test]
fn wav_rate_and_format_options_are_honoured() {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("s.toml"), ideal_chain(8, 0.9, "")).unwrap();
    ok(&run_in(
        d.path(),
        &[
            "run",
            "s.toml",
            "--quiet",
            "--out",
            "o",
            "--wav-rate",
            "44100",
            "--wav-format",
            "float32",
            "--no-plots",
        ],
    ));
    let (spec, v) = read_wav(&d.path().join("o/output.wav"));
    assert_eq!(
        (spec.sample_rate, spec.bits_per_sample, spec.sample_format),
        (44100, 32, hound::SampleFormat::Float)
    );
    // 140 ms of coherent analysis record, looped without a seam to the 2 s minimum at 44.1 kHz.
    assert_eq!(v.len(), 88_200);
    let r = json(&d.path().join("o/report.json"));
    assert_eq!(r["listening"]["looped"], "seamless");
    assert_eq!(r["listening"]["seconds"], 2.0);
    assert!(!d.path().join("o/waveform.png").exists());
    assert!(!d.path().join("o/report.html").exists());
}

fn error_rms_v(bits: u32, amplitude_v: f64, offset_v: f64, extra_adc: &str) -> f64 {
    let d = tempfile::tempdir().unwrap();
    fs::write(
        d.path().join("s.toml"),
        ideal_chain_at(bits, amplitude_v, offset_v, extra_adc),
    )
    .unwrap();
    ok(&run_in(
        d.path(),
        &[
            "run",
            "s.toml",
            "--quiet",
            "--out",
            "o",
            "--no-plots",
            "--wav-rate",
            "48000",
        ],
    ));
    let r: serde_json::Value =
        serde_json::from_str(&fs::read_to_string(d.path().join("o/report.json")).unwrap()).unwrap();
    let l = &r["listening"];
    // Cross-check the file against the reported figure.
    let (_, v) = read_wav(&d.path().join("o/error.wav"));
    let from_file =
        rms(&v) * l["full_scale_v"].as_f64().unwrap() / l["error_gain_used"].as_f64().unwrap();
    let reported = l["error_rms_v"].as_f64().unwrap();
    assert!(
        (from_file / reported - 1.0).abs() < 0.01,
        "{from_file} vs {reported}"
    );
    reported
}

/// Fraction of the rms of a zero-order-held white error that lies below `band` x fs: the held error has the
/// spectrum q^2/12 x sinc^2(f/fs) / fs (Oppenheim and Schafer, Discrete-Time Signal Processing, 3rd ed., 4.8.3),
/// whose integral over all frequencies is q^2/12; sqrt(2 x integral of sinc^2(x) from 0 to band).
fn held_band_factor(band: f64) -> f64 {
    let n = 100_000;
    let h = band / n as f64;
    let sinc2 = |x: f64| {
        if x == 0.0 {
            1.0
        } else {
            ((std::f64::consts::PI * x).sin() / (std::f64::consts::PI * x)).powi(2)
        }
    };
    let integral: f64 = (0..n).map(|i| sinc2((i as f64 + 0.5) * h) * h).sum();
    (2.0 * integral).sqrt()
}

#[test]
fn the_error_file_of_an_ideal_chain_holds_the_quantization_noise() {
    // W. R. Bennett, "Spectra of quantized signals", BSTJ 27 (1948): the error of an ideal quantizer with a busy
    // input is white with power q^2/12. The DAC holds each error sample for one period, which shapes it by
    // sinc^2(f/fs); the 48 kHz file keeps the band below its Nyquist frequency (the resampler's transition runs
    // from 0.45 to 0.5 of 48 kHz: take 0.475 fs) and drops the hold's images. Expected within 10 %.
    let factor = held_band_factor(0.475);
    for bits in [8u32, 10] {
        let q = 2.0 / f64::powi(2.0, bits as i32);
        let e = error_rms_v(bits, 0.95, 0.0, "");
        let ratio = e / (q / 12f64.sqrt() * factor);
        assert!(
            (ratio - 1.0).abs() < 0.1,
            "{bits} bits: error rms / expected = {ratio}"
        );
    }
}

#[test]
fn tpdf_dither_makes_the_error_power_independent_of_the_signal() {
    // S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a theoretical survey",
    // J. Audio Eng. Soc. 40(5), 1992 (from memory): TPDF dither of 2 LSB peak-to-peak makes the total error power
    // q^2/12 + 2 q^2/12 = 3 q^2/12 whatever the signal (+4.77 dB); undithered, a signal below half an LSB is
    // simply lost and the error is the signal itself.
    let q = 2.0 / 16.0;
    // The quiet signal sits in the middle of a code (0 V: the centre of a code under IEEE Std 1241's ideal
    // transfer, its transitions at +-q/2) with a peak of a tenth of an LSB, so without dither it never crosses a
    // transition.
    let (quiet_a, mid) = (0.1 * q, 0.0);
    let tpdf = "dither = \"tpdf\"\ndither_lsb = 2";
    let quiet = error_rms_v(4, quiet_a, mid, tpdf);
    let loud = error_rms_v(4, 0.9, 0.0, tpdf);
    assert!(
        (quiet / loud - 1.0).abs() < 0.1,
        "dithered: {quiet} vs {loud}"
    );
    // The same band factor as above applies to the held dither + quantization error.
    let ratio = loud / (3f64.sqrt() * q / 12f64.sqrt() * held_band_factor(0.475));
    assert!(
        (ratio - 1.0).abs() < 0.1,
        "dithered error / expected = {ratio}"
    );
    // Undithered, the quiet signal is lost: the error is the signal itself (rms A/sqrt 2), far below q/sqrt 12.
    let quiet_plain = error_rms_v(4, quiet_a, mid, "");
    let signal_rms = quiet_a / 2f64.sqrt();
    assert!(
        (quiet_plain / signal_rms - 1.0).abs() < 0.1,
        "undithered quiet: {quiet_plain} vs {signal_rms}"
    );
    let loud_plain = error_rms_v(4, 0.9, 0.0, "");
    assert!(
        quiet_plain < 0.5 * loud_plain,
        "undithered: {quiet_plain} vs {loud_plain}"
    );
}

#[test]
fn pictures_hold_every_stream_of_the_chain() {
    // Through the library: the waveform shows one line per analog stream plus the DAC staircase.
    let text = ideal_chain(8, 0.9, "");
    let sc = convchain::scenario::parse_str(&text, "t.toml", Path::new(".")).unwrap();
    let run = convchain::engine::pipeline::run(&sc, None, &mut |_| {}).unwrap();
    let m = convchain::measure::chain::measure_run(&run.records()).unwrap();
    let figs = convchain::report::figures::run_figures(&run, &m, None).unwrap();
    let wave = figs.iter().find(|f| f.name == "waveform").unwrap();
    // source + DAC output, and the staircase; below them the input, the output aligned by the measured delay,
    // and the error.
    assert_eq!(wave.summary.series, run.capture.columns.len() + 1 + 3);
    assert!(wave.summary.markers > 0, "sampling instants are marked");
    let spec = figs.iter().find(|f| f.name == "spectrum_output").unwrap();
    assert!(spec.summary.series >= 1);
    assert!(
        spec.summary.labels.iter().any(|l| l.contains("image")),
        "{:?}",
        spec.summary.labels
    );
}

/// Three-parameter least-squares sine fit at a known frequency over `x[from..to]` (rate `rate_hz`, sample m at
/// m / rate_hz): the largest residual.
#[allow(clippy::needless_range_loop)]
fn largest_residual_from_sine(x: &[f64], rate_hz: f64, f_hz: f64, from: usize, to: usize) -> f64 {
    let (mut m, mut r) = ([[0.0f64; 3]; 3], [0.0f64; 3]);
    let basis = |i: usize| {
        let w = 2.0 * std::f64::consts::PI * f_hz * i as f64 / rate_hz;
        [w.sin(), w.cos(), 1.0]
    };
    for (i, v) in x.iter().enumerate().take(to).skip(from) {
        let b = basis(i);
        for a in 0..3 {
            r[a] += b[a] * v;
            for c in 0..3 {
                m[a][c] += b[a] * b[c];
            }
        }
    }
    for p in 0..3 {
        for q in p + 1..3 {
            let f = m[q][p] / m[p][p];
            for c in 0..3 {
                m[q][c] -= f * m[p][c];
            }
            r[q] -= f * r[p];
        }
    }
    let mut s = [0.0f64; 3];
    for p in (0..3).rev() {
        s[p] = (r[p] - (p + 1..3).map(|c| m[p][c] * s[c]).sum::<f64>()) / m[p][p];
    }
    (from..to).fold(0.0f64, |w, i| {
        let b = basis(i);
        w.max((x[i] - (s[0] * b[0] + s[1] * b[1] + s[2] * b[2])).abs())
    })
}

#[test]
fn the_default_demo_writes_listening_files_of_two_seconds_that_loop_without_a_seam() {
    // The embedded demo analyses 49 ms: played once, a click. Its coherent record loops to 2 s.
    let d = tempfile::tempdir().unwrap();
    ok(&run_in(
        d.path(),
        &["run", "--quiet", "--no-plots", "--out", "o"],
    ));
    let r = json(&d.path().join("o/report.json"));
    let f_hz = r["run"]["frequency_hz"].as_f64().unwrap();
    for f in ["input.wav", "output.wav", "error.wav"] {
        let (spec, v) = read_wav(&d.path().join("o").join(f));
        let seconds = v.len() as f64 / f64::from(spec.sample_rate);
        assert!(seconds >= 2.0, "{f}: {seconds} s");
        assert!(
            v[0].abs() < 1e-4 && v[v.len() - 1].abs() < 1e-4,
            "{f}: faded"
        );
        if f != "error.wav" {
            // One sine from the end of the fade in to the start of the fade out: a seam (a phase jump where
            // the record starts again) would leave a residual of the order of the sine itself. The 16-bit
            // chain's own error is about 1e-5 of full scale.
            let fade = (0.02 * f64::from(spec.sample_rate)) as usize;
            let worst = largest_residual_from_sine(
                &v,
                f64::from(spec.sample_rate),
                f_hz,
                fade,
                v.len() - fade,
            );
            assert!(worst < 1e-3, "{f}: largest residual {worst} of full scale");
        }
    }
    assert_eq!(r["listening"]["looped"], "seamless");
    assert!(r["listening"]["record_s"].as_f64().unwrap() < 0.1);
}

/// Run a four-bit listening demo (shortened to 2 s: one pass through its four chords) on a fresh folder;
/// its report.json.
fn four_bit_demo(file: &str) -> (tempfile::TempDir, serde_json::Value) {
    let d = tempfile::tempdir().unwrap();
    fs::create_dir(d.path().join("scenarios")).unwrap();
    let sc = fs::read_to_string(repo(&format!("scenarios/{file}")))
        .unwrap()
        .replace("duration = \"4 s\"", "duration = \"2 s\"");
    fs::write(d.path().join("scenarios").join(file), sc).unwrap();
    ok(&run_in(
        d.path(),
        &[
            "run",
            &format!("scenarios/{file}"),
            "--quiet",
            "--no-plots",
            "--out",
            "o",
        ],
    ));
    let r = json(&d.path().join("o/report.json"));
    (d, r)
}

#[test]
fn the_four_bit_demos_run_out_of_the_box_on_one_level_mapping_with_the_error_levels_their_comments_state()
 {
    // The built-in chord needs no file: a fresh folder holding only the scenario runs.
    let (plain_dir, plain) = four_bit_demo("four-bit-listen.toml");
    let (dith_dir, dith) = four_bit_demo("four-bit-listen-dithered.toml");
    // One mapping (the converter's +-1 V full scale, 1.05 x rounded up to 1.2 V): the A/B comparison holds.
    assert_eq!(plain["listening"]["full_scale_v"], 1.2);
    assert_eq!(dith["listening"]["full_scale_v"], 1.2);
    let (_, in_plain) = read_wav(&plain_dir.path().join("o/input.wav"));
    let (_, in_dith) = read_wav(&dith_dir.path().join("o/input.wav"));
    assert_eq!(in_plain, in_dith);
    let (_, out_plain) = read_wav(&plain_dir.path().join("o/output.wav"));
    let (_, out_dith) = read_wav(&dith_dir.path().join("o/output.wav"));
    let level_db = |x: &[f64], i: &[f64]| {
        let g =
            x.iter().zip(i).map(|(a, b)| a * b).sum::<f64>() / i.iter().map(|b| b * b).sum::<f64>();
        20.0 * g.log10()
    };
    // The chord's level in the two output files (least-squares gain on the shared input file): within
    // 0.2 dB. Undithered, the quietest part of each chord's decay falls inside the zero code and is lost, so
    // that output is a little quieter; dither keeps the converter's mean gain at one.
    let (lp, ld) = (
        level_db(&out_plain, &in_plain),
        level_db(&out_dith, &in_dith),
    );
    assert!(ld.abs() < 0.05, "dithered chain's level {ld} dB");
    assert!(
        (lp - ld).abs() < 0.2 && lp < ld,
        "undithered {lp} dB, dithered {ld} dB"
    );

    // What the dithered demo's comment states: TPDF dither of 2 LSB p-p makes the error power at the
    // converter 3 x q^2/12 (Lipshitz, Wannamaker and Vanderkooy, JAES 1992: from memory), white; at the
    // output it has passed the zero-order hold, |sinc(f/fs)|^2 (common practice, no source), and the
    // 6th-order Butterworth at 18 kHz, 1/(1 + (f/fc)^12), over the file's 24 kHz band.
    let q: f64 = 2.0 / 16.0;
    let fs: f64 = 48_000.0;
    let steps = 24_000usize;
    let noise_fraction = (0..steps)
        .map(|k| {
            let f = (k as f64 + 0.5) * 24_000.0 / steps as f64;
            let x = std::f64::consts::PI * f / fs;
            (x.sin() / x).powi(2) / (1.0 + (f / 18_000.0).powi(12))
        })
        .sum::<f64>()
        / steps as f64;
    let predicted_v = (3.0 * q * q / 12.0 * noise_fraction).sqrt();
    let dith_v = dith["listening"]["error_rms_v"].as_f64().unwrap();
    let off_db = 20.0 * (dith_v / predicted_v).log10();
    assert!(
        off_db.abs() < 0.3,
        "dithered error {dith_v} V vs {predicted_v} V predicted ({off_db} dB)"
    );
    // Undithered, the error follows the chord (most of it on the chord's own harmonics, below the
    // reconstruction filter): near Bennett's q/sqrt(12) (BSTJ 1948) but not governed by it, and less than
    // 4.77 dB under the dithered error at the output.
    let plain_v = plain["listening"]["error_rms_v"].as_f64().unwrap();
    let bennett_db = 20.0 * (plain_v / (q / 12f64.sqrt())).log10();
    assert!(
        bennett_db.abs() < 1.5,
        "undithered error {plain_v} V, {bennett_db} dB from q/sqrt 12"
    );
    let gap_db = 20.0 * (dith_v / plain_v).log10();
    assert!(
        gap_db > 2.0 && gap_db < 4.77,
        "dithered over undithered {gap_db} dB"
    );
    let (spec, v) = read_wav(&plain_dir.path().join("o/output.wav"));
    assert!(v.len() as f64 / f64::from(spec.sample_rate) >= 1.9);
}

#[test]
fn the_audio_command_still_writes_the_chord_and_refuses_to_overwrite() {
    let d = tempfile::tempdir().unwrap();
    ok(&run_in(
        d.path(),
        &["audio", "chord", "--out", "listen", "--seconds", "1"],
    ));
    let (spec, v) = read_wav(&d.path().join("listen/chord.wav"));
    assert_eq!(v.len() as u32, spec.sample_rate);
    let o = run_in(d.path(), &["audio", "chord", "--out", "listen"]);
    assert_eq!(o.status.code(), Some(2));
}
