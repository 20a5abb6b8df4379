"""The coverage audit: issued prediction intervals scored against the actuals that arrived later.

Words. A forecast's outcome is a **hit** when ``lower <= actual <= upper`` (bounds inclusive: an
actual exactly on a bound is a hit), a **miss high** above the upper bound and a **miss low** below
the lower bound. The *hit rate* is the share of hits, as forecast users say it. Beware: in the
bank-backtesting literature (Kupiec 1995, Christoffersen 1998, Basel Committee 1996) a "hit" or
"exception" means the opposite, an actual *outside* the interval. Here those are called misses, and
every test below is written in terms of the miss count.

``level`` is the interval's nominal coverage (0.95 for a 95 % prediction interval); under the null
hypothesis that the intervals are right, each forecast misses with probability ``1 - level``.
``confidence`` is a different level: that of the Clopper–Pearson interval around the observed hit
rate (default 0.95). The two are easy to mix up; keep them apart.

Public API (all inputs are plain arrays; nothing here reads files or knows about time):

``audit_coverage(actual, lower, upper, level, *, confidence=0.95, last=None) -> CoverageAudit``
    One series, over all scored forecasts (or the last ``last`` of them).
``audit_last(actual, lower, upper, level, last, *, confidence=0.95) -> CoverageAudit``
    The last ``last`` scored forecasts.
``audit_by_lead(actual, lower, upper, level, lead, *, confidence=0.95, last=None)``
    One series split by lead time: ``list[CoverageAudit]`` in increasing lead.
``audit_batch(group, actual, lower, upper, level, *, lead=None, last=None, confidence=0.95)``
    Many series at once, loop-free: ``CoverageBatch`` with one entry per group (per group and lead
    when ``lead`` is given); ``CoverageBatch.audit(i)`` gives the ``CoverageAudit`` of entry ``i``.

Building blocks, vectorised over arrays of counts: ``clopper_pearson_interval``,
``kupiec_statistic``, ``transition_counts``, ``christoffersen_statistics``, ``miss_probability``,
``traffic_light_zone``, ``interval_score``.

Rows are taken in the order given, which the caller makes the order of target period (the
Christoffersen tests look at consecutive forecasts). A row whose actual or either bound is not a
finite number is not scored: it counts nowhere and its neighbours become consecutive.

Degenerate inputs give defined results, never an exception or NaN in a ``CoverageAudit``:

- **No scored forecasts**: counts 0; hit rate, its interval, every statistic and p-value, the zone,
  the mean width and the interval score are None, and each test's reason says so.
- **All hits / all misses**: Kupiec's statistic is finite, using the limit 0·log 0 = 0
  (all hits: ``-2 T log(level)``; all misses: ``-2 T log(1 - level)``).
- **Christoffersen** needs at least 2 scored forecasts (one transition); with fewer, the
  independence and conditional-coverage results are None with a reason. When no miss is followed by
  another scored forecast (or no hit is), the first-order Markov alternative cannot be estimated for
  that state: following the usual convention (CHECK_VALUES.md item 7) the undefined term is dropped,
  which makes LR_ind exactly 0; the independence statistic and p-value are then reported as None
  with a reason (whether misses cluster cannot be assessed), and the conditional-coverage statistic
  is LR_uc + 0 on χ²(2).
- **Zone**: zero misses is always green (see ``traffic_light_zone``).

Cautions for whoever words the reports: a rejection is a statistical signal that the intervals do
not cover as claimed, not proof of a fault; the tests assume forecasts are scored independently
under the null, and the χ² limits are rough for a handful of forecasts, which is why the findings
layer requires a minimum number of scored forecasts before raising anything.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from monitor.stats._dist import chi2_sf

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

# Basel Committee (1996): yellow starts where P(X <= misses) first reaches 95 %, red where it
# first reaches 99.99 %.
GREEN_BELOW = 0.95
YELLOW_BELOW = 0.9999

_NO_SCORED = "no scored forecasts"
_TOO_FEW_FOR_ORDER = "needs at least 2 scored forecasts in order"
_NO_MISS_FOLLOWED = (
    "no miss is followed by another scored forecast, so whether misses cluster cannot be assessed"
)
_NO_HIT_FOLLOWED = (
    "no hit is followed by another scored forecast, so whether misses cluster cannot be assessed"
)


class CoverageZone(StrEnum):
    """Traffic-light zone of the miss count (Basel Committee 1996)."""

    GREEN = "green"
    YELLOW = "yellow"
    RED = "red"


@dataclass(frozen=True)
class CoverageAudit:
    """The coverage audit of one series (or one lead of a series, or its last N forecasts).

    Counts: ``scored`` = ``hits + misses_high + misses_low``. ``transitions`` is
    ``(n00, n01, n10, n11)``, the first-order transition counts of the miss indicator over
    consecutive scored forecasts (0 = hit, 1 = miss; ``n01`` counts a hit followed by a miss).
    ``miss_probability`` is P(X <= misses) for X ~ Binomial(scored, 1 - nominal), the quantity
    behind ``zone``. Each ``*_reason`` is None when its p-value is defined and otherwise says why
    it is not. ``window`` is the N of a last-N audit, ``lead`` the lead of a by-lead audit.
    """

    scored: int
    hits: int
    misses_high: int
    misses_low: int
    hit_rate: float | None
    hit_rate_lower: float | None
    hit_rate_upper: float | None
    confidence: float | None  # None: no Clopper–Pearson interval was computed
    nominal: float
    kupiec_statistic: float | None
    kupiec_p_value: float | None
    kupiec_reason: str | None
    transitions: tuple[int, int, int, int]
    independence_statistic: float | None
    independence_p_value: float | None
    independence_reason: str | None
    christoffersen_statistic: float | None
    christoffersen_p_value: float | None
    christoffersen_reason: str | None
    miss_probability: float | None
    zone: CoverageZone | None
    mean_width: float | None
    interval_score: float | None
    window: int | None = None
    lead: int | None = None

    @property
    def misses(self) -> int:
        """Misses on either side."""
        return self.misses_high + self.misses_low

    def as_record(self) -> dict[str, Any]:
        """The audit's keys of DESIGN.md section 9 (without ``model`` and ``series``).

        ``window`` and ``lead`` are included only when set. Values are plain Python types.
        """
        record: dict[str, Any] = {
            "scored": self.scored,
            "hits": self.hits,
            "hit_rate": self.hit_rate,
            "hit_rate_lower": self.hit_rate_lower,
            "hit_rate_upper": self.hit_rate_upper,
            "misses_high": self.misses_high,
            "misses_low": self.misses_low,
            "nominal": self.nominal,
            "kupiec_p_value": self.kupiec_p_value,
            "independence_p_value": self.independence_p_value,
            "christoffersen_p_value": self.christoffersen_p_value,
            "zone": None if self.zone is None else self.zone.value,
            "mean_width": self.mean_width,
            "interval_score": self.interval_score,
        }
        if self.window is not None:
            record["window"] = self.window
        if self.lead is not None:
            record["lead"] = self.lead
        return record


@dataclass(frozen=True, eq=False)
class CoverageBatch:
    """Coverage audits of ``g`` groups computed together; every array has shape (g,).

    ``group`` holds the group keys (sorted, as ``numpy.unique`` orders them) and ``lead`` the lead
    of each entry when the batch was split by lead (else None). In the float arrays NaN marks a
    value that is undefined for that entry (no scored forecasts, or a test that cannot be run);
    ``audit(i)`` turns those into None with the reason. ``zone`` is None where nothing was scored.
    """

    group: NDArray[Any]
    lead: NDArray[Any] | None
    nominal: float
    confidence: float | None  # None: no Clopper–Pearson interval was computed
    window: int | None
    scored: IntArray
    hits: IntArray
    misses_high: IntArray
    misses_low: IntArray
    n00: IntArray
    n01: IntArray
    n10: IntArray
    n11: IntArray
    hit_rate: FloatArray
    hit_rate_lower: FloatArray
    hit_rate_upper: FloatArray
    kupiec_statistic: FloatArray
    kupiec_p_value: FloatArray
    independence_statistic: FloatArray
    independence_p_value: FloatArray
    christoffersen_statistic: FloatArray
    christoffersen_p_value: FloatArray
    miss_probability: FloatArray
    zone: tuple[CoverageZone | None, ...]
    mean_width: FloatArray
    interval_score: FloatArray

    def __len__(self) -> int:
        return int(self.scored.shape[0])

    def audit(self, i: int) -> CoverageAudit:
        """The ``CoverageAudit`` of entry ``i``, with None (and a reason) for undefined values."""
        scored = int(self.scored[i])
        n00, n01, n10, n11 = (int(a[i]) for a in (self.n00, self.n01, self.n10, self.n11))
        kupiec_reason = _NO_SCORED if scored == 0 else None
        if scored == 0:
            order_reason: str | None = _NO_SCORED
        elif scored < 2:
            order_reason = _TOO_FEW_FOR_ORDER
        else:
            order_reason = None
        if order_reason is not None:
            independence_reason: str | None = order_reason
        elif n10 + n11 == 0:
            independence_reason = _NO_MISS_FOLLOWED
        elif n00 + n01 == 0:
            independence_reason = _NO_HIT_FOLLOWED
        else:
            independence_reason = None
        lead = None if self.lead is None else _plain(self.lead[i])
        return CoverageAudit(
            scored=scored,
            hits=int(self.hits[i]),
            misses_high=int(self.misses_high[i]),
            misses_low=int(self.misses_low[i]),
            hit_rate=_optional(self.hit_rate[i]),
            hit_rate_lower=_optional(self.hit_rate_lower[i]),
            hit_rate_upper=_optional(self.hit_rate_upper[i]),
            confidence=self.confidence,
            nominal=self.nominal,
            kupiec_statistic=_optional(self.kupiec_statistic[i]),
            kupiec_p_value=_optional(self.kupiec_p_value[i]),
            kupiec_reason=kupiec_reason,
            transitions=(n00, n01, n10, n11),
            independence_statistic=_optional(self.independence_statistic[i]),
            independence_p_value=_optional(self.independence_p_value[i]),
            independence_reason=independence_reason,
            christoffersen_statistic=_optional(self.christoffersen_statistic[i]),
            christoffersen_p_value=_optional(self.christoffersen_p_value[i]),
            christoffersen_reason=order_reason,
            miss_probability=_optional(self.miss_probability[i]),
            zone=self.zone[i],
            mean_width=_optional(self.mean_width[i]),
            interval_score=_optional(self.interval_score[i]),
            window=self.window,
            lead=lead,
        )

    def audits(self) -> list[CoverageAudit]:
        """Every entry's ``CoverageAudit``, in the order of ``group`` (and ``lead``)."""
        return [self.audit(i) for i in range(len(self))]


# ---------------------------------------------------------------------------------------------
# Building blocks (vectorised over arrays of counts)


def clopper_pearson_interval(
    successes: ArrayLike, trials: ArrayLike, confidence: float = 0.95
) -> tuple[FloatArray, FloatArray]:
    """Exact binomial confidence interval for a proportion (Clopper & Pearson 1934).

    With x successes in n trials and α = 1 − confidence: lower = Beta⁻¹(α/2; x, n − x + 1), or 0
    when x = 0; upper = Beta⁻¹(1 − α/2; x + 1, n − x), or 1 when x = n. ``successes`` and
    ``trials`` broadcast together; the result has their broadcast shape, NaN where n = 0.
    """
    _check_probability("confidence", confidence)
    x, n = np.broadcast_arrays(np.asarray(successes, dtype=np.float64),
                               np.asarray(trials, dtype=np.float64))
    if np.any((x < 0) | (x > n)):
        raise ValueError("successes must lie between 0 and the number of trials")
    tail = (1.0 - confidence) / 2.0
    lower = np.full(x.shape, np.nan)
    upper = np.full(x.shape, np.nan)
    has_trials = n > 0
    lower[has_trials & (x == 0)] = 0.0
    upper[has_trials & (x == n)] = 1.0
    inner_low = has_trials & (x > 0)
    inner_high = has_trials & (x < n)
    # The beta quantile is scipy.special.betaincinv, the function scipy.stats.beta.ppf calls
    # (equal to it bit for bit, tests/stats/test_coverage.py), without importing scipy.stats.
    lower[inner_low] = special.betaincinv(x[inner_low], n[inner_low] - x[inner_low] + 1, tail)
    upper[inner_high] = special.betaincinv(x[inner_high] + 1, n[inner_high] - x[inner_high],
                                           1 - tail)
    return lower, upper


def kupiec_statistic(misses: ArrayLike, scored: ArrayLike, miss_rate: float) -> FloatArray:
    """Kupiec's (1995) proportion-of-failures likelihood ratio, χ²(1) under the null.

    LR = −2 ln[(1 − p)^(T−N) p^N] + 2 ln[(1 − N/T)^(T−N) (N/T)^N] with N misses out of T scored
    and nominal miss rate p = 1 − level, using 0·ln 0 = 0, so all hits and all misses are finite.
    Broadcast shape of the inputs; NaN where T = 0.
    """
    _check_probability("miss_rate", miss_rate)
    n_miss, total = np.broadcast_arrays(np.asarray(misses, dtype=np.float64),
                                        np.asarray(scored, dtype=np.float64))
    return _uc_statistic(total - n_miss, n_miss, miss_rate)


def transition_counts(missed: ArrayLike) -> tuple[int, int, int, int]:
    """First-order transition counts ``(n00, n01, n10, n11)`` of a 0/1 miss sequence (n,).

    n_ij counts consecutive pairs (I_{t−1}, I_t) = (i, j) over t = 2…T (Christoffersen 1998).
    """
    sequence = np.asarray(missed).astype(bool).ravel()
    if sequence.size < 2:
        return (0, 0, 0, 0)
    codes = 2 * sequence[:-1].astype(np.int64) + sequence[1:].astype(np.int64)
    counts = np.bincount(codes, minlength=4)
    return (int(counts[0]), int(counts[1]), int(counts[2]), int(counts[3]))


def christoffersen_statistics(
    n00: ArrayLike, n01: ArrayLike, n10: ArrayLike, n11: ArrayLike, miss_rate: float
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Christoffersen's (1998) LR_uc, LR_ind and LR_cc = LR_uc + LR_ind from transition counts.

    All three use the T − 1 transitions (the first observation is conditioned on), so the sum is
    exact. LR_uc is Kupiec's form on those T − 1 outcomes (χ²(1)); LR_ind tests a first-order
    Markov chain against independence (χ²(1)); LR_cc tests both (χ²(2)). An undefined transition
    probability (no transition out of that state) has zero counts, so its term is dropped.
    Broadcast shape of the counts; NaN where there is no transition at all.
    """
    _check_probability("miss_rate", miss_rate)
    c00, c01, c10, c11 = np.broadcast_arrays(
        *(np.asarray(c, dtype=np.float64) for c in (n00, n01, n10, n11))
    )
    from_hit = c00 + c01
    from_miss = c10 + c11
    total = from_hit + from_miss
    with np.errstate(invalid="ignore", divide="ignore"):
        pi_01 = np.where(from_hit > 0, c01 / np.where(from_hit > 0, from_hit, 1.0), 0.0)
        pi_11 = np.where(from_miss > 0, c11 / np.where(from_miss > 0, from_miss, 1.0), 0.0)
    to_hit = c00 + c10
    to_miss = c01 + c11
    loglik_markov = (
        special.xlogy(c00, 1 - pi_01) + special.xlogy(c01, pi_01)
        + special.xlogy(c10, 1 - pi_11) + special.xlogy(c11, pi_11)
    )
    lr_uc = _uc_statistic(to_hit, to_miss, miss_rate)
    lr_ind = np.maximum(2.0 * (loglik_markov - _loglik_at_own_rate(to_hit, to_miss)), 0.0)
    # With one state never left, the dropped term makes the Markov and independent likelihoods
    # identical: LR_ind is exactly 0, not the rounding error of a difference of two equal sums.
    lr_ind = np.where((from_hit > 0) & (from_miss > 0), lr_ind, 0.0)
    lr_ind = np.where(total > 0, lr_ind, np.nan)
    return lr_uc, lr_ind, lr_uc + lr_ind


def miss_probability(misses: ArrayLike, scored: ArrayLike, level: float) -> FloatArray:
    """P(X <= misses) for X ~ Binomial(scored, 1 − level): the basis of the zones (Basel 1996).

    Broadcast shape of the inputs; NaN where scored = 0.
    """
    _check_probability("level", level)
    n_miss, total = np.broadcast_arrays(np.asarray(misses, dtype=np.float64),
                                        np.asarray(scored, dtype=np.float64))
    # P(X <= k) = 1 − I_p(k + 1, n − k) for k < n (the binomial tail as a regularized incomplete
    # beta function, Abramowitz & Stegun 26.5.24; from memory), 1 for k >= n: scipy.special's
    # betaincc, so a pass need not import scipy.stats. It agrees with scipy.stats.binom.cdf to
    # about 1e-14 (tests/stats/test_coverage.py), far inside the zones' 95 % and 99.99 % lines.
    inner = (total > 0) & (n_miss < total)
    cumulative = np.where(n_miss >= total, 1.0, np.nan)
    cumulative[inner] = special.betaincc(n_miss[inner] + 1.0, total[inner] - n_miss[inner],
                                         1.0 - level)
    return np.where(total > 0, cumulative, np.nan)


def traffic_light_zone(misses: int, scored: int, level: float) -> CoverageZone | None:
    """The traffic-light zone of a miss count (Basel Committee 1996).

    With P = P(X <= misses), X ~ Binomial(scored, 1 − level): green when P < 95 %, yellow when
    95 % <= P < 99.99 %, red otherwise (yellow starts where P first reaches 95 %). For 250
    forecasts at level 0.99 this gives green 0–4 misses, yellow 5–9, red 10 or more.

    Our convention beyond the published rule: zero misses is always green. The zones grade
    evidence of *too many* misses and none is no such evidence, while the literal rule would call
    zero misses yellow whenever level^scored >= 0.95 (e.g. up to 5 forecasts at level 0.99).
    Returns None when nothing was scored. Note the zones look at misses only: intervals that are
    too wide (too few misses) stay green; Kupiec's two-sided test catches that.
    """
    if scored < 0 or misses < 0 or misses > scored:
        raise ValueError("misses must lie between 0 and scored")
    if scored == 0:
        return None
    probability = float(miss_probability(misses, scored, level))
    return _zone_of(misses, probability)


def interval_score(
    actual: ArrayLike, lower: ArrayLike, upper: ArrayLike, level: float
) -> FloatArray:
    """Interval score of central (1 − α) intervals, α = 1 − level (Gneiting & Raftery 2007, §6.2).

    S_α(l, u; x) = (u − l) + (2/α)(l − x)·1{x < l} + (2/α)(x − u)·1{x > u}; negatively oriented
    (lower is better; Gneiting & Raftery print it with the opposite sign), after Dunsmore (1968)
    and Winkler (1972). Arrays broadcast together; the result has their shape.
    """
    _check_probability("level", level)
    x, lo, hi = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64)
                                      for a in (actual, lower, upper)))
    penalty = 2.0 / (1.0 - level)
    below = np.where(x < lo, lo - x, 0.0)
    above = np.where(x > hi, x - hi, 0.0)
    return (hi - lo) + penalty * below + penalty * above


# ---------------------------------------------------------------------------------------------
# Audits


def audit_coverage(
    actual: ArrayLike,
    lower: ArrayLike,
    upper: ArrayLike,
    level: float,
    *,
    confidence: float = 0.95,
    last: int | None = None,
) -> CoverageAudit:
    """Audit one series' intervals: every scored forecast, or the last ``last`` of them.

    ``actual``, ``lower``, ``upper`` have shape (n,), in order of target period; ``level`` is the
    intervals' nominal coverage; ``confidence`` that of the hit rate's Clopper–Pearson interval.
    See the module docstring for the statistics, their sources and the degenerate cases.
    """
    values = np.asarray(actual, dtype=np.float64)
    if values.size == 0 and np.size(lower) == 0 and np.size(upper) == 0:
        # One unscored row gives the series its entry, with nothing scored.
        values, lower, upper = np.full(1, np.nan), np.full(1, np.nan), np.full(1, np.nan)
    batch = audit_batch(np.zeros(values.shape, dtype=np.int64), values, lower, upper, level,
                        confidence=confidence, last=last)
    return batch.audit(0)


def audit_last(
    actual: ArrayLike,
    lower: ArrayLike,
    upper: ArrayLike,
    level: float,
    last: int,
    *,
    confidence: float = 0.95,
) -> CoverageAudit:
    """The audit of the last ``last`` scored forecasts of one series (all of them if fewer).

    Arrays (n,) in order of target period; the result's ``window`` is ``last``.
    """
    return audit_coverage(actual, lower, upper, level, confidence=confidence, last=last)


def audit_by_lead(
    actual: ArrayLike,
    lower: ArrayLike,
    upper: ArrayLike,
    level: float,
    lead: ArrayLike,
    *,
    confidence: float = 0.95,
    last: int | None = None,
) -> list[CoverageAudit]:
    """One series' audit split by lead time: one ``CoverageAudit`` per lead value, increasing.

    All arrays have shape (n,), in order of target period; within each lead the rows keep that
    order. A lead with no scored forecast is not listed.
    """
    values = np.asarray(actual, dtype=np.float64)
    batch = audit_batch(np.zeros(values.shape, dtype=np.int64), values, lower, upper, level,
                        lead=lead, confidence=confidence, last=last)
    return [audit for audit in batch.audits() if audit.scored > 0]


def audit_batch(
    group: ArrayLike,
    actual: ArrayLike,
    lower: ArrayLike,
    upper: ArrayLike,
    level: float,
    *,
    lead: ArrayLike | None = None,
    last: int | None = None,
    confidence: float | None = 0.95,
) -> CoverageBatch:
    """Coverage audits of many series in one loop-free pass over stacked rows.

    ``group`` (n,) holds each row's series key (any sortable values); ``actual``, ``lower``,
    ``upper`` (n,) the scored forecasts; rows of one series are in order of target period (rows of
    different series may interleave). With ``lead`` (n,) each (series, lead) pair is its own entry;
    with ``last`` only each entry's last ``last`` scored forecasts count. Equal, entry by entry, to
    ``audit_coverage`` on that entry's rows. Statistics as in the module docstring.
    ``confidence`` None: no Clopper–Pearson interval (NaN bounds; a pass's findings do not show
    it, and its beta quantiles are a third of the audit's time on a few series).
    """
    _check_probability("level", level)
    if confidence is not None:
        _check_probability("confidence", confidence)
    if last is not None and (isinstance(last, bool) or not isinstance(last, int | np.integer)
                             or last < 1):
        raise ValueError(f"last must be a positive whole number of forecasts, not {last!r}")
    keys = np.asarray(group).ravel()
    x = np.asarray(actual, dtype=np.float64).ravel()
    lo = np.asarray(lower, dtype=np.float64).ravel()
    hi = np.asarray(upper, dtype=np.float64).ravel()
    leads = None if lead is None else np.asarray(lead).ravel()
    n = keys.shape[0]
    for name, array in (("actual", x), ("lower", lo), ("upper", hi), ("lead", leads)):
        if array is not None and array.shape[0] != n:
            raise ValueError(f"{name} has {array.shape[0]} rows, group has {n}")
    scored_row = np.isfinite(x) & np.isfinite(lo) & np.isfinite(hi)
    inverted = np.flatnonzero(scored_row & (lo > hi))
    if inverted.size:
        i = int(inverted[0])
        raise ValueError(f"row {i}: lower bound {lo[i]!r} is above upper bound {hi[i]!r}")

    # Entries are the unique keys (or key-lead pairs) of every row, scored or not, so a series
    # whose forecasts are all unscored still appears with scored = 0.
    group_keys, group_index = np.unique(keys, return_inverse=True)
    entry_lead: NDArray[Any] | None = None
    if leads is None:
        entry_key, entry_index = group_keys, group_index
    else:
        lead_keys, lead_index = np.unique(leads, return_inverse=True)
        pair = group_index.astype(np.int64) * lead_keys.shape[0] + lead_index
        pairs, entry_index = np.unique(pair, return_inverse=True)
        entry_key = group_keys[pairs // lead_keys.shape[0]]
        entry_lead = lead_keys[pairs % lead_keys.shape[0]]
    entries = entry_key.shape[0]

    # Stable sort keeps each entry's rows in the caller's (target-period) order.
    order = np.argsort(entry_index[scored_row], kind="stable")
    rows = np.flatnonzero(scored_row)[order]
    which = entry_index[rows]
    if last is not None and rows.size:
        per_entry = np.bincount(which, minlength=entries)
        starts = np.concatenate(([0], np.cumsum(per_entry)[:-1]))
        position = np.arange(rows.size) - starts[which]
        keep = position >= per_entry[which] - last
        rows, which = rows[keep], which[keep]
    x, lo, hi = x[rows], lo[rows], hi[rows]
    high = x > hi
    low = x < lo
    missed = high | low

    scored = np.bincount(which, minlength=entries).astype(np.int64)
    misses_high = np.bincount(which, weights=high, minlength=entries).astype(np.int64)
    misses_low = np.bincount(which, weights=low, minlength=entries).astype(np.int64)
    misses = misses_high + misses_low
    hits = scored - misses

    same_entry = which[1:] == which[:-1]
    codes = 2 * missed[:-1].astype(np.int64) + missed[1:].astype(np.int64)
    transitions = np.bincount(which[:-1][same_entry] * 4 + codes[same_entry],
                              minlength=4 * entries).reshape(entries, 4).astype(np.int64)
    n00, n01, n10, n11 = (transitions[:, j] for j in range(4))

    miss_rate = 1.0 - level
    has_scored = scored > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        safe_scored = np.where(has_scored, scored, 1)
        hit_rate = np.where(has_scored, hits / safe_scored, np.nan)
        mean_width = np.where(
            has_scored, np.bincount(which, weights=hi - lo, minlength=entries) / safe_scored,
            np.nan)
        score = interval_score(x, lo, hi, level)
        mean_score = np.where(
            has_scored, np.bincount(which, weights=score, minlength=entries) / safe_scored,
            np.nan)
    if confidence is None:
        hit_lower = hit_upper = np.full(entries, np.nan)
    else:
        hit_lower, hit_upper = clopper_pearson_interval(hits, scored, confidence)
    kupiec = kupiec_statistic(misses, scored, miss_rate)
    kupiec_p = np.where(has_scored, chi2_sf(kupiec, 1), np.nan)
    _lr_uc, lr_ind, lr_cc = christoffersen_statistics(n00, n01, n10, n11, miss_rate)
    ordered = scored >= 2
    assessable = ordered & (n00 + n01 > 0) & (n10 + n11 > 0)
    independence = np.where(assessable, lr_ind, np.nan)
    independence_p = np.where(assessable, chi2_sf(lr_ind, 1), np.nan)
    christoffersen = np.where(ordered, lr_cc, np.nan)
    christoffersen_p = np.where(ordered, chi2_sf(lr_cc, 2), np.nan)
    cumulative = miss_probability(misses, scored, level)
    zone = tuple(
        _zone_of(int(m), float(c)) if s > 0 else None
        for m, c, s in zip(misses, cumulative, scored, strict=True)
    )
    return CoverageBatch(
        group=entry_key, lead=entry_lead, nominal=float(level),
        confidence=None if confidence is None else float(confidence),
        window=None if last is None else int(last),
        scored=scored, hits=hits, misses_high=misses_high, misses_low=misses_low,
        n00=n00, n01=n01, n10=n10, n11=n11,
        hit_rate=hit_rate, hit_rate_lower=hit_lower, hit_rate_upper=hit_upper,
        kupiec_statistic=kupiec, kupiec_p_value=kupiec_p,
        independence_statistic=independence, independence_p_value=independence_p,
        christoffersen_statistic=christoffersen, christoffersen_p_value=christoffersen_p,
        miss_probability=cumulative, zone=zone, mean_width=mean_width,
        interval_score=mean_score,
    )


# ---------------------------------------------------------------------------------------------
# Internals


def _uc_statistic(n_hit: FloatArray, n_miss: FloatArray, miss_rate: float) -> FloatArray:
    """Unconditional-coverage LR from hit and miss counts; NaN where both are 0."""
    total = n_hit + n_miss
    loglik_null = n_hit * np.log1p(-miss_rate) + n_miss * np.log(miss_rate)
    statistic = np.maximum(2.0 * (_loglik_at_own_rate(n_hit, n_miss) - loglik_null), 0.0)
    return np.where(total > 0, statistic, np.nan)


def _loglik_at_own_rate(n_hit: FloatArray, n_miss: FloatArray) -> FloatArray:
    """Bernoulli log-likelihood at the observed miss rate, with 0·ln 0 = 0 (0 where no counts)."""
    total = n_hit + n_miss
    safe_total = np.where(total > 0, total, 1.0)
    return special.xlogy(n_hit, n_hit / safe_total) + special.xlogy(n_miss, n_miss / safe_total)


def _zone_of(misses: int, cumulative: float) -> CoverageZone:
    if misses == 0 or cumulative < GREEN_BELOW:
        return CoverageZone.GREEN
    if cumulative < YELLOW_BELOW:
        return CoverageZone.YELLOW
    return CoverageZone.RED


def _optional(value: float | np.floating[Any]) -> float | None:
    number = float(value)
    return None if np.isnan(number) else number


def _plain(value: Any) -> Any:
    return value.item() if isinstance(value, np.generic) else value


def _check_probability(name: str, value: float) -> None:
    if not (isinstance(value, float | int | np.floating) and 0.0 < float(value) < 1.0):
        raise ValueError(f"{name} must be a number strictly between 0 and 1, not {value!r}")


__all__ = [
    "GREEN_BELOW",
    "YELLOW_BELOW",
    "CoverageAudit",
    "CoverageBatch",
    "CoverageZone",
    "audit_batch",
    "audit_by_lead",
    "audit_coverage",
    "audit_last",
    "christoffersen_statistics",
    "clopper_pearson_interval",
    "interval_score",
    "kupiec_statistic",
    "miss_probability",
    "traffic_light_zone",
    "transition_counts",
]
