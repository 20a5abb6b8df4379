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

Numerics: the columns are centred (when there is an intercept) and scaled to unit root mean
square before the QR updates. Recursive residuals are invariant to such a change of basis of the
column space, and the response's centring is absorbed by the intercept, so nothing is lost and the
updates stay well conditioned.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from monitor.stats.critical_values import (
    bde_boundary_constant,
    bde_crossing_probability,
)

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
IntArray = NDArray[np.int64]

#: Significance levels at which CUSUM crossings are reported.
CUSUM_LEVELS: tuple[float, ...] = (0.01, 0.05, 0.10)

# A pivot (or a rotated-in value) at or below this, on columns scaled to unit RMS, is treated as
# zero: the column adds no rank yet. Rounding noise there is ~1e-15.
_PIVOT_TOLERANCE = 1e-9
# Residual RMS below this fraction of the response's RMS (centred with an intercept) is an exact
# fit: no error scale to test against.
_EXACT_FIT_RELATIVE = 1e-10
EXACT_REASON = "the fit is exact (residuals are zero to rounding), so there is no scale"


@dataclass(frozen=True, eq=False)
class Prepared:
    """Series stacked for the QR updates (internal to ``monitor.stats``, shared with supf/shift).

    ``rows`` is (n, p + 1, s): for each row the scaled design row and, last, the scaled response;
    unused rows are zero. ``basis`` (s, p, p) maps scaled coefficients back: b = y_scale·A·b_s
    plus the response mean on the intercept.
    """

    rows: FloatArray
    used: BoolArray  # (s, n)
    n_used: IntArray  # (s,)
    p: int
    intercept: bool
    terms: tuple[str, ...]
    y_scale: FloatArray  # (s,)
    y_centre: FloatArray  # (s,)
    basis: FloatArray  # (s, p, p)
    reason: list[str | None]  # input problems (non-finite values, no coefficients)


def _as_batch(
    x: ArrayLike | None, y: ArrayLike, mask: ArrayLike | None
) -> tuple[FloatArray, FloatArray, BoolArray, bool]:
    y_arr = np.asarray(y, dtype=np.float64)
    single = y_arr.ndim == 1
    if single:
        y_arr = y_arr[None, :]
    if y_arr.ndim != 2:
        raise ValueError(f"y must be (n,) or (s, n); got shape {y_arr.shape}")
    s, n = y_arr.shape
    if x is None:
        x_arr = np.zeros((s, n, 0))
    else:
        x_arr = np.asarray(x, dtype=np.float64)
        if single:
            x_arr = x_arr.reshape(n, -1)[None, :, :] if x_arr.size else np.zeros((1, n, 0))
        elif x_arr.ndim == 2 and tuple(x_arr.shape) == (s, n):
            x_arr = x_arr[:, :, None]
        if x_arr.ndim != 3 or x_arr.shape[:2] != (s, n):
            raise ValueError(f"x must be (n, k) or (s, n, k) matching y {y_arr.shape}")
    if mask is None:
        used = np.ones((s, n), dtype=bool)
    else:
        used = np.asarray(mask, dtype=bool)
        if single and used.ndim == 1:
            used = used[None, :]
        if used.shape != (s, n):
            raise ValueError(f"mask must have the shape of y {y_arr.shape}")
    return x_arr, y_arr, used.copy(), single


def prepare(
    x: ArrayLike | None,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    names: Sequence[str] | None = None,
) -> Prepared:
    """Validate, centre and scale the series and stack them for the QR updates.

    x (n, k) / (s, n, k) / None, y (n,) / (s, n), mask like y. Rows with a non-finite value are an
    input problem for their series (reported in ``reason``), never silently dropped.
    """
    x_arr, y_arr, used, _single = _as_batch(x, y, mask)
    s, n, k = x_arr.shape
    p = k + (1 if intercept else 0)
    predictor_names = tuple(names) if names is not None else tuple(f"x{j + 1}" for j in range(k))
    if len(predictor_names) != k:
        raise ValueError(f"names has {len(predictor_names)} entries for {k} predictors")
    terms = (("intercept",) if intercept else ()) + predictor_names
    reason: list[str | None] = [None] * s
    if np.isfinite(y_arr).all() and np.isfinite(x_arr).all():
        used_f = used
    else:
        finite = np.isfinite(y_arr) & np.all(np.isfinite(x_arr), axis=2)
        bad = used & ~finite
        for i in map(int, np.flatnonzero(bad.any(axis=1))):
            row = int(np.flatnonzero(bad[i])[0])
            reason[i] = f"row {row} holds a value that is not a finite number"
        used_f = used & finite
    if p == 0:
        reason = ["the model has no coefficients (no predictors and no intercept)"] * s
    n_used = used_f.sum(axis=1).astype(np.int64)
    safe_n = np.maximum(n_used, 1).astype(np.float64)
    # Work series-last, (n, columns, s), the layout the row updates read, in place in ``rows``.
    rows = np.empty((n, p + 1, s))
    x_t = rows[:, p - k : p, :]
    y_t = rows[:, p, :]
    x_t[...] = x_arr.transpose(1, 2, 0)
    y_t[...] = y_arr.T
    every_row = bool(used_f.all())
    weights = None if every_row else np.ascontiguousarray(used_f.T, dtype=np.float64)
    if weights is not None:
        # Unused rows (and non-finite values in them) become zeros, which no update sees.
        x_t[...] = np.where(weights[:, None, :] > 0, x_t, 0.0)
        y_t[...] = np.where(weights > 0, y_t, 0.0)
    if intercept:
        x_centre = x_t.sum(axis=0) / safe_n  # (k, s)
        y_centre = y_t.sum(axis=0) / safe_n
        x_t -= x_centre[None]
        y_t -= y_centre[None]
        if weights is not None:
            x_t *= weights[:, None, :]
            y_t *= weights
        rows[:, 0, :] = 1.0 if weights is None else weights
    else:
        x_centre = np.zeros((k, s))
        y_centre = np.zeros(s)
    x_scale = np.sqrt(np.einsum("nks,nks->ks", x_t, x_t) / safe_n)
    x_scale = np.where(x_scale > 0, x_scale, 1.0)
    y_scale = np.sqrt(np.einsum("ns,ns->s", y_t, y_t) / safe_n)
    y_scale = np.where(y_scale > 0, y_scale, 1.0)
    x_t /= x_scale[None]
    y_t /= y_scale[None]
    basis = np.zeros((s, p, p))
    offset = p - k
    if intercept:
        basis[:, 0, 0] = 1.0
    for j in range(k):
        basis[:, offset + j, offset + j] = 1.0 / x_scale[j]
        if intercept:
            basis[:, 0, offset + j] = -x_centre[j] / x_scale[j]
    return Prepared(
        rows=rows,
        used=used_f,
        n_used=n_used,
        p=p,
        intercept=intercept,
        terms=terms,
        y_scale=y_scale,
        y_centre=y_centre,
        basis=basis,
        reason=reason,
    )


@dataclass(frozen=True, eq=False)
class QrPass:
    """One forward pass of least-squares updates over the rows (internal).

    ``residual`` (n, s) is the scaled recursive residual of each row (0 where none), ``rank_row``
    (n, s) marks rows that raised the rank, ``rss`` (n, s) the scaled residual sum of squares of
    the used rows up to and including each row, ``rank`` (n, s) the rank so far. ``coef`` (s, p)
    and ``cov`` (s, p, p) are the final scaled least-squares coefficients and (XᵀX)⁻¹, valid where
    the final rank is p; ``empty_pivot`` (s,) is the first column that never gained rank, or −1.
    """

    residual: FloatArray
    rank_row: BoolArray
    rss: FloatArray
    rank: IntArray
    coef: FloatArray
    cov: FloatArray
    empty_pivot: IntArray


def _givens_rows(
    rows: FloatArray,
    r: FloatArray,
    filled: BoolArray,
    residual: FloatArray,
    rank_row: BoolArray,
    start: int,
) -> None:
    """Rotate rows[start:] into the factor r (p, p + 1, s) in place; write residuals and ranks.

    Each new row is rotated into the triangular factor R of the rows before it. When R has full
    rank, the value left in the response position is ±(y_t − x_tᵀb_{t−1})/√(1 + x_tᵀ(XᵀX)⁻¹x_t),
    the recursive residual; its sign is that of the prediction error because every pivot is kept
    non-negative. A row whose design part falls on an empty pivot raises the rank instead.
    """
    p = r.shape[0]
    s = r.shape[2]
    for t in range(start, rows.shape[0]):
        v = rows[t].copy()
        raised = np.zeros(s, dtype=bool)
        for i in range(p):
            a = r[i, i]
            b = v[i]
            rho = np.hypot(a, b)
            active = rho > _PIVOT_TOLERANCE
            safe = np.where(active, rho, 1.0)
            c = np.where(active, a / safe, 1.0)
            sn = np.where(active, b / safe, 0.0)
            r_row = r[i, i:]
            v_tail = v[i:]
            new_r = c * r_row + sn * v_tail
            v[i:] = c * v_tail - sn * r_row
            r[i, i:] = new_r
            newly = active & ~filled[i]
            raised |= newly
            filled[i] |= newly
            # Noise below the tolerance in an empty pivot column is rounding, not rank.
            v[i] = np.where(active, v[i], 0.0)
        rank_row[t] = raised
        residual[t] = np.where(raised, 0.0, v[p])


def _rls_rows(
    rows: FloatArray, cov: FloatArray, coef: FloatArray, residual: FloatArray, start: int
) -> None:
    """Recursive least squares from rows[start:], in place (Plackett 1950's update).

    With P = (XᵀX)⁻¹ and b the fit so far: f = 1 + xᵀPx, w = (y − xᵀb)/√f, b += Px(y − xᵀb)/f,
    P −= (Px)(Px)ᵀ/f. Used only once P is well conditioned (see ``least_squares_pass``), where
    it agrees with the rotations to rounding and costs far fewer array operations per row.
    cov (p, p, s), coef (p, s).
    """
    p, _, s = cov.shape
    # Buffers reused row after row: fresh temporaries of this size cost more than the arithmetic.
    px = np.empty((p, s))
    gain = np.empty((p, s))
    outer = np.empty((p, p, s))
    f = np.empty(s)
    error = np.empty(s)
    root = np.empty(s)
    for t in range(start, rows.shape[0]):
        x = rows[t, :p]
        np.einsum("ijs,js->is", cov, x, out=px)
        np.einsum("is,is->s", x, px, out=f)
        np.add(f, 1.0, out=f)
        np.einsum("is,is->s", x, coef, out=error)
        np.subtract(rows[t, p], error, out=error)
        np.sqrt(f, out=root)
        np.divide(error, root, out=residual[t])
        np.divide(px, f, out=gain)
        np.multiply(gain[:, None, :], px[None, :, :], out=outer)
        np.subtract(cov, outer, out=cov)
        np.multiply(gain, error, out=gain)
        np.add(coef, gain, out=coef)


def _triangular_inverse(r: FloatArray, ok: BoolArray) -> FloatArray:
    """R⁻¹ (s, p, p) of the design part of r (p, p + 1, s); identity where not ok."""
    p = r.shape[0]
    upper = np.ascontiguousarray(r[:, :p, :].transpose(2, 0, 1))
    upper = np.where(ok[:, None, None], upper, np.eye(p)[None])
    return np.asarray(np.linalg.inv(upper), dtype=np.float64)


# Switch from rotations to the cheaper covariance update once every diagonal entry of (XᵀX)⁻¹ of
# the scaled columns is at most this: the start is then well determined, and the covariance
# update loses no more than a few digits (its error grows with P's size relative to its end).
_SWITCH_MAX_COV = 100.0


def least_squares_pass(rows: FloatArray, p: int) -> QrPass:
    """Row-by-row least-squares updating of [X y] (rows (n, p + 1, s)), vectorised over series.

    The first rows are rotated in by Givens QR updating (stable, starting from the exact fit on
    the first p rows and handling rows that add no rank); once a series' (XᵀX)⁻¹ is well
    conditioned the rest of its rows use the equivalent recursive least-squares update. Both give
    the recursive residuals of Brown, Durbin & Evans (1975). O(p²) per row and series.
    """
    n, m, s = rows.shape
    residual = np.zeros((n, s))
    rank_row = np.zeros((n, s), dtype=bool)
    r = np.zeros((p, m, s))
    filled = np.zeros((p, s), dtype=bool)
    coef = np.zeros((s, p))
    cov = np.zeros((s, p, p))
    start = min(n, p + 3)
    _givens_rows(rows[:start], r, filled, residual, rank_row, 0)
    full = np.asarray(filled.all(axis=0), dtype=bool) if p else np.ones(s, dtype=bool)
    inverse = _triangular_inverse(r, full)
    cov_start = inverse @ inverse.transpose(0, 2, 1)
    diag_max = np.max(np.diagonal(cov_start, axis1=1, axis2=2), axis=1) if p else np.zeros(s)
    fast = full & (diag_max <= _SWITCH_MAX_COV)
    slow = ~fast
    if fast.all() and start < n:
        # The usual case: no gather of a subset, the rows are read in place.
        cov_t = np.ascontiguousarray(cov_start.transpose(1, 2, 0))
        coef_t = np.ascontiguousarray((inverse @ r[:, p, :].T[:, :, None])[:, :, 0].T)
        _rls_rows(rows, cov_t, coef_t, residual, start)
        coef = coef_t.T.copy()
        cov = cov_t.transpose(2, 0, 1).copy()
    elif fast.any() and start < n:
        idx = np.flatnonzero(fast)
        sub_rows = rows[start:, :, idx]
        sub_cov = np.ascontiguousarray(cov_start[idx].transpose(1, 2, 0))
        sub_coef = np.ascontiguousarray(
            (inverse[idx] @ r[:, p, idx].T[:, :, None])[:, :, 0].T
        )
        sub_res = np.zeros((n - start, idx.size))
        _rls_rows(sub_rows, sub_cov, sub_coef, sub_res, 0)
        residual[start:, idx] = sub_res
        coef[idx] = sub_coef.T
        cov[idx] = sub_cov.transpose(2, 0, 1)
    elif fast.any():
        idx = np.flatnonzero(fast)
        coef[idx] = (inverse[idx] @ r[:, p, idx].T[:, :, None])[:, :, 0]
        cov[idx] = cov_start[idx]
    if slow.any():
        idx = np.flatnonzero(slow)
        sub_r = r[:, :, idx].copy()
        sub_filled = filled[:, idx].copy()
        sub_res = residual[:, idx].copy()
        sub_rank = rank_row[:, idx].copy()
        _givens_rows(rows[:, :, idx], sub_r, sub_filled, sub_res, sub_rank, start)
        residual[:, idx] = sub_res
        rank_row[:, idx] = sub_rank
        ok = np.asarray(sub_filled.all(axis=0), dtype=bool) if p else np.ones(idx.size, dtype=bool)
        inv_slow = _triangular_inverse(sub_r, ok)
        coef[idx] = (inv_slow @ sub_r[:, p, :].T[:, :, None])[:, :, 0]
        cov[idx] = inv_slow @ inv_slow.transpose(0, 2, 1)
        filled[:, idx] = sub_filled
    empty = np.where(filled.all(axis=0), -1, np.argmin(filled, axis=0)) if p else np.full(s, -1)
    rss = np.square(residual)
    np.cumsum(rss, axis=0, out=rss)
    if slow.any() or start >= n:
        rank = np.cumsum(rank_row, axis=0, dtype=np.int64)
    else:
        # Rows after the rotations never raise the rank: it stays at its value there.
        rank = np.empty((n, s), dtype=np.int64)
        np.cumsum(rank_row[:start], axis=0, out=rank[:start])
        rank[start:] = rank[start - 1]
    return QrPass(
        residual=residual,
        rank_row=rank_row,
        rss=rss,
        rank=rank,
        coef=coef,
        cov=cov,
        empty_pivot=empty.astype(np.int64),
    )


def rank_reason(prep: Prepared, qr: QrPass, i: int) -> str:
    missing = int(qr.empty_pivot[i])
    column = prep.terms[missing] if missing >= 0 else prep.terms[-1]
    if column == "intercept":
        return "the intercept is not determined (no rows used)"
    if prep.intercept and prep.p > 1:
        return (
            f"predictor '{column}' is constant or a linear combination of the columns before "
            "it over the rows used"
        )
    return f"predictor '{column}' is all zero or a linear combination of the columns before it"


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


def is_exact_fit(rss_scaled: FloatArray, n_used: IntArray) -> BoolArray:
    """True where a scaled residual sum of squares is zero to rounding (internal helper)."""
    return np.asarray(rss_scaled <= (_EXACT_FIT_RELATIVE**2) * np.maximum(n_used, 1), dtype=bool)


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


def basic_reasons(prep: Prepared, qr: QrPass, needs: str) -> list[str | None]:
    """Input problems, too few rows, rank deficiency: the reasons every test shares."""
    s, n = prep.used.shape
    final_rank = qr.rank[-1] if n else np.zeros(s, dtype=np.int64)
    reason = list(prep.reason)
    suspect = (prep.n_used <= prep.p) | (final_rank < prep.p)
    for i in map(int, np.flatnonzero(suspect)):
        if reason[i] is not None:
            continue
        if prep.n_used[i] <= prep.p:
            reason[i] = (
                f"{prep.n_used[i]} rows used; {needs} require more than {prep.p} (one per "
                "coefficient)"
            )
        else:
            reason[i] = rank_reason(prep, qr, i)
    return reason


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


def finite_or_none(value: float) -> float | None:
    """A float for JSON: None for NaN or infinity (internal helper shared by the modules)."""
    return value if math.isfinite(value) else None


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
