"""The database writer lock: real flock on real files, real processes (no mocks)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path

import pytest

from monitor.errors import DatabaseLockedError, PlumblineError
from monitor.lock import DatabaseLock, lock_path_for

HOLDER_SCRIPT = textwrap.dedent(
    """
    import sys, time
    from monitor.lock import DatabaseLock
    lock = DatabaseLock(sys.argv[1])
    lock.acquire()
    print("locked", flush=True)
    time.sleep(60)
    """
)


@pytest.fixture
def database(tmp_path: Path) -> Path:
    return tmp_path / "state" / "plumbline.sqlite"


@pytest.fixture
def holder(database: Path) -> Iterator[subprocess.Popen[str]]:
    """A separate process that holds the lock until the test ends (or kills it)."""
    process = subprocess.Popen(
        [sys.executable, "-c", HOLDER_SCRIPT, str(database)],
        stdout=subprocess.PIPE,
        text=True,
    )
    assert process.stdout is not None
    assert process.stdout.readline().strip() == "locked"
    yield process
    if process.poll() is None:
        process.kill()
    process.wait(timeout=10)
    process.stdout.close()


def test_lock_file_sits_beside_the_database(database: Path) -> None:
    assert lock_path_for(database) == database.parent / "plumbline.sqlite.lock"


def test_acquire_writes_pid_and_release_clears_it(database: Path) -> None:
    lock = DatabaseLock(database)
    lock.acquire()
    try:
        assert lock.held
        assert lock.path.read_text().strip() == str(os.getpid())
    finally:
        lock.release()
    assert not lock.held
    assert lock.path.exists()  # never unlinked: see the module docstring
    assert lock.path.read_text() == ""
    lock.release()  # idempotent


def test_second_lock_in_the_same_process_is_refused(database: Path) -> None:
    with DatabaseLock(database):
        with pytest.raises(DatabaseLockedError) as refused:
            DatabaseLock(database).acquire()
        assert refused.value.exit_code == 2
    # Released by the context manager: a new holder gets it.
    with DatabaseLock(database) as again:
        assert again.held


def test_context_manager_releases_on_error(database: Path) -> None:
    with pytest.raises(RuntimeError), DatabaseLock(database):
        raise RuntimeError("boom")
    with DatabaseLock(database) as again:
        assert again.held


def test_acquiring_twice_on_one_object_is_an_error(database: Path) -> None:
    with DatabaseLock(database) as lock:
        with pytest.raises(PlumblineError, match="already held by this process"):
            lock.acquire()
        assert lock.held


def test_another_process_holding_the_lock_is_named(
    database: Path, holder: subprocess.Popen[str]
) -> None:
    with pytest.raises(DatabaseLockedError) as refused:
        DatabaseLock(database).acquire()
    message = str(refused.value)
    assert str(database) in message
    assert f"process {holder.pid}" in message
    assert "\n" not in message
    assert refused.value.exit_code == 2


def test_sigkilled_holder_leaves_no_stale_lock(
    database: Path, holder: subprocess.Popen[str]
) -> None:
    with pytest.raises(DatabaseLockedError):
        DatabaseLock(database).acquire()
    holder.send_signal(signal.SIGKILL)
    assert holder.wait(timeout=10) == -signal.SIGKILL
    # The dead holder's pid is still written in the file; the kernel released the flock anyway.
    assert lock_path_for(database).read_text().strip() == str(holder.pid)
    with DatabaseLock(database) as lock:
        assert lock.held
        assert lock.path.read_text().strip() == str(os.getpid())


def test_unopenable_lock_file_is_a_clear_error(tmp_path: Path) -> None:
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("a file where the database's folder should be")
    with pytest.raises(PlumblineError, match="cannot open the lock file"):
        DatabaseLock(blocker / "plumbline.sqlite").acquire()
