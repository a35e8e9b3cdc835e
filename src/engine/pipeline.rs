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

use crate::engine::clock::{FifoCrossing, SlipRecord};
use crate::engine::decimate::Decimator;
use crate::engine::plan::{BLOCK, Plan};
use crate::engine::probe::{ExactProbe, GridHistory};
use crate::error::{Error, Result};
use crate::measure::chain::{AdcRecord, GridRecord, RunRecords};
use crate::scenario::{Scenario, Waveform};
use crate::signal::stream::{AnalogRecord, CodeEvent, CodeRecord, Timebase};
use crate::stages::AnalogStage;
use crate::stages::kind::{BuildContext, Runtime, Upstream};
use crate::stages::roles::{BudgetLine, CodeStage, Quantizer, Reconstructor};
use crate::stages::source::SourceGen;

/// Format a value with an SI prefix (for messages and tables).
pub fn si(v: f64, unit: &str) -> String {
    crate::format::units::format_si_table(v, unit)
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
    /// The sink reads only the rows whose grid index is a multiple of this: the code columns are filled at
    /// those rows only (the others hold stale values).
    fn stride(&self) -> u64 {
        1
    }
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

/// One hop's summary, for the report of a chain with hops in series.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct HopSummary {
    /// The hop's ADC and DAC (their labels).
    pub adc: String,
    pub dac: String,
    pub sample_rate_hz: f64,
    /// The sum of the hop's budget lines (its ADC, code stages, DAC and the analog stages after it).
    pub budget_s: f64,
    /// Codes the hop's ADC clipped (a later hop: after `settle`).
    pub codes_clipped: u64,
    /// Slips of the FIFO between the hop's codes and its DAC's own clock (`None`: no clock crossing).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub slips: Option<u64>,
    /// Their instants (s), the first [`SLIP_TIMES_MAX`](crate::engine::clock::SLIP_TIMES_MAX): slip n of the
    /// hop in the `fifo_fill` plot is the n-th.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub slip_times_s: Option<Vec<f64>>,
    /// Packets the hop's network stages lost.
    pub packets_lost: u64,
}

/// Everything a run produced.
pub struct RunOutput {
    /// One summary per hop (empty without a converter).
    pub hops: Vec<HopSummary>,
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
    /// Overloads of a noise-shaping loop (`None` without one).
    pub modulator_overloads: Option<u64>,
    /// Overloads of the DAC's noise-shaping loop (`None` without one).
    pub dac_modulator_overloads: Option<u64>,
    /// The last stretch of a noise-shaping loop's output: (clock, levels at full scale +-1).
    pub modulator_stream: Option<(f64, Vec<f64>)>,
    pub bits_flipped: u64,
    /// What the FIFO between the codes' clock and the DAC's own clock recorded (`None` on a shared clock).
    pub slips: Option<SlipRecord>,
    /// Slips that reach the output inside its analysis record (see [`RecordSlips`]; `None` on a shared clock).
    pub record_slips: Option<RecordSlips>,
    /// Packets lost by the chain's networks, and the instants they should have played (the first
    /// [`LOSS_TIMES_MAX`](crate::stages::network::LOSS_TIMES_MAX), in time order).
    pub packets_lost: u64,
    pub packet_loss_times_s: Vec<f64>,
    /// The latency budget from each stage's own delay: phase delays at the fundamental, or group delays at a
    /// tenth of the output band for broadband sources.
    pub budget: Vec<BudgetLine>,
    /// Gain of the analog stages before the converter at the fundamental (1 without one).
    pub pre_gain: f64,
    /// The built chain (the source, and the DAC's levels for plots).
    pub chain: Chain,
}

impl RunOutput {
    /// The run as the meters read it ([`crate::measure::chain::measure_run`]).
    pub fn records(&self) -> RunRecords<'_> {
        RunRecords {
            analysis: &self.scenario.analysis,
            waveform: &self.scenario.source.waveform,
            frequency_hz: self.plan.frequency_hz,
            adc: match (&self.plan.adc, &self.adc_codes) {
                (Some(p), Some(codes)) => Some(AdcRecord {
                    sample_rate_hz: p.sample_rate_hz,
                    conversion_time_s: p.conversion_time_s,
                    bits: p.bits,
                    range_v: p.range_v,
                    codes,
                }),
                _ => None,
            },
            codes_clipped: self.codes_clipped,
            modulator_overloads: self.modulator_overloads,
            dac_modulator_overloads: self.dac_modulator_overloads,
            bits_flipped: self.bits_flipped,
            slips: self.slips.as_ref(),
            record_slips: self.record_slips,
            packets_lost: self.packets_lost,
            packet_loss_times_s: &self.packet_loss_times_s,
            out_rate_hz: self.plan.out_rate_hz,
            out_band_hz: self.plan.out_band_hz,
            out_wide_band_hz: self.plan.out_wide_band_hz,
            source_record: &self.source_record.volts,
            output_record: &self.output_record.volts,
            capture: GridRecord {
                rate_hz: self.capture.timebase.rate_hz,
                t0_s: self.capture.timebase.time_s(self.capture.n0),
                source: self.capture.source(),
                output: self.capture.output(),
            },
            budget: &self.budget,
            pre_gain: self.pre_gain,
            source: &self.chain.source,
        }
    }
}

/// The built stages.
pub struct Chain {
    pub source: SourceGen,
    /// Analog stages before the first converter (or all of them in an analog-only chain), with their labels.
    pub pre: Vec<(String, Box<dyn AnalogStage>)>,
    /// The hops in series: each a converter group and the analog stages after its DAC (none in an analog-only
    /// chain).
    pub hops: Vec<Hop>,
}

/// One hop: a converter group and the analog stages after its DAC (which feed the next hop's ADC, or the
/// chain's output after the last hop).
pub struct Hop {
    pub converter: Converter,
    /// Analog stages after the DAC.
    pub post: Vec<(String, Box<dyn AnalogStage>)>,
}

/// The converter group, by role: `[hold] quantizer code* reconstructor` (the hold belongs to the quantizer).
pub struct Converter {
    pub quantizer_label: String,
    pub quantizer: Box<dyn Quantizer>,
    pub code: Vec<Box<dyn CodeStage>>,
    pub reconstructor_label: String,
    pub reconstructor: Box<dyn Reconstructor>,
    /// The FIFO the DAC reads through when the codes come paced by another clock.
    pub crossing: Option<FifoCrossing>,
}

/// A ChaCha stream of its own for each stage, derived from the base seed and the stage's index.
pub fn stage_rng(seed: u64, index: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(index + 1);
    rng
}

/// The build context of stage `index` (from 1): its own stream, and the stream of a hold owned by the quantizer
/// that follows it (derived from the quantizer's index, `index + 1`, offset by a million).
pub fn build_context(
    seed: u64,
    index: u64,
    label: &str,
    timebase: Option<Timebase>,
    upstream: Upstream,
) -> BuildContext {
    BuildContext {
        label: label.to_string(),
        timebase,
        rng: stage_rng(seed, index),
        hold_rng: stage_rng(seed, index + 1 + 1_000_000),
        static_bench: timebase.is_none(),
        upstream,
        pending_hold: None,
    }
}

impl Chain {
    /// Build every stage of a checked scenario, each through its kind's description, and sort them by role.
    pub fn build(sc: &Scenario, timebase: Timebase) -> Result<Chain> {
        let seed = sc.simulation.seed;
        let source = SourceGen::new(&sc.source, timebase, seed, &sc.base_dir)?;
        let mut pre: Vec<(String, Box<dyn AnalogStage>)> = Vec::new();
        let mut hops: Vec<Hop> = Vec::new();
        let mut quantizer: Option<(String, Box<dyn Quantizer>)> = None;
        let mut code = Vec::new();
        let mut up = Upstream::default();
        let mut pending_hold = None;
        for (i, stage) in sc.stages.iter().enumerate() {
            let mut ctx = build_context(seed, i as u64 + 1, &stage.label, Some(timebase), up);
            ctx.pending_hold = pending_hold.take();
            let runtime = stage.kind.build(&mut ctx)?;
            pending_hold = ctx.pending_hold.take();
            stage.kind.pass_on(&mut up);
            match runtime {
                Runtime::Analog(a) => match hops.last_mut() {
                    Some(h) => h.post.push((stage.label.clone(), a)),
                    None => pre.push((stage.label.clone(), a)),
                },
                Runtime::Hold => {}
                Runtime::Quantizer(q) => quantizer = Some((stage.label.clone(), q)),
                Runtime::Code(c) => code.push(c),
                Runtime::Reconstructor(r) => {
                    let crossing = r.fifo().map(FifoCrossing::new);
                    let dac_ppm = r.clock_ppm();
                    for s in code.iter_mut() {
                        s.lock_output_clock(dac_ppm);
                    }
                    let (quantizer_label, quantizer) = quantizer.take().ok_or_else(|| {
                        Error::BadInput(format!(
                            "{}: {} needs an ADC before it",
                            sc.origin, stage.label
                        ))
                    })?;
                    hops.push(Hop {
                        converter: Converter {
                            quantizer_label,
                            quantizer,
                            code: std::mem::take(&mut code),
                            reconstructor_label: stage.label.clone(),
                            reconstructor: r,
                            crossing,
                        },
                        post: Vec::new(),
                    });
                }
            }
        }
        Ok(Chain { source, pre, hops })
    }

    /// The first hop's converter (the one most meters and the static bench read), when the chain has one.
    pub fn converter(&self) -> Option<&Converter> {
        self.hops.first().map(|h| &h.converter)
    }

    /// Labels of the analog columns: the source, each analog stage before the first converter, then for each hop
    /// its DAC and the analog stages after it.
    pub fn analog_labels(&self) -> Vec<String> {
        let mut v = vec!["source".to_string()];
        v.extend(self.pre.iter().map(|(l, _)| l.clone()));
        for h in &self.hops {
            v.push(h.converter.reconstructor_label.clone());
            v.extend(h.post.iter().map(|(l, _)| l.clone()));
        }
        v
    }

    /// Labels of the code columns: each hop's ADC codes and DAC input codes.
    pub fn code_labels(&self) -> Vec<String> {
        self.hops
            .iter()
            .flat_map(|h| {
                [
                    format!("{} code", h.converter.quantizer_label),
                    format!("{} code", h.converter.reconstructor_label),
                ]
            })
            .collect()
    }

    /// Hop `h`'s lines of the budget (see [`Chain::budget`]): its ADC, code stages, FIFO, DAC and the analog
    /// stages after it.
    pub fn hop_budget(&self, h: usize, f_hz: Option<f64>, broadband_hz: f64) -> Vec<BudgetLine> {
        let delay = |s: &dyn AnalogStage| match f_hz {
            Some(f) => s.phase_delay_s(f),
            None => s.group_delay_s(broadband_hz),
        };
        let mut lines = Vec::new();
        let h = &self.hops[h];
        let c = &h.converter;
        let mut fs = c.quantizer.sample_rate_hz();
        lines.extend(c.quantizer.budget_at(f_hz.unwrap_or(broadband_hz)));
        for stage in &c.code {
            lines.extend(stage.budget(fs));
            fs = stage.output_rate_hz(fs);
        }
        if let Some(f) = c.reconstructor.fifo() {
            lines.push(BudgetLine {
                stage: format!(
                    "{}: FIFO from the codes' clock to its own (starts at {} of {})",
                    c.reconstructor_label, f.start, f.depth
                ),
                seconds: f.delay_s(fs),
            });
            fs = f.tick_rate_hz;
        }
        lines.extend(c.reconstructor.budget(fs, f_hz.unwrap_or(broadband_hz)));
        for (label, s) in &h.post {
            lines.push(BudgetLine {
                stage: label.clone(),
                seconds: delay(s.as_ref()),
            });
        }
        lines
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
        for h in 0..self.hops.len() {
            lines.extend(self.hop_budget(h, f_hz, broadband_hz));
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
    let n_hops = chain.hops.len();
    let has_conv = n_hops > 0;
    let code_labels = chain.code_labels();
    if let Some(s) = sink.as_deref_mut() {
        s.begin(&labels, &code_labels)?;
    }
    let code_stride = sink.as_deref().map_or(1, |s| s.stride().max(1));
    // Column of each hop's DAC (its post stages follow it), and the column feeding each hop's ADC.
    let mut hop_col = Vec::with_capacity(n_hops);
    let mut next_col = 1 + n_pre;
    for h in &chain.hops {
        hop_col.push(next_col);
        next_col += 1 + h.post.len();
    }

    // A ring of `depth` blocks of every column: hop h renders block b - h - 1 while the front computes block b,
    // so every code due within a block is known before the block is rendered; block b - hops is complete and is
    // handed on.
    let depth = n_hops + 1;
    let mut ring: Vec<Vec<Vec<f64>>> = vec![vec![vec![0.0; BLOCK]; labels.len()]; depth];
    let mut code_ring: Vec<Vec<Vec<u32>>> = if sink.is_some() {
        vec![vec![vec![0; BLOCK]; code_labels.len()]; depth]
    } else {
        vec![Vec::new(); depth]
    };

    // Probe of the first hop: exact source, or a history of the stream entering the converter; later hops read
    // the history of the stream before them.
    let exact = n_pre == 0 && chain.source.is_exact();
    let mut hop_state: Vec<HopState> = chain
        .hops
        .iter()
        .enumerate()
        .map(|(h, hop)| {
            let history = (h > 0 || !exact).then(|| {
                let span_s = hop.converter.quantizer.history_needed_s();
                let cap = (span_s * tb.rate_hz).ceil() as usize + 3 * BLOCK + 16;
                GridHistory::new(tb.rate_hz, cap)
            });
            HopState {
                history,
                k: 0,
                dac_pending: Vec::new(),
                adc_seen: Vec::new(),
                last_adc_code: 0,
                last_dac_code: 0,
                clipped_before_settle: None,
            }
        })
        .collect();

    let mut adc_codes = plan.adc.map(|a| CodeRecord {
        bits: a.bits,
        sample_rate_hz: a.sample_rate_hz,
        codes: Vec::with_capacity(a.record_len),
    });
    let capture_t0_s = tb.time_s(plan.capture_n0);
    let mut capture_adc_events: Vec<CodeEvent> = Vec::new();
    let mut capture_dac_events: Vec<CodeEvent> = Vec::new();
    let mut link_buf_a: Vec<CodeEvent> = Vec::new();
    let mut link_buf_b: Vec<CodeEvent> = Vec::new();

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
    let settle_s = sc.simulation.settle_s;
    let n_blocks = plan.n_total.div_ceil(BLOCK as u64);
    let block_len = |x: u64| (plan.n_total - x * BLOCK as u64).min(BLOCK as u64) as usize;
    let mut last_progress = 0.0;
    for b in 0..n_blocks + n_hops as u64 {
        // ---- front half of block b
        if b < n_blocks {
            let n0 = b * BLOCK as u64;
            let len = block_len(b);
            let front = &mut ring[(b % depth as u64) as usize];
            if !skip_source {
                chain.source.fill(n0, &mut front[0][..len]);
            }
            for i in 0..n_pre {
                let (head, tail) = front.split_at_mut(i + 1);
                chain.pre[i].1.process(&head[i][..len], &mut tail[0][..len]);
            }
        }
        for h in 0..n_hops {
            let hop = &mut chain.hops[h];
            let st = &mut hop_state[h];
            // ---- the hop's ADC reads block b - h of the stream before it
            if let Some(xb) = b.checked_sub(h as u64)
                && xb < n_blocks
            {
                let conv = &mut hop.converter;
                let n0 = xb * BLOCK as u64;
                let len = block_len(xb);
                let t_avail_input = match st.history.as_mut() {
                    Some(hist) => {
                        let slot = &ring[(xb % depth as u64) as usize];
                        hist.push_block(n0, &slot[hop_col[h] - 1][..len]);
                        hist.latest_time_s()
                    }
                    None => tb.time_s(n0 + len as u64 - 1),
                };
                let last_block = xb + 1 == n_blocks;
                loop {
                    let k = st.k;
                    let t_k = conv.quantizer.sample_time_s(k);
                    if t_k >= end_s {
                        break;
                    }
                    let needed = conv.quantizer.latest_input_needed_s(k);
                    if needed > t_avail_input && !last_block {
                        break;
                    }
                    if needed > end_s {
                        break;
                    }
                    if h > 0 && st.clipped_before_settle.is_none() && t_k >= settle_s {
                        st.clipped_before_settle = Some(conv.quantizer.codes_clipped());
                    }
                    let ev = match st.history.as_ref() {
                        Some(hist) => conv.quantizer.convert(k, hist),
                        None => conv.quantizer.convert(
                            k,
                            &ExactProbe {
                                source: &chain.source,
                            },
                        ),
                    };
                    if h == 0 {
                        if let (Some(rec), Some(p)) = (adc_codes.as_mut(), plan.adc.as_ref())
                            && k >= p.k0
                            && rec.codes.len() < p.record_len
                        {
                            rec.codes.push(ev);
                        }
                        if ev.t_sample_s >= capture_t0_s {
                            capture_adc_events.push(ev);
                        }
                    }
                    if sink.is_some() {
                        st.adc_seen.push(ev);
                    }
                    link_buf_a.clear();
                    link_buf_a.push(ev);
                    for link in conv.code.iter_mut() {
                        link_buf_b.clear();
                        for e in link_buf_a.drain(..) {
                            link.push(e, &mut link_buf_b);
                        }
                        std::mem::swap(&mut link_buf_a, &mut link_buf_b);
                    }
                    if let Some(x) = conv.crossing.as_mut() {
                        link_buf_b.clear();
                        for e in link_buf_a.drain(..) {
                            x.push(e, &mut link_buf_b);
                        }
                        std::mem::swap(&mut link_buf_a, &mut link_buf_b);
                    }
                    if h == 0 {
                        capture_dac_events
                            .extend(link_buf_a.iter().filter(|e| e.t_avail_s >= capture_t0_s));
                    }
                    st.dac_pending.append(&mut link_buf_a);
                    st.k += 1;
                }
            }
            // ---- the hop's DAC and the analog stages after it render block b - h - 1
            if let Some(rb) = b.checked_sub(h as u64 + 1)
                && rb < n_blocks
            {
                let n0 = rb * BLOCK as u64;
                let len = block_len(rb);
                let slot = (rb % depth as u64) as usize;
                if sink.is_some() {
                    let codes = &mut code_ring[slot];
                    fill_code_column(
                        tb,
                        n0,
                        code_stride,
                        &st.adc_seen,
                        &mut st.last_adc_code,
                        &mut codes[2 * h][..len],
                    );
                    let used = st
                        .adc_seen
                        .iter()
                        .take_while(|e| e.t_avail_s <= tb.time_s(n0 + len as u64 - 1))
                        .count();
                    st.adc_seen.drain(..used);
                    fill_code_column(
                        tb,
                        n0,
                        code_stride,
                        &st.dac_pending,
                        &mut st.last_dac_code,
                        &mut codes[2 * h + 1][..len],
                    );
                }
                let out = &mut ring[slot];
                let c0 = hop_col[h];
                let used = hop.converter.reconstructor.render(
                    tb,
                    n0,
                    &st.dac_pending,
                    &mut out[c0][..len],
                );
                st.dac_pending.drain(..used);
                for (i, (_, stage)) in hop.post.iter_mut().enumerate() {
                    let (head, tail) = out.split_at_mut(c0 + i + 1);
                    stage.process(&head[c0 + i][..len], &mut tail[0][..len]);
                }
            }
        }

        // ---- block b - hops is complete: hand it on
        if let Some(eb) = b.checked_sub(n_hops as u64) {
            let n0 = eb * BLOCK as u64;
            let len = block_len(eb);
            let slot = (eb % depth as u64) as usize;
            // Columns: source, pre..., then for each hop [dac, post...].
            let mut cols: Vec<&[f64]> = Vec::with_capacity(labels.len());
            for c in ring[slot].iter() {
                cols.push(&c[..len]);
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
                let codes: Vec<&[u32]> = code_ring[slot].iter().map(|c| &c[..len]).collect();
                s.block(tb, n0, &cols, &codes)?;
            }
            let frac = end as f64 / plan.n_total as f64;
            if frac - last_progress >= 0.01 || end == plan.n_total {
                progress(frac);
                last_progress = frac;
            }
        }
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

    // Counts summed over the hops (a noise-shaping loop's stream: the first hop's).
    let sum_opt = |it: &mut dyn Iterator<Item = Option<u64>>| {
        it.fold(None, |acc: Option<u64>, x| match (acc, x) {
            (None, x) => x,
            (a, None) => a,
            (Some(a), Some(x)) => Some(a + x),
        })
    };
    let modulator_overloads =
        sum_opt(&mut chain.hops.iter().map(|h| h.converter.quantizer.overloads()));
    let dac_modulator_overloads = sum_opt(
        &mut chain
            .hops
            .iter()
            .map(|h| h.converter.reconstructor.overloads()),
    );
    let modulator_stream = chain
        .converter()
        .and_then(|c| c.quantizer.modulator_stream());
    // The first hop counts every clipped code; a later hop only those after settle (before it, the hop before
    // it is still starting up from rest).
    let hop_clipped: Vec<u64> = chain
        .hops
        .iter()
        .zip(&hop_state)
        .enumerate()
        .map(|(h, (hop, st))| {
            let all = hop.converter.quantizer.codes_clipped();
            if h == 0 {
                all
            } else {
                all - st.clipped_before_settle.unwrap_or(all)
            }
        })
        .collect();
    let codes_clipped = hop_clipped.iter().sum();
    let bits_flipped = chain
        .hops
        .iter()
        .flat_map(|h| h.converter.code.iter())
        .map(|l| l.bits_flipped())
        .sum();
    let (packets_lost, packet_loss_times_s) = {
        let links = || chain.hops.iter().flat_map(|h| h.converter.code.iter());
        let mut times: Vec<f64> = links()
            .flat_map(|l| l.packet_loss_times_s().iter().copied())
            .collect();
        times.sort_by(f64::total_cmp);
        times.truncate(crate::stages::network::LOSS_TIMES_MAX);
        (links().map(|l| l.packets_lost()).sum(), times)
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
    // What the chain's models say about themselves, as data for the meters.
    let budget = chain.budget(
        plan.frequency_hz,
        plan.out_band_hz.min(tb.rate_hz / 4.0) / 10.0,
    );
    let broadband_hz = plan.out_band_hz.min(tb.rate_hz / 4.0) / 10.0;
    let hops: Vec<HopSummary> = (0..n_hops)
        .map(|h| {
            let c = &chain.hops[h].converter;
            HopSummary {
                adc: c.quantizer_label.clone(),
                dac: c.reconstructor_label.clone(),
                sample_rate_hz: c.quantizer.sample_rate_hz(),
                budget_s: chain
                    .hop_budget(h, plan.frequency_hz, broadband_hz)
                    .iter()
                    .map(|l| l.seconds)
                    .sum(),
                codes_clipped: hop_clipped[h],
                slips: c.crossing.as_ref().map(|x| x.record().slips),
                slip_times_s: c.crossing.as_ref().map(|x| x.record().slip_times_s.clone()),
                packets_lost: c.code.iter().map(|l| l.packets_lost()).sum(),
            }
        })
        .collect();
    let record_slips = slips_in_record(
        chain
            .hops
            .iter()
            .map(|h| h.converter.crossing.as_ref().map(|x| x.record())),
        &hops,
        output_record.t0_s(),
        output_record.t0_s() + output_record.volts.len() as f64 / out_tb.rate_hz,
    );
    let slips = combine_slips(
        chain
            .hops
            .iter()
            .filter_map(|h| h.converter.crossing.as_ref())
            .map(|x| x.record()),
    );
    let pre_gain = plan
        .frequency_hz
        .map(|f| {
            chain
                .pre
                .iter()
                .map(|(_, s)| s.response(f).map(|h| h.norm()).unwrap_or(1.0))
                .product::<f64>()
        })
        .unwrap_or(1.0);
    Ok(RunOutput {
        hops,
        scenario: sc,
        plan,
        adc_codes,
        source_record,
        output_record,
        capture,
        capture_adc_events,
        capture_dac_events,
        codes_clipped,
        modulator_overloads,
        dac_modulator_overloads,
        modulator_stream,
        bits_flipped,
        slips,
        record_slips,
        packets_lost,
        packet_loss_times_s,
        budget,
        pre_gain,
        chain,
    })
}

/// What one hop keeps between blocks while the pipeline runs.
struct HopState {
    /// The grid history of the stream entering the ADC (`None`: the first hop samples the exact source).
    history: Option<GridHistory>,
    /// The next conversion's index.
    k: u64,
    /// Codes on their way to the DAC, by the instant they take effect.
    dac_pending: Vec<CodeEvent>,
    /// ADC codes not yet written to the waveform sink's code column.
    adc_seen: Vec<CodeEvent>,
    last_adc_code: u32,
    last_dac_code: u32,
    /// A later hop's clipped codes before the first conversion after `settle` (while the hop before it starts
    /// up from rest), left out of its count.
    clipped_before_settle: Option<u64>,
}

/// The slips of the clock-crossing FIFOs that reach the output inside its analysis record.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct RecordSlips {
    /// Slips counted inside the record.
    pub count: u64,
    /// A FIFO slipped more often than it kept instants and its last kept instant reaches the output before the
    /// record ends: `count` is then a lower bound.
    pub at_least: bool,
}

/// Count the slips that reach the output within `[t0_s, t1_s)`: each hop's slip instants (at its DAC's FIFO)
/// moved on by the budgets of the hops after it (the analog stages right after its own DAC, tens of
/// microseconds, left out). `fifos` and `hops` are in hop order. `None` when no hop crosses clocks.
pub fn slips_in_record<'a>(
    fifos: impl Iterator<Item = Option<&'a SlipRecord>>,
    hops: &[HopSummary],
    t0_s: f64,
    t1_s: f64,
) -> Option<RecordSlips> {
    let mut out: Option<RecordSlips> = None;
    for (h, rec) in fifos.enumerate() {
        let Some(rec) = rec else { continue };
        let later_s: f64 = hops.iter().skip(h + 1).map(|x| x.budget_s).sum();
        let o = out.get_or_insert(RecordSlips {
            count: 0,
            at_least: false,
        });
        o.count += rec
            .slip_times_s
            .iter()
            .filter(|&&t| (t0_s..t1_s).contains(&(t + later_s)))
            .count() as u64;
        let kept_all = rec.slips <= rec.slip_times_s.len() as u64;
        let last = rec
            .slip_times_s
            .last()
            .map_or(f64::NEG_INFINITY, |t| t + later_s);
        if !kept_all && last < t1_s {
            o.at_least = true;
        }
    }
    out
}

/// The slip records of every hop's FIFO as one: counts summed, instants merged in time order (the first
/// [`SLIP_TIMES_MAX`](crate::engine::clock::SLIP_TIMES_MAX)), the first FIFO's depth and fill. `None` when no hop
/// crosses clocks.
fn combine_slips<'a>(records: impl Iterator<Item = &'a SlipRecord>) -> Option<SlipRecord> {
    let mut out: Option<SlipRecord> = None;
    for r in records {
        match out.as_mut() {
            None => out = Some(r.clone()),
            Some(o) => {
                o.slips += r.slips;
                o.repeated += r.repeated;
                o.dropped += r.dropped;
                let mut both: Vec<(f64, bool)> = o
                    .slip_times_s
                    .iter()
                    .copied()
                    .zip(o.slip_dropped.iter().copied())
                    .chain(
                        r.slip_times_s
                            .iter()
                            .copied()
                            .zip(r.slip_dropped.iter().copied()),
                    )
                    .collect();
                both.sort_by(|a, b| a.0.total_cmp(&b.0));
                both.truncate(crate::engine::clock::SLIP_TIMES_MAX);
                (o.slip_times_s, o.slip_dropped) = both.into_iter().unzip();
            }
        }
    }
    out
}

/// The code held at each grid instant of a block: the latest event whose t_avail_s is at or before the instant.
fn fill_code_column(
    tb: Timebase,
    n0: u64,
    stride: u64,
    events: &[CodeEvent],
    last: &mut u32,
    out: &mut [u32],
) {
    let mut i = 0;
    let eps_s = 1e-6 * tb.dt_s(); // as the DAC does: rounding must not move a code by a grid step
    let advance = |i: &mut usize, last: &mut u32, n: u64| {
        let t = tb.time_s(n);
        while *i < events.len() && events[*i].t_avail_s <= t + eps_s {
            *last = events[*i].code;
            *i += 1;
        }
    };
    let mut j = ((stride - n0 % stride) % stride) as usize;
    while j < out.len() {
        advance(&mut i, last, n0 + j as u64);
        out[j] = *last;
        j += stride as usize;
    }
    // The code at the block's last sample carries into the next block, as if every row had been filled.
    if let Some(end) = out.len().checked_sub(1) {
        advance(&mut i, last, n0 + end as u64);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn code_columns_filled_at_a_stride_match_every_row_filled() {
        let tb = Timebase::new(1000.0);
        let events: Vec<CodeEvent> = (0..40)
            .map(|k| CodeEvent {
                t_sample_s: k as f64 * 0.0037,
                t_avail_s: k as f64 * 0.0037 + 0.0005,
                code: 100 + k,
            })
            .collect();
        for stride in [1u64, 3, 7, 10] {
            let (mut last_all, mut last_some) = (0, 0);
            for b in 0..12u64 {
                let n0 = b * 13;
                let mut all = vec![0; 13];
                let mut some = vec![u32::MAX; 13];
                fill_code_column(tb, n0, 1, &events, &mut last_all, &mut all);
                fill_code_column(tb, n0, stride, &events, &mut last_some, &mut some);
                for j in 0..13 {
                    if (n0 + j as u64).is_multiple_of(stride) {
                        assert_eq!(some[j], all[j], "stride {stride}, row {}", n0 + j as u64);
                    } else if stride > 1 {
                        assert_eq!(some[j], u32::MAX);
                    }
                }
                assert_eq!(last_some, last_all);
            }
            assert!(last_all > 100);
        }
    }
}
