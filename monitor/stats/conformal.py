"""Calibrated prediction intervals: split-conformal quantiles made adaptive over time (ACI).

Method: adaptive conformal inference, Gibbs & Candès (2021), "Adaptive conformal inference under
distribution shift", NeurIPS 34 (arXiv:2106.00170), section 2, on the split-conformal quantile of
a window of recent out-of-sample conformity scores.

At each forecast t of a series, with target miss rate α = 1 − ``level``:

- the **scores** are the series' earlier out-of-sample scores S_r (r < t), non-negative, one per
  scored forecast; the pass uses S_r = |actual_r − point_r| / h_r, the absolute forecast error in
  units of the model's own half-width h_r (a normalised score, Papadopoulos et al. 2008; Lei et al.
  2018, section 5.2), so the calibrated interval is point ± q_t · h_t: the model's own interval
  stretched or shrunk by a factor learned from its recent errors;
- the **quantile** is Gibbs & Candès's Q̂(p) = inf{s : (1/m) Σ 1{S_r ≤ s} ≥ p} over the last
  ``window`` scores (m of them): the ⌈p·m⌉-th smallest score for 0 < p ≤ 1, +∞ for p > 1 (the whole
  line) and the empty set for p ≤ 0;
- q_t = Q̂(1 − α_t), where α_t is the adaptive level: α_1 = α, and after each scored forecast
  α_{t+1} = α_t + γ (α − err_t), err_t = 1 when S_t > q_t (a miss; an empty set always misses,
  the whole line never does). Under-coverage lowers α_t (wider intervals), over-coverage raises it.

Guarantee (Gibbs & Candès 2021, Proposition 4.1), for *any* sequence of scores, with no assumption
on how the data are generated: over T scored forecasts, |(1/T) Σ err_t − α| ≤
(max(α_1, 1 − α_1) + γ) / (γ T). It is a long-run statement about the miss rate; it says nothing
about one forecast, and the width it takes to get there depends on how well recent errors predict
the next one.

Arrays are series × time: ``scores`` (s, n) in time order (order of target period), ``mask``
(s, n) of the entries that are scored forecasts (entries off the mask, or not finite, are skipped:
they neither enter a window nor move α_t). An interval is issued only once a series has
``min_scores`` earlier scores (the warm-up); before that its quantile is NaN.

Public API: ``adaptive_conformal_batch(scores, mask, level, *, gamma, window, min_scores)`` →
``ConformalBatch``; ``adaptive_conformal(scores, level, ...)`` → ``ConformalSeries``, the batch on
one series; ``conformal_quantile(scores, p)``, Q̂(p) of one set of scores.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
IntArray = NDArray[np.int64]

#: Step size γ: 0.005, the value Gibbs & Candès (2021) use in their experiments. Larger steps
#: (0.01, 0.02) were tried on the seeded panels of tests/benchmarks/bench_conformal.py: they track
#: a change faster but make the interval wider (more often the whole line) on heavy-tailed errors.
DEFAULT_GAMMA = 0.005
#: Window of recent scores the quantile is taken over: two years of weekly forecasts. 52 gave
#: heavy-tailed errors an interval 10 % wider than the oracle; 156 adapted too slowly to a
#: growing error variance (DEVELOPERS.md gives the figures).
DEFAULT_WINDOW = 104
#: Earlier scores a series needs before its first calibrated interval (common practice: enough for
#: a 95 % quantile not to be simply the largest score).
DEFAULT_MIN_SCORES = 20

# ⌈p·m⌉ is taken after removing this much, so that p·m a rounding error above a whole number
# (0.95 × 20 = 19.000000000000004) counts as that number.
_CEIL_SLACK = 1e-9


@dataclass(frozen=True, eq=False)
class ConformalBatch:
    """Adaptive conformal quantiles of ``s`` series over ``n`` entries (every array (s, n) or (s,)).

    ``quantile[i, t]`` is q_t, the score quantile in force for entry t (computed from the scores
    before t; NaN off the mask and during the warm-up; +∞ when α_t < 0, and 0 when α_t ≥ 1, which
    stands for the empty set and counts as a miss whatever the score). ``alpha[i, t]`` is α_t
    there. ``issued`` marks entries that had a calibrated interval (on the mask, after the
    warm-up) and ``covered`` those whose score was within it (False elsewhere). ``next_quantile``
    and ``next_alpha`` (s,) are what the next forecast of each series gets (NaN before the
    warm-up ends). ``scored`` (s,) counts the entries on the mask. ``next_widest`` (s,) is the
    largest score in the window the next quantile is taken over: what a caller that cannot issue
    the whole line may issue instead when ``next_quantile`` is +∞ (the pass does; that interval
    can miss, so Proposition 4.1 then holds for the recursion, not exactly for what was issued).
    """

    level: float
    gamma: float
    window: int
    min_scores: int
    quantile: FloatArray
    alpha: FloatArray
    issued: BoolArray
    covered: BoolArray
    next_quantile: FloatArray
    next_alpha: FloatArray
    scored: IntArray
    next_widest: FloatArray

    def __len__(self) -> int:
        return int(self.scored.shape[0])

    @property
    def misses(self) -> IntArray:
        """Misses of the calibrated interval per series (issued and not covered)."""
        return np.sum(self.issued & ~self.covered, axis=1).astype(np.int64)

    def series(self, i: int) -> ConformalSeries:
        """Series ``i`` as a ``ConformalSeries`` (its arrays (n,), its next values plain floats)."""
        return ConformalSeries(
            level=self.level, gamma=self.gamma, window=self.window, min_scores=self.min_scores,
            quantile=self.quantile[i], alpha=self.alpha[i], issued=self.issued[i],
            covered=self.covered[i], next_quantile=_optional(self.next_quantile[i]),
            next_alpha=_optional(self.next_alpha[i]), scored=int(self.scored[i]),
            next_widest=_optional(self.next_widest[i]),
        )


@dataclass(frozen=True, eq=False)
class ConformalSeries:
    """One series' adaptive conformal quantiles; fields as in ``ConformalBatch``.

    ``next_quantile`` and ``next_alpha`` are None while the warm-up lasts (``reason`` says so).
    """

    level: float
    gamma: float
    window: int
    min_scores: int
    quantile: FloatArray
    alpha: FloatArray
    issued: BoolArray
    covered: BoolArray
    next_quantile: float | None
    next_alpha: float | None
    scored: int
    next_widest: float | None = None

    @property
    def reason(self) -> str | None:
        """Why there is no next quantile yet, or None when there is one."""
        if self.next_quantile is not None:
            return None
        return (f"{self.scored} scored forecast{'' if self.scored == 1 else 's'}; "
                f"a calibrated interval needs {self.min_scores}")


def conformal_quantile(scores: ArrayLike, p: float) -> float:
    """Q̂(p) = inf{s : (1/m) Σ 1{S_r ≤ s} ≥ p} of m scores (Gibbs & Candès 2021, section 2).

    The ⌈p·m⌉-th smallest score for 0 < p ≤ 1; +∞ for p > 1; −∞ (the empty set) for p ≤ 0.
    NaN when there are no scores.
    """
    values = np.sort(np.asarray(scores, dtype=np.float64).ravel())
    if values.size == 0:
        return math.nan
    if p > 1.0:
        return math.inf
    if p <= 0.0:
        return -math.inf
    rank = min(max(math.ceil(p * values.size - _CEIL_SLACK), 1), values.size)
    return float(values[rank - 1])


def adaptive_conformal_batch(
    scores: ArrayLike,
    mask: ArrayLike | None = None,
    level: float = 0.95,
    *,
    gamma: float = DEFAULT_GAMMA,
    window: int = DEFAULT_WINDOW,
    min_scores: int = DEFAULT_MIN_SCORES,
) -> ConformalBatch:
    """Adaptive conformal inference (Gibbs & Candès 2021) over many series at once.

    ``scores`` (s, n) non-negative conformity scores in time order, ``mask`` (s, n) the entries
    that are scored forecasts (default: every finite score). The recursion runs over each series'
    own scored entries, vectorised over series; each step sorts the series' windows once.
    Equal, entry by entry, to running the recursion on each series alone (the tests compare it
    with a plain loop). See the module docstring for the method.
    """
    level = _check_open("level", level)
    gamma = _check_positive("gamma", gamma)
    window = _check_count("window", window)
    min_scores = _check_count("min_scores", min_scores)
    values = np.asarray(scores, dtype=np.float64)
    if values.ndim != 2:
        raise ValueError(f"scores must be (series, time), not of shape {values.shape}")
    valid = np.isfinite(values)
    if mask is not None:
        used = np.asarray(mask, dtype=bool)
        if used.shape != values.shape:
            raise ValueError(f"mask has shape {used.shape}, scores {values.shape}")
        valid &= used
    if np.any(values[valid] < 0):
        raise ValueError("conformity scores must be non-negative")
    s = values.shape[0]
    miss_rate = 1.0 - level

    # Each series' scored entries packed to the left, in order.
    count = valid.sum(axis=1).astype(np.int64)
    longest = int(count.max(initial=0))
    order = np.argsort(~valid, axis=1, kind="stable")[:, :longest]
    packed = np.take_along_axis(values, order, axis=1)
    packed[np.arange(longest)[None, :] >= count[:, None]] = np.nan

    q_packed = np.full((s, longest + 1), np.nan)
    a_packed = np.full((s, longest + 1), np.nan)
    hit_packed = np.zeros((s, longest), dtype=bool)
    alpha = np.full(s, miss_rate)
    for k in range(min_scores, longest + 1):
        live = count >= k  # series with at least k earlier scores: q_k exists
        lo = max(0, k - window)
        m = k - lo
        ordered = np.sort(packed[:, lo:k], axis=1)
        p = 1.0 - alpha
        rank = np.clip(np.ceil(p * m - _CEIL_SLACK).astype(np.int64), 1, m)
        q = np.take_along_axis(ordered, (rank - 1)[:, None], axis=1)[:, 0]
        q = np.where(p > 1.0, np.inf, np.where(p <= 0.0, 0.0, q))
        q_packed[:, k] = np.where(live, q, np.nan)
        a_packed[:, k] = np.where(live, alpha, np.nan)
        if k < longest:
            scored_now = count > k
            hit = (packed[:, k] <= q) & (p > 0.0)
            hit_packed[:, k] = hit & scored_now
            alpha = np.where(scored_now, alpha + gamma * (miss_rate - (~hit)), alpha)

    # Back to the caller's positions: entry t is the c-th scored entry of its series.
    position = np.cumsum(valid, axis=1) - 1
    index = np.where(valid, position, 0)
    quantile = np.where(valid, np.take_along_axis(q_packed, index, axis=1), np.nan)
    alpha_at = np.where(valid, np.take_along_axis(a_packed, index, axis=1), np.nan)
    issued = valid & (position >= min_scores)
    covered = issued & np.take_along_axis(
        np.concatenate([hit_packed, np.zeros((s, 1), dtype=bool)], axis=1), index, axis=1)
    rows = np.arange(s)
    next_quantile = q_packed[rows, count]
    next_alpha = a_packed[rows, count]
    if longest:
        place = np.arange(longest)[None, :]
        in_window = (place < count[:, None]) & (place >= (count - window)[:, None])
        widest = np.max(np.where(in_window, packed, -np.inf), axis=1)
    else:
        widest = np.full(s, -np.inf)
    next_widest = np.where(np.isnan(next_quantile), np.nan, widest)
    return ConformalBatch(
        level=level, gamma=gamma, window=window, min_scores=min_scores,
        quantile=_frozen(quantile), alpha=_frozen(alpha_at), issued=_frozen(issued),
        covered=_frozen(covered), next_quantile=_frozen(np.asarray(next_quantile, dtype=float)),
        next_alpha=_frozen(np.asarray(next_alpha, dtype=float)), scored=_frozen(count),
        next_widest=_frozen(np.asarray(next_widest, dtype=float)),
    )


def adaptive_conformal(
    scores: ArrayLike,
    level: float = 0.95,
    *,
    gamma: float = DEFAULT_GAMMA,
    window: int = DEFAULT_WINDOW,
    min_scores: int = DEFAULT_MIN_SCORES,
) -> ConformalSeries:
    """Adaptive conformal inference on one series' scores (n,): the batch on a batch of one."""
    values = np.asarray(scores, dtype=np.float64).reshape(1, -1)
    return adaptive_conformal_batch(values, None, level, gamma=gamma, window=window,
                                    min_scores=min_scores).series(0)


def _frozen(array: NDArray[Any]) -> NDArray[Any]:
    array.setflags(write=False)
    return array


def _optional(value: float | np.floating[Any]) -> float | None:
    number = float(value)
    return None if math.isnan(number) else number


def _check_open(name: str, value: float) -> float:
    if not (isinstance(value, float | int | np.floating) and not isinstance(value, bool)
            and 0.0 < float(value) < 1.0):
        raise ValueError(f"{name} must be a number strictly between 0 and 1, not {value!r}")
    return float(value)


def _check_positive(name: str, value: float) -> float:
    if not (isinstance(value, float | int | np.floating) and not isinstance(value, bool)
            and float(value) > 0.0 and math.isfinite(float(value))):
        raise ValueError(f"{name} must be a positive number, not {value!r}")
    return float(value)


def _check_count(name: str, value: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
        raise ValueError(f"{name} must be a positive whole number, not {value!r}")
    return int(value)


__all__ = [
    "DEFAULT_GAMMA",
    "DEFAULT_MIN_SCORES",
    "DEFAULT_WINDOW",
    "ConformalBatch",
    "ConformalSeries",
    "adaptive_conformal",
    "adaptive_conformal_batch",
    "conformal_quantile",
]
