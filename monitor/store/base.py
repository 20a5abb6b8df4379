"""The connection under every :class:`~monitor.store.Store`: opening, transactions, backup."""

from __future__ import annotations

import errno
import os
import sqlite3
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Self, TypeVar

from monitor.errors import DatabaseFaultError, PlumblineError
from monitor.lock import database_path_problem
from monitor.store.records import StoreError
from monitor.store.schema import APPLICATION_ID, SCHEMA_VERSION, apply_migrations

BUSY_TIMEOUT_SECONDS = 30.0

_T = TypeVar("_T")


@dataclass(frozen=True)
class BackupResult:
    path: Path
    size_bytes: int
    integrity: str  # what PRAGMA integrity_check said of the copy: "ok"


# False only inside ``without_fsync`` (the demo's replay into a workspace of its own).
_fsync = True


@contextmanager
def without_fsync() -> Iterator[None]:
    """Inside, this process skips the waits for the disk that only a power cut needs: the
    fsyncs of written files and folders, and the database's per-commit one (a store opened here
    uses ``synchronous=NORMAL``, which in WAL mode keeps the file consistent but may lose the
    latest commits to a power cut). Only for a workspace that is thrown away and made again
    after a power cut, never for a real one: ``plumbline demo`` replays 125 weeks into a folder
    of its own, about 40 commits and 30 file moves a week, and on a shared disk those fsyncs
    took from 2 s to over 15 s of its time."""
    global _fsync
    before = _fsync
    _fsync = False
    try:
        yield
    finally:
        _fsync = before


def fsync_file(fd: int) -> None:
    """Make a written file's content durable before it is renamed into place."""
    if _fsync:
        os.fsync(fd)


def fsync_dir(path: Path) -> None:
    """Make a rename or a new file in ``path`` durable (the directory entry itself)."""
    if not _fsync:
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class StoreBase:
    """One connection, its transactions and the small query helpers the parts share."""

    def __init__(self, conn: sqlite3.Connection, path: Path) -> None:
        self._conn = conn
        self.path = path
        self._depth = 0
        self.readonly = False  # opened with readonly=True: a write is the program's error
        # ``scored_forecasts(model, last=…)``'s columns per (model, last, with_df), with the
        # highest outcomes id they cover (``ResultsMixin._latest_scored_columns``).
        self._scored_cache: dict[tuple[str, int, bool], tuple[int, list[Any]]] = {}

    @classmethod
    def open(cls, path: str | Path, *, readonly: bool = False) -> Self:
        """Open the database (creating its folder and file unless ``readonly``) and migrate it.

        A read-only open never writes: it refuses a missing database or one that needs a
        migration. Opening a database newer than this program is refused either way.
        """
        db_path = Path(path)
        problem = database_path_problem(db_path)
        if problem is not None:
            raise StoreError(problem)
        if readonly:
            if not db_path.exists():
                raise StoreError(f"{db_path}: no database here")
            conn = sqlite3.connect(
                f"{db_path.resolve().as_uri()}?mode=ro",
                uri=True,
                timeout=BUSY_TIMEOUT_SECONDS,
                isolation_level=None,
            )
        else:
            try:
                db_path.parent.mkdir(parents=True, exist_ok=True)
                conn = sqlite3.connect(
                    db_path, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None
                )
            except (OSError, sqlite3.Error) as exc:
                raise database_fault(exc, db_path) from exc
        try:
            _configure(conn, db_path, readonly=readonly)
        except sqlite3.Error as exc:
            conn.close()
            raise database_fault(exc, db_path) from exc
        except BaseException:
            conn.close()
            raise
        store = cls(conn, db_path)
        store.readonly = readonly
        return store

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def schema_version(self) -> int:
        return int(self._conn.execute("PRAGMA user_version").fetchone()[0])

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """Writes inside commit together or not at all; a nested use becomes a savepoint.

        The outermost level takes the write lock at once (``BEGIN IMMEDIATE``), so a transaction
        never fails half-way for want of it. Every writing method runs in one of these, joining
        the caller's when there is one.
        """
        depth = self._depth
        try:
            self._conn.execute("BEGIN IMMEDIATE" if depth == 0 else f"SAVEPOINT level{depth}")
        except sqlite3.Error as exc:
            if self.readonly:
                raise
            raise database_fault(exc, self.path) from exc
        self._depth = depth + 1
        try:
            yield
        except BaseException as exc:
            self._depth = depth
            if depth == 0:
                if self._conn.in_transaction:
                    self._conn.execute("ROLLBACK")
            else:
                self._conn.execute(f"ROLLBACK TO level{depth}")
                self._conn.execute(f"RELEASE level{depth}")
            if isinstance(exc, sqlite3.Error) and depth == 0 and not self.readonly:
                fault = database_fault(exc, self.path)
                if isinstance(fault, DatabaseFaultError):
                    raise fault from exc
            raise
        self._depth = depth
        if depth > 0:
            self._conn.execute(f"RELEASE level{depth}")
            return
        try:
            self._conn.execute("COMMIT")
        except BaseException as exc:
            if self._conn.in_transaction:
                self._conn.execute("ROLLBACK")
            if isinstance(exc, sqlite3.Error):
                raise database_fault(exc, self.path) from exc
            raise

    @property
    def identity(self) -> str:
        """The database's random identity (32 hex digits, made when it was created)."""
        row = self._conn.execute("SELECT token FROM database_identity WHERE id = 1").fetchone()
        if row is None:
            raise StoreError(f"{self.path}: the database has no identity row")
        return str(row[0])

    def table_counts(self) -> dict[str, int]:
        """Rows per table, for status pages, tests and checking a backup."""
        names = [
            row[0]
            for row in self._conn.execute(
                "SELECT name FROM sqlite_master WHERE type = 'table' "
                "AND name NOT LIKE 'sqlite_%' ORDER BY name"
            )
        ]
        return {
            name: int(self._conn.execute(f'SELECT count(*) FROM "{name}"').fetchone()[0])
            for name in names
        }

    def backup(self, dest: str | Path, *, overwrite: bool = False) -> BackupResult:
        """A consistent copy of the live database at ``dest``, by SQLite's online backup.

        All pages are copied in one step, inside one read transaction, so the copy is the
        database as of one moment even while another connection writes (WAL lets the writer go
        on meanwhile). The copy is made under a temporary name beside ``dest``, checked with
        ``PRAGMA integrity_check``, switched to a self-contained rollback journal, and renamed
        into place. An existing ``dest`` is refused unless ``overwrite``.
        """
        target = Path(dest)
        if target.exists() and not overwrite:
            raise StoreError(f"{target}: already exists; choose another name or allow overwrite")
        if target.exists() and target.resolve() == self.path.resolve():
            raise StoreError(f"{target}: is the live database itself")
        target.parent.mkdir(parents=True, exist_ok=True)
        temporary = target.with_name(f".{target.name}.{os.getpid()}.part")
        temporary.unlink(missing_ok=True)
        copy = sqlite3.connect(temporary, isolation_level=None)
        try:
            self._conn.backup(copy, pages=-1)
            integrity = str(copy.execute("PRAGMA integrity_check").fetchone()[0])
            copy.execute("PRAGMA journal_mode=DELETE")
        finally:
            copy.close()
        if integrity != "ok":
            raise StoreError(f"the backup copy failed its integrity check: {integrity}")
        os.replace(temporary, target)
        fsync_dir(target.parent)
        return BackupResult(target, target.stat().st_size, integrity)

    # ---------------------------------------------------------------- helpers for the parts

    def _dicts(self, sql: str, params: Sequence[Any] = ()) -> list[dict[str, Any]]:
        cursor = self._conn.execute(sql, params)
        names = [column[0] for column in cursor.description]
        return [dict(zip(names, row, strict=True)) for row in cursor.fetchall()]

    def _dict(self, sql: str, params: Sequence[Any] = ()) -> dict[str, Any] | None:
        rows = self._dicts(sql, params)
        return rows[0] if rows else None

    @staticmethod
    def _require(value: _T | None, what: str, ident: int) -> _T:
        if value is None:
            raise StoreError(f"no {what} with id {ident}")
        return value


_DAMAGED = ("file is not a database", "database disk image is malformed", "file is encrypted")
_FULL = ("database or disk is full", "disk is full")
_READ_ONLY = ("readonly database", "read-only", "unable to open database file")


# SQLite reports a write refused for want of space as a plain "disk I/O error" when it happens in
# the write-ahead log; with less than this much room left, that is what we call it.
_NEARLY_FULL_BYTES = 1 << 20


def _free_bytes(path: Path) -> int:
    try:
        info = os.statvfs(path.parent if path.parent.exists() else Path("."))
    except OSError:
        return 1 << 62
    return info.f_bavail * info.f_frsize


def database_fault(exc: BaseException, path: Path) -> PlumblineError:
    """The one-line error for a database that cannot be read or written (exit 3), or, for an
    SQLite error that is none of those faults, a plain :class:`StoreError` (exit 2)."""
    text = str(exc)
    lowered = text.lower()
    number = getattr(exc, "errno", None)
    if any(words in lowered for words in _DAMAGED):
        return DatabaseFaultError(
            f"the database {path} is damaged ({text}: a garbled or truncated file); nothing was "
            "changed. Restore it from a backup (the operations guide, 'Backups')"
        )
    io_error = isinstance(exc, sqlite3.Error) and "disk i/o error" in lowered
    full = number in (errno.ENOSPC, errno.EDQUOT) or any(w in lowered for w in _FULL)
    if full or (io_error and _free_bytes(path) < _NEARLY_FULL_BYTES):
        return DatabaseFaultError(
            f"the disk holding the database {path} is full ({text}); the transaction in "
            "progress was rolled back and nothing is lost. Free some space and run again"
        )
    if number == errno.EROFS or number == errno.EACCES or any(w in lowered for w in _READ_ONLY):
        return DatabaseFaultError(
            f"the database {path} cannot be written ({text}): a read-only mount or folder, or "
            "missing permissions. Give Plumbline a writable folder for it and run again"
        )
    if io_error:
        return DatabaseFaultError(
            f"the disk holding the database {path} reported an I/O error ({text}); the "
            "transaction in progress was rolled back. Check the disk and run again"
        )
    return StoreError(f"the database {path}: {text}")


def _configure(conn: sqlite3.Connection, db_path: Path, *, readonly: bool) -> None:
    conn.execute("PRAGMA foreign_keys=ON")
    conn.execute("PRAGMA temp_store=MEMORY")
    app_id = int(conn.execute("PRAGMA application_id").fetchone()[0])
    version = int(conn.execute("PRAGMA user_version").fetchone()[0])
    foreign = app_id not in (0, APPLICATION_ID) or (app_id == 0 and version != 0)
    if not foreign and app_id == 0:
        foreign = bool(conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0])
    if foreign:
        raise StoreError(f"{db_path}: is an SQLite file but not a Plumbline database")
    if version > SCHEMA_VERSION:
        raise StoreError(
            f"{db_path}: the database has schema version {version}, newer than this Plumbline "
            f"knows ({SCHEMA_VERSION}); upgrade Plumbline to use it"
        )
    if readonly:
        if version < SCHEMA_VERSION:
            raise StoreError(
                f"{db_path}: the database has schema version {version} and needs migrating to "
                f"{SCHEMA_VERSION}; run a pass (or any command that writes) once to migrate it"
            )
        return
    mode = str(conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]).lower()
    if mode != "wal":
        raise StoreError(f"{db_path}: cannot switch the database to WAL mode (got {mode})")
    conn.execute("PRAGMA synchronous=FULL" if _fsync else "PRAGMA synchronous=NORMAL")
    apply_migrations(conn, SCHEMA_VERSION)


__all__ = [
    "BUSY_TIMEOUT_SECONDS", "BackupResult", "StoreBase", "database_fault", "fsync_dir",
    "fsync_file", "without_fsync",
]
