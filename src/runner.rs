//! Whole runs: simulate, measure, write the outputs atomically into a folder.

use std::path::Path;

use crate::capture::compare::{self, CompareCapture, CompareSpec};
use crate::engine::pipeline;
use crate::engine::plan::Plan;
use crate::engine::static_bench::{StaticReport, missing_code_causes, static_tests};
use crate::error::{Error, Result};
use crate::measure::chain::ChainMetrics;
use crate::measure::chain::measure_run;
use crate::measure::latency::LatencyOverTime;
use crate::measure::paths::{TimedRecord, delay_between_s};
use crate::report::csv::{CsvRows, fastest_code_rate_hz, rows_every};
use crate::report::json::{ListeningInfo, PathDelay, PathReport, PathsReport, Report};
use crate::report::wav::{
    LISTEN_FADE_S, LISTEN_MIN_S, ListeningRecords, WavFormat, WavOptions, listening_files,
};
use crate::report::waveforms::{NpyRows, RowWriter, WaveformWriter};
use crate::report::{OutputDir, Producer};
use crate::report::{document, figures};
use crate::scenario::Scenario;
use crate::scenario::overrides::ScenarioText;
use crate::stages::kind::Upstream;

/// How to run.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// Every grid sample in waveforms.csv (else 10 rows per period of the fastest ADC's codes, at most 1e6
    /// rows; see [`rows_every`]).
    pub full_waveforms: bool,
    /// Every grid sample in waveforms.npy (else the rows of waveforms.csv).
    pub npy_full_rate: bool,
    /// Report progress on standard error when it is a terminal.
    pub progress: bool,
    /// Time window of the waveform plot (s); None = the last few cycles.
    pub window_s: Option<(f64, f64)>,
    /// Write the plots (PNG and SVG) and the Markdown and HTML reports.
    pub figures: bool,
    /// Write input.wav, output.wav and error.wav with these options; None = no WAV files.
    pub wav: Option<WavOptions>,
    /// Write into a folder that holds a study (its files are then removed): `--force`.
    pub force: bool,
    /// Measure the audio figures over this band (Hz), with three more runs (`--audio`); None = not.
    pub audio_band_hz: Option<(f64, f64)>,
    /// Measure a capture of the built chain beside the simulated output (`--compare`); None = not.
    pub compare: Option<CompareSpec>,
}

impl Default for RunOptions {
    fn default() -> Self {
        RunOptions {
            full_waveforms: false,
            npy_full_rate: false,
            progress: false,
            window_s: None,
            figures: true,
            wav: Some(WavOptions::default()),
            force: false,
            audio_band_hz: None,
            compare: None,
        }
    }
}

/// The checks before a run: the plan (bad input is reported before any folder appears), the paths, the audio
/// band, and the `[compare]` capture, read before anything is simulated so a bad file is reported at once.
fn preflight(sc: &Scenario, opts: &RunOptions) -> Result<Option<compare::CompareCapture>> {
    let (plan, _) = Plan::new(sc)?;
    check_paths(sc)?;
    if let Some(band) = opts.audio_band_hz {
        crate::engine::audio::check(sc, &plan, band)?;
    }
    match opts.compare.as_ref().or(sc.compare.as_ref()) {
        Some(spec) => {
            compare::check_source(&sc.source.waveform)?;
            Ok(Some(compare::read_capture(spec)?))
        }
        None => Ok(None),
    }
}

/// Run a scenario, measure it and write `report.json`, `waveforms.csv` and `waveforms.npy` into `dir` (created when the run
/// starts; on failure nothing partial is left). The files an earlier run wrote there and this one did not
/// (plots and WAV files after `--no-plots --no-wav`) are removed.
pub fn run_to_dir(sc: &Scenario, dir: &Path, opts: &RunOptions) -> Result<Report> {
    let capture = preflight(sc, opts)?;
    let out = OutputDir::create(dir, &Producer::run(opts.force))?;
    match run_inner(sc, &out, opts, capture.as_ref()) {
        Ok(r) => {
            out.finish()?;
            Ok(r)
        }
        Err(e) => {
            out.abandon();
            Err(e)
        }
    }
}

fn run_inner(
    sc: &Scenario,
    out: &OutputDir,
    opts: &RunOptions,
    capture: Option<&CompareCapture>,
) -> Result<Report> {
    let (plan, planned) = Plan::new(sc)?;
    let (csv_file, csv_tmp) = out.create_temp("waveforms.csv")?;
    let (npy_file, npy_tmp) = out.create_temp("waveforms.npy")?;
    // The waveforms are the first path's (the scenario's own chain): its fastest codes set the default rows.
    let csv_every = rows_every(
        plan.n_total,
        opts.full_waveforms,
        plan.timebase.rate_hz,
        fastest_code_rate_hz(&planned.stages),
    );
    let npy_every = if opts.npy_full_rate { 1 } else { csv_every };
    let writers: Vec<Box<dyn RowWriter>> = vec![
        Box::new(CsvRows::from_file(csv_file, csv_tmp, csv_every)),
        Box::new(NpyRows::from_file(
            npy_file,
            npy_tmp,
            plan.n_total,
            npy_every,
        )),
    ];
    // The waveform files are formatted and written on their own thread while the engine and the meters run.
    let mut waveforms = WaveformWriter::start(writers);
    let m = simulate_and_measure(sc, Some(&mut waveforms), opts, capture)?;
    m.phase("writing the files");
    waveforms.finish()?;
    let json = serde_json::to_vec_pretty(&m.report).map_err(|e| Error::Run(e.to_string()))?;
    out.commit("waveforms.csv")?;
    out.commit("waveforms.npy")?;
    // Every file written and synced side by side, then put in place in this order (report.json last).
    let (md, html) = if opts.figures {
        (
            document::markdown(&m.report, &m.figs),
            document::html(&m.report, &m.figs),
        )
    } else {
        (String::new(), String::new())
    };
    let mut files: Vec<(String, &[u8])> = Vec::new();
    for f in &m.figs {
        files.push((format!("{}.png", f.name), &f.png));
        files.push((format!("{}.svg", f.name), f.svg.as_bytes()));
    }
    if let Some(set) = &m.wav_files {
        files.push(("input.wav".into(), &set.input));
        files.push(("output.wav".into(), &set.output));
        files.push(("error.wav".into(), &set.error));
    }
    if opts.figures {
        files.push(("report.md".into(), md.as_bytes()));
        files.push(("report.html".into(), html.as_bytes()));
    }
    out.write_many(&files)?;
    out.write("report.json", &json)?;
    if let Some(b) = m.spinner {
        b.finish_and_clear();
    }
    Ok(m.report)
}

/// A run simulated and measured, before anything is written: the report, the figures and listening files
/// when asked for, and the spinner that names the phases (when progress is shown).
pub struct Measured {
    pub report: Report,
    pub figs: Vec<figures::Figure>,
    pub wav_files: Option<crate::report::wav::ListeningSet>,
    /// The ADC record the meters use (its codes in order), when the chain has an ADC.
    pub adc_codes: Option<Vec<u32>>,
    spinner: Option<indicatif::ProgressBar>,
}

impl Measured {
    fn phase(&self, name: &'static str) {
        if let Some(b) = &self.spinner {
            b.set_message(name);
            b.tick();
        }
    }
}

/// Simulate and measure a checked scenario, streaming the waveforms of its first path into `sink` (when
/// given), and build the report as [`run_to_dir`] writes it; nothing is written to disk.
pub fn simulate_and_measure(
    sc: &Scenario,
    sink: Option<&mut (dyn pipeline::WaveformSink + Send)>,
    opts: &RunOptions,
    capture: Option<&CompareCapture>,
) -> Result<Measured> {
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
    // The first path (or the one chain) with the waveforms and the progress bar; the other paths beside it.
    let others = other_paths(sc)?;
    let (run, other_runs) = rayon::join(
        || {
            pipeline::run(
                sc,
                sink.map(|s| s as &mut dyn pipeline::WaveformSink),
                &mut progress,
            )
        },
        || {
            use rayon::prelude::*;
            others
                .par_iter()
                .map(|(name, description, s)| {
                    run_path(name, s).map(|(run, metrics)| PathRun {
                        name: name.clone(),
                        description: description.clone(),
                        run,
                        metrics,
                    })
                })
                .collect::<Result<Vec<_>>>()
        },
    );
    let run = run?;
    let other_runs = other_runs?;
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
    phase("measuring");
    let mut metrics = measure_run(&run.records())?;
    metrics.latency.over_time = track_latency(&run, &metrics);
    let imd = crate::measure::imd::from_run(&run.records());
    let step = crate::measure::step::from_run(&run.records(), run.scenario.analysis.settling_band);
    let audio = match opts.audio_band_hz {
        Some(band) => {
            phase("measuring the audio figures (three more runs)");
            Some(crate::engine::audio::audio_figures(&run, &metrics, band)?)
        }
        None => None,
    };
    let path_delays = sc
        .paths
        .first()
        .map(|first| path_delays(&first.name, &run, &metrics, &other_runs));
    let compared = match capture {
        Some(c) => {
            phase("measuring the capture");
            let (rep, sim, cap) = compare::compare(&run, &metrics, c)?;
            Some((rep, sim, cap, &c.capture))
        }
        None => None,
    };
    // The plots and the listening files are independent: drawn and made side by side (each figure's PNG and SVG
    // side by side too); every output is computed alone, so the bytes are the same at any thread count.
    phase(match (opts.figures, opts.wav.is_some()) {
        (true, true) => "drawing the plots and making the listening files",
        (true, false) => "drawing the plots",
        (false, true) => "making the listening files",
        (false, false) => "measuring",
    });
    let draw = || -> Result<Vec<figures::Figure>> {
        if !opts.figures {
            return Ok(Vec::new());
        }
        let mut figs = figures::run_figures(&run, &metrics, opts.window_s)?;
        if let Some(first) = sc.paths.first() {
            let mut all: Vec<figures::PathShown<'_>> = vec![figures::PathShown {
                name: &first.name,
                run: &run,
                metrics: &metrics,
            }];
            all.extend(other_runs.iter().map(|p| figures::PathShown {
                name: &p.name,
                run: &p.run,
                metrics: &p.metrics,
            }));
            figs.extend(figures::path_figures(&all, opts.window_s)?);
        }
        if let Some((rep, sim, cap, c)) = &compared {
            figs.push(compare::figure(&run, c, rep, sim, cap)?);
        }
        Ok(figs)
    };
    let listen = || -> Option<Result<crate::report::wav::ListeningSet>> {
        let w = opts.wav.as_ref()?;
        // Gain-matched: the fitted gain when it is near the chain's nominal gain; otherwise (a signal lost in
        // the chain, which a least-squares fit would answer with a gain near zero and a silent error file) the
        // nominal gain, so the error file says what was lost.
        let alignment = metrics.detail.alignment;
        let nominal = nominal_gain(&run.scenario);
        let fitted_ok = alignment.delay_s.is_finite()
            && alignment.gain.is_finite()
            && (20.0 * (alignment.gain / nominal).abs().log10()).abs() < 3.0;
        let (delay, gain, offset) = if fitted_ok {
            (alignment.delay_s, alignment.gain, alignment.offset_v)
        } else {
            (metrics.latency.measured_s, nominal, 0.0)
        };
        let records = ListeningRecords {
            input_v: &run.source_record.volts,
            output_v: &run.output_record.volts,
            rate_hz: run.plan.out_rate_hz,
            delay_s: delay,
            gain,
            offset_v: offset,
            periodic: records_hold_whole_periods(
                &run.scenario,
                run.plan.out_rate_hz,
                run.output_record.volts.len(),
            ),
            full_scale_floor_v: converter_full_scale_v(&run.scenario),
            min_seconds: LISTEN_MIN_S,
            fade_s: LISTEN_FADE_S,
        };
        Some(listening_files(&records, w))
    };
    // The listening files on a thread of their own (they read only the records, the scenario and the plan;
    // the drawing reads the whole run, whose stages stay on this thread).
    let (figs, listened) = std::thread::scope(|scope| {
        let listening = scope.spawn(listen);
        let figs = draw();
        (figs, listening.join())
    });
    let listened =
        listened.map_err(|_| Error::Run("the listening files' thread panicked".into()))?;
    let figs = figs?;
    let mut report = Report::new(&run.scenario, &run.plan, metrics);
    if run.hops.len() > 1 {
        report.hops = Some(run.hops.clone());
    }
    report.imd = imd;
    report.audio = audio;
    report.compare = compared.map(|(rep, ..)| rep);
    match step {
        Some(Ok(m)) => report.step = Some(m),
        Some(Err(problem)) => report.scenario.warnings.push(problem.to_string()),
        None => {}
    }
    if let Some(slip) = latency_slip(&run.scenario, &report) {
        report.scenario.warnings.push(slip.text());
        report.warnings.push(slip);
    }
    if let Some(note) = crate::report::table::record_slips_note(&report.latency) {
        report.scenario.warnings.push(note);
    }
    if let Some(first) = sc.paths.first() {
        let mut paths = vec![(
            first.name.clone(),
            PathReport::from_report(&first.description, &report),
        )];
        for p in other_runs {
            let r = Report::new(&p.run.scenario, &p.run.plan, p.metrics);
            if let Some(slip) = latency_slip(&p.run.scenario, &r) {
                report
                    .scenario
                    .warnings
                    .push(format!("path \"{}\": {}", p.name, slip.text()));
            }
            paths.push((p.name, PathReport::from_report(&p.description, &r)));
        }
        report.paths = Some(PathsReport(paths));
        if let (Some(delays), Some(all)) = (&path_delays, &report.paths) {
            for d in delays {
                // One sample period of the slower of the two output records.
                let rate = |n: &str| {
                    all.0
                        .iter()
                        .find(|(k, _)| k == n)
                        .map_or(f64::NAN, |(_, p)| p.output_analysis_rate_hz)
                };
                let period_s = 1.0 / rate(&d.from).min(rate(&d.to));
                if d.agreement_s.is_nan() || d.agreement_s.abs() > period_s {
                    report.scenario.warnings.push(format!(
                        "paths \"{}\" and \"{}\": the delay between them cross-correlated directly ({}) and \
                         the difference of their measured latencies ({}) disagree by more than one output \
                         sample: a path's latency measurement failed (a latency over half its output record \
                         cannot be measured: lengthen simulation.duration) or a path does something its \
                         budget does not say",
                        d.from,
                        d.to,
                        crate::format::units::format_si(d.cross_correlated_s, "s"),
                        crate::format::units::format_si(d.latency_difference_s, "s"),
                    ));
                }
            }
        }
        report.path_delays = path_delays;
    }
    let mut wav_files = None;
    if let (Some(w), Some(listened)) = (&opts.wav, listened) {
        match listened {
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
                    seconds: set.length as f64 / f64::from(set.rate_hz),
                    record_s: set.record_s,
                    looped: set.looped.as_str().into(),
                    fade_s: LISTEN_FADE_S,
                });
                wav_files = Some(set);
            }
            Err(e) => report
                .scenario
                .warnings
                .push(format!("listening files not written: {e}")),
        }
    }
    let adc_codes = run
        .adc_codes
        .as_ref()
        .map(|r| r.codes.iter().map(|e| e.code).collect());
    Ok(Measured {
        report,
        figs,
        wav_files,
        adc_codes,
        spinner,
    })
}

/// A path after the first of a `[[path]]` scenario, run and measured.
struct PathRun {
    name: String,
    description: String,
    run: pipeline::RunOutput,
    metrics: ChainMetrics,
}

/// The paths after the first of a `[[path]]` scenario as scenarios of their own: (name, description,
/// scenario). They run the source the first path runs (its tone moved for coherence on the first path's
/// record), so every path hears the same signal; their records are analysed with the window.
fn other_paths(sc: &Scenario) -> Result<Vec<(String, String, Scenario)>> {
    if sc.paths.len() < 2 {
        return Ok(Vec::new());
    }
    let (_, first) = Plan::new(sc).map_err(|e| in_path(&sc.paths[0].name, e))?;
    Ok(sc.paths[1..]
        .iter()
        .map(|p| {
            let mut s = first.for_path(p);
            s.analysis.coherent = false;
            (p.name.clone(), p.description.clone(), s)
        })
        .collect())
}

/// Plan every path after the first of a `[[path]]` scenario (the first is the scenario's own chain): an error
/// names its path. Nothing to do for a one-chain scenario.
pub fn check_paths(sc: &Scenario) -> Result<()> {
    for (name, _, s) in other_paths(sc)? {
        Plan::new(&s).map_err(|e| in_path(&name, e))?;
    }
    Ok(())
}

/// An error of one path's run, named by the path.
fn in_path(name: &str, e: Error) -> Error {
    match e {
        Error::BadInput(m) => Error::BadInput(format!("path \"{name}\": {m}")),
        Error::Run(m) => Error::Run(format!("path \"{name}\": {m}")),
        other => other,
    }
}

/// Run and measure one path (its latency tracked when asked).
fn run_path(name: &str, sc: &Scenario) -> Result<(pipeline::RunOutput, ChainMetrics)> {
    let run = pipeline::run_lean(sc).map_err(|e| in_path(name, e))?;
    let mut metrics = measure_run(&run.records()).map_err(|e| in_path(name, e))?;
    metrics.latency.over_time = track_latency(&run, &metrics);
    Ok((run, metrics))
}

/// The measured latency tracked over `analysis.latency_blocks` blocks of the output record, around the
/// measured latency; None when not asked for.
fn track_latency(run: &pipeline::RunOutput, m: &ChainMetrics) -> Option<LatencyOverTime> {
    let blocks = run.scenario.analysis.latency_blocks as usize;
    if blocks < 2 {
        return None;
    }
    crate::measure::latency::latency_over_time(
        &run.source_record.volts,
        &run.output_record.volts,
        run.plan.out_rate_hz,
        run.output_record.t0_s(),
        m.latency.measured_s,
        run.plan.frequency_hz.map(|f| 1.0 / f),
        blocks,
    )
}

/// The delay between every two paths: the difference of their measured latencies, and the later path's
/// output record cross-correlated against the earlier one's (searched around their budgets' difference).
fn path_delays(
    first_name: &str,
    first: &pipeline::RunOutput,
    first_m: &ChainMetrics,
    others: &[PathRun],
) -> Vec<PathDelay> {
    let mut all: Vec<(&str, &pipeline::RunOutput, &ChainMetrics)> =
        vec![(first_name, first, first_m)];
    all.extend(others.iter().map(|p| (p.name.as_str(), &p.run, &p.metrics)));
    let period_s = first.plan.frequency_hz.map(|f| 1.0 / f);
    fn record(r: &pipeline::RunOutput) -> TimedRecord<'_> {
        TimedRecord {
            t0_s: r.output_record.t0_s(),
            rate_hz: r.plan.out_rate_hz,
            volts: &r.output_record.volts,
        }
    }
    let mut out = Vec::new();
    for (i, a) in all.iter().enumerate() {
        for b in &all[i + 1..] {
            let latency_difference_s = b.2.latency.measured_s - a.2.latency.measured_s;
            let budget_difference_s = b.2.latency.budget_s - a.2.latency.budget_s;
            let cross_correlated_s =
                delay_between_s(record(a.1), record(b.1), budget_difference_s, period_s);
            out.push(PathDelay {
                from: a.0.to_string(),
                to: b.0.to_string(),
                latency_difference_s,
                cross_correlated_s,
                budget_difference_s,
                agreement_s: cross_correlated_s - latency_difference_s,
            });
        }
    }
    out
}

/// A measured latency differs from its budget by more than this fraction of the budget...
const LATENCY_FAR_FRACTION: f64 = 0.25;
/// ... and by more than this many conversion periods (grid steps without a converter).
const LATENCY_FAR_PERIODS: f64 = 0.5;

/// A located warning when the measured latency is far from the budget (more than a quarter of it and half a
/// conversion period): the budget adds what each stage states about its own delay, so a stage delays the
/// signal more (or less) than it states, as a slew-limited amplifier does, or a slip makes the signal
/// something else. The warning points at the slowest `slew_rate` written, else at the first stage.
pub fn latency_slip(sc: &Scenario, report: &Report) -> Option<crate::scenario::Slip> {
    let l = &report.latency;
    let period_s = match &report.adc {
        Some(a) => 1.0 / a.metrics.sample_rate_hz,
        None => 1.0 / sc.simulation.analog_rate_hz,
    };
    let far = l.difference_s.is_finite()
        && l.difference_s.abs() > LATENCY_FAR_FRACTION * l.budget_s.abs()
        && l.difference_s.abs() > LATENCY_FAR_PERIODS * period_s;
    if !far {
        return None;
    }
    // The slowest slew rate written, if any: an amplifier that slews delays the signal beyond its budget.
    let slowest = sc
        .stages
        .iter()
        .enumerate()
        .filter_map(|(i, st)| {
            let out = match &st.kind {
                crate::scenario::StageKind::Amplifier(a) => &a.output,
                crate::scenario::StageKind::Dac(d) => &d.output,
                _ => return None,
            };
            out.slew_rate_v_per_s.map(|sr| (i + 1, sr))
        })
        .min_by(|a, b| a.1.total_cmp(&b.1));
    let si = |v: f64| crate::format::units::format_si(v, "s");
    let dac_index = sc
        .stages
        .iter()
        .position(|st| st.kind.role() == crate::stages::kind::Role::Reconstructor);
    let slipped = l.slips.filter(|n| *n > 0).zip(dac_index);
    let (key, suggestion) = match (slipped, slowest) {
        (Some((n, i)), _) => (
            format!("stage.{}.clock_ppm", i + 1),
            format!(
                "the DAC runs on another clock than the ADC and its FIFO slipped {n} times: the delay drifts as \
                 the FIFO empties or fills, and the budget states only its start; give both converters the same \
                 clock_ppm, or put a resample with mode = \"async\" before the DAC"
            ),
        ),
        (None, Some((n, sr))) => (
            format!("stage.{n}.slew_rate"),
            format!(
                "check this slew rate ({}) first: a stage that slews delays the signal by more than its \
                 budget states; then each stage's bandwidth, cutoff and rails",
                crate::format::units::format_si(sr, "V/s")
            ),
        ),
        (None, None) => (
            "stage.1".to_string(),
            "check the stages' bandwidths, cutoffs and rails: one of them delays or reshapes the signal more \
             than its budget states"
                .to_string(),
        ),
    };
    // Where the key is written, else where its stage is.
    let mut location = crate::scenario::Slip::location_of(sc, &key);
    if location.is_empty()
        && let Some((stage, _)) = key.rsplit_once('.')
    {
        location = crate::scenario::Slip::location_of(sc, stage);
    }
    Some(crate::scenario::Slip {
        location,
        key,
        message: format!(
            "the measured latency ({}) is {} {} its budget ({}, the sum of each stage's stated delay): more \
             than a quarter of the budget and half a conversion period, so the chain does something its \
             stages' delays do not describe",
            si(l.measured_s),
            si(l.difference_s.abs()),
            if l.difference_s > 0.0 {
                "over"
            } else {
                "under"
            },
            si(l.budget_s)
        ),
        suggestion,
    })
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

/// True when a record of `len` samples at `rate_hz` holds a whole number of periods of the (sine) source, as
/// a coherent record does: the listening files can then loop it without a seam.
fn records_hold_whole_periods(sc: &Scenario, rate_hz: f64, len: usize) -> bool {
    let crate::scenario::Waveform::Sine { frequency_hz, .. } = sc.source.waveform else {
        return false;
    };
    let cycles = frequency_hz * len as f64 / rate_hz;
    cycles >= 1.0 && (cycles - cycles.round()).abs() < 1e-6 * cycles
}

/// The converter's full scale (half its input range) carried to the larger of the chain's two ends, the
/// input (divided by the gain before the converter) and the output (times the gain after it); 0 without a
/// converter. Two runs of one chain then map volts to the listening files alike, whatever noise or
/// distortion each adds (see [`crate::report::wav::listening_files`]).
pub fn converter_full_scale_v(sc: &Scenario) -> f64 {
    let mut up = Upstream::default();
    let mut before = 1.0;
    let mut after = 1.0;
    let mut half_span_v = None;
    for st in &sc.stages {
        let g = st.kind.passband_gain(&up);
        if let Some(a) = st.kind.quantizer_timing() {
            half_span_v = Some(0.5 * (a.range_v.1 - a.range_v.0).abs());
        } else if half_span_v.is_none() {
            before *= g;
        } else {
            after *= g;
        }
        st.kind.pass_on(&mut up);
    }
    match half_span_v {
        Some(h) if before != 0.0 && before.is_finite() && after.is_finite() => {
            (h / before.abs()).max(h * after.abs())
        }
        _ => 0.0,
    }
}

/// Run the static tests and write `static.json` and the static plots into `dir`; `force` lets them replace a
/// study the folder holds.
/// When the ADC misses codes, each non-ideality of its hold and converter is removed in turn and the ones that
/// clear (or halve) the missing codes are named (`static.adc.missing_code_causes`).
pub fn static_to_dir(text: &ScenarioText, dir: &Path, force: bool) -> Result<StaticReport> {
    let scenario = text.scenario()?;
    let sc = &scenario;
    let mut stat = static_tests(sc)?;
    if let Some(adc) = &mut stat.adc {
        adc.missing_code_causes = missing_code_causes(text, sc, adc.code_density.missing_codes)?;
    }
    let report = StaticReport {
        scenario: sc.name.clone(),
        stat,
    };
    let figs = figures::static_figures(&sc.name, &report.stat)?;
    let json = serde_json::to_vec_pretty(&report).map_err(|e| Error::Run(e.to_string()))?;
    let out = OutputDir::create(dir, &Producer::static_tests(force))?;
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
    out.finish()?;
    Ok(report)
}

/// The waveforms of a run kept in memory at the full grid rate: what `waveforms.csv` holds with
/// `--full-waveforms`, unrounded.
#[derive(Debug, Clone, Default)]
pub struct Waveforms {
    /// Grid instants (s).
    pub time_s: Vec<f64>,
    /// One column per analog stream, named as in `waveforms.csv` (`<label>_v`).
    pub analog: Vec<(String, Vec<f64>)>,
    /// One column per code stream, named as in `waveforms.csv`.
    pub codes: Vec<(String, Vec<u32>)>,
}

impl pipeline::WaveformSink for Waveforms {
    fn begin(&mut self, analog: &[String], codes: &[String]) -> Result<()> {
        let col = crate::report::csv::column_name;
        self.analog = analog
            .iter()
            .map(|a| (format!("{}_v", col(a)), Vec::new()))
            .collect();
        self.codes = codes.iter().map(|c| (col(c), Vec::new())).collect();
        Ok(())
    }

    fn block(
        &mut self,
        timebase: crate::signal::stream::Timebase,
        n0: u64,
        analog: &[&[f64]],
        codes: &[&[u32]],
    ) -> Result<()> {
        let len = analog.first().map_or(0, |c| c.len());
        self.time_s
            .extend((0..len as u64).map(|j| timebase.time_s(n0 + j)));
        for ((_, dst), src) in self.analog.iter_mut().zip(analog) {
            dst.extend_from_slice(src);
        }
        for ((_, dst), src) in self.codes.iter_mut().zip(codes) {
            dst.extend_from_slice(src);
        }
        Ok(())
    }
}

/// A run kept in memory: its report (as `report.json` holds it), its waveforms and the ADC's record of codes.
pub struct InMemoryRun {
    pub report: Report,
    pub waveforms: Waveforms,
    /// The ADC record the meters use (`record_len` codes), when the chain has an ADC.
    pub adc_codes: Option<Vec<u32>>,
}

/// Run a checked scenario as [`run_to_dir`] does (same report numbers for the same options) without writing
/// anything: no figures are drawn and the listening files, when asked for, are made only for the report's
/// `listening` figures.
pub fn run_in_memory(sc: &Scenario, opts: &RunOptions) -> Result<InMemoryRun> {
    let capture = preflight(sc, opts)?;
    let opts = RunOptions {
        figures: false,
        progress: false,
        ..opts.clone()
    };
    let mut waveforms = Waveforms::default();
    let m = simulate_and_measure(sc, Some(&mut waveforms), &opts, capture.as_ref())?;
    Ok(InMemoryRun {
        report: m.report,
        waveforms,
        adc_codes: m.adc_codes,
    })
}
