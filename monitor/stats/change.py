"""Retrospective tests for a change in a regression relationship, batched over series.

Inputs are plain arrays. ``x`` holds the predictors *without* an intercept column: (n, k) for one
series or (s, n, k) for s series (k may be 0, or ``x`` None, for a mean-only model); ``y`` is (n,)
or (s, n); an optional ``mask`` (s, n) marks the rows used (True). With ``intercept=True`` a column
of ones is put first, so each series has p = k + 1 coefficients (p = k without it). A single
series is handled as a batch of one. Rows are taken in the order given: the time order.

API (all results are frozen dataclasses; ``Batch*`` ones hold arrays with a leading series axis
and give one series' result with ``.series(i)``, where not-applicable values are None):

- ``recursive_residuals(x, y, mask, intercept=…) -> RecursiveResiduals`` — Brown, Durbin & Evans
  (1975) recursive residuals by QR updating (Givens rotations), O(n·p²) per series.
- ``cusum_test(x, y, …) -> BatchCusum`` / ``cusum_from_recursive(rr)`` — BDE's CUSUM path with
  its 1 %, 5 % and 10 % boundary lines, first crossing, ratio statistic and approximate p-value.
- ``ols_cusum_test(x, y, …) -> BatchOlsCusum`` — Ploberger & Krämer (1992) OLS-residual CUSUM.
- ``chow_from_rss(…)``, ``chow_test(x1, y1, x2, y2, …)``, ``chow_test_at(x, y, split, …)`` —
  Chow (1960), two-sample or predictive form (``monitor/stats/shift.py``).
- ``slope_shift(est_base, se_base, df_base, est_recent, se_recent, df_recent)`` and
  ``slope_shift_test(x_base, y_base, x_recent, y_recent, …)`` — per-coefficient shift tests plus
  the joint Chow F (``monitor/stats/shift.py``).
- ``sup_f_test(x, y, …) -> BatchSupF`` — Andrews (1993) sup-F with trimming, its p-value and the
  estimated break row (``monitor/stats/supf.py``).

Degenerate inputs never raise and never leak NaN into a single-series result: each result has
``applicable`` (bool, or (s,) bool in a batch) and ``reason`` (why not, naming the cause). In the
batch arrays, entries of series that are not applicable hold NaN (floats), -1 (row indices) or
False (flags); ``applicable`` says which. Exact fits (residual sum of squares zero to rounding,
e.g. a constant response) are not applicable for the tests that need an error scale.

Numerics: ``monitor/stats/updating.py`` centres and scales the columns and runs the row-by-row
updates (Givens QR, then recursive least squares) that every test here shares.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from monitor.stats.critical_values import (
    bde_boundary_constant,
    bde_crossing_probability,
)
from monitor.stats.updating import (
    EXACT_REASON,
    BoolArray,
    FloatArray,
    IntArray,
    Prepared,
    QrPass,
    basic_reasons,
    is_exact_fit,
    least_squares_pass,
    prepare,
)

#: Significance levels at which CUSUM crossings are reported.
CUSUM_LEVELS: tuple[float, ...] = (0.01, 0.05, 0.10)


@dataclass(frozen=True, eq=False)
class RecursiveResiduals:
    """Recursive residuals of s series (Brown, Durbin & Evans 1975).

    ``residuals`` (s, n) in the response's units, 0.0 where a row has none; ``has_residual``
    (s, n) marks the rows that have one (all used rows but the p that first raised the rank: rows
    p … n − 1 when the first p rows determine the fit); ``count`` (s,) = used rows − p;
    ``forward_rss`` (s, n) the residual sum of squares of the used rows up to and including each
    row (valid where the rank so far, ``forward_rank`` (n, s), is p); ``applicable``,
    ``reason``.
    """

    residuals: FloatArray
    has_residual: BoolArray
    count: IntArray
    forward_rss_scaled: FloatArray  # (n, s) in the scaled units of the updates
    forward_rank: IntArray  # (n, s)
    p: int
    n_used: IntArray
    y_scale: FloatArray
    applicable: BoolArray
    reason: list[str | None]

    @property
    def forward_rss(self) -> FloatArray:
        """(s, n) RSS of the used rows up to and including each row, in the response's units."""
        return np.asarray(self.forward_rss_scaled.T * self.y_scale[:, None] ** 2)


def recursive_from_pass(prep: Prepared, qr: QrPass) -> RecursiveResiduals:
    """Recursive residuals (see ``recursive_residuals``) from prepared series and their pass."""
    s = prep.used.shape[0]
    final_rank = qr.rank[-1] if qr.rank.shape[0] else np.zeros(s, dtype=np.int64)
    reason = basic_reasons(prep, qr, "recursive residuals")
    applicable = np.array([why is None for why in reason], dtype=bool)
    has = (prep.used & ~qr.rank_row.T) & ((final_rank == prep.p) & applicable)[:, None]
    count = (prep.n_used - prep.p).astype(np.int64)
    residuals = qr.residual.T * prep.y_scale[:, None]
    if not has.all():
        residuals = np.where(has, residuals, 0.0)
    return RecursiveResiduals(
        residuals=residuals,
        has_residual=has,
        count=np.where(applicable, count, 0),
        forward_rss_scaled=qr.rss,
        forward_rank=qr.rank,
        p=prep.p,
        n_used=prep.n_used,
        y_scale=prep.y_scale,
        applicable=applicable,
        reason=reason,
    )


def recursive_residuals(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    names: Sequence[str] | None = None,
) -> RecursiveResiduals:
    """Recursive residuals w_t = (y_t − x_tᵀb_{t−1}) / √(1 + x_tᵀ(X_{t−1}ᵀX_{t−1})⁻¹x_t).

    Brown, Durbin & Evans (1975); b_{t−1} is the least-squares fit to the rows before t. Computed
    by QR updating with Givens rotations, which starts from the exact fit on the first p rows
    without forming or inverting XᵀX. x (n, k) or (s, n, k) without an intercept column,
    y (n,) or (s, n), mask (s, n). Under a stable model with normal errors the n − p residuals are
    independent N(0, σ²).
    """
    prep = prepare(x, y, mask, intercept=intercept, names=names)
    return recursive_from_pass(prep, least_squares_pass(prep.rows, prep.p))


@dataclass(frozen=True)
class CusumResult:
    """BDE CUSUM test of one series.

    ``statistic`` is max_r |W_r| / (5 % boundary at r): above 1 means the path crossed the 5 %
    lines. ``first_crossing`` maps each significance level (0.01, 0.05, 0.10) to the 0-based row
    index of the first crossing, or None. ``p_value`` is Durbin's approximation (see
    ``bde_crossing_probability``). ``path`` holds W_r at the rows listed in ``path_rows``.
    """

    applicable: bool
    reason: str | None
    statistic: float | None
    crossed: bool | None
    first_crossing_index: int | None
    first_crossing: dict[float, int | None]
    p_value: float | None
    sigma: float | None
    path: FloatArray
    path_rows: IntArray


@dataclass(frozen=True, eq=False)
class BatchCusum:
    """BDE CUSUM tests of s series; arrays (s,) or (s, n), see the module docstring for NaN/−1.

    ``path`` (s, n) is W at each row, carried forward over rows without a residual (0 before the
    first; NaN for series not applicable); ``boundary`` (s, n) the 5 % line at rows with a
    residual (NaN elsewhere);
    ``first_crossing`` maps level -> (s,) row index or −1.
    """

    statistic: FloatArray
    crossed: BoolArray
    first_crossing: dict[float, IntArray]
    p_value: FloatArray
    sigma: FloatArray
    path: FloatArray
    line5: FloatArray  # (s, n) or (s, 1)-broadcastable: the 5 % line at every row
    has_residual: BoolArray
    applicable: BoolArray
    reason: list[str | None]

    @property
    def boundary(self) -> FloatArray:
        """(s, n) the 5 % boundary at rows with a recursive residual, NaN elsewhere."""
        line = np.broadcast_to(self.line5, self.has_residual.shape)
        return np.where(self.has_residual, line, np.nan)

    def series(self, i: int) -> CusumResult:
        """The result of series ``i`` with None for what is not applicable."""
        rows = np.flatnonzero(self.has_residual[i]).astype(np.int64)
        if not self.applicable[i]:
            return CusumResult(
                False, self.reason[i], None, None, None, dict.fromkeys(CUSUM_LEVELS), None,
                None, np.zeros(0), np.zeros(0, dtype=np.int64),
            )  # fmt: skip
        crossings = {
            level: (int(idx[i]) if idx[i] >= 0 else None)
            for level, idx in self.first_crossing.items()
        }
        return CusumResult(
            applicable=True,
            reason=None,
            statistic=float(self.statistic[i]),
            crossed=bool(self.crossed[i]),
            first_crossing_index=crossings[0.05],
            first_crossing=crossings,
            p_value=float(self.p_value[i]),
            sigma=float(self.sigma[i]),
            path=self.path[i, rows].copy(),
            path_rows=rows,
        )


def cusum_from_recursive(rr: RecursiveResiduals) -> BatchCusum:
    """BDE CUSUM from recursive residuals: W_r = σ̂⁻¹ Σ_{j=k+1..r} w_j, σ̂² = Σ w_j² / (T − k).

    Brown, Durbin & Evans (1975): σ̂ is the uncentred root mean square of the T − k recursive
    residuals (statsmodels' ``recursive_olsresiduals`` uses their centred standard deviation
    instead). Boundaries ±[a√(T − k) + 2a(r − k)/√(T − k)] with a = 1.143, 0.948, 0.850 for
    1 %, 5 %, 10 % (``monitor.stats.critical_values``). A series needs at least two recursive
    residuals and a non-zero σ̂.
    """
    s, n = rr.residuals.shape
    count = rr.count.astype(np.float64)
    rss = np.einsum("sn,sn->s", rr.residuals, rr.residuals)
    reason = list(rr.reason)
    exact = is_exact_fit(rss / rr.y_scale**2, rr.n_used)
    for i in map(int, np.flatnonzero(rr.applicable & ((rr.count < 2) | exact))):
        if rr.count[i] < 2:
            reason[i] = f"{rr.count[i]} recursive residual(s); the CUSUM test needs at least 2"
        else:
            reason[i] = EXACT_REASON
    applicable = np.array([why is None for why in reason], dtype=bool)
    every = bool(applicable.all())
    has = rr.has_residual if every else rr.has_residual & applicable[:, None]
    sigma = np.sqrt(np.where(applicable, rss / np.where(count > 0, count, 1.0), 1.0))
    path = np.cumsum(rr.residuals, axis=1)
    path /= sigma[:, None]
    p = rr.p
    standard = n > p and every and not has[:, :p].any() and bool(has[:, p:].all())
    if standard:
        # Every series has its residuals on rows p … n − 1: r − k is the same for all.
        position = np.maximum(np.arange(n, dtype=np.float64) - p + 1, 0.0)[None, :]
    else:
        position = np.cumsum(has, axis=1, dtype=np.float64)
    root = np.sqrt(np.where(count > 0, count, 1.0))[:, None]
    a5 = bde_boundary_constant(0.05)
    line5 = a5 * (root + 2.0 * position / root)
    ratio = np.abs(path)
    ratio /= line5
    if not standard:
        # Rows without a residual carry the path forward; only residual rows are tested.
        ratio[~has] = 0.0
    statistic = ratio.max(axis=1) if n else np.zeros(s)
    rows_s = np.arange(s)
    first: dict[float, IntArray] = {}
    for level in CUSUM_LEVELS:
        over = ratio > bde_boundary_constant(level) / a5
        idx = np.argmax(over, axis=1) if n else np.zeros(s, dtype=np.int64)
        crossed_here = over[rows_s, idx] if n else np.zeros(s, dtype=bool)
        first[level] = np.where(applicable & crossed_here, idx, -1).astype(np.int64)
    widest = statistic * a5  # the largest a whose lines the path reaches
    p_value = bde_crossing_probability(widest)
    nan = np.full(s, np.nan)
    return BatchCusum(
        statistic=np.where(applicable, statistic, nan),
        crossed=np.where(applicable, statistic > 1.0, False),
        first_crossing=first,
        p_value=np.where(applicable, p_value, nan),
        sigma=np.where(applicable, sigma, nan),
        path=path if every else np.where(applicable[:, None], path, np.nan),
        line5=line5,
        has_residual=has,
        applicable=applicable,
        reason=reason,
    )


def cusum_test(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    names: Sequence[str] | None = None,
) -> BatchCusum:
    """BDE (1975) CUSUM test of recursive residuals; see ``cusum_from_recursive``."""
    return cusum_from_recursive(
        recursive_residuals(x, y, mask, intercept=intercept, names=names)
    )


@dataclass(frozen=True)
class OlsCusumResult:
    """Ploberger & Krämer (1992) OLS-CUSUM test of one series; ``peak_index`` is the row where
    |cumulative residual sum| is largest (the last row of the first regime if a mean shifted)."""

    applicable: bool
    reason: str | None
    statistic: float | None
    p_value: float | None
    peak_index: int | None


@dataclass(frozen=True, eq=False)
class BatchOlsCusum:
    """OLS-CUSUM tests of s series: (s,) arrays, NaN / −1 where not applicable."""

    statistic: FloatArray
    p_value: FloatArray
    peak_index: IntArray
    applicable: BoolArray
    reason: list[str | None]

    def series(self, i: int) -> OlsCusumResult:
        """The result of series ``i``."""
        if not self.applicable[i]:
            return OlsCusumResult(False, self.reason[i], None, None, None)
        return OlsCusumResult(
            True, None, float(self.statistic[i]), float(self.p_value[i]), int(self.peak_index[i])
        )


def ols_cusum_test(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    names: Sequence[str] | None = None,
) -> BatchOlsCusum:
    """OLS-residual CUSUM: sup_t |Σ_{i≤t} e_i| / (σ̂√n), σ̂² = Σ e² / (n − p).

    Ploberger & Krämer (1992); e are the full-sample OLS residuals. Under a stable model the
    process tends to a Brownian bridge, so the p-value is the Kolmogorov tail
    ``scipy.stats.kstwobign.sf``. x (n, k) / (s, n, k), y (n,) / (s, n), mask (s, n).
    """
    prep = prepare(x, y, mask, intercept=intercept, names=names)
    return ols_cusum_from_pass(prep, least_squares_pass(prep.rows, prep.p))


def ols_cusum_from_pass(prep: Prepared, qr: QrPass) -> BatchOlsCusum:
    """OLS-CUSUM (see ``ols_cusum_test``) from prepared series and their forward pass."""
    s, n = prep.used.shape
    p = prep.p
    reason = basic_reasons(prep, qr, "OLS residuals for the CUSUM")
    ok = np.array([why is None for why in reason], dtype=bool)
    coef = np.where(ok[:, None], qr.coef, 0.0)
    # Series-last, as the rows are stored: residuals (n, s) = y − Σ_j x_j·b_j.
    resid = prep.rows[:, p, :].copy()
    for j in range(p):
        resid -= prep.rows[:, j, :] * coef[:, j]
    if not prep.used.all():
        resid *= prep.used.T
    sse = np.einsum("ns,ns->s", resid, resid)
    exact = is_exact_fit(sse, prep.n_used)
    for i in map(int, np.flatnonzero(exact & ok)):
        reason[i] = EXACT_REASON
    applicable = ok & ~exact
    df = np.maximum(prep.n_used - p, 1).astype(np.float64)
    sigma = np.sqrt(np.where(applicable, sse / df, 1.0))
    process = np.cumsum(resid, axis=0, out=resid)
    np.abs(process, out=process)
    peak = np.argmax(process, axis=0) if n else np.zeros(s, dtype=np.int64)
    top = process[peak, np.arange(s)] if n else np.zeros(s)
    statistic = top / (sigma * np.sqrt(np.maximum(prep.n_used, 1)))
    p_value = stats.kstwobign.sf(statistic)
    return BatchOlsCusum(
        statistic=np.where(applicable, statistic, np.nan),
        p_value=np.where(applicable, p_value, np.nan),
        peak_index=np.where(applicable, peak, -1).astype(np.int64),
        applicable=applicable,
        reason=reason,
    )


__all__ = [
    "CUSUM_LEVELS",
    "BatchCusum",
    "BatchOlsCusum",
    "CusumResult",
    "OlsCusumResult",
    "RecursiveResiduals",
    "cusum_from_recursive",
    "cusum_test",
    "ols_cusum_test",
    "recursive_residuals",
]
