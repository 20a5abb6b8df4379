"""Faults of the real world, each reproduced through the real command on a real workspace
(issue 11): a database or reports folder inside a drop folder, a database reached by two paths,
a business clock far ahead of the real one, a damaged database, a full disk and a read-only
mount, links and future times in an inbox, a secret typed into a ``*_env`` key, terminal control
characters in file values, the same bytes in two feeds, a file changed after it was read.

Each test drives ``plumbline`` itself (``monitor.cli.main`` in this process, or a subprocess where
a signal or a second process is part of the fault) and looks at what an operator would see: the
exit status, the one ``plumbline:`` line, ``check``'s warnings, ``status`` and the files.
"""

from __future__ import annotations

import contextlib
import csv
import itertools
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator, Sequence
from datetime import UTC, datetime, timedelta
from email.parser import BytesParser
from email.policy import default
from pathlib import Path

import numpy as np
import pytest
from _workspace import Workspace, config_yaml, csv_bytes, delivered, feed_yaml, week_ending
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import Envelope

from monitor.cli import main
from monitor.ingest import commit_file, complete_move, inspect_inbox
from monitor.lock import DatabaseLock
from monitor.passes import ingest_spec
from monitor.store import Store
from monitor.vocabulary import FindingKind

COLUMNS = ("week_ending", "depot", "drops", "delivery_hours")
DEPOTS = ("north", "south")
HISTORY_WEEKS = 12

MODEL = "\n".join([
    "  delivery_hours:",
    "    feed: depots",
    "    response: delivery_hours",
    "    predictors: [drops]",
    "    per: depot",
    "    window: 30",
    "    recent: 10",
    "    min_rows: 10",
])


def _history() -> dict[int, dict[str, tuple[float, float]]]:
    """week -> depot -> (drops, delivery_hours), seeded (invented data)."""
    rng = np.random.default_rng(1111)
    out: dict[int, dict[str, tuple[float, float]]] = {}
    for w in range(1, 30):
        out[w] = {}
        for d in DEPOTS:
            drops = float(round(rng.uniform(80, 160)))
            out[w][d] = (drops, round(6 + 0.5 * drops + float(rng.normal(0, 2.5)), 2))
    return out


HISTORY = _history()


def rows(weeks: Sequence[int], plan_week: int | None = None) -> list[list[object]]:
    out: list[list[object]] = []
    for w in weeks:
        out += [[week_ending(w).isoformat(), d, *HISTORY[w][d]] for d in DEPOTS]
    if plan_week is not None:
        out += [[week_ending(plan_week).isoformat(), d, HISTORY[plan_week][d][0], None]
                for d in DEPOTS]
    return out


def week_file(week: int) -> bytes:
    """Week ``week``'s actuals and the next week's plan rows."""
    return csv_bytes(COLUMNS, rows([week], week + 1))


def make_workspace(root: Path, *, extra: str = "", feeds: Sequence[str] = ("depots",),
                   models: str = MODEL, database: str | None = None) -> Workspace:
    text = config_yaml([feed_yaml(name, COLUMNS) for name in feeds], [models])
    if database is not None:
        text = text.replace("database: state/plumbline.sqlite", f"database: {database}")
    for name in feeds:  # made here: a config refused on purpose cannot say where they are
        (root / "feeds" / name / "inbox").mkdir(parents=True, exist_ok=True)
    (root / "plumbline.yaml").write_text(text + extra, encoding="utf-8")
    return Workspace(root)


def seeded(root: Path, **kwargs: object) -> Workspace:
    """Weeks 1-12 and week 13's plans, taken by one ``plumbline pass``."""
    workspace = make_workspace(root, **kwargs)  # type: ignore[arg-type]
    workspace.drop("depots", "history.csv",
                   csv_bytes(COLUMNS, rows(range(1, HISTORY_WEEKS + 1), HISTORY_WEEKS + 1)))
    assert workspace.cli_pass(delivered(HISTORY_WEEKS)) == 0
    return workspace


def one_error_line(err: str) -> str:
    """The whole of standard error is one ``plumbline:`` line (never a traceback)."""
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("plumbline: "), err
    assert "Traceback" not in err
    return lines[0]


# ------------------------------------------------------------------ 2. never inputs


def test_a_database_or_reports_folder_in_a_drop_folder_is_a_config_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Before the fix the live database in an inbox was taken as a bad file and moved to
    # rejected/, and pages written into an inbox were read back at every scan.
    workspace = make_workspace(tmp_path / "db", database="feeds/depots/inbox/plumbline.sqlite")
    capsys.readouterr()
    assert main(["check", "-c", str(workspace.config_path)]) == 2
    err = capsys.readouterr().err
    assert "database: " in err and "is inside the inbox of feed depots" in err
    assert workspace.cli_pass(delivered(1)) == 2
    assert "is inside the inbox of feed depots" in capsys.readouterr().err
    assert not list(workspace.root.rglob("*.sqlite"))  # nothing was created

    reports = make_workspace(tmp_path / "html")
    text = reports.config_path.read_text().replace("html_dir: reports",
                                                   "html_dir: feeds/depots/archive")
    reports.config_path.write_text(text)
    capsys.readouterr()
    assert main(["status", "-c", str(reports.config_path)]) == 2
    line = one_error_line(capsys.readouterr().err)
    assert "notify.html_dir" in line and "is the archive of feed depots" in line


def test_a_database_path_that_is_a_folder_a_device_or_a_link_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder = make_workspace(tmp_path / "folder")
    folder.database.mkdir(parents=True)
    assert folder.cli_pass(delivered(1)) == 2
    assert "is a folder" in one_error_line(capsys.readouterr().err)
    assert main(["check", "-c", str(folder.config_path)]) == 0
    assert "warning: database: the database path" in capsys.readouterr().out

    device = make_workspace(tmp_path / "device", database="/dev/null")
    assert device.cli_pass(delivered(1)) == 2
    assert "is not a regular file" in one_error_line(capsys.readouterr().err)

    linked = seeded(tmp_path / "linked")
    real = linked.database
    alias = real.with_name("alias.sqlite")
    alias.symlink_to(real)
    text = linked.config_path.read_text().replace("state/plumbline.sqlite", "state/alias.sqlite")
    linked.config_path.write_text(text)
    capsys.readouterr()
    assert linked.cli_pass(delivered(13)) == 2
    assert "is a symbolic link" in one_error_line(capsys.readouterr().err)


def test_one_database_has_one_lock_whatever_path_reaches_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path / "ws")
    # The same database through a linked folder: another path, the same file.
    (tmp_path / "ws" / "state-link").symlink_to(tmp_path / "ws" / "state")
    other = tmp_path / "ws" / "other.yaml"
    other.write_text(workspace.config_path.read_text().replace(
        "database: state/plumbline.sqlite", "database: state-link/plumbline.sqlite"))
    capsys.readouterr()
    with DatabaseLock(workspace.database):
        assert main(["pass", "-c", str(other), "--as-of", delivered(13).isoformat()]) == 2
    line = one_error_line(capsys.readouterr().err)
    assert "is in use by process" in line
    # The same file under a second name (a symbolic link to it): before the fix its lock file
    # was another file, and two writers ran at once. Now such an alias is refused outright.
    (workspace.database.parent / "alias.sqlite").symlink_to(workspace.database)
    aliased = tmp_path / "ws" / "aliased.yaml"
    aliased.write_text(workspace.config_path.read_text().replace(
        "database: state/plumbline.sqlite", "database: state/alias.sqlite"))
    with DatabaseLock(workspace.database):
        assert main(["pass", "-c", str(aliased), "--as-of", delivered(13).isoformat()]) == 2
    assert "is a symbolic link" in one_error_line(capsys.readouterr().err)
    assert workspace.query("SELECT count(*) FROM passes")[0][0] == 1
    assert main(["pass", "-c", str(other), "--as-of", delivered(13).isoformat()]) == 0


# ------------------------------------------------------------------ 3. the business clock


def test_a_business_clock_far_ahead_is_refused_and_a_future_pass_can_be_left_behind(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    capsys.readouterr()
    ahead = (datetime.now(UTC) + timedelta(days=400)).isoformat()
    assert workspace.cli_pass(ahead) == 2
    line = one_error_line(capsys.readouterr().err)
    assert "ahead of the real clock" in line and "--force-clock" in line
    passes = workspace.query("SELECT count(*) FROM passes")[0][0]
    assert passes == 1  # nothing recorded

    # Forced (as a typo once was, before the fix): every pass at the real clock is then refused,
    # and the refusal names the way back.
    assert workspace.cli_pass(ahead, "--force-clock") == 0
    capsys.readouterr()
    assert main(["pass", "-c", str(workspace.config_path)]) == 2
    line = one_error_line(capsys.readouterr().err)
    assert "stands in the future of the real clock" in line
    assert "plumbline pass --force-clock" in line
    # The documented recovery: a pass at the real clock, forced; passes go on from there.
    assert main(["pass", "-c", str(workspace.config_path), "--force-clock"]) == 0
    workspace.drop("depots", "week_13.csv", week_file(13))
    assert main(["pass", "-c", str(workspace.config_path)]) == 0
    assert workspace.query("SELECT count(*) FROM files WHERE name = 'week_13.csv' "
                           "AND outcome = 'archived'")[0][0] == 1
    # A clock behind a latest pass in the real clock's past stays refused, forced or not.
    assert workspace.cli_pass(delivered(12), "--force-clock") == 2
    assert "passes must move forward" in capsys.readouterr().err


# ------------------------------------------------------------------ 10. a damaged database


@pytest.mark.parametrize("damage", ["garbled", "truncated"])
def test_a_damaged_database_gives_one_line_and_exit_3(
    damage: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    data = workspace.database.read_bytes()
    if damage == "garbled":
        workspace.database.write_bytes(b"\x00garbled header!" + data[16:])
    else:
        workspace.database.write_bytes(data[:50])
    for name in ("-wal", "-shm"):
        Path(f"{workspace.database}{name}").unlink(missing_ok=True)
    capsys.readouterr()
    for command in (["status"], ["pass"], ["audit"]):
        assert main([*command, "-c", str(workspace.config_path)]) == 3
        line = one_error_line(capsys.readouterr().err)
        assert "is damaged" in line and "Restore it from a backup" in line


@contextlib.contextmanager
def small_mount(where: Path, size: str) -> Iterator[Path]:
    """A tmpfs of ``size`` at ``where`` (root only), unmounted afterwards."""
    where.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                          capture_output=True, check=False)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here (needs root): {done.stderr.decode().strip()}")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], check=False)


def test_a_full_disk_and_a_read_only_mount_give_one_line_and_lose_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with small_mount(tmp_path / "ws" / "state", "4m") as state:
        workspace = seeded(tmp_path / "ws")
        assert workspace.database.parent == state
        filler = state / "filler"
        # The suppression outside the file: once the disk is full, closing the file fails too
        # when bytes of the last write are still buffered (as they are or not by how the free
        # space falls against the 64 KiB writes, i.e. by the database's size).
        with contextlib.suppress(OSError), filler.open("wb") as handle:
            while True:
                handle.write(b"\0" * 65536)
                handle.flush()
        for week in (13, 14):
            workspace.drop("depots", f"week_{week}.csv", week_file(week))
        capsys.readouterr()
        assert workspace.cli_pass(delivered(13)) == 3
        out, err = capsys.readouterr()
        line = one_error_line(err)
        assert "is full" in line and "nothing is lost" in line
        assert "rolled back" not in out
        # Nothing was taken: both files wait in the inbox, unchanged.
        assert sorted(p.name for p in workspace.inbox("depots").glob("*.csv")) == [
            "week_13.csv", "week_14.csv"]

        filler.unlink()
        subprocess.run(["mount", "-o", "remount,ro", str(state)], check=True)
        assert workspace.cli_pass(delivered(13)) == 3
        line = one_error_line(capsys.readouterr().err)
        assert "cannot be written" in line and "read-only" in line

        subprocess.run(["mount", "-o", "remount,rw", str(state)], check=True)
        assert workspace.cli_pass(delivered(13)) == 0
        taken = workspace.query("SELECT name, outcome FROM files ORDER BY id")
        assert taken == [("history.csv", "archived"), ("week_13.csv", "archived"),
                         ("week_14.csv", "archived")]


# ------------------------------------------------------------------ 11. config and inbox


def test_a_secret_typed_into_an_env_key_is_never_echoed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    secret = "hunter2 correct-horse!"
    workspace = make_workspace(tmp_path, extra="\n".join([
        "  email:",
        "    to: [owner@example.org]",
        "    sender: plumbline@example.org",
        "    smtp_host: 127.0.0.1",
        "    security: starttls",
        "    username_env: PLUMBLINE_SMTP_USER",
        f"    password_env: '{secret}'",
        "",
    ]))
    for command in (["check"], ["status"], ["pass"]):
        code = main([*command, "-c", str(workspace.config_path)])
        out, err = capsys.readouterr()
        assert code == 2
        assert "notify.email.password_env" in err and "is not shown" in err
        assert "hunter2" not in out + err and "horse" not in out + err


def test_check_warns_of_security_none_with_a_login_future_times_and_links(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = make_workspace(tmp_path, extra="\n".join([
        "  email:",
        "    to: [owner@example.org]",
        "    sender: plumbline@example.org",
        "    smtp_host: 127.0.0.1",
        "    security: none",
        "    username_env: PLUMBLINE_SMTP_USER",
        "    password_env: PLUMBLINE_SMTP_PASSWORD",
        "",
    ]))
    inbox = workspace.inbox("depots")
    workspace.drop("depots", "week_01.csv", week_file(1), marker=False)
    future = time.time() + 3 * 86400
    os.utime(inbox / "week_01.csv", (future, future))
    outside = tmp_path / "elsewhere.csv"
    outside.write_bytes(b"week_ending,depot,drops,delivery_hours\nsecret,row,1,2\n")
    os.link(outside, inbox / "hard.csv")
    (inbox / "soft.csv").symlink_to(outside)
    capsys.readouterr()
    assert main(["check", "-c", str(workspace.config_path)]) == 0
    out = capsys.readouterr().out
    assert "security is none but a login is configured" in out
    assert "week_01.csv has a modification time 3 days in the future" in out
    assert "hard.csv is a hard link" in out and "soft.csv is a symbolic link" in out

    # A pass reads neither link, quotes nothing of them and leaves them where they are.
    os.utime(inbox / "week_01.csv", None)
    (inbox / "week_01.csv.ready").touch()
    assert workspace.cli_pass(delivered(1)) == 0
    out, err = capsys.readouterr()
    assert "secret" not in out + err
    assert {p.name for p in inbox.iterdir()} == {"hard.csv", "soft.csv"}
    names = [r[0] for r in workspace.query("SELECT name FROM files")]
    assert names == ["week_01.csv"]


# ------------------------------------------------------------------ 9. terminal safety


def test_control_characters_and_bidi_marks_from_a_file_are_escaped_in_status_and_pass(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    hostile = "12\x1b[2J\x1b]0;owned\x07\u202egnp.exe"
    data = csv_bytes(COLUMNS, [[week_ending(13).isoformat(), "north", hostile, 70.0],
                               *rows([13])[1:]])
    workspace.drop("depots", "week\x1b[31m_13.csv", data)
    capsys.readouterr()
    assert workspace.cli_pass(delivered(13)) == 0
    assert main(["status", "-c", str(workspace.config_path)]) == 0
    out, err = capsys.readouterr()
    for raw in ("\x1b", "\x07", "\u202e"):
        assert raw not in out + err
    assert "\\x1b[2J" in out and "\\u202e" in out and "week\\x1b[31m_13.csv" in out
    findings = workspace.query("SELECT message FROM findings WHERE kind = ?",
                               (FindingKind.REJECTED_INPUT.value,))
    assert findings and "\x1b" in findings[0][0]  # stored as sent; escaped when shown




# ------------------------------------------------------------------ 4. duplicates per feed


def test_the_same_bytes_in_two_feeds_are_ingested_into_both(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    second = MODEL.replace("  delivery_hours:", "  delivery_hours_b:").replace(
        "feed: depots", "feed: depots_b")
    workspace = make_workspace(tmp_path, feeds=("depots", "depots_b"),
                               models=MODEL + "\n" + second)
    data = csv_bytes(COLUMNS, rows(range(1, HISTORY_WEEKS + 1), HISTORY_WEEKS + 1))
    workspace.drop("depots", "history.csv", data)
    workspace.drop("depots_b", "history.csv", data)
    assert workspace.cli_pass(delivered(HISTORY_WEEKS)) == 0
    assert workspace.query("SELECT feed, outcome FROM files ORDER BY feed") == [
        ("depots", "archived"), ("depots_b", "archived")]
    per_feed = workspace.query("SELECT s.feed, count(*) FROM observations AS o JOIN series AS s "
                               "ON s.id = o.series_id GROUP BY s.feed ORDER BY s.feed")
    assert per_feed == [("depots", 26), ("depots_b", 26)]
    # Within one feed the same bytes are still a duplicate.
    workspace.drop("depots_b", "again.csv", data)
    assert workspace.cli_pass(delivered(HISTORY_WEEKS) + timedelta(hours=1)) == 0
    assert workspace.query("SELECT outcome FROM files WHERE name = 'again.csv'") == [
        ("duplicate",)]


# ------------------------------------------------------------------ 5. read = archived


def test_a_file_changed_between_its_read_and_its_move_is_quarantined(tmp_path: Path) -> None:
    # The window after the rows are stored and before the file is in the archive: the ingest's
    # own steps (commit_file, then complete_move) with the writer's append in between, as the
    # crash tests of tests/test_ingest.py drive them.
    workspace = seeded(tmp_path)
    config = workspace.config
    spec = ingest_spec("depots", config.feeds["depots"], config, delivered(13))
    first = csv_bytes(COLUMNS, rows([13]))
    workspace.drop("depots", "week_13.csv", first)
    (item,) = inspect_inbox(spec).complete
    with Store.open(workspace.database) as store:
        committed = commit_file(store, spec, item)
        assert committed is not None
        appended = csv_bytes(COLUMNS, rows([14]))[len(",".join(COLUMNS)) + 1:]
        with item.path.open("ab") as writer:
            writer.write(appended)
        report = complete_move(store, spec, committed)
        record = store.get_file(report.file_id)
    rejected = workspace.rejected("depots")
    assert record is not None and record.stored_path == rejected / "week_13.csv"
    assert (rejected / "week_13.csv").read_bytes() == first + appended
    assert not (workspace.archive("depots") / "week_13.csv").exists()
    text = (rejected / "week_13.csv.errors.txt").read_text()
    assert f"{len(first)} bytes were read, it now has {len(first) + len(appended)}" in text
    assert "changed after it was read" in report.problem
    assert [f.severity.value for f in report.findings] == ["warning"]
    assert record.rows_ingested == 2  # the rows read are stored, once


# ------------------------------------------------------------------ 6, 8, 9. stuck, ids, mail


class Inbox:
    """A real SMTP server on loopback (aiosmtpd) keeping every message it accepts."""

    def __init__(self) -> None:
        self.messages: list[bytes] = []

    async def handle_DATA(self, server: object, session: object, envelope: Envelope) -> str:
        self.messages.append(bytes(envelope.original_content or b""))
        return "250 OK"


@contextlib.contextmanager
def smtp_server() -> Iterator[tuple[int, Inbox]]:
    handler = Inbox()
    port = free_port()
    controller = Controller(handler, hostname="127.0.0.1", port=port)
    controller.start()
    try:
        yield port, handler
    finally:
        controller.stop()


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@contextlib.contextmanager
def trickling_server() -> Iterator[tuple[int, list[float]]]:
    """A server on loopback that greets one byte every 0.3 s, forever: each read completes
    well within any timeout, and the greeting never does. Yields its port and the times at
    which connections came in."""
    listener = socket.socket()
    listener.bind(("127.0.0.1", 0))
    listener.listen(8)
    listener.settimeout(0.2)
    stop = threading.Event()
    arrivals: list[float] = []

    def serve(conn: socket.socket) -> None:
        with conn:
            for byte in itertools.cycle(b"220-slow "):
                if stop.is_set():
                    return
                try:
                    conn.sendall(bytes([byte]))
                except OSError:
                    return
                time.sleep(0.3)

    def accept() -> None:
        while not stop.is_set():
            try:
                conn, _ = listener.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            arrivals.append(time.monotonic())
            threading.Thread(target=serve, args=(conn,), daemon=True).start()

    thread = threading.Thread(target=accept, daemon=True)
    thread.start()
    try:
        yield int(listener.getsockname()[1]), arrivals
    finally:
        stop.set()
        thread.join()
        listener.close()


def email_yaml(port: int, timeout: str = "5s") -> str:
    return "\n".join([
        "  email:",
        "    to: [owner@example.org]",
        "    sender: plumbline@example.org",
        "    smtp_host: 127.0.0.1",
        f"    smtp_port: {port}",
        "    security: none",
        f"    timeout: {timeout}",
        "",
    ])


BAD_WEEK = csv_bytes(["week_ending", "depot", "delivery_hours"],
                     [[week_ending(13).isoformat(), "north", 70.0]])  # lacks 'drops'


def test_pages_that_cannot_be_written_never_cost_a_message(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with smtp_server() as (port, received), \
            small_mount(tmp_path / "ws" / "reports", "1m") as reports:
        workspace = seeded(tmp_path / "ws", extra=email_yaml(port))
        sent_before = len(received.messages)
        subprocess.run(["mount", "-o", "remount,ro", str(reports)], check=True)
        workspace.drop("depots", "week\x1b[2J_13.csv", BAD_WEEK)
        capsys.readouterr()
        assert workspace.cli_pass(delivered(13)) == 0
        out = capsys.readouterr().out
        assert "skipped: notify:" in out and "Read-only file system" in out
        # The message about the refused file went out although no page could be written.
        assert len(received.messages) == sent_before + 1
        message = BytesParser(policy=default).parsebytes(received.messages[-1])
        text = message.get_body(preferencelist=("plain",))
        assert text is not None
        plain = text.get_content()
        assert "week\\x1b[2J_13.csv" in plain and "\x1b" not in plain
        assert main(["status", "-c", str(workspace.config_path)]) == 0
        status = capsys.readouterr().out
        assert "problem: pass 2 could not do everything: notify:" in status
        # Writable again: the next pass writes the pages the last one could not.
        subprocess.run(["mount", "-o", "remount,rw", str(reports)], check=True)
        workspace.drop("depots", "week_13.csv", week_file(13))
        assert workspace.cli_pass(delivered(13) + timedelta(hours=1)) == 0
        assert (reports / "pass-2.html").exists() and (reports / "pass-3.html").exists()
        assert len(received.messages) == sent_before + 1 + 0  # nothing sent twice


def test_a_feed_whose_files_cannot_be_moved_raises_a_finding_and_a_status_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with small_mount(tmp_path / "ws" / "feeds" / "depots" / "archive", "1m") as archive:
        workspace = seeded(tmp_path / "ws")
        subprocess.run(["mount", "-o", "remount,ro", str(archive)], check=True)
        workspace.drop("depots", "week_13.csv", week_file(13))
        assert workspace.cli_pass(delivered(13)) == 0
        assert main(["status", "-c", str(workspace.config_path)]) == 0
        out = capsys.readouterr().out
        assert "warning" in out
        assert ("week_13.csv: its rows are stored (file id 2) but it could not be put in place "
                "(Read-only file system); it is still in the inbox") in out
        assert "problem: pass 2 could not do everything: feed depots: week_13.csv" in out
        assert (workspace.inbox("depots") / "week_13.csv").exists()
        # Fixed: the next pass finishes the move; the rows were stored once.
        subprocess.run(["mount", "-o", "remount,rw", str(archive)], check=True)
        assert workspace.cli_pass(delivered(13) + timedelta(hours=1)) == 0
        assert (archive / "week_13.csv").read_bytes() == week_file(13)
        assert workspace.observation_count() == 26 + 4


def test_an_outbox_that_keeps_failing_and_a_trickling_server_are_visible(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with trickling_server() as (port, arrivals):
        workspace = seeded(tmp_path, extra=email_yaml(port, timeout="1s"))
        workspace.drop("depots", "week_13.csv", BAD_WEEK)
        capsys.readouterr()
        started = time.monotonic()
        assert workspace.cli_pass(delivered(13)) == 0
        took = time.monotonic() - started
        # One message, one connection, cut at 4 x the 1 s timeout however slowly bytes come.
        assert len(arrivals) == 1 and took < 30
        assert main(["status", "-c", str(workspace.config_path)]) == 0
        out = capsys.readouterr().out
        assert "problem: outbox: 1 message(s) not sent yet" in out
        assert "not done within the overall deadline of 4 s per message" in out


def test_the_daemon_stops_on_the_first_sigterm_while_a_server_trickles(tmp_path: Path) -> None:
    with trickling_server() as (port, arrivals):
        workspace = seeded(tmp_path, extra=email_yaml(port, timeout="60s"))
        text = workspace.config_path.read_text().replace("scan: 30s", "scan: 1s")
        workspace.config_path.write_text(text)
        workspace.drop("depots", "week_13.csv", BAD_WEEK)
        env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
        daemon = subprocess.Popen(
            [sys.executable, "-m", "monitor", "run", "-c", str(workspace.config_path)],
            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        )
        try:
            deadline = time.monotonic() + 90
            while not arrivals:  # the pass's message is being sent, a byte at a time
                assert time.monotonic() < deadline and daemon.poll() is None
                time.sleep(0.05)
            time.sleep(1.0)
            signalled = time.monotonic()
            daemon.send_signal(signal.SIGTERM)
            _, err = daemon.communicate(timeout=20)
            stopped_after = time.monotonic() - signalled
        finally:
            if daemon.poll() is None:
                daemon.kill()
                daemon.wait()
    assert daemon.returncode == 0, err
    assert stopped_after < 5, f"took {stopped_after:.1f} s to stop"
    log = err.decode()
    assert "daemon_stopped" in log
    # The message stays in the outbox, untouched by the cut send, for the next start.
    assert workspace.query("SELECT count(*) FROM outbox WHERE sent_at IS NULL")[0][0] == 1


def test_message_ids_differ_between_two_databases_with_the_same_history(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with smtp_server() as (port, received):
        ids = []
        for name in ("first", "second"):
            workspace = seeded(tmp_path / name, extra=email_yaml(port))
            workspace.drop("depots", "week_13.csv", BAD_WEEK)
            assert workspace.cli_pass(delivered(13)) == 0
            ids.append(workspace.query("SELECT dedupe_key FROM outbox ORDER BY id")[-1][0])
        headers = [BytesParser(policy=default).parsebytes(m, headersonly=True)
                   for m in received.messages]
        message_ids = [str(h["Message-ID"]) for h in headers]
    assert ids[0] == ids[1]  # the same pass number, the same key: the ids must still differ
    assert len(message_ids) == 2 and message_ids[0] != message_ids[1]
    identities = {Workspace(tmp_path / n).query("SELECT token FROM database_identity")[0][0]
                  for n in ("first", "second")}
    assert len(identities) == 2 and all(len(token) == 32 for token in identities)


# ------------------------------------------------------------------ 1. a file too large


LIMITED_PASS = """
import resource, sys
from monitor.cli import main
import monitor.passes, monitor.notify, monitor.commands.one_pass  # everything a pass imports
size = int(open("/proc/self/status").read().split("VmSize:")[1].split()[0]) * 1024
headroom = 1024 * 2**20
resource.setrlimit(resource.RLIMIT_AS, (size + headroom, size + headroom))
sys.exit(main(sys.argv[1:]))
"""


def test_a_file_too_large_to_read_leaves_the_other_feeds_going_with_a_finding(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    second = MODEL.replace("  delivery_hours:", "  delivery_hours_b:").replace(
        "feed: depots", "feed: depots_b")
    workspace = make_workspace(tmp_path, feeds=("depots", "depots_b"),
                               models=MODEL + "\n" + second)
    data = csv_bytes(COLUMNS, rows(range(1, HISTORY_WEEKS + 1), HISTORY_WEEKS + 1))
    huge = workspace.inbox("depots") / "huge.csv"
    with huge.open("wb") as handle:  # sparse: 2 GiB of NUL bytes that take no disk space
        handle.truncate(2 * 2**30)
    (workspace.inbox("depots") / "huge.csv.ready").touch()
    workspace.drop("depots", "history.csv", data)
    workspace.drop("depots_b", "history.csv", data)
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    # plumbline pass with its address space capped 1 GiB above what its imports take: less
    # than the file, so it cannot be read whole.
    done = subprocess.run(
        [sys.executable, "-c", LIMITED_PASS, "pass", "-c", str(workspace.config_path),
         "--as-of", delivered(HISTORY_WEEKS).isoformat()],
        env=env, capture_output=True, text=True, timeout=300, check=False,
    )
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    taken = workspace.query("SELECT feed, name, outcome FROM files WHERE outcome = 'archived' "
                            "ORDER BY feed, name")
    assert taken == [("depots", "history.csv", "archived"), ("depots_b", "history.csv", "archived")]
    # The ingest reads in bounded memory (issue 15), so the 2 GiB file is screened in blocks
    # and refused for what it is; a reader that ran out of memory instead would leave it in the
    # inbox with "too large to read in the memory available" (monitor.ingest._file_problem).
    # Either way: the other feeds go on, and a warning names the file and the reason.
    findings = workspace.query("SELECT feed, severity, message FROM findings WHERE kind = ? "
                               "AND state != 'cleared'", (FindingKind.REJECTED_INPUT.value,))
    assert [(f[0], f[1]) for f in findings] == [("depots", "warning")]
    assert "huge.csv" in findings[0][2]
    assert ("it is binary data" in findings[0][2]
            or "too large to read in the memory available" in findings[0][2])
    kept = [p for p in (huge, workspace.rejected("depots") / "huge.csv") if p.exists()]
    assert [p.stat().st_size for p in kept] == [2 * 2**30]  # never altered, never lost


# ------------------------------------------------------------------ 7, 11. rows and encodings


def _rejected_reasons(workspace: Workspace, name: str) -> dict[int, str]:
    path = workspace.rejected("depots") / f"{name}.rejected.csv"
    with path.open(encoding="utf-8", newline="") as handle:
        return {int(row[0]): row[1] for row in list(csv.reader(handle))[1:]}


def test_an_actual_dated_far_beyond_the_business_clock_is_rejected_as_a_row(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    typo = week_ending(13).replace(year=2204).isoformat()  # 2024 typed as 2204
    data = csv_bytes(COLUMNS, [[typo, "north", 120, 66.1], *rows([13])[1:],
                               *rows([], 14)])
    workspace.drop("depots", "week_13.csv", data)
    assert workspace.cli_pass(delivered(13)) == 0
    reasons = _rejected_reasons(workspace, "week_13.csv")
    assert list(reasons) == [2]
    assert f"'week_ending' holds '{typo}', an actual dated after" in reasons[2]
    # The feed's latest period stays in 2024, so a feed that stops is still seen as stale.
    assert workspace.query("SELECT max(period) FROM observations WHERE is_plan = 0")[0][0] == (
        week_ending(14 - 1).isoformat())
    assert main(["pass", "-c", str(workspace.config_path), "--as-of",
                 delivered(20).isoformat()]) == 0
    stale = workspace.query("SELECT count(*) FROM findings WHERE kind = 'stale_feed'")
    assert stale == [(1,)]


def test_a_huge_field_in_an_unused_column_does_not_refuse_the_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    columns = (*COLUMNS, "comment")
    data = csv_bytes(columns, [[*row, "x" * (10 * 2**20) if i == 0 else "ok"]
                               for i, row in enumerate(rows([13], 14))])
    workspace.drop("depots", "week_13.csv", data)
    assert workspace.cli_pass(delivered(13)) == 0
    assert workspace.query("SELECT outcome, rows_ingested, rows_rejected FROM files "
                           "WHERE name = 'week_13.csv'") == [("archived", 4, 0)]


def test_utf16_is_named_as_such(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    workspace = seeded(tmp_path)
    text = week_file(13).decode()
    workspace.drop("depots", "bom.csv", text.encode("utf-16"))  # with a byte-order mark
    workspace.drop("depots", "plain.csv", text.encode("utf-16-le"))  # without one
    assert workspace.cli_pass(delivered(13)) == 0
    outcomes = dict(workspace.query("SELECT name, outcome FROM files WHERE pass_id = 2"))
    assert outcomes == {"bom.csv": "rejected", "plain.csv": "rejected"}
    for name in ("bom.csv", "plain.csv"):
        report = (workspace.rejected("depots") / f"{name}.errors.txt").read_text()
        assert "the file is UTF-16LE text (UTF-16), not UTF-8" in report
        assert "binary" not in report


def test_values_whose_square_is_beyond_the_float_range_are_rejected_as_rows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    data = csv_bytes(COLUMNS, [[week_ending(13).isoformat(), "north", "1e200", 66.1],
                               [week_ending(13).isoformat(), "south", 120, "-3e160"],
                               *rows([14])])
    workspace.drop("depots", "week_13.csv", data)
    assert workspace.cli_pass(delivered(14)) == 0
    reasons = _rejected_reasons(workspace, "week_13.csv")
    assert list(reasons) == [2, 3]
    assert "'drops' holds '1e200', too large to compute with" in reasons[2]
    assert "'delivery_hours' holds '-3e160', too large" in reasons[3]
    not_estimable = workspace.query("SELECT count(*) FROM findings WHERE kind = 'not_estimable'")
    assert not_estimable == [(0,)]


@pytest.mark.parametrize(("period", "phrase"), [
    ("2024-W14", "an ISO week date"),
    ("2024W141", "an ISO week date"),
    ("20240407", "not an ISO 8601 date"),
    ("20240407T000000", "not an ISO 8601 date"),
])
def test_week_and_compact_periods_are_refused(
    period: str, phrase: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = seeded(tmp_path)
    data = csv_bytes(COLUMNS, [[period, "north", 120, 66.1], *rows([13])[1:]])
    workspace.drop("depots", "week_13.csv", data)
    assert workspace.cli_pass(delivered(13)) == 0
    reasons = _rejected_reasons(workspace, "week_13.csv")
    assert list(reasons) == [2] and phrase in reasons[2]
    stored = workspace.query("SELECT count(*) FROM observations WHERE period = '2024-04-07'")
    assert stored == [(0,)]  # never read as the Monday or the day it might mean


def test_the_daemon_logs_what_is_stuck_at_warning_level_with_controls_escaped(
    tmp_path: Path,
) -> None:
    closed = free_port()  # nothing listens here: every send fails
    workspace = seeded(tmp_path, extra=email_yaml(closed, timeout="1s"))
    # A reports folder that cannot be made: a plain file stands where its parent should be,
    # and its name carries an escape sequence.
    blocker = tmp_path / "reports\x1b[31m"
    blocker.write_text("not a folder")
    text = workspace.config_path.read_text().replace("scan: 30s", "scan: 1s").replace(
        "html_dir: reports", 'html_dir: "reports\\e[31m/pages"')
    workspace.config_path.write_text(text)
    workspace.drop("depots", "week_13.csv", BAD_WEEK)
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    daemon = subprocess.Popen(
        [sys.executable, "-m", "monitor", "run", "-c", str(workspace.config_path)],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 90
        while not workspace.query("SELECT count(*) FROM outbox WHERE attempts > 0")[0][0]:
            assert time.monotonic() < deadline and daemon.poll() is None
            time.sleep(0.2)
        time.sleep(1.0)
        daemon.send_signal(signal.SIGTERM)
        _, err = daemon.communicate(timeout=30)
    finally:
        if daemon.poll() is None:
            daemon.kill()
            daemon.wait()
    assert daemon.returncode == 0
    log = err.decode()
    warnings = [line for line in log.splitlines() if " warning " in line]
    assert any(" warning pass: pass 2 could not do everything: notify:" in line
               for line in warnings), log
    assert any(" warning outbox: 1 message(s) not sent yet" in line for line in warnings), log
    assert "\x1b" not in log and "reports\\x1b[31m" in log
