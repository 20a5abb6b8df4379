"""Numerical kernels behind ``ols.py``: compensated residuals, standardising, rank diagnosis.

These are private helpers; ``monitor.stats.ols`` is the public face. Shapes are given per function.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from scipy import special

FloatArray = NDArray[np.float64]

EPS = float(np.finfo(np.float64).eps)

# Veltkamp's splitting constant 2**27 + 1 for IEEE double (Dekker 1971).
_SPLITTER = 134217729.0


def _two_sum(a: FloatArray, b: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Knuth's TwoSum: ``a + b = s + e`` exactly, elementwise (Knuth, TAOCP vol. 2, 1969)."""
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


def _split(a: FloatArray) -> tuple[FloatArray, FloatArray]:
    c = _SPLITTER * a
    high = c - (c - a)
    return high, a - high


def _two_product(a: FloatArray, b: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Dekker's TwoProduct: ``a * b = p + e`` exactly, elementwise (Dekker 1971)."""
    p = a * b
    a_high, a_low = _split(a)
    b_high, b_low = _split(b)
    e = a_low * b_low - (((p - a_high * b_high) - a_low * b_high) - a_high * b_low)
    return p, e


def compensated_residual(
    y: FloatArray, x: FloatArray, slopes: FloatArray, intercept: FloatArray | float
) -> FloatArray:
    """Residuals ``y - intercept - x @ slopes`` as if computed in twice the working precision.

    The sum over terms uses error-free transformations (TwoSum, TwoProduct) in the manner of
    Ogita, Rump & Oishi (2005), "Accurate sum and dot product", so the cancellation between the
    response and the fitted value costs no digits. This is what makes one step of iterative
    refinement worth taking (Golub & Van Loan 2013, section 5.3.8; Björck 1996, section 2.9).

    Shapes: ``y`` (..., n), ``x`` (..., n, k), ``slopes`` (..., k), ``intercept`` scalar or
    (...,). Where a split overflows (magnitudes beyond ~1e300) the plain float64 residual is used.
    """
    total = np.array(y, dtype=np.float64, copy=True)
    error = np.zeros_like(total)
    negated = -np.asarray(intercept, dtype=np.float64)[..., None]
    intercept_term = np.broadcast_to(negated, total.shape)
    total, e = _two_sum(total, intercept_term)
    error += e
    for j in range(x.shape[-1]):
        product, product_error = _two_product(x[..., j], -slopes[..., j, None])
        total, e = _two_sum(total, product)
        error += e + product_error
    result = total + error
    if not np.all(np.isfinite(result)):
        plain = y - np.asarray(intercept)[..., None] - np.einsum("...nk,...k->...n", x, slopes)
        result = np.where(np.isfinite(result), result, plain)
    return result


def t_quantile(probability: float, df: NDArray[np.int64] | int) -> FloatArray:
    """Student-t quantile at ``probability`` for each degrees of freedom (scipy's ``stdtrit``)."""
    return np.asarray(special.stdtrit(np.asarray(df, dtype=np.float64), probability))


def t_two_sided_p(t: FloatArray, df: NDArray[np.int64] | int) -> FloatArray:
    """Two-sided p-value ``2 P(T_df > |t|)``, elementwise (scipy's ``stdtr``)."""
    return np.asarray(2.0 * special.stdtr(np.asarray(df, dtype=np.float64), -np.abs(t)))


def f_upper_p(f: FloatArray, df_model: FloatArray | int, df_resid: FloatArray | int) -> FloatArray:
    """Upper-tail p-value ``P(F_{d1,d2} > f)`` (scipy's ``fdtrc``)."""
    return np.asarray(special.fdtrc(df_model, df_resid, f))


def collinear_columns(r_factor: FloatArray, threshold: float = 0.01) -> list[int]:
    """Indices of the columns that take part in the near-dependency of a triangular factor.

    The right singular vector of the smallest singular value of ``r_factor`` (k, k) is the
    combination of standardised columns closest to zero (Golub & Van Loan 2013, section 5.5);
    columns whose weight in it is at least ``threshold`` times the largest weight are named.
    """
    _, _, vt = np.linalg.svd(r_factor)
    weights = np.abs(vt[-1])
    return [int(j) for j in np.flatnonzero(weights >= threshold * weights.max())]
