//! Plots, listening files and reports of a run, checked through the files a user gets (and the library for
//! what pictures contain).

mod common;

use std::fs;
use std::path::Path;

use common::{ok, repo, run_in};

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
    // 140 ms of analysis record at 44.1 kHz, less the edges the resampler trims.
    assert!(v.len() > 5000 && v.len() < 6200, "{}", v.len());
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

#[test]
fn a_chord_through_four_bits_can_be_heard() {
    // The README's listening demo: generate the chord, run the 4-bit scenario on it.
    let d = tempfile::tempdir().unwrap();
    ok(&run_in(
        d.path(),
        &["audio", "chord", "--out", "listen", "--seconds", "1"],
    ));
    fs::create_dir(d.path().join("scenarios")).unwrap();
    let sc = fs::read_to_string(repo("scenarios/four-bit-listen.toml"))
        .unwrap()
        .replace("duration = \"4 s\"", "duration = \"1 s\"");
    fs::write(d.path().join("scenarios/four-bit-listen.toml"), sc).unwrap();
    ok(&run_in(
        d.path(),
        &[
            "run",
            "scenarios/four-bit-listen.toml",
            "--quiet",
            "--no-plots",
        ],
    ));
    let (spec, v) = read_wav(&d.path().join("out/four-bit-listen/output.wav"));
    assert_eq!(spec.sample_rate, 48000);
    assert!(v.len() > 40_000, "{}", v.len());
    // The audio command refuses to overwrite.
    let o = run_in(d.path(), &["audio", "chord", "--out", "listen"]);
    assert_eq!(o.status.code(), Some(2));
}
