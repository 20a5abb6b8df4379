"""Change between two known windows: the Chow test and the per-coefficient shift test.

Inputs as in ``monitor.stats.change``: x (n, k) / (s, n, k) predictors without an intercept
column (or None), y (n,) / (s, n), optional masks (s, n); or, for the forms the monitoring pass
feeds from its own fits, plain arrays of estimates, standard errors, residual sums of squares and
row counts with a leading series axis.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from monitor.stats._dist import f_sf, t_sf
from monitor.stats.updating import (
    BoolArray,
    FloatArray,
    IntArray,
    Prepared,
    QrPass,
    least_squares_pass,
    prepare,
    rank_reason,
)


@dataclass(frozen=True)
class ChowResult:
    """Chow test of one series: ``form`` is "two-sample" or "predictive"; ``df`` (num, den)."""

    applicable: bool
    reason: str | None
    statistic: float | None
    p_value: float | None
    df: tuple[int, int] | None
    form: str | None


@dataclass(frozen=True, eq=False)
class BatchChow:
    """Chow tests of s series: (s,) arrays, NaN / 0 where not applicable."""

    statistic: FloatArray
    p_value: FloatArray
    df_numerator: IntArray
    df_denominator: IntArray
    predictive: BoolArray
    applicable: BoolArray
    reason: list[str | None]

    def series(self, i: int) -> ChowResult:
        """The result of series ``i``."""
        if not self.applicable[i]:
            return ChowResult(False, self.reason[i], None, None, None, None)
        return ChowResult(
            applicable=True,
            reason=None,
            statistic=float(self.statistic[i]),
            p_value=float(self.p_value[i]),
            df=(int(self.df_numerator[i]), int(self.df_denominator[i])),
            form="predictive" if self.predictive[i] else "two-sample",
        )


def chow_from_rss(
    rss_pooled: ArrayLike,
    rss_first: ArrayLike,
    rss_second: ArrayLike,
    n_first: ArrayLike,
    n_second: ArrayLike,
    p: int,
) -> BatchChow:
    """Chow (1960) F from residual sums of squares; arrays (s,) or scalars (broadcast).

    Both sub-samples with more than p rows: F = [(S_R − S_1 − S_2)/p] / [(S_1 + S_2)/(n_1 + n_2
    − 2p)] on (p, n_1 + n_2 − 2p) degrees of freedom. One sub-sample with p rows or fewer (its
    own fit is not determined): Chow's predictive form with the other as the base, F =
    [(S_R − S_base)/n_short] / [S_base/(n_base − p)] on (n_short, n_base − p); its own RSS is
    ignored. S_R is the RSS of the pooled fit; p counts all coefficients, intercept included.
    """
    pooled, first, second, n1, n2 = np.broadcast_arrays(
        np.asarray(rss_pooled, dtype=np.float64),
        np.asarray(rss_first, dtype=np.float64),
        np.asarray(rss_second, dtype=np.float64),
        np.asarray(n_first, dtype=np.int64),
        np.asarray(n_second, dtype=np.int64),
    )
    pooled, first, second = (np.atleast_1d(a) for a in (pooled, first, second))
    n1, n2 = (np.atleast_1d(a) for a in (n1, n2))
    s = pooled.shape[0]
    two_sample = (n1 > p) & (n2 > p)
    first_is_base = ~two_sample & (n1 > p) & (n2 >= 1)
    second_is_base = ~two_sample & ~first_is_base & (n2 > p) & (n1 >= 1)
    predictive = first_is_base | second_is_base
    base_rss = np.where(first_is_base, first, second)
    base_n = np.where(first_is_base, n1, n2)
    short_n = np.where(first_is_base, n2, n1)
    unrestricted = np.where(two_sample, first + second, base_rss)
    df_num = np.where(two_sample, p, short_n).astype(np.int64)
    df_den = np.where(two_sample, n1 + n2 - 2 * p, base_n - p).astype(np.int64)
    reason: list[str | None] = [None] * s
    scale = np.maximum(np.maximum(pooled, 0.0), np.finfo(float).tiny)
    for i in range(s):
        if not (two_sample[i] or predictive[i]):
            reason[i] = (
                f"windows of {n1[i]} and {n2[i]} rows; the Chow test needs one with more than "
                f"{p} (the number of coefficients) and the other non-empty"
            )
        elif not math.isfinite(pooled[i]) or pooled[i] <= 0:
            reason[i] = "the pooled fit is exact (residual sum of squares zero), so no scale"
        elif unrestricted[i] <= 1e-20 * scale[i]:
            reason[i] = (
                "both windows fit exactly while the pooled fit does not, so F is infinite: "
                "the relationship differs between them without noise"
            )
        elif df_den[i] < 1:
            reason[i] = "no residual degrees of freedom left in the denominator"
    applicable = np.array([why is None for why in reason], dtype=bool)
    safe_unrestricted = np.where(applicable, unrestricted, 1.0)
    safe_den = np.where(applicable, df_den, 1).astype(np.float64)
    safe_num = np.where(applicable, df_num, 1).astype(np.float64)
    f = (np.maximum(pooled - unrestricted, 0.0) / safe_num) / (safe_unrestricted / safe_den)
    p_value = f_sf(f, safe_num, safe_den)
    return BatchChow(
        statistic=np.where(applicable, f, np.nan),
        p_value=np.where(applicable, p_value, np.nan),
        df_numerator=np.where(applicable, df_num, 0),
        df_denominator=np.where(applicable, df_den, 0),
        predictive=predictive & applicable,
        applicable=applicable,
        reason=reason,
    )


@dataclass(frozen=True, eq=False)
class WindowFit:
    """Least-squares fit of s windows in original units (internal to the raw-window forms)."""

    prep: Prepared
    qr: QrPass
    rss: FloatArray  # (s,)
    coef: FloatArray  # (s, p)
    standard_error: FloatArray  # (s, p), NaN where not determined
    residual_df: IntArray  # (s,)
    full_rank: BoolArray  # (s,)


def fit_windows(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None,
    *,
    intercept: bool,
    names: Sequence[str] | None,
) -> WindowFit:
    """Fit every window by the same updating pass the change tests use; no refit loops."""
    prep = prepare(x, y, mask, intercept=intercept, names=names)
    qr = least_squares_pass(prep.rows, prep.p)
    s, n = prep.used.shape
    final_rank = qr.rank[-1] if n else np.zeros(s, dtype=np.int64)
    full = (final_rank == prep.p) & np.array([why is None for why in prep.reason])
    rss = (qr.rss[-1] if n else np.zeros(s)) * prep.y_scale**2
    basis = prep.basis
    coef = prep.y_scale[:, None] * np.einsum("sij,sj->si", basis, qr.coef)
    if prep.intercept:
        coef[:, 0] += prep.y_centre
    cov = np.einsum("sij,sjk,slk->sil", basis, qr.cov, basis)
    df = (prep.n_used - prep.p).astype(np.int64)
    variance = np.where(df > 0, rss / np.maximum(df, 1), np.nan)
    diag = np.diagonal(cov, axis1=1, axis2=2)
    se = np.sqrt(np.maximum(variance[:, None] * diag, 0.0))
    se = np.where(full[:, None] & (df[:, None] > 0), se, np.nan)
    return WindowFit(prep, qr, rss, coef, se, df, full)


def chow_test(
    x_first: ArrayLike | None,
    y_first: ArrayLike,
    x_second: ArrayLike | None,
    y_second: ArrayLike,
    *,
    intercept: bool = True,
    mask_first: ArrayLike | None = None,
    mask_second: ArrayLike | None = None,
    names: Sequence[str] | None = None,
) -> BatchChow:
    """Chow (1960) test that two windows share all coefficients (see ``chow_from_rss``).

    x_first (n₁, k) / (s, n₁, k), y_first (n₁,) / (s, n₁), likewise the second window; the
    pooled fit uses the rows of both. A window whose design is rank-deficient makes the
    two-sample form not applicable (its reason names the column).
    """
    first = fit_windows(x_first, y_first, mask_first, intercept=intercept, names=names)
    second = fit_windows(x_second, y_second, mask_second, intercept=intercept, names=names)
    k = first.prep.p - (1 if intercept else 0)
    s = first.prep.used.shape[0]

    def stacked(x: ArrayLike | None, y: ArrayLike) -> tuple[FloatArray, FloatArray]:
        y_arr = np.asarray(y, dtype=np.float64).reshape(s, -1)
        if x is None or k == 0:
            return np.zeros((s, y_arr.shape[1], 0)), y_arr
        return np.asarray(x, dtype=np.float64).reshape(s, y_arr.shape[1], k), y_arr

    x1, y1 = stacked(x_first, y_first)
    x2, y2 = stacked(x_second, y_second)
    pooled_mask = np.concatenate([first.prep.used, second.prep.used], axis=1)
    pooled = fit_windows(
        np.concatenate([x1, x2], axis=1),
        np.concatenate([y1, y2], axis=1),
        pooled_mask,
        intercept=intercept,
        names=names,
    )
    result = chow_from_rss(
        pooled.rss, first.rss, second.rss, first.prep.n_used, second.prep.n_used, first.prep.p
    )
    reason = list(result.reason)
    p = first.prep.p
    for i in range(s):
        problem = first.prep.reason[i] or second.prep.reason[i]
        if problem is None and not pooled.full_rank[i]:
            problem = rank_reason(pooled.prep, pooled.qr, i)
        if problem is None and not result.predictive[i]:
            for label, window in (("first", first), ("second", second)):
                if window.prep.n_used[i] > p and not window.full_rank[i]:
                    problem = f"{label} window: " + rank_reason(window.prep, window.qr, i)
                    break
        if problem is not None:
            reason[i] = problem
    applicable = np.array([why is None for why in reason], dtype=bool)
    return BatchChow(
        statistic=np.where(applicable, result.statistic, np.nan),
        p_value=np.where(applicable, result.p_value, np.nan),
        df_numerator=np.where(applicable, result.df_numerator, 0),
        df_denominator=np.where(applicable, result.df_denominator, 0),
        predictive=result.predictive & applicable,
        applicable=applicable,
        reason=reason,
    )


def chow_test_at(
    x: ArrayLike | None,
    y: ArrayLike,
    split: int,
    *,
    intercept: bool = True,
    names: Sequence[str] | None = None,
) -> BatchChow:
    """Chow test with the second sub-sample starting at row ``split`` (0-based) of every series."""
    y_arr = np.asarray(y, dtype=np.float64)
    single = y_arr.ndim == 1
    y_arr = y_arr[None, :] if single else y_arr
    s, n = y_arr.shape
    if not 0 < split < n:
        raise ValueError(f"split must be between 1 and {n - 1}; got {split}")
    x_arr = None if x is None else np.asarray(x, dtype=np.float64).reshape(s, n, -1)
    return chow_test(
        None if x_arr is None else x_arr[:, :split],
        y_arr[:, :split],
        None if x_arr is None else x_arr[:, split:],
        y_arr[:, split:],
        intercept=intercept,
        names=names,
    )


@dataclass(frozen=True)
class CoefficientShift:
    """Shift of one coefficient between the baseline and the recent window."""

    term: str
    difference: float | None
    standard_error: float | None
    t: float | None
    df: float | None
    p_value: float | None


@dataclass(frozen=True, eq=False)
class BatchSlopeShift:
    """Per-coefficient shift tests of s series: arrays (s, c), NaN where not applicable."""

    terms: tuple[str, ...]
    difference: FloatArray
    standard_error: FloatArray
    t: FloatArray
    df: FloatArray
    p_value: FloatArray
    applicable: BoolArray  # (s, c)

    def series(self, i: int) -> list[CoefficientShift]:
        """The tests of series ``i``, one per coefficient, None where not applicable."""
        out: list[CoefficientShift] = []
        for j, term in enumerate(self.terms):
            if not self.applicable[i, j]:
                out.append(CoefficientShift(term, None, None, None, None, None))
                continue
            out.append(
                CoefficientShift(
                    term,
                    float(self.difference[i, j]),
                    float(self.standard_error[i, j]),
                    float(self.t[i, j]),
                    float(self.df[i, j]),
                    float(self.p_value[i, j]),
                )
            )
        return out


def slope_shift(
    estimate_base: ArrayLike,
    standard_error_base: ArrayLike,
    df_base: ArrayLike,
    estimate_recent: ArrayLike,
    standard_error_recent: ArrayLike,
    df_recent: ArrayLike,
    *,
    terms: Sequence[str] | None = None,
) -> BatchSlopeShift:
    """t = (b_recent − b_base) / √(SE_base² + SE_recent²) per coefficient, two-sided p-value.

    Estimates and standard errors (s, c) or (c,); residual degrees of freedom (s,) or scalars.
    The windows must not overlap, so the two estimates are independent. Each SE² is an
    error-variance estimate times a constant, a scaled χ² on its window's df, so the combined
    variance is a sum of two scaled χ² with different scales: its distribution is approximated by
    one scaled χ² with the Welch–Satterthwaite df ν = (SE_b² + SE_r²)² / (SE_b⁴/df_b +
    SE_r⁴/df_r) (Satterthwaite 1946; Welch 1947), and t is referred to Student's t on ν. This
    keeps the test honest for short windows, where the normal would reject too often, and tends
    to the normal as both windows grow. Not applicable where the combined SE is zero or not
    finite, or a df is below 1.
    """
    b0 = np.atleast_2d(np.asarray(estimate_base, dtype=np.float64))
    se0 = np.atleast_2d(np.asarray(standard_error_base, dtype=np.float64))
    b1 = np.atleast_2d(np.asarray(estimate_recent, dtype=np.float64))
    se1 = np.atleast_2d(np.asarray(standard_error_recent, dtype=np.float64))
    s, c = b0.shape
    df0 = np.broadcast_to(np.asarray(df_base, dtype=np.float64).reshape(-1, 1), (s, c))
    df1 = np.broadcast_to(np.asarray(df_recent, dtype=np.float64).reshape(-1, 1), (s, c))
    names = tuple(terms) if terms is not None else tuple(f"b{j}" for j in range(c))
    difference = b1 - b0
    variance = se0**2 + se1**2
    combined = np.sqrt(variance)
    ok = (
        np.isfinite(difference)
        & np.isfinite(combined)
        & (combined > 0)
        & (df0 >= 1)
        & (df1 >= 1)
    )
    safe_combined = np.where(ok, combined, 1.0)
    t = difference / safe_combined
    quartic = se0**4 / np.where(ok, df0, 1.0) + se1**4 / np.where(ok, df1, 1.0)
    nu = np.where(ok, variance**2 / np.where(quartic > 0, quartic, 1.0), 1.0)
    p_value = 2.0 * t_sf(np.abs(t), nu)
    nan = np.nan
    return BatchSlopeShift(
        terms=names,
        difference=np.where(ok, difference, nan),
        standard_error=np.where(ok, combined, nan),
        t=np.where(ok, t, nan),
        df=np.where(ok, nu, nan),
        p_value=np.where(ok, p_value, nan),
        applicable=ok,
    )


@dataclass(frozen=True, eq=False)
class BatchShiftTest:
    """Slope-shift tests from raw windows: per-coefficient tests and the joint Chow F."""

    coefficients: BatchSlopeShift
    joint: BatchChow
    base_coef: FloatArray  # (s, p)
    recent_coef: FloatArray  # (s, p)


def slope_shift_test(
    x_base: ArrayLike | None,
    y_base: ArrayLike,
    x_recent: ArrayLike | None,
    y_recent: ArrayLike,
    *,
    intercept: bool = True,
    mask_base: ArrayLike | None = None,
    mask_recent: ArrayLike | None = None,
    names: Sequence[str] | None = None,
) -> BatchShiftTest:
    """The slope-shift test of DESIGN section 4 from raw windows (see ``slope_shift``).

    Fits both windows (x (n, k) / (s, n, k), y (n,) / (s, n)), tests every coefficient (the
    intercept first when present; the slopes are ``terms[1:]``) and adds the joint Chow F test
    that all coefficients are equal in the two windows (``chow_test``).
    """
    base = fit_windows(x_base, y_base, mask_base, intercept=intercept, names=names)
    recent = fit_windows(x_recent, y_recent, mask_recent, intercept=intercept, names=names)
    coefficients = slope_shift(
        np.where(base.full_rank[:, None], base.coef, np.nan),
        base.standard_error,
        base.residual_df,
        np.where(recent.full_rank[:, None], recent.coef, np.nan),
        recent.standard_error,
        recent.residual_df,
        terms=base.prep.terms,
    )
    joint = chow_test(
        x_base,
        y_base,
        x_recent,
        y_recent,
        intercept=intercept,
        mask_first=mask_base,
        mask_second=mask_recent,
        names=names,
    )
    return BatchShiftTest(coefficients, joint, base.coef, recent.coef)


__all__ = [
    "BatchChow",
    "BatchShiftTest",
    "BatchSlopeShift",
    "ChowResult",
    "CoefficientShift",
    "chow_from_rss",
    "chow_test",
    "chow_test_at",
    "slope_shift",
    "slope_shift_test",
]
