"""``plumbline check`` and ``plumbline schema``: real folders and files in ``tmp_path``."""

from __future__ import annotations

import argparse
import json
import os
import re
import time
from datetime import date
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from monitor import cli
from monitor.commands import check, schema
from monitor.config import load_config, reference_markdown

REPO = Path(__file__).resolve().parent.parent
EXAMPLES = sorted((REPO / "config").glob("*.yaml"))

CONFIG = """\
timezone: Europe/Berlin
feeds:
  depot_weekly:
    inbox: feeds/depot/inbox
    period: week_ending
    cadence: 7d
    settle: 60s
  region_yearly:
    inbox: feeds/region/inbox
    format: parquet
    period: year
    period_type: integer
models:
  pick_hours:
    feed: depot_weekly
    response: pick_hours
    predictors: [order_lines]
    per: depot
  parcels:
    feed: region_yearly
    response: parcels
    predictors: [households]
"""


def invoke(argv: list[str]) -> int:
    """Run one of this file's commands the way ``monitor.cli.main`` does, on its own parser."""
    parser = argparse.ArgumentParser(prog="plumbline")
    subparsers = parser.add_subparsers()
    check.register(subparsers)
    schema.register(subparsers)
    args = parser.parse_args(argv)
    return int(args.handler(args))


def workspace(root: Path, text: str = CONFIG) -> Path:
    (root / "plumbline.yaml").write_text(text, encoding="utf-8")
    return root / "plumbline.yaml"


def drop(folder: Path, name: str, content: bytes, age_seconds: float) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_bytes(content)
    stamp = time.time() - age_seconds
    os.utime(path, (stamp, stamp))
    return path


def snapshot(root: Path) -> dict[str, tuple[int, int]]:
    """Every file and folder under ``root`` with its modification time and size."""
    found = {}
    for folder, dirs, files in os.walk(root):
        for name in dirs + files:
            path = Path(folder, name)
            info = path.stat()
            found[str(path.relative_to(root))] = (info.st_mtime_ns, info.st_size)
    return found


def test_both_commands_are_registered() -> None:
    assert "check" in cli.COMMAND_MODULES and "schema" in cli.COMMAND_MODULES


def test_through_the_real_command_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = workspace(tmp_path)
    assert cli.main(["check", "--config", str(config)]) == 0
    assert "config valid" in capsys.readouterr().out
    config.write_text(CONFIG.replace("period_type: integer", "period_type: year"), "utf-8")
    assert cli.main(["check", "-c", str(config)]) == 2
    assert "feeds.region_yearly.period_type: 'year' is not one of date, integer" in (
        capsys.readouterr().err
    )
    assert cli.main(["schema"]) == 0
    assert json.loads(capsys.readouterr().out)["title"] == "Plumbline configuration"


# ---------------------------------------------------------------------------------------------
# check


def test_check_reports_each_inbox(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = workspace(tmp_path)
    inbox = tmp_path / "feeds" / "depot" / "inbox"
    drop(
        inbox, "week_01.csv", b"week_ending,depot,order_lines,pick_hours\n2024-01-07,n,1,2\n", 7200
    )
    drop(inbox, "week_02.csv", b"week_ending,depot,order_lines,pick_hours\n", 3600)
    drop(inbox, "week_03.csv", b"week_ending,depot,order_lines,pick_hours\n", 0)  # settling
    drop(inbox, "week_04.csv.part", b"half", 0)
    drop(inbox, ".week_05.csv", b"hidden", 7200)
    drop(inbox, "week_06.tmp", b"temporary", 7200)
    assert invoke(["check", "-c", str(config)]) == 0
    out = capsys.readouterr().out
    assert f"{config}: valid; 2 feeds, 2 models, timezone Europe/Berlin" in out
    assert "database: " in out and "(not created yet; the first pass makes it)" in out
    assert f"inbox {inbox}: 3 data files waiting (1 not complete yet)" in out
    assert "newest complete file week_02.csv: its header has every column needed" in out
    # The parquet feed's inbox was never made: a warning, and the exit status stays 0.
    assert "warning: feed region_yearly: the inbox does not exist" in out
    assert out.rstrip().endswith("config valid; 1 warning")


def test_newest_complete_file_by_marker_or_settling(tmp_path: Path) -> None:
    config = load_config(workspace(tmp_path))
    feed = config.feeds["depot_weekly"]
    header = b"week_ending,depot,order_lines,pick_hours\n"
    drop(feed.inbox, "a.csv", header, 7200)
    drop(feed.inbox, "b.csv", header, 600)
    # c.csv is being written now: fresh, and not renamed into place (setting an old mtime
    # would make its change time later than its write, which ingest reads as a rename)
    (feed.inbox / "c.csv").write_bytes(header)
    needed = {"week_ending", "depot", "order_lines", "pick_hours"}
    report = check.inspect_inbox(feed, needed, now=time.time())
    assert [p.name for p in report.waiting] == ["a.csv", "b.csv", "c.csv"]
    assert [p.name for p in report.complete] == ["a.csv", "b.csv"]
    assert report.newest is not None and report.newest.name == "b.csv"
    drop(feed.inbox, "c.csv.ready", b"", 1)  # a marker makes it complete at once
    report = check.inspect_inbox(feed, needed, now=time.time())
    assert report.newest is not None and report.newest.name == "c.csv"
    assert report.missing == []
    assert report.header == ("week_ending", "depot", "order_lines", "pick_hours")


def test_header_lacking_a_column_gets_a_suggestion(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = workspace(tmp_path)
    inbox = tmp_path / "feeds" / "depot" / "inbox"
    drop(inbox, "week_01.csv", "\ufeffweek_ending,depot,order_line,pick_hours\n".encode(), 7200)
    assert invoke(["check", "-c", str(config)]) == 0
    out = capsys.readouterr().out
    assert (
        "warning: feed depot_weekly: week_01.csv lacks column(s) the config needs: "
        "'order_lines' (did you mean 'order_line'?)"
    ) in out


def test_unreadable_headers_are_warnings(tmp_path: Path) -> None:
    config = load_config(workspace(tmp_path))
    feed = config.feeds["depot_weekly"]
    drop(feed.inbox, "empty.csv", b"", 7200)
    report = check.inspect_inbox(feed, {"week_ending"}, now=time.time())
    assert report.header_error == "the file is empty (no header line)"
    drop(feed.inbox, "latin1.csv", b"week_ending,d\xe9p\xf4t\n", 60)
    report = check.inspect_inbox(feed, {"week_ending"}, now=time.time())
    assert report.newest is not None and report.newest.name == "latin1.csv"
    assert report.header_error is not None and report.header_error.startswith("not UTF-8")


def test_parquet_header_is_read_from_the_schema(tmp_path: Path) -> None:
    config = load_config(workspace(tmp_path))
    feed = config.feeds["region_yearly"]
    feed.inbox.mkdir(parents=True)
    table = pa.table({"year": [2020, 2021], "household": [1.0, 2.0], "parcels": [3.0, 4.0]})
    pq.write_table(table, feed.inbox / "years.parquet")
    stamp = time.time() - 3600
    os.utime(feed.inbox / "years.parquet", (stamp, stamp))
    report = check.inspect_inbox(feed, {"year", "households", "parcels"}, now=time.time())
    assert report.header == ("year", "household", "parcels")
    assert report.missing == ["households"]
    drop(feed.inbox, "junk.parquet", b"not parquet at all", 60)
    report = check.inspect_inbox(feed, {"year"}, now=time.time())
    assert report.header_error is not None and "not a readable Parquet file" in report.header_error


def test_check_writes_nothing(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = workspace(tmp_path, CONFIG.replace("timezone", "database: state/db.sqlite\ntimezone"))
    inbox = tmp_path / "feeds" / "depot" / "inbox"
    drop(inbox, "week_01.csv", b"week_ending,depot,order_lines,pick_hours\n", 7200)
    drop(inbox, "week_02.csv", b"week_ending,depot,order_lines,pick_hours\n", 0)
    drop(inbox, "week_02.csv.ready", b"", 0)
    before = snapshot(tmp_path)
    time.sleep(0.01)  # a write after this point would show as a newer mtime
    assert invoke(["check", "-c", str(config)]) == 0
    assert snapshot(tmp_path) == before
    assert not (tmp_path / "state").exists()  # no database, not even its folder
    assert not (tmp_path / "feeds" / "depot" / "archive").exists()
    assert not (tmp_path / "reports").exists()
    assert "config valid" in capsys.readouterr().out


def test_invalid_config_exits_2_with_each_problem(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    text = CONFIG.replace("predictors: [order_lines]", "predictors: [order_lines]\n    levl: 0.9")
    text = text.replace("cadence: 7d", "cadence: weekly")
    config = workspace(tmp_path, text)
    assert invoke(["check", "-c", str(config)]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.splitlines()
    assert lines[0].startswith(f"{config} line 6: feeds.depot_weekly.cadence: 'weekly' is not")
    assert lines[1] == (
        f"{config} line 18: models.pick_hours.levl: unknown key 'levl' (did you mean 'level'?)"
    )
    assert lines[2] == "plumbline: the config is invalid (2 problems); nothing else was checked"


def test_default_config_is_plumbline_yaml_in_the_working_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)
    assert invoke(["check"]) == 2
    assert "plumbline.yaml: no such file" in capsys.readouterr().err
    workspace(tmp_path)
    assert invoke(["check"]) == 0
    assert "plumbline.yaml: valid" in capsys.readouterr().out


def test_check_warns_about_unset_secrets_and_notes_night_schedules(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.delenv("PLUMBLINE_TEST_UNSET_PASSWORD", raising=False)
    monkeypatch.setenv("PLUMBLINE_TEST_USER", "someone")
    text = CONFIG + (
        'schedule:\n  digest: "30 2 * * sun"\n'
        "notify:\n  email:\n    to: [plan@example.org]\n    sender: pl@example.org\n"
        "    username_env: PLUMBLINE_TEST_USER\n    password_env: PLUMBLINE_TEST_UNSET_PASSWORD\n"
    )
    assert invoke(["check", "-c", str(workspace(tmp_path, text))]) == 0
    out = capsys.readouterr().out
    warnings = [line for line in out.splitlines() if "warning:" in line]
    assert any(
        "notify.email.password_env: the environment variable PLUMBLINE_TEST_UNSET_PASSWORD "
        "is not set" in line
        for line in warnings
    )
    assert not any("username_env" in line for line in warnings)  # that one is set
    assert "someone" not in out  # a variable's value is never printed
    # Issue 11: a login over security none (the default) is a warning too, since Plumbline
    # never sends a password in plain text and every send would fail.
    assert any("security is none but a login is configured" in line for line in warnings)
    assert len(warnings) == 4  # the two above and the two inboxes not made in this test
    # Berlin changes its clocks, so a fixed time in 01:00-03:00 gets a note (not a warning).
    assert "  note: schedule.digest falls in the 02:00 hour, where the clocks of Europe/Berlin" in (
        out
    )

    # UTC has no daylight-saving changes, so the same schedule needs no note there.
    utc = text.replace("timezone: Europe/Berlin", "timezone: UTC")
    assert invoke(["check", "-c", str(workspace(tmp_path, utc))]) == 0
    assert "note:" not in capsys.readouterr().out


# ---------------------------------------------------------------------------------------------
# schema


def _check_against(
    schema_doc: dict[str, Any], node: dict[str, Any], value: Any, where: str
) -> None:
    """A small JSON Schema check (the keywords the config schema uses), raising AssertionError."""
    if "$ref" in node:
        name = node["$ref"].removeprefix("#/$defs/")
        _check_against(schema_doc, schema_doc["$defs"][name], value, where)
        return
    if "anyOf" in node:
        failures = []
        for option in node["anyOf"]:
            try:
                _check_against(schema_doc, option, value, where)
                return
            except AssertionError as exc:
                failures.append(str(exc))
        raise AssertionError(f"{where}: no option fits: {failures}")
    if "const" in node:
        assert value == node["const"], where
    if "enum" in node:
        assert value in node["enum"], f"{where}: {value!r} not in {node['enum']}"
    kind = node.get("type")
    python_types: dict[str, Any] = {
        "object": dict, "array": list, "string": str, "boolean": bool, "null": type(None),
        "integer": int, "number": (int, float),
    }  # fmt: skip
    if kind is not None:
        assert isinstance(value, python_types[kind]), f"{where}: {value!r} is not {kind}"
        if kind in ("integer", "number"):
            assert not isinstance(value, bool), where
    if isinstance(value, str) and "pattern" in node:
        assert re.search(node["pattern"], value), f"{where}: {value!r} !~ {node['pattern']}"
    if isinstance(value, int | float) and not isinstance(value, bool):
        for key, holds in (
            ("minimum", lambda bound: value >= bound),
            ("maximum", lambda bound: value <= bound),
            ("exclusiveMinimum", lambda bound: value > bound),
            ("exclusiveMaximum", lambda bound: value < bound),
        ):
            if key in node:
                assert holds(node[key]), f"{where}: {value} fails {key} {node[key]}"
    if isinstance(value, dict):
        properties = node.get("properties", {})
        for key in node.get("required", []):
            assert key in value, f"{where}: missing {key}"
        for key, item in value.items():
            if key in properties:
                _check_against(schema_doc, properties[key], item, f"{where}.{key}")
            elif isinstance(node.get("additionalProperties"), dict):
                _check_against(schema_doc, node["additionalProperties"], item, f"{where}.{key}")
            else:
                assert node.get("additionalProperties", True) is not False, f"{where}: key {key}"
    if isinstance(value, list) and "items" in node:
        for index, item in enumerate(value):
            _check_against(schema_doc, node["items"], item, f"{where}[{index}]")


def _as_json_values(value: Any) -> Any:
    """YAML's dates as the ISO strings a JSON document would hold."""
    if isinstance(value, dict):
        return {key: _as_json_values(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_as_json_values(item) for item in value]
    return value.isoformat() if isinstance(value, date) else value


def _printed_schema(capsys: pytest.CaptureFixture[str]) -> dict[str, Any]:
    assert invoke(["schema"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert isinstance(document, dict)
    return document


def test_schema_is_json_with_the_files_keys(capsys: pytest.CaptureFixture[str]) -> None:
    document = _printed_schema(capsys)
    assert document["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert document["type"] == "object" and document["additionalProperties"] is False
    assert set(document["properties"]) == {
        "database", "timezone", "feeds", "models", "schedule", "notify", "export", "compute"
    }  # fmt: skip
    assert set(document["required"]) == {"feeds", "models"}
    feed = document["$defs"]["Feed"]
    assert feed["properties"]["format"]["enum"] == ["csv", "parquet"]
    assert feed["properties"]["settle"]["default"] == "30s"
    assert "description" in feed["properties"]["cadence"]
    model = document["$defs"]["Model"]["properties"]
    assert model["level"]["default"] == 0.95 and model["level"]["exclusiveMaximum"] == 1


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda path: path.name)
def test_example_configs_fit_the_schema(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    document = _printed_schema(capsys)
    data = _as_json_values(yaml.safe_load(path.read_text(encoding="utf-8")))
    _check_against(document, document, data, path.name)


def test_the_schema_check_can_fail(capsys: pytest.CaptureFixture[str]) -> None:
    document = _printed_schema(capsys)
    data = _as_json_values(yaml.safe_load((REPO / "config" / "minimal.yaml").read_text()))
    data["models"]["pick_hours"]["windw"] = 10
    with pytest.raises(AssertionError, match="windw"):
        _check_against(document, document, data, "minimal.yaml")
    data["models"]["pick_hours"].pop("windw")
    data["feeds"]["warehouse"]["format"] = "xlsx"
    with pytest.raises(AssertionError, match="xlsx"):
        _check_against(document, document, data, "minimal.yaml")


def test_schema_markdown_is_the_reference(capsys: pytest.CaptureFixture[str]) -> None:
    assert invoke(["schema", "--format", "markdown"]) == 0
    out = capsys.readouterr().out
    assert out == reference_markdown()
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    assert out in readme  # the README carries the table exactly as printed
