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
