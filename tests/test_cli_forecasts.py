"""``plumbline forecasts`` and the export folder on a small real workspace: two depots (``per:``),
weekly files with actuals and plan rows, passes at a business clock, every option of the
command, Parquet read back with pyarrow, and a pass whose export folder cannot be written.

Invented data (two straight-line series with noise), for the command's plumbing only.
"""

from __future__ import annotations

import csv
import io
import json
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from monitor.cli import main
from monitor.exports import column_names

WEEKS = 24
FIRST = date(2025, 1, 5)


def _config(root: Path, extra: str = "") -> Path:
    path = root / "plumbline.yaml"
    path.write_text(
        "timezone: Europe/Berlin\n"
        "feeds:\n  depots:\n    inbox: feeds/depots/inbox\n    period: week_ending\n"
        "    cadence: 7d\n"
        "models:\n  hours:\n    feed: depots\n    response: hours\n    predictors: [lines]\n"
        "    per: depot\n    window: 20\n    recent: 8\n" + extra,
        encoding="utf-8",
    )
    return path


def _week(n: int) -> date:
    return FIRST + timedelta(days=7 * n)


def _drop(root: Path, name: str, rows: list[tuple[date, str, float, float | None]]) -> None:
    inbox = root / "feeds" / "depots" / "inbox"
    inbox.mkdir(parents=True, exist_ok=True)
    lines = ["week_ending,depot,lines,hours"]
    lines += [f"{d},{depot},{x},{'' if y is None else y}" for d, depot, x, y in rows]
    (inbox / name).write_text("\n".join(lines) + "\n", encoding="utf-8")
    (inbox / f"{name}.ready").touch()


def _rows(weeks: range, rng: np.random.Generator, plan_ahead: int = 0) -> list:
    rows = []
    for n in weeks:
        for depot, slope in (("north", 0.1), ("south", 0.12)):
            x = float(rng.integers(3000, 6000))
            rows.append((_week(n), depot, x, round(20 + slope * x + rng.normal(0, 8), 1)))
    last = weeks[-1]
    for step in range(1, plan_ahead + 1):
        for depot in ("north", "south"):
            rows.append((_week(last + step), depot, float(rng.integers(3000, 6000)), None))
    return rows


def _clock(n: int) -> str:
    return f"{_week(n) + timedelta(days=1)}T07:00"


@pytest.fixture
def workspace(tmp_path: Path) -> Path:
    """Three passes: the history with two weeks of plan rows, then two weekly files."""
    rng = np.random.default_rng(7)
    config = _config(tmp_path)
    _drop(tmp_path, "history.csv", _rows(range(WEEKS), rng, plan_ahead=2))
    assert main(["pass", "-c", str(config), "--as-of", _clock(WEEKS - 1)]) == 0
    for n in (WEEKS, WEEKS + 1):
        _drop(tmp_path, f"week_{n}.csv", _rows(range(n, n + 1), rng, plan_ahead=2))
        assert main(["pass", "-c", str(config), "--as-of", _clock(n)]) == 0
    return tmp_path


def _listed(root: Path, capsys: pytest.CaptureFixture[str], *options: str) -> list[dict]:
    capsys.readouterr()
    assert main(["forecasts", "-c", str(root / "plumbline.yaml"), "--format", "json",
                 *options]) == 0
    return json.loads(capsys.readouterr().out)


def test_every_forecast_is_listed_with_its_outcome_once_scored(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rows = _listed(workspace, capsys)
    # pass 1: 2 plan weeks x 2 depots; passes 2 and 3: the same plus one new week each
    assert len(rows) == 12
    assert [r["pass_id"] for r in rows] == sorted(r["pass_id"] for r in rows)
    assert list(rows[0]) == column_names(scored=True)
    scored = [r for r in rows if r["outcome"] is not None]
    # week WEEKS was forecast by passes 1 and 2... only forecasts whose actual arrived are scored
    assert {r["target_period"] for r in scored} == {str(_week(WEEKS)), str(_week(WEEKS + 1))}
    for r in rows:
        assert r["lower"] < r["mean_lower"] < r["point"] < r["mean_upper"] < r["upper"]
        assert r["level"] == 0.95 and r["series"] in {"north", "south"}
        if r["outcome"] is not None:
            inside = r["lower"] <= r["actual"] <= r["upper"]
            assert (r["outcome"] == "hit") == inside
    leads = {(r["pass_id"], r["target_period"]): r["lead"] for r in rows}
    assert leads[(1, str(_week(WEEKS)))] == 1 and leads[(1, str(_week(WEEKS + 1)))] == 2


def test_filters(workspace: Path, capsys: pytest.CaptureFixture[str]) -> None:
    every = _listed(workspace, capsys)
    north = _listed(workspace, capsys, "--series", "north")
    assert north == [r for r in every if r["series"] == "north"]
    opened = _listed(workspace, capsys, "--open")
    assert opened == [r for r in every if r["outcome"] is None] and opened
    window = _listed(workspace, capsys, "--from", str(_week(WEEKS + 1)), "--to",
                     str(_week(WEEKS + 2)))
    assert window == [r for r in every
                      if str(_week(WEEKS + 1)) <= r["target_period"] <= str(_week(WEEKS + 2))]
    assert window and len(window) < len(every)
    assert _listed(workspace, capsys, "--pass", "2") == [r for r in every if r["pass_id"] == 2]
    assert _listed(workspace, capsys, "--model", "hours") == every


@pytest.mark.parametrize(
    ("options", "message"),
    [
        (["--model", "hour"], "did you mean 'hours'"),
        (["--from", "07/08/2025"], "ISO 8601 date"),
        (["--format", "parquet"], "give --out FILE"),
    ],
)
def test_usage_errors_exit_2(
    workspace: Path, capsys: pytest.CaptureFixture[str], options: list[str], message: str
) -> None:
    capsys.readouterr()
    assert main(["forecasts", "-c", str(workspace / "plumbline.yaml"), *options]) == 2
    assert message in capsys.readouterr().err


def test_csv_table_and_parquet_carry_the_same_forecasts(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    every = _listed(workspace, capsys)
    config = str(workspace / "plumbline.yaml")
    assert main(["forecasts", "-c", config, "--format", "csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert [float(r["point"]) for r in rows] == [r["point"] for r in every]  # round trip exact
    assert [r["actual"] for r in rows] == ["" if r["actual"] is None else repr(r["actual"])
                                           for r in every]
    out = workspace / "out" / "all.parquet"
    assert main(["forecasts", "-c", config, "--format", "parquet", "--out", str(out)]) == 0
    table = pq.read_table(out).to_pylist()
    assert [r["forecast_id"] for r in table] == [r["forecast_id"] for r in every]
    assert [r["upper"] for r in table] == [r["upper"] for r in every]
    assert [r["extrapolation"] for r in table] == [r["extrapolation"] for r in every]
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".")]
    capsys.readouterr()
    assert main(["forecasts", "-c", config]) == 0
    table_text = capsys.readouterr().out
    assert table_text.count("\n") == len(every) + 3
    assert f"{len(every)} forecast(s)" in table_text


def test_export_files_one_per_pass_and_the_pass_json_names_them(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder = workspace / "exports" / "hours"
    assert sorted(p.name for p in folder.iterdir()) == [
        "pass-000001.csv", "pass-000002.csv", "pass-000003.csv"]
    every = _listed(workspace, capsys)
    for pass_id in (1, 2, 3):
        with (folder / f"pass-{pass_id:06d}.csv").open(encoding="utf-8", newline="") as handle:
            exported = list(csv.DictReader(handle))
        assert [int(r["forecast_id"]) for r in exported] == [
            r["forecast_id"] for r in every if r["pass_id"] == pass_id]
        assert list(exported[0]) == column_names(scored=False)
    rng = np.random.default_rng(8)
    _drop(workspace, "week_next.csv", _rows(range(WEEKS + 2, WEEKS + 3), rng, plan_ahead=1))
    capsys.readouterr()
    assert main(["pass", "-c", str(workspace / "plumbline.yaml"), "--as-of",
                 _clock(WEEKS + 2), "--format", "json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    (entry,) = summary["exports"]
    assert entry == {"model": "hours", "pass_id": 4, "forecasts": 2,
                     "path": str(folder / "pass-000004.csv")}


def test_parquet_export_format(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = _config(tmp_path, "export:\n  folder: out/forecasts\n  format: parquet\n")
    _drop(tmp_path, "history.csv", _rows(range(WEEKS), np.random.default_rng(3), plan_ahead=1))
    assert main(["pass", "-c", str(config), "--as-of", _clock(WEEKS - 1)]) == 0
    (path,) = (tmp_path / "out" / "forecasts" / "hours").iterdir()
    assert path.name == "pass-000001.parquet"
    table = pq.read_table(path)
    assert table.column_names == column_names(scored=False)
    assert table.num_rows == 2
    # Parquet stores seconds as milliseconds; the moment is the pass's clock, in UTC
    assert table.schema.field("issued_at").type.tz == "UTC"
    issued = table.column("issued_at")[0].as_py()
    assert issued.isoformat() == "2025-06-16T05:00:00+00:00"


def test_an_export_folder_that_cannot_be_written_is_reported_not_fatal(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = _config(tmp_path)
    (tmp_path / "exports").write_text("a file where the folder should be", encoding="utf-8")
    _drop(tmp_path, "history.csv", _rows(range(WEEKS), np.random.default_rng(3), plan_ahead=1))
    capsys.readouterr()
    assert main(["pass", "-c", str(config), "--as-of", _clock(WEEKS - 1),
                 "--format", "json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["forecasts_issued"] == 2 and summary["exports"] == []
    assert any(line.startswith("export: ") and "plumbline forecasts" in line
               for line in summary["skipped"])
    assert len(_listed(tmp_path, capsys)) == 2


def test_the_same_forecast_reads_the_same_on_the_page_and_the_command_line(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """One precision rule per quantity (monitor.figures): a forecast and its bounds show the
    same digits in `plumbline forecasts`, `plumbline fit`-style tables and the model page."""
    from monitor.figures import number

    opened = _listed(workspace, capsys, "--open")
    page = (workspace / "reports" / "model-hours.html").read_text(encoding="utf-8")
    assert main(["forecasts", "-c", str(workspace / "plumbline.yaml"), "--open"]) == 0
    table = capsys.readouterr().out
    latest: dict[tuple, dict] = {}  # the page shows the latest issue per target period
    for row in opened:
        key = (row["series"], row["target_period"])
        if key not in latest or row["forecast_id"] > latest[key]["forecast_id"]:
            latest[key] = row
    assert latest
    for row in latest.values():
        for key in ("point", "lower", "upper"):
            shown = number(row[key])
            assert shown in table, (key, shown)
            assert shown in page, (key, shown)
