//! Whole runs: simulate, measure, write the outputs atomically into a folder.

use std::path::Path;

use crate::engine::pipeline;
use crate::engine::plan::Plan;
use crate::engine::static_bench::{StaticReport, static_tests};
use crate::error::{Error, Result};
use crate::measure::chain::measure_run;
use crate::report::OutputDir;
use crate::report::csv::CsvSink;
use crate::report::json::{ListeningInfo, Report};
use crate::report::wav::{WavFormat, WavOptions, listening_set};
use crate::report::{document, figures};
use crate::scenario::Scenario;
use crate::stages::kind::Upstream;

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
    let metrics = measure_run(&run.records())?;
    let imd = crate::measure::imd::from_run(&run.records());
    let step = crate::measure::step::from_run(&run.records(), run.scenario.analysis.settling_band);
    let figs = if opts.figures {
        phase("drawing the plots");
        figures::run_figures(&run, &metrics, opts.window_s)?
    } else {
        Vec::new()
    };
    let alignment = metrics.detail.alignment;
    let mut report = Report::new(&run.scenario, &run.plan, metrics);
    report.imd = imd;
    match step {
        Some(Ok(m)) => report.step = Some(m),
        Some(Err(problem)) => report.scenario.warnings.push(problem.to_string()),
        None => {}
    }
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

/// The chain's nominal passband gain: each stage's passband gain in turn (amplifier gains, the DAC's span over
/// the ADC's; filters pass their passband unchanged).
pub fn nominal_gain(sc: &Scenario) -> f64 {
    let mut up = Upstream::default();
    let mut g = 1.0;
    for st in &sc.stages {
        g *= st.kind.passband_gain(&up);
        st.kind.pass_on(&mut up);
    }
    g
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
