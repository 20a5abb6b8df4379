"""Benchmark: the calibrated interval against the model's own and an oracle (run by hand).

Method: adaptive conformal inference (Gibbs & Candès 2021, NeurIPS 34) on split-conformal
quantiles of each series' recent scores, as monitor/stats/conformal.py implements it. Panels:
tests/stats/conformal_panels.py (iid, AR(1) with ρ = 0.5, growing variance, Student t with 3 df;
the oracle interval is the true conditional quantile interval of y_t given x_t and t, defined
there). Prints, side by side per panel, the long-run coverage of the model's own, the calibrated
and the oracle interval, and each one's mean width over the oracle's; ends with whether every
panel meets the issue's targets (calibrated coverage within ±0.02 of nominal, width at most
1.10 × oracle). Then the time of one batched run at the pass's scale.

    nice /work/venv/bin/python tests/benchmarks/bench_conformal.py [--series 2000] [--forecasts 500]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "stats"))

from conformal_panels import KINDS, ar1_past_aware_factor, run_panel

from monitor.stats.conformal import (
    DEFAULT_GAMMA,
    DEFAULT_MIN_SCORES,
    DEFAULT_WINDOW,
    adaptive_conformal_batch,
)

LEVEL = 0.95


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--series", type=int, default=2000)
    parser.add_argument("--forecasts", type=int, default=500)
    parser.add_argument("--baseline", type=int, default=52)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--gamma", type=float, default=DEFAULT_GAMMA)
    parser.add_argument("--window", type=int, default=DEFAULT_WINDOW)
    args = parser.parse_args()
    print(f"method: adaptive conformal inference (Gibbs & Candès 2021), gamma {args.gamma}, "
          f"window {args.window}, warm-up {DEFAULT_MIN_SCORES}; level {LEVEL}")
    print(f"panels: {args.series} series x {args.forecasts} forecasts after a "
          f"{args.baseline}-row baseline, seed {args.seed}")
    print()
    print(f"{'errors':<9} {'forecasts':>9}   {'coverage: own':>13} {'calibrated':>10} "
          f"{'oracle':>7}   {'width/oracle: own':>17} {'calibrated':>10}   {'unbounded':>9}")
    met = True
    for kind in KINDS:
        r = run_panel(kind, series=args.series, baseline=args.baseline,
                      forecasts=args.forecasts, level=LEVEL, seed=args.seed, gamma=args.gamma,
                      window=args.window, min_scores=DEFAULT_MIN_SCORES)
        ok = abs(r.calibrated_coverage - LEVEL) <= 0.02 and r.calibrated_width_ratio <= 1.10
        met &= ok
        print(f"{kind:<9} {r.forecasts:>9}   {r.own_coverage:>13.4f} "
              f"{r.calibrated_coverage:>10.4f} {r.oracle_coverage:>7.4f}   "
              f"{r.own_width_ratio:>17.3f} "
              f"{r.calibrated_width_ratio:>10.3f}   {r.unbounded_share:>9.4f}"
              f"{'' if ok else '   <- misses the target'}")
        if kind == "ar1":
            factor = ar1_past_aware_factor()
            print(f"{'':<9} {'':>9}   (against an oracle that also knew the previous error: "
                  f"own {r.own_width_ratio / factor:.3f}, calibrated "
                  f"{r.calibrated_width_ratio / factor:.3f})")
    print()
    rng = np.random.default_rng(1)
    scores = np.abs(rng.standard_normal((10_000, 156)))
    start = time.perf_counter()
    adaptive_conformal_batch(scores, None, LEVEL)
    elapsed = time.perf_counter() - start
    print(f"adaptive_conformal_batch, 10,000 series x 156 scored forecasts: {elapsed:.2f} s")
    print(f"targets (coverage within +-0.02 of {LEVEL}, width <= 1.10 x oracle): "
          f"{'met on every panel' if met else 'NOT met'}")


if __name__ == "__main__":
    main()
