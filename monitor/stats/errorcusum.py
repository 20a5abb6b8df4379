"""A cumulative sum of the forecast errors' size: coverage judged over repeated looks.

Why. The coverage finding is read again at every pass that scores a forecast. A test of a fixed
number of recent forecasts (Kupiec's count of misses, say), read every week on windows that
overlap, gives a stable series one more chance at every look: pass by pass Benjamini–Hochberg
keeps the false share among that pass's findings at ``fdr``, but over a year of looks a series
whose hit rate wanders low by chance gets its turn. A count of misses is also a blunt measure:
after the errors' spread grows, the window refit widens the intervals within weeks, and on a
seeded panel a doubled error SD left only 3 to 10 misses in the following year, where 2.6 were
expected. The size of each error against its interval says much more. So the coverage evidence
is a statistic made for repeated looks on the errors' size, and its p-value is the chance, under
correct intervals, that it would ever climb as high within a whole horizon of forecasts,
whichever pass happens to read it.

The score. A forecast's prediction interval is ``point ± c·s`` with ``c`` the t quantile of its
fit's residual degrees of freedom ``df`` at ``(1 + level)/2`` (the normal quantile for an interval
supplied from outside, ``df`` None). Under the model's conditions the error ``(actual − point)/s``
is Student-t with ``df`` degrees of freedom; ``score = Φ⁻¹(F_t((actual − point)/s; df))`` turns it
into an exactly standard normal score, so one chart serves every window length.

The chart. The CUSUM for an increase in variance (Page 1954, Biometrika 41; the log-likelihood
ratio form as in Hawkins & Olwell 1998, "Cumulative Sum Charts and Charting for Quality
Improvement"; both from memory) of the scores against errors ``ratio`` times the variance the
intervals assume, ``ratio = 2`` (errors about 1.4 times the size the intervals assume, which
makes 95 % intervals cover about 83 %; our choice of the smallest shortfall worth an owner's
attention):

    S_0 = 0,   S_t = max(0, S_(t-1) + w_t),
    w_t = ½ (1 − 1/ratio) min(score_t², cap) − ½ log(ratio).

``cap = 16``: one error beyond 4 of its interval's standard errors counts as 4 (our choice, so a
single outlier moves the chart by at most 3.65 instead of without bound). The chart only climbs
on errors larger than the intervals assume; intervals too wide never raise it.

An *excursion* is a stretch where the chart stays above zero; its ``peak`` is its highest value.
The p-value of a peak ``h`` over a ``horizon`` of H scored forecasts is ``P(max_{t <= H} S_t >= h)``
for a chart started at zero under the model's conditions: the chance that somewhere within the
horizon the chart climbs as high. It is computed by the Markov-chain method of Brook & Evans
(1972, Biometrika 59; from memory): the heights below ``h`` cut into cells of about 0.05, the
chance of each step from each cell's middle taken from the χ²₁ distribution of ``score²``. The
grid is fine enough that it agrees with a seeded simulation (``tests/stats/test_errorcusum.py``).
Peaks are rounded down to a multiple of 0.05, and a peak above 30 is read as 30 (a lower peak has
the larger chance, so the p-value errs on the side of no finding).

Why reading it at any pass keeps the false share within ``fdr`` over a whole horizon: the highest
peak of the horizon has at most its p-value's chance under the null, and every excursion's peak
is at most that peak. So a p-value read at any pass is at least the p-value of the horizon's
highest peak, which is itself a valid p-value. Benjamini–Hochberg only rejects more when
p-values fall, so every series ever flagged within a horizon is among those Benjamini–Hochberg
would flag on the horizon's final p-values (for a fixed family of series with independent
errors; for positively dependent p-values Benjamini & Yekutieli 2001).

Assumptions, for whoever words the reports: one forecast per target period, errors independent
and normal under the model's conditions. Errors with heavier tails than normal climb the chart
faster than the intervals' real shortfall says (the cap limits it), and autocorrelated errors
climb it in runs, which is what the autocorrelation finding is there to say. A rejection is a
statistical signal, not proof of a fault.

Public API (plain arrays in, no files, no clock):

``gaussian_scores(actual, point, lower, upper, level, df) -> FloatArray``
``crossing_probability(peak, horizon) -> float``
``error_cusum_batch(group, score, missed, horizon, *, last=None) -> ErrorCusumBatch``
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

IntArray = NDArray[np.int64]
FloatArray = NDArray[np.float64]

RATIO = 2.0  # the error variance the chart is tuned for, relative to the intervals' (our choice)
CAP = 16.0  # a squared score counts at most this much (our choice)
STEP = 0.05  # cells of the chain and the rounding of peaks
TOP = 30.0  # peaks above are read as this one (a chance far below 1e-10 at any usual horizon)
_FAR = 37.0  # scores are clipped here (float64 tails underflow beyond it)
_RISE = 0.5 * (1.0 - 1.0 / RATIO)
_FALL = 0.5 * math.log(RATIO)


def increments(score: ArrayLike) -> FloatArray:
    """The chart's step for each standard normal score (module docstring)."""
    s = np.asarray(score, dtype=np.float64)
    return _RISE * np.minimum(s * s, CAP) - _FALL


def implied_coverage(mean_square: float, level: float) -> float:
    """The coverage of intervals at ``level`` for errors whose scores have this mean square
    (normal errors ``sqrt(mean_square)`` times the size the intervals assume)."""
    if not mean_square > 0:
        return 1.0
    z = float(special.ndtri(0.5 + level / 2.0))
    return float(2.0 * special.ndtr(z / math.sqrt(mean_square)) - 1.0)


def gaussian_scores(
    actual: ArrayLike,
    point: ArrayLike,
    lower: ArrayLike,
    upper: ArrayLike,
    level: float,
    df: ArrayLike | None = None,
) -> FloatArray:
    """Each forecast's error as a standard normal score under the model's conditions.

    ``df`` the residual degrees of freedom of the fit behind each interval (NaN or None: an
    interval supplied from outside, taken as normal). NaN where the row cannot be scored (a
    non-finite value, or an interval of no width).
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be between 0 and 1, not {level!r}")
    a = np.asarray(actual, dtype=np.float64)
    p = np.asarray(point, dtype=np.float64)
    half = (np.asarray(upper, dtype=np.float64) - np.asarray(lower, dtype=np.float64)) / 2.0
    d = (np.full(a.shape, np.nan) if df is None else np.asarray(df, dtype=np.float64))
    quantile = 0.5 + level / 2.0
    has_df = np.isfinite(d) & (d > 0)
    dof = np.where(has_df, d, 1.0)
    # scipy.special's t and normal functions (what scipy.stats calls, without its per-call
    # checking): stdtrit the t quantile, stdtr the t CDF, ndtri and ndtr the normal ones.
    crit = np.where(has_df, special.stdtrit(dof, quantile), special.ndtri(quantile))
    with np.errstate(divide="ignore", invalid="ignore"):
        standard = (a - p) / (half / crit)
        tail = np.where(has_df, special.stdtr(dof, standard), special.ndtr(standard))
        upper_tail = np.where(has_df, special.stdtr(dof, -standard), special.ndtr(-standard))
        # From whichever tail is the smaller, so far-out errors keep their precision.
        score = np.where(standard > 0, -special.ndtri(upper_tail), special.ndtri(tail))
    usable = np.isfinite(a) & np.isfinite(p) & np.isfinite(half) & (half > 0)
    # Past about 37 the tail's chance underflows; such an error is far beyond the cap anyway.
    return np.where(usable & np.isfinite(standard), np.clip(score, -_FAR, _FAR), np.nan)


def crossing_probability(peak: float, horizon: int) -> float:
    """``P(max_{t <= horizon} S_t >= peak)`` for the chart started at zero under the null.

    1.0 for a peak of zero or below. The peak is rounded down to a multiple of ``STEP``.
    """
    if horizon < 1:
        raise ValueError(f"horizon must be at least 1, not {horizon!r}")
    cells = math.floor(min(peak, TOP) / STEP + 1e-9)
    return _crossing(cells, int(horizon))


def _step_cdf(w: FloatArray) -> FloatArray:
    """P(step <= w) for a standard normal score."""
    x = (w + _FALL) / _RISE
    # χ²₁'s CDF, the function scipy.stats.chi2.cdf calls (without importing scipy.stats).
    below_cap = special.chdtr(1.0, np.clip(x, 0.0, CAP))
    return np.where(x < 0, 0.0, np.where(x >= CAP, 1.0, below_cap))


@lru_cache(maxsize=8192)
def _crossing(cells: int, horizon: int) -> float:
    if cells <= 0:
        return 1.0
    h = cells * STEP
    # Cell 0 holds [0, STEP/2] (with the chart's mass at exactly zero); cell k ≥ 1 the heights
    # within STEP/2 of k·STEP. The top edge is h: everything at or above it has crossed.
    n = cells
    width = h / (n - 0.5)  # middles i·width, edges (k + 0.5)·width; the top edge is h
    # P(from cell i to at most edge k) depends on k − i only: one row of the step's CDF.
    offsets = ((np.arange(-(n - 1), n) + 0.5) * width).astype(np.float64)
    table = _step_cdf(offsets)
    cdf = table[np.arange(n)[None, :] - np.arange(n)[:, None] + (n - 1)]
    move = np.diff(np.concatenate((np.zeros((n, 1)), cdf), axis=1), axis=1)
    cross = 1.0 - cdf[:, -1]
    state = np.zeros(n)
    state[0] = 1.0
    crossed = 0.0
    for _ in range(horizon):
        crossed += float(state @ cross)
        state = state @ move
    return float(min(1.0, max(0.0, crossed)))


@dataclass(frozen=True, eq=False)
class ErrorCusumBatch:
    """The chart of ``g`` series computed together; every array has shape (g,).

    ``group`` the series keys (sorted, as ``numpy.unique`` orders them). ``scored`` the scored
    forecasts the chart read (the last ``last`` when given). ``height`` the chart now, ``peak`` the
    highest height of the current excursion (both 0 when the chart is at zero). ``start_row`` the
    index, in the caller's arrays, of the forecast that started the current excursion (−1 when
    the chart is at zero); ``excursion_scored``, ``excursion_misses`` and
    ``excursion_mean_square`` the forecasts, misses and mean squared score since then.
    ``p_value`` the chance under the null that the chart reaches ``peak`` within ``horizon``
    forecasts (1.0 at zero; NaN with nothing scored).
    """

    group: NDArray[Any]
    horizon: int
    scored: IntArray
    height: FloatArray
    peak: FloatArray
    start_row: IntArray
    excursion_scored: IntArray
    excursion_misses: IntArray
    excursion_mean_square: FloatArray
    p_value: FloatArray

    def __len__(self) -> int:
        return int(self.scored.shape[0])


def error_cusum_batch(
    group: ArrayLike,
    score: ArrayLike,
    missed: ArrayLike,
    horizon: int,
    *,
    last: int | None = None,
) -> ErrorCusumBatch:
    """The chart of every series at once.

    ``group`` (n,) each forecast's series key; ``score`` (n,) its standard normal score
    (``gaussian_scores``; NaN: not scored, the row names its series but the chart skips it);
    ``missed`` (n,) whether the actual fell outside the interval (counted, not charted). Rows of
    one series are in order of target period (series may interleave). ``last``: read only each
    series' last ``last`` scored forecasts (the chart starts at zero before them; a later start
    never raises a chart, so the p-values stay valid).
    """
    if horizon < 1:
        raise ValueError(f"horizon must be at least 1, not {horizon!r}")
    keys = np.asarray(group).ravel()
    z = np.asarray(score, dtype=np.float64).ravel()
    miss = np.asarray(missed, dtype=bool).ravel()
    for name, array in (("score", z), ("missed", miss)):
        if array.shape[0] != keys.shape[0]:
            raise ValueError(f"{name} has {array.shape[0]} rows, group has {keys.shape[0]}")
    group_keys, index = np.unique(keys, return_inverse=True)
    g = group_keys.shape[0]
    counted = np.isfinite(z)
    rows = np.flatnonzero(counted)[np.argsort(index[counted], kind="stable")]
    which = index[rows]
    counts = np.bincount(which, minlength=g).astype(np.int64)
    firsts = np.concatenate(([0], np.cumsum(counts)[:-1])).astype(np.int64)
    position = np.arange(rows.shape[0], dtype=np.int64) - firsts[which]
    if last is not None:
        if last < 1:
            raise ValueError(f"last must be at least 1, not {last!r}")
        keep = position >= counts[which] - last
        rows, which, position = rows[keep], which[keep], position[keep]
        position = position - np.maximum(counts - last, 0)[which]
        counts = np.minimum(counts, last)
    width = int(counts.max()) if g else 0
    # Left-aligned grid: series × their scored forecasts in order; ``row_at`` the caller's row.
    row_at = np.full((g, width), -1, dtype=np.int64)
    row_at[which, position] = rows
    step_at = np.zeros((g, width))
    step_at[which, position] = increments(z[rows])
    square_at = np.zeros((g, width))
    square_at[which, position] = z[rows] ** 2
    missed_at = np.zeros((g, width), dtype=bool)
    missed_at[which, position] = miss[rows]

    # The recursion S_t = max(0, S_(t-1) + w_t) from S_0 = 0 in closed form (Lindley's):
    # S_t = C_t − min(0, C_1, …, C_t) with C the running sum of the steps. The chart is at zero
    # exactly where C_t is the running minimum; the current excursion starts after the last such
    # step (or at the first step when the chart never returned to zero and started above it).
    if width:
        running = np.cumsum(step_at, axis=1)
        low = np.minimum(np.minimum.accumulate(running, axis=1), 0.0)
        heights = np.where(row_at >= 0, running - low, 0.0)
        valid = row_at >= 0
        at_zero = valid & (running <= low)
        steps = np.arange(width)
        last_zero = np.where(at_zero, steps, -1).max(axis=1)  # −1: never back at zero
        used = counts
        first = last_zero + 1  # the excursion's first step (== used: no excursion now)
        ongoing = first < used
        height = np.where(ongoing, heights[np.arange(g), np.maximum(used - 1, 0)], 0.0)
        after = valid & (steps[None, :] >= first[:, None])
        peak = np.where(ongoing, np.where(after, heights, 0.0).max(axis=1), 0.0)
        start = np.where(ongoing, row_at[np.arange(g), np.minimum(first, width - 1)], -1)
        ex_scored = np.where(ongoing, used - first, 0).astype(np.int64)
        ex_misses = np.where(ongoing, (missed_at & after).sum(axis=1), 0).astype(np.int64)
        ex_square = np.where(ongoing, np.where(after, square_at, 0.0).sum(axis=1), 0.0)
    else:
        height, peak = np.zeros(g), np.zeros(g)
        start = np.full(g, -1, dtype=np.int64)
        ex_scored = np.zeros(g, dtype=np.int64)
        ex_misses = np.zeros(g, dtype=np.int64)
        ex_square = np.zeros(g)
    p = np.array([crossing_probability(float(c), horizon) for c in peak], dtype=float)
    p[counts == 0] = np.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_square = np.where(ex_scored > 0, ex_square / np.maximum(ex_scored, 1), np.nan)
    return ErrorCusumBatch(
        group=group_keys, horizon=int(horizon), scored=counts, height=height, peak=peak,
        start_row=start, excursion_scored=ex_scored, excursion_misses=ex_misses,
        excursion_mean_square=mean_square, p_value=p,
    )
