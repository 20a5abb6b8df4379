"""Charts: PNG bytes that Pillow opens and that are not blank, well-formed SVG safe to inline with
ids unique per chart, and text alternatives that state the chart's figures."""

from __future__ import annotations

import io
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from report_history import History, build_history, copy_history

from monitor.notify.charts import (
    ActualsData,
    CoefficientData,
    HitRateData,
    MonitoringData,
    ScatterData,
    check_svg,
    describe,
    draw,
)
from monitor.notify.series import (
    actuals_data,
    coefficient_data,
    hit_rate_data,
    load_model,
    monitoring_data,
    scatter_data,
)

SVG = "{http://www.w3.org/2000/svg}"


@pytest.fixture(scope="module")
def built_history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("history"))


@pytest.fixture
def history(built_history: History, tmp_path: Path) -> History:
    return copy_history(built_history, tmp_path / "workspace")


def _periods(n: int, start_month: int = 1) -> tuple[str, ...]:
    return tuple(f"2025-{start_month + i // 4:02d}-{1 + 7 * (i % 4):02d}" for i in range(n))


def _actuals() -> ActualsData:
    periods = _periods(13)
    point = np.full(13, 100.0)
    actual = point.copy()
    actual[[5, 6]] = [130.0, 128.0]  # both in 2025-02, above the upper bound 120
    return ActualsData("Actuals", periods, actual, point - 20, point + 20, point, 0.95,
                       ("2025-04-06",), np.array([101.0]), np.array([81.0]), np.array([121.0]))


def _assert_not_blank(png: bytes) -> Image.Image:
    image = Image.open(io.BytesIO(png))
    image.load()
    assert image.format == "PNG"
    assert image.width >= 600 and image.height >= 200
    grey = np.asarray(image.convert("L"), dtype=float)
    assert len(np.unique(grey)) > 10
    assert grey.std() > 5  # more than a few stray pixels on a white field
    return image


def test_actuals_chart_png_and_svg() -> None:
    chart = draw(_actuals(), key="t1", svg=True, png=True)
    assert chart.png is not None and chart.svg is not None
    _assert_not_blank(chart.png)
    assert not chart.svg.startswith("<?xml") and "<!DOCTYPE" not in chart.svg
    root = ET.fromstring(chart.svg)
    assert root.tag == f"{SVG}svg"
    ids = [element.get("id") for element in root.iter() if element.get("id")]
    assert ids and all(i.startswith("t1-") for i in ids)
    assert len(ids) == len(set(ids))
    # Every internal reference points at an id inside this chart.
    for element in root.iter():
        for name, value in element.attrib.items():
            if "url(#" in value:
                assert value.split("url(#", 1)[1].split(")", 1)[0] in ids
            if name.endswith("href"):
                assert value.startswith("#t1-") and value[1:] in ids
    assert root.find(f".//{SVG}style") is None  # no style sheet leaking into the page


def test_two_charts_share_no_ids() -> None:
    first = ET.fromstring(draw(_actuals(), key="a", svg=True).svg or "")
    second = ET.fromstring(draw(_actuals(), key="b", svg=True).svg or "")
    ids_first = {e.get("id") for e in first.iter() if e.get("id")}
    ids_second = {e.get("id") for e in second.iter() if e.get("id")}
    assert ids_first and ids_second and not ids_first & ids_second


def test_alt_text_states_the_figures() -> None:
    text = describe(_actuals())
    assert text.startswith("11 of 13 actuals inside their 95 % prediction intervals")
    assert "2 above (2025-02-08, 2025-02-15)" in text
    assert "for 2025-04-06: 101 (interval 81 to 121)" in text
    many = ActualsData("x", _periods(12, 6), np.array([0.0] * 12), np.full(12, 1.0),
                       np.full(12, 2.0), np.full(12, 1.5), 0.9)
    assert describe(many) == ("0 of 12 actuals inside their 90 % prediction intervals; misses: "
                              "12 below (4 in June 2025, 4 in July 2025 and 4 in August 2025).")
    hits = np.array([1] * 10 + [0, 1, 1], dtype=np.int64)
    rate = HitRateData("r", _periods(13), hits, np.ones(13, np.int64), 0.95, window=13)
    assert describe(rate).startswith(
        "Over the latest 13 scored periods 12 of 13 actuals fell inside (92 %; Clopper–Pearson "
        "interval 64 % to 100 %) against the nominal 95 %")
    # The periods monitoring started from are named by their dates.
    path = MonitoringData("m", _periods(5), np.array([0.5, 1.0, 2.5, 3.0, 3.5]),
                          np.full(5, 2.0), "2025-01-08", start_end="2024-12-25")
    assert describe(path) == ("The monitoring statistic crossed its boundary at 2025-01-15, 3 "
                              "periods after 2024-12-25; the new regime is estimated to start "
                              "at 2025-01-08.")
    quiet = MonitoringData("m", _periods(4), np.array([0.2, -0.5, 0.4, 1.0]), np.full(4, 2.0),
                           start_end="2024-12-25")
    assert describe(quiet) == ("Over 4 periods since 2024-12-25 the monitoring statistic stayed "
                               "inside its boundary (at most 50 % of it).")
    coefficient = CoefficientData("c", "drops", _periods(3), np.array([0.5, 0.8, 1.0]),
                                  np.array([0.4, 0.7, 0.9]), np.array([0.6, 0.9, 1.1]), 0.9,
                                  (0.5, 0.4, 0.6), start_span=("2024-10-02", "2024-12-25"))
    assert "against 0.5 (0.4 to 0.6) over 2024-10-02 to 2024-12-25, the periods monitoring " \
        "started from; 2 of" in describe(coefficient)
    assert describe(coefficient).endswith(
        "; 2 of the 3 refits since 2024-12-25 have an interval clear of that band, the first at "
        "2025-01-08.")
    later = CoefficientData("c", "drops", _periods(3), np.array([0.2, 0.5, 1.0]),
                            np.array([0.1, 0.4, 0.9]), np.array([0.3, 0.6, 1.1]), 0.9,
                            (0.5, 0.4, 0.6), after_baseline=1)
    assert describe(later).endswith(
        "; 1 of the 2 refits since then have an interval clear of that band, the first at "
        "2025-01-15.")


def test_every_kind_draws(history: History) -> None:
    """Chart data made from the database for each kind renders to non-blank PNG and valid SVG."""
    with history.open() as store:
        pick = load_model(store, history.config, "pick_hours")
        depots = load_model(store, history.config, "delivery_hours")
        made = [
            actuals_data(pick, None),
            hit_rate_data(depots, pooled=True),
            coefficient_data(store, depots, "South", "drops"),
            monitoring_data(store, depots, "South"),
            scatter_data(store, pick, None),
        ]
    assert all(data is not None for data in made)
    for index, data in enumerate(made):
        assert data is not None
        chart = draw(data, key=f"k{index}", svg=True, png=True)
        assert chart.png is not None and chart.svg is not None
        _assert_not_blank(chart.png)
        check_svg(chart.svg)
        assert chart.alt and chart.alt == describe(data)
    scatter = made[4]
    assert isinstance(scatter, ScatterData)
    assert scatter.mean_upper[0] - scatter.mean_lower[0] < scatter.upper[0] - scatter.lower[0]
    south = made[3]
    assert isinstance(south, MonitoringData)
    assert "crossed its boundary" in describe(south)  # the planted break of week 30


def test_user_text_is_escaped_and_math_is_off() -> None:
    data = ActualsData("t", ("<script>alert(1)</script>", "$x$ & co"), np.array([1.0, 2.0]),
                       np.array([0.0, 0.0]), np.array([3.0, 3.0]), np.array([1.5, 1.5]), 0.95)
    chart = draw(data, key="esc", svg=True)
    assert chart.svg is not None
    root = ET.fromstring(chart.svg)
    tags = {element.tag.removeprefix(SVG) for element in root.iter()}
    assert "script" not in tags
    texts = " ".join("".join(element.itertext()) for element in root.iter(f"{SVG}text"))
    assert "<script>alert(1)</script>" in texts and "$x$ & co" in texts


@pytest.mark.parametrize("bad", [
    '<svg xmlns="http://www.w3.org/2000/svg"><script>alert(1)</script></svg>',
    '<svg xmlns="http://www.w3.org/2000/svg"><g onload="alert(1)"/></svg>',
    '<svg xmlns="http://www.w3.org/2000/svg" xmlns:xlink="http://www.w3.org/1999/xlink">'
    '<use xlink:href="http://example.org/x.svg#a"/></svg>',
    '<svg xmlns="http://www.w3.org/2000/svg"><foreignObject/></svg>',
    "<svg><g></svg>",
])
def test_check_svg_refuses_what_could_run_or_fetch(bad: str) -> None:
    with pytest.raises((ValueError, ET.ParseError)):
        check_svg(bad)


def test_no_pyplot_and_no_figures_left() -> None:
    draw(_actuals(), key="p1", svg=True, png=True)
    assert "matplotlib.pyplot" not in sys.modules or not sys.modules[
        "matplotlib.pyplot"].get_fignums()
    import matplotlib

    assert matplotlib.get_backend().lower() == "agg"
    with pytest.raises(ValueError, match="letters, digits"):
        draw(_actuals(), key="bad key", svg=True)


def test_page_charts_do_not_load_matplotlib() -> None:
    """SVG for pages is written without matplotlib: a process that draws every kind as SVG never
    imports it (only the e-mail's PNG does)."""
    script = (
        "import sys, numpy as np\n"
        "from monitor.notify.charts import ActualsData, HitRateData, draw\n"
        "p = ('2025-01-05', '2025-01-12', '2025-01-19')\n"
        "draw(ActualsData('a', p, np.ones(3), np.zeros(3), np.full(3, 2.0), np.ones(3), 0.95),"
        " key='a')\n"
        "draw(HitRateData('h', p, np.ones(3, np.int64), np.ones(3, np.int64), 0.9), key='h')\n"
        "print('matplotlib' in sys.modules)\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                            check=True, cwd=Path(__file__).resolve().parents[2],
                            env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve()
                                                                 .parents[2])})
    assert result.stdout.strip() == "False"
