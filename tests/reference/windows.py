"""Reference values for src/measure/window.rs (not run by CI).

Periodic (sym=False) windows from scipy.signal.windows; coherent gain, ENBW (bins) and the scalloping loss
(half-bin offset, dB) computed directly with numpy from the window samples.
Run: python3 tests/reference/windows.py
"""
import numpy as np
import scipy
from scipy.signal import windows

print("scipy", scipy.__version__, "numpy", np.__version__)

N = 4096
n = np.arange(N)
for name in ["boxcar", "hann", "hamming", "blackmanharris", "flattop"]:
    w = getattr(windows, name)(N, sym=False)
    cg = w.sum() / N
    enbw = N * np.sum(w**2) / w.sum() ** 2
    half = abs(np.sum(w * np.exp(-1j * np.pi * n / N)))
    sl = -20 * np.log10(half / w.sum())
    print(f"{name:15s} N={N} cg={cg!r} enbw={enbw!r} scalloping_db={sl!r}")

for name in ["hann", "hamming", "blackmanharris", "flattop"]:
    w = getattr(windows, name)(16, sym=False)
    print(f"{name:15s} N=16 w[0]={w[0]!r} w[3]={w[3]!r} w[8]={w[8]!r}")
