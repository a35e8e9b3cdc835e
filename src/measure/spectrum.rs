//! Windowed one-sided power spectra, scaled so that tone powers read in V^2.
//!
//! Scaling: with window w of coherent gain CG = sum(w)/N and `X[k] = sum w[n] x[n] e^(-j 2 pi k n / N)`,
//! `P[k] = c_k |X[k]|^2 / (N CG)^2` with c_k = 2 for 0 < k < N/2 and 1 for DC and (N even) the Nyquist bin.
//! A sine of amplitude A exactly on bin k (0 < k < N/2) then reads A^2/2 in bin k, whatever the window. Summing
//! the bins of a tone's main lobe and dividing by the window's ENBW (bins) gives the tone's power, and summing
//! noise bins and dividing by ENBW gives the noise power in their bandwidth (the window's noise gain is ENBW times
//! its tone gain). DC is kept in bin 0 (a constant c reads c^2); the metrics leave its lobe out.

use std::cell::RefCell;
use std::sync::Arc;

use num_complex::Complex;
use realfft::{ComplexToReal, RealFftPlanner, RealToComplex};

use crate::error::{Error, Result};
use crate::measure::window::Window;
use crate::scenario::WindowKind;

/// Shortest record the analyser accepts (samples).
pub const MIN_RECORD_LEN: usize = 16;

/// How many plans of each direction a thread keeps (most recently used first).
const PLAN_CACHE: usize = 8;

/// The plans a thread made last, by length.
#[derive(Default)]
struct PlanCache {
    forward: Vec<(usize, Arc<dyn RealToComplex<f64>>)>,
    inverse: Vec<(usize, Arc<dyn ComplexToReal<f64>>)>,
    windows: Vec<((WindowKind, usize), Arc<Window>)>,
}

thread_local! {
    /// The runs of a study analyse records of the same lengths again and again: keeping the last few plans per
    /// thread computes twiddle factors once per length, not once per run. Bounded (a sweep over durations
    /// meets a new length at every point), unlike a planner's own cache.
    static PLANS: RefCell<PlanCache> = RefCell::new(PlanCache::default());
}

/// Look `n` up in a most-recently-used list, making and inserting the plan on a miss.
fn cached<K: PartialEq + Copy, P: Clone>(
    list: &mut Vec<(K, P)>,
    n: K,
    make: impl FnOnce() -> P,
) -> P {
    let plan = match list.iter().position(|(m, _)| *m == n) {
        Some(i) => list.remove(i).1,
        None => make(),
    };
    list.insert(0, (n, plan.clone()));
    list.truncate(PLAN_CACHE);
    plan
}

/// A forward real FFT plan of length `n`, shared with recent callers on this thread.
pub(crate) fn plan_forward(n: usize) -> Arc<dyn RealToComplex<f64>> {
    PLANS.with(|c| {
        cached(&mut c.borrow_mut().forward, n, || {
            RealFftPlanner::new().plan_fft_forward(n)
        })
    })
}

/// An inverse real FFT plan of length `n`, shared with recent callers on this thread.
pub(crate) fn plan_inverse(n: usize) -> Arc<dyn ComplexToReal<f64>> {
    PLANS.with(|c| {
        cached(&mut c.borrow_mut().inverse, n, || {
            RealFftPlanner::new().plan_fft_inverse(n)
        })
    })
}

/// A window of `kind` and length `n`, shared with recent callers on this thread.
fn shared_window(kind: WindowKind, n: usize) -> Arc<Window> {
    PLANS.with(|c| {
        cached(&mut c.borrow_mut().windows, (kind, n), || {
            Arc::new(Window::new(kind, n))
        })
    })
}

/// A one-sided power spectrum (see the module doc for its scaling).
#[derive(Debug, Clone, PartialEq)]
pub struct Spectrum {
    /// Bin spacing fs/N (Hz).
    pub bin_hz: f64,
    /// Sample rate of the analysed record (Hz).
    pub sample_rate_hz: f64,
    /// Record length N (samples).
    pub record_len: usize,
    /// Power per bin, bins 0..=N/2 (V^2); a sine of amplitude A on a bin centre reads A^2/2.
    pub power_v2: Vec<f64>,
    /// The window's equivalent noise bandwidth (bins).
    pub enbw_bins: f64,
    /// The window's coherent gain (dimensionless), already corrected for in `power_v2`.
    pub coherent_gain: f64,
    pub window: WindowKind,
    /// Main-lobe half-width of the window (bins), see [`Window::lobe_half_width_bins`].
    pub lobe_half_width_bins: usize,
}

impl Spectrum {
    /// An empty spectrum to be filled by [`SpectrumAnalyzer::power_spectrum_into`].
    pub fn empty() -> Spectrum {
        Spectrum {
            bin_hz: 0.0,
            sample_rate_hz: 0.0,
            record_len: 0,
            power_v2: Vec::new(),
            enbw_bins: 1.0,
            coherent_gain: 1.0,
            window: WindowKind::Rectangular,
            lobe_half_width_bins: 1,
        }
    }

    /// Frequency of bin `k` (Hz).
    pub fn bin_frequency_hz(&self, k: usize) -> f64 {
        k as f64 * self.bin_hz
    }

    /// Nyquist frequency fs/2 (Hz).
    pub fn nyquist_hz(&self) -> f64 {
        0.5 * self.sample_rate_hz
    }

    /// Bandwidth weight of bin k in bins: 1/2 for DC and (N even) the Nyquist bin, which hold only half a bin of
    /// one-sided bandwidth, 1 otherwise.
    pub fn bin_weight(&self, k: usize) -> f64 {
        if k == 0 || (self.record_len.is_multiple_of(2) && k == self.record_len / 2) {
            0.5
        } else {
            1.0
        }
    }

    /// Each bin in dB relative to a full-scale sine: `10 log10(P / (A_fs^2 / 2))`, so a full-scale sine on a bin
    /// centre reads 0 dBFS. `full_scale_peak_v` is the full-scale sine's peak (V). Floored at -400 dB.
    pub fn dbfs(&self, full_scale_peak_v: f64) -> Vec<f64> {
        let ref_v2 = 0.5 * full_scale_peak_v * full_scale_peak_v;
        self.power_v2
            .iter()
            .map(|&p| db_floor(p / ref_v2))
            .collect()
    }

    /// Each bin in dBV (dB re 1 V rms): `10 log10(P / 1 V^2)`; a sine on a bin centre reads its rms level.
    /// Floored at -400 dB.
    pub fn dbv(&self) -> Vec<f64> {
        self.power_v2.iter().map(|&p| db_floor(p)).collect()
    }
}

fn db_floor(ratio: f64) -> f64 {
    (10.0 * ratio.log10()).max(-400.0)
}

/// Windowed real FFT analyser for one record length: the plan, the window and the scratch buffers are built once
/// and reused by every call.
pub struct SpectrumAnalyzer {
    n: usize,
    window: Arc<Window>,
    enbw_bins: f64,
    coherent_gain: f64,
    fft: Arc<dyn RealToComplex<f64>>,
    input: Vec<f64>,
    output: Vec<Complex<f64>>,
    scratch: Vec<Complex<f64>>,
}

impl std::fmt::Debug for SpectrumAnalyzer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SpectrumAnalyzer")
            .field("n", &self.n)
            .field("window", &self.window.kind)
            .finish()
    }
}

impl SpectrumAnalyzer {
    /// An analyser for records of exactly `n` samples (n >= [`MIN_RECORD_LEN`]) with the given window.
    pub fn new(n: usize, kind: WindowKind) -> Result<Self> {
        if n < MIN_RECORD_LEN {
            return Err(Error::Run(format!(
                "spectrum analysis needs at least {MIN_RECORD_LEN} samples, got {n}"
            )));
        }
        let window = shared_window(kind, n);
        let fft = plan_forward(n);
        let input = fft.make_input_vec();
        let output = fft.make_output_vec();
        let scratch = fft.make_scratch_vec();
        Ok(SpectrumAnalyzer {
            n,
            enbw_bins: window.enbw_bins(),
            coherent_gain: window.coherent_gain(),
            window,
            fft,
            input,
            output,
            scratch,
        })
    }

    /// Record length N (samples).
    pub fn len(&self) -> usize {
        self.n
    }

    /// Always false (the analyser needs at least [`MIN_RECORD_LEN`] samples).
    pub fn is_empty(&self) -> bool {
        false
    }

    /// The window in use.
    pub fn window(&self) -> &Window {
        &self.window
    }

    /// One-sided power spectrum of `x` (V) sampled at `sample_rate_hz`, in a new [`Spectrum`].
    /// Errors if `x.len()` differs from the analyser's length or the sample rate is not positive and finite.
    pub fn power_spectrum(&mut self, x: &[f64], sample_rate_hz: f64) -> Result<Spectrum> {
        let mut out = Spectrum::empty();
        self.power_spectrum_into(x, sample_rate_hz, &mut out)?;
        Ok(out)
    }

    /// As [`Self::power_spectrum`], writing into `out` and reusing its storage (no allocation once `out` has
    /// held a spectrum of this length).
    pub fn power_spectrum_into(
        &mut self,
        x: &[f64],
        sample_rate_hz: f64,
        out: &mut Spectrum,
    ) -> Result<()> {
        if x.len() != self.n {
            return Err(Error::Run(format!(
                "spectrum analyser built for {} samples was given {}",
                self.n,
                x.len()
            )));
        }
        if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
            return Err(Error::Run(format!(
                "sample rate must be positive and finite, got {sample_rate_hz} Hz"
            )));
        }
        for ((dst, &xi), &wi) in self.input.iter_mut().zip(x).zip(&self.window.coeffs) {
            *dst = xi * wi;
        }
        self.fft
            .process_with_scratch(&mut self.input, &mut self.output, &mut self.scratch)
            .map_err(|e| Error::Run(format!("FFT failed: {e}")))?;

        let n = self.n;
        let norm = n as f64 * self.coherent_gain;
        let one_sided = 1.0 / (norm * norm);
        let two_sided = 2.0 * one_sided;
        out.power_v2.clear();
        out.power_v2
            .extend(self.output.iter().map(|c| two_sided * c.norm_sqr()));
        out.power_v2[0] *= 0.5;
        if n.is_multiple_of(2) {
            out.power_v2[n / 2] *= 0.5;
        }
        out.bin_hz = sample_rate_hz / n as f64;
        out.sample_rate_hz = sample_rate_hz;
        out.record_len = n;
        out.enbw_bins = self.enbw_bins;
        out.coherent_gain = self.coherent_gain;
        out.window = self.window.kind;
        out.lobe_half_width_bins = self.window.lobe_half_width_bins();
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::TAU;

    #[test]
    fn a_sine_on_a_bin_reads_half_its_amplitude_squared_with_every_window() {
        let n = 1024;
        let fs = 1000.0;
        let a = 0.7;
        let k0 = 37;
        let x: Vec<f64> = (0..n)
            .map(|i| a * (TAU * k0 as f64 * i as f64 / n as f64 + 0.3).sin())
            .collect();
        for kind in WindowKind::ALL {
            let mut an = SpectrumAnalyzer::new(n, kind).unwrap();
            let s = an.power_spectrum(&x, fs).unwrap();
            assert_eq!(s.power_v2.len(), n / 2 + 1);
            assert!((s.power_v2[k0] - a * a / 2.0).abs() < 1e-12, "{kind:?}");
            assert!((s.bin_frequency_hz(k0) - 37.0 * fs / n as f64).abs() < 1e-12);
            assert!((s.dbv()[k0] - 20.0 * (a / 2f64.sqrt()).log10()).abs() < 1e-9);
            assert!((s.dbfs(a)[k0]).abs() < 1e-9);
        }
    }

    #[test]
    fn lobe_sum_over_enbw_gives_tone_power_and_total_sum_gives_mean_square() {
        // Oracle: Parseval. Sum of all one-sided bins / ENBW = mean square of the record when the window is
        // rectangular; for any window, a lone off-bin tone's lobe sum / ENBW = A^2/2 to within the lobe capture.
        let n = 2048;
        let a = 1.3;
        let x: Vec<f64> = (0..n)
            .map(|i| a * (TAU * 200.37 * i as f64 / n as f64).cos() + 0.2)
            .collect();
        let mut an = SpectrumAnalyzer::new(n, WindowKind::Rectangular).unwrap();
        let s = an.power_spectrum(&x, 1.0).unwrap();
        let ms = x.iter().map(|v| v * v).sum::<f64>() / n as f64;
        assert!((s.power_v2.iter().sum::<f64>() - ms).abs() < 1e-12);
        for kind in [
            WindowKind::Hann,
            WindowKind::BlackmanHarris,
            WindowKind::FlatTop,
        ] {
            let mut an = SpectrumAnalyzer::new(n, kind).unwrap();
            let s = an.power_spectrum(&x, 1.0).unwrap();
            let l = s.lobe_half_width_bins;
            let lobe: f64 = s.power_v2[200 - l..=200 + l].iter().sum();
            let p = lobe / s.enbw_bins;
            assert!(
                (10.0 * (p / (a * a / 2.0)).log10()).abs() < 0.003,
                "{kind:?}"
            );
            // DC of 0.2 V reads 0.04 V^2 in its lobe.
            let dc: f64 = s.power_v2[0..=l].iter().sum::<f64>() / s.enbw_bins;
            assert!((dc - 0.04).abs() < 1e-6, "{kind:?} dc {dc}");
        }
    }

    #[test]
    fn matches_a_slow_dft_for_an_odd_length() {
        // Oracle: direct O(N^2) DFT with the same scaling.
        let n = 45;
        let x: Vec<f64> = (0..n).map(|i| ((i * 7919) % 13) as f64 - 6.0).collect();
        let mut an = SpectrumAnalyzer::new(n, WindowKind::Hann).unwrap();
        let s = an.power_spectrum(&x, 2.0).unwrap();
        let w = Window::new(WindowKind::Hann, n);
        let norm = w.coeffs.iter().sum::<f64>();
        assert_eq!(s.power_v2.len(), n / 2 + 1);
        for k in 0..=n / 2 {
            let (mut re, mut im) = (0.0, 0.0);
            for (i, (&wi, &xi)) in w.coeffs.iter().zip(&x).enumerate() {
                let ph = -TAU * (k * i) as f64 / n as f64;
                re += wi * xi * ph.cos();
                im += wi * xi * ph.sin();
            }
            let c = if k == 0 { 1.0 } else { 2.0 };
            let p = c * (re * re + im * im) / (norm * norm);
            assert!((s.power_v2[k] - p).abs() < 1e-10 * (1.0 + p), "bin {k}");
        }
    }

    #[test]
    fn rejects_wrong_length_and_bad_rate_and_tiny_records() {
        let mut an = SpectrumAnalyzer::new(64, WindowKind::Hann).unwrap();
        assert!(an.power_spectrum(&[0.0; 63], 1.0).is_err());
        assert!(an.power_spectrum(&[0.0; 64], 0.0).is_err());
        assert!(an.power_spectrum(&[0.0; 64], f64::NAN).is_err());
        assert!(SpectrumAnalyzer::new(4, WindowKind::Hann).is_err());
    }

    #[test]
    fn reusing_the_analyser_gives_identical_results() {
        let n = 256;
        let x: Vec<f64> = (0..n).map(|i| (i as f64 * 0.1).sin()).collect();
        let y: Vec<f64> = (0..n).map(|i| (i as f64 * 0.37).cos()).collect();
        let mut an = SpectrumAnalyzer::new(n, WindowKind::BlackmanHarris).unwrap();
        let a1 = an.power_spectrum(&x, 1.0).unwrap();
        let mut out = Spectrum::empty();
        an.power_spectrum_into(&y, 1.0, &mut out).unwrap();
        an.power_spectrum_into(&x, 1.0, &mut out).unwrap();
        assert_eq!(a1, out);
    }
}
