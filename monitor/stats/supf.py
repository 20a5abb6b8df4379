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
    BatchCusum,
    BatchOlsCusum,
    RecursiveResiduals,
    cusum_from_recursive,
    ols_cusum_from_pass,
    recursive_from_pass,
)
from monitor.stats.critical_values import supf_p_values, supf_table
from monitor.stats.updating import (
    EXACT_REASON,
    BoolArray,
    FloatArray,
    IntArray,
    Prepared,
    QrPass,
    is_exact_fit,
    least_squares_pass,
    prepare,
    rank_reason,
)

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
    f_window: FloatArray  # (m, s): F of the splits whose new regime starts at rows start … +m
    f_window_start: int
    f_shape: tuple[int, int]
    restrictions: int
    trimming: float
    applicable: BoolArray
    reason: list[str | None]

    @property
    def f_statistics(self) -> FloatArray:
        """(s, n): F of the split whose new regime starts at each row; NaN at non-candidates."""
        s, n = self.f_shape
        out = np.full((s, n), np.nan)
        m = self.f_window.shape[0]
        out[:, self.f_window_start : self.f_window_start + m] = self.f_window.T
        out[~self.applicable] = np.nan
        return out

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


@dataclass(frozen=True, eq=False)
class _Scan:
    statistic: FloatArray  # (s,) F at the best split (NaN where none)
    best_unrestricted: FloatArray  # (s,) RSS₁ + RSS₂ there (scaled units)
    candidates: IntArray  # (s,)
    break_index: IntArray  # (s,) first row of the new regime at the best split
    first_rows: IntArray  # (s,) used rows before it
    f_window: FloatArray  # (m, s)
    f_window_start: int


def _f_form(
    rss_total: FloatArray, unrestricted: FloatArray, p: int, df_denominator: FloatArray
) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        explained = np.maximum(rss_total - unrestricted, 0.0)
        return np.asarray((explained / max(p, 1)) / (unrestricted / df_denominator))


def _scan(
    prep: Prepared,
    forward: QrPass,
    backward: QrPass,
    lo: IntArray,
    hi: IntArray,
    rss_total: FloatArray,
    df_denominator: FloatArray,
) -> _Scan:
    """Every candidate split's RSS₁ + RSS₂ from the two passes; the best split per series.

    Forward entry t covers the used rows 0 … t. Backward entry u covers rows n − 1 − u … n − 1,
    so the rows after t are backward entry n − 2 − t. Split "after row t" is a candidate when
    the first regime holds lo … hi used rows and both regimes have full rank.
    """
    p = prep.p
    s, n = prep.used.shape
    columns = np.arange(s)
    after = backward.rss[::-1]  # entry t: rows t … n − 1
    after_rank = backward.rank[::-1]
    if bool(prep.used.all()) and n > 1:
        # Every series has the same rows, so the same window of split rows t = lo − 1 … hi − 1.
        first_t, last_t = int(lo[0]) - 1, int(hi[0]) - 1
        if first_t > last_t:
            empty = np.zeros(s, dtype=np.int64)
            return _Scan(np.full(s, np.nan), np.ones(s), empty, empty - 1, empty - 1,
                         np.zeros((0, s)), 0)  # fmt: skip
        window = slice(first_t, last_t + 1)
        later = slice(first_t + 1, last_t + 2)
        ok = (forward.rank[window] == p) & (after_rank[later] == p)
        unrestricted = forward.rss[window] + after[later]
        unrestricted[~ok] = np.inf
        best = np.argmin(unrestricted, axis=0)
        best_unrestricted = unrestricted[best, columns]
        f_window = _f_form(rss_total, unrestricted, p, df_denominator)
        f_window[~ok] = np.nan
        return _Scan(
            statistic=_f_form(rss_total, best_unrestricted, p, df_denominator),
            best_unrestricted=best_unrestricted,
            candidates=ok.sum(axis=0).astype(np.int64),
            break_index=(best + first_t + 1).astype(np.int64),
            first_rows=(best + first_t + 1).astype(np.int64),
            f_window=f_window,
            f_window_start=first_t + 1,
        )
    # Rows differ between series (a mask): the general form over all rows.
    used_t = prep.used.T
    counts = np.cumsum(used_t, axis=0)
    after_rss = np.zeros((n, s))
    after_rk = np.zeros((n, s), dtype=np.int64)
    if n > 1:
        after_rss[:-1] = after[1:]
        after_rk[:-1] = after_rank[1:]
    candidate = used_t & (counts >= lo) & (counts <= hi) & (forward.rank == p) & (after_rk == p)
    unrestricted = np.where(candidate, forward.rss + after_rss, np.inf)
    best = np.argmin(unrestricted, axis=0) if n else np.zeros(s, dtype=np.int64)
    best_unrestricted = unrestricted[best, columns] if n else np.ones(s)
    index = np.where(used_t, np.arange(n)[:, None], n)
    next_used = np.minimum.accumulate(index[::-1], axis=0)[::-1]
    next_after = np.full((n, s), n, dtype=np.int64)
    if n > 1:
        next_after[:-1] = next_used[1:]
    f_values = _f_form(rss_total, unrestricted, p, df_denominator)
    f_by_start = np.full((n, s), np.nan)
    rows_t, cols_i = np.nonzero(candidate)
    f_by_start[next_after[rows_t, cols_i], cols_i] = f_values[rows_t, cols_i]
    return _Scan(
        statistic=_f_form(rss_total, best_unrestricted, p, df_denominator),
        best_unrestricted=best_unrestricted,
        candidates=candidate.sum(axis=0).astype(np.int64),
        break_index=next_after[best, columns] if n else np.full(s, -1),
        first_rows=counts[best, columns] if n else np.full(s, -1),
        f_window=f_by_start,
        f_window_start=0,
    )


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
    0.15 and up to the table's number of restrictions (24); otherwise ``p_value`` is NaN and
    ``p_value_note`` says why.
    """
    prep = prepare(x, y, mask, intercept=intercept, names=names)
    return sup_f_from_pass(prep, least_squares_pass(prep.rows, prep.p), trimming)


def sup_f_from_pass(prep: Prepared, forward: QrPass, trimming: float) -> BatchSupF:
    """sup-F (see ``sup_f_test``) from prepared series and their forward pass."""
    if not 0.0 < trimming < 0.5:
        raise ValueError(f"trimming must be in (0, 0.5); got {trimming}")
    p = prep.p
    s, n = prep.used.shape
    backward = least_squares_pass(prep.rows[::-1], p)  # a reversed view, no copy
    rss_total = forward.rss[-1] if n else np.zeros(s)
    final_rank = forward.rank[-1] if n else np.zeros(s, dtype=np.int64)
    lo = np.maximum(np.floor(trimming * prep.n_used + 1e-9).astype(np.int64), p + 1)
    hi = prep.n_used - lo
    df_denominator = np.maximum(prep.n_used - 2 * p, 1).astype(np.float64)
    scan = _scan(prep, forward, backward, lo, hi, rss_total, df_denominator)
    best_unrestricted = scan.best_unrestricted
    n_candidates = scan.candidates
    statistic = scan.statistic

    reason = list(prep.reason)
    exact_total = is_exact_fit(rss_total, prep.n_used)
    exact_split = (n_candidates > 0) & is_exact_fit(best_unrestricted, prep.n_used)
    suspect = (
        (prep.n_used - 2 * p < 1)
        | (final_rank < p)
        | (lo > hi)
        | (n_candidates == 0)
        | exact_total
        | exact_split
    )
    for i in map(int, np.flatnonzero(suspect)):
        if reason[i] is not None:
            continue
        m = int(prep.n_used[i])
        if m - 2 * p < 1:
            reason[i] = f"{m} rows used; sup-F with {p} coefficient(s) needs at least {2 * p + 1}"
        elif final_rank[i] < p:
            reason[i] = rank_reason(prep, forward, i)
        elif lo[i] > hi[i]:
            reason[i] = (
                f"{m} rows are too few for {trimming:.0%} trimming with {p} coefficient(s): "
                f"each regime needs at least {lo[i]} rows"
            )
        elif exact_total[i]:
            reason[i] = EXACT_REASON
        elif n_candidates[i] == 0:
            reason[i] = "no candidate split leaves both regimes with every coefficient determined"
        else:
            row = int(scan.break_index[i])
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
    elif applicable.any():
        found, found_bounds = supf_p_values(statistic[applicable] * p, p, trimming)
        p_values[applicable] = found
        for i, bound in zip(map(int, np.flatnonzero(applicable)), found_bounds, strict=True):
            bounds[i] = bound

    break_index = np.where(applicable, scan.break_index, -1)
    first_rows = np.where(applicable, scan.first_rows, -1)
    return BatchSupF(
        statistic=np.where(applicable, statistic, np.nan),
        p_value=np.where(applicable, p_values, np.nan),
        p_value_bound=bounds,
        p_value_note=note,
        break_index=np.asarray(break_index, dtype=np.int64),
        first_regime_rows=np.asarray(first_rows, dtype=np.int64),
        candidates=n_candidates,
        f_window=scan.f_window,
        f_window_start=scan.f_window_start,
        f_shape=(s, n),
        restrictions=p,
        trimming=trimming,
        applicable=applicable,
        reason=reason,
    )


@dataclass(frozen=True, eq=False)
class BreakTests:
    """All retrospective change tests of s series from one shared forward pass."""

    recursive: RecursiveResiduals
    cusum: BatchCusum
    ols_cusum: BatchOlsCusum
    sup_f: BatchSupF


def break_tests(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    trimming: float = DEFAULT_TRIMMING,
    names: Sequence[str] | None = None,
) -> BreakTests:
    """Recursive residuals, BDE CUSUM, OLS-CUSUM and sup-F in one go (shapes as ``sup_f_test``).

    The same results as calling each test alone, with the preparation and the forward
    updating pass done once for all four.
    """
    prep = prepare(x, y, mask, intercept=intercept, names=names)
    forward = least_squares_pass(prep.rows, prep.p)
    recursive = recursive_from_pass(prep, forward)
    return BreakTests(
        recursive=recursive,
        cusum=cusum_from_recursive(recursive),
        ols_cusum=ols_cusum_from_pass(prep, forward),
        sup_f=sup_f_from_pass(prep, forward, trimming),
    )


__all__ = [
    "DEFAULT_TRIMMING",
    "BatchSupF",
    "BreakTests",
    "SupFResult",
    "break_tests",
    "sup_f_from_pass",
    "sup_f_test",
    "trimmed_range",
]
