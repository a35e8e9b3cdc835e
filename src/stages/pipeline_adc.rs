//! The `pipeline_adc` stage: a pipelined converter of stages with one bit of redundancy each and digital
//! correction, after S. H. Lewis, H. S. Fetterman, G. F. Gross, R. Ramachandran and T. R. Viswanathan, "A 10-b
//! 20-Msample/s analog-to-digital converter", IEEE J. Solid-State Circuits 27(3), 1992 (the 1.5-bit stage and its
//! digital correction), and A. M. Abo and P. R. Gray, "A 1.5-V, 10-bit, 14.3-MS/s CMOS pipeline
//! analog-to-digital converter", IEEE J. Solid-State Circuits 34(5), 1999 (the same architecture in CMOS).
//!
//! Architecture, in units of the reference `Vref` (half the range's span) around the range's middle, input
//! x in [-1, 1):
//! - `stage_bits` = n + 1/2 (1.5, 2.5 or 3.5): each of K stages has 2 (G - 1) comparators, G = 2^n, at
//!   (j + 1/2) / G for j = -(G - 1) .. G - 2 (a 1.5-bit stage: two, at -1/4 and +1/4). Their count c gives the
//!   sub-converter's decision d = c - (G - 1) in -(G - 1) .. G - 1, and the stage passes on the residue
//!   r = G (1 + e) (x - d / G): the sub-DAC's level is subtracted, then the interstage amplifier (gain G, relative
//!   error e) amplifies what is left. Ideally |r| <= 1/2 away from the range's ends; a comparator that misplaces
//!   its threshold by up to 1/(2G) (Vref/4 for 1.5 bits) only moves r within [-1, 1], which the stages after still
//!   resolve: the redundancy (Lewis 1992).
//! - A final flash of B = N - n K bits (2 for 1.5-bit stages; B = 2 + (N - 2) mod n in general, K =
//!   (N - 2) / n) quantizes the last residue with IEEE Std 1241's centred thresholds scaled to its range,
//!   (j - 1/2) 2^(1 - B) for j = -2^(B-1) + 1 .. 2^(B-1): 2^B comparators, the B-bit flash's 2^B - 1 and one for
//!   the level above, which a residue pushed up by a misplaced stage threshold needs.
//! - Digital correction (shift and add): stage i contributes its comparator count c_i (n + 1 bits) weighted
//!   2^(N - 1 - n i), overlapping the next stage's word by one bit, and the flash its count f; the sum saturates
//!   at 2^N - 1. With every part ideal this is the code of IEEE Std 1241's ideal centred quantizer exactly
//!   (x = sum d_i G^-i + x_(K+1) G^-K, and the constants of the counts add up to 2^(N-1)).
//!
//! Non-idealities: static comparator offsets (sigma `comparator_offset`, V, every comparator of every stage and
//! of the final flash: the stages' are absorbed within the redundancy, the flash's are not), interstage gain
//! errors (relative sigma `stage_gain_error`, one per stage), both drawn once from the stage's random stream, and
//! per conversion Gaussian noise at each stage's input (`stage_noise`, V rms; stage i's reaches the converter's
//! input divided by the gains ahead of it).
//!
//! Latency: one sample clock per stage (stage i samples the residue of stage i - 1 at the clock edge after it),
//! the final flash deciding as it samples at edge K, and one clock for the alignment registers and the
//! correction adder: K + 1 sample clocks unless `latency_cycles` is given.

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

/// Widest pipeline accepted (bits).
pub const PIPELINE_MAX_BITS: i128 = 20;

/// The stage resolutions accepted: n + 1/2 bits per stage.
const STAGE_BITS: [f64; 3] = [1.5, 2.5, 3.5];

/// `kind = "pipeline_adc"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PipelineAdcCfg {
    pub bits: u32,
    pub range_v: (f64, f64),
    pub sample_rate_hz: f64,
    /// Bits per stage: n + 1/2 (1.5, 2.5 or 3.5), n effective bits and one of redundancy.
    pub stage_bits: f64,
    /// Sample clocks from the sampling edge until the code leaves the converter.
    pub latency_cycles: u32,
    /// Sigma of each comparator's static offset (V).
    pub comparator_offset_v: f64,
    /// Relative sigma of each stage's interstage gain.
    pub stage_gain_error: f64,
    /// Rms noise at each stage's input, per conversion (V).
    pub stage_noise_v: f64,
    /// Offset of the converter's clock from nominal (ppm; see [`crate::engine::clock`]).
    #[serde(skip_serializing_if = "crate::engine::clock::is_zero")]
    pub clock_ppm: f64,
}

impl PipelineAdcCfg {
    /// Effective bits per stage, n.
    pub fn stage_resolution(&self) -> u32 {
        (self.stage_bits - 0.5).round() as u32
    }
    /// Number of stages before the final flash, K = (N - 2) / n.
    pub fn stages(&self) -> u32 {
        stage_count(self.bits, self.stage_resolution())
    }
    /// Bits of the final flash, B = N - n K.
    pub fn final_bits(&self) -> u32 {
        self.bits - self.stage_resolution() * self.stages()
    }
    /// The timing on the converter's own clock: the sample rate `1 + clock_ppm 1e-6` times its nominal value
    /// (the same configuration when `clock_ppm` is 0).
    pub fn clocked(&self) -> PipelineAdcCfg {
        PipelineAdcCfg {
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

/// K = (N - 2) / n stages of n effective bits before a final flash of 2 to n + 1 bits.
fn stage_count(bits: u32, n: u32) -> u32 {
    (bits - 2) / n
}

impl KindSpec for PipelineAdcCfg {
    const NAME: &'static str = "pipeline_adc";
    const ROLE: Role = Role::Quantizer;
    const EXAMPLE: &'static str = r#"bits = 12
range = ["-2.5 V", "2.5 V"]
sample_rate = "20 MHz"
stage_bits = 1.5
comparator_offset = "50 mV"
stage_gain_error = 0.0002"#;
    const PARAMS: &'static [Param] = {
        use Dimension as D;
        &[
            Param::fixed("bits", ParamKind::Integer),
            Param::fixed("range", ParamKind::Pair(D::Voltage)),
            Param::spread("sample_rate", D::Frequency),
            Param::fixed("stage_bits", ParamKind::Number),
            Param::fixed("latency_cycles", ParamKind::Integer),
            Param::spread("comparator_offset", D::Voltage),
            Param::spread("stage_gain_error", D::Ratio),
            Param::spread("stage_noise", D::Voltage),
            Param::spread_number("clock_ppm"),
        ]
    };

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        use Dimension as D;
        let bits = r
            .integer("bits", 3, PIPELINE_MAX_BITS)?
            .ok_or_else(|| r.missing("bits", "12"))?;
        let range = r
            .pair("range", D::Voltage)?
            .ok_or_else(|| r.missing("range", "[\"-1 V\", \"1 V\"]"))?;
        let sample_rate = r
            .positive("sample_rate", D::Frequency)?
            .ok_or_else(|| r.missing("sample_rate", "\"20 MHz\""))?;
        let stage_bits = match r.number("stage_bits")? {
            None => 1.5,
            Some(s) if STAGE_BITS.contains(&s.value) => s.value,
            Some(s) => {
                return Err(r
                    .error(
                        &s.span,
                        "stage_bits",
                        format!("must be 1.5, 2.5 or 3.5, found {}", s.value),
                    )
                    .with_hint(
                        "a stage resolves n bits and one of redundancy: stage_bits = 1.5 is the classic stage",
                    ));
            }
        };
        let n = (stage_bits - 0.5).round() as u32;
        let min_bits = n + 2;
        if (bits.value as u32) < min_bits {
            return Err(r
                .error(
                    &bits.span,
                    "bits",
                    format!(
                        "a pipeline of {stage_bits}-bit stages needs at least {min_bits} bits (one stage and a \
                         2-bit flash), found {}",
                        bits.value
                    ),
                )
                .with_hint("raise bits, or use a flash_adc for so few bits"));
        }
        let bits = bits.value as u32;
        let latency_cycles = r
            .integer("latency_cycles", 0, 1000)?
            .map_or(stage_count(bits, n) + 1, |c| c.value as u32);
        Ok(PipelineAdcCfg {
            bits,
            range_v: range.value,
            sample_rate_hz: sample_rate.value,
            stage_bits,
            latency_cycles,
            comparator_offset_v: r.non_negative("comparator_offset", D::Voltage)?,
            stage_gain_error: r.non_negative("stage_gain_error", D::Ratio)?,
            stage_noise_v: r.non_negative("stage_noise", D::Voltage)?,
            clock_ppm: crate::engine::clock::read_clock_ppm(r)?,
        })
    }

    fn resolve(&mut self, up: &mut Upstream) {
        up.set_quantizer(self.bits, self.range_v, self.sample_rate_hz, self.clock_ppm);
    }

    fn ablations(&self) -> Vec<Ablation> {
        let mut out = Ablation::zeroed::<Self>(&[
            ("comparator_offset", self.comparator_offset_v),
            ("stage_gain_error", self.stage_gain_error),
            ("stage_noise", self.stage_noise_v),
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
        true
    }

    fn echo(&self) -> serde_json::Value {
        let mut v = serde_json::to_value(self).unwrap_or(serde_json::Value::Null);
        v["lsb_v"] = serde_json::json!(self.lsb_v());
        v["latency_s"] = serde_json::json!(self.latency_s());
        v["stages"] = serde_json::json!(self.stages());
        v["final_flash_bits"] = serde_json::json!(self.final_bits());
        v
    }

    /// The quantizer owns the hold read just before it, or an ideal one (the first stage's sampling instant).
    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let hold: Box<dyn Hold> = match ctx.pending_hold.take() {
            Some(h) => h,
            None => Box::new(SampleHold::ideal()),
        };
        let mut rng = ctx.rng.clone();
        let core = PipelineCore::drawn(self, &mut rng);
        Ok(Runtime::Quantizer(Box::new(PipelineQuantizer {
            cfg: self.clocked(),
            core,
            rng,
            hold,
            clipped: 0,
            label: ctx.label.clone(),
        })))
    }
}

/// The converter's static parts, in units of `Vref` around the range's middle: every comparator's threshold
/// and every stage's gain factor.
#[derive(Debug, Clone, PartialEq)]
pub struct PipelineCore {
    bits: u32,
    /// Effective bits per stage, n.
    n: u32,
    /// Middle of the range (V) and half its span, `Vref` (V).
    mid_v: f64,
    vref_v: f64,
    /// The stages' 2 (G - 1) thresholds each, stage after stage.
    stage_thresholds: Vec<f64>,
    /// Each stage's interstage gain over its nominal G: 1 + e.
    gain_factors: Vec<f64>,
    /// The final flash's 2^B thresholds.
    final_thresholds: Vec<f64>,
}

impl PipelineCore {
    /// Every part ideal.
    pub fn ideal(cfg: &PipelineAdcCfg) -> PipelineCore {
        let n = cfg.stage_resolution();
        let k = cfg.stages() as usize;
        let g = f64::from(1u32 << n);
        let per = 2 * ((1i32 << n) - 1);
        let mut stage_thresholds = Vec::with_capacity(k * per as usize);
        for _ in 0..k {
            for j in -(per / 2)..per / 2 {
                stage_thresholds.push((f64::from(j) + 0.5) / g);
            }
        }
        let b = cfg.final_bits() as i32;
        let half = 1i32 << (b - 1);
        let final_thresholds = ((-half + 1)..=half)
            .map(|j| (f64::from(j) - 0.5) * f64::powi(2.0, 1 - b))
            .collect();
        let (low, high) = cfg.range_v;
        PipelineCore {
            bits: cfg.bits,
            n,
            mid_v: 0.5 * (low + high),
            vref_v: 0.5 * (high - low),
            stage_thresholds,
            gain_factors: vec![1.0; k],
            final_thresholds,
        }
    }

    /// With the static errors drawn from `rng`: the stages' gain errors first, then the comparators' offsets
    /// (stages, then the final flash), so a change of one sigma leaves the other's draws alone.
    pub fn drawn(cfg: &PipelineAdcCfg, rng: &mut ChaCha8Rng) -> PipelineCore {
        let mut core = PipelineCore::ideal(cfg);
        for f in &mut core.gain_factors {
            let z: f64 = StandardNormal.sample(rng);
            *f = 1.0 + cfg.stage_gain_error * z;
        }
        let sigma = cfg.comparator_offset_v / core.vref_v;
        for t in core
            .stage_thresholds
            .iter_mut()
            .chain(core.final_thresholds.iter_mut())
        {
            let z: f64 = StandardNormal.sample(rng);
            *t += sigma * z;
        }
        core
    }

    /// The output code for the held input `v` (V), with Gaussian noise of `noise_v` rms added at each stage's
    /// input (drawn from `rng` only when `noise_v` > 0).
    pub fn convert(&self, v: f64, noise_v: f64, rng: &mut ChaCha8Rng) -> u32 {
        let n = self.n;
        let g = f64::from(1u32 << n);
        let per = 2 * ((1usize << n) - 1);
        let offset = (per / 2) as f64;
        let sigma = noise_v / self.vref_v;
        let mut x = (v - self.mid_v) / self.vref_v;
        let mut code: u64 = 0;
        for (i, (th, gain)) in self
            .stage_thresholds
            .chunks_exact(per)
            .zip(&self.gain_factors)
            .enumerate()
        {
            if sigma > 0.0 {
                let z: f64 = StandardNormal.sample(rng);
                x += sigma * z;
            }
            let c = th.iter().filter(|&&t| x >= t).count();
            // Shift and add: this stage's count, weighted 2^(N - 1 - n (i + 1)).
            code += (c as u64) << (self.bits - 1 - n * (i as u32 + 1));
            // Subtract the sub-DAC's level, then amplify: G x - d, exact in floating point when ideal.
            x = (g * x - (c as f64 - offset)) * gain;
        }
        let f = self.final_thresholds.iter().filter(|&&t| x >= t).count();
        code += f as u64;
        code.min((1u64 << self.bits) - 1) as u32
    }
}

/// A pipelined converter with the hold it samples through: the quantizer role.
pub struct PipelineQuantizer {
    cfg: PipelineAdcCfg,
    core: PipelineCore,
    rng: ChaCha8Rng,
    hold: Box<dyn Hold>,
    clipped: u64,
    label: String,
}

impl Quantizer for PipelineQuantizer {
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
    /// The first stage decides on the held value; the stages after it work on residues, one clock each, and
    /// the corrected code leaves `latency_cycles` clocks after the sampling edge.
    fn convert(&mut self, k: u64, probe: &dyn Probe) -> CodeEvent {
        let t_k = self.sample_time_s(k);
        let v = self.hold.acquire(t_k, probe).v;
        let (low, high) = self.cfg.range_v;
        let q = self.cfg.lsb_v();
        if v < low - q / 2.0 || v >= high - q / 2.0 {
            self.clipped += 1;
        }
        let code = self
            .core
            .convert(v, self.cfg.stage_noise_v, &mut self.rng);
        // The first stage has its sample after one clock: the hold is free again.
        self.hold.release(t_k + 1.0 / self.cfg.sample_rate_hz);
        CodeEvent {
            t_sample_s: t_k,
            t_avail_s: t_k + self.cfg.latency_s(),
            code,
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
                "{}: pipeline latency ({} sample clocks; {} stages of {} bits, a {}-bit flash)",
                self.label,
                self.cfg.latency_cycles,
                self.cfg.stages(),
                self.cfg.stage_bits,
                self.cfg.final_bits()
            ),
            seconds: self.cfg.latency_s(),
        });
        lines
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::pipeline::build_context;
    use crate::stages::FnProbe;
    use rand::SeedableRng;

    fn cfg(bits: u32, stage_bits: f64) -> PipelineAdcCfg {
        let n = (stage_bits - 0.5).round() as u32;
        PipelineAdcCfg {
            bits,
            range_v: (-1.0, 1.0),
            sample_rate_hz: 20e6,
            stage_bits,
            latency_cycles: stage_count(bits, n) + 1,
            comparator_offset_v: 0.0,
            stage_gain_error: 0.0,
            stage_noise_v: 0.0,
            clock_ppm: 0.0,
        }
    }

    fn rng() -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(7)
    }

    /// IEEE Std 1241's ideal centred quantizer: code k for inputs within q/2 of low + k q, clamped to the codes.
    fn ieee_code(c: &PipelineAdcCfg, v: f64) -> u32 {
        let q = c.lsb_v();
        let k = ((v - c.range_v.0) / q + 0.5).floor();
        k.clamp(0.0, f64::powi(2.0, c.bits as i32) - 1.0) as u32
    }

    /// The inputs of a ramp from half a range below to half a range above the range, `per_lsb` steps per LSB,
    /// leaving out those within 1e-9 LSB of an ideal transition (where the two formulas may round apart).
    fn ramp(c: &PipelineAdcCfg, per_lsb: f64) -> impl Iterator<Item = f64> + '_ {
        let q = c.lsb_v();
        let (low, high) = c.range_v;
        let steps = ((high - low) * 2.0 / q * per_lsb) as usize;
        (0..=steps)
            .map(move |i| low - 0.5 * (high - low) + (i as f64 + 0.37) * q / per_lsb)
            .filter(move |v| {
                let u = (v - low) / q + 0.5;
                (u - u.round()).abs() > 1e-9
            })
    }

    /// Code widths (LSB) on a ramp of `per_lsb` uniform steps per LSB through the range only.
    fn widths_lsb(c: &PipelineAdcCfg, core: &PipelineCore, per_lsb: usize) -> Vec<f64> {
        let q = c.lsb_v();
        let codes = 1usize << c.bits;
        let mut hits = vec![0usize; codes];
        for i in 0..codes * per_lsb {
            let v = c.range_v.0 - 0.5 * q + (i as f64 + 0.5) * q / per_lsb as f64;
            hits[core.convert(v, 0.0, &mut rng()) as usize] += 1;
        }
        hits.iter().map(|&h| h as f64 / per_lsb as f64).collect()
    }

    #[test]
    fn an_ideal_pipeline_is_the_ideal_centred_quantizer_code_for_code() {
        // IEEE Std 1241's ideal transfer (code k centred on low + k q, transitions half an LSB below), on a ramp
        // of 7 steps per LSB reaching half a range beyond each end; for 1.5-, 2.5- and 3.5-bit stages and final
        // flashes of 2 to 4 bits.
        for (bits, sb) in [
            (3, 1.5),
            (8, 1.5),
            (10, 1.5),
            (12, 1.5),
            (16, 1.5),
            (4, 2.5),
            (11, 2.5),
            (12, 2.5),
            (13, 3.5),
            (14, 3.5),
            (12, 3.5),
        ] {
            let c = cfg(bits, sb);
            let core = PipelineCore::ideal(&c);
            let mut n = 0usize;
            for v in ramp(&c, 7.0) {
                assert_eq!(
                    core.convert(v, 0.0, &mut rng()),
                    ieee_code(&c, v),
                    "{bits} bits, {sb}-bit stages, at {v} V"
                );
                n += 1;
            }
            assert!(n > 14 << bits, "{n}");
        }
    }

    #[test]
    fn stage_comparator_offsets_within_the_redundancy_change_no_code() {
        // S. H. Lewis et al., IEEE JSSC 27(3), 1992: with one bit of redundancy per stage the digital correction
        // absorbs sub-converter threshold errors up to Vref/4 for a 1.5-bit stage (Vref/2^(n+1) for n + 1/2
        // bits). Every stage comparator misplaced by up to 0.9 of that (a third of them at the full +-0.9),
        // final flash ideal: every code on a fine ramp is the ideal one.
        for (bits, sb) in [(10, 1.5), (12, 2.5), (13, 3.5)] {
            let c = cfg(bits, sb);
            let limit = 1.0 / f64::from(2u32 << c.stage_resolution());
            for seed in 0..4u64 {
                let mut core = PipelineCore::ideal(&c);
                let mut r = ChaCha8Rng::seed_from_u64(seed);
                for (i, t) in core.stage_thresholds.iter_mut().enumerate() {
                    let u: f64 = rand::RngExt::random(&mut r);
                    let e = match i % 3 {
                        0 => 0.9,
                        1 => -0.9,
                        _ => 1.8 * u - 0.9,
                    };
                    *t += e * limit;
                }
                for v in ramp(&c, 5.0) {
                    assert_eq!(
                        core.convert(v, 0.0, &mut rng()),
                        ieee_code(&c, v),
                        "{bits} bits, {sb}-bit stages, seed {seed}, at {v} V"
                    );
                }
            }
        }
    }

    #[test]
    fn a_stage_offset_beyond_the_redundancy_makes_a_wide_code_and_missing_codes() {
        // Derived here (common practice, no source): stage 1's upper threshold moved from Vref/4 to Vref/4 +
        // delta, delta > Vref/4, leaves inputs from Vref/2 to Vref/4 + delta at d = 0 with a residue above Vref:
        // the back end saturates and holds the code of Vref/2, which so spans from half an LSB below Vref/2 to
        // Vref/4 + delta: (delta - Vref/4) / q + 1/2 LSB (DNL = that width - 1). Above, d = 1 and the estimate
        // resumes at Vref/4 + delta: the codes between are missing, (delta - Vref/4) / q - 1/2 of them (Vref =
        // 1 V here).
        let c = cfg(10, 1.5);
        let q = c.lsb_v();
        let delta = 0.3;
        let mut core = PipelineCore::ideal(&c);
        core.stage_thresholds[1] += delta;
        let w = widths_lsb(&c, &core, 100);
        let wide = (delta - 0.25) / q + 0.5;
        let top = 3 << 8;
        assert!(
            (w[top] - wide).abs() < 0.05,
            "code {top}: {} LSB vs {wide}",
            w[top]
        );
        let missing = w[1..w.len() - 1].iter().filter(|&&x| x == 0.0).count() as f64;
        let expect = (delta - 0.25) / q - 0.5;
        assert!((missing - expect).abs() <= 1.0, "{missing} vs {expect}");
        // Within the redundancy nothing moves.
        let within = widths_lsb(&c, &PipelineCore::ideal(&c), 100);
        assert!(within[1..within.len() - 1].iter().all(|&x| (x - 1.0).abs() < 1e-9));
    }

    #[test]
    fn a_low_first_stage_gain_narrows_the_codes_at_its_transitions_by_e_2_pow_n_minus_2() {
        // Derived here (common practice, no source): stage 1 amplifying by 2 (1 - e) after subtracting d Vref/2
        // gives the corrected estimate x (1 - e) + e d / 2 (Vref units): it jumps up by e/2 Vref, e 2^(N-2) LSB,
        // where d steps (at +-Vref/4), so the codes there lose that much width in all (the half of e 2^(N-1),
        // the jump a 1-bit stage's full-scale DAC step makes); a jump over whole LSBs leaves missing codes.
        let c = cfg(10, 1.5);
        for jump_lsb in [0.5, 2.5] {
            let e = jump_lsb / f64::powi(2.0, c.bits as i32 - 2);
            let mut core = PipelineCore::ideal(&c);
            core.gain_factors[0] = 1.0 - e;
            let w = widths_lsb(&c, &core, 200);
            for centre in [384usize, 640] {
                // The 13 codes around the transition cover 13 - jump LSB of the estimate, each estimate LSB
                // 1 / (1 - e) LSB of input (the slope).
                let lost: f64 = (centre - 6..=centre + 6).map(|k| 1.0 - w[k]).sum();
                let want = 13.0 - (13.0 - jump_lsb) / (1.0 - e);
                assert!(
                    (lost - want).abs() < 0.03,
                    "jump {jump_lsb} LSB, code {centre}: {lost} LSB lost, want {want}"
                );
                // A jump of J LSB skips floor(J) or floor(J) - 1 whole codes, by where it starts.
                let missing = (centre - 6..=centre + 6).filter(|&k| w[k] == 0.0).count();
                let whole = jump_lsb.floor() as usize;
                assert!(
                    missing <= whole && missing + 1 >= whole,
                    "jump {jump_lsb}: {missing} missing at {centre}"
                );
            }
        }
    }

    #[test]
    fn drawn_gain_errors_cause_dnl_and_drawn_stage_offsets_do_not() {
        // The stage's own draws. A 0.2 % gain sigma on a 12-bit pipeline moves stage i's transitions by about
        // e_i 2^(N - 1 - i) LSB (derived in the test above): 2 LSB sigma for the first stage, so DNL well over
        // half an LSB. Offsets of Vref/40 sigma keep every stage comparator inside the Vref/4 the correction
        // absorbs (10 sigma; Lewis et al. 1992): with the final flash's own offsets (which nothing corrects)
        // put back to ideal, every code width stays exactly one LSB.
        let max_dnl = |w: Vec<f64>| {
            w[1..w.len() - 1]
                .iter()
                .fold(0.0f64, |m, w| m.max((w - 1.0).abs()))
        };
        let mut c = cfg(12, 1.5);
        c.stage_gain_error = 0.002;
        let core = PipelineCore::drawn(&c, &mut rng());
        let dnl = max_dnl(widths_lsb(&c, &core, 20));
        assert!(dnl > 0.5, "gain errors: DNL {dnl}");
        let mut c = cfg(12, 1.5);
        c.comparator_offset_v = 1.0 / 40.0;
        let mut core = PipelineCore::drawn(&c, &mut rng());
        let ideal = PipelineCore::ideal(&c);
        assert!(
            core.stage_thresholds
                .iter()
                .zip(&ideal.stage_thresholds)
                .all(|(a, b)| a != b && (a - b).abs() < 0.25)
        );
        let with_flash = max_dnl(widths_lsb(&c, &core, 20));
        core.final_thresholds = ideal.final_thresholds.clone();
        assert_eq!(max_dnl(widths_lsb(&c, &core, 20)), 0.0);
        // The final flash's offsets of 0.05 of its LSB sigma reach the input as 0.05 LSB sigma (its LSB is
        // 2^10 input LSB, the gain ahead of it 2^10): a DNL of a few tenths at most.
        assert!(with_flash > 0.0 && with_flash < 0.3, "{with_flash}");
    }

    #[test]
    fn the_code_leaves_the_stated_number_of_clocks_after_its_sampling_edge() {
        // One clock per stage and one for the correction adder (the module's formula): a 12-bit pipeline of
        // 1.5-bit stages has 10 stages and a 2-bit flash, so 11 clocks of 50 ns; a given latency_cycles wins.
        let c = cfg(12, 1.5);
        assert_eq!((c.stages(), c.final_bits(), c.latency_cycles), (10, 2, 11));
        for (latency, want_s) in [(11, 550e-9), (4, 200e-9)] {
            let mut c = c;
            c.latency_cycles = latency;
            let mut ctx = build_context(1, 1, "p", None, Upstream::default());
            let Runtime::Quantizer(mut qz) = c.build(&mut ctx).unwrap() else {
                panic!("not a quantizer")
            };
            let probe = FnProbe(|t: f64| (2e5 * t).sin() * 0.9);
            for k in [0u64, 1, 17, 1000] {
                let ev = qz.convert(k, &probe);
                assert!((ev.t_sample_s - k as f64 * 50e-9).abs() < 1e-18);
                assert!(
                    (ev.t_avail_s - ev.t_sample_s - want_s).abs() < 1e-15,
                    "{latency}: {}",
                    ev.t_avail_s - ev.t_sample_s
                );
                assert_eq!(ev.code, ieee_code(&c, (2e5 * ev.t_sample_s).sin() * 0.9));
            }
            let b = qz.budget();
            let line = b.last().unwrap();
            assert!(
                line.stage
                    .contains(&format!("pipeline latency ({latency} sample clocks")),
                "{}",
                line.stage
            );
            assert!((line.seconds - want_s).abs() < 1e-15);
        }
    }

    #[test]
    fn the_stage_and_flash_split_follows_the_stage_resolution() {
        // K = (N - 2) / n stages and N - n K final bits (the module's formula), with the default latency K + 1.
        for (bits, sb, k, b) in [
            (10, 1.5, 8, 2),
            (16, 1.5, 14, 2),
            (12, 2.5, 5, 2),
            (13, 2.5, 5, 3),
            (14, 3.5, 4, 2),
            (12, 3.5, 3, 3),
            (13, 3.5, 3, 4),
        ] {
            let c = cfg(bits, sb);
            assert_eq!((c.stages(), c.final_bits()), (k, b), "{bits} bits, {sb}");
            let core = PipelineCore::ideal(&c);
            let per = 2 * ((1usize << c.stage_resolution()) - 1);
            assert_eq!(core.stage_thresholds.len(), k as usize * per);
            assert_eq!(core.final_thresholds.len(), 1 << b);
        }
    }
}
