//! Continuous-time filters (Butterworth, Bessel, Chebyshev type I, RC cascade; lowpass or highpass; orders 1..=8)
//! and their realisation on the uniform analog grid.
//!
//! # Analog prototypes
//! All prototypes are all-pole lowpass filters; the highpass is obtained by the substitution s -> w_c / s (so it
//! has `order` zeros at s = 0 and the same -3 dB / passband-edge frequency).
//! - Butterworth: -3.0103 dB (|H|^2 = 1/2) at the cutoff.
//! - Bessel: roots of the reverse Bessel polynomial, then scaled numerically so that |H|^2 = 1/2 at the cutoff.
//! - Chebyshev type I with `ripple_db`: the cutoff is the passband edge where the gain is -ripple_db. The ripple
//!   peaks at 0 dB: odd orders have 0 dB at DC, even orders have -ripple_db at DC (for the highpass: at infinite
//!   frequency). This is the convention of `scipy.signal.cheby1(..., analog=True)`.
//! - RC: `order` identical real poles, scaled so that the whole cascade has |H|^2 = 1/2 at the cutoff.
//!
//! # Realisation on the grid (dt = 1 / rate)
//! A cascade of second-order sections (direct form I with the feed-forward sum carried as one state), one
//! first-order section for odd orders, and
//! (odd lowpass orders and all highpasses) one short FIR section:
//! - every analog pole p is mapped exactly, z = exp(p dt), so the discrete filter has exactly the analog natural
//!   modes and is stable for every cutoff below rate/2;
//! - zeros are fitted by *moment matching*: with the poles fixed, the ideal numerator is the entire function
//!   G(s) = H(s) * prod(1 - exp((p - s) dt)), which we approximate by a polynomial in exp(-s dt) whose Taylor
//!   series in s agrees with that of G up to the number of free taps (exactly: the realisation reproduces the
//!   analog steady-state response to polynomial inputs of that degree). Second-order lowpass sections get 3
//!   taps each; the first-order lowpass section gets an FIR numerator of 4..=10 taps, the fewest whose group
//!   delay is within 0.3 % (and magnitude within 0.005 dB) of the analog section's up to rate/20 (2 taps would
//!   leave a sinc^2-like droop of -0.072 dB at rate/20; 3 taps a phase error); highpass sections keep their
//!   exact zeros (1 - z^-1)^m and one 3-tap FIR corrects the whole cascade (the exact-pole highpass runs late
//!   by about sum|Re p| dt^2 / 12; the FIR advances it).
//!
//! Accuracy (checked by the sweep test in `tests.rs`: Butterworth, Bessel, RC, Chebyshev with 0.01 / 0.5 / 3 / 6 dB
//! ripple, orders 1..=8, low- and highpass): for cutoffs from rate/20000 to rate/20 and all frequencies from
//! rate/2e7 up to rate/20, the realised magnitude is within 0.05 dB (measured worst 0.011 dB) and the group
//! delay within 1 % (measured worst 0.74 %) of the analog prototype's.
//!
//! Known costs of this choice, all above rate/20 or outside the promised cutoff range:
//! - exact phase in band needs a causal advance (highpass) or a one-sided FIR (first-order lowpass), which
//!   raises the gain between rate/20 and rate/2 above the prototype's: peak gain up to rate/2 is at most 1.25
//!   (lowpass) and 1.8 (highpass) for cutoffs up to rate/20 (about 1.13 at rate/200), and up to 4 for
//!   cutoffs near rate/2.5 (the highpass correction is then cut to fewer taps when it would boost rate/2 more
//!   than 2.5x);
//! - for cutoffs above rate/20 the errors grow (measured worst at rate/15: 0.18 dB and 2 % group delay; at
//!   rate/10: 0.23 dB and 7 %; both for highpasses, whose correction is then cut short); near rate/2.5 the
//!   filter stays stable with exact DC gain (lowpass) or exact zeros at DC (highpass);
//! - DC accuracy of the f64 recursion: measured 5.3e-11 relative at cutoff rate/2000, 1.2e-8 at rate/20000
//!   (order 8 Chebyshev), from rounding with poles close to z = 1.
//!
//! # Sample path and block path
//! `tick` runs the sections' recursion: 5 multiply-adds per second-order section plus one per FIR tap, the
//! recursion through the output one multiply and one subtraction per sample and section, which bounds its
//! speed by latency. `process` runs the sections as one state-space system over whole blocks of `BLOCK_LEN` = 8
//! samples (block state-space form, see `BlockForm`): y = M z + T u and z <- P z + Q u, written in column form
//! so that it vectorises; the only loop-carried dependency is the state update once per block. Samples left
//! over after the last whole block of a call, and calls shorter than a block, run the sections' recursion.
//! The FIR section runs sample by sample in both paths. No allocation in either.
//!
//! The two paths realise the same coefficients and differ by rounding only: `process` agrees with repeated
//! `tick` within 3.1e-11 of the output's peak over 1e6 samples of noise for every design at cutoff rate/2000
//! (2.6e-14 at rate/20); against a double-double run of the same recursion the block path is the more accurate
//! one for lowpasses (about 1e-15 against 1e-13..3e-12). The block state carries over exactly between calls
//! that end with a whole block, so the output does not depend on how whole blocks are grouped into calls;
//! calls that are not multiples of the block length shift the blocks and change only the rounding.
//!
//! # Files
//! This file holds `Filter` and its `AnalogStage` implementation; `design.rs` the analog prototypes;
//! `realise.rs` the sections, the FIR section and their coefficients (pole mapping, moment matching);
//! `block.rs` the block state-space form of the block path; `tests.rs` and `oracle_tests.rs` the unit tests
//! (the scipy reference values are read from `tests/reference/filters_analog.csv`).

mod block;
mod design;
mod kind;
#[cfg(test)]
mod oracle_tests;
mod realise;
#[cfg(test)]
mod tests;

use std::f64::consts::PI;

use num_complex::Complex64;

use super::AnalogStage;
pub use kind::{FilterCfg, FilterFamily, FilterResponse};
use crate::signal::stream::Timebase;

use block::{BLOCK_LEN, BlockForm, MAX_STATES};
use design::lowpass_prototype;
use realise::{Fir, MAX_FIR_TAPS, Section, poly_at, poly_delay, realise};

/// Highest supported filter order.
pub const MAX_ORDER: u32 = 8;

/// A continuous-time filter realised on the analog grid. See the module documentation for the prototypes and
/// the realisation.
#[derive(Debug, Clone)]
pub struct Filter {
    cfg: FilterCfg,
    dt_s: f64,
    /// Analog poles (rad/s): conjugate pairs adjacent (positive imaginary part first), then real poles.
    poles: Vec<Complex64>,
    /// Analog zeros (rad/s): none for a lowpass, `order` at s = 0 for a highpass.
    zeros: Vec<Complex64>,
    /// Gain g of H(s) = g * prod(N_i(s) / (s - p_i)), N_i = -p_i (lowpass) or s (highpass): the passband
    /// reference gain (1, or 1/sqrt(1 + eps^2) for an even-order Chebyshev).
    ref_gain: f64,
    sections: Vec<Section>,
    fir: Option<Fir>,
    /// The sections as one state-space system over blocks of `BLOCK_LEN` samples (the block path).
    block: BlockForm,
    /// The block form's state after the last call of `process` if that ended with a whole block (the
    /// sections' state is then its rounded image); `None` once the sections' recursion has run since.
    block_state: Option<[f64; MAX_STATES]>,
}

impl Filter {
    /// Design the analog prototype for `cfg` and realise it on the grid of `timebase`.
    ///
    /// # Panics
    /// If `cfg` is invalid (order 0 or > 8, cutoff not finite and positive, cutoff >= rate/2, Chebyshev ripple
    /// not finite and positive); the scenario checker prevents that.
    pub fn new(cfg: &FilterCfg, timebase: Timebase) -> Filter {
        let rate_hz = timebase.rate_hz;
        assert!(
            (1..=MAX_ORDER).contains(&cfg.order),
            "filter order must be 1..=8"
        );
        assert!(
            cfg.cutoff_hz.is_finite() && cfg.cutoff_hz > 0.0 && cfg.cutoff_hz < rate_hz / 2.0,
            "filter cutoff must be positive and below rate/2"
        );
        if let FilterFamily::Chebyshev { ripple_db } = cfg.family {
            assert!(
                ripple_db.is_finite() && ripple_db > 0.0,
                "Chebyshev ripple must be positive"
            );
        }
        let n = cfg.order as usize;
        let wc = 2.0 * PI * cfg.cutoff_hz;
        let (proto, ref_gain) = lowpass_prototype(cfg.family, n);
        let (poles, zeros) = match cfg.response {
            FilterResponse::Lowpass => (proto.iter().map(|p| p * wc).collect::<Vec<_>>(), vec![]),
            FilterResponse::Highpass => (
                proto.iter().map(|p| wc / p).collect::<Vec<_>>(),
                vec![Complex64::new(0.0, 0.0); n],
            ),
        };
        let dt_s = timebase.dt_s();
        let (sections, fir) = realise(&poles, cfg.response, ref_gain, dt_s);
        let block = BlockForm::new(&sections);
        Filter {
            cfg: *cfg,
            dt_s,
            poles,
            zeros,
            ref_gain,
            sections,
            fir,
            block,
            block_state: None,
        }
    }

    /// The configuration this filter was built from.
    pub fn cfg(&self) -> &FilterCfg {
        &self.cfg
    }

    /// Analog prototype poles (rad/s): conjugate pairs adjacent, then real poles.
    pub fn analog_poles(&self) -> &[Complex64] {
        &self.poles
    }

    /// Analog prototype zeros (rad/s): empty for a lowpass, `order` zeros at 0 for a highpass.
    pub fn analog_zeros(&self) -> &[Complex64] {
        &self.zeros
    }

    /// Gain k of the analog prototype H(s) = k prod(s - z_i) / prod(s - p_i) (units rad/s to the power
    /// `order` for a lowpass; dimensionless for a highpass).
    pub fn analog_gain(&self) -> f64 {
        match self.cfg.response {
            FilterResponse::Lowpass => {
                self.ref_gain
                    * self
                        .poles
                        .iter()
                        .fold(Complex64::new(1.0, 0.0), |acc, p| acc * -p)
                        .re
            }
            FilterResponse::Highpass => self.ref_gain,
        }
    }

    /// Group delay (s) of the analog prototype at `f_hz`, exact from the poles:
    /// sum over poles of -Re(p) / |j w - p|^2 (zeros at s = 0 add nothing for f > 0).
    pub fn analog_group_delay_s(&self, f_hz: f64) -> f64 {
        let s = Complex64::new(0.0, 2.0 * PI * f_hz);
        let from_poles: f64 = self.poles.iter().map(|p| -p.re / (s - p).norm_sqr()).sum();
        let from_zeros: f64 = self
            .zeros
            .iter()
            .filter(|z| (s - **z).norm_sqr() > 0.0)
            .map(|z| z.re / (s - z).norm_sqr())
            .sum();
        from_poles + from_zeros
    }

    /// The realised discrete response at `f_hz`: H_d(e^{j 2 pi f / rate}).
    pub fn discrete_response(&self, f_hz: f64) -> Complex64 {
        let zinv = Complex64::from_polar(1.0, -2.0 * PI * f_hz * self.dt_s);
        let mut h = Complex64::new(1.0, 0.0);
        for sec in &self.sections {
            h *= sec.numerator_at(zinv) / poly_at(&sec.denominator(), zinv);
        }
        if let Some(fir) = &self.fir {
            h *= poly_at(&fir.taps[..fir.len], zinv);
        }
        h
    }

    /// Group delay (s) of the realised discrete filter at `f_hz`, exact from the coefficients:
    /// for a polynomial P(z^-1) = sum p_k z^-k the delay is dt * Re(sum k p_k z^-k / P).
    pub fn discrete_group_delay_s(&self, f_hz: f64) -> f64 {
        let zinv = Complex64::from_polar(1.0, -2.0 * PI * f_hz * self.dt_s);
        let mut samples = 0.0;
        for sec in &self.sections {
            samples += sec.numerator_delay(zinv) - poly_delay(&sec.denominator(), zinv);
        }
        if let Some(fir) = &self.fir {
            samples += poly_delay(&fir.taps[..fir.len], zinv);
        }
        samples * self.dt_s
    }

    /// Clear the internal state (as if the input had been 0 forever).
    pub fn reset(&mut self) {
        self.block_state = None;
        for sec in &mut self.sections {
            sec.g = 0.0;
            sec.h = 0.0;
            sec.y1 = 0.0;
        }
        if let Some(fir) = &mut self.fir {
            fir.w = [0.0; MAX_FIR_TAPS];
        }
    }

    /// The sections (not the FIR section) sample by sample: the same arithmetic, in the same order per sample,
    /// as `tick`. Used for the samples that do not fill a block, and as the reference in the tests.
    fn process_samples(&mut self, input: &[f64], output: &mut [f64]) {
        self.block_state = None;
        output.copy_from_slice(input);
        // Two sections per pass, sample by sample: the second section's recursion overlaps the first's in the
        // pipeline instead of waiting for it block by block. State is kept in locals during the pass.
        let mut pairs = self.sections.chunks_exact_mut(2);
        for pair in &mut pairs {
            let (p, q) = pair.split_at_mut(1);
            let (p, q) = (&mut p[0], &mut q[0]);
            let (mut pg, mut ph, mut py) = (p.g, p.h, p.y1);
            let (mut qg, mut qh, mut qy) = (q.g, q.h, q.y1);
            for y in output.iter_mut() {
                let x = *y;
                let u = (p.b[0] * x + pg) - p.a1 * py;
                pg = (p.b[1] * x + ph) - p.a2 * py;
                ph = p.b[2] * x;
                py = u;
                let v = (q.b[0] * u + qg) - q.a1 * qy;
                qg = (q.b[1] * u + qh) - q.a2 * qy;
                qh = q.b[2] * u;
                qy = v;
                *y = v;
            }
            (p.g, p.h, p.y1) = (pg, ph, py);
            (q.g, q.h, q.y1) = (qg, qh, qy);
        }
        for sec in pairs.into_remainder() {
            for y in output.iter_mut() {
                *y = sec.tick(*y);
            }
        }
    }
}

impl AnalogStage for Filter {
    #[inline]
    fn tick(&mut self, x_v: f64) -> f64 {
        self.block_state = None;
        let mut y = x_v;
        for sec in &mut self.sections {
            y = sec.tick(y);
        }
        if let Some(fir) = &mut self.fir {
            y = fir.tick(y);
        }
        y
    }

    /// Block path: the sections in their block state-space form over whole blocks of `BLOCK_LEN` samples
    /// (see [`BlockForm`]), the leftover samples through the sections' own recursion (as `tick`), then the
    /// FIR section. Agrees with repeated `tick` to rounding (the block form sums in another order).
    fn process(&mut self, input: &[f64], output: &mut [f64]) {
        assert_eq!(input.len(), output.len(), "block lengths differ");
        let blocked = input.len() - input.len() % BLOCK_LEN;
        if blocked > 0 {
            // The block state carries over exactly from the previous call when that ended with a whole block
            // (so the output does not depend on how whole blocks are grouped into calls).
            let mut z = match self.block_state {
                Some(z) => z,
                None => BlockForm::state_of(&self.sections),
            };
            self.block
                .run(&mut z, &input[..blocked], &mut output[..blocked]);
            BlockForm::set_sections(&z, &mut self.sections, input[blocked - 1]);
            self.block_state = Some(z);
        }
        if blocked < input.len() {
            self.process_samples(&input[blocked..], &mut output[blocked..]);
        }
        if let Some(fir) = &mut self.fir {
            for y in output.iter_mut() {
                *y = fir.tick(*y);
            }
        }
    }

    /// The analog prototype's H(j 2 pi f).
    fn response(&self, f_hz: f64) -> Option<Complex64> {
        let s = Complex64::new(0.0, 2.0 * PI * f_hz);
        let mut h = Complex64::new(self.ref_gain, 0.0);
        for p in &self.poles {
            let num = match self.cfg.response {
                FilterResponse::Lowpass => -p,
                FilterResponse::Highpass => s,
            };
            h *= num / (s - p);
        }
        Some(h)
    }
}
