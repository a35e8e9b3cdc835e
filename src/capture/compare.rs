//! `run --compare`: a recording of the built chain's output measured beside its simulation.
//!
//! Both records go through one meter, the one `analyze` uses ([`measure_sine_record`]: a four-parameter sine
//! fit, IEEE Std 1241, then the tone figures from the spectrum of the record less the fitted sine), with the
//! same window, harmonics, band and full scale, so a difference between the two columns is a difference between
//! the two signals, not between two ways of measuring. The band is the run's output band, cut to the capture's
//! Nyquist frequency when the capture is slower; the full scale is the simulated output's.
//!
//! The capture is read in volts: a CSV column as written, a WAV file's samples (+-1 at the format's full scale)
//! times the volts that sample value 1.0 stands for (`full_scale`, 1 V by default), as the source's `wav`
//! waveform reads a file. The overlaid spectra are taken over records of the same duration (the shorter of the
//! two), so equal noise densities draw equal floors.

use std::path::PathBuf;

use serde::Serialize;

use super::{Capture, Pick};
use crate::engine::pipeline::{RunOutput, si};
use crate::error::{Error, Result};
use crate::measure::chain::ChainMetrics;
use crate::measure::sine_record::{SineRecord, SineRecordConfig, measure_sine_record};
use crate::measure::spectrum::SpectrumAnalyzer;
use crate::report::figures::{Figure, PNG_SIZE};
use crate::report::plot::{Plot, SpectrumOverlay, SpectrumPlot, render_png, render_svg};
use crate::scenario::Waveform;

/// What to compare a run with.
#[derive(Debug, Clone, PartialEq)]
pub struct CompareSpec {
    /// The recording (WAV, or CSV with a time column).
    pub file: PathBuf,
    /// Its signal: a WAV channel (from 1) or a CSV column.
    pub pick: Pick,
    /// Volts that sample value 1.0 stands for (None = 1 V).
    pub volts_per_unit: Option<f64>,
}

/// A difference in SNR or SINAD this large (dB; a sixth of a bit for ENOB) is called out as worse or better.
pub const NOTABLE_DB: f64 = 1.0;
/// The same for THD and SFDR, which rest on single spectral lines and move by a few dB between records of one
/// signal (common practice, no source).
pub const NOTABLE_SPUR_DB: f64 = 3.0;

/// report.json `compare`: the capture beside the simulated output, one meter for both.
#[derive(Debug, Clone, Serialize)]
pub struct CompareReport {
    pub file: String,
    /// The format and signal read, in words.
    pub format: String,
    pub sample_rate_hz: f64,
    pub samples: usize,
    /// The volts sample value 1.0 stands for.
    pub volts_per_unit: f64,
    /// Band both records are measured over (Hz).
    pub band_hz: f64,
    /// Peak of the full-scale sine both columns' dBFS and ENOB refer to: the simulated output's (V).
    pub full_scale_v: f64,
    /// Resolution used for the sine-fit ENOB (the chain's converter).
    pub bits: Option<u32>,
    pub window: &'static str,
    pub harmonics: u32,
    pub simulated: CompareSide,
    pub captured: CompareSide,
    /// Captured minus simulated, for each figure both sides have.
    pub captured_minus_simulated: CompareDifference,
    /// What a user should know about the comparison (a band cut to the capture's Nyquist frequency, a tone at
    /// another frequency).
    pub notes: Vec<String>,
}

/// One column of the comparison. Figures that are not finite are null.
#[derive(Debug, Clone, Serialize)]
pub struct CompareSide {
    pub fundamental_hz: f64,
    pub amplitude_v: f64,
    pub amplitude_dbfs: f64,
    pub offset_v: f64,
    pub snr_db: Option<f64>,
    pub sinad_db: Option<f64>,
    pub enob_bits: Option<f64>,
    pub enob_sinefit_bits: Option<f64>,
    pub thd_db: Option<f64>,
    pub sfdr_dbc: Option<f64>,
    /// Rms of the sine fit's residual (V).
    pub residual_rms_v: f64,
}

/// Captured minus simulated.
#[derive(Debug, Clone, Serialize)]
pub struct CompareDifference {
    pub fundamental_hz: f64,
    /// Level of the capture's fundamental against the simulation's (dB).
    pub amplitude_db: f64,
    pub snr_db: Option<f64>,
    pub sinad_db: Option<f64>,
    pub enob_bits: Option<f64>,
    pub thd_db: Option<f64>,
    pub sfdr_db: Option<f64>,
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

fn side(r: &SineRecord) -> CompareSide {
    let t = &r.tones;
    CompareSide {
        fundamental_hz: r.fit.frequency_hz,
        amplitude_v: r.fit.amplitude_v,
        amplitude_dbfs: 20.0 * (r.fit.amplitude_v / r.full_scale_peak).log10(),
        offset_v: r.fit.c,
        snr_db: finite(t.snr_db),
        sinad_db: finite(t.sinad_db),
        enob_bits: finite(t.enob_bits),
        enob_sinefit_bits: r.enob_sinefit_bits,
        thd_db: finite(t.thd_db),
        sfdr_dbc: finite(t.sfdr_dbc),
        residual_rms_v: r.fit.residual_rms_v,
    }
}

fn minus(a: Option<f64>, b: Option<f64>) -> Option<f64> {
    Some(a? - b?).filter(|d| d.is_finite())
}

/// Check, before anything is simulated, that a run can be compared with a capture: the source must be a sine.
pub fn check_source(waveform: &Waveform) -> Result<()> {
    match waveform {
        Waveform::Sine { .. } => Ok(()),
        other => Err(Error::BadInput(format!(
            "a capture is compared tone for tone, but the scenario's source is {}; give the scenario a sine \
             source (source.waveform = \"sine\") at the frequency the capture was made with",
            other.name()
        ))),
    }
}

/// A capture read for comparison: the record in volts, with a note when it is a stretch of a longer recording.
#[derive(Debug, Clone)]
pub struct CompareCapture {
    pub capture: Capture,
    pub volts_per_unit: f64,
    pub note: Option<String>,
}

/// Read the capture of `spec` into volts (see the module doc): at most [`super::RECORD_MAX`] samples from its
/// start.
pub fn read_capture(spec: &CompareSpec) -> Result<CompareCapture> {
    let scale = spec.volts_per_unit.unwrap_or(1.0);
    if !(scale.is_finite() && scale > 0.0) {
        return Err(Error::BadInput(format!(
            "--compare-full-scale {scale}: give the volts that sample value 1.0 stands for, above 0, e.g. \
             \"2.5 V\""
        )));
    }
    let (mut c, note) = super::open(&spec.file, &spec.pick)?.record(None, None)?;
    if scale != 1.0 {
        for v in &mut c.samples {
            *v *= scale;
        }
    }
    Ok(CompareCapture {
        capture: c,
        volts_per_unit: scale,
        note: note.map(|n| {
            n.replace(
                " with --start and --length",
                " with `analyze --start --length`",
            )
        }),
    })
}

/// Measure the run's output and `capture` with one meter.
pub fn compare(
    run: &RunOutput,
    metrics: &ChainMetrics,
    read: &CompareCapture,
) -> Result<(CompareReport, SineRecord, SineRecord)> {
    let (capture, volts_per_unit) = (&read.capture, read.volts_per_unit);
    let sc = &run.scenario;
    let mut notes: Vec<String> = read.note.iter().cloned().collect();
    let mut band_hz = run.plan.out_band_hz;
    let cap_nyquist_hz = 0.5 * capture.sample_rate_hz;
    if cap_nyquist_hz < band_hz {
        notes.push(format!(
            "band cut from {} to the capture's Nyquist frequency, {}",
            si(band_hz, "Hz"),
            si(cap_nyquist_hz, "Hz")
        ));
        band_hz = cap_nyquist_hz;
    }
    let full_scale_v = metrics.detail.output.full_scale_peak_v;
    let bits = run.plan.adc.map(|a| a.bits);
    let cfg = SineRecordConfig {
        window: sc.analysis.window,
        harmonics: sc.analysis.harmonics,
        band_hz: Some(band_hz),
        full_scale_peak: Some(full_scale_v),
        bits,
    };
    let out = &run.output_record;
    let sim = measure_sine_record(&out.volts, run.plan.out_rate_hz, 0.0, &cfg)
        .map_err(|e| Error::Run(format!("the simulated output cannot be measured: {e}")))?;
    let cap = measure_sine_record(&capture.samples, capture.sample_rate_hz, capture.t0_s, &cfg)
        .map_err(|e| match e {
            Error::BadInput(m) => Error::BadInput(format!("{}: {m}", capture.file.display())),
            Error::Run(m) => Error::Run(format!("{}: {m}", capture.file.display())),
            other => other,
        })?;
    let (s, c) = (side(&sim), side(&cap));
    let df = c.fundamental_hz - s.fundamental_hz;
    if df.abs() > 0.01 * s.fundamental_hz {
        notes.push(format!(
            "the capture's tone ({}) is {:.1} % away from the simulation's ({}): check that both are the same \
             test",
            si(c.fundamental_hz, "Hz"),
            100.0 * df / s.fundamental_hz,
            si(s.fundamental_hz, "Hz")
        ));
    }
    let diff = CompareDifference {
        fundamental_hz: df,
        amplitude_db: 20.0 * (c.amplitude_v / s.amplitude_v).log10(),
        snr_db: minus(c.snr_db, s.snr_db),
        sinad_db: minus(c.sinad_db, s.sinad_db),
        enob_bits: minus(c.enob_bits, s.enob_bits),
        thd_db: minus(c.thd_db, s.thd_db),
        sfdr_db: minus(c.sfdr_dbc, s.sfdr_dbc),
    };
    let format = capture.origin.describe();
    let report = CompareReport {
        file: capture.file.display().to_string(),
        format,
        sample_rate_hz: capture.sample_rate_hz,
        samples: capture.samples.len(),
        volts_per_unit,
        band_hz,
        full_scale_v,
        bits,
        window: sc.analysis.window.name(),
        harmonics: sc.analysis.harmonics,
        simulated: s,
        captured: c,
        captured_minus_simulated: diff,
        notes,
    };
    Ok((report, sim, cap))
}

/// Whether a larger value of a figure is better (SNR, SINAD, ENOB, SFDR) or worse (THD).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Better {
    Higher,
    Lower,
}

impl CompareReport {
    /// The rows of the comparison for tables: (figure, simulated, captured, captured - simulated, verdict).
    pub fn rows(&self) -> Vec<[String; 5]> {
        let (s, c, d) = (
            &self.simulated,
            &self.captured,
            &self.captured_minus_simulated,
        );
        let num =
            |x: Option<f64>, unit: &str| x.map_or("-".to_string(), |v| format!("{v:.2} {unit}"));
        let delta =
            |x: Option<f64>, unit: &str| x.map_or("-".to_string(), |v| format!("{v:+.2} {unit}"));
        let verdict = |x: Option<f64>, better: Better, notable: f64| match x {
            Some(v) if v.abs() >= notable => {
                let up = v > 0.0;
                if up == (better == Better::Higher) {
                    "better".to_string()
                } else {
                    "worse".to_string()
                }
            }
            _ => String::new(),
        };
        let db_row =
            |name: &str, a: Option<f64>, b: Option<f64>, dd: Option<f64>, unit: &str, better| {
                let notable = if matches!(name, "THD" | "SFDR") {
                    NOTABLE_SPUR_DB
                } else {
                    NOTABLE_DB
                };
                [
                    name.to_string(),
                    num(a, unit),
                    num(b, unit),
                    delta(dd, if unit == "dBc" { "dB" } else { unit }),
                    verdict(dd, better, notable),
                ]
            };
        vec![
            [
                "fundamental".to_string(),
                si(s.fundamental_hz, "Hz"),
                si(c.fundamental_hz, "Hz"),
                format!("{:+.4} Hz", d.fundamental_hz),
                String::new(),
            ],
            [
                "amplitude".to_string(),
                format!("{:.2} dBFS", s.amplitude_dbfs),
                format!("{:.2} dBFS", c.amplitude_dbfs),
                format!("{:+.2} dB", d.amplitude_db),
                String::new(),
            ],
            db_row("SNR", s.snr_db, c.snr_db, d.snr_db, "dB", Better::Higher),
            db_row(
                "SINAD",
                s.sinad_db,
                c.sinad_db,
                d.sinad_db,
                "dB",
                Better::Higher,
            ),
            [
                "ENOB".to_string(),
                num(s.enob_bits, "bits"),
                num(c.enob_bits, "bits"),
                delta(d.enob_bits, "bits"),
                verdict(d.enob_bits, Better::Higher, NOTABLE_DB / 6.02),
            ],
            db_row("THD", s.thd_db, c.thd_db, d.thd_db, "dB", Better::Lower),
            db_row(
                "SFDR",
                s.sfdr_dbc,
                c.sfdr_dbc,
                d.sfdr_db,
                "dBc",
                Better::Higher,
            ),
        ]
    }

    /// What was compared, in words.
    pub fn note(&self) -> String {
        let mut s = format!(
            "capture {} ({}, {}, {} samples) beside the simulated output; both measured by one meter (sine fit) \
             over 0 .. {}, dBFS of {} peak",
            self.file,
            self.format,
            si(self.sample_rate_hz, "Hz"),
            self.samples,
            si(self.band_hz, "Hz"),
            si(self.full_scale_v, "V")
        );
        for n in &self.notes {
            s.push_str("; ");
            s.push_str(n);
        }
        s
    }
}

/// The overlaid spectra (`spectrum_compare`), both over the same duration (see the module doc).
pub fn figure(
    run: &RunOutput,
    capture: &Capture,
    report: &CompareReport,
    sim: &SineRecord,
    cap: &SineRecord,
) -> Result<Figure> {
    let window = run.scenario.analysis.window;
    let out = &run.output_record.volts;
    let (fs_sim, fs_cap) = (run.plan.out_rate_hz, capture.sample_rate_hz);
    let dur_s = (out.len() as f64 / fs_sim).min(capture.samples.len() as f64 / fs_cap);
    let n_sim = ((dur_s * fs_sim).round() as usize).clamp(2, out.len());
    let n_cap = ((dur_s * fs_cap).round() as usize).clamp(2, capture.samples.len());
    let spec_sim = if n_sim == out.len() {
        sim.spectrum.clone()
    } else {
        SpectrumAnalyzer::new(n_sim, window)?.power_spectrum(&out[..n_sim], fs_sim)?
    };
    let spec_cap = if n_cap == capture.samples.len() {
        cap.spectrum.clone()
    } else {
        SpectrumAnalyzer::new(n_cap, window)?.power_spectrum(&capture.samples[..n_cap], fs_cap)?
    };
    let level_sim = spec_sim.dbfs(report.full_scale_v);
    let level_cap = spec_cap.dbfs(report.full_scale_v);
    let name = capture
        .file
        .file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().to_string());
    let notes = std::iter::once("simulated / captured:".to_string())
        .chain(
            report
                .rows()
                .into_iter()
                .skip(2)
                .map(|r| format!("{} {} / {}", r[0], r[1], r[2])),
        )
        .collect();
    let plot = Plot::Spectrum(SpectrumPlot {
        title: format!("{}: simulated output and {name}", run.scenario.name),
        bin_hz: spec_sim.bin_hz,
        level_dbfs: &level_sim,
        fundamental_hz: Some(report.simulated.fundamental_hz),
        harmonics: Vec::new(),
        images_hz: Vec::new(),
        band_hz: Some(report.band_hz),
        notes,
        log_frequency: false,
        overlay: Some(SpectrumOverlay {
            first_label: "simulated output".into(),
            label: format!("capture ({name})"),
            bin_hz: spec_cap.bin_hz,
            level_dbfs: &level_cap,
        }),
    });
    let (svg, summary) = render_svg(&plot)?;
    let (png, _) = render_png(&plot, PNG_SIZE.0, PNG_SIZE.1)?;
    Ok(Figure {
        name: "spectrum_compare".into(),
        caption: format!(
            "The simulated output and the capture {name} in dBFS of the simulated output's full scale ({} \
             peak), each over {} ({} window, equal bins so equal noise densities draw equal floors); the \
             figures in the strip read simulated / captured",
            si(report.full_scale_v, "V"),
            si(dur_s, "s"),
            report.window
        ),
        svg,
        png,
        summary,
    })
}
