"""A small chart renderer: a chart stated as marks on two axes (``Plot``) and written as SVG
markup by ``to_svg``, with no drawing library.

The marks are the few the report charts need: ``Band`` (a filled area between two curves),
``Span`` (a horizontal band across the plot), ``Line`` (a polyline, optionally with a marker at
each point), ``Rule`` (a horizontal line across the plot), ``Points`` (markers) and ``Ranges``
(vertical intervals, optionally capped and with a marker). The x axis is either a ``PeriodAxis``
(one position per period, labelled by the period's text) or a ``NumberAxis``; the y axis is a
``NumberAxis`` (numbers or shares shown as per cent).

Every size is in the canvas's own units: ``WIDTH`` × ``HEIGHT``, which are the pixels of the
e-mail's PNG (``monitor.notify.plot_png`` draws the same ``Plot`` with matplotlib). A page scales
the SVG to its column (``svg.chart-svg`` in the style sheet, width 100 %).

Non-finite values are left out: a line or band breaks where a value is NaN, a point or range
with a NaN is not drawn; a plot with no finite value shows empty axes from 0 to 1. Every piece of
text is escaped here, so names holding ``<``, ``&`` or ``$`` are shown as written. The SVG has one
id, its clip path, prefixed by the caller's ``key`` so several charts can share a page.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from html import escape
from typing import Literal

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

WIDTH, HEIGHT = 720.0, 270.0
FONT_SIZE = 11.8  # tick and axis labels (8.5 pt at 100 dpi)
LEGEND_FONT_SIZE = 11.1  # 8 pt
FONT_FAMILY = ("system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', 'Noto Sans', "
               "'DejaVu Sans', Arial, sans-serif")
INK = "#1f2328"
MUTED = "#5b6470"
AXIS = "#9aa3ad"
PAPER = "#ffffff"
TICK_LENGTH = 4.9
MAX_PERIOD_TICKS = 8
MARGIN = 0.05  # of the data's span, added on each side when the limits come from the data
PERIOD_PAD = (0.7, 0.3)  # a period axis runs from -0.7 to n - 0.3, as the charts always have
LEGEND_ROW = 17.0
LEGEND_HANDLE = 22.0

Shape = Literal["circle", "cross", "diamond", "dash"]


@dataclass(frozen=True)
class Marker:
    """A marker drawn at a point: ``size`` is its full width in canvas units."""

    shape: Shape
    size: float
    colour: str
    hollow: bool = False  # white inside, outlined in ``colour``


@dataclass(frozen=True, eq=False)
class Band:
    """The area between ``lower`` and ``upper`` over ``x``."""

    x: FloatArray
    lower: FloatArray
    upper: FloatArray
    colour: str
    opacity: float = 1.0
    label: str | None = None


@dataclass(frozen=True)
class Span:
    """A horizontal band from ``lower`` to ``upper`` across the whole plot."""

    lower: float
    upper: float
    colour: str
    opacity: float = 1.0
    label: str | None = None


@dataclass(frozen=True, eq=False)
class Line:
    x: FloatArray
    y: FloatArray
    colour: str
    width: float = 1.4
    dashed: bool = False
    marker: Marker | None = None
    label: str | None = None


@dataclass(frozen=True)
class Rule:
    """A horizontal line at ``y`` across the whole plot."""

    y: float
    colour: str
    width: float = 1.4
    dashed: bool = False
    label: str | None = None


@dataclass(frozen=True, eq=False)
class Points:
    x: FloatArray
    y: FloatArray
    marker: Marker
    label: str | None = None


@dataclass(frozen=True, eq=False)
class Ranges:
    """Vertical intervals from ``lower`` to ``upper`` at each ``x``; ``cap`` is the half-width of
    a cap at each end (0: none); ``marker`` is drawn at ``y`` when both are given."""

    x: FloatArray
    lower: FloatArray
    upper: FloatArray
    colour: str
    width: float = 1.4
    dashed: bool = False
    cap: float = 0.0
    marker: Marker | None = None
    y: FloatArray | None = None
    label: str | None = None


Mark = Band | Span | Line | Rule | Points | Ranges


@dataclass(frozen=True)
class PeriodAxis:
    """One position per period (0, 1, …), labelled by the period's text."""

    labels: tuple[str, ...]
    label: str | None = None


@dataclass(frozen=True)
class NumberAxis:
    label: str | None = None
    percent: bool = False  # values are shares: ticks read "90 %"
    limits: tuple[float, float] | None = None  # None: the data's range and a margin


@dataclass(frozen=True)
class Plot:
    marks: tuple[Mark, ...]
    x: PeriodAxis | NumberAxis
    y: NumberAxis


# ------------------------------------------------------------------------------------ scales


@dataclass(frozen=True)
class Scale:
    """Maps data values in [``low``, ``high``] onto canvas positions [``start``, ``end``]."""

    low: float
    high: float
    start: float
    end: float

    def __call__(self, values: FloatArray | float) -> FloatArray:
        ratio = (np.asarray(values, dtype=float) - self.low) / (self.high - self.low)
        return np.asarray(self.start + ratio * (self.end - self.start), dtype=float)


def nice_ticks(low: float, high: float, target: int = 5) -> tuple[FloatArray, float]:
    """Ticks at multiples of a step of 1, 2, 2.5 or 5 × 10^k inside [``low``, ``high``]: the
    step whose count of ticks is nearest ``target`` (the wider step on a tie), and that step."""
    magnitude = 10.0 ** math.floor(math.log10((high - low) / max(target, 1)))
    best: tuple[float, float] | None = None
    for step in (m * magnitude * scale for scale in (0.1, 1.0, 10.0)
                 for m in (1.0, 2.0, 2.5, 5.0)):
        count = math.floor(high / step + 1e-9) - math.ceil(low / step - 1e-9) + 1
        if count >= 2 and (best is None or abs(count - target) <= best[0]):
            best = (abs(count - target), step)
    step = best[1] if best is not None else (high - low)
    first = math.ceil(low / step - 1e-9)
    last = math.floor(high / step + 1e-9)
    ticks = np.arange(first, last + 1, dtype=float) * step
    ticks[np.abs(ticks) < step * 1e-9] = 0.0  # no "-0"
    return ticks, step


def tick_text(value: float, step: float, *, percent: bool = False) -> str:
    """A tick's label with as many decimals as the step needs; a minus sign, not a hyphen."""
    if percent:
        value, step = value * 100, step * 100
    decimals = max(0, -math.floor(math.log10(step) + 1e-9))
    if not math.isclose(round(step, decimals), step, rel_tol=1e-9):
        decimals += 1  # a step of 2.5 × 10^k needs one decimal more
    text = f"{abs(value):.{decimals}f}"
    sign = "\u2212" if value < 0 and float(text) != 0 else ""
    return f"{sign}{text}{' %' if percent else ''}"


# Widths of characters in ems, near enough for a sans-serif face to lay out labels and the
# legend without measuring fonts; generous, so text never overlaps when the face is wider.
_NARROW = frozenset("iljI.,:;'!|()[] ")
_WIDE = frozenset("mwMW%@")


def text_width(text: str, size: float) -> float:
    ems = 0.0
    for char in text:
        if char in _NARROW:
            ems += 0.32
        elif char in _WIDE:
            ems += 0.92
        elif char.isupper() or char.isdigit():
            ems += 0.66
        else:
            ems += 0.6
    return ems * size


# ------------------------------------------------------------------------------------ layout


def _finite(*arrays: FloatArray) -> FloatArray:
    values = np.concatenate([np.asarray(a, dtype=float).ravel() for a in arrays] or [np.zeros(0)])
    return values[np.isfinite(values)]


def _y_values(mark: Mark) -> FloatArray:
    if isinstance(mark, Band):
        return _finite(mark.lower, mark.upper)
    if isinstance(mark, Span):
        return _finite(np.array([mark.lower, mark.upper]))
    if isinstance(mark, Rule):
        return _finite(np.array([mark.y]))
    if isinstance(mark, Ranges):
        return _finite(mark.lower, mark.upper, *(() if mark.y is None else (mark.y,)))
    return _finite(mark.y)


def _x_values(mark: Mark) -> FloatArray:
    if isinstance(mark, Span | Rule):
        return np.zeros(0)
    return _finite(mark.x)


def data_limits(values: FloatArray) -> tuple[float, float]:
    """The data's range widened by ``MARGIN`` on each side; (0, 1) without data; a range of
    one value is widened to ±1 (±10 % of a large value)."""
    if values.size == 0:
        return 0.0, 1.0
    low, high = float(values.min()), float(values.max())
    if high - low <= 1e-12 * max(abs(low), abs(high), 1.0):
        half = max(abs(low) * 0.1, 1.0)
        return low - half, high + half
    pad = (high - low) * MARGIN
    return low - pad, high + pad


def _limits(axis: NumberAxis, values: FloatArray) -> tuple[float, float]:
    if axis.limits is not None:
        return axis.limits
    return data_limits(values)


@dataclass(frozen=True)
class Layout:
    """Where everything goes: the plot area, the scales, the ticks and the legend rows."""

    left: float
    right: float
    top: float
    bottom: float
    x: Scale
    y: Scale
    x_ticks: tuple[tuple[float, str], ...]
    y_ticks: tuple[tuple[float, str], ...]
    legend: tuple[tuple[tuple[float, Mark], ...], ...]  # rows of (x position, mark)


def _legend_rows(marks: Sequence[Mark], start: float, width: float) -> list[list[tuple[float,
                                                                                        Mark]]]:
    rows: list[list[tuple[float, Mark]]] = []
    x = start
    for mark in marks:
        if not mark.label:
            continue
        entry = LEGEND_HANDLE + 6 + text_width(mark.label, LEGEND_FONT_SIZE)
        if not rows or (x + entry > start + width and rows[-1]):
            rows.append([])
            x = start
        rows[-1].append((x, mark))
        x += entry + 16
    return rows


def layout(plot: Plot) -> Layout:
    """Lay the plot out on the canvas (see the module's docstring for the units)."""
    y_low, y_high = _limits(plot.y, _finite(*(_y_values(m) for m in plot.marks)))
    y_values, y_step = nice_ticks(y_low, y_high, 6)
    y_labels = [tick_text(v, y_step, percent=plot.y.percent) for v in y_values]
    label_room = max((text_width(t, FONT_SIZE) for t in y_labels), default=0.0)
    left = 6 + label_room + TICK_LENGTH + 4 + (FONT_SIZE + 6 if plot.y.label else 0)
    rows = _legend_rows(plot.marks, left, WIDTH - left - 8)
    top = 8 + LEGEND_ROW * len(rows) + (6 if rows else 4)
    bottom = TICK_LENGTH + 4 + FONT_SIZE + 6 + (FONT_SIZE + 6 if plot.x.label else 0)
    y_scale = Scale(y_low, y_high, HEIGHT - bottom, top)
    right = 12.0
    if isinstance(plot.x, PeriodAxis):
        count = len(plot.x.labels)
        x_low, x_high = -PERIOD_PAD[0], max(count, 1) - PERIOD_PAD[1]
        widest = max((text_width(t, FONT_SIZE) for t in plot.x.labels), default=0.0)
        x_ticks: list[tuple[float, str]] = []
        for _ in range(2):  # the right margin makes room for the last label's half
            unit = (WIDTH - right - left) / (x_high - x_low)
            step = max(1, math.ceil(count / MAX_PERIOD_TICKS), math.ceil((widest + 12) / unit))
            x_ticks = [(float(i), plot.x.labels[i]) for i in range(0, count, step)]
            if x_ticks:
                last = Scale(x_low, x_high, left, WIDTH - right)(x_ticks[-1][0])
                overflow = float(last) + text_width(x_ticks[-1][1], FONT_SIZE) / 2 + 2 - WIDTH
                right = max(right, right + overflow)
    else:
        x_low, x_high = _limits(plot.x, _finite(*(_x_values(m) for m in plot.marks)))
        room = WIDTH - right - left
        x_values, x_step = nice_ticks(x_low, x_high, 6)
        texts = [tick_text(v, x_step, percent=plot.x.percent) for v in x_values]
        widest = max((text_width(t, FONT_SIZE) for t in texts), default=0.0)
        if len(texts) > 1 and widest + 12 > room / (len(texts) + 1):
            x_values, x_step = nice_ticks(x_low, x_high, max(2, int(room // (widest + 24))))
            texts = [tick_text(v, x_step, percent=plot.x.percent) for v in x_values]
        x_ticks = list(zip(x_values.tolist(), texts, strict=True))
    x_scale = Scale(x_low, x_high, left, WIDTH - right)
    return Layout(
        left, right, top, bottom, x_scale, y_scale, tuple(x_ticks),
        tuple(zip(y_values.tolist(), y_labels, strict=True)),
        tuple(tuple(row) for row in rows),
    )


# ------------------------------------------------------------------------------------ markup


def _n(value: float) -> str:
    """A coordinate to 0.1 of a unit, without a trailing ".0"."""
    text = f"{value:.1f}"
    return text[:-2] if text.endswith(".0") else text


def _runs(mask: NDArray[np.bool_]) -> Iterable[tuple[int, int]]:
    """(start, end) of each run of True in ``mask``."""
    edges = np.flatnonzero(np.diff(np.concatenate(([0], mask.astype(np.int8), [0]))))
    return zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True)


def _polyline(xs: FloatArray, ys: FloatArray) -> str:
    return "M" + " L".join(f"{_n(a)} {_n(b)}" for a, b in zip(xs.tolist(), ys.tolist(),
                                                                strict=True))


def _dash(width: float) -> str:
    return f' stroke-dasharray="{_n(3.7 * width)} {_n(1.6 * width)}"'


def _marker_path(shape: Shape, size: float, xs: Iterable[float], ys: Iterable[float]) -> str:
    r = size / 2
    parts = []
    for x, y in zip(xs, ys, strict=True):
        if shape == "circle":
            parts.append(f"M{_n(x - r)} {_n(y)}a{_n(r)} {_n(r)} 0 1 0 {_n(2 * r)} 0"
                         f"a{_n(r)} {_n(r)} 0 1 0 {_n(-2 * r)} 0z")
        elif shape == "diamond":
            parts.append(f"M{_n(x)} {_n(y - r)}L{_n(x + r)} {_n(y)}L{_n(x)} {_n(y + r)}"
                         f"L{_n(x - r)} {_n(y)}z")
        elif shape == "dash":
            parts.append(f"M{_n(x - r)} {_n(y)}H{_n(x + r)}")
        else:  # a filled cross, its arms about 0.6 of its half-size wide
            a, b = r, r * 0.42
            points = [(-a, -a + b), (-a + b, -a), (0, -b), (a - b, -a), (a, -a + b), (b, 0),
                      (a, a - b), (a - b, a), (0, b), (-a + b, a), (-a, a - b), (-b, 0)]
            parts.append("M" + "L".join(f"{_n(x + dx)} {_n(y + dy)}" for dx, dy in points) + "z")
    return "".join(parts)


def _markers(marker: Marker, xs: FloatArray, ys: FloatArray) -> str:
    keep = np.isfinite(xs) & np.isfinite(ys)
    if not keep.any():
        return ""
    path = _marker_path(marker.shape, marker.size, xs[keep].tolist(), ys[keep].tolist())
    if marker.shape == "dash":
        return (f'<path d="{path}" fill="none" stroke="{marker.colour}" '
                f'stroke-width="{_n(max(marker.size / 7, 1.4))}"/>')
    if marker.hollow:
        return (f'<path d="{path}" fill="{PAPER}" stroke="{marker.colour}" '
                f'stroke-width="1.4"/>')
    return f'<path d="{path}" fill="{marker.colour}"/>'


def _opacity(value: float) -> str:
    return "" if value >= 1 else f' fill-opacity="{value:g}"'


def _mark(mark: Mark, lay: Layout) -> str:
    sx, sy = lay.x, lay.y
    if isinstance(mark, Span):
        top, bottom = sy(mark.upper), sy(mark.lower)
        return (f'<rect x="{_n(lay.left)}" y="{_n(float(top))}" width="{_n(sx.end - lay.left)}" '
                f'height="{_n(float(bottom - top))}" fill="{mark.colour}"'
                f'{_opacity(mark.opacity)}/>')
    if isinstance(mark, Rule):
        if not math.isfinite(mark.y):
            return ""
        at = _n(float(sy(mark.y)))
        return (f'<path d="M{_n(lay.left)} {at}H{_n(sx.end)}" stroke="{mark.colour}" '
                f'stroke-width="{_n(mark.width)}"{_dash(mark.width) if mark.dashed else ""}/>')
    if isinstance(mark, Band):
        x, lower, upper = sx(mark.x), sy(mark.lower), sy(mark.upper)
        keep = np.isfinite(x) & np.isfinite(lower) & np.isfinite(upper)
        paths = [_polyline(x[a:b], upper[a:b]) + " L" + _polyline(x[a:b][::-1],
                                                                 lower[a:b][::-1])[1:] + "z"
                 for a, b in _runs(keep)]
        if not paths:
            return ""
        return f'<path d="{"".join(paths)}" fill="{mark.colour}"{_opacity(mark.opacity)}/>'
    if isinstance(mark, Line):
        x, y = sx(mark.x), sy(mark.y)
        keep = np.isfinite(x) & np.isfinite(y)
        line = "".join(_polyline(x[a:b], y[a:b]) for a, b in _runs(keep))
        out = ""
        if line:
            out = (f'<path d="{line}" fill="none" stroke="{mark.colour}" '
                   f'stroke-width="{_n(mark.width)}" stroke-linejoin="round"'
                   f'{_dash(mark.width) if mark.dashed else ""}/>')
        if mark.marker is not None:
            out += _markers(mark.marker, x, y)
        return out
    if isinstance(mark, Points):
        return _markers(mark.marker, sx(mark.x), sy(mark.y))
    x, lower, upper = sx(mark.x), sy(mark.lower), sy(mark.upper)
    keep = np.isfinite(x) & np.isfinite(lower) & np.isfinite(upper)
    segments = [f"M{_n(a)} {_n(lo)}V{_n(hi)}"
                for a, lo, hi in zip(x[keep].tolist(), lower[keep].tolist(), upper[keep].tolist(),
                                     strict=True)]
    out = ""
    if segments:
        out = (f'<path d="{"".join(segments)}" fill="none" stroke="{mark.colour}" '
               f'stroke-width="{_n(mark.width)}"{_dash(mark.width) if mark.dashed else ""}/>')
    if mark.cap > 0 and segments:
        caps = "".join(f"M{_n(a - mark.cap)} {_n(v)}H{_n(a + mark.cap)}"
                       for a, lo, hi in zip(x[keep].tolist(), lower[keep].tolist(),
                                            upper[keep].tolist(), strict=True)
                       for v in (lo, hi))
        out += f'<path d="{caps}" fill="none" stroke="{mark.colour}" stroke-width="1.4"/>'
    if mark.marker is not None and mark.y is not None:
        out += _markers(mark.marker, x, sy(mark.y))
    return out


def _handle(mark: Mark, x: float, y: float) -> str:
    """The legend's sample of ``mark``, ``LEGEND_HANDLE`` wide, centred on ``y``."""
    middle = np.array([x + LEGEND_HANDLE / 2])
    if isinstance(mark, Band | Span):
        return (f'<rect x="{_n(x)}" y="{_n(y - 4.5)}" width="{_n(LEGEND_HANDLE)}" height="9" '
                f'fill="{mark.colour}"{_opacity(mark.opacity)}/>')
    if isinstance(mark, Line | Rule):
        out = (f'<path d="M{_n(x)} {_n(y)}H{_n(x + LEGEND_HANDLE)}" stroke="{mark.colour}" '
               f'stroke-width="{_n(mark.width)}"{_dash(mark.width) if mark.dashed else ""}/>')
        if isinstance(mark, Line) and mark.marker is not None:
            out += _markers(mark.marker, middle, np.array([y]))
        return out
    if isinstance(mark, Points):
        return _markers(mark.marker, middle, np.array([y]))
    out = (f'<path d="M{_n(float(middle[0]))} {_n(y - 6)}V{_n(y + 6)}" stroke="{mark.colour}" '
           f'stroke-width="{_n(mark.width)}"{_dash(mark.width) if mark.dashed else ""}/>')
    if mark.marker is not None:
        out += _markers(mark.marker, middle, np.array([y]))
    return out


def _text(x: float, y: float, text: str, *, anchor: str = "middle", size: float = FONT_SIZE,
          colour: str = MUTED, extra: str = "") -> str:
    return (f'<text x="{_n(x)}" y="{_n(y)}" text-anchor="{anchor}" font-size="{size:g}" '
            f'fill="{colour}"{extra}>{escape(text, quote=False)}</text>')


def to_svg(plot: Plot, key: str) -> str:
    """The plot as one ``<svg>`` element, ready to inline in a page (ids prefixed by ``key``)."""
    lay = layout(plot)
    clip = f"{key}-plot"
    x0, x1 = lay.left, lay.x.end
    y0, y1 = lay.top, lay.y.start  # top and bottom of the plot area
    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart-svg" aria-hidden="true" '
        f'focusable="false" viewBox="0 0 {WIDTH:g} {HEIGHT:g}" '
        f'font-family="{escape(FONT_FAMILY)}">',
        f'<rect width="{WIDTH:g}" height="{HEIGHT:g}" fill="{PAPER}"/>',
        f'<defs><clipPath id="{clip}"><rect x="{_n(x0 - 6)}" y="{_n(y0 - 6)}" '
        f'width="{_n(x1 - x0 + 12)}" height="{_n(y1 - y0 + 12)}"/></clipPath></defs>',
        f'<g clip-path="url(#{clip})">',
        *(_mark(mark, lay) for mark in plot.marks),
        "</g>",
        f'<path d="M{_n(x0)} {_n(y0)}V{_n(y1)}H{_n(x1)}" fill="none" stroke="{AXIS}" '
        'stroke-width="1.1"/>',
    ]
    ticks = [f"M{_n(x0)} {_n(float(lay.y(v)))}h{_n(-TICK_LENGTH)}" for v, _ in lay.y_ticks]
    ticks += [f"M{_n(float(lay.x(v)))} {_n(y1)}v{_n(TICK_LENGTH)}" for v, _ in lay.x_ticks]
    if ticks:
        out.append(f'<path d="{"".join(ticks)}" stroke="{MUTED}" stroke-width="1.1"/>')
    out += [_text(x0 - TICK_LENGTH - 4, float(lay.y(v)) + FONT_SIZE * 0.35, text, anchor="end")
            for v, text in lay.y_ticks]
    label_y = y1 + TICK_LENGTH + 4 + FONT_SIZE * 0.8
    out += [_text(float(lay.x(v)), label_y, text) for v, text in lay.x_ticks]
    if plot.y.label:
        middle = (y0 + y1) / 2
        out.append(_text(6 + FONT_SIZE * 0.8, middle, plot.y.label, colour=INK,
                         extra=f' transform="rotate(-90 {_n(6 + FONT_SIZE * 0.8)} {_n(middle)})"'))
    if plot.x.label:
        out.append(_text((x0 + x1) / 2, HEIGHT - 6, plot.x.label, colour=INK))
    for index, row in enumerate(lay.legend):
        y = 8 + LEGEND_ROW * (index + 0.5)
        for x, mark in row:
            out.append(_handle(mark, x, y))
            out.append(_text(x + LEGEND_HANDLE + 6, y + LEGEND_FONT_SIZE * 0.35, mark.label or "",
                             anchor="start", size=LEGEND_FONT_SIZE, colour=INK))
    out.append("</svg>")
    return "".join(part for part in out if part)


__all__ = [
    "HEIGHT",
    "WIDTH",
    "Band",
    "Layout",
    "Line",
    "Mark",
    "Marker",
    "NumberAxis",
    "PeriodAxis",
    "Plot",
    "Points",
    "Ranges",
    "Rule",
    "Scale",
    "Span",
    "data_limits",
    "layout",
    "nice_ticks",
    "text_width",
    "tick_text",
    "to_svg",
]
