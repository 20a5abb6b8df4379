"""The fast path of ``fit_batch``: stacked cross products of standardised columns.

For s series at once, with a row mask, this computes the least-squares fit of every series from
the k x k cross-product matrix of its centred, unit-norm columns (a correlation matrix with an
intercept), its Cholesky factor and one step of iterative refinement, all as stacked array
operations. It is only as accurate as ``fit_ols`` while the columns are well conditioned, so it
also returns, per series, whether the series must instead go to ``fit_ols``: non-finite used
rows, too few rows, a constant or zero column, a condition number of the cross-product matrix
above ``FAST_CONDITION_LIMIT``, or a residual so small the fit may be exact.

Method: the normal equations in correlation form (Draper & Smith 1998, the correlation
transformation), the Cholesky factor ``C = L L'`` so that ``R = L'`` is the triangular factor
that QR would give with a positive diagonal (Golub & Van Loan 2013, chapter 5), and one step of
refinement ``c <- c + C^-1 Z'(y - Zc)`` with the residual formed from the data (Björck 1967).
Every function here is private; ``monitor.stats.ols.fit_batch`` is the public entry.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
from numpy.typing import NDArray

from monitor.stats._linalg import FloatArray
from monitor.stats._ols_single import CONSTANT_RTOL, MAGNITUDE_LIMIT

# Condition number of the standardised cross-product matrix Z'Z up to which the fast path is
# used. Its error in the coefficients after refinement is about cond(Z) * eps and in the
# standard errors about cond(Z'Z) * eps, so at 1e4 both stay near 1e-12 relative, a hundred
# times inside the 1e-10 agreement with fit_ols that tests/stats/test_ols_batch.py checks. Two
# predictors reach it at a correlation of 0.9998.
FAST_CONDITION_LIMIT = 1e4

# Residual norm below this share of the centred response's norm (1 - R² below 1e-12) goes to
# fit_ols, which decides about exact fits with compensated residuals.
NEAR_EXACT_RTOL = 1e-6


# Series per chunk of the fast path (about 1.2 MB per (chunk, 156) column: cache-sized).
CHUNK_SERIES = 1024


@dataclass(frozen=True)
class FastFit:
    """Arrays of the fast path; rows of ``needs_fallback`` series hold no meaningful values.

    Shapes: ``needs_fallback``, ``n``, ``intercept_value``, ``sse``, ``ssr``, ``sst`` (s,);
    ``centre``, ``scale``, ``slopes``, ``x_min``, ``x_max`` (s, k); ``r_inverse`` (s, k, k);
    ``residuals`` and ``leverage`` (s, n_max), NaN at rows left out by the mask.
    """

    needs_fallback: NDArray[np.bool_]
    n: NDArray[np.int64]
    centre: FloatArray
    scale: FloatArray
    slopes: FloatArray
    intercept_value: FloatArray
    r_inverse: FloatArray
    residuals: FloatArray
    leverage: FloatArray
    sse: FloatArray
    ssr: FloatArray
    sst: FloatArray
    x_min: FloatArray
    x_max: FloatArray


def _side_by_side(values: list[FloatArray], s_count: int) -> FloatArray:
    """Per-series values of each column, side by side: (s, k), also for k = 0."""
    return np.column_stack(values) if values else np.zeros((s_count, 0))


def _dot(a: FloatArray, b: FloatArray) -> FloatArray:
    """Row-wise dot products of two (s, n) arrays: (s,)."""
    return np.einsum("sn,sn->s", a, b)


def fast_fit(x: FloatArray, y: FloatArray, mask: NDArray[np.bool_], intercept: bool) -> FastFit:
    """Fit every series by the cross-product route; flag the ones it cannot serve.

    ``x`` (s, n, k), ``y`` (s, n), ``mask`` (s, n) with True for rows used. Series are taken
    ``CHUNK_SERIES`` at a time so that the temporaries stay in cache (measured on the 2-core
    development machine: about 25 % faster than one pass over 10,000 series).
    """
    s_count = x.shape[0]
    if s_count <= CHUNK_SERIES:
        return _fast_fit_chunk(x, y, mask, intercept)
    parts = [
        _fast_fit_chunk(x[start : start + CHUNK_SERIES], y[start : start + CHUNK_SERIES],
                        mask[start : start + CHUNK_SERIES], intercept)
        for start in range(0, s_count, CHUNK_SERIES)
    ]
    return FastFit(**{
        name.name: np.concatenate([getattr(part, name.name) for part in parts])
        for name in fields(FastFit)
    })


def _fast_fit_chunk(
    x: FloatArray, y: FloatArray, mask: NDArray[np.bool_], intercept: bool
) -> FastFit:
    """``fast_fit`` on one chunk of series.

    The work is done on one contiguous (s, n) array per column: reductions over a strided
    axis cost about ten times more on this hardware.
    """
    s_count, _, k = x.shape
    p = k + int(intercept)
    n = np.count_nonzero(mask, axis=1).astype(np.int64)
    partial = not bool(mask.all())
    # Rows off the mask may hold NaN: replace them by 0 before anything is summed.
    off_mask = ~mask if partial else None
    # Fresh contiguous copies (rows off the mask may hold NaN: they become 0), centred in place.
    columns = [np.where(mask, x[:, :, j], 0.0) if partial else x[:, :, j].copy()
               for j in range(k)]
    y_used = np.where(mask, y, 0.0) if partial else y
    safe_n = np.maximum(n, 1).astype(np.float64)
    needs_fallback = n <= p

    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if partial:
            x_min = _side_by_side(
                [np.where(mask, c, np.inf).min(axis=1, initial=np.inf) for c in columns], s_count)
            x_max = _side_by_side(
                [np.where(mask, c, -np.inf).max(axis=1, initial=-np.inf) for c in columns], s_count)
        else:
            x_min = _side_by_side([c.min(axis=1, initial=np.inf) for c in columns], s_count)
            x_max = _side_by_side([c.max(axis=1, initial=-np.inf) for c in columns], s_count)
        x_min = x_min.reshape(s_count, k)
        x_max = x_max.reshape(s_count, k)
        x_min[n == 0] = np.nan
        x_max[n == 0] = np.nan
        # fit_ols's magnitude rule for the predictors, so that such series go to it and get
        # its reason (the response's is checked below from its sum of squares).
        largest_x = np.maximum(np.abs(x_min), np.abs(x_max))
        outside = (largest_x > MAGNITUDE_LIMIT) | (
            (largest_x > 0.0) & (largest_x < 1.0 / MAGNITUDE_LIMIT)
        )
        needs_fallback |= outside.any(axis=1)
        if intercept:
            centre = _side_by_side([c.sum(axis=1) for c in columns], s_count)
            centre /= safe_n[:, None]
            y_mean = y_used.sum(axis=1) / safe_n
            for j, c in enumerate(columns):
                c -= centre[:, j, None]
            y_centred = y_used - y_mean[:, None]
            if off_mask is not None:
                for c in (*columns, y_centred):
                    np.copyto(c, 0.0, where=off_mask)
        else:
            centre = np.zeros((s_count, k))
            y_mean = np.zeros(s_count)
            y_centred = y_used
        centred = columns
        scale = np.sqrt(_side_by_side([_dot(c, c) for c in centred], s_count))
        # Non-finite data show up as non-finite means or norms: no separate pass over the data.
        needs_fallback |= ~np.isfinite(y_mean) | ~np.isfinite(scale).all(axis=1)
        raw_norm = np.sqrt(scale * scale + safe_n[:, None] * centre * centre)
        # A thousand times fit_ols's rule: a column near the line goes to fit_ols, which decides,
        # so the two can never disagree about it.
        degenerate = ~(scale > 1e3 * CONSTANT_RTOL * raw_norm)
        needs_fallback |= degenerate.any(axis=1)
        safe_scale = np.where(degenerate | ~np.isfinite(scale), 1.0, scale)

        cross = np.empty((s_count, k, k))
        for j in range(k):
            for m in range(j, k):
                value = _dot(centred[j], centred[m]) / (safe_scale[:, j] * safe_scale[:, m])
                cross[:, j, m] = value
                cross[:, m, j] = value
        needs_fallback |= ~np.isfinite(cross).all(axis=(1, 2))
        cross[needs_fallback] = np.eye(k)
        if k:
            eigenvalues = np.linalg.eigvalsh(cross)
            condition = eigenvalues[:, -1] / eigenvalues[:, 0]
            ill = ~(eigenvalues[:, 0] > 0.0) | ~(condition <= FAST_CONDITION_LIMIT)
            needs_fallback |= ill
            cross[ill] = np.eye(k)
            # inv of a triangular matrix by LU leaves ~1e-17 above the diagonal: clear it.
            lower_inverse = np.tril(np.linalg.inv(np.linalg.cholesky(cross)))
            r_inverse = np.swapaxes(lower_inverse, 1, 2)
            # (X'X)^-1 of the slopes in original units: R^-1 R^-T / (d d').
            inverse = np.matmul(r_inverse, lower_inverse)
            inverse /= safe_scale[:, :, None] * safe_scale[:, None, :]
        else:
            r_inverse = np.zeros((s_count, 0, 0))
            inverse = np.zeros((s_count, 0, 0))

        fitted_centred = np.zeros_like(y_centred)
        residual = np.empty_like(y_centred)

        def update_residual(slopes: FloatArray) -> None:
            if k:
                np.multiply(centred[0], slopes[:, 0, None], out=fitted_centred)
            for j in range(1, k):
                np.add(fitted_centred, centred[j] * slopes[:, j, None], out=fitted_centred)
            np.subtract(y_centred, fitted_centred, out=residual)

        def normal_solve(vector: FloatArray) -> FloatArray:
            right = _side_by_side([_dot(c, vector) for c in centred], s_count)
            return np.einsum("skl,sl->sk", inverse, right)

        slopes = normal_solve(y_centred) if k else np.zeros((s_count, 0))
        if k:
            update_residual(slopes)
            slopes = slopes + normal_solve(residual)
        update_residual(slopes)
        sse = _dot(residual, residual)
        ssr = _dot(fitted_centred, fitted_centred)
        sst = _dot(y_centred, y_centred)
        needs_fallback |= ~(np.sqrt(sse) > NEAR_EXACT_RTOL * np.sqrt(sst))
        # max|y| > 1e100 forces sum y² > 1e200, and 0 < max|y| < 1e-100 forces
        # sum y² < n 1e-200 (or an underflow to 0, caught as near-exact above): either way the
        # series goes to fit_ols, which applies its magnitude rule exactly.
        y_square_sum = sst + safe_n * y_mean * y_mean if intercept else sst
        needs_fallback |= ~(y_square_sum <= MAGNITUDE_LIMIT**2) | ~(
            y_square_sum >= safe_n / MAGNITUDE_LIMIT**2
        )
        intercept_value = y_mean - np.einsum("sk,sk->s", centre, slopes)

        # Leverage h = 1/n + ||z R^-1||² row by row (a sum of squares: no cancellation).
        leverage = fitted_centred  # the buffer is free now
        if k:
            np.multiply(centred[0], (r_inverse[:, 0, 0] / safe_scale[:, 0])[:, None],
                        out=leverage)
            leverage *= leverage
        else:
            leverage.fill(0.0)
        if intercept:
            leverage += (1.0 / safe_n)[:, None]
        projected = np.empty_like(leverage)
        for m in range(1, k):
            np.multiply(centred[0], (r_inverse[:, 0, m] / safe_scale[:, 0])[:, None],
                        out=projected)
            for j in range(1, m + 1):
                projected += centred[j] * (r_inverse[:, j, m] / safe_scale[:, j])[:, None]
            projected *= projected
            leverage += projected
        if off_mask is not None:
            np.copyto(residual, np.nan, where=off_mask)
            np.copyto(leverage, np.nan, where=off_mask)

    return FastFit(
        needs_fallback=needs_fallback, n=n, centre=centre, scale=safe_scale, slopes=slopes,
        intercept_value=intercept_value, r_inverse=r_inverse, residuals=residual,
        leverage=leverage, sse=sse, ssr=ssr, sst=sst, x_min=x_min, x_max=x_max,
    )
