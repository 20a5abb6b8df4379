"""The decision policy of DESIGN.md section 7: rules and the no-flap lifecycle."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

import numpy as np

from monitor.findings import (
    Condition,
    FindingKey,
    OpenFinding,
    autocorrelation_conditions,
    coverage_conditions,
    plan_transitions,
    significance_conditions,
    slope_shift_conditions,
    stale_feed_condition,
    weak_fit_conditions,
)
from monitor.stats.coverage import audit_batch
from monitor.vocabulary import FindingKind, FindingState, Severity


@dataclass(frozen=True)
class Thresholds:
    significance: float = 0.05
    fdr: float = 0.10
    min_scored: int = 12
    min_r2: float | None = None
    max_r2_drop: float = 0.2
    clear_after: int = 2


KEY = FindingKey(FindingKind.SLOPE_SHIFT, "pick_hours", "depot-01", None)


def _condition(holds: bool, severity: Severity = Severity.WARNING) -> Condition:
    return Condition(KEY, holds, severity, 3.0, 0.001, "2025-06-01", "msg", "act")


def _run(sequence: list[bool], clear_after: int = 2) -> list[str]:
    """Drive the lifecycle through passes, keeping the open finding as a store would."""
    open_finding: OpenFinding | None = None
    changes: list[str] = []
    next_id = 1
    for holds in sequence:
        transitions = plan_transitions(
            [open_finding] if open_finding else [], [_condition(holds)], clear_after=clear_after
        )
        for t in transitions:
            changes.append(t.change)
            if t.change == "raise":
                open_finding = OpenFinding(next_id, KEY, Severity.WARNING, FindingState.NEW, 0,
                                           False)
                next_id += 1
            elif t.change in {"continue", "lapse"}:
                assert open_finding is not None
                open_finding = OpenFinding(open_finding.id, KEY, open_finding.severity,
                                           FindingState.ONGOING, t.false_streak, False)
            elif t.change == "clear":
                open_finding = None
        if not transitions:
            changes.append("-")
    return changes


def test_a_one_pass_lapse_does_not_flap() -> None:
    # holds, lapses for one pass, returns: one finding, never cleared or raised twice.
    changes = _run([True, False, True, True])
    assert changes == ["raise", "lapse", "continue", "continue"]
    assert changes.count("raise") == 1


def test_clears_after_clear_after_false_passes_and_reports_once() -> None:
    changes = _run([True, False, False, False], clear_after=2)
    assert changes == ["raise", "lapse", "clear", "-"]


def test_only_raise_and_clear_are_notified() -> None:
    first = plan_transitions([], [_condition(True)], clear_after=2)
    assert [t.notify for t in first] == [True]
    open_finding = OpenFinding(1, KEY, Severity.WARNING, FindingState.NEW, 0, False)
    again = plan_transitions([open_finding], [_condition(True)], clear_after=2)
    assert [t.notify for t in again] == [False]
    escalated = plan_transitions([open_finding], [_condition(True, Severity.CRITICAL)],
                                 clear_after=2)
    assert [t.notify for t in escalated] == [True]


def test_acknowledged_findings_stay_quiet() -> None:
    acked = OpenFinding(1, KEY, Severity.WARNING, FindingState.ONGOING, 1, True)
    cleared = plan_transitions([acked], [_condition(False)], clear_after=2)
    assert [(t.change, t.notify) for t in cleared] == [("clear", False)]
    back = plan_transitions([], [_condition(True)], clear_after=2, recently_acknowledged=[KEY])
    assert [(t.change, t.notify, t.acknowledged) for t in back] == [("raise", False, True)]


def test_unevaluated_series_keep_their_state() -> None:
    open_finding = OpenFinding(1, KEY, Severity.WARNING, FindingState.NEW, 1, False)
    assert plan_transitions([open_finding], [], clear_after=2) == []


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
    conditions = coverage_conditions("m", ["a", "b", "c"], audit, Thresholds(), ["p"] * 3)
    by_series = {c.key.series: c for c in conditions}
    assert set(by_series) == {"a", "b"}
    assert by_series["a"].holds and not by_series["b"].holds
    assert by_series["a"].severity is Severity.CRITICAL  # ~12 misses of 40 at 95 % is red


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


def test_significance_lost_and_sign_flip() -> None:
    conditions = significance_conditions(
        "m", ["lost", "flip", "fine"], ["x"],
        baseline_estimate=[[1.0], [1.0], [1.0]], baseline_p_value=[[0.001], [0.001], [0.001]],
        current_estimate=[[0.2], [-0.8], [1.1]], current_p_value=[[0.4], [0.002], [0.0001]],
        thresholds=Thresholds(), since=[None] * 3,
    )
    holds = {(c.key.kind, c.key.series) for c in conditions if c.holds}
    assert holds == {(FindingKind.SIGNIFICANCE_LOST, "lost"), (FindingKind.SIGN_FLIP, "flip")}


def test_weak_fit_and_durbin_watson_rules() -> None:
    weak = weak_fit_conditions("m", ["a", "b"], [0.4, 0.7], [0.7, 0.75], Thresholds(), [None] * 2)
    assert [c.holds for c in weak] == [True, False]
    # Durbin–Watson outside 1.5–2.5: a rule of thumb (common practice), not a test.
    dw = autocorrelation_conditions("m", ["a", "b", "c", "d"], [1.2, 2.0, 2.7, np.nan],
                                    [None] * 4)
    assert [c.holds for c in dw] == [True, False, True]


def test_stale_feed_on_the_business_clock() -> None:
    latest = datetime(2025, 3, 2)
    week = timedelta(days=7)
    assert stale_feed_condition("f", None, None, latest, week) is None
    fresh = stale_feed_condition("f", latest, "2025-03-02", latest + timedelta(days=10), week)
    stale = stale_feed_condition("f", latest, "2025-03-02", latest + timedelta(days=11), week)
    assert fresh is not None and not fresh.holds
    assert stale is not None and stale.holds and stale.key.series is None
