//! Converter clocks: the `clock_ppm` key every ADC and DAC kind reads, and the FIFO that carries codes across
//! two clocks.
//!
//! A converter's clock runs `clock_ppm` parts per million fast (negative: slow) against its nominal rate: every
//! duration it counts (sample period, conversion time, latency cycles) shrinks by `1 + ppm 1e-6`. When the codes
//! reaching a DAC are paced by a clock other than its own (an ADC of another offset, with no asynchronous
//! `resample` between them), the DAC takes them from a FIFO at its own ticks. The FIFO starts its reader when it
//! holds `fifo_start` codes; afterwards, a tick that finds it empty repeats the last code, and a code that
//! finds it full is dropped: both are slips of one sample, counted and timed ([`SlipRecord`]). Over a run of
//! `T` seconds at rate `f` with offset `d` (ppm) between the clocks, the FIFO drifts by `d 1e-6 f T` samples;
//! once its headroom is used up, each further sample of drift is one slip.

use std::collections::VecDeque;

use serde::Serialize;

use crate::format::reader::{ScenarioError, TableReader};
use crate::signal::stream::CodeEvent;

/// Largest clock offset accepted (ppm): 1 %, far beyond any crystal or resonator.
pub const CLOCK_PPM_MAX: f64 = 1e4;
/// Slip instants kept in the report (the first ones).
pub const SLIP_TIMES_MAX: usize = 1000;
/// Points of the FIFO fill trace kept for the plot (the stride doubles when it fills).
pub const FILL_TRACE_MAX: usize = 4096;

/// The factor a clock of `ppm` runs fast by.
pub fn clock_scale(ppm: f64) -> f64 {
    1.0 + ppm * 1e-6
}

/// For `skip_serializing_if`: a converter on its nominal clock leaves `clock_ppm` out of the echo.
pub fn is_zero(x: &f64) -> bool {
    *x == 0.0
}

/// Read `clock_ppm` (a plain number of ppm, default 0).
pub fn read_clock_ppm(r: &mut TableReader<'_, '_>) -> Result<f64, ScenarioError> {
    match r.number("clock_ppm")? {
        None => Ok(0.0),
        Some(q) if q.value.abs() > CLOCK_PPM_MAX => Err(r
            .error(
                &q.span,
                "clock_ppm",
                format!("must be within +-{CLOCK_PPM_MAX} ppm, found {}", q.value),
            )
            .with_hint("write the clock's frequency offset in ppm, e.g. clock_ppm = 50")),
        Some(q) => Ok(q.value),
    }
}

/// A DAC's clock keys: its offset and the FIFO it reads codes from when they come paced by another clock.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DacClockCfg {
    #[serde(skip_serializing_if = "is_zero")]
    pub clock_ppm: f64,
    /// FIFO depth (codes).
    #[serde(skip)]
    pub fifo: u32,
    /// Codes in the FIFO when the DAC's clock starts reading it.
    #[serde(skip)]
    pub fifo_start: u32,
    /// Resolved: the codes arrive paced by another clock, so the DAC reads them through the FIFO.
    #[serde(skip)]
    pub crossing: bool,
    /// Resolved: the nominal rate of the codes arriving (Hz; 0 before resolving).
    #[serde(skip)]
    pub nominal_rate_hz: f64,
}

/// Default FIFO depth (codes).
pub const FIFO_DEFAULT: u32 = 8;

impl Default for DacClockCfg {
    /// On its nominal clock, with an 8-code FIFO that starts half full.
    fn default() -> Self {
        DacClockCfg {
            clock_ppm: 0.0,
            fifo: FIFO_DEFAULT,
            fifo_start: FIFO_DEFAULT / 2,
            crossing: false,
            nominal_rate_hz: 0.0,
        }
    }
}

/// The keys [`read_dac_clock`] reads, for a DAC kind's parameter list.
pub const DAC_CLOCK_PARAMS: [crate::stages::kind::Param; 3] = [
    crate::stages::kind::Param::spread_number("clock_ppm"),
    crate::stages::kind::Param::fixed("fifo", crate::stages::kind::ParamKind::Integer),
    crate::stages::kind::Param::fixed("fifo_start", crate::stages::kind::ParamKind::Integer),
];

/// Read a DAC's `clock_ppm`, `fifo` and `fifo_start`.
pub fn read_dac_clock(r: &mut TableReader<'_, '_>) -> Result<DacClockCfg, ScenarioError> {
    let clock_ppm = read_clock_ppm(r)?;
    let fifo = r
        .integer("fifo", 2, 1 << 20)?
        .map_or(FIFO_DEFAULT, |q| q.value as u32);
    let fifo_start = match r.integer("fifo_start", 1, 1 << 20)? {
        Some(q) if q.value as u32 > fifo => {
            return Err(r
                .error(
                    &q.span,
                    "fifo_start",
                    format!("must be at most fifo ({fifo}), found {}", q.value),
                )
                .with_hint("the FIFO starts its reader when it holds this many codes"));
        }
        Some(q) => q.value as u32,
        None => fifo / 2,
    };
    Ok(DacClockCfg {
        clock_ppm,
        fifo,
        fifo_start,
        crossing: false,
        nominal_rate_hz: 0.0,
    })
}

impl DacClockCfg {
    /// Resolve against the codes arriving: a FIFO when they come paced by a clock of another offset (and not
    /// already on this DAC's clock, as after an asynchronous `resample`).
    pub fn resolve(&mut self, up: &crate::stages::kind::Upstream) {
        self.nominal_rate_hz = up.sample_rate_hz.unwrap_or(0.0);
        self.crossing =
            up.sample_rate_hz.is_some() && !up.clock_follows_dac && up.clock_ppm != self.clock_ppm;
    }

    /// The DAC's tick rate (Hz): the nominal rate of the codes arriving on its own clock.
    pub fn tick_rate_hz(&self) -> f64 {
        self.nominal_rate_hz * clock_scale(self.clock_ppm)
    }

    /// The FIFO the DAC reads through, when it crosses clocks.
    pub fn fifo_timing(&self) -> Option<FifoTiming> {
        self.crossing.then(|| FifoTiming {
            depth: self.fifo,
            start: self.fifo_start,
            tick_rate_hz: self.tick_rate_hz(),
        })
    }

    /// Add the FIFO keys to a configuration echo when the DAC crosses clocks.
    pub fn echo_into(&self, v: &mut serde_json::Value) {
        if self.crossing {
            v["fifo"] = serde_json::json!(self.fifo);
            v["fifo_start"] = serde_json::json!(self.fifo_start);
            v["tick_rate_hz"] = serde_json::json!(self.tick_rate_hz());
        }
    }
}

/// A FIFO between two clocks, as the engine runs it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FifoTiming {
    pub depth: u32,
    pub start: u32,
    /// The reader's tick rate (Hz).
    pub tick_rate_hz: f64,
}

impl FifoTiming {
    /// Delay through the FIFO (s) for codes arriving at `arrival_rate_hz`: the reader starts when `start` codes
    /// are in, so the first code waits `start - 1` arrival periods; on equal rates every code waits as long.
    pub fn delay_s(&self, arrival_rate_hz: f64) -> f64 {
        f64::from(self.start.saturating_sub(1)) / arrival_rate_hz
    }
}

/// What a FIFO between clocks recorded.
#[derive(Debug, Clone, PartialEq, Default, Serialize)]
pub struct SlipRecord {
    /// Slips: codes repeated (FIFO empty at a tick) plus codes dropped (FIFO full at an arrival).
    pub slips: u64,
    pub repeated: u64,
    pub dropped: u64,
    /// Instants of the first [`SLIP_TIMES_MAX`] slips (s).
    pub slip_times_s: Vec<f64>,
    /// For each instant in `slip_times_s`: true where a code was dropped (the FIFO full), false where one was
    /// repeated (the FIFO empty).
    #[serde(skip)]
    pub slip_dropped: Vec<bool>,
    /// FIFO depth (codes).
    pub depth: u32,
    /// The fill over time: (instant, lowest fill, highest fill) over each stretch of ticks.
    #[serde(skip)]
    pub fill: Vec<(f64, u32, u32)>,
}

/// The FIFO between the codes arriving and a DAC's own clock. Codes must be pushed in order of arrival.
#[derive(Debug, Clone)]
pub struct FifoCrossing {
    timing: FifoTiming,
    queue: VecDeque<CodeEvent>,
    /// The reader's first tick (the arrival that brought the fill to `start`).
    t0_s: Option<f64>,
    next_tick: u64,
    record: SlipRecord,
    /// Ticks per fill-trace point, and the fill range over the stretch being gathered.
    stride: u64,
    lo: u32,
    hi: u32,
}

impl FifoCrossing {
    pub fn new(timing: FifoTiming) -> FifoCrossing {
        FifoCrossing {
            timing,
            queue: VecDeque::with_capacity(timing.depth as usize + 1),
            t0_s: None,
            next_tick: 0,
            record: SlipRecord {
                depth: timing.depth,
                ..SlipRecord::default()
            },
            stride: 1,
            lo: u32::MAX,
            hi: 0,
        }
    }

    fn tick_time_s(&self, j: u64) -> f64 {
        self.t0_s.unwrap_or(0.0) + j as f64 / self.timing.tick_rate_hz
    }

    fn slip(&mut self, t_s: f64, dropped: bool) {
        self.record.slips += 1;
        if self.record.slip_times_s.len() < SLIP_TIMES_MAX {
            self.record.slip_times_s.push(t_s);
            self.record.slip_dropped.push(dropped);
        }
    }

    fn note_fill(&mut self) {
        let f = self.queue.len() as u32;
        self.lo = self.lo.min(f);
        self.hi = self.hi.max(f);
    }

    /// Run the reader's ticks before `t_s`, pushing the codes it takes (re-timed to the ticks) to `out`.
    pub fn advance_to(&mut self, t_s: f64, out: &mut Vec<CodeEvent>) {
        if self.t0_s.is_none() {
            return;
        }
        loop {
            let t_tick = self.tick_time_s(self.next_tick);
            if t_tick >= t_s {
                break;
            }
            match self.queue.pop_front() {
                Some(e) => out.push(CodeEvent {
                    t_avail_s: t_tick,
                    ..e
                }),
                None => {
                    // Empty: the DAC holds (repeats) its last code.
                    self.record.repeated += 1;
                    self.slip(t_tick, false);
                }
            }
            self.note_fill();
            self.next_tick += 1;
            if self.next_tick.is_multiple_of(self.stride) {
                self.record.fill.push((t_tick, self.lo, self.hi));
                self.lo = u32::MAX;
                self.hi = 0;
                if self.record.fill.len() >= FILL_TRACE_MAX {
                    // Keep every other point (merging ranges) and gather twice as many ticks per point.
                    let merged: Vec<(f64, u32, u32)> = self
                        .record
                        .fill
                        .chunks(2)
                        .map(|c| {
                            let last = c[c.len() - 1];
                            let lo = c.iter().map(|p| p.1).min().unwrap_or(0);
                            let hi = c.iter().map(|p| p.2).max().unwrap_or(0);
                            (last.0, lo, hi)
                        })
                        .collect();
                    self.record.fill = merged;
                    self.stride *= 2;
                }
            }
        }
    }

    /// A code arrives (at its `t_avail_s`): the ticks before it run first, then it enters the FIFO (or is
    /// dropped when the FIFO is full).
    pub fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        self.advance_to(ev.t_avail_s, out);
        if self.queue.len() >= self.timing.depth as usize {
            self.record.dropped += 1;
            self.slip(ev.t_avail_s, true);
        } else {
            self.queue.push_back(ev);
        }
        self.note_fill();
        if self.t0_s.is_none() && self.queue.len() >= self.timing.start as usize {
            self.t0_s = Some(ev.t_avail_s);
        }
    }

    pub fn record(&self) -> &SlipRecord {
        &self.record
    }

    pub fn into_record(self) -> SlipRecord {
        self.record
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn arrivals(n: usize, rate_hz: f64, latency_s: f64) -> Vec<CodeEvent> {
        (0..n)
            .map(|k| CodeEvent {
                t_sample_s: k as f64 / rate_hz,
                t_avail_s: k as f64 / rate_hz + latency_s,
                code: k as u32,
            })
            .collect()
    }

    fn cross(evs: &[CodeEvent], timing: FifoTiming) -> (Vec<CodeEvent>, SlipRecord) {
        let mut c = FifoCrossing::new(timing);
        let mut out = Vec::new();
        for e in evs {
            c.push(*e, &mut out);
        }
        (out, c.into_record())
    }

    #[test]
    fn equal_clocks_pass_every_code_once_with_a_fixed_delay_and_no_slip() {
        let fs = 48e3;
        let evs = arrivals(10_000, fs, 3e-6);
        let timing = FifoTiming {
            depth: 8,
            start: 4,
            tick_rate_hz: fs,
        };
        let (out, rec) = cross(&evs, timing);
        assert_eq!(rec.slips, 0);
        assert!(out.len() >= evs.len() - 4);
        for (o, e) in out.iter().zip(&evs) {
            assert_eq!(o.code, e.code);
            // By construction: the reader starts with the fourth arrival, three periods after the first.
            let d = o.t_avail_s - e.t_avail_s;
            assert!((d - timing.delay_s(fs)).abs() < 1e-9, "{d}");
        }
    }

    #[test]
    fn a_fast_reader_repeats_and_a_slow_one_drops_one_code_per_sample_of_drift() {
        // By construction: over n arrivals at f the reader at f (1 + d) ticks n d more (or fewer) times; the
        // FIFO absorbs its headroom (start - 1 below, depth - start above) and every further tick is a slip.
        let fs = 48e3;
        let n = 480_000; // 10 s
        let evs = arrivals(n, fs, 0.0);
        for (ppm, headroom) in [(100.0, 3.0), (-100.0, 4.0), (500.0, 3.0)] {
            let timing = FifoTiming {
                depth: 8,
                start: 4,
                tick_rate_hz: fs * clock_scale(ppm),
            };
            let (out, rec) = cross(&evs, timing);
            let drift = ppm.abs() * 1e-6 * n as f64;
            let want = drift - headroom;
            assert!(
                (rec.slips as f64 - want).abs() <= 1.0,
                "{ppm} ppm: {} slips, {want} expected",
                rec.slips
            );
            if ppm > 0.0 {
                assert_eq!(rec.dropped, 0);
            } else {
                assert_eq!(rec.repeated, 0);
            }
            // Every code taken once, in order, none invented.
            assert!(out.windows(2).all(|w| w[1].code > w[0].code));
            assert!(rec.fill.len() <= FILL_TRACE_MAX);
            assert!(rec.fill.iter().all(|p| p.2 <= 8));
            assert_eq!(
                rec.slip_times_s.len(),
                (rec.slips as usize).min(SLIP_TIMES_MAX)
            );
            // Each recorded slip says what it did: all drops for a slow reader, all repeats for a fast one.
            assert_eq!(rec.slip_dropped.len(), rec.slip_times_s.len());
            assert!(rec.slip_dropped.iter().all(|&d| d == (ppm < 0.0)));
        }
    }
}
