#!/usr/bin/env python3
"""Reference values for src/stages/filter/tests.rs (analog prototypes), computed with scipy.signal.

Prints tests/reference/filters_analog.csv: for each family / response / order, the magnitude (dB) and the group delay (s) of the analog
filter with cutoff 1 kHz at 100, 500, 1000, 2000 and 10000 Hz. Magnitude from scipy.signal.freqs_zpk; group delay
from a central difference (+-1e-6 relative) of the unwrapped phase of scipy.signal.freqs_zpk.
Not run by CI. Usage: python3 tests/reference/filters.py > tests/reference/filters_analog.csv
"""
import numpy as np
import scipy
import scipy.signal as ss

FC_HZ = 1000.0
FREQS_HZ = [100.0, 500.0, 1000.0, 2000.0, 10000.0]


def zpk(family, btype, order):
    wc = 2 * np.pi * FC_HZ
    if family == "Butterworth":
        return ss.butter(order, wc, btype=btype, analog=True, output="zpk")
    if family == "Bessel":
        return ss.bessel(order, wc, btype=btype, analog=True, output="zpk", norm="mag")
    if family.startswith("Chebyshev"):
        ripple = float(family.split(":")[1])
        return ss.cheby1(order, ripple, wc, btype=btype, analog=True, output="zpk")
    raise ValueError(family)


def mag_gd(z, p, k, f_hz):
    w = 2 * np.pi * f_hz
    _, h = ss.freqs_zpk(z, p, k, [w])
    dw = w * 1e-6
    _, hh = ss.freqs_zpk(z, p, k, [w - dw, w + dw])
    dphi = np.angle(hh[1] / hh[0])
    return 20 * np.log10(abs(h[0])), -dphi / (2 * dw)


print("# Analog prototypes with cutoff 1 kHz: magnitude (dB) and group delay (s) at 100, 500, 1000, 2000 and 10000 Hz.")
print(f"# computed with scipy.signal {scipy.__version__} (butter, bessel norm='mag', cheby1; analog=True; freqs_zpk),")
print("# by tests/reference/filters.py; read by src/stages/filter/tests.rs.")
print("family,highpass,order," + ",".join(f"mag_db_{f:.0f}" for f in FREQS_HZ) + "," + ",".join(f"gd_s_{f:.0f}" for f in FREQS_HZ))
for family in ["Butterworth", "Bessel", "Chebyshev:0.5", "Chebyshev:3.0"]:
    for btype in ["lowpass", "highpass"]:
        for order in range(1, 9):
            z, p, k = zpk(family, btype, order)
            vals = [mag_gd(z, p, k, f) for f in FREQS_HZ]
            mags = ",".join(f"{m:.12e}" for m, _ in vals)
            gds = ",".join(f"{g:.12e}" for _, g in vals)
            hp = "true" if btype == "highpass" else "false"
            print(f"{family},{hp},{order},{mags},{gds}")
