//! Two-tone intermodulation distortion (IEEE Std 1241, intermodulation distortion): the second- and
//! third-order products of two tones f1 < f2 at f2 - f1, f1 + f2, 2 f1 - f2 and 2 f2 - f1, each in dBc
//! relative to the tone at f1, their power sums per order and in total.
//!
//! The amplitudes come from one joint least-squares fit of the two tones and every product at their known
//! frequencies plus an offset ([`sinefit::fit_multitone`]), so the tones' leakage is part of the model and the
//! record need not be coherent.

use serde::Serialize;

use crate::measure::chain::RunRecords;
use crate::measure::sinefit;
use crate::scenario::Waveform;

/// One intermodulation product.
#[derive(Debug, Clone, Serialize)]
pub struct ImdProduct {
    /// `f2-f1`, `f1+f2`, `2f1-f2` or `2f2-f1`.
    pub product: &'static str,
    pub order: u32,
    pub frequency_hz: f64,
    /// Fitted amplitude (peak volts); absent when not measured (see `note`).
    pub amplitude_v: Option<f64>,
    /// Relative to the tone at f1 (dBc).
    pub level_dbc: Option<f64>,
    /// Why a product was not measured (outside the analysis band, on a tone or another product, at DC).
    pub note: Option<String>,
}

/// Two-tone IMD of the chain's output.
#[derive(Debug, Clone, Serialize)]
pub struct ImdMetrics {
    pub f1_hz: f64,
    pub f2_hz: f64,
    /// Fitted output amplitudes of the two tones (peak volts); levels in dBc refer to `tone1_amplitude_v`.
    pub tone1_amplitude_v: f64,
    pub tone2_amplitude_v: f64,
    pub products: Vec<ImdProduct>,
    /// Power sum of the measured second-order products over the tone at f1 (dBc).
    pub im2_dbc: Option<f64>,
    /// Power sum of the measured third-order products over the tone at f1 (dBc).
    pub im3_dbc: Option<f64>,
    /// Power sum of every measured product over the tone at f1 (dBc).
    pub total_dbc: Option<f64>,
    /// Highest frequency a product is measured at (the output analysis band, Hz).
    pub band_hz: f64,
}

/// The products of tones f1 < f2: name, order and frequency (before folding; all non-negative).
fn products(f1: f64, f2: f64) -> [(&'static str, u32, f64); 4] {
    [
        ("f2-f1", 2, f2 - f1),
        ("f1+f2", 2, f1 + f2),
        ("2f1-f2", 3, (2.0 * f1 - f2).abs()),
        ("2f2-f1", 3, 2.0 * f2 - f1),
    ]
}

/// Two-tone IMD of `record` (volts at `rate_hz`), for tones at `fa_hz` and `fb_hz` (in any order), with the
/// products measured up to `band_hz`. A product closer than `resolution` (2 / record length, in Hz) to DC, to a
/// tone or to a product already measured is not fitted (the fit could not tell them apart); nor is one above
/// the band. `None` when the record is too short or the tones are not distinct.
pub fn two_tone(
    record: &[f64],
    rate_hz: f64,
    band_hz: f64,
    fa_hz: f64,
    fb_hz: f64,
) -> Option<ImdMetrics> {
    let (f1, f2) = (fa_hz.min(fb_hz), fa_hz.max(fb_hz));
    let n = record.len();
    if n < 32 || rate_hz.is_nan() || rate_hz <= 0.0 || f1.is_nan() || f1 <= 0.0 {
        return None;
    }
    let resolution = 2.0 * rate_hz / n as f64;
    if f2 - f1 < resolution {
        return None;
    }
    let mut fit_hz = vec![f1, f2];
    let mut products_out = Vec::new();
    for (product, order, f) in products(f1, f2) {
        let note = if f > band_hz.min(0.5 * rate_hz) {
            Some("above the analysis band".to_string())
        } else if f < resolution {
            Some("at DC".to_string())
        } else if let Some(g) = fit_hz.iter().find(|g| (*g - f).abs() < resolution) {
            Some(format!("on the component at {g} Hz"))
        } else {
            fit_hz.push(f);
            None
        };
        products_out.push(ImdProduct {
            product,
            order,
            frequency_hz: f,
            amplitude_v: None,
            level_dbc: None,
            note,
        });
    }
    // The tones' harmonics and the other third-order products are fitted too (not reported), so their leakage
    // does not bias the reported products in a non-coherent record.
    for f in [
        2.0 * f1,
        2.0 * f2,
        3.0 * f1,
        3.0 * f2,
        2.0 * f1 + f2,
        2.0 * f2 + f1,
    ] {
        if f <= band_hz.min(0.5 * rate_hz) && fit_hz.iter().all(|g| (g - f).abs() >= resolution) {
            fit_hz.push(f);
        }
    }
    let fit = sinefit::fit_multitone(record, rate_hz, &fit_hz, 0.0);
    let a1 = fit.tones[0].amplitude_v;
    let a2 = fit.tones[1].amplitude_v;
    if !a1.is_finite() || a1 <= 0.0 || !a2.is_finite() {
        return None;
    }
    let db = |p: f64| (p > 0.0).then(|| 10.0 * (p / (a1 * a1)).log10());
    let (mut p2, mut p3) = (0.0, 0.0);
    let (mut any2, mut any3) = (false, false);
    for p in &mut products_out {
        if p.note.is_some() {
            continue;
        }
        let Some(t) = fit.tones[..6.min(fit.tones.len())]
            .iter()
            .find(|t| t.frequency_hz == p.frequency_hz)
        else {
            continue;
        };
        let a = t.amplitude_v;
        p.amplitude_v = Some(a);
        p.level_dbc = db(a * a);
        if p.order == 2 {
            p2 += a * a;
            any2 = true;
        } else {
            p3 += a * a;
            any3 = true;
        }
    }
    Some(ImdMetrics {
        f1_hz: f1,
        f2_hz: f2,
        tone1_amplitude_v: a1,
        tone2_amplitude_v: a2,
        products: products_out,
        im2_dbc: if any2 { db(p2) } else { None },
        im3_dbc: if any3 { db(p3) } else { None },
        total_dbc: if any2 || any3 { db(p2 + p3) } else { None },
        band_hz,
    })
}

/// Two-tone IMD of a run's output analysis record, for a multitone source of exactly two tones.
pub fn from_run(run: &RunRecords<'_>) -> Option<ImdMetrics> {
    let Waveform::Multitone { tones } = run.waveform else {
        return None;
    };
    let [t1, t2] = tones.as_slice() else {
        return None;
    };
    two_tone(
        run.output_record,
        run.out_rate_hz,
        run.out_band_hz,
        t1.frequency_hz,
        t2.frequency_hz,
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::TAU;

    fn two_tones(
        n: usize,
        rate: f64,
        f1: f64,
        f2: f64,
        a: f64,
        shape: impl Fn(f64) -> f64,
    ) -> Vec<f64> {
        (0..n)
            .map(|i| {
                let t = i as f64 / rate;
                shape(a * (TAU * f1 * t).cos() + a * (TAU * f2 * t + 0.3).cos())
            })
            .collect()
    }

    #[test]
    fn a_cubic_nonlinearity_gives_the_textbook_im3() {
        // Textbook result, from memory, derived here: with x = A cos a + A cos b (a = w1 t, b = w2 t),
        // cos^3 u = (3 cos u + cos 3u)/4 and cos^2 u cos v = (cos v)/2 + (cos(2u + v) + cos(2u - v))/4 give
        // x^3 = A^3 [ (9/4)(cos a + cos b) + (3/4)(cos(2a - b) + cos(2b - a)) + terms at 3a, 3b, 2a + b, 2b + a ].
        // So y = x + a3 x^3 carries each tone at A (1 + 9/4 a3 A^2) and each IM3 product at 3/4 a3 A^3:
        // IM3 = 20 log10((3/4) a3 A^2 / (1 + 9/4 a3 A^2)) dBc, about 20 log10(3/4 a3 A^2) for small a3 A^2.
        // No even-order term: no IM2.
        let (rate, n) = (48_000.0, 8192);
        let (f1, f2) = (5_000.0, 6_100.0);
        for (a, a3) in [(0.5, 0.04), (1.0, 0.01), (0.25, 0.5)] {
            let x = two_tones(n, rate, f1, f2, a, |x| x + a3 * x * x * x);
            let m = two_tone(&x, rate, 20_000.0, f2, f1).unwrap();
            let want = 20.0 * (0.75 * a3 * a * a / (1.0 + 2.25 * a3 * a * a)).log10();
            for p in m.products.iter().filter(|p| p.order == 3) {
                let got = p.level_dbc.unwrap();
                assert!((got - want).abs() < 0.01, "{} {got} vs {want}", p.product);
            }
            // Both IM3 products at the same level: their sum is 3.01 dB above one.
            let im3 = m.im3_dbc.unwrap();
            assert!((im3 - (want + 10.0 * 2f64.log10())).abs() < 0.01, "{im3}");
            // The other products of x^3 are fitted too, so nothing leaks where IM2 would be.
            assert!(m.im2_dbc.unwrap() < -150.0, "IM2 {:?}", m.im2_dbc);
            assert!((m.tone1_amplitude_v - a * (1.0 + 2.25 * a3 * a * a)).abs() < 1e-9);
            assert_eq!((m.f1_hz, m.f2_hz), (f1, f2));
        }
    }

    #[test]
    fn a_square_law_gives_im2_at_the_difference_and_the_sum() {
        // y = x + a2 x^2: cos a cos b = (cos(a - b) + cos(a + b))/2 makes each IM2 product a2 A^2 against the
        // tone's A (the same trigonometric identity; from memory): IM2 = 20 log10(a2 A) dBc per product.
        let (rate, n) = (48_000.0, 6000);
        let (f1, f2, a, a2) = (5_000.0, 6_100.0, 0.8, 0.05);
        let x = two_tones(n, rate, f1, f2, a, |x| x + a2 * x * x);
        let m = two_tone(&x, rate, 20_000.0, f1, f2).unwrap();
        let want = 20.0 * (a2 * a).log10();
        for p in m.products.iter().filter(|p| p.order == 2) {
            assert!((p.level_dbc.unwrap() - want).abs() < 0.01, "{p:?}");
        }
        assert!(m.im3_dbc.unwrap() < -150.0, "{:?}", m.im3_dbc);
        let total = m.total_dbc.unwrap();
        assert!(
            (total - (want + 10.0 * 2f64.log10())).abs() < 0.01,
            "{total}"
        );
    }

    #[test]
    fn products_outside_the_band_or_on_a_tone_are_named_not_measured() {
        let (rate, n) = (48_000.0, 4096);
        // f2 = 2 f1 = 6 kHz: f2 - f1 falls on f1, 2 f1 - f2 on DC, 2 f2 - f1 on f1 + f2 (9 kHz).
        let x = two_tones(n, rate, 3_000.0, 6_000.0, 1.0, |x| x + 0.01 * x * x);
        let note = |m: &ImdMetrics, name: &str| {
            m.products
                .iter()
                .find(|p| p.product == name)
                .unwrap()
                .note
                .clone()
        };
        let m = two_tone(&x, rate, 10_000.0, 3_000.0, 6_000.0).unwrap();
        assert_eq!(
            note(&m, "f2-f1").as_deref(),
            Some("on the component at 3000 Hz")
        );
        assert_eq!(note(&m, "f1+f2"), None);
        assert_eq!(note(&m, "2f1-f2").as_deref(), Some("at DC"));
        assert_eq!(
            note(&m, "2f2-f1").as_deref(),
            Some("on the component at 9000 Hz")
        );
        assert!(m.im2_dbc.is_some() && m.im3_dbc.is_none());
        // A band of 8 kHz leaves out both products at 9 kHz.
        let m = two_tone(&x, rate, 8_000.0, 3_000.0, 6_000.0).unwrap();
        assert_eq!(
            note(&m, "f1+f2").as_deref(),
            Some("above the analysis band")
        );
        assert_eq!(
            note(&m, "2f2-f1").as_deref(),
            Some("above the analysis band")
        );
        assert!(m.total_dbc.is_none());
        assert!(two_tone(&x, rate, 10_000.0, 3_000.0, 3_000.0).is_none());
    }
}
