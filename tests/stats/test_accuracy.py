"""Point accuracy and the bias test (``monitor.stats.accuracy``), issue 14 item 9."""

from __future__ import annotations

import math

import numpy as np
import statsmodels.api as sm
from scipy import stats

from monitor.stats.accuracy import accuracy_batch, long_run_variance, newey_west_lag


def test_mean_error_mae_and_mase_by_hand() -> None:
    # Hyndman & Koehler (2006): MASE = MAE / mean |a_t − a_{t−1}| (the naive last-value
    # forecast's error; here over the same scored periods).
    actual = np.array([10.0, 12.0, 11.0, 15.0])
    point = np.array([9.0, 12.5, 12.0, 13.0])
    batch = accuracy_batch(np.zeros(4, dtype=np.int64), actual, point)
    errors = actual - point  # 1, -0.5, -1, 2
    assert math.isclose(batch.mean_error[0], errors.mean())
    assert math.isclose(batch.mean_absolute_error[0], 4.5 / 4)
    assert math.isclose(batch.mase[0], (4.5 / 4) / ((2 + 1 + 4) / 3))
    assert math.isclose(batch.tracking_signal[0], errors.sum() / (4.5 / 4))


def test_long_run_variance_matches_statsmodels_hac() -> None:
    # Newey & West (1987) with Bartlett weights; reference: statsmodels' HAC covariance of the
    # mean (an OLS on a constant) without the small-sample correction.
    rng = np.random.default_rng(9)
    e = np.zeros(60)
    for t in range(60):
        e[t] = (0.3 * e[t - 1] if t else 0.0) + rng.normal()
    lag = newey_west_lag(60)
    fit = sm.OLS(e, np.ones(60)).fit(cov_type="HAC",
                                     cov_kwds={"maxlags": lag, "use_correction": False})
    assert math.isclose(long_run_variance(e) / 60, float(fit.bse[0]) ** 2, rel_tol=1e-10)


def test_bias_test_keeps_its_level_and_finds_a_shift() -> None:
    # Our own seeded simulation: 26 independent normal errors per series; the two-sided test at
    # 5 % rejects near 5 % (4-sigma binomial band over 3000 series, Newey–West being slightly
    # liberal in small samples allows up to 8 %), and a shift of one error SD is found in most.
    rng = np.random.default_rng(14)
    s, n = 3000, 26
    group = np.repeat(np.arange(s), n)
    errors = rng.normal(size=s * n)
    batch = accuracy_batch(group, errors, np.zeros(s * n))
    rate = float((batch.bias_p_value < 0.05).mean())
    assert 0.05 - 4 * math.sqrt(0.05 * 0.95 / s) < rate < 0.08, rate
    shifted = accuracy_batch(group, errors + 1.0, np.zeros(s * n))
    assert float((shifted.bias_p_value < 0.05).mean()) > 0.9
    # t on n − 1 df: one series by hand
    one = errors[:n]
    t = one.mean() / math.sqrt(long_run_variance(one) / n)
    assert math.isclose(batch.bias_p_value[0], 2 * stats.t.sf(abs(t), n - 1), rel_tol=1e-12)


def test_groups_interleaved_give_each_group_alone_bit_for_bit() -> None:
    # A pass stacks series in any order; each group's figures must equal those of its rows alone
    # (same rows in the same order), NaN rows left out. Our own seeded data.
    rng = np.random.default_rng(21)
    sizes = rng.integers(0, 40, 25)
    group = np.repeat(np.arange(25) * 3 + 1, sizes)
    actual = rng.normal(100.0, 10.0, group.size)
    point = actual + rng.normal(0.5, 3.0, group.size)
    actual[rng.random(group.size) < 0.05] = np.nan
    point[rng.random(group.size) < 0.05] = np.inf
    # interleave the groups, keeping each group's rows in order: shuffle the labels, then give
    # each place its group's next row
    labels = rng.permutation(group)
    order = np.empty(group.size, dtype=np.int64)
    for value in np.unique(group):
        order[labels == value] = np.flatnonzero(group == value)
    shuffled = accuracy_batch(group[order], actual[order], point[order])
    assert not (order == np.arange(group.size)).all()
    for index, value in enumerate(shuffled.group):
        rows = np.flatnonzero(group == value)
        alone = accuracy_batch(np.zeros(rows.size, dtype=np.int64), actual[rows], point[rows])
        for name in ("scored", "mean_error", "mean_absolute_error", "mase", "tracking_signal",
                     "bias_t", "bias_p_value"):
            got, want = getattr(shuffled, name)[index], getattr(alone, name)[0]
            assert np.asarray(got).tobytes() == np.asarray(want).tobytes(), (value, name)


def _one_group(actuals: np.ndarray, points: np.ndarray) -> dict[str, float]:
    """The figures of one group's rows alone, computed as the module docstring states them, one
    step at a time (numpy's mean, ``long_run_variance``, scipy's t): the oracle for the batch."""
    keep = np.isfinite(actuals) & np.isfinite(points)
    a, e = actuals[keep], actuals[keep] - points[keep]
    n = e.size
    out = dict.fromkeys(("mean_error", "mean_absolute_error", "mase", "tracking_signal",
                         "bias_t", "bias_p_value"), math.nan)
    out["scored"] = n
    if n == 0:
        return out
    mae = float(np.abs(e).mean())
    out["mean_error"], out["mean_absolute_error"] = float(e.mean()), mae
    if mae > 0:
        out["tracking_signal"] = float(e.sum()) / mae
    if n >= 2 and np.abs(np.diff(a)).mean() > 0:
        out["mase"] = mae / float(np.abs(np.diff(a)).mean())
    if n >= 3 and long_run_variance(e) > 0:
        t = float(e.mean()) / math.sqrt(long_run_variance(e) / n)
        out["bias_t"], out["bias_p_value"] = t, float(2 * stats.t.sf(abs(t), n - 1))
    return out


def test_every_group_at_once_equals_each_group_worked_out_alone() -> None:
    # Our own seeded data: groups of 0 to 300 rows (Newey–West lags 0 to 5), NaN and infinite
    # rows, constant actuals (no naive-forecast error: MASE undefined), perfect forecasts (MAE 0),
    # and autocorrelated errors; each figure against the one-group oracle above.
    rng = np.random.default_rng(2026)
    sizes = np.concatenate([[0, 1, 2, 3, 4, 5], rng.integers(0, 300, 60)])
    labels = np.repeat(np.arange(sizes.size) * 2 + 7, sizes)
    actual = rng.normal(50.0, 8.0, labels.size)
    point = actual - rng.normal(0.3, 2.0, labels.size)
    for k in range(1, labels.size):  # mildly autocorrelated errors
        if labels[k] == labels[k - 1]:
            point[k] = actual[k] - (0.4 * (actual[k - 1] - point[k - 1]) + rng.normal())
    actual[rng.random(labels.size) < 0.03] = np.nan
    point[rng.random(labels.size) < 0.03] = -np.inf
    constant = labels == 7 + 2 * 6
    actual[constant] = 40.0
    exact = labels == 7 + 2 * 7
    point[exact] = actual[exact]
    batch = accuracy_batch(labels, actual, point)
    assert batch.group.tolist() == sorted(set(labels.tolist()))
    checked = 0
    for index, value in enumerate(batch.group):
        rows = labels == value
        want = _one_group(actual[rows], point[rows])
        assert batch.scored[index] == want["scored"], value
        for name in ("mean_error", "mean_absolute_error", "mase", "tracking_signal", "bias_t",
                     "bias_p_value"):
            got = float(getattr(batch, name)[index])
            if math.isnan(want[name]):
                assert math.isnan(got), (value, name)
            else:
                assert math.isclose(got, want[name], rel_tol=1e-11, abs_tol=1e-13), (value, name)
                checked += 1
    assert checked > 300
    assert math.isnan(batch.mase[list(batch.group).index(7 + 2 * 6)])
    assert math.isnan(batch.tracking_signal[list(batch.group).index(7 + 2 * 7)])
