#!/usr/bin/env python3
"""Timing peer of `convchain run benches/reference-chain.toml`: the same chain written with numpy and scipy.signal,
vectorised as a numpy user would write it, computing the grid output and the output's and ADC's SINAD and ENOB,
and writing nothing.

THIS IS A TIMING PEER, NOT A REFERENCE. It exists to time a whole process against convchain's (benches/whole-run.sh
runs both side by side). Its models follow tests/reference/sweep_numpy.py (which documents their agreement with
convchain on the 20 ms chain); its resistor draw uses numpy's generator, not convchain's ChaCha stream, so its
ladder is another 1 % ladder and its output SINAD differs from convchain's by several dB (57.3 dB here against
convchain's 49.1 dB at seed 7: a 1 % R-2R ladder's error at 12 bits is tens of LSB and depends on the draw; the
ADC's SINAD agrees within 0.02 dB). No test reads its numbers.

Chain (benches/reference-chain.toml): sine 2.5 V + 2 V sin(2 pi f t), f = 1 kHz moved to a coherent frequency of
the ADC record, on a 10 MHz grid; ideal sample-and-hold; 12-bit SAR 0..5 V at 100 kSPS, codes available 8 us
after sampling; R-2R DAC with 1 % resistors and an output amplifier slewing at 2 V/us and settling with a 0.5 us
time constant (closed form per hold segment); 4th-order Butterworth lowpass at 20 kHz (scipy.signal.butter +
sosfilt on the grid); the output decimated to 400 kHz (scipy.signal.resample_poly) over its analysis record;
SINAD and ENOB over 20 kHz with a 4-term Blackman-Harris window (numpy.fft.rfft).

Usage: python3 benches/peer/reference_chain.py [DURATION_S]   (default 1; settle 10 ms as the scenario)
Prints the figures and the time spent after the imports (time.perf_counter).
"""
import math
import sys
import time

import numpy as np
import scipy.signal as ss

T_IMPORTED = time.perf_counter()

GRID_HZ = 10e6
DURATION_S = float(sys.argv[1]) if len(sys.argv) > 1 else 1.0
SETTLE_S = 10e-3
F_REQ_HZ = 1e3
AMP_V, OFFSET_V = 2.0, 2.5
BITS, LOW_V, HIGH_V = 12, 0.0, 5.0
FS_HZ = 100e3
CONV_S = 8e-6
TOL = 0.01
SR_V_PER_S, TAU_S = 2e6, 0.5e-6
FC_HZ = 20e3
BAND_HZ = 20e3
DECIM = 25  # 10 MHz / 25 = 400 kHz
LOBE = 4
SEED = 7

N_GRID = int(round(DURATION_S * GRID_HZ))
STEP = int(round(GRID_HZ / FS_HZ))
DELAY = int(round(CONV_S * GRID_HZ))
N_CODES = int(round(DURATION_S * FS_HZ))
M_AVAIL = int(math.floor((DURATION_S - SETTLE_S - CONV_S - 1 / FS_HZ) * FS_HZ))


def smooth_at_most(n):
    """Largest length <= n with prime factors 2, 3, 5, 7 only."""
    for m in range(n, 0, -1):
        r = m
        for p in (2, 3, 5, 7):
            while r % p == 0:
                r //= p
        if r == 1:
            return m
    return n


M_REC = smooth_at_most(M_AVAIL)
K0 = int(math.ceil(SETTLE_S * FS_HZ)) + (M_AVAIL - M_REC)
OUT_HZ = GRID_HZ / DECIM
OUT_REC = M_REC * int(round(OUT_HZ / FS_HZ))


def coherent_frequency(f_hz, fs_hz, n):
    """Nearest odd cycle count coprime with n to f n / fs."""
    target = f_hz * n / fs_hz
    ok = lambda j: j >= 1 and j % 2 == 1 and 2 * j < n and math.gcd(j, n) == 1
    lo = int(math.floor(target))
    below = next(j for j in range(lo, 0, -1) if ok(j))
    above = next(j for j in range(lo + 1, n // 2) if ok(j))
    best = below if target - below <= above - target else above
    return best * fs_hz / n


def r2r_levels(rng):
    """Output level of every code of an R-2R ladder with resistors drawn uniform within +-TOL (nodal solve)."""
    d = lambda: 1.0 + TOL * (2.0 * rng.random() - 1.0)
    shunt = [2.0 * d() for _ in range(BITS)]
    series = [d() for _ in range(BITS - 1)]
    term = 2.0 * d()
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
    w = np.concatenate(([1.0], np.linalg.solve(g, rhs))) / np.array(shunt)
    codes = np.arange(1 << BITS)
    bits = (codes[:, None] >> np.arange(BITS - 1, -1, -1)) & 1
    return LOW_V + (HIGH_V - LOW_V) * (bits @ w)


def amp_segments(targets, v_init, dt, steps):
    """Output amplifier over hold segments of `steps` grid steps: slew at SR, then settle exponentially."""
    band = SR_V_PER_S * TAU_S
    decay_full = math.exp(-steps * dt / TAU_S)
    seg_len = steps * dt
    e0 = np.empty(len(targets))
    v = v_init
    for j, t in enumerate(targets.tolist()):  # the start of each segment depends on the previous one's end
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
    e = np.where(
        s[None, :] < s1,
        sg * (ae0 - SR_V_PER_S * s[None, :]),
        np.where(ae0 <= band, e0[:, None], sg * band) * np.exp(-np.maximum(s[None, :] - s1, 0.0) / TAU_S),
    )
    return (targets[:, None] - e).ravel()


def sinad_enob(x, rate_hz, band_hz, f0_hz, full_scale_of):
    """SINAD (dB) and ENOB (bits, referred to a full-scale sine of amplitude full_scale_of(fundamental amplitude))
    of a record, Blackman-Harris window."""
    n = len(x)
    w = ss.windows.blackmanharris(n, sym=False)
    enbw = n * np.sum(w**2) / w.sum() ** 2
    p = np.abs(np.fft.rfft(x * w)) ** 2 * (2.0 / w.sum() ** 2)
    p[0] *= 0.5
    wgt = np.ones_like(p)
    wgt[0] = 0.5
    if n % 2 == 0:
        p[-1] *= 0.5
        wgt[-1] = 0.5
    kmax = min(int(math.floor(band_hz * n / rate_hz + 1e-9)), len(p) - 1)
    k0 = int(round(f0_hz * n / rate_hz))
    lo, hi = max(k0 - LOBE, LOBE + 1), min(k0 + LOBE, kmax)
    kf = lo + int(np.argmax(p[lo : hi + 1]))
    f_lo, f_hi = kf - LOBE, kf + LOBE
    p_fund = p[f_lo : f_hi + 1].sum() / enbw
    other = np.zeros(len(p), bool)
    other[LOBE + 1 : kmax + 1] = True
    other[f_lo : f_hi + 1] = False
    density = (p[other].sum() / enbw) / wgt[other].sum()
    band_bins = wgt[: kmax + 1].sum()
    nad = p[other].sum() / enbw + density * (band_bins - wgt[other].sum() - (f_hi - f_lo + 1))
    s_db = 10 * math.log10(p_fund / nad)
    a = math.sqrt(2 * p_fund)
    return s_db, (s_db - 1.76 + 20 * math.log10(full_scale_of(a) / a)) / 6.02


def main():
    t0 = time.perf_counter()
    f = coherent_frequency(F_REQ_HZ, FS_HZ, M_REC)
    levels = r2r_levels(np.random.default_rng(SEED))
    # ADC: the source at the sampling instants (ideal hold), quantised.
    t_k = np.arange(N_CODES) / FS_HZ
    held = OFFSET_V + AMP_V * np.sin(2 * np.pi * f * t_k)
    q = (HIGH_V - LOW_V) / (1 << BITS)
    codes = np.clip(np.floor((held - LOW_V) / q), 0, (1 << BITS) - 1).astype(np.int64)
    # DAC and amplifier on the grid: code j holds from DELAY + j STEP.
    y = np.empty(N_GRID)
    y[:DELAY] = levels[0]
    n_seg = -(-(N_GRID - DELAY) // STEP)
    y[DELAY:] = amp_segments(levels[codes[:n_seg]], levels[0], 1 / GRID_HZ, STEP)[: N_GRID - DELAY]
    # The source on the grid (convchain computes it too, for the waveforms and the fidelity).
    src = OFFSET_V + AMP_V * np.sin(2 * np.pi * f * (np.arange(N_GRID) / GRID_HZ))
    out = ss.sosfilt(ss.butter(4, FC_HZ, btype="low", fs=GRID_HZ, output="sos"), y)
    # Output record at 400 kHz: the last OUT_REC decimated samples (the tail and the FIR's reach only).
    start = N_GRID - (OUT_REC + 40) * DECIM
    dec = ss.resample_poly(out[start:], 1, DECIM, window=("kaiser", 10.0), padtype="antireflect")[-OUT_REC:]
    fs_v = (HIGH_V - LOW_V) / 2
    # The output's full scale is referred to the input's: the output amplitude over the source's, times 2.5 V.
    s_out, e_out = sinad_enob(dec, OUT_HZ, BAND_HZ, f, lambda a: a * fs_v / AMP_V)
    adc_v = LOW_V + (codes[K0 : K0 + M_REC] + 0.5) * q
    s_adc, e_adc = sinad_enob(adc_v, FS_HZ, FS_HZ / 2, f, lambda a: fs_v)
    t1 = time.perf_counter()
    print(
        f"peer: {DURATION_S:g} s on a {GRID_HZ / 1e6:g} MHz grid ({N_GRID} steps), f = {f:.4f} Hz, "
        f"source rms {src.std():.4f} V; ADC SINAD {s_adc:.2f} dB, ENOB {e_adc:.3f}; "
        f"output SINAD {s_out:.2f} dB, ENOB {e_out:.3f}; {t1 - t0:.3f} s after the imports"
    )


if __name__ == "__main__":
    main()
