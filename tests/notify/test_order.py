"""Issue 14, item 10: within a severity, the strongest evidence first (smallest p-value), so a
marginal alarm never heads a digest or page over a decisive one."""

from __future__ import annotations

from datetime import UTC, datetime

from monitor.notify.views import ordered_findings
from monitor.store.records import FindingRecord
from monitor.vocabulary import FindingKind, FindingState, Severity

NOW = datetime(2026, 12, 1, tzinfo=UTC)


def _record(id_: int, kind: FindingKind, severity: Severity, p: float | None,
            series: str) -> FindingRecord:
    return FindingRecord(
        id=id_, model="m", series=series, feed=None, kind=kind, severity=severity,
        state=FindingState.NEW, since_period=None, statistic=1.0, p_value=p, message="",
        action="", first_pass_id=1, last_pass_id=1, false_streak=0, created_at=NOW,
        updated_at=NOW, acknowledged_at=None, cleared_at=None, cleared_pass_id=None,
    )


def test_strongest_evidence_first_within_a_severity() -> None:
    records = [
        _record(1, FindingKind.COVERAGE, Severity.WARNING, 0.04, "a"),  # marginal
        _record(2, FindingKind.SLOPE_SHIFT, Severity.WARNING, 1e-6, "b"),  # decisive
        _record(3, FindingKind.NOT_ESTIMABLE, Severity.WARNING, None, "c"),  # no test
        _record(4, FindingKind.AUTOCORRELATION, Severity.NOTICE, 1e-9, "d"),
        _record(5, FindingKind.STRUCTURAL_BREAK, Severity.CRITICAL, 0.03, "e"),
        _record(6, FindingKind.SIGN_FLIP, Severity.CRITICAL, 0.0001, "f"),
    ]
    order = [v.id for v in ordered_findings(records, new_ids=[1])]
    # severity first (a decisive notice stays below every warning), then the p-value; a
    # finding without a test after those with one; being new does not outrank evidence
    assert order == [6, 5, 2, 1, 3, 4]
