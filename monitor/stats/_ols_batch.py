"""Many series at once: ``BatchFit``, ``BatchPrediction`` and ``fit_batch``.

Import them from ``monitor.stats.ols``. The fast path is in ``_ols_fast``; series it cannot
serve are fitted one at a time by ``fit_ols``, so every series equals its one-at-a-time fit.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, fields
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from monitor.stats._linalg import FloatArray, f_upper_p, t_quantile, t_two_sided_p
from monitor.stats._ols_fast import FastFit, fast_fit
from monitor.stats._ols_single import (
    OlsFit,
    _check_level,
    _freeze_owned,
    _frozen,
    _intervals,
    _terms,
    fit_ols,
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


_SHARED = frozenset({"terms", "intercept", "level", "p"})


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

    def take(self, rows: slice) -> BatchFit:
        """The fits of the series in ``rows`` (views of this batch's arrays)."""
        picked: dict[str, Any] = {}
        for item in fields(self):
            value = getattr(self, item.name)
            picked[item.name] = value if item.name in _SHARED else (
                None if value is None else value[rows])
        return BatchFit(**picked)

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
        np.ones((s_count, n_max), dtype=bool) if mask is None else np.array(mask, dtype=bool)
    )
    if mask_arr.shape != (s_count, n_max):
        raise ValueError(f"mask must be ({s_count}, {n_max}); got {mask_arr.shape}")
    fast = fast_fit(x_arr, y_arr, mask_arr, intercept)
    out = _fast_arrays(fast, y_arr, mask_arr, intercept, level)
    reasons: list[str | None] = [None] * s_count
    # Series with no rows at all (common: the fits after a break, for the many series without
    # one) all get the one result fit_ols gives for no rows, computed once and set side by side.
    empty = np.flatnonzero(fast.needs_fallback & (fast.n == 0))
    if empty.size:
        first = int(empty[0])
        single = _fit_of_no_rows(k, intercept, level, tuple(terms[int(intercept) :]))
        _copy_into(out, empty, single, mask_arr[first])
        for i in empty:
            reasons[i] = single.reason
    for i in np.flatnonzero(fast.needs_fallback & (fast.n != 0)):
        single = fit_ols(x_arr[i, mask_arr[i]], y_arr[i, mask_arr[i]], intercept=intercept,
                         level=level, names=terms[int(intercept) :])
        _copy_into(out, int(i), single, mask_arr[i])
        reasons[i] = single.reason
    with_correlation = intercept and k == 1
    frozen = {name: _freeze_owned(values) for name, values in out.items()}
    return BatchFit(
        terms=terms, intercept=intercept, level=level, n=_freeze_owned(fast.n), p=len(terms),
        residual_df=_freeze_owned(out["residual_df"].astype(np.int64)),
        estimable=_freeze_owned(out["estimable"] > 0),
        reason=reasons, exact_fit=_freeze_owned(out["exact_fit"] > 0),
        coef=frozen["coef"], standard_error=frozen["standard_error"], t=frozen["t"],
        p_value=frozen["p_value"], lower=frozen["lower"], upper=frozen["upper"],
        cov_unscaled=frozen["cov_unscaled"], residual_std_error=frozen["residual_std_error"],
        sse=frozen["sse"], ssr=frozen["ssr"], sst=frozen["sst"], r_squared=frozen["r_squared"],
        adj_r_squared=frozen["adj_r_squared"], f_statistic=frozen["f_statistic"],
        f_p_value=frozen["f_p_value"], f_df=_freeze_owned(out["f_df"].astype(np.int64)),
        residuals=frozen["residuals"], fitted=frozen["fitted"], leverage=frozen["leverage"],
        mask=_freeze_owned(mask_arr), x_min=frozen["x_min"], x_max=frozen["x_max"],
        correlation=frozen["correlation"] if with_correlation else None,
        correlation_t=frozen["correlation_t"] if with_correlation else None,
        correlation_p_value=frozen["correlation_p_value"] if with_correlation else None,
        t_critical=frozen["t_critical"], x_centre=frozen["x_centre"],
        x_scale=frozen["x_scale"], r_inverse=frozen["r_inverse"],
        fast_path=_freeze_owned(~fast.needs_fallback),
    )


@lru_cache(maxsize=64)
def _fit_of_no_rows(k: int, intercept: bool, level: float, names: tuple[str, ...]) -> OlsFit:
    """``fit_ols`` on no rows (it depends on nothing else), kept: a pass asks for it in nearly
    every batch (the fits after a break, for the series without one). Its arrays are read-only."""
    return fit_ols(np.zeros((0, k)), np.zeros(0), intercept=intercept, level=level,
                   names=list(names))


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
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
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
        lower = coef - half
        upper = coef + half
        fitted = y - fast.residuals
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
        "lower": lower,
        "upper": upper,
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
        "fitted": fitted,
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


def _copy_into(
    out: dict[str, FloatArray], i: int | NDArray[np.intp], fit: OlsFit, rows: NDArray[np.bool_]
) -> None:
    """Write one ``fit_ols`` result into row ``i`` of the batch arrays (None becomes NaN); ``i``
    may be an array of rows that all get this result (then ``rows`` must select none)."""
    for name in _SCALAR_FIELDS:
        value = getattr(fit, name)
        out[name][i] = math.nan if value is None else float(value)
    for name in _ARRAY_FIELDS:
        out[name][i] = np.asarray(getattr(fit, name), dtype=np.float64)
    for name in _ROW_FIELDS:
        out[name][i] = math.nan
        if rows.any():
            out[name][i, rows] = getattr(fit, name)
