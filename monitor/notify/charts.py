"""Charts for pages (inline SVG) and e-mail (PNG), each with a text alternative that states its
message in figures.

Five kinds, each a frozen data class of plain arrays that the caller fills
(``monitor.notify.series`` fills them from the database):

- ``ActualsData``: the actuals against the prediction intervals issued for them, misses marked,
  and the forecasts still awaiting their actuals;
- ``CoefficientData``: one coefficient across refits with its confidence interval, against the
  baseline's band;
- ``MonitoringData``: the sequential monitoring statistic since the baseline with its boundaries;
- ``ScatterData``: the current window's points with the fitted line and the prediction band (one
  predictor), the mean-response band drawn narrower and marked as not for scoring;
- ``HitRateData``: the rolling hit rate against the nominal rate, with its Clopper–Pearson band.

``describe(data)`` gives the text alternative; ``draw(data, key=..., svg=..., png=...)`` renders.
``plot_of(data)`` states each kind as marks on axes (``monitor.notify.plot``); the page's SVG is
written from that by our own renderer (``plot.to_svg``: escaped text, one id prefixed with the
chart's key so ids stay unique when several charts share a page), and the e-mail's PNG is drawn
from the same statement by matplotlib (``plot_png``, imported only when a PNG is asked for). The
SVG is checked by ``check_svg`` to be well-formed and to hold no script, event attribute or
outside reference before a page may embed it.
"""

from __future__ import annotations

import hashlib
import re
import xml.etree.ElementTree as ET
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass, field, fields
from datetime import date

import numpy as np
from numpy.typing import NDArray

from monitor.notify.plot import (
    Band,
    Line,
    Mark,
    Marker,
    NumberAxis,
    PeriodAxis,
    Plot,
    Points,
    Ranges,
    Rule,
    Span,
    to_svg,
)
from monitor.notify.words import level_text, number, percent, plural
from monitor.stats.coverage import clopper_pearson_interval

FloatArray = NDArray[np.float64]

# Ink and accents: blue-grey for intervals, near-black for actuals, purple for misses. Green,
# yellow and red are kept for the coverage zones.
INK = "#1f2328"
MUTED = "#5b6470"
INTERVAL = "#4f6d8f"
BAND = "#c9d6e3"
BASELINE = "#9aa3ad"
MISS = "#7a2e8c"


@dataclass(frozen=True, eq=False)
class ActualsData:
    """Scored forecasts of one series in target-period order, and the forecasts still open."""

    title: str
    periods: tuple[str, ...]
    actual: FloatArray
    lower: FloatArray
    upper: FloatArray
    point: FloatArray
    level: float
    upcoming_periods: tuple[str, ...] = ()
    upcoming_point: FloatArray = field(default_factory=lambda: np.zeros(0))
    upcoming_lower: FloatArray = field(default_factory=lambda: np.zeros(0))
    upcoming_upper: FloatArray = field(default_factory=lambda: np.zeros(0))


@dataclass(frozen=True, eq=False)
class CoefficientData:
    """One coefficient at each refit (labelled by the window's last period) and the baseline."""

    title: str
    term: str
    periods: tuple[str, ...]
    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    level: float
    baseline: tuple[float, float, float] | None = None  # estimate, lower, upper
    after_baseline: int = 0  # index of the first refit whose window ends after the baseline
    # the periods monitoring started from, as the feed writes them (first, last), when known
    start_span: tuple[str, str] | None = None


@dataclass(frozen=True, eq=False)
class MonitoringData:
    """The monitoring statistic and its boundary at each monitored period."""

    title: str
    periods: tuple[str, ...]
    statistic: FloatArray
    boundary: FloatArray
    break_period: str | None = None
    start_end: str | None = None  # the last period monitoring started from, when known


@dataclass(frozen=True, eq=False)
class ScatterData:
    """The current window's rows, the fitted line and its bands over a grid of the predictor."""

    title: str
    predictor: str
    response: str
    x: FloatArray
    y: FloatArray
    grid: FloatArray
    fitted: FloatArray
    lower: FloatArray
    upper: FloatArray
    mean_lower: FloatArray
    mean_upper: FloatArray
    level: float
    r_squared: float | None
    slope: float
    outside: int  # window rows outside the prediction band at their own x
    plan_x: FloatArray = field(default_factory=lambda: np.zeros(0))
    plan_point: FloatArray = field(default_factory=lambda: np.zeros(0))
    plan_lower: FloatArray = field(default_factory=lambda: np.zeros(0))
    plan_upper: FloatArray = field(default_factory=lambda: np.zeros(0))


@dataclass(frozen=True, eq=False)
class HitRateData:
    """Hits and scored forecasts per target period (pooled over series when there are many)."""

    title: str
    periods: tuple[str, ...]
    hits: NDArray[np.int64]
    scored: NDArray[np.int64]
    nominal: float
    window: int = 13
    confidence: float = 0.95


ChartData = ActualsData | CoefficientData | MonitoringData | ScatterData | HitRateData


@dataclass(frozen=True)
class Chart:
    """A rendered chart: ``svg`` (inline-ready markup text) and/or ``png`` bytes, and its alt."""

    key: str
    title: str
    alt: str
    svg: str | None
    png: bytes | None

    @property
    def filename(self) -> str:
        return f"{self.key}.png"

    @property
    def cid(self) -> str:
        """The Content-ID of the PNG in an e-mail (the HTML part says ``cid:<this>``)."""
        return f"{self.key}@plumbline"


# ------------------------------------------------------------------------------------ alt text


def describe(data: ChartData) -> str:
    """The chart's message in one or two sentences, computed from its figures."""
    if isinstance(data, ActualsData):
        return _describe_actuals(data)
    if isinstance(data, CoefficientData):
        return _describe_coefficient(data)
    if isinstance(data, MonitoringData):
        return _describe_monitoring(data)
    if isinstance(data, ScatterData):
        return _describe_scatter(data)
    return _describe_hit_rate(data)


def _month_groups(periods: Sequence[str]) -> str | None:
    """"2 in June 2025 and 1 in July 2025" when every period is an ISO date, else None."""
    months: dict[tuple[int, int], int] = {}
    for text in periods:
        try:
            day = date.fromisoformat(text[:10])
        except ValueError:
            return None
        months[(day.year, day.month)] = months.get((day.year, day.month), 0) + 1
    parts = [f"{count} in {date(y, m, 1):%B %Y}" for (y, m), count in sorted(months.items())]
    return ", ".join(parts[:-1]) + (" and " if len(parts) > 1 else "") + parts[-1]


def _which(periods: Sequence[str]) -> str:
    if len(periods) <= 3:
        return ", ".join(periods)
    grouped = _month_groups(periods)
    return grouped if grouped is not None else f"from {periods[0]} to {periods[-1]}"


def _describe_actuals(data: ActualsData) -> str:
    high = data.actual > data.upper
    low = data.actual < data.lower
    scored = int(data.actual.size)
    hits = scored - int(high.sum()) - int(low.sum())
    if scored == 0:
        text = "No actual has arrived yet for the forecasts issued."
    else:
        text = (f"{hits} of {scored} actuals inside their {level_text(data.level)} prediction "
                "intervals")
        misses = []
        if high.any():
            above = [p for p, h in zip(data.periods, high, strict=True) if h]
            misses.append(f"{len(above)} above ({_which(above)})")
        if low.any():
            below = [p for p, lo in zip(data.periods, low, strict=True) if lo]
            misses.append(f"{len(below)} below ({_which(below)})")
        text += "; misses: " + " and ".join(misses) + "." if misses else "; no misses."
    if data.upcoming_periods:
        i = len(data.upcoming_periods) - 1
        text += (
            f" Latest open forecast, for {data.upcoming_periods[i]}: "
            f"{number(float(data.upcoming_point[i]))} (interval "
            f"{number(float(data.upcoming_lower[i]))} to {number(float(data.upcoming_upper[i]))})."
        )
    return text


def _describe_coefficient(data: CoefficientData) -> str:
    if data.estimate.size == 0:
        return f"No refit of {data.term} recorded yet."
    last = data.estimate.size - 1
    text = (
        f"The coefficient on {data.term} is {number(float(data.estimate[last]))} at the latest "
        f"refit ({data.periods[last]}; {level_text(data.level)} interval "
        f"{number(float(data.lower[last]))} to {number(float(data.upper[last]))})"
    )
    if data.baseline is None:
        return text + f", over {plural(int(data.estimate.size), 'refit')}."
    estimate, lower, upper = data.baseline
    if data.start_span is None:
        span, since = "over the periods monitoring started from", "since then"
    else:
        span = (f"over {data.start_span[0]} to {data.start_span[1]}, the periods monitoring "
                "started from")
        since = f"since {data.start_span[1]}"
    text += f" against {number(estimate)} ({number(lower)} to {number(upper)}) {span}"
    start = min(max(data.after_baseline, 0), data.estimate.size)
    later = data.estimate.size - start
    if later == 0:
        return text + f"; no refit {since} yet."
    outside = (data.lower[start:] > upper) | (data.upper[start:] < lower)
    if not outside.any():
        return text + (f"; every refit {since} ({later}) has an interval overlapping that "
                       "band.")
    first = start + int(np.argmax(outside))
    return text + (
        f"; {int(outside.sum())} of the {later} refits {since} have an interval clear of that "
        f"band, the first at {data.periods[first]}."
    )


def _describe_monitoring(data: MonitoringData) -> str:
    count = int(data.statistic.size)
    since = "since it started" if data.start_end is None else f"since {data.start_end}"
    if count == 0:
        return f"No period has been monitored {since} yet."
    ratio = np.abs(data.statistic) / np.where(data.boundary > 0, data.boundary, np.inf)
    crossed = ratio > 1
    if crossed.any():
        first = int(np.argmax(crossed))
        text = (
            f"The monitoring statistic crossed its boundary at {data.periods[first]}, "
            f"{plural(first + 1, 'period')} after "
            f"{'monitoring started' if data.start_end is None else data.start_end}"
        )
        if data.break_period:
            text += f"; the new regime is estimated to start at {data.break_period}"
        return text + "."
    return (
        f"Over {plural(count, 'period')} {since} the monitoring statistic stayed "
        f"inside its boundary (at most {percent(float(ratio.max()))} of it)."
    )


def _describe_scatter(data: ScatterData) -> str:
    direction = "rises" if data.slope >= 0 else "falls"
    text = (
        f"R² {'n/a' if data.r_squared is None else format(data.r_squared, '.2f')} on "
        f"{data.x.size} periods: {data.response} {direction} "
        f"by {number(abs(data.slope))} per unit of {data.predictor}; points outside the "
        f"{level_text(data.level)} prediction band: {data.outside} of {data.x.size}."
    )
    if data.plan_x.size:
        low, high = float(data.x.min()), float(data.x.max())
        outside = int(((data.plan_x < low) | (data.plan_x > high)).sum())
        text += (
            f" {plural(int(data.plan_x.size), 'open forecast')} at {data.predictor} "
            f"{', '.join(number(float(v)) for v in data.plan_x[:3])}"
            f"{'…' if data.plan_x.size > 3 else ''}"
        )
        text += (
            f"; {outside} outside the fitted range {number(low)} to {number(high)}."
            if outside else f", inside the fitted range {number(low)} to {number(high)}."
        )
    return text


def rolling_hit_rate(data: HitRateData) -> tuple[FloatArray, FloatArray, FloatArray, int]:
    """(rate, lower, upper, start): rolling sums over ``window`` periods, from the first full one
    (or over every period so far when there are fewer)."""
    hits = np.cumsum(np.concatenate(([0], data.hits)))
    scored = np.cumsum(np.concatenate(([0], data.scored)))
    count = int(data.hits.size)
    width = min(data.window, count)
    end = np.arange(width, count + 1)
    window_hits = hits[end] - hits[end - width]
    window_scored = scored[end] - scored[end - width]
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = np.where(window_scored > 0, window_hits / np.maximum(window_scored, 1), np.nan)
    lower, upper = clopper_pearson_interval(window_hits, window_scored, data.confidence)
    return rate, lower, upper, width - 1


def _describe_hit_rate(data: HitRateData) -> str:
    if data.hits.size == 0 or int(data.scored.sum()) == 0:
        return "No forecast scored yet."
    rate, lower, upper, start = rolling_hit_rate(data)
    width = min(data.window, int(data.hits.size))
    hits = int(data.hits[-width:].sum())
    scored = int(data.scored[-width:].sum())
    text = (
        f"Over the latest {plural(width, 'scored period')} {hits} of {scored} actuals fell inside "
        f"({percent(float(rate[-1]))}; Clopper–Pearson interval {percent(float(lower[-1]))} to "
        f"{percent(float(upper[-1]))}) against the nominal {level_text(data.nominal)}"
    )
    if rate.size > 1 and np.isfinite(rate).any():
        worst = int(np.nanargmin(rate))
        text += (
            f"; the rolling rate was lowest, {percent(float(rate[worst]))}, in the window ending "
            f"{data.periods[start + worst]}"
        )
    return text + "."


# ------------------------------------------------------------------------------------ drawing


# Charts drawn in this process, by fingerprint: the same series and period asked for by a pass
# page, a model page and a digest is drawn once. Drawn under a placeholder key, which each use
# replaces with its own (ids stay unique per page).
_DRAWN: OrderedDict[str, tuple[str | None, bytes | None]] = OrderedDict()
_DRAWN_CAP = 256
_PLACEHOLDER = "chartkeyplaceholder"


def fingerprint(data: ChartData) -> str:
    """A digest of everything a chart shows (its kind and every field, arrays by their bytes)."""
    digest = hashlib.sha256(type(data).__name__.encode())
    for item in fields(data):
        value = getattr(data, item.name)
        digest.update(item.name.encode())
        if isinstance(value, np.ndarray):
            digest.update(f"{value.dtype}{value.shape}".encode())
            digest.update(np.ascontiguousarray(value).tobytes())
        else:
            digest.update(repr(value).encode())
    return digest.hexdigest()


def draw(data: ChartData, *, key: str, svg: bool = True, png: bool = False) -> Chart:
    """Render ``data``: inline-ready SVG text and/or PNG bytes. ``key`` must be unique per page
    (letters, digits and hyphens); it prefixes every id inside the SVG. A chart of the same data
    drawn before in this process is reused (with its ids given ``key``)."""
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9-]*", key):
        raise ValueError(f"chart key {key!r}: letters, digits and hyphens, starting with a letter")
    name = fingerprint(data)
    svg_text, png_bytes = _DRAWN.get(name, (None, None))
    if (svg and svg_text is None) or (png and png_bytes is None):
        stated = plot_of(data)
        if svg and svg_text is None:
            svg_text = _svg(stated, _PLACEHOLDER)
        if png and png_bytes is None:
            from monitor.notify.plot_png import to_png

            png_bytes = to_png(stated)
        _DRAWN[name] = (svg_text, png_bytes)
        while len(_DRAWN) > _DRAWN_CAP:
            _DRAWN.popitem(last=False)
    _DRAWN.move_to_end(name)
    own_svg = None if not svg or svg_text is None else svg_text.replace(_PLACEHOLDER, key)
    return Chart(key, data.title, describe(data), own_svg, png_bytes if png else None)


def plot_of(data: ChartData) -> Plot:
    """The chart as marks on axes (``monitor.notify.plot``), the same for the SVG and the PNG.
    The title is not drawn: the page's caption carries it (escaped there)."""
    if isinstance(data, ActualsData):
        return _plot_actuals(data)
    if isinstance(data, CoefficientData):
        return _plot_coefficient(data)
    if isinstance(data, MonitoringData):
        return _plot_monitoring(data)
    if isinstance(data, ScatterData):
        return _plot_scatter(data)
    return _plot_hit_rate(data)


def _positions(count: int, start: int = 0) -> FloatArray:
    return np.arange(start, start + count, dtype=float)


def _plot_actuals(data: ActualsData) -> Plot:
    n = int(data.actual.size)
    positions = _positions(n)
    miss = (data.actual > data.upper) | (data.actual < data.lower)
    marks: list[Mark] = [
        Ranges(positions, data.lower, data.upper, BAND, width=5.6,
               label=f"{level_text(data.level)} prediction interval issued"),
        Points(positions, data.point, Marker("dash", 9.7, INTERVAL), label="forecast"),
        Points(positions[~miss], data.actual[~miss], Marker("circle", 4.9, INK),
               label="actual inside"),
    ]
    if miss.any():
        marks.append(Points(positions[miss], data.actual[miss], Marker("cross", 9.7, MISS),
                            label="actual outside (miss)"))
    m = len(data.upcoming_periods)
    if m:
        marks.append(Ranges(_positions(m, n), data.upcoming_lower, data.upcoming_upper,
                            INTERVAL, width=2.1, dashed=True,
                            marker=Marker("diamond", 7.0, INTERVAL, hollow=True),
                            y=data.upcoming_point, label="open forecast"))
    return Plot(tuple(marks), PeriodAxis(data.periods + data.upcoming_periods), NumberAxis())


def _plot_coefficient(data: CoefficientData) -> Plot:
    positions = _positions(int(data.estimate.size))
    marks: list[Mark] = []
    if data.baseline is not None:
        estimate, lower, upper = data.baseline
        marks.append(Span(lower, upper, BASELINE, opacity=0.25,
                          label=("interval when monitoring started" if data.start_span is None
                                 else f"interval over {data.start_span[0]} to "
                                 f"{data.start_span[1]}")))
        marks.append(Rule(estimate, BASELINE, width=1.4, dashed=True))
    marks.append(Band(positions, data.lower, data.upper, BAND, opacity=0.9,
                      label=f"{level_text(data.level)} confidence interval"))
    marks.append(Line(positions, data.estimate, INTERVAL, width=1.7,
                      marker=Marker("circle", 3.5, INTERVAL), label="estimate at each refit"))
    return Plot(tuple(marks), PeriodAxis(data.periods), NumberAxis(label=data.term))


def _plot_monitoring(data: MonitoringData) -> Plot:
    positions = _positions(int(data.statistic.size))
    marks: list[Mark] = [
        Line(positions, data.boundary, MUTED, width=1.4, dashed=True, label="boundary"),
        Line(positions, -data.boundary, MUTED, width=1.4, dashed=True),
        Rule(0.0, "#d0d5db", width=1.1),
        Line(positions, data.statistic, INTERVAL, width=1.9,
             label=("cumulative forecast error (scaled)" if data.start_end is None
                    else f"cumulative forecast error since {data.start_end} (scaled)")),
    ]
    beyond = np.abs(data.statistic) > data.boundary
    if beyond.any():
        first = int(np.argmax(beyond))
        marks.append(Points(positions[first:first + 1], data.statistic[first:first + 1],
                            Marker("cross", 11.1, MISS), label=f"crossed at {data.periods[first]}"))
    return Plot(tuple(marks), PeriodAxis(data.periods), NumberAxis())


def _plot_scatter(data: ScatterData) -> Plot:
    marks: list[Mark] = [
        Band(data.grid, data.lower, data.upper, BAND, opacity=0.7,
             label=f"{level_text(data.level)} prediction band"),
        Band(data.grid, data.mean_lower, data.mean_upper, INTERVAL, opacity=0.25,
             label="mean-response band (narrower; not for scoring)"),
        Line(data.grid, data.fitted, INTERVAL, width=1.9, label="fitted line"),
        Points(data.x, data.y, Marker("circle", 4.2, INK), label="window rows"),
    ]
    if data.plan_x.size:
        marks.append(Ranges(data.plan_x, data.plan_lower, data.plan_upper, MISS, width=1.4,
                            cap=2.8, marker=Marker("diamond", 7.0, MISS, hollow=True),
                            y=data.plan_point, label="open forecast"))
    return Plot(tuple(marks), NumberAxis(label=data.predictor), NumberAxis(label=data.response))


def _plot_hit_rate(data: HitRateData) -> Plot:
    rate, lower, upper, start = rolling_hit_rate(data)
    positions = _positions(int(rate.size), start)
    finite = lower[np.isfinite(lower)]
    bottom = min(0.5, float(finite.min()) if finite.size else 0.5) - 0.02
    marks: tuple[Mark, ...] = (
        Band(positions, lower, upper, BAND, opacity=0.9, label="Clopper–Pearson interval"),
        Line(positions, rate, INTERVAL, width=1.9, marker=Marker("circle", 3.5, INTERVAL),
             label=f"hit rate over {plural(min(data.window, int(data.hits.size)), 'period')}"),
        Rule(data.nominal, INK, width=1.4, dashed=True,
             label=f"nominal {level_text(data.nominal)}"),
    )
    return Plot(marks, PeriodAxis(data.periods), NumberAxis(percent=True, limits=(bottom, 1.02)))


# ------------------------------------------------------------------------------------ output


def _svg(stated: Plot, key: str) -> str:
    text = to_svg(stated, key)
    check_svg(text)
    return text


_SVG_NS = "{http://www.w3.org/2000/svg}"
_XLINK_HREF = "{http://www.w3.org/1999/xlink}href"


def check_svg(text: str) -> None:
    """Refuse SVG that is not well-formed or that could run or fetch anything when inlined."""
    root = ET.fromstring(text)
    for element in root.iter():
        tag = element.tag.removeprefix(_SVG_NS).lower()
        if tag in {"script", "foreignobject", "iframe", "image", "style"}:
            raise ValueError(f"chart SVG holds a <{tag}> element")
        for name, value in element.attrib.items():
            local = name.rsplit("}", 1)[-1].lower()
            if local.startswith("on"):
                raise ValueError(f"chart SVG holds an event attribute {local}")
            if (name == _XLINK_HREF or local == "href") and not value.startswith("#"):
                raise ValueError("chart SVG refers outside itself")


__all__ = [
    "ActualsData",
    "Chart",
    "ChartData",
    "CoefficientData",
    "HitRateData",
    "MonitoringData",
    "ScatterData",
    "check_svg",
    "describe",
    "draw",
    "rolling_hit_rate",
]
