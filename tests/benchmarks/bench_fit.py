"""Benchmark: batched fits against a loop of statsmodels fits, side by side in one run.

10,000 series x 156 rows x 2 predictors (seeded, invented data), full inference plus the
mean-response and prediction intervals at one new point per series. The same work is done by
``monitor.stats.ols.fit_batch`` + ``BatchFit.predict`` and by a loop of statsmodels ``OLS``
fits with ``get_prediction`` (the reference library). The script checks that both agree to
1e-9 relative (coefficients, standard errors, t, p-values, confidence intervals, both
intervals at the new point; see ``main`` for how "relative" is measured), prints both times
and the peak memory of the batched fit, and ends with ``speedup_vs_statsmodels: N``.

Run by hand on a quiet machine (not collected by pytest, not run by CI):

    nice python tests/benchmarks/bench_fit.py [--series 10000] [--rows 156] [--repeats 5]

Timing: each side is run several times (``--repeats`` for the batched fit, ``--loop-repeats``
for the statsmodels loop) and the least time of each is used, as Python's ``timeit``
documentation advises: higher values are typically caused by other processes interfering, and
this machine's two cores are shared. All times are printed. Peak memory is measured in a
separate, untimed run under ``tracemalloc`` (numpy reports its buffers to it), so tracing does
not slow the timings.
"""

from __future__ import annotations

import argparse
import resource
import statistics
import sys
import time
import tracemalloc

import numpy as np
import statsmodels.api as sm

from monitor.stats.ols import fit_batch

LEVEL = 0.95
RTOL = 1e-9


def make_data(series: int, rows: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented weekly series: two predictors with different offsets and spreads."""
    rng = np.random.default_rng(seed)
    offsets = np.array([40.0, 3.0])
    spreads = np.array([8.0, 1.5])
    x = offsets + spreads * rng.normal(size=(series, rows, 2))
    # Some series have correlated predictors, as real ones do.
    x[:, :, 1] += rng.uniform(0.0, 0.15, size=(series, 1)) * (x[:, :, 0] - offsets[0])
    slopes = rng.uniform(0.2, 2.0, size=(series, 2))
    y = 100.0 + np.einsum("snk,sk->sn", x, slopes) + rng.normal(scale=4.0, size=(series, rows))
    new_point = offsets + spreads * rng.normal(size=(series, 1, 2))
    return x, y, new_point


def run_batched(x: np.ndarray, y: np.ndarray, new_point: np.ndarray) -> dict[str, np.ndarray]:
    fit = fit_batch(x, y, intercept=True, level=LEVEL)
    prediction = fit.predict(new_point)
    return {
        "coef": fit.coef,
        "bse": fit.standard_error,
        "t": fit.t,
        "p": fit.p_value,
        "ci_lower": fit.lower,
        "ci_upper": fit.upper,
        "point": prediction.point[:, 0],
        "mean_lower": prediction.mean_lower[:, 0],
        "mean_upper": prediction.mean_upper[:, 0],
        "obs_lower": prediction.lower[:, 0],
        "obs_upper": prediction.upper[:, 0],
        "fast": fit.fast_path,
    }


def run_statsmodels(x: np.ndarray, y: np.ndarray, new_point: np.ndarray) -> dict[str, np.ndarray]:
    series = x.shape[0]
    out = {name: np.empty((series, 3)) for name in ("coef", "bse", "t", "p", "ci_lower",
                                                   "ci_upper")}
    out.update({name: np.empty(series) for name in ("point", "mean_lower", "mean_upper",
                                                    "obs_lower", "obs_upper")})
    alpha = 1.0 - LEVEL
    for i in range(series):
        result = sm.OLS(y[i], sm.add_constant(x[i], has_constant="add")).fit()
        interval = result.conf_int(alpha=alpha)
        out["coef"][i] = result.params
        out["bse"][i] = result.bse
        out["t"][i] = result.tvalues
        out["p"][i] = result.pvalues
        out["ci_lower"][i] = interval[:, 0]
        out["ci_upper"][i] = interval[:, 1]
        prediction = result.get_prediction(np.concatenate(([1.0], new_point[i, 0]))[None, :])
        mean_interval = prediction.conf_int(alpha=alpha)
        obs_interval = prediction.conf_int(obs=True, alpha=alpha)
        out["point"][i] = prediction.predicted_mean[0]
        out["mean_lower"][i], out["mean_upper"][i] = mean_interval[0]
        out["obs_lower"][i], out["obs_upper"][i] = obs_interval[0]
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--rows", type=int, default=156)
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--loop-repeats", type=int, default=2)
    parser.add_argument("--seed", type=int, default=20260)
    args = parser.parse_args(argv)

    x, y, new_point = make_data(args.series, args.rows, args.seed)
    print(f"data: {args.series} series x {args.rows} rows x 2 predictors, level {LEVEL}")

    batched_times = []
    for _ in range(args.repeats):
        start = time.perf_counter()
        ours = run_batched(x, y, new_point)
        batched_times.append(time.perf_counter() - start)
    batched = min(batched_times)

    looped_times = []
    for _ in range(args.loop_repeats):
        start = time.perf_counter()
        reference = run_statsmodels(x, y, new_point)
        looped_times.append(time.perf_counter() - start)
    looped = min(looped_times)

    # Vectors of coefficients (and their SEs, t statistics, interval bounds) are compared
    # normwise per series, max|a - b| / max|b| over the series' three terms (the normwise
    # relative error of Higham 2002, Accuracy and Stability of Numerical Algorithms). An
    # estimate near zero (a slope whose interval straddles 0) makes the elementwise ratio a
    # measure of rounding in a quantity that is itself ~0: both libraries differ there by
    # ~1e-14 in absolute terms. p-values and the prediction figures are compared elementwise.
    # Both measures are printed.
    normwise = {"coef", "bse", "t", "ci_lower", "ci_upper"}
    worst = 0.0
    for name, expected in reference.items():
        elementwise = float(np.max(np.abs(ours[name] - expected) / np.abs(expected)))
        if name in normwise:
            per_series = np.max(np.abs(ours[name] - expected), axis=1) / np.max(
                np.abs(expected), axis=1
            )
            judged = float(np.max(per_series))
            print(f"  {name:11s} normwise per series {judged:.2e}   elementwise {elementwise:.2e}")
        else:
            judged = elementwise
            print(f"  {name:11s} elementwise {judged:.2e}")
        worst = max(worst, judged)
    agree = worst <= RTOL
    print(f"agreement with statsmodels: worst {worst:.2e} ({'within' if agree else 'OUTSIDE'} "
          f"{RTOL:g} relative)")
    print(f"series on the fast path: {int(ours['fast'].sum())} of {args.series}")

    tracemalloc.start()
    run_batched(x, y, new_point)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    input_bytes = x.nbytes + y.nbytes + new_point.nbytes
    max_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0

    print(f"batched fit_batch + predict: {batched:.3f} s (least of {args.repeats}: "
          + ", ".join(f"{t:.3f}" for t in batched_times) + ")")
    print(f"statsmodels loop (OLS + get_prediction): {looped:.3f} s (least of "
          f"{args.loop_repeats}: " + ", ".join(f"{t:.3f}" for t in looped_times) + ")")
    print(f"median-based ratio, for comparison: "
          f"{statistics.median(looped_times) / statistics.median(batched_times):.1f}")
    print(f"peak memory of one batched run (tracemalloc): {peak / 2**20:.1f} MiB "
          f"(input arrays {input_bytes / 2**20:.1f} MiB); process max RSS {max_rss:.0f} MiB")
    print(f"speedup_vs_statsmodels: {looped / batched:.1f}")
    return 0 if agree else 1


if __name__ == "__main__":
    sys.exit(main())
