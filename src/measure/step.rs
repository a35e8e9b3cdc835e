//! Step metrics of the chain's output for a step source: 10-90 % rise time, overshoot and settling time to a
//! stated band, on the full-rate grid capture (the band-limited analysis record would slow the edge).
//!
//! The levels before and after are the output's means over the capture before the step and over the
//! capture's last tenth; every time is measured from the step at the source.

use serde::Serialize;

use crate::measure::chain::RunRecords;
use crate::scenario::Waveform;

/// Step metrics of the output.
#[derive(Debug, Clone, Serialize)]
pub struct StepMetrics {
    /// The source's step instant (s).
    pub at_s: f64,
    /// Output level before the step and at the end of the capture (V).
    pub initial_v: f64,
    pub final_v: f64,
    /// From the 10 % to the 90 % crossing of the output's step (s).
    pub rise_time_s: Option<f64>,
    /// From the source's step to the output's 50 % crossing (s).
    pub delay_50_s: Option<f64>,
    /// Largest excursion beyond the final level, in per cent of the output's step (0 when none).
    pub overshoot_percent: f64,
    /// The band settled into, as a fraction of the output's step (`analysis.settling_band`).
    pub settling_band: f64,
    /// From the source's step until the output stays within the band of its final level (s); absent when the
    /// output has not settled by the end of the capture.
    pub settling_time_s: Option<f64>,
}

/// Why step metrics could not be taken.
#[derive(Debug, Clone, PartialEq)]
pub enum StepProblem {
    /// The step happens before the capture starts (or after it ends).
    OutsideCapture { at_s: f64, t0_s: f64, t1_s: f64 },
    /// The output does not move (less than 1e-9 of its level, or nothing at all).
    NoStep,
}

impl std::fmt::Display for StepProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        use crate::format::units::format_si;
        match self {
            StepProblem::OutsideCapture { at_s, t0_s, t1_s } => write!(
                f,
                "no step metrics: the step at {} is outside the captured output ({} to {}); put `source.at` \
                 after `simulation.settle` and well before the end",
                format_si(*at_s, "s"),
                format_si(*t0_s, "s"),
                format_si(*t1_s, "s")
            ),
            StepProblem::NoStep => write!(f, "no step metrics: the output does not step"),
        }
    }
}

/// Time (s) where `u` first reaches `level` going up, from sample `from`, interpolated between samples.
fn first_crossing(
    u: &[f64],
    from: usize,
    level: f64,
    t0_s: f64,
    dt_s: f64,
) -> Option<(usize, f64)> {
    let i = (from..u.len()).find(|&i| u[i] >= level)?;
    if i == 0 || i == from {
        return Some((i, t0_s + i as f64 * dt_s));
    }
    let (a, b) = (u[i - 1], u[i]);
    let frac = if b > a { (level - a) / (b - a) } else { 1.0 };
    Some((i, t0_s + (i as f64 - 1.0 + frac) * dt_s))
}

/// Step metrics of `y` (volts on a grid from `t0_s` at `rate_hz`) for a step at `at_s`, settling to `band`
/// (a fraction of the output's step).
pub fn step_metrics(
    y: &[f64],
    t0_s: f64,
    rate_hz: f64,
    at_s: f64,
    band: f64,
) -> Result<StepMetrics, StepProblem> {
    let dt = 1.0 / rate_hz;
    let n = y.len();
    let t1_s = t0_s + n as f64 * dt;
    // The first sample at or after the step; at least two samples before it and a tenth of the record after.
    let k = ((at_s - t0_s) * rate_hz).ceil();
    if n < 20 || k < 2.0 || k as usize >= n - n / 10 {
        return Err(StepProblem::OutsideCapture { at_s, t0_s, t1_s });
    }
    let k = k as usize;
    let mean = |s: &[f64]| s.iter().sum::<f64>() / s.len() as f64;
    let initial_v = mean(&y[..k]);
    let final_v = mean(&y[n - n / 10..]);
    let step = final_v - initial_v;
    let scale = initial_v.abs().max(final_v.abs());
    if !step.is_finite() || step.abs() <= 1e-9 * scale || step == 0.0 {
        return Err(StepProblem::NoStep);
    }
    // The step normalised to rise from 0 to 1 whatever its sign.
    let u: Vec<f64> = y.iter().map(|v| (v - initial_v) / step).collect();
    let c10 = first_crossing(&u, k, 0.1, t0_s, dt);
    let c50 = first_crossing(&u, k, 0.5, t0_s, dt);
    let c90 = c10.and_then(|(i, _)| first_crossing(&u, i, 0.9, t0_s, dt));
    let rise_time_s = match (c10, c90) {
        (Some((_, a)), Some((_, b))) => Some(b - a),
        _ => None,
    };
    let peak = u[k..].iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let overshoot_percent = 100.0 * (peak - 1.0).max(0.0);
    // Settled: the last sample outside the band, then the crossing into it (interpolated).
    let outside = |v: f64| (v - 1.0).abs() > band;
    let settling_time_s = match (k..n).rev().find(|&i| outside(u[i])) {
        None => Some(0.0),
        Some(i) if i + 1 >= n - n / 10 => None,
        Some(i) => {
            let (a, b) = (u[i] - 1.0, u[i + 1] - 1.0);
            let edge = band.copysign(a);
            let frac = if (a - b).abs() > 0.0 {
                ((a - edge) / (a - b)).clamp(0.0, 1.0)
            } else {
                1.0
            };
            Some(t0_s + (i as f64 + frac) * dt - at_s)
        }
    };
    Ok(StepMetrics {
        at_s,
        initial_v,
        final_v,
        rise_time_s,
        delay_50_s: c50.map(|(_, t)| t - at_s),
        overshoot_percent,
        settling_band: band,
        settling_time_s,
    })
}

/// Step metrics of a run's output capture, for a step source; `None` for other sources.
pub fn from_run(run: &RunRecords<'_>, band: f64) -> Option<Result<StepMetrics, StepProblem>> {
    let Waveform::Step { at_s, .. } = run.waveform else {
        return None;
    };
    let cap = &run.capture;
    Some(step_metrics(cap.output, cap.t0_s, cap.rate_hz, *at_s, band))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Samples of `f(t - at)` (0 before the step) on a grid.
    fn record(n: usize, t0: f64, rate: f64, at: f64, f: impl Fn(f64) -> f64) -> Vec<f64> {
        (0..n)
            .map(|i| {
                let t = t0 + i as f64 / rate;
                if t < at { 0.0 } else { f(t - at) }
            })
            .collect()
    }

    #[test]
    fn a_first_order_step_rises_in_tau_ln_9_and_settles_in_tau_ln_100() {
        // Single pole: 1 - exp(-t/tau) crosses 10 % at tau ln(10/9) and 90 % at tau ln 10, so the 10-90 % rise
        // is tau ln 9; it is within 1 % from tau ln 100 on; no overshoot (textbook, from memory).
        let (rate, tau, at) = (1e6, 50e-6, 1e-3);
        let y = record(20_000, 0.5e-3, rate, at, |t| 2.0 - 3.0 * (-t / tau).exp());
        // Starts at -1 V, ends at 2 V.
        let y: Vec<f64> = y
            .iter()
            .map(|v| if *v == 0.0 { -1.0 } else { *v })
            .collect();
        let m2 = step_metrics(&y, 0.5e-3, rate, at, 0.01).unwrap();
        assert!((m2.initial_v + 1.0).abs() < 1e-12 && (m2.final_v - 2.0).abs() < 1e-9);
        let rise = m2.rise_time_s.unwrap();
        assert!((rise / (tau * 9f64.ln()) - 1.0).abs() < 1e-3, "rise {rise}");
        assert_eq!(m2.overshoot_percent, 0.0);
        let settle = m2.settling_time_s.unwrap();
        assert!(
            (settle / (tau * 100f64.ln()) - 1.0).abs() < 1e-3,
            "{settle}"
        );
        let d50 = m2.delay_50_s.unwrap();
        assert!((d50 / (tau * 2f64.ln()) - 1.0).abs() < 1e-3, "{d50}");
    }

    #[test]
    fn a_falling_underdamped_step_reads_its_overshoot() {
        // Second-order, damping zeta, natural angular frequency wn: the step peaks
        // exp(-pi zeta / sqrt(1 - zeta^2)) beyond its final value (textbook, from memory).
        let (rate, at, zeta, wn) = (1e6, 2e-3, 0.3f64, 2.0 * std::f64::consts::PI * 2e3);
        let wd = wn * (1.0 - zeta * zeta).sqrt();
        let s = |t: f64| {
            1.0 - (-zeta * wn * t).exp()
                * ((wd * t).cos() + zeta / (1.0 - zeta * zeta).sqrt() * (wd * t).sin())
        };
        // A falling step from +1 V to -0.5 V.
        let y: Vec<f64> = record(40_000, 0.0, rate, at, |t| 1.0 - 1.5 * s(t))
            .iter()
            .enumerate()
            .map(|(i, v)| if (i as f64) < at * rate { 1.0 } else { *v })
            .collect();
        let m = step_metrics(&y, 0.0, rate, at, 0.02).unwrap();
        let want = 100.0 * (-std::f64::consts::PI * zeta / (1.0 - zeta * zeta).sqrt()).exp();
        assert!(
            (m.overshoot_percent - want).abs() < 0.05,
            "{} vs {want}",
            m.overshoot_percent
        );
        assert!(m.settling_time_s.unwrap() > 0.0);
    }

    #[test]
    fn a_step_outside_the_capture_or_no_step_is_said() {
        let y = vec![1.0; 1000];
        assert_eq!(
            step_metrics(&y, 0.0, 1e3, 0.5, 0.01).unwrap_err(),
            StepProblem::NoStep
        );
        assert!(matches!(
            step_metrics(&y, 1.0, 1e3, 0.5, 0.01),
            Err(StepProblem::OutsideCapture { .. })
        ));
        // An output still moving at the end has no settling time.
        let y: Vec<f64> = (0..1000)
            .map(|i| if i < 100 { 0.0 } else { i as f64 })
            .collect();
        assert_eq!(
            step_metrics(&y, 0.0, 1e3, 0.1, 0.01)
                .unwrap()
                .settling_time_s,
            None
        );
    }
}
