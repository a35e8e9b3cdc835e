//! The block pipeline.
//!
//! A run has a front half and a back half:
//! - front: the source and the analog stages before the converter run on the grid; the converter samples the
//!   stream entering it at exact instants (the closed-form source itself, or a cubic interpolation of the grid
//!   history), converts, and sends the codes through the links;
//! - back: the DAC renders its zero-order hold through its output amplifier on the grid, then the analog stages
//!   after it run.
//!
//! The back half runs one block behind the front so that every code due within a block is known before the
//! block is rendered. Memory is bounded by the analysis record: the band-limited, decimated source and output
//! after `settle`, the codes of the ADC record, and a capped grid capture of the tail of every stream.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::engine::decimate::{Decimator, PASSBAND_FRACTION};
use crate::engine::probe::{ExactProbe, GridHistory};
use crate::engine::stream::{AnalogRecord, CodeEvent, CodeRecord, Timebase};
use crate::error::{Error, Result};
use crate::measure::latency::BudgetLine;
use crate::scenario::{Scenario, StageKind, Waveform};
use crate::stages::AnalogStage;
use crate::stages::amplifier::Amplifier;
use crate::stages::dac::Dac;
use crate::stages::filter::Filter;
use crate::stages::link::Link;
use crate::stages::sample_hold::SampleHold;
use crate::stages::sar_adc::SarAdc;
use crate::stages::source::SourceGen;

/// Grid samples per block.
pub const BLOCK: usize = 4096;
/// Longest grid capture kept for full-bandwidth measurements (fidelity, cross-correlation) and plots.
pub const CAPTURE_MAX: usize = 1 << 20;
/// Longest output analysis record (samples); the ADC record is shortened to match. 2^20 points give bins of
/// a millionth of the analysis rate, far finer than any metric needs.
pub const RECORD_MAX: usize = 1 << 20;
/// Runs whose analysis record would need more memory than this are refused.
pub const MEMORY_LIMIT_BYTES: u64 = 4 << 30;

/// What the engine decided before running: rates, record lengths, the coherent frequency.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    pub timebase: Timebase,
    /// Grid samples simulated.
    pub n_total: u64,
    /// First grid sample of the analysis window.
    pub n_settle: u64,
    /// The converter, when the chain has one.
    pub adc: Option<AdcPlan>,
    /// Source frequency asked for, and the one used (moved for coherent sampling), for sine sources.
    pub requested_frequency_hz: Option<f64>,
    pub frequency_hz: Option<f64>,
    /// Whole cycles of the source in the analysis record, when moved for coherence.
    pub coherent_cycles: Option<u64>,
    /// Decimation from the grid to the output analysis stream.
    pub out_factor: usize,
    pub out_rate_hz: f64,
    /// Samples of the output analysis record (end-aligned in the run).
    pub out_record_len: usize,
    /// Highest frequency the output meters use: the analysis band, capped by the decimator's flat passband.
    pub out_band_hz: f64,
    /// Grid capture: first index and length.
    pub capture_n0: u64,
    pub capture_len: usize,
    pub memory_estimate_bytes: u64,
}

/// The converter's part of the plan.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AdcPlan {
    pub sample_rate_hz: f64,
    pub conversion_time_s: f64,
    pub bits: u32,
    pub range_v: (f64, f64),
    /// First conversion in the ADC record, and the record's length.
    pub k0: u64,
    pub record_len: usize,
}

impl Plan {
    /// Work out rates and records for a scenario. Returns the scenario as it will run (a sine source moved to the
    /// coherent frequency when asked).
    pub fn new(scenario: &Scenario) -> Result<(Plan, Scenario)> {
        let mut sc = scenario.clone();
        let sim = &sc.simulation;
        let timebase = Timebase::new(sim.analog_rate_hz);
        let n_total = (sim.duration_s * sim.analog_rate_hz).round() as u64;
        let n_settle = (sim.settle_s * sim.analog_rate_hz).round() as u64;
        let window_s = sim.duration_s - sim.settle_s;

        let adc_cfg = sc.stages.iter().find_map(|s| match &s.kind {
            StageKind::SarAdc(c) => Some(*c),
            _ => None,
        });
        // Time from a sample to its arrival at the DAC, plus one sample period: the output record must not start
        // before the first recorded code has reached the output.
        let mut transport_s = 0.0;
        for s in &sc.stages {
            if let StageKind::Link(l) = &s.kind {
                let fs = adc_cfg.map(|a| a.effective_sample_rate_hz()).unwrap_or(1.0);
                transport_s += l.delay_s + l.frame as f64 / fs;
            }
        }
        let band = sc.analysis.band_hz;
        let f_src = sc.source.waveform.highest_frequency_hz();

        let (adc, out_factor, ratio_integer) = match adc_cfg {
            Some(a) => {
                let fs = a.effective_sample_rate_hz();
                let margin_s = a.conversion_time_s + transport_s + 1.0 / fs;
                let m = ((window_s - margin_s) * fs).floor();
                if m < 16.0 {
                    return Err(Error::BadInput(format!(
                        "{}: the analysis window (duration - settle = {}) holds fewer than 16 conversions at {}; \
                         lengthen simulation.duration or shorten simulation.settle",
                        sc.origin,
                        si(window_s, "s"),
                        si(fs, "Hz")
                    )));
                }
                let (factor, integer) = choose_factor_with_adc(sim.analog_rate_hz, fs, band);
                // Records longer than RECORD_MAX output samples add nothing to the meters but memory: keep the
                // last part of the window.
                let per_code = sim.analog_rate_hz / factor as f64 / fs;
                // A length with only small prime factors keeps every FFT of the record fast (no chirp-z
                // fallback for a large prime factor); it gives up at most a few per cent of the window.
                let m_keep =
                    smooth_at_most(m.min((RECORD_MAX as f64 / per_code).floor()) as usize) as f64;
                let k0 = (sim.settle_s * fs).ceil() as u64 + (m - m_keep) as u64;
                let m = m_keep;
                (
                    Some(AdcPlan {
                        sample_rate_hz: fs,
                        conversion_time_s: a.conversion_time_s,
                        bits: a.bits,
                        range_v: a.range_v,
                        k0,
                        record_len: m as usize,
                    }),
                    factor,
                    integer,
                )
            }
            None => {
                let want = band.unwrap_or(0.0).max(10.0 * f_src.unwrap_or(0.0)) / PASSBAND_FRACTION;
                let factor = if want > 0.0 {
                    ((sim.analog_rate_hz / want).floor() as usize).max(1)
                } else {
                    1
                };
                (None, factor, false)
            }
        };
        let out_rate_hz = sim.analog_rate_hz / out_factor as f64;
        // Start the analysis on the output analysis grid.
        let n_settle = n_settle.div_ceil(out_factor as u64) * out_factor as u64;
        let out_record_len = match &adc {
            Some(a) if ratio_integer => {
                a.record_len * (out_rate_hz / a.sample_rate_hz).round() as usize
            }
            Some(a) => (a.record_len as f64 / a.sample_rate_hz * out_rate_hz).floor() as usize,
            None => smooth_at_most(((window_s * out_rate_hz).floor() as usize).min(RECORD_MAX)),
        };
        if out_record_len < 16 {
            return Err(Error::BadInput(format!(
                "{}: the analysis window is too short for the output record; lengthen simulation.duration",
                sc.origin
            )));
        }
        let out_band_hz = band
            .unwrap_or(f64::INFINITY)
            .min(PASSBAND_FRACTION * out_rate_hz);

        // Coherent sampling: move a sine to J cycles in the record (J odd, coprime with the record length).
        let requested_frequency_hz = sc.source.waveform.fundamental_hz();
        let mut coherent_cycles = None;
        if sc.analysis.coherent
            && let Waveform::Sine { frequency_hz, .. } = &mut sc.source.waveform
        {
            let (fs, n) = match &adc {
                Some(a) => (a.sample_rate_hz, a.record_len),
                None => (out_rate_hz, out_record_len),
            };
            if let Some((f, j)) = crate::measure::coherent::coherent_frequency(*frequency_hz, fs, n)
            {
                *frequency_hz = f;
                coherent_cycles = Some(j);
            }
        }
        let frequency_hz = sc.source.waveform.fundamental_hz();

        let n_window = n_total.saturating_sub(n_settle);
        let capture_len = (n_window as usize).min(CAPTURE_MAX);
        let capture_n0 = n_total - capture_len as u64;
        let analog_streams = 2 + sc
            .stages
            .iter()
            .filter(|s| {
                matches!(
                    s.kind,
                    StageKind::Filter(_) | StageKind::Amplifier(_) | StageKind::Dac(_)
                )
            })
            .count() as u64;
        let decimated = 2 * (n_window / out_factor as u64 + 1);
        let codes = adc.map(|a| a.record_len as u64).unwrap_or(0);
        let history = adc
            .map(|a| (a.conversion_time_s * 4.0 * sim.analog_rate_hz) as u64)
            .unwrap_or(0);
        let memory_estimate_bytes = 8 * (decimated + analog_streams * capture_len as u64 + history)
            + 24 * codes
            + 8 * analog_streams * BLOCK as u64 * 2;
        if memory_estimate_bytes > MEMORY_LIMIT_BYTES {
            return Err(Error::BadInput(format!(
                "{}: this run would need about {:.1} GiB for its analysis record (limit 4 GiB); lower \
                 simulation.duration, raise simulation.settle, or lower simulation.analog_rate",
                sc.origin,
                memory_estimate_bytes as f64 / (1u64 << 30) as f64
            )));
        }
        let plan = Plan {
            timebase,
            n_total,
            n_settle,
            adc,
            requested_frequency_hz,
            frequency_hz,
            coherent_cycles,
            out_factor,
            out_rate_hz,
            out_record_len,
            out_band_hz,
            capture_n0,
            capture_len,
            memory_estimate_bytes,
        };
        Ok((plan, sc))
    }
}

/// The largest length `<= n` whose prime factors are all 2, 3, 5 or 7 (`n` itself when `n < 1`).
pub fn smooth_at_most(n: usize) -> usize {
    let smooth = |mut m: usize| {
        for p in [2, 3, 5, 7] {
            while m.is_multiple_of(p) {
                m /= p;
            }
        }
        m == 1
    };
    (1..=n).rev().find(|&m| smooth(m)).unwrap_or(n)
}

/// Pick the decimation factor for the output analysis stream of a chain with a converter: the output rate is
/// an integer multiple L >= 4 of the conversion rate when the grid allows it (so a coherent ADC record is coherent
/// at the output too), and its flat passband covers the analysis band.
fn choose_factor_with_adc(rate_hz: f64, fs_hz: f64, band_hz: Option<f64>) -> (usize, bool) {
    let need_hz = band_hz.unwrap_or(0.0) / PASSBAND_FRACTION;
    for l in 4..=256u32 {
        let out = l as f64 * fs_hz;
        if out < need_hz {
            continue;
        }
        let d = rate_hz / out;
        if d < 1.0 {
            break;
        }
        if (d - d.round()).abs() < 1e-9 * d {
            return (d.round() as usize, true);
        }
    }
    let out = (4.0 * fs_hz).max(need_hz);
    (((rate_hz / out).floor() as usize).max(1), false)
}

/// Format a value with an SI prefix (for messages and tables).
pub fn si(v: f64, unit: &str) -> String {
    crate::scenario::units::format_si_table(v, unit)
}

/// A grid capture: the source and every analog stage output over the same grid window.
#[derive(Debug, Clone, PartialEq)]
pub struct Capture {
    pub timebase: Timebase,
    pub n0: u64,
    /// (column label, volts); the first column is the source (when captured), the last the chain's output.
    pub columns: Vec<(String, Vec<f64>)>,
    /// False when a lean run left the source out (a closed-form source the meters evaluate themselves).
    pub has_source: bool,
}

impl Capture {
    /// The source's grid samples, when captured (always, except in [`run_lean`] for closed-form sources whose
    /// meters do not need them).
    pub fn source(&self) -> Option<&[f64]> {
        self.has_source.then(|| &self.columns[0].1[..])
    }
    pub fn output(&self) -> &[f64] {
        &self.columns[self.columns.len() - 1].1
    }
}

/// Receives every block of the back half (for streaming the waveform CSV).
pub trait WaveformSink {
    /// Called once before the first block with the analog column labels and the code column labels.
    fn begin(&mut self, analog: &[String], codes: &[String]) -> Result<()>;
    /// A block starting at grid index `n0`; columns in the order given to `begin`.
    fn block(
        &mut self,
        timebase: Timebase,
        n0: u64,
        analog: &[&[f64]],
        codes: &[&[u32]],
    ) -> Result<()>;
}

/// Everything a run produced.
pub struct RunOutput {
    /// The scenario as run (coherent frequency applied).
    pub scenario: Scenario,
    pub plan: Plan,
    /// ADC record: `record_len` codes from conversion `k0`.
    pub adc_codes: Option<CodeRecord>,
    /// Band-limited, decimated source and output over the output analysis record (same instants).
    pub source_record: AnalogRecord,
    pub output_record: AnalogRecord,
    pub capture: Capture,
    /// Converter events within the capture window: ADC codes by sampling instant, DAC input codes by the instant
    /// they take effect (for plots of sample instants and the DAC staircase).
    pub capture_adc_events: Vec<CodeEvent>,
    pub capture_dac_events: Vec<CodeEvent>,
    pub codes_clipped: u64,
    pub bits_flipped: u64,
    /// The built chain, for analytic responses and the latency budget.
    pub chain: Chain,
}

/// The built stages.
pub struct Chain {
    pub source: SourceGen,
    /// Analog stages before the converter (or all of them in an analog-only chain), with their labels.
    pub pre: Vec<(String, Box<dyn AnalogStage>)>,
    pub converter: Option<Converter>,
    /// Analog stages after the DAC.
    pub post: Vec<(String, Box<dyn AnalogStage>)>,
}

/// The converter group: `[sample_hold] sar_adc link* dac`.
pub struct Converter {
    pub sh_label: Option<String>,
    pub sh: SampleHold,
    pub sh_cfg: crate::scenario::SampleHoldCfg,
    pub adc_label: String,
    pub adc: SarAdc,
    pub adc_cfg: crate::scenario::SarAdcCfg,
    pub links: Vec<(String, Link, crate::scenario::LinkCfg)>,
    pub dac_label: String,
    pub dac: Dac,
    pub dac_cfg: crate::scenario::DacCfg,
}

/// A ChaCha stream of its own for each stage, derived from the base seed and the stage's index.
pub fn stage_rng(seed: u64, index: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(index + 1);
    rng
}

impl Chain {
    /// Build every stage of a checked scenario.
    pub fn build(sc: &Scenario, timebase: Timebase) -> Result<Chain> {
        let seed = sc.simulation.seed;
        let source = SourceGen::new(&sc.source, timebase, seed, &sc.base_dir)?;
        let mut pre: Vec<(String, Box<dyn AnalogStage>)> = Vec::new();
        let mut post: Vec<(String, Box<dyn AnalogStage>)> = Vec::new();
        let mut sh: Option<(String, crate::scenario::SampleHoldCfg)> = None;
        let mut adc: Option<(String, crate::scenario::SarAdcCfg, u64)> = None;
        let mut links = Vec::new();
        let mut converter = None;
        let mut in_bits = 0;
        for (i, stage) in sc.stages.iter().enumerate() {
            let idx = i as u64 + 1;
            let analog: Option<Box<dyn AnalogStage>> = match &stage.kind {
                StageKind::Filter(c) => Some(Box::new(Filter::new(c, timebase))),
                StageKind::Amplifier(c) => Some(Box::new(Amplifier::new(c, timebase))),
                StageKind::SampleHold(c) => {
                    sh = Some((stage.label.clone(), *c));
                    None
                }
                StageKind::SarAdc(c) => {
                    adc = Some((stage.label.clone(), *c, idx));
                    in_bits = c.bits;
                    None
                }
                StageKind::Link(c) => {
                    links.push((
                        stage.label.clone(),
                        Link::new(c, in_bits, stage_rng(seed, idx)),
                        *c,
                    ));
                    in_bits = c.bits;
                    None
                }
                StageKind::Dac(c) => {
                    let (adc_label, adc_cfg, adc_idx) = adc.take().ok_or_else(|| {
                        Error::BadInput(format!("{}: a dac needs a sar_adc before it", sc.origin))
                    })?;
                    let mut rng = stage_rng(seed, idx);
                    let (sh_label, sh_stage, sh_cfg) = match sh.take() {
                        Some((label, cfg)) => (
                            Some(label),
                            SampleHold::new(&cfg, stage_rng(seed, adc_idx + 1_000_000)),
                            cfg,
                        ),
                        None => (None, SampleHold::ideal(), Default::default()),
                    };
                    let mut sh_stage = sh_stage;
                    sh_stage.set_input_step_s(timebase.dt_s());
                    converter = Some(Converter {
                        sh_label,
                        sh: sh_stage,
                        sh_cfg,
                        adc_label,
                        adc: SarAdc::new(&adc_cfg, stage_rng(seed, adc_idx)),
                        adc_cfg,
                        links: std::mem::take(&mut links),
                        dac_label: stage.label.clone(),
                        dac: Dac::new(c, &mut rng),
                        dac_cfg: *c,
                    });
                    None
                }
            };
            if let Some(a) = analog {
                if converter.is_some() {
                    post.push((stage.label.clone(), a));
                } else {
                    pre.push((stage.label.clone(), a));
                }
            }
        }
        Ok(Chain {
            source,
            pre,
            converter,
            post,
        })
    }

    /// Labels of the analog columns: the source, each analog stage before the converter, the DAC, each after.
    pub fn analog_labels(&self) -> Vec<String> {
        let mut v = vec!["source".to_string()];
        v.extend(self.pre.iter().map(|(l, _)| l.clone()));
        if let Some(c) = &self.converter {
            v.push(c.dac_label.clone());
        }
        v.extend(self.post.iter().map(|(l, _)| l.clone()));
        v
    }

    /// The latency budget at `f_hz` (phase delays) or, for broadband sources (`None`), group delays at `broadband_hz`.
    pub fn budget(&self, f_hz: Option<f64>, broadband_hz: f64) -> Vec<BudgetLine> {
        let delay = |s: &dyn AnalogStage| match f_hz {
            Some(f) => s.phase_delay_s(f),
            None => s.group_delay_s(broadband_hz),
        };
        let mut lines = Vec::new();
        for (label, s) in &self.pre {
            lines.push(BudgetLine {
                stage: label.clone(),
                seconds: delay(s.as_ref()),
            });
        }
        if let Some(c) = &self.converter {
            let fs = c.adc_cfg.effective_sample_rate_hz();
            if let Some(l) = &c.sh_label {
                lines.push(BudgetLine {
                    stage: format!("{l}: aperture delay"),
                    seconds: c.sh_cfg.aperture_delay_s,
                });
            }
            match c.adc_cfg.input {
                crate::scenario::AdcInput::Held => lines.push(BudgetLine {
                    stage: format!("{}: conversion time", c.adc_label),
                    seconds: c.adc_cfg.conversion_time_s,
                }),
                crate::scenario::AdcInput::Live => {
                    // Without a hold the code follows the input during the bit trials. A small movement of the
                    // input changes the code where it crosses a trial's threshold; trial i (at (i + 1)/clock) has
                    // 2^i thresholds across the range, so the later, finer trials decide most often: the code's
                    // effective instant is the trial instants weighted by 2^i / (2^N - 1).
                    let n = c.adc_cfg.bits as i32;
                    let total = f64::powi(2.0, n) - 1.0;
                    let t_eff: f64 = (0..n)
                        .map(|i| f64::powi(2.0, i) / total * (i + 1) as f64 / c.adc_cfg.clock_hz)
                        .sum();
                    lines.push(BudgetLine {
                        stage: format!(
                            "{}: conversion time less the bit trials' weighted instant (live input)",
                            c.adc_label
                        ),
                        seconds: c.adc_cfg.conversion_time_s - t_eff,
                    });
                }
            }
            for (label, link, _) in &c.links {
                lines.push(BudgetLine {
                    stage: format!("{label}: delay and frame wait"),
                    seconds: link.mean_latency_s(fs),
                });
            }
            lines.push(BudgetLine {
                stage: format!("{}: zero-order hold (half an update period)", c.dac_label),
                seconds: 0.5 / fs,
            });
            if let Some(tau) = c.dac_cfg.output.tau_s {
                let f = f_hz.unwrap_or(broadband_hz);
                let w = 2.0 * std::f64::consts::PI * f;
                let lag = if w > 0.0 { (w * tau).atan() / w } else { tau };
                lines.push(BudgetLine {
                    stage: format!("{}: output amplifier lag", c.dac_label),
                    seconds: lag,
                });
            }
        }
        for (label, s) in &self.post {
            lines.push(BudgetLine {
                stage: label.clone(),
                seconds: delay(s.as_ref()),
            });
        }
        lines
    }
}

/// Run a checked scenario. `sink` receives every back-half block (for the waveform CSV); `progress` gets the
/// fraction done.
pub fn run(
    scenario: &Scenario,
    sink: Option<&mut dyn WaveformSink>,
    progress: &mut dyn FnMut(f64),
) -> Result<RunOutput> {
    run_with(scenario, sink, progress, false)
}

/// [`run`] for a study: no waveform sink, no progress, and a grid capture of the source and the output only
/// (what the meters use; the stages in between are only for plots), in buffers reused from earlier runs on
/// this thread (see [`RunOutput::recycle`]).
pub fn run_lean(scenario: &Scenario) -> Result<RunOutput> {
    run_with(scenario, None, &mut |_| {}, true)
}

thread_local! {
    /// Buffers of finished runs, kept for the next run on this thread (see [`RunOutput::recycle`]): a study
    /// then does not ask the system for fresh, zeroed pages at every point.
    static SPARE: std::cell::RefCell<Vec<Vec<f64>>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// Spare buffers kept per thread.
const SPARE_MAX: usize = 8;

/// An empty buffer with room for `cap` samples: the smallest spare that fits, or a new one.
fn take_buffer(cap: usize) -> Vec<f64> {
    SPARE.with(|s| {
        let mut s = s.borrow_mut();
        let best = (0..s.len())
            .filter(|&i| s[i].capacity() >= cap)
            .min_by_key(|&i| s[i].capacity());
        match best {
            Some(i) => {
                let mut v = s.swap_remove(i);
                v.clear();
                v
            }
            None => Vec::with_capacity(cap),
        }
    })
}

impl RunOutput {
    /// Hand this run's large buffers (grid capture, analysis records) to the next run on this thread.
    pub fn recycle(self) {
        let mut bufs: Vec<Vec<f64>> = self.capture.columns.into_iter().map(|(_, v)| v).collect();
        bufs.push(self.source_record.volts);
        bufs.push(self.output_record.volts);
        SPARE.with(|s| {
            let mut s = s.borrow_mut();
            s.extend(bufs.into_iter().filter(|v| v.capacity() > 0));
            // Keep the largest few.
            s.sort_by_key(|v| std::cmp::Reverse(v.capacity()));
            s.truncate(SPARE_MAX);
        });
    }
}

fn run_with(
    scenario: &Scenario,
    mut sink: Option<&mut dyn WaveformSink>,
    progress: &mut dyn FnMut(f64),
    lean: bool,
) -> Result<RunOutput> {
    let (plan, sc) = Plan::new(scenario)?;
    let tb = plan.timebase;
    let mut chain = Chain::build(&sc, tb)?;
    let labels = chain.analog_labels();
    let n_pre = chain.pre.len();
    let n_post = chain.post.len();
    let has_conv = chain.converter.is_some();
    let code_labels: Vec<String> = match &chain.converter {
        Some(c) => vec![
            format!("{} code", c.adc_label),
            format!("{} code", c.dac_label),
        ],
        None => vec![],
    };
    if let Some(s) = sink.as_deref_mut() {
        s.begin(&labels, &code_labels)?;
    }

    // Front buffers (current and previous block) and back buffers.
    let mut front_cur: Vec<Vec<f64>> = vec![vec![0.0; BLOCK]; 1 + n_pre];
    let mut front_prev: Vec<Vec<f64>> = vec![vec![0.0; BLOCK]; 1 + n_pre];
    let mut back: Vec<Vec<f64>> = vec![vec![0.0; BLOCK]; usize::from(has_conv) + n_post];
    let mut code_cols: Vec<Vec<u32>> = vec![vec![0; BLOCK]; code_labels.len()];

    // Probe: exact source, or a history of the stream entering the converter.
    let exact = n_pre == 0 && chain.source.is_exact();
    let mut history = None;
    if let Some(c) = &chain.converter
        && !exact
    {
        let tconv = c.adc_cfg.conversion_time_s;
        let span_s = tconv
            + c.sh.lookahead_s()
            + c.sh
                .history_needed_s(1.0 / c.adc_cfg.effective_sample_rate_hz())
            + 4.0 / c.adc_cfg.effective_sample_rate_hz();
        let cap = (span_s * tb.rate_hz).ceil() as usize + 3 * BLOCK + 16;
        history = Some(GridHistory::new(tb.rate_hz, cap));
    }

    let mut adc_codes = plan.adc.map(|a| CodeRecord {
        bits: a.bits,
        sample_rate_hz: a.sample_rate_hz,
        codes: Vec::with_capacity(a.record_len),
    });
    let mut k: u64 = 0;
    let capture_t0_s = tb.time_s(plan.capture_n0);
    let mut capture_adc_events: Vec<CodeEvent> = Vec::new();
    let mut capture_dac_events: Vec<CodeEvent> = Vec::new();
    let mut dac_pending: Vec<CodeEvent> = Vec::new();
    let mut link_buf_a: Vec<CodeEvent> = Vec::new();
    let mut link_buf_b: Vec<CodeEvent> = Vec::new();
    // For the code columns of the waveform sink.
    let mut adc_seen: Vec<CodeEvent> = Vec::new();
    let mut last_adc_code = 0u32;
    let mut last_dac_code = 0u32;

    // A closed-form source is sampled directly at the analysis instants; others are decimated like the output.
    let exact_source = chain.source.is_exact();
    let mut dec_src = Decimator::new(plan.out_factor);
    let mut dec_out = Decimator::new(plan.out_factor);
    let dec_len = (plan.n_total - plan.n_settle) as usize / plan.out_factor + 16;
    // The decimated streams keep at most 2 x `dec_keep` samples: older ones are dropped (`dec_dropped` so far),
    // so memory stays flat however long the run (the record is the last `out_record_len` samples).
    let dec_keep = plan.out_record_len + BLOCK;
    let dec_cap = dec_len.min(2 * dec_keep + BLOCK);
    let mut dec_dropped = 0usize;
    let mut src_dec: Vec<f64> = take_buffer(if exact_source { 0 } else { dec_cap });
    let mut out_dec: Vec<f64> = take_buffer(dec_cap);
    // The captured columns: every stream, or (lean) the source and the output; a lean run leaves out a
    // closed-form source that feeds the converter directly (the meters evaluate it exactly; only the group
    // delay of a multitone or chirp reads its grid samples), and then does not generate it on the grid at all.
    let skip_source = lean
        && exact_source
        && n_pre == 0
        && has_conv
        && !matches!(
            sc.source.waveform,
            Waveform::Multitone { .. } | Waveform::Chirp { .. }
        );
    let captured: Vec<usize> = if skip_source {
        vec![labels.len() - 1]
    } else if lean && labels.len() > 2 {
        vec![0, labels.len() - 1]
    } else {
        (0..labels.len()).collect()
    };
    let mut capture: Vec<Vec<f64>> = captured
        .iter()
        .map(|_| take_buffer(plan.capture_len))
        .collect();

    let end_s = sc.simulation.duration_s;
    let n_blocks = plan.n_total.div_ceil(BLOCK as u64);
    let mut last_progress = 0.0;
    for b in 0..=n_blocks {
        // ---- front half of block b
        if b < n_blocks {
            let n0 = b * BLOCK as u64;
            let len = (plan.n_total - n0).min(BLOCK as u64) as usize;
            if !skip_source {
                chain.source.fill(n0, &mut front_cur[0][..len]);
            }
            for i in 0..n_pre {
                let (head, tail) = front_cur.split_at_mut(i + 1);
                chain.pre[i].1.process(&head[i][..len], &mut tail[0][..len]);
            }
            if let Some(conv) = chain.converter.as_mut() {
                let t_avail_input = match history.as_mut() {
                    Some(h) => {
                        h.push_block(n0, &front_cur[n_pre][..len]);
                        h.latest_time_s()
                    }
                    None => tb.time_s(n0 + len as u64 - 1),
                };
                let last_block = b + 1 == n_blocks;
                loop {
                    let t_k = conv.adc.sample_time_s(k);
                    if t_k >= end_s {
                        break;
                    }
                    let needed = conv.adc.latest_input_needed_s(k, conv.sh.lookahead_s());
                    if needed > t_avail_input && !last_block {
                        break;
                    }
                    if needed > end_s {
                        break;
                    }
                    let ev = match history.as_ref() {
                        Some(h) => conv.adc.convert(k, h, &mut conv.sh),
                        None => conv.adc.convert(
                            k,
                            &ExactProbe {
                                source: &chain.source,
                            },
                            &mut conv.sh,
                        ),
                    };
                    if let (Some(rec), Some(p)) = (adc_codes.as_mut(), plan.adc.as_ref())
                        && k >= p.k0
                        && rec.codes.len() < p.record_len
                    {
                        rec.codes.push(ev);
                    }
                    if sink.is_some() {
                        adc_seen.push(ev);
                    }
                    if ev.t_sample_s >= capture_t0_s {
                        capture_adc_events.push(ev);
                    }
                    link_buf_a.clear();
                    link_buf_a.push(ev);
                    for (_, link, _) in conv.links.iter_mut() {
                        link_buf_b.clear();
                        for e in link_buf_a.drain(..) {
                            link.push(e, &mut link_buf_b);
                        }
                        std::mem::swap(&mut link_buf_a, &mut link_buf_b);
                    }
                    capture_dac_events
                        .extend(link_buf_a.iter().filter(|e| e.t_avail_s >= capture_t0_s));
                    dac_pending.append(&mut link_buf_a);
                    k += 1;
                }
            }
        }

        // ---- back half of block b - 1
        if b >= 1 {
            let n0 = (b - 1) * BLOCK as u64;
            let len = (plan.n_total - n0).min(BLOCK as u64) as usize;
            if let Some(conv) = chain.converter.as_mut() {
                if sink.is_some() {
                    fill_code_column(
                        tb,
                        n0,
                        &adc_seen,
                        &mut last_adc_code,
                        &mut code_cols[0][..len],
                    );
                    let used = adc_seen
                        .iter()
                        .take_while(|e| e.t_avail_s <= tb.time_s(n0 + len as u64 - 1))
                        .count();
                    adc_seen.drain(..used);
                    fill_code_column(
                        tb,
                        n0,
                        &dac_pending,
                        &mut last_dac_code,
                        &mut code_cols[1][..len],
                    );
                }
                let used = conv.dac.render(tb, n0, &dac_pending, &mut back[0][..len]);
                dac_pending.drain(..used);
            }
            let base = usize::from(has_conv);
            for i in 0..n_post {
                if base + i == 0 {
                    // Analog-only chain: the first post stage reads the front's last stream.
                    chain.post[i]
                        .1
                        .process(&front_prev[n_pre][..len], &mut back[0][..len]);
                } else {
                    let (head, tail) = back.split_at_mut(base + i);
                    chain.post[i]
                        .1
                        .process(&head[base + i - 1][..len], &mut tail[0][..len]);
                }
            }
            // Columns: source, pre..., [dac], post...
            let mut cols: Vec<&[f64]> = Vec::with_capacity(labels.len());
            for f in front_prev.iter() {
                cols.push(&f[..len]);
            }
            for bk in back.iter() {
                cols.push(&bk[..len]);
            }
            let out_col = cols[cols.len() - 1];
            // Analysis streams after settle.
            let end = n0 + len as u64;
            if end > plan.n_settle {
                let from = plan.n_settle.saturating_sub(n0) as usize;
                if !exact_source {
                    dec_src.push(&cols[0][from..], &mut src_dec);
                }
                dec_out.push(&out_col[from..], &mut out_dec);
                if out_dec.len() >= 2 * dec_keep {
                    let drop = out_dec.len() - dec_keep;
                    out_dec.drain(..drop);
                    if !exact_source {
                        src_dec.drain(..drop);
                    }
                    dec_dropped += drop;
                }
            }
            if end > plan.capture_n0 {
                let from = plan.capture_n0.saturating_sub(n0) as usize;
                for (c, &i) in capture.iter_mut().zip(&captured) {
                    c.extend_from_slice(&cols[i][from..]);
                }
            }
            if let Some(s) = sink.as_deref_mut() {
                let codes: Vec<&[u32]> = code_cols.iter().map(|c| &c[..len]).collect();
                s.block(tb, n0, &cols, &codes)?;
            }
            let frac = end as f64 / plan.n_total as f64;
            if frac - last_progress >= 0.01 || end == plan.n_total {
                progress(frac);
                last_progress = frac;
            }
        }
        std::mem::swap(&mut front_cur, &mut front_prev);
    }
    dec_out.flush(&mut out_dec);
    // Counts below are of the whole decimated streams since settle; the vectors hold them from `dec_dropped`.
    let exact_from = if exact_source {
        // Evaluate the source from a multiple of FILL_AT_ALIGN at or before the part kept, so the values are
        // the bits a fill from settle would give.
        let from = dec_dropped - dec_dropped % crate::stages::source::FILL_AT_ALIGN;
        src_dec.clear();
        src_dec.resize(dec_dropped + out_dec.len() - from, 0.0);
        chain.source.fill_at_from(
            tb.time_s(plan.n_settle),
            plan.out_factor as f64 * tb.dt_s(),
            from,
            &mut src_dec,
        );
        from
    } else {
        dec_src.flush(&mut src_dec);
        dec_dropped
    };

    // End-aligned output record (n_settle is a multiple of the decimation factor, so the record sits on the
    // output analysis grid).
    let n_dec = (exact_from + src_dec.len()).min(dec_dropped + out_dec.len());
    let want = plan.out_record_len.min(n_dec);
    let start = n_dec - want;
    let rec_n0_dec = plan.n_settle / plan.out_factor as u64 + start as u64;
    let out_tb = Timebase::new(plan.out_rate_hz);
    // Trim in place (no second copy of the records at the peak of memory use).
    for (v, held_from) in [(&mut src_dec, exact_from), (&mut out_dec, dec_dropped)] {
        v.truncate(start + want - held_from);
        v.drain(..start - held_from);
        if !lean {
            v.shrink_to_fit();
        }
    }
    let source_record = AnalogRecord {
        timebase: out_tb,
        n0: rec_n0_dec,
        volts: src_dec,
    };
    let output_record = AnalogRecord {
        timebase: out_tb,
        n0: rec_n0_dec,
        volts: out_dec,
    };

    let (codes_clipped, bits_flipped) = match &chain.converter {
        Some(c) => (
            c.adc.codes_clipped(),
            c.links.iter().map(|(_, l, _)| l.bits_flipped()).sum(),
        ),
        None => (0, 0),
    };
    let capture = Capture {
        timebase: tb,
        n0: plan.capture_n0,
        columns: captured
            .iter()
            .map(|&i| labels[i].clone())
            .zip(capture)
            .collect(),
        has_source: !skip_source,
    };
    Ok(RunOutput {
        scenario: sc,
        plan,
        adc_codes,
        source_record,
        output_record,
        capture,
        capture_adc_events,
        capture_dac_events,
        codes_clipped,
        bits_flipped,
        chain,
    })
}

/// The code held at each grid instant of a block: the latest event whose t_avail_s is at or before the instant.
fn fill_code_column(tb: Timebase, n0: u64, events: &[CodeEvent], last: &mut u32, out: &mut [u32]) {
    let mut i = 0;
    let eps_s = 1e-6 * tb.dt_s(); // as the DAC does: rounding must not move a code by a grid step
    for (j, o) in out.iter_mut().enumerate() {
        let t = tb.time_s(n0 + j as u64);
        while i < events.len() && events[i].t_avail_s <= t + eps_s {
            *last = events[i].code;
            i += 1;
        }
        *o = *last;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn smooth_lengths_have_small_prime_factors_and_stay_close() {
        assert_eq!(smooth_at_most(1798), 1792); // 2^8 x 7
        assert_eq!(smooth_at_most(7192), 7168); // 2^10 x 7
        assert_eq!(smooth_at_most(1024), 1024);
        assert_eq!(smooth_at_most(0), 0);
        for n in [16usize, 97, 1000, 65_537, 999_983, 1 << 20] {
            let m = smooth_at_most(n);
            assert!(m <= n && m as f64 >= 0.95 * n as f64, "{n} -> {m}");
            let mut r = m;
            for p in [2, 3, 5, 7] {
                while r.is_multiple_of(p) {
                    r /= p;
                }
            }
            assert_eq!(r, 1, "{m}");
        }
    }
}
