"""The calibrated interval of a model's next forecasts, from each series' scored history.

For a model with ``interval_method: calibrated`` the pass issues, beside the model's own
interval [lower, upper] around ``point``, the interval point ± q · h with h = (upper − lower)/2 the
model's own half-width and q the factor that adaptive conformal inference (Gibbs & Candès 2021;
``monitor.stats.conformal``) learns from the series' earlier forecasts: their scores
|actual − point| / h, in order of target period, one per target period (the latest forecast of
each, as the audit counts them).

So the calibrated interval is the model's own interval stretched (q > 1: recent errors were
larger than the model expected) or shrunk (q < 1: smaller). It keeps its nominal coverage over the
long run whatever the errors do, which the model's interval promises only when the model's
conditions hold; it promises nothing about a single forecast.

Choices beyond the paper, each documented in the README and DEVELOPERS.md:

- No calibrated interval until a series has ``MIN_SCORES`` scored forecasts (the warm-up).
- When the recursion asks for the whole line (α_t < 0), the pass issues the widest score of the
  window instead, a finite interval that can miss.
- A forecast whose own interval has no width (an exact fit) gives no score.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from monitor.stats.conformal import (
    DEFAULT_GAMMA,
    DEFAULT_MIN_SCORES,
    DEFAULT_WINDOW,
    adaptive_conformal_batch,
)
from monitor.store import ScoredForecasts

GAMMA = DEFAULT_GAMMA
WINDOW = DEFAULT_WINDOW
MIN_SCORES = DEFAULT_MIN_SCORES


@dataclass(frozen=True)
class Calibration:
    """The factor q of a series' next calibrated interval, or None with the reason."""

    factor: float | None
    scored: int
    unbounded: bool  # the recursion asked for the whole line; ``factor`` is the widest score
    reason: str | None

    def bounds(self, point: float, lower: float, upper: float) -> tuple[float, float] | None:
        """The calibrated interval around ``point`` from the model's own [lower, upper]."""
        if self.factor is None:
            return None
        half = self.factor * (upper - lower) / 2.0
        return point - half, point + half


def calibrations(
    scored: ScoredForecasts, series: Sequence[str | None], level: float
) -> dict[str | None, Calibration]:
    """The next calibrated interval's factor for each of ``series``, from its scored forecasts.

    ``scored`` holds one model's scored forecasts (``Store.scored_forecasts(model)``, ordered by
    series and target period, the latest forecast of each target). Series absent from it get
    ``factor=None``.
    """
    names = list(series)
    position = {name: i for i, name in enumerate(names)}
    # Each row's series as its place in ``names`` (−1: not wanted), as arrays: the rows of a
    # long history are not each made a Python int.
    code = np.fromiter(map(position.get, scored.series, itertools.repeat(-1)), np.int64,
                       len(scored.series))
    rows = np.flatnonzero(code >= 0)
    which = code[rows]
    del code
    actual = scored.actual[rows]
    point = scored.point[rows]
    half = (scored.upper[rows] - scored.lower[rows]) / 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        score = np.where(half > 0, np.abs(actual - point) / half, np.nan)
    count = np.bincount(which, minlength=len(names))
    width = int(count.max(initial=0))
    scores = np.full((len(names), width), np.nan)
    if rows.size:
        starts = np.concatenate(([0], np.cumsum(count)[:-1]))
        # Rows of one series are contiguous and in target order (the store's ORDER BY).
        order = np.argsort(which, kind="stable")
        which_sorted = which[order]
        column = np.arange(which_sorted.size) - starts[which_sorted]
        scores[which_sorted, column] = score[order]
    batch = adaptive_conformal_batch(scores, None, level, gamma=GAMMA, window=WINDOW,
                                     min_scores=MIN_SCORES)
    out: dict[str | None, Calibration] = {}
    for i, name in enumerate(names):
        one = batch.series(i)
        if one.next_quantile is None:
            out[name] = Calibration(None, one.scored, False, one.reason)
        elif np.isinf(one.next_quantile):
            out[name] = Calibration(one.next_widest, one.scored, True, None)
        else:
            out[name] = Calibration(one.next_quantile, one.scored, False, None)
    return out


__all__ = ["GAMMA", "MIN_SCORES", "WINDOW", "Calibration", "calibrations"]
