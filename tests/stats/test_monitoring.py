"""Sequential monitoring (monitor/stats/monitoring.py): constants, size, power, degenerate input.

Outside sources named beside each check:
- Chu, Stinchcombe & White (1996), "Monitoring structural change", Econometrica 64(5): the
  published a^2 = 7.78 (5 %) and 6.25 (10 %) are recalled from memory (MEM), and the crossing
  probabilities 2[1 - Phi(a) + a phi(a)] (start-of-history form) and exp(-a^2/2) (post-history
  form) with their exact roots are the derived values of ../shared/reference/CHECK_VALUES.md
  item 5 (CONF-exact), typed in here.
- Brown, Durbin & Evans (1975) recursive residuals: statsmodels' ``recursive_olsresiduals`` (a
  reference library).
- Student t quantiles: scipy (the H = 1 cells of the simulated table have a closed form).
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import optimize, stats

from monitor.stats import monitoring as mon

REPO_ROOT = Path(__file__).resolve().parents[2]


def _simulation_script() -> ModuleType:
    path = REPO_ROOT / "tests" / "simulations" / "simulate_monitoring.py"
    spec = importlib.util.spec_from_file_location("simulate_monitoring", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("simulate_monitoring", module)
    spec.loader.exec_module(module)
    return module


def _stable_series(
    rng: np.random.Generator, series: int, rows: int, predictors: int = 1, mean: float = 100.0
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Invented weekly data: order lines around ``mean`` (sd 20), hours = 5 + 0.8 x + N(0, 10^2)."""
    x = rng.normal(mean, 20.0, (series, rows, predictors))
    y = 5.0 + 0.8 * x.sum(axis=2) + rng.normal(0.0, 10.0, (series, rows))
    return x, y


def _all_finite(result: mon.MonitorResult) -> bool:
    arrays = [
        result.critical_value, result.statistic, result.boundary, result.latest_ratio,
        result.max_ratio, result.recursive_residuals, result.cusum_path, result.boundary_path,
    ]  # fmt: skip
    return all(bool(np.all(np.isfinite(a))) for a in arrays)


# --------------------------------------------------------------------------- published constants


def test_csw_start_of_history_constants() -> None:
    # Chu, Stinchcombe & White (1996): published a^2 = 7.78 (5 %), 6.25 (10 %) (MEM). Their
    # infinite-horizon crossing probability 2[1 - Phi(a) + a phi(a)] and its exact roots are
    # CHECK_VALUES.md item 5 (CONF-exact): 0.05078 at 7.78, 0.10006 at 6.25; roots 7.815 (5 %),
    # 6.251 (10 %), 11.345 (1 %).
    assert mon.PUBLISHED_A_SQUARED == {0.05: 7.78, 0.10: 6.25}
    assert mon.history_form_crossing_probability(7.78) == pytest.approx(0.05078, abs=5e-5)
    assert mon.history_form_crossing_probability(6.25) == pytest.approx(0.10006, abs=5e-5)
    for alpha, root in ((0.05, 7.815), (0.10, 6.251), (0.01, 11.345)):
        solved = optimize.brentq(
            lambda a2, target=alpha: mon.history_form_crossing_probability(a2) - target, 1, 30
        )
        assert solved == pytest.approx(root, abs=1e-3)


def test_post_history_constants() -> None:
    # CHECK_VALUES.md item 5 (CONF-MC + Ville's inequality): the post-history form crosses with
    # probability exp(-a^2/2): 0.0204 at CSW's 7.78, and the right constant is -2 ln(alpha):
    # 5.991 (5 %), 4.605 (10 %), 9.210 (1 %).
    assert mon.post_history_crossing_probability(7.78) == pytest.approx(0.0204, abs=1e-4)
    for alpha, constant in ((0.05, 5.991), (0.10, 4.605), (0.01, 9.210)):
        assert -2 * math.log(alpha) == pytest.approx(constant, abs=1e-3)
        assert mon.post_history_crossing_probability(constant) == pytest.approx(alpha, rel=1e-3)


def test_simulation_machinery_reproduces_infinite_horizon_results() -> None:
    # The continuous-time machinery of tests/simulations/simulate_monitoring.py, run over t in
    # [1, 1e6],
    # against CHECK_VALUES.md item 5 (CSW 1996 form: 0.05078 at 7.78, 0.0500 at 7.815; post-history
    # form: exp(-a^2/2)). 20,000 paths, seed 11; tolerance 4 Monte Carlo standard errors plus 0.002
    # for crossings after t = 1e6 and the coarse (2 %) time steps.
    script = _simulation_script()
    rng = np.random.default_rng(11)
    times, nodes = script.geometric_grid(1.0, [1e6], 0.02)
    reps = 20_000
    history = script.continuous_sup(times, nodes, False, reps, rng)[:, 0]
    post = script.continuous_sup(times, nodes, True, reps, rng)[:, 0]
    checks = [
        (history, 7.78, 0.05078),
        (history, 7.815, 0.05000),
        (post, 7.78, math.exp(-7.78 / 2)),
        (post, -2 * math.log(0.05), 0.05),
    ]
    for sample, a_squared, expected in checks:
        tolerance = 4 * math.sqrt(expected * (1 - expected) / reps) + 0.002
        assert float(np.mean(sample > a_squared)) == pytest.approx(expected, abs=tolerance)


def test_committed_self_check_agrees_with_theory() -> None:
    # The self-check stored with the table (100,000 paths, t in [1, 1e5]) against the same
    # CHECK_VALUES.md item 5 values; the theory column is recomputed here.
    check = mon.boundary_table_description()["self_check"]
    for row in check["infinite_horizon"]:
        theory = (
            mon.history_form_crossing_probability(row["a_squared"])
            if row["form"] == "start_of_history"
            else mon.post_history_crossing_probability(row["a_squared"])
        )
        assert row["theory"] == pytest.approx(theory, abs=1e-5)
        assert row["simulated"] == pytest.approx(theory, abs=4 * row["standard_error"] + 0.002)


# --------------------------------------------------------------------------- the simulated table


def test_table_at_horizon_one_matches_student_t() -> None:
    # With H = 1 the crossing event is |t_nu| > sqrt((nu + 1)(a^2 + ln(1 + 1/nu))), so
    # a^2 = t_{nu, 1 - alpha/2}^2 / (nu + 1) - ln(1 + 1/nu) exactly (scipy's t quantile).
    # Tolerance: 4.5 standard errors of a simulated quantile (delta method), ~100 comparisons.
    description = mon.boundary_table_description()
    reps = description["reps"]
    checked = 0
    for residual_df in range(4, 30):
        for alpha in description["alpha"]:
            if mon._horizon_problem(residual_df, 1) is not None:
                continue
            t_quantile = stats.t.isf(alpha / 2, residual_df)
            exact = t_quantile**2 / (residual_df + 1) - math.log1p(1 / residual_df)
            density = 2 * stats.t.pdf(t_quantile, residual_df)
            quantile_se = math.sqrt(alpha * (1 - alpha) / reps) / density
            a_squared_se = 2 * t_quantile * quantile_se / (residual_df + 1)
            simulated = mon.boundary_constant(alpha, residual_df, 1, "csw")
            assert simulated == pytest.approx(exact, abs=4.5 * a_squared_se)
            checked += 1
    assert checked >= 100


def test_finite_horizon_constants_sit_below_the_infinite_horizon_ones() -> None:
    # A finite horizon needs a smaller constant than the infinite-horizon -2 ln(alpha)
    # (CHECK_VALUES.md item 5); the constant grows with the horizon and as alpha falls.
    for alpha in (0.01, 0.025, 0.05, 0.10):
        previous = 0.0
        for ratio in (0.5, 1, 2, 3, 4, 6, 10, 12):
            limit = mon.boundary_constant(alpha, 10**6, ratio * 10**6, "csw")
            assert previous < limit < -2 * math.log(alpha)
            previous = limit
    # So over the default horizon (H = 2n, here nu = 50, H = 100) the infinite-horizon constant
    # -2 ln 0.05 = 5.991 gives under 1 % and CSW's 7.78 (MEM) under 0.5 % (CHECK_VALUES item 5).
    assert mon.boundary_constant(0.01, 50, 100, "csw") < 5.991
    assert mon.boundary_constant(0.005, 50, 100, "csw") < 7.78
    for residual_df in (4, 10, 20, 50, 100, 500):
        for horizon_ratio in (1, 2, 3):
            values = [
                mon.boundary_constant(a, residual_df, horizon_ratio * residual_df, "csw")
                for a in (0.01, 0.025, 0.05, 0.10)
            ]
            assert values == sorted(values, reverse=True)


def test_small_baselines_need_larger_constants() -> None:
    # sigma_hat from few rows has heavy (Student-type) tails: at H = 2 nu the constant falls as nu
    # grows and approaches the large-sample limit (within 0.1 at nu = 500; Monte Carlo error of
    # a cell is about 0.03).
    constants = [mon.boundary_constant(0.05, nu, 2 * nu, "csw") for nu in (4, 10, 20, 50)]
    assert constants == sorted(constants, reverse=True)
    limit = mon.boundary_constant(0.05, 10**7, 2 * 10**7, "csw")
    assert mon.boundary_constant(0.05, 500, 1000, "csw") == pytest.approx(limit, abs=0.1)


def test_table_cell_reproduced_with_a_fresh_seed() -> None:
    # Rerun one cell of the table (nu = 50, H = 100) with another seed: at the committed a^2 the
    # fresh crossing rate is alpha within 4 Monte Carlo standard errors (20,000 paths).
    script = _simulation_script()
    reps = 20_000
    sup_values = script.finite_sample_sup(50, [100], reps, np.random.default_rng(4242))[:, 0]
    for alpha in (0.01, 0.05, 0.10):
        rate = float(np.mean(sup_values > mon.boundary_constant(alpha, 50, 100, "csw")))
        assert rate == pytest.approx(alpha, abs=4 * math.sqrt(alpha * (1 - alpha) / reps))


def test_interpolation_between_grid_points() -> None:
    low = mon.boundary_constant(0.01, 50, 100, "csw")
    high = mon.boundary_constant(0.025, 50, 100, "csw")
    assert high < mon.boundary_constant(0.02, 50, 100, "csw") < low
    between_df = mon.boundary_constant(0.05, 37, 74, "csw")
    assert mon.boundary_constant(0.05, 40, 80, "csw") < between_df < mon.boundary_constant(
        0.05, 35, 70, "csw"
    )
    boundary = mon.monitoring_boundary(0.05, 50, 104, "csw")
    j = np.arange(1, 105)
    expected = np.sqrt((50 + j) * (boundary.a_squared + np.log1p(j / 50)))
    np.testing.assert_allclose(boundary.values, expected, rtol=1e-12)
    assert "simulated" in boundary.source
    with pytest.raises(ValueError, match="significance"):
        mon.boundary_constant(0.5, 50, 100)
    with pytest.raises(ValueError, match="horizon"):
        mon.boundary_constant(0.05, 10, 200)
    with pytest.raises(ValueError, match="minimum"):
        mon.boundary_constant(0.05, 3, 6)


# --------------------------------------------------------------------------- against statsmodels


def test_recursive_residuals_and_baseline_match_statsmodels() -> None:
    # Brown, Durbin & Evans (1975) recursive residuals: statsmodels' recursive_olsresiduals on the
    # baseline followed by the new rows; the baseline fit against statsmodels OLS.
    sm = pytest.importorskip("statsmodels.api")
    diagnostic = pytest.importorskip("statsmodels.stats.diagnostic")
    rng = np.random.default_rng(3)
    n, m = 30, 25
    x, y = _stable_series(rng, 3, n + m, predictors=2)
    state = mon.start_monitoring(x[:, :n], y[:, :n], intercept=True)
    result = mon.monitor(state, x[:, n:], y[:, n:], horizon=m, boundary="csw")
    weighted = mon.monitor(state, x[:, n:], y[:, n:], horizon=m, boundary="weighted-0.25")
    for i in range(3):
        design = sm.add_constant(x[i])
        baseline = sm.OLS(y[i, :n], design[:n]).fit()
        np.testing.assert_allclose(state.coef[i], baseline.params, rtol=1e-9)
        np.testing.assert_allclose(
            state.cov_unscaled[i], baseline.normalized_cov_params, rtol=1e-8, atol=1e-14
        )
        assert state.residual_std_error[i] == pytest.approx(math.sqrt(baseline.scale), rel=1e-10)
        full = sm.OLS(y[i], design).fit()
        scaled = diagnostic.recursive_olsresiduals(full, skip=3)[4]
        np.testing.assert_allclose(result.recursive_residuals[i], scaled[n:], rtol=1e-9)
        expected_path = np.cumsum(scaled[n:]) / math.sqrt(baseline.scale)
        np.testing.assert_allclose(result.cusum_path[i], expected_path, rtol=1e-9)
        j = np.arange(1, m + 1)
        nu = n - 3
        expected_bound = np.sqrt((nu + j) * (result.critical_value[i] + np.log1p(j / nu)))
        np.testing.assert_allclose(result.boundary_path[i], expected_bound, rtol=1e-12)
        # Horvath et al. (2004) weighted boundary, gamma = 0.25, typed in from its definition
        c = math.sqrt(weighted.critical_value[i])
        expected_weighted = c * math.sqrt(nu) * (1 + j / nu) * (j / (nu + j)) ** 0.25
        np.testing.assert_allclose(weighted.boundary_path[i], expected_weighted, rtol=1e-12)
        np.testing.assert_allclose(weighted.cusum_path[i], expected_path, rtol=1e-9)


def test_no_intercept_and_large_offsets() -> None:
    # Through the origin (no centring) and a predictor like a year number (2000 +- 5), where
    # uncentred sums lose digits; reference: statsmodels recursive_olsresiduals.
    sm = pytest.importorskip("statsmodels.api")
    diagnostic = pytest.importorskip("statsmodels.stats.diagnostic")
    rng = np.random.default_rng(8)
    n, m = 40, 20
    x = rng.normal(10, 3, (1, n + m, 1))
    y = 2.0 * x[..., 0] + rng.normal(0, 1, (1, n + m))
    state = mon.start_monitoring(x[:, :n], y[:, :n], intercept=False)
    result = mon.monitor(state, x[:, n:], y[:, n:])
    full = sm.OLS(y[0], x[0]).fit()
    scaled = diagnostic.recursive_olsresiduals(full, skip=1)[4]
    np.testing.assert_allclose(result.recursive_residuals[0], scaled[n:], rtol=1e-9)
    years = 2000 + rng.normal(0, 5, (1, n + m, 1))
    y2 = 3.0 + 0.5 * years[..., 0] + rng.normal(0, 1, (1, n + m))
    state2 = mon.start_monitoring(years[:, :n], y2[:, :n])
    result2 = mon.monitor(state2, years[:, n:], y2[:, n:])
    full2 = sm.OLS(y2[0], sm.add_constant(years[0])).fit()
    scaled2 = diagnostic.recursive_olsresiduals(full2, skip=2)[4]
    np.testing.assert_allclose(result2.recursive_residuals[0], scaled2[n:], rtol=1e-6)


# --------------------------------------------------------------------------- size and power


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.10])
def test_false_alarm_rate_over_the_default_horizon(alpha: float) -> None:
    # 5,000 stable series, baseline n = 52 weekly rows, one predictor + intercept, normal errors,
    # default horizon 2n = 104 periods (seed 2026). Required: within +-0.03 of 0.05; asserted here
    # within 4 binomial standard errors of alpha (tighter: 0.012 at 5 %).
    rng = np.random.default_rng(2026)
    series, n = 5000, 52
    x, y = _stable_series(rng, series, 3 * n)
    state = mon.start_monitoring(x[:, :n], y[:, :n])
    result = mon.monitor(state, x[:, n:], y[:, n:], alpha=alpha)
    assert np.all(result.horizon == 2 * n)
    assert np.all(result.horizon_exhausted)
    rate = float(result.crossed.mean())
    print(f"false-alarm rate at alpha {alpha}: {rate:.4f} over {series} series")
    assert abs(rate - alpha) <= 4 * math.sqrt(alpha * (1 - alpha) / series)
    assert abs(rate - alpha) <= 0.03
    assert _all_finite(result)


def test_false_alarm_rate_with_a_small_baseline_and_three_predictors() -> None:
    # n = 20 rows and p = 4 coefficients (nu = 16): sigma_hat is noisy, which the finite-sample
    # constants account for. 4,000 series, seed 77, default horizon 40.
    rng = np.random.default_rng(77)
    series, n = 4000, 20
    x, y = _stable_series(rng, series, 3 * n, predictors=3)
    state = mon.start_monitoring(x[:, :n], y[:, :n])
    result = mon.monitor(state, x[:, n:], y[:, n:], alpha=0.05)
    rate = float(result.crossed.mean())
    print(f"false-alarm rate, n = 20, p = 4: {rate:.4f}")
    assert abs(rate - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / series)


def _shifted(
    mean: float, seed: int, series: int = 3000, n: int = 52, start: int = 0
) -> mon.MonitorResult:
    rng = np.random.default_rng(seed)
    x, y = _stable_series(rng, series, 3 * n, mean=mean)
    state = mon.start_monitoring(x[:, :n], y[:, :n])
    slope_se = state.residual_std_error * np.sqrt(state.cov_unscaled[:, 1, 1])
    shifted = y.copy()
    shifted[:, n + start :] += 2.0 * slope_se[:, None] * x[:, n + start :, 0]
    return mon.monitor(state, x[:, n:], shifted[:, n:], alpha=0.05)


def test_slope_shift_of_two_standard_errors_is_detected() -> None:
    # A slope shift of two (baseline) standard errors from the first monitored period; predictor
    # order lines ~ N(100, 20^2) as in a planning series; 3,000 series, n = 52, horizon 104.
    result = _shifted(mean=100.0, seed=5)
    power = float(result.crossed.mean())
    delays = result.detection_delay[result.crossed]
    median_delay = float(np.median(delays))
    median_break = float(np.median(result.break_offset[result.crossed]))
    print(
        f"slope shift 2 SE, predictor mean 5 sd: power {power:.3f}, median delay "
        f"{median_delay:g} periods, median estimated break offset {median_break:g}"
    )
    assert power > 0.9
    assert 1 <= median_delay <= 30
    assert median_break <= 5  # the shift starts at offset 1
    assert np.all(result.break_offset[result.crossed] <= delays)
    assert _all_finite(result)


def test_slope_shift_power_depends_on_the_predictors_mean() -> None:
    # The documented limit of a CUSUM of forecast errors (Kramer, Ploberger & Alt 1988, MEM):
    # with the predictor centred at 0 a slope change leaves the mean forecast error at 0 and the
    # detection rate stays near alpha; with the mean 2 sd from 0 most shifts are found.
    moderate = _shifted(mean=40.0, seed=6)
    centred = _shifted(mean=0.0, seed=7)
    print(
        f"slope shift 2 SE, predictor mean 2 sd: power {moderate.crossed.mean():.3f}, median "
        f"delay {np.median(moderate.detection_delay[moderate.crossed]):g}; mean 0: power "
        f"{centred.crossed.mean():.3f}"
    )
    assert moderate.crossed.mean() > 0.7
    assert centred.crossed.mean() < 0.1


def test_break_dated_after_a_stable_stretch() -> None:
    # A shift starting 30 periods into monitoring: alarms come after it, and the estimated first
    # period of the new regime is near 31.
    result = _shifted(mean=100.0, seed=9, start=30)
    detected = result.crossed
    assert detected.mean() > 0.8
    late = detected & (result.detection_delay > 30)
    assert late.mean() > 0.75
    assert abs(float(np.median(result.break_offset[late])) - 31) <= 3


# --------------------------------------------------------------------------- degenerate input


def test_masked_and_nan_rows_equal_dropped_rows() -> None:
    rng = np.random.default_rng(12)
    n, m = 30, 20
    x, y = _stable_series(rng, 1, n + m)
    keep_base = np.ones(n, dtype=bool)
    keep_base[[3, 17]] = False
    keep_new = np.ones(m, dtype=bool)
    keep_new[[0, 5, 6]] = False
    x_nan, y_nan = x.copy(), y.copy()
    y_nan[0, 3] = np.nan
    x_nan[0, 17, 0] = np.inf
    y_nan[0, n + 5] = np.nan
    masked = mon.start_monitoring(x_nan[:, :n], y_nan[:, :n], keep_base[None, :])
    dropped = mon.start_monitoring(x[:, :n][:, keep_base], y[:, :n][:, keep_base])
    np.testing.assert_allclose(masked.coef, dropped.coef, rtol=1e-12)
    new_mask = keep_new[None, :].copy()
    new_mask[0, 5] = True  # a NaN row marked used is left out all the same
    result = mon.monitor(masked, x_nan[:, n:], y_nan[:, n:], new_mask)
    reference = mon.monitor(dropped, x[:, n:][:, keep_new], y[:, n:][:, keep_new])
    assert result.periods_monitored[0] == reference.periods_monitored[0] == m - 3
    np.testing.assert_allclose(
        result.recursive_residuals[0, keep_new], reference.recursive_residuals[0], rtol=1e-12
    )
    assert np.all(result.recursive_residuals[0, ~keep_new] == 0)
    assert not result.monitored_rows[0, 0] and result.cusum_path[0, 0] == 0
    np.testing.assert_allclose(result.cusum_path[0, 6], result.cusum_path[0, 4])
    assert _all_finite(result)


def test_degenerate_baselines_give_defined_results() -> None:
    rng = np.random.default_rng(13)
    n, m = 12, 10
    x, y = _stable_series(rng, 5, n + m)
    y[0] = 3.0 + 2.0 * x[0, :, 0]  # exact fit
    x[1, :n, 0] = 7.0  # constant predictor
    mask = np.ones((5, n), dtype=bool)
    mask[2, 5:] = False  # 5 rows for 2 coefficients: too few
    x_two = np.concatenate([x, 2.0 * x], axis=2)  # collinear pair for series 3
    state = mon.start_monitoring(x[:, :n], y[:, :n], mask, names=["order_lines"])
    collinear = mon.start_monitoring(x_two[3:4, :n], y[3:4, :n])
    assert list(state.monitorable) == [False, False, False, True, True]
    assert state.exact_fit[0] and "exactly" in str(state.reason[0])
    assert state.coef[0] == pytest.approx([3.0, 2.0])
    assert "order_lines is constant" in str(state.reason[1])
    assert "too few baseline rows" in str(state.reason[2])
    assert not collinear.monitorable[0] and "collinear" in str(collinear.reason[0])
    y_new = y[:, n:].copy()
    y_new[0] += 50.0  # an exact-fit baseline gets no alarm, by the documented rule
    result = mon.monitor(state, x[:, n:], y_new)
    assert list(result.crossed[:3]) == [False, False, False]
    assert list(result.first_crossing_index[:3]) == [-1, -1, -1]
    assert list(result.periods_monitored[:3]) == [0, 0, 0]
    assert result.reason[3] is None and result.periods_monitored[3] == m
    assert _all_finite(result)
    assert np.all(np.isfinite(state.coef)) and np.all(np.isfinite(state.residual_std_error))


def test_no_new_rows_and_all_rows_masked() -> None:
    rng = np.random.default_rng(14)
    x, y = _stable_series(rng, 2, 30)
    state = mon.start_monitoring(x, y)
    empty = mon.monitor(state, np.zeros((2, 0, 1)), np.zeros((2, 0)), boundary="csw")
    assert list(empty.periods_monitored) == [0, 0]
    assert not empty.crossed.any() and not empty.horizon_exhausted.any()
    assert list(empty.break_index) == [-1, -1]
    assert empty.statistic.tolist() == [0.0, 0.0]
    assert np.all(empty.boundary > 0)  # the boundary at j = 0, sqrt(nu a^2)
    assert empty.p_value.tolist() == [1.0, 1.0]
    weighted = mon.monitor(state, np.zeros((2, 0, 1)), np.zeros((2, 0)), boundary="weighted-0.25")
    assert weighted.boundary.tolist() == [0.0, 0.0]  # c sqrt(nu) (j / (nu + j))^gamma at j = 0
    x_new, y_new = _stable_series(rng, 2, 5)
    none_used = mon.monitor(state, x_new, y_new, np.zeros((2, 5), dtype=bool))
    assert list(none_used.periods_monitored) == [0, 0]
    assert _all_finite(empty) and _all_finite(none_used)


def test_horizon_exhausted_and_fresh_start() -> None:
    rng = np.random.default_rng(15)
    n = 30
    x, y = _stable_series(rng, 4, n + 45)
    state = mon.start_monitoring(x[:, :n], y[:, :n])
    result = mon.monitor(state, x[:, n:], y[:, n:], horizon=40)
    assert np.all(result.periods_monitored == 40)
    assert np.all(result.horizon_exhausted)
    assert not result.monitored_rows[:, 40:].any()
    np.testing.assert_allclose(result.cusum_path[:, 44], result.cusum_path[:, 39])
    # Rolling forward: the latest full window becomes the baseline and monitoring starts over.
    rolled = mon.start_monitoring(x[:, 45 : 45 + n], y[:, 45 : 45 + n])
    fresh = mon.monitor(rolled, x[:, 75:], y[:, 75:])
    assert np.all(fresh.periods_monitored == 0)
    too_long = mon.monitor(state, x[:, n:], y[:, n:], horizon=np.array([40, 40, 40, 400]))
    assert not too_long.monitorable[3] and "horizon" in str(too_long.reason[3])
    assert too_long.monitorable[:3].all()
    with pytest.raises(ValueError, match="significance"):
        mon.monitor(state, x[:, n:], y[:, n:], alpha=0.0)
    with pytest.raises(ValueError, match="predictors"):
        mon.monitor(state, np.zeros((4, 3, 2)), np.zeros((4, 3)))
    with pytest.raises(ValueError, match="at least 1"):
        mon.monitor(state, x[:, n:], y[:, n:], horizon=0)


def test_mean_only_model_recursive_residuals_by_hand() -> None:
    # No predictors (as `plumbline breaks` allows): the recursive residual of row t is
    # (y_t - mean of rows before t) * sqrt((t - 1) / t) (Brown, Durbin & Evans 1975, worked by
    # hand from the updating formula with x_t = 1).
    rng = np.random.default_rng(21)
    y = rng.normal(10.0, 2.0, (1, 45))
    n = 30
    state = mon.start_monitoring(np.zeros((1, n, 0)), y[:, :n])
    result = mon.monitor(state, np.zeros((1, 15, 0)), y[:, n:])
    t = np.arange(n + 1, 46)
    previous_mean = np.cumsum(y[0])[n - 1 : 44] / (t - 1)
    expected = (y[0, n:] - previous_mean) * np.sqrt((t - 1) / t)
    np.testing.assert_allclose(result.recursive_residuals[0], expected, rtol=1e-10)
    assert state.residual_std_error[0] == pytest.approx(float(np.std(y[0, :n], ddof=1)))


# --------------------------------------------------------------------------- weighted boundaries


WEIGHTED = ("weighted-0", "weighted-0.25", "weighted-0.45")


@pytest.mark.parametrize("boundary", WEIGHTED)
def test_weighted_boundaries_at_horizon_one_match_student_t(boundary: str) -> None:
    # With H = 1 the weighted boundary c sqrt(nu) (1 + 1/nu) (1/(nu + 1))^gamma (Horvath, Huskova,
    # Kokoszka & Steinebach 2004) is crossed when |t_nu| exceeds it, so on the squared scale
    # c^2 = t_{nu, 1 - alpha/2}^2 / [nu (1 + 1/nu)^2 (1/(nu + 1))^(2 gamma)] exactly (scipy's t).
    # Tolerance 4.5 delta-method standard errors of the simulated quantile.
    gamma = float(boundary.split("-")[1])
    reps = mon.boundary_table_description()["reps"]
    for residual_df in range(4, 30):
        weight = 1.0 / (residual_df * (1 + 1 / residual_df) ** 2
                        * (1 / (residual_df + 1)) ** (2 * gamma))
        for alpha in (0.01, 0.05, 0.10):
            t_quantile = stats.t.isf(alpha / 2, residual_df)
            density = 2 * stats.t.pdf(t_quantile, residual_df)
            quantile_se = math.sqrt(alpha * (1 - alpha) / reps) / density
            simulated = mon.boundary_constant(alpha, residual_df, 1, boundary)
            assert simulated == pytest.approx(
                t_quantile**2 * weight, abs=4.5 * 2 * t_quantile * quantile_se * weight
            )


def test_linear_boundary_over_an_unbounded_horizon_is_kolmogorov() -> None:
    # gamma = 0: |W(s)| / (1 + s) is a Brownian bridge in u = s / (1 + s), so over s in [0, inf)
    # the constant c is the Kolmogorov quantile (scipy's kstwobign: 1.6276 / 1.3581 / 1.2238 at
    # 1 / 5 / 10 %). The committed self-check (100,000 paths, t <= 1e5) and a fresh 20,000-path
    # run of the simulation machinery (t <= 1e6, 2 % steps, seed 12) both agree within 4 Monte
    # Carlo standard errors plus 0.002 for the truncated horizon and coarse steps.
    check = mon.boundary_table_description()["self_check"]["linear_boundary_unbounded_horizon"]
    for row in check:
        assert row["kolmogorov_c"] == pytest.approx(stats.kstwobign.isf(row["alpha"]), abs=1e-4)
        assert row["simulated_c"] == pytest.approx(row["kolmogorov_c"], abs=0.02)
    script = _simulation_script()
    times, nodes = script.geometric_grid(1.0, [1e6], 0.02)
    reps = 20_000
    sample = script.continuous_sup(times, nodes, True, reps, np.random.default_rng(12),
                                   boundary="weighted-0")[:, 0]
    for alpha in (0.05, 0.10):
        rate = float(np.mean(sample > stats.kstwobign.isf(alpha) ** 2))
        assert rate == pytest.approx(alpha, abs=4 * math.sqrt(alpha * (1 - alpha) / reps) + 0.002)


@pytest.mark.parametrize("boundary", ["csw", *WEIGHTED])
def test_false_alarm_rate_of_every_boundary(boundary: str) -> None:
    # 5,000 stable series (seed 2027), n = 52, default horizon 104: within 4 binomial standard
    # errors of alpha = 0.05.
    rng = np.random.default_rng(2027)
    x, y = _stable_series(rng, 5000, 156)
    state = mon.start_monitoring(x[:, :52], y[:, :52])
    result = mon.monitor(state, x[:, 52:], y[:, 52:], alpha=0.05, boundary=boundary)
    rate = float(result.crossed.mean())
    print(f"{boundary}: false-alarm rate {rate:.4f}")
    assert abs(rate - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / 5000)
    assert _all_finite(result)


def test_weighted_boundary_catches_an_early_change_sooner() -> None:
    # The reason for the weighted family: right after the baseline the CSW boundary is wide. A
    # level shift of 2 error SDs from the first monitored period (2,000 series, seed 31).
    rng = np.random.default_rng(31)
    x, y = _stable_series(rng, 2000, 156)
    y[:, 52:] += 20.0
    state = mon.start_monitoring(x[:, :52], y[:, :52])
    delays = {}
    for boundary in ("csw", "weighted-0", "weighted-0.25"):
        result = mon.monitor(state, x[:, 52:], y[:, 52:], alpha=0.05, boundary=boundary)
        assert result.crossed.mean() > 0.99
        delays[boundary] = float(np.median(result.detection_delay[result.crossed]))
    print(f"median delays: {delays}")
    assert delays["weighted-0.25"] < delays["weighted-0"] < delays["csw"]
    assert mon.DEFAULT_BOUNDARY == "weighted-0"  # chosen by delay: DEVELOPERS.md


# --------------------------------------------------------------------------- p-values


@pytest.mark.parametrize("boundary", ["csw", *WEIGHTED])
def test_p_value_is_below_alpha_exactly_when_crossed(boundary: str) -> None:
    rng = np.random.default_rng(41)
    x, y = _stable_series(rng, 3000, 120, mean=60.0)
    y[:1000, 70:] += 12.0  # a third of the series change
    state = mon.start_monitoring(x[:, :40], y[:, :40])
    for alpha in (0.01, 0.05, 0.10):
        result = mon.monitor(state, x[:, 40:], y[:, 40:], alpha=alpha, boundary=boundary)
        np.testing.assert_array_equal(result.p_value < alpha, result.crossed)
        assert np.all((result.p_value > 0) & (result.p_value <= 1))
    early = mon.monitor(state, x[:, 40:45], y[:, 40:45], alpha=0.05, boundary=boundary)
    later = mon.monitor(state, x[:, 40:], y[:, 40:], alpha=0.05, boundary=boundary)
    assert np.all(later.p_value <= early.p_value + 1e-12)  # the running maximum only grows


@pytest.mark.parametrize("boundary", ["csw", "weighted-0.25"])
def test_p_values_are_uniform_under_no_change(boundary: str) -> None:
    # A fresh draw of the finite-sample statistic (nu = 50, H = 100, 40,000 paths, seed 4343)
    # through the p-value interpolation: P(p <= u) = u within 4 binomial standard errors plus
    # the table's own Monte Carlo error, from u = 0.001 to 0.5.
    script = _simulation_script()
    reps = 40_000
    draws = script.finite_sample_sups(50, [100], reps, np.random.default_rng(4343),
                                      (boundary,))[boundary][:, 0]
    p, _ = mon._tail_probability(boundary, 50, 100, draws.astype(np.float64))
    table_reps = mon.boundary_table_description()["reps"]
    for u in (0.001, 0.01, 0.05, 0.2, 0.5):
        se = math.sqrt(u * (1 - u) / reps) + math.sqrt(u * (1 - u) / table_reps)
        assert float(np.mean(p <= u)) == pytest.approx(u, abs=4 * se)


def test_monitoring_p_value_entry_point() -> None:
    a2 = mon.boundary_constant(0.05, 50, 100, "csw")
    assert mon.monitoring_p_value(a2, 50, 100, "csw") == pytest.approx(0.05, rel=1e-9)
    c2 = mon.boundary_constant(0.01, 50, 100)
    assert mon.monitoring_p_value(c2, 50, 100) == pytest.approx(0.01, rel=1e-9)
    assert mon.monitoring_p_value(1e3, 50, 100) < 1e-4  # beyond the table: extrapolated
    assert mon.monitoring_p_value(-5.0, 50, 100, "csw") == 1.0
    with pytest.raises(ValueError, match="unknown monitoring boundary"):
        mon.monitoring_p_value(1.0, 50, 100, "straight")


# --------------------------------------------------------------------------- autocorrelated errors


def _ar1_series(
    rng: np.random.Generator, series: int, rows: int, rho: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    x = rng.normal(100.0, 20.0, (series, rows, 1))
    e = np.empty((series, rows))
    e[:, 0] = rng.standard_normal(series) * 10.0
    innovations = rng.standard_normal((series, rows)) * 10.0 * math.sqrt(1 - rho**2)
    for t in range(1, rows):
        e[:, t] = rho * e[:, t - 1] + innovations[:, t]
    return x, 5.0 + 0.8 * x[:, :, 0] + e


def test_baseline_autocorrelation_matches_statsmodels() -> None:
    # The lag-1 autocorrelation of the baseline residuals against statsmodels' acf of the OLS
    # residuals (a reference library), and the AR(1) long-run factor sqrt((1 + r)/(1 - r)) with
    # r = r1 + (1 + 3 r1)/n clipped to [0, 0.9] (Kendall 1954 bias correction, MEM).
    import statsmodels.api as sm
    from statsmodels.tsa.stattools import acf

    rng = np.random.default_rng(51)
    x, y = _ar1_series(rng, 6, 52, 0.4)
    state = mon.start_monitoring(x, y, errors="ar1")
    for i in range(6):
        residuals = sm.OLS(y[i], sm.add_constant(x[i, :, 0])).fit().resid
        r1 = acf(residuals, nlags=1, fft=False)[1]
        assert state.autocorrelation[i] == pytest.approx(r1, rel=1e-9)
        r = min(max(r1 + (1 + 3 * r1) / 52, 0.0), 0.9)
        assert state.error_scale[i] == pytest.approx(math.sqrt((1 + r) / (1 - r)), rel=1e-9)
    plain = mon.start_monitoring(x, y)
    np.testing.assert_array_equal(plain.error_scale, 1.0)
    with pytest.raises(ValueError, match="errors"):
        mon.start_monitoring(x, y, errors="garch")


def test_long_run_scale_restores_most_of_the_false_alarm_rate() -> None:
    # AR(1) errors with rho = 0.3 (4,000 series, seed 53, n = 52, H = 104, alpha = 0.05): the
    # independent-errors scale alarms on about 20 % of stable series, the AR(1) long-run scale on
    # about 6-7 % (measured; the remaining excess is the noise of r from 52 rows), and on
    # independent errors the long-run scale stays at or below alpha.
    rng = np.random.default_rng(53)
    x, y = _ar1_series(rng, 4000, 156, 0.3)
    rates = {}
    for errors in ("iid", "ar1"):
        state = mon.start_monitoring(x[:, :52], y[:, :52], errors=errors)
        rates[errors] = float(mon.monitor(state, x[:, 52:], y[:, 52:]).crossed.mean())
    x0, y0 = _ar1_series(rng, 4000, 156, 0.0)
    state = mon.start_monitoring(x0[:, :52], y0[:, :52], errors="ar1")
    rates["ar1 on independent errors"] = float(mon.monitor(state, x0[:, 52:], y0[:, 52:])
                                               .crossed.mean())
    print(f"false-alarm rates with AR(1) rho 0.3: {rates}")
    assert rates["iid"] > 0.14
    assert rates["ar1"] < 0.09
    assert rates["ar1 on independent errors"] <= 0.05 + 4 * math.sqrt(0.05 * 0.95 / 4000)
