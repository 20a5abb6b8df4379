"""The shapes every layer passes around, so that layers agree without importing each other.

This module sits at the very bottom: it imports only the standard library, and every layer
(``stats`` included) may import it. Values are plain Python types; arrays stay inside ``stats``.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import Literal, Self


class Severity(StrEnum):
    """Syslog's words, in increasing order of urgency."""

    NOTICE = "notice"
    WARNING = "warning"
    CRITICAL = "critical"

    @property
    def rank(self) -> int:
        return _SEVERITY_RANK[self]


_SEVERITY_RANK = {Severity.NOTICE: 0, Severity.WARNING: 1, Severity.CRITICAL: 2}


class EvidenceFamily(StrEnum):
    """How a kind's evidence is controlled across series (DESIGN.md section 7).

    ``series``: one p-value per series, each tested at ``thresholds.significance`` and the family
    of a model's series controlled by Benjamini–Hochberg (1995) at ``thresholds.fdr``.
    ``slopes``: the same over every (series, slope) test of the model. ``own_level``: a test at its
    own level per series, not corrected across series. ``rule``: a stated rule, not a test.
    ``fact``: a fact about a feed or its input (nothing is estimated).
    """

    SERIES = "series"
    SLOPES = "slopes"
    OWN_LEVEL = "own_level"
    RULE = "rule"
    FACT = "fact"

    @property
    def controlled(self) -> bool:
        """Whether Benjamini–Hochberg runs across the model's series for this family."""
        return self in (EvidenceFamily.SERIES, EvidenceFamily.SLOPES)


@dataclass(frozen=True)
class KindDeclaration:
    """Everything about a finding kind that is not its rule's arithmetic, declared once.

    ``words``: what reports call it (a short phrase). ``severity``: the severity it is raised at;
    ``raised_to`` a higher one its rule may give instead, ``raised_when`` says when (words for
    the README's table). ``family``: how its evidence is controlled across series. ``rebaseline``:
    whether ``plumbline rebaseline`` clears it (it compares with the baseline). ``scope``: on a
    series of a model, or on a feed. ``statistic``: how reports name the number behind it, a
    template whose ``{value}`` takes a spec of ``monitor.notify.words.StatisticValue`` and whose
    ``{p}`` is ", p 0.0123" when there is a p-value. ``headline``: what a finding of the kind
    says first, after where it is ("depot-11 (delivery_hours): the relationship changed around
    2026-01-25"), in a forecast owner's words; ``{since}`` is the period it names.
    """

    words: str
    severity: Severity
    family: EvidenceFamily
    statistic: str
    headline: str = "{since}"
    rebaseline: bool = False
    raised_to: Severity | None = None
    raised_when: str | None = None
    scope: Literal["series", "feed"] = "series"

    @property
    def severities(self) -> tuple[Severity, ...]:
        return (self.severity,) if self.raised_to is None else (self.severity, self.raised_to)


class FindingKind(StrEnum):
    """The kinds of finding of DESIGN.md section 7, each with its declaration.

    Adding a kind is one member here (its value is what JSON, the database and the README use)
    plus its rule in ``monitor/findings.py`` and its test; see DEVELOPERS.md, "How to add a
    finding kind". Reports, the rebaseline command, the README check and the pass read the rest
    from ``kind.declaration``.
    """

    declaration: KindDeclaration

    def __new__(cls, value: str, *declaration: KindDeclaration) -> Self:
        member = str.__new__(cls, value)
        member._value_ = value
        if declaration:
            member.declaration = declaration[0]
        return member

    COVERAGE = "coverage", KindDeclaration(
        "coverage below nominal", Severity.WARNING, EvidenceFamily.SERIES,
        "hit rate {value:percent}; cumulative-sum test of the errors' size{p}",
        raised_to=Severity.CRITICAL,
        raised_when="when the misses are far more than expected (the red zone)",
        headline="fewer actuals inside their intervals than promised, since {since}",
    )
    CLUSTERED_MISSES = "clustered_misses", KindDeclaration(
        "misses in runs", Severity.NOTICE, EvidenceFamily.SERIES,
        "Christoffersen independence statistic {value:3}{p}",
        headline="misses come in runs, since {since}",
    )
    FORECAST_BIAS = "forecast_bias", KindDeclaration(
        "forecasts biased to one side", Severity.WARNING, EvidenceFamily.SERIES,
        "tracking signal {value:3} (cumulative error over mean absolute error); test of the "
        "mean error{p}",
        headline="forecasts run to one side of the actuals, since {since}",
    )
    SLOPE_SHIFT = "slope_shift", KindDeclaration(
        "slope shift", Severity.WARNING, EvidenceFamily.SLOPES,
        "slope differs by {value:abs3} combined standard errors between the periods compared{p}",
        rebaseline=True,
        headline="a slope changed, from {since}",
    )
    STRUCTURAL_BREAK = "structural_break", KindDeclaration(
        "structural break", Severity.CRITICAL, EvidenceFamily.SERIES,
        "monitoring statistic at {value:3} times its boundary{p}", rebaseline=True,
        headline="the relationship changed around {since}",
    )
    SIGNIFICANCE_LOST = "significance_lost", KindDeclaration(
        "slope no longer significant", Severity.WARNING, EvidenceFamily.OWN_LEVEL,
        "current slope {value}{p}", rebaseline=True,
        headline="a slope no longer clearly differs from zero (fit to {since})",
    )
    SIGN_FLIP = "sign_flip", KindDeclaration(
        "slope sign reversed", Severity.CRITICAL, EvidenceFamily.OWN_LEVEL,
        "current slope {value}{p}", rebaseline=True,
        headline="a slope reversed its sign (fit to {since})",
    )
    WEAK_FIT = "weak_fit", KindDeclaration(
        "weaker fit", Severity.NOTICE, EvidenceFamily.SERIES, "R² {value:.2f}; F test of the "
        "error variance{p}", rebaseline=True,
        headline="the fit explains less than it did (fit to {since})",
    )
    EXTRAPOLATION = "extrapolation", KindDeclaration(
        "forecast outside the fitted range", Severity.NOTICE, EvidenceFamily.RULE,
        "leverage {value:3}{p}",
        headline="forecasts asked for outside the fitted range, from {since}",
    )
    AUTOCORRELATION = "autocorrelation", KindDeclaration(
        "autocorrelated errors", Severity.NOTICE, EvidenceFamily.SERIES,
        "Durbin–Watson {value:.2f}; Breusch–Godfrey test{p}",
        headline="consecutive errors are correlated (rows from {since})",
    )
    HETEROSCEDASTICITY = "heteroscedasticity", KindDeclaration(
        "error spread changes with the predictors", Severity.NOTICE, EvidenceFamily.SERIES,
        "Breusch–Pagan statistic {value:3}{p}",
        headline="the error spread changes with the predictors (rows from {since})",
    )
    STALE_FEED = "stale_feed", KindDeclaration(
        "feed gone quiet", Severity.WARNING, EvidenceFamily.FACT,
        "{value:.0f} days since the latest period{p}", scope="feed",
        headline="nothing new since {since}",
    )
    REJECTED_INPUT = "rejected_input", KindDeclaration(
        "input rejected", Severity.NOTICE, EvidenceFamily.FACT, "{value:rows}",
        raised_to=Severity.WARNING, raised_when="for a refused file", scope="feed",
        headline="input refused ({since})",
    )
    NOT_ESTIMABLE = "not_estimable", KindDeclaration(
        "can no longer be fitted", Severity.WARNING, EvidenceFamily.FACT,
        "no statistic: the fit itself is impossible",
        headline="can no longer be fitted (from {since})",
    )


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
    "EvidenceFamily",
    "Finding",
    "FindingKind",
    "FindingState",
    "Forecast",
    "KindDeclaration",
    "Outcome",
    "OutcomeKind",
    "Severity",
    "classify_outcome",
]
