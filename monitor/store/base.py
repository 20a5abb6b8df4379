"""The connection under every :class:`~monitor.store.Store`: opening, transactions, backup."""

from __future__ import annotations

import os
import sqlite3
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Self, TypeVar

from monitor.store.records import StoreError
from monitor.store.schema import APPLICATION_ID, SCHEMA_VERSION, apply_migrations

BUSY_TIMEOUT_SECONDS = 30.0

_T = TypeVar("_T")


@dataclass(frozen=True)
class BackupResult:
    path: Path
    size_bytes: int
    integrity: str  # what PRAGMA integrity_check said of the copy: "ok"


def fsync_dir(path: Path) -> None:
    """Make a rename or a new file in ``path`` durable (the directory entry itself)."""
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

    @classmethod
    def open(cls, path: str | Path, *, readonly: bool = False) -> Self:
        """Open the database (creating its folder and file unless ``readonly``) and migrate it.

        A read-only open never writes: it refuses a missing database or one that needs a
        migration. Opening a database newer than this program is refused either way.
        """
        db_path = Path(path)
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
            db_path.parent.mkdir(parents=True, exist_ok=True)
            conn = sqlite3.connect(db_path, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None)
        try:
            _configure(conn, db_path, readonly=readonly)
        except BaseException:
            conn.close()
            raise
        return cls(conn, db_path)

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
        self._conn.execute("BEGIN IMMEDIATE" if depth == 0 else f"SAVEPOINT level{depth}")
        self._depth = depth + 1
        try:
            yield
        except BaseException:
            self._depth = depth
            if depth == 0:
                self._conn.execute("ROLLBACK")
            else:
                self._conn.execute(f"ROLLBACK TO level{depth}")
                self._conn.execute(f"RELEASE level{depth}")
            raise
        self._depth = depth
        if depth > 0:
            self._conn.execute(f"RELEASE level{depth}")
            return
        try:
            self._conn.execute("COMMIT")
        except BaseException:
            if self._conn.in_transaction:
                self._conn.execute("ROLLBACK")
            raise

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
    conn.execute("PRAGMA synchronous=FULL")
    apply_migrations(conn, SCHEMA_VERSION)


__all__ = ["BUSY_TIMEOUT_SECONDS", "BackupResult", "StoreBase", "fsync_dir"]
