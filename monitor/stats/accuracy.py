"""Point accuracy and bias of forecasts against their actuals, per group of scored forecasts.

    accuracy_batch(group, actual, point) -> AccuracyBatch

Per group (a series, in time order within the group): the mean error (actual − point; positive
= the forecasts were too low), the mean absolute error, the mean absolute scaled error of
Hyndman, R.J. & Koehler, A.B. (2006), "Another look at measures of forecast accuracy",
International Journal of Forecasting 22, 679–688, the tracking signal, and a test of bias.

- MASE = MAE / mean |a_t − a_{t−1}|: the error scaled by that of the naive last-value forecast
  (each actual forecast by the one before it) over the same scored periods. Hyndman & Koehler
  scale by the naive forecast's in-sample error; the audit has only the scored periods at hand
  (also for intervals made elsewhere), so it uses this out-of-sample form. Below 1: better than
  the naive forecast. Undefined with fewer than 2 scored forecasts or constant actuals.
- Tracking signal = Σ e / MAE (cumulative error over the mean absolute error; Brown 1959 and
  common practice, with limits of ±4 often quoted). It is shown, not tested: on n independent
  errors its spread grows like √n, so a fixed limit means different things at different n.
- The bias test: the mean error against zero with a long-run variance (Newey, W.K. & West, K.D.
  1987, Econometrica 55, 703–708; Bartlett weights, lag L = ⌊4 (n/100)^(2/9)⌋), so mildly
  autocorrelated errors do not pass for bias; t = ē / √(LRV/n), two-sided, Student t on n − 1
  degrees of freedom. Undefined with fewer than 3 forecasts or no spread.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from monitor.stats._dist import t_sf

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


@dataclass(frozen=True)
class AccuracyBatch:
    """Arrays (g,) over the distinct groups in ``group`` (ascending); NaN where undefined."""

    group: IntArray
    scored: IntArray
    mean_error: FloatArray
    mean_absolute_error: FloatArray
    mase: FloatArray
    tracking_signal: FloatArray
    bias_t: FloatArray
    bias_p_value: FloatArray


def newey_west_lag(n: int) -> int:
    """⌊4 (n/100)^(2/9)⌋, the usual automatic lag of Newey & West (1994, Rev. Econ. Studies)."""
    return math.floor(4.0 * (n / 100.0) ** (2.0 / 9.0)) if n > 0 else 0


def long_run_variance(errors: ArrayLike) -> float:
    """Newey–West (1987) long-run variance of a series about its mean, Bartlett weights."""
    e = np.asarray(errors, dtype=np.float64)
    n = e.size
    centred = e - e.mean()
    value = float(centred @ centred) / n
    for lag in range(1, min(newey_west_lag(n), n - 1) + 1):
        weight = 1.0 - lag / (newey_west_lag(n) + 1.0)
        value += 2.0 * weight * float(centred[lag:] @ centred[:-lag]) / n
    return value


def accuracy_batch(group: ArrayLike, actual: ArrayLike, point: ArrayLike) -> AccuracyBatch:
    """See the module docstring. ``group``, ``actual``, ``point`` (N,), rows of a group in time
    order."""
    g = np.asarray(group, dtype=np.int64)
    a = np.asarray(actual, dtype=np.float64)
    f = np.asarray(point, dtype=np.float64)
    groups = np.unique(g)
    size = groups.size
    out = {name: np.full(size, np.nan) for name in (
        "mean_error", "mean_absolute_error", "mase", "tracking_signal", "bias_t", "bias_p_value")}
    scored = np.zeros(size, dtype=np.int64)
    # Each group's rows in their order, as slices of one stable sort (a search of every row for
    # each group would cost groups × rows).
    order = np.argsort(g, kind="stable")
    a, f = a[order], f[order]
    usable = np.isfinite(a) & np.isfinite(f)
    bounds = [*np.searchsorted(g[order], groups, side="left").tolist(), g.size]
    for index in range(size):
        within = slice(bounds[index], bounds[index + 1])
        rows = usable[within]
        actuals = a[within][rows]
        errors = actuals - f[within][rows]
        n = errors.size
        scored[index] = n
        if n == 0:
            continue
        mae = float(np.abs(errors).mean())
        out["mean_error"][index] = float(errors.mean())
        out["mean_absolute_error"][index] = mae
        if mae > 0:
            out["tracking_signal"][index] = float(errors.sum()) / mae
        steps = np.abs(np.diff(actuals))
        if steps.size and steps.mean() > 0:
            out["mase"][index] = mae / float(steps.mean())
        if n >= 3:
            lrv = long_run_variance(errors)
            if lrv > 0:
                t = float(errors.mean()) / math.sqrt(lrv / n)
                out["bias_t"][index] = t
                out["bias_p_value"][index] = float(2.0 * t_sf(abs(t), n - 1))
    return AccuracyBatch(groups, scored, **out)


__all__ = ["AccuracyBatch", "accuracy_batch", "long_run_variance", "newey_west_lag"]
