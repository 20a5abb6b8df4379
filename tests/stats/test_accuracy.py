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
