//! Static tests of converters: DNL, INL (end-point and best-fit), offset and gain errors, missing codes and
//! monotonicity, for an ADC from its transition levels (given, from a sine code-density histogram, or from a
//! slow ramp) and for a DAC from its settled output at every code.
//!
//! Conventions (all vectors have one entry per code, `M = 2^N` entries):
//! - ADC: transition `T_k` (k = 1..M-1) is the input level between codes k-1 and k. The functions take the
//!   ideal transfer's origin `origin_v`, with ideal transitions `T_k = origin_v + k q`: for IEEE Std 1241's
//!   centred transfer (code k centred on `low + k q`, `T_k = low + (k - 1/2) q`) pass the range's low end less
//!   half an LSB; for a truncating converter (`T_k = low + k q`), the low end itself.
//! - Code widths are compared with the average width `q_avg = (T_{M-1} - T_1) / (M - 2)` (gain removed, as the
//!   end-point line does): `dnl_lsb[k] = (T_{k+1} - T_k) / q_avg - 1` for k = 1..M-2; the end codes 0 and M-1
//!   are open-ended and their entries are 0.
//! - `inl_endpoint_lsb[k] = (T_k - (T_1 + (k - 1) q_avg)) / q_avg` (the line through the first and last
//!   transitions; equal to the running sum of DNL); `inl_bestfit_lsb[k]` is the same against the least-squares
//!   line through all transitions, in units of that line's slope. Entry 0 (code 0 has no lower transition) is 0.
//! - ADC `offset_lsb`, with IEEE Std 1241's sign (the input-referred offset the converter adds: positive when
//!   the transitions sit low, so the codes read high): `((origin_v + q) - T_1) / q`. `gain_error_lsb`, with the
//!   same sign (positive when the codes climb faster than ideal, i.e. the end-point gain G = ideal span /
//!   actual span exceeds 1): `((M - 2) q - (T_{M-1} - T_1)) / q`. Both in ideal LSB q, terminal-based (first and
//!   last transitions).
//! - DAC: `V_k` the settled output at code k. `q_meas = (V_{M-1} - V_0) / (M - 1)`; `dnl_lsb[k] = (V_k -
//!   V_{k-1}) / q_meas - 1` for k = 1..M-1 (entry 0 is 0); INL end-point against the line through `V_0` and
//!   `V_{M-1}`, best-fit against the least-squares line, both in units of their slope.

/// Result of a static test.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct StaticResult {
    /// Offset error (LSB, ideal q), positive when the converter reads or gives more than ideal: ADC, ideal first
    /// transition less the actual one (IEEE Std 1241's sign); DAC, zero-code output less its ideal.
    pub offset_lsb: f64,
    /// Gain error (LSB, ideal q): error of the span between the end points (see the module notes).
    pub gain_error_lsb: f64,
    /// Differential non-linearity per code (LSB of the average step).
    pub dnl_lsb: Vec<f64>,
    /// Integral non-linearity per code against the end-point line (LSB).
    pub inl_endpoint_lsb: Vec<f64>,
    /// Integral non-linearity per code against the least-squares line (LSB).
    pub inl_bestfit_lsb: Vec<f64>,
    /// Largest |DNL| (LSB).
    pub dnl_max_lsb: f64,
    /// Largest |INL| against the least-squares (best-fit) line (LSB).
    pub inl_max_lsb: f64,
    /// ADC: inner codes of zero (or negative) width. DAC: always 0 (every code has an output).
    pub missing_codes: u32,
    /// ADC: transitions never decrease. DAC: the output never falls as the code rises.
    pub monotonic: bool,
}

/// Least-squares line `v ~ alpha + beta k` through the points `(k, v[k])` for k in `ks`.
fn ls_line(points: impl Iterator<Item = (f64, f64)> + Clone) -> (f64, f64) {
    let n = points.clone().count() as f64;
    let (sk, sv) = points
        .clone()
        .fold((0.0, 0.0), |(a, b), (k, v)| (a + k, b + v));
    let (mk, mv) = (sk / n, sv / n);
    let (skk, skv) = points.fold((0.0, 0.0), |(a, b), (k, v)| {
        (a + (k - mk) * (k - mk), b + (k - mk) * (v - mv))
    });
    let beta = skv / skk;
    (mv - beta * mk, beta)
}

fn max_abs(v: &[f64]) -> f64 {
    v.iter().fold(0.0, |m, x| m.max(x.abs()))
}

/// ADC static figures from its transition levels `T_1..T_{M-1}` (V; `transitions_v[k - 1] = T_k`, so
/// `M = transitions_v.len() + 1` codes), the ideal transfer's origin `origin_v` (ideal `T_k = origin_v + k q`)
/// and ideal LSB `lsb_v` (see the module notes for every definition). Needs at least 3 transitions.
///
/// # Panics
/// If fewer than 3 transitions are given.
pub fn adc_from_transitions(transitions_v: &[f64], origin_v: f64, lsb_v: f64) -> StaticResult {
    let nt = transitions_v.len();
    assert!(nt >= 3, "a static test needs at least 3 transitions");
    let m = nt + 1;
    let t = |k: usize| transitions_v[k - 1];
    let span = t(m - 1) - t(1);
    let q_avg = span / (m - 2) as f64;
    let mut dnl = vec![0.0; m];
    let mut missing = 0;
    let mut monotonic = true;
    for (k, d) in dnl.iter_mut().enumerate().take(m - 1).skip(1) {
        let width = t(k + 1) - t(k);
        *d = width / q_avg - 1.0;
        if width <= 0.0 {
            missing += 1;
        }
        if width < 0.0 {
            monotonic = false;
        }
    }
    let mut inl_ep = vec![0.0; m];
    for (k, v) in inl_ep.iter_mut().enumerate().skip(1) {
        *v = (t(k) - (t(1) + (k - 1) as f64 * q_avg)) / q_avg;
    }
    let (alpha, beta) = ls_line((1..m).map(|k| (k as f64, t(k))));
    let mut inl_bf = vec![0.0; m];
    for (k, v) in inl_bf.iter_mut().enumerate().skip(1) {
        *v = (t(k) - (alpha + beta * k as f64)) / beta;
    }
    StaticResult {
        offset_lsb: ((origin_v + lsb_v) - t(1)) / lsb_v,
        gain_error_lsb: ((m - 2) as f64 * lsb_v - span) / lsb_v,
        dnl_max_lsb: max_abs(&dnl),
        inl_max_lsb: max_abs(&inl_bf),
        dnl_lsb: dnl,
        inl_endpoint_lsb: inl_ep,
        inl_bestfit_lsb: inl_bf,
        missing_codes: missing,
        monotonic,
    }
}

/// Code-density (histogram) test with a sine (IEEE Std 1241 histogram test with a sine wave). `histogram[k]` is
/// the number of samples that gave code k (M = `histogram.len()` codes) for a sine of amplitude A and offset C
/// that slightly overdrives both ends, on phases spread uniformly (coherent sampling or a long record). With
/// `S` the total count and `CH_j` the cumulative count of codes 0..=j, the sine's distribution function gives
/// `T_k = C - A cos(pi CH_{k-1} / S)`.
///
/// A and C: when given (the test's own, known input: IEEE Std 1241's code-density test with a known sine), used as
/// is, and offset and gain errors are measured. When neither is given they are taken from the end bins by placing
/// the first and last transitions at their ideal levels (`origin_v + q` and `origin_v + (M-1) q`): then offset
/// and gain errors are 0 by construction and only DNL/INL are measured. When only one is given, the other comes
/// from the same end-bin relations, averaged over both ends.
///
/// # Panics
/// If the histogram has fewer than 4 codes.
pub fn adc_code_density(
    histogram: &[u64],
    amplitude_v: Option<f64>,
    offset_v: Option<f64>,
    origin_v: f64,
    lsb_v: f64,
) -> StaticResult {
    let m = histogram.len();
    assert!(m >= 4, "a code-density test needs at least 4 codes");
    let s: u64 = histogram.iter().sum();
    let s = s as f64;
    // End-bin relations: T_1 = C - A c0, T_{M-1} = C + A c1.
    let c0 = (std::f64::consts::PI * histogram[0] as f64 / s).cos();
    let c1 = (std::f64::consts::PI * histogram[m - 1] as f64 / s).cos();
    let t1_ideal = origin_v + lsb_v;
    let tl_ideal = origin_v + (m - 1) as f64 * lsb_v;
    let (a, c) = match (amplitude_v, offset_v) {
        (Some(a), Some(c)) => (a, c),
        (None, None) => {
            let a = (tl_ideal - t1_ideal) / (c0 + c1);
            (a, t1_ideal + a * c0)
        }
        (Some(a), None) => (a, 0.5 * ((t1_ideal + a * c0) + (tl_ideal - a * c1))),
        (None, Some(c)) => (0.5 * ((c - t1_ideal) / c0 + (tl_ideal - c) / c1), c),
    };
    let mut cum = 0u64;
    let transitions: Vec<f64> = histogram[..m - 1]
        .iter()
        .map(|&h| {
            cum += h;
            c - a * (std::f64::consts::PI * cum as f64 / s).cos()
        })
        .collect();
    adc_from_transitions(&transitions, origin_v, lsb_v)
}

/// Ramp test: `ramp_v[i]` is the known input at sample i (a slow linear ramp, rising or falling) and `codes[i]`
/// the ADC's code there. Transition `T_k` is placed where the ramp has produced as many samples below code k as
/// the record holds: with `n_k` = number of samples whose code is below k, counted from the ramp's low end,
/// `T_k` is the midpoint of the ramp values at positions `n_k - 1` and `n_k`. For a noiseless converter this is
/// the midpoint of the two samples around the code change; with noise it is the 50 % point. The resolution is
/// the ramp step: use many samples per code. Transitions outside the ramp are clamped to its ends.
///
/// # Panics
/// If the lengths differ, `bits` is not in 2..=24, or fewer than 2 samples are given.
pub fn adc_ramp(
    ramp_v: &[f64],
    codes: &[u32],
    bits: u32,
    origin_v: f64,
    lsb_v: f64,
) -> StaticResult {
    assert_eq!(ramp_v.len(), codes.len(), "one code per ramp sample");
    assert!((2..=24).contains(&bits), "bits must be 2..=24");
    let len = ramp_v.len();
    assert!(len >= 2, "a ramp needs at least 2 samples");
    let m = 1usize << bits;
    let mut hist = vec![0usize; m];
    for &c in codes {
        hist[(c as usize).min(m - 1)] += 1;
    }
    let rising = ramp_v[len - 1] >= ramp_v[0];
    // Ramp value at position i counted from the low end.
    let at = |i: usize| {
        if rising {
            ramp_v[i]
        } else {
            ramp_v[len - 1 - i]
        }
    };
    let mut below = 0usize;
    let transitions: Vec<f64> = (1..m)
        .map(|k| {
            below += hist[k - 1];
            if below == 0 {
                at(0)
            } else if below >= len {
                at(len - 1)
            } else {
                0.5 * (at(below - 1) + at(below))
            }
        })
        .collect();
    adc_from_transitions(&transitions, origin_v, lsb_v)
}

/// DAC static figures from the settled output at every code, `levels_v[k]` = output (V) at code k (M = length,
/// at least 3), against an ideal zero-code output `ideal_zero_v` and ideal LSB `ideal_lsb_v` (used only for the
/// offset and gain errors). See the module notes for the definitions.
///
/// # Panics
/// If fewer than 3 levels are given.
pub fn dac_from_levels(levels_v: &[f64], ideal_zero_v: f64, ideal_lsb_v: f64) -> StaticResult {
    let m = levels_v.len();
    assert!(m >= 3, "a DAC static test needs at least 3 codes");
    let v0 = levels_v[0];
    let rel = |k: usize| levels_v[k] - v0;
    let span = rel(m - 1);
    let q = span / (m - 1) as f64;
    let mut dnl = vec![0.0; m];
    let mut monotonic = true;
    for k in 1..m {
        let step = levels_v[k] - levels_v[k - 1];
        dnl[k] = step / q - 1.0;
        if step < 0.0 {
            monotonic = false;
        }
    }
    let inl_ep: Vec<f64> = (0..m).map(|k| (rel(k) - k as f64 * q) / q).collect();
    let (alpha, beta) = ls_line((0..m).map(|k| (k as f64, rel(k))));
    let inl_bf: Vec<f64> = (0..m)
        .map(|k| (rel(k) - (alpha + beta * k as f64)) / beta)
        .collect();
    StaticResult {
        offset_lsb: (v0 - ideal_zero_v) / ideal_lsb_v,
        gain_error_lsb: (span - (m - 1) as f64 * ideal_lsb_v) / ideal_lsb_v,
        dnl_max_lsb: max_abs(&dnl),
        inl_max_lsb: max_abs(&inl_bf),
        dnl_lsb: dnl,
        inl_endpoint_lsb: inl_ep,
        inl_bestfit_lsb: inl_bf,
        missing_codes: 0,
        monotonic,
    }
}

/// Figures of a DC-transfer static test: a converter driven with DC levels (an ADC) or held codes (a DAC), each
/// level's output averaged after the converter's filters settle. This is how oversampling (delta-sigma) converters
/// are characterised: their words are far finer than any per-code transition a bench could find, so DNL and
/// missing codes do not apply; linearity is the averaged output against the input level.
///
/// Definitions (IEEE Std 1241-2010, its static gain and offset and integral non-linearity definitions; the clause
/// numbers not checked, from memory): with `x_j` the input levels and `y_j` the averaged outputs, both in volts
/// of the converter's ideal transfer (an ideal converter gives `y = x`), the independently based (least-squares)
/// line `y ~ a + b x` gives the offset `a` (the output at a zero input less the ideal one, positive when the
/// converter reads high) and the gain error `b - 1`; the terminal-based (end-point) line passes through the first
/// and last levels. INL at each level is the output's deviation from the line, referred back to the input (divided
/// by the line's slope), in ppm of the full-scale range (`full_scale_v`, the range's span) and in LSB of the output
/// word (`lsb_v`).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct DcLinearity {
    /// Offset of the least-squares line: output at zero input less the ideal (LSB of the word, ppm of full
    /// scale).
    pub offset_lsb: f64,
    pub offset_ppm: f64,
    /// Gain error of the least-squares line, slope less 1 (ppm).
    pub gain_error_ppm: f64,
    /// Gain error of the end-point line (ppm).
    pub gain_error_endpoint_ppm: f64,
    /// INL per level against the least-squares line (ppm of full scale, and LSB of the word).
    pub inl_bestfit_ppm: Vec<f64>,
    pub inl_bestfit_lsb: Vec<f64>,
    /// INL per level against the end-point line (ppm of full scale, and LSB of the word).
    pub inl_endpoint_ppm: Vec<f64>,
    pub inl_endpoint_lsb: Vec<f64>,
    /// Largest |INL| against the least-squares line (ppm of full scale, LSB).
    pub inl_max_ppm: f64,
    pub inl_max_lsb: f64,
    /// Largest |INL| against the end-point line (ppm of full scale, LSB).
    pub inl_endpoint_max_ppm: f64,
    pub inl_endpoint_max_lsb: f64,
}

/// The DC-transfer figures (see [`DcLinearity`]) from input levels `x_v` and averaged outputs `y_v` (both V on the
/// ideal transfer), the full-scale range `full_scale_v` and the word's LSB `lsb_v`.
///
/// # Panics
/// If fewer than 3 levels are given, the lengths differ or the levels do not span a range.
pub fn dc_linearity(x_v: &[f64], y_v: &[f64], full_scale_v: f64, lsb_v: f64) -> DcLinearity {
    let n = x_v.len();
    assert!(
        n >= 3 && y_v.len() == n,
        "a DC transfer needs 3 or more levels"
    );
    let (a, b) = ls_line(x_v.iter().copied().zip(y_v.iter().copied()));
    let (x0, x1) = (x_v[0], x_v[n - 1]);
    assert!(x1 != x0, "the levels must span a range");
    let b_ep = (y_v[n - 1] - y_v[0]) / (x1 - x0);
    let ppm = 1e6 / full_scale_v;
    let bf: Vec<f64> = x_v
        .iter()
        .zip(y_v)
        .map(|(&x, &y)| (y - (a + b * x)) / b)
        .collect();
    let ep: Vec<f64> = x_v
        .iter()
        .zip(y_v)
        .map(|(&x, &y)| (y - (y_v[0] + b_ep * (x - x0))) / b_ep)
        .collect();
    let inl_bestfit_ppm: Vec<f64> = bf.iter().map(|v| v * ppm).collect();
    let inl_bestfit_lsb: Vec<f64> = bf.iter().map(|v| v / lsb_v).collect();
    let inl_endpoint_ppm: Vec<f64> = ep.iter().map(|v| v * ppm).collect();
    let inl_endpoint_lsb: Vec<f64> = ep.iter().map(|v| v / lsb_v).collect();
    DcLinearity {
        offset_lsb: a / lsb_v,
        offset_ppm: a * ppm,
        gain_error_ppm: (b - 1.0) * 1e6,
        gain_error_endpoint_ppm: (b_ep - 1.0) * 1e6,
        inl_max_ppm: max_abs(&inl_bestfit_ppm),
        inl_max_lsb: max_abs(&inl_bestfit_lsb),
        inl_endpoint_max_ppm: max_abs(&inl_endpoint_ppm),
        inl_endpoint_max_lsb: max_abs(&inl_endpoint_lsb),
        inl_bestfit_ppm,
        inl_bestfit_lsb,
        inl_endpoint_ppm,
        inl_endpoint_lsb,
    }
}

/// Mean, rms about the mean, and the standard error of the mean of a record whose samples may be correlated
/// (shaped and filtered noise, idle tones), by batch means: the record cut into `batches` equal batches, the
/// error is the standard deviation of the batch means over sqrt(batches) (G. S. Fishman, "Principles of
/// Discrete Event Simulation", Wiley 1978, the batch-means method; from memory). Needs 2 or more batches of
/// at least one sample.
pub fn mean_rms_error(x: &[f64], batches: usize) -> (f64, f64, f64) {
    let n = x.len();
    let mean = x.iter().sum::<f64>() / n as f64;
    let rms = (x.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n as f64).sqrt();
    let len = n / batches.max(2);
    if len == 0 {
        return (mean, rms, f64::NAN);
    }
    let b = n / len;
    let means: Vec<f64> = (0..b)
        .map(|i| x[i * len..(i + 1) * len].iter().sum::<f64>() / len as f64)
        .collect();
    let mb = means.iter().sum::<f64>() / b as f64;
    let var = means.iter().map(|m| (m - mb) * (m - mb)).sum::<f64>() / (b - 1) as f64;
    (mean, rms, (var / b as f64).sqrt())
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::TAU;

    fn ideal_transitions(bits: u32, low: f64, q: f64) -> Vec<f64> {
        (1..(1usize << bits)).map(|k| low + k as f64 * q).collect()
    }

    fn floor_code(v: f64, bits: u32, low: f64, q: f64) -> u32 {
        let m = (1u64 << bits) as f64;
        ((v - low) / q).floor().clamp(0.0, m - 1.0) as u32
    }

    fn all_zero(v: &[f64], tol: f64) -> bool {
        v.iter().all(|x| x.abs() < tol)
    }

    #[test]
    fn an_ideal_quantizer_has_no_dnl_inl_offset_or_gain_error() {
        let r = adc_from_transitions(&ideal_transitions(6, -1.0, 2.0 / 64.0), -1.0, 2.0 / 64.0);
        assert_eq!(r.dnl_lsb.len(), 64);
        assert!(
            all_zero(&r.dnl_lsb, 1e-12)
                && all_zero(&r.inl_endpoint_lsb, 1e-12)
                && all_zero(&r.inl_bestfit_lsb, 1e-12)
        );
        assert!(r.offset_lsb.abs() < 1e-12 && r.gain_error_lsb.abs() < 1e-12);
        assert!(
            r.missing_codes == 0 && r.monotonic && r.dnl_max_lsb < 1e-12 && r.inl_max_lsb < 1e-12
        );
    }

    #[test]
    fn a_moved_transition_shows_at_the_right_codes() {
        // By hand: moving T_5 up by 0.3 q widens code 4 (T_4..T_5) to 1.3 q and narrows code 5 (T_5..T_6) to 0.7 q;
        // the end transitions are untouched, so the average width stays q. End-point INL at T_5 is +0.3.
        let q = 0.01;
        let mut t = ideal_transitions(4, 0.0, q);
        t[5 - 1] += 0.3 * q;
        let r = adc_from_transitions(&t, 0.0, q);
        for k in 0..16 {
            let want = match k {
                4 => 0.3,
                5 => -0.3,
                _ => 0.0,
            };
            assert!(
                (r.dnl_lsb[k] - want).abs() < 1e-12,
                "code {k}: {:?}",
                r.dnl_lsb
            );
            let want_inl = if k == 5 { 0.3 } else { 0.0 };
            assert!(
                (r.inl_endpoint_lsb[k] - want_inl).abs() < 1e-12,
                "code {k}: {:?}",
                r.inl_endpoint_lsb
            );
        }
        // Best fit, by hand: the LS line through T_1..T_15 (ideal k q, T_5 up by 0.3 q) has its mean up by
        // 0.3/15 = 0.02 and its slope changed by 0.3 (5 - 8) / sum_k (k - 8)^2 = -0.9/280 (centre k = 8). At k = 5
        // the line sits 0.02 + 2.7/280 above ideal; INL is the residual in units of the fitted slope 1 - 0.9/280.
        let want_bf5 = (0.3 - 0.02 - 2.7 / 280.0) / (1.0 - 0.9 / 280.0);
        assert!(
            (r.inl_bestfit_lsb[5] - want_bf5).abs() < 1e-12,
            "{}",
            r.inl_bestfit_lsb[5]
        );
        assert!((r.dnl_max_lsb - 0.3).abs() < 1e-12 && r.missing_codes == 0 && r.monotonic);
        assert!(r.offset_lsb.abs() < 1e-12 && r.gain_error_lsb.abs() < 1e-9);
    }

    #[test]
    fn offset_and_gain_errors_are_read_from_the_end_transitions() {
        // Every transition shifted by +0.25 q and the span stretched by 2 %: the converter reads 0.25 LSB low and
        // climbs slower than ideal, so with IEEE Std 1241's sign (offset = ideal T_1 - T_1; gain G = ideal span /
        // actual span) offset -0.25 LSB, gain error -0.02 * (M - 2) LSB, and no DNL (the average width absorbs
        // the gain).
        let q = 1.0;
        let t: Vec<f64> = (1..32)
            .map(|k| 0.25 + 1.0 + (k - 1) as f64 * 1.02)
            .collect();
        let r = adc_from_transitions(&t, 0.0, q);
        assert!(
            (r.offset_lsb + 0.25).abs() < 1e-12 && (r.gain_error_lsb + 0.02 * 30.0).abs() < 1e-9
        );
        assert!(all_zero(&r.dnl_lsb, 1e-12) && all_zero(&r.inl_bestfit_lsb, 1e-12));
    }

    #[test]
    fn a_missing_code_counts_and_has_dnl_of_minus_one() {
        let q = 1.0;
        let mut t = ideal_transitions(4, 0.0, q);
        t[7 - 1] = t[8 - 1]; // T_7 = T_8: code 7 never appears
        let r = adc_from_transitions(&t, 0.0, q);
        assert_eq!(r.missing_codes, 1);
        assert!((r.dnl_lsb[7] + 1.0).abs() < 1e-12 && (r.dnl_lsb[6] - 1.0).abs() < 1e-12);
        assert!(
            r.monotonic,
            "a missing code alone keeps the transitions in order"
        );
        t[7 - 1] = t[8 - 1] + 0.2; // now out of order
        let r = adc_from_transitions(&t, 0.0, q);
        assert!(!r.monotonic && r.missing_codes == 1);
    }

    #[test]
    fn code_density_of_an_ideal_8_bit_quantizer_is_flat() {
        // IEEE Std 1241, histogram (code density) test with a sine: an overdriven coherent sine through an ideal
        // quantizer gives transitions T_k = C - A cos(pi CH_{k-1} / S) and |DNL| close to 0 (0.05 LSB tolerance:
        // common practice, no source). 10^6 samples, 7919 cycles (prime, so coprime with 10^6: every sample at a
        // distinct phase, J/M coherent sampling).
        let bits = 8;
        let (low, q) = (-1.0, 2.0 / 256.0);
        let n = 1_000_000usize;
        let (amp, offset) = (1.02, 0.003);
        let mut hist = vec![0u64; 256];
        for i in 0..n {
            let v = offset + amp * (TAU * 7919.0 * i as f64 / n as f64 + 0.1).sin();
            hist[floor_code(v, bits, low, q) as usize] += 1;
        }
        for (a, c) in [
            (None, None),
            (Some(amp), Some(offset)),
            (Some(amp), None),
            (None, Some(offset)),
        ] {
            let r = adc_code_density(&hist, a, c, low, q);
            assert!(
                r.dnl_max_lsb < 0.05,
                "{a:?} {c:?}: DNL max {}",
                r.dnl_max_lsb
            );
            assert!(
                r.inl_max_lsb < 0.05,
                "{a:?} {c:?}: INL max {}",
                r.inl_max_lsb
            );
            assert!(r.missing_codes == 0 && r.monotonic);
            if a.is_some() && c.is_some() {
                // With the true amplitude and offset, offset and gain errors are measured (ideal: 0).
                assert!(
                    r.offset_lsb.abs() < 0.05 && r.gain_error_lsb.abs() < 0.1,
                    "{r:?}"
                );
            }
        }
    }

    #[test]
    fn code_density_finds_a_wide_code() {
        // An 8-bit quantizer whose code 100 is 1.5 q wide (T_101 moved up by q/2) shows DNL +0.5 at code 100 and
        // -0.5 at code 101, as the transition-level definition gives by hand.
        let (low, q) = (-1.0, 2.0 / 256.0);
        let mut t = ideal_transitions(8, low, q);
        t[101 - 1] += 0.5 * q;
        let n = 1_000_000usize;
        let mut hist = vec![0u64; 256];
        for i in 0..n {
            let v = 1.02 * (TAU * 7919.0 * i as f64 / n as f64).sin();
            hist[t.partition_point(|&tk| tk <= v)] += 1;
        }
        let r = adc_code_density(&hist, None, None, low, q);
        assert!(
            (r.dnl_lsb[100] - 0.5).abs() < 0.05 && (r.dnl_lsb[101] + 0.5).abs() < 0.05,
            "{:?}",
            &r.dnl_lsb[98..104]
        );
    }

    #[test]
    fn ramp_test_recovers_transitions_to_the_ramp_step() {
        // 64 samples per code: transitions placed within half a step, so |DNL| <= 1/64 (by construction of
        // the midpoint rule).
        let (bits, low, q) = (6u32, 0.0, 1.0);
        let mut t = ideal_transitions(bits, low, q);
        t[20 - 1] -= 0.4; // code 19 narrower, code 20 wider
        let n = 64 * 64;
        for rising in [true, false] {
            let ramp: Vec<f64> = (0..n)
                .map(|i| {
                    let u = (i as f64 + 0.5) / 64.0;
                    if rising { u } else { 64.0 - u }
                })
                .collect();
            let codes: Vec<u32> = ramp
                .iter()
                .map(|&v| t.partition_point(|&tk| tk <= v) as u32)
                .collect();
            let r = adc_ramp(&ramp, &codes, bits, low, q);
            assert!(
                (r.dnl_lsb[19] + 0.4).abs() < 1.0 / 64.0 + 1e-9,
                "{:?}",
                &r.dnl_lsb[17..22]
            );
            assert!((r.dnl_lsb[20] - 0.4).abs() < 1.0 / 64.0 + 1e-9);
            let others = r
                .dnl_lsb
                .iter()
                .enumerate()
                .filter(|(k, _)| *k != 19 && *k != 20);
            assert!(others.map(|(_, v)| v.abs()).fold(0.0, f64::max) < 1.0 / 64.0 + 1e-9);
        }
    }

    #[test]
    fn dac_with_a_falling_step_is_not_monotonic() {
        // A 4-bit DAC whose mid-scale carry (0111 -> 1000) steps down by half an LSB.
        let q = 0.1;
        let mut v: Vec<f64> = (0..16).map(|k| 0.05 + k as f64 * q).collect();
        for x in v.iter_mut().skip(8) {
            *x -= 1.5 * q;
        }
        let r = dac_from_levels(&v, 0.0, q);
        assert!(!r.monotonic);
        // By hand: span 15 q - 1.5 q = 13.5 q, measured LSB 0.9 q; step 7 -> 8 is -0.5 q: DNL = -0.5/0.9 - 1.
        assert!(
            (r.dnl_lsb[8] - (-0.5 / 0.9 - 1.0)).abs() < 1e-12
                && (r.dnl_lsb[3] - (1.0 / 0.9 - 1.0)).abs() < 1e-12
        );
        assert!((r.offset_lsb - 0.5).abs() < 1e-12 && (r.gain_error_lsb + 1.5).abs() < 1e-12);
        assert!(r.inl_endpoint_lsb[0].abs() < 1e-12 && r.inl_endpoint_lsb[15].abs() < 1e-12);
        let ideal: Vec<f64> = (0..16).map(|k| k as f64 * q).collect();
        let r = dac_from_levels(&ideal, 0.0, q);
        assert!(
            r.monotonic && r.dnl_max_lsb < 1e-12 && r.inl_max_lsb < 1e-12 && r.missing_codes == 0
        );
    }

    #[test]
    fn dc_linearity_of_a_line_is_its_offset_and_gain_and_a_cubic_bends_as_computed() {
        // y = 1e-3 + (1 + 2e-4) x: offset 1 mV, gain error 200 ppm, no INL (by hand).
        let x: Vec<f64> = (0..21).map(|j| -1.0 + 0.1 * j as f64).collect();
        let y: Vec<f64> = x.iter().map(|v| 1e-3 + (1.0 + 2e-4) * v).collect();
        let r = dc_linearity(&x, &y, 4.0, 4.0 / 65536.0);
        assert!((r.offset_ppm - 250.0).abs() < 1e-6 && (r.offset_lsb - 16.384).abs() < 1e-6);
        assert!(
            (r.gain_error_ppm - 200.0).abs() < 1e-6
                && (r.gain_error_endpoint_ppm - 200.0).abs() < 1e-6
        );
        assert!(r.inl_max_ppm < 1e-6 && r.inl_endpoint_max_ppm < 1e-6);
        // y = x + c x^3 on symmetric levels: the end-point line has slope 1 + c, so the end-point INL at x is
        // (c x^3 - c x) / (1 + c), zero at the ends and at 0, largest at x = 1/sqrt(3) (by hand).
        let c = 1e-4;
        let y: Vec<f64> = x.iter().map(|v| v + c * v * v * v).collect();
        let r = dc_linearity(&x, &y, 2.0, 1e-6);
        for (j, &v) in x.iter().enumerate() {
            let want = (c * v * v * v - c * v) / (1.0 + c) / 2.0 * 1e6;
            assert!(
                (r.inl_endpoint_ppm[j] - want).abs() < 1e-6,
                "{j}: {} {want}",
                r.inl_endpoint_ppm[j]
            );
        }
        // Odd symmetry: the best-fit line of an odd function has no offset.
        assert!(r.offset_ppm.abs() < 1e-9);
    }

    #[test]
    fn batch_means_error_of_white_noise_is_sigma_over_root_n() {
        // White noise of rms 1: the mean's standard error is 1/sqrt(N) (common practice, no source); batch
        // means estimate it within the scatter of 16 batches (about 18 %: common practice, no source).
        use rand::SeedableRng;
        use rand_distr::{Distribution, StandardNormal};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let x: Vec<f64> = (0..65536)
            .map(|_| StandardNormal.sample(&mut rng))
            .collect();
        let (m, rms, err) = mean_rms_error(&x, 16);
        assert!(m.abs() < 4.0 / 256.0 && (rms - 1.0).abs() < 0.02);
        assert!((err * 256.0 - 1.0).abs() < 0.45, "{err}");
    }
}
