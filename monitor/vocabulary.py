"""The shapes every layer passes around, so that layers agree without importing each other.

This module sits at the very bottom: it imports only the standard library, and every layer
(``stats`` included) may import it. Values are plain Python types; arrays stay inside ``stats``.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum


class Severity(StrEnum):
    """Syslog's words, in increasing order of urgency."""

    NOTICE = "notice"
    WARNING = "warning"
    CRITICAL = "critical"

    @property
    def rank(self) -> int:
        return _SEVERITY_RANK[self]


_SEVERITY_RANK = {Severity.NOTICE: 0, Severity.WARNING: 1, Severity.CRITICAL: 2}


class FindingKind(StrEnum):
    """The kinds of finding of DESIGN.md section 7."""

    COVERAGE = "coverage"
    CLUSTERED_MISSES = "clustered_misses"
    SLOPE_SHIFT = "slope_shift"
    STRUCTURAL_BREAK = "structural_break"
    SIGNIFICANCE_LOST = "significance_lost"
    SIGN_FLIP = "sign_flip"
    WEAK_FIT = "weak_fit"
    EXTRAPOLATION = "extrapolation"
    AUTOCORRELATION = "autocorrelation"
    HETEROSCEDASTICITY = "heteroscedasticity"
    STALE_FEED = "stale_feed"
    REJECTED_INPUT = "rejected_input"
    NOT_ESTIMABLE = "not_estimable"


class FindingState(StrEnum):
    """A finding's lifecycle: ``new`` → ``ongoing`` → ``cleared``."""

    NEW = "new"
    ONGOING = "ongoing"
    CLEARED = "cleared"


class OutcomeKind(StrEnum):
    """How an actual compares with the prediction interval issued for it (bounds inclusive)."""

    HIT = "hit"
    MISS_HIGH = "miss_high"
    MISS_LOW = "miss_low"


def classify_outcome(actual: float, lower: float, upper: float) -> OutcomeKind:
    """``hit`` when lower ≤ actual ≤ upper, else the side it fell on."""
    if actual > upper:
        return OutcomeKind.MISS_HIGH
    if actual < lower:
        return OutcomeKind.MISS_LOW
    return OutcomeKind.HIT


@dataclass(frozen=True)
class Forecast:
    """A point and intervals issued for a period before its actual is known (append-only)."""

    model: str
    series: str | None
    target_period: str
    lead: int
    point: float
    mean_lower: float
    mean_upper: float
    lower: float
    upper: float
    level: float
    leverage: float | None
    extrapolation: bool
    fit_id: int | None = None
    issued_at: str | None = None  # ISO 8601, UTC


@dataclass(frozen=True)
class Outcome:
    """The scoring of one forecast once its actual has arrived."""

    forecast_id: int
    actual: float
    outcome: OutcomeKind


@dataclass(frozen=True)
class Finding:
    """A detected condition on a series (or, with ``series`` None, on a feed)."""

    model: str | None
    series: str | None
    feed: str | None
    kind: FindingKind
    severity: Severity
    since_period: str | None
    statistic: float | None
    p_value: float | None
    message: str
    action: str


__all__ = [
    "Finding",
    "FindingKind",
    "FindingState",
    "Forecast",
    "Outcome",
    "OutcomeKind",
    "Severity",
    "classify_outcome",
]
