"""``monitor.analysis``: the slope comparisons' autocorrelation factor and the split at a break.

Outside sources: statsmodels' ``acf`` (a reference library) for the lag-1 autocorrelations; the
variance inflation (1 + r f) / (1 - r f) of a least-squares slope under AR(1) errors (r) and an
AR(1) regressor (f) is Bartlett (1935) / Bayley & Hammersley (1946), recalled from memory (MEM).
Invented data only.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.tsa.stattools import acf

from monitor.analysis import MIN_ROWS_AFTER_BREAK, BatchInput, _slope_inflation, analyse_batch


def _ar1(rng: np.random.Generator, rows: int, rho: float) -> np.ndarray:
    out = np.empty(rows)
    out[0] = rng.standard_normal()
    for t in range(1, rows):
        out[t] = rho * out[t - 1] + math.sqrt(1 - rho**2) * rng.standard_normal()
    return out


def test_slope_inflation_matches_the_ar1_formula() -> None:
    rng = np.random.default_rng(61)
    x = np.stack([_ar1(rng, 52, 0.6), rng.standard_normal(52)], axis=1)[None]
    rows = np.ones((1, 52), dtype=bool)
    r = 0.35
    scale = np.array([math.sqrt((1 + r) / (1 - r))])
    factor = _slope_inflation(x, rows, scale)[0]
    for j in range(2):
        f = acf(x[0, :, j], nlags=1, fft=False)[1]
        product = min(max(r * f, 0.0), 0.9)
        assert factor[j] == pytest.approx(math.sqrt((1 + product) / (1 - product)), rel=1e-9)
    assert factor[0] > 1.15  # a trending predictor widens its slope's standard error
    np.testing.assert_allclose(_slope_inflation(x, rows, np.ones(1)), 1.0)  # iid errors: none


def test_after_an_alarm_the_slopes_are_compared_at_the_estimated_break() -> None:
    # Two series, 52 baseline rows then 60 monitored; the first one's slope rises 30 % from the
    # 21st monitored row (invented: y = 5 + 0.8 x + N(0, 10^2), x ~ N(100, 40^2)).
    rng = np.random.default_rng(62)
    rows = 112
    x = rng.normal(100, 40, (2, rows, 1))
    slope = np.full((2, rows), 0.8)
    slope[0, 72:] *= 1.3
    y = 5 + slope * x[:, :, 0] + rng.normal(0, 10, (2, rows))
    batch = BatchInput(
        predictors=("x",), intercept=True, level=0.95, significance=0.05, x=x, y=y,
        mask=np.ones((2, rows), dtype=bool), window=52,
        baseline_start=np.array([0, 0]), baseline_end=np.array([52, 52]),
        horizon=np.array([104, 104]), recent=26,
        plan_x=np.zeros((2, 0, 1)), plan_mask=np.zeros((2, 0), dtype=bool),
    )
    out = analyse_batch(batch)
    assert out.monitoring.crossed[0]
    assert out.break_tested[0] and out.break_rows[0] >= MIN_ROWS_AFTER_BREAK
    assert abs(int(out.monitoring.break_index[0]) - 72) <= 3
    assert out.break_shift.p_value[0, 0] < 0.01 and out.break_shift.t[0, 0] > 0
    assert not out.break_tested[1] or out.monitoring.crossed[1]
    assert np.isnan(out.break_shift.p_value[1, 0]) or out.monitoring.crossed[1]
