"""Monte-Carlo calibration of the stationarity screening: flag rate on stationary records and
power against a variance step, 30-s bursts of several sizes and a strong tone (invented data).

    python -m benchmarks.stationarity_rates [--windows 400]

Prints one line per case: the fraction of 10-minute windows (20 Hz) flagged at the defaults
(M = 20 segments, alpha = 0.05), with its binomial standard error, and the time per window.
"""

import argparse
import math
import time

import numpy as np
from scipy import signal

from corrtransforms.stages import screen as st

FS = 20.0
N = int(600 * FS)


def ar1(rng, n=N, phi=0.9):
    return signal.lfilter([1.0], [1.0, -phi], rng.standard_normal(n + 500))[500:]


def oscillator(rng, n=N, freq_hz=2.0, damping=0.05):
    w, dt = 2 * math.pi * freq_hz, 1 / FS
    r = math.exp(-damping * w * dt)
    wd = w * math.sqrt(1 - damping**2)
    return signal.lfilter([1.0], [1.0, -2 * r * math.cos(wd * dt), r * r], rng.standard_normal(n + 4000))[4000:]


def heavy_tailed(rng, n=N):
    """AR(1) (phi = 0.5) driven by Student-t noise with 5 degrees of freedom (kurtosis 9)."""
    return signal.lfilter([1.0], [1.0, -0.5], rng.standard_t(5, size=n))


def burst(rng, x, make, rms_ratio):
    length = int(30 * FS)
    start = rng.integers(0, len(x) - length)
    extra = make(rng, n=length)
    y = x.copy()
    y[start : start + length] += math.sqrt(rms_ratio**2 - 1) * np.std(x) / np.std(extra) * extra
    return y


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--windows", type=int, default=400)
    args = parser.parse_args(argv)
    rng = np.random.default_rng(2024)
    t = np.arange(N) / FS
    cases = []
    for name, make in (("AR(1) phi=0.9", ar1), ("oscillator 2 Hz, zeta=0.05", oscillator)):
        cases += [
            (f"{name}: stationary", lambda make=make: make(rng)),
            (
                f"{name}: variance x3 halfway",
                lambda make=make: np.r_[make(rng, n=N // 2), math.sqrt(3) * make(rng, n=N // 2)],
            ),
            (f"{name}: 30-s burst, rms x1.5", lambda make=make: burst(rng, make(rng), make, 1.5)),
            (f"{name}: 30-s burst, rms x2", lambda make=make: burst(rng, make(rng), make, 2.0)),
            (f"{name}: 30-s burst, rms x3", lambda make=make: burst(rng, make(rng), make, 3.0)),
            (
                f"{name}: tone 10x the random power",
                lambda make=make: (
                    lambda x: x + math.sqrt(20) * np.std(x) * np.sin(2 * math.pi * 3.3 * t + rng.uniform(0, 6.3))
                )(make(rng)),
            ),
        ]
    cases.append(("heavy-tailed AR(1) (Student t, 5 dof): stationary", lambda: heavy_tailed(rng)))
    valid = np.ones(N, bool)
    for label, make in cases:
        started = time.perf_counter()
        flags = [st.screen_channel(make(), valid, FS, 20, 0.05).flagged for _ in range(args.windows)]
        seconds = (time.perf_counter() - started) / args.windows
        rate = float(np.mean(flags))
        print(
            f"{label:55s} flagged {rate:6.3f} +- {math.sqrt(max(rate * (1 - rate), 1e-9) / args.windows):.3f}"
            f"   {1e3 * seconds:5.1f} ms/window"
        )


if __name__ == "__main__":
    main()
