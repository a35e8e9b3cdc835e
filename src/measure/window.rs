//! Spectral windows in their periodic (DFT-even) form, with the figures of merit a measurement needs:
//! coherent gain, equivalent noise bandwidth, scalloping loss and the main-lobe half-width.
//!
//! Every window here is a sum of cosines, `w[n] = sum_m (-1)^m a_m cos(2 pi m n / N)`, n = 0..N-1. The periodic
//! form (period N, not N - 1) is the one whose DFT samples the window's transform exactly at bin spacing, which is
//! what spectral analysis wants (F. J. Harris, "On the use of windows for harmonic analysis with the discrete
//! Fourier transform", Proc. IEEE 66(1), 1978).

use crate::scenario::WindowKind;

/// Cosine-sum coefficients `a_m` of each window (sign alternation applied when the window is built).
///
/// - Rectangular: `[1]`.
/// - Hann: `[0.5, 0.5]`.
/// - Hamming: `[0.54, 0.46]` (Harris 1978).
/// - BlackmanHarris: the 4-term, -92 dB side-lobe window of Harris 1978: `[0.35875, 0.48829, 0.14128, 0.01168]`.
/// - FlatTop: the 5-term flat-top window of G. D'Antona and A. Ferrero, "Digital Signal Processing for
///   Measurement Systems", Springer 2006, p. 70 (the same coefficients `scipy.signal.windows.flattop` uses):
///   `[0.21557895, 0.41663158, 0.277263158, 0.083578947, 0.006947368]`.
pub fn cosine_coefficients(kind: WindowKind) -> &'static [f64] {
    match kind {
        WindowKind::Rectangular => &[1.0],
        WindowKind::Hann => &[0.5, 0.5],
        WindowKind::Hamming => &[0.54, 0.46],
        WindowKind::BlackmanHarris => &[0.35875, 0.48829, 0.14128, 0.01168],
        WindowKind::FlatTop => &[
            0.21557895,
            0.41663158,
            0.277263158,
            0.083578947,
            0.006947368,
        ],
    }
}

/// A window of a given length, periodic (DFT-even) form.
#[derive(Debug, Clone, PartialEq)]
pub struct Window {
    pub kind: WindowKind,
    /// The N coefficients w[0..N] (dimensionless).
    pub coeffs: Vec<f64>,
}

impl Window {
    /// Builds the periodic window of length `n` (n >= 1; for very short n some windows degenerate, e.g. a
    /// Hann window of length 1 is all zero).
    pub fn new(kind: WindowKind, n: usize) -> Window {
        let a = cosine_coefficients(kind);
        if a.len() == 1 {
            return Window {
                kind,
                coeffs: vec![a[0]; n],
            };
        }
        // Every term's argument is 2 pi r / N with r = m i reduced modulo N (so it stays in [0, 2 pi)): one
        // table of cos(2 pi r / N) over r = 0..N serves all terms, each term's index advancing by m per sample.
        let table: Vec<f64> = (0..n)
            .map(|r| (std::f64::consts::TAU * r as f64 / n as f64).cos())
            .collect();
        let mut r = vec![0usize; a.len()];
        let mut coeffs = Vec::with_capacity(n);
        for _ in 0..n {
            let mut acc = 0.0;
            let mut sign = 1.0;
            for (m, &am) in a.iter().enumerate() {
                acc += sign * am * table[r[m]];
                sign = -sign;
                r[m] += m;
                while r[m] >= n {
                    r[m] -= n;
                }
            }
            coeffs.push(acc);
        }
        Window { kind, coeffs }
    }

    /// Window length N (samples).
    pub fn len(&self) -> usize {
        self.coeffs.len()
    }

    /// True for a zero-length window.
    pub fn is_empty(&self) -> bool {
        self.coeffs.is_empty()
    }

    /// Coherent gain `sum(w) / N` (dimensionless): the factor by which the window scales a tone's amplitude
    /// read in its peak bin when the tone lies exactly on a bin.
    pub fn coherent_gain(&self) -> f64 {
        self.coeffs.iter().sum::<f64>() / self.len() as f64
    }

    /// Equivalent noise bandwidth `N sum(w^2) / (sum w)^2`, in bins.
    pub fn enbw_bins(&self) -> f64 {
        let s1: f64 = self.coeffs.iter().sum();
        let s2: f64 = self.coeffs.iter().map(|w| w * w).sum();
        self.len() as f64 * s2 / (s1 * s1)
    }

    /// Scalloping loss (dB, positive = loss): the drop of a tone's peak-bin amplitude when the tone lies half a
    /// bin off the bin centre, relative to a tone on the bin centre (Harris 1978's definition). Evaluated from the
    /// coefficients as `-20 log10 |sum w[n] e^(-j pi n / N)| / sum w[n]`.
    pub fn scalloping_loss_db(&self) -> f64 {
        -20.0 * (self.response_magnitude(0.5) / self.response_magnitude(0.0)).log10()
    }

    /// `|W(delta)| = |sum w[n] e^(-j 2 pi delta n / N)|`: the window's transform at `delta_bins` bins from its
    /// centre (dimensionless, unnormalised). O(N).
    pub fn response_magnitude(&self, delta_bins: f64) -> f64 {
        let n = self.len() as f64;
        let (mut re, mut im) = (0.0, 0.0);
        for (i, &w) in self.coeffs.iter().enumerate() {
            let ph = -std::f64::consts::TAU * delta_bins * i as f64 / n;
            re += w * ph.cos();
            im += w * ph.sin();
        }
        re.hypot(im)
    }

    /// Half-width of the main lobe (bins) excluded around a tone and summed as the tone's power: the position of
    /// the first zero of the main lobe, which for a cosine sum of K terms is K bins (rectangular 1, Hann and
    /// Hamming 2, 4-term Blackman-Harris 4, 5-term flat-top 5). With the lobe centred on the tone's peak bin this
    /// captures, at any tone offset, all of the tone's power but about 0.002 dB (Hann), 0.003 dB (Hamming, whose
    /// side lobes hold the rest) and 1e-7 dB or less (Blackman-Harris, flat-top). The rectangular window captures
    /// all only for a tone exactly on a bin (coherent sampling); off-bin it leaks everywhere.
    pub fn lobe_half_width_bins(&self) -> usize {
        lobe_half_width_bins(self.kind)
    }
}

/// See [`Window::lobe_half_width_bins`].
pub fn lobe_half_width_bins(kind: WindowKind) -> usize {
    cosine_coefficients(kind).len()
}

/// Modified Bessel function of the first kind, order 0, by its power series (for Kaiser windows).
pub fn bessel_i0(x: f64) -> f64 {
    let q = 0.25 * x * x;
    let mut term = 1.0;
    let mut sum = 1.0;
    for k in 1..200 {
        term *= q / (k as f64 * k as f64);
        sum += term;
        if term < 1e-17 * sum {
            break;
        }
    }
    sum
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Slow DFT of the window shifted by `delta` bins, bin k: sum w[n] e^(-j 2 pi (k - delta) n / N).
    fn dft_power(w: &[f64], k: f64) -> f64 {
        let n = w.len() as f64;
        let (mut re, mut im) = (0.0, 0.0);
        for (i, &x) in w.iter().enumerate() {
            let ph = -std::f64::consts::TAU * k * i as f64 / n;
            re += x * ph.cos();
            im += x * ph.sin();
        }
        re * re + im * im
    }

    #[test]
    fn figures_of_merit_match_harris_table_1() {
        // F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier transform",
        // Proc. IEEE 66(1), 1978, Table 1: coherent gain, ENBW (bins), scalloping loss (dB), quoted to 2 decimals,
        // so the tolerance is half a unit in the last place (0.005). Exception: the table's Hamming scalloping loss
        // (1.78 dB) is not reproduced by its own 0.54/0.46 coefficients, which give 1.751 dB (so does
        // scipy.signal.windows.hamming, scipy 1.17.1, see tests/reference/windows.py); that entry gets 0.035 dB.
        let n = 4096;
        let table = [
            (WindowKind::Rectangular, 1.00, 1.00, 3.92, 0.005),
            (WindowKind::Hann, 0.50, 1.50, 1.42, 0.005),
            (WindowKind::Hamming, 0.54, 1.36, 1.78, 0.035),
            (WindowKind::BlackmanHarris, 0.36, 2.00, 0.83, 0.005),
        ];
        for (kind, cg, enbw, sl, sl_tol) in table {
            let w = Window::new(kind, n);
            assert!(
                (w.coherent_gain() - cg).abs() <= 0.005,
                "{kind:?} CG {}",
                w.coherent_gain()
            );
            assert!(
                (w.enbw_bins() - enbw).abs() <= 0.005,
                "{kind:?} ENBW {}",
                w.enbw_bins()
            );
            assert!(
                (w.scalloping_loss_db() - sl).abs() <= sl_tol,
                "{kind:?} SL {}",
                w.scalloping_loss_db()
            );
        }
    }

    #[test]
    fn flat_top_figures_match_scipy() {
        // Computed with scipy.signal.windows.flattop(4096, sym=False) (scipy 1.17.1, numpy 2.4.6), see
        // tests/reference/windows.py; coefficients from D'Antona and Ferrero 2006, p. 70.
        let w = Window::new(WindowKind::FlatTop, 4096);
        let scipy_cg = 0.21557895;
        let scipy_enbw = 3.7702464474434287;
        let scipy_sl_db = 0.009778058428316371;
        assert!((w.coherent_gain() - scipy_cg).abs() < 1e-9);
        assert!((w.enbw_bins() - scipy_enbw).abs() < 1e-9);
        assert!((w.scalloping_loss_db() - scipy_sl_db).abs() < 1e-6);
    }

    #[test]
    fn windows_match_scipy_samples() {
        // Computed with scipy.signal.windows.{hann,hamming,blackmanharris,flattop}(16, sym=False)
        // (scipy 1.17.1), see tests/reference/windows.py: samples 0, 3 and 8.
        let cases = [
            (WindowKind::Hann, [0.0, 0.30865828381745514, 1.0]),
            (
                WindowKind::Hamming,
                [0.08000000000000007, 0.36396562111205877, 1.0],
            ),
            (
                WindowKind::BlackmanHarris,
                [6.0000000000001025e-05, 0.08278037370414673, 1.0],
            ),
            (
                WindowKind::FlatTop,
                [-0.0004210510000000013, -0.06269683377894208, 1.000000003],
            ),
        ];
        for (kind, expect) in cases {
            let w = Window::new(kind, 16);
            for (&i, &e) in [0usize, 3, 8].iter().zip(expect.iter()) {
                assert!(
                    (w.coeffs[i] - e).abs() < 1e-12,
                    "{kind:?}[{i}] = {} vs {e}",
                    w.coeffs[i]
                );
            }
        }
    }

    #[test]
    fn enbw_equals_noise_power_gain_over_tone_power_gain_by_slow_dft() {
        // Oracle: ENBW is the sum over all bins of |W(k)|^2 divided by |W(0)|^2 (Parseval), by slow DFT.
        let n = 256;
        for kind in WindowKind::ALL {
            let w = Window::new(kind, n);
            let total: f64 = (0..n).map(|k| dft_power(&w.coeffs, k as f64)).sum();
            let enbw = total / dft_power(&w.coeffs, 0.0);
            assert!((enbw - w.enbw_bins()).abs() < 1e-9, "{kind:?}");
        }
    }

    #[test]
    fn main_lobe_holds_the_tone_power_at_any_offset_except_rectangular() {
        // Oracle: slow DFT of the window shifted by delta; the share of the total (N sum w^2, Parseval) inside
        // +-lobe_half_width bins of the peak bin. The bound justifies summing the lobe as the tone's power.
        let n = 512;
        let bounds = [
            (WindowKind::Hann, 0.003),
            (WindowKind::Hamming, 0.004),
            (WindowKind::BlackmanHarris, 1e-6),
            (WindowKind::FlatTop, 1e-6),
        ];
        for (kind, max_loss_db) in bounds {
            let w = Window::new(kind, n);
            let total = n as f64 * w.coeffs.iter().map(|x| x * x).sum::<f64>();
            let l = w.lobe_half_width_bins() as i64;
            for step in 0..=10 {
                let delta = step as f64 * 0.05;
                let lobe: f64 = (-l..=l)
                    .map(|k| dft_power(&w.coeffs, k as f64 - delta))
                    .sum();
                let loss_db = -10.0 * (lobe / total).log10();
                assert!(loss_db < max_loss_db, "{kind:?} delta {delta}: {loss_db}");
            }
        }
    }

    #[test]
    fn the_table_gives_the_bits_of_the_direct_sum() {
        // The direct definition, one cosine per term and sample with m i reduced modulo N: the table must give
        // the same bits (the same argument, the same sum order).
        for n in [1usize, 2, 7, 64, 1000, 4099] {
            for kind in WindowKind::ALL {
                let a = cosine_coefficients(kind);
                let direct: Vec<f64> = (0..n)
                    .map(|i| {
                        let mut acc = 0.0;
                        let mut sign = 1.0;
                        for (m, &am) in a.iter().enumerate() {
                            let r = ((m as u128 * i as u128) % n as u128) as f64;
                            acc += sign * am * (std::f64::consts::TAU * r / n as f64).cos();
                            sign = -sign;
                        }
                        acc
                    })
                    .collect();
                let w = Window::new(kind, n);
                assert_eq!(w.coeffs.len(), n);
                for (i, (x, y)) in w.coeffs.iter().zip(&direct).enumerate() {
                    assert_eq!(x.to_bits(), y.to_bits(), "{kind:?} n={n} i={i}");
                }
            }
        }
    }

    #[test]
    fn periodic_window_is_symmetric_about_n_over_2() {
        let n = 64;
        for kind in WindowKind::ALL {
            let w = Window::new(kind, n);
            for i in 1..n {
                assert!((w.coeffs[i] - w.coeffs[n - i]).abs() < 1e-14);
            }
        }
    }
}
