"""sup-F test for one break at an unknown period (Andrews 1993), batched over series.

Inputs as in ``monitor.stats.change``: x (n, k) / (s, n, k) predictors without an intercept
column (or None), y (n,) / (s, n), optional mask (s, n).

Definition used (one series, n used rows, p coefficients, all of which may shift):

- a candidate split puts the first j used rows in regime 1 and the rest in regime 2, for
  j = lo … n − lo with lo = max(⌊trimming·n⌋, p + 1), so each regime keeps at least one residual
  degree of freedom (for the Nile series, n = 100, p = 1: j = 15 … 85, 71 candidates);
- F_j = ((RSS₀ − RSS₁(j) − RSS₂(j)) / p) / ((RSS₁(j) + RSS₂(j)) / (n − 2p)), the Chow F of that
  split, where RSS₀ is the full-sample residual sum of squares and RSS₁(j), RSS₂(j) those of
  the two regimes;
- sup-F = max_j F_j; the estimated break is the j that minimises RSS₁(j) + RSS₂(j) (the same j);
  ``break_index`` is the 0-based row index of the first row of regime 2 (for the Nile series
  j = 28: regime 1 is 1871–1898, ``break_index`` 28 is the row of 1899);
- the p-value compares the Wald form p·sup-F with the simulated null limit of Andrews (1993)
  (``monitor.stats.critical_values.supf_p_value``), which Andrews (2003) tabulates in that form.

RSS₁(j) for every j comes from one forward pass of recursive residuals (RSS of the first j rows
= Σ_{i≤j} w_i², Brown, Durbin & Evans 1975) and RSS₂(j) from one backward pass, so the scan costs
two O(n·p²) passes per series, never a refit per candidate.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from monitor.stats.change import (
    BoolArray,
    FloatArray,
    IntArray,
    is_exact_fit,
    least_squares_pass,
    prepare,
    rank_reason,
)
from monitor.stats.critical_values import supf_p_value, supf_table

DEFAULT_TRIMMING = 0.15


@dataclass(frozen=True)
class SupFResult:
    """sup-F test of one series.

    ``statistic`` sup-F (F form); ``wald`` = p·statistic, the form the p-value table uses;
    ``p_value`` with ``p_value_bound`` "below" (the true p-value is below the reported 0.001),
    "above" (above the reported 0.999) or None; ``p_value_note`` says why a p-value is missing.
    ``break_index`` is the 0-based row index of the first row of the new regime;
    ``first_regime_rows`` the number of used rows before it. ``restrictions`` = p.
    ``candidates`` the number of splits scanned.
    """

    applicable: bool
    reason: str | None
    statistic: float | None
    wald: float | None
    p_value: float | None
    p_value_bound: str | None
    p_value_note: str | None
    break_index: int | None
    first_regime_rows: int | None
    restrictions: int
    candidates: int
    trimming: float


@dataclass(frozen=True, eq=False)
class BatchSupF:
    """sup-F tests of s series: (s,) arrays (NaN / −1 where not applicable or not available).

    ``f_statistics`` (s, n): F of the split whose new regime starts at that row, NaN at rows
    that are no candidate.
    """

    statistic: FloatArray
    p_value: FloatArray
    p_value_bound: list[str | None]
    p_value_note: str | None
    break_index: IntArray
    first_regime_rows: IntArray
    candidates: IntArray
    f_statistics: FloatArray
    restrictions: int
    trimming: float
    applicable: BoolArray
    reason: list[str | None]

    def series(self, i: int) -> SupFResult:
        """The result of series ``i`` with None for what is not applicable."""
        if not self.applicable[i]:
            return SupFResult(
                False, self.reason[i], None, None, None, None, None, None, None,
                self.restrictions, int(self.candidates[i]), self.trimming,
            )  # fmt: skip
        p_value = float(self.p_value[i])
        has_p = math.isfinite(p_value)
        return SupFResult(
            applicable=True,
            reason=None,
            statistic=float(self.statistic[i]),
            wald=float(self.statistic[i]) * self.restrictions,
            p_value=p_value if has_p else None,
            p_value_bound=self.p_value_bound[i] if has_p else None,
            p_value_note=None if has_p else self.p_value_note,
            break_index=int(self.break_index[i]),
            first_regime_rows=int(self.first_regime_rows[i]),
            restrictions=self.restrictions,
            candidates=int(self.candidates[i]),
            trimming=self.trimming,
        )


def trimmed_range(n_used: int, p: int, trimming: float) -> tuple[int, int]:
    """(lo, hi): the sizes j of the first regime scanned, lo = max(⌊trimming·n⌋, p + 1)."""
    lo = max(math.floor(trimming * n_used + 1e-9), p + 1)
    return lo, n_used - lo


def sup_f_test(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    trimming: float = DEFAULT_TRIMMING,
    names: Sequence[str] | None = None,
) -> BatchSupF:
    """sup-F over all candidate break periods, its p-value and the estimated break.

    Andrews (1993) with the critical values as corrected in Andrews (2003); see the module
    docstring for the exact F form, the scanned range and what ``break_index`` means.
    x (n, k) / (s, n, k) or None, y (n,) / (s, n), mask (s, n). p-values exist for trimming
    0.15 and up to the table's number of restrictions (10); otherwise ``p_value`` is NaN and
    ``p_value_note`` says why.
    """
    if not 0.0 < trimming < 0.5:
        raise ValueError(f"trimming must be in (0, 0.5); got {trimming}")
    prep = prepare(x, y, mask, intercept=intercept, names=names)
    p = prep.p
    s, n = prep.used.shape
    forward = least_squares_pass(prep.rows, p)
    backward = least_squares_pass(np.ascontiguousarray(prep.rows[::-1]), p)
    fwd_rss = forward.rss.T  # (s, n): used rows 0..t
    fwd_rank = forward.rank.T
    # Backward pass on reversed rows: entry t covers rows t..n-1; shift so column t covers t+1..
    bwd_rss_from = backward.rss[::-1].T
    bwd_rank_from = backward.rank[::-1].T
    bwd_rss_after = np.zeros((s, n))
    bwd_rank_after = np.zeros((s, n), dtype=np.int64)
    if n > 1:
        bwd_rss_after[:, :-1] = bwd_rss_from[:, 1:]
        bwd_rank_after[:, :-1] = bwd_rank_from[:, 1:]
    counts = np.cumsum(prep.used, axis=1)
    rss_total = fwd_rss[:, -1] if n else np.zeros(s)
    final_rank = fwd_rank[:, -1] if n else np.zeros(s, dtype=np.int64)

    lo = np.array([trimmed_range(int(m), p, trimming)[0] for m in prep.n_used])
    hi = prep.n_used - lo
    candidate = (
        prep.used
        & (counts >= lo[:, None])
        & (counts <= hi[:, None])
        & (fwd_rank == p)
        & (bwd_rank_after == p)
    )
    unrestricted = fwd_rss + bwd_rss_after
    df_denominator = (prep.n_used - 2 * p).astype(np.float64)
    safe_unrestricted = np.where(candidate & (unrestricted > 0), unrestricted, 1.0)
    f_values = (np.maximum(rss_total[:, None] - unrestricted, 0.0) / max(p, 1)) / (
        safe_unrestricted / np.maximum(df_denominator, 1.0)[:, None]
    )
    f_values = np.where(candidate, f_values, -np.inf)
    best_last = np.argmax(f_values, axis=1)  # row t ending regime 1 at the best split
    statistic = f_values[np.arange(s), best_last] if n else np.zeros(s)
    n_candidates = candidate.sum(axis=1).astype(np.int64)

    # First used row after each split: the first row of the new regime.
    index = np.where(prep.used, np.arange(n)[None, :], n)
    next_used = np.minimum.accumulate(index[:, ::-1], axis=1)[:, ::-1]
    next_after = np.full((s, n), n, dtype=np.int64)
    if n > 1:
        next_after[:, :-1] = next_used[:, 1:]

    reason = list(prep.reason)
    exact_total = is_exact_fit(rss_total, prep.n_used)
    exact_split = is_exact_fit(
        np.where(n_candidates > 0, unrestricted[np.arange(s), best_last] if n else 0.0, 1.0),
        prep.n_used,
    )
    for i in range(s):
        if reason[i] is not None:
            continue
        m = int(prep.n_used[i])
        if m - 2 * p < 1:
            reason[i] = (
                f"{m} rows used; sup-F with {p} coefficient(s) needs at least {2 * p + 1}"
            )
        elif final_rank[i] < p:
            reason[i] = rank_reason(prep, forward, i)
        elif lo[i] > hi[i]:
            reason[i] = (
                f"{m} rows are too few for {trimming:.0%} trimming with {p} coefficient(s): "
                f"each regime needs at least {lo[i]} rows"
            )
        elif n_candidates[i] == 0:
            reason[i] = "no candidate split leaves both regimes with every coefficient determined"
        elif exact_total[i]:
            reason[i] = "the fit is exact (residuals are zero to rounding), so there is no scale"
        elif exact_split[i]:
            row = int(next_after[i, best_last[i]])
            reason[i] = (
                f"both regimes fit exactly when the new regime starts at row {row}, so F is "
                "infinite: the series changes there without noise"
            )
    applicable = np.array([why is None for why in reason], dtype=bool)

    table = supf_table()
    note: str | None = None
    p_values = np.full(s, np.nan)
    bounds: list[str | None] = [None] * s
    if abs(trimming - table.trimming) > 1e-12:
        note = f"the p-value table is for {table.trimming:.0%} trimming only"
    elif p not in table.quantiles:
        note = f"the p-value table covers 1 to {table.max_restrictions} coefficients, not {p}"
    else:
        for i in map(int, np.flatnonzero(applicable)):
            value = supf_p_value(float(statistic[i]) * p, p, trimming)
            p_values[i] = value.p_value
            bounds[i] = value.bound

    f_by_start = np.full((s, n), np.nan)
    rows_i, cols_t = np.nonzero(candidate & applicable[:, None])
    f_by_start[rows_i, next_after[rows_i, cols_t]] = f_values[rows_i, cols_t]
    break_index = np.where(applicable, next_after[np.arange(s), best_last], -1) if n else (
        np.full(s, -1)
    )
    first_rows = np.where(applicable, counts[np.arange(s), best_last], -1) if n else (
        np.full(s, -1)
    )
    return BatchSupF(
        statistic=np.where(applicable, statistic, np.nan),
        p_value=np.where(applicable, p_values, np.nan),
        p_value_bound=[b if ok else None for b, ok in zip(bounds, applicable, strict=True)],
        p_value_note=note,
        break_index=np.asarray(break_index, dtype=np.int64),
        first_regime_rows=np.asarray(first_rows, dtype=np.int64),
        candidates=n_candidates,
        f_statistics=f_by_start,
        restrictions=p,
        trimming=trimming,
        applicable=applicable,
        reason=reason,
    )


__all__ = ["DEFAULT_TRIMMING", "BatchSupF", "SupFResult", "sup_f_test", "trimmed_range"]
