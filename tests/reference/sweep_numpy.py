#!/usr/bin/env python3
"""The reference chain (benches/reference-chain.toml) written with numpy + scipy, for the speed comparison of the
200-point sweep. Not part of the crate, not run by CI. See the module docstring's end for the timing results.

Chain (same parameters as benches/reference-chain.toml, duration 20 ms, settle 2 ms):
  sine 2.5 V + 2 V sin(2 pi f t) on a 10 MHz grid
  -> ideal sample-and-hold (no aperture jitter): the source at the sampling instants k / 100 kHz
  -> 12-bit SAR, range 0..5 V: code = clip(floor((v - low) / q), 0, 4095), q = 5 V / 4096, available 8 us after
     the sampling instant
  -> R-2R DAC, 1 % uniform resistor tolerance: the resistors are drawn with numpy's default_rng(seed) (NOT the
     ChaCha8 stream convchain uses, so the ladder differs from convchain's draw) and the bit weights come from a
     nodal solve of the drawn ladder (not renormalised); zero-order hold switching at each code's availability
  -> output amplifier dv/dt = clamp((T - v) / tau, -SR, +SR), SR = 2 V/us, tau = 0.5 us, in closed form per
     hold segment (slew at SR until |T - v| = SR tau, then exponential), evaluated at the grid instants; the
     segment start values come from a scalar recurrence over the segments (one Python iteration per code), the
     waveform itself is filled in one vectorised operation
  -> 4th-order Butterworth lowpass 20 kHz, digital by the bilinear transform with pre-warping
     (scipy.signal.butter(4, 20e3, fs=10e6, output="sos")), scipy.signal.sosfilt on the grid, from rest
  -> analysis records: scipy.signal.resample_poly(x, 1, 25, window=("kaiser", 10.0)) to 400 kHz (zero phase,
     odd extension at the record end; beta 10 rather than scipy's default 5, whose +0.012 dB ripple at 19 kHz
     showed up as a gain difference), the output record of 7168 samples (4 per code, 1792 codes: the 1798
     conversions of the window trimmed to a 2^a 3^b 5^c 7^d length, as convchain) ending at the end of the run; the source record is the closed-form source at the same instants. Coherent frequency: the
     nearest odd cycle count coprime with the 1792-code record, as src/measure/coherent.rs.

Meters (`point` / `measure`; the definitions of convchain's src/measure/*.rs, vectorised with numpy/scipy):
  - spectrum: 4-term Blackman-Harris (periodic), numpy.fft.rfft, bin powers 2 |X|^2 / (N cg)^2 (half at DC and
    Nyquist), sums over ENBW, lobes of +-4 bins (spectrum.rs, window.rs);
  - tone metrics (metrics.rs tone_metrics): fundamental = the peak within +-4 bins of f, its lobe; harmonics
    2..=9 folded, each claiming its unclaimed lobe bins; noise density = mean of the band bins outside the DC,
    fundamental and counted-harmonic lobes (bin-width weighted), filled in over the removed bins; SNR, SINAD,
    THD, SFDR (largest local-maximum lobe outside the DC and fundamental lobes, or a larger harmonic), ENOB with
    the full-scale correction (exact 10 log10(3/2) and 20 log10 2), noise floor in dBFS per bin. ADC: the codes
    at code centres, full Nyquist band, full scale 2.5 V; output: 0..20 kHz, input-referred full scale
    A_out x 2.5 V / 2 V;
  - sine-fit ENOB of the ADC record (sinefit.rs fit3 + enob_from_residual, IEEE Std 1241 three-parameter fit):
    numpy.linalg.lstsq on [cos, sin, 1], 12 - log2(rms residual / (q / sqrt 12));
  - gain: output fundamental over the source record's fundamental (lobe sums);
  - latency budget (pipeline.rs Chain::budget): aperture delay 0 + conversion 8 us + ZOH T/2 + amplifier lag
    atan(w tau)/w + phase delay of the analog 4th-order Butterworth prototype at f;
  - measured latency (chain.rs measure_delay + latency.rs xcorr_delay_s): output record shifted back by the
    budget's whole samples, searched +- a quarter period; mean-removed records, the source's interior
    Hann-tapered, FFT cross-correlation padded to the same 2^a 3^b length, |peak|, then a parabola and Newton
    on the band-limited (trigonometric) interpolation of the correlation;
  - phase delay (latency.rs phase_delay_s): three-parameter fits of both records (one lstsq, two columns),
    the period count chosen nearest the measured latency; difference = measured - budget;
  - fidelity (fidelity.rs fidelity_exact_at): the full-rate 10 MHz output over the capture window (grid
    samples 20000..200000) against the closed-form source delayed by the measured latency, least-squares gain
    and offset, 10 log10(g^2 var(y) / mse).
  `--sweep --minimal` runs the old, SINAD/ENOB-only work (`point_minimal`, `sinad`: no THD/SFDR/SNR tables,
  no sine fit, latency, phase delay, budget, gain, source record or fidelity) on the same chain output.

Usage:  python3 tests/reference/sweep_numpy.py [F_HZ]          every metric at one point (default 1 kHz)
        OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1 python3 tests/reference/sweep_numpy.py --sweep
        (the same) ... --sweep --minimal
        SWEEP_TOL=0 python3 tests/reference/sweep_numpy.py --check SWEEP.CSV 0,109,199
                                                 numpy vs convchain for rows of a convchain sweep.csv

Agreement with convchain (main at eb40c64, target/release/convchain), ideal ladder (SWEEP_TOL=0
here, tolerance = "0%" in a copy of the 20 ms scenario), `--check` on rows 0, 109, 199 of the 200-point sweep
(945.49 Hz, 5061.18 Hz, 19076.75 Hz; numpy - convchain):
  ADC SNR, SINAD, THD, SFDR, noise floor: < 2e-11 dB; ADC ENOB, sine-fit ENOB: < 1e-11 bit;
  output SNR, SINAD, THD, SFDR: < 4e-5 dB (THD is -inf in both at 19 kHz: no harmonic in the band);
  output ENOB < 6e-6 bit; gain < 3e-5 dB; fidelity +0.0002, +0.0039, +0.0047 dB;
  latency measured -0.273, -0.263, -0.036 ns; budget < 1e-19 s; phase delay (convchain's from `run --json`)
  -0.27, -0.25, -0.04 ns; difference (measured - budget) -0.27, -0.26, -0.04 ns.
  The latency offsets are the chain model's, not the meters': the bilinear transform here warps frequency, so
  its phase delay is 0.273, 0.263, 0.036 ns shorter than the analog prototype's at these frequencies
  (scipy.signal.sosfreqz vs freqs, scipy 1.17.1), which convchain's filter (exact pole mapping) follows.
  Fed convchain's own grid output and codes (run --full, waveforms.csv, 12958.84 Hz) the meters here give every
  ADC metric to < 2e-11, output metrics to < 6e-5 dB, fidelity to 2e-7 dB, latency to 1e-17 s and phase
  delay to 1.3e-12 s.
  Over all 200 points the largest differences are ADC THD/SFDR 0.11 dB, ADC SNR 0.008 dB, output THD 0.39 dB,
  SFDR 0.23 dB, SNR 0.043 dB, fidelity 0.011 dB, latency 0.35 ns: the ADC input is exactly mid-scale (2.5 V,
  a code threshold) at conversions 899 and 1798 of every point (sin of a whole number of half cycles), and
  rounding decides 2047 or 2048 differently here and in convchain at some points; with the same codes the
  ADC metrics agree to 1e-11 (checked at 12958.84 Hz). Harmonics near -85 .. -90 dBc sit on the noise, so
  that one code moves THD/SFDR by tenths of a dB.

Results (2 cores shared with other jobs; numpy 2.4.6, scipy 1.17.1, Python 3.11.7; OMP/OPENBLAS/MKL_NUM_THREADS=1;
wall clock of the 200 points from time.perf_counter around the sweep loop, i.e. without interpreter start and
imports, with the process's CPU time beside it; the two variants alternated):
  --sweep (all metrics):              7.80, 8.01, 7.47 s  (CPU 4.02, 3.99, 3.72 s)
  --sweep --minimal (SINAD/ENOB only): 4.67, 4.59, 4.60 s  (CPU 2.31, 2.27, 2.29 s)
  load average (1 min) from `uptime` 8.4 .. 8.9 throughout, so the wall times are about twice the CPU times;
  on this machine at load 3.6 .. 4.8 the minimal sweep took 1.84 .. 2.21 s earlier. Time both variants and
  convchain back to back on a quieter machine before comparing.
"""
import math
import os
import sys
import time

import numpy as np
import scipy.signal as ss

GRID_HZ = 10e6
DURATION_S = 20e-3
SETTLE_S = 2e-3
AMP_V, OFFSET_V = 2.0, 2.5
BITS, LOW_V, HIGH_V = 12, 0.0, 5.0
FS_HZ = 100e3
CONV_S = 8e-6
TOL = float(os.environ.get("SWEEP_TOL", "0.01"))  # SWEEP_TOL=0 for the ideal-ladder cross-check
SR_V_PER_S, TAU_S = 2e6, 0.5e-6
FC_HZ = 20e3
BAND_HZ = 20e3
DECIM = 25  # 10 MHz / 25 = 400 kHz = 4 x the conversion rate (as convchain chooses)
# Anti-alias window of resample_poly (its default FIR length, 2 x 10 x 25 + 1 taps): scipy's default
# ("kaiser", 5.0) ripples by +0.012 dB at 19 kHz; beta 10 keeps the band within 1.3e-5 dB and rejects >110 dB
# near 400 kHz, as flat as convchain's decimator (ripple < 5e-4 dB, about 100 dB stopband), at the same cost.
DECIM_WINDOW = ("kaiser", 10.0)
LOBE = 4  # Blackman-Harris 4-term: main-lobe half-width in bins
HARMONICS = 9
SEED = int(os.environ.get("SWEEP_SEED", "7"))

N_GRID = int(round(DURATION_S * GRID_HZ))
STEP = int(round(GRID_HZ / FS_HZ))  # grid steps per conversion
DELAY = int(round(CONV_S * GRID_HZ))  # grid steps from sampling to code availability
N_CODES = int(round(DURATION_S * FS_HZ))
# Record: the conversions in (duration - settle - conversion time - one period), as convchain's plan.
M_AVAIL = int(math.floor((DURATION_S - SETTLE_S - CONV_S - 1 / FS_HZ) * FS_HZ))  # 1798


def smooth_at_most(n):
    """Largest length <= n with prime factors 2, 3, 5, 7 only (as convchain's Plan: fast FFTs)."""
    for m in range(n, 0, -1):
        r = m
        for p in (2, 3, 5, 7):
            while r % p == 0:
                r //= p
        if r == 1:
            return m
    return n


M_REC = smooth_at_most(M_AVAIL)  # 1792; the record keeps the end of the window
K0 = int(math.ceil(SETTLE_S * FS_HZ)) + (M_AVAIL - M_REC)
OUT_HZ = GRID_HZ / DECIM
OUT_REC = M_REC * int(round(OUT_HZ / FS_HZ))

SOS = ss.butter(4, FC_HZ, btype="low", fs=GRID_HZ, output="sos")


def coherent_frequency(f_hz, fs_hz, n):
    """Nearest admissible cycle count J (odd, coprime with n, 2J < n) to f n / fs; ties go down."""
    j_max = (n - 1) // 2
    target = min(max(f_hz * n / fs_hz, 0.0), j_max + 1.0)
    ok = lambda j: j >= 1 and j % 2 == 1 and 2 * j < n and math.gcd(j, n) == 1
    lo = min(int(math.floor(target)), j_max)
    below = next((j for j in range(lo, 0, -1) if ok(j)), None)
    above = next((j for j in range(lo + 1, j_max + 1) if ok(j)), None)
    if below is not None and above is not None:
        best = below if target - below <= above - target else above
    else:
        best = below if below is not None else above
    return best * fs_hz / n


def r2r_weights(rng):
    """Bit weights (MSB first) of a current-mode R-2R ladder with resistors drawn uniform within +-TOL."""
    d = lambda: 1.0 + TOL * (2.0 * rng.random() - 1.0)
    shunt, series = [], []
    for k in range(BITS):
        shunt.append(2.0 * d())
        if k + 1 < BITS:
            series.append(d())
    term = 2.0 * d()
    # Nodal equations for nodes 1..n-1, node 0 at 1 V; bit current = node voltage / shunt.
    n = BITS
    g = np.zeros((n - 1, n - 1))
    rhs = np.zeros(n - 1)
    for node in range(1, n):
        j = node - 1
        g_up = 1.0 / series[node - 1]
        g_down = 1.0 / series[node] if node < n - 1 else 1.0 / term
        g[j, j] = g_up + g_down + 1.0 / shunt[node]
        if node < n - 1:
            g[j, j + 1] = -1.0 / series[node]
        if j == 0:
            rhs[j] = g_up
        else:
            g[j, j - 1] = -g_up
    v = np.concatenate(([1.0], np.linalg.solve(g, rhs)))
    return v / np.array(shunt)


def dac_levels(weights):
    codes = np.arange(1 << BITS)
    bits = (codes[:, None] >> np.arange(BITS - 1, -1, -1)) & 1
    return LOW_V + (HIGH_V - LOW_V) * (bits @ weights)


LEVELS = dac_levels(r2r_weights(np.random.default_rng(SEED)))
BH = ss.windows.blackmanharris(OUT_REC, sym=False)


def amp_segments(targets, v_init, dt, steps):
    """Output amplifier over hold segments of `steps` grid steps with constant targets: values at s = m dt."""
    band = SR_V_PER_S * TAU_S
    decay_full = math.exp(-steps * dt / TAU_S)
    seg_len = steps * dt
    e0 = np.empty(len(targets))
    v = v_init
    for j, t in enumerate(targets.tolist()):  # scalar recurrence: start value of each segment
        e = t - v
        e0[j] = e
        ae = abs(e)
        if ae <= band:
            e_end = e * decay_full
        else:
            s1 = (ae - band) / SR_V_PER_S
            if s1 >= seg_len:
                e_end = math.copysign(ae - SR_V_PER_S * seg_len, e)
            else:
                e_end = math.copysign(band * math.exp(-(seg_len - s1) / TAU_S), e)
        v = t - e_end
    s = np.arange(steps) * dt
    ae0 = np.abs(e0)[:, None]
    sg = np.sign(e0)[:, None]
    s1 = np.maximum(ae0 - band, 0.0) / SR_V_PER_S
    slewing = s[None, :] < s1
    e = np.where(
        slewing,
        sg * (ae0 - SR_V_PER_S * s[None, :]),
        np.where(ae0 <= band, e0[:, None], sg * band) * np.exp(-np.maximum(s[None, :] - s1, 0.0) / TAU_S),
    )
    return (targets[:, None] - e).ravel()


def chain_output(f_hz):
    """Grid output of the chain (V) and the ADC codes."""
    t_k = np.arange(N_CODES) / FS_HZ
    held = OFFSET_V + AMP_V * np.sin(2 * np.pi * f_hz * t_k)  # ideal S/H: source at the sampling instants
    q = (HIGH_V - LOW_V) / (1 << BITS)
    codes = np.clip(np.floor((held - LOW_V) / q), 0, (1 << BITS) - 1).astype(np.int64)
    targets = LEVELS[codes]
    # Grid: level(0) = LOW_V before the first code arrives at DELAY; code j holds from DELAY + j STEP.
    y = np.empty(N_GRID)
    y[:DELAY] = LEVELS[0]
    n_seg = -(-(N_GRID - DELAY) // STEP)
    seg = amp_segments(targets[:n_seg], LEVELS[0], 1 / GRID_HZ, STEP)
    y[DELAY:] = seg[: N_GRID - DELAY]
    return ss.sosfilt(SOS, y), codes


def sinad(x, rate_hz, band_hz, f0_hz, window, fs_scale):
    """SINAD (dB, relative to the fundamental) and ENOB (bits) referred to a full-scale sine of amplitude
    fs_scale(A_fund): (SINAD - 1.76 + 20 log10(FS / A)) / 6.02."""
    n = len(x)
    cg = window.sum() / n
    enbw = n * np.sum(window**2) / window.sum() ** 2
    p = np.abs(np.fft.rfft(x * window)) ** 2 / (n * cg) ** 2
    p[1:] *= 2.0
    wgt = np.ones_like(p)
    wgt[0] = 0.5
    if n % 2 == 0:
        p[-1] /= 2.0
        wgt[-1] = 0.5
    kmax = min(int(math.floor(band_hz * n / rate_hz)), len(p) - 1)
    k0 = int(round(f0_hz * n / rate_hz))
    lo, hi = max(k0 - LOBE, 0), min(k0 + LOBE, len(p) - 1)
    k_pk = lo + int(np.argmax(p[lo : hi + 1]))
    f_lo, f_hi = max(k_pk - LOBE, LOBE + 1), k_pk + LOBE
    p_fund = p[f_lo : f_hi + 1].sum() / enbw
    a_fund = math.sqrt(2 * p_fund)
    inband = np.zeros(len(p), bool)
    inband[: kmax + 1] = True
    other = inband.copy()
    other[: LOBE + 1] = False
    other[f_lo : f_hi + 1] = False
    noise = other.copy()
    for h in range(2, HARMONICS + 1):  # harmonic lobes (folded) are left out of the noise density only
        fh = (h * f0_hz) % rate_hz
        fh = min(fh, rate_hz - fh)
        kh = int(round(fh * n / rate_hz))
        if kh <= kmax:
            noise[max(kh - LOBE, 0) : kh + LOBE + 1] = False
    density = (p[noise].sum() / enbw) / wgt[noise].sum()
    removed = wgt[inband & ~other].sum()
    nad = p[other].sum() / enbw + density * removed
    fs = fs_scale(a_fund)
    # SINAD relative to the fundamental; ENOB carries the full-scale correction 20 log10(FS / A) (as convchain).
    s_db = 10 * math.log10(p_fund / nad)
    return s_db, (s_db - 1.76 + 20 * math.log10(fs / a_fund)) / 6.02


def point_minimal(f_req_hz):
    """The old, SINAD/ENOB-only work per point (`--sweep --minimal`)."""
    f = coherent_frequency(f_req_hz, FS_HZ, M_REC)
    y, codes = chain_output(f)
    # Decimate only the tail that holds the record (plus the FIR's reach), then keep the last OUT_REC samples.
    start = N_GRID - (OUT_REC + 40) * DECIM
    dec = ss.resample_poly(y[start:], 1, DECIM, window=DECIM_WINDOW, padtype="antireflect")[-OUT_REC:]
    fs_in = (HIGH_V - LOW_V) / 2
    s_out, e_out = sinad(dec, OUT_HZ, BAND_HZ, f, BH, lambda a: a * fs_in / AMP_V)
    q = (HIGH_V - LOW_V) / (1 << BITS)
    adc_v = LOW_V + (codes[K0 : K0 + M_REC] + 0.5) * q
    w = ss.windows.blackmanharris(M_REC, sym=False)
    s_adc, e_adc = sinad(adc_v, FS_HZ, FS_HZ / 2, f, w, lambda a: fs_in)
    return f, s_adc, e_adc, s_out, e_out


# ---------------------------------------------------------------------------------------------------------------
# Full meters: the per-point metrics of convchain's sweep, by the definitions of src/measure/*.rs.
# ---------------------------------------------------------------------------------------------------------------

Q_V = (HIGH_V - LOW_V) / (1 << BITS)
FS_PEAK_V = (HIGH_V - LOW_V) / 2  # full-scale sine amplitude of the ADC
OUT_START = N_GRID - OUT_REC * DECIM  # grid index of the first output-record sample
CAPTURE_N0 = int(math.ceil(round(SETTLE_S * GRID_HZ) / DECIM)) * DECIM  # n_settle on the decimated grid
CAPTURE_IDX = np.arange(N_GRID - CAPTURE_N0, dtype=float)
_, BUTTER_POLES, _ = ss.butter(4, 2 * np.pi * FC_HZ, btype="low", analog=True, output="zpk")


def round_half_away(x):
    """Rust's f64::round (half away from zero), for the bin indices."""
    return int(math.floor(abs(x) + 0.5)) * (1 if x >= 0 else -1)


class ToneMeter:
    """Power spectrum and single-tone metrics of a record of length n (src/measure/spectrum.rs, metrics.rs)."""

    def __init__(self, n, rate_hz):
        self.n, self.rate_hz = n, rate_hz
        self.window = ss.windows.blackmanharris(n, sym=False)  # 4-term, periodic: as window.rs
        s1, s2 = self.window.sum(), np.sum(self.window**2)
        self.enbw = n * s2 / s1**2
        self.norm2 = 2.0 / s1**2  # two-sided to one-sided, coherent gain removed: 2 |X|^2 / (n cg)^2
        self.bin_hz = rate_hz / n
        self.wgt = np.ones(n // 2 + 1)  # bandwidth of each bin: half a bin at DC and at Nyquist (n even)
        self.wgt[0] = 0.5
        if n % 2 == 0:
            self.wgt[-1] = 0.5

    def spectrum(self, x):
        z = np.fft.rfft(x * self.window)
        p = (z.real**2 + z.imag**2) * self.norm2
        p[0] *= 0.5
        if self.n % 2 == 0:
            p[-1] *= 0.5
        return p

    def fundamental(self, p, f0_hz, kmax):
        """Peak bin within +-LOBE of f0, its lobe (first, last bin) and the fundamental power (V^2)."""
        kg = round_half_away(f0_hz / self.bin_hz)
        lo, hi = max(kg - LOBE, LOBE + 1), min(kg + LOBE, kmax)
        kf = lo + int(np.argmax(p[lo : hi + 1]))
        f_lo, f_hi = max(kf - LOBE, 0), min(kf + LOBE, len(p) - 1)
        return f_lo, f_hi, p[f_lo : f_hi + 1].sum() / self.enbw

    def kmax(self, band_hz):
        band = min(band_hz, 0.5 * self.rate_hz) if band_hz else 0.5 * self.rate_hz
        return min(int(math.floor(band / self.bin_hz + 1e-9)), len(self.wgt) - 1)

    def metrics(self, p, f0_hz, band_hz, full_scale_peak_v):
        """dict: amplitude, SNR, SINAD, THD, SFDR, ENOB, noise floor (dBFS per bin) as tone_metrics."""
        nb, enbw, wgt, L = len(p), self.enbw, self.wgt, LOBE
        nyq = nb - 1
        kmax = self.kmax(band_hz)
        band_bins = (kmax + 1) - (1 - wgt[0]) - (1 - wgt[kmax])
        f_lo, f_hi, p_fund = self.fundamental(p, f0_hz, kmax)
        assert f_lo > 0, "fundamental lobe reaches DC (not the case in this sweep)"
        dc_hi = min(L, f_lo - 1)
        claimed = np.zeros(nb, bool)
        claimed[: dc_hi + 1] = True
        claimed[f_lo : f_hi + 1] = True
        # Harmonics 2..=H at their folded places; sequential because each claims its lobe from the later ones.
        placed, h_pow, h_raw, h_wgt, h_max = [], 0.0, 0.0, 0.0, 0.0
        for order in range(2, HARMONICS + 1):
            fh = abs((order * f0_hz + 0.5 * self.rate_hz) % self.rate_hz - 0.5 * self.rate_hz)
            kh = min(round_half_away(fh / self.bin_hz), nyq)
            if f_lo <= kh <= f_hi or kh <= dc_hi or any(abs(kh - kc) <= L for kc in placed):
                continue  # on the fundamental or DC, or on a lower harmonic: not counted
            placed.append(kh)
            if kh > kmax:
                continue  # beyond the band: listed by convchain, not counted
            a, b = max(kh - L, 0), min(kh + L, kmax)
            free = ~claimed[a : b + 1]
            s = p[a : b + 1][free].sum()
            h_raw += s
            h_wgt += wgt[a : b + 1][free].sum()
            h_pow += s / enbw
            h_max = max(h_max, s / enbw)
            claimed[a : b + 1] = True
        # Noise: the band bins left, their mean density filled in over the removed bins.
        free = ~claimed[: kmax + 1]
        noise_sum, noise_wgt = p[: kmax + 1][free].sum(), wgt[: kmax + 1][free].sum()
        mean_bin = noise_sum / noise_wgt
        density = mean_bin / enbw
        noise = density * band_bins
        nad = (noise_sum + h_raw) / enbw + density * (band_bins - noise_wgt - h_wgt)
        # Largest spur: over the local maxima outside the DC and fundamental lobes, the one whose +-L window sum
        # (within its segment) is largest; then its lobe summed over the masked spectrum; or a larger harmonic.
        best_k, best_run = -1, -np.inf
        for lo, hi in ((dc_hi + 1, f_lo - 1), (f_hi + 1, kmax)):
            if lo > hi:
                continue
            seg = p[lo : hi + 1]
            m = len(seg)
            cs = np.concatenate(([0.0], np.cumsum(seg)))
            i = np.arange(m)
            run = cs[np.minimum(i + L + 1, m)] - cs[np.maximum(i - L, 0)]
            k = lo + i
            right = np.where(k < nyq, p[np.minimum(k + 1, nyq)], -np.inf)
            peak = (seg >= p[k - 1]) & (seg >= right)
            if peak.any():
                j = int(np.argmax(np.where(peak, run, -np.inf)))
                if run[j] > best_run:
                    best_k, best_run = lo + j, run[j]
        spur = 0.0
        if best_k >= 0:
            a, b = max(best_k - L, 0), min(best_k + L, kmax)
            lobe = p[a : b + 1].copy()
            k = np.arange(a, b + 1)
            lobe[(k <= dc_hi) | ((k >= f_lo) & (k <= f_hi))] = 0.0  # DC and fundamental lobes masked
            spur = lobe.sum() / enbw
        spur = max(spur, h_max)
        amp = math.sqrt(2 * p_fund)
        sinad_db = 10 * math.log10(p_fund / nad)
        return dict(
            amplitude_v=amp,
            snr_db=10 * math.log10(p_fund / noise),
            sinad_db=sinad_db,
            thd_db=10 * math.log10(h_pow / p_fund) if h_pow > 0 else -np.inf,
            sfdr_dbc=10 * math.log10(p_fund / spur) if spur > 0 else np.inf,
            enob_bits=(sinad_db - 10 * math.log10(1.5) + 20 * math.log10(full_scale_peak_v / amp))
            / (20 * math.log10(2)),
            noise_floor_dbfs=10 * math.log10(mean_bin / (0.5 * full_scale_peak_v**2)),
        )


ADC_METER = ToneMeter(M_REC, FS_HZ)
OUT_METER = ToneMeter(OUT_REC, OUT_HZ)


def fit3(x, rate_hz, f_hz):
    """IEEE Std 1241 three-parameter fit x ~ a cos(w t) + b sin(w t) + c, t = n / rate, of each column of x.
    Returns (a, b, residual rms over N), one entry per column."""
    w_n = 2 * np.pi * f_hz / rate_hz * np.arange(x.shape[0])
    basis = np.column_stack((np.cos(w_n), np.sin(w_n), np.ones_like(w_n)))
    coef, ssr, *_ = np.linalg.lstsq(basis, x, rcond=None)
    return coef[0], coef[1], np.sqrt(ssr / x.shape[0])


def fft_len(n):
    """Smallest 2^a 3^b >= n with a >= 1 (latency.rs fft_len: the padded correlation length)."""
    best = 1 << (max(n, 2) - 1).bit_length()  # next power of two
    p3 = 1
    while p3 < best:
        m = p3 * 2
        while m < n:
            m *= 2
        best = min(best, m)
        p3 *= 3
    return best


def xcorr_delay_s(x_in, x_out, rate_hz, max_delay_s):
    """Delay of x_out against x_in (s) as latency.rs xcorr_delay_s: mean-removed records, the input's interior
    Hann-tapered, FFT cross-correlation zero-padded to fft_len, the |peak| over +-max lag, then Newton on the
    band-limited (trigonometric) interpolation of the correlation, started by a parabola."""
    longest = max(len(x_in), len(x_out))
    max_lag = min(math.ceil(max_delay_s * rate_hz), longest - 1)
    reach = max_lag + 1
    trim = reach if len(x_in) > 16 * reach else 0
    size = fft_len(longest + reach + 1)
    inner = x_in[trim : len(x_in) - trim]
    padded = np.zeros(size)
    padded[trim : trim + len(inner)] = (inner - inner.mean()) * (np.hanning(len(inner)) if trim else 1.0)
    spec = np.conj(np.fft.rfft(padded)) * np.fft.rfft(x_out - x_out.mean(), size)
    r = np.fft.irfft(spec, size)
    lags = np.arange(-max_lag, max_lag + 1)
    l0 = int(lags[np.argmax(np.abs(r[lags % size]))])
    half = size // 2
    w = 2 * np.pi * np.arange(1, half) / size  # rad per sample of bins 1 .. half-1
    s_mid, s0, s_ny = spec[1:half], spec[0].real, spec[half].real

    def derivs(tau):  # r(tau), r'(tau), r''(tau) of the band-limited interpolation
        z = s_mid * np.exp(1j * w * tau)
        c, s = math.cos(np.pi * tau), math.sin(np.pi * tau)
        return (
            (s0 + 2 * z.real.sum() + s_ny * c) / size,
            (-2 * np.dot(w, z.imag) - s_ny * np.pi * s) / size,
            (-2 * np.dot(w * w, z.real) - s_ny * np.pi**2 * c) / size,
        )

    ym, y0, yp = r[(l0 - 1) % size], r[l0 % size], r[(l0 + 1) % size]
    sign = -1.0 if y0 < 0 else 1.0
    den = ym - 2 * y0 + yp
    tau = float(l0)
    if den * sign < 0:
        tau += min(max(0.5 * (ym - yp) / den, -0.5), 0.5)
    for _ in range(30):
        _, d1, d2 = derivs(tau)
        if d2 * sign >= 0 or d2 == 0:
            break
        nxt = min(max(tau - d1 / d2, l0 - 1.0), l0 + 1.0)
        moved, tau = abs(nxt - tau), nxt
        if moved < 1e-10:
            break
    return tau / rate_hz


def budget_s(f_hz):
    """Chain::budget for this chain at f: aperture delay (0), conversion time, DAC zero-order hold (T/2), the
    output amplifier's first-order lag atan(w tau)/w, the analog 4th-order Butterworth's phase delay at f."""
    w = 2 * np.pi * f_hz
    filt = -np.sum(np.angle(-BUTTER_POLES / (1j * w - BUTTER_POLES))) / w  # each pole's term stays in (-pi, 0]
    return 0.0 + CONV_S + 0.5 / FS_HZ + math.atan(w * TAU_S) / w + filt


def point(f_req_hz):
    """Every per-point metric of convchain's sweep (dict)."""
    f = coherent_frequency(f_req_hz, FS_HZ, M_REC)
    return measure(f, *chain_output(f))


def measure(f, y, codes):
    """The meters of convchain's measure_run on a run at the (coherent) frequency f: y the grid output (V),
    codes the ADC codes of conversions 0, 1, ..."""
    res = dict(f_hz=f)
    # ADC record: codes as volts at code centres, full Nyquist band, full scale 2.5 V.
    adc_v = LOW_V + (codes[K0 : K0 + M_REC] + 0.5) * Q_V
    for k, v in ADC_METER.metrics(ADC_METER.spectrum(adc_v), f, None, FS_PEAK_V).items():
        res["adc_" + k] = v
    _, _, (rms,) = fit3(adc_v[:, None], FS_HZ, f)
    res["adc_enob_sinefit_bits"] = BITS - math.log2(rms / (Q_V / math.sqrt(12)))
    # Output record (band-limited, decimated to 400 kHz, end-aligned) and the exact source at the same instants.
    start = OUT_START - 40 * DECIM
    out = ss.resample_poly(y[start:], 1, DECIM, window=DECIM_WINDOW, padtype="antireflect")[-OUT_REC:]
    t_rec = (OUT_START + DECIM * np.arange(OUT_REC)) / GRID_HZ
    src = OFFSET_V + AMP_V * np.sin(2 * np.pi * f * t_rec)
    p_src = OUT_METER.spectrum(src)
    _, _, p_fund_src = OUT_METER.fundamental(p_src, f, OUT_METER.kmax(BAND_HZ))
    a_src = math.sqrt(2 * p_fund_src)
    p_out = OUT_METER.spectrum(out)
    _, _, p_fund_out = OUT_METER.fundamental(p_out, f, OUT_METER.kmax(BAND_HZ))
    a_out = math.sqrt(2 * p_fund_out)
    # Input-referred full scale: the output amplitude a full-scale sine at the ADC would give.
    for k, v in OUT_METER.metrics(p_out, f, BAND_HZ, a_out * FS_PEAK_V / AMP_V).items():
        res["out_" + k] = v
    res["out_gain_db"] = 20 * math.log10(a_out / a_src)
    # Latency: budget, cross-correlation searched +- a quarter period around the budget, phase delay.
    bud = budget_s(f)
    shift = min(max(round_half_away(bud * OUT_HZ), 0), OUT_REC // 2)
    half_window_s = min(0.25 / f, (OUT_REC - shift) / OUT_HZ / 4)
    measured = shift / OUT_HZ + xcorr_delay_s(src[: OUT_REC - shift], out[shift:], OUT_HZ, half_window_s)
    a, b, _ = fit3(np.column_stack((src, out)), OUT_HZ, f)
    phi = np.arctan2(-b, a)
    base = ((phi[0] - phi[1]) % (2 * np.pi)) / (2 * np.pi * f)
    res["lat_measured_s"] = measured
    res["lat_phase_delay_s"] = base + round_half_away((measured - base) * f) / f
    res["lat_budget_s"] = bud
    res["lat_difference_s"] = measured - bud
    # Fidelity on the full-rate output over the capture window against the source delayed by the latency.
    o = y[CAPTURE_N0:]
    ref = np.sin(CAPTURE_IDX * (2 * np.pi * f / GRID_HZ) + 2 * np.pi * f * (CAPTURE_N0 / GRID_HZ - measured))
    ref -= ref.mean()
    oc = o - o.mean()
    g = np.dot(ref, oc) / np.dot(ref, ref)
    err = oc - g * ref
    res["out_fidelity_db"] = 10 * math.log10(g * g * np.dot(ref, ref) / np.dot(err, err))
    return res


# Columns of convchain's sweep.csv (and rows.json) matched by the keys of point().
CSV_KEYS = {
    "frequency_used_hz": "f_hz",
    "adc.amplitude_v": "adc_amplitude_v",
    "adc.snr_db": "adc_snr_db",
    "adc.sinad_db": "adc_sinad_db",
    "adc.enob_bits": "adc_enob_bits",
    "adc.enob_sinefit_bits": "adc_enob_sinefit_bits",
    "adc.thd_db": "adc_thd_db",
    "adc.sfdr_dbc": "adc_sfdr_dbc",
    "adc.noise_floor_dbfs": "adc_noise_floor_dbfs",
    "output.amplitude_v": "out_amplitude_v",
    "output.snr_db": "out_snr_db",
    "output.sinad_db": "out_sinad_db",
    "output.enob_bits": "out_enob_bits",
    "output.thd_db": "out_thd_db",
    "output.sfdr_dbc": "out_sfdr_dbc",
    "output.gain_db": "out_gain_db",
    "output.fidelity_db": "out_fidelity_db",
    "latency.measured_s": "lat_measured_s",
    "latency.budget_s": "lat_budget_s",
}


def check(csv_path, rows):
    """Print numpy vs convchain for the given row indices of a convchain sweep.csv."""
    import csv

    table = list(csv.DictReader(open(csv_path)))
    for i in rows:
        row = table[i]
        mine = point(float(row["frequency_requested_hz"]))
        print(f"row {i}: requested {float(row['frequency_requested_hz']):.2f} Hz")
        print(f"  {'metric':24s} {'numpy':>20s} {'convchain':>20s} {'difference':>12s}")
        for col, key in CSV_KEYS.items():
            c, m = float(row[col] or "nan"), mine[key]  # convchain leaves non-finite values empty
            print(f"  {col:24s} {m:20.12g} {c:20.12g} {m - c:12.3g}")
        for key in ("lat_phase_delay_s", "lat_difference_s"):
            print(f"  {key:24s} {mine[key]:20.12g}")


def main():
    if "--check" in sys.argv:
        i = sys.argv.index("--check")
        check(sys.argv[i + 1], [int(v) for v in sys.argv[i + 2].split(",")])
    elif "--sweep" in sys.argv:
        minimal = "--minimal" in sys.argv
        freqs = np.geomspace(1e3, 19e3, 200)
        run = point_minimal if minimal else point
        t0, c0 = time.perf_counter(), time.process_time()
        rows = [run(f) for f in freqs]
        dt, cpu = time.perf_counter() - t0, time.process_time() - c0
        for r in rows[::40] + [rows[-1]]:
            if minimal:
                f, sa, ea, so, eo = r
                print(f"{f:10.2f} Hz  ADC SINAD {sa:6.2f} dB  output SINAD {so:6.2f} dB  ENOB {eo:5.2f}")
            else:
                print(
                    f"{r['f_hz']:10.2f} Hz  ADC SINAD {r['adc_sinad_db']:6.2f} dB  output SINAD "
                    f"{r['out_sinad_db']:6.2f} dB ENOB {r['out_enob_bits']:5.2f} fidelity {r['out_fidelity_db']:6.2f} dB "
                    f"latency {r['lat_measured_s'] * 1e6:8.4f} us"
                )
        what = "minimal (SINAD/ENOB only)" if minimal else "all metrics"
        print(f"numpy sweep, {what}: {dt:.3f} s for 200 points (CPU time of the process {cpu:.3f} s)")
    else:
        f_req = float(sys.argv[1]) if len(sys.argv) > 1 else 1e3
        for k, v in point(f_req).items():
            print(f"{k:24s} {v:.12g}")


if __name__ == "__main__":
    main()
