//! Whole runs: simulate, measure, write the outputs atomically into a folder.

use std::path::Path;

use serde::Serialize;

use crate::engine::pipeline::{self, Plan};
use crate::error::{Error, Result};
use crate::measure::chain::measure_run;
use crate::measure::static_test::{self, StaticResult};
use crate::report::OutputDir;
use crate::report::csv::CsvSink;
use crate::report::json::{ListeningInfo, Report};
use crate::report::wav::{WavFormat, WavOptions, listening_set};
use crate::report::{document, figures};
use crate::scenario::{Scenario, StageKind};
use crate::stages::Probe;
use crate::stages::sample_hold::SampleHold;
use crate::stages::sar_adc::SarAdc;

/// How to run.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// Every grid sample in waveforms.csv (else at most 1e6 rows).
    pub full_waveforms: bool,
    /// Report progress on standard error when it is a terminal.
    pub progress: bool,
    /// Time window of the waveform plot (s); None = the last few cycles.
    pub window_s: Option<(f64, f64)>,
    /// Write the plots (PNG and SVG) and the Markdown and HTML reports.
    pub figures: bool,
    /// Write input.wav, output.wav and error.wav with these options; None = no WAV files.
    pub wav: Option<WavOptions>,
}

impl Default for RunOptions {
    fn default() -> Self {
        RunOptions {
            full_waveforms: false,
            progress: false,
            window_s: None,
            figures: true,
            wav: Some(WavOptions::default()),
        }
    }
}

/// Run a scenario, measure it and write `report.json` and `waveforms.csv` into `dir` (created when the run
/// starts; on failure nothing partial is left).
pub fn run_to_dir(sc: &Scenario, dir: &Path, opts: &RunOptions) -> Result<Report> {
    // Plan first: bad input is reported before any folder appears.
    Plan::new(sc)?;
    let out = OutputDir::create(dir)?;
    match run_inner(sc, &out, opts) {
        Ok(r) => Ok(r),
        Err(e) => {
            out.abandon();
            Err(e)
        }
    }
}

fn run_inner(sc: &Scenario, out: &OutputDir, opts: &RunOptions) -> Result<Report> {
    let (plan, _) = Plan::new(sc)?;
    let (file, tmp) = out.create_temp("waveforms.csv")?;
    let mut csv = CsvSink::from_file(file, tmp, plan.n_total, opts.full_waveforms);
    let show = opts.progress && std::io::IsTerminal::is_terminal(&std::io::stderr());
    let bar = show.then(|| {
        let b = indicatif::ProgressBar::new(1000);
        b.set_style(
            indicatif::ProgressStyle::with_template(
                "  simulating [{bar:40}] {percent:>3}%  {elapsed}",
            )
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        b
    });
    let mut progress = |f: f64| {
        if let Some(b) = &bar {
            b.set_position((f * 1000.0) as u64);
        }
    };
    let run = pipeline::run(sc, Some(&mut csv), &mut progress)?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    // The phases after the simulation: a spinner naming each while it works.
    let spinner = show.then(|| {
        let b = indicatif::ProgressBar::new_spinner();
        b.set_style(
            indicatif::ProgressStyle::with_template("  {spinner} {msg}  {elapsed}")
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_spinner()),
        );
        b.enable_steady_tick(std::time::Duration::from_millis(100));
        b
    });
    let phase = |name: &'static str| {
        if let Some(b) = &spinner {
            b.set_message(name);
            b.tick();
        }
    };
    phase("writing the waveforms");
    csv.finish()?;
    phase("measuring");
    let metrics = measure_run(&run)?;
    let figs = if opts.figures {
        phase("drawing the plots");
        figures::run_figures(&run, &metrics, opts.window_s)?
    } else {
        Vec::new()
    };
    let alignment = metrics.detail.alignment;
    let mut report = Report::new(&run.scenario, &run.plan, metrics);
    let mut wav_files = None;
    if let Some(w) = &opts.wav {
        phase("making the listening files");
        // Gain-matched: the fitted gain when it is near the chain's nominal gain; otherwise (a signal lost in
        // the chain, which a least-squares fit would answer with a gain near zero and a silent error file) the
        // nominal gain, so the error file says what was lost.
        let nominal = nominal_gain(&run.scenario);
        let fitted_ok = alignment.delay_s.is_finite()
            && alignment.gain.is_finite()
            && (20.0 * (alignment.gain / nominal).abs().log10()).abs() < 3.0;
        let (delay, gain, offset) = if fitted_ok {
            (alignment.delay_s, alignment.gain, alignment.offset_v)
        } else {
            (report.latency.measured_s, nominal, 0.0)
        };
        match listening_set(
            &run.source_record.volts,
            &run.output_record.volts,
            run.plan.out_rate_hz,
            delay,
            gain,
            offset,
            w,
        ) {
            Ok(set) => {
                report.listening = Some(ListeningInfo {
                    rate_hz: set.rate_hz,
                    format: match w.format {
                        WavFormat::Int24 => "int24".into(),
                        WavFormat::Float32 => "float32".into(),
                    },
                    length_samples: set.length,
                    full_scale_v: set.full_scale_v,
                    error_gain_used: set.error_gain_used,
                    error_rms_v: set.error_rms_v,
                });
                wav_files = Some(set);
            }
            Err(e) => report
                .scenario
                .warnings
                .push(format!("listening files not written: {e}")),
        }
    }
    phase("writing the files");
    let json = serde_json::to_vec_pretty(&report).map_err(|e| Error::Run(e.to_string()))?;
    out.commit("waveforms.csv")?;
    for f in &figs {
        out.write(&format!("{}.png", f.name), &f.png)?;
        out.write(&format!("{}.svg", f.name), f.svg.as_bytes())?;
    }
    if let Some(set) = &wav_files {
        out.write("input.wav", &set.input)?;
        out.write("output.wav", &set.output)?;
        out.write("error.wav", &set.error)?;
    }
    if opts.figures {
        out.write("report.md", document::markdown(&report, &figs).as_bytes())?;
        out.write("report.html", document::html(&report, &figs).as_bytes())?;
    }
    out.write("report.json", &json)?;
    if let Some(b) = spinner {
        b.finish_and_clear();
    }
    Ok(report)
}

/// The chain's nominal passband gain: amplifier gains times the DAC's span over the ADC's span (filters are
/// taken as passing their passband unchanged).
pub fn nominal_gain(sc: &Scenario) -> f64 {
    let mut g = 1.0;
    let mut adc_span = None;
    for st in &sc.stages {
        match &st.kind {
            StageKind::Amplifier(a) => g *= a.gain,
            StageKind::SarAdc(a) => adc_span = Some(a.range_v.1 - a.range_v.0),
            StageKind::Dac(d) => {
                if let Some(s) = adc_span {
                    g *= (d.range_v.1 - d.range_v.0) / s;
                }
            }
            _ => {}
        }
    }
    g
}

/// Static results of the ADC.
#[derive(Debug, Clone, Serialize)]
pub struct AdcStatic {
    /// The code-density (histogram) test with a sine (IEEE Std 1241); its fields sit directly under `static.adc`.
    #[serde(flatten)]
    pub code_density: StaticResult,
    pub ramp: StaticResult,
    /// Samples used by each test.
    pub code_density_samples: usize,
    pub ramp_samples: usize,
}

/// Static results of the DAC.
#[derive(Debug, Clone, Serialize)]
pub struct DacStatic {
    #[serde(flatten)]
    pub result: StaticResult,
    /// Settled output of every code relative to the zero-code output (V).
    pub levels_v: Vec<f64>,
}

/// `static.adc` and `static.dac`.
#[derive(Debug, Clone, Serialize)]
pub struct Static {
    pub adc: Option<AdcStatic>,
    pub dac: Option<DacStatic>,
}

/// What `convchain static` writes.
#[derive(Debug, Clone, Serialize)]
pub struct StaticReport {
    pub scenario: String,
    #[serde(rename = "static")]
    pub stat: Static,
}

struct FnProbe<F: Fn(f64) -> f64>(F);
impl<F: Fn(f64) -> f64> Probe for FnProbe<F> {
    fn value_at(&self, t_s: f64) -> f64 {
        (self.0)(t_s)
    }
}

/// Static tests of the scenario's ADC and DAC, drawn with the same seeds as a run.
pub fn static_tests(sc: &Scenario) -> Result<Static> {
    let seed = sc.simulation.seed;
    let mut adc_res = None;
    let mut dac_res = None;
    let mut adc_seen: Option<(u64, crate::scenario::SarAdcCfg)> = None;
    let mut sh_cfg = None;
    for (i, st) in sc.stages.iter().enumerate() {
        let idx = i as u64 + 1;
        match &st.kind {
            StageKind::SampleHold(c) => sh_cfg = Some(*c),
            StageKind::SarAdc(c) => adc_seen = Some((idx, *c)),
            StageKind::Dac(c) => {
                let mut rng = pipeline::stage_rng(seed, idx);
                let dac = crate::stages::dac::Dac::new(c, &mut rng);
                let n = 1u64 << c.bits;
                if c.bits < 2 {
                    return Err(Error::BadInput(format!(
                        "{}: {}: static tests need a DAC of at least 2 bits",
                        sc.origin, st.label
                    )));
                }
                let absolute: Vec<f64> = (0..n).map(|k| dac.level_v(k as u32)).collect();
                let q = (c.range_v.1 - c.range_v.0) / n as f64;
                let result = static_test::dac_from_levels(&absolute, c.range_v.0, q);
                let zero = absolute[0];
                dac_res = Some(DacStatic {
                    result,
                    levels_v: absolute.iter().map(|v| v - zero).collect(),
                });
            }
            _ => {}
        }
    }
    if let Some((idx, cfg)) = adc_seen {
        if cfg.bits < 2 {
            return Err(Error::BadInput(format!(
                "{}: static tests need an ADC of at least 2 bits",
                sc.origin
            )));
        }
        let q = cfg.lsb_v();
        let (lo, hi) = cfg.range_v;
        let n_codes = 1usize << cfg.bits;
        let fs = cfg.effective_sample_rate_hz();
        let sh_of = |cfg_sh: Option<crate::scenario::SampleHoldCfg>| match cfg_sh {
            // Static tests are about levels: keep the hold's level errors, not its timing.
            Some(c) => SampleHold::new(
                &crate::scenario::SampleHoldCfg {
                    aperture_jitter_s: 0.0,
                    ..c
                },
                pipeline::stage_rng(seed, idx + 1_000_000),
            ),
            None => SampleHold::ideal(),
        };
        // Slow ramp: 16 samples per LSB (capped), from 2 LSB below to 2 LSB above the range.
        let ramp_n = (n_codes * 16).clamp(4096, 1 << 22);
        let v0 = lo - 2.0 * q;
        let v1 = hi + 2.0 * q;
        let dur = ramp_n as f64 / fs;
        let slope = (v1 - v0) / dur;
        let probe = FnProbe(|t: f64| v0 + slope * t);
        let mut adc = SarAdc::new(&cfg, pipeline::stage_rng(seed, idx));
        let mut sh = sh_of(sh_cfg);
        let mut ramp_v = Vec::with_capacity(ramp_n);
        let mut codes = Vec::with_capacity(ramp_n);
        for k in 0..ramp_n as u64 {
            let ev = adc.convert(k, &probe, &mut sh);
            ramp_v.push(v0 + slope * adc.sample_time_s(k));
            codes.push(ev.code);
        }
        let ramp = static_test::adc_ramp(&ramp_v, &codes, cfg.bits, lo, q);
        // Code density: a sine overdriven by 2 % around mid-range, coherent with the record. A converter
        // without a hold sees its input move during the bit trials, so for a static test the sine must be slow
        // enough to move under a twentieth of an LSB during a conversion (a full-scale sine moves at most
        // 2 pi f A t_conv); the record then grows to hold at least 8 cycles.
        let mut f_want = fs / 97.3;
        if cfg.input == crate::scenario::AdcInput::Live {
            let f_static = 0.05
                / (f64::powi(2.0, cfg.bits as i32) * std::f64::consts::PI * cfg.conversion_time_s);
            f_want = f_want.min(f_static);
        }
        let cd_n = (n_codes * 64)
            .max((8.0 * fs / f_want).ceil() as usize)
            .clamp(1 << 16, 1 << 22);
        let f = crate::measure::coherent::coherent_frequency(f_want, fs, cd_n)
            .map(|(f, _)| f)
            .unwrap_or(f_want);
        let c = 0.5 * (lo + hi);
        let a = 0.5 * (hi - lo) * 1.02;
        let w = 2.0 * std::f64::consts::PI * f;
        let probe = FnProbe(|t: f64| c + a * (w * t).sin());
        let mut adc = SarAdc::new(&cfg, pipeline::stage_rng(seed, idx));
        let mut sh = sh_of(sh_cfg);
        let mut hist = vec![0u64; n_codes];
        for k in 0..cd_n as u64 {
            let ev = adc.convert(k, &probe, &mut sh);
            hist[ev.code as usize] += 1;
        }
        let code_density = static_test::adc_code_density(&hist, None, None, lo, q);
        adc_res = Some(AdcStatic {
            code_density,
            ramp,
            code_density_samples: cd_n,
            ramp_samples: ramp_n,
        });
    }
    if adc_res.is_none() && dac_res.is_none() {
        return Err(Error::BadInput(format!(
            "{}: the chain has no sar_adc or dac to test",
            sc.origin
        )));
    }
    Ok(Static {
        adc: adc_res,
        dac: dac_res,
    })
}

/// Run the static tests and write `static.json`.
pub fn static_to_dir(sc: &Scenario, dir: &Path) -> Result<StaticReport> {
    let stat = static_tests(sc)?;
    let report = StaticReport {
        scenario: sc.name.clone(),
        stat,
    };
    let figs = figures::static_figures(&sc.name, &report.stat)?;
    let json = serde_json::to_vec_pretty(&report).map_err(|e| Error::Run(e.to_string()))?;
    let out = OutputDir::create(dir)?;
    let written = (|| {
        for f in &figs {
            out.write(&format!("{}.png", f.name), &f.png)?;
            out.write(&format!("{}.svg", f.name), f.svg.as_bytes())?;
        }
        out.write("static.json", &json)
    })();
    if let Err(e) = written {
        out.abandon();
        return Err(e);
    }
    Ok(report)
}
