//! The successive-approximation (SAR) converter.
//!
//! A conversion k starts at its nominal sampling instant t_k. Bit trial i (MSB first, i = 0..bits-1) is
//! decided at t_k + (i + 1)/clock by a comparator: it keeps the trial bit when
//! `input + dither + comparator offset + comparator noise >= internal DAC level of the trial code`.
//! The code is available at t_k + conversion_time.
//!
//! Internally the comparison is done in LSB units, u = (v - low)/q with q = (high - low)/2^bits, against the
//! trial level of the internal DAC in LSB units: the sum of the trial weights, less half an LSB for the
//! centred transfer (`transfer = "centred"`, the default: the internal DAC's levels are offset by half an LSB)
//! or as is for the truncating one. With nominal weights 2^(bits-1-i) the centred result is code k for
//! u in [k - 1/2, k + 1/2), clipped to 0..2^bits - 1: the ideal transfer of IEEE Std 1241 (code k centred on
//! low + k q, its transitions half an LSB either side), and the truncating result is `floor(u)` clipped; both
//! are [`SarAdc::ideal_code`].
//!
//! Capacitor mismatch follows a charge-redistribution array: bit i is made of 2^(bits-1-i) unit capacitors
//! and one more unit capacitor terminates the array (2^bits units in all). Each unit has a relative sigma
//! `capacitor_mismatch`, so bit i's capacitor has relative sigma `mismatch / sqrt(units)`. The DAC level of a
//! code is (its capacitance / total actual capacitance) x full scale: the whole array always spans the
//! nominal range, and the errors show up as INL/DNL rather than as gain error.

use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use serde::Serialize;

use crate::signal::stream::CodeEvent;
use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::{Dimension, format_si};
use crate::stages::Probe;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ParamKind, QuantizerTiming, Rates,
    ReadContext, Role, Runtime, Upstream, mechanism,
};
use crate::stages::roles::{BudgetLine, Hold, Quantizer};
use crate::stages::sample_hold::SampleHold;

/// What a SAR converter compares during its bit trials.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum AdcInput {
    /// The value captured at the sampling instant (from an upstream `sample_hold`, or an ideal one).
    Held,
    /// No hold: each bit trial compares the input at the moment of that trial.
    Live,
}

/// Dither added before quantisation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum DitherKind {
    None,
    /// Rectangular PDF, `dither_lsb` peak-to-peak.
    Rpdf,
    /// Triangular PDF, `dither_lsb` peak-to-peak.
    Tpdf,
}

/// Where the ideal transfer puts its transitions.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Transfer {
    /// IEEE Std 1241's ideal transfer: code k covers low + (k - 1/2) q .. low + (k + 1/2) q, so the ideal DAC's
    /// level for k (low + k q) sits in the middle of the code.
    Centred,
    /// A plain truncating comparator chain: code k covers low + k q .. low + (k + 1) q (a -1/2 LSB offset
    /// against the centred transfer).
    Truncating,
}

impl Transfer {
    /// How far below the sum of the trial weights the internal DAC's trial level sits (LSB).
    pub fn trial_shift_lsb(self) -> f64 {
        match self {
            Transfer::Centred => 0.5,
            Transfer::Truncating => 0.0,
        }
    }
}

/// `kind = "sar_adc"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SarAdcCfg {
    pub bits: u32,
    /// Input range `[low, high]` (V); q = (high - low) / 2^bits.
    pub range_v: (f64, f64),
    /// Bit-trial clock (resolved: given, or `cycles / conversion_time`).
    pub clock_hz: f64,
    /// Clock cycles per conversion (default bits + 1).
    pub cycles: u32,
    /// Time from the sampling instant until the code is available (resolved: given, or `cycles / clock`).
    pub conversion_time_s: f64,
    /// None = free-running: the next conversion starts when the previous one ends.
    pub sample_rate_hz: Option<f64>,
    pub input: AdcInput,
    pub comparator_offset_v: f64,
    /// Rms of Gaussian noise added to each comparison.
    pub comparator_noise_v: f64,
    /// Relative sigma of each unit capacitor of the internal DAC.
    pub capacitor_mismatch: f64,
    pub dither: DitherKind,
    /// Dither size, LSB peak-to-peak.
    pub dither_lsb: f64,
    /// Centred (IEEE Std 1241 ideal transfer, the default) or truncating.
    pub transfer: Transfer,
    /// Rms of the reference's noise (V), drawn once per conversion: the range's span (the reference) becomes
    /// span + e, scaling every trial level by (1 + e / span). 0 = a quiet reference.
    pub reference_noise_v: f64,
    /// The scenario gave `clock` (rather than `conversion_time`): an ablation that speeds the converter up
    /// edits the key that was written.
    #[serde(skip)]
    pub clock_given: bool,
    /// Offset of the converter's clock from nominal (ppm; see [`crate::engine::clock`]).
    #[serde(skip_serializing_if = "crate::engine::clock::is_zero")]
    pub clock_ppm: f64,
}

impl SarAdcCfg {
    /// The rate at which conversions start.
    pub fn effective_sample_rate_hz(&self) -> f64 {
        self.sample_rate_hz.unwrap_or(1.0 / self.conversion_time_s)
    }
    /// The timing on the converter's own clock: every rate `1 + clock_ppm 1e-6` times its nominal value,
    /// every duration divided by it (the same configuration when `clock_ppm` is 0).
    pub fn clocked(&self) -> SarAdcCfg {
        let s = crate::engine::clock::clock_scale(self.clock_ppm);
        SarAdcCfg {
            clock_hz: self.clock_hz * s,
            conversion_time_s: self.conversion_time_s / s,
            sample_rate_hz: self.sample_rate_hz.map(|f| f * s),
            ..*self
        }
    }
    /// One LSB (volts).
    pub fn lsb_v(&self) -> f64 {
        (self.range_v.1 - self.range_v.0) / f64::powi(2.0, self.bits as i32)
    }
}

/// Bits of a converter, link or DAC word.
pub const MAX_BITS: i128 = 24;

impl KindSpec for SarAdcCfg {
    const NAME: &'static str = "sar_adc";
    const ROLE: Role = Role::Quantizer;
    const EXAMPLE: &'static str = r#"bits = 10
range = ["-2.5 V", "2.5 V"]
sample_rate = "48 kHz"
conversion_time = "11 us"
comparator_noise = "0.5 mV""#;
    const PARAMS: &'static [Param] = {
        use Dimension as D;
        &[
            Param::fixed("bits", ParamKind::Integer),
            Param::fixed("range", ParamKind::Pair(D::Voltage)),
            Param::fixed("cycles", ParamKind::Integer),
            Param::spread("clock", D::Frequency),
            Param::spread("conversion_time", D::Time),
            Param::spread("sample_rate", D::Frequency),
            Param::fixed("input", ParamKind::Choice(&["held", "live"])),
            Param::spread("comparator_offset", D::Voltage),
            Param::spread("comparator_noise", D::Voltage),
            Param::spread("capacitor_mismatch", D::Ratio),
            Param::fixed("dither", ParamKind::Choice(&["none", "rpdf", "tpdf"])),
            Param::spread("dither_lsb", D::Ratio),
            Param::fixed("transfer", ParamKind::Choice(&["centred", "truncating"])),
            Param::spread("reference_noise", D::Voltage),
            Param::spread_number("clock_ppm"),
        ]
    };

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        read_sar(r)
    }

    fn resolve(&mut self, up: &mut Upstream) {
        up.set_quantizer(
            self.bits,
            self.range_v,
            self.effective_sample_rate_hz(),
            self.clock_ppm,
        );
    }

    fn ablations(&self) -> Vec<Ablation> {
        let mut out = Vec::new();
        if self.input == AdcInput::Live {
            out.push(Ablation::new(
                mechanism::<Self>("input"),
                "input = \"held\" (live -> held)",
                vec![KeyEdit::SetStr("input", "held")],
            ));
        }
        out.extend(Ablation::zeroed::<Self>(&[
            ("comparator_noise", self.comparator_noise_v),
            ("capacitor_mismatch", self.capacitor_mismatch),
        ]));
        // Sampling ten times faster with the whole conversion ten times faster too (on the key that was written),
        // so the conversion keeps its share of the period and the hold its time to acquire. (Shortening the
        // conversion only to the new period left the hold no time to track: its output was meaningless.)
        let fs10 = 10.0 * self.effective_sample_rate_hz();
        let mut edits = vec![KeyEdit::Set("sample_rate", fs10)];
        if self.clock_given {
            edits.push(KeyEdit::Set("clock", 10.0 * self.clock_hz));
        } else {
            edits.push(KeyEdit::Set(
                "conversion_time",
                self.conversion_time_s / 10.0,
            ));
        }
        out.push(Ablation::new(
            mechanism::<Self>("sample_rate"),
            format!(
                "sample_rate raised tenfold to {} (conversion ten times shorter)",
                format_si(fs10, "Hz")
            ),
            edits,
        ));
        out
    }

    fn rates(&self) -> Rates {
        Rates {
            lowpass_hz: Some(self.effective_sample_rate_hz()),
            highpass_hz: None,
        }
    }

    fn quantizer_timing(&self) -> Option<QuantizerTiming> {
        let c = self.clocked();
        Some(QuantizerTiming {
            sample_rate_hz: c.effective_sample_rate_hz(),
            conversion_time_s: c.conversion_time_s,
            bits: self.bits,
            range_v: self.range_v,
            clock_ppm: self.clock_ppm,
        })
    }

    fn has_static_levels(&self) -> bool {
        self.bits >= 2
    }

    fn echo(&self) -> serde_json::Value {
        let mut v = serde_json::to_value(self).unwrap_or(serde_json::Value::Null);
        v["sample_rate_hz"] = serde_json::json!(self.effective_sample_rate_hz());
        v["free_running"] = serde_json::json!(self.sample_rate_hz.is_none());
        v["lsb_v"] = serde_json::json!(self.lsb_v());
        v
    }

    /// The quantizer owns the hold read just before it, or an ideal one.
    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let hold: Box<dyn Hold> = match ctx.pending_hold.take() {
            Some(h) => h,
            None => Box::new(SampleHold::ideal()),
        };
        Ok(Runtime::Quantizer(Box::new(SarQuantizer {
            adc: SarAdc::new(&self.clocked(), ctx.rng.clone()),
            hold,
            label: ctx.label.clone(),
        })))
    }
}

fn read_sar(r: &mut TableReader<'_, '_>) -> std::result::Result<SarAdcCfg, ScenarioError> {
    use Dimension as D;
    let bits = r
        .integer("bits", 1, MAX_BITS)?
        .ok_or_else(|| r.missing("bits", "12"))?
        .value as u32;
    let range_v = r
        .pair("range", D::Voltage)?
        .ok_or_else(|| r.missing("range", "[\"0 V\", \"5 V\"]"))?
        .value;
    let cycles_at = r.integer("cycles", 1, 10_000)?;
    let cycles = cycles_at.as_ref().map_or(bits + 1, |c| c.value as u32);
    if let Some(c) = &cycles_at
        && c.value < i128::from(bits)
    {
        return Err(r
            .error(
                &c.span,
                "cycles",
                format!(
                    "a {bits}-bit SAR needs at least {bits} cycles (one per bit), found {}",
                    c.value
                ),
            )
            .with_hint(format!(
                "use cycles = {} (one per bit plus one to sample)",
                bits + 1
            )));
    }
    let clock = r.positive("clock", D::Frequency)?;
    let conv = r.positive("conversion_time", D::Time)?;
    let (clock_hz, conversion_time_s) = match (&clock, &conv) {
        (Some(_), Some(ct)) => {
            return Err(r
                .error(
                    &ct.span,
                    "conversion_time",
                    "give clock or conversion_time, not both",
                )
                .with_hint("remove one: conversion_time = cycles / clock"));
        }
        (Some(c), None) => (c.value, f64::from(cycles) / c.value),
        (None, Some(ct)) => (f64::from(cycles) / ct.value, ct.value),
        (None, None) => {
            return Err(r
                .missing("clock", "\"1 MHz\"")
                .with_hint("give the bit-trial clock (clock = \"1 MHz\") or the conversion time (conversion_time = \"10 us\")"));
        }
    };
    let sample_rate = r.positive("sample_rate", D::Frequency)?;
    if let Some(sr) = &sample_rate {
        let max_rate = 1.0 / conversion_time_s;
        // A relative tolerance so that e.g. 100 kSPS with a 10 us conversion is accepted despite rounding.
        if sr.value > max_rate * (1.0 + 1e-9) {
            let faster = if clock.is_some() {
                format!(
                    "raise clock to at least {}",
                    format_si(f64::from(cycles) * sr.value, "Hz")
                )
            } else {
                format!(
                    "shorten conversion_time to at most {}",
                    format_si(1.0 / sr.value, "s")
                )
            };
            return Err(r
                .error(
                    &sr.span,
                    "sample_rate",
                    format!(
                        "sample_rate {} is faster than the converter allows: one conversion takes {} ({} cycles at {}), so \
                         at most {}",
                        format_si(sr.value, "Hz"),
                        format_si(conversion_time_s, "s"),
                        cycles,
                        format_si(clock_hz, "Hz"),
                        format_si(max_rate, "Hz")
                    ),
                )
                .with_hint(format!("lower sample_rate to at most {}, or {faster}", format_si(max_rate, "Hz"))));
        }
    }
    let input = r
        .choice(
            "input",
            &[("held", AdcInput::Held), ("live", AdcInput::Live)],
        )?
        .map_or(AdcInput::Held, |q| q.value);
    let comparator_offset_v = r
        .quantity("comparator_offset", D::Voltage)?
        .map_or(0.0, |q| q.value);
    let comparator_noise_v = r.non_negative("comparator_noise", D::Voltage)?;
    let capacitor_mismatch = r.non_negative("capacitor_mismatch", D::Ratio)?;
    let dither = r
        .choice(
            "dither",
            &[
                ("none", DitherKind::None),
                ("rpdf", DitherKind::Rpdf),
                ("tpdf", DitherKind::Tpdf),
            ],
        )?
        .map_or(DitherKind::None, |q| q.value);
    let dither_lsb = match (r.number("dither_lsb")?, dither) {
        (Some(d), DitherKind::None) => {
            return Err(r
                .error(&d.span, "dither_lsb", "has no effect without dither")
                .with_hint("set dither = \"rpdf\" or \"tpdf\", or remove dither_lsb"));
        }
        (Some(d), _) if d.value < 0.0 => {
            return Err(r.error(&d.span, "dither_lsb", "must not be negative"));
        }
        (Some(d), _) => d.value,
        (None, DitherKind::None) => 0.0,
        (None, DitherKind::Rpdf) => 1.0,
        (None, DitherKind::Tpdf) => 2.0,
    };
    let transfer = r
        .choice(
            "transfer",
            &[
                ("centred", Transfer::Centred),
                ("truncating", Transfer::Truncating),
            ],
        )?
        .map_or(Transfer::Centred, |q| q.value);
    let reference_noise_v = r.non_negative("reference_noise", D::Voltage)?;
    Ok(SarAdcCfg {
        bits,
        range_v,
        clock_hz,
        cycles,
        conversion_time_s,
        sample_rate_hz: sample_rate.map(|q| q.value),
        input,
        comparator_offset_v,
        comparator_noise_v,
        capacitor_mismatch,
        dither,
        dither_lsb,
        transfer,
        reference_noise_v,
        clock_given: clock.is_some(),
        clock_ppm: crate::engine::clock::read_clock_ppm(r)?,
    })
}

/// The SAR converter stage.
pub struct SarAdc {
    cfg: SarAdcCfg,
    rng: ChaCha8Rng,
    /// Trial weight of bit i (MSB first), in nominal LSB.
    weights_lsb: Vec<f64>,
    clipped: u64,
}

impl SarAdc {
    /// Build the converter, drawing the capacitor mismatch (if any) from `rng`, which then also provides
    /// dither and comparator noise.
    ///
    /// # Panics
    /// If `bits` is not in 1..=32 (the scenario checker guarantees it).
    pub fn new(cfg: &SarAdcCfg, mut rng: ChaCha8Rng) -> SarAdc {
        let n = cfg.bits;
        assert!((1..=32).contains(&n), "SAR bits must be 1..=32");
        let mut weights_lsb: Vec<f64> =
            (0..n).map(|i| f64::powi(2.0, (n - 1 - i) as i32)).collect();
        if cfg.capacitor_mismatch > 0.0 {
            let sigma = cfg.capacitor_mismatch;
            let mut caps: Vec<f64> = weights_lsb
                .iter()
                .map(|&units| {
                    let z: f64 = StandardNormal.sample(&mut rng);
                    units + sigma * units.sqrt() * z
                })
                .collect();
            let z: f64 = StandardNormal.sample(&mut rng);
            let dummy = 1.0 + sigma * z;
            let total: f64 = caps.iter().sum::<f64>() + dummy;
            let full = f64::powi(2.0, n as i32);
            for c in &mut caps {
                *c *= full / total;
            }
            weights_lsb = caps;
        }
        SarAdc {
            cfg: *cfg,
            rng,
            weights_lsb,
            clipped: 0,
        }
    }

    /// Nominal sampling instant of conversion `k` (s): `k / sample_rate`, or `k * conversion_time` when
    /// free-running. Computed from `k`, never accumulated.
    pub fn sample_time_s(&self, k: u64) -> f64 {
        match self.cfg.sample_rate_hz {
            Some(rate) => k as f64 / rate,
            None => k as f64 * self.cfg.conversion_time_s,
        }
    }

    /// Latest input instant (s) conversion `k` may need: `t_k + sh_lookahead_s` for a held input (the hold's
    /// look-ahead, [`SampleHold::lookahead_s`]), `t_k + bits/clock` for a live input.
    pub fn latest_input_needed_s(&self, k: u64, sh_lookahead_s: f64) -> f64 {
        let t_k = self.sample_time_s(k);
        match self.cfg.input {
            AdcInput::Held => t_k + sh_lookahead_s,
            AdcInput::Live => t_k + self.cfg.bits as f64 / self.cfg.clock_hz,
        }
    }

    /// Dither for one conversion, in LSB.
    fn draw_dither_lsb(&mut self) -> f64 {
        let size = self.cfg.dither_lsb;
        let mut uniform = |half_width: f64| -> f64 {
            let z: f64 = rand::RngExt::random(&mut self.rng); // [0, 1)
            (2.0 * z - 1.0) * half_width
        };
        match self.cfg.dither {
            DitherKind::None => 0.0,
            DitherKind::Rpdf => uniform(size / 2.0),
            DitherKind::Tpdf => uniform(size / 4.0) + uniform(size / 4.0),
        }
    }

    /// Convert sample `k`.
    ///
    /// Held input: acquire from `sh` (an upstream sample-and-hold, or [`SampleHold::ideal`]), compare the held
    /// value at each trial instant, then release `sh` at t_k + conversion_time. Live input: each trial
    /// compares the input at its own instant. Dither is drawn once per conversion, comparator noise once
    /// per comparison.
    pub fn convert(&mut self, k: u64, probe: &dyn Probe, sh: &mut dyn Hold) -> CodeEvent {
        let t_k = self.sample_time_s(k);
        let n = self.cfg.bits;
        let low = self.cfg.range_v.0;
        let q = self.cfg.lsb_v();
        let full = f64::powi(2.0, n as i32);
        let dither = self.draw_dither_lsb();
        // A noisy reference scales every trial level by (1 + e / span); dividing the input by it instead
        // compares the same quantities.
        let ref_sigma = self.cfg.reference_noise_v;
        let q = if ref_sigma > 0.0 {
            let z: f64 = StandardNormal.sample(&mut self.rng);
            q * (1.0 + ref_sigma * z / (self.cfg.range_v.1 - self.cfg.range_v.0))
        } else {
            q
        };
        let held = match self.cfg.input {
            AdcInput::Held => Some(sh.acquire(t_k, probe)),
            AdcInput::Live => None,
        };
        let offset = self.cfg.comparator_offset_v;
        let shift = self.cfg.transfer.trial_shift_lsb();
        let noise_sigma = self.cfg.comparator_noise_v;
        let mut code: u64 = 0;
        let mut level = 0.0;
        // Fast path: a held value without droop and a noiseless comparator compare the same u at every trial
        // (the same expressions as the general loop, evaluated once), and the trials need no instants.
        if let Some(h) = held
            && h.droop_v_per_s == 0.0
            && (noise_sigma.is_nan() || noise_sigma <= 0.0)
        {
            let v = h.v;
            let u0 = (v - low) / q;
            if !(0.0..full).contains(&u0) {
                self.clipped += 1;
            }
            let noise = 0.0;
            let u = (v + offset + noise - low) / q + dither;
            for (i, w) in self.weights_lsb.iter().enumerate() {
                let trial = level + w;
                let keep = u >= trial - shift;
                level = if keep { trial } else { level };
                code |= u64::from(keep) << (n as usize - 1 - i);
            }
            let t_avail = t_k + self.cfg.conversion_time_s;
            sh.release(t_avail);
            return CodeEvent {
                t_sample_s: t_k,
                t_avail_s: t_avail,
                code: code as u32,
            };
        }
        for i in 0..n as usize {
            let t = t_k + (i + 1) as f64 / self.cfg.clock_hz;
            let v = match &held {
                Some(h) => h.value_at(t),
                None => probe.value_at(t),
            };
            if i == 0 {
                let u0 = (v - low) / q;
                if !(0.0..full).contains(&u0) {
                    self.clipped += 1;
                }
            }
            let noise = if noise_sigma > 0.0 {
                let z: f64 = StandardNormal.sample(&mut self.rng);
                noise_sigma * z
            } else {
                0.0
            };
            let u = (v + offset + noise - low) / q + dither;
            let trial = level + self.weights_lsb[i];
            if u >= trial - shift {
                level = trial;
                code |= 1u64 << (n as usize - 1 - i);
            }
        }
        let t_avail = t_k + self.cfg.conversion_time_s;
        if held.is_some() {
            sh.release(t_avail);
        }
        CodeEvent {
            t_sample_s: t_k,
            t_avail_s: t_avail,
            code: code as u32,
        }
    }

    /// Number of conversions whose input (at the first bit trial) was outside the range, so that the ideal
    /// quantizer would clip it to code 0 or 2^bits - 1.
    pub fn codes_clipped(&self) -> u64 {
        self.clipped
    }

    /// Ideal transfer (the naive oracle for tests and static tests), with u = (v - low)/q: centred, code k for
    /// u in [k - 1/2, k + 1/2) (IEEE Std 1241); truncating, `floor(u)`; both clipped to 0..2^bits - 1. The
    /// half is added after the floor (`u - floor(u)` is exact), so the oracle rounds nowhere the SAR does not.
    pub fn ideal_code(cfg: &SarAdcCfg, v: f64) -> u32 {
        let full = f64::powi(2.0, cfg.bits as i32);
        let u = (v - cfg.range_v.0) / cfg.lsb_v();
        let k = u.floor();
        let x = match cfg.transfer {
            Transfer::Centred if u - k >= 0.5 => k + 1.0,
            _ => k,
        };
        if x >= full {
            (full - 1.0) as u32
        } else if x >= 0.0 {
            x as u32
        } else {
            0
        }
    }

    /// Transition levels (V) of the noiseless, undithered converter: element `k - 1` is the input at which
    /// the code goes from below `k` to `k` or more, k = 1..2^bits - 1. Comparator offset included.
    ///
    /// Computed exactly from the trial weights: code c results for inputs u (LSB units) with
    /// DAC(c) <= u < min over the 0-bits i of c of (DAC(bits of c above i) + w_i), which may be empty (a
    /// missing code). The output code never decreases as the input rises, so the transition into k is the
    /// DAC level of the first non-empty code at or above k, less the trial shift of the centred transfer (half
    /// an LSB, the same for every trial, so the empty codes do not change). Allocates 2^bits - 1 values: meant for static
    /// tests of converters up to about 24 bits.
    pub fn transition_levels_v(&self) -> Vec<f64> {
        let n = self.cfg.bits as usize;
        let count = (1usize << n) - 1;
        let mut t_lsb = vec![0.0; count];
        let mut pending = 1usize; // first code whose transition is not yet known
        // Walk the codes in increasing order (a depth-first walk of the trial tree).
        fn walk(
            w: &[f64],
            i: usize,
            code: usize,
            level: f64,
            upper: f64,
            out: &mut [f64],
            pending: &mut usize,
        ) {
            if i == w.len() {
                if code > 0 && level < upper {
                    for slot in &mut out[*pending - 1..code] {
                        *slot = level;
                    }
                    *pending = code + 1;
                }
                return;
            }
            let bit = 1usize << (w.len() - 1 - i);
            let trial = level + w[i];
            walk(w, i + 1, code, level, upper.min(trial), out, pending);
            walk(w, i + 1, code | bit, trial, upper, out, pending);
        }
        walk(
            &self.weights_lsb,
            0,
            0,
            0.0,
            f64::INFINITY,
            &mut t_lsb,
            &mut pending,
        );
        let low = self.cfg.range_v.0;
        let q = self.cfg.lsb_v();
        let off = self.cfg.comparator_offset_v;
        let shift = self.cfg.transfer.trial_shift_lsb();
        t_lsb.iter().map(|t| low + (t - shift) * q - off).collect()
    }
}

/// A SAR converter with the hold it samples through: the quantizer role.
pub struct SarQuantizer {
    adc: SarAdc,
    hold: Box<dyn Hold>,
    label: String,
}

impl Quantizer for SarQuantizer {
    fn sample_time_s(&self, k: u64) -> f64 {
        self.adc.sample_time_s(k)
    }
    fn latest_input_needed_s(&self, k: u64) -> f64 {
        self.adc.latest_input_needed_s(k, self.hold.lookahead_s())
    }
    fn history_needed_s(&self) -> f64 {
        let fs = self.adc.cfg.effective_sample_rate_hz();
        self.adc.cfg.conversion_time_s
            + self.hold.lookahead_s()
            + self.hold.history_needed_s(1.0 / fs)
            + 4.0 / fs
    }
    fn convert(&mut self, k: u64, probe: &dyn Probe) -> CodeEvent {
        self.adc.convert(k, probe, self.hold.as_mut())
    }
    fn codes_clipped(&self) -> u64 {
        self.adc.codes_clipped()
    }
    fn bits(&self) -> u32 {
        self.adc.cfg.bits
    }
    fn range_v(&self) -> (f64, f64) {
        self.adc.cfg.range_v
    }
    fn sample_rate_hz(&self) -> f64 {
        self.adc.cfg.effective_sample_rate_hz()
    }
    fn ideal_first_transition_lsb(&self) -> f64 {
        1.0 - self.adc.cfg.transfer.trial_shift_lsb()
    }
    /// Without a hold the input moves during the bit trials: a static test's sine must move under a
    /// twentieth of an LSB during a conversion (a full-scale sine moves at most 2 pi f A t_conv).
    fn static_sine_limit_hz(&self) -> f64 {
        let c = &self.adc.cfg;
        match c.input {
            AdcInput::Held => f64::INFINITY,
            AdcInput::Live => {
                0.05 / (f64::powi(2.0, c.bits as i32) * std::f64::consts::PI * c.conversion_time_s)
            }
        }
    }
    fn budget(&self) -> Vec<BudgetLine> {
        let c = &self.adc.cfg;
        let mut lines = self.hold.budget();
        match c.input {
            AdcInput::Held => lines.push(BudgetLine {
                stage: format!("{}: conversion time", self.label),
                seconds: c.conversion_time_s,
            }),
            AdcInput::Live => {
                // Without a hold the code follows the input during the bit trials. A small movement of the
                // input changes the code where it crosses a trial's threshold; trial i (at (i + 1)/clock) has
                // 2^i thresholds across the range, so the later, finer trials decide most often: the code's
                // effective instant is the trial instants weighted by 2^i / (2^N - 1).
                let n = c.bits as i32;
                let total = f64::powi(2.0, n) - 1.0;
                let t_eff: f64 = (0..n)
                    .map(|i| f64::powi(2.0, i) / total * (i + 1) as f64 / c.clock_hz)
                    .sum();
                lines.push(BudgetLine {
                    stage: format!(
                        "{}: conversion time less the bit trials' weighted instant (live input)",
                        self.label
                    ),
                    seconds: c.conversion_time_s - t_eff,
                });
            }
        }
        lines
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};
    use std::cell::RefCell;

    use crate::stages::FnProbe;

    fn cfg(bits: u32) -> SarAdcCfg {
        let clock = 20e6;
        SarAdcCfg {
            bits,
            range_v: (-1.0, 1.5),
            clock_hz: clock,
            cycles: bits + 1,
            conversion_time_s: (bits + 1) as f64 / clock,
            sample_rate_hz: Some(500e3),
            input: AdcInput::Held,
            comparator_offset_v: 0.0,
            comparator_noise_v: 0.0,
            capacitor_mismatch: 0.0,
            dither: DitherKind::None,
            dither_lsb: 0.0,
            transfer: Transfer::Centred,
            reference_noise_v: 0.0,
            clock_given: true,
            clock_ppm: 0.0,
        }
    }

    fn adc(c: &SarAdcCfg, seed: u64) -> SarAdc {
        SarAdc::new(c, ChaCha8Rng::seed_from_u64(seed))
    }

    /// Code for a constant input.
    fn code_of(a: &mut SarAdc, v: f64) -> u32 {
        a.convert(0, &FnProbe(move |_| v), &mut SampleHold::ideal())
            .code
    }

    #[test]
    fn ideal_sar_equals_the_naive_quantizer_for_every_width() {
        // Oracle: the naive quantizer, clipped: centred, code k for (v - low)/q in [k - 1/2, k + 1/2) (IEEE Std
        // 1241's ideal transfer); truncating, floor((v - low)/q).
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        for (bits, transfer) in (1..=24)
            .map(|b| (b, Transfer::Centred))
            .chain([4, 12, 24].map(|b| (b, Transfer::Truncating)))
        {
            let mut c = cfg(bits);
            c.transfer = transfer;
            let mut a = adc(&c, 1);
            let span = c.range_v.1 - c.range_v.0;
            let q = c.lsb_v();
            let mut outside = 0;
            for j in 0..100_000u64 {
                let v = if j % 10 == 0 {
                    // Exactly on a transition of the ideal transfer.
                    let k = rng.random_range(0..(1u64 << bits));
                    c.range_v.0 + (k as f64 - transfer.trial_shift_lsb()) * q
                } else {
                    c.range_v.0 - 0.05 * span + 1.1 * span * rng.random::<f64>()
                };
                if v < c.range_v.0 || v >= c.range_v.1 {
                    outside += 1;
                }
                let got = code_of(&mut a, v);
                assert_eq!(got, SarAdc::ideal_code(&c, v), "{transfer:?}, bits {bits}, v {v}");
            }
            assert_eq!(a.codes_clipped(), outside, "bits {bits}");
            assert!(outside > 0);
        }
    }

    #[test]
    fn ideal_transition_levels_sit_half_an_lsb_below_each_code() {
        // IEEE Std 1241 ideal transfer: T_k = low + (k - 1/2) q; the truncating option has T_k = low + k q.
        for (transfer, half) in [(Transfer::Centred, 0.5), (Transfer::Truncating, 0.0)] {
            let mut c = cfg(10);
            c.transfer = transfer;
            let mut a = adc(&c, 0);
            let t = a.transition_levels_v();
            assert_eq!(t.len(), 1023);
            let q = c.lsb_v();
            for (i, v) in t.iter().enumerate() {
                let k = (i + 1) as f64;
                let want = c.range_v.0 + (k - half) * q;
                assert!((v - want).abs() < 1e-12, "{transfer:?}: T_{k} = {v}, want {want}");
                // The converter itself agrees on either side.
                assert_eq!(code_of(&mut a, want - 1e-6 * q) as usize, i);
                assert_eq!(code_of(&mut a, want + 1e-6 * q) as usize, i + 1);
            }
        }
    }

    #[test]
    fn the_oracle_and_the_sar_agree_on_random_inputs_with_offset_and_levels() {
        // The centred oracle against the SAR with a comparator offset: the SAR's code for v is the oracle's for
        // v + offset (the comparator sees v + offset), and transition_levels_v brackets it.
        let mut c = cfg(8);
        c.comparator_offset_v = 0.37 * c.lsb_v();
        let mut a = adc(&c, 2);
        let t = a.transition_levels_v();
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let span = c.range_v.1 - c.range_v.0;
        for _ in 0..20_000 {
            let v = c.range_v.0 - 0.03 * span + 1.06 * span * rng.random::<f64>();
            let got = code_of(&mut a, v);
            let mut shifted = c;
            shifted.comparator_offset_v = 0.0;
            let near = t.iter().any(|x| (x - v).abs() < 1e-9);
            if !near {
                assert_eq!(got, SarAdc::ideal_code(&shifted, v + c.comparator_offset_v), "v {v}");
                assert_eq!(got as usize, t.partition_point(|x| *x <= v), "v {v}");
            }
        }
    }

    #[test]
    fn an_ideal_adc_dac_pair_returns_the_input_within_half_an_lsb_without_bias() {
        // IEEE Std 1241 ideal transfer: code k stands for low + k q, and its inputs lie within half an LSB of
        // it; the ideal DAC (IEEE Std 1658) gives low + k q for code k. 8 bits, 0..5 V: q = 19.53125 mV.
        use crate::stages::dac::{Dac, DacCfg, Ladder, ToleranceDistribution};
        use crate::stages::slew::OutputAmpCfg;
        let mut c = cfg(8);
        c.range_v = (0.0, 5.0);
        let dcfg = DacCfg {
            bits: 8,
            range_v: (0.0, 5.0),
            range_given: true,
            ladder: Ladder::Ideal,
            tolerance: 0.0,
            tolerance_distribution: ToleranceDistribution::Uniform,
            offset_v: 0.0,
            gain_error: 0.0,
            output: OutputAmpCfg::default(),
            reference_noise_v: 0.0,
            clock: crate::engine::clock::DacClockCfg::default(),
        };
        let dac = Dac::new(&dcfg, &mut ChaCha8Rng::seed_from_u64(0));
        let mut a = adc(&c, 0);
        let q = c.lsb_v();
        // 2.51 V is 128.512 LSB: code 129, 2.51953 V out (the truncating comparator gave 128, 2.5 V).
        let code = code_of(&mut a, 2.51);
        assert_eq!(code, 129);
        let out = dac.level_v(code);
        assert!((out - 2.51).abs() <= 0.5 * q, "2.51 V -> {out} V");
        // A slow ramp over whole codes (1 to 254, 1000 points per code, midpoints of the sub-intervals): the
        // error's mean is zero and its extremes are +-1/2 LSB.
        let per_code = 1000;
        let (lo_code, hi_code) = (1, 254);
        let n = (hi_code - lo_code) * per_code;
        let (mut sum, mut worst) = (0.0, 0.0f64);
        for j in 0..n {
            let v = (lo_code as f64 + (j as f64 + 0.5) / per_code as f64) * q;
            let e = dac.level_v(code_of(&mut a, v)) - v;
            sum += e;
            worst = worst.max(e.abs());
        }
        let mean = sum / n as f64;
        assert!(mean.abs() < 1e-6 * q, "mean error {} LSB", mean / q);
        assert!(worst <= 0.5 * q + 1e-12 && worst > 0.49 * q, "worst {} LSB", worst / q);
        // The truncating option keeps its -1/2 LSB mean error.
        c.transfer = Transfer::Truncating;
        let mut t = adc(&c, 0);
        let sum_t: f64 = (0..n)
            .map(|j| {
                let v = (lo_code as f64 + (j as f64 + 0.5) / per_code as f64) * q;
                dac.level_v(code_of(&mut t, v)) - v
            })
            .sum();
        assert!((sum_t / n as f64 / q + 0.5).abs() < 1e-6);
    }

    #[test]
    fn timing_of_trials_and_codes_with_a_fixed_rate_and_free_running() {
        // Fixed rate: t_k = k / rate; trials at t_k + (i + 1)/clock; code at t_k + conversion_time.
        let mut c = cfg(8);
        c.input = AdcInput::Live;
        let times = RefCell::new(Vec::new());
        let probe = FnProbe(|t| {
            times.borrow_mut().push(t);
            0.3
        });
        let mut a = adc(&c, 0);
        let mut sh = SampleHold::ideal();
        for k in [0u64, 1, 7, 1_000_003] {
            times.borrow_mut().clear();
            let e = a.convert(k, &probe, &mut sh);
            let t_k = k as f64 / 500e3;
            assert_eq!(e.t_sample_s, t_k);
            assert_eq!(e.t_avail_s, t_k + c.conversion_time_s);
            let seen = times.borrow().clone();
            assert_eq!(seen.len(), 8);
            for (i, t) in seen.iter().enumerate() {
                assert_eq!(*t, t_k + (i + 1) as f64 / c.clock_hz);
            }
            assert_eq!(a.latest_input_needed_s(k, 0.0), t_k + 8.0 / c.clock_hz);
        }
        // Free-running: the next conversion starts when the previous one ends.
        c.sample_rate_hz = None;
        c.input = AdcInput::Held;
        c.conversion_time_s = 1.3e-6;
        let mut a = adc(&c, 0);
        for k in [0u64, 1, 2, 999_999, 1_000_000] {
            let e = a.convert(k, &probe, &mut sh);
            assert_eq!(e.t_sample_s, k as f64 * 1.3e-6);
            assert_eq!(e.t_avail_s, e.t_sample_s + 1.3e-6);
            assert!((e.t_avail_s - a.sample_time_s(k + 1)).abs() < 1e-15);
            assert_eq!(a.latest_input_needed_s(k, 2e-9), e.t_sample_s + 2e-9);
        }
    }

    #[test]
    fn a_live_input_moving_during_conversion_corrupts_codes_but_a_held_one_does_not() {
        // Common practice, no source: a SAR without a hold needs the input to move less than about 1/2 LSB
        // during the conversion. What follows exactly from the binary search with an ideal DAC: the live code
        // lies between the ideal codes of the input at the first and at the last trial.
        let c = cfg(10);
        let q = c.lsb_v();
        let t_conv = c.conversion_time_s;
        let t_last = c.bits as f64 / c.clock_hz;
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        for (lsb_per_conv, fast) in [(20.0, true), (0.4, false)] {
            let slope = lsb_per_conv * q / t_conv;
            let mut held_adc = adc(&c, 0);
            let mut live_cfg = c;
            live_cfg.input = AdcInput::Live;
            let mut live_adc = adc(&live_cfg, 0);
            let mut sh = SampleHold::ideal();
            let (mut differ, mut max_diff) = (0, 0i64);
            let n = 3000;
            for k in 0..n {
                // Each conversion sees a ramp of the given slope through a random level at t_k.
                let t_k = held_adc.sample_time_s(k);
                let v0 = c.range_v.0 + 0.9 * (c.range_v.1 - c.range_v.0) * rng.random::<f64>();
                let ramp = move |t: f64| v0 + slope * (t - t_k);
                let p = FnProbe(ramp);
                let held = held_adc.convert(k, &p, &mut sh).code;
                assert_eq!(held, SarAdc::ideal_code(&c, ramp(t_k)));
                let live = live_adc.convert(k, &p, &mut sh).code;
                let lo = SarAdc::ideal_code(&c, ramp(t_k + 1.0 / c.clock_hz));
                let hi = SarAdc::ideal_code(&c, ramp(t_k + t_last));
                assert!(lo <= live && live <= hi, "live {live} outside [{lo}, {hi}]");
                let d = live as i64 - held as i64;
                if d != 0 {
                    differ += 1;
                }
                max_diff = max_diff.max(d.abs());
            }
            if fast {
                assert!(differ > n / 2, "fast ramp: only {differ} codes differ");
                assert!(max_diff >= 5, "fast ramp: max difference {max_diff}");
            } else {
                assert!(max_diff <= 1, "slow ramp: max difference {max_diff}");
            }
        }
    }

    #[test]
    fn comparator_offset_shifts_every_transition_by_the_offset() {
        let mut c = cfg(8);
        c.capacitor_mismatch = 0.01;
        let base = adc(&c, 9).transition_levels_v();
        c.comparator_offset_v = 0.37 * c.lsb_v();
        let mut a = adc(&c, 9); // same seed: same capacitors
        let shifted = a.transition_levels_v();
        let q = c.lsb_v();
        for (k, (b, s)) in base.iter().zip(&shifted).enumerate() {
            // The comparator sees v + offset, so every transition moves down by the offset.
            assert!((s - (b - c.comparator_offset_v)).abs() < 1e-12);
            // And the converter agrees on either side of the shifted transition.
            if k % 17 == 0 && (k == 0 || shifted[k - 1] < *s) {
                assert!(code_of(&mut a, s + 1e-6 * q) as usize > k);
                assert!((code_of(&mut a, s - 1e-6 * q) as usize) < k + 1);
            }
        }
    }

    #[test]
    fn transition_levels_with_mismatch_match_a_brute_force_ramp() {
        // Oracle: run convert() on a fine ramp; the code at each point must equal the number of
        // transition levels at or below it.
        for (bits, mismatch, seed) in [(6u32, 0.4, 1u64), (8, 0.05, 2), (10, 0.02, 3)] {
            let mut c = cfg(bits);
            c.capacitor_mismatch = mismatch;
            let mut a = adc(&c, seed);
            let t = a.transition_levels_v();
            assert!(t.windows(2).all(|w| w[0] <= w[1]));
            let q = c.lsb_v();
            let steps = (1usize << bits) * 200;
            let lo = c.range_v.0 - 2.0 * q;
            let span = c.range_v.1 - c.range_v.0 + 4.0 * q;
            let mut missing = 0;
            for w in t.windows(2) {
                if w[0] == w[1] {
                    missing += 1;
                }
            }
            for j in 0..=steps {
                let v = lo + span * j as f64 / steps as f64;
                let above = t.partition_point(|x| *x <= v);
                let near = [above.saturating_sub(1), above.min(t.len() - 1)]
                    .iter()
                    .any(|&i| (t[i] - v).abs() < 1e-9 * q);
                if near {
                    continue;
                }
                assert_eq!(code_of(&mut a, v) as usize, above, "bits {bits}, v {v}");
            }
            if bits == 6 {
                assert!(missing > 0, "large mismatch should give missing codes");
            }
        }
    }

    #[test]
    fn capacitor_mismatch_gives_the_expected_mid_scale_dnl_spread() {
        // Binary-weighted capacitor array with independent unit mismatch (model from memory: J. L. McCreary
        // and P. R. Gray, "All-MOS charge redistribution analog-to-digital conversion techniques, part I",
        // IEEE JSSC 1975). The width of code 2^(N-1) - 1 is C_msb - sum of the other bit capacitors; with
        // 2^(N-1) + (2^(N-1) - 1) independent units of relative sigma s, its sigma is s sqrt(2^N - 1) LSB
        // (sum of independent variances; normalisation by the total changes it by O(2^-N/2)).
        let bits = 10;
        let s = 0.002;
        let mut c = cfg(bits);
        c.capacitor_mismatch = s;
        let mid = 1usize << (bits - 1);
        let trials = 400;
        let mut sum2 = 0.0;
        let mut sum = 0.0;
        for seed in 0..trials {
            let a = adc(&c, 1000 + seed);
            let t = a.transition_levels_v();
            // Code mid - 1 spans [T(mid - 1), T(mid)); t[k - 1] is T(k).
            let width = (t[mid - 1] - t[mid - 2]) / c.lsb_v();
            let dnl = width - 1.0;
            sum += dnl;
            sum2 += dnl * dnl;
        }
        let mean = sum / trials as f64;
        let sd = (sum2 / trials as f64 - mean * mean).sqrt();
        let want = s * ((1u64 << bits) as f64 - 1.0).sqrt();
        // 400 draws: the sd estimate is within about +-3.5 % (1 sigma); allow 15 %.
        assert!((sd / want - 1.0).abs() < 0.15, "sd {sd} vs {want}");
        assert!(mean.abs() < 4.0 * want / (trials as f64).sqrt());
    }

    #[test]
    fn dither_makes_the_mean_code_follow_the_input() {
        // With RPDF dither of 1 LSB, or TPDF of 2 LSB peak-to-peak, E[floor(x + d)] = x - 1/2 for every x (so the
        // centred transfer, floor(x + 1/2 + d), has mean code x), and
        // with TPDF the error variance is 1/4 LSB^2 independent of x (from memory: R. A. Wannamaker, S. P.
        // Lipshitz, J. Vanderkooy, J. N. Wright, "A theory of nonsubtractive dither", IEEE Trans. Signal
        // Processing, 2000).
        for (kind, size) in [(DitherKind::Rpdf, 1.0), (DitherKind::Tpdf, 2.0)] {
            let mut c = cfg(12);
            c.dither = kind;
            c.dither_lsb = size;
            let q = c.lsb_v();
            let mut a = adc(&c, 77);
            for frac in [0.0, 0.25, 0.5, 0.8] {
                let x = 1000.0 + frac;
                let v = c.range_v.0 + x * q;
                let n = 40_000;
                let (mut s, mut s2) = (0.0, 0.0);
                for _ in 0..n {
                    let e = code_of(&mut a, v) as f64 - x;
                    s += e;
                    s2 += e * e;
                }
                let mean = s / n as f64;
                let var = s2 / n as f64 - mean * mean;
                // The mean over 4e4 draws is within 0.005 LSB (4 sigma).
                assert!(mean.abs() < 0.01, "{kind:?} at {x}: mean {mean}");
                if kind == DitherKind::Tpdf {
                    assert!((var / 0.25 - 1.0).abs() < 0.04, "TPDF at {x}: var {var}");
                }
            }
        }
    }

    #[test]
    fn reference_noise_spreads_codes_in_proportion_to_the_input() {
        // A reference of span V_ref + e reads the input v (above the range's low end by d) as code
        // d / q / (1 + e / V_ref), about d / q (1 - e / V_ref): the code's rms spread is (d / q) sigma / V_ref,
        // proportional to the input (first-order Taylor; common practice, no source). Quantization adds
        // q^2 / 12 (Bennett, BSTJ 1948), here negligible.
        let mut c = cfg(16);
        let span = c.range_v.1 - c.range_v.0;
        c.reference_noise_v = 1e-3;
        let n = 20_000;
        for frac in [0.9, 0.3] {
            let d = frac * span;
            let v = c.range_v.0 + d;
            let mut a = adc(&c, 6);
            let codes: Vec<f64> = (0..n).map(|_| code_of(&mut a, v) as f64).collect();
            let mean = codes.iter().sum::<f64>() / n as f64;
            let sd = (codes.iter().map(|k| (k - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
            let want = (d / c.lsb_v()) * c.reference_noise_v / span;
            let want = (want * want + 1.0 / 12.0).sqrt();
            assert!((sd / want - 1.0).abs() < 0.05, "at {frac} of the span: {sd} vs {want} LSB");
        }
        // Without reference noise the code of a fixed input never moves.
        c.reference_noise_v = 0.0;
        let mut a = adc(&c, 6);
        let v = c.range_v.0 + 0.9 * span;
        let k0 = code_of(&mut a, v);
        assert!((0..100).all(|_| code_of(&mut a, v) == k0));
    }

    #[test]
    fn comparator_noise_spreads_codes_and_same_seed_repeats() {
        let mut c = cfg(12);
        c.comparator_noise_v = 0.7 * c.lsb_v();
        let v = c.range_v.0 + 2000.4 * c.lsb_v();
        let run = |seed| {
            let mut a = adc(&c, seed);
            (0..2000).map(|_| code_of(&mut a, v)).collect::<Vec<_>>()
        };
        let a = run(4);
        assert_eq!(a, run(4));
        assert_ne!(a, run(5));
        let distinct: std::collections::BTreeSet<_> = a.iter().collect();
        assert!(distinct.len() >= 3);
        assert!(a.iter().all(|&k| (1995..=2006).contains(&k)));
    }

    #[test]
    fn held_fast_path_matches_trials_written_out_one_by_one() {
        // Slow oracle: the trial loop of the module documentation, one comparison per bit, for a mismatched
        // array with offset and dither (the fast path covers a held value without droop or comparator noise).
        let mut c = cfg(12);
        c.capacitor_mismatch = 0.02;
        c.comparator_offset_v = 0.37 * c.lsb_v();
        c.dither = DitherKind::Tpdf;
        c.dither_lsb = 2.0;
        let mut a = adc(&c, 3);
        let mut twin = adc(&c, 3);
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let span = c.range_v.1 - c.range_v.0;
        for k in 0..20_000u64 {
            let v = c.range_v.0 - 0.02 * span + 1.04 * span * rng.random::<f64>();
            let got = a.convert(k, &FnProbe(move |_| v), &mut SampleHold::ideal());
            let dither = twin.draw_dither_lsb();
            let u = (v + c.comparator_offset_v - c.range_v.0) / c.lsb_v() + dither;
            let (mut code, mut level) = (0u32, 0.0);
            for (i, w) in twin.weights_lsb.iter().enumerate() {
                // The centred transfer's trial level: the weights' sum less half an LSB.
                if u >= level + w - 0.5 {
                    level += w;
                    code |= 1 << (11 - i);
                }
            }
            assert_eq!(got.code, code, "k {k}, v {v}");
        }
    }
}
