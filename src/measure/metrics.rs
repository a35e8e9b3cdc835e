//! Dynamic metrics of a single-tone record from its power spectrum: SNR, SINAD, THD, SFDR, ENOB and the noise
//! floor (IEEE Std 1241 definitions).
//!
//! How the spectrum is read (L = the window's main-lobe half-width, ENBW its equivalent noise bandwidth):
//! - Bin powers are summed, never amplitudes. A tone's power is the sum of the bins of its lobe (peak bin +- L)
//!   divided by ENBW; noise sums are divided by ENBW too (see [`crate::measure::spectrum`] for the scaling).
//! - DC: bins 0..=L are the DC lobe and are left out of every sum (if the fundamental lies so close to DC that
//!   the lobes meet, the fundamental's lobe takes the shared bins).
//! - The fundamental is the given frequency's peak (searched within +-L bins of it) or, if none is given, the
//!   largest bin in the band outside the DC lobe. Its frequency is the power-weighted centroid of its lobe.
//! - Harmonics k = 2..=H land at |((k f + fs/2) mod fs) - fs/2| (folding). One landing within the fundamental's
//!   lobe or the DC lobe is flagged `on_fundamental_or_dc` and not counted (its power cannot be told apart); one
//!   landing within the lobe of a lower harmonic is flagged `same_place_as` and not counted again; one beyond the
//!   band is listed but not counted. A counted harmonic's power is the sum of its lobe's bins not already claimed
//!   by DC, the fundamental or a lower harmonic, over ENBW.
//! - Noise density: the mean of the bins left after removing the DC, fundamental and counted-harmonic lobes
//!   (weighted by each bin's bandwidth: half a bin for DC and Nyquist), over ENBW. The removed bins also held
//!   noise; leaving them out would bias the noise low by their share of the band, so they are filled in with
//!   that mean density: noise power = density x band width in bins.
//! - NAD (noise and distortion, for SINAD) = sum of every band bin outside the DC and fundamental lobes (over
//!   ENBW) + the mean noise density x the bandwidth of the DC and fundamental lobes (filled in the same way).
//! - SNR = P_fund / noise; SINAD = P_fund / NAD; THD = 10 log10(sum of counted harmonic powers / P_fund) (dBc,
//!   negative; -inf if none is counted); SFDR = P_fund / the largest spur in the band outside the DC and
//!   fundamental lobes, harmonic or not (dBc; a spur's power is its lobe sum over ENBW; +inf if there is none).
//!   Harmonic powers are not corrected for the noise that shares their bins.
//! - ENOB = (SINAD - 1.76 dB + 20 log10(A_fs / A)) / 6.02 dB, with the full-scale correction 20 log10(A_fs / A)
//!   for a fundamental of amplitude A below the full-scale amplitude A_fs; 1.76 and 6.02 are used in their exact
//!   forms 10 log10(3/2) and 20 log10(2).

use crate::error::{Error, Result};
use crate::measure::spectrum::Spectrum;

/// What to measure and how.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MetricsConfig {
    /// Highest harmonic order H counted in THD and removed for SNR (1 = no harmonics; THD is then -inf).
    pub harmonics: u32,
    /// Upper edge of the measurement band (Hz); None = the Nyquist frequency. Clamped to Nyquist.
    pub band_hz: Option<f64>,
    /// Peak amplitude of a full-scale sine (V), the reference for dBFS and ENOB.
    pub full_scale_peak_v: f64,
    /// Known fundamental frequency (Hz); None = take the largest peak in the band outside the DC lobe.
    pub fundamental_hz: Option<f64>,
}

/// One harmonic of the fundamental as found in the spectrum.
#[derive(Debug, Clone, PartialEq)]
pub struct HarmonicInfo {
    /// Harmonic order k (2..=H).
    pub order: u32,
    /// Where it lands after folding, |((k f + fs/2) mod fs) - fs/2| (Hz).
    pub frequency_hz: f64,
    /// True when k f lies above fs/2 so the harmonic was folded back.
    pub folded: bool,
    /// Its power (V^2): the unclaimed bins of its lobe over ENBW; 0 when it lands on the fundamental, on DC or
    /// on a lower harmonic (not separable there).
    pub power_v2: f64,
    /// Its power relative to the fundamental (dBc).
    pub dbc: f64,
    /// It lands within the fundamental's lobe or the DC lobe: flagged and not counted.
    pub on_fundamental_or_dc: bool,
    /// It lands within the lobe of this lower harmonic: flagged and not counted again.
    pub same_place_as: Option<u32>,
    /// It lands inside the measurement band.
    pub in_band: bool,
    /// It counts in THD (and is removed for SNR).
    pub counted: bool,
}

/// Dynamic metrics of a single-tone record.
#[derive(Debug, Clone, PartialEq)]
pub struct ToneMetrics {
    /// Measured fundamental frequency: centroid of its lobe (Hz).
    pub fundamental_hz: f64,
    /// Fundamental amplitude sqrt(2 P_fund) (V peak).
    pub fundamental_amplitude_v: f64,
    /// Fundamental power (V^2).
    pub fundamental_power_v2: f64,
    /// Signal-to-noise ratio (dB), harmonics 2..=H removed.
    pub snr_db: f64,
    /// Signal to noise and distortion (dB).
    pub sinad_db: f64,
    /// Total harmonic distortion over the counted harmonics (dBc, negative).
    pub thd_db: f64,
    /// Spurious-free dynamic range (dBc, positive).
    pub sfdr_dbc: f64,
    /// Effective number of bits from SINAD with the full-scale correction (see the module doc).
    pub enob_bits: f64,
    /// Mean power of the noise bins, as the spectrum displays them, relative to a full-scale sine (dBFS per bin;
    /// not ENBW-corrected, so it sits where the floor of [`Spectrum::dbfs`] does).
    pub noise_floor_dbfs: f64,
    /// Noise power in the band (V^2), harmonics removed and filled in.
    pub noise_power_v2: f64,
    /// Noise and distortion power in the band (V^2).
    pub nad_power_v2: f64,
    /// Sum of the counted harmonics' powers (V^2).
    pub harmonic_power_v2: f64,
    pub harmonics: Vec<HarmonicInfo>,
    /// Frequency of the largest spur (centroid of its lobe) (Hz); NaN if there is none.
    pub largest_spur_hz: f64,
    /// Power of the largest spur (V^2).
    pub largest_spur_power_v2: f64,
    /// Upper edge of the band actually used (Hz).
    pub band_hz: f64,
    /// How many harmonics were counted in THD.
    pub harmonics_counted: u32,
}

/// Inclusive bin interval.
type Span = (usize, usize);

fn in_span(k: usize, s: Span) -> bool {
    k >= s.0 && k <= s.1
}

/// Folds a frequency into [0, fs/2]: |((f + fs/2) mod fs) - fs/2| (Hz).
pub fn fold_frequency_hz(f_hz: f64, fs_hz: f64) -> f64 {
    ((f_hz + 0.5 * fs_hz).rem_euclid(fs_hz) - 0.5 * fs_hz).abs()
}

/// Sum and bandwidth weight of the bins 0..=kmax lying outside every span in `spans` (which may overlap).
fn sum_outside(spec: &Spectrum, kmax: usize, spans: &mut [Span]) -> (f64, f64) {
    spans.sort_unstable();
    let p = &spec.power_v2;
    let (mut sum, mut weight) = (0.0, 0.0);
    let mut next = 0usize; // first bin not yet visited
    let add_range = |a: usize, b: usize, sum: &mut f64, weight: &mut f64| {
        // bins a..b (exclusive), within 0..=kmax
        let b = b.min(kmax + 1);
        if a < b {
            *sum += sum4(&p[a..b]);
            *weight += (b - a) as f64;
            if a == 0 {
                *weight -= 1.0 - spec.bin_weight(0);
            }
            if b - 1 == p.len() - 1 {
                *weight -= 1.0 - spec.bin_weight(b - 1);
            }
        }
    };
    for &(a, b) in spans.iter() {
        if a > next {
            add_range(next, a, &mut sum, &mut weight);
        }
        next = next.max(b + 1);
    }
    add_range(next, kmax + 1, &mut sum, &mut weight);
    (sum, weight)
}

/// Sum with four interleaved accumulators (lets the compiler vectorise; also a little more accurate).
fn sum4(x: &[f64]) -> f64 {
    let mut acc = [0.0; 4];
    let chunks = x.chunks_exact(4);
    let rest: f64 = chunks.remainder().iter().sum();
    for c in chunks {
        for (a, v) in acc.iter_mut().zip(c) {
            *a += v;
        }
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + rest
}

/// Within bins lo..=hi of `p` (bins outside count as zero in the window sums, but neighbours for the
/// local-maximum test are read from the whole of `p`): the local maximum whose window sum over +-l bins is the
/// largest, with that (running, approximate) sum. One pass, sliding sum.
fn best_local_max_window(p: &[f64], lo: usize, hi: usize, l: usize) -> Option<(usize, f64)> {
    let seg = &p[lo..=hi];
    let m = seg.len();
    let last = p.len() - 1;
    let mut run: f64 = seg[..=l.min(m - 1)].iter().sum();
    let (mut best_i, mut best_run) = (usize::MAX, f64::NEG_INFINITY);
    for i in 0..m {
        if i > 0 {
            if i + l < m {
                run += seg[i + l];
            }
            if i > l {
                run -= seg[i - l - 1];
            }
        }
        let k = lo + i;
        let v = seg[i];
        let left = if k == 0 { f64::NEG_INFINITY } else { p[k - 1] };
        let right = if k == last {
            f64::NEG_INFINITY
        } else {
            p[k + 1]
        };
        let take = (v >= left) & (v >= right) & (run > best_run);
        best_run = if take { run } else { best_run };
        best_i = if take { i } else { best_i };
    }
    (best_i != usize::MAX).then(|| (lo + best_i, best_run))
}

fn db10(ratio: f64) -> f64 {
    10.0 * ratio.log10()
}

/// Measures a single-tone spectrum (see the module doc for every definition).
/// Errors on a non-positive full scale, an empty band or a fundamental that cannot be placed in the band.
pub fn tone_metrics(spec: &Spectrum, cfg: &MetricsConfig) -> Result<ToneMetrics> {
    let p = &spec.power_v2;
    let nb = p.len();
    let l = spec.lobe_half_width_bins;
    let enbw = spec.enbw_bins;
    if !(cfg.full_scale_peak_v.is_finite() && cfg.full_scale_peak_v > 0.0) {
        return Err(Error::Run(format!(
            "full-scale amplitude must be positive, got {} V",
            cfg.full_scale_peak_v
        )));
    }
    if nb < 2 * l + 3 || spec.bin_hz.is_nan() || spec.bin_hz <= 0.0 {
        return Err(Error::Run("spectrum too short for tone metrics".into()));
    }
    let nyq_k = nb - 1;
    let nyquist_hz = spec.nyquist_hz();
    let band_hz = match cfg.band_hz {
        Some(b) if b.is_finite() && b > 0.0 => b.min(nyquist_hz),
        Some(b) => {
            return Err(Error::Run(format!(
                "measurement band must be positive, got {b} Hz"
            )));
        }
        None => nyquist_hz,
    };
    let kmax = ((band_hz / spec.bin_hz + 1e-9).floor() as usize).min(nyq_k);
    if kmax <= l {
        return Err(Error::Run(format!(
            "measurement band {band_hz} Hz lies within the DC lobe"
        )));
    }
    // Band width in bins: the bandwidth weights of bins 0..=kmax.
    let band_bins = (kmax + 1) as f64 - (1.0 - spec.bin_weight(0)) - (1.0 - spec.bin_weight(kmax));

    // Fundamental.
    let argmax = |a: usize, b: usize| -> usize {
        // First index of the maximum of p[a..=b].
        let (mut best_k, mut best_v) = (a, p[a]);
        for (k, &v) in p[a..=b].iter().enumerate() {
            if v > best_v {
                best_v = v;
                best_k = a + k;
            }
        }
        best_k
    };
    let kf = match cfg.fundamental_hz {
        Some(f) => {
            let kg = (f / spec.bin_hz).round();
            if !(kg.is_finite() && kg > l as f64 && kg <= kmax as f64) {
                return Err(Error::Run(format!(
                    "fundamental {f} Hz is not inside the band ({} .. {band_hz} Hz) clear of the DC lobe",
                    (l + 1) as f64 * spec.bin_hz
                )));
            }
            let kg = kg as usize;
            argmax(kg.saturating_sub(l).max(l + 1), (kg + l).min(kmax))
        }
        None => argmax(l + 1, kmax),
    };
    let fund: Span = (kf.saturating_sub(l), (kf + l).min(nyq_k));
    let dc: Span = (0, l.min(fund.0.saturating_sub(1)));
    let dc_lobe_empty = fund.0 == 0;
    let in_dc = |k: usize| !dc_lobe_empty && in_span(k, dc);
    let (mut fund_sum, mut fund_moment) = (0.0, 0.0);
    for (k, &v) in p.iter().enumerate().take(fund.1 + 1).skip(fund.0) {
        fund_sum += v;
        fund_moment += k as f64 * v;
    }
    let p_fund = fund_sum / enbw;
    let fundamental_hz = if fund_sum > 0.0 {
        fund_moment / fund_sum * spec.bin_hz
    } else {
        kf as f64 * spec.bin_hz
    };
    let f_ref = cfg.fundamental_hz.unwrap_or(fundamental_hz);

    // Harmonics.
    let fs = spec.sample_rate_hz;
    let mut claimed: Vec<Span> = Vec::with_capacity(cfg.harmonics as usize + 2);
    if !dc_lobe_empty {
        claimed.push(dc);
    }
    claimed.push(fund);
    let mut harmonics = Vec::with_capacity(cfg.harmonics.saturating_sub(1) as usize);
    let mut placed: Vec<(u32, usize)> = Vec::new(); // (order, centre bin) of harmonics given a lobe
    let mut harmonic_power_v2 = 0.0;
    // Raw bin sum and bandwidth weight of the counted harmonics' bins (disjoint from everything claimed before).
    let (mut harmonic_raw_sum, mut harmonic_weight) = (0.0, 0.0);
    let mut harmonics_counted = 0;
    for order in 2..=cfg.harmonics {
        let f_unfolded = order as f64 * f_ref;
        let fh = fold_frequency_hz(f_unfolded, fs);
        let kh = ((fh / spec.bin_hz).round() as usize).min(nyq_k);
        let on_fundamental_or_dc = in_span(kh, fund) || in_dc(kh);
        let same_place_as = if on_fundamental_or_dc {
            None
        } else {
            placed
                .iter()
                .find(|&&(_, kc)| kh.abs_diff(kc) <= l)
                .map(|&(o, _)| o)
        };
        let in_band = kh <= kmax;
        let counted = in_band && !on_fundamental_or_dc && same_place_as.is_none();
        let mut power_v2 = 0.0;
        if !on_fundamental_or_dc && same_place_as.is_none() {
            let span: Span = (kh.saturating_sub(l), (kh + l).min(nyq_k));
            let (mut s, mut wsum) = (0.0, 0.0);
            for (k, &v) in p.iter().enumerate().take(span.1 + 1).skip(span.0) {
                if (!counted || k <= kmax) && !claimed.iter().any(|&c| in_span(k, c)) {
                    s += v;
                    wsum += spec.bin_weight(k);
                }
            }
            power_v2 = s / enbw;
            placed.push((order, kh));
            if counted {
                claimed.push((span.0, span.1.min(kmax)));
                harmonic_power_v2 += power_v2;
                harmonic_raw_sum += s;
                harmonic_weight += wsum;
                harmonics_counted += 1;
            }
        }
        harmonics.push(HarmonicInfo {
            order,
            frequency_hz: fh,
            folded: f_unfolded > 0.5 * fs,
            power_v2,
            dbc: db10(power_v2 / p_fund),
            on_fundamental_or_dc,
            same_place_as,
            in_band,
            counted,
        });
    }

    // Noise (SNR set: DC, fundamental and counted harmonics removed) and NAD (DC and fundamental removed).
    let (noise_sum, noise_weight) = sum_outside(spec, kmax, &mut claimed);
    // The NAD set is the noise set plus the counted harmonics' bins (disjoint by construction).
    let (nad_sum, nad_weight) = (noise_sum + harmonic_raw_sum, noise_weight + harmonic_weight);
    let noise_mean_bin = if noise_weight > 0.0 {
        noise_sum / noise_weight
    } else {
        0.0
    };
    let noise_density_v2_per_bin = noise_mean_bin / enbw;
    let noise_power_v2 = noise_density_v2_per_bin * band_bins;
    let nad_power_v2 = nad_sum / enbw + noise_density_v2_per_bin * (band_bins - nad_weight);

    // Largest spur: local maxima outside the DC and fundamental lobes, lobe sums over a sliding window of the
    // masked spectrum, then the winner's lobe summed exactly.
    let masked = |k: usize| -> f64 {
        if in_span(k, fund) || in_dc(k) {
            0.0
        } else {
            p[k]
        }
    };
    // The band bins outside the DC and fundamental lobes form at most two segments; a window's bins outside its
    // segment are masked, so each segment is scanned on its own.
    let mut best: Option<(usize, f64)> = None;
    let below = if dc_lobe_empty { None } else { Some(dc.1 + 1) };
    let segments = [
        below.map(|lo| (lo, fund.0.saturating_sub(1))),
        Some((fund.1 + 1, kmax)),
    ];
    for (lo, hi) in segments.into_iter().flatten() {
        if lo > hi || hi > kmax {
            continue;
        }
        if let Some((k, run)) = best_local_max_window(p, lo, hi, l)
            && best.is_none_or(|(_, b)| run > b)
        {
            best = Some((k, run));
        }
    }
    let (mut spur_power_v2, mut spur_hz) = (0.0, f64::NAN);
    if let Some((ks, _)) = best {
        let (mut s, mut m) = (0.0, 0.0);
        for k in ks.saturating_sub(l)..=(ks + l).min(kmax) {
            let v = masked(k);
            s += v;
            m += k as f64 * v;
        }
        spur_power_v2 = s / enbw;
        spur_hz = if s > 0.0 {
            m / s * spec.bin_hz
        } else {
            ks as f64 * spec.bin_hz
        };
    }
    for h in harmonics.iter().filter(|h| h.counted) {
        if h.power_v2 > spur_power_v2 {
            spur_power_v2 = h.power_v2;
            spur_hz = h.frequency_hz;
        }
    }

    let fs_ref_v2 = 0.5 * cfg.full_scale_peak_v * cfg.full_scale_peak_v;
    let amplitude_v = (2.0 * p_fund).sqrt();
    let sinad_db = db10(p_fund / nad_power_v2);
    let enob_bits = (sinad_db - db10(1.5) + 20.0 * (cfg.full_scale_peak_v / amplitude_v).log10())
        / (20.0 * 2f64.log10());
    Ok(ToneMetrics {
        fundamental_hz,
        fundamental_amplitude_v: amplitude_v,
        fundamental_power_v2: p_fund,
        snr_db: db10(p_fund / noise_power_v2),
        sinad_db,
        thd_db: db10(harmonic_power_v2 / p_fund),
        sfdr_dbc: db10(p_fund / spur_power_v2),
        enob_bits,
        noise_floor_dbfs: db10(noise_mean_bin / fs_ref_v2),
        noise_power_v2,
        nad_power_v2,
        harmonic_power_v2,
        harmonics,
        largest_spur_hz: spur_hz,
        largest_spur_power_v2: spur_power_v2,
        band_hz,
        harmonics_counted,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::coherent::coherent_frequency;
    use crate::measure::spectrum::SpectrumAnalyzer;
    use crate::scenario::WindowKind;
    use std::f64::consts::TAU;

    fn analyse(x: &[f64], fs: f64, kind: WindowKind, cfg: &MetricsConfig) -> ToneMetrics {
        let mut an = SpectrumAnalyzer::new(x.len(), kind).unwrap();
        let s = an.power_spectrum(x, fs).unwrap();
        tone_metrics(&s, cfg).unwrap()
    }

    /// Naive mid-rise quantizer of `bits` bits over +-fs_v: code = floor(x/q) clipped to
    /// [-2^(bits-1), 2^(bits-1) - 1], output (code + 1/2) q, q = 2 fs_v / 2^bits.
    fn quantize_mid_rise(x: f64, bits: u32, fs_v: f64) -> f64 {
        let levels = (1u64 << bits) as f64;
        let q = 2.0 * fs_v / levels;
        let code = (x / q).floor().clamp(-levels / 2.0, levels / 2.0 - 1.0);
        (code + 0.5) * q
    }

    /// Oracle for a coherent record (whole number of cycles of f_hz in the record): the fundamental's power by
    /// projection on sin/cos, and the mean square of what is left after removing it and the mean (the NAD).
    fn project_coherent(y: &[f64], f_over_fs: f64) -> (f64, f64) {
        let n = y.len() as f64;
        let (mut a, mut b, mut c) = (0.0, 0.0, 0.0);
        for (i, &v) in y.iter().enumerate() {
            let th = TAU * f_over_fs * i as f64;
            a += v * th.sin();
            b += v * th.cos();
            c += v;
        }
        let (a, b, c) = (2.0 * a / n, 2.0 * b / n, c / n);
        let res: f64 = y
            .iter()
            .enumerate()
            .map(|(i, &v)| {
                let th = TAU * f_over_fs * i as f64;
                let r = v - a * th.sin() - b * th.cos() - c;
                r * r
            })
            .sum::<f64>()
            / n;
        (0.5 * (a * a + b * b), res)
    }

    fn cfg(harmonics: u32) -> MetricsConfig {
        MetricsConfig {
            harmonics,
            band_hz: None,
            full_scale_peak_v: 1.0,
            fundamental_hz: None,
        }
    }

    #[test]
    fn ideal_quantizer_snr_follows_six_db_per_bit() {
        // W. R. Bennett, "Spectra of quantized signals", BSTJ 27, 1948: quantization noise q^2/12, whence
        // SNR = 6.02 N + 1.76 dB for a full-scale sine (N = bits). Mid-rise quantizer (see quantize_mid_rise),
        // full-scale coherent sine (J odd, coprime with the record length, IEEE Std 1241), no harmonics removed
        // (the quantization error of a coherent sine is all harmonics; Bennett's q^2/12 is its total).
        // The formula holds to 0.2 dB from 6 bits up; at 4 and 5 bits the error is far from uniform and the true
        // SINAD sits 0.25 and 0.22 dB under it (checked here against a time-domain projection oracle, and the same
        // figures come from numpy on a 2^20 record), so those two get 0.3 dB.
        let n = 1 << 15;
        let fs = 1.0;
        let (f, _) = coherent_frequency(0.0123, fs, n).unwrap();
        for bits in 4..=16u32 {
            let x: Vec<f64> = (0..n)
                .map(|i| quantize_mid_rise((TAU * f * i as f64).sin(), bits, 1.0))
                .collect();
            let ideal = 20.0 * 2f64.log10() * bits as f64 + 10.0 * 1.5f64.log10();
            let (pf, nad) = project_coherent(&x, f);
            for kind in [WindowKind::Rectangular, WindowKind::BlackmanHarris] {
                let m = analyse(&x, fs, kind, &cfg(1));
                let tol = if bits <= 5 { 0.3 } else { 0.2 };
                assert!(
                    (m.snr_db - ideal).abs() <= tol,
                    "{bits} bits {kind:?}: {} vs {ideal}",
                    m.snr_db
                );
                assert!((m.sinad_db - m.snr_db).abs() < 1e-9);
                // Oracle: time-domain projection of the same coherent record. The error of a coherent sine is a
                // line spectrum; the meter replaces the bins under the DC and fundamental lobes by the mean
                // density, which moves the result by up to ~0.06 dB when lines fall there (9 + 4.5 bins for
                // Blackman-Harris, 3 + 1.5 for rectangular: 0.003 dB).
                let oracle_tol = if kind == WindowKind::Rectangular {
                    0.005
                } else {
                    0.1
                };
                let oracle_db = 10.0 * (pf / nad).log10();
                assert!(
                    (m.sinad_db - oracle_db).abs() < oracle_tol,
                    "{bits} bits {kind:?}: {} vs projection {oracle_db}",
                    m.sinad_db
                );
                assert!((m.enob_bits - bits as f64).abs() <= tol / 6.02);
            }
        }
    }

    #[test]
    fn enob_adds_the_full_scale_correction_below_full_scale() {
        // ENOB = (SINAD - 1.76 + 20 log10(A_fs/A)) / 6.02 (IEEE Std 1241: ENOB is referred to full
        // scale). A 12-bit quantizer driven at half scale loses 6.02 dB of SINAD but keeps its ENOB near 12:
        // Bennett's q^2/12 does not depend on the amplitude (W. R. Bennett, BSTJ 1948).
        let n = 1 << 15;
        let (f, _) = coherent_frequency(0.0311, 1.0, n).unwrap();
        let x: Vec<f64> = (0..n)
            .map(|i| quantize_mid_rise(0.5 * (TAU * f * i as f64).sin(), 12, 1.0))
            .collect();
        let m = analyse(&x, 1.0, WindowKind::Rectangular, &cfg(1));
        assert!((m.fundamental_amplitude_v - 0.5).abs() < 1e-3);
        assert!((m.sinad_db - (6.02 * 12.0 + 1.76 - 6.02)).abs() < 0.2);
        assert!((m.enob_bits - 12.0).abs() < 0.2 / 6.02, "{}", m.enob_bits);
    }

    #[test]
    fn sine_in_white_noise_gives_back_its_snr_and_amplitude() {
        // Oracle: SNR = (A^2/2) / sigma^2 for a sine of amplitude A in white Gaussian noise of variance sigma^2
        // over the full Nyquist band (definition). Tolerance from the estimator's statistics: the noise estimate
        // behaves like the windowed sample variance sum(w^2 e^2)/sum(w^2), whose relative standard deviation
        // for Gaussian e is sqrt(2 sum w^4) / sum w^2; we allow 5 of those (failure odds ~1e-6 for a correct
        // meter) plus 0.02 dB for the window's leakage left outside the lobes. The peak-bin amplitude estimate has
        // standard deviation sigma sqrt(2 ENBW / N); we allow 10 of those (the lobe sum spreads the noise over
        // several correlated bins) plus the lobe-capture bound of window.rs's tests.
        // Rectangular, Hann and Hamming leak a non-coherent tone far outside +-L bins (about -33 dBc for Hann at
        // a half-bin offset), so they get a coherent frequency; Blackman-Harris and flat-top get an arbitrary one.
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let n = 1 << 16;
        let fs = 2.0e5;
        let a = 0.8;
        let sigma: f64 = 1.0e-3;
        let expect_snr: f64 = 10.0 * ((a * a / 2.0) / (sigma * sigma)).log10();
        for (seed, kind) in WindowKind::ALL.iter().enumerate() {
            let f = match kind {
                WindowKind::BlackmanHarris | WindowKind::FlatTop => 0.123_456_7 * fs,
                _ => coherent_frequency(0.1234567 * fs, fs, n).unwrap().0,
            };
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(100 + seed as u64);
            let normal = Normal::new(0.0, sigma).unwrap();
            let x: Vec<f64> = (0..n)
                .map(|i| a * (TAU * f * i as f64 / fs + 0.4).sin() + normal.sample(&mut rng))
                .collect();
            let w = crate::measure::window::Window::new(*kind, n);
            let s2: f64 = w.coeffs.iter().map(|v| v * v).sum();
            let s4: f64 = w.coeffs.iter().map(|v| v.powi(4)).sum();
            let rel_sd = (2.0 * s4).sqrt() / s2;
            let snr_tol_db = 10.0 * (1.0 + 5.0 * rel_sd).log10() + 0.02;
            let m = analyse(&x, fs, *kind, &cfg(9));
            assert!(
                (m.snr_db - expect_snr).abs() < snr_tol_db,
                "{kind:?}: SNR {} vs {expect_snr} (tol {snr_tol_db})",
                m.snr_db
            );
            let sd_a = sigma * (2.0 * w.enbw_bins() / n as f64).sqrt();
            let amp_tol = 10.0 * sd_a + a * (1.0 - 10f64.powf(-0.004 / 20.0));
            assert!(
                (m.fundamental_amplitude_v - a).abs() < amp_tol,
                "{kind:?}: A {} (tol {amp_tol})",
                m.fundamental_amplitude_v
            );
            assert!(
                (m.fundamental_hz - f).abs() < 0.05 * fs / n as f64,
                "{kind:?}"
            );
            // The floor per bin (displayed, not ENBW-corrected): 2 sigma^2 ENBW / N relative to A_fs^2/2.
            let floor = 10.0 * (2.0 * sigma * sigma * w.enbw_bins() / n as f64 / 0.5).log10();
            assert!((m.noise_floor_dbfs - floor).abs() < snr_tol_db, "{kind:?}");
        }
    }

    /// Fundamental a1, 2nd harmonic a2, 3rd harmonic a3 at f, sampled at fs (record of n samples).
    fn three_tones(n: usize, f_over_fs: f64, a: [f64; 3]) -> Vec<f64> {
        (0..n)
            .map(|i| {
                let th = TAU * f_over_fs * i as f64;
                a[0] * (th + 0.2).sin()
                    + a[1] * (2.0 * th + 1.1).sin()
                    + a[2] * (3.0 * th - 0.7).sin()
            })
            .collect()
    }

    #[test]
    fn thd_and_sfdr_of_known_harmonics_are_exact_with_every_window() {
        // Oracle (definitions, IEEE Std 1241): THD = 10 log10((a2^2 + a3^2) / a1^2), SFDR = 20 log10(a1 / a2)
        // for a1 > a2 > a3 and no other spur. Noise-free, so 0.05 dB is the meter's whole error budget.
        // Harmonics are -26 and -34 dBc: Hamming's first side lobes (-43 dB, about -38 dBc summed over a lobe)
        // would otherwise be the largest "spur" of a non-coherent tone, which is what they are.
        let n = 16384;
        let amps: [f64; 3] = [1.0, 0.05, 0.02];
        let thd = 10.0 * ((amps[1] * amps[1] + amps[2] * amps[2]) / (amps[0] * amps[0])).log10();
        let sfdr = 20.0 * (amps[0] / amps[1]).log10();
        let coherent = coherent_frequency(0.1831, 1.0, n).unwrap().0;
        for kind in WindowKind::ALL {
            let mut freqs = vec![coherent];
            if kind != WindowKind::Rectangular {
                freqs.push(0.183_137_7);
            }
            for f in freqs {
                let x = three_tones(n, f, amps);
                let m = analyse(&x, 1.0, kind, &cfg(9));
                assert!(
                    (m.thd_db - thd).abs() < 0.05,
                    "{kind:?} f {f}: THD {} vs {thd}",
                    m.thd_db
                );
                assert!(
                    (m.sfdr_dbc - sfdr).abs() < 0.05,
                    "{kind:?} f {f}: SFDR {} vs {sfdr}",
                    m.sfdr_dbc
                );
                assert!((m.largest_spur_hz - 2.0 * f).abs() < 0.5 / n as f64);
                let h3 = &m.harmonics[1];
                // Placed from the measured fundamental (lobe centroid), so within a fraction of a bin.
                assert!(h3.folded && h3.counted);
                assert!((h3.frequency_hz - (1.0 - 3.0 * f)).abs() < 0.2 / n as f64);
                assert!((h3.dbc - 20.0 * (amps[2] / amps[0]).log10()).abs() < 0.05);
                assert_eq!(m.harmonics_counted, 8);
            }
        }
    }

    #[test]
    fn quarter_rate_tone_flags_harmonics_on_dc_and_on_the_fundamental() {
        // Folding |((k f + fs/2) mod fs) - fs/2| (IEEE Std 1241): at f = fs/4 the 2nd harmonic lands on
        // fs/2, the 3rd and 5th on the fundamental, the 4th on DC and the 6th on the 2nd's place.
        // Oracles: mean squares of the sampled components, computed directly.
        let n = 4096;
        let (a1, a2, a3, a4) = (0.9, 0.03, 0.01, 0.02);
        let fund_part = |i: usize| {
            let th = TAU * 0.25 * i as f64;
            a1 * (th + 0.3).sin() + a3 * (3.0 * th + 0.5).sin()
        };
        // The 2nd harmonic at fs/2 is a2 cos(pi i + phase); its sampled power depends on the phase.
        let h2_part = |i: usize| a2 * (TAU * 0.5 * i as f64 + 0.9).cos();
        let x: Vec<f64> = (0..n)
            .map(|i| fund_part(i) + h2_part(i) + a4 * (TAU * i as f64 + 0.1).cos())
            .collect();
        let p_fund: f64 = (0..n).map(|i| fund_part(i).powi(2)).sum::<f64>() / n as f64;
        let p_h2: f64 = (0..n).map(|i| h2_part(i).powi(2)).sum::<f64>() / n as f64;
        for kind in WindowKind::ALL {
            let m = analyse(&x, 1.0, kind, &cfg(6));
            let h = &m.harmonics;
            assert_eq!(h.len(), 5);
            assert!((h[0].frequency_hz - 0.5).abs() < 1e-12 && h[0].counted);
            assert!((h[0].power_v2 / p_h2 - 1.0).abs() < 1e-9, "{kind:?}");
            assert!(h[1].on_fundamental_or_dc && !h[1].counted && h[1].power_v2 == 0.0);
            assert!(h[2].on_fundamental_or_dc && h[2].frequency_hz.abs() < 1e-12 && !h[2].counted);
            assert!(h[3].on_fundamental_or_dc && !h[3].counted);
            assert_eq!(h[4].same_place_as, Some(2));
            assert!(!h[4].counted);
            assert_eq!(m.harmonics_counted, 1);
            assert!(
                (m.fundamental_power_v2 / p_fund - 1.0).abs() < 1e-9,
                "{kind:?}"
            );
            assert!((m.thd_db - 10.0 * (p_h2 / p_fund).log10()).abs() < 1e-6);
            // Nothing else in the record: the DC is excluded and the only NAD is the 2nd harmonic.
            assert!(
                (m.sinad_db - 10.0 * (p_fund / p_h2).log10()).abs() < 1e-6,
                "{kind:?}"
            );
        }
    }

    #[test]
    fn a_harmonic_folding_below_the_fundamental_is_found() {
        // Folding as above: f = 0.3 fs puts the 2nd at 0.4 fs and the 3rd at 0.1 fs, below the fundamental.
        let n = 8192;
        let f = 0.300_123_4;
        let amps: [f64; 3] = [1.0, 0.004, 0.01];
        let x = three_tones(n, f, amps);
        let m = analyse(&x, 1.0, WindowKind::BlackmanHarris, &cfg(3));
        let h3 = &m.harmonics[1];
        assert!(h3.folded && h3.counted);
        assert!((h3.frequency_hz - (3.0 * f - 1.0).abs()).abs() < 0.2 / n as f64);
        assert!(h3.frequency_hz < m.fundamental_hz);
        assert!((h3.dbc - 20.0 * (amps[2] / amps[0]).log10()).abs() < 0.01);
        assert!((m.largest_spur_hz - h3.frequency_hz).abs() < 1.0 / n as f64);
    }

    #[test]
    fn harmonics_beyond_the_band_are_listed_but_not_counted() {
        // Band limited to 0.3 fs: the 2nd (0.366 fs) is out, the 3rd (folded to 0.451 fs) too; only the noise
        // and nothing else is in band, so SINAD = SNR and THD = -inf.
        let n = 8192;
        let f = 0.183_137_7;
        let x = three_tones(n, f, [1.0, 0.05, 0.02]);
        let mut c = cfg(3);
        c.band_hz = Some(0.3);
        let m = analyse(&x, 1.0, WindowKind::BlackmanHarris, &c);
        assert!(m.harmonics.iter().all(|h| !h.in_band && !h.counted));
        assert_eq!(m.harmonics_counted, 0);
        assert_eq!(m.thd_db, f64::NEG_INFINITY);
        // Only the window's own side lobes (-92 dB for this Blackman-Harris) are left in band.
        assert!(m.sfdr_dbc > 85.0, "{}", m.sfdr_dbc);
        assert_eq!(m.band_hz, 0.3);
    }

    #[test]
    fn white_noise_in_half_the_band_is_half_the_noise() {
        // White noise spreads evenly over 0..fs/2 (definition): measuring up to fs/4 halves its power, +3.01 dB
        // of SNR. Tolerance: 5 standard deviations of the quarter-band estimate (relative sd about
        // sqrt(2 * 2 sum w^4) / sum w^2) plus 0.02 dB.
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let n = 1 << 16;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let normal = Normal::new(0.0, 0.01).unwrap();
        let x: Vec<f64> = (0..n)
            .map(|i| (TAU * 0.0713 * i as f64).sin() + normal.sample(&mut rng))
            .collect();
        let full = analyse(&x, 1.0, WindowKind::BlackmanHarris, &cfg(5));
        let mut c = cfg(5);
        c.band_hz = Some(0.25);
        let half = analyse(&x, 1.0, WindowKind::BlackmanHarris, &c);
        let w = crate::measure::window::Window::new(WindowKind::BlackmanHarris, n);
        let s2: f64 = w.coeffs.iter().map(|v| v * v).sum();
        let s4: f64 = w.coeffs.iter().map(|v| v.powi(4)).sum();
        let tol = 10.0 * (1.0 + 5.0 * (4.0 * s4).sqrt() / s2).log10() + 0.02;
        let diff = half.snr_db - full.snr_db;
        assert!((diff - 10.0 * 2f64.log10()).abs() < tol, "{diff} tol {tol}");
    }

    #[test]
    fn aperture_jitter_limits_snr() {
        // SNR = -20 log10(2 pi f sigma_j) for a full-scale sine sampled with Gaussian timing jitter of standard
        // deviation sigma_j (common practice, no source; first-order: the error is A 2 pi f cos(2 pi f t) dt,
        // of power (A^2/2)(2 pi f sigma_j)^2). Statistical error of the estimate is about 0.03 dB at this
        // length; tolerance 0.5 dB as set for this check.
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let n = 1 << 16;
        let fs = 100.0e6;
        let (f, _) = coherent_frequency(10.3e6, fs, n).unwrap();
        let sigma_j = 1.0e-12;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let normal = Normal::new(0.0, sigma_j).unwrap();
        let x: Vec<f64> = (0..n)
            .map(|i| (TAU * f * (i as f64 / fs + normal.sample(&mut rng))).sin())
            .collect();
        let expect = -20.0 * (TAU * f * sigma_j).log10();
        for kind in [WindowKind::Rectangular, WindowKind::BlackmanHarris] {
            let m = analyse(&x, fs, kind, &cfg(9));
            assert!(
                (m.snr_db - expect).abs() < 0.5,
                "{kind:?}: {} vs {expect}",
                m.snr_db
            );
        }
    }

    #[test]
    fn given_fundamental_is_used_and_bad_configs_are_errors() {
        let n = 4096;
        // Two tones: the larger at 0.1 fs, the given one at 0.2 fs.
        let x: Vec<f64> = (0..n)
            .map(|i| {
                let t = i as f64;
                (TAU * 0.1 * t).sin() + 0.5 * (TAU * 0.2 * t).sin()
            })
            .collect();
        let mut an = SpectrumAnalyzer::new(n, WindowKind::BlackmanHarris).unwrap();
        let s = an.power_spectrum(&x, 1.0).unwrap();
        let mut c = cfg(2);
        c.fundamental_hz = Some(0.2);
        let m = tone_metrics(&s, &c).unwrap();
        assert!((m.fundamental_hz - 0.2).abs() < 1e-6);
        assert!((m.fundamental_amplitude_v - 0.5).abs() < 1e-6);
        assert!((m.sfdr_dbc + 20.0 * 2f64.log10()).abs() < 1e-6); // the 0.1 fs tone is a spur 6 dB above
        c.fundamental_hz = Some(0.0);
        assert!(tone_metrics(&s, &c).is_err());
        c.fundamental_hz = None;
        c.full_scale_peak_v = 0.0;
        assert!(tone_metrics(&s, &c).is_err());
        c.full_scale_peak_v = 1.0;
        c.band_hz = Some(-1.0);
        assert!(tone_metrics(&s, &c).is_err());
    }

    #[test]
    fn fold_frequency_matches_the_definition() {
        // |((f + fs/2) mod fs) - fs/2| (aliasing of a sampled tone, common practice, no source), checked on
        // hand-worked values.
        assert!((fold_frequency_hz(0.3, 1.0) - 0.3).abs() < 1e-15);
        assert!((fold_frequency_hz(0.6, 1.0) - 0.4).abs() < 1e-15);
        assert!((fold_frequency_hz(0.9, 1.0) - 0.1).abs() < 1e-15);
        assert!((fold_frequency_hz(1.0, 1.0)).abs() < 1e-15);
        assert!((fold_frequency_hz(1.25, 1.0) - 0.25).abs() < 1e-15);
        assert!((fold_frequency_hz(0.5, 1.0) - 0.5).abs() < 1e-15);
    }
}
