"""``fit_batch``: every series equals its one-at-a-time ``fit_ols`` (to 1e-10 relative).

The batched fast path (cross products of standardised columns) is a different computation from
``fit_ols`` (QR with refinement), so these tests check that the two agree, that the fast path is
really taken for well-conditioned series (else the comparison would be trivial), that series
which need ``fit_ols`` get it, and that bad series do not disturb their neighbours. statsmodels
is the outside reference for a sample of series.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm

from monitor.stats._ols_fast import FAST_CONDITION_LIMIT
from monitor.stats.ols import BatchFit, OlsFit, fit_batch, fit_ols

RTOL = 1e-10

ARRAY_FIELDS = (
    "coef", "standard_error", "t", "p_value", "lower", "upper", "cov_unscaled", "fitted",
    "leverage", "x_min", "x_max", "x_centre", "x_scale", "r_inverse",
)
SCALAR_FIELDS = (
    "residual_std_error", "sse", "ssr", "sst", "r_squared", "adj_r_squared", "f_statistic",
    "f_p_value", "correlation", "correlation_t", "correlation_p_value", "t_critical",
)
EXACT_FIELDS = ("terms", "intercept", "level", "n", "p", "residual_df", "estimable", "reason",
                "exact_fit", "f_df")


def assert_same_fit(batched: OlsFit, single: OlsFit, rtol: float = RTOL) -> None:
    """Field-by-field equality to ``rtol`` relative, NaN matching NaN and None matching None.

    Arrays are compared elementwise, except the residuals: they are compared normwise
    (max |a - b| / max |b|), since a residual that happens to be ~0 has no relative digits.
    """
    for name in EXACT_FIELDS:
        assert getattr(batched, name) == getattr(single, name), name
    for name in ARRAY_FIELDS:
        np.testing.assert_allclose(getattr(batched, name), getattr(single, name), rtol=rtol,
                                   atol=0, err_msg=name)
    for name in SCALAR_FIELDS:
        a, b = getattr(batched, name), getattr(single, name)
        if b is None:
            assert a is None, name
        else:
            assert a is not None, name
            np.testing.assert_allclose(a, b, rtol=rtol, atol=0, err_msg=name)
    if single.estimable:
        scale = np.max(np.abs(single.residuals))
        assert np.max(np.abs(batched.residuals - single.residuals)) <= rtol * scale
    else:
        assert np.all(np.isnan(batched.residuals))


def ragged(seed: int, s: int, n_max: int, k: int, correlation: float = 0.3):  # type: ignore[no-untyped-def]
    """Series of different lengths; rows past each length are NaN (and masked out)."""
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(s, n_max, k))
    if k > 1:
        base[:, :, 1:] = correlation * base[:, :, :1] + math.sqrt(1 - correlation**2) * base[
            :, :, 1:
        ]
    x = 50.0 + 10.0 * base
    slopes = rng.uniform(0.5, 2.0, size=(s, k)) * rng.choice([-1.0, 1.0], size=(s, k))
    y = 20.0 + np.einsum("snk,sk->sn", x, slopes) + rng.normal(scale=5.0, size=(s, n_max))
    lengths = rng.integers(k + 3, n_max + 1, size=s)
    mask = np.arange(n_max)[None, :] < lengths[:, None]
    x[~mask] = np.nan
    y[~mask] = np.nan
    return x, y, mask


def each_series_matches(fit: BatchFit, x: np.ndarray, y: np.ndarray, mask: np.ndarray) -> None:
    for i in range(fit.s):
        single = fit_ols(x[i, mask[i]], y[i, mask[i]], intercept=fit.intercept, level=fit.level,
                         names=fit.terms[int(fit.intercept):])
        assert_same_fit(fit.series(i), single)


@pytest.mark.parametrize(
    ("seed", "k", "intercept", "level"),
    [(1, 2, True, 0.95), (2, 1, True, 0.80), (3, 3, False, 0.99), (4, 1, False, 0.90),
     (5, 4, True, 0.99)],
)
def test_ragged_series_equal_one_at_a_time_fits(
    seed: int, k: int, intercept: bool, level: float
) -> None:
    x, y, mask = ragged(seed, 60, 40, k)
    fit = fit_batch(x, y, mask, intercept=intercept, level=level)
    assert fit.fast_path.all(), "well-conditioned series must take the fast path"
    assert fit.estimable.all()
    each_series_matches(fit, x, y, mask)


def test_fast_path_near_its_conditioning_limit_still_agrees() -> None:
    # Two predictors with correlation rho have cond(Z'Z) = (1 + rho) / (1 - rho); choose rho
    # so that the condition number is 80 % of the limit, the worst case the fast path serves.
    target = 0.8 * FAST_CONDITION_LIMIT
    rho = (target - 1.0) / (target + 1.0)
    rng = np.random.default_rng(9)
    s, n = 40, 50
    a = rng.normal(size=(s, n))
    b = rng.normal(size=(s, n))
    # Exact sample correlation rho: orthogonalise b against a within each series first.
    a -= a.mean(axis=1, keepdims=True)
    b -= b.mean(axis=1, keepdims=True)
    b -= (np.sum(a * b, axis=1) / np.sum(a * a, axis=1))[:, None] * a
    a /= np.linalg.norm(a, axis=1, keepdims=True)
    b /= np.linalg.norm(b, axis=1, keepdims=True)
    x = np.stack([a, rho * a + math.sqrt(1 - rho**2) * b], axis=2) * 30.0 + 100.0
    y = 5.0 + 2.0 * x[:, :, 0] - 1.0 * x[:, :, 1] + rng.normal(scale=0.5, size=(s, n))
    mask = np.ones((s, n), dtype=bool)
    fit = fit_batch(x, y, mask)
    assert fit.fast_path.all()
    each_series_matches(fit, x, y, mask)


def test_bad_series_inside_a_batch_do_not_spoil_the_others() -> None:
    x, y, mask = ragged(7, 12, 30, 2)
    good_alone = fit_batch(x, y, mask)
    x_bad, y_bad, mask_bad = x.copy(), y.copy(), mask.copy()
    x_bad[1, 0, 0] = np.nan  # NaN in a used row
    x_bad[3, :, 1] = 7.0  # constant predictor
    mask_bad[5, 3:] = False  # too few rows: 3 rows for 3 terms
    x_bad[7, :, 1] = 2.0 * x_bad[7, :, 0] - 3.0  # collinear with the first predictor
    y_bad[9] = 1.0 + 2.0 * x_bad[9, :, 0] - x_bad[9, :, 1]  # exact fit
    x_bad[10, :, 1] = x_bad[10, :, 0] + 1e-3 * np.sin(np.arange(30))  # ill-conditioned
    y_bad[11, 2] = np.inf
    fit = fit_batch(x_bad, y_bad, mask_bad)
    expected_reasons = {1: "non-finite", 3: "constant", 5: "too few rows", 7: "collinear",
                        11: "non-finite"}
    for i, words in expected_reasons.items():
        assert not fit.estimable[i]
        reason = fit.reason[i]
        assert reason is not None and words in reason, (i, reason)
        assert np.all(np.isnan(fit.coef[i]))
    assert fit.estimable[9] and fit.exact_fit[9]
    assert fit.estimable[10] and not fit.fast_path[10]
    untouched = [0, 2, 4, 6, 8]
    assert fit.fast_path[untouched].all()
    for i in untouched:
        assert_same_fit(fit.series(i), good_alone.series(i), rtol=0.0)
    each_series_matches(fit, x_bad, y_bad, mask_bad)


def test_rows_off_the_mask_are_ignored_whatever_they_hold() -> None:
    x, y, mask = ragged(8, 20, 25, 2)
    garbage_x = np.where(mask[:, :, None], x, 1e300)
    garbage_y = np.where(mask, y, -np.inf)
    clean = fit_batch(x, y, mask)
    dirty = fit_batch(garbage_x, garbage_y, mask)
    np.testing.assert_array_equal(clean.coef, dirty.coef)
    np.testing.assert_array_equal(clean.standard_error, dirty.standard_error)
    assert np.all(np.isnan(dirty.residuals[~mask]))
    assert np.all(np.isnan(dirty.leverage[~mask]))


def test_batch_prediction_equals_single_prediction() -> None:
    x, y, mask = ragged(10, 15, 30, 2)
    x[4, :, 1] = 3.0  # one series not estimable
    fit = fit_batch(x, y, mask, level=0.8)
    rng = np.random.default_rng(11)
    points = 50.0 + 10.0 * rng.normal(size=(15, 3, 2))
    batch_prediction = fit.predict(points)
    assert batch_prediction.point.shape == (15, 3)
    for i in range(15):
        if not fit.estimable[i]:
            assert np.all(np.isnan(batch_prediction.upper[i]))
            continue
        single = fit_ols(x[i, mask[i]], y[i, mask[i]], level=0.8).predict(points[i])
        for name in ("point", "mean_lower", "mean_upper", "lower", "upper", "leverage"):
            np.testing.assert_allclose(getattr(batch_prediction, name)[i], getattr(single, name),
                                       rtol=RTOL, atol=0, err_msg=name)
    one_point = fit.predict(points[:, 0, :])
    np.testing.assert_array_equal(one_point.point[:, 0], batch_prediction.point[:, 0])


def test_sample_of_series_against_statsmodels() -> None:
    # statsmodels OLS and get_prediction as the outside reference, level 0.99.
    x, y, mask = ragged(12, 8, 40, 2)
    fit = fit_batch(x, y, mask, level=0.99)
    new = np.full((8, 1, 2), 55.0)
    prediction = fit.predict(new)
    for i in range(8):
        design = sm.add_constant(x[i, mask[i]])
        ref = sm.OLS(y[i, mask[i]], design).fit()
        np.testing.assert_allclose(fit.coef[i], ref.params, rtol=1e-9)
        np.testing.assert_allclose(fit.standard_error[i], ref.bse, rtol=1e-9)
        np.testing.assert_allclose(fit.p_value[i], ref.pvalues, rtol=1e-9)
        np.testing.assert_allclose(fit.lower[i], ref.conf_int(alpha=0.01)[:, 0], rtol=1e-9)
        frame = ref.get_prediction(np.array([[1.0, 55.0, 55.0]])).summary_frame(alpha=0.01)
        np.testing.assert_allclose(prediction.lower[i], frame["obs_ci_lower"], rtol=1e-9)
        np.testing.assert_allclose(prediction.mean_upper[i], frame["mean_ci_upper"], rtol=1e-9)


def test_default_mask_and_shape_errors() -> None:
    x, y, _ = ragged(13, 3, 10, 1)
    x, y = np.nan_to_num(x, nan=1.0), np.nan_to_num(y, nan=2.0)
    fit = fit_batch(x[:, :, 0], y)  # (s, n) is one predictor
    assert fit.mask.all() and fit.n.tolist() == [10, 10, 10]
    with pytest.raises(ValueError, match="mask"):
        fit_batch(x, y, np.ones((3, 9), dtype=bool))
    with pytest.raises(ValueError, match="x must be"):
        fit_batch(x, y[:, :5])
    with pytest.raises(ValueError, match="x0"):
        fit.predict(np.zeros((2, 1, 1)))


def test_empty_batch() -> None:
    fit = fit_batch(np.zeros((0, 5, 2)), np.zeros((0, 5)))
    assert fit.s == 0 and fit.coef.shape == (0, 3)


def test_intercept_only_batch() -> None:
    rng = np.random.default_rng(14)
    y = 10.0 + rng.normal(size=(4, 9))
    mask = np.ones((4, 9), dtype=bool)
    mask[2, 6:] = False
    fit = fit_batch(np.zeros((4, 9, 0)), y, mask, level=0.9)
    assert fit.fast_path.all()
    each_series_matches(fit, np.zeros((4, 9, 0)), y, mask)


def test_batch_follows_fit_ols_on_out_of_range_and_empty_series() -> None:
    x, y, mask = ragged(15, 6, 20, 1)
    x[0] *= 1e200  # beyond the magnitude fit_ols accepts
    y[1] *= 1e-300
    x[2] = 1e15 + np.nan_to_num(x[2] - 50.0)  # constant to rounding
    mask[3] = False  # no rows at all
    fit = fit_batch(x, y, mask)
    assert not fit.fast_path[:4].any() and fit.fast_path[4:].all()
    assert not fit.estimable[:4].any()
    each_series_matches(fit, x, y, mask)


@pytest.mark.parametrize(("k", "intercept"), [(1, True), (2, True), (3, False)])
def test_many_empty_series_among_fitted_ones_each_equal_fit_ols(k: int, intercept: bool) -> None:
    """The series with no rows (most of a batch after a break, say) share one fit_ols result
    set side by side; each must still equal its own fit_ols, and the others stay untouched."""
    x, y, mask = ragged(16, 40, 30, k)
    empty = np.zeros(40, dtype=bool)
    empty[[0, 3, 4, 5, 17, 39]] = True
    mask[empty] = False
    x[1, 2] = np.nan  # a row the mask keeps but NaN: a fallback series with rows
    fit = fit_batch(x, y, mask, intercept=intercept)
    assert not fit.estimable[empty].any() and fit.estimable[~empty & (np.arange(40) != 1)].all()
    assert len({fit.reason[i] for i in np.flatnonzero(empty)}) == 1
    assert fit.reason[0] is not None and fit.reason[1] is not None
    assert fit.reason[1] != fit.reason[0]
    each_series_matches(fit, x, y, mask)
