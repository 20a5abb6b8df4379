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
matplotlib runs on the Agg canvas with figures made directly (no pyplot, so no global figure
registry); settings apply inside ``matplotlib.rc_context`` only, and each figure is cleared once
saved. SVG output has its XML header, document type and style element removed, every id prefixed
with the chart's key (ids stay unique when several charts share a page), and it is checked to hold
no script, event attribute or outside reference before a page may embed it. Text is written as SVG
text (escaped by matplotlib), with math parsing off so a ``$`` in a name stays a dollar sign.
"""

from __future__ import annotations

import hashlib
import io
import math
import re
import xml.etree.ElementTree as ET
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass, field, fields
from datetime import date
from typing import Any

import matplotlib

matplotlib.use("Agg")

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import PercentFormatter
from numpy.typing import NDArray

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

_RC: dict[str, Any] = {
    "svg.fonttype": "none",
    "text.parse_math": False,
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "axes.edgecolor": "#9aa3ad",
    "axes.labelcolor": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "legend.frameon": False,
    "legend.fontsize": 8,
    "savefig.facecolor": "white",
    "figure.facecolor": "white",
}
FIG_SIZE = (7.2, 2.7)
MARGINS = {"left": 0.09, "right": 0.985, "bottom": 0.13, "top": 0.80}
PNG_DPI = 100
MAX_TICKS = 8


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
        drawn = _draw(data, svg=svg and svg_text is None, png=png and png_bytes is None)
        svg_text = svg_text if drawn.svg is None else drawn.svg
        png_bytes = png_bytes if drawn.png is None else drawn.png
        _DRAWN[name] = (svg_text, png_bytes)
        while len(_DRAWN) > _DRAWN_CAP:
            _DRAWN.popitem(last=False)
    _DRAWN.move_to_end(name)
    own_svg = None if not svg or svg_text is None else svg_text.replace(_PLACEHOLDER, key)
    return Chart(key, data.title, describe(data), own_svg, png_bytes if png else None)


def _draw(data: ChartData, *, svg: bool, png: bool) -> Chart:
    key = _PLACEHOLDER
    settings: dict[str, Any] = {**_RC, "svg.hashsalt": key}
    with matplotlib.rc_context(settings):  # type: ignore[arg-type]
        # Fixed margins instead of a layout engine: a constrained layout draws every figure
        # twice, and these charts all have the same furniture (legend above, ticks below).
        figure = Figure(figsize=FIG_SIZE)
        figure.subplots_adjust(**MARGINS)
        try:
            axes = figure.add_subplot()
            _plot(axes, data)
            if axes.get_xlabel():
                figure.subplots_adjust(bottom=0.19)
            svg_text = _svg(figure, key) if svg else None
            png_bytes = _png(figure) if png else None
        finally:
            figure.clear()
    return Chart(key, data.title, describe(data), svg_text, png_bytes)


def _plot(axes: Any, data: ChartData) -> None:
    if isinstance(data, ActualsData):
        _plot_actuals(axes, data)
    elif isinstance(data, CoefficientData):
        _plot_coefficient(axes, data)
    elif isinstance(data, MonitoringData):
        _plot_monitoring(axes, data)
    elif isinstance(data, ScatterData):
        _plot_scatter(axes, data)
    else:
        _plot_hit_rate(axes, data)
    # The title goes in the page's caption (escaped there); the legend sits above the plot.
    axes.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=4, borderaxespad=0.3,
                handlelength=1.6, columnspacing=1.2)


def _period_ticks(axes: Any, periods: Sequence[str]) -> None:
    count = len(periods)
    if count == 0:
        axes.set_xticks([])
        return
    step = max(1, math.ceil(count / MAX_TICKS))
    ticks = list(range(0, count, step))
    axes.set_xticks(ticks)
    axes.set_xticklabels([periods[i] for i in ticks])
    axes.set_xlim(-0.7, count - 0.3)


def _plot_actuals(axes: Any, data: ActualsData) -> None:
    n = int(data.actual.size)
    positions = np.arange(n)
    axes.vlines(positions, data.lower, data.upper, color=BAND, linewidth=4,
                label=f"{level_text(data.level)} prediction interval issued")
    axes.plot(positions, data.point, linestyle="none", marker="_", color=INTERVAL, markersize=7,
              label="forecast")
    miss = (data.actual > data.upper) | (data.actual < data.lower)
    axes.plot(positions[~miss], data.actual[~miss], linestyle="none", marker="o", markersize=3.5,
              color=INK, label="actual inside")
    if miss.any():
        axes.plot(positions[miss], data.actual[miss], linestyle="none", marker="X", markersize=7,
                  color=MISS, label="actual outside (miss)")
    m = len(data.upcoming_periods)
    if m:
        ahead = np.arange(n, n + m)
        axes.vlines(ahead, data.upcoming_lower, data.upcoming_upper, color=INTERVAL,
                    linewidth=1.5, linestyles="dashed", label="open forecast")
        axes.plot(ahead, data.upcoming_point, linestyle="none", marker="D", markersize=4,
                  markerfacecolor="white", color=INTERVAL)
    _period_ticks(axes, list(data.periods) + list(data.upcoming_periods))


def _plot_coefficient(axes: Any, data: CoefficientData) -> None:
    positions = np.arange(data.estimate.size)
    if data.baseline is not None:
        estimate, lower, upper = data.baseline
        axes.axhspan(lower, upper, color=BASELINE, alpha=0.25, linewidth=0,
                     label=("interval when monitoring started" if data.start_span is None
                            else f"interval over {data.start_span[0]} to {data.start_span[1]}"))
        axes.axhline(estimate, color=BASELINE, linestyle="dashed", linewidth=1)
    axes.fill_between(positions, data.lower, data.upper, color=BAND, alpha=0.9, linewidth=0,
                      label=f"{level_text(data.level)} confidence interval")
    axes.plot(positions, data.estimate, color=INTERVAL, marker="o", markersize=2.5, linewidth=1.2,
              label="estimate at each refit")
    axes.set_ylabel(data.term)
    _period_ticks(axes, data.periods)


def _plot_monitoring(axes: Any, data: MonitoringData) -> None:
    positions = np.arange(data.statistic.size)
    axes.plot(positions, data.boundary, color=MUTED, linestyle="dashed", linewidth=1,
              label="boundary")
    axes.plot(positions, -data.boundary, color=MUTED, linestyle="dashed", linewidth=1)
    axes.axhline(0, color="#d0d5db", linewidth=0.8)
    axes.plot(positions, data.statistic, color=INTERVAL, linewidth=1.4,
              label=("cumulative forecast error (scaled)" if data.start_end is None
                     else f"cumulative forecast error since {data.start_end} (scaled)"))
    beyond = np.abs(data.statistic) > data.boundary
    if beyond.any():
        first = int(np.argmax(beyond))
        axes.plot([first], [data.statistic[first]], linestyle="none", marker="X", markersize=8,
                  color=MISS, label=f"crossed at {data.periods[first]}")
    _period_ticks(axes, data.periods)


def _plot_scatter(axes: Any, data: ScatterData) -> None:
    axes.fill_between(data.grid, data.lower, data.upper, color=BAND, alpha=0.7, linewidth=0,
                      label=f"{level_text(data.level)} prediction band")
    axes.fill_between(data.grid, data.mean_lower, data.mean_upper, color=INTERVAL, alpha=0.25,
                      linewidth=0, label="mean-response band (narrower; not for scoring)")
    axes.plot(data.grid, data.fitted, color=INTERVAL, linewidth=1.4, label="fitted line")
    axes.plot(data.x, data.y, linestyle="none", marker="o", markersize=3, color=INK,
              label="window rows")
    if data.plan_x.size:
        axes.errorbar(data.plan_x, data.plan_point,
                      yerr=[data.plan_point - data.plan_lower, data.plan_upper - data.plan_point],
                      fmt="D", markersize=4, markerfacecolor="white", color=MISS, capsize=2,
                      linewidth=1, label="open forecast")
    axes.set_xlabel(data.predictor)
    axes.set_ylabel(data.response)


def _plot_hit_rate(axes: Any, data: HitRateData) -> None:
    rate, lower, upper, start = rolling_hit_rate(data)
    positions = np.arange(start, start + rate.size)
    axes.fill_between(positions, lower, upper, color=BAND, alpha=0.9, linewidth=0,
                      label="Clopper–Pearson interval")
    axes.plot(positions, rate, color=INTERVAL, linewidth=1.4, marker="o", markersize=2.5,
              label=f"hit rate over {plural(min(data.window, int(data.hits.size)), 'period')}")
    axes.axhline(data.nominal, color=INK, linestyle="dashed", linewidth=1,
                 label=f"nominal {level_text(data.nominal)}")
    axes.set_ylim(min(0.5, float(np.nanmin(lower)) if lower.size else 0.5) - 0.02, 1.02)
    axes.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
    _period_ticks(axes, data.periods)
    axes.set_xlim(-0.7, len(data.periods) - 0.3)


# ------------------------------------------------------------------------------------ output

_ID = re.compile(r'\bid="([^"]+)"')
_REF = re.compile(r'(url\(#|href="#)([^)"]+)')


def _svg(figure: Figure, key: str) -> str:
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", metadata={"Date": None})
    text = buffer.getvalue()
    text = re.sub(r"<\?xml[^>]*\?>\s*", "", text)
    text = re.sub(r"<!DOCTYPE[^>]*>\s*", "", text)
    text = re.sub(r"<style[^>]*>.*?</style>\s*", "", text, flags=re.S)
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    text = _ID.sub(lambda m: f'id="{key}-{m.group(1)}"', text)
    text = _REF.sub(lambda m: f"{m.group(1)}{key}-{m.group(2)}", text)
    text = re.sub(
        r'<svg ([^>]*?)width="[^"]*" height="[^"]*"',
        r'<svg class="chart-svg" aria-hidden="true" focusable="false" \1',
        text,
        count=1,
    )
    check_svg(text)
    return text.strip()


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


def _png(figure: Figure) -> bytes:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=PNG_DPI, metadata={"Software": None})
    return buffer.getvalue()


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
