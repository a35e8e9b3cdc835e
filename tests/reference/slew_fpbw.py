"""Fundamental gain of a pure slew-rate-limited follower driven by a sine, against r = f / FPBW where
FPBW = SR / (2 pi Vp) (full-power bandwidth). Not run by CI; the printed ratio is pasted into tests/study.rs.

Model: the output v tracks the input x = Vp sin(2 pi f t) exactly while |dx/dt| <= SR and it is on the input,
otherwise moves toward x at SR. Simulated in normalised time (Vp = 1, period = 1) with a fine step, steady
state after a few periods; fundamental amplitude by projection on sin/cos over whole periods.
Needs numpy only.
"""
import numpy as np


def gain(r, steps=200000, periods=6):
    # Vp = 1, f = 1  =>  SR = 2 pi Vp FPBW = 2 pi / r
    sr = 2 * np.pi / r
    dt = 1.0 / steps
    t = np.arange(periods * steps) * dt
    x = np.sin(2 * np.pi * t)
    v = np.empty_like(x)
    y = 0.0
    step = sr * dt
    for i, xi in enumerate(x):
        d = xi - y
        if d > step:
            y += step
        elif d < -step:
            y -= step
        else:
            y = xi
        v[i] = y
    tail = slice((periods - 2) * steps, periods * steps)
    w = 2 * np.pi * t[tail]
    a = 2 * np.mean(v[tail] * np.sin(w))
    b = 2 * np.mean(v[tail] * np.cos(w))
    return np.hypot(a, b)


if __name__ == "__main__":
    lo, hi = 1.0, 3.0
    target = 10 ** (-3 / 20)
    for _ in range(30):
        mid = 0.5 * (lo + hi)
        if gain(mid, steps=20000) > target:
            lo = mid
        else:
            hi = mid
    print(f"numpy {np.__version__}: -3 dB at f/FPBW = {0.5 * (lo + hi):.4f}")
    for r in [1.0, 1.2, 1.5, 1.8, 2.0, 3.0]:
        print(r, 20 * np.log10(gain(r, steps=20000)), "triangle limit", 20 * np.log10(4 / np.pi / r))
