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
  -> meters: scipy.signal.resample_poly(x, 1, 25) to 400 kHz (Kaiser FIR, zero phase, odd extension at the
     record end), the record of 7192 samples (4 per code, 1798 codes) ending at the end of the run; 4-term
     Blackman-Harris window (scipy.signal.windows.blackmanharris, periodic), numpy.fft.rfft, bin powers over
     ENBW, lobes of +-4 bins; SINAD over 0..20 kHz = fundamental / (every band bin outside the DC and fundamental
     lobes + the mean noise density over those lobes), referred to the ADC's full scale as convchain does
     (P_fs = (A_out * 2.5 / 2)^2 / 2); ENOB = (SINAD - 1.76) / 6.02. The same meter on the ADC codes (full
     Nyquist band). Coherent frequency: the nearest odd cycle count coprime with the 1798-code record, as
     src/measure/coherent.rs.
  What convchain computes per point and this script does not: THD/SFDR/SNR tables, the sine-fit ENOB, latency
  (cross-correlation and budget), waveform fidelity, the source record; so the comparison favours numpy.

Usage:  python3 tests/reference/sweep_numpy.py            one point (1 kHz) with its SINAD/ENOB
        OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1 python3 tests/reference/sweep_numpy.py --sweep
Then, right after, on the same machine: cargo build --release && sh benches/sweep-timing.sh

Results (2 cores shared with other jobs, load average 3.6 .. 4.8 from `uptime`; numpy 2.4.6, scipy 1.17.1,
Python 3.11.7; convchain built with `cargo build --release` at a171dfc; wall clock of the 200 points, the numpy
figure from time.perf_counter around the sweep loop, i.e. without interpreter start and imports, ~0.3 s):
  run 1: numpy, 1 thread (OMP/OPENBLAS/MKL_NUM_THREADS=1)  2.13 s;  numpy, default threads  2.21 s;
         sh benches/sweep-timing.sh right after: threads 1 16.14 s, threads 2 15.89 s
  run 2: numpy, 1 thread  1.84 s;  sh benches/sweep-timing.sh right after: threads 1 14.05 s, threads 2 14.51 s
  => the numpy sweep is about 7.5x FASTER than convchain's 1-thread sweep (ratio convchain/numpy 7.6 and 7.6);
     the issue's target (convchain at least 10x faster than numpy) is not met.
Agreement at one point (coherent 945.495 Hz, 20 ms): ADC codes SINAD 72.00 dB / ENOB 11.99 in both. Output:
  ideal ladder (SWEEP_TOL=0 here, tolerance = "0%" in the scenario): 75.97 dB / 12.65 bits in both; at 19 kHz
  (19076.75 Hz, slewing) 62.51 dB here vs 62.50 dB convchain, ENOB 10.41 in both. With 1 % tolerance the result
  is set by the ladder draw: here 50.85 dB (seed 7; seeds 1..6 give 48.3 .. 54.9 dB), convchain 48.97 dB
  (seed 7; seeds 1..3 give 52.4, 51.4, 50.1 dB), the same spread.
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
LOBE = 4  # Blackman-Harris 4-term: main-lobe half-width in bins
HARMONICS = 9
SEED = int(os.environ.get("SWEEP_SEED", "7"))

N_GRID = int(round(DURATION_S * GRID_HZ))
STEP = int(round(GRID_HZ / FS_HZ))  # grid steps per conversion
DELAY = int(round(CONV_S * GRID_HZ))  # grid steps from sampling to code availability
N_CODES = int(round(DURATION_S * FS_HZ))
# Record: the conversions in (duration - settle - conversion time - one period), as convchain's plan.
M_REC = int(math.floor((DURATION_S - SETTLE_S - CONV_S - 1 / FS_HZ) * FS_HZ))  # 1798
K0 = int(math.ceil(SETTLE_S * FS_HZ))
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


def point(f_req_hz):
    f = coherent_frequency(f_req_hz, FS_HZ, M_REC)
    y, codes = chain_output(f)
    # Decimate only the tail that holds the record (plus the FIR's reach), then keep the last OUT_REC samples.
    start = N_GRID - (OUT_REC + 40) * DECIM
    dec = ss.resample_poly(y[start:], 1, DECIM, padtype="antireflect")[-OUT_REC:]
    fs_in = (HIGH_V - LOW_V) / 2
    s_out, e_out = sinad(dec, OUT_HZ, BAND_HZ, f, BH, lambda a: a * fs_in / AMP_V)
    q = (HIGH_V - LOW_V) / (1 << BITS)
    adc_v = LOW_V + (codes[K0 : K0 + M_REC] + 0.5) * q
    w = ss.windows.blackmanharris(M_REC, sym=False)
    s_adc, e_adc = sinad(adc_v, FS_HZ, FS_HZ / 2, f, w, lambda a: fs_in)
    return f, s_adc, e_adc, s_out, e_out


def main():
    if "--sweep" in sys.argv:
        freqs = np.geomspace(1e3, 19e3, 200)
        t0 = time.perf_counter()
        rows = [point(f) for f in freqs]
        dt = time.perf_counter() - t0
        for f, sa, ea, so, eo in rows[::40] + [rows[-1]]:
            print(f"{f:10.2f} Hz  ADC SINAD {sa:6.2f} dB  output SINAD {so:6.2f} dB  ENOB {eo:5.2f}")
        print(f"numpy sweep: {dt:.3f} s for 200 points")
    else:
        f_req = float(sys.argv[1]) if len(sys.argv) > 1 else 1e3
        f, sa, ea, so, eo = point(f_req)
        print(f"f = {f:.6f} Hz: ADC SINAD {sa:.2f} dB ENOB {ea:.2f}; output SINAD {so:.2f} dB ENOB {eo:.2f}")


if __name__ == "__main__":
    main()
