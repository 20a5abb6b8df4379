"""How reports say things: numbers, percentages, finding kinds, the statistic behind a finding,
and the sentences shared by pages, the plain-text digest and ``plumbline audit``.

Everything here returns plain text; escaping is the templates' job (autoescape is on). Nothing in
this module marks text safe.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from datetime import datetime
from typing import Protocol
from zoneinfo import ZoneInfo

from monitor.figures import level_text, number, percent
from monitor.text import format_p_value
from monitor.vocabulary import FindingKind, Severity

# What each kind of finding is called in reports (from each kind's declaration).
KIND_WORDS: dict[FindingKind, str] = {kind: kind.declaration.words for kind in FindingKind}

# The shape drawn beside each severity word (pages) and its plain-text mark (text, e-mail).
SEVERITY_SHAPES: dict[Severity, str] = {
    Severity.CRITICAL: "filled triangle",
    Severity.WARNING: "hollow diamond",
    Severity.NOTICE: "small circle",
}
SEVERITY_MARKS: dict[Severity, str] = {
    Severity.CRITICAL: "▲",
    Severity.WARNING: "◇",
    Severity.NOTICE: "•",
}

CAUTION = (
    "A finding is a statistical signal, not proof that something is wrong: across many series "
    "some signals are chance, which Plumbline keeps to the configured false-discovery rate per "
    "model, not to zero. Every interval assumes the model's conditions hold: a straight-line "
    "relationship, independent errors of constant variance, roughly normal. Decisions stay with "
    "the model's owner."
)


# Why a coverage table's Kupiec p and a coverage finding's p-value can differ for one series.
KUPIEC_VERSUS_FINDING = (
    "Kupiec p tests only the count of misses over the periods shown; the coverage finding is "
    "decided by another test, a cumulative sum of the errors' size over the monitoring horizon, "
    "and quotes that test's p-value, so the two can differ."
)


def p_text(p_value: float | None) -> str:
    """"p 0.0123" or "p < 0.0001" (DESIGN.md section 2)."""
    return f"p {format_p_value(p_value)}"


def plural(count: int, word: str, many: str | None = None) -> str:
    """"1 finding", "3 findings"."""
    return f"{count} {word if count == 1 else (many or word + 's')}"


def severity_count(count: int, severity: str) -> str:
    """"4 critical", "3 warnings", "1 notice": "critical" is an adjective and takes no s."""
    return plural(count, severity, severity if severity == "critical" else None)


def join_words(items: Sequence[str]) -> str:
    """"a", "a and b", "a, b and c"."""
    if not items:
        return ""
    if len(items) == 1:
        return items[0]
    return ", ".join(items[:-1]) + " and " + items[-1]


def local_time(moment: datetime, zone: ZoneInfo) -> str:
    """A moment in the config's time zone, as people read it: "2025-03-02 08:00 Europe/Berlin"."""
    return f"{moment.astimezone(zone):%Y-%m-%d %H:%M} {zone.key}"


def local_date(moment: datetime, zone: ZoneInfo) -> str:
    return f"{moment.astimezone(zone):%Y-%m-%d}"


def scope_text(model: str | None, series: str | None, feed: str | None) -> str:
    """What a finding is about: "pick_hours", "delivery_hours, series North", "feed copacker"."""
    if model is None:
        return f"feed {feed}"
    if series is None:
        return model
    return f"{model}, series {series}"


class StatisticValue:
    """A finding's statistic inside its kind's ``statistic`` template (``KindDeclaration``).

    Format specs: none (4 significant digits), ``3`` (3 significant digits), ``abs3`` (the size,
    3 significant digits), ``percent``, ``rows`` (rows rejected, 0 = the whole file), or any
    Python float spec such as ``.2f``.
    """

    def __init__(self, value: float) -> None:
        self.value = value

    def __format__(self, spec: str) -> str:
        if spec == "":
            return number(self.value)
        if spec == "3":
            return number(self.value, 3)
        if spec == "abs3":
            return number(abs(self.value), 3)
        if spec == "percent":
            return percent(self.value)
        if spec == "rows":
            return ("the whole file" if self.value == 0
                    else f"{plural(int(self.value), 'row')} rejected")
        return format(self.value, spec)


# The what of a finding's line, in plain words (each kind's ``headline``).
HEADLINES: dict[FindingKind, str] = {kind: kind.declaration.headline for kind in FindingKind}

# A finding's state as a forecast owner reads it; the database and JSON keep the values
# new / ongoing / cleared.
STATE_WORDS: dict[str, str] = {
    "new": "newly raised",
    "ongoing": "still open",
    "cleared": "no longer seen",
}


def where_text(model: str | None, series: str | None, feed: str | None) -> str:
    """Where a finding is, series first: "depot-11 (delivery_hours)", "fuel_litres",
    "feed copacker"."""
    if model is None:
        return f"feed {feed}"
    return model if series is None else f"{series} ({model})"


class _Finding(Protocol):
    @property
    def model(self) -> str | None: ...
    @property
    def series(self) -> str | None: ...
    @property
    def feed(self) -> str | None: ...
    @property
    def kind(self) -> FindingKind: ...
    @property
    def since_period(self) -> str | None: ...


# The part of a headline that names its date: " (fit to {since})", ", since {since}", "from …".
_UNDATED = re.compile(r",? ?\([^()]*\{since\}\)|,? (?:since|from|around) \{since\}")


def finding_headline(finding: _Finding) -> str:
    """What and where, in plain words: "depot-11 (delivery_hours): the relationship changed
    around 2026-01-25"."""
    template = HEADLINES[finding.kind]
    if finding.since_period is None:  # no date to give: the words about it go, not a filler
        template = _UNDATED.sub("", template)
    what = template.format(since=finding.since_period)
    return f"{where_text(finding.model, finding.series, finding.feed)}: {what}"


def statistic_text(
    kind: FindingKind, statistic: float | None, p_value: float | None
) -> str:
    """The statistic behind a finding, named by its kind's declaration."""
    p = "" if p_value is None else f", {p_text(p_value)}"
    template = kind.declaration.statistic
    if "{value" not in template:
        return template.format(p=p)
    if statistic is None:
        return "no statistic recorded" + p
    return template.format(value=StatisticValue(statistic), p=p)


def hit_rate_sentence(hits: int, scored: int, level: float, what: str = "actuals") -> str:
    """"49 of 52 actuals inside their 95 % prediction intervals"."""
    return f"{hits} of {scored} {what} inside their {level_text(level)} prediction intervals"


# What the Basel traffic-light zone of a miss count means, said in words (Basel Committee on
# Banking Supervision 1996, "Supervisory framework for the use of backtesting": green below 95 %
# cumulative binomial probability of the count, yellow below 99.99 %, red above). The colour is
# never said alone: pages draw these words, with the colour as an accent only.
MISS_WORDS: dict[str, str] = {
    "green": "about as expected",
    "yellow": "more than expected",
    "red": "far more than expected",
}


def misses_text(zone: str | None) -> str:
    """"misses about as expected", "misses far more than expected", or "nothing scored"."""
    return "nothing scored" if zone is None else f"misses {MISS_WORDS[zone]}"


__all__ = [
    "CAUTION",
    "HEADLINES",
    "KIND_WORDS",
    "MISS_WORDS",
    "SEVERITY_MARKS",
    "SEVERITY_SHAPES",
    "STATE_WORDS",
    "StatisticValue",
    "finding_headline",
    "hit_rate_sentence",
    "join_words",
    "level_text",
    "local_date",
    "local_time",
    "misses_text",
    "number",
    "p_text",
    "percent",
    "plural",
    "scope_text",
    "statistic_text",
    "where_text",
]
