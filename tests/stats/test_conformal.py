"""Tests of the calibrated interval's quantiles (monitor/stats/conformal.py).

Method under test: adaptive conformal inference, Gibbs & Candès (2021), "Adaptive conformal
inference under distribution shift", NeurIPS 34, on split-conformal quantiles of a window of recent
scores. Sources checked against, named beside each check:
- numpy's ``quantile(..., method="inverted_cdf")``: Hyndman & Fan (1996) definition 1, the
  inverse of the empirical distribution function, which is Gibbs & Candès's Q̂(p);
- Gibbs & Candès (2021), Proposition 4.1: for any sequence of scores,
  |(1/T) Σ err_t − α| ≤ (max(α_1, 1 − α_1) + γ)/(γT) (checked with hypothesis);
- the recursion α_{t+1} = α_t + γ(α − err_t) of their section 2, written out here as a plain
  one-series loop that the batched code must equal;
- seeded simulations (tests/stats/conformal_panels.py) for the coverage and width the issue asks
  for; the benchmark tests/benchmarks/bench_conformal.py runs the same panels larger.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conformal_panels import KINDS, run_panel
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.stats.conformal import (
    DEFAULT_GAMMA,
    DEFAULT_MIN_SCORES,
    DEFAULT_WINDOW,
    adaptive_conformal,
    adaptive_conformal_batch,
    conformal_quantile,
)

# --------------------------------------------------------------------------------------------
# A straightforward reference: one series, one entry at a time, straight from the paper.


def reference_loop(scores, level, gamma, window, min_scores):
    """Gibbs & Candès (2021) section 2 on one series; None entries are not scored."""
    alpha_target = 1 - level
    alpha = alpha_target
    history: list[float] = []
    quantiles, alphas, issued, covered = [], [], [], []
    for score in scores:
        if score is None or not math.isfinite(score):
            quantiles.append(math.nan)
            alphas.append(math.nan)
            issued.append(False)
            covered.append(False)
            continue
        if len(history) < min_scores:
            quantiles.append(math.nan)
            alphas.append(math.nan if len(history) < min_scores else alpha)
            issued.append(False)
            covered.append(False)
            history.append(score)
            continue
        recent = sorted(history[-window:])
        p = 1 - alpha
        if p > 1:
            q, hit = math.inf, True
        elif p <= 0:
            q, hit = 0.0, False  # the empty set misses whatever the score
        else:
            rank = min(max(math.ceil(p * len(recent) - 1e-9), 1), len(recent))
            q = recent[rank - 1]
            hit = score <= q
        quantiles.append(q)
        alphas.append(alpha)
        issued.append(True)
        covered.append(hit)
        alpha = alpha + gamma * (alpha_target - (0 if hit else 1))
        history.append(score)
    if len(history) < min_scores:
        next_q = None
    else:
        recent = sorted(history[-window:])
        p = 1 - alpha
        if p > 1:
            next_q = math.inf
        elif p <= 0:
            next_q = 0.0
        else:
            next_q = recent[min(max(math.ceil(p * len(recent) - 1e-9), 1), len(recent)) - 1]
    return quantiles, alphas, issued, covered, next_q


# --------------------------------------------------------------------------------------------
# The quantile


@pytest.mark.parametrize("p", [0.01, 0.05, 0.5, 0.9, 0.95, 0.975, 0.99, 1.0])
@pytest.mark.parametrize("m", [1, 7, 20, 52, 104])
def test_conformal_quantile_is_numpys_inverted_cdf(p, m):
    # numpy's method="inverted_cdf" is Hyndman & Fan (1996) definition 1, inf{x : F_m(x) >= p}.
    scores = np.random.default_rng(m).exponential(size=m)
    assert conformal_quantile(scores, p) == np.quantile(scores, p, method="inverted_cdf")


def test_conformal_quantile_beyond_the_unit_interval():
    scores = [0.5, 1.0, 2.0]
    assert conformal_quantile(scores, 1.01) == math.inf  # the whole line (Gibbs & Candès 2021)
    assert conformal_quantile(scores, 0.0) == -math.inf  # the empty set
    assert math.isnan(conformal_quantile([], 0.5))


def test_quantile_rank_survives_rounding_of_p_times_m():
    # 0.95 × 20 is 19.000000000000004 in floating point; the 19th smallest is meant.
    scores = np.arange(1.0, 21.0)
    assert conformal_quantile(scores, 0.95) == 19.0
    assert np.quantile(scores, 0.95, method="inverted_cdf") == 19.0


# --------------------------------------------------------------------------------------------
# Batched equals the one-series loop


def _ragged_batch(seed, series=12, n=90):
    rng = np.random.default_rng(seed)
    scores = np.abs(rng.standard_t(3, size=(series, n)))
    mask = rng.random((series, n)) > 0.2
    mask[0] = False  # a series with nothing scored
    mask[1, 5:] = False  # one still in its warm-up
    scores[2, 10] = np.nan  # a hole inside the mask
    scores[3] *= np.linspace(1, 6, n)  # a drift, so α_t travels
    scores[4, 40:] = 0.0  # ties at zero
    return scores, mask


@pytest.mark.parametrize(("gamma", "window", "min_scores"),
                         [(0.005, 104, 20), (0.05, 10, 5), (0.3, 3, 1), (1.0, 1, 1)])
def test_batch_equals_the_one_series_reference_loop(gamma, window, min_scores):
    scores, mask = _ragged_batch(int(gamma * 1000) + window)
    batch = adaptive_conformal_batch(scores, mask, 0.9, gamma=gamma, window=window,
                                     min_scores=min_scores)
    for i in range(scores.shape[0]):
        listed = [float(v) if m else None for v, m in zip(scores[i], mask[i], strict=True)]
        q, a, issued, covered, next_q = reference_loop(listed, 0.9, gamma, window, min_scores)
        np.testing.assert_array_equal(batch.quantile[i], np.array(q))
        np.testing.assert_array_equal(batch.issued[i], np.array(issued))
        np.testing.assert_array_equal(batch.covered[i], np.array(covered))
        used = np.array(issued)
        np.testing.assert_allclose(batch.alpha[i][used], np.array(a)[used], rtol=0, atol=1e-12)
        one = batch.series(i)
        assert one.next_quantile == next_q
        history = [v for v in listed if v is not None and math.isfinite(v)]
        widest = max(history[-window:]) if next_q is not None else None
        assert one.next_widest == widest
        assert (one.reason is None) == (next_q is not None)
    # The extreme settings must actually have reached both ends of α_t, or the test is weak.
    if gamma >= 0.3:
        assert np.any(np.isinf(batch.quantile)) and np.any(batch.quantile == 0.0)


def test_one_series_function_is_the_batch_of_one():
    scores, _ = _ragged_batch(3)
    row = scores[3]
    single = adaptive_conformal(row, 0.95, gamma=0.02, window=30, min_scores=10)
    batch = adaptive_conformal_batch(row[None, :], None, 0.95, gamma=0.02, window=30,
                                     min_scores=10)
    np.testing.assert_array_equal(single.quantile, batch.quantile[0])
    assert single.next_quantile == float(batch.next_quantile[0])


# --------------------------------------------------------------------------------------------
# Gibbs & Candès (2021), Proposition 4.1: the long-run miss rate, for any sequence of scores


@settings(max_examples=200, deadline=None)
@given(
    scores=st.lists(st.floats(0, 1e6, allow_nan=False), min_size=30, max_size=400),
    level=st.sampled_from([0.5, 0.8, 0.9, 0.95, 0.99]),
    gamma=st.sampled_from([0.001, 0.005, 0.02, 0.1, 0.5]),
    window=st.integers(1, 60),
)
def test_long_run_miss_rate_bound_of_proposition_4_1(scores, level, gamma, window):
    result = adaptive_conformal(np.array(scores), level, gamma=gamma, window=window,
                                min_scores=1)
    issued = result.issued
    t = int(issued.sum())
    err = (issued & ~result.covered).sum() / t
    alpha = 1 - level
    bound = (max(alpha, 1 - alpha) + gamma) / (gamma * t)
    assert abs(err - alpha) <= bound + 1e-12
    # The proof's invariant: α_t stays in [−γ, 1 + γ].
    alphas = result.alpha[issued]
    assert np.all(alphas >= -gamma - 1e-12) and np.all(alphas <= 1 + gamma + 1e-12)


def test_adversarial_scores_still_meet_the_bound():
    # Scores that grow without end: every window's quantile is beaten by the next score.
    scores = np.arange(1.0, 2001.0)
    result = adaptive_conformal(scores, 0.9, gamma=0.01, window=20, min_scores=1)
    t = int(result.issued.sum())
    err = float((result.issued & ~result.covered).sum() / t)
    assert abs(err - 0.1) <= (0.9 + 0.01) / (0.01 * t)
    assert err == pytest.approx(0.1, abs=0.05)  # it got there by going to the whole line
    assert np.any(np.isinf(result.quantile))


# --------------------------------------------------------------------------------------------
# The panels (a smaller, seeded, fast version of tests/benchmarks/bench_conformal.py)


@pytest.mark.parametrize("kind", KINDS)
def test_calibrated_interval_keeps_nominal_coverage_near_oracle_width(kind):
    result = run_panel(kind, series=150, baseline=52, forecasts=300, level=0.95, seed=20261202,
                       gamma=DEFAULT_GAMMA, window=DEFAULT_WINDOW, min_scores=DEFAULT_MIN_SCORES)
    assert result.forecasts == 150 * (300 - DEFAULT_MIN_SCORES)
    assert abs(result.oracle_coverage - 0.95) <= 0.005  # the simulation's own check
    # The targets: long-run coverage within ±0.02 of nominal, width at most 10 % above
    # the oracle's (tests/stats/conformal_panels.py defines the oracle).
    assert abs(result.calibrated_coverage - 0.95) <= 0.02
    assert result.calibrated_width_ratio <= 1.10
    if kind == "growing":
        # The model's own interval falls far short here, and the calibrated one repairs it.
        assert result.own_coverage < 0.80
        assert result.calibrated_coverage - result.own_coverage > 0.15


# --------------------------------------------------------------------------------------------
# Degenerate inputs and programming errors


def test_warm_up_and_empty_series():
    batch = adaptive_conformal_batch(np.full((2, 5), np.nan), None, 0.95, min_scores=3)
    assert np.all(np.isnan(batch.next_quantile))
    assert batch.series(0).reason == "0 scored forecasts; a calibrated interval needs 3"
    one = adaptive_conformal([0.5, 1.0], 0.95, min_scores=3)
    assert one.next_quantile is None and not one.issued.any()
    assert one.reason == "2 scored forecasts; a calibrated interval needs 3"
    assert adaptive_conformal([0.5, 1.0, 2.0], 0.5, min_scores=3).next_quantile == 1.0
    empty = adaptive_conformal_batch(np.zeros((0, 0)), None, 0.9)
    assert len(empty) == 0


def test_results_are_read_only():
    batch = adaptive_conformal_batch(np.ones((1, 30)), None, 0.9, min_scores=5)
    with pytest.raises(ValueError):
        batch.quantile[0, 0] = 1.0


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"level": 1.0}, "level"),
    ({"level": 0}, "level"),
    ({"gamma": 0.0}, "gamma"),
    ({"gamma": math.inf}, "gamma"),
    ({"window": 0}, "window"),
    ({"min_scores": 1.5}, "min_scores"),
    ({"window": True}, "window"),
])
def test_bad_settings_are_programming_errors(kwargs, message):
    with pytest.raises(ValueError, match=message):
        adaptive_conformal_batch(np.ones((1, 3)), None, **kwargs)


def test_bad_shapes_and_negative_scores_are_refused():
    with pytest.raises(ValueError, match="series, time"):
        adaptive_conformal_batch(np.ones(3), None, 0.9)
    with pytest.raises(ValueError, match="mask"):
        adaptive_conformal_batch(np.ones((2, 3)), np.ones((2, 2), dtype=bool), 0.9)
    with pytest.raises(ValueError, match="non-negative"):
        adaptive_conformal_batch(np.array([[1.0, -1.0]]), None, 0.9)
