//! The sample-and-hold: a tracking capacitor behind a switch that opens at (nominal instant + aperture delay
//! + jitter), then holds the captured voltage (with a pedestal and droop) until the conversion ends.
//!
//! Model:
//! - While the switch is closed the capacitor voltage v follows the input x through the switch resistance:
//!   dv/dt = (x - v) / tau (tau = `acquisition_s`; tau = 0 is ideal tracking, v = x).
//! - The switch opens at t_open = t_nominal + aperture_delay + e, e Gaussian with sigma = aperture_jitter
//!   (truncated at +-6 sigma so the engine's look-ahead bound holds). The held value is v(t_open) + hold_step.
//! - While holding, the value falls at `droop_v_per_s`: v_held(t) = v - droop (t - t_open).
//! - When the conversion ends ([`SampleHold::release`]) the switch closes and the capacitor starts tracking
//!   again from the voltage it holds at that instant.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use serde::Serialize;

use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::stages::Probe;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ReadContext, Role, Runtime, mechanism,
};
use crate::stages::roles::{BudgetLine, Hold};

/// `kind = "sample_hold"`. All zero = an ideal hold.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct SampleHoldCfg {
    /// Time constant with which the hold capacitor tracks the input (0 = ideal tracking).
    pub acquisition_s: f64,
    /// Pure delay between the nominal sampling instant and the moment the switch opens.
    pub aperture_delay_s: f64,
    /// Rms of a Gaussian timing error added to each sampling instant.
    pub aperture_jitter_s: f64,
    /// Rate at which the held voltage falls while holding (V/s; negative rises).
    pub droop_v_per_s: f64,
    /// Pedestal added to the held value when the switch opens (V).
    pub hold_step_v: f64,
    /// Hold capacitance for the switch's kT/C noise, drawn afresh for each held sample (F; 0 = no noise).
    pub capacitance_f: f64,
    /// Temperature of the kT/C noise (K).
    pub temperature_k: f64,
}

/// The Boltzmann constant (J/K), exact in the SI since 2019 (CODATA 2018).
pub const BOLTZMANN_J_PER_K: f64 = 1.380649e-23;

/// The temperature of the kT/C noise when `temperature` is not given (K).
pub const DEFAULT_TEMPERATURE_K: f64 = 300.0;

impl SampleHoldCfg {
    /// Rms of the kT/C noise of each held sample, sqrt(k T / C) (V; 0 without a capacitance).
    pub fn ktc_noise_v(&self) -> f64 {
        if self.capacitance_f > 0.0 {
            (BOLTZMANN_J_PER_K * self.temperature_k / self.capacitance_f).sqrt()
        } else {
            0.0
        }
    }
}

impl KindSpec for SampleHoldCfg {
    const NAME: &'static str = "sample_hold";
    const ROLE: Role = Role::Hold;
    const EXAMPLE: &'static str = r#"aperture_delay = "20 ns"
aperture_jitter = "1 ns"
droop = "50 V/s"
acquisition = "100 ns""#;
    const PARAMS: &'static [Param] = &[
        Param::spread("acquisition", Dimension::Time),
        Param::spread("aperture_delay", Dimension::Time),
        Param::spread("aperture_jitter", Dimension::Time),
        Param::spread("droop", Dimension::SlewRate),
        Param::spread("hold_step", Dimension::Voltage),
        Param::spread("capacitance", Dimension::Capacitance),
        Param::spread("temperature", Dimension::Temperature),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        use Dimension as D;
        Ok(SampleHoldCfg {
            acquisition_s: r.non_negative("acquisition", D::Time)?,
            aperture_delay_s: r.non_negative("aperture_delay", D::Time)?,
            aperture_jitter_s: r.non_negative("aperture_jitter", D::Time)?,
            droop_v_per_s: r.quantity("droop", D::SlewRate)?.map_or(0.0, |q| q.value),
            hold_step_v: r
                .quantity("hold_step", D::Voltage)?
                .map_or(0.0, |q| q.value),
            capacitance_f: r.non_negative("capacitance", D::Capacitance)?,
            temperature_k: r
                .positive("temperature", D::Temperature)?
                .map_or(DEFAULT_TEMPERATURE_K, |q| q.value),
        })
    }

    fn ablations(&self) -> Vec<Ablation> {
        [
            ("aperture_jitter", self.aperture_jitter_s),
            ("acquisition", self.acquisition_s),
            ("droop", self.droop_v_per_s),
            ("hold_step", self.hold_step_v),
        ]
        .into_iter()
        .filter(|(_, v)| *v != 0.0)
        .map(|(name, _)| {
            Ablation::new(
                mechanism::<Self>(name),
                format!("{name} = 0"),
                vec![KeyEdit::Set(name, 0.0)],
            )
        })
        .collect()
    }

    /// The hold's random stream comes from [`BuildContext::hold_rng`], derived from the quantizer's index, so
    /// that a chain draws the same jitter whether the hold is counted or not. A static bench keeps the hold's
    /// level errors but not its timing (no aperture jitter).
    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let cfg = SampleHoldCfg {
            aperture_jitter_s: if ctx.static_bench {
                0.0
            } else {
                self.aperture_jitter_s
            },
            ..*self
        };
        let mut sh = SampleHold::new(&cfg, ctx.hold_rng.clone()).with_label(ctx.label.clone());
        if let Some(tb) = ctx.timebase {
            sh.set_input_step_s(tb.dt_s());
        }
        ctx.pending_hold = Some(Box::new(sh));
        Ok(Runtime::Hold)
    }
}

/// Tracking is integrated over at most this many time constants before the switch opens; older input has
/// decayed by e^-40 (about 4e-18).
const MAX_TRACK_TAUS: f64 = 40.0;
/// Jitter draws are truncated at this many sigma.
const JITTER_CLIP_SIGMA: f64 = 6.0;
/// Default integration sub-step, in time constants, when no input grid step was given.
const SUBSTEP_TAUS: f64 = 1.0 / 16.0;

/// A voltage captured when the switch opened.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Held {
    /// Instant the switch opened (s).
    pub t_open_s: f64,
    /// Held value at `t_open_s`, pedestal included (V).
    pub v: f64,
    /// Rate at which the held value falls (V/s).
    pub droop_v_per_s: f64,
}

impl Held {
    /// Held value (V) at `t_s >= t_open_s`: `v - droop (t - t_open)`.
    pub fn value_at(&self, t_s: f64) -> f64 {
        self.v - self.droop_v_per_s * (t_s - self.t_open_s)
    }
}

/// The sample-and-hold stage.
pub struct SampleHold {
    /// The stage's label when it was written in the scenario (none for the ideal hold of a bare quantizer).
    label: Option<String>,
    cfg: SampleHoldCfg,
    rng: ChaCha8Rng,
    /// The last capture, until its release.
    last_held: Option<Held>,
    /// Instant the switch last closed and the capacitor voltage then: tracking starts from there.
    released: Option<(f64, f64)>,
    /// Largest integration sub-step (s).
    max_step_s: f64,
}

impl SampleHold {
    /// A sample-and-hold with the given imperfections; `rng` draws the aperture jitter.
    pub fn new(cfg: &SampleHoldCfg, rng: ChaCha8Rng) -> SampleHold {
        SampleHold {
            label: None,
            cfg: *cfg,
            rng,
            last_held: None,
            released: None,
            max_step_s: f64::INFINITY,
        }
    }

    /// An ideal hold (all imperfections zero), used by a SAR converter with `input = "held"` and no
    /// sample-and-hold stage in front of it.
    pub fn ideal() -> SampleHold {
        SampleHold::new(&SampleHoldCfg::default(), ChaCha8Rng::seed_from_u64(0))
    }

    /// Limit the integration sub-step of the tracking capacitor to `dt_s` (normally the analog grid step, so
    /// the integration sees every grid sample of the input). Without it the sub-step is tau/16.
    pub fn set_input_step_s(&mut self, dt_s: f64) {
        if dt_s > 0.0 {
            self.max_step_s = dt_s;
        }
    }

    /// Open the switch for the conversion whose nominal sampling instant is `t_nominal_s`, reading the input
    /// from `probe`, and return the held value.
    ///
    /// With acquisition tau > 0 the capacitor voltage is integrated from the last release (starting from the
    /// voltage held then) or, when the track time exceeds 40 tau or nothing was held before, from 40 tau
    /// before the opening starting at the input value there. The integration uses sub-steps with the input
    /// taken as linear between probe points, solved exactly over each sub-step.
    pub fn acquire(&mut self, t_nominal_s: f64, probe: &dyn Probe) -> Held {
        let sigma = self.cfg.aperture_jitter_s;
        let jitter = if sigma > 0.0 {
            let z: f64 = StandardNormal.sample(&mut self.rng);
            sigma * z.clamp(-JITTER_CLIP_SIGMA, JITTER_CLIP_SIGMA)
        } else {
            0.0
        };
        let t_open = t_nominal_s + self.cfg.aperture_delay_s + jitter;
        let tau = self.cfg.acquisition_s;
        let v_cap = if tau <= 0.0 {
            probe.value_at(t_open)
        } else {
            let earliest = t_open - MAX_TRACK_TAUS * tau;
            let (t_start, v_start) = match self.released {
                Some((t_r, v_r)) if t_r >= earliest => (t_r, v_r),
                _ => (earliest, probe.value_at(earliest)),
            };
            self.track(t_start, v_start, t_open, probe)
        };
        let ktc = self.cfg.ktc_noise_v();
        let v_cap = if ktc > 0.0 {
            let z: f64 = StandardNormal.sample(&mut self.rng);
            v_cap + ktc * z
        } else {
            v_cap
        };
        let held = Held {
            t_open_s: t_open,
            v: v_cap + self.cfg.hold_step_v,
            droop_v_per_s: self.cfg.droop_v_per_s,
        };
        self.last_held = Some(held);
        held
    }

    /// Capacitor voltage at `t_end` after tracking the input from `(t_start, v_start)`.
    ///
    /// Over a sub-step of length h where the input goes linearly from x0 to x1 (slope s = (x1 - x0)/h), the
    /// exact solution of dv/dt = (x - v)/tau is v(h) = x1 - s tau + (v0 - x0 + s tau) e^(-h/tau).
    fn track(&self, t_start: f64, v_start: f64, t_end: f64, probe: &dyn Probe) -> f64 {
        let tau = self.cfg.acquisition_s;
        let span = t_end - t_start;
        if span <= 0.0 {
            return v_start;
        }
        let h_max = (tau * SUBSTEP_TAUS).min(self.max_step_s);
        let steps = (span / h_max).ceil().max(1.0) as u64;
        let h = span / steps as f64;
        let e = (-h / tau).exp();
        let mut v = v_start;
        let mut x0 = probe.value_at(t_start);
        for i in 1..=steps {
            // Instants computed from the index, never accumulated; the last one is exactly t_end.
            let t1 = if i == steps {
                t_end
            } else {
                t_start + span * (i as f64 / steps as f64)
            };
            let x1 = probe.value_at(t1);
            let s_tau = (x1 - x0) / h * tau;
            v = x1 - s_tau + (v - x0 + s_tau) * e;
            x0 = x1;
        }
        v
    }

    /// The conversion ended: the switch closes (tracking resumes) at `t_s`, from the voltage then held.
    pub fn release(&mut self, t_s: f64) {
        if let Some(h) = self.last_held.take() {
            self.released = Some((t_s, h.value_at(t_s)));
        }
    }

    /// How far back (s) before a nominal sampling instant the probe must keep input history, given the
    /// time the hold tracks between conversions (`track_time_s`, from the previous release to the next
    /// nominal instant).
    pub fn history_needed_s(&self, track_time_s: f64) -> f64 {
        let tau = self.cfg.acquisition_s;
        let track = if tau > 0.0 {
            track_time_s.max(0.0).min(MAX_TRACK_TAUS * tau)
        } else {
            0.0
        };
        (track + JITTER_CLIP_SIGMA * self.cfg.aperture_jitter_s - self.cfg.aperture_delay_s)
            .max(0.0)
    }

    /// Latest input instant an acquisition may ask the probe for, relative to its nominal instant (s):
    /// aperture delay + 6 sigma of jitter (the jitter is truncated there).
    pub fn lookahead_s(&self) -> f64 {
        (self.cfg.aperture_delay_s + JITTER_CLIP_SIGMA * self.cfg.aperture_jitter_s).max(0.0)
    }
}

impl SampleHold {
    /// Name the hold for budget lines.
    pub fn with_label(mut self, label: String) -> SampleHold {
        self.label = Some(label);
        self
    }
}

impl Hold for SampleHold {
    fn acquire(&mut self, t_nominal_s: f64, probe: &dyn Probe) -> Held {
        SampleHold::acquire(self, t_nominal_s, probe)
    }
    fn release(&mut self, t_s: f64) {
        SampleHold::release(self, t_s)
    }
    fn history_needed_s(&self, track_time_s: f64) -> f64 {
        SampleHold::history_needed_s(self, track_time_s)
    }
    fn lookahead_s(&self) -> f64 {
        SampleHold::lookahead_s(self)
    }
    fn budget(&self) -> Vec<BudgetLine> {
        match &self.label {
            Some(l) => vec![BudgetLine {
                stage: format!("{l}: aperture delay"),
                seconds: self.cfg.aperture_delay_s,
            }],
            None => Vec::new(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    use crate::stages::FnProbe;

    fn sh(cfg: SampleHoldCfg) -> SampleHold {
        SampleHold::new(&cfg, ChaCha8Rng::seed_from_u64(11))
    }

    #[test]
    fn ideal_hold_captures_the_input_at_the_nominal_instant() {
        let mut h = SampleHold::ideal();
        let p = FnProbe(|t: f64| (1234.5 * t).sin());
        for k in 0..100 {
            let t = k as f64 * 1.3e-6;
            let held = h.acquire(t, &p);
            assert_eq!(held.t_open_s, t);
            assert_eq!(held.v, (1234.5 * t).sin());
            assert_eq!(held.value_at(t + 1e-6), held.v);
            h.release(t + 1e-6);
        }
        assert_eq!(h.lookahead_s(), 0.0);
        assert_eq!(h.history_needed_s(1.0), 0.0);
    }

    #[test]
    fn ktc_noise_of_one_picofarad_at_300_k_is_64_4_microvolts_rms() {
        // kT/C noise: sqrt(k T / C) rms per held sample (common practice, no source), with the Boltzmann
        // constant k = 1.380649e-23 J/K (exact, CODATA 2018): 1 pF at 300 K gives 64.36 uV.
        let cfg = SampleHoldCfg {
            capacitance_f: 1e-12,
            temperature_k: 300.0,
            ..Default::default()
        };
        assert!((cfg.ktc_noise_v() - 64.36e-6).abs() < 0.01e-6, "{}", cfg.ktc_noise_v());
        let mut h = sh(cfg);
        let n = 100_000;
        let x = 0.7;
        let errs: Vec<f64> = (0..n)
            .map(|i| {
                let t = i as f64 * 1e-6;
                let held = h.acquire(t, &FnProbe(|_| x));
                h.release(t + 0.5e-6);
                held.v - x
            })
            .collect();
        let mean = errs.iter().sum::<f64>() / n as f64;
        let rms = (errs.iter().map(|e| e * e).sum::<f64>() / n as f64).sqrt();
        // Sample statistics of n Gaussian draws: mean within a few sigma/sqrt(n), rms within a few 1/sqrt(2n).
        assert!(mean.abs() < 5.0 * 64.4e-6 / (n as f64).sqrt(), "mean {mean}");
        assert!((rms / cfg.ktc_noise_v() - 1.0).abs() < 5.0 / (2.0 * n as f64).sqrt(), "rms {rms}");
        // Independent from sample to sample.
        let r1 = errs.windows(2).map(|w| w[0] * w[1]).sum::<f64>() / (n as f64 * rms * rms);
        assert!(r1.abs() < 0.02, "lag-1 correlation {r1}");
        // No capacitance, no noise.
        let mut h = sh(SampleHoldCfg::default());
        assert_eq!(h.acquire(0.0, &FnProbe(|_| x)).v, x);
    }

    #[test]
    fn aperture_delay_and_jitter_on_a_ramp_give_mean_and_rms_error_slope_times_sigma() {
        // For x = slope t, a timing error e gives a value error slope e, so the held error has mean
        // slope * delay and rms slope * sigma (first-order Taylor, exact for a ramp; common practice, no
        // source).
        let slope = 1e5; // V/s
        let sigma = 2e-9;
        let delay = 5e-9;
        let mut h = sh(SampleHoldCfg {
            aperture_delay_s: delay,
            aperture_jitter_s: sigma,
            ..Default::default()
        });
        let p = FnProbe(move |t: f64| slope * t);
        let n = 100_000;
        let (mut sum, mut sum2) = (0.0, 0.0);
        for k in 0..n {
            let t = k as f64 * 1e-6;
            let e = h.acquire(t, &p).v - slope * t;
            sum += e;
            sum2 += e * e;
            h.release(t + 0.5e-6);
        }
        let mean = sum / n as f64;
        let sd = (sum2 / n as f64 - mean * mean).sqrt();
        // Statistical tolerances: the sd estimate over 1e5 draws has relative spread ~ 1/sqrt(2e5) = 0.2 %.
        assert!((mean / (slope * delay) - 1.0).abs() < 0.01, "mean {mean}");
        assert!((sd / (slope * sigma) - 1.0).abs() < 0.02, "sd {sd}");
        assert!((h.lookahead_s() - (delay + 6.0 * sigma)).abs() < 1e-18);
    }

    #[test]
    fn droop_lowers_the_held_value_linearly_and_the_pedestal_adds() {
        let mut h = sh(SampleHoldCfg {
            droop_v_per_s: 1e3,
            hold_step_v: 0.01,
            ..Default::default()
        });
        let p = FnProbe(|_| 1.0);
        let held = h.acquire(2e-6, &p);
        assert!((held.v - 1.01).abs() < 1e-15);
        for k in 0..10 {
            let dt = k as f64 * 1e-7;
            let want = 1.01 - 1e3 * dt;
            assert!((held.value_at(2e-6 + dt) - want).abs() < 1e-12);
        }
    }

    #[test]
    fn acquisition_of_a_step_tracks_as_one_minus_exp() {
        // A first-order RC tracking a unit step for T from 0 V reaches 1 - exp(-T/tau) (closed form of the
        // first-order step response, common practice, no source).
        let tau = 10e-9;
        for t_track in [0.5 * tau, tau, 3.0 * tau, 7.3 * tau, 60.0 * tau] {
            let mut h = sh(SampleHoldCfg {
                acquisition_s: tau,
                ..Default::default()
            });
            let t_rel = 1e-6;
            // Input 0 until the release instant, 1 from then on.
            let p = FnProbe(move |t: f64| if t >= t_rel { 1.0 } else { 0.0 });
            let first = h.acquire(0.5e-6, &p);
            assert!(first.v.abs() < 1e-15);
            h.release(t_rel);
            let held = h.acquire(t_rel + t_track, &p);
            let want = 1.0 - (-t_track / tau).exp();
            assert!(
                (held.v - want).abs() < 1e-12,
                "T/tau = {}: {} vs {want}",
                t_track / tau,
                held.v
            );
        }
    }

    #[test]
    fn acquisition_tracking_a_sine_matches_the_first_order_steady_state() {
        // Steady state of dv/dt = (x - v)/tau for x = sin(w t): amplitude 1/sqrt(1 + (w tau)^2), phase
        // -atan(w tau) (first-order low-pass, common practice, no source). Integrated at a coarse input step.
        let tau = 1e-6;
        let w = 2.0 * std::f64::consts::PI * 50e3;
        let mut h = sh(SampleHoldCfg {
            acquisition_s: tau,
            ..Default::default()
        });
        h.set_input_step_s(50e-9);
        let p = FnProbe(move |t: f64| (w * t).sin());
        let t = 123e-6;
        let held = h.acquire(t, &p); // nothing held before: starts 40 tau back
        let g = 1.0 / (1.0 + (w * tau).powi(2)).sqrt();
        let want = g * (w * t - (w * tau).atan()).sin();
        // Piecewise-linear input at 50 ns steps: error ~ (w h)^2 / 8 relative, below 1e-3 here.
        assert!((held.v - want).abs() < 2e-3, "{} vs {want}", held.v);
    }

    #[test]
    fn history_covers_the_tracking_window() {
        let h = sh(SampleHoldCfg {
            acquisition_s: 1e-8,
            aperture_jitter_s: 1e-10,
            aperture_delay_s: 2e-10,
            ..Default::default()
        });
        assert!((h.history_needed_s(1e-7) - (1e-7 + 6e-10 - 2e-10)).abs() < 1e-20);
        assert!((h.history_needed_s(1.0) - (4e-7 + 6e-10 - 2e-10)).abs() < 1e-20);
    }
}
