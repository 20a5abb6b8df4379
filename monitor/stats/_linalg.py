"""Numerical kernels behind ``ols.py``: compensated residuals, standardising, rank diagnosis.

These are private helpers; ``monitor.stats.ols`` is the public face. Shapes are given per function.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

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
    y: FloatArray,
    x: FloatArray,
    slopes: FloatArray,
    intercept: FloatArray | float,
    offset: FloatArray | None = None,
) -> FloatArray:
    """Residuals ``y - offset - intercept - x @ slopes`` as if computed in doubled precision.

    The sum over terms uses error-free transformations (TwoSum, TwoProduct) in the manner of
    Ogita, Rump & Oishi (2005), "Accurate sum and dot product", so the cancellation between the
    response and the fitted value costs no digits; this is what makes iterative refinement
    worth taking (Björck 1967; Golub & Van Loan 2013, chapter 5).

    Shapes: ``y`` and ``offset`` (..., n), ``x`` (..., n, k), ``slopes`` (..., k),
    ``intercept`` scalar or (...,). Where a split overflows (magnitudes beyond ~1e300) the
    plain float64 value is used for that element.
    """
    total = np.array(y, dtype=np.float64, copy=True)
    error = np.zeros_like(total)
    negated = -np.asarray(intercept, dtype=np.float64)[..., None]
    terms: list[FloatArray] = [np.broadcast_to(negated, total.shape)]
    if offset is not None:
        terms.append(-offset)
    for term in terms:
        total, e = _two_sum(total, term)
        error += e
    for j in range(x.shape[-1]):
        product, product_error = _two_product(x[..., j], -slopes[..., j, None])
        total, e = _two_sum(total, product)
        error += e + product_error
    result = total + error
    if not np.all(np.isfinite(result)):
        plain = y - np.asarray(intercept)[..., None] - np.einsum("...nk,...k->...n", x, slopes)
        if offset is not None:
            plain = plain - offset
        result = np.where(np.isfinite(result), result, plain)
    return result


def exact_column_dots(x: FloatArray, v: FloatArray) -> FloatArray:
    """``x.T @ v`` with every entry correctly rounded: TwoProduct, then ``math.fsum``.

    Shapes: ``x`` (n, k), ``v`` (n,); returns (k,). Dekker (1971) for the exact products,
    Shewchuk (1997) for the exact sum behind ``math.fsum``.
    """
    out = np.empty(x.shape[1])
    for j in range(x.shape[1]):
        product, product_error = _two_product(x[:, j], v)
        if np.all(np.isfinite(product_error)):
            out[j] = math.fsum(np.concatenate((product, product_error)))
        else:
            out[j] = math.fsum(x[:, j] * v)
    return out


@dataclass(frozen=True)
class StandardisedQR:
    """The thin QR factorisation of the centred (with an intercept) and scaled predictors.

    ``z = (x - centre) / scale = q @ r``; shapes ``q`` (n, k), ``r`` and ``r_inverse`` (k, k),
    ``centre`` and ``scale`` (k,). Without an intercept ``centre`` is zero.
    """

    q: FloatArray
    r: FloatArray
    r_inverse: FloatArray
    centre: FloatArray
    scale: FloatArray
    intercept: bool


def refine_augmented(
    x: FloatArray,
    y: FloatArray,
    factor: StandardisedQR,
    intercept_value: float,
    slopes: FloatArray,
    steps: int = 1,
) -> tuple[float, FloatArray]:
    """Iterative refinement of a least-squares solution on the augmented system.

    The least-squares solution and its residual solve ``[I X; X' 0] [r; b] = [y; 0]``. Each
    step computes both residuals of that system, ``f = y - r - Xb`` and ``g = -X'r``, in
    compensated precision and solves for the corrections with the existing QR factorisation
    (Björck 1967, "Iterative refinement of linear least squares solutions I", BIT 7). Unlike
    refining ``b`` alone, this also removes the error term that grows with the size of the
    residual, the one that limits plain refinement on noisy, ill-conditioned designs.

    ``x`` (n, k) original predictors, ``y`` (n,); returns the refined ``(intercept, slopes)``
    (the intercept is 0.0 without one).
    """
    n = x.shape[0]
    q, r_factor, r_inverse = factor.q, factor.r, factor.r_inverse
    centre, scale = factor.centre, factor.scale
    root_n = math.sqrt(n)
    residual = compensated_residual(y, x, slopes, intercept_value)
    for _ in range(steps):
        f = compensated_residual(y, x, slopes, intercept_value, offset=residual)
        g = -exact_column_dots(x, residual)
        # In the standardised basis W = [1, z]: X b = W T b, so X'r = T'W'r, W'r = T^-T X'r.
        g0 = -math.fsum(residual) if factor.intercept else 0.0
        g_standard = (g - centre * g0) / scale
        h = np.linalg.solve(r_factor.T, g_standard) if len(g) else g_standard
        d = q.T @ f
        gamma_step = r_inverse @ (d - h)
        slope_step = gamma_step / scale
        residual_step = f - q @ (d - h)
        if factor.intercept:
            level_step = (float(f.sum()) / root_n - g0 / root_n) / root_n
            intercept_value += level_step - float(centre @ slope_step)
            residual_step = residual_step - level_step
        slopes = slopes + slope_step
        residual = residual + residual_step
    return intercept_value, slopes


def t_quantile(probability: float, df: FloatArray | NDArray[np.int64] | float) -> FloatArray:
    """Student-t quantile at ``probability`` for each degrees of freedom (scipy's ``stdtrit``)."""
    return np.asarray(special.stdtrit(np.asarray(df, dtype=np.float64), probability))


def t_two_sided_p(t: FloatArray, df: FloatArray | NDArray[np.int64] | float) -> FloatArray:
    """Two-sided p-value ``2 P(T_df > |t|)``, elementwise (scipy's ``stdtr``)."""
    return np.asarray(2.0 * special.stdtr(np.asarray(df, dtype=np.float64), -np.abs(t)))


def f_upper_p(f: FloatArray, df_model: FloatArray | int, df_resid: FloatArray | int) -> FloatArray:
    """Upper-tail p-value ``P(F_{d1,d2} > f)`` (scipy's ``fdtrc``)."""
    return np.asarray(special.fdtrc(df_model, df_resid, f))


def collinear_columns(r_factor: FloatArray, threshold: float = 0.01) -> list[int]:
    """Indices of the columns that take part in the near-dependency of a triangular factor.

    The right singular vector of the smallest singular value of ``r_factor`` (k, k) is the
    combination of standardised columns closest to zero (Golub & Van Loan 2013, chapter 5);
    columns whose weight in it is at least ``threshold`` times the largest weight are named.
    """
    _, _, vt = np.linalg.svd(r_factor)
    weights = np.abs(vt[-1])
    return [int(j) for j in np.flatnonzero(weights >= threshold * weights.max())]
