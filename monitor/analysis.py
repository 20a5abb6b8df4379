"""The refit-and-check step of a pass: one batch's arrays in, that batch's results out.

This is the function DESIGN.md section 14 asks for: no database, file or clock access inside, so
a batch of series can be analysed on any worker. The pass (``monitor.passes``) reads each
model's history from the store, lays it out as a ``BatchInput`` and records what
``analyse_batch`` returns.

Layout. Every series' actual rows up to the business clock sit left-aligned in (s, N) arrays,
oldest first, padded with ``mask`` False. Positions (0-based, per series) select the windows:

- the fit window: the latest ``window`` rows (all with ``window=None``);
- the baseline: rows ``baseline_start`` .. ``baseline_end`` (exclusive); -1 where none is set;
- the monitoring rows: from ``baseline_end`` for at most ``horizon`` rows (DESIGN.md section 6);
- the recent window: the latest *complete* block of ``recent`` rows after the baseline's end
  (rows ``baseline_end + (b-1)·recent`` .. ``baseline_end + b·recent`` with ``b`` the number of
  complete blocks so far), never overlapping the baseline. Why blocks and not simply the latest
  ``recent`` rows: the slope-shift test is retrospective, and re-running it every week on a
  window that moves by one row is many correlated looks at the same question; on stable series
  that raises a false ``slope_shift`` in roughly 40 % of series over a two-year horizon (measured
  on the demo scenario's healthy models). With disjoint blocks each look is a fresh, independent
  test, re-running a pass re-tests the same block (same answer, no flapping), and the pass can
  split the significance over the looks the horizon allows (``looks_per_horizon``);
- after a monitoring alarm, the rows before the estimated break (from the baseline's start) and
  every row since it: the slopes on either side are compared (``break_shift``) once at least
  ``MIN_ROWS_AFTER_BREAK`` rows follow the break. With far more rows on both sides than one
  recent block, this is the test that can name a slope change of a few standard errors; its
  false-alarm control is the alarm's own (``monitor.findings.slope_shift_conditions``).

Both slope comparisons widen each slope's standard error by the AR(1) factor
sqrt((1 + r f) / (1 - r f)) (r the errors' and f the predictor's lag-1 autocorrelation on the
baseline), and the monitoring statistic is scaled by the errors' AR(1) long-run standard
deviation (``MONITORING_ERRORS``), so mildly autocorrelated errors do not pass for a change.

Plan rows (s, M, k) with their own mask get the prediction interval of this pass's fit, the
mean-response interval beside it, their leverage and the extrapolation flag (outside the fitted
range of any predictor, or leverage above the largest in the window; DESIGN.md section 4), and
the chance that a row drawn like the window's rows would lie as far out (Hotelling's T² for a
future observation, ``monitor.stats.diagnostics.new_point_p_value``), which the extrapolation
finding uses.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from monitor.stats.diagnostics import (
    BatchTestResult,
    PredictorCloud,
    breusch_godfrey_batch,
    breusch_pagan_batch,
    durbin_watson_batch,
    jarque_bera_batch,
    new_point_p_value,
    predictor_cloud,
)
from monitor.stats.monitoring import DEFAULT_BOUNDARY, MonitorResult, monitor, start_monitoring
from monitor.stats.ols import BatchFit, BatchPrediction, fit_batch
from monitor.stats.shift import BatchSlopeShift, slope_shift

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
IntArray = NDArray[np.int64]

#: Fewest rows after an estimated break before the slopes on either side are compared (our
#: choice: fewer rows give a slope estimate too rough to name what changed).
MIN_ROWS_AFTER_BREAK = 10
#: How the monitoring statistic scales forecast errors (``monitor.stats.monitoring``): "ar1"
#: uses the long-run standard deviation under the AR(1) autocorrelation measured on the
#: baseline, so mildly autocorrelated errors do not raise false alarms (DEVELOPERS.md).
MONITORING_ERRORS = "ar1"
#: Up to this many series (the batch's series times the fits made together) the fits of one
#: batch are made in one ``fit_batch`` call: below it the call's fixed cost dominates, above it
#: the copies of the rows would cost more than the calls (our measurement: the demo's models).
STACKED_SERIES = 512


@dataclass(frozen=True, eq=False)
class BatchInput:
    """One model's series as arrays (see the module docstring for the layout)."""

    predictors: tuple[str, ...]
    intercept: bool
    level: float  # nominal coverage of the intervals issued
    significance: float  # level of the tests (alpha of the monitoring boundary)
    x: FloatArray  # (s, N, k)
    y: FloatArray  # (s, N)
    mask: BoolArray  # (s, N)
    window: int | None
    baseline_start: IntArray  # (s,) -1 = no baseline
    baseline_end: IntArray  # (s,) exclusive
    horizon: IntArray  # (s,) monitored periods
    recent: int
    plan_x: FloatArray  # (s, M, k)
    plan_mask: BoolArray  # (s, M)


@dataclass(frozen=True, eq=False)
class BatchOutput:
    """What ``analyse_batch`` found for each series of the batch."""

    window_mask: BoolArray  # (s, N) rows of this pass's fit
    fit: BatchFit
    durbin_watson: BatchTestResult
    breusch_godfrey: BatchTestResult  # first-order autocorrelation, with a p-value
    breusch_pagan: BatchTestResult
    jarque_bera: BatchTestResult
    has_baseline: BoolArray  # (s,)
    baseline_fit: BatchFit
    recent_mask: BoolArray  # (s, N)
    recent_tested: BoolArray  # (s,)
    recent_fit: BatchFit
    slope_shift: BatchSlopeShift  # slopes only (no intercept), (s, k)
    monitor_mask: BoolArray  # (s, N)
    monitoring: MonitorResult
    break_tested: BoolArray  # (s,) slopes compared on either side of the monitoring's break
    break_shift: BatchSlopeShift  # (s, k) before the estimated break vs after it
    break_rows: IntArray  # (s,) rows after the estimated break
    slope_inflation: FloatArray  # (s, k) factor applied to the slope standard errors
    prediction: BatchPrediction  # (s, M)
    outside_range: BoolArray  # (s, M)
    above_leverage: BoolArray  # (s, M)
    range_excess: FloatArray  # (s, M) distance beyond the fitted range / the range, 0 inside
    leverage_ratio: FloatArray  # (s, M) leverage / the window's largest leverage
    cloud: PredictorCloud  # the fit window's predictor mean and spread
    plan_p_value: FloatArray  # (s, M) chance a row like the window's lies this far out

    @property
    def extrapolation(self) -> BoolArray:
        """Plan rows outside the fitted range or above the window's largest leverage."""
        return self.outside_range | self.above_leverage


def _positions(mask: BoolArray) -> IntArray:
    """Each row's position among its series' used rows (0-based); -1 where unused."""
    return np.where(mask, np.cumsum(mask, axis=1) - 1, -1).astype(np.int64)


def _fits(batch: BatchInput, names: list[str], *masks: BoolArray) -> list[BatchFit]:
    """``fit_batch`` of the batch's rows under each mask, in one call while the batch is small.

    A small model's pass pays each ``fit_batch`` call's fixed cost (a few hundred numpy calls)
    several times over; stacked along the series axis the fits cost one call. Each series is
    fitted on its own either way, so the figures are the same bits (``tests/test_compute.py``).
    """
    series = batch.y.shape[0]
    if len(masks) == 1 or series * len(masks) > STACKED_SERIES:
        return [fit_batch(batch.x, batch.y, mask, intercept=batch.intercept, level=batch.level,
                          names=names) for mask in masks]
    copies = len(masks)
    stacked = fit_batch(np.concatenate([batch.x] * copies), np.concatenate([batch.y] * copies),
                        np.concatenate(masks), intercept=batch.intercept, level=batch.level,
                        names=names)
    return [stacked.take(slice(i * series, (i + 1) * series)) for i in range(copies)]


def analyse_batch(batch: BatchInput) -> BatchOutput:
    """Refit, diagnose, compare with the baseline, monitor and forecast one batch of series.

    Pure: every figure comes from the arrays given. Shapes as in ``BatchInput``.
    """
    k = len(batch.predictors)
    used = batch.mask & np.isfinite(batch.y) & np.all(np.isfinite(batch.x), axis=2)
    position = _positions(used)
    count = used.sum(axis=1)
    names = list(batch.predictors)

    if batch.window is None:
        window_mask = used
    else:
        window_mask = used & (position >= (count - batch.window)[:, None])
    has_baseline = (batch.baseline_start >= 0) & (batch.baseline_end > batch.baseline_start)
    start = batch.baseline_start[:, None]
    end = batch.baseline_end[:, None]
    base_mask = used & has_baseline[:, None] & (position >= start) & (position < end)

    after = used & has_baseline[:, None] & (position >= end)
    after_count = after.sum(axis=1)
    blocks = after_count // max(batch.recent, 1)
    recent_tested = has_baseline & (blocks >= 1)
    block_start = batch.baseline_end + (blocks - 1) * batch.recent
    recent_mask = (
        after
        & recent_tested[:, None]
        & (position >= block_start[:, None])
        & (position < (block_start + batch.recent)[:, None])
    )
    fit, baseline_fit, recent_fit = _fits(batch, names, window_mask, base_mask, recent_mask)
    fit_rows = window_mask & fit.estimable[:, None]
    residuals = np.nan_to_num(fit.residuals)
    durbin_watson = durbin_watson_batch(residuals, fit_rows)
    breusch_godfrey = breusch_godfrey_batch(residuals, batch.x, fit_rows)
    breusch_pagan = breusch_pagan_batch(residuals, batch.x, fit_rows)
    jarque_bera = jarque_bera_batch(residuals, fit_rows)

    slope_columns = slice(1, None) if batch.intercept else slice(None)

    monitor_mask = after & (position < end + batch.horizon[:, None])
    state = start_monitoring(batch.x, batch.y, base_mask, intercept=batch.intercept, names=names,
                             errors=MONITORING_ERRORS)
    monitoring = monitor(state, batch.x, batch.y, monitor_mask, alpha=batch.significance,
                         horizon=batch.horizon, boundary=DEFAULT_BOUNDARY)
    inflation = _slope_inflation(batch.x, base_mask, state.error_scale)

    comparable = recent_tested & baseline_fit.estimable & recent_fit.estimable
    shift = slope_shift(
        np.where(comparable[:, None], baseline_fit.coef[:, slope_columns], np.nan),
        baseline_fit.standard_error[:, slope_columns] * inflation,
        baseline_fit.residual_df,
        recent_fit.coef[:, slope_columns],
        recent_fit.standard_error[:, slope_columns] * inflation,
        recent_fit.residual_df,
        terms=names,
    )

    # After an alarm: the slopes before the estimated break (from the baseline's start) against
    # those after it (every row since), the split the monitoring statistic found.
    columns = np.arange(batch.y.shape[1])[None, :]
    break_column = monitoring.break_index[:, None]
    crossed = monitoring.crossed & has_baseline
    before_mask = base_mask | (after & (columns < break_column))
    before_mask &= crossed[:, None] & (position >= start)
    after_break = used & crossed[:, None] & (columns >= break_column)
    break_rows = after_break.sum(axis=1).astype(np.int64)
    if crossed.any():
        before_fit, after_fit = _fits(batch, names, before_mask, after_break)
    else:
        # With no alarm both masks select nothing: the same (empty) fits, so made once.
        before_fit = after_fit = _fits(batch, names, before_mask)[0]
    break_tested = (crossed & (break_rows >= MIN_ROWS_AFTER_BREAK)
                    & before_fit.estimable & after_fit.estimable)
    break_shift = slope_shift(
        np.where(break_tested[:, None], before_fit.coef[:, slope_columns], np.nan),
        before_fit.standard_error[:, slope_columns] * inflation,
        before_fit.residual_df,
        after_fit.coef[:, slope_columns],
        after_fit.standard_error[:, slope_columns] * inflation,
        after_fit.residual_df,
        terms=names,
    )

    plan_x = np.where(batch.plan_mask[:, :, None], batch.plan_x, 0.0)
    if plan_x.shape[1] and fit.estimable.any():
        with np.errstate(all="ignore"):  # not-estimable series give NaN, masked below
            prediction = fit.predict(plan_x)
        nan = ~(batch.plan_mask & fit.estimable[:, None])
        prediction = BatchPrediction(
            point=np.where(nan, np.nan, prediction.point),
            mean_lower=np.where(nan, np.nan, prediction.mean_lower),
            mean_upper=np.where(nan, np.nan, prediction.mean_upper),
            lower=np.where(nan, np.nan, prediction.lower),
            upper=np.where(nan, np.nan, prediction.upper),
            leverage=np.where(nan, np.nan, prediction.leverage),
            level=prediction.level,
        )
    else:
        empty = np.full(batch.plan_mask.shape, np.nan)
        prediction = BatchPrediction(empty, empty, empty, empty, empty, empty, batch.level)
    if k:
        low, high = fit.x_min[:, None, :], fit.x_max[:, None, :]
        outside = (plan_x < low) | (plan_x > high)
        outside_range = outside.any(axis=2) & batch.plan_mask
        with np.errstate(all="ignore"):
            beyond = np.maximum(np.maximum(low - plan_x, plan_x - high), 0.0)
            span = np.where(high > low, high - low, np.inf)
            range_excess = np.where(batch.plan_mask, np.nanmax(beyond / span, axis=2), 0.0)
    else:
        outside_range = np.zeros(batch.plan_mask.shape, dtype=bool)
        range_excess = np.zeros(batch.plan_mask.shape)
    max_leverage = np.max(np.where(fit_rows, np.nan_to_num(fit.leverage), -np.inf), axis=1)
    above_leverage = batch.plan_mask & (prediction.leverage > max_leverage[:, None])
    with np.errstate(all="ignore"):
        leverage_ratio = np.where(batch.plan_mask & (max_leverage[:, None] > 0),
                                  prediction.leverage / max_leverage[:, None], 0.0)
    range_excess = np.nan_to_num(range_excess, nan=0.0, posinf=0.0)
    cloud = predictor_cloud(batch.x, fit_rows)
    plan_p_value = np.where(batch.plan_mask, new_point_p_value(cloud, plan_x), np.nan)
    leverage_ratio = np.nan_to_num(leverage_ratio, nan=0.0, posinf=0.0)
    return BatchOutput(
        window_mask=fit_rows,
        fit=fit,
        durbin_watson=durbin_watson,
        breusch_godfrey=breusch_godfrey,
        breusch_pagan=breusch_pagan,
        jarque_bera=jarque_bera,
        has_baseline=has_baseline,
        baseline_fit=baseline_fit,
        recent_mask=recent_mask,
        recent_tested=recent_tested,
        recent_fit=recent_fit,
        slope_shift=shift,
        monitor_mask=monitor_mask,
        monitoring=monitoring,
        break_tested=break_tested,
        break_shift=break_shift,
        break_rows=break_rows,
        slope_inflation=inflation,
        prediction=prediction,
        outside_range=outside_range,
        above_leverage=above_leverage,
        range_excess=range_excess,
        leverage_ratio=leverage_ratio,
        cloud=cloud,
        plan_p_value=plan_p_value,
    )


def _slope_inflation(x: FloatArray, rows: BoolArray, error_scale: FloatArray) -> FloatArray:
    """Factor on each slope's standard error for AR(1) errors and an autocorrelated predictor.

    With AR(1) errors (autocorrelation r) and a predictor whose lag-1 autocorrelation is f, the
    variance of a least-squares slope is about (1 + r f) / (1 - r f) times the textbook one
    (Bartlett 1935; Bayley & Hammersley 1946; MEM). r is the bias-corrected, clipped value the
    monitoring's long-run scale uses (recovered from ``error_scale`` = sqrt((1 + r) / (1 - r))),
    f is measured on the baseline rows; products below 0 count as 0 (no narrowing). (s, k).
    """
    series, _, k = x.shape
    if k == 0:
        return np.ones((series, 0))
    squared = error_scale**2
    r = (squared - 1.0) / (squared + 1.0)
    count = np.maximum(rows.sum(axis=1), 1)[:, None]
    mean = np.where(rows[:, :, None], x, 0.0).sum(axis=1) / count
    centred = np.where(rows[:, :, None], x - mean[:, None, :], 0.0)
    pairs = (rows[:, 1:] & rows[:, :-1])[:, :, None]
    lagged = np.where(pairs, centred[:, 1:] * centred[:, :-1], 0.0).sum(axis=1)
    energy = (centred * centred).sum(axis=1)
    f = np.where(energy > 0, lagged / np.where(energy > 0, energy, 1.0), 0.0)
    product = np.clip(r[:, None] * f, 0.0, 0.9)
    return np.asarray(np.sqrt((1.0 + product) / (1.0 - product)), dtype=np.float64)


def looks_per_horizon(horizon: int, recent: int) -> int:
    """How many disjoint recent windows fit in the monitoring horizon (at least 1)."""
    return max(1, horizon // max(recent, 1))


__all__ = [
    "MIN_ROWS_AFTER_BREAK",
    "MONITORING_ERRORS",
    "BatchInput",
    "BatchOutput",
    "analyse_batch",
    "looks_per_horizon",
]
