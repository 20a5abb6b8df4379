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

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from monitor.stats._batch import FastFit, fast_fit
from monitor.stats._linalg import (
    EPS,
    FloatArray,
    StandardisedQR,
    collinear_columns,
    compensated_residual,
    f_upper_p,
    refine_augmented,
    t_quantile,
    t_two_sided_p,
)

__all__ = [
    "EXACT_FIT_RTOL",
    "BatchFit",
    "BatchPrediction",
    "FloatArray",
    "OlsFit",
    "Prediction",
    "fit_batch",
    "fit_ols",
]

# A residual norm at or below this share of the response's norm counts as rounding (32 units in
# the last place). After refinement an exact relation leaves only the rounding of y itself
# (Wampler2 of NIST StRD: 4.6e-17 of ||y||); noise that small is below what float64 can hold.
EXACT_FIT_RTOL = 32.0 * EPS

# A predictor whose centred norm is below this share of its uncentred norm is constant to
# rounding: its variation is the last digits of its values.
CONSTANT_RTOL = 1e-12

# Steps of augmented-system refinement. One step reaches the limit the float64 data allow on
# every NIST StRD linear file (a second changes nothing there); see tests/stats/test_ols_nist.py.
REFINEMENT_STEPS = 1


def _freeze_owned(array: FloatArray) -> FloatArray:
    array.setflags(write=False)
    return array


def _frozen(array: ArrayLike) -> FloatArray:
    result = np.array(array, dtype=np.float64)
    result.setflags(write=False)
    return result


@dataclass(frozen=True, eq=False)
class Prediction:
    """Point forecasts and both intervals at ``m`` new points; every array is (m,).

    ``lower``/``upper`` bound the prediction interval for a new observation (the one Plumbline
    issues and scores); ``mean_lower``/``mean_upper`` bound the mean response (narrower, never
    used for scoring). ``leverage`` is ``h0 = x0'(X'X)^-1 x0`` of each point.
    """

    point: FloatArray
    mean_lower: FloatArray
    mean_upper: FloatArray
    lower: FloatArray
    upper: FloatArray
    leverage: FloatArray
    level: float


@dataclass(frozen=True, eq=False)
class OlsFit:
    """The least-squares fit of one series, with its inference (see the module docstring).

    Shapes: ``coef``, ``standard_error``, ``t``, ``p_value``, ``lower``, ``upper`` (p,) in the
    order of ``terms``; ``cov_unscaled`` (p, p) is ``(X'X)^-1`` in original units (multiply by
    ``residual_std_error**2`` for the covariance of ``coef``); ``residuals``, ``fitted``,
    ``leverage`` (n,); ``x_min``, ``x_max``, ``x_centre``, ``x_scale`` (k,) per predictor;
    ``r_inverse`` (k, k) is the upper-triangular ``R^-1`` of the standardised columns, so that
    ``(Z'Z)^-1 = R^-1 R^-T`` (used for leverage without forming the inverse).
    """

    terms: tuple[str, ...]
    intercept: bool
    level: float
    n: int
    p: int
    residual_df: int
    estimable: bool
    reason: str | None
    exact_fit: bool
    coef: FloatArray
    standard_error: FloatArray
    t: FloatArray
    p_value: FloatArray
    lower: FloatArray
    upper: FloatArray
    cov_unscaled: FloatArray
    residual_std_error: float
    sse: float
    ssr: float
    sst: float
    r_squared: float
    adj_r_squared: float
    f_statistic: float | None
    f_p_value: float | None
    f_df: tuple[int, int]
    residuals: FloatArray
    fitted: FloatArray
    leverage: FloatArray
    x_min: FloatArray
    x_max: FloatArray
    correlation: float | None
    correlation_t: float | None
    correlation_p_value: float | None
    t_critical: float = math.nan
    x_centre: FloatArray = field(default_factory=lambda: _frozen([]), repr=False)
    x_scale: FloatArray = field(default_factory=lambda: _frozen([]), repr=False)
    r_inverse: FloatArray = field(default_factory=lambda: _frozen([[]]), repr=False)

    @property
    def k(self) -> int:
        """The number of predictors (terms other than the intercept)."""
        return self.p - int(self.intercept)

    def predict(self, x0: ArrayLike) -> Prediction:
        """Forecasts with mean-response and prediction intervals at new points.

        ``x0`` is (m, k), predictors only (no intercept column); a 1-D array of length k is one
        point, and with one predictor a 1-D array of length m is m points. Formulas: Weisberg
        (2014) sections 2.8 and 3.5. Raises ``ValueError`` on a fit that is not estimable.
        """
        if not self.estimable:
            raise ValueError(f"cannot predict from a fit that is not estimable: {self.reason}")
        points = _as_points(x0, self.k)
        slopes = self.coef[int(self.intercept) :]
        base = self.coef[0] if self.intercept else 0.0
        point = base + points @ slopes
        standardised = (points - self.x_centre) / self.x_scale
        projected = standardised @ self.r_inverse
        leverage = np.sum(projected * projected, axis=1)
        if self.intercept:
            leverage = leverage + 1.0 / self.n
        return _intervals(point, leverage, self.residual_std_error, self.t_critical, self.level)


def _as_points(x0: ArrayLike, k: int) -> FloatArray:
    points = np.asarray(x0, dtype=np.float64)
    if points.ndim == 0:
        points = points.reshape(1, 1)
    elif points.ndim == 1:
        points = points.reshape(-1, 1) if k == 1 else points.reshape(1, -1)
    if points.ndim != 2 or points.shape[1] != k:
        raise ValueError(f"x0 must be (m, {k}) predictors without an intercept column")
    return points


def _intervals(
    point: FloatArray, leverage: FloatArray, s: float | FloatArray, t_star: float | FloatArray,
    level: float,
) -> Prediction:
    mean_half = t_star * s * np.sqrt(leverage)
    new_half = t_star * s * np.sqrt(1.0 + leverage)
    return Prediction(
        point=_frozen(point),
        mean_lower=_frozen(point - mean_half),
        mean_upper=_frozen(point + mean_half),
        lower=_frozen(point - new_half),
        upper=_frozen(point + new_half),
        leverage=_frozen(leverage),
        level=level,
    )


def _check_level(level: float) -> float:
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be strictly between 0 and 1 (nominal coverage), got {level}")
    return level


def _terms(names: Sequence[str] | None, k: int, intercept: bool) -> tuple[str, ...]:
    predictor_names = tuple(f"x{j + 1}" for j in range(k)) if names is None else tuple(names)
    if len(predictor_names) != k:
        raise ValueError(f"names has {len(predictor_names)} entries for {k} predictors")
    if len(set(predictor_names)) != k:
        raise ValueError(f"predictor names must be distinct: {predictor_names}")
    if intercept and "intercept" in predictor_names:
        raise ValueError("a predictor may not be named 'intercept' when the model has one")
    if not intercept and k == 0:
        raise ValueError("a model without an intercept needs at least one predictor")
    return (("intercept",) if intercept else ()) + predictor_names


def _not_estimable(
    terms: tuple[str, ...], intercept: bool, level: float, n: int, x: FloatArray, reason: str,
) -> OlsFit:
    p = len(terms)
    k = x.shape[1]
    nan_p = _frozen(np.full(p, math.nan))
    nan_n = _frozen(np.full(n, math.nan))
    with np.errstate(invalid="ignore"):
        finite = np.where(np.isfinite(x), x, np.nan)
        x_min = np.nanmin(finite, axis=0) if n and np.isfinite(finite).any() else np.full(k, np.nan)
        x_max = np.nanmax(finite, axis=0) if n and np.isfinite(finite).any() else np.full(k, np.nan)
    df_model = p - 1 if intercept else p
    one_predictor = intercept and k == 1
    return OlsFit(
        terms=terms, intercept=intercept, level=level, n=n, p=p, residual_df=n - p,
        estimable=False, reason=reason, exact_fit=False,
        coef=nan_p, standard_error=nan_p, t=nan_p, p_value=nan_p, lower=nan_p, upper=nan_p,
        cov_unscaled=_frozen(np.full((p, p), math.nan)),
        residual_std_error=math.nan, sse=math.nan, ssr=math.nan, sst=math.nan,
        r_squared=math.nan, adj_r_squared=math.nan, f_statistic=None, f_p_value=None,
        f_df=(df_model, n - p), residuals=nan_n, fitted=nan_n, leverage=nan_n,
        x_min=_frozen(x_min), x_max=_frozen(x_max),
        correlation=math.nan if one_predictor else None,
        correlation_t=math.nan if one_predictor else None,
        correlation_p_value=math.nan if one_predictor else None,
        t_critical=math.nan,
        x_centre=_frozen(np.full(k, math.nan)), x_scale=_frozen(np.full(k, math.nan)),
        r_inverse=_frozen(np.full((k, k), math.nan)),
    )


def _first_nonfinite(values: FloatArray) -> int:
    return int(np.flatnonzero(~np.isfinite(values))[0])


def _diagnose_inputs(
    x: FloatArray, y: FloatArray, terms: tuple[str, ...], intercept: bool
) -> str | None:
    """The reason the data cannot be fitted before any factorisation, or None."""
    n, k = x.shape
    names = terms[int(intercept) :]
    if not np.all(np.isfinite(y)):
        row = _first_nonfinite(y) + 1
        return f"the response has a non-finite value (NaN or infinity) in row {row}"
    for j in range(k):
        if not np.all(np.isfinite(x[:, j])):
            row = _first_nonfinite(x[:, j]) + 1
            return f"column {names[j]!r} has a non-finite value (NaN or infinity) in row {row}"
    p = len(terms)
    if n <= p:
        return (
            f"too few rows: {n} row(s) for {p} term(s) ({', '.join(terms)}); "
            f"inference needs at least {p + 1}"
        )
    for j in range(k):
        column = x[:, j]
        if intercept:
            spread = np.linalg.norm(column - column.mean())
            if np.ptp(column) == 0.0 or spread <= CONSTANT_RTOL * np.linalg.norm(column):
                return (
                    f"column {names[j]!r} is constant (every row {column[0]:.6g}); its slope "
                    "cannot be told apart from the intercept"
                )
        elif not np.any(column):
            return f"column {names[j]!r} is zero in every row; its slope cannot be estimated"
    return None


def fit_ols(
    x: ArrayLike,
    y: ArrayLike,
    *,
    intercept: bool = True,
    level: float = 0.95,
    names: Sequence[str] | None = None,
) -> OlsFit:
    """Fit ``y = b0 + x b + e`` (or ``y = x b + e`` without an intercept) by least squares.

    ``x`` is (n, k) predictors without an intercept column (a 1-D array is one predictor);
    ``y`` is (n,). ``level`` is the nominal coverage of every interval (alpha = 1 - level).
    ``names`` names the k predictors (default ``x1..xk``). Returns an ``OlsFit``; data that
    cannot be fitted give ``estimable=False`` with a reason, never an exception. Wrong shapes,
    a level outside (0, 1) or bad names raise ``ValueError``. Method and formula sources: the
    module docstring (Golub & Van Loan 2013; Björck 1996; Draper & Smith 1998; Seber & Lee 2003).
    """
    level = _check_level(level)
    x_arr = np.asarray(x, dtype=np.float64)
    if x_arr.ndim == 1:
        x_arr = x_arr.reshape(-1, 1)
    y_arr = np.asarray(y, dtype=np.float64)
    if x_arr.ndim != 2 or y_arr.ndim != 1 or x_arr.shape[0] != y_arr.shape[0]:
        raise ValueError(f"x must be (n, k) and y (n,); got {x_arr.shape} and {y_arr.shape}")
    n, k = x_arr.shape
    terms = _terms(names, k, intercept)
    reason = _diagnose_inputs(x_arr, y_arr, terms, intercept)
    if reason is not None:
        return _not_estimable(terms, intercept, level, n, x_arr, reason)

    centre = x_arr.mean(axis=0) if intercept else np.zeros(k)
    shifted = x_arr - centre
    scale = np.linalg.norm(shifted, axis=0)
    z = shifted / scale
    y_mean = float(y_arr.mean()) if intercept else 0.0

    if k:
        q, r = np.linalg.qr(z)
        # Make R's diagonal positive (R is then the Cholesky factor of Z'Z, the form the
        # batched path computes), so r_inverse is the same in both.
        signs = np.where(np.diag(r) < 0.0, -1.0, 1.0)
        q = q * signs
        r = r * signs[:, None]
        singular = np.linalg.svd(r, compute_uv=False)
        if singular[-1] <= singular[0] * max(n, k) * EPS:
            names_hit = [terms[int(intercept) + j] for j in collinear_columns(r)]
            reason = (
                f"columns {', '.join(repr(nm) for nm in names_hit)} are collinear: one is a "
                f"linear combination of the others{' and the intercept' if intercept else ''} "
                f"(condition number {singular[0] / max(singular[-1], 1e-300):.3g} after "
                "standardising); drop one of them"
            )
            return _not_estimable(terms, intercept, level, n, x_arr, reason)
        r_inverse = np.linalg.solve(r, np.eye(k))
        r_inverse = np.triu(r_inverse)
    else:
        q = np.zeros((n, 0))
        r = np.zeros((0, 0))
        r_inverse = np.zeros((0, 0))

    gamma = r_inverse @ (q.T @ (y_arr - y_mean))
    slopes = gamma / scale
    b0 = y_mean - float(centre @ slopes)
    factor = StandardisedQR(q=q, r=r, r_inverse=r_inverse, centre=centre, scale=scale,
                            intercept=intercept)
    b0, slopes = refine_augmented(x_arr, y_arr, factor, b0, slopes, steps=REFINEMENT_STEPS)
    residual = compensated_residual(y_arr, x_arr, slopes, b0)
    fitted = y_arr - residual

    sse = float(residual @ residual)
    exact = math.sqrt(sse) <= EXACT_FIT_RTOL * float(np.linalg.norm(y_arr))
    p = len(terms)
    df = n - p
    # Fitted values about the mean, as y - mean - residual in compensated precision: accurate
    # whether R² is near 1 or near 0 (a sum of the coefficient terms would cancel on
    # polynomial designs).
    fitted_about_mean = compensated_residual(
        y_arr, np.zeros((n, 0)), np.zeros(0), y_mean, offset=residual
    )
    ssr = float(fitted_about_mean @ fitted_about_mean)
    sst = float(np.sum((y_arr - y_mean) ** 2))
    if exact:
        sse = 0.0
        residual = np.zeros(n)
        fitted = y_arr.copy()
    total = ssr + sse
    r_squared = 1.0 if exact or total == 0.0 else ssr / total
    adj_factor = (n - 1) / df if intercept else n / df
    adj_r_squared = 1.0 if exact else 1.0 - adj_factor * (1.0 - r_squared)

    slope_cov = (r_inverse @ r_inverse.T) / np.outer(scale, scale)
    cov = np.empty((p, p))
    if intercept:
        scaled_centre = centre / scale
        along = scaled_centre @ r_inverse
        cov[0, 0] = 1.0 / n + float(along @ along)
        cross = -(slope_cov @ centre)
        cov[0, 1:] = cross
        cov[1:, 0] = cross
        cov[1:, 1:] = slope_cov
        coef = np.concatenate(([b0], slopes))
    else:
        cov[:, :] = slope_cov
        coef = slopes

    s = 0.0 if exact else math.sqrt(sse / df)
    standard_error = s * np.sqrt(np.diag(cov))
    t_star = float(t_quantile(1.0 - (1.0 - level) / 2.0, df))
    if exact:
        t_values = np.full(p, math.nan)
        p_values = np.full(p, math.nan)
    else:
        t_values = coef / standard_error
        p_values = t_two_sided_p(t_values, df)
    half = t_star * standard_error

    df_model = p - 1 if intercept else p
    f_statistic: float | None = None
    f_p_value: float | None = None
    if df_model > 0 and not exact:
        f_value = (ssr / df_model) / (sse / df)
        f_statistic = f_value
        f_p_value = float(f_upper_p(np.asarray(f_value), df_model, df))

    leverage = np.sum(q * q, axis=1) + (1.0 / n if intercept else 0.0)

    correlation: float | None = None
    correlation_t: float | None = None
    correlation_p: float | None = None
    if intercept and k == 1:
        correlation = math.copysign(math.sqrt(min(max(r_squared, 0.0), 1.0)), slopes[0])
        if exact:
            correlation_t = math.nan
            correlation_p = math.nan
        else:
            # 1 - r² as SSE / (SSR + SSE): no cancellation when r² is close to 1.
            correlation_t = correlation * math.sqrt(n - 2) / math.sqrt(sse / total)
            correlation_p = float(t_two_sided_p(np.asarray(correlation_t), n - 2))

    return OlsFit(
        terms=terms, intercept=intercept, level=level, n=n, p=p, residual_df=df,
        estimable=True, reason=None, exact_fit=exact,
        coef=_frozen(coef), standard_error=_frozen(standard_error), t=_frozen(t_values),
        p_value=_frozen(p_values), lower=_frozen(coef - half), upper=_frozen(coef + half),
        cov_unscaled=_frozen(cov), residual_std_error=s, sse=sse, ssr=ssr, sst=sst,
        r_squared=r_squared, adj_r_squared=adj_r_squared, f_statistic=f_statistic,
        f_p_value=f_p_value, f_df=(df_model, df), residuals=_frozen(residual),
        fitted=_frozen(fitted), leverage=_frozen(leverage),
        x_min=_frozen(x_arr.min(axis=0) if n else np.full(k, np.nan)),
        x_max=_frozen(x_arr.max(axis=0) if n else np.full(k, np.nan)),
        correlation=correlation, correlation_t=correlation_t, correlation_p_value=correlation_p,
        t_critical=t_star, x_centre=_frozen(centre), x_scale=_frozen(scale),
        r_inverse=_frozen(r_inverse),
    )


@dataclass(frozen=True, eq=False)
class BatchPrediction:
    """``Prediction`` for s series at m points each; every array is (s, m)."""

    point: FloatArray
    mean_lower: FloatArray
    mean_upper: FloatArray
    lower: FloatArray
    upper: FloatArray
    leverage: FloatArray
    level: float


@dataclass(frozen=True, eq=False)
class BatchFit:
    """The fits of s series at once: ``OlsFit``'s fields with a leading series axis.

    Shapes: ``n``, ``residual_df``, ``estimable``, ``exact_fit``, ``residual_std_error``,
    ``sse``, ``ssr``, ``sst``, ``r_squared``, ``adj_r_squared``, ``f_statistic``,
    ``f_p_value``, ``t_critical`` (s,); ``f_df`` (s, 2); ``reason`` a list of s entries;
    ``coef`` .. ``upper`` (s, p); ``cov_unscaled`` (s, p, p); ``residuals``, ``fitted``,
    ``leverage``, ``mask`` (s, n_max), NaN at rows the mask leaves out; ``x_min``, ``x_max``,
    ``x_centre``, ``x_scale`` (s, k); ``r_inverse`` (s, k, k); ``correlation``,
    ``correlation_t``, ``correlation_p_value`` (s,) with one predictor and an intercept, else
    None. Where ``OlsFit`` has None (F without a model term, or an exact fit), the batch has NaN.
    ``fast_path`` (s,) tells which series took the cross-product route (the rest were fitted by
    ``fit_ols``).
    """

    terms: tuple[str, ...]
    intercept: bool
    level: float
    n: NDArray[np.int64]
    p: int
    residual_df: NDArray[np.int64]
    estimable: NDArray[np.bool_]
    reason: list[str | None]
    exact_fit: NDArray[np.bool_]
    coef: FloatArray
    standard_error: FloatArray
    t: FloatArray
    p_value: FloatArray
    lower: FloatArray
    upper: FloatArray
    cov_unscaled: FloatArray
    residual_std_error: FloatArray
    sse: FloatArray
    ssr: FloatArray
    sst: FloatArray
    r_squared: FloatArray
    adj_r_squared: FloatArray
    f_statistic: FloatArray
    f_p_value: FloatArray
    f_df: NDArray[np.int64]
    residuals: FloatArray
    fitted: FloatArray
    leverage: FloatArray
    mask: NDArray[np.bool_]
    x_min: FloatArray
    x_max: FloatArray
    correlation: FloatArray | None
    correlation_t: FloatArray | None
    correlation_p_value: FloatArray | None
    t_critical: FloatArray
    x_centre: FloatArray
    x_scale: FloatArray
    r_inverse: FloatArray
    fast_path: NDArray[np.bool_]

    @property
    def s(self) -> int:
        """The number of series."""
        return int(self.estimable.shape[0])

    @property
    def k(self) -> int:
        """The number of predictors (terms other than the intercept)."""
        return self.p - int(self.intercept)

    def series(self, i: int) -> OlsFit:
        """The fit of series ``i`` as an ``OlsFit`` over its used rows only."""
        rows = self.mask[i]
        exact = bool(self.exact_fit[i])
        estimable = bool(self.estimable[i])

        def optional(values: FloatArray | None) -> float | None:
            return None if values is None else float(values[i])

        f_none = not estimable or exact or math.isnan(self.f_statistic[i])
        return OlsFit(
            terms=self.terms, intercept=self.intercept, level=self.level, n=int(self.n[i]),
            p=self.p, residual_df=int(self.residual_df[i]), estimable=estimable,
            reason=self.reason[i], exact_fit=exact, coef=self.coef[i],
            standard_error=self.standard_error[i], t=self.t[i], p_value=self.p_value[i],
            lower=self.lower[i], upper=self.upper[i], cov_unscaled=self.cov_unscaled[i],
            residual_std_error=float(self.residual_std_error[i]), sse=float(self.sse[i]),
            ssr=float(self.ssr[i]), sst=float(self.sst[i]), r_squared=float(self.r_squared[i]),
            adj_r_squared=float(self.adj_r_squared[i]),
            f_statistic=None if f_none else float(self.f_statistic[i]),
            f_p_value=None if f_none else float(self.f_p_value[i]),
            f_df=(int(self.f_df[i, 0]), int(self.f_df[i, 1])),
            residuals=_frozen(self.residuals[i, rows]), fitted=_frozen(self.fitted[i, rows]),
            leverage=_frozen(self.leverage[i, rows]), x_min=self.x_min[i], x_max=self.x_max[i],
            correlation=optional(self.correlation), correlation_t=optional(self.correlation_t),
            correlation_p_value=optional(self.correlation_p_value),
            t_critical=float(self.t_critical[i]), x_centre=self.x_centre[i],
            x_scale=self.x_scale[i], r_inverse=self.r_inverse[i],
        )

    def predict(self, x0: ArrayLike) -> BatchPrediction:
        """Forecasts and both intervals at m new points per series; ``x0`` is (s, m, k).

        A 2-D ``x0`` (s, k) is one point per series. Series that are not estimable get NaN
        (check ``estimable``); formulas as ``OlsFit.predict`` (Weisberg 2014).
        """
        points = np.asarray(x0, dtype=np.float64)
        if points.ndim == 2:
            points = points[:, None, :]
        if points.ndim != 3 or points.shape[0] != self.s or points.shape[2] != self.k:
            raise ValueError(f"x0 must be ({self.s}, m, {self.k}) predictors per series")
        slopes = self.coef[:, int(self.intercept) :]
        point = np.einsum("smk,sk->sm", points, slopes)
        if self.intercept:
            point = point + self.coef[:, :1]
        standardised = (points - self.x_centre[:, None, :]) / self.x_scale[:, None, :]
        projected = np.matmul(standardised, self.r_inverse)
        leverage = np.sum(projected * projected, axis=2)
        if self.intercept:
            leverage = leverage + 1.0 / self.n[:, None]
        single = _intervals(
            point, leverage, self.residual_std_error[:, None], self.t_critical[:, None],
            self.level,
        )
        return BatchPrediction(
            point=single.point, mean_lower=single.mean_lower, mean_upper=single.mean_upper,
            lower=single.lower, upper=single.upper, leverage=single.leverage, level=self.level,
        )


def fit_batch(
    x: ArrayLike,
    y: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    level: float = 0.95,
    names: Sequence[str] | None = None,
) -> BatchFit:
    """Fit s series at once; each series' result equals ``fit_ols`` on its used rows.

    ``x`` is (s, n, k) predictors without an intercept column, ``y`` (s, n), ``mask`` (s, n)
    bool with True for rows used (default: all rows). Rows the mask leaves out may hold
    anything, NaN included. A series that cannot be fitted is ``estimable=False`` with its
    reason and does not affect the others.
    """
    level = _check_level(level)
    x_arr = np.asarray(x, dtype=np.float64)
    y_arr = np.asarray(y, dtype=np.float64)
    if x_arr.ndim == 2:
        x_arr = x_arr[:, :, None]
    if x_arr.ndim != 3 or y_arr.shape != x_arr.shape[:2]:
        raise ValueError(f"x must be (s, n, k) and y (s, n); got {x_arr.shape} and {y_arr.shape}")
    s_count, n_max, k = x_arr.shape
    terms = _terms(names, k, intercept)
    mask_arr = (
        np.ones((s_count, n_max), dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    )
    if mask_arr.shape != (s_count, n_max):
        raise ValueError(f"mask must be ({s_count}, {n_max}); got {mask_arr.shape}")
    fast = fast_fit(x_arr, y_arr, mask_arr, intercept)
    out = _fast_arrays(fast, y_arr, mask_arr, intercept, level)
    reasons: list[str | None] = [None] * s_count
    for i in np.flatnonzero(fast.needs_fallback):
        single = fit_ols(x_arr[i, mask_arr[i]], y_arr[i, mask_arr[i]], intercept=intercept,
                         level=level, names=terms[int(intercept) :])
        _copy_into(out, int(i), single, mask_arr[i])
        reasons[i] = single.reason
    with_correlation = intercept and k == 1
    frozen = {name: _freeze_owned(values) for name, values in out.items()}
    return BatchFit(
        terms=terms, intercept=intercept, level=level, n=fast.n, p=len(terms),
        residual_df=out["residual_df"].astype(np.int64), estimable=out["estimable"] > 0,
        reason=reasons, exact_fit=out["exact_fit"] > 0,
        coef=frozen["coef"], standard_error=frozen["standard_error"], t=frozen["t"],
        p_value=frozen["p_value"], lower=frozen["lower"], upper=frozen["upper"],
        cov_unscaled=frozen["cov_unscaled"], residual_std_error=frozen["residual_std_error"],
        sse=frozen["sse"], ssr=frozen["ssr"], sst=frozen["sst"], r_squared=frozen["r_squared"],
        adj_r_squared=frozen["adj_r_squared"], f_statistic=frozen["f_statistic"],
        f_p_value=frozen["f_p_value"], f_df=out["f_df"].astype(np.int64),
        residuals=frozen["residuals"], fitted=frozen["fitted"], leverage=frozen["leverage"],
        mask=mask_arr, x_min=frozen["x_min"], x_max=frozen["x_max"],
        correlation=frozen["correlation"] if with_correlation else None,
        correlation_t=frozen["correlation_t"] if with_correlation else None,
        correlation_p_value=frozen["correlation_p_value"] if with_correlation else None,
        t_critical=frozen["t_critical"], x_centre=frozen["x_centre"],
        x_scale=frozen["x_scale"], r_inverse=frozen["r_inverse"],
        fast_path=~fast.needs_fallback,
    )


def _fast_arrays(
    fast: FastFit, y: FloatArray, mask: NDArray[np.bool_], intercept: bool, level: float
) -> dict[str, FloatArray]:
    """Inference for every series from the fast path, by the formulas ``fit_ols`` uses."""
    s_count, k = fast.slopes.shape
    p = k + int(intercept)
    n = fast.n.astype(np.float64)
    df = fast.n - p
    safe_df = np.maximum(df, 1).astype(np.float64)
    scale = fast.scale
    with np.errstate(divide="ignore", invalid="ignore"):
        inverse_n = 1.0 / np.maximum(n, 1.0)
        slope_cov = np.matmul(fast.r_inverse, np.swapaxes(fast.r_inverse, 1, 2))
        slope_cov = slope_cov / (scale[:, :, None] * scale[:, None, :])
        cov = np.empty((s_count, p, p))
        if intercept:
            along = np.einsum("sk,skl->sl", fast.centre / scale, fast.r_inverse)
            cov[:, 0, 0] = inverse_n + np.einsum("sk,sk->s", along, along)
            cross = -np.einsum("skl,sl->sk", slope_cov, fast.centre)
            cov[:, 0, 1:] = cross
            cov[:, 1:, 0] = cross
            cov[:, 1:, 1:] = slope_cov
            coef = np.concatenate((fast.intercept_value[:, None], fast.slopes), axis=1)
        else:
            cov[:] = slope_cov
            coef = fast.slopes.copy()
        s_hat = np.sqrt(fast.sse / safe_df)
        standard_error = s_hat[:, None] * np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
        t_values = coef / standard_error
        p_values = t_two_sided_p(t_values, safe_df[:, None])
        unique_df, where = np.unique(safe_df, return_inverse=True)
        t_star = t_quantile(1.0 - (1.0 - level) / 2.0, unique_df)[where]
        half = t_star[:, None] * standard_error
        total = fast.ssr + fast.sse
        r_squared = fast.ssr / total
        adj_factor = (n - 1.0) / safe_df if intercept else n / safe_df
        adj_r_squared = 1.0 - adj_factor * (1.0 - r_squared)
        df_model = p - 1 if intercept else p
        if df_model > 0:
            f_statistic = (fast.ssr / df_model) / (fast.sse / safe_df)
            f_p_value = f_upper_p(f_statistic, df_model, safe_df)
        else:
            f_statistic = np.full(s_count, np.nan)
            f_p_value = np.full(s_count, np.nan)
        if intercept and k == 1:
            correlation = np.copysign(np.sqrt(np.clip(r_squared, 0.0, 1.0)), fast.slopes[:, 0])
            correlation_t = correlation * np.sqrt(n - 2.0) / np.sqrt(fast.sse / total)
            correlation_p = t_two_sided_p(correlation_t, n - 2.0)
        else:
            correlation = correlation_t = correlation_p = np.full(s_count, np.nan)
    return {
        "residual_df": df.astype(np.float64),
        "estimable": np.ones(s_count),
        "exact_fit": np.zeros(s_count),
        "coef": coef,
        "standard_error": standard_error,
        "t": t_values,
        "p_value": p_values,
        "lower": coef - half,
        "upper": coef + half,
        "cov_unscaled": cov,
        "residual_std_error": s_hat,
        "sse": fast.sse,
        "ssr": fast.ssr,
        "sst": fast.sst,
        "r_squared": r_squared,
        "adj_r_squared": adj_r_squared,
        "f_statistic": f_statistic,
        "f_p_value": f_p_value,
        "f_df": np.column_stack((np.full(s_count, df_model), df)).astype(np.float64),
        "residuals": fast.residuals,
        "fitted": y - fast.residuals,
        "leverage": fast.leverage,
        "x_min": fast.x_min,
        "x_max": fast.x_max,
        "correlation": correlation,
        "correlation_t": correlation_t,
        "correlation_p_value": correlation_p,
        "t_critical": t_star,
        "x_centre": fast.centre,
        "x_scale": scale,
        "r_inverse": fast.r_inverse,
    }


_ROW_FIELDS = ("residuals", "fitted", "leverage")
_SCALAR_FIELDS = (
    "residual_df", "estimable", "exact_fit", "residual_std_error", "sse", "ssr", "sst",
    "r_squared", "adj_r_squared", "f_statistic", "f_p_value", "correlation", "correlation_t",
    "correlation_p_value", "t_critical",
)
_ARRAY_FIELDS = (
    "coef", "standard_error", "t", "p_value", "lower", "upper", "cov_unscaled", "x_centre",
    "x_scale", "r_inverse", "f_df", "x_min", "x_max",
)


def _copy_into(out: dict[str, FloatArray], i: int, fit: OlsFit, rows: NDArray[np.bool_]) -> None:
    """Write one ``fit_ols`` result into row ``i`` of the batch arrays (None becomes NaN)."""
    for name in _SCALAR_FIELDS:
        value = getattr(fit, name)
        out[name][i] = math.nan if value is None else float(value)
    for name in _ARRAY_FIELDS:
        out[name][i] = np.asarray(getattr(fit, name), dtype=np.float64)
    for name in _ROW_FIELDS:
        out[name][i] = math.nan
        out[name][i, rows] = getattr(fit, name)
