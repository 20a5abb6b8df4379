"""``plumbline backup``: a consistent copy of a database that another process is writing.

"A pass is writing" is a real second process: it holds the database's writer lock, as a pass
does, and commits batches of rows through the Store API in a loop, each batch one transaction
with a pause in the middle (half the rows written, half not yet). A copy made meanwhile must
hold every committed batch whole and no part of an uncommitted one, pass SQLite's integrity
check, and hold exactly the rows the live database has for those batches.
"""

from __future__ import annotations

import sqlite3
import subprocess
import sys
import textwrap
import time
from datetime import UTC, datetime
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.errors import DatabaseLockedError
from monitor.lock import DatabaseLock
from monitor.store import SCHEMA_VERSION, Store, apply_migrations

ROWS_PER_BATCH = 40  # written in two halves inside one transaction

CONFIG = """\
database: state/plumbline.sqlite
timezone: Europe/Berlin
feeds:
  sales:
    inbox: feeds/sales/inbox
    format: csv
    period: week_ending
    cadence: 7d
models:
  units:
    feed: sales
    response: units
    predictors: [visits]
notify:
  html_dir: reports
"""

# The writer: takes the lock as a pass would, then commits batch after batch until told to stop.
WRITER = textwrap.dedent(
    """
    import sys, time
    from datetime import UTC, datetime
    from pathlib import Path
    from monitor.lock import DatabaseLock
    from monitor.store import FileOutcome, ObservationRow, Store

    database, stop_file, per_batch = Path(sys.argv[1]), Path(sys.argv[2]), int(sys.argv[3])
    half = per_batch // 2
    with DatabaseLock(database), Store.open(database) as store:
        print("locked", flush=True)
        batch = 0
        while not stop_file.exists() and batch < 5000:
            rows = [
                ObservationRow(
                    "north" if j % 2 else "south", f"p{batch}-{j}", batch * per_batch + j,
                    False, (float(batch), float(j)), j + 2,
                )
                for j in range(per_batch)
            ]
            with store.transaction():
                record = store.record_file(
                    feed="sales", name=f"batch-{batch:05d}.csv", sha256=f"{batch:064x}",
                    size=100, received_at=datetime.now(UTC), outcome=FileOutcome.ARCHIVED,
                    stored_path=f"archive/batch-{batch:05d}.csv",
                )
                store.insert_observations("sales", record.id, ["visits", "units"], rows[:half])
                time.sleep(0.01)  # a transaction caught half-way, as a pass's stage can be
                store.insert_observations("sales", record.id, ["visits", "units"], rows[half:])
            print(batch, flush=True)
            batch += 1
    """
)


@pytest.fixture
def workspace(tmp_path: Path) -> Path:
    (tmp_path / "plumbline.yaml").write_text(CONFIG, encoding="utf-8")
    return tmp_path


def _database(workspace: Path) -> Path:
    return workspace / "state" / "plumbline.sqlite"


def _make_database(workspace: Path) -> Path:
    with Store.open(_database(workspace)):
        pass
    return _database(workspace)


def _backup(workspace: Path, *args: str) -> int:
    return main(["backup", *args, "-c", str(workspace / "plumbline.yaml")])


def _batches(path: Path) -> dict[str, list[tuple[object, ...]]]:
    """Each file's name -> its observation rows (the stored values, byte for byte)."""
    conn = sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True)
    try:
        found: dict[str, list[tuple[object, ...]]] = {}
        for name, file_id in conn.execute("SELECT name, id FROM files ORDER BY id"):
            found[name] = conn.execute(
                "SELECT period, period_key, is_plan, revision, current, vals, line "
                "FROM observations WHERE file_id = ? ORDER BY period_key",
                (file_id,),
            ).fetchall()
        return found
    finally:
        conn.close()


def _read_line(process: subprocess.Popen[str], deadline: float) -> str:
    assert process.stdout is not None
    line = process.stdout.readline()
    if not line:
        stderr = process.stderr.read() if process.stderr else ""
        pytest.fail(f"the writer process ended early (rc {process.poll()}): {stderr}")
    assert time.monotonic() < deadline, "the writer is too slow"
    return line.strip()


def test_backup_while_another_process_writes(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    database = _make_database(workspace)
    stop_file = workspace / "stop"
    writer = subprocess.Popen(
        [sys.executable, "-c", WRITER, str(database), str(stop_file), str(ROWS_PER_BATCH)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    copies: list[Path] = []
    outputs: list[str] = []
    try:
        deadline = time.monotonic() + 60
        assert _read_line(writer, deadline) == "locked"
        # The writer holds the writer lock for the whole test: the backups below cannot be
        # taking it.
        with pytest.raises(DatabaseLockedError):
            DatabaseLock(database).acquire()
        committed = -1
        for attempt in range(3):
            while committed < 4 + 5 * attempt:  # some batches committed before each copy
                committed = int(_read_line(writer, deadline))
            copy = workspace / "backups" / f"copy-{attempt}.sqlite"
            capsys.readouterr()
            assert _backup(workspace, str(copy)) == 0
            outputs.append(capsys.readouterr().out)
            copies.append(copy)
        # The writer went on after the last copy: the copies were made while it was writing.
        last_copied = len(_batches(copies[-1]))
        while committed < last_copied + 3:
            committed = int(_read_line(writer, deadline))
        assert writer.poll() is None
    finally:
        stop_file.touch()
        _, stderr = writer.communicate(timeout=60)
    assert writer.returncode == 0, stderr

    live = _batches(database)
    previous = 0
    for copy, output in zip(copies, outputs, strict=True):
        conn = sqlite3.connect(f"{copy.as_uri()}?mode=ro", uri=True)
        try:
            assert conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
            assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
            observations = conn.execute("SELECT count(*) FROM observations").fetchone()[0]
        finally:
            conn.close()
        assert not Path(f"{copy}-wal").exists()  # self-contained: nothing else to copy
        with Store.open(copy, readonly=True) as store:
            assert store.schema_version == SCHEMA_VERSION
        copied = _batches(copy)
        names = list(copied)
        # A prefix of the writer's batches, in order, none missing ...
        assert names == [f"batch-{i:05d}.csv" for i in range(len(names))]
        assert len(names) >= 5 and len(names) >= previous
        previous = len(names)
        # ... each one whole (a half-written transaction would leave 20 rows) ...
        assert all(len(rows) == ROWS_PER_BATCH for rows in copied.values())
        # ... and equal, row for row, to what the live database holds for it.
        assert all(copied[name] == live[name] for name in names)
        assert len(live) > len(names)
        assert f"copied {database} to {copy}" in output
        assert "integrity check of the copy: ok" in output
        printed = {
            line.split()[0]: int(line.split()[1].replace(",", ""))
            for line in output.splitlines()
            if line.startswith("    ")
        }
        assert printed["observations"] == observations
        assert printed["files"] == len(names)
        assert observations == ROWS_PER_BATCH * len(names)


def test_missing_database_is_refused_and_not_created(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    copy = workspace / "copy.sqlite"
    assert _backup(workspace, str(copy)) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    assert "no database at" in err and "nothing to copy" in err
    assert not _database(workspace).exists()
    assert not _database(workspace).parent.exists()
    assert not copy.exists()


def test_existing_target_needs_force(workspace: Path, capsys: pytest.CaptureFixture[str]) -> None:
    database = _make_database(workspace)
    copy = workspace / "copy.sqlite"
    copy.write_bytes(b"an older backup")
    assert _backup(workspace, str(copy)) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "--force" in err
    assert copy.read_bytes() == b"an older backup"

    with Store.open(database) as store:
        store.record_pass(as_of=_utc("2027-01-04T08:00:00"), started_at=_utc("2027-01-04T08:00:00"))
    assert _backup(workspace, "--force", str(copy)) == 0
    with Store.open(copy, readonly=True) as store:
        assert store.table_counts()["passes"] == 1
    # No temporary file is left beside the copy.
    assert sorted(p.name for p in copy.parent.iterdir() if p.name.startswith(".")) == []


@pytest.mark.parametrize("suffix", ["", "-wal", "-shm", ".lock"])
def test_live_database_and_its_files_are_never_targets(
    workspace: Path, capsys: pytest.CaptureFixture[str], suffix: str
) -> None:
    database = _make_database(workspace)
    target = Path(f"{database}{suffix}")
    before = target.read_bytes() if target.exists() else None
    assert _backup(workspace, "--force", str(target)) == 2
    assert "live database" in capsys.readouterr().err
    assert (target.read_bytes() if target.exists() else None) == before


def test_folder_target_is_refused(workspace: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _make_database(workspace)
    folder = workspace / "backups"
    folder.mkdir()
    assert _backup(workspace, "--force", str(folder)) == 2
    assert "is a folder" in capsys.readouterr().err
    assert list(folder.iterdir()) == []


@pytest.mark.skipif(SCHEMA_VERSION < 2, reason="needs an older schema version to exist")
def test_older_schema_is_refused_without_migrating(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    database = _database(workspace)
    database.parent.mkdir(parents=True)
    conn = sqlite3.connect(database, isolation_level=None)
    try:
        apply_migrations(conn, SCHEMA_VERSION - 1)
    finally:
        conn.close()
    copy = workspace / "copy.sqlite"
    assert _backup(workspace, str(copy)) == 2
    err = capsys.readouterr().err
    assert "older than this Plumbline" in err and len(err.strip().splitlines()) == 1
    conn = sqlite3.connect(database)
    try:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION - 1
    finally:
        conn.close()
    assert not copy.exists()


def test_backup_is_listed_in_help(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--help"]) == 0
    assert "backup" in capsys.readouterr().out


def _utc(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=UTC)
