"""Ordinary least squares with full inference, for one series (``fit_ols``) or many (``fit_batch``).

Public API (the contract between layers): ``OlsFit``, ``Prediction``, ``fit_ols``, ``BatchFit``,
``BatchPrediction``, ``fit_batch``. The code lives in ``_ols_single`` (one series),
``_ols_batch`` and ``_ols_fast`` (many series) and ``_linalg`` (numerical kernels).

Method of ``fit_ols`` (one code path for every fit):

1. With an intercept the predictor columns are centred on their means; every column is then
   scaled to unit Euclidean norm. The intercept is taken out by the centring, so the factored
   matrix ``Z`` is n x k and well scaled [GVL].
2. Householder QR of ``Z`` (LAPACK through numpy), ``Z = QR``, ``R`` with a positive diagonal;
   coefficients solve ``Rc = Q'y``. ``X'X`` is never formed, let alone inverted [GVL].
3. One step of iterative refinement on the augmented system ``[I X; X' 0][r; b] = [y; 0]``:
   both of its residuals, ``y - r - Xb`` and ``X'r``, are computed in compensated (doubled)
   precision [ORO, Dekker] and the corrections solved with the same factorisation [Björck67].
   This is what takes the ill-conditioned NIST StRD polynomials (Wampler4, Wampler5, Filip) to
   the limit their float64 data allow; a second step changes nothing there.
4. ``(X'X)^-1`` comes from ``R^-1`` in standardised units, rescaled to the original units; the
   intercept's entries use the centred form of the model, ``Var(b0)/s² = 1/n + m'(Z'Z)^-1 m``
   with ``m`` the scaled column means [SL].

Inference [DS, SL]: ``s² = SSE / (n - p)``; ``SE_j = s sqrt([(X'X)^-1]_jj)``;
``t_j = b_j / SE_j`` with two-sided p-values on ``n - p`` degrees of freedom; intervals
``b ± t* SE`` with ``t*`` the t quantile at ``1 - alpha/2``, ``alpha = 1 - level``. With an
intercept R² is centred, adjusted R² is ``1 - (n-1)/(n-p) (1-R²)`` and F has ``(p-1, n-p)``
degrees of freedom. Without one all three are uncentred: ``R² = 1 - SSE / sum y²``, adjusted R²
``1 - n/(n-p) (1-R²)``, F on ``(p, n-p)``. The regression sum of squares is computed from the
fitted values (``y - mean - r`` in compensated precision) and ``R² = SSR / (SSR + SSE)``, so both
R² near 1 and R² near 0 keep their digits.

Prediction at ``x0`` [Weisberg, DS]: ``ŷ0 = x0'b``, leverage ``h0 = x0'(X'X)^-1 x0`` (computed
as ``1/n + ||R^-T z0||²`` in standardised units, a sum of squares), mean-response interval
``ŷ0 ± t* s sqrt(h0)``, prediction interval for a new observation ``ŷ0 ± t* s sqrt(1 + h0)``.
The intervals assume the model's conditions (linearity, independent errors of constant
variance, normality for small n); they are statements about the model, not guarantees.

Special results:

* **Exact fit**: ``sqrt(SSE) <= EXACT_FIT_RTOL * ||y||`` with ``EXACT_FIT_RTOL = 32 eps``
  (about 7e-15): the residual is rounding, not data. The fit is estimable; ``s``, ``SSE`` and
  the standard errors are 0, R² and adjusted R² are 1, t statistics, p-values and the
  correlation's t test are NaN (null in JSON), F and its p-value are None, and the confidence
  and prediction intervals collapse to the estimate. A constant response is an exact fit.
* **Not estimable**: non-finite data, ``n <= p``, values whose squares float64 cannot hold
  (magnitude beyond ``MAGNITUDE_LIMIT`` = 1e100 or, non-zero, below 1e-100), a constant (with an
  intercept; also constant to rounding, centred norm at most ``CONSTANT_RTOL`` = 64 eps of the
  uncentred norm) or all-zero predictor, or collinear columns (smallest singular value of the
  standardised columns at or below ``max(n, k) * eps`` times the largest, numpy's rank rule).
  The result has ``estimable=False``, a ``reason`` that names the column(s) and the cause (rows
  counted from 1), NaN in every numerical field, and ``predict`` raises ``ValueError``.
* **Correlation** (one predictor, with an intercept): Pearson's r and its test
  ``t = r sqrt(n-2) / sqrt(1-r²)`` on ``n - 2`` degrees of freedom [DS]; it equals the slope's t.
  Without an intercept the three fields are None: Pearson's r measures association about the
  means, which a line forced through the origin does not model; the slope's own t test is the
  test of that model.

``fit_batch`` fits s series stacked as (s, n, k) with a row mask. A fast path computes each
series from the cross-product matrix of its standardised columns (a correlation matrix),
Cholesky-factored, with one refinement step; a series whose matrix has a condition number above
``_ols_fast.FAST_CONDITION_LIMIT`` (1e4), or that is near-exact, non-finite, too short or
degenerate, is fitted by ``fit_ols`` instead. Every series agrees with its ``fit_ols`` fit to
1e-10 relative (tests/stats/test_ols_batch.py).

References:
[Björck67] Å. Björck (1967), Iterative refinement of linear least squares solutions I, BIT 7.
[Dekker] T. J. Dekker (1971), A floating-point technique for extending the available precision,
Numerische Mathematik 18.
[DS] N. R. Draper & H. Smith (1998), Applied Regression Analysis, 3rd ed., Wiley.
[GVL] G. H. Golub & C. F. Van Loan (2013), Matrix Computations, 4th ed., chapter 5 (Householder
QR, the full-rank least-squares problem, scaling, iterative improvement).
[ORO] T. Ogita, S. M. Rump & S. Oishi (2005), Accurate sum and dot product, SIAM J. Sci.
Comput. 26.
[SL] G. A. F. Seber & A. J. Lee (2003), Linear Regression Analysis, 2nd ed., Wiley.
[Weisberg] S. Weisberg (2014), Applied Linear Regression, 4th ed., Wiley (leverage, prediction).
"""

from monitor.stats._linalg import FloatArray
from monitor.stats._ols_batch import BatchFit, BatchPrediction, fit_batch
from monitor.stats._ols_single import (
    CONSTANT_RTOL,
    EXACT_FIT_RTOL,
    MAGNITUDE_LIMIT,
    REFINEMENT_STEPS,
    OlsFit,
    Prediction,
    fit_ols,
)

__all__ = [
    "CONSTANT_RTOL",
    "EXACT_FIT_RTOL",
    "MAGNITUDE_LIMIT",
    "REFINEMENT_STEPS",
    "BatchFit",
    "BatchPrediction",
    "FloatArray",
    "OlsFit",
    "Prediction",
    "fit_batch",
    "fit_ols",
]
