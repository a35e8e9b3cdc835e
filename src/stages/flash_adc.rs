//! The `flash_adc` stage: a flash (parallel) converter. A resistor ladder of 2^N unit resistors sets the 2^N - 1
//! thresholds of as many comparators, which all decide at the sampling instant; the thermometer code they form is
//! decoded by counting its ones (which ignores isolated "bubbles" where a comparator disagrees with its
//! neighbours) and leaves the converter `latency_cycles` sample clocks later, as the decoder's and the output
//! register's pipeline stages deliver it.
//!
//! Levels: with the ideal transfer of IEEE Std 1241 (code k centred on `low + k q`), threshold k (k = 1 ..
//! 2^N - 1) sits at `low + (k - 1/2) q`. The ladder's tap voltages are the cumulative sums of its resistors
//! (relative sigma `ladder_tolerance` each, normalised so the ends stay at the range's ends, the half-unit end
//! resistors giving the half-LSB shift); each comparator adds its own static offset (sigma `comparator_offset`)
//! and, per decision, Gaussian noise (`comparator_noise`).

use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;

use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::signal::stream::CodeEvent;
use crate::stages::Probe;
use crate::stages::kind::{
    Ablation, BuildContext, KindSpec, Param, ParamKind, QuantizerTiming, Rates,
    ReadContext, Role, Runtime, Upstream,
};
use crate::stages::roles::{BudgetLine, Hold, Quantizer};
use crate::stages::sample_hold::SampleHold;

/// Widest flash converter accepted: 2^12 - 1 comparators.
pub const FLASH_MAX_BITS: i128 = 12;

/// `kind = "flash_adc"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FlashAdcCfg {
    pub bits: u32,
    pub range_v: (f64, f64),
    pub sample_rate_hz: f64,
    /// Sample clocks from the sampling edge until the code leaves the converter.
    pub latency_cycles: u32,
    /// Sigma of each comparator's static offset (V).
    pub comparator_offset_v: f64,
    /// Rms noise of each comparator decision (V).
    pub comparator_noise_v: f64,
    /// Relative sigma of each ladder resistor.
    pub ladder_tolerance: f64,
    /// Offset of the converter's clock from nominal (ppm; see [`crate::engine::clock`]).
    #[serde(skip_serializing_if = "crate::engine::clock::is_zero")]
    pub clock_ppm: f64,
}

impl FlashAdcCfg {
    /// The timing on the converter's own clock: the sample rate `1 + clock_ppm 1e-6` times its nominal value
    /// (the same configuration when `clock_ppm` is 0).
    pub fn clocked(&self) -> FlashAdcCfg {
        FlashAdcCfg {
            sample_rate_hz: self.sample_rate_hz * crate::engine::clock::clock_scale(self.clock_ppm),
            ..*self
        }
    }
    pub fn lsb_v(&self) -> f64 {
        (self.range_v.1 - self.range_v.0) / f64::powi(2.0, self.bits as i32)
    }
    /// From the sampling edge to the code's availability (s).
    pub fn latency_s(&self) -> f64 {
        f64::from(self.latency_cycles) / self.sample_rate_hz
    }
}

impl KindSpec for FlashAdcCfg {
    const NAME: &'static str = "flash_adc";
    const ROLE: Role = Role::Quantizer;
    const EXAMPLE: &'static str = r#"bits = 6
range = ["0 V", "2 V"]
sample_rate = "100 MHz"
latency_cycles = 2
comparator_offset = "2 mV""#;
    const PARAMS: &'static [Param] = {
        use Dimension as D;
        &[
            Param::fixed("bits", ParamKind::Integer),
            Param::fixed("range", ParamKind::Pair(D::Voltage)),
            Param::spread("sample_rate", D::Frequency),
            Param::fixed("latency_cycles", ParamKind::Integer),
            Param::spread("comparator_offset", D::Voltage),
            Param::spread("comparator_noise", D::Voltage),
            Param::spread("ladder_tolerance", D::Ratio),
            Param::spread_number("clock_ppm"),
        ]
    };

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        use Dimension as D;
        let bits = r
            .integer("bits", 1, FLASH_MAX_BITS)?
            .ok_or_else(|| r.missing("bits", "6"))?
            .value as u32;
        let range = r
            .pair("range", D::Voltage)?
            .ok_or_else(|| r.missing("range", "[\"0 V\", \"2 V\"]"))?;
        let sample_rate = r
            .positive("sample_rate", D::Frequency)?
            .ok_or_else(|| r.missing("sample_rate", "\"100 MHz\""))?;
        let latency_cycles = r
            .integer("latency_cycles", 0, 1000)?
            .map_or(1, |c| c.value as u32);
        Ok(FlashAdcCfg {
            bits,
            range_v: range.value,
            sample_rate_hz: sample_rate.value,
            latency_cycles,
            comparator_offset_v: r.non_negative("comparator_offset", D::Voltage)?,
            comparator_noise_v: r.non_negative("comparator_noise", D::Voltage)?,
            ladder_tolerance: r.non_negative("ladder_tolerance", D::Ratio)?,
            clock_ppm: crate::engine::clock::read_clock_ppm(r)?,
        })
    }

    fn resolve(&mut self, up: &mut Upstream) {
        up.set_quantizer(self.bits, self.range_v, self.sample_rate_hz, self.clock_ppm);
    }

    fn ablations(&self) -> Vec<Ablation> {
        let mut out = Ablation::zeroed::<Self>(&[
            ("comparator_offset", self.comparator_offset_v),
            ("comparator_noise", self.comparator_noise_v),
            ("ladder_tolerance", self.ladder_tolerance),
        ]);
        out.push(Ablation::tenfold_clock::<Self>(self.sample_rate_hz));
        out
    }

    fn rates(&self) -> Rates {
        Rates {
            lowpass_hz: Some(self.sample_rate_hz),
            highpass_hz: None,
        }
    }

    fn quantizer_timing(&self) -> Option<QuantizerTiming> {
        let c = self.clocked();
        Some(QuantizerTiming {
            sample_rate_hz: c.sample_rate_hz,
            conversion_time_s: c.latency_s(),
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
        v["lsb_v"] = serde_json::json!(self.lsb_v());
        v["latency_s"] = serde_json::json!(self.latency_s());
        v
    }

    /// The quantizer owns the hold read just before it, or an ideal one (the comparators' latch instant).
    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let hold: Box<dyn Hold> = match ctx.pending_hold.take() {
            Some(h) => h,
            None => Box::new(SampleHold::ideal()),
        };
        let mut rng = ctx.rng.clone();
        let thresholds_v = thresholds(self, &mut rng);
        Ok(Runtime::Quantizer(Box::new(FlashQuantizer {
            cfg: self.clocked(),
            ordered: thresholds_v.is_sorted(),
            thresholds_v,
            rng,
            hold,
            clipped: 0,
            label: ctx.label.clone(),
        })))
    }
}

/// The comparators' thresholds (V), in ladder order: the ladder's taps with the resistors' and the comparators'
/// static errors drawn from `rng` (resistors first, then offsets, so a change of one sigma leaves the other's
/// draws alone).
pub fn thresholds(cfg: &FlashAdcCfg, rng: &mut ChaCha8Rng) -> Vec<f64> {
    let n = 1usize << cfg.bits;
    let (low, high) = cfg.range_v;
    // n - 1 unit resistors between taps and two half units at the ends: taps at (k - 1/2) q.
    let mut r: Vec<f64> = Vec::with_capacity(n + 1);
    for i in 0..=n {
        let nominal = if i == 0 || i == n { 0.5 } else { 1.0 };
        let z: f64 = StandardNormal.sample(rng);
        r.push(nominal * (1.0 + cfg.ladder_tolerance * z).max(0.0));
    }
    let total: f64 = r.iter().sum();
    let mut acc = 0.0;
    let mut taps = Vec::with_capacity(n - 1);
    for ri in &r[..n - 1] {
        acc += ri;
        taps.push(low + (high - low) * acc / total);
    }
    for t in &mut taps {
        let z: f64 = StandardNormal.sample(rng);
        *t += cfg.comparator_offset_v * z;
    }
    taps
}

/// A flash converter with the hold it samples through: the quantizer role.
pub struct FlashQuantizer {
    cfg: FlashAdcCfg,
    thresholds_v: Vec<f64>,
    /// The thresholds rise along the ladder (no offset larger than a step): a binary search finds the count.
    ordered: bool,
    rng: ChaCha8Rng,
    hold: Box<dyn Hold>,
    clipped: u64,
    label: String,
}

impl Quantizer for FlashQuantizer {
    fn sample_time_s(&self, k: u64) -> f64 {
        k as f64 / self.cfg.sample_rate_hz
    }
    fn latest_input_needed_s(&self, k: u64) -> f64 {
        self.sample_time_s(k) + self.hold.lookahead_s()
    }
    fn history_needed_s(&self) -> f64 {
        let period = 1.0 / self.cfg.sample_rate_hz;
        self.hold.lookahead_s() + self.hold.history_needed_s(period) + 4.0 * period
    }
    /// All comparators decide at the instant the hold opens; the code is the count of those whose input is at
    /// or above their threshold (ones counting).
    fn convert(&mut self, k: u64, probe: &dyn Probe) -> CodeEvent {
        let t_k = self.sample_time_s(k);
        let held = self.hold.acquire(t_k, probe);
        let v = held.v;
        let (low, high) = self.cfg.range_v;
        let q = self.cfg.lsb_v();
        if v < low - q / 2.0 || v >= high - q / 2.0 {
            self.clipped += 1;
        }
        let sigma = self.cfg.comparator_noise_v;
        let code = if sigma > 0.0 {
            let rng = &mut self.rng;
            self.thresholds_v
                .iter()
                .filter(|&&t| {
                    let z: f64 = StandardNormal.sample(rng);
                    v + sigma * z >= t
                })
                .count()
        } else if self.ordered {
            self.thresholds_v.partition_point(|&t| t <= v)
        } else {
            self.thresholds_v.iter().filter(|&&t| v >= t).count()
        };
        // The comparators latch at once: the hold is free again after one clock.
        self.hold.release(t_k + 1.0 / self.cfg.sample_rate_hz);
        CodeEvent {
            t_sample_s: t_k,
            t_avail_s: t_k + self.cfg.latency_s(),
            code: code as u32,
        }
    }
    fn codes_clipped(&self) -> u64 {
        self.clipped
    }
    fn bits(&self) -> u32 {
        self.cfg.bits
    }
    fn range_v(&self) -> (f64, f64) {
        self.cfg.range_v
    }
    fn sample_rate_hz(&self) -> f64 {
        self.cfg.sample_rate_hz
    }
    fn ideal_first_transition_lsb(&self) -> f64 {
        0.5
    }
    fn budget(&self) -> Vec<BudgetLine> {
        let mut lines = self.hold.budget();
        lines.push(BudgetLine {
            stage: format!(
                "{}: pipeline latency ({} sample clocks)",
                self.label, self.cfg.latency_cycles
            ),
            seconds: self.cfg.latency_s(),
        });
        lines
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn cfg(bits: u32) -> FlashAdcCfg {
        FlashAdcCfg {
            bits,
            range_v: (0.0, 2.0),
            sample_rate_hz: 1e6,
            latency_cycles: 2,
            comparator_offset_v: 0.0,
            comparator_noise_v: 0.0,
            ladder_tolerance: 0.0,
            clock_ppm: 0.0,
        }
    }

    #[test]
    fn ideal_thresholds_sit_half_an_lsb_below_each_code_centre() {
        // IEEE Std 1241's ideal transfer: transition k at low + (k - 1/2) q.
        let c = cfg(4);
        let t = thresholds(&c, &mut ChaCha8Rng::seed_from_u64(1));
        assert_eq!(t.len(), 15);
        let q = c.lsb_v();
        for (i, v) in t.iter().enumerate() {
            let k = (i + 1) as f64;
            assert!((v - (k - 0.5) * q).abs() < 1e-12, "{i}: {v}");
        }
    }

    #[test]
    fn ladder_errors_keep_the_ends_and_move_the_middle_by_about_the_tolerance() {
        // A ladder of n unit resistors with relative sigma s: the middle tap's relative error has sigma
        // s / (2 sqrt n) (the sum of n/2 of n independent errors, normalised; common practice, no source).
        let mut c = cfg(8);
        c.ladder_tolerance = 0.01;
        let q = c.lsb_v();
        let mut sq = 0.0;
        let runs = 400;
        for seed in 0..runs {
            let t = thresholds(&c, &mut ChaCha8Rng::seed_from_u64(seed));
            let mid = t[127] - 127.5 * q;
            sq += mid * mid;
        }
        let sigma_v = (sq / runs as f64).sqrt();
        let expect_v = 2.0 * 0.01 / (2.0 * 256f64.sqrt());
        assert!(
            (sigma_v / expect_v - 1.0).abs() < 0.15,
            "{sigma_v} vs {expect_v}"
        );
    }
}
