"""Benchmark: batched recursive residuals + CUSUM + sup-F against a loop of statsmodels.

Run by hand on a quiet machine (CI does not run it; pytest does not collect it):

    .venv/bin/python tests/benchmarks/bench_change.py [--series 10000] [--rows 156]
                                                      [--reference-series 1000]

Data: seeded, s series × n rows, two predictors plus an intercept, a fifth of the series with a
level shift half-way. Plumbline's side times ``break_tests`` on all series in one call: recursive
residuals, the BDE CUSUM, the OLS-CUSUM and sup-F (a second, backward pass and the scan over
every split); best of a few runs, taken before and after the reference. statsmodels' side times
``recursive_olsresiduals(fit)`` in a loop on the first ``--reference-series`` series, with the
OLS fits made beforehand and not timed; that per-series time is scaled to all series (the output
says so). The reference computes recursive residuals and its CUSUM only: less work than ours.

Agreement: each series' recursive residuals against statsmodels', relative to the series'
largest. statsmodels updates (XᵀX)⁻¹ of the raw columns, which loses digits when a series' first
rows are nearly collinear; every series that differs by more than 1e-9 is therefore also checked
against the definition refitted by QR-based ``numpy.linalg.lstsq`` at every row, where ours must
agree to 1e-11. The last line is ``speedup_vs_statsmodels: N`` (scaled reference time over ours).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np
import statsmodels.api as sm
from numpy.typing import NDArray
from statsmodels.stats.diagnostic import recursive_olsresiduals

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from monitor.stats.supf import BreakTests, break_tests


def _refitted(x: NDArray[np.float64], y: NDArray[np.float64]) -> NDArray[np.float64]:
    design = sm.add_constant(x)
    out = []
    for t in range(design.shape[1], len(y)):
        coef = np.linalg.lstsq(design[:t], y[:t], rcond=None)[0]
        _q, r = np.linalg.qr(design[:t])
        h = np.linalg.solve(r.T, design[t])
        out.append((y[t] - design[t] @ coef) / math.sqrt(1.0 + h @ h))
    return np.asarray(out)


def _time_ours(x: NDArray[np.float64], y: NDArray[np.float64], repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        started = time.perf_counter()
        break_tests(x, y)
        best = min(best, time.perf_counter() - started)
    return best


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--rows", type=int, default=156)
    parser.add_argument("--reference-series", type=int, default=1_000)
    parser.add_argument("--repeats", type=int, default=3, help="best of this many runs")
    args = parser.parse_args(argv)
    s, n = args.series, args.rows
    rng = np.random.default_rng(20261201)
    x = rng.normal(loc=[50.0, 8.0], scale=[12.0, 2.0], size=(s, n, 2))
    y = 20.0 + x @ np.array([1.5, -3.0]) + rng.normal(scale=4.0, size=(s, n))
    y[:, n // 2 :] += 6.0 * (rng.random(s) < 0.2)[:, None]

    tests: BreakTests = break_tests(x, y)
    ours = _time_ours(x, y, args.repeats)

    m = min(args.reference_series, s)
    fits = [sm.OLS(y[i], sm.add_constant(x[i])).fit() for i in range(m)]
    started = time.perf_counter()
    reference = [recursive_olsresiduals(fit)[4][3:] for fit in fits]
    reference_time = time.perf_counter() - started
    scaled = reference_time * s / m
    ours = min(ours, _time_ours(x, y, args.repeats))

    residuals = tests.recursive.residuals[:, 3:]
    relative = np.array(
        [np.max(np.abs(residuals[i] - r)) / np.max(np.abs(r)) for i, r in enumerate(reference)]
    )
    differing = np.flatnonzero(relative > 1e-9)
    ours_vs_refit, theirs_vs_refit = 0.0, 0.0
    for i in differing:
        direct = _refitted(x[i], y[i])
        size = np.max(np.abs(direct))
        ours_vs_refit = max(ours_vs_refit, float(np.max(np.abs(residuals[i] - direct)) / size))
        theirs_vs_refit = max(theirs_vs_refit, float(np.max(np.abs(reference[i] - direct)) / size))

    print(f"series {s}, rows {n}, predictors 2 + intercept")
    print(f"plumbline break_tests (recursive residuals, CUSUM, OLS-CUSUM, sup-F), all series: "
          f"{ours:.3f} s (best of {2 * args.repeats})")  # fmt: skip
    print(f"statsmodels recursive_olsresiduals loop, {m} series: {reference_time:.3f} s "
          f"({reference_time / m * 1e3:.3f} ms per series; OLS fits made beforehand, not timed)")
    print(f"statsmodels scaled to {s} series: {scaled:.3f} s")
    print(f"recursive residuals vs statsmodels (relative): median {np.median(relative):.1e}, "
          f"largest {relative.max():.1e}; {differing.size} of {m} series differ by > 1e-9")
    if differing.size:
        print(f"those series against lstsq refits at every row: plumbline {ours_vs_refit:.1e}, "
              f"statsmodels {theirs_vs_refit:.1e}")  # fmt: skip
    crossed = int(np.sum(tests.cusum.crossed))
    rejected = int(np.sum(tests.sup_f.p_value < 0.05))
    print(f"CUSUM crossed at 5 %: {crossed} series; sup-F p < 0.05: {rejected} series")
    if ours_vs_refit > 1e-11:
        print("recursive residuals DISAGREE with the refitted definition", file=sys.stderr)
        return 1
    print(f"speedup_vs_statsmodels: {scaled / ours:.1f}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
