"""The updating engine behind the change tests: series prepared for row-by-row least squares.

Internal to ``monitor.stats`` (``change``, ``supf`` and ``shift`` build on it). ``prepare``
validates, centres and scales s series and stores them series-last, (n, p + 1, s);
``least_squares_pass`` runs Givens QR updating on the first rows and recursive least squares
after, giving every row's recursive residual (Brown, Durbin & Evans 1975), the running residual
sum of squares and rank, and the final coefficients and (XᵀX)⁻¹ in scaled units. Recursive
residuals are invariant to the centring and scaling (a change of basis of the column space; the
response's centring is absorbed by the intercept), which keep the updates well conditioned.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
IntArray = NDArray[np.int64]

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


def is_exact_fit(rss_scaled: FloatArray, n_used: IntArray) -> BoolArray:
    """True where a scaled residual sum of squares is zero to rounding (internal helper)."""
    return np.asarray(rss_scaled <= (_EXACT_FIT_RELATIVE**2) * np.maximum(n_used, 1), dtype=bool)


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


__all__ = [
    "EXACT_REASON",
    "BoolArray",
    "FloatArray",
    "IntArray",
    "Prepared",
    "QrPass",
    "basic_reasons",
    "is_exact_fit",
    "least_squares_pass",
    "prepare",
    "rank_reason",
]
