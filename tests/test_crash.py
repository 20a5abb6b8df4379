"""Crash safety (DESIGN.md section 12): a ``plumbline pass`` killed with SIGKILL at a known point of
a stage, then a fresh ``plumbline pass`` at the same business clock, ends in the same state as a
pass that was never killed.

How the kill lands where it should: the killed process is a real ``plumbline pass`` (the CLI's
``main``, lock and all) started by a small driver script that first wraps one function on the
pass's path (``monitor.ingest.complete_move``, ``monitor.passes.analyse_batch``, ...) so that its
N-th call sends SIGKILL to the process itself, before or after the real call runs. Nothing of
the code under test is replaced: the wrapped function does its real work, and the process dies
at that exact point the way ``kill -9`` would kill it. Each case first checks the database the
dead process left (read-only) to show the stage was caught half-way.

The workspace is the demo scenario (``monitor.demo``) replayed in this process up to week 77;
each case drops week 78's files (and, for the ingest case, one extra file with a bad row,
taken first) into a copy of it. The oracle is the same copy run once without a kill: the
observations, files, forecasts, outcomes, baselines, findings and queued messages after
"killed, then run again" must equal those after "run once".
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import textwrap
import threading
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest

from monitor.commands.one_pass import pass_notifier
from monitor.config import load_config
from monitor.demo import CONFIG_NAME, inbox_paths, weeks
from monitor.demo.replay import drop_week, replay_scenario
from monitor.lock import DatabaseLock, lock_path_for
from monitor.passes import run_pass
from monitor.store import Store

WEEK = 78  # a week after the baselines (weeks 1-52) with scoring, forecasts and findings to do
PASS_NUMBER = re.compile(r"pass[: ]\d+")
SIDE_SUFFIXES = (".errors.txt", ".rejected.csv", ".ready")
BAD_FILE = "late_corrections.csv"
# One row whose order_lines is text: a row rejection, so the file is archived with a
# NAME.rejected.csv and the pass must raise a rejected_input notice on the warehouse feed.
BAD_FILE_TEXT = (
    "week_ending,order_lines,pick_hours,inbound_pallets,receiving_hours,returned_items,"
    "returns_hours\n"
    "2026-06-28,forty thousand,1120.5,1480,690.2,3310,301.7\n"
)

DRIVER = textwrap.dedent(
    '''
    """Run `plumbline pass ARGS` in this process; die by SIGKILL at the N-th call of TARGET."""
    import importlib
    import os
    import signal
    import sys


    def main() -> int:
        target, when, nth = sys.argv[1], sys.argv[2], int(sys.argv[3])
        module_name, _, qualname = target.partition(":")
        owner = importlib.import_module(module_name)
        *path, attr = qualname.split(".")
        for part in path:
            owner = getattr(owner, part)
        original = getattr(owner, attr)
        calls = 0

        def wrapper(*args, **kwargs):
            nonlocal calls
            calls += 1
            if when == "before" and calls == nth:
                os.kill(os.getpid(), signal.SIGKILL)
            result = original(*args, **kwargs)
            if when == "after" and calls == nth:
                os.kill(os.getpid(), signal.SIGKILL)
            return result

        setattr(owner, attr, wrapper)
        from monitor.cli import main as plumbline

        return plumbline(["pass", *sys.argv[4:]])


    sys.exit(main())
    '''
)


# -- reading what a database holds ------------------------------------------------------------


def _database(root: Path) -> Path:
    return root / "state" / "plumbline.sqlite"


def _query(root: Path, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Rows of ``sql`` from a read-only connection (never the store's own code)."""
    conn = sqlite3.connect(f"file:{_database(root)}?mode=ro", uri=True)
    try:
        return list(conn.execute(sql, params).fetchall())
    finally:
        conn.close()


def _rounded(row: tuple[Any, ...]) -> tuple[Any, ...]:
    return tuple(round(v, 9) if isinstance(v, float) else v for v in row)


@dataclass(frozen=True)
class Snapshot:
    """What a workspace holds, without database ids (they may differ between two histories)."""

    observations: Counter[tuple[Any, ...]]
    files: Counter[tuple[Any, ...]]
    forecasts: Counter[tuple[Any, ...]]
    outcomes: Counter[tuple[Any, ...]]
    baselines: Counter[tuple[Any, ...]]
    findings: Counter[tuple[Any, ...]]
    outbox: Counter[tuple[Any, ...]]
    stored_files: Counter[str]  # sha256 of each data file in archive/ and rejected/
    inbox_files: tuple[str, ...]  # data files still in an inbox
    pass_states: tuple[str, ...]


def snapshot(root: Path) -> Snapshot:
    def counted(sql: str) -> Counter[tuple[Any, ...]]:
        return Counter(_rounded(row) for row in _query(root, sql))

    stored: Counter[str] = Counter()
    left: list[str] = []
    for feed_folder in sorted((root / "feeds").iterdir()):
        for folder in ("archive", "rejected"):
            for path in sorted((feed_folder / folder).glob("*")):
                if path.is_file() and not path.name.endswith(SIDE_SUFFIXES):
                    stored[hashlib.sha256(path.read_bytes()).hexdigest()] += 1
        inbox = feed_folder / "inbox"
        left += [p.name for p in sorted(inbox.glob("*")) if not p.name.endswith(".ready")]
    return Snapshot(
        observations=counted(
            "SELECT s.feed, s.key, o.period, o.period_key, o.is_plan, o.revision, o.current, "
            "hex(o.vals) FROM observations o JOIN series s ON s.id = o.series_id"
        ),
        files=counted(
            "SELECT feed, name, sha256, outcome, rows_ingested, rows_plan, rows_rejected, "
            "moved_at IS NOT NULL FROM files"
        ),
        # A forecast is named by what it answers: the plan row's series and period.
        forecasts=counted(
            "SELECT f.model, f.series_key, f.target_period_key, s.key, o.period_key, f.lead, "
            "f.point, f.lower, f.upper, f.mean_lower, f.mean_upper, f.leverage, "
            "f.extrapolation, f.level, f.issued_at FROM forecasts f "
            "LEFT JOIN observations o ON o.id = f.observation_id "
            "LEFT JOIN series s ON s.id = o.series_id"
        ),
        outcomes=counted(
            "SELECT f.model, f.series_key, f.target_period_key, o.actual, o.outcome "
            "FROM outcomes o JOIN forecasts f ON f.id = o.forecast_id"
        ),
        baselines=counted(
            "SELECT model, version, series_key, start_key, end_key, set_by, "
            "monitoring_start_key FROM baselines"
        ),
        findings=counted(
            # open or cleared: a finding raised by a week's pass is 'new' in it and 'ongoing'
            # after the next, and a kill after the findings makes the week take two passes
            "SELECT model, series_key, feed, kind, severity, "
            "CASE state WHEN 'cleared' THEN 'cleared' ELSE 'open' END, since_period, statistic, "
            "p_value, false_streak, acknowledged_at IS NOT NULL FROM findings"
        ),
        # One message per owner and pass; the pass's number is left out, as it differs when the
        # week's pass had to be run twice.
        outbox=Counter(
            tuple(PASS_NUMBER.sub("pass #", str(v)) for v in row)
            for row in _query(root, "SELECT kind, dedupe_key, recipients, subject, "
                                    "sent_at IS NOT NULL FROM outbox")
        ),
        stored_files=stored,
        inbox_files=tuple(left),
        pass_states=tuple(row[0] for row in _query(root, "SELECT status FROM passes ORDER BY id")),
    )


def _difference(what: str, got: Counter[Any], expected: Counter[Any]) -> str:
    extra = sorted((got - expected).elements(), key=repr)
    missing = sorted((expected - got).elements(), key=repr)
    return (
        f"{what}: {len(extra)} more and {len(missing)} fewer than in a pass never killed\n"
        f"  only after the kill: {extra[:6]}\n  only in the pass never killed: {missing[:6]}"
    )


# -- the workspace ----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo replayed through week WEEK - 1, closed and unlocked."""
    root = tmp_path_factory.mktemp("base")
    replay_scenario(root, last_week=WEEK - 1)  # no pages or messages: only week WEEK's matter
    # Messages are queued and their delivery tried; point it at a loopback port nobody serves,
    # so every run sees the same refusal and no message is marked sent.
    config = root / CONFIG_NAME
    text = config.read_text(encoding="utf-8")
    assert "smtp_port: 25\n" in text
    config.write_text(text.replace("smtp_port: 25\n", f"smtp_port: {_closed_port()}\n")
                      .replace("smtp_host: localhost", "smtp_host: 127.0.0.1"), encoding="utf-8")
    return root


def _closed_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _drop_bad_file(root: Path) -> Path:
    """The extra warehouse file: renamed into the inbox with a marker, an hour older than the
    week's files so the survey (oldest first) takes it first."""
    inbox = inbox_paths(root)["warehouse"]
    temporary = inbox / f"{BAD_FILE}.part"
    temporary.write_text(BAD_FILE_TEXT, encoding="utf-8")
    final = inbox / BAD_FILE
    os.replace(temporary, final)
    (inbox / f"{BAD_FILE}.ready").touch()
    hour_ago = final.stat().st_mtime - 3600
    os.utime(final, (hour_ago, hour_ago))
    return final


def prepare(base: Path, destination: Path, *, bad_file: bool) -> tuple[Path, str]:
    """A copy of the base with week WEEK's files dropped; returns it and the week's clock."""
    shutil.copytree(base, destination)
    if bad_file:
        _drop_bad_file(destination)
    week = weeks(destination)[WEEK - 1]
    drop_week(week, inbox_paths(destination))
    return destination, week.delivered_at.isoformat()


def dropped_hashes(root: Path, *, bad_file: bool) -> Counter[str]:
    """The sha256 of every file ever dropped into the workspace's inboxes."""
    paths = [path for week in weeks(root)[:WEEK] for path in week.files.values()]
    digests = Counter(hashlib.sha256(p.read_bytes()).hexdigest() for p in paths)
    if bad_file:
        digests[hashlib.sha256(BAD_FILE_TEXT.encode("utf-8")).hexdigest()] += 1
    return digests


def reference_snapshots(
    base: Path, tmp_path_factory: pytest.TempPathFactory
) -> dict[bool, Snapshot]:
    """Week WEEK's pass never killed, with and without the bad file: the oracle."""
    result: dict[bool, Snapshot] = {}
    for bad_file in (False, True):
        root, _ = prepare(base, tmp_path_factory.mktemp("reference") / "ws", bad_file=bad_file)
        config = load_config(root / CONFIG_NAME)
        with DatabaseLock(config.database):
            run_pass(config, as_of=weeks(root)[WEEK - 1].delivered_at, notifier=pass_notifier())
        result[bad_file] = snapshot(root)
    return result


# -- the kill points --------------------------------------------------------------------------


def _week_files_moved(root: Path) -> list[tuple[str, int]]:
    return _query(root, "SELECT name, moved_at IS NOT NULL FROM files WHERE pass_id = "
                        "(SELECT max(id) FROM passes) ORDER BY id")


def _left_between_commit_and_move(root: Path) -> None:
    files = _week_files_moved(root)
    assert [moved for _, moved in files] == [1, 1, 0], files  # the third file is recorded, unmoved
    assert (inbox_paths(root)["fleet"] / files[2][0]).exists()


def _left_after_the_first_model(root: Path) -> None:
    latest = "(SELECT max(id) FROM passes)"
    fitted = _query(root, f"SELECT DISTINCT model FROM fits WHERE pass_id = {latest}")
    forecast = _query(root, f"SELECT DISTINCT model FROM forecasts WHERE pass_id = {latest}")
    assert fitted == [("pick_hours",)] and forecast == [("pick_hours",)], (fitted, forecast)


def _left_inside_the_findings_transaction(root: Path) -> None:
    latest = "(SELECT max(id) FROM passes)"
    # every model was analysed and forecast; the findings transaction left nothing
    models = _query(root, f"SELECT count(DISTINCT model) FROM fits WHERE pass_id = {latest}")
    assert models == [(7,)]
    assert _query(root, f"SELECT count(*) FROM findings WHERE last_pass_id = {latest}") == [(0,)]


def _left_before_notifying(root: Path) -> None:
    latest = "(SELECT max(id) FROM passes)"
    # The pass is recorded as finished before its notify step, which its record says has not
    # run yet (the next pass finishes it).
    assert _query(
        root, f"SELECT status, json_extract(counts, '$.notified') FROM passes WHERE id = {latest}"
    ) == [("finished", 0)]
    assert _query(root, f"SELECT count(*) > 0 FROM findings WHERE last_pass_id = {latest}") == [
        (1,)
    ]
    assert _query(root, f"SELECT count(*) FROM outbox WHERE pass_id = {latest}") == [(0,)]


@dataclass(frozen=True)
class KillPoint:
    name: str
    target: str  # module:qualified name of the function whose call kills
    when: str  # "before" or "after" the real call
    nth: int
    bad_file: bool
    left: Callable[[Path], None]  # what the dead process left, checked before the next pass


KILL_POINTS = (
    KillPoint("ingest-between-commit-and-move", "monitor.ingest:complete_move",
              "before", 3, True, _left_between_commit_and_move),
    KillPoint("refit-after-the-first-model", "monitor.passes:analyse_batch",
              "before", 2, False, _left_after_the_first_model),
    KillPoint("findings-inside-the-transaction", "monitor.store:Store.upsert_finding",
              "after", 2, False, _left_inside_the_findings_transaction),
    KillPoint("notify-after-the-findings", "monitor.commands.one_pass:notify_pass",
              "before", 1, False, _left_before_notifying),
)


@dataclass(frozen=True)
class Recovered:
    point: KillPoint
    root: Path
    killed_pid: int
    killed_returncode: int
    lock_text_after_kill: str
    left_check: str | None  # None when the dead process left the stage half-done as planned
    killed_stderr: str
    resumed: subprocess.CompletedProcess[str]
    after: Snapshot


@dataclass(frozen=True)
class Trial:
    """A kill point's workspace, its killed process and the pass after it."""

    point: KillPoint
    root: Path
    as_of: str
    killed: subprocess.Popen[str]


def _start_killed_pass(point: KillPoint, base: Path, folder: Path) -> Trial:
    root, as_of = prepare(base, folder / "ws", bad_file=point.bad_file)
    driver = folder / "kill_driver.py"
    driver.write_text(DRIVER, encoding="utf-8")
    killed = subprocess.Popen(
        [sys.executable, str(driver), point.target, point.when, str(point.nth),
         "-c", str(root / CONFIG_NAME), "--as-of", as_of],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    return Trial(point, root, as_of, killed)


@pytest.fixture(scope="module")
def trials(
    base: Path, tmp_path_factory: pytest.TempPathFactory
) -> tuple[dict[str, Recovered], dict[bool, Snapshot]]:
    """Every kill point's outcome, and the oracle. The processes of the kill points run side by
    side (each in its own workspace), and the oracle is worked out meanwhile."""
    started = [
        _start_killed_pass(point, base, tmp_path_factory.mktemp(point.name))
        for point in KILL_POINTS
    ]
    references = reference_snapshots(base, tmp_path_factory)
    dead: list[tuple[Trial, str, str, str | None]] = []
    for trial in started:
        _, stderr = trial.killed.communicate(timeout=300)
        lock_text = lock_path_for(_database(trial.root)).read_text(encoding="ascii")
        try:
            trial.point.left(trial.root)
            left_check = None
        except AssertionError as exc:
            left_check = f"{exc}"
        dead.append((trial, stderr, lock_text, left_check))
    resumed = [
        subprocess.Popen(
            [sys.executable, "-m", "monitor", "pass", "-c", str(trial.root / CONFIG_NAME),
             "--as-of", trial.as_of],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        for trial, *_ in dead
    ]
    results: dict[str, Recovered] = {}
    for (trial, stderr, lock_text, left_check), process in zip(dead, resumed, strict=True):
        out, err = process.communicate(timeout=300)
        done = subprocess.CompletedProcess(process.args, process.returncode, out, err)
        results[trial.point.name] = Recovered(
            trial.point, trial.root, trial.killed.pid, trial.killed.returncode, lock_text,
            left_check, stderr, done, snapshot(trial.root),
        )
    return results, references


@pytest.fixture(params=KILL_POINTS, ids=lambda p: p.name)
def recovered(
    request: pytest.FixtureRequest, trials: tuple[dict[str, Recovered], dict[bool, Snapshot]]
) -> Recovered:
    return trials[0][request.param.name]


@pytest.fixture
def references(trials: tuple[dict[str, Recovered], dict[bool, Snapshot]]) -> dict[bool, Snapshot]:
    return trials[1]


# -- the tests --------------------------------------------------------------------------------


def test_the_kill_lands_half_way_through_the_stage(recovered: Recovered) -> None:
    assert recovered.killed_returncode == -signal.SIGKILL, recovered.killed_stderr
    assert recovered.left_check is None, recovered.left_check


def test_the_next_pass_is_not_blocked_by_the_dead_holders_lock(recovered: Recovered) -> None:
    # The dead process held the flock: the pid in the lock file is written only once it is.
    assert recovered.lock_text_after_kill.strip() == str(recovered.killed_pid)
    assert recovered.resumed.returncode == 0, recovered.resumed.stderr
    assert recovered.resumed.stdout.startswith("Pass ")
    # the dead pass is marked interrupted by the next one, which finishes; killed after its
    # findings, it had finished its work and only its notify step is left to the next pass
    dead = "finished" if recovered.point.name == "notify-after-the-findings" else "interrupted"
    assert recovered.after.pass_states[-2:] == (dead, "finished")
    assert lock_path_for(_database(recovered.root)).read_text(encoding="ascii") == ""


def test_every_dropped_file_is_stored_once_and_rows_are_not_doubled(
    recovered: Recovered, references: dict[bool, Snapshot]
) -> None:
    after = recovered.after
    reference = references[recovered.point.bad_file]
    assert after.inbox_files == ()
    assert after.stored_files == dropped_hashes(recovered.root, bad_file=recovered.point.bad_file)
    assert after.files == reference.files, _difference("files", after.files, reference.files)
    assert after.observations == reference.observations, _difference(
        "observations", after.observations, reference.observations
    )


def test_forecasts_outcomes_and_baselines_are_kept_once(
    recovered: Recovered, references: dict[bool, Snapshot]
) -> None:
    after = recovered.after
    reference = references[recovered.point.bad_file]
    per_plan_row = Counter((row[0], row[3], row[4]) for row in after.forecasts.elements())
    assert max(per_plan_row.values()) == 1, "a plan row was forecast twice by one model"
    assert after.forecasts == reference.forecasts, _difference(
        "forecasts", after.forecasts, reference.forecasts
    )
    assert after.outcomes == reference.outcomes, _difference(
        "outcomes", after.outcomes, reference.outcomes
    )
    assert after.baselines == reference.baselines, _difference(
        "baselines", after.baselines, reference.baselines
    )


def test_findings_equal_those_of_a_pass_never_killed(
    recovered: Recovered, references: dict[bool, Snapshot]
) -> None:
    after = recovered.after
    reference = references[recovered.point.bad_file]
    assert after.findings == reference.findings, _difference(
        "findings", after.findings, reference.findings
    )


def test_owners_get_the_messages_of_a_pass_never_killed(
    recovered: Recovered, references: dict[bool, Snapshot]
) -> None:
    after = recovered.after
    reference = references[recovered.point.bad_file]
    assert after.outbox == reference.outbox, _difference("outbox", after.outbox, reference.outbox)


def test_a_pass_stopped_before_its_findings_leaves_them_to_the_next_pass(
    base: Path, references: dict[bool, Snapshot], tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The daemon's SIGTERM sets ``stop_requested``; a pass checks it between stages. Here it is
    set while the pass works out the feed-level findings (a real call, unchanged), so the pass
    stops before recording findings. A later pass (the daemon restarted an hour on) must then
    record what the stopped one did not."""
    root, _ = prepare(base, tmp_path / "ws", bad_file=False)
    config = load_config(root / CONFIG_NAME)
    as_of = weeks(root)[WEEK - 1].delivered_at
    stop = threading.Event()
    original = Store.latest_actual_period  # what the stale_feed check reads

    def latest_period_then_stop(self: Store, feed: str) -> Any:
        stop.set()
        return original(self, feed)

    with DatabaseLock(config.database):
        monkeypatch.setattr(Store, "latest_actual_period", latest_period_then_stop)
        stopped = run_pass(config, as_of=as_of, stop_requested=stop, notifier=pass_notifier())
        monkeypatch.undo()
        assert stopped.stopped_early == "findings"
        run_pass(config, as_of=as_of + timedelta(hours=1), notifier=pass_notifier())
    after = snapshot(root)
    reference = references[False]
    assert after.forecasts == reference.forecasts
    assert after.findings == reference.findings, _difference(
        "findings", after.findings, reference.findings
    )
