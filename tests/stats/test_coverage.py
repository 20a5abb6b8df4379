"""Tests of the coverage audit (monitor/stats/coverage.py).

Sources checked against, named beside each check:
- CHECK_VALUES.md = ../shared/reference/CHECK_VALUES.md (items 6, 7, 8, 9, 13). Its "published"
  columns are recalled from memory there (MEM); its "computed" columns were recomputed with scipy.
  The values are copied into this file so the tests run without ../shared.
- scipy (`scipy.stats.binomtest(...).proportion_ci(method="exact")`, `binom`, `chi2`) and
  statsmodels (`proportion_confint`, `Logit`) as reference libraries (test-only).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy import stats

from monitor.stats.coverage import (
    CoverageAudit,
    CoverageZone,
    audit_batch,
    audit_by_lead,
    audit_coverage,
    audit_last,
    christoffersen_statistics,
    clopper_pearson_interval,
    interval_score,
    kupiec_statistic,
    miss_probability,
    traffic_light_zone,
    transition_counts,
)

CHI2_1_CRITICAL_5PCT = 3.841459  # CHECK_VALUES.md item 6 (CONF-scipy)


# --------------------------------------------------------------------------------------------
# Kupiec (1995) proportion-of-failures test


def test_kupiec_worked_example() -> None:
    # CHECK_VALUES.md item 6 (CONF-scipy): N=8, T=250, p=0.01 gives LR 7.7336, p-value 0.0054.
    lr = float(kupiec_statistic(8, 250, 0.01))
    assert lr == pytest.approx(7.7336, abs=5e-5)
    assert float(stats.chi2.sf(lr, 1)) == pytest.approx(0.0054, abs=5e-5)


def test_kupiec_equals_binomial_likelihood_ratio_from_scipy() -> None:
    # Independent route (scipy): the binomial coefficients cancel in the LR, so
    # LR = 2 [log binom.pmf(N; T, N/T) - log binom.pmf(N; T, p)].
    rng = np.random.default_rng(6)
    for _ in range(50):
        total = int(rng.integers(1, 400))
        misses = int(rng.integers(0, total + 1))
        p = float(rng.uniform(0.005, 0.3))
        expected = 2 * (stats.binom.logpmf(misses, total, misses / total)
                        - stats.binom.logpmf(misses, total, p))
        assert float(kupiec_statistic(misses, total, p)) == pytest.approx(expected, rel=1e-9,
                                                                          abs=1e-9)


def _non_rejection_region(p: float, total: int) -> tuple[int, int]:
    misses = np.arange(total + 1)
    accepted = misses[kupiec_statistic(misses, total, p) <= CHI2_1_CRITICAL_5PCT]
    # the region is an interval of N; check that before summarising it by its ends
    assert np.array_equal(accepted, np.arange(accepted[0], accepted[-1] + 1))
    return int(accepted[0]), int(accepted[-1])


# (p, T): (Kupiec's published region as "low < N < high", MEM in CHECK_VALUES.md item 6;
#          the computed region low..high, CONF-scipy in item 6)
KUPIEC_TABLE = {
    (0.01, 255): ((None, 7), (1, 6)),
    (0.01, 510): ((1, 11), (2, 10)),
    (0.01, 1000): ((4, 17), (5, 16)),
    (0.025, 255): ((2, 12), (3, 11)),
    (0.025, 510): ((6, 21), (7, 20)),
    (0.025, 1000): ((15, 36), (16, 35)),
    (0.05, 255): ((6, 21), (7, 20)),
    (0.05, 510): ((16, 36), (17, 35)),
    (0.05, 1000): ((37, 65), (38, 64)),
    (0.075, 255): ((11, 28), (12, 27)),
    (0.075, 510): ((27, 51), (28, 50)),
    (0.075, 1000): ((59, 92), (60, 91)),
    (0.10, 255): ((16, 36), (17, 35)),
    (0.10, 510): ((38, 65), (39, 64)),
    (0.10, 1000): ((81, 120), (82, 119)),
}


@pytest.mark.parametrize(("p", "total"), sorted(KUPIEC_TABLE))
def test_kupiec_non_rejection_regions(p: float, total: int) -> None:
    # Kupiec (1995), table of 5 % non-rejection regions, as recalled in CHECK_VALUES.md item 6
    # (MEM), and its scipy recomputation there (CONF-scipy).
    (published_low, published_high), computed = KUPIEC_TABLE[(p, total)]
    region = _non_rejection_region(p, total)
    assert region == computed
    assert region[1] == published_high - 1
    if published_low is not None:
        assert region[0] == published_low + 1
    else:
        # The one discrepancy (CHECK_VALUES.md item 6): the published region for p=0.01, T=255
        # reads "N < 7", which admits N = 0, but LR(0) = -2·255·ln 0.99 = 5.126 > 3.841, so the
        # LR test rejects zero misses. We reproduce what is computable (1 <= N <= 6), not the
        # printed region.
        assert region[0] == 1
        assert float(kupiec_statistic(0, 255, 0.01)) == pytest.approx(5.126, abs=5e-4)
        assert float(kupiec_statistic(0, 255, 0.01)) > CHI2_1_CRITICAL_5PCT


def test_kupiec_boundary_values() -> None:
    # CHECK_VALUES.md item 6 (CONF-scipy): boundary LR values for p = 0.01.
    expected = {
        255: {6: 3.415, 7: 5.316},
        510: {1: 4.975, 2: 2.475, 10: 3.715, 11: 5.180},
        1000: {4: 4.706, 5: 3.094, 16: 3.077, 17: 4.091},
    }
    for total, values in expected.items():
        for misses, lr in values.items():
            assert float(kupiec_statistic(misses, total, 0.01)) == pytest.approx(lr, abs=5e-4)


def test_kupiec_all_hits_and_all_misses_use_limits() -> None:
    # 0·log 0 = 0 (CHECK_VALUES.md item 6): all hits gives -2T ln(1-p), all misses -2T ln p.
    assert float(kupiec_statistic(0, 52, 0.05)) == pytest.approx(-2 * 52 * math.log(0.95))
    assert float(kupiec_statistic(52, 52, 0.05)) == pytest.approx(-2 * 52 * math.log(0.05))
    # At exactly the nominal rate the statistic is 0, not a tiny negative number.
    assert float(kupiec_statistic(5, 100, 0.05)) == pytest.approx(0.0, abs=1e-12)
    assert float(kupiec_statistic(5, 100, 0.05)) >= 0.0


# --------------------------------------------------------------------------------------------
# Christoffersen (1998)


def christoffersen_example_sequence() -> np.ndarray:
    # CHECK_VALUES.md item 7: zero-runs 10,10,10,10,10,10,10,10,9 alternating with one-runs
    # 1,2,1,1,2,1,2,1, starting and ending with zeros (100 indicators, 1 = miss).
    zero_runs = [10, 10, 10, 10, 10, 10, 10, 10, 9]
    one_runs = [1, 2, 1, 1, 2, 1, 2, 1]
    sequence: list[int] = []
    for i, zeros in enumerate(zero_runs):
        sequence += [0] * zeros
        if i < len(one_runs):
            sequence += [1] * one_runs[i]
    return np.array(sequence, dtype=bool)


def test_christoffersen_worked_example() -> None:
    # CHECK_VALUES.md item 7 (CONF-scipy, cross-checked CONF-sm).
    missed = christoffersen_example_sequence()
    assert missed.size == 100
    assert transition_counts(missed) == (80, 8, 8, 3)
    lr_uc, lr_ind, lr_cc = (float(v) for v in christoffersen_statistics(80, 8, 8, 3, 0.05))
    assert lr_uc == pytest.approx(5.8650, abs=5e-5)
    assert lr_ind == pytest.approx(2.5618, abs=5e-5)
    assert lr_cc == pytest.approx(8.4268, abs=5e-5)
    assert lr_cc == pytest.approx(lr_uc + lr_ind, rel=1e-12)  # exact on the T-1 transitions
    assert float(stats.chi2.sf(lr_uc, 1)) == pytest.approx(0.0154, abs=5e-5)

    # Through the audit, with intervals built so that exactly these forecasts miss.
    actual = np.zeros(100)
    lower = np.where(missed, 1.0, -1.0)  # a miss: the actual 0 falls below [1, 3]
    upper = lower + 2.0
    audit = audit_coverage(actual, lower, upper, 0.95)
    assert audit.transitions == (80, 8, 8, 3)
    assert audit.independence_statistic == pytest.approx(2.5618, abs=5e-5)
    assert audit.independence_p_value == pytest.approx(0.1095, abs=5e-5)
    assert audit.christoffersen_statistic == pytest.approx(8.4268, abs=5e-5)
    assert audit.christoffersen_p_value == pytest.approx(0.0148, abs=5e-5)
    # Kupiec's test in the audit uses all 100 outcomes: item 7's "Kupiec form" row.
    assert audit.kupiec_statistic == pytest.approx(5.7332, abs=5e-5)
    assert audit.misses_low == 11 and audit.misses_high == 0 and audit.hits == 89


def test_independence_equals_logit_likelihood_ratio_from_statsmodels() -> None:
    # CHECK_VALUES.md item 7: the LR test of I_{t-1} in a logit of I_t on I_{t-1} equals LR_ind.
    # statsmodels' Logit is the reference library here (test-only).
    import statsmodels.api as sm  # test-only reference, in the test extra

    rng = np.random.default_rng(11)
    missed = rng.random(300) < 0.12
    previous, current = missed[:-1].astype(float), missed[1:].astype(float)
    full = sm.Logit(current, sm.add_constant(previous)).fit(disp=0)
    lr_logit = 2 * (full.llf - full.llnull)
    counts = transition_counts(missed)
    _, lr_ind, _ = christoffersen_statistics(*counts, 0.05)
    assert float(lr_ind) == pytest.approx(lr_logit, rel=1e-6)


def test_christoffersen_degenerate_sequences() -> None:
    # One scored forecast: no transition, so both order-based tests are undefined.
    one = audit_coverage([0.0], [-1.0], [1.0], 0.95)
    assert one.independence_p_value is None and one.christoffersen_p_value is None
    assert one.independence_reason == one.christoffersen_reason == (
        "needs at least 2 scored forecasts in order")
    assert one.kupiec_p_value is not None  # Kupiec needs only one forecast

    # No miss among the first T-1: π̂11 is undefined, the term is dropped (CHECK_VALUES.md item 7)
    # and LR_ind is 0; independence cannot be assessed, conditional coverage still is.
    missed = np.zeros(20, dtype=bool)
    missed[-1] = True
    audit = audit_coverage(*_outcomes(missed), 0.95)
    assert audit.transitions == (18, 1, 0, 0)
    assert audit.independence_statistic is None and audit.independence_p_value is None
    assert audit.independence_reason is not None
    assert "cannot be assessed" in audit.independence_reason
    lr_uc_on_19 = float(kupiec_statistic(1, 19, 0.05))
    assert audit.christoffersen_statistic == pytest.approx(lr_uc_on_19)
    assert audit.christoffersen_p_value == pytest.approx(float(stats.chi2.sf(lr_uc_on_19, 2)))
    _, lr_ind, _ = christoffersen_statistics(18, 1, 0, 0, 0.05)
    assert float(lr_ind) == 0.0

    # All misses: π̂01 undefined; the conditional-coverage test rejects strongly.
    misses = audit_coverage(*_outcomes(np.ones(30, dtype=bool)), 0.95)
    assert misses.independence_p_value is None
    assert misses.christoffersen_p_value is not None and misses.christoffersen_p_value < 1e-10


def _outcomes(missed: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Actuals and intervals that miss (high) exactly where ``missed`` is True."""
    actual = np.where(missed, 5.0, 0.0)
    return actual, np.full(missed.size, -1.0), np.full(missed.size, 1.0)


# --------------------------------------------------------------------------------------------
# Basel Committee (1996) traffic-light zones


def test_basel_zones_for_250_at_99_percent() -> None:
    # Basel Committee (1996): 250 observations, 99 % coverage: green 0-4 exceptions, yellow 5-9,
    # red 10 or more (CHECK_VALUES.md item 8, zones MEM, cut points recomputed there with scipy).
    zones = [traffic_light_zone(k, 250, 0.99) for k in range(251)]
    assert zones[:5] == [CoverageZone.GREEN] * 5
    assert zones[5:10] == [CoverageZone.YELLOW] * 5
    assert zones[10:] == [CoverageZone.RED] * 241


# k: (Basel's printed cumulative probability in %, MEM; P(X <= k) in %, CONF-scipy),
# X ~ Binomial(250, 0.01). CHECK_VALUES.md item 8.
BASEL_CUMULATIVE = {
    0: (8.11, 8.105852), 1: (28.58, 28.575174), 2: (54.32, 54.316897), 3: (75.81, 75.811670),
    4: (89.22, 89.218763), 5: (95.88, 95.881682), 6: (98.63, 98.629855), 7: (99.60, 99.597466),
    8: (99.89, 99.894347), 9: (99.97, 99.974981), 10: (99.99, 99.994610),
}


def test_basel_cumulative_probabilities() -> None:
    for k, (printed, computed) in BASEL_CUMULATIVE.items():
        probability = 100 * float(miss_probability(k, 250, 0.99))
        assert probability == pytest.approx(computed, abs=5e-7)
        assert round(probability, 2) == pytest.approx(printed, abs=1e-9)


def test_zone_of_an_audit_and_zero_miss_convention() -> None:
    # 250 forecasts at 99 %, 5 misses: P(X <= 5) = 95.88 % -> yellow (Basel 1996 via item 8).
    missed = np.zeros(250, dtype=bool)
    missed[[10, 50, 90, 130, 170]] = True
    audit = audit_coverage(*_outcomes(missed), 0.99)
    assert audit.zone is CoverageZone.YELLOW
    assert audit.miss_probability == pytest.approx(0.95881682, abs=5e-9)
    # Our convention (documented in traffic_light_zone): zero misses is green even where the
    # literal cumulative rule would say yellow, e.g. 5 forecasts at 99 % (0.99^5 = 0.951).
    five = audit_coverage(*_outcomes(np.zeros(5, dtype=bool)), 0.99)
    assert five.miss_probability is not None and five.miss_probability >= 0.95
    assert five.zone is CoverageZone.GREEN
    assert traffic_light_zone(0, 5, 0.99) is CoverageZone.GREEN
    # One miss in 5 at 99 % follows the published rule: P(X <= 1) = 0.99902 -> yellow.
    assert traffic_light_zone(1, 5, 0.99) is CoverageZone.YELLOW
    assert traffic_light_zone(0, 0, 0.99) is None


# --------------------------------------------------------------------------------------------
# Clopper & Pearson (1934)


def test_clopper_pearson_check_values() -> None:
    # CHECK_VALUES.md item 13 (CONF-scipy and CONF-sm), 95 % intervals.
    cases = {
        (45, 52): (0.742121, 0.944121),
        (0, 20): (0.0, 0.168433),
        (20, 20): (0.831567, 1.0),
        (95, 100): (0.887165, 0.983568),
    }
    for (x, n), (low, high) in cases.items():
        lower, upper = clopper_pearson_interval(x, n)
        assert float(lower) == pytest.approx(low, abs=5e-7)
        assert float(upper) == pytest.approx(high, abs=5e-7)


@pytest.mark.parametrize("confidence", [0.90, 0.95, 0.99])
def test_clopper_pearson_against_scipy_binomtest(confidence: float) -> None:
    # scipy.stats.binomtest(x, n).proportion_ci(method="exact") is the reference.
    rng = np.random.default_rng(int(confidence * 100))
    trials = rng.integers(1, 200, size=40)
    successes = np.array([rng.integers(0, n + 1) for n in trials])
    successes[:3] = [0, trials[1], 1]
    lower, upper = clopper_pearson_interval(successes, trials, confidence)
    for x, n, low, high in zip(successes, trials, lower, upper, strict=True):
        reference = stats.binomtest(int(x), int(n)).proportion_ci(
            confidence_level=confidence, method="exact")
        assert low == pytest.approx(reference.low, abs=1e-12)
        assert high == pytest.approx(reference.high, abs=1e-12)


def test_hit_rate_interval_uses_confidence_not_nominal_level() -> None:
    # 45 hits of 52 at nominal 0.80: the hit rate's interval is at confidence 0.95 (item 13),
    # independent of the intervals' nominal level.
    missed = np.zeros(52, dtype=bool)
    missed[::8] = True  # 7 misses
    audit = audit_coverage(*_outcomes(missed), 0.80)
    assert (audit.hits, audit.scored) == (45, 52)
    assert audit.hit_rate == pytest.approx(45 / 52)
    assert audit.hit_rate_lower == pytest.approx(0.742121, abs=5e-7)
    assert audit.hit_rate_upper == pytest.approx(0.944121, abs=5e-7)
    wider = audit_coverage(*_outcomes(missed), 0.80, confidence=0.99)
    assert wider.confidence == 0.99
    assert wider.hit_rate_lower is not None and wider.hit_rate_lower < 0.742121


# --------------------------------------------------------------------------------------------
# Interval score: Gneiting & Raftery (2007)


def test_interval_score_check_values() -> None:
    # CHECK_VALUES.md item 9 (direct evaluation of Gneiting & Raftery's 2007 formula).
    cases = [
        (0.05, 10, 20, 15, 10.0),
        (0.05, 10, 20, 20, 10.0),
        (0.05, 10, 20, 22, 90.0),
        (0.05, 10, 20, 7, 130.0),
        (0.2, -1, 1, 1.5, 7.0),
    ]
    for alpha, low, high, x, expected in cases:
        level = 1 - alpha
        assert float(interval_score(x, low, high, level)) == pytest.approx(expected, rel=1e-12)


def test_interval_score_own_worked_example() -> None:
    # Worked by hand: a 90 % interval (α = 0.1, penalty 2/α = 20) of [100, 130].
    #   actual 120: inside, score = width = 30
    #   actual 95:  5 below, score = 30 + 20·5 = 130
    #   actual 131.5: 1.5 above, score = 30 + 20·1.5 = 60
    # mean over the three = (30 + 130 + 60) / 3 = 73.333...; mean width 30.
    actual = [120.0, 95.0, 131.5]
    lower = [100.0] * 3
    upper = [130.0] * 3
    scores = interval_score(actual, lower, upper, 0.90)
    assert scores == pytest.approx([30.0, 130.0, 60.0], rel=1e-12)
    audit = audit_coverage(actual, lower, upper, 0.90)
    assert audit.interval_score == pytest.approx(220.0 / 3)
    assert audit.mean_width == pytest.approx(30.0)
    assert (audit.hits, audit.misses_low, audit.misses_high) == (1, 1, 1)


# --------------------------------------------------------------------------------------------
# Outcomes, bounds and degenerate inputs


def test_bounds_are_inclusive() -> None:
    # DESIGN.md section 2: hit means lower <= actual <= upper.
    audit = audit_coverage([10.0, 20.0, 15.0], [10.0, 10.0, 10.0], [20.0, 20.0, 20.0], 0.95)
    assert (audit.hits, audit.misses_low, audit.misses_high) == (3, 0, 0)
    below = np.nextafter(10.0, -np.inf)
    above = np.nextafter(20.0, np.inf)
    audit = audit_coverage([below, above], [10.0, 10.0], [20.0, 20.0], 0.95)
    assert (audit.hits, audit.misses_low, audit.misses_high) == (0, 1, 1)


def test_no_scored_forecasts() -> None:
    for audit in (audit_coverage([], [], [], 0.95),
                  audit_coverage([np.nan, np.nan], [0.0, 0.0], [1.0, 1.0], 0.95)):
        assert audit.scored == 0 and audit.hits == 0 and audit.misses == 0
        none_fields = (audit.hit_rate, audit.hit_rate_lower, audit.hit_rate_upper,
                       audit.kupiec_statistic, audit.kupiec_p_value, audit.independence_p_value,
                       audit.christoffersen_p_value, audit.miss_probability, audit.zone,
                       audit.mean_width, audit.interval_score)
        assert all(value is None for value in none_fields)
        assert audit.kupiec_reason == "no scored forecasts"
        assert audit.christoffersen_reason == "no scored forecasts"


def test_all_hits() -> None:
    audit = audit_coverage(*_outcomes(np.zeros(52, dtype=bool)), 0.95)
    assert audit.hit_rate == 1.0 and audit.hit_rate_upper == 1.0
    assert audit.kupiec_statistic == pytest.approx(-2 * 52 * math.log(0.95))
    assert audit.kupiec_p_value == pytest.approx(float(stats.chi2.sf(-2 * 52 * math.log(0.95), 1)))
    assert audit.zone is CoverageZone.GREEN
    assert audit.independence_p_value is None
    assert audit.christoffersen_p_value is not None  # LR_uc on 51 plus a dropped LR_ind of 0
    _assert_no_nan(audit)


def test_all_misses() -> None:
    audit = audit_coverage(*_outcomes(np.ones(12, dtype=bool)), 0.95)
    assert audit.hit_rate == 0.0 and audit.hit_rate_lower == 0.0
    assert audit.misses_high == 12
    assert audit.kupiec_statistic == pytest.approx(-2 * 12 * math.log(0.05))
    assert audit.zone is CoverageZone.RED
    _assert_no_nan(audit)


def _assert_no_nan(audit: CoverageAudit) -> None:
    for name, value in vars(audit).items():
        if isinstance(value, float):
            assert not math.isnan(value), name


def test_unscored_rows_are_skipped_and_bad_input_is_refused() -> None:
    audit = audit_coverage([0.0, np.nan, 5.0, 0.0], [-1.0, -1.0, -1.0, np.nan],
                           [1.0, 1.0, 1.0, 1.0], 0.95)
    assert (audit.scored, audit.hits, audit.misses_high) == (2, 1, 1)
    assert audit.transitions == (0, 1, 0, 0)
    with pytest.raises(ValueError, match="row 1"):
        audit_coverage([0.0, 0.0], [-1.0, 2.0], [1.0, 1.0], 0.95)
    with pytest.raises(ValueError, match="level"):
        audit_coverage([0.0], [-1.0], [1.0], 95)
    with pytest.raises(ValueError, match="last"):
        audit_coverage([0.0], [-1.0], [1.0], 0.95, last=0)
    with pytest.raises(ValueError, match="rows"):
        audit_coverage([0.0, 1.0], [-1.0], [1.0], 0.95)


def test_non_default_level_end_to_end() -> None:
    # DESIGN.md section 13: level is the coverage, α = 1 - level drives every test. At level 0.8
    # the null miss rate is 0.2 and the interval-score penalty is 2/0.2 = 10.
    missed = np.zeros(40, dtype=bool)
    missed[::5] = True  # 8 misses of 40: exactly the nominal 20 %
    audit = audit_coverage(*_outcomes(missed), 0.80)
    assert audit.nominal == 0.80
    assert audit.kupiec_statistic == pytest.approx(0.0, abs=1e-12)
    assert audit.miss_probability == pytest.approx(float(stats.binom.cdf(8, 40, 0.2)))
    # each miss: actual 5 against [-1, 1], 4 above: 2 + 10·4 = 42; a hit scores 2
    assert audit.interval_score == pytest.approx((32 * 2 + 8 * 42) / 40)


def test_miss_probability_is_scipys_binomial_cdf_and_grades_alike() -> None:
    # The pass computes P(X <= k) through scipy.special.betaincc (no scipy.stats import);
    # scipy.stats.binom.cdf is the reference: equal to 1e-13 on every count up to 600 forecasts
    # at six levels, and never on the other side of the zones' 95 % / 99.99 % lines.
    for level in (0.5, 0.8, 0.9, 0.95, 0.975, 0.99):
        for scored in (1, 2, 5, 13, 26, 52, 104, 250, 600):
            misses = np.arange(scored + 1)
            ours = miss_probability(misses, np.full(misses.shape, scored), level)
            reference = stats.binom.cdf(misses, scored, 1.0 - level)
            np.testing.assert_allclose(ours, reference, rtol=0, atol=1e-13)
            for line in (0.95, 0.9999):
                assert np.array_equal(ours < line, reference < line), (level, scored, line)
    assert np.isnan(miss_probability(0, 0, 0.95))
    assert float(miss_probability(7, 7, 0.95)) == 1.0

# --------------------------------------------------------------------------------------------
# Last N, by lead, many series


def test_last_n() -> None:
    missed = np.zeros(30, dtype=bool)
    missed[:10] = True
    all_of_them = audit_coverage(*_outcomes(missed), 0.95)
    recent = audit_last(*_outcomes(missed), 0.95, 20)
    assert all_of_them.misses == 10 and all_of_them.window is None
    assert recent.scored == 20 and recent.misses == 0 and recent.window == 20
    everything = audit_last(*_outcomes(missed), 0.95, 100)
    assert everything.scored == 30 and everything.window == 100
    assert recent.as_record()["window"] == 20


def test_by_lead() -> None:
    lead = np.array([1, 2, 3] * 10)
    missed = lead == 3
    audits = audit_by_lead(*_outcomes(missed), 0.95, lead)
    assert [a.lead for a in audits] == [1, 2, 3]
    assert [a.misses for a in audits] == [0, 0, 10]
    assert all(a.scored == 10 for a in audits)
    assert audits[2].as_record()["lead"] == 3


def test_batch_equals_one_series_at_a_time() -> None:
    rng = np.random.default_rng(2024)
    n = 3000
    group = rng.choice(np.array(["north", "south", "east", "west", "depot-9"]), size=n)
    lead = rng.integers(1, 4, size=n)
    actual = rng.normal(size=n)
    centre = rng.normal(scale=0.3, size=n)
    half = rng.uniform(0.5, 2.5, size=n)
    lower, upper = centre - half, centre + half
    actual[rng.random(n) < 0.02] = np.nan
    for last, by_lead in ((None, False), (50, False), (None, True), (7, True)):
        batch = audit_batch(group, actual, lower, upper, 0.9, last=last,
                            lead=lead if by_lead else None)
        assert len(batch) == (15 if by_lead else 5)
        for i in range(len(batch)):
            rows = group == batch.group[i]
            if batch.lead is not None:
                rows &= lead == batch.lead[i]
            single = audit_coverage(actual[rows], lower[rows], upper[rows], 0.9, last=last)
            assert single.scored > 0
            assert _close(batch.audit(i), single)


def test_batch_without_the_hit_rate_interval_changes_nothing_else() -> None:
    # A pass's findings never show the Clopper–Pearson interval, so the pass skips it
    # (confidence=None): its bounds are NaN and every other figure is the same bits.
    rng = np.random.default_rng(2025)
    n = 500
    group = rng.integers(0, 12, size=n)
    actual = rng.normal(size=n)
    lower, upper = actual - rng.uniform(-0.5, 2.5, n), actual + rng.uniform(-0.5, 2.5, n)
    lower, upper = np.minimum(lower, upper), np.maximum(lower, upper)
    full = audit_batch(group, actual, lower, upper, 0.95, last=26)
    bare = audit_batch(group, actual, lower, upper, 0.95, last=26, confidence=None)
    assert bare.confidence is None and np.isnan(bare.hit_rate_lower).all()
    assert np.isnan(bare.hit_rate_upper).all() and np.isfinite(full.hit_rate_lower).all()
    for item in dataclasses.fields(full):
        if item.name in ("confidence", "hit_rate_lower", "hit_rate_upper"):
            continue
        a, b = getattr(full, item.name), getattr(bare, item.name)
        if isinstance(a, np.ndarray):
            assert a.tobytes() == b.tobytes(), item.name
        else:
            assert a == b, item.name


def _close(a: CoverageAudit, b: CoverageAudit) -> bool:
    for name, value in vars(a).items():
        other = vars(b)[name]
        if name == "lead":
            continue
        if isinstance(value, float) and isinstance(other, float):
            if not math.isclose(value, other, rel_tol=1e-9, abs_tol=1e-12):
                return False
        elif value != other:
            return False
    return True


def test_batch_keeps_a_series_with_nothing_scored() -> None:
    batch = audit_batch(["a", "a", "b"], [0.0, 5.0, np.nan], [-1.0] * 3, [1.0] * 3, 0.95)
    assert list(batch.group) == ["a", "b"]
    empty = batch.audit(1)
    assert empty.scored == 0 and empty.kupiec_p_value is None and empty.zone is None
    assert batch.audit(0).misses_high == 1
    # In the arrays, NaN marks "no test", which is what benjamini_hochberg expects.
    assert math.isnan(batch.kupiec_p_value[1])


def test_record_has_the_audit_keys() -> None:
    # DESIGN.md section 9: the keys of the audit's JSON, less model and series.
    record = audit_coverage([0.0, 2.0], [-1.0, -1.0], [1.0, 1.0], 0.95).as_record()
    assert set(record) == {
        "scored", "hits", "hit_rate", "hit_rate_lower", "hit_rate_upper", "misses_high",
        "misses_low", "nominal", "kupiec_p_value", "independence_p_value",
        "christoffersen_p_value", "zone", "mean_width", "interval_score",
    }
    assert record["zone"] in {"green", "yellow", "red"}
