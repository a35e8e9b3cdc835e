//! `convchain analyze`: one recorded sine measured with the meters `run` uses ([`measure_sine_record`]), written
//! as `analysis.json` (the object `capture`) and three figures into an output folder.
//!
//! Full scale: a WAV file's is its format's (a sine of peak 1.0 after scaling to +-1 reads 0 dBFS) unless
//! `--full-scale` says where the converter's full scale sits in dBFS; a CSV file's is the peak voltage given
//! with `--full-scale`. Without one (CSV), ENOB and dBFS are referred to the fitted sine itself. The fit-residual
//! ENOB needs the converter's resolution: a WAV integer format's bits by default, `--bits` otherwise.

use std::path::{Path, PathBuf};

use serde::Serialize;

use super::{Capture, Kind, Origin};
use crate::error::{Error, Result};
use crate::format::units::{Dimension, format_si_table, parse_quantity};
use crate::measure::sine_record::{SineRecord, SineRecordConfig, measure_sine_record};
use crate::report::figures::{Figure, PNG_SIZE};
use crate::report::plot::{Plot, SpectrumPlot, XyPlot, render_png, render_svg};
use crate::report::{OutputDir, Producer};
use crate::scenario::WindowKind;

/// Highest harmonic order counted in THD and removed for SNR: the scenario's `[analysis] harmonics` default.
pub const HARMONICS: u32 = 9;

/// The name of the report file.
pub const REPORT_FILE: &str = "analysis.json";

/// How to analyse, as given (checked by [`analyze_to_dir`] against the capture).
#[derive(Debug, Clone)]
pub struct AnalyzeOptions {
    /// `--full-scale`: a peak voltage (CSV) or a level in dBFS (WAV), as written.
    pub full_scale: Option<String>,
    /// `--bits`: the converter's resolution.
    pub bits: Option<u32>,
    /// `--band` (Hz).
    pub band_hz: Option<f64>,
    pub window: WindowKind,
    /// Write the figures.
    pub figures: bool,
    /// Replace what convchain wrote into the folder, a study included.
    pub force: bool,
    /// Samples the whole recording holds, when the record measured is a stretch of it ([`super::CaptureFile`]).
    pub samples_in_file: Option<u64>,
    /// Why the record is a stretch of the recording (cut to [`super::RECORD_MAX`]), for the report.
    pub note: Option<String>,
}

/// Where the full scale came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FullScaleFrom {
    /// The WAV format's full scale.
    Format,
    /// `--full-scale`.
    Given,
    /// None known: the fitted sine's amplitude.
    Signal,
}

/// `analysis.json`.
#[derive(Debug, Clone, Serialize)]
pub struct AnalysisReport {
    pub capture: CaptureAnalysis,
}

/// What `analyze` measured on a capture. Levels are in the record's unit: volts for a CSV export, the format's
/// full scale (+-1) for a WAV file. Figures that are not finite (no harmonic counted, no spur) are null.
#[derive(Debug, Clone, Serialize)]
pub struct CaptureAnalysis {
    pub file: String,
    /// The format and the signal read, in words.
    pub format: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub channel: Option<u16>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub column: Option<String>,
    pub sample_rate_hz: f64,
    pub samples: usize,
    /// Samples the recording holds (more than `samples` when a stretch of it was measured).
    pub samples_in_file: u64,
    /// Time of the first sample (s).
    pub start_s: f64,
    /// Four-parameter fit (IEEE Std 1241): frequency, amplitude (peak), offset.
    pub fundamental_hz: f64,
    pub amplitude: f64,
    /// The amplitude against the full scale (dB).
    pub amplitude_dbfs: f64,
    pub offset: f64,
    /// Rms of the fit's residual (noise and distortion over the whole record).
    pub residual_rms: f64,
    pub snr_db: Option<f64>,
    pub sinad_db: Option<f64>,
    pub enob_bits: Option<f64>,
    pub enob_sinefit_bits: Option<f64>,
    pub thd_db: Option<f64>,
    pub sfdr_dbc: Option<f64>,
    pub noise_floor_dbfs: Option<f64>,
    /// Peak of a full-scale sine, and where it came from.
    pub full_scale: f64,
    pub full_scale_from: FullScaleFrom,
    /// The resolution the fit ENOB used.
    pub bits: Option<u32>,
    pub window: &'static str,
    pub band_hz: f64,
    pub harmonics: u32,
    /// Why only a stretch of the recording was measured.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// The full scale `text` gives for a capture of `kind`: a peak voltage for CSV ("1.65 V", "1.65"), a level in
/// dBFS for WAV ("-3 dBFS"; 0 dBFS is the format's full scale).
pub fn parse_full_scale(text: &str, kind: Kind) -> Result<f64> {
    let t = text.trim();
    let dbfs = t
        .len()
        .checked_sub(4)
        .filter(|&i| t.is_char_boundary(i) && t[i..].eq_ignore_ascii_case("dbfs"))
        .map(|i| t[..i].trim());
    let bad = |why: &str| {
        Error::BadInput(format!(
            "--full-scale \"{}\": {why}",
            crate::text::clip(text)
        ))
    };
    match (kind, dbfs) {
        (Kind::Wav, Some(num)) => {
            let db: f64 = num
                .parse()
                .map_err(|_| bad("write the level as a number of dBFS, e.g. \"-3 dBFS\""))?;
            let peak = 10f64.powf(db / 20.0);
            if !(db.is_finite() && peak.is_finite() && peak > 0.0) {
                return Err(bad("the level must be a finite number of dBFS"));
            }
            Ok(peak)
        }
        (Kind::Wav, None) => Err(bad(
            "a WAV file's full scale is its format's; give where the converter's full scale sits in dBFS, \
             e.g. \"-3 dBFS\" (0 dBFS, the default, is the format's)",
        )),
        (Kind::Csv, Some(_)) => Err(bad(
            "a CSV export has no format full scale; give the converter's full-scale peak voltage, e.g. \
             \"1.65 V\"",
        )),
        (Kind::Csv, None) => match parse_quantity(t, Dimension::Voltage) {
            Ok(v) if v.is_finite() && v > 0.0 => Ok(v),
            Ok(_) => Err(bad("the full-scale peak must be above 0 V")),
            Err(e) => Err(bad(&format!(
                "{}; give the full-scale peak voltage, e.g. \"1.65 V\"",
                e.message
            ))),
        },
    }
}

/// The measuring configuration for `capture`: the full scale and the resolution (see the module doc).
fn config(capture: &Capture, opts: &AnalyzeOptions) -> Result<(SineRecordConfig, FullScaleFrom)> {
    let kind = match capture.origin {
        Origin::Wav { .. } => Kind::Wav,
        Origin::Csv { .. } => Kind::Csv,
    };
    let given = opts
        .full_scale
        .as_deref()
        .map(|t| parse_full_scale(t, kind))
        .transpose()?;
    let (full_scale_peak, from) = match (given, &capture.origin) {
        (Some(v), _) => (Some(v), FullScaleFrom::Given),
        (None, Origin::Wav { .. }) => (Some(1.0), FullScaleFrom::Format),
        (None, Origin::Csv { .. }) => (None, FullScaleFrom::Signal),
    };
    if let Some(b) = opts.bits
        && !(1..=32).contains(&b)
    {
        return Err(Error::BadInput(format!(
            "--bits {b}: give the converter's resolution, 1 to 32 bits"
        )));
    }
    let bits = match (&capture.origin, opts.bits) {
        (_, Some(b)) => Some(b),
        (
            Origin::Wav {
                float: false, bits, ..
            },
            None,
        ) => Some(u32::from(*bits)),
        _ => None,
    };
    if opts.bits.is_some() && full_scale_peak.is_none() {
        return Err(Error::BadInput(format!(
            "{}: --bits needs --full-scale for a CSV capture (the code width is the full-scale range over \
             2^bits); give the converter's full-scale peak voltage, e.g. --full-scale \"1.65 V\"",
            capture.file.display()
        )));
    }
    if let Some(b) = opts.band_hz
        && !(b.is_finite() && b > 0.0)
    {
        return Err(Error::BadInput(format!(
            "--band {b} Hz: give the band's upper edge, above 0 Hz"
        )));
    }
    Ok((
        SineRecordConfig {
            window: opts.window,
            harmonics: HARMONICS,
            band_hz: opts.band_hz,
            full_scale_peak,
            bits,
        },
        from,
    ))
}

/// Measure `capture` (no file is written).
pub fn analyze(capture: &Capture, opts: &AnalyzeOptions) -> Result<(AnalysisReport, SineRecord)> {
    let (cfg, from) = config(capture, opts)?;
    let r = measure_sine_record(&capture.samples, capture.sample_rate_hz, capture.t0_s, &cfg)
        .map_err(|e| match e {
            Error::BadInput(m) => Error::BadInput(format!("{}: {m}", capture.file.display())),
            Error::Run(m) => Error::Run(format!("{}: {m}", capture.file.display())),
            other => other,
        })?;
    let t = &r.tones;
    let (channel, column) = match &capture.origin {
        Origin::Wav { channel, .. } => (Some(*channel), None),
        Origin::Csv { column, .. } => (None, Some(column.clone())),
    };
    let report = AnalysisReport {
        capture: CaptureAnalysis {
            file: capture.file.display().to_string(),
            format: capture.origin.describe(),
            channel,
            column,
            sample_rate_hz: capture.sample_rate_hz,
            samples: capture.samples.len(),
            samples_in_file: opts.samples_in_file.unwrap_or(capture.samples.len() as u64),
            start_s: capture.t0_s,
            fundamental_hz: r.fit.frequency_hz,
            amplitude: r.fit.amplitude_v,
            amplitude_dbfs: 20.0 * (r.fit.amplitude_v / r.full_scale_peak).log10(),
            offset: r.fit.c,
            residual_rms: r.fit.residual_rms_v,
            snr_db: finite(t.snr_db),
            sinad_db: finite(t.sinad_db),
            enob_bits: finite(t.enob_bits),
            enob_sinefit_bits: r.enob_sinefit_bits,
            thd_db: finite(t.thd_db),
            sfdr_dbc: finite(t.sfdr_dbc),
            noise_floor_dbfs: finite(t.noise_floor_dbfs),
            full_scale: r.full_scale_peak,
            full_scale_from: from,
            bits: cfg.bits,
            window: cfg.window.name(),
            band_hz: t.band_hz,
            harmonics: cfg.harmonics,
            note: opts.note.clone(),
        },
    };
    Ok((report, r))
}

/// The default output folder: `out/<the capture's file stem>`.
pub fn default_out_dir(capture_path: &Path) -> PathBuf {
    let stem = capture_path.file_stem().map_or_else(
        || "capture".to_string(),
        |s| s.to_string_lossy().to_string(),
    );
    Path::new("out").join(stem)
}

/// Check that `dir` may be written by `analyze` (before reading a large capture).
pub fn check_out_dir(dir: &Path, force: bool) -> Result<()> {
    OutputDir::check(dir, &producer(force))
}

fn producer(force: bool) -> Producer {
    Producer {
        by: "analyze".into(),
        study: None,
        force,
    }
}

/// Measure `capture` and write `analysis.json` and the figures (`analysis_spectrum`, `analysis_waveform`,
/// `analysis_residual`, each PNG and SVG) into `dir`, every file through a temporary and a rename; a folder
/// holding files convchain did not write is refused, and on failure nothing partial is left.
pub fn analyze_to_dir(
    capture: &Capture,
    opts: &AnalyzeOptions,
    dir: &Path,
) -> Result<AnalysisReport> {
    let (report, record) = analyze(capture, opts)?;
    let figs = if opts.figures {
        figures(capture, &report.capture, &record)?
    } else {
        Vec::new()
    };
    let mut json = serde_json::to_vec_pretty(&report).map_err(|e| Error::Run(e.to_string()))?;
    json.push(b'\n');
    let out = OutputDir::create(dir, &producer(opts.force))?;
    let written = (|| {
        for f in &figs {
            out.write(&format!("{}.png", f.name), &f.png)?;
            out.write(&format!("{}.svg", f.name), f.svg.as_bytes())?;
        }
        out.write(REPORT_FILE, &json)
    })();
    if let Err(e) = written {
        out.abandon();
        return Err(e);
    }
    out.finish()?;
    Ok(report)
}

/// The figures' unit of level: volts for CSV, the format's full scale for WAV.
fn level_unit(a: &CaptureAnalysis) -> &'static str {
    if a.channel.is_some() { "FS" } else { "V" }
}

fn figure(name: &str, caption: String, plot: &Plot) -> Result<Figure> {
    let (svg, summary) = render_svg(plot)?;
    let (png, _) = render_png(plot, PNG_SIZE.0, PNG_SIZE.1)?;
    Ok(Figure {
        name: name.to_string(),
        caption,
        svg,
        png,
        summary,
    })
}

/// Most samples of the waveform figure (five cycles of a very slow tone are cut to this many).
const WAVEFORM_POINTS: usize = 1 << 20;

/// Most points of the residual drawn: longer records are reduced to the minimum and maximum of each block.
const RESIDUAL_POINTS: usize = 1 << 14;

/// The spectrum, the waveform with the fitted sine over its first cycles, and the fit's residual over the
/// whole record.
pub fn figures(capture: &Capture, a: &CaptureAnalysis, r: &SineRecord) -> Result<Vec<Figure>> {
    let name = capture
        .file
        .file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().to_string());
    let fmt = |label: &str, v: Option<f64>, unit: &str| match v {
        Some(x) => format!("{label} {x:.2} {unit}"),
        None => format!("{label} -"),
    };
    let mut notes = vec![
        format!("f0 {}", format_si_table(a.fundamental_hz, "Hz")),
        fmt("SNR", a.snr_db, "dB"),
        fmt("SINAD", a.sinad_db, "dB"),
        fmt("ENOB", a.enob_bits, "bits"),
        fmt("THD", a.thd_db, "dB"),
        fmt("SFDR", a.sfdr_dbc, "dBc"),
    ];
    if a.full_scale_from == FullScaleFrom::Signal {
        notes.push("0 dBFS = the fitted sine (no --full-scale)".into());
    }
    let level = r.spectrum.dbfs(r.full_scale_peak);
    let harmonics = r
        .tones
        .harmonics
        .iter()
        .filter(|h| h.in_band && !h.on_fundamental_or_dc && h.same_place_as.is_none())
        .map(|h| (h.order, h.frequency_hz, h.folded))
        .collect();
    let mut figs = vec![figure(
        "analysis_spectrum",
        format!(
            "Spectrum of {name} in dBFS ({} window): the fundamental (f0) and harmonics by order (* folded) \
             marked under the frequency axis, the measured figures in the strip below",
            a.window
        ),
        &Plot::Spectrum(SpectrumPlot {
            title: format!("{name}: spectrum"),
            bin_hz: r.spectrum.bin_hz,
            level_dbfs: &level,
            fundamental_hz: Some(r.tones.fundamental_hz),
            harmonics,
            images_hz: Vec::new(),
            band_hz: Some(a.band_hz),
            notes,
            log_frequency: false,
            overlay: None,
        }),
    )?];

    // The model x ~ a cos(w t) + b sin(w t) + c at t = t0 + i / fs (see measure::sinefit).
    let fs = capture.sample_rate_hz;
    let w = std::f64::consts::TAU * r.fit.frequency_hz;
    let model = |i: usize| {
        let t = capture.t0_s + i as f64 / fs;
        let (s, c) = (w * t).sin_cos();
        r.fit.a * c + r.fit.b * s + r.fit.c
    };
    let x = &capture.samples;
    let n = x.len();
    let shown = ((5.0 * fs / r.fit.frequency_hz).ceil() as usize)
        .min(WAVEFORM_POINTS)
        .clamp(64.min(n), n);
    let t: Vec<f64> = (0..shown).map(|i| capture.t0_s + i as f64 / fs).collect();
    let fitted: Vec<f64> = (0..shown).map(model).collect();
    let unit = level_unit(a);
    figs.push(figure(
        "analysis_waveform",
        "The capture's first cycles with the fitted sine (four-parameter fit, IEEE Std 1241) over them".into(),
        &Plot::Xy(XyPlot {
            title: format!("{name}: capture and fitted sine"),
            x_label: "time (s)".into(),
            y_label: format!("level ({unit})"),
            series: vec![("capture", &t, &x[..shown]), ("fitted sine", &t, &fitted)],
            log_x: false,
            markers: Vec::new(),
        }),
    )?);

    // The residual over the whole record, blocks reduced to their minimum and maximum.
    let block = n.div_ceil(RESIDUAL_POINTS / 2).max(1);
    let (mut rt, mut rv) = (Vec::new(), Vec::new());
    for start in (0..n).step_by(block) {
        let end = (start + block).min(n);
        let (mut lo, mut hi) = ((start, f64::INFINITY), (start, f64::NEG_INFINITY));
        for (i, xv) in x.iter().enumerate().take(end).skip(start) {
            let e = xv - model(i);
            if e < lo.1 {
                lo = (i, e);
            }
            if e > hi.1 {
                hi = (i, e);
            }
        }
        let (first, second) = if lo.0 <= hi.0 { (lo, hi) } else { (hi, lo) };
        for (i, e) in [first, second] {
            rt.push(capture.t0_s + i as f64 / fs);
            rv.push(e);
        }
    }
    figs.push(figure(
        "analysis_residual",
        format!(
            "The capture minus the fitted sine over the whole record (rms {:.4e} {unit}): noise, distortion \
             and anything that changes along the record",
            a.residual_rms
        ),
        &Plot::Xy(XyPlot {
            title: format!("{name}: residual of the sine fit"),
            x_label: "time (s)".into(),
            y_label: format!("residual ({unit})"),
            series: vec![("capture - fitted sine", &rt, &rv)],
            log_x: false,
            markers: Vec::new(),
        }),
    )?);
    Ok(figs)
}

/// The analysis as the terminal prints it.
pub fn summary(a: &CaptureAnalysis) -> String {
    let opt = |v: Option<f64>, unit: &str| match v {
        Some(x) => format!("{x:.2} {unit}"),
        None => "-".to_string(),
    };
    let unit = level_unit(a);
    let fs_note = match a.full_scale_from {
        FullScaleFrom::Format => "the format's full scale".to_string(),
        FullScaleFrom::Given => format!("full scale {:.6} {unit}", a.full_scale),
        FullScaleFrom::Signal => "no full scale given: referred to the fitted sine".to_string(),
    };
    let mut s = format!(
        "{}: {}, {}, {} samples\n",
        a.file,
        a.format,
        format_si_table(a.sample_rate_hz, "Hz"),
        a.samples
    );
    if let Some(n) = &a.note {
        s.push_str(&format!("  note: {n}\n"));
    }
    s.push_str(&format!(
        "  fundamental  {}   amplitude {:.6} {unit} ({:.2} dBFS, {fs_note})\n",
        format_si_table(a.fundamental_hz, "Hz"),
        a.amplitude,
        a.amplitude_dbfs
    ));
    s.push_str(&format!(
        "  SNR {}   SINAD {}   THD {}   SFDR {}\n",
        opt(a.snr_db, "dB"),
        opt(a.sinad_db, "dB"),
        opt(a.thd_db, "dB"),
        opt(a.sfdr_dbc, "dBc")
    ));
    s.push_str(&format!(
        "  ENOB {}   ENOB (sine fit) {}   noise floor {}\n",
        opt(a.enob_bits, "bits"),
        opt(a.enob_sinefit_bits, "bits"),
        opt(a.noise_floor_dbfs, "dBFS/bin")
    ));
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn full_scale_is_volts_for_csv_and_dbfs_for_wav() {
        assert_eq!(parse_full_scale("1.65 V", Kind::Csv).unwrap(), 1.65);
        assert_eq!(parse_full_scale("500m", Kind::Csv).unwrap(), 0.5);
        let p = parse_full_scale("-6.0206 dBFS", Kind::Wav).unwrap();
        assert!((p - 0.5).abs() < 1e-5, "{p}");
        assert_eq!(parse_full_scale("0dbfs", Kind::Wav).unwrap(), 1.0);
        for (t, k) in [
            ("-3 dBFS", Kind::Csv),
            ("1 V", Kind::Wav),
            ("0 V", Kind::Csv),
            ("x dBFS", Kind::Wav),
            ("1e999 dBFS", Kind::Wav),
        ] {
            let e = parse_full_scale(t, k).unwrap_err();
            assert!(
                e.is_bad_input() && e.to_string().contains("--full-scale"),
                "{t}: {e}"
            );
        }
    }
}
