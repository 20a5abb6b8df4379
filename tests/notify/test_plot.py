"""The chart renderer (``monitor.notify.plot``): well-formed SVG, data mapped to the expected
canvas positions, readable tick labels, escaped text, and NaN or empty data drawn without
failing. Positions are read back from the SVG itself (the axis line gives the plot area)."""

from __future__ import annotations

import io
import itertools
import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from PIL import Image

from monitor.notify.charts import (
    ActualsData,
    CoefficientData,
    HitRateData,
    MonitoringData,
    ScatterData,
    check_svg,
    draw,
    plot_of,
)
from monitor.notify.plot import (
    HEIGHT,
    WIDTH,
    Band,
    Line,
    Marker,
    NumberAxis,
    PeriodAxis,
    Plot,
    Points,
    Ranges,
    Rule,
    Span,
    layout,
    nice_ticks,
    text_width,
    tick_text,
    to_svg,
)
from monitor.notify.plot_png import to_png

SVG = "{http://www.w3.org/2000/svg}"
NUMBER = r"-?\d+(?:\.\d+)?"


def _parse(plot: Plot, key: str = "t") -> ET.Element:
    text = to_svg(plot, key)
    check_svg(text)
    return ET.fromstring(text)


def _plot_box(root: ET.Element) -> tuple[float, float, float, float]:
    """(left, top, right, bottom) of the plot area, from the axis line "M left top V bottom H
    right"."""
    for path in root.iter(f"{SVG}path"):
        match = re.fullmatch(rf"M({NUMBER}) ({NUMBER})V({NUMBER})H({NUMBER})", path.get("d", ""))
        if match and path.get("fill") == "none":
            left, top, bottom, right = (float(v) for v in match.groups())
            return left, top, right, bottom
    raise AssertionError("no axis line")


def _points(d: str) -> list[tuple[float, float]]:
    return [(float(a), float(b)) for a, b in re.findall(rf"[ML]({NUMBER}) ({NUMBER})", d)]


def _texts(root: ET.Element) -> list[str]:
    return ["".join(t.itertext()) for t in root.iter(f"{SVG}text")]


def _line_path(root: ET.Element, colour: str) -> str:
    found = [p.get("d", "") for p in root.iter(f"{SVG}path")
             if p.get("stroke") == colour and p.get("fill") == "none"]
    assert found, f"no line in {colour}"
    return found[0]


def test_a_known_series_maps_to_the_expected_positions() -> None:
    values = np.array([0.0, 5.0, 10.0])
    plot = Plot((Line(np.arange(3.0), values, "#123456", label="series"),),
                PeriodAxis(("a", "b", "c")), NumberAxis(limits=(0.0, 10.0)))
    root = _parse(plot)
    assert root.tag == f"{SVG}svg" and root.get("viewBox") == f"0 0 {WIDTH:g} {HEIGHT:g}"
    left, top, right, bottom = _plot_box(root)
    assert 0 < left < right <= WIDTH and 0 < top < bottom <= HEIGHT
    # A period axis runs from -0.7 to n - 0.3 (3.4 units here); the y axis from its limits.
    expected = [(left + (i + 0.7) / 3.4 * (right - left), bottom - v / 10.0 * (bottom - top))
                for i, v in enumerate(values)]
    drawn = _points(_line_path(root, "#123456"))
    assert np.allclose(drawn, expected, atol=0.06)  # coordinates are written to 0.1


def test_numeric_x_axis_and_ranges() -> None:
    plot = Plot((Ranges(np.array([2.0, 4.0]), np.array([1.0, 3.0]), np.array([5.0, 7.0]),
                        "#abcdef", cap=3.0),),
                NumberAxis(limits=(0.0, 10.0), label="x"), NumberAxis(limits=(0.0, 10.0)))
    root = _parse(plot)
    left, top, right, bottom = _plot_box(root)
    sx = lambda v: left + v / 10 * (right - left)  # noqa: E731
    sy = lambda v: bottom - v / 10 * (bottom - top)  # noqa: E731
    d = next(p.get("d", "") for p in root.iter(f"{SVG}path") if p.get("stroke") == "#abcdef")
    got = [(float(a), float(b), float(c))
           for a, b, c in re.findall(rf"M({NUMBER}) ({NUMBER})V({NUMBER})", d)]
    assert np.allclose(got, [(sx(2), sy(1), sy(5)), (sx(4), sy(3), sy(7))], atol=0.06)
    assert "0" in _texts(root) and "10" in _texts(root) and "x" in _texts(root)


@pytest.mark.parametrize(("low", "high", "ticks"), [
    (0.0, 10.0, [0, 2, 4, 6, 8, 10]),
    (0.1, 0.95, [0.2, 0.4, 0.6, 0.8]),
    (-3.2, 3.2, [-3, -2, -1, 0, 1, 2, 3]),
    (2800.0, 5600.0, [3000, 3500, 4000, 4500, 5000, 5500]),
])
def test_nice_ticks(low: float, high: float, ticks: list[float]) -> None:
    values, _ = nice_ticks(low, high, 6)
    assert np.allclose(values, ticks)


def test_tick_labels_are_readable() -> None:
    assert tick_text(4000.0, 500.0) == "4000"
    assert tick_text(0.25, 0.25) == "0.25"
    assert tick_text(0.5, 0.25) == "0.50"
    assert tick_text(-2.0, 1.0) == "\u22122"  # a minus sign
    assert tick_text(-1e-17, 0.5) == "0.0"  # never "-0"
    assert tick_text(0.9, 0.1, percent=True) == "90 %"
    assert tick_text(0.925, 0.025, percent=True) == "92.5 %"


def test_y_tick_labels_sit_at_their_ticks() -> None:
    plot = Plot((Line(np.arange(4.0), np.array([0.55, 0.7, 0.9, 0.98]), "#000001"),),
                PeriodAxis(("a", "b", "c", "d")), NumberAxis(percent=True, limits=(0.48, 1.02)))
    root = _parse(plot)
    _, top, _, bottom = _plot_box(root)
    labels = {"".join(t.itertext()): float(t.get("y", "nan")) for t in root.iter(f"{SVG}text")
              if t.get("text-anchor") == "end"}
    assert list(labels) == ["50 %", "60 %", "70 %", "80 %", "90 %", "100 %"]
    for text, y in labels.items():
        value = float(text.split()[0]) / 100
        tick = bottom - (value - 0.48) / 0.54 * (bottom - top)
        assert abs(y - tick) < 6  # the label's baseline sits a third of its size below


def test_period_labels_are_spaced_and_stay_on_the_canvas() -> None:
    labels = tuple(f"2025-{1 + i // 4:02d}-{1 + 7 * (i % 4):02d}" for i in range(60))
    plot = Plot((Line(np.arange(60.0), np.sin(np.arange(60.0)), "#000002"),),
                PeriodAxis(labels), NumberAxis())
    lay = layout(plot)
    shown = [text for _, text in lay.x_ticks]
    assert shown[0] == labels[0] and 4 <= len(shown) <= 8
    positions = [float(lay.x(v)) for v, _ in lay.x_ticks]
    half = text_width(labels[0], 11.8) / 2
    assert all(b - a > 2 * half for a, b in itertools.pairwise(positions))
    assert positions[-1] + half <= WIDTH and positions[0] - half >= 0
    root = _parse(plot)
    assert shown == [t for t in _texts(root) if t.startswith("2025-")]


def test_names_are_escaped() -> None:
    name = "<script>alert(1)</script> & $x$"
    plot = Plot(
        (Band(np.arange(2.0), np.zeros(2), np.ones(2), "#cccccc", label=name),
         Points(np.arange(2.0), np.full(2, 0.5), Marker("circle", 4, "#000000"), label="a & b")),
        PeriodAxis(("<b>", "$1 & 2$")), NumberAxis(label=name),
    )
    text = to_svg(plot, "esc")
    assert "<script" not in text and "<b>" not in text
    root = _parse(plot, "esc")
    assert {element.tag.removeprefix(SVG) for element in root.iter()} <= {
        "svg", "rect", "defs", "clipPath", "g", "path", "text"}
    texts = _texts(root)
    assert texts.count(name) == 2 and "a & b" in texts and "<b>" in texts and "$1 & 2$" in texts


def test_nan_breaks_lines_and_bands_and_drops_points() -> None:
    y = np.array([1.0, 2.0, np.nan, 4.0, 5.0])
    x = np.arange(5.0)
    plot = Plot(
        (Line(x, y, "#000003"), Band(x, y - 1, y + 1, "#000004"),
         Points(x, y, Marker("diamond", 5, "#000005")),
         Ranges(x, y - 1, y + 1, "#000006")),
        PeriodAxis(tuple("abcde")), NumberAxis(),
    )
    root = _parse(plot)
    paths = {p.get("stroke") or p.get("fill"): p.get("d", "") for p in root.iter(f"{SVG}path")}
    assert paths["#000003"].count("M") == 2  # two runs: a, b and d, e
    assert paths["#000004"].count("z") == 2
    assert paths["#000005"].count("z") == 4  # four diamonds
    assert paths["#000006"].count("V") == 4
    assert "nan" not in ET.tostring(root, encoding="unicode").lower()


@pytest.mark.parametrize("plot", [
    Plot((), PeriodAxis(()), NumberAxis()),
    Plot((Line(np.zeros(0), np.zeros(0), "#000007", label="nothing yet"),), PeriodAxis(()),
         NumberAxis()),
    Plot((Line(np.arange(3.0), np.full(3, np.nan), "#000008"), Rule(float("nan"), "#000009")),
         PeriodAxis(("a", "b", "c")), NumberAxis()),
    Plot((Points(np.array([3.0]), np.array([7.0]), Marker("cross", 9, "#00000a")),
          Span(7.0, 7.0, "#00000b")), NumberAxis(), NumberAxis()),
])
def test_empty_or_degenerate_data_still_draws(plot: Plot) -> None:
    root = _parse(plot)
    _plot_box(root)
    assert _texts(root)  # tick labels at least


def test_each_kind_states_the_same_marks_for_svg_and_png() -> None:
    periods = tuple(f"2025-01-{d:02d}" for d in range(1, 15))
    n = len(periods)
    base = np.linspace(10, 20, n)
    kinds = [
        ActualsData("a", periods, base + np.r_[np.zeros(n - 1), 9.0], base - 3, base + 3, base,
                    0.95, ("2025-01-15",), np.array([21.0]), np.array([18.0]), np.array([24.0])),
        CoefficientData("c", "drops & <picks>", periods, base, base - 1, base + 1, 0.9,
                        (15.0, 14.0, 16.0), start_span=("2024-12-01", "2024-12-31")),
        MonitoringData("m", periods, np.linspace(0, 3, n), np.full(n, 2.0), start_end="2024-12-31"),
        ScatterData("s", "orders $", "hours", base, base * 2, np.linspace(10, 20, 5),
                    np.linspace(20, 40, 5), np.linspace(15, 35, 5), np.linspace(25, 45, 5),
                    np.linspace(18, 38, 5), np.linspace(22, 42, 5), 0.95, 0.9, 2.0, 0,
                    np.array([21.0]), np.array([42.0]), np.array([37.0]), np.array([47.0])),
        HitRateData("h", periods, np.zeros(n, np.int64), np.zeros(n, np.int64), 0.9),  # no data
    ]
    for index, data in enumerate(kinds):
        chart = draw(data, key=f"kind{index}", svg=True, png=True)
        assert chart.svg is not None and chart.png is not None
        check_svg(chart.svg)
        image = Image.open(io.BytesIO(chart.png))
        assert image.size == (int(WIDTH), int(HEIGHT))
        labels = [m.label for m in plot_of(data).marks if m.label]
        texts = _texts(ET.fromstring(chart.svg))
        assert labels and all(label in texts for label in labels)
    coefficient = ET.fromstring(draw(kinds[1], key="c").svg or "")
    assert "drops & <picks>" in _texts(coefficient)


def test_png_is_drawn_from_the_same_layout() -> None:
    plot = Plot((Band(np.arange(3.0), np.zeros(3), np.ones(3), "#4f6d8f"),),
                PeriodAxis(("a", "b", "c")), NumberAxis())
    grey = np.asarray(Image.open(io.BytesIO(to_png(plot))).convert("RGB"), dtype=int)
    lay = layout(plot)
    # the band fills the plot area's middle in its colour (79, 109, 143)
    middle = grey[int((lay.top + HEIGHT - lay.bottom) / 2), int((lay.left + lay.x.end) / 2)]
    assert np.abs(middle - np.array([79, 109, 143])).max() < 4
