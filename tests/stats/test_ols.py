"""``fit_ols``: inference and prediction against statsmodels and scipy; special results.

References: statsmodels ``OLS`` (a test-only reference library; never imported by ``monitor/``)
for every inference figure and both intervals; scipy for the t quantiles and Pearson's r; a
printed t-table for two quantiles.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from monitor.stats.ols import OlsFit, fit_ols

RTOL = 1e-9


def close(actual: object, expected: object, rtol: float = RTOL) -> None:
    np.testing.assert_allclose(
        np.asarray(actual, dtype=float), np.asarray(expected, dtype=float), rtol=rtol, atol=0
    )


def make_data(seed: int, n: int, k: int, offset: float = 3.0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(loc=offset, scale=2.0, size=(n, k))
    slopes = rng.uniform(0.8, 2.5, size=k) * rng.choice([-1.0, 1.0], size=k)
    y = 4.0 + x @ slopes + rng.normal(scale=1.5, size=n)
    return x, y


CASES = [
    # (seed, n, k, intercept, level)
    (11, 40, 1, True, 0.80),
    (12, 60, 3, True, 0.99),
    (13, 35, 1, False, 0.99),
    (14, 80, 4, False, 0.80),
    (15, 25, 2, True, 0.95),
]


def reference(x: np.ndarray, y: np.ndarray, intercept: bool):  # type: ignore[no-untyped-def]
    design = sm.add_constant(x, has_constant="add") if intercept else x
    return sm.OLS(y, design).fit(), design


@pytest.mark.parametrize(("seed", "n", "k", "intercept", "level"), CASES)
def test_inference_matches_statsmodels(
    seed: int, n: int, k: int, intercept: bool, level: float
) -> None:
    x, y = make_data(seed, n, k)
    fit = fit_ols(x, y, intercept=intercept, level=level)
    ref, _ = reference(x, y, intercept)
    alpha = 1.0 - level
    assert fit.estimable and not fit.exact_fit
    assert (fit.n, fit.p, fit.residual_df) == (n, k + int(intercept), int(ref.df_resid))
    close(fit.coef, ref.params)
    close(fit.standard_error, ref.bse)
    close(fit.t, ref.tvalues)
    close(fit.p_value, ref.pvalues)
    interval = ref.conf_int(alpha=alpha)
    close(fit.lower, interval[:, 0])
    close(fit.upper, interval[:, 1])
    close(fit.cov_unscaled, ref.normalized_cov_params)
    close(fit.residual_std_error, math.sqrt(ref.scale))
    close(fit.sse, ref.ssr)  # statsmodels' "ssr" is the residual sum of squares
    close(fit.ssr, ref.ess)  # and its "ess" the regression (explained) sum
    close(fit.sst, ref.centered_tss if intercept else ref.uncentered_tss)
    close(fit.r_squared, ref.rsquared)
    close(fit.adj_r_squared, ref.rsquared_adj)
    assert fit.f_statistic is not None and fit.f_p_value is not None
    close(fit.f_statistic, ref.fvalue)
    close(fit.f_p_value, ref.f_pvalue)
    assert fit.f_df == (int(ref.df_model), int(ref.df_resid))
    close(fit.residuals, ref.resid)
    close(fit.fitted, ref.fittedvalues)
    close(fit.leverage, ref.get_influence().hat_matrix_diag)


@pytest.mark.parametrize(("seed", "n", "k", "intercept", "level"), CASES)
def test_prediction_intervals_match_statsmodels(
    seed: int, n: int, k: int, intercept: bool, level: float
) -> None:
    x, y = make_data(seed, n, k)
    fit = fit_ols(x, y, intercept=intercept, level=level)
    ref, _ = reference(x, y, intercept)
    rng = np.random.default_rng(seed + 100)
    new_x = rng.normal(loc=3.0, scale=3.0, size=(7, k))
    new_design = sm.add_constant(new_x, has_constant="add") if intercept else new_x
    frame = ref.get_prediction(new_design).summary_frame(alpha=1.0 - level)
    prediction = fit.predict(new_x)
    assert prediction.level == level
    close(prediction.point, frame["mean"])
    close(prediction.mean_lower, frame["mean_ci_lower"])
    close(prediction.mean_upper, frame["mean_ci_upper"])
    close(prediction.lower, frame["obs_ci_lower"])
    close(prediction.upper, frame["obs_ci_upper"])
    # Leverage h0 = x0'(X'X)^-1 x0 (Weisberg 2014), from statsmodels' unscaled covariance.
    expected_leverage = np.einsum("mi,ij,mj->m", new_design, ref.normalized_cov_params, new_design)
    close(prediction.leverage, expected_leverage)
    # The prediction interval is the wider one, always.
    assert np.all(prediction.lower < prediction.mean_lower)
    assert np.all(prediction.upper > prediction.mean_upper)


def test_t_critical_values_match_a_t_table() -> None:
    # t(0.975, 8) = 2.306 and t(0.975, 100) = 1.984: printed t-tables, e.g. the NIST/SEMATECH
    # e-Handbook of Statistical Methods, section 1.3.6.7.2 (values quoted from memory);
    # scipy's t.ppf is the computing reference.
    for df, table in ((8, 2.306), (100, 1.984)):
        rng = np.random.default_rng(df)
        n = df + 2  # one predictor and an intercept: df = n - 2
        x = rng.normal(size=n)
        y = 1.0 + 0.5 * x + rng.normal(size=n)
        fit = fit_ols(x, y, level=0.95)
        assert fit.residual_df == df
        assert round(fit.t_critical, 3) == table
        close(fit.t_critical, stats.t.ppf(0.975, df), rtol=1e-12)
        half_width = fit.upper - fit.coef
        close(half_width, fit.t_critical * fit.standard_error, rtol=1e-12)


def test_non_default_level_changes_every_interval() -> None:
    # level is the nominal coverage: 0.80 gives narrower intervals than 0.99 (alpha = 1 - level).
    x, y = make_data(3, 30, 2)
    narrow = fit_ols(x, y, level=0.80)
    wide = fit_ols(x, y, level=0.99)
    close(narrow.t_critical, stats.t.ppf(0.90, 27), rtol=1e-12)
    close(wide.t_critical, stats.t.ppf(0.995, 27), rtol=1e-12)
    assert np.all(narrow.upper - narrow.lower < wide.upper - wide.lower)
    point = np.array([[1.0, 2.0]])
    assert np.all(narrow.predict(point).upper < wide.predict(point).upper)


def test_correlation_matches_scipy_pearsonr() -> None:
    x, y = make_data(21, 45, 1)
    fit = fit_ols(x, y)
    reference_r = stats.pearsonr(x[:, 0], y)
    assert fit.correlation is not None and fit.correlation_t is not None
    close(fit.correlation, reference_r.statistic, rtol=1e-12)
    assert fit.correlation_p_value is not None
    close(fit.correlation_p_value, reference_r.pvalue)
    # t = r sqrt(n-2)/sqrt(1-r²) equals the slope's t statistic (Draper & Smith 1998, 1.6).
    close(fit.correlation_t, fit.t[1])
    no_intercept = fit_ols(x, y, intercept=False)
    assert no_intercept.correlation is None and no_intercept.correlation_t is None
    several = fit_ols(make_data(22, 30, 2)[0], y[:30])
    assert several.correlation is None


def test_terms_and_names() -> None:
    x, y = make_data(4, 20, 2)
    fit = fit_ols(x, y, names=["orders", "staff"])
    assert fit.terms == ("intercept", "orders", "staff")
    assert fit_ols(x, y, intercept=False).terms == ("x1", "x2")
    close(fit.x_min, x.min(axis=0), rtol=0)
    close(fit.x_max, x.max(axis=0), rtol=0)
    with pytest.raises(ValueError, match="names"):
        fit_ols(x, y, names=["only_one"])
    with pytest.raises(ValueError, match="level"):
        fit_ols(x, y, level=95)
    with pytest.raises(ValueError, match="x must be"):
        fit_ols(x, y[:-1])


def test_exact_fit() -> None:
    x = np.arange(10.0).reshape(-1, 1)
    y = 3.0 + 2.0 * x[:, 0]
    fit = fit_ols(x, y, level=0.9)
    assert fit.estimable and fit.exact_fit and fit.reason is None
    close(fit.coef, [3.0, 2.0], rtol=1e-14)
    assert fit.residual_std_error == 0.0 and fit.sse == 0.0
    assert fit.r_squared == 1.0 and fit.adj_r_squared == 1.0
    assert np.all(fit.standard_error == 0.0)
    assert np.all(np.isnan(fit.t)) and np.all(np.isnan(fit.p_value))
    assert fit.f_statistic is None and fit.f_p_value is None
    assert fit.correlation == 1.0 and fit.correlation_t is not None
    assert math.isnan(fit.correlation_t)
    np.testing.assert_array_equal(fit.lower, fit.coef)
    prediction = fit.predict([[20.0]])
    close(prediction.point, [43.0], rtol=1e-14)
    assert prediction.lower[0] == prediction.upper[0] == prediction.point[0]


def test_noise_far_above_rounding_is_not_an_exact_fit() -> None:
    rng = np.random.default_rng(5)
    x = np.arange(30.0)
    y = 1e3 + x + 1e-9 * rng.normal(size=30)  # noise ~1e-12 of y: tiny, but real data
    fit = fit_ols(x, y)
    assert not fit.exact_fit and fit.standard_error[1] > 0.0


def _reason(fit: OlsFit) -> str:
    assert not fit.estimable
    assert fit.reason is not None
    assert np.all(np.isnan(fit.coef)) and math.isnan(fit.residual_std_error)
    with pytest.raises(ValueError, match="not estimable"):
        fit.predict(np.zeros((1, fit.p - int(fit.intercept))))
    return fit.reason


def test_not_estimable_results_name_the_column_and_the_cause() -> None:
    rng = np.random.default_rng(6)
    a = rng.normal(size=12)
    b = rng.normal(size=12)
    y = rng.normal(size=12)
    constant = np.full(12, 4.2)
    reason = _reason(fit_ols(np.column_stack([a, constant]), y, names=["price", "depot"]))
    assert "'depot'" in reason and "constant" in reason
    reason = _reason(fit_ols(np.column_stack([a, b, 2 * a - b + 1]), y, names=["u", "v", "w"]))
    assert "collinear" in reason and "'u'" in reason and "'v'" in reason and "'w'" in reason
    reason = _reason(fit_ols(np.column_stack([a, b, a]), y, names=["u", "v", "u_copy"]))
    assert "'u'" in reason and "'u_copy'" in reason and "'v'" not in reason
    reason = _reason(fit_ols(a[:2].reshape(-1, 1), y[:2]))  # n = p
    assert "too few rows" in reason
    reason = _reason(fit_ols(a[:1].reshape(-1, 1), y[:1]))
    assert "too few rows" in reason
    with_nan = a.copy()
    with_nan[4] = np.nan
    reason = _reason(fit_ols(np.column_stack([b, with_nan]), y, names=["b", "a"]))
    assert "'a'" in reason and "row 5" in reason
    bad_y = y.copy()
    bad_y[0] = np.inf
    assert "response" in _reason(fit_ols(a, bad_y))
    reason = _reason(fit_ols(np.zeros(12), y, intercept=False, names=["z"]))
    assert "'z'" in reason and "zero" in reason


def test_constant_predictor_without_intercept_is_estimable() -> None:
    # A constant column without an intercept plays the intercept's part; statsmodels as reference.
    x, y = make_data(7, 25, 1)
    design = np.column_stack([np.ones(25), x[:, 0]])
    fit = fit_ols(design, y, intercept=False)
    ref = sm.OLS(y, design).fit()
    close(fit.coef, ref.params)
    close(fit.standard_error, ref.bse)


def test_intercept_only_model() -> None:
    rng = np.random.default_rng(8)
    y = 5.0 + rng.normal(size=20)
    fit = fit_ols(np.zeros((20, 0)), y, level=0.9)
    ref = sm.OLS(y, np.ones((20, 1))).fit()
    close(fit.coef, ref.params)
    close(fit.standard_error, ref.bse)
    assert fit.f_statistic is None and fit.f_df == (0, 19)
    prediction = fit.predict(np.zeros((2, 0)))
    frame = ref.get_prediction(np.ones((2, 1))).summary_frame(alpha=0.1)
    close(prediction.upper, frame["obs_ci_upper"])


def test_results_are_read_only() -> None:
    x, y = make_data(9, 15, 1)
    fit = fit_ols(x, y)
    with pytest.raises(ValueError):
        fit.coef[0] = 0.0


def test_values_float64_cannot_square_are_reported_not_fitted() -> None:
    # Sums of squares of values beyond 1e100 (or below 1e-100) overflow or underflow float64
    # (IEEE 754 double range, about 1e308 to 1e-308); pytest turns any numpy warning into an
    # error here, so these also show that no overflow happens on the way.
    rng = np.random.default_rng(31)
    a = rng.normal(size=20)
    y = 1.0 + a + rng.normal(size=20)
    for x, yy, label in ((a * 1e200, y, "'x1'"), (a * 1e-200, y, "'x1'"),
                         (a, y * 1e300, "response"), (a, y * 1e-300, "response")):
        reason = _reason(fit_ols(x, yy))
        assert label in reason and "magnitude" in reason
    all_nan = np.column_stack([a, np.full(20, np.nan)])
    assert "'x2'" in _reason(fit_ols(all_nan, y))


def test_constant_to_rounding_versus_small_real_spread() -> None:
    rng = np.random.default_rng(32)
    a = rng.normal(size=25)
    y = 2.0 + a + rng.normal(size=25)
    # 1e15 + N(0, 1): the spread is in the last bits of the values (ulp 0.125).
    reason = _reason(fit_ols(1e15 + a, y))
    assert "constant to rounding" in reason
    # 1e9 + N(0, 1): about seven digits of spread survive, so the fit is estimable. (statsmodels
    # calls this design singular.) A shift of x leaves the slope unchanged, so the fit on the
    # unshifted column is the reference, to the digits the shifted values keep.
    fit = fit_ols(1e9 + a, y)
    assert fit.estimable
    close(fit.coef[1], fit_ols(a, y).coef[1], rtol=1e-6)
