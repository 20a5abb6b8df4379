"""A series warming up says on its model page how many rows it has and how many the first fit
needs (a single-series model in its detail, a ``per:`` model in a note under its table)."""

from __future__ import annotations

from pathlib import Path

from monitor.cli import main

REPO = Path(__file__).resolve().parents[2]


def test_a_warming_series_says_how_many_rows_it_has_and_needs(tmp_path: Path) -> None:
    (tmp_path / "plumbline.yaml").write_text(
        "feeds:\n  depot:\n    inbox: feeds/depot/inbox\n    period: week_ending\n"
        "    cadence: 7d\n  plant:\n    inbox: feeds/plant/inbox\n    period: week_ending\n"
        "    cadence: 7d\nmodels:\n  hours:\n    feed: depot\n    response: pick_hours\n"
        "    predictors: [order_lines]\n    per: depot\n    min_rows: 12\n    window: 20\n"
        "    recent: 8\n  whole:\n    feed: plant\n    response: pick_hours\n"
        "    predictors: [order_lines]\n    min_rows: 40\n    window: 40\n",
        encoding="utf-8",
    )
    inbox = tmp_path / "feeds" / "depot" / "inbox"
    inbox.mkdir(parents=True)
    lines = (REPO / "config" / "example_pick_hours.csv").read_text(encoding="utf-8").splitlines()
    rows = ["week_ending,depot,order_lines,pick_hours"]
    for number, line in enumerate(lines[1:21]):
        week, order_lines, _, hours = line.split(",")
        rows.append(f"{week},north,{order_lines},{hours}")
        if number < 5:
            rows.append(f"{week},south,{order_lines},{hours}")
    (inbox / "history.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    (inbox / "history.csv.ready").touch()
    plant = tmp_path / "feeds" / "plant" / "inbox"
    plant.mkdir(parents=True)
    (plant / "history.csv").write_text("\n".join(lines[:26]) + "\n", encoding="utf-8")
    (plant / "history.csv.ready").touch()
    assert main(["pass", "-c", str(tmp_path / "plumbline.yaml"), "--as-of",
                 "2025-06-01T07:00"]) == 0
    per_page = (tmp_path / "reports" / "model-hours.html").read_text(encoding="utf-8")
    assert "Warming up (1 series with fewer than 12 rows with an actual" in per_page
    assert "south 5." in per_page
    single = (tmp_path / "reports" / "model-whole.html").read_text(encoding="utf-8")
    assert "Warming up: 25 rows with an actual so far; the first fit needs 40" in single
    assert "so 15 more." in single


def test_a_silent_feed_shows_on_its_models_pages_and_the_index(tmp_path: Path) -> None:
    """Never "no open findings" while the feed is silent: the feed's finding is on the model's
    page, which opens with it and its figure, and the index names it beside the model. The
    page also shows the coverage finding's window beside 13 and 52."""
    (tmp_path / "plumbline.yaml").write_text(
        "feeds:\n  plant:\n    inbox: feeds/plant/inbox\n    period: week_ending\n"
        "    cadence: 7d\nmodels:\n  whole:\n    feed: plant\n    response: pick_hours\n"
        "    predictors: [order_lines]\n    window: 20\n    recent: 8\n",
        encoding="utf-8",
    )
    inbox = tmp_path / "feeds" / "plant" / "inbox"
    inbox.mkdir(parents=True)
    lines = (REPO / "config" / "example_pick_hours.csv").read_text(encoding="utf-8").splitlines()
    (inbox / "history.csv").write_text("\n".join(lines[:26]) + "\n", encoding="utf-8")
    (inbox / "history.csv.ready").touch()
    config = str(tmp_path / "plumbline.yaml")
    assert main(["pass", "-c", config, "--as-of", "2025-06-23T07:00"]) == 0
    assert main(["pass", "-c", config, "--as-of", "2025-08-25T07:00"]) == 0  # 9 weeks silent
    page = (tmp_path / "reports" / "model-whole.html").read_text(encoding="utf-8")
    lede = page.split('class="lede">', 1)[1].split("</p>", 1)[0]
    assert lede.startswith("Most urgent: feed gone quiet of feed plant since 2025-06-22 (")
    assert "no open findings" not in page
    assert "Feed plant has delivered nothing newer than 2025-06-22" in page
    assert "over the latest 8 scored periods (the coverage finding&#39;s window)" in page
    index = (tmp_path / "reports" / "index.html").read_text(encoding="utf-8")
    assert "its feed plant has 1 open finding" in index
