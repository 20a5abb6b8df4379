"""Issue 14, "What it must show", at a reduced size: seeded panels through the real pass, week by
week (``tests/panel.py``; the full 200 × 156 panels are ``tests/benchmarks/bench_stable_panel.py``).

Size. 100 series × 156 weeks with changes planted in 20 % of them at week 104, and 40 series ×
156 weeks with AR(1) errors. The horizon is kept whole because false alarms accumulate over it
(the issue measured most of them in the first year, while the window is still short, and some
kinds only show after a year of looks); the number of series is what is reduced. Each replay
takes about a minute on a quiet 2-core machine.

What is pinned, and how honestly. A share measured on n series is itself noisy, so a rate
target r is checked as "at most the count a true rate of r exceeds with chance 1 %" (the 99th
percentile of Binomial(n, r)): a kind whose real rate is well above r fails, one at r passes.
Detection of planted changes is checked the same way against 90 % (at least the count a true
90 % reaches with chance 99 %), and the median delay is printed. The untouched series of the
planted panel are the stable panel (the planted series only share the Benjamini–Hochberg
families with them, as real changed series would).
"""

from __future__ import annotations

import pytest
from panel import CHANGES, PanelResult, PanelSpec, run_panel
from scipy import stats

from monitor.vocabulary import FindingKind, Severity

RATE = 0.05  # issue 14: each kind on at most 5 % of stable series over the replay
DETECTED = 0.90  # issue 14: each planted change found in at least 90 % of its series
FDR = 0.10  # the default thresholds.fdr


def _most(n: int, rate: float) -> int:
    """The largest count a true ``rate`` on ``n`` series exceeds with chance at most 1 %."""
    return int(stats.binom.ppf(0.99, n, rate))


def _least(n: int, rate: float) -> int:
    """The smallest count a true ``rate`` on ``n`` series stays above with chance 99 %."""
    return int(stats.binom.ppf(0.01, n, rate))


@pytest.fixture(scope="module")
def planted() -> PanelResult:
    result = run_panel(PanelSpec(series=100, weeks=156, planted_share=0.2))
    print("\n" + result.table())
    return result


@pytest.fixture(scope="module")
def autocorrelated() -> PanelResult:
    result = run_panel(PanelSpec(series=40, weeks=156, rho=0.3, seed=15))
    print("\n" + result.table())
    return result


# Kinds whose stable-series rate the issue pins, and that hold today. The others are checked
# in the tests marked below until their owners' changes land.
PINNED_NOTICES = (FindingKind.AUTOCORRELATION, FindingKind.EXTRAPOLATION, FindingKind.WEAK_FIT,
                  FindingKind.HETEROSCEDASTICITY, FindingKind.CLUSTERED_MISSES)


@pytest.mark.parametrize("kind", PINNED_NOTICES, ids=lambda k: k.value)
def test_each_notice_kind_stays_rare_on_stable_series(
    planted: PanelResult, kind: FindingKind
) -> None:
    n = len(planted.untouched)
    assert planted.count_with(kind) <= _most(n, RATE), planted.table()


# structural_break is also checked on its own (issue 14 items 2 and 5, now landed), so a
# regression names the kind.


def _alarmed_without_break(result: PanelResult) -> int:
    alarmed = {r.series for r in result.raised
               if r.severity in (Severity.WARNING, Severity.CRITICAL)
               and r.kind is not FindingKind.STRUCTURAL_BREAK}
    return sum(name in alarmed for name in result.untouched)


def test_warnings_and_criticals_stay_rare_on_stable_series(planted: PanelResult) -> None:
    n = len(planted.untouched)
    assert _alarmed_without_break(planted) <= _most(n, RATE), planted.table()


def test_structural_break_stays_rare_on_stable_series(planted: PanelResult) -> None:
    n = len(planted.untouched)
    assert planted.count_with(FindingKind.STRUCTURAL_BREAK) <= _most(n, RATE), planted.table()
    assert round(planted.share_alarmed() * n) <= _most(n, RATE), planted.table()


@pytest.mark.parametrize("change", CHANGES)
def test_planted_changes_are_found_by_the_kind_that_names_them(
    planted: PanelResult, change: str
) -> None:
    found, total, median = planted.detection(change)
    assert total >= 6
    assert found >= _least(total, DETECTED) and median is not None, planted.table()


def test_coverage_findings_on_untouched_series_stay_within_the_fdr_over_the_replay(
    planted: PanelResult,
) -> None:
    false, total = planted.coverage_false_share()
    assert total > 0
    # the false share of all coverage findings raised over the whole replay, not pass by pass
    assert false <= _most(total, FDR), planted.table()


def test_autocorrelated_errors_raise_autocorrelation_on_most_series(
    autocorrelated: PanelResult,
) -> None:
    n = len(autocorrelated.untouched)
    assert autocorrelated.count_with(FindingKind.AUTOCORRELATION) > n / 2, autocorrelated.table()


@pytest.mark.parametrize(
    "kind",
    [k for k in FindingKind if k.declaration.scope == "series"
     and k is not FindingKind.AUTOCORRELATION and k.declaration.severity is Severity.NOTICE],
    ids=lambda k: k.value,
)
def test_nothing_else_fires_above_the_rate_with_autocorrelated_errors(
    autocorrelated: PanelResult, kind: FindingKind
) -> None:
    n = len(autocorrelated.untouched)
    assert autocorrelated.count_with(kind) <= _most(n, RATE), autocorrelated.table()


def test_no_warning_or_critical_above_the_rate_with_autocorrelated_errors(
    autocorrelated: PanelResult,
) -> None:
    n = len(autocorrelated.untouched)
    assert _alarmed_without_break(autocorrelated) <= _most(n, RATE), autocorrelated.table()


def test_structural_break_stays_rare_with_autocorrelated_errors(
    autocorrelated: PanelResult,
) -> None:
    n = len(autocorrelated.untouched)
    assert autocorrelated.count_with(FindingKind.STRUCTURAL_BREAK) <= _most(n, RATE)
    assert round(autocorrelated.share_alarmed() * n) <= _most(n, RATE), autocorrelated.table()
