//! The pictures of a run and of the static tests, built from the engine's records and the meters' results.

use crate::engine::pipeline::{RunOutput, si};
use crate::engine::static_bench::Static;
use crate::error::Result;
use crate::measure::chain::{ChainMetrics, SpectrumDetail};
use crate::measure::latency::LatencyOverTime;
use crate::measure::spectrum::SpectrumAnalyzer;
use crate::report::plot::{
    BudgetPlot, FifoPlot, FifoTrace, PathBudgetsPlot, Plot, PlotSummary, SpectrumPlot, StaticPlot,
    WaveformPlot, XyPlot, render_png, render_svg,
};
use crate::scenario::WindowKind;
use crate::signal::waveform::Waveform;

/// Pixel size of the PNG files.
pub const PNG_SIZE: (u32, u32) = (1200, 750);

/// One rendered picture.
#[derive(Debug, Clone)]
pub struct Figure {
    /// File stem: `<name>.png` and `<name>.svg`.
    pub name: String,
    pub caption: String,
    pub svg: String,
    pub png: Vec<u8>,
    pub summary: PlotSummary,
}

fn figure(name: &str, caption: String, plot: &Plot) -> Result<Figure> {
    // The two renderings read the plot and nothing else: side by side, the same bytes at any thread count.
    let (svg, png) = rayon::join(
        || render_svg(plot),
        || render_png(plot, PNG_SIZE.0, PNG_SIZE.1),
    );
    let (svg, summary) = svg?;
    let (png, _) = png?;
    Ok(Figure {
        name: name.to_string(),
        caption,
        svg,
        png,
        summary,
    })
}

/// The default waveform window: a few cycles (at least three periods of the fundamental and eight conversion
/// periods, 256 without a fundamental, at least 64 grid steps) where the signal is. Windows of that width, stepped back from the end of
/// the capture by half a width, are scored by the source's peak-to-peak swing; the latest one that swings at
/// least half as much as the liveliest is shown (the end of a steady sine, not a recording's silent tail). The
/// window ends one measured delay before the capture does when the capture is long enough, so the output
/// that belongs to it is captured too (the aligned panels of the waveform figure).
pub fn default_window_s(run: &RunOutput, delay_s: Option<f64>) -> (f64, f64) {
    let cap = &run.capture;
    let dt = cap.timebase.dt_s();
    let start = cap.timebase.time_s(cap.n0);
    let len = cap.output().len();
    let end = start + (len.saturating_sub(1)) as f64 * dt;
    let mut width = 64.0 * dt;
    if let Some(f) = run.plan.frequency_hz {
        width = width.max(3.0 / f);
    }
    if let Some(a) = &run.plan.adc {
        // A source without a fundamental (a recording, noise, a chirp) gets 256 conversion periods: a few
        // cycles of the lower audio tones at audio rates.
        let periods = if run.plan.frequency_hz.is_some() {
            8.0
        } else {
            256.0
        };
        width = width.max(periods / a.sample_rate_hz);
    }
    width = width.min(end - start);
    let latest = match delay_s {
        Some(d) if d.is_finite() && d > 0.0 && end - d - width >= start => end - d,
        _ => end,
    };
    let signal = cap.source().unwrap_or(cap.output());
    let steps = ((width / dt).round() as usize).max(2);
    let last = (((latest - start) / dt).floor().max(0.0) as usize).min(len.saturating_sub(1));
    // (window end index, peak-to-peak) from the latest backwards, at most 4096 windows.
    let mut scored: Vec<(usize, f64)> = Vec::new();
    let mut e = last;
    while e + 1 >= steps && scored.len() < 4096 {
        let seg = &signal[e + 1 - steps..=e];
        let (lo, hi) = seg
            .iter()
            .filter(|v| v.is_finite())
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
                (a.min(v), b.max(v))
            });
        scored.push((e, if hi >= lo { hi - lo } else { 0.0 }));
        if e < steps / 2 {
            break;
        }
        e -= (steps / 2).max(1);
    }
    let best = scored.iter().map(|s| s.1).fold(0.0, f64::max);
    let chosen = scored
        .iter()
        .find(|s| s.1 >= 0.5 * best)
        .map_or(last, |s| s.0);
    let w1 = start + chosen as f64 * dt;
    ((w1 - width).max(start), w1)
}

/// The legend's names of the converters whose samples and hold levels the waveform marks (the first hop's),
/// when the chain has several hops: ("hop 1's ADC (its label)", "hop 1's DAC (its label)").
fn first_hop_names(run: &RunOutput) -> Option<(String, String)> {
    let c = run.chain.converter().filter(|_| run.chain.hops.len() > 1)?;
    Some((
        format!("hop 1's ADC ({})", c.quantizer_label),
        format!("hop 1's DAC ({})", c.reconstructor_label),
    ))
}

/// Waveform, output spectrum, ADC spectrum and latency budget.
pub fn run_figures(
    run: &RunOutput,
    m: &ChainMetrics,
    window_s: Option<(f64, f64)>,
) -> Result<Vec<Figure>> {
    let mut figs = Vec::new();
    let name = &run.scenario.name;

    // ---- waveform
    let cap = &run.capture;
    let tb = cap.timebase;
    let (w0, w1) = window_s.unwrap_or_else(|| default_window_s(run, Some(m.latency.measured_s)));
    let cap_t0 = tb.time_s(cap.n0);
    let len = cap.output().len();
    let i0 = (((w0 - cap_t0) * tb.rate_hz).floor().max(0.0) as usize).min(len.saturating_sub(2));
    let i1 = (((w1 - cap_t0) * tb.rate_hz).ceil().max(0.0) as usize + 1).clamp(i0 + 2, len);
    let t0 = cap_t0 + i0 as f64 * tb.dt_s();
    let t1 = cap_t0 + (i1 - 1) as f64 * tb.dt_s();
    let traces: Vec<(&str, &[f64])> = cap
        .columns
        .iter()
        .map(|(l, v)| (l.as_str(), &v[i0..i1]))
        .collect();
    let (mut s_t, mut s_v, mut st_t, mut st_v) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    if let (Some(conv), Some(a)) = (run.chain.converter(), &run.plan.adc) {
        let q = (a.range_v.1 - a.range_v.0) / f64::powi(2.0, a.bits as i32);
        for e in run
            .capture_adc_events
            .iter()
            .filter(|e| e.t_sample_s >= t0 && e.t_sample_s <= t1)
        {
            s_t.push(e.t_sample_s);
            // The converted value of code k is the level the ideal DAC gives for it, low + k q: the centre of
            // the code under IEEE Std 1241's ideal transfer.
            s_v.push(a.range_v.0 + e.code as f64 * q);
        }
        // The staircase starts with the level in force at the window's left edge.
        let first = run
            .capture_dac_events
            .iter()
            .rposition(|e| e.t_avail_s <= t0)
            .unwrap_or(0);
        for e in run.capture_dac_events[first..]
            .iter()
            .filter(|e| e.t_avail_s <= t1)
        {
            st_t.push(e.t_avail_s.max(t0));
            st_v.push(conv.reconstructor.level_v(e.code));
        }
    }
    // The output one measured delay later, on the window's grid (NaN past the capture's end).
    let delay = m.latency.measured_s;
    let out = cap.output();
    let aligned: Vec<f64> = (i0..i1)
        .map(|i| {
            let u = i as f64 + delay * tb.rate_hz;
            let k = u.floor();
            if !(u.is_finite() && k >= 0.0 && (k as usize) + 1 < len) {
                return f64::NAN;
            }
            let (k, frac) = (k as usize, u - k);
            out[k] + frac * (out[k + 1] - out[k])
        })
        .collect();
    let has_aligned = delay.is_finite() && aligned.iter().any(|v| v.is_finite());
    // The ADC samples the output of the last analog stage before it (column 0 is the source).
    let sampled_trace = run.chain.pre.len().min(traces.len().saturating_sub(1));
    let wave = Plot::Waveform(WaveformPlot {
        title: format!("{name}: input and output"),
        t0_s: t0,
        dt_s: tb.dt_s(),
        traces,
        sample_instants_s: &s_t,
        sample_values_v: &s_v,
        staircase: (!st_t.is_empty()).then_some((&st_t[..], &st_v[..])),
        converters: first_hop_names(run),
        measured_delay_s: Some(m.latency.measured_s),
        window_s: (t0, t1),
        sampled_trace,
        aligned_output: has_aligned.then_some(&aligned[..]),
    });
    let hops_note = if run.chain.hops.len() > 1 {
        format!(
            " (with {} hops in series, the samples and hold levels marked are hop 1's; each later hop's DAC \
             and the stages after it are the intermediate traces)",
            run.chain.hops.len()
        )
    } else {
        String::new()
    };
    figs.push(figure(
        "waveform",
        format!(
            "Input (source) against output, with the ADC's samples on the signal it samples and the DAC's \
             zero-order hold{hops_note}; below, the output shifted back by the measured delay over the input, \
             and the error"
        ),
        &wave,
    )?);

    // ---- spectra
    let fs_adc = run.plan.adc.map(|a| a.sample_rate_hz);
    let source = source_kind(&run.scenario.source.waveform);
    // The source frequency as the terminal and the report print it (after any move for coherence).
    let f0 = run.plan.frequency_hz.or(m.output.fundamental_hz);
    let output_notes = match &source {
        None => vec![
            fmt_f0(f0),
            fmt_opt("SINAD", m.output.sinad_db, "dB"),
            fmt_opt("ENOB", m.output.enob_bits, "bits"),
            fmt_opt("THD", m.output.thd_db, "dB"),
            fmt_opt("SFDR", m.output.sfdr_dbc, "dBc"),
            format!("analysis band {}", si(m.output.band_hz, "Hz")),
        ],
        Some(what) => vec![
            what.clone(),
            format!("analysis band {}", si(m.output.band_hz, "Hz")),
        ],
    };
    let tones = source.is_none();
    figs.push(spectrum_figure(
        "spectrum_output",
        format!("{name}: analog output spectrum"),
        &m.detail.output,
        tones.then_some(f0).flatten(),
        fs_adc,
        Some(m.output.band_hz),
        output_notes,
    )?);
    if let (Some(d), Some(a)) = (&m.detail.adc, &m.adc) {
        let f0 = run.plan.frequency_hz.or(a.fundamental_hz);
        let notes = match &source {
            None => vec![
                fmt_f0(f0),
                fmt_opt("SINAD", a.sinad_db, "dB"),
                fmt_opt("ENOB", a.enob_bits, "bits"),
                fmt_opt("THD", a.thd_db, "dB"),
                fmt_opt("SFDR", a.sfdr_dbc, "dBc"),
                format!("{} bits at {}", a.bits, si(a.sample_rate_hz, "Hz")),
            ],
            Some(what) => vec![
                what.clone(),
                format!("{} bits at {}", a.bits, si(a.sample_rate_hz, "Hz")),
            ],
        };
        figs.push(spectrum_figure(
            "spectrum_adc",
            format!("{name}: ADC code spectrum"),
            d,
            tones.then_some(f0).flatten(),
            None,
            None,
            notes,
        )?);
    }

    // ---- the noise-shaping loop's own output, before its decimation filter
    if let Some((clock_hz, levels)) = &run.modulator_stream
        && levels.len() >= 1024
    {
        figs.push(modulator_figure(name, *clock_hz, levels, run)?);
    }

    // ---- the FIFO between clocks
    if let Some(plot) = fifo_plot(run) {
        figs.push(fifo_figure(plot)?);
    }

    // ---- latency budget
    let lines: Vec<(String, f64)> = m
        .latency
        .budget
        .iter()
        .map(|b| (b.stage.clone(), b.seconds))
        .collect();
    figs.push(figure(
        "latency",
        "Latency budget per stage, and the measured total".into(),
        &Plot::Budget(BudgetPlot {
            title: format!("{name}: latency budget"),
            lines: &lines,
            measured_s: m.latency.measured_s,
        }),
    )?);
    if let Some(track) = &m.latency.over_time {
        figs.push(latency_over_time_figure(
            &format!("{name}: measured latency over the run"),
            &[(name.as_str(), track, 0.0)],
        )?);
    }
    Ok(figs)
}

/// The measured delay of each block against time (`latency_over_time`): one series per (name, track, offset
/// subtracted in s).
fn latency_over_time_figure(
    title: &str,
    tracks: &[(&str, &LatencyOverTime, f64)],
) -> Result<Figure> {
    let data: Vec<(Vec<f64>, Vec<f64>)> = tracks
        .iter()
        .map(|(_, t, offset)| {
            (
                t.blocks.iter().map(|b| b.time_s).collect(),
                t.blocks.iter().map(|b| b.delay_s - offset).collect(),
            )
        })
        .collect();
    let series: Vec<(&str, &[f64], &[f64])> = tracks
        .iter()
        .zip(&data)
        .map(|((n, _, _), (t, d))| (*n, &t[..], &d[..]))
        .collect();
    let offsets = tracks.iter().any(|(_, _, o)| *o != 0.0);
    let spread = tracks
        .iter()
        .map(|(n, t, _)| format!("{n}: spread {}", si(t.spread_s, "s")))
        .collect::<Vec<_>>()
        .join(", ");
    figure(
        "latency_over_time",
        format!(
            "The measured delay block by block over the run{} ({spread})",
            if offsets {
                ", each path less its measured latency"
            } else {
                ""
            }
        ),
        &Plot::Xy(XyPlot {
            title: title.to_string(),
            x_label: "time (s)".into(),
            y_label: if offsets {
                "delay - measured latency (s)".into()
            } else {
                "delay (s)".into()
            },
            series,
            log_x: false,
            markers: Vec::new(),
        }),
    )
}

/// One path of a `[[path]]` scenario as the path figures read it.
pub struct PathShown<'a> {
    pub name: &'a str,
    pub run: &'a RunOutput,
    pub metrics: &'a ChainMetrics,
}

/// The figures of a `[[path]]` scenario: the paths' latency budgets side by side (`path_budgets`), every
/// path's output over one window of the first path's capture with the source (`path_waveforms`), and the
/// latency of every path over the run when it is tracked (`path_latency_over_time`).
pub fn path_figures(paths: &[PathShown<'_>], window_s: Option<(f64, f64)>) -> Result<Vec<Figure>> {
    let Some(first) = paths.first() else {
        return Ok(Vec::new());
    };
    let name = &first.run.scenario.name;
    let mut figs = Vec::new();
    let lines: Vec<Vec<(String, f64)>> = paths
        .iter()
        .map(|p| {
            p.metrics
                .latency
                .budget
                .iter()
                .map(|b| (b.stage.clone(), b.seconds))
                .collect()
        })
        .collect();
    figs.push(figure(
        "path_budgets",
        "Each path's latency budget (its stages laid end to end) and its measured latency, on one time axis"
            .into(),
        &Plot::PathBudgets(PathBudgetsPlot {
            title: format!("{name}: latency budget per path"),
            paths: paths
                .iter()
                .zip(&lines)
                .map(|(p, l)| (p.name, &l[..], p.metrics.latency.measured_s))
                .collect(),
        }),
    )?);

    // Waveforms: the source and each path's output at the grid instants of one window.
    let (w0, w1) = window_s.unwrap_or_else(|| default_window_s(first.run, None));
    let mut data: Vec<(String, Vec<f64>, Vec<f64>)> = Vec::new();
    let cap = &first.run.capture;
    if let Some(src) = cap.source() {
        data.push(("source".into(), Vec::new(), Vec::new()));
        let tb = cap.timebase;
        let last = data.last_mut().expect("pushed");
        for (i, v) in src.iter().enumerate() {
            let t = tb.time_s(cap.n0 + i as u64);
            if t >= w0 && t <= w1 {
                last.1.push(t);
                last.2.push(*v);
            }
        }
    }
    for p in paths {
        let cap = &p.run.capture;
        let tb = cap.timebase;
        let (mut t_s, mut v) = (Vec::new(), Vec::new());
        for (i, x) in cap.output().iter().enumerate() {
            let t = tb.time_s(cap.n0 + i as u64);
            if t >= w0 && t <= w1 {
                t_s.push(t);
                v.push(*x);
            }
        }
        data.push((format!("{} output", p.name), t_s, v));
    }
    let series: Vec<(&str, &[f64], &[f64])> = data
        .iter()
        .filter(|(_, t, _)| t.len() >= 2)
        .map(|(n, t, v)| (n.as_str(), &t[..], &v[..]))
        .collect();
    if !series.is_empty() {
        figs.push(figure(
            "path_waveforms",
            "The source and every path's output over one window: a listener switching paths hears the \
             offset between them"
                .into(),
            &Plot::Xy(XyPlot {
                title: format!("{name}: every path's output"),
                x_label: "time (s)".into(),
                y_label: "voltage (V)".into(),
                series,
                log_x: false,
                markers: Vec::new(),
            }),
        )?);
    }

    let tracks: Vec<(&str, &LatencyOverTime, f64)> = paths
        .iter()
        .filter_map(|p| {
            p.metrics
                .latency
                .over_time
                .as_ref()
                .map(|t| (p.name, t, p.metrics.latency.measured_s))
        })
        .collect();
    if !tracks.is_empty() {
        let mut f = latency_over_time_figure(
            &format!("{name}: each path's latency over the run"),
            &tracks,
        )?;
        f.name = "path_latency_over_time".into();
        figs.push(f);
    }
    Ok(figs)
}

/// The plot of every clock-crossing FIFO of the run (`fifo_fill`): one trace per hop whose DAC reads through a
/// FIFO from another clock, named by the hop and its DAC, with that FIFO's own slips. `None` when no hop crosses
/// clocks or no FIFO ticked.
pub fn fifo_plot(run: &RunOutput) -> Option<FifoPlot<'_>> {
    let fifos: Vec<FifoTrace<'_>> = run
        .chain
        .hops
        .iter()
        .enumerate()
        .filter_map(|(i, h)| {
            let rec = h.converter.crossing.as_ref()?.record();
            Some(FifoTrace {
                name: format!("hop {}: {}", i + 1, h.converter.reconstructor_label),
                short: format!("hop {}", i + 1),
                depth: rec.depth,
                fill: &rec.fill,
                slip_times_s: &rec.slip_times_s,
                slip_dropped: &rec.slip_dropped,
                slips: rec.slips,
            })
        })
        .collect();
    if fifos.iter().all(|f| f.fill.is_empty()) {
        return None;
    }
    Some(FifoPlot {
        title: format!("{}: FIFO fill between clocks", run.scenario.name),
        fifos,
    })
}

/// The `fifo_fill` figure from [`fifo_plot`].
fn fifo_figure(plot: FifoPlot<'_>) -> Result<Figure> {
    let each = plot
        .fifos
        .iter()
        .map(|f| format!("{} {} slips", f.short, f.slips))
        .collect::<Vec<_>>()
        .join(", ");
    figure(
        "fifo_fill",
        format!(
            "Fill of each clock-crossing FIFO over the run, one trace per hop whose DAC reads through one (the \
             trace covers the lowest and highest fill over each stretch of ticks): it drifts as the two clocks \
             differ; a slip drops a code when the FIFO is full (a dot at its depth) or repeats one when it is \
             empty (a dot at 0), marked on the trace of the hop where it happens and numbered in that hop's \
             order ({each}; the instants are in report.json's hops and latency.slip_times_s)"
        ),
        &Plot::Fifo(plot),
    )
}

/// The spectrum of a noise-shaping loop's output levels (full scale +-1) at its clock, on a logarithmic frequency
/// axis so the shaped noise's slope shows, with the converter's output band (up to its Nyquist frequency) shaded.
fn modulator_figure(name: &str, clock_hz: f64, levels: &[f64], run: &RunOutput) -> Result<Figure> {
    let mut an = SpectrumAnalyzer::new(levels.len(), WindowKind::BlackmanHarris)?;
    let spec = an.power_spectrum(levels, clock_hz)?;
    let level = spec.dbfs(1.0);
    let band_hz = run.plan.adc.as_ref().map(|a| a.sample_rate_hz / 2.0);
    let mut notes = vec![
        format!("loop clock {}", si(clock_hz, "Hz")),
        format!("last {} clocks", levels.len()),
        "Blackman-Harris window".to_string(),
    ];
    if let Some(b) = band_hz {
        notes.push(format!("shaded: the output band, 0 .. {}", si(b, "Hz")));
    }
    figure(
        "spectrum_modulator",
        "Spectrum of the delta-sigma loop's own output (its quantizer's levels at the loop clock, before the \
         decimation filter), in dBFS, on a logarithmic frequency axis: the quantization noise is pushed out of \
         the shaded output band and rises toward half the loop clock"
            .to_string(),
        &Plot::Spectrum(SpectrumPlot {
            title: format!("{name}: delta-sigma loop output spectrum"),
            bin_hz: spec.bin_hz,
            level_dbfs: &level,
            fundamental_hz: run.plan.frequency_hz,
            harmonics: Vec::new(),
            images_hz: Vec::new(),
            band_hz,
            notes,
            log_frequency: true,
            overlay: None,
        }),
    )
}

/// What the spectrum of a source other than a sine is, for the strip under the spectrum (sine metrics such as
/// SINAD and ENOB describe a chain driven by one sine; for other sources the plot says what it shows instead).
/// None for a sine.
pub fn source_kind(w: &Waveform) -> Option<String> {
    let periodic = |what: &str, f: f64| {
        format!(
            "{what} source at {}: its harmonics belong to the signal; SINAD, ENOB and THD need a sine",
            si(f, "Hz")
        )
    };
    match w {
        Waveform::Sine { .. } => None,
        Waveform::Square { frequency_hz, .. } => Some(periodic("square", *frequency_hz)),
        Waveform::Triangle { frequency_hz, .. } => Some(periodic("triangle", *frequency_hz)),
        Waveform::Sawtooth { frequency_hz, .. } => Some(periodic("sawtooth", *frequency_hz)),
        Waveform::Multitone { tones } => Some(format!(
            "multitone source ({} tones): the spectrum of the tones and what the chain adds",
            tones.len()
        )),
        Waveform::Chirp {
            start_hz, stop_hz, ..
        } => Some(format!(
            "chirp source {} to {}: the spectrum of the whole sweep, not of one tone",
            si(*start_hz, "Hz"),
            si(*stop_hz, "Hz")
        )),
        Waveform::Step { .. } => Some("step source: the spectrum of a step, not of a tone".into()),
        Waveform::Dc => Some("constant source: what is left is the chain's own noise".into()),
        Waveform::Noise { rms_v, .. } => Some(format!(
            "noise source, {} rms: the chain's response to noise, not tone metrics",
            si(*rms_v, "V")
        )),
        Waveform::Chord { .. } => {
            Some("built-in chord source: the spectrum of the music, not tone metrics".into())
        }
        Waveform::Wav { path, .. } => Some(format!(
            "WAV source {}: the spectrum of the recording, not tone metrics",
            path.file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default()
        )),
    }
}

/// The fundamental for the strip, written as the terminal and the report write it.
fn fmt_f0(f0: Option<f64>) -> String {
    match f0 {
        Some(f) => format!("f0 {}", si(f, "Hz")),
        None => "f0 -".to_string(),
    }
}

fn fmt_opt(label: &str, v: Option<f64>, unit: &str) -> String {
    match v {
        Some(x) => format!("{label} {x:.2} {unit}"),
        None => format!("{label} -"),
    }
}

fn spectrum_figure(
    name: &str,
    title: String,
    d: &SpectrumDetail,
    f0: Option<f64>,
    fs_images: Option<f64>,
    band_hz: Option<f64>,
    notes: Vec<String>,
) -> Result<Figure> {
    let level = d.spectrum.dbfs(d.full_scale_peak_v);
    let nyquist = d.spectrum.nyquist_hz();
    let harmonics: Vec<(u32, f64, bool)> = d
        .tones
        .as_ref()
        .filter(|_| f0.is_some())
        .map(|t| {
            t.harmonics
                .iter()
                .filter(|h| h.in_band && !h.on_fundamental_or_dc && h.same_place_as.is_none())
                .map(|h| (h.order, h.frequency_hz, h.folded))
                .collect()
        })
        .unwrap_or_default();
    let mut images = Vec::new();
    if let (Some(fs), Some(f)) = (fs_images, f0) {
        let mut k = 1.0;
        while k * fs - f < nyquist && images.len() < 16 {
            for im in [k * fs - f, k * fs + f] {
                if im < nyquist {
                    images.push(im);
                }
            }
            k += 1.0;
        }
    }
    let caption = if fs_images.is_some() {
        "Output spectrum in dBFS (input-referred full scale): the fundamental (f0), harmonics by order (* \
         folded) and zero-order-hold images (img) marked under the frequency axis, the analysis band shaded, \
         the measured figures in the strip below"
            .to_string()
    } else {
        "ADC code spectrum in dBFS: the fundamental (f0) and harmonics by order (* folded about the conversion \
         rate's Nyquist frequency) marked under the frequency axis, the measured figures in the strip below"
            .to_string()
    };
    figure(
        name,
        caption,
        &Plot::Spectrum(SpectrumPlot {
            title,
            bin_hz: d.spectrum.bin_hz,
            level_dbfs: &level,
            fundamental_hz: f0.and(d.tones.as_ref().map(|t| t.fundamental_hz)).or(f0),
            harmonics,
            images_hz: images,
            band_hz,
            notes,
            log_frequency: false,
            overlay: None,
        }),
    )
}

/// Transfer, DNL and INL of the ADC and the DAC.
pub fn static_figures(name: &str, st: &Static) -> Result<Vec<Figure>> {
    let mut figs = Vec::new();
    if let Some(a) = &st.adc {
        let transfer: Vec<f64> = Vec::new();
        figs.push(figure(
            "static_adc",
            "ADC: DNL and INL (best-fit line) from the code-density test".into(),
            &Plot::Static(StaticPlot {
                title: format!("{name}: ADC static (code density)"),
                transfer_v: &transfer,
                transfer_label: "level".into(),
                dnl_lsb: &a.code_density.dnl_lsb,
                inl_lsb: &a.code_density.inl_bestfit_lsb,
            }),
        )?);
    }
    if let Some(d) = &st.dac {
        figs.push(figure(
            "static_dac",
            "DAC: settled output of every code relative to the zero-code output, DNL and INL (best-fit line)".into(),
            &Plot::Static(StaticPlot {
                title: format!("{name}: DAC static"),
                transfer_v: &d.levels_v,
                transfer_label: "output above code 0".into(),
                dnl_lsb: &d.result.dnl_lsb,
                inl_lsb: &d.result.inl_bestfit_lsb,
            }),
        )?);
    }
    for (file, who, d) in [
        ("static_adc_dc", "ADC", &st.adc_dc_transfer),
        ("static_dac_dc", "DAC", &st.dac_dc_transfer),
    ] {
        if let Some(d) = d {
            let lin = &d.linearity;
            let x_label = if d.code.is_empty() {
                "DC input level (V)"
            } else {
                "held code's ideal output (V)"
            };
            figs.push(figure(
                file,
                format!(
                    "{who}: INL of the DC transfer against the level (ppm of full scale), best-fit and end-point lines; each level averaged over {} words after its filters settle",
                    d.average_words
                ),
                &Plot::Xy(XyPlot {
                    title: format!("{name}: {who} DC transfer, INL"),
                    x_label: x_label.into(),
                    y_label: "INL (ppm of full scale)".into(),
                    series: vec![
                        ("best-fit line", &d.level_v, &lin.inl_bestfit_ppm),
                        ("end-point line", &d.level_v, &lin.inl_endpoint_ppm),
                    ],
                    log_x: false,
                    markers: Vec::new(),
                }),
            )?);
        }
    }
    Ok(figs)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two hops, each SAR at 48 kSPS feeding a DAC on a clock of its own (`ppm` against the codes), for
    /// `duration`.
    pub(crate) fn two_drifting_hops(ppm: [i32; 2], duration: &str) -> crate::scenario::Scenario {
        let hop = |ppm: i32| {
            format!(
                "[[stage]]\nkind = \"sar_adc\"\nbits = 16\nrange = [\"-2 V\", \"2 V\"]\nclock = \"960 kHz\"\n\
                 sample_rate = \"48 kHz\"\n\n[[stage]]\nkind = \"dac\"\nclock_ppm = {ppm}\n\n[[stage]]\n\
                 kind = \"filter\"\nfamily = \"butterworth\"\norder = 4\ncutoff = \"20 kHz\"\n\n"
            )
        };
        let text = format!(
            "name = \"drift\"\n[simulation]\nanalog_rate = \"960 kHz\"\nduration = \"{duration}\"\nseed = 3\n\n\
             [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1.5 V\"\n\n{}{}\
             [analysis]\nband = \"15 kHz\"\n",
            hop(ppm[0]),
            hop(ppm[1])
        );
        crate::scenario::parse_str(&text, "drift.toml", std::path::Path::new(".")).unwrap()
    }

    #[test]
    fn the_fifo_plot_carries_every_hops_fill_and_its_own_slips() {
        // Hop 1's DAC 2000 ppm fast (its FIFO empties: repeats), hop 2's 1500 ppm slow (it fills: drops).
        let sc = two_drifting_hops([2000, -1500], "300 ms");
        let run = crate::engine::pipeline::run(&sc, None, &mut |_| {}).unwrap();
        let plot = fifo_plot(&run).expect("two FIFOs");
        assert_eq!(plot.fifos.len(), 2);
        assert_eq!(run.hops.len(), 2);
        for (k, (f, h)) in plot.fifos.iter().zip(&run.hops).enumerate() {
            assert_eq!(f.name, format!("hop {}: {}", k + 1, h.dac));
            assert!(!f.fill.is_empty());
            assert_eq!(Some(f.slips), h.slips);
            assert_eq!(Some(f.slip_times_s.to_vec()), h.slip_times_s);
            // Drift over the run, less the headroom, within one slip (as tests/clocks.rs checks the counts):
            // 2000e-6 x 48e3 x 0.3 - 3 = 25.8 and 1500e-6 x 48e3 x 0.3 - 4 = 17.6.
            let want = [25.8, 17.6][k];
            assert!(
                (f.slips as f64 - want).abs() <= 1.0,
                "hop {k}: {} slips",
                f.slips
            );
            // Each slip sits on its own hop's trace: at 0 (repeated) for the fast DAC, at the depth for the
            // slow one.
            assert!(
                f.slip_dropped.iter().all(|&d| d == (k == 1)),
                "{:?}",
                f.slip_dropped
            );
        }
        // The whole run's slips are the hops' together.
        let all = run.slips.as_ref().unwrap();
        assert_eq!(all.slips, plot.fifos.iter().map(|f| f.slips).sum::<u64>());
        let (_, summary) = crate::report::plot::render_svg(&Plot::Fifo(plot)).unwrap();
        assert_eq!(summary.series, 2);
        // The waveform names the hop whose converters it marks.
        let m = crate::measure::chain::measure_run(&run.records()).unwrap();
        let figs = run_figures(&run, &m, None).unwrap();
        let wave = figs.iter().find(|f| f.name == "waveform").unwrap();
        assert!(wave.caption.contains("hop 1's"), "{}", wave.caption);
        assert!(
            wave.summary
                .labels
                .iter()
                .any(|l| l == "hop 1's DAC (stage.2 dac) hold levels"),
            "{:?}",
            wave.summary.labels
        );
        assert!(figs.iter().any(|f| f.name == "fifo_fill"));
    }

    #[test]
    fn only_a_sine_gets_tone_figures_and_other_sources_say_what_the_spectrum_is() {
        let sine = Waveform::Sine {
            frequency_hz: 1e3,
            amplitude_v: 1.0,
            phase_rad: 0.0,
        };
        assert_eq!(source_kind(&sine), None);
        let noise = Waveform::Noise {
            rms_v: 0.1,
            bandwidth_hz: None,
        };
        let said = source_kind(&noise).unwrap();
        assert!(said.starts_with("noise source, 100 mV rms"), "{said}");
        let chirp = Waveform::Chirp {
            start_hz: 100.0,
            stop_hz: 10e3,
            sweep_s: 1.0,
            law: crate::signal::waveform::ChirpLaw::Linear,
            amplitude_v: 1.0,
        };
        let said = source_kind(&chirp).unwrap();
        assert!(said.starts_with("chirp source 100 Hz to 10 kHz"), "{said}");
        let square = Waveform::Square {
            frequency_hz: 50.0,
            amplitude_v: 1.0,
            duty: 0.5,
        };
        assert!(
            source_kind(&square)
                .unwrap()
                .contains("SINAD, ENOB and THD need a sine")
        );
    }
}
