"""The decision policy of DESIGN.md section 7: rules and the no-flap lifecycle."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

import numpy as np

from monitor.findings import (
    RejectedInput,
    autocorrelation_conditions,
    coverage_conditions,
    rejected_input_conditions,
    should_notify,
    significance_conditions,
    slope_shift_conditions,
    stale_feed_condition,
    structural_break_conditions,
    weak_fit_conditions,
)
from monitor.stats.coverage import audit_batch
from monitor.stats.errorcusum import ErrorCusumBatch, error_cusum_batch, gaussian_scores
from monitor.vocabulary import FindingKind, Severity


@dataclass(frozen=True)
class Thresholds:
    significance: float = 0.05
    fdr: float = 0.10
    min_scored: int = 12
    min_r2: float | None = None
    max_r2_drop: float = 0.2
    clear_after: int = 2


def test_only_raising_escalation_and_clearing_are_notified() -> None:
    assert should_notify("raised", acknowledged=False)
    assert should_notify("cleared", acknowledged=False)
    assert not should_notify("continued", acknowledged=False, severity=Severity.WARNING,
                             previous_severity=Severity.WARNING)
    assert should_notify("continued", acknowledged=False, severity=Severity.CRITICAL,
                         previous_severity=Severity.WARNING)
    # an acknowledged finding is never sent again, whatever happens to it
    assert not should_notify("cleared", acknowledged=True)
    assert not should_notify("continued", acknowledged=True, severity=Severity.CRITICAL,
                             previous_severity=Severity.NOTICE)


def test_rejected_input_is_one_condition_per_feed() -> None:
    conditions = rejected_input_conditions(
        ["a", "b"],
        [RejectedInput("a", "w1.csv", True, False, 0, "not UTF-8"),
         RejectedInput("a", "w2.csv", False, False, 3, "text in a numeric column")],
    )
    by_feed = {c.key.feed: c for c in conditions}
    assert by_feed["a"].holds and by_feed["a"].severity is Severity.WARNING
    assert "w1.csv" in by_feed["a"].message and "w2.csv" in by_feed["a"].message
    assert not by_feed["b"].holds


def _chart(groups: list[int], actual: list[float], lower: list[float],
           upper: list[float]) -> ErrorCusumBatch:
    """The chart of these forecasts' errors (normal intervals, the point in the middle), over a
    horizon of 104."""
    a, lo, hi = np.array(actual), np.array(lower), np.array(upper)
    score = gaussian_scores(a, (lo + hi) / 2, lo, hi, 0.95)
    return error_cusum_batch(np.array(groups), score, (a < lo) | (a > hi), 104)


def test_coverage_rule_needs_min_scored_low_hit_rate_and_bh() -> None:
    rng = np.random.default_rng(4)
    n = 40
    groups, actual, lower, upper = [], [], [], []
    # series 0: 40 forecasts, about 70 % hits -> a real coverage problem at nominal 0.95
    # series 1: 40 forecasts, every actual inside -> no finding (too wide is not flagged)
    # series 2: only 5 forecasts, all misses -> below min_scored, not evaluated
    for g, (count, inside) in enumerate([(n, 0.7), (n, 1.0), (5, 0.0)]):
        hits = rng.random(count) < inside
        for h in hits:
            groups.append(g)
            lower.append(0.0)
            upper.append(1.0)
            actual.append(0.5 if h else 2.0)
    audit = audit_batch(np.array(groups), np.array(actual), np.array(lower), np.array(upper),
                        0.95)
    conditions = coverage_conditions("m", ["a", "b", "c"], audit,
                                     _chart(groups, actual, lower, upper), Thresholds(),
                                     ["p"] * 3)
    by_series = {c.key.series: c for c in conditions}
    assert set(by_series) == {"a", "b"}
    assert by_series["a"].holds and not by_series["b"].holds
    assert by_series["a"].severity is Severity.CRITICAL  # ~12 misses of 40 at 95 % is red


def test_coverage_finding_says_which_interval_fell_short() -> None:
    # Four series, 40 scored forecasts each, the model's own interval [0, 1] and a calibrated
    # one [-1, 2] beside it. Actuals: a, only the model's falls short (0.5 or 1.5); b, both
    # fall short (0.5 or 3.0); c, only the calibrated one falls short (its interval is narrowed
    # to [0.4, 0.6] there and actuals land at 0.8); d, both hold.
    groups, actual, lower, upper, c_lower, c_upper = [], [], [], [], [], []
    rng = np.random.default_rng(13)
    for g, (own_in, cal_in) in enumerate([(0.7, 1.0), (0.7, 0.7), (1.0, 0.7), (1.0, 1.0)]):
        for _ in range(40):
            u = rng.random()
            groups.append(g)
            lower.append(0.0)
            upper.append(1.0)
            if g == 2:
                c_lower.append(0.4)
                c_upper.append(0.6)
                actual.append(0.5 if u < cal_in else 0.8)
                continue
            c_lower.append(-1.0)
            c_upper.append(2.0)
            if u < min(own_in, cal_in):
                actual.append(0.5)
            elif u < max(own_in, cal_in):
                actual.append(1.5)  # outside the model's, inside the calibrated
            else:
                actual.append(3.0)  # outside both
    g = np.array(groups)
    own = audit_batch(g, np.array(actual), np.array(lower), np.array(upper), 0.95)
    cal = audit_batch(g, np.array(actual), np.array(c_lower), np.array(c_upper), 0.95)
    conditions = coverage_conditions("m", ["a", "b", "c", "d"], own,
                                     _chart(groups, actual, lower, upper), Thresholds(),
                                     ["p"] * 4, cal, _chart(groups, actual, c_lower, c_upper),
                                     ["q"] * 4)
    by = {c.key.series: c for c in conditions}
    assert by["a"].holds and by["a"].message.startswith(
        "The model's intervals fell short; the calibrated ones held")
    assert by["b"].holds and by["b"].message.startswith(
        "Both the model's intervals and the calibrated ones fell short")
    assert by["c"].holds and by["c"].message.startswith(
        "The calibrated intervals fell short; the model's own held")
    assert by["c"].statistic == float(cal.hit_rate[2]) and by["c"].since_period == "q"
    assert by["a"].statistic == float(own.hit_rate[0]) and by["a"].since_period == "p"
    assert not by["d"].holds
    for name in "abc":
        assert "from the model's own recent errors" in by[name].message
    # Without the calibrated audit the rule and its words are what they were.
    plain = coverage_conditions("m", ["a", "b", "c", "d"], own,
                                _chart(groups, actual, lower, upper), Thresholds(), ["p"] * 4)
    assert [c.holds for c in plain] == [True, True, False, False]
    assert plain[0].message.endswith("narrower than the errors they meet.")


def test_slope_shift_is_controlled_across_series_with_bh() -> None:
    # 20 series: one with p = 0.001, the rest around 0.03. Alone each 0.03 rejects at 5 %;
    # BH at 10 % over 20 tests rejects only where p <= rank * 0.10 / 20.
    p = np.full((20, 1), 0.03)
    p[0, 0] = 0.001
    stat = np.full((20, 1), 2.2)
    conditions = slope_shift_conditions("m", [f"s{i}" for i in range(20)], ["x"], stat, p,
                                        Thresholds(), [None] * 20)
    holding = [c.key.series for c in conditions if c.holds]
    # 19 ties at 0.03: rank 20 * 0.10 / 20 = 0.10 >= 0.03, so BH rejects them all here.
    assert len(holding) == 20
    p[1:, 0] = 0.5
    conditions = slope_shift_conditions("m", [f"s{i}" for i in range(20)], ["x"], stat, p,
                                        Thresholds(), [None] * 20)
    assert [c.key.series for c in conditions if c.holds] == ["s0"]
    # four disjoint recent windows over the horizon: each p-value counts four times
    conditions = slope_shift_conditions("m", [f"s{i}" for i in range(20)], ["x"], stat, p,
                                        Thresholds(), [None] * 20, looks=4)
    assert [c.p_value for c in conditions][:2] == [0.004, 1.0]


def test_structural_break_is_controlled_across_series_with_bh() -> None:
    # Benjamini & Hochberg (1995) step-up at 10 % over the monitored series, each also at 5 %.
    # 200 series: three crossed their boundary decisively, one barely (p 0.04), the rest not.
    names = [f"s{i}" for i in range(200)]
    p = np.linspace(0.06, 1.0, 200)
    p[:4] = [1e-6, 2e-5, 3e-4, 0.04]
    ratio = np.where(p < 0.05, 1.5, 0.6)
    evaluated = np.ones(200, dtype=bool)
    evaluated[-1] = False
    conditions = structural_break_conditions("m", names, p, ratio, ["2025-W10"] * 200,
                                             evaluated, Thresholds())
    assert len(conditions) == 199
    # BH: p_(3) = 3e-4 <= 3 * 0.1 / 199; p_(4) = 0.04 > 4 * 0.1 / 199, so three hold.
    assert [c.key.series for c in conditions if c.holds] == ["s0", "s1", "s2"]
    assert all(c.severity is Severity.CRITICAL for c in conditions)
    assert conditions[0].p_value == 1e-6 and "controlled across" in conditions[0].message
    # A single-series model keeps its per-series level: an alarm exactly when p < significance.
    lone = structural_break_conditions("m", [None], [0.04], [1.1], [None], [True], Thresholds())
    assert [c.holds for c in lone] == [True]
    lone = structural_break_conditions("m", [None], [0.06], [0.9], [None], [True], Thresholds())
    assert [c.holds for c in lone] == [False]


def test_slope_shift_after_a_break_uses_the_split_at_the_break() -> None:
    # Series with a structural break that holds are judged by the before/after-break test, in
    # their own BH family; the others by the recent-block test with its looks.
    names = [f"s{i}" for i in range(10)]
    block_p = np.full((10, 1), 0.2)
    block_t = np.full((10, 1), 1.3)
    break_p = np.full((10, 1), np.nan)
    break_t = np.full((10, 1), np.nan)
    held = np.zeros(10, dtype=bool)
    held[:3] = True
    break_p[:3, 0] = [0.001, 0.02, 0.4]
    break_t[:3, 0] = [3.5, 2.4, 0.8]
    conditions = slope_shift_conditions(
        "m", names, ["x"], block_t, block_p, Thresholds(), [None] * 10, looks=4,
        break_statistic=break_t, break_p_value=break_p, break_held=held,
        break_since=["2025-W20"] * 10,
    )
    by = {c.key.series: c for c in conditions}
    # BH over the three break series at 10 %: 0.001 <= 0.1/3, 0.02 <= 0.2/3, 0.4 > 0.1.
    assert [s for s in names if by[s].holds] == ["s0", "s1"]
    assert by["s0"].p_value == 0.001 and "estimated break at 2025-W20" in by["s0"].message
    assert by["s5"].p_value == 0.8 and "differs from its slope" in by["s5"].message  # 0.2 * 4
    # A held break whose split could not be tested falls back to the block test.
    held[5] = True
    again = slope_shift_conditions(
        "m", names, ["x"], block_t, block_p, Thresholds(), [None] * 10, looks=4,
        break_statistic=break_t, break_p_value=break_p, break_held=held,
    )
    assert {c.key.series: c.p_value for c in again}["s5"] == 0.8


def test_significance_lost_and_sign_flip() -> None:
    conditions = significance_conditions(
        "m", ["lost", "flip", "fine"], ["x"],
        baseline_estimate=[[1.0], [1.0], [1.0]], baseline_p_value=[[0.001], [0.001], [0.001]],
        current_estimate=[[0.2], [-0.8], [1.1]], current_p_value=[[0.4], [0.002], [0.0001]],
        thresholds=Thresholds(), since=[None] * 3,
    )
    holds = {(c.key.kind, c.key.series) for c in conditions if c.holds}
    assert holds == {(FindingKind.SIGNIFICANCE_LOST, "lost"), (FindingKind.SIGN_FLIP, "flip")}


def test_weak_fit_rule() -> None:
    weak = weak_fit_conditions("m", ["a", "b"], [0.4, 0.7], [0.7, 0.75], Thresholds(), [None] * 2)
    assert [c.holds for c in weak] == [True, False]


def test_autocorrelation_is_a_test_controlled_across_series() -> None:
    # Issue 14: the Breusch–Godfrey p-value decides (Breusch 1978, Godfrey 1978), with BH across
    # the model's series (Benjamini & Hochberg 1995); Durbin–Watson d only gives the direction.
    # d outside 1.5–2.5 with a large p (the old rule of thumb) no longer holds.
    dw = autocorrelation_conditions(
        "m", ["a", "b", "c", "d", "e"], [1.2, 2.0, 2.7, 1.4, np.nan],
        [0.001, 0.6, 0.002, 0.3, 0.01], Thresholds(), [None] * 5,
    )
    assert [c.key.series for c in dw] == ["a", "b", "c", "d", "e"]
    assert [c.holds for c in dw] == [True, False, True, False, True]
    assert "positively" in dw[0].message and "negatively" in dw[2].message
    assert dw[0].p_value == 0.001 and dw[0].statistic == 1.2
    # BH over 20 series: the smallest p must be at most q/m = 0.10/20 = 0.005, so a lone 0.01
    # among nineteen 0.9s is not kept although it is below the 0.05 test level.
    many = autocorrelation_conditions(
        "m", [str(i) for i in range(20)], [2.0] * 20, [0.01] + [0.9] * 19, Thresholds(),
        [None] * 20,
    )
    assert not any(c.holds for c in many)
    # not judged (p NaN): no condition
    assert autocorrelation_conditions("m", ["a"], [1.0], [np.nan], Thresholds(), [None]) == []


def test_stale_feed_on_the_business_clock() -> None:
    latest = datetime(2025, 3, 2)
    week = timedelta(days=7)
    assert stale_feed_condition("f", None, None, latest, week) is None
    fresh = stale_feed_condition("f", latest, "2025-03-02", latest + timedelta(days=10), week)
    stale = stale_feed_condition("f", latest, "2025-03-02", latest + timedelta(days=11), week)
    assert fresh is not None and not fresh.holds
    assert stale is not None and stale.holds and stale.key.series is None


def test_a_lone_series_is_tested_at_the_significance_not_the_fdr() -> None:
    # One series, p = 0.07: BH at rate 0.10 alone would reject (m = 1), but the test's level
    # is significance = 0.05 (DESIGN.md section 7), so no finding holds.
    lone = slope_shift_conditions("m", ["a"], ["x"], [[1.9]], [[0.07]], Thresholds(), [None])
    assert [c.holds for c in lone] == [False]
    strict = slope_shift_conditions("m", ["a"], ["x"], [[1.9]], [[0.07]],
                                    Thresholds(significance=0.10), [None])
    assert [c.holds for c in strict] == [True]


def test_forecast_bias_from_the_mean_error_test() -> None:
    from monitor.findings import forecast_bias_conditions
    from monitor.stats.accuracy import accuracy_batch

    rng = np.random.default_rng(3)
    n = 26
    errors = rng.normal(size=(3, n))
    errors[0] += 1.5  # actuals well above the forecasts: biased
    group = np.repeat(np.arange(3), n)
    batch = accuracy_batch(group, errors.ravel(), np.zeros(3 * n))
    conditions = forecast_bias_conditions("m", ["high", "fine", "few"], batch, Thresholds(),
                                          [None] * 3)
    assert [c.key.kind for c in conditions] == [FindingKind.FORECAST_BIAS] * 3
    assert [c.holds for c in conditions] == [True, False, False]
    assert "came in above the forecasts" in conditions[0].message  # errors = actual − point > 0
    assert conditions[0].statistic is not None and conditions[0].statistic > 4
    # too few scored forecasts: not judged
    short = accuracy_batch(np.zeros(5, dtype=np.int64), np.ones(5), np.zeros(5))
    assert forecast_bias_conditions("m", ["s"], short, Thresholds(), [None]) == []


def test_the_stale_feed_message_names_the_clock_it_was_true_at() -> None:
    """The message stays true after it is written: it names the pass's business clock, not
    "now", and the cadence it counts in."""
    latest = datetime(2025, 3, 2)
    stale = stale_feed_condition("f", latest, "2025-03-02", datetime(2025, 3, 30, 6),
                                 timedelta(days=7))
    assert stale is not None and stale.holds
    assert "now" not in stale.message
    assert "28 days before the business clock of the pass that checked it (2025-03-30)" in (
        stale.message)
    assert "more than 1.5 × its cadence of 7 days" in stale.message
