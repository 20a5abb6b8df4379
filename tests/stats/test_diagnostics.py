"""Residual diagnostics checked against reference libraries and published values.

Sources, with bibliographic details recalled from memory (not re-read):
- Durbin, J. & Watson, G.S. (1950, 1951), "Testing for serial correlation in least squares
  regression" I and II, Biometrika 37, 409–428 and 38, 159–178.
- Imhof, J.P. (1961), "Computing the distribution of quadratic forms in normal variables",
  Biometrika 48, 419–426 (the exact null distribution of d).
- Breusch, T.S. & Pagan, A.R. (1979), Econometrica 47, 1287–1294; Koenker, R. (1981), "A note on
  studentizing a test for heteroscedasticity", Journal of Econometrics 17, 107–112.
- Jarque, C.M. & Bera, A.K. (1980), Economics Letters 6, 255–259; (1987), International
  Statistical Review 55, 163–172.
- Cook, R.D. (1977), "Detection of influential observation in linear regression",
  Technometrics 19, 15–18. Hoaglin, D.C. & Welsch, R.E. (1978), The American Statistician 32.
- Marquardt, D.W. (1970), "Generalized inverses, ridge regression, biased linear estimation, and
  nonlinear estimation", Technometrics 12, 591–612 (the name "variance inflation factor").

Reference library: statsmodels (test-only), its functions named at each check. Published values:
``../shared/reference/CHECK_VALUES.md`` item 10.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.typing import NDArray
from scipy import optimize
from statsmodels.stats.diagnostic import het_breuschpagan
from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor
from statsmodels.stats.stattools import durbin_watson as sm_durbin_watson
from statsmodels.stats.stattools import jarque_bera as sm_jarque_bera

from monitor.stats.diagnostics import (
    TestResult,
    _durbin_watson_eigenvalues,
    breusch_godfrey,
    breusch_godfrey_batch,
    breusch_pagan,
    breusch_pagan_batch,
    cooks_distance,
    cooks_distance_batch,
    durbin_watson,
    durbin_watson_batch,
    durbin_watson_cdf,
    durbin_watson_test,
    jarque_bera,
    jarque_bera_batch,
    leverage,
    leverage_batch,
    variance_inflation,
    variance_inflation_batch,
)

RELATIVE = 1e-9


def _close(actual: float | None, expected: float, rtol: float = RELATIVE) -> bool:
    return actual is not None and math.isclose(actual, expected, rel_tol=rtol, abs_tol=0.0)


def _regression_data(
    seed: int, k: int, n: int = 60, heteroscedastic: bool = True
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Predictors on different scales (so scaling matters) and a response with skewed errors."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, k)) * np.array([1.0, 40.0, 0.02])[:k] + np.array([3.0, -7.0, 1e3])[:k]
    x[:, 0] += 0.4 * np.arange(n) / n  # a trend makes columns mildly correlated with row order
    spread = 1.0 + (np.abs(x[:, 0]) if heteroscedastic else 0.0)
    errors = rng.gamma(2.0, size=n) * spread
    y = 5.0 + x @ np.linspace(1.0, 2.0, k) + errors
    return x, y


# --- Durbin–Watson -------------------------------------------------------------------------------


def test_durbin_watson_worked_example_of_check_values_item_10() -> None:
    # CHECK_VALUES.md item 10 (CONF-sm): d = 9.70 / 3.58 = 2.709497.
    result = durbin_watson([1.0, -0.5, 0.3, 0.8, -1.2, 0.4])
    assert result.statistic is not None
    assert abs(result.statistic - 2.709497) < 5e-7
    assert math.isclose(result.statistic, 9.70 / 3.58, rel_tol=1e-13)
    assert result.p_value is None and result.df is None and result.reason is None


@pytest.mark.parametrize(
    ("n", "regressors", "level", "published_lower", "published_upper"),
    [
        # CHECK_VALUES.md item 10, "computed" columns (CONF-exact, Imhof inversion); Savin & White
        # (1977) published the same to the digits shown (MEM there).
        (20, 1, 0.05, 1.201, 1.411),
        (20, 2, 0.05, 1.100, 1.537),
        (15, 1, 0.05, 1.077, 1.361),
        (30, 1, 0.05, 1.352, 1.489),
        (50, 1, 0.05, 1.503, 1.585),
        (100, 1, 0.05, 1.654, 1.694),
        (20, 1, 0.01, 0.952, 1.147),
    ],
)
def test_durbin_watson_distribution_reproduces_the_bounds_table(
    n: int, regressors: int, level: float, published_lower: float, published_upper: float
) -> None:
    columns = regressors + 1
    # Eigenvalues of the Durbin–Watson matrix, 2(1 − cos(πj/n)), j = 1..n−1 (item 10).
    nu = 2.0 * (1.0 - np.cos(np.pi * np.arange(1, n) / n))
    lower_set = nu[: n - columns]
    upper_set = nu[columns - 1 : n - 1]
    lower = optimize.brentq(lambda d: durbin_watson_cdf(d, lower_set) - level, 0.01, 3.99)
    upper = optimize.brentq(lambda d: durbin_watson_cdf(d, upper_set) - level, 0.01, 3.99)
    assert round(lower, 3) == pytest.approx(published_lower, abs=1e-9)
    assert round(upper, 3) == pytest.approx(published_upper, abs=1e-9)


def test_durbin_watson_cdf_against_monte_carlo() -> None:
    # Our own seeded simulation: the share of d at or below a threshold, for a fixed design with
    # independent normal errors, must match the exact distribution within sampling error.
    rng = np.random.default_rng(20261201)
    n, reps = 25, 40_000
    design = np.column_stack([np.ones(n), rng.uniform(0.0, 10.0, size=(n, 2))])
    residual_maker = np.eye(n) - design @ np.linalg.pinv(design)
    errors = rng.normal(size=(reps, n)) @ residual_maker
    d_values = (np.diff(errors, axis=1) ** 2).sum(axis=1) / (errors**2).sum(axis=1)
    eigenvalues = _dw_eigenvalues(design)
    for threshold in (1.3, 1.8, 2.4):
        empirical = float((d_values <= threshold).mean())
        standard_error = math.sqrt(empirical * (1.0 - empirical) / reps)
        exact = durbin_watson_cdf(threshold, eigenvalues)
        assert abs(exact - empirical) < 4.0 * standard_error, (threshold, exact, empirical)


def _dw_eigenvalues(design: NDArray[np.float64]) -> NDArray[np.float64]:
    """Non-zero eigenvalues of M A M by a dense eigen-decomposition (an independent route)."""
    n = design.shape[0]
    difference = np.diff(np.eye(n), axis=0)
    dw_matrix = difference.T @ difference
    residual_maker = np.eye(n) - design @ np.linalg.pinv(design)
    values = np.linalg.eigvalsh(residual_maker @ dw_matrix @ residual_maker)
    return np.sort(values)[design.shape[1] :]


def test_durbin_watson_test_p_value_is_two_sided_exact() -> None:
    rng = np.random.default_rng(7)
    n = 30
    x = rng.normal(size=(n, 1))
    design = np.column_stack([np.ones(n), x])
    # Strongly autocorrelated residual pattern: d small, p small.
    raw = np.cumsum(rng.normal(size=n))
    residuals = raw - design @ np.linalg.lstsq(design, raw, rcond=None)[0]
    result = durbin_watson_test(residuals, x)
    assert result.statistic is not None and result.p_value is not None
    below = durbin_watson_cdf(result.statistic, _dw_eigenvalues(design))
    assert math.isclose(result.p_value, 2.0 * min(below, 1.0 - below), rel_tol=1e-8)
    assert result.statistic < 1.0 and result.p_value < 0.01


def test_durbin_watson_test_without_intercept_uses_that_design() -> None:
    rng = np.random.default_rng(8)
    n = 20
    x = rng.uniform(1.0, 5.0, size=(n, 1))
    y = 2.0 * x[:, 0] + rng.normal(size=n)
    residuals = y - x[:, 0] * (x[:, 0] @ y) / (x[:, 0] @ x[:, 0])
    result = durbin_watson_test(residuals, x, intercept=False)
    assert result.statistic is not None and result.p_value is not None
    below = durbin_watson_cdf(result.statistic, _dw_eigenvalues(x))
    assert math.isclose(result.p_value, 2.0 * min(below, 1.0 - below), rel_tol=1e-8)


# --- all diagnostics against statsmodels ----------------------------------------------------------


@pytest.mark.parametrize("k", [1, 2, 3])
@pytest.mark.parametrize("seed", [11, 12])
def test_diagnostics_match_statsmodels(k: int, seed: int) -> None:
    x, y = _regression_data(seed, k)
    design = sm.add_constant(x)
    fit = sm.OLS(y, design).fit()
    residuals = np.asarray(fit.resid)

    # statsmodels.stats.stattools.durbin_watson
    dw = durbin_watson(residuals)
    assert _close(dw.statistic, float(sm_durbin_watson(residuals)))

    # statsmodels.stats.diagnostic.het_breuschpagan(robust=True) is Koenker's studentised form
    lm, lm_p, _, _ = het_breuschpagan(residuals, design, robust=True)
    bp = breusch_pagan(residuals, x)
    assert _close(bp.statistic, lm) and _close(bp.p_value, lm_p) and bp.df == k

    # statsmodels.stats.stattools.jarque_bera
    jb_stat, jb_p, _, _ = sm_jarque_bera(residuals)
    jb = jarque_bera(residuals)
    assert _close(jb.statistic, float(jb_stat)) and _close(jb.p_value, float(jb_p))
    assert jb.df == 2

    # statsmodels OLSInfluence: hat_matrix_diag and cooks_distance[0]
    influence = OLSInfluence(fit)
    hat = leverage(x)
    np.testing.assert_allclose(hat, influence.hat_matrix_diag, rtol=RELATIVE, atol=0)
    cook = cooks_distance(residuals, hat, k + 1)
    np.testing.assert_allclose(cook, influence.cooks_distance[0], rtol=RELATIVE, atol=0)

    # statsmodels.stats.outliers_influence.variance_inflation_factor, exog with a constant
    expected_vif = [variance_inflation_factor(design, j) for j in range(1, k + 1)]
    np.testing.assert_allclose(variance_inflation(x), expected_vif, rtol=RELATIVE, atol=0)


@pytest.mark.parametrize("k", [1, 2])
def test_no_intercept_fit_diagnostics_match_statsmodels(k: int) -> None:
    x, y = _regression_data(31, k)
    fit = sm.OLS(y, x).fit()
    residuals = np.asarray(fit.resid)
    # Koenker's auxiliary regression keeps a constant even for a fit without one:
    # statsmodels het_breuschpagan with add_constant(x) is the same test.
    lm, lm_p, _, _ = het_breuschpagan(residuals, sm.add_constant(x), robust=True)
    bp = breusch_pagan(residuals, x)
    assert _close(bp.statistic, lm) and _close(bp.p_value, lm_p)
    influence = OLSInfluence(fit)
    hat = leverage(x, intercept=False)
    np.testing.assert_allclose(hat, influence.hat_matrix_diag, rtol=RELATIVE, atol=0)
    np.testing.assert_allclose(
        cooks_distance(residuals, hat, k), influence.cooks_distance[0], rtol=RELATIVE, atol=0
    )


def test_variance_inflation_of_strongly_correlated_predictors() -> None:
    rng = np.random.default_rng(5)
    n = 80
    base = rng.normal(size=n)
    x = np.column_stack([base, base + 0.05 * rng.normal(size=n), rng.normal(size=n)])
    design = sm.add_constant(x)
    expected = [variance_inflation_factor(design, j) for j in range(1, 4)]
    assert expected[0] > 100.0  # the case is a hard one, as intended
    # statsmodels forms 1/(1 − R²), losing digits as R² nears 1; we form SST/SSE. Agreement to
    # 1e-9 relative still holds at VIF in the hundreds.
    np.testing.assert_allclose(variance_inflation(x), expected, rtol=RELATIVE, atol=0)


# --- undefined cases: a defined result, never a crash -------------------------------------------


def test_exact_fit_residuals_give_undefined_tests_with_a_reason() -> None:
    zeros = np.zeros(8)
    x = np.arange(8.0)[:, np.newaxis]
    for result in (durbin_watson(zeros), breusch_pagan(zeros, x), jarque_bera(zeros)):
        assert result.statistic is None and result.p_value is None
        assert result.reason is not None and "exact fit" in result.reason
    assert durbin_watson_test(zeros, x).reason == durbin_watson(zeros).reason
    assert np.isnan(cooks_distance(zeros, leverage(x), 2)).all()


def test_constant_squared_residuals_leave_breusch_pagan_undefined() -> None:
    residuals = np.array([1.5, -1.5] * 6)
    x = np.arange(12.0)[:, np.newaxis]
    result = breusch_pagan(residuals, x)
    assert result.statistic is None and result.p_value is None
    assert result.reason is not None and "constant" in result.reason
    assert durbin_watson(residuals).statistic is not None  # d itself is still defined


def test_constant_residuals_leave_jarque_bera_undefined() -> None:
    result = jarque_bera(np.full(10, 0.1))
    assert result.statistic is None and result.reason is not None
    assert "constant" in result.reason


@pytest.mark.parametrize(
    ("function", "n", "needed"),
    [
        (lambda e, x: durbin_watson(e), 1, "2"),
        (lambda e, x: jarque_bera(e), 2, "3"),
        (lambda e, x: breusch_pagan(e, x), 3, "4"),  # two predictors: n must exceed 3
    ],
)
def test_too_few_rows_are_named(function: object, n: int, needed: str) -> None:
    rng = np.random.default_rng(1)
    residuals = rng.normal(size=n)
    x = rng.normal(size=(n, 2))
    result = function(residuals, x)  # type: ignore[operator]
    assert isinstance(result, TestResult)
    assert result.statistic is None and result.reason is not None
    assert "too few rows" in result.reason and f"needs {needed}" in result.reason


def test_constant_predictor_and_non_finite_values() -> None:
    residuals = np.random.default_rng(2).normal(size=10)
    constant = np.full((10, 1), 0.1)  # sums of 0.1 do not centre to exactly 0
    result = breusch_pagan(residuals, constant)
    assert result.statistic is None and result.reason is not None
    assert "no predictor varies" in result.reason
    assert np.isnan(variance_inflation(np.column_stack([constant, np.arange(10.0)]))[0])
    broken = residuals.copy()
    broken[3] = np.inf
    for test in (durbin_watson(broken), jarque_bera(broken), breusch_pagan(broken, constant)):
        assert test.statistic is None and test.reason is not None and "finite" in test.reason


def test_collinear_predictors_have_infinite_vif_and_one_predictor_has_vif_one() -> None:
    x = np.arange(12.0)
    collinear = np.column_stack([x, 3.0 * x - 2.0, np.sin(x)])
    vif = variance_inflation(collinear)
    assert np.isinf(vif[0]) and np.isinf(vif[1]) and np.isfinite(vif[2])
    # One predictor: regressed on a constant alone, R² = 0 and VIF = 1, as statsmodels gives.
    design = sm.add_constant(np.sin(x))
    assert variance_inflation(np.sin(x)[:, np.newaxis])[0] == pytest.approx(
        variance_inflation_factor(design, 1), rel=RELATIVE
    )
    assert variance_inflation(np.sin(x)[:, np.newaxis])[0] == 1.0


def test_cooks_distance_is_undefined_at_a_row_of_leverage_one() -> None:
    # Row 5 is the only one with the dummy set: its fitted value is itself, h = 1.
    n = 6
    dummy = np.zeros(n)
    dummy[5] = 1.0
    x = np.column_stack([np.arange(n, dtype=float), dummy])
    hat = leverage(x)
    assert hat[5] == pytest.approx(1.0, abs=1e-12)
    residuals = np.array([0.3, -0.2, -0.4, 0.5, -0.2, 0.0])
    distance = cooks_distance(residuals, hat, 3)
    assert np.isnan(distance[5]) and np.isfinite(distance[:5]).all()


# --- batches equal the one-at-a-time functions ---------------------------------------------------


def test_batches_equal_one_at_a_time_on_ragged_series() -> None:
    rng = np.random.default_rng(99)
    s, n, k = 9, 40, 2
    x = rng.normal(size=(s, n, k)) * [1.0, 30.0] + [0.0, 100.0]
    residuals = rng.standard_t(5, size=(s, n)) * (1.0 + np.abs(x[:, :, 0]))
    mask = rng.random((s, n)) < 0.85  # holes anywhere, not only a prefix
    mask[1, :35] = False  # short series: 5 rows
    mask[2, 2:] = False  # two rows: too few for Jarque–Bera
    residuals[3] = 0.0  # an exact fit
    residuals[4] = np.where(np.arange(n) % 2 == 0, 2.0, -2.0)  # constant squared residuals
    x[5, :, 1] = 7.0  # a constant predictor
    padded_x = np.where(mask[:, :, np.newaxis], x, np.nan)  # padding may be NaN
    padded_e = np.where(mask, residuals, np.nan)

    dw = durbin_watson_batch(padded_e, mask)
    bp = breusch_pagan_batch(padded_e, padded_x, mask)
    jb = jarque_bera_batch(padded_e, mask)
    hat = leverage_batch(padded_x, mask)
    vif = variance_inflation_batch(padded_x, mask)
    cook = cooks_distance_batch(padded_e, hat, k + 1, mask)
    for i in range(s):
        rows = mask[i]
        e_i, x_i = residuals[i, rows], x[i, rows]
        _assert_same(dw.series(i), durbin_watson(e_i))
        _assert_same(bp.series(i), breusch_pagan(e_i, x_i))
        _assert_same(jb.series(i), jarque_bera(e_i))
        np.testing.assert_allclose(hat[i, rows], leverage(x_i), rtol=1e-12)
        assert np.isnan(hat[i, ~rows]).all()
        np.testing.assert_allclose(vif[i], variance_inflation(x_i), rtol=1e-12)
        np.testing.assert_allclose(
            cook[i, rows], cooks_distance(e_i, leverage(x_i), k + 1), rtol=1e-10
        )
    assert bp.series(5).reason is None and bp.df[5] == 1  # df counts the predictors that vary
    assert dw.series(3).statistic is None and bp.series(4).statistic is None


def _assert_same(batch: TestResult, single: TestResult) -> None:
    assert batch.reason == single.reason and batch.df == single.df
    for got, want in ((batch.statistic, single.statistic), (batch.p_value, single.p_value)):
        if want is None:
            assert got is None
        else:
            assert got is not None and math.isclose(got, want, rel_tol=1e-12, abs_tol=1e-300)


def test_statistics_of_a_batch_match_statsmodels_per_series() -> None:
    rng = np.random.default_rng(3)
    s, n = 4, 30
    residuals = rng.normal(size=(s, n)) ** 3
    x = rng.normal(size=(s, n, 1))
    dw = durbin_watson_batch(residuals)
    bp = breusch_pagan_batch(residuals, x)
    jb = jarque_bera_batch(residuals)
    for i in range(s):
        assert _close(float(dw.statistic[i]), float(sm_durbin_watson(residuals[i])))
        lm, lm_p, _, _ = het_breuschpagan(residuals[i], sm.add_constant(x[i]), robust=True)
        assert _close(float(bp.statistic[i]), lm) and _close(float(bp.p_value[i]), lm_p)
        jb_stat, jb_p, _, _ = sm_jarque_bera(residuals[i])
        assert _close(float(jb.statistic[i]), float(jb_stat))
        assert _close(float(jb.p_value[i]), float(jb_p))


# --- invariances --------------------------------------------------------------------------------


@settings(max_examples=40, deadline=None)
@given(
    scale=st.floats(1e-3, 1e3),
    shift=st.floats(-1e3, 1e3),
    residual_scale=st.floats(1e-3, 1e3),
)
def test_breusch_pagan_and_vif_ignore_units_of_the_predictors(
    scale: float, shift: float, residual_scale: float
) -> None:
    x, y = _regression_data(4, 2, n=30)
    residuals = y - sm.OLS(y, sm.add_constant(x)).fit().fittedvalues
    base = breusch_pagan(residuals, x)
    moved = breusch_pagan(residual_scale * residuals, x * scale + shift)
    assert base.statistic is not None and moved.statistic is not None
    assert math.isclose(base.statistic, moved.statistic, rel_tol=1e-8)
    np.testing.assert_allclose(
        variance_inflation(x * scale + shift), variance_inflation(x), rtol=1e-8
    )
    dw_base, dw_moved = durbin_watson(residuals), durbin_watson(residual_scale * residuals)
    assert dw_base.statistic is not None and dw_moved.statistic is not None
    assert math.isclose(dw_base.statistic, dw_moved.statistic, rel_tol=1e-12)


# --- Breusch–Godfrey (issue 14) -----------------------------------------------------------------


@pytest.mark.parametrize("n", [12, 30, 52, 200])
def test_breusch_godfrey_matches_statsmodels(n: int) -> None:
    # Breusch (1978), Godfrey (1978); reference: statsmodels' acorr_breusch_godfrey(nlags=1),
    # whose auxiliary regression holds the fit's exog (with its constant) and the lagged residual
    # with 0 before the first row.
    import statsmodels.api as sm
    from statsmodels.stats.diagnostic import acorr_breusch_godfrey

    rng = np.random.default_rng(n)
    x = rng.normal(size=(n, 2))
    e = np.zeros(n)
    for t in range(n):
        e[t] = (0.4 * e[t - 1] if t else 0.0) + rng.normal()
    y = 1.0 + x @ np.array([1.0, 2.0]) + e
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    lm, lm_p, _, _ = acorr_breusch_godfrey(fit, nlags=1, result_object=False)
    result = breusch_godfrey(fit.resid, x)
    assert result.statistic is not None and result.p_value is not None
    assert math.isclose(result.statistic, lm, rel_tol=1e-9)
    assert math.isclose(result.p_value, lm_p, rel_tol=1e-9)
    assert result.df == 1


def test_breusch_godfrey_batch_with_ragged_masks_matches_one_series() -> None:
    rng = np.random.default_rng(11)
    s, n = 3, 40
    x = rng.normal(size=(s, n, 2))
    residuals = rng.normal(size=(s, n))
    mask = np.ones((s, n), dtype=bool)
    mask[1, :15] = False  # a shorter series
    batch = breusch_godfrey_batch(residuals, x, mask)
    for i in range(s):
        rows = mask[i]
        alone = breusch_godfrey(residuals[i, rows], x[i, rows])
        assert alone.p_value is not None
        assert math.isclose(float(batch.p_value[i]), alone.p_value, rel_tol=1e-10)
    too_few = breusch_godfrey(rng.normal(size=4), rng.normal(size=(4, 2)))
    assert too_few.p_value is None and "too few rows" in (too_few.reason or "")


def test_breusch_godfrey_keeps_its_level_on_independent_errors() -> None:
    # Our own seeded simulation: independent normal errors, 52 rows, two predictors; the
    # rejection rate at 5 % must be near 5 % (binomial 4-sigma band over 4000 series).
    rng = np.random.default_rng(20261202)
    s, n = 4000, 52
    x = rng.normal(size=(s, n, 2))
    design = np.concatenate([np.ones((s, n, 1)), x], axis=2)
    y = rng.normal(size=(s, n))
    coef = np.linalg.solve(np.einsum("snk,snj->skj", design, design),
                           np.einsum("snk,sn->sk", design, y)[:, :, None])[:, :, 0]
    residuals = y - np.einsum("snk,sk->sn", design, coef)
    rate = float((breusch_godfrey_batch(residuals, x).p_value < 0.05).mean())
    assert abs(rate - 0.05) < 4 * math.sqrt(0.05 * 0.95 / s), rate


@pytest.mark.parametrize("n", [265, 2000])
def test_exact_durbin_watson_p_value_on_long_series(n: int) -> None:
    # Issue 14: the tail of Imhof's integrand overflowed past about 265 rows. Independent
    # checks: the Monte Carlo distribution of Σλξ²/Σξ² with the same eigenvalues (our own seeded
    # simulation), and the eigenvalues themselves against a dense eigen-decomposition of M·A·M.
    rng = np.random.default_rng(n)
    x = rng.normal(size=(n, 2))
    design = np.column_stack([np.ones(n), x])
    e = rng.normal(size=n)
    residuals = e - design @ np.linalg.lstsq(design, e, rcond=None)[0]
    result = durbin_watson_test(residuals, x)
    assert result.statistic is not None and result.p_value is not None
    eigenvalues = _dw_eigenvalues(design) if n <= 300 else None
    if eigenvalues is not None:
        below = durbin_watson_cdf(result.statistic, eigenvalues)
        assert math.isclose(result.p_value, 2.0 * min(below, 1.0 - below), rel_tol=1e-8)
    # Monte Carlo check of the distribution function at the statistic, from the eigenvalues of
    # the test's own route (exact for the design), 4,000 draws.
    q, _ = np.linalg.qr(design)
    values = _durbin_watson_eigenvalues(q)
    draws = rng.standard_normal((4_000, values.size)) ** 2
    simulated = (draws @ values) / draws.sum(axis=1)
    empirical = float((simulated <= result.statistic).mean())
    exact = durbin_watson_cdf(result.statistic, values)
    assert abs(exact - empirical) < 4 * math.sqrt(max(empirical * (1 - empirical), 1e-3) / 4_000)
