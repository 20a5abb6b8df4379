"""The daemon with the real APScheduler: real processes, real signals, real folders (no mocks).

In-process tests drive a real ``MonitorDaemon`` under a frozen clock (freezegun) to show what
happens after a suspend and during a long pass; subprocess tests run a small script that uses
``run_daemon`` with a ``1s`` scan and send it real SIGTERM / SIGINT.
"""

from __future__ import annotations

import io
import json
import logging
import os
import re
import signal
import subprocess
import sys
import textwrap
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from freezegun import freeze_time

from monitor.daemon import (
    EventLineFormatter,
    MonitorDaemon,
    logging_to,
    run_daemon,
    upcoming_runs,
)
from monitor.errors import ConfigError, DatabaseLockedError, UsageError
from monitor.lock import DatabaseLock

BERLIN = ZoneInfo("Europe/Berlin")


def wait_for(condition: Callable[[], bool], timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(0.02)


def json_lines(text: str) -> list[dict[str, object]]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


# -- log lines ------------------------------------------------------------------------------------


def _record(message: str, *args: object, **extra: object) -> logging.LogRecord:
    record = logging.LogRecord("monitor.daemon", logging.INFO, __file__, 1, message, args, None)
    record.created = datetime(2027, 3, 29, 6, 0, 0, 412000, tzinfo=UTC).timestamp()
    for key, value in extra.items():
        setattr(record, key, value)
    return record


def test_plain_line_has_time_level_event_message_and_fields() -> None:
    record = _record(
        "digest finished in %.2f s", 1.2, event="digest_done",
        fields={"pages": 3, "to": "planning@example.org", "note": "two words"},
    )
    line = EventLineFormatter("plain").format(record)
    assert line == (
        "2027-03-29T06:00:00.412Z info digest_done: digest finished in 1.20 s "
        '(pages=3, to=planning@example.org, note="two words")'
    )


def test_json_line_has_time_level_event_message_and_fields() -> None:
    moment = datetime(2027, 3, 29, 8, 0, tzinfo=BERLIN)
    record = _record("digest due", event="digest_due", fields={"scheduled": moment, "n": 2})
    line = EventLineFormatter("json").format(record)
    assert json.loads(line) == {
        "time": "2027-03-29T06:00:00.412Z",
        "level": "info",
        "event": "digest_due",
        "message": "digest due",
        "fields": {"scheduled": "2027-03-29T08:00:00+02:00", "n": 2},
    }


def test_record_without_event_takes_its_logger_name_and_stays_on_one_line() -> None:
    record = _record("first line\nsecond line")
    record.name = "monitor.passes"
    plain = EventLineFormatter("plain").format(record)
    assert plain == "2027-03-29T06:00:00.412Z info passes: first line\\nsecond line"
    assert json.loads(EventLineFormatter("json").format(record))["event"] == "passes"


def test_exception_adds_error_and_where_and_json_keeps_the_traceback() -> None:
    def failing_stage() -> None:
        raise ValueError("column 'x' missing")

    try:
        failing_stage()
    except ValueError:
        record = _record("scan failed", event="scan_failed", exc_info=sys.exc_info())
    plain = EventLineFormatter("plain").format(record)
    assert "\n" not in plain
    assert 'error="ValueError: column \'x\' missing"' in plain
    assert "where=\"test_daemon.py:" in plain and "in failing_stage" in plain
    line = json.loads(EventLineFormatter("json").format(record))
    assert line["fields"]["error"] == "ValueError: column 'x' missing"
    assert "Traceback (most recent call last)" in line["traceback"]


def test_unknown_log_format_is_a_usage_error() -> None:
    with pytest.raises(UsageError, match="unknown log format 'xml'"):
        EventLineFormatter("xml")  # type: ignore[arg-type]


def test_logging_to_puts_the_loggers_back() -> None:
    target = logging.getLogger("monitor")
    before = (target.level, target.propagate, list(target.handlers))
    stream = io.StringIO()
    with logging_to(stream, "json", logging.DEBUG):
        logging.getLogger("monitor.passes").debug("stage done")
    assert (target.level, target.propagate, list(target.handlers)) == before
    assert json_lines(stream.getvalue())[0]["message"] == "stage done"


# -- in process, frozen clock ---------------------------------------------------------------------


@dataclass
class Recorder:
    """Job callables that record when they ran (by the frozen clock) and can be held up."""

    calls: list[tuple[str, datetime]] = field(default_factory=list)
    hold_scan: threading.Event | None = None
    scan_started: threading.Event = field(default_factory=threading.Event)

    def scan(self, stop_requested: threading.Event) -> dict[str, object] | None:
        self.calls.append(("scan", datetime.now(UTC)))
        self.scan_started.set()
        if self.hold_scan is not None:
            assert self.hold_scan.wait(10), "the test never released the scan"
        return None

    def digest(self, stop_requested: threading.Event) -> dict[str, object] | None:
        self.calls.append(("digest", datetime.now(UTC)))
        return {"pages": 1}

    def count(self, name: str) -> int:
        return sum(1 for job, _ in self.calls if job == name)


@pytest.fixture
def log_stream() -> Iterator[io.StringIO]:
    stream = io.StringIO()
    with logging_to(stream, "json", logging.DEBUG):
        yield stream


def test_after_a_suspend_missed_runs_collapse_into_one(
    tmp_path: Path, log_stream: io.StringIO
) -> None:
    jobs = Recorder()
    # Friday 26 March 2027, 22:00 in Berlin; the machine then sleeps until Wednesday 09:00,
    # across the spring change and the Monday 08:00 digest.
    with freeze_time(datetime(2027, 3, 26, 22, 0, tzinfo=BERLIN)) as clock:
        daemon = MonitorDaemon(
            database=tmp_path / "plumbline.sqlite", timezone="Europe/Berlin",
            scan_schedule="30s", scan=jobs.scan, digest_schedule="0 8 * * mon",
            digest=jobs.digest,
        )
        daemon.start()
        try:
            wait_for(lambda: jobs.count("scan") == 1, 5, "the scan at start")
            assert daemon.next_run_times()["digest"] == datetime(2027, 3, 29, 8, 0, tzinfo=BERLIN)
            clock.move_to(datetime(2027, 3, 31, 9, 0, tzinfo=BERLIN))
            daemon.wake()  # what the scheduler's own wakeup (at most a minute later) does
            wait_for(lambda: jobs.count("digest") == 1, 5, "the late digest")
            wait_for(lambda: jobs.count("scan") == 2, 5, "one scan after waking")
            time.sleep(0.3)  # room for any extra runs to show up (there must be none)
            # ~13,000 missed scan times and one missed digest: one run each, not a backlog.
            assert jobs.count("scan") == 2
            assert jobs.count("digest") == 1
            assert daemon.next_run_times()["digest"] == datetime(2027, 4, 5, 8, 0, tzinfo=BERLIN)
        finally:
            daemon.stop()
    due = [line for line in json_lines(log_stream.getvalue()) if line["event"] == "digest_due"]
    assert len(due) == 1
    fields = due[0]["fields"]
    assert isinstance(fields, dict)
    assert fields["scheduled"] == "2027-03-29T08:00:00+02:00"
    assert fields["late_seconds"] == 49 * 3600.0


def test_a_digest_due_during_a_long_pass_runs_once_when_it_ends(
    tmp_path: Path, log_stream: io.StringIO
) -> None:
    jobs = Recorder(hold_scan=threading.Event())
    with freeze_time(datetime(2027, 3, 29, 7, 59, 50, tzinfo=BERLIN)) as clock:
        daemon = MonitorDaemon(
            database=tmp_path / "plumbline.sqlite", timezone=BERLIN, scan_schedule="30s",
            scan=jobs.scan, digest_schedule="0 8 * * mon", digest=jobs.digest,
        )
        daemon.start()
        try:
            assert jobs.scan_started.wait(5)
            clock.move_to(datetime(2027, 3, 29, 8, 0, 45, tzinfo=BERLIN))  # digest and a scan due
            daemon.wake()
            wait_for(lambda: '"scan_busy"' in log_stream.getvalue(), 5, "the dropped scan")
            time.sleep(0.2)
            assert jobs.count("digest") == 0  # one job at a time: it waits for the pass
            assert jobs.hold_scan is not None
            jobs.hold_scan.set()
            wait_for(lambda: jobs.count("digest") == 1, 5, "the digest after the pass")
            time.sleep(0.3)
            assert jobs.count("scan") == 1  # the scan due during the pass was dropped, not queued
            assert jobs.count("digest") == 1
        finally:
            daemon.stop()


def test_failing_scan_is_logged_and_the_daemon_carries_on(
    tmp_path: Path, log_stream: io.StringIO
) -> None:
    calls: list[int] = []

    def scan(stop_requested: threading.Event) -> dict[str, object] | None:
        calls.append(1)
        if len(calls) == 1:
            raise RuntimeError("feed folder vanished")
        return {"files": 1}

    with freeze_time(datetime(2027, 6, 1, 12, 0, tzinfo=BERLIN)) as clock:
        daemon = MonitorDaemon(
            database=tmp_path / "plumbline.sqlite", timezone=BERLIN, scan_schedule="1m", scan=scan
        )
        daemon.start()
        try:
            wait_for(lambda: len(calls) == 1, 5, "the first scan")
            clock.tick(60)
            daemon.wake()
            wait_for(lambda: '"scan_done"' in log_stream.getvalue(), 5, "the second scan")
        finally:
            daemon.stop()
    lines = {str(line["event"]): line for line in json_lines(log_stream.getvalue())}
    failed = lines["scan_failed"]
    assert failed["level"] == "error"
    assert isinstance(failed["fields"], dict)
    assert failed["fields"]["error"] == "RuntimeError: feed folder vanished"
    assert "RuntimeError" in str(failed["traceback"])
    assert lines["scan_done"]["fields"] == {"files": 1, "seconds": 0.0}  # frozen clock


def test_request_stop_lets_a_long_scan_stop_between_stages(tmp_path: Path) -> None:
    """The stop contract: a running job sees ``stop_requested`` and returns between stages;
    ``run_forever`` waits for it and returns 0. (Real clock, real scheduler.)"""
    stages_done: list[str] = []
    daemon_box: list[MonitorDaemon] = []

    def scan(stop_requested: threading.Event) -> dict[str, object] | None:
        for stage in ("ingest", "score", "refit", "checks", "forecast", "findings", "notify"):
            if stage == "refit":
                daemon_box[0].request_stop("test")  # as if SIGTERM arrived during "score"
            if stop_requested.is_set():
                return {"stopped_before": stage}
            time.sleep(0.05)
            stages_done.append(stage)
        return {"stages": len(stages_done)}

    stream = io.StringIO()
    daemon = MonitorDaemon(
        database=tmp_path / "plumbline.sqlite", timezone=BERLIN, scan_schedule="1h", scan=scan
    )
    daemon_box.append(daemon)
    with logging_to(stream, "plain"):
        assert daemon.run_forever() == 0
    assert stages_done == ["ingest", "score"]
    log = stream.getvalue()
    assert "scan_done: scan finished" in log and "stopped_before=refit" in log
    assert log.index("daemon_stopping") < log.index("daemon_stopped")
    # The lock went with the daemon.
    with DatabaseLock(tmp_path / "plumbline.sqlite") as lock:
        assert lock.held


def test_daemon_refuses_a_held_database_and_bad_settings(tmp_path: Path) -> None:
    database = tmp_path / "plumbline.sqlite"

    def idle(stop_requested: threading.Event) -> None:
        return None

    with DatabaseLock(database):
        daemon = MonitorDaemon(database=database, timezone=BERLIN, scan_schedule="1s", scan=idle)
        with pytest.raises(DatabaseLockedError, match=f"process {os.getpid()}"):
            daemon.start()
    with pytest.raises(ConfigError, match=r"^schedule\.scan: '70 \* \* \* \*': minute field"):
        MonitorDaemon(database=database, timezone=BERLIN, scan_schedule="70 * * * *", scan=idle)
    with pytest.raises(ConfigError, match=r"^schedule\.digest: "):
        MonitorDaemon(
            database=database, timezone=BERLIN, scan_schedule="1s", scan=idle,
            digest_schedule="0 8 * *", digest=idle,
        )
    with pytest.raises(ConfigError, match="did you mean 'Europe/Berlin'"):
        MonitorDaemon(database=database, timezone="Europe/Berlim", scan_schedule="1s", scan=idle)
    with pytest.raises(UsageError, match="--log-format"):
        run_daemon(database=database, timezone=BERLIN, scan_schedule="1s", scan=idle,
                   log_format="yaml")


def test_next_runs_match_the_schedule_in_the_zone(tmp_path: Path) -> None:
    def idle(stop_requested: threading.Event) -> None:
        return None

    with freeze_time(datetime(2027, 10, 27, 12, 1, tzinfo=BERLIN)):
        daemon = MonitorDaemon(
            database=tmp_path / "plumbline.sqlite", timezone=BERLIN, scan_schedule="*/5 * * * *",
            scan=idle, digest_schedule="0 8 * * mon", digest=idle, scan_at_start=False,
        )
        daemon.start()
        try:
            runs = daemon.next_run_times()
        finally:
            daemon.stop()
    assert runs["scan"] == datetime(2027, 10, 27, 12, 5, tzinfo=BERLIN)
    after = datetime(2027, 10, 27, 12, 1, tzinfo=BERLIN)
    assert runs["digest"] == upcoming_runs("0 8 * * mon", BERLIN, after)[0]
    assert runs["digest"] == datetime(2027, 11, 1, 8, 0, tzinfo=BERLIN)  # after the change: CET


# -- real processes, real signals -----------------------------------------------------------------

DAEMON_SCRIPT = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from monitor.daemon import run_daemon
    from monitor.errors import PlumblineError

    work, log_format = Path(sys.argv[1]), sys.argv[2]
    inbox, seen = work / "inbox", work / "seen.txt"

    def scan(stop_requested):
        done = set(seen.read_text().split()) if seen.exists() else set()
        new = sorted(p.name for p in inbox.iterdir() if p.suffix == ".csv" and p.name not in done)
        if not new:
            return None
        for name in new:
            with seen.open("a") as out:
                out.write(name + "\\n")
            (work / (name + ".started")).write_text("")
            time.sleep(1.0)  # a pass that takes a while
            (work / (name + ".done")).write_text("")
        return {"files": len(new)}

    try:
        sys.exit(run_daemon(
            database=work / "state" / "plumbline.sqlite", timezone="Europe/Berlin",
            scan_schedule="1s", scan=scan, digest_schedule="0 8 * * mon",
            digest=lambda stop_requested: {"pages": 0}, log_format=log_format,
        ))
    except PlumblineError as exc:  # as monitor.cli.main does for every command
        print(f"plumbline: {exc}", file=sys.stderr)
        sys.exit(exc.exit_code)
    """
)


@dataclass
class DaemonProcess:
    process: subprocess.Popen[bytes]
    work: Path
    stderr_path: Path

    @property
    def log(self) -> str:
        return self.stderr_path.read_text(encoding="utf-8")

    def wait_started(self) -> None:
        wait_for(lambda: "daemon_started" in self.log, 15, f"the daemon to start: {self.log}")

    def drop(self, name: str) -> float:
        """Drop a file into the inbox the way a well-behaved producer does (write, rename)."""
        partial = self.work / "inbox" / f".{name}.part"
        partial.write_text("week_ending,pick_hours,order_lines\n2027-01-03,812,5120\n")
        partial.rename(self.work / "inbox" / name)
        return time.monotonic()


@pytest.fixture
def start_daemon(tmp_path: Path) -> Iterator[Callable[..., DaemonProcess]]:
    started: list[DaemonProcess] = []
    (tmp_path / "inbox").mkdir()

    def start(log_format: str = "plain", label: str = "first") -> DaemonProcess:
        stderr_path = tmp_path / f"{label}.stderr"
        with stderr_path.open("wb") as stderr:
            process = subprocess.Popen(
                [sys.executable, "-c", DAEMON_SCRIPT, str(tmp_path), log_format],
                stdout=subprocess.DEVNULL, stderr=stderr,
            )
        daemon = DaemonProcess(process, tmp_path, stderr_path)
        started.append(daemon)
        return daemon

    yield start
    for daemon in started:
        if daemon.process.poll() is None:
            daemon.process.kill()
            daemon.process.wait(timeout=10)


def test_dropped_file_is_seen_and_sigterm_waits_for_the_running_scan(
    start_daemon: Callable[..., DaemonProcess],
) -> None:
    daemon = start_daemon()
    daemon.wait_started()
    dropped = daemon.drop("week_01.csv")
    started_marker = daemon.work / "week_01.csv.started"
    wait_for(started_marker.exists, 5, "the dropped file to be seen")
    assert time.monotonic() - dropped < 5
    daemon.process.send_signal(signal.SIGTERM)  # while the scan is in its 1 s of work
    assert daemon.process.wait(timeout=15) == 0
    assert (daemon.work / "week_01.csv.done").exists()  # the running job was finished first
    assert (daemon.work / "seen.txt").read_text() == "week_01.csv\n"
    log = daemon.log
    assert "daemon_stopping: stopping: no new runs; waiting for the running job to finish " \
        "(reason=SIGTERM)" in log
    assert log.index("scan_done") < log.index("daemon_stopped")
    plain_line = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z (info|warning) [a-z_]+: ")
    assert all(plain_line.match(line) for line in log.splitlines()), log


def test_sigint_stops_cleanly_too_with_json_lines(
    start_daemon: Callable[..., DaemonProcess],
) -> None:
    daemon = start_daemon(log_format="json")
    daemon.wait_started()
    daemon.drop("week_02.csv")
    wait_for((daemon.work / "week_02.csv.started").exists, 5, "the dropped file to be seen")
    daemon.process.send_signal(signal.SIGINT)
    assert daemon.process.wait(timeout=15) == 0
    assert (daemon.work / "week_02.csv.done").exists()
    lines = json_lines(daemon.log)
    assert lines, "no log lines"
    for line in lines:
        assert set(line) >= {"time", "level", "event", "message", "fields"}
        assert str(line["time"]).endswith("Z")
        datetime.fromisoformat(str(line["time"]).replace("Z", "+00:00"))
    events = [line["event"] for line in lines]
    assert events[0] == "daemon_started" and events[-1] == "daemon_stopped"
    stopping = next(line for line in lines if line["event"] == "daemon_stopping")
    assert stopping["fields"] == {"reason": "SIGINT"}
    done = next(line for line in lines if line["event"] == "scan_done")
    assert isinstance(done["fields"], dict) and done["fields"]["files"] == 1


def test_second_daemon_on_the_same_database_exits_2_with_the_message(
    start_daemon: Callable[..., DaemonProcess],
) -> None:
    first = start_daemon()
    first.wait_started()
    second = start_daemon(label="second")
    assert second.process.wait(timeout=15) == 2
    message = second.log.strip()
    assert message.startswith("plumbline: database ")
    assert "plumbline.sqlite is in use by process " + str(first.process.pid) in message
    assert len(message.splitlines()) == 1
    assert first.process.poll() is None  # the first one is unharmed
    first.process.send_signal(signal.SIGTERM)
    assert first.process.wait(timeout=15) == 0


def test_a_second_signal_ends_the_process_at_once(
    start_daemon: Callable[..., DaemonProcess],
) -> None:
    daemon = start_daemon()
    daemon.wait_started()
    daemon.drop("week_03.csv")
    wait_for((daemon.work / "week_03.csv.started").exists, 5, "the dropped file to be seen")
    daemon.process.send_signal(signal.SIGTERM)
    wait_for(lambda: "daemon_stopping" in daemon.log, 5, "the first signal to be taken")
    daemon.process.send_signal(signal.SIGINT)
    assert daemon.process.wait(timeout=15) == 128 + signal.SIGINT
    assert not (daemon.work / "week_03.csv.done").exists()  # it did not wait for the scan
    assert "daemon_stop_forced" in daemon.log
    # The kernel released the lock with the process.
    with DatabaseLock(daemon.work / "state" / "plumbline.sqlite") as lock:
        assert lock.held
