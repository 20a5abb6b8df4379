"""``plumbline run`` as users run it: ``python -m monitor run -c CONFIG`` in a subprocess on a real
workspace (the demo scenario, its first weeks already passed), with the real scheduler, a ``1s``
scan, real signals and the real writer lock (DESIGN.md sections 9 and 12).

One daemon session per module (starting the command costs about a second of imports, so the
session is shared): while it runs, a week's files are dropped the way the demo delivers them
(temporary name, rename, ``NAME.ready`` marker) and the database is polled, read-only, until the
daemon's pass has taken them; then a second ``plumbline run`` and a ``plumbline pass`` are
started against the same database; then the daemon gets SIGTERM. Each test checks one of the
things that happened. Time bounds in the waits are liveness bounds ("within a few seconds" of
a 1 s scan on a busy machine), not speed measurements.
"""

from __future__ import annotations

import json
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest

from monitor.config import load_config
from monitor.demo import CONFIG_NAME, TIMEZONE, inbox_paths, weeks, write_scenario
from monitor.demo.replay import drop_week
from monitor.lock import DatabaseLock, lock_path_for
from monitor.passes import run_pass
from monitor.store import Store

HISTORY_WEEKS = 10  # passed before the daemon starts
DROPPED_WEEK = HISTORY_WEEKS + 1  # dropped while it runs
INGEST_BOUND_SECONDS = 20.0
EXIT_BOUND_SECONDS = 30.0


def wait_for(condition: Callable[[], bool], timeout: float) -> float | None:
    """Seconds until ``condition()`` held, or None if it did not within ``timeout``."""
    begun = time.monotonic()
    while time.monotonic() - begun < timeout:
        if condition():
            return time.monotonic() - begun
        time.sleep(0.05)
    return None


def _query(database: Path, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    conn = sqlite3.connect(f"file:{database}?mode=ro", uri=True)
    try:
        return list(conn.execute(sql, params).fetchall())
    finally:
        conn.close()


def _closed_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _digest_not_today() -> str:
    """A weekly digest schedule three days away from today in the config's zone, so that it
    cannot fire while the test runs (cron numbers Sunday 0)."""
    today = datetime.now(ZoneInfo(TIMEZONE)).isoweekday() % 7
    return f"0 8 * * {(today + 3) % 7}"


def make_workspace(root: Path) -> Path:
    """The demo scenario with a 1 s scan, its first HISTORY_WEEKS weeks passed at business clocks
    just before now (so the daemon's passes, on the real clock, move forward in time)."""
    write_scenario(root)
    config_path = root / CONFIG_NAME
    text = config_path.read_text(encoding="utf-8")
    for old, new in (
        ("  scan: 30s\n", "  scan: 1s\n"),
        ('  digest: "0 8 * * mon"\n', f'  digest: "{_digest_not_today()}"\n'),
        ("smtp_host: localhost", "smtp_host: 127.0.0.1"),
        ("smtp_port: 25\n", f"smtp_port: {_closed_port()}\n"),
    ):
        assert old in text, old
        text = text.replace(old, new)
    config_path.write_text(text, encoding="utf-8")
    config = load_config(config_path)
    start = datetime.now(UTC) - timedelta(minutes=30)
    with DatabaseLock(config.database), Store.open(config.database) as store:
        for week in weeks(root)[:HISTORY_WEEKS]:
            drop_week(week, inbox_paths(root))
            run_pass(config, as_of=start + timedelta(seconds=week.number), store=store)
    return config_path


@dataclass(frozen=True)
class Session:
    root: Path
    database: Path
    daemon_pid: int
    daemon_returncode: int | None
    daemon_log: str
    started_within: float | None
    ingested_within: float | None
    second_daemon: subprocess.CompletedProcess[str]
    second_daemon_json: subprocess.CompletedProcess[str]
    refused_pass: subprocess.CompletedProcess[str]
    passes_before_refused: int
    passes_after_refused: int
    stopped_within: float | None
    lock_free_after_exit: bool


def _plumbline(*args: str) -> list[str]:
    return [sys.executable, "-m", "monitor", *args]


def _finished(process: subprocess.Popen[str]) -> subprocess.CompletedProcess[str]:
    out, err = process.communicate(timeout=60)
    return subprocess.CompletedProcess(process.args, process.returncode, out, err)


@pytest.fixture(scope="module")
def session(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Session]:
    root = tmp_path_factory.mktemp("daemon") / "ws"
    root.mkdir()
    config_path = make_workspace(root)
    database = Path(load_config(config_path).database)
    log_path = root / "daemon.log"
    with log_path.open("wb") as log:
        daemon = subprocess.Popen(
            _plumbline("run", "-c", str(config_path), "--log-format", "json"),
            stdout=subprocess.DEVNULL, stderr=log,
        )
    try:
        started = wait_for(lambda: "daemon_started" in log_path.read_text(), 30)

        week = weeks(root)[DROPPED_WEEK - 1]
        expected = {(feed, path.name) for feed, path in week.files.items()}
        drop_week(week, inbox_paths(root))
        before = _query(database, "SELECT count(*) FROM passes")[0][0]

        def taken() -> bool:
            rows = _query(database, "SELECT feed, name FROM files WHERE moved_at IS NOT NULL "
                                    "AND pass_id > ?", (before,))
            last = _query(database, "SELECT status FROM passes ORDER BY id DESC LIMIT 1")
            return set(rows) >= expected and last[0][0] == "finished"

        ingested = wait_for(taken, INGEST_BOUND_SECONDS)

        passes_before = _query(database, "SELECT count(*) FROM passes")[0][0]
        # Started side by side on the same database: a second daemon (plain and JSON logs) and a
        # one-off pass.
        contenders = [
            subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            for command in (
                _plumbline("run", "-c", str(config_path)),
                _plumbline("run", "-c", str(config_path), "--log-format", "json"),
                _plumbline("pass", "-c", str(config_path)),
            )
        ]
        second, second_json, one_off = (_finished(p) for p in contenders)
        passes_after = _query(database, "SELECT count(*) FROM passes")[0][0]

        daemon.send_signal(signal.SIGTERM)
        stopped = wait_for(lambda: daemon.poll() is not None, EXIT_BOUND_SECONDS)
        lock = DatabaseLock(database)
        try:
            lock.acquire()
            lock_free = True
            lock.release()
        except Exception:
            lock_free = False
        yield Session(
            root=root, database=database, daemon_pid=daemon.pid,
            daemon_returncode=daemon.poll(), daemon_log=log_path.read_text(encoding="utf-8"),
            started_within=started, ingested_within=ingested,
            second_daemon=second, second_daemon_json=second_json, refused_pass=one_off,
            passes_before_refused=passes_before, passes_after_refused=passes_after,
            stopped_within=stopped, lock_free_after_exit=lock_free,
        )
    finally:
        if daemon.poll() is None:
            daemon.kill()
            daemon.wait(timeout=10)


def _log_lines(session: Session) -> list[dict[str, Any]]:
    return [json.loads(line) for line in session.daemon_log.splitlines()]


def test_a_file_dropped_while_the_daemon_runs_is_ingested_within_seconds(
    session: Session,
) -> None:
    assert session.started_within is not None, session.daemon_log
    assert session.ingested_within is not None, (
        f"week {DROPPED_WEEK}'s files were not taken within {INGEST_BOUND_SECONDS} s:\n"
        + session.daemon_log
    )
    week = weeks(session.root)[DROPPED_WEEK - 1]
    period = week.week_ending.isoformat()
    # every actual row of the week's files is in the database, and the files are archived
    expected_rows = sum(
        1 for path in week.files.values()
        for line in path.read_text(encoding="utf-8").splitlines()[1:]
        if line.startswith(period + ",")
    )
    stored = _query(session.database, "SELECT count(*) FROM observations WHERE period = ? "
                                      "AND is_plan = 0", (period,))
    assert expected_rows > 0 and stored == [(expected_rows,)]
    for feed, path in week.files.items():
        archived = inbox_paths(session.root)[feed].parent / "archive" / path.name
        assert archived.read_bytes() == path.read_bytes()
        assert not (inbox_paths(session.root)[feed] / path.name).exists()
    # the daemon's pass went on past ingest: next week's plan rows were answered
    next_period = weeks(session.root)[DROPPED_WEEK].week_ending.isoformat()
    plan_rows = _query(session.database, "SELECT count(*) FROM observations WHERE period = ? "
                                         "AND is_plan = 1", (next_period,))[0][0]
    answered = _query(session.database, "SELECT count(DISTINCT observation_id) FROM forecasts "
                                        "WHERE target_period = ?", (next_period,))[0][0]
    assert plan_rows > 0 and answered == plan_rows


def test_a_second_daemon_on_the_same_database_exits_2_and_says_why(session: Session) -> None:
    second = session.second_daemon
    assert second.returncode == 2, second.stderr
    message = second.stderr.strip()
    assert len(message.splitlines()) == 1, message
    assert f"is in use by process {session.daemon_pid}" in message
    assert str(session.database) in message
    assert "only one 'plumbline run' or 'plumbline pass' may write to it at a time" in message


def test_a_second_daemon_with_json_logs_says_why_in_a_json_line(session: Session) -> None:
    """Under ``--log-format json`` stderr is read by a log collector: the refusal too must be a
    JSON line, an error naming the holder."""
    second = session.second_daemon_json
    assert second.returncode == 2, second.stderr
    lines = [line for line in second.stderr.splitlines() if line.strip()]
    assert lines, "nothing on stderr"
    unparsed = []
    for line in lines:
        try:
            json.loads(line)
        except json.JSONDecodeError:
            unparsed.append(line)
    assert not unparsed, f"stderr lines that are not JSON: {unparsed}"
    refusal = [json.loads(line) for line in lines][-1]
    assert refusal["level"] == "error"
    assert f"is in use by process {session.daemon_pid}" in refusal["message"]


def test_a_pass_while_the_daemon_runs_exits_2_and_writes_nothing(session: Session) -> None:
    refused = session.refused_pass
    assert refused.returncode == 2, refused.stdout + refused.stderr
    assert f"is in use by process {session.daemon_pid}" in refused.stderr
    assert refused.stdout == ""
    assert session.passes_after_refused == session.passes_before_refused


def test_sigterm_makes_the_daemon_exit_0_and_release_the_lock(session: Session) -> None:
    assert session.stopped_within is not None, session.daemon_log
    assert session.daemon_returncode == 0, session.daemon_log
    assert session.lock_free_after_exit
    assert lock_path_for(session.database).read_text(encoding="ascii") == ""
    events = [line["event"] for line in _log_lines(session)]
    assert events[-1] == "daemon_stopped", events
    # after the signal only the job already running may finish; nothing new starts
    after_signal = events[events.index("daemon_stopping") + 1 : -1]
    assert set(after_signal) <= {"scan_done"}, events
    stopping = next(line for line in _log_lines(session) if line["event"] == "daemon_stopping")
    assert stopping["fields"] == {"reason": "SIGTERM"}


def test_every_log_line_is_one_json_object_with_the_event_fields(session: Session) -> None:
    lines = session.daemon_log.splitlines()
    assert lines, "the daemon logged nothing"
    parsed = [json.loads(line) for line in lines]  # raises on any line that is not JSON
    for line in parsed:
        assert set(line) >= {"time", "level", "event", "message", "fields"}, line
        datetime.fromisoformat(str(line["time"]).replace("Z", "+00:00"))
    events = [line["event"] for line in parsed]
    assert events[0] == "daemon_started"
    started = parsed[0]["fields"]
    assert started["scan_schedule"] == "1s"
    assert started["database"] == str(session.database)
    done = [line for line in parsed if line["event"] == "scan_done"]
    assert [d["fields"]["files"] for d in done] == [len(weeks(session.root)[DROPPED_WEEK - 1]
                                                        .files)]
    assert "scan_failed" not in events and "digest_failed" not in events
