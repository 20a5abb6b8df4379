"""One series: ``OlsFit``, ``Prediction`` and ``fit_ols``. Import them from ``monitor.stats.ols``.

Method and formula sources are in the docstring of ``monitor.stats.ols``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TypeVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

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

ArrayT = TypeVar("ArrayT", bound=np.generic)

# A residual norm at or below this share of the response's norm counts as rounding (32 units in
# the last place). After refinement an exact relation leaves only the rounding of y itself
# (Wampler2 of NIST StRD: 4.6e-17 of ||y||); noise that small is below what float64 can hold.
EXACT_FIT_RTOL = 32.0 * EPS

# A predictor whose centred norm is below this share of its uncentred norm is constant to
# rounding: its variation is the last digits of its values.
CONSTANT_RTOL = 64.0 * EPS

# Data whose magnitudes lie outside [1/MAGNITUDE_LIMIT, MAGNITUDE_LIMIT] (zero apart) would
# overflow or underflow in sums of squares; such a column or response is reported, not fitted.
MAGNITUDE_LIMIT = 1e100

# Steps of augmented-system refinement. One step reaches the limit the float64 data allow on
# every NIST StRD linear file (a second changes nothing there); see tests/stats/test_ols_nist.py.
REFINEMENT_STEPS = 1


def _freeze_owned(array: NDArray[ArrayT]) -> NDArray[ArrayT]:
    """Make an array this module created read-only, without a copy."""
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
        (2014), Draper & Smith (1998). Raises ``ValueError`` on a fit that is not estimable.
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
    finite = np.isfinite(x)
    has_finite = finite.any(axis=0)
    x_min = np.where(has_finite, np.where(finite, x, np.inf).min(axis=0, initial=np.inf), np.nan)
    x_max = np.where(has_finite, np.where(finite, x, -np.inf).max(axis=0, initial=-np.inf),
                     np.nan)
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
    for label, values in (("the response", y), *((f"column {nm!r}", x[:, j])
                                                   for j, nm in enumerate(names))):
        largest = float(np.max(np.abs(values))) if n else 0.0
        if largest > MAGNITUDE_LIMIT or 0.0 < largest < 1.0 / MAGNITUDE_LIMIT:
            return (
                f"{label} has values of magnitude {largest:.3g}, beyond what float64 sums of "
                f"squares can hold (1e-100 to 1e100); change its units"
            )
    for j in range(k):
        column = x[:, j]
        if intercept:
            if np.ptp(column) == 0.0:
                return (
                    f"column {names[j]!r} is constant (every row {column[0]:.6g}); its slope "
                    "cannot be told apart from the intercept"
                )
            spread = np.linalg.norm(column - column.mean())
            if spread <= CONSTANT_RTOL * np.linalg.norm(column):
                return (
                    f"column {names[j]!r} is constant to rounding (its rows differ only in the "
                    f"last digits of {column[0]:.6g}); its slope cannot be told apart from the "
                    "intercept"
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
    # Without predictors the regression sum of squares is 0 by definition, not rounding.
    ssr = float(fitted_about_mean @ fitted_about_mean) if k else 0.0
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


