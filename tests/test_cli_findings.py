"""``plumbline status``, ``note`` (and the deprecated ``ack``) and ``rebaseline`` on a replayed
demo workspace."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.demo import weeks
from monitor.demo.replay import ReplayResult, drop_week, replay_scenario
from monitor.demo.workspace import inbox_paths
from monitor.passes import run_pass
from monitor.store import Store

# Up to week 90 the receiving model's planted slope change (week 80) has raised its
# structural break, on which the tests record notes and which they move the baseline past.
LAST_WEEK = 90


@pytest.fixture(scope="module")
def workspace(tmp_path_factory: pytest.TempPathFactory) -> ReplayResult:
    return replay_scenario(tmp_path_factory.mktemp("findings"), last_week=LAST_WEEK)


def _config(workspace: ReplayResult) -> str:
    return str(workspace.root / "plumbline.yaml")


def _status(workspace: ReplayResult, capsys: pytest.CaptureFixture[str], *extra: str) -> dict:
    capsys.readouterr()
    assert main(["status", "-c", _config(workspace), "--format", "json", *extra]) == 0
    return json.loads(capsys.readouterr().out)


def test_status_json_contract(workspace: ReplayResult, capsys: pytest.CaptureFixture[str]) -> None:
    document = _status(workspace, capsys)
    # "problems" added by issue 11 (stuck things); the contract allows added keys.
    assert set(document) == {"findings", "passes", "next_runs", "problems"}
    assert isinstance(document["problems"], list)
    required = {"id", "model", "series", "feed", "kind", "severity", "state", "since_period",
                "statistic", "p_value", "message"}  # DESIGN.md section 9
    assert document["findings"], "the replay raised findings"
    for finding in document["findings"]:
        assert required <= set(finding)
        assert finding["state"] in {"new", "ongoing"}
    assert document["passes"][0]["status"] == "finished"
    # next runs only while a daemon holds the database (issue 9): none here
    assert document["next_runs"] == {"daemon_pid": None, "scan": None, "digest": None}
    everything = _status(workspace, capsys, "--all")
    assert len(everything["findings"]) >= len(document["findings"])


def test_status_table_opens_with_a_sentence(
    workspace: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    capsys.readouterr()
    assert main(["status", "-c", _config(workspace)]) == 0
    first = capsys.readouterr().out.splitlines()[0]
    assert "open findings; latest pass" in first
    # Each finding leads with what and where in words; the kind's snake_case name stays in JSON.
    document = _status(workspace, capsys)
    capsys.readouterr()
    assert main(["status", "-c", _config(workspace)]) == 0
    lines = capsys.readouterr().out.splitlines()
    break_line = next(line for line in lines if "receiving_hours: the relationship changed" in line)
    assert break_line.lstrip().startswith("▲ critical receiving_hours: the relationship changed "
                                          "around ")
    assert not any("structural_break" in line or "#" in line for line in lines)
    assert any("still open" in line or "newly raised" in line for line in lines)
    assert len([line for line in lines if line.startswith("  ") and not line.startswith("    ")
                ]) == len(document["findings"])


def _break_of_receiving(document: dict) -> dict:
    (finding,) = [f for f in document["findings"]
                  if f["model"] == "receiving_hours" and f["kind"] == "structural_break"]
    return finding


def test_note_records_who_when_why_and_keeps_the_history(
    workspace: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    finding = _break_of_receiving(_status(workspace, capsys))
    assert not finding["acknowledged"] and finding["note"] is None and finding["note_count"] == 0
    ident, config = str(finding["id"]), _config(workspace)
    assert main(["note", ident, "New dock layout from July; expected", "--by", "ana",
                 "-c", config]) == 0
    said = capsys.readouterr().out
    assert said.startswith(f"Noted on finding {ident} (receiving_hours: the relationship changed "
                           "around ")
    assert "ana: New dock layout from July; expected" in said
    assert "No message will mention it again" in said
    after = _break_of_receiving(_status(workspace, capsys))
    assert after["acknowledged"] and after["note_count"] == 1
    assert (after["note"]["by"], after["note"]["text"]) == ("ana", "New dock layout from July; "
                                                           "expected")
    # Noted again: it says the finding already had a note, and keeps both.
    assert main(["note", ident, "Checked with the dock lead", "--by", "ben", "-c", config]) == 0
    said = capsys.readouterr().out
    assert "already had a note, so its messages had already stopped" in said
    assert "(2 notes)" in said
    assert main(["note", ident, "--history", "-c", config]) == 0
    history = capsys.readouterr().out.splitlines()
    assert history[1].endswith("ana: New dock layout from July; expected")
    assert history[2].endswith("ben: Checked with the dock lead")
    # status shows the latest note under the finding
    assert main(["status", "-c", config]) == 0
    assert "ben: Checked with the dock lead" in capsys.readouterr().out
    assert main(["note", ident, "-c", config]) == 2  # no text
    assert "say why" in capsys.readouterr().err
    assert main(["note", "999999", "x", "-c", config]) == 2
    assert "no finding with id 999999" in capsys.readouterr().err


def test_ack_still_works_for_one_release_with_a_deprecation_line(
    workspace: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    document = _status(workspace, capsys)
    finding = next(f for f in document["findings"] if f["note"] is None)
    assert main(["ack", str(finding["id"]), "-c", _config(workspace)]) == 0
    captured = capsys.readouterr()
    assert "'ack' is deprecated" in captured.err and "plumbline note" in captured.err
    (after,) = [f for f in _status(workspace, capsys)["findings"] if f["id"] == finding["id"]]
    assert after["acknowledged"] and after["note"]["text"] == "acknowledged"
    assert main(["ack", "999999", "-c", _config(workspace)]) == 2
    assert "no finding with id 999999" in capsys.readouterr().err


def test_rebaseline_moves_the_baseline_clears_and_monitors_afresh(
    workspace: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    config = workspace.config
    assert main(["rebaseline", "receiving_hours", "--from", "2026-07-12",
                 "-c", _config(workspace)]) == 0
    out = capsys.readouterr().out
    assert "receiving_hours: monitoring now starts from 2026-07-12 to " in out  # new wording
    open_now = _status(workspace, capsys)["findings"]
    assert not [f for f in open_now
                if f["model"] == "receiving_hours" and f["kind"] == "structural_break"]
    with Store.open(config.database, readonly=True) as store:
        version = store.current_model_version("receiving_hours")
        assert version is not None
        baseline = store.baseline("receiving_hours", version.version, None)
    assert baseline is not None and baseline.set_by == "rebaseline"
    assert baseline.start_period == "2026-07-12"
    # Only 11 weeks exist after the new start: the baseline takes them all, and monitoring
    # starts after it once new weeks arrive.
    assert baseline.end_period == "2026-09-20"
    inboxes = inbox_paths(workspace.root)
    week = weeks(workspace.root)[LAST_WEEK]  # week 91
    drop_week(week, inboxes)
    with Store.open(config.database) as store:
        run_pass(config, as_of=week.delivered_at, store=store)
        fit = store.latest_fits("receiving_hours")[None]
    monitoring = fit.diagnostics["monitoring"]
    assert monitoring["periods_monitored"] == 1
    assert not monitoring["crossed"]


def test_rebaseline_refuses_unknown_models_and_series(
    workspace: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    capsys.readouterr()
    assert main(["rebaseline", "receiving_hour", "-c", _config(workspace)]) == 2
    assert "receiving_hours" in capsys.readouterr().err
    assert main(["rebaseline", "delivery_hours", "--series", "depot-99",
                 "-c", _config(workspace)]) == 2
    assert main(["rebaseline", "delivery_hours", "--from", "not-a-date",
                 "-c", _config(workspace)]) == 2


def test_status_without_a_database_exits_2(
    tmp_path: Path, workspace: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    text = (workspace.root / "plumbline.yaml").read_text(encoding="utf-8")
    copy = tmp_path / "plumbline.yaml"
    copy.write_text(text, encoding="utf-8")
    capsys.readouterr()
    assert main(["status", "-c", str(copy)]) == 2
    assert "does not exist yet" in capsys.readouterr().err
