"""The database's writer lock: one Plumbline writer per database (DESIGN.md section 12).

``DatabaseLock(database)`` takes an advisory ``flock(LOCK_EX | LOCK_NB)`` on a lock file beside
the database (``plumbline.sqlite`` → ``plumbline.sqlite.lock``). The kernel owns the lock: it is
released when the holder closes the file or dies in any way, ``kill -9`` included, so a crashed
process never leaves a stale lock behind and there is nothing to clean up by hand.

The holder writes its process id into the lock file. That is for people and for the error
message only; the ``flock`` is the truth, and a pid left in the file by a dead process means
nothing.

Who takes it: the ``run`` command (through :func:`monitor.daemon.run_daemon`, for the daemon's
whole life) and the ``pass`` command (around one pass). A pass run *inside* the daemon must not
take it again: ``flock`` locks belong to an open file, so a second ``DatabaseLock`` on the same
database in the same process is refused like any other holder.

Limits: ``flock`` is reliable on local file systems; on network file systems (NFS, SMB) its
behaviour depends on the server, so keep the database on a local disk. A child made with
``fork()`` (without ``exec``) shares the open lock file and so keeps the lock alive while it runs;
the descriptor is not inherited across ``exec`` (Python's default since PEP 446).
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import os
import stat
from pathlib import Path
from types import TracebackType

from monitor.errors import DatabaseFaultError, DatabaseLockedError, PlumblineError

LOCK_SUFFIX = ".lock"


def lock_path_for(database: str | os.PathLike[str]) -> Path:
    """The lock file of a database: the database's own name with ``.lock`` appended.

    The name is taken after resolving every symbolic link on the way (``os.path.realpath``), so
    two paths that reach the same database (a linked folder, ``..``) share one lock.
    """
    path = Path(os.path.realpath(database))
    return path.with_name(path.name + LOCK_SUFFIX)


def database_path_problem(database: str | os.PathLike[str]) -> str | None:
    """Why ``database`` cannot be a database path, or None when it can (or does not exist yet).

    Refused: a folder, anything but a regular file (a device, a pipe, a socket), a symbolic link
    (an alias: give the real path, so one database has one name, one lock file and one set of
    ``-wal``/``-shm`` files) and a file with a second hard link (the same: two names, two locks).
    """
    path = Path(database)
    try:
        info = path.lstat()
    except OSError:
        return None  # missing, or its folder is unusable: opening it says so
    if stat.S_ISLNK(info.st_mode):
        return (
            f"the database path {path} is a symbolic link (to {os.path.realpath(path)}); give "
            "the real path in the config, so that one database has one name and one lock"
        )
    if stat.S_ISDIR(info.st_mode):
        return f"the database path {path} is a folder; give the path of a file in it"
    if not stat.S_ISREG(info.st_mode):
        return (
            f"the database path {path} is not a regular file (a device, a pipe or a socket); "
            "give the path of a file"
        )
    if info.st_nlink > 1:
        return (
            f"the database file {path} has {info.st_nlink} names (hard links); keep one name, "
            "so that one database has one lock"
        )
    return None


class DatabaseLock:
    """The advisory writer lock of one database; a context manager.

    ``acquire()`` returns at once: either the lock is ours, or it raises
    :class:`~monitor.errors.DatabaseLockedError` (exit code 2) naming the database and, when the
    holder wrote it, the holder's process id. It never waits for the other process.
    """

    def __init__(self, database: str | os.PathLike[str], *, role: str | None = None) -> None:
        self.database = Path(database)
        self.path = lock_path_for(self.database)
        self.role = role  # written after the pid: "daemon" for plumbline run
        self._fd: int | None = None

    @property
    def held(self) -> bool:
        """True while this object holds the lock."""
        return self._fd is not None

    def acquire(self) -> None:
        """Take the lock now or raise :class:`DatabaseLockedError`; never blocks."""
        if self._fd is not None:
            raise PlumblineError(f"the lock on {self.database} is already held by this process")
        problem = database_path_problem(self.database)
        if problem is not None:
            raise PlumblineError(problem)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            if exc.errno in (errno.EROFS, errno.ENOSPC, errno.EDQUOT):
                raise DatabaseFaultError(
                    f"the database {self.database} cannot be written: its lock file {self.path} "
                    f"cannot be opened ({exc.strerror}: a read-only mount or a full disk); give "
                    "Plumbline a writable disk with room for the database and run again"
                ) from exc
            raise PlumblineError(
                f"cannot open the lock file {self.path}: {exc.strerror or exc}"
            ) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            os.close(fd)
            by_whom = f"process {holder}" if holder is not None else "another process"
            raise DatabaseLockedError(
                f"database {self.database} is in use by {by_whom} (lock file {self.path}); "
                "only one 'plumbline run' or 'plumbline pass' may write to it at a time"
            ) from None
        except OSError as exc:
            os.close(fd)
            raise PlumblineError(f"cannot lock {self.path}: {exc.strerror or exc}") from exc
        # Informational: who holds it. Written only once the flock is ours, and best effort: on
        # a full disk the lock still holds, and the database's own write reports the fault.
        stamp = f"{os.getpid()}" if self.role is None else f"{os.getpid()} {self.role}"
        with contextlib.suppress(OSError):
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{stamp}\n".encode("ascii"), 0)
        self._fd = fd

    def release(self) -> None:
        """Give the lock back (idempotent). The lock file stays; only its pid is cleared."""
        fd, self._fd = self._fd, None
        if fd is None:
            return
        try:
            # Clear the pid before unlocking, so it never names a process that no longer holds it.
            # The file itself is never deleted: unlinking a lock file lets two processes lock two
            # different files under the same name.
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
            fcntl.flock(fd, fcntl.LOCK_UN)
        finally:
            os.close(fd)

    def __enter__(self) -> DatabaseLock:
        self.acquire()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.release()

    def __repr__(self) -> str:
        state = "held" if self.held else "not held"
        return f"DatabaseLock({str(self.database)!r}, {state})"


def _read_holder(fd: int) -> int | None:
    """The pid written by the current holder, or None when absent or unreadable."""
    try:
        text = os.pread(fd, 32, 0).decode("ascii", errors="replace").strip()
    except OSError:
        return None
    first = text.split()[0] if text else ""
    return int(first) if first.isdigit() else None


def running_daemon(database: str | os.PathLike[str]) -> int | None:
    """The process id of the ``plumbline run`` daemon holding the database's lock, or None.

    Read from the lock file without locking (a reader must never make a writer fail): the
    daemon writes ``PID daemon`` there and clears it on release. A daemon killed with SIGKILL
    leaves its line behind, so the process must also still exist; a reused process id is the
    one way this can be wrong, and then only until the next daemon or pass takes the lock.
    """
    try:
        tokens = lock_path_for(database).read_text(encoding="ascii", errors="replace").split()
    except OSError:
        return None
    if len(tokens) != 2 or tokens[1] != "daemon" or not tokens[0].isdigit():
        return None
    pid = int(tokens[0])
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return None
    except PermissionError:
        return pid  # it exists, under another user
    return pid


__all__ = ["LOCK_SUFFIX", "DatabaseLock", "database_path_problem", "lock_path_for",
           "running_daemon"]
