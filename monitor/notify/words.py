"""How reports say things: numbers, percentages, finding kinds, the statistic behind a finding,
and the sentences shared by pages, the plain-text digest and ``plumbline audit``.

Everything here returns plain text; escaping is the templates' job (autoescape is on). Nothing in
this module marks text safe.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
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


def zone_word(zone: str | None) -> str:
    return "no zone (nothing scored)" if zone is None else f"zone {zone}"


__all__ = [
    "CAUTION",
    "KIND_WORDS",
    "SEVERITY_MARKS",
    "SEVERITY_SHAPES",
    "StatisticValue",
    "hit_rate_sentence",
    "join_words",
    "level_text",
    "local_date",
    "local_time",
    "number",
    "p_text",
    "percent",
    "plural",
    "scope_text",
    "statistic_text",
    "zone_word",
]
