#!/usr/bin/env python3
"""Reference values for the delta-sigma decimation design (tests/reference/main.rs,
`decimation_design_matches_scipy_freqz`), computed with scipy.signal.freqz.

Reads tests/reference/decimation_taps.txt (the FIR taps the design gives for the default keys: order 4,
oversampling 64, so a sinc^5 CIC by 16 and an FIR by 4 at 4 x the word rate; passband 0.45, stop band from 0.55
of the word rate, 0.01 dB ripple, 100 dB; the Rust test writes the file when CONVCHAIN_REFERENCE_WRITE=1) and
prints tests/reference/decimation_freqz.csv:
- rows `fir,f,db`: the FIR's magnitude (dB) at f (cycles per FIR input sample), scipy.signal.freqz;
- rows `cic,f,db`: the CIC's magnitude, from scipy.signal.freqz of its impulse response (16 ones convolved 5
  times, over 16^5), at f in cycles per modulator clock;
- rows `ripple_db,,x` and `attenuation_db,,x`: the cascade's passband ripple (peak to peak of |FIR| |CIC| over
  [0, 0.45/4] of the FIR rate, 20001 points) and the FIR's least stop-band attenuation over [0.55/4, 0.5]
  (20001 points).
Not run by CI. Usage: python3 tests/reference/decimation.py > tests/reference/decimation_freqz.csv
"""
import os

import numpy as np
import scipy
import scipy.signal as ss

HERE = os.path.dirname(os.path.abspath(__file__))
taps = np.loadtxt(os.path.join(HERE, "decimation_taps.txt"))
R, K, D = 16, 5, 4
cic = np.ones(1)
for _ in range(K):
    cic = np.convolve(cic, np.ones(R))
cic /= R ** K


def mag_db(h, f):
    _, H = ss.freqz(h, worN=2 * np.pi * np.asarray(f))
    return 20 * np.log10(np.abs(H))


print(f"# scipy {scipy.__version__}, numpy {np.__version__}")
print("what,f,value")
fir_f = [0.0, 0.01, 0.05, 0.1, 0.1125, 0.125, 0.1375, 0.2, 0.3, 0.45]
for f, v in zip(fir_f, mag_db(taps, fir_f)):
    print(f"fir,{f!r},{float(v)!r}")
cic_f = [0.001, 0.003, 0.005, 0.01, 0.02, 0.03]
for f, v in zip(cic_f, mag_db(cic, cic_f)):
    print(f"cic,{f!r},{float(v)!r}")
pf = np.linspace(0.0, 0.45 / D, 20001)
cascade = mag_db(taps, pf) + mag_db(cic, pf / R)
print(f"ripple_db,,{float(cascade.max() - cascade.min())!r}")
sf = np.linspace(0.55 / D, 0.5, 20001)
print(f"attenuation_db,,{float(-mag_db(taps, sf).max())!r}")
