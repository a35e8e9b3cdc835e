//! The `amplifier` stage: `y = gain * x + offset` through the output amplifier model of
//! [`crate::stages::slew`] (slew limit, first-order time constant, rails), on the analog grid.
//!
//! The input is treated as linear between grid samples, so the amplifier's target moves linearly over
//! each grid step and is integrated exactly with [`OutputAmp::advance_linear`].

use num_complex::Complex64;

use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;

use crate::signal::stream::Timebase;
use crate::error::{Error, Result};
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::stages::AnalogStage;
use crate::stages::kind::{
    Ablation, BuildContext, KindSpec, Param, Rates, ReadContext, Role, Runtime, Upstream,
};
use crate::stages::slew::{OUTPUT_AMP_PARAMS, OutputAmp, OutputAmpCfg, read_output_amp};

/// `kind = "amplifier"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AmplifierCfg {
    /// Voltage gain (V/V).
    pub gain: f64,
    /// Added at the output (V).
    pub offset_v: f64,
    pub output: OutputAmpCfg,
    /// Input-referred voltage noise density, white over the analog grid's band (V/sqrt(Hz); 0 = none).
    pub noise_density_v_per_rthz: f64,
}

impl KindSpec for AmplifierCfg {
    const NAME: &'static str = "amplifier";
    const ROLE: Role = Role::Analog;
    const EXAMPLE: &'static str = r#"gain = 2
slew_rate = "5 V/us"
bandwidth = "200 kHz""#;
    const PARAMS: &'static [Param] = &[
        Param::spread("gain", Dimension::Gain),
        Param::spread("offset", Dimension::Voltage),
        OUTPUT_AMP_PARAMS[0],
        OUTPUT_AMP_PARAMS[1],
        OUTPUT_AMP_PARAMS[2],
        OUTPUT_AMP_PARAMS[3],
        Param::spread("noise_density", Dimension::NoiseDensity),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        Ok(AmplifierCfg {
            gain: r
                .quantity("gain", Dimension::Gain)?
                .map_or(1.0, |q| q.value),
            offset_v: r
                .quantity("offset", Dimension::Voltage)?
                .map_or(0.0, |q| q.value),
            output: read_output_amp(r)?,
            noise_density_v_per_rthz: r.non_negative("noise_density", Dimension::NoiseDensity)?,
        })
    }

    fn ablations(&self) -> Vec<Ablation> {
        self.output.ablations(Self::NAME)
    }

    fn rates(&self) -> Rates {
        Rates {
            lowpass_hz: self.output.bandwidth_hz(),
            highpass_hz: None,
        }
    }

    fn passband_gain(&self, _up: &Upstream) -> f64 {
        self.gain
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let tb = ctx
            .timebase
            .ok_or_else(|| Error::Run("an amplifier needs the analog grid".into()))?;
        let mut amp = Amplifier::new(self, tb);
        if self.noise_density_v_per_rthz > 0.0 {
            // White over the grid's band 0..rate/2: variance density^2 * rate / 2 per grid sample.
            let sigma = self.noise_density_v_per_rthz * (0.5 * tb.rate_hz).sqrt();
            amp.noise = Some((sigma, ctx.rng.clone()));
        }
        Ok(Runtime::Analog(Box::new(amp)))
    }
}

/// A gain stage with a slew-limited, first-order, railed output.
#[derive(Debug, Clone)]
pub struct Amplifier {
    /// Voltage gain (V/V).
    gain: f64,
    /// Output offset (V).
    offset_v: f64,
    amp: OutputAmp,
    /// Grid step (s).
    dt_s: f64,
    /// The target at the previous grid sample (V); None before the first sample.
    prev_target_v: Option<f64>,
    /// Input noise: rms per grid sample (V) and its random stream; None without noise.
    noise: Option<(f64, ChaCha8Rng)>,
}

impl Amplifier {
    /// An amplifier on the grid of `timebase`. It starts settled: the first sample's output is its own
    /// target `gain * x + offset` (clipped to the rails), as if that input had been applied forever.
    pub fn new(cfg: &AmplifierCfg, timebase: Timebase) -> Self {
        Amplifier {
            gain: cfg.gain,
            offset_v: cfg.offset_v,
            amp: OutputAmp::new(&cfg.output, cfg.offset_v),
            dt_s: timebase.dt_s(),
            prev_target_v: None,
            noise: None,
        }
    }
}

impl AnalogStage for Amplifier {
    fn tick(&mut self, x_v: f64) -> f64 {
        let x_v = match &mut self.noise {
            Some((sigma, rng)) => {
                let z: f64 = StandardNormal.sample(rng);
                x_v + *sigma * z
            }
            None => x_v,
        };
        let target = self.gain * x_v + self.offset_v;
        let y = match self.prev_target_v {
            None => {
                self.amp.set_value_v(target);
                self.amp.value_v()
            }
            Some(prev) => self.amp.advance_linear(prev, target, self.dt_s),
        };
        self.prev_target_v = Some(target);
        y
    }

    /// `gain / (1 + j 2 pi f tau)` (slew and rails ignored; offset is not part of the small signal).
    fn response(&self, f_hz: f64) -> Option<Complex64> {
        Some(self.gain * self.amp.response(f_hz))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use std::f64::consts::PI;

    fn amp_cfg(gain: f64, offset: f64, sr: Option<f64>, tau: Option<f64>) -> AmplifierCfg {
        AmplifierCfg {
            gain,
            offset_v: offset,
            output: OutputAmpCfg {
                slew_rate_v_per_s: sr,
                tau_s: tau,
                rails_v: None,
            },
            noise_density_v_per_rthz: 0.0,
        }
    }

    /// Amplitude and phase (rad) of the component at `f` in `y` (grid `rate`, first sample at index
    /// `n0`), by least squares on sin/cos/DC over a whole number of periods.
    fn fit(y: &[f64], n0: usize, f: f64, rate: f64) -> (f64, f64) {
        let (mut s, mut c) = (0.0, 0.0);
        let mean = y.iter().sum::<f64>() / y.len() as f64;
        for (i, v) in y.iter().enumerate() {
            let ph = 2.0 * PI * f * (n0 + i) as f64 / rate;
            s += (v - mean) * ph.sin();
            c += (v - mean) * ph.cos();
        }
        let n = y.len() as f64;
        let (a, b) = (2.0 * s / n, 2.0 * c / n); // y ~ a sin + b cos
        ((a * a + b * b).sqrt(), b.atan2(a))
    }

    #[test]
    fn input_noise_density_gives_its_rms_over_the_grid_band_times_the_gain() {
        // White noise of density e_n (V/sqrt Hz) over 0..fs/2 has rms e_n sqrt(fs/2) (the one-sided density
        // integrated over the band; common practice, no source); the amplifier multiplies it by its gain.
        let (rate, e_n, gain) = (4e6, 20e-9, 10.0);
        let mut cfg = amp_cfg(gain, 0.0, None, None);
        cfg.noise_density_v_per_rthz = e_n;
        let mut ctx = BuildContext {
            label: "amp".into(),
            timebase: Some(Timebase::new(rate)),
            rng: ChaCha8Rng::seed_from_u64(11),
            hold_rng: ChaCha8Rng::seed_from_u64(12),
            static_bench: false,
            upstream: Upstream::default(),
            pending_hold: None,
        };
        let Runtime::Analog(mut a) = cfg.build(&mut ctx).unwrap() else {
            panic!("an analog stage")
        };
        let n = 200_000;
        let y: Vec<f64> = (0..n).map(|_| a.tick(0.0)).collect();
        let rms = (y.iter().map(|v| v * v).sum::<f64>() / n as f64).sqrt();
        let want = gain * e_n * (0.5 * rate).sqrt();
        // The sample rms of n Gaussian draws is within a few times 1/sqrt(2n) of sigma (relative).
        assert!((rms / want - 1.0).abs() < 5.0 / (2.0 * n as f64).sqrt(), "{rms} vs {want}");
        // White: neighbouring samples are uncorrelated.
        let r1 = y.windows(2).map(|w| w[0] * w[1]).sum::<f64>() / (n as f64 * rms * rms);
        assert!(r1.abs() < 0.02, "lag-1 correlation {r1}");
        // Without a density the output is exactly the gain times the input.
        let cfg = amp_cfg(gain, 0.0, None, None);
        let Runtime::Analog(mut a) = cfg.build(&mut ctx).unwrap() else {
            panic!()
        };
        assert_eq!(a.tick(0.1), gain * 0.1);
    }

    #[test]
    fn tick_and_process_agree() {
        let mut a = Amplifier::new(
            &amp_cfg(3.0, 0.1, Some(2e6), Some(0.3e-6)),
            Timebase::new(1e6),
        );
        let mut b = a.clone();
        let mut r = ChaCha8Rng::seed_from_u64(4);
        let x: Vec<f64> = (0..5000).map(|_| 2.0 * r.random::<f64>() - 1.0).collect();
        let ticked: Vec<f64> = x.iter().map(|v| a.tick(*v)).collect();
        let mut processed = vec![0.0; x.len()];
        b.process(&x[..1234], &mut processed[..1234]);
        b.process(&x[1234..], &mut processed[1234..]);
        for (p, q) in ticked.iter().zip(&processed) {
            assert_eq!(p.to_bits(), q.to_bits());
        }
    }

    #[test]
    fn small_signal_sine_matches_the_response() {
        // A linear time-invariant stage scales and shifts a sine by H(j 2 pi f), here the first-order
        // H = gain / (1 + j 2 pi f tau): common practice, no source. The grid input is interpolated
        // linearly, which changes the amplitude at the grid instants by a relative
        // O((pi f / rate)^2) ~ 1e-5 here, within the tolerance.
        let rate = 1e6;
        let f = 2500.0;
        let tau = 1.0 / (2.0 * PI * 10e3);
        let gain = -2.0;
        let mut amp = Amplifier::new(
            &amp_cfg(gain, 0.3, Some(1e9), Some(tau)),
            Timebase::new(rate),
        );
        let n = 40_000; // 100 periods
        let y: Vec<f64> = (0..n)
            .map(|k| amp.tick(0.1 * (2.0 * PI * f * k as f64 / rate).sin()))
            .collect();
        // Skip the first half (start-up transient decays as exp(-t/tau), tau = 16 us).
        let (mag, ph) = fit(&y[n / 2..], n / 2, f, rate);
        let h = amp.response(f).unwrap();
        assert!(
            (mag / 0.1 - h.norm()).abs() < 1e-4 * h.norm(),
            "{mag} vs {}",
            0.1 * h.norm()
        );
        let dph = (ph - h.arg() + PI).rem_euclid(2.0 * PI) - PI;
        assert!(dph.abs() < 1e-4, "phase error {dph}");
        // The offset is kept.
        let mean = y[n / 2..].iter().sum::<f64>() / (n / 2) as f64;
        assert!((mean - 0.3).abs() < 1e-9);
    }

    #[test]
    fn slew_limited_large_sine_becomes_a_triangle_of_slope_sr() {
        // Above the full-power bandwidth SR / (2 pi Vp) the output is a triangle of slope +-SR and peak
        // SR / (4 f): common practice, no source.
        let rate = 50e6;
        let sr = 1e6; // 1 V/us
        let gain = 2.0;
        let vp = 10.0; // at the output
        let f_p = sr / (2.0 * PI * vp);
        let f = 20.0 * f_p; // about 318 kHz
        let mut amp = Amplifier::new(
            &amp_cfg(gain, 0.0, Some(sr), Some(10e-9)),
            Timebase::new(rate),
        );
        // The triangle starts off-centre (the output begins at 0 and ramps up for half a period); its
        // centre decays by about 1 - 4 f_p / f = 0.8 per period, so skip 40 periods.
        let n = (80.0 * rate / f) as usize;
        let y: Vec<f64> = (0..n)
            .map(|k| amp.tick(vp / gain * (2.0 * PI * f * k as f64 / rate).sin()))
            .collect();
        let tail = &y[n / 2..];
        let dt = 1.0 / rate;
        let on_slope = tail
            .windows(2)
            .filter(|w| (((w[1] - w[0]) / dt).abs() - sr).abs() < 1e-6 * sr)
            .count();
        assert!(
            on_slope as f64 > 0.95 * (tail.len() - 1) as f64,
            "{on_slope}"
        );
        let peak = tail.iter().fold(0.0f64, |a, &v| a.max(v.abs()));
        let want = sr / (4.0 * f);
        assert!((peak - want).abs() < 0.02 * want, "peak {peak} want {want}");
    }

    #[test]
    fn rails_clip_and_the_first_sample_starts_settled() {
        let mut c = amp_cfg(10.0, 0.5, Some(1e6), Some(1e-6));
        c.output.rails_v = Some((-5.0, 5.0));
        let mut amp = Amplifier::new(&c, Timebase::new(1e6));
        assert_eq!(amp.tick(0.2), 2.5);
        assert_eq!(amp.tick(0.2), 2.5);
        for _ in 0..100 {
            amp.tick(1.0);
        }
        assert_eq!(amp.tick(1.0), 5.0);
        let mut fresh = Amplifier::new(&c, Timebase::new(1e6));
        assert_eq!(fresh.tick(-3.0), -5.0);
    }

    #[test]
    fn delays_follow_the_first_order_response() {
        // First-order lowpass: group delay tau / (1 + (2 pi f tau)^2), phase delay
        // atan(2 pi f tau) / (2 pi f): common practice, no source.
        let tau = 1e-6;
        let amp = Amplifier::new(&amp_cfg(4.0, 0.0, None, Some(tau)), Timebase::new(1e7));
        for f in [1e3, 1e5, 1.59e5, 1e6] {
            let w = 2.0 * PI * f;
            let gd = tau / (1.0 + (w * tau).powi(2));
            assert!((amp.group_delay_s(f) - gd).abs() < 1e-6 * gd, "f={f}");
            let pd = (w * tau).atan() / w;
            assert!((amp.phase_delay_s(f) - pd).abs() < 1e-9 * pd, "f={f}");
        }
        let h = amp.response(0.0).unwrap();
        assert_eq!(h, Complex64::new(4.0, 0.0));
    }
}
