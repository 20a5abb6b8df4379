"""Benchmark: the batched coverage audit against a loop of one-series audits (run by hand).

10,000 series × 52 scored forecasts each, rows of different series interleaved as a pass would
stack them. Prints both timings side by side, checks the results agree, and ends with the ratio.

    nice /work/venv/bin/python tests/benchmarks/bench_coverage.py
"""

from __future__ import annotations

import time

import numpy as np

from monitor.stats.coverage import audit_batch, audit_coverage

SERIES = 10_000
OUTCOMES = 52
LEVEL = 0.95


def main() -> None:
    rng = np.random.default_rng(7)
    group = np.tile(np.arange(SERIES), OUTCOMES)  # period-major: series interleave
    actual = rng.normal(size=group.size)
    half = rng.uniform(1.5, 2.5, size=group.size)
    lower, upper = -half, half

    start = time.perf_counter()
    batch = audit_batch(group, actual, lower, upper, LEVEL)
    audits = batch.audits()
    batched = time.perf_counter() - start

    start = time.perf_counter()
    by_series = np.argsort(group, kind="stable")
    boundaries = np.searchsorted(group[by_series], np.arange(SERIES + 1))
    looped_audits = []
    for s in range(SERIES):
        rows = by_series[boundaries[s]:boundaries[s + 1]]
        looped_audits.append(audit_coverage(actual[rows], lower[rows], upper[rows], LEVEL))
    looped = time.perf_counter() - start

    assert audits == looped_audits, "batched and looped audits differ"
    print(f"series x outcomes:            {SERIES} x {OUTCOMES}")
    print(f"batched audit_batch + audits: {batched:8.3f} s")
    print(f"loop of audit_coverage:       {looped:8.3f} s")
    print(f"speedup_vs_loop: {looped / batched:.1f}")


if __name__ == "__main__":
    main()
