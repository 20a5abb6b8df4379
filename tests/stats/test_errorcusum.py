"""The chart of the errors' size (``monitor.stats.errorcusum``) behind the coverage finding: the
CUSUM for an increase in variance (Page 1954; Hawkins & Olwell 1998; both from memory) on each
forecast's error made a standard normal score, with p-values from the Markov-chain method of
Brook & Evans (1972; from memory).

No published table gives this chart's crossing chance within a finite horizon (the literature
tabulates average run lengths, for other settings), so the chain's p-values are checked against a
seeded simulation of the chart, and the scores against scipy's t and normal distributions and
statsmodels' prediction intervals (a reference library). The recursion is checked against a
plain loop written from the definition, and the horizon-wide false-discovery claim the coverage
rule rests on is checked directly on a seeded panel.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from monitor.stats.errorcusum import (
    CAP,
    RATIO,
    crossing_probability,
    error_cusum_batch,
    gaussian_scores,
    implied_coverage,
    increments,
)
from monitor.stats.multitest import benjamini_hochberg


def _highest(scores: np.ndarray) -> np.ndarray:
    """Each row's highest chart height, by the recursion of the definition, step by step."""
    rise, fall = 0.5 * (1 - 1 / RATIO), 0.5 * math.log(RATIO)
    height = np.zeros(scores.shape[0])
    highest = height.copy()
    for t in range(scores.shape[1]):
        height = np.maximum(0.0, height + rise * np.minimum(scores[:, t] ** 2, CAP) - fall)
        highest = np.maximum(highest, height)
    return highest


def test_the_step_is_the_log_likelihood_ratio_of_a_variance_increase() -> None:
    # log N(z; 0, RATIO) − log N(z; 0, 1) for a score below the cap (scipy's normal density).
    z = np.array([-3.5, -1.0, 0.0, 0.4, 2.0, 3.9])
    llr = stats.norm.logpdf(z, scale=math.sqrt(RATIO)) - stats.norm.logpdf(z)
    np.testing.assert_allclose(increments(z), llr, rtol=1e-12, atol=1e-15)
    # Beyond the cap a score counts as the cap.
    assert increments(np.array([10.0]))[0] == pytest.approx(increments(np.array([4.0]))[0])


def test_crossing_probability_agrees_with_a_simulation() -> None:
    horizon, n = 104, 100_000
    rng = np.random.default_rng(2026)
    highest = _highest(rng.standard_normal((n, horizon)))
    for peak in (1.0, 2.0, 3.0, 4.0, 5.0, 6.0):
        exact = crossing_probability(peak, horizon)
        share = float(np.mean(highest >= peak))
        se = math.sqrt(share * (1 - share) / n)
        # The chain's discretisation agrees within 3 % (relative) plus simulation error.
        assert abs(share - exact) < 4 * se + 0.03 * exact, (peak, share, exact)


def test_crossing_probability_falls_with_the_peak_and_grows_with_the_horizon() -> None:
    probs = [crossing_probability(0.25 * j, 104) for j in range(0, 60)]
    assert probs[0] == 1.0
    assert all(b <= a for a, b in itertools.pairwise(probs))
    assert crossing_probability(5.0, 52) < crossing_probability(5.0, 104)
    with pytest.raises(ValueError, match="horizon"):
        crossing_probability(1.0, 0)


def test_scores_are_standard_normal_from_statsmodels_prediction_intervals() -> None:
    # A fit of 14 rows (11 residual df): its 95 % prediction interval from statsmodels, then the
    # actual. The score must be Φ⁻¹ of the t CDF of the standardised error.
    rng = np.random.default_rng(7)
    x = rng.normal(size=14)
    y = 1.0 + 2.0 * x + rng.normal(size=14)
    X = sm.add_constant(x)
    fit = sm.OLS(y, X).fit()
    new = np.array([[1.0, 0.3], [1.0, -1.2], [1.0, 2.5]])
    frame = fit.get_prediction(new).summary_frame(alpha=0.05)
    point = frame["mean"].to_numpy()
    lower, upper = frame["obs_ci_lower"].to_numpy(), frame["obs_ci_upper"].to_numpy()
    actual = point + np.array([0.5, -4.0, 9.0])
    se = np.sqrt(frame["mean_se"].to_numpy() ** 2 + fit.scale)
    expected = stats.norm.ppf(stats.t.cdf((actual - point) / se, fit.df_resid))
    got = gaussian_scores(actual, point, lower, upper, 0.95, np.full(3, fit.df_resid))
    np.testing.assert_allclose(got, expected, rtol=1e-9)
    # An interval supplied from outside (no df) is read as a normal one.
    q = float(stats.norm.ppf(0.975))
    normal = gaussian_scores([1.0], [0.0], [-q], [q], 0.95)
    assert normal[0] == pytest.approx(1.0, rel=1e-12)
    # Unusable rows are NaN, and a far-out error keeps its precision from the upper tail.
    assert np.isnan(gaussian_scores([np.nan, 1.0], [0.0, 0.0], [-1.0, 0.0], [1.0, 0.0],
                                    0.95)).all()
    assert gaussian_scores([9.0], [0.0], [-q], [q], 0.95)[0] == pytest.approx(9.0, rel=1e-9)
    far = gaussian_scores([1e6, -1e6], [0.0, 0.0], [-q, -q], [q, q], 0.95)
    assert far.tolist() == [37.0, -37.0]  # clipped, still counted (at the cap) by the chart


def test_implied_coverage_of_wider_errors() -> None:
    # Errors √2 times the intervals' size: 95 % intervals cover P(|Z| < 1.96/√2) (scipy).
    assert implied_coverage(2.0, 0.95) == pytest.approx(
        2 * stats.norm.cdf(stats.norm.ppf(0.975) / math.sqrt(2)) - 1)
    assert implied_coverage(1.0, 0.95) == pytest.approx(0.95)


def _loop(scores: list[float], missed: list[bool]) -> tuple[float, float, int, int, int, float]:
    """(height, peak, start index, forecasts, misses) of the current excursion, from the
    definition, one forecast at a time, and the smallest distance of a height from zero (the
    batch's closed form rounds differently, so a height within rounding of zero is ambiguous)."""
    rise, fall = 0.5 * (1 - 1 / RATIO), 0.5 * math.log(RATIO)
    height = peak = 0.0
    count = misses = 0
    start = -1
    closest = math.inf
    for i, (z, miss) in enumerate(zip(scores, missed, strict=True)):
        new = max(0.0, height + rise * min(z * z, CAP) - fall)
        closest = min(closest, abs(height + rise * min(z * z, CAP) - fall))
        if height == 0 and new > 0:
            start, peak, count, misses = i, new, 1, int(miss)
        elif new > 0:
            peak, count, misses = max(peak, new), count + 1, misses + int(miss)
        else:
            start, peak, count, misses = -1, 0.0, 0, 0
        height = new
    return height, peak, start, count, misses, closest


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.lists(st.floats(min_value=-6, max_value=6), min_size=0, max_size=40),
             min_size=1, max_size=6),
    st.one_of(st.none(), st.integers(min_value=1, max_value=30)),
)
def test_batch_equals_the_loop_for_every_series(
    sequences: list[list[float]], last: int | None
) -> None:
    # Interleave the series' rows to check the batch keeps each series' own order.
    rows = [(g, i, z) for g, seq in enumerate(sequences) for i, z in enumerate(seq)]
    rows.sort(key=lambda r: (r[1], r[0]))
    group = np.array([r[0] for r in rows], dtype=np.int64)
    score = np.array([r[2] for r in rows], dtype=float)
    missed = np.abs(score) > 1.96
    present = sorted({g for g, seq in enumerate(sequences) if seq})
    chart = error_cusum_batch(group, score, missed, 52, last=last)
    assert list(chart.group) == present
    for j, g in enumerate(present):
        seq = sequences[g] if last is None else sequences[g][-last:]
        height, peak, start, count, misses, closest = _loop(seq, [abs(z) > 1.96 for z in seq])
        if closest < 1e-9:
            continue  # a step that lands within rounding of zero: either reading is right
        assert chart.height[j] == pytest.approx(height, abs=1e-12)
        assert chart.peak[j] == pytest.approx(peak, abs=1e-12)
        assert (int(chart.excursion_scored[j]), int(chart.excursion_misses[j])) == (count, misses)
        assert int(chart.scored[j]) == len(seq)
        if start < 0:
            assert chart.start_row[j] == -1
        else:  # the caller's row of the forecast that began the excursion
            offset = len(sequences[g]) - len(seq)
            r = int(chart.start_row[j])
            assert (group[r], [x[1] for x in rows][r]) == (g, offset + start)
        assert chart.p_value[j] == crossing_probability(float(chart.peak[j]), 52)


def test_unscored_rows_keep_their_series_but_not_its_chart() -> None:
    group = np.array([0, 0, 1, 1, 1])
    score = np.array([np.nan, np.nan, 0.1, 3.0, 3.0])
    missed = np.array([False, False, False, True, True])
    chart = error_cusum_batch(group, score, missed, 52)
    assert list(chart.group) == [0, 1]
    assert chart.scored.tolist() == [0, 3]
    assert math.isnan(chart.p_value[0]) and chart.height[0] == 0
    assert chart.start_row[1] == 3 and chart.excursion_misses[1] == 2


def test_findings_over_a_whole_horizon_stay_within_the_fdr() -> None:
    """The claim the coverage rule rests on: read at every look, with Benjamini–Hochberg at
    each, the series ever flagged are among those flagged on the horizon's final p-values, and
    the false share among them stays near the rate (seeded: 400 series, 10 % whose errors
    double their SD from forecast 40, 30 replications)."""
    rng = np.random.default_rng(14)
    horizon, n, fdr = 104, 400, 0.10
    false_shares = []
    for _ in range(30):
        changed = np.arange(n) < n // 10
        scores = rng.standard_normal((n, horizon))
        scores[changed, 40:] *= 2.0
        ever = np.zeros(n, dtype=bool)
        for look in range(20, horizon + 1, 4):
            chart = error_cusum_batch(np.repeat(np.arange(n), look),
                                      scores[:, :look].ravel(),
                                      np.zeros(n * look, dtype=bool), horizon)
            ever |= benjamini_hochberg(chart.p_value, fdr).reject & (chart.height > 0)
        p_final = np.array([crossing_probability(float(c), horizon)
                            for c in _highest(scores)])
        assert not (ever & ~benjamini_hochberg(p_final, fdr).reject).any()
        false_shares.append(float((ever & ~changed).sum() / max(1, ever.sum())))
        assert ever[changed].mean() > 0.8  # the changed series are found
    assert np.mean(false_shares) <= fdr
