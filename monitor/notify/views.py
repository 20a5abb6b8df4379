"""The things pages show, as small frozen views built from store records: findings in order of
severity, coverage rows and summaries, forecasts, charts. Templates read these and nothing else.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any
from zoneinfo import ZoneInfo

from markupsafe import Markup

from monitor.notify.charts import Chart
from monitor.notify.words import (
    KIND_WORDS,
    MISS_WORDS,
    SEVERITY_MARKS,
    STATE_WORDS,
    finding_headline,
    level_text,
    local_date,
    local_time,
    number,
    percent,
    scope_text,
    statistic_text,
)
from monitor.store import FindingRecord, ForecastRecord
from monitor.text import format_p_value
from monitor.vocabulary import FindingState, Severity


@dataclass(frozen=True)
class FindingView:
    id: int
    severity: str  # the word: notice, warning, critical
    rank: int
    mark: str  # plain-text shape for text and e-mail
    kind: str
    kind_words: str
    model: str | None
    series: str | None
    feed: str | None
    scope: str
    since: str | None
    statistic: str
    message: str
    action: str
    state: str
    is_new: bool  # raised in the window the report covers
    noted: bool  # an owner recorded a note: no message mentions it again
    headline: str  # what and where: "depot-11 (delivery_hours): the relationship changed ..."
    state_words: str  # "newly raised", "still open", "no longer seen"
    cleared: str | None = None  # when it cleared, in the config's time zone
    p_value: float | None = None  # the evidence behind it, for the order (None: no test)
    note: str | None = None  # the latest owner's note: "2026-12-01 10:00 Europe/Berlin, ana: …"
    note_count: int = 0
    checked: str | None = None  # "pass 57 on 2025-03-03": the check its figures came from


def finding_view(
    record: FindingRecord, *, is_new: bool = False, zone: ZoneInfo | None = None
) -> FindingView:
    return FindingView(
        id=record.id,
        severity=record.severity.value,
        rank=record.severity.rank,
        mark=SEVERITY_MARKS[record.severity],
        kind=record.kind.value,
        kind_words=KIND_WORDS.get(record.kind, record.kind.value.replace("_", " ")),
        model=record.model,
        series=record.series,
        feed=record.feed,
        scope=scope_text(record.model, record.series, record.feed),
        since=record.since_period,
        statistic=statistic_text(record.kind, record.statistic, record.p_value),
        message=record.message,
        action=record.action,
        state=record.state.value,
        is_new=is_new,
        noted=record.noted,
        headline=finding_headline(record),
        state_words=STATE_WORDS[record.state.value],
        cleared=(
            None if record.cleared_at is None
            else local_date(record.cleared_at, zone or ZoneInfo("UTC"))
        ),
        p_value=record.p_value,
        note=(
            None if record.note is None else
            f"{local_time(record.note.at, zone or ZoneInfo('UTC'))}, {record.note.by}: "
            f"{record.note.text}"
        ),
        note_count=record.note_count,
        checked=(
            None if record.last_held_at is None else
            f"pass {record.last_pass_id} on "
            f"{local_date(record.last_held_at, zone or ZoneInfo('UTC'))}"
        ),
    )


def ordered_findings(
    records: Iterable[FindingRecord], *, new_ids: Iterable[int] = (), zone: ZoneInfo | None = None
) -> list[FindingView]:
    """Most severe first; within a severity the strongest evidence first (smallest p-value;
    findings without a test after those with one), so a marginal alarm never heads a list over
    a decisive one (issue 14); then new ones first, then by model, series, kind, id.

    The p-value is the finding's own test's. Within one model and kind the Benjamini–Hochberg
    adjusted p-values keep the same order as the raw ones (the adjustment is monotone in the
    raw p-value), so this is the order of the adjusted evidence there too.
    """
    fresh = set(new_ids)
    views = [finding_view(r, is_new=r.id in fresh, zone=zone) for r in records]
    views.sort(key=lambda v: (-v.rank, _evidence(v.p_value), not v.is_new, v.model or "",
                              v.feed or "", v.series or "", v.kind, v.id))
    return views


def _evidence(p_value: float | None) -> float:
    """Sort key: the p-value, and 2.0 (after every p-value) for a finding without a test."""
    if p_value is None or p_value != p_value:
        return 2.0
    return p_value


def severity_counts(views: Sequence[FindingView]) -> dict[str, int]:
    counts = {s.value: 0 for s in reversed(list(Severity))}
    for view in views:
        counts[view.severity] += 1
    return counts


def is_open(record: FindingRecord) -> bool:
    return record.state is not FindingState.CLEARED


@dataclass(frozen=True)
class CoverageRow:
    """One audit record (or a pooled summary) as a table row."""

    model: str
    series: str
    window: str
    scored: int
    hits: int
    misses_high: int
    misses_low: int
    hit_rate: str
    interval: str
    nominal: str
    zone: str | None  # green, yellow or red (the JSON's value), for the colour accent only
    misses: str  # what the zone means, in words: "about as expected", ...
    kupiec: str
    independence: str
    conditional: str
    mean_width: str
    interval_score: str


def coverage_row(record: dict[str, Any]) -> CoverageRow:
    series = record.get("series")
    window = record.get("window")
    return CoverageRow(
        model=str(record["model"]),
        series="whole model" if series is None else str(series),
        window="every scored period" if window is None else f"latest {window}",
        scored=int(record["scored"]),
        hits=int(record["hits"]),
        misses_high=int(record["misses_high"]),
        misses_low=int(record["misses_low"]),
        hit_rate=percent(record["hit_rate"], 1),
        interval=(f"{percent(record['hit_rate_lower'], 1)} to "
                  f"{percent(record['hit_rate_upper'], 1)}"),
        nominal=level_text(float(record["nominal"])),
        zone=record["zone"],
        misses="nothing scored" if record["zone"] is None else MISS_WORDS[record["zone"]],
        kupiec=format_p_value(record.get("kupiec_p_value")),
        independence=format_p_value(record.get("independence_p_value")),
        conditional=format_p_value(record.get("christoffersen_p_value")),
        mean_width=number(record.get("mean_width")),
        interval_score=number(record.get("interval_score")),
    )


@dataclass(frozen=True)
class ForecastView:
    model: str
    series: str
    period: str
    lead: int
    point: str
    lower: str
    upper: str
    mean_lower: str
    mean_upper: str
    level: str
    leverage: str
    extrapolation: bool
    inputs: str
    calibrated: str = ""  # "lower to upper" of the calibrated interval beside it, or ""


def forecast_view(record: ForecastRecord) -> ForecastView:
    return ForecastView(
        model=record.model,
        series="whole model" if record.series is None else record.series,
        period=record.target_period,
        lead=record.lead,
        point=number(record.point),
        lower=number(record.lower),
        upper=number(record.upper),
        mean_lower=number(record.mean_lower),
        mean_upper=number(record.mean_upper),
        level=level_text(record.level),
        leverage=number(record.leverage, 3),
        extrapolation=record.extrapolation,
        inputs=", ".join(f"{k} {number(v)}" for k, v in record.inputs.items()),
        calibrated=(
            "" if record.calibrated_lower is None or record.calibrated_upper is None
            else f"{number(record.calibrated_lower)} to {number(record.calibrated_upper)}"
        ),
    )


@dataclass(frozen=True)
class ChartView:
    """A chart on a page: inline SVG markup (written by ``plot.to_svg``, text escaped, and
    checked by ``charts.check_svg``; never user text) or, in e-mail, a ``cid:`` reference."""

    title: str
    alt: str
    markup: Markup | None
    cid: str | None


def chart_view(chart: Chart, *, email: bool = False) -> ChartView:
    if email:
        return ChartView(chart.title, chart.alt, None, chart.cid)
    if chart.svg is None:
        raise ValueError("a page chart needs its SVG")
    # The SVG text was written by plot.to_svg (text escaped) and passed check_svg.
    return ChartView(chart.title, chart.alt, Markup(chart.svg), None)


__all__ = [
    "ChartView",
    "CoverageRow",
    "FindingView",
    "ForecastView",
    "chart_view",
    "coverage_row",
    "finding_view",
    "forecast_view",
    "is_open",
    "ordered_findings",
    "severity_counts",
]
