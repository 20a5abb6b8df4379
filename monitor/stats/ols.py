"""Ordinary least squares with full inference, for one series (``fit_ols``) or many (``fit_batch``).

Method (one code path for every fit):

1. With an intercept the predictor columns are centred on their means, then every column is
   scaled to unit Euclidean norm (Golub & Van Loan 2013, section 5.3.7, on column scaling). The
   intercept is taken out by the centring, so the factored matrix ``Z`` is n x k.
2. Householder QR of ``Z`` (LAPACK through numpy): ``Z = QR``; coefficients solve ``Rc = Q'y``.
   ``X'X`` is never formed, let alone inverted (Golub & Van Loan 2013, section 5.3).
3. One step of iterative refinement: the residual of the original-units problem is computed in
   compensated (doubled) precision and its least-squares correction is solved with the same
   factorisation (Björck 1996, section 2.9; Golub & Van Loan 2013, section 5.3.8).
4. ``(X'X)^-1`` comes from ``R^-1`` in standardised units, then is rescaled to the original
   units; the intercept's row uses ``1/n + m' (Z'Z)^-1 m`` with ``m`` the scaled column means
   (Seber & Lee 2003, section 3.11, the centred form of the model).

Inference (Draper & Smith 1998, chapters 1-3 and 5; Seber & Lee 2003, chapters 3-5):
``s^2 = SSE / (n - p)``; ``SE_j = s sqrt([(X'X)^-1]_jj)``; ``t_j = b_j / SE_j`` with two-sided
p-values on ``n - p`` degrees of freedom; intervals ``b ± t* SE`` with ``t*`` the t quantile at
``1 - alpha/2``, ``alpha = 1 - level``. With an intercept R² is centred, adjusted R² is
``1 - (n-1)/(n-p) (1-R²)`` and F has ``(p-1, n-p)`` degrees of freedom. Without one all three
are uncentred: ``R² = 1 - SSE / sum y²``, adjusted R² ``1 - n/(n-p) (1-R²)``, F on ``(p, n-p)``.

Prediction at ``x0`` (Weisberg 2014, sections 2.8 and 3.5; Draper & Smith 1998, section 3.3):
``ŷ0 = x0'b``, leverage ``h0 = x0'(X'X)^-1 x0``, mean-response interval ``ŷ0 ± t* s sqrt(h0)``,
prediction interval ``ŷ0 ± t* s sqrt(1 + h0)``.

Special results:

* **Exact fit**: ``sqrt(SSE) <= EXACT_FIT_RTOL * ||y||`` (the residual is rounding, not data).
  The fit is estimable; ``s``, ``SSE`` and the standard errors are 0, R² and adjusted R² are 1,
  t statistics, p-values and the correlation's t test are NaN, F and its p-value are None,
  and the confidence and prediction intervals collapse to the estimate.
* **Not estimable**: non-finite data, ``n <= p``, a constant (with an intercept) or all-zero
  predictor, or collinear columns (condition number of the standardised columns beyond
  ``1 / (max(n, k) * eps)``, numpy's rank rule). The result has ``estimable=False``, a ``reason``
  that names the column(s) and the cause, and NaN in every numerical field.
* **Correlation** (one predictor, with an intercept): Pearson's r and its test
  ``t = r sqrt(n-2) / sqrt(1-r²)`` on ``n - 2`` degrees of freedom (Draper & Smith 1998,
  section 1.6). Without an intercept the fields are None: the usual correlation measures linear
  association about the means, which a line forced through the origin does not fit; the slope's
  own t test is the test of that model.
"""


from monitor.stats._linalg import FloatArray
from monitor.stats._ols_batch import BatchFit, BatchPrediction, fit_batch
from monitor.stats._ols_single import (
    CONSTANT_RTOL,
    EXACT_FIT_RTOL,
    REFINEMENT_STEPS,
    OlsFit,
    Prediction,
    fit_ols,
)

__all__ = [
    "CONSTANT_RTOL",
    "EXACT_FIT_RTOL",
    "REFINEMENT_STEPS",
    "BatchFit",
    "BatchPrediction",
    "FloatArray",
    "OlsFit",
    "Prediction",
    "fit_batch",
    "fit_ols",
]
