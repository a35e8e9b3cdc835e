//! The pictures of a run and of the static tests, built from the engine's records and the meters' results.

use crate::engine::pipeline::RunOutput;
use crate::engine::static_bench::Static;
use crate::error::Result;
use crate::measure::chain::{ChainMetrics, SpectrumDetail};
use crate::report::plot::{
    BudgetPlot, Plot, PlotSummary, SpectrumPlot, StaticPlot, WaveformPlot, render_png, render_svg,
};

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

/// The default waveform window: the last few cycles of the capture (at least three periods of the fundamental
/// and eight conversion periods, at least 64 grid steps).
pub fn default_window_s(run: &RunOutput) -> (f64, f64) {
    let cap = &run.capture;
    let dt = cap.timebase.dt_s();
    let start = cap.timebase.time_s(cap.n0);
    let end = start + (cap.output().len().saturating_sub(1)) as f64 * dt;
    let mut width = 64.0 * dt;
    if let Some(f) = run.plan.frequency_hz {
        width = width.max(3.0 / f);
    }
    if let Some(a) = &run.plan.adc {
        width = width.max(8.0 / a.sample_rate_hz);
    }
    ((end - width).max(start), end)
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
    let (w0, w1) = window_s.unwrap_or_else(|| default_window_s(run));
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
    if let (Some(conv), Some(a)) = (&run.chain.converter, &run.plan.adc) {
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
    let wave = Plot::Waveform(WaveformPlot {
        title: format!("{name}: input and output"),
        t0_s: t0,
        dt_s: tb.dt_s(),
        traces,
        sample_instants_s: &s_t,
        sample_values_v: &s_v,
        staircase: (!st_t.is_empty()).then_some((&st_t[..], &st_v[..])),
        measured_delay_s: Some(m.latency.measured_s),
        window_s: (t0, t1),
    });
    figs.push(figure(
        "waveform",
        "Input (source) against output, with the ADC's sampling instants and the DAC's zero-order hold".into(),
        &wave,
    )?);

    // ---- spectra
    let fs_adc = run.plan.adc.map(|a| a.sample_rate_hz);
    figs.push(spectrum_figure(
        "spectrum_output",
        format!("{name}: analog output spectrum"),
        &m.detail.output,
        run.plan.frequency_hz,
        fs_adc,
        Some(m.output.band_hz),
        vec![
            fmt_opt("SINAD", m.output.sinad_db, "dB"),
            fmt_opt("ENOB", m.output.enob_bits, "bits"),
            fmt_opt("THD", m.output.thd_db, "dB"),
            fmt_opt("SFDR", m.output.sfdr_dbc, "dBc"),
        ],
    )?);
    if let (Some(d), Some(a)) = (&m.detail.adc, &m.adc) {
        figs.push(spectrum_figure(
            "spectrum_adc",
            format!("{name}: ADC code spectrum"),
            d,
            run.plan.frequency_hz,
            None,
            None,
            vec![
                fmt_opt("SINAD", a.sinad_db, "dB"),
                fmt_opt("ENOB", a.enob_bits, "bits"),
                fmt_opt("THD", a.thd_db, "dB"),
                fmt_opt("SFDR", a.sfdr_dbc, "dBc"),
            ],
        )?);
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
    Ok(figs)
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
        "Output spectrum in dBFS (input-referred full scale): fundamental, harmonics (folded ones marked), \
         zero-order-hold images and the analysis band"
            .to_string()
    } else {
        "ADC code spectrum in dBFS: fundamental and harmonics (folded about the conversion rate's Nyquist \
         frequency)"
            .to_string()
    };
    figure(
        name,
        caption,
        &Plot::Spectrum(SpectrumPlot {
            title,
            bin_hz: d.spectrum.bin_hz,
            level_dbfs: &level,
            fundamental_hz: d.tones.as_ref().map(|t| t.fundamental_hz).or(f0),
            harmonics,
            images_hz: images,
            band_hz,
            notes,
            log_frequency: false,
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
                dnl_lsb: &a.code_density.dnl_lsb,
                inl_lsb: &a.code_density.inl_bestfit_lsb,
            }),
        )?);
    }
    if let Some(d) = &st.dac {
        figs.push(figure(
            "static_dac",
            "DAC: settled output of every code, DNL and INL (best-fit line)".into(),
            &Plot::Static(StaticPlot {
                title: format!("{name}: DAC static"),
                transfer_v: &d.levels_v,
                dnl_lsb: &d.result.dnl_lsb,
                inl_lsb: &d.result.inl_bestfit_lsb,
            }),
        )?);
    }
    Ok(figs)
}
