"""How many doubled error spreads could any coverage test find on the issue-14 panel (by hand).

    PYTHONPATH=. python tests/simulations/spread_ceiling.py [--seeds 14,21,22,23,24] [--keep DIR]

For each seed, the panel of ``tests/panel.py`` (200 series × 156 weeks, 20 % planted) goes
through the real pass week by week (about 2 minutes a seed; ``--keep DIR`` keeps each
workspace in ``DIR/seed-N`` and reuses it on the next run). Then, from the database, every
scored forecast of the 13 series whose error SD doubled becomes its standard normal score
(``monitor.stats.errorcusum.gaussian_scores``, as the pass scores it), and four tests of
those scores are compared at several levels α:

- ``oracle``: the Neyman–Pearson likelihood-ratio test for one simple alternative, told the
  change week, the size of the change and how the window refit absorbs it: the scores after
  the change are taken as normal with variance ``4 / (1 + 3·min(k, W)/W)`` in week ``k`` after
  it (four times the intervals' variance at once, falling as the ``W = 52``-row window fills
  with the new errors). One look, at the end of the replay, no multiplicity. By the
  Neyman–Pearson lemma no test at the same α has more power against that alternative, so its
  count is a ceiling for any coverage test (ours must also find the change week, the size and
  the moment to look, and keep its error rate over every look of a horizon). Its null
  distribution is simulated (iid standard normal scores, seeded).
- ``one look, χ²``: the sum of the post-change squared scores against χ² with as many degrees of
  freedom (told the change week only).
- ``chart``: the smallest p-value the coverage chart (``error_cusum_batch``, horizon 104,
  reading the last 104 scored forecasts, as the pass does) gave at any pass after the change.
- ``scan 52``: the smallest p-value, at any pass after the change, of the highest sum of 52
  consecutive squared scores (capped at 16) among the last 104, against the same statistic's
  simulated null over a horizon of 104 (seeded).

The last two are counted on the p-value alone, before Benjamini–Hochberg and the finding's
other conditions; the script also prints the Benjamini–Hochberg threshold the chart's p-values
met across the model's series after the change (the α at which the pass really decides), and,
for a seed it replayed in this run, how many spreads the pass itself raised ``coverage`` on.

Invented data only (the seeded panel and seeded null draws); no outside reference is involved.
Figures from a run are in DEVELOPERS.md ("The doubled spread's ceiling, measured").
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from panel import PanelSpec, run_panel, simulate, week_ending

from monitor.stats.errorcusum import CAP, error_cusum_batch, gaussian_scores
from monitor.stats.multitest import benjamini_hochberg
from monitor.store import Store

HORIZON = 104  # twice the panel's 52-row baseline, the pass's default
WINDOW = 52  # the panel model's refit window
ALPHAS = (0.002, 0.005, 0.01, 0.015, 0.02)
NULL_PATHS = 200_000
FDR = 0.10  # the panel model's ``fdr``


def scores(db: Path, names: list[str]) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """(series × target periods) scores and misses of the panel model, NaN where not scored."""
    with Store.open(db) as store:
        scored = store.scored_forecasts("unit_output", with_df=True)
    periods = sorted(set(scored.target_period))
    column = {p: j for j, p in enumerate(periods)}
    row = {n: i for i, n in enumerate(names)}
    assert scored.residual_df is not None
    z = gaussian_scores(scored.actual, scored.point, scored.lower, scored.upper, 0.95,
                        scored.residual_df)
    out = np.full((len(names), len(periods)), np.nan)
    missed = np.zeros(out.shape, dtype=bool)
    i = np.array([row[s] for s in scored.series])
    j = np.array([column[p] for p in scored.target_period])
    out[i, j] = z
    missed[i, j] = (scored.actual < scored.lower) | (scored.actual > scored.upper)
    return out, missed, periods


def scan_null(rng: np.random.Generator) -> np.ndarray:
    """Sorted highest 52-score sums over a horizon of 104 iid standard normal scores."""
    out = []
    for _ in range(NULL_PATHS // 50_000):
        z2 = np.minimum(rng.standard_normal((50_000, HORIZON)) ** 2, CAP)
        out.append(window_sums(z2).max(axis=1))
    return np.sort(np.concatenate(out))


def window_sums(z2: np.ndarray) -> np.ndarray:
    """The sum of each row's latest ``WINDOW`` values (fewer at the start) at every column."""
    c = np.concatenate([np.zeros((z2.shape[0], 1)), np.cumsum(z2, axis=1)], axis=1)
    ends = np.arange(1, z2.shape[1] + 1)
    return c[:, ends] - c[:, np.maximum(ends - WINDOW, 0)]


def profile(after: int) -> np.ndarray:
    k = np.arange(after)
    return 4.0 / (1.0 + 3.0 * np.minimum(k, WINDOW) / WINDOW)


def log_ratio(z2: np.ndarray, variance: np.ndarray) -> np.ndarray:
    return np.sum(0.5 * (1.0 - 1.0 / variance) * z2 - 0.5 * np.log(variance), axis=-1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seeds", default="14,21,22,23,24")
    parser.add_argument("--keep", type=Path, default=None)
    args = parser.parse_args()
    rng = np.random.default_rng(20261203)
    null_scan = scan_null(rng)
    counts = {name: dict.fromkeys(ALPHAS, 0) for name in ("oracle", "one look", "chart", "scan")}
    total = 0
    raised = [0, 0]
    with tempfile.TemporaryDirectory() as scratch:
        for seed in (int(s) for s in args.seeds.split(",")):
            spec = PanelSpec(series=200, weeks=156, planted_share=0.2, seed=seed)
            root = (args.keep or Path(scratch)) / f"seed-{seed}"
            db = root / "state" / "plumbline.sqlite"
            if not db.exists():
                result = run_panel(spec, root=root)
                found, changed, _ = result.detection("spread")
                raised[0] += found
                raised[1] += changed
                print(f"seed {seed}: the pass raised coverage on {found} of {changed} spreads")
            panel = simulate(spec)
            z, missed, periods = scores(db, panel.names)
            first_after = periods.index(week_ending(spec.change_week).isoformat())
            spread = [i for i, c in enumerate(panel.change) if c == "spread"]
            total += len(spread)
            after = z.shape[1] - first_after
            null_lr = np.sort(log_ratio(
                np.minimum(rng.standard_normal((NULL_PATHS, after)) ** 2, CAP), profile(after)))
            smallest_chart = np.ones(z.shape[0])
            smallest_scan = np.ones(z.shape[0])
            thresholds = []
            for t in range(first_after, z.shape[1]):
                lo = max(0, t + 1 - HORIZON)
                part = z[:, lo:t + 1]
                group = np.repeat(np.arange(z.shape[0]), part.shape[1])
                chart = error_cusum_batch(group, part.ravel(), missed[:, lo:t + 1].ravel(),
                                          HORIZON)
                smallest_chart = np.fmin(smallest_chart, chart.p_value)
                judged = np.where(np.isfinite(part), np.minimum(part * part, CAP), 0.0)
                highest = window_sums(judged).max(axis=1)
                p_scan = 1.0 - np.searchsorted(null_scan, highest, side="left") / null_scan.size
                smallest_scan = np.fmin(smallest_scan, np.maximum(p_scan, 1.0 / null_scan.size))
                thresholds.append(FDR * benjamini_hochberg(chart.p_value, FDR).reject.sum()
                                  / z.shape[0])
            print(f"seed {seed}: Benjamini–Hochberg threshold after the change, median "
                  f"{np.median(thresholds):.4f} (range {min(thresholds):.4f}–"
                  f"{max(thresholds):.4f})")
            for i in spread:
                z2 = np.minimum(z[i, first_after:] ** 2, CAP)
                p_oracle = 1.0 - np.searchsorted(null_lr, log_ratio(z2, profile(after)),
                                                 side="left") / null_lr.size
                p_one = float(stats.chi2.sf(z2.sum(), z2.size))
                for alpha in ALPHAS:
                    counts["oracle"][alpha] += p_oracle < alpha
                    counts["one look"][alpha] += p_one < alpha
                    counts["chart"][alpha] += smallest_chart[i] < alpha
                    counts["scan"][alpha] += smallest_scan[i] < alpha
    print(f"\ndoubled spreads with p < α, of {total}:")
    print(f"  {'test':<10}" + "".join(f"{'α ' + str(a):>10}" for a in ALPHAS))
    for name, row in counts.items():
        print(f"  {name:<10}" + "".join(f"{row[a]:>10}" for a in ALPHAS))
    if raised[1]:
        print(f"the pass itself raised coverage on {raised[0]} of {raised[1]}")


if __name__ == "__main__":
    main()
