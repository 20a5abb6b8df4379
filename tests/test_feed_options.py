"""What a pass says about files it did not take, and CSV files from other locales.

The contract of the feed options ``delimiter`` and ``decimal`` (whichever parser reads the
rows): a ``;``-separated, decimal-comma file read through them gives the same rows as the same
data written with ``,`` and ``.``; a feed left at the defaults refuses such a file with a reason
that names the separator and the keys to set, and a refused file is never counted as taken.
Files left in an inbox (settling, temporary names, a marker without its file) are listed by
``pass`` and ``check`` with what to do.

Invented data: a straight line with noise, for the plumbing only.
"""

from __future__ import annotations

import json
import sqlite3
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest

from monitor.cli import main
from monitor.config import load_config
from monitor.errors import ConfigError

FIRST = date(2025, 1, 5)
WEEKS = 20


def _config(root: Path, options: str = "", settle: str = "30s") -> Path:
    path = root / "plumbline.yaml"
    path.write_text(
        "timezone: Europe/Berlin\n"
        "feeds:\n  depot:\n    inbox: feeds/depot/inbox\n    period: week_ending\n"
        f"    cadence: 7d\n    settle: {settle}\n{options}"
        "models:\n  hours:\n    feed: depot\n    response: hours\n    predictors: [lines]\n"
        "    window: 16\n    recent: 8\n",
        encoding="utf-8",
    )
    return path


def _table(seed: int = 5) -> list[tuple[str, float, float | None]]:
    rng = np.random.default_rng(seed)
    rows: list[tuple[str, float, float | None]] = []
    for n in range(WEEKS):
        lines = round(float(rng.uniform(3000, 6000)), 1)
        rows.append((str(FIRST + timedelta(days=7 * n)), lines,
                     round(20 + 0.1 * lines + float(rng.normal(0, 8)), 2)))
    rows.append((str(FIRST + timedelta(days=7 * WEEKS)), 4500.5, None))
    return rows


def _text(rows: list[tuple[str, float, float | None]], delimiter: str, decimal: str) -> str:
    def cell(value: float | None) -> str:
        return "" if value is None else repr(value).replace(".", decimal)

    out = [delimiter.join(("week_ending", "lines", "hours"))]
    out += [delimiter.join((week, cell(x), cell(y))) for week, x, y in rows]
    return "\r\n".join(out) + "\r\n"


def _drop(root: Path, name: str, text: str) -> Path:
    inbox = root / "feeds" / "depot" / "inbox"
    inbox.mkdir(parents=True, exist_ok=True)
    (inbox / name).write_text(text, encoding="utf-8", newline="")
    (inbox / f"{name}.ready").touch()
    return inbox / name


def _pass(root: Path, capsys: pytest.CaptureFixture[str], clock: str) -> dict:
    capsys.readouterr()
    assert main(["pass", "-c", str(root / "plumbline.yaml"), "--as-of", clock,
                 "--format", "json"]) == 0
    return json.loads(capsys.readouterr().out)


def _observations(root: Path) -> list[tuple]:
    database = load_config(root / "plumbline.yaml").database
    with sqlite3.connect(database) as conn:
        return conn.execute("SELECT period, vals FROM observations ORDER BY period").fetchall()


CLOCK = "2025-05-26T07:00"


@pytest.mark.parametrize(
    ("delimiter", "decimal", "yaml"),
    [
        (";", ",", '    delimiter: ";"\n    decimal: ","\n'),
        (";", ".", '    delimiter: ";"\n'),
        ("\t", ",", '    delimiter: "\\t"\n    decimal: ","\n'),
    ],
    ids=["semicolon-comma", "semicolon-point", "tab-comma"],
)
def test_feed_options_read_the_same_rows_as_the_standard_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], delimiter: str, decimal: str, yaml: str
) -> None:
    rows = _table()
    standard, local = tmp_path / "standard", tmp_path / "local"
    standard.mkdir()
    local.mkdir()
    _config(standard)
    _config(local, yaml)
    _drop(standard, "history.csv", _text(rows, ",", "."))
    _drop(local, "history.csv", _text(rows, delimiter, decimal))
    first, second = _pass(standard, capsys, CLOCK), _pass(local, capsys, CLOCK)
    assert second["files_taken"] == 1 and second["files"][0]["rows_rejected"] == 0
    assert first["forecasts_issued"] == second["forecasts_issued"] == 1
    assert _observations(standard) == _observations(local)
    capsys.readouterr()
    for root in (standard, local):
        assert main(["forecasts", "-c", str(root / "plumbline.yaml"), "--format", "csv"]) == 0
    standard_csv, local_csv = capsys.readouterr().out.split("model,", 2)[1:]
    assert standard_csv == local_csv


def test_a_semicolon_file_on_a_default_feed_is_refused_naming_the_separator(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _config(tmp_path)
    _drop(tmp_path, "history.csv", _text(_table(), ";", ","))
    summary = _pass(tmp_path, capsys, CLOCK)
    assert summary["files_taken"] == 0 and summary["files_refused"] == 1
    (entry,) = summary["files"]
    assert entry["taken"] is False and entry["outcome"] == "rejected"
    for text in (entry["reason"],
                 (tmp_path / "feeds/depot/rejected/history.csv.errors.txt").read_text("utf-8")):
        assert "separated by ';', not ','" in text
        assert "set delimiter: ';' and decimal: ','" in text and "feed depot" in text
    capsys.readouterr()
    assert main(["status", "-c", str(tmp_path / "plumbline.yaml"), "--format", "json"]) == 0
    (finding,) = json.loads(capsys.readouterr().out)["findings"]
    assert finding["kind"] == "rejected_input" and "delimiter: ';'" in finding["message"]
    # the sentence counts nothing as taken
    _drop(tmp_path, "again.csv", _text(_table(6), ";", "."))
    capsys.readouterr()
    assert main(["pass", "-c", str(tmp_path / "plumbline.yaml"), "--as-of",
                 "2025-05-26T08:00"]) == 0
    printed = capsys.readouterr().out
    assert "0 file(s) taken, 1 refused" in printed
    assert "refused depot/again.csv:" in printed and "set delimiter: ';' on feed" in printed
    assert "decimal: ','" not in printed.split("refused depot/again.csv:")[1].split("\n")[0]


def test_decimal_commas_with_the_point_setting_are_rejected_rows_with_a_hint(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _config(tmp_path, '    delimiter: ";"\n')
    _drop(tmp_path, "history.csv", _text(_table(), ";", ","))
    summary = _pass(tmp_path, capsys, CLOCK)
    (entry,) = summary["files"]
    assert entry["rows_rejected"] == WEEKS + 1  # every row has a decimal comma
    assert "set decimal: ','" in entry["reason"]
    capsys.readouterr()
    assert main(["status", "-c", str(tmp_path / "plumbline.yaml"), "--format", "json"]) == 0
    (finding,) = json.loads(capsys.readouterr().out)["findings"]
    assert "set decimal: ','" in finding["message"]


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ('    decimal: ","\n', "cannot also be separated by ','"),
        ('    format: parquet\n    delimiter: ";"\n', "delimiter applies to CSV feeds only"),
        ('    delimiter: "|"\n', "delimiter"),
    ],
)
def test_option_combinations_that_cannot_work_are_config_errors(
    tmp_path: Path, options: str, message: str
) -> None:
    with pytest.raises(ConfigError, match=message):
        load_config(_config(tmp_path, options))


def test_pass_and_check_say_why_files_were_not_taken(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = _config(tmp_path, settle="1h")
    _drop(tmp_path, "history.csv", _text(_table(), ",", "."))
    inbox = tmp_path / "feeds" / "depot" / "inbox"
    settling = inbox / "late.csv"
    settling.write_text(_text(_table(7), ",", "."), encoding="utf-8")  # just written
    (inbox / ".upload.csv.part").write_text("half a file", encoding="utf-8")
    (inbox / "never.csv.ready").touch()
    (inbox / "folder").mkdir()
    summary = _pass(tmp_path, capsys, CLOCK)
    assert summary["files_taken"] == 1
    notes = {n["name"]: n for n in summary["not_taken"]}
    assert set(notes) == {"late.csv", ".upload.csv.part", "never.csv.ready", "folder"}
    late = notes["late.csv"]
    assert late["state"] == "settling"
    assert "once unchanged for 60 min" in late["reason"]
    assert "late.csv.ready" in late["action"] and "in about 60 min" in late["action"]
    assert notes[".upload.csv.part"]["state"] == "ignored"
    assert "rename it" in notes[".upload.csv.part"]["action"]
    assert notes["never.csv.ready"]["state"] == "lone_marker"
    assert "never.csv is taken when it arrives" in notes["never.csv.ready"]["action"]
    # the same at the same clock: nothing to do, and still said why
    capsys.readouterr()
    assert main(["pass", "-c", str(config), "--as-of", CLOCK]) == 0
    printed = capsys.readouterr().out
    assert printed.startswith("Nothing to do")
    assert "  not taken: depot/late.csv: not complete yet" in printed
    assert "  not taken: depot/never.csv.ready: a marker with no file never.csv" in printed
    capsys.readouterr()
    assert main(["check", "-c", str(config)]) == 0
    checked = capsys.readouterr().out
    assert "  not taken: late.csv: not complete yet" in checked
    assert "  not taken: .upload.csv.part: never read as data" in checked


def test_check_names_the_separator_of_a_semicolon_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = _config(tmp_path)
    _drop(tmp_path, "history.csv", _text(_table(), ";", ","))
    capsys.readouterr()
    main(["check", "-c", str(config)])
    out = capsys.readouterr().out
    assert "lacks column(s)" in out and "separated by ';', not ','" in out
    _config(tmp_path, '    delimiter: ";"\n    decimal: ","\n')
    capsys.readouterr()
    assert main(["check", "-c", str(config)]) == 0
    assert "its header has every column needed" in capsys.readouterr().out
