"""The hinge covariate model: its significance statistic under a straight line, and its cost.

- Null distribution: baselines of n windows (60 and 400) with a uniform covariate, a straight
  relation and normal errors; the maximised drop-in-dispersion statistic S of
  :func:`corrtransforms.numerics.covariate_model.hinge_knee` against chi-square with 2 degrees
  of freedom (the limit used), and the share of lines given a knee (the false-knee rate).
- Cost: one fit (``fit_baseline_model(..., hinge=True)``) against the linear fit, for n = 400
  and 4 000 baseline windows.

Run: ``python -m benchmarks.bench_hinge [--series 300]``. Prints tables; never asserts.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
from scipy import stats

from corrtransforms.numerics import covariate_model as cm


def _statistic(x: np.ndarray, y: np.ndarray) -> float:
    """The maximised S over the grid, as hinge_knee computes it (without the refinement)."""
    n = x.size
    line = np.column_stack([np.ones(n), x - np.median(x)])
    beta, scale, _ = cm.huber_regression(line, y)
    q_line = cm.huber_objective(y - line @ beta, scale)
    side = max(cm.HINGE_MIN_SIDE, math.ceil(cm.HINGE_SIDE_FRACTION * n))
    ordered = np.sort(x)
    best = math.inf
    for knee in np.linspace(ordered[side - 1], ordered[n - side], cm.HINGE_GRID):
        design = np.column_stack([line, np.maximum(x - knee, 0.0)])
        b, _, _ = cm.huber_regression(design, y)
        best = min(best, cm.huber_objective(y - design @ b, scale))
    return 2.0 * (q_line - best) / cm._huber_moments_ratio()


def null_table(series: int) -> None:
    limit = stats.chi2.ppf(1 - cm.HINGE_ALPHA, 2)
    print(f"maximised S under a line ({series} series each); limit chi2(2) {1 - cm.HINGE_ALPHA:.2f} = {limit:.2f}")
    print(f"{'n':>6} {'median':>8} {'p90':>8} {'p95':>8} {'p99':>8} {'knees found':>12}")
    for n in (60, 400):
        values, found = [], 0
        for seed in range(series):
            rng = np.random.default_rng(seed)
            x = rng.uniform(5, 20, n)
            y = 2.0 - 0.003 * (x - 10) + rng.normal(0, 0.003, n)
            values.append(_statistic(x, y))
            found += cm.hinge_knee(x, y) is not None
        q = np.quantile(values, [0.5, 0.9, 0.95, 0.99])
        print(f"{n:>6} {q[0]:>8.2f} {q[1]:>8.2f} {q[2]:>8.2f} {q[3]:>8.2f} {found / series:>12.3f}")
    print(f"{'chi2':>6} " + " ".join(f"{v:>8.2f}" for v in stats.chi2.ppf([0.5, 0.9, 0.95, 0.99], 2)))


def cost_table() -> None:
    print("\none baseline fit, best of 3 (ms)")
    print(f"{'n':>6} {'linear':>10} {'hinge':>10} {'ratio':>8}")
    for n in (400, 4000):
        rng = np.random.default_rng(n)
        x = rng.uniform(-10, 20, n)
        y = 2.0 + np.where(x < 0, -0.02, -0.002) * x + rng.normal(0, 0.003, n)
        se = np.full(n, 0.001)
        times = []
        for hinge in (False, True):
            best = math.inf
            for _ in range(3):
                start = time.perf_counter()
                cm.fit_baseline_model(y, se, x[:, None], ("t",), hinge=hinge)
                best = min(best, time.perf_counter() - start)
            times.append(best * 1e3)
        print(f"{n:>6} {times[0]:>10.2f} {times[1]:>10.2f} {times[1] / times[0]:>8.1f}")


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=300)
    args = parser.parse_args(argv)
    null_table(args.series)
    cost_table()


if __name__ == "__main__":
    main()
