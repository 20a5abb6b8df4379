"""``plumbline backup``: a consistent copy of the live database, beside a running daemon.

    plumbline backup PATH [-c/--config CONFIG] [--force]

The configured database is copied to ``PATH`` with SQLite's online backup
(:meth:`monitor.store.Store.backup`): the copy is the database as of one moment, even while a
pass is writing, because it is read inside one read transaction and WAL lets the writer go on
meanwhile. The copy is checked with ``PRAGMA integrity_check``, made self-contained (rollback
journal, no ``-wal`` file needed), and only then renamed into place, so ``PATH`` is either a
whole, checked copy or absent.

The database is opened read-only and the writer lock is *not* taken: a backup runs beside
``plumbline run`` or ``plumbline pass``, never instead of them.

Refused, with exit 2 and one line: a missing database (nothing is created), an existing
``PATH`` without ``--force``, a folder as ``PATH``, ``PATH`` naming the live database or one of
its companion files, and a database whose schema this program would have to migrate first (back
it up with the Plumbline version that wrote it, before upgrading).

Printed: what was copied where, the copy's size and schema version, the integrity check's
verdict, and the rows per table as read back from the copy.
"""

from __future__ import annotations

import argparse
import sqlite3
from pathlib import Path

from monitor.config import load_config
from monitor.errors import UsageError
from monitor.store import SCHEMA_VERSION, BackupResult, Store
from monitor.store.base import BUSY_TIMEOUT_SECONDS
from monitor.store.schema import APPLICATION_ID

# Files SQLite and the writer lock keep beside a database; a backup must never replace them.
COMPANION_SUFFIXES = ("-wal", "-shm", "-journal", ".lock")


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "backup",
        help="copy the live database consistently to PATH (safe while a pass runs)",
        description="Copy the configured database to PATH with SQLite's online backup: a "
        "consistent copy as of one moment, made while the daemon or a pass goes on writing "
        "(no writer lock is taken). The copy is integrity-checked before it is put in place. "
        "Exit 0 when the copy is made; 2 when it is refused (no database, PATH exists without "
        "--force, PATH is a folder) or fails.",
    )
    parser.add_argument("path", metavar="PATH", help="the file to write the copy to")
    parser.add_argument(
        "-c",
        "--config",
        default="plumbline.yaml",
        metavar="CONFIG",
        help="the config file naming the database (default: ./plumbline.yaml)",
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="replace PATH if it exists (the old file stays until the new copy is checked)",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    database = config.database
    target = Path(args.path).absolute()
    _refuse_unsafe(database, target, force=bool(args.force), config_path=args.config)
    application_id, version = _header_on_disk(database)
    if application_id == APPLICATION_ID and version < SCHEMA_VERSION:
        raise UsageError(
            f"{database}: the database has schema version {version}, older than this "
            f"Plumbline's {SCHEMA_VERSION}; back it up with the Plumbline version that wrote it "
            "(before upgrading), since opening it here would migrate it first"
        )
    try:
        with Store.open(database, readonly=True) as store:
            result = store.backup(target, overwrite=bool(args.force))
        with Store.open(result.path, readonly=True) as copy:
            counts = copy.table_counts()
            copy_version = copy.schema_version
    except (sqlite3.Error, OSError) as exc:
        raise UsageError(f"backup of {database} to {target} failed: {exc}") from None
    for line in describe(database, result, copy_version, counts):
        print(line)
    return 0


def describe(
    database: Path, result: BackupResult, schema_version: int, counts: dict[str, int]
) -> list[str]:
    """The lines ``backup`` prints about a finished copy."""
    lines = [
        f"copied {database} to {result.path}",
        f"  size: {result.size_bytes:,} bytes ({_human_size(result.size_bytes)}); "
        f"schema version {schema_version}",
        f"  integrity check of the copy: {result.integrity}",
        "  rows in the copy:",
    ]
    width = max((len(name) for name in counts), default=0)
    lines.extend(f"    {name:<{width}}  {count:>12,}" for name, count in counts.items())
    return lines


def _refuse_unsafe(database: Path, target: Path, *, force: bool, config_path: str) -> None:
    if not database.is_file():
        raise UsageError(f"no database at {database} (database: in {config_path}); nothing to copy")
    if target.is_dir():
        raise UsageError(f"{target} is a folder; give the name of the file to write the copy to")
    live = database.resolve()
    resolved = target.resolve()
    guarded = {live} | {live.with_name(live.name + suffix) for suffix in COMPANION_SUFFIXES}
    if resolved in guarded:
        raise UsageError(f"{target} is the live database or one of its files; choose another name")
    if target.exists() and not force:
        raise UsageError(f"{target} already exists; choose another name, or --force to replace it")


def _header_on_disk(database: Path) -> tuple[int, int]:
    """The file's ``application_id`` and ``user_version``, read without writing or migrating.

    Only to word the refusal of a database that needs migrating: :meth:`Store.open` with
    ``readonly=True`` refuses it too, but advises a migration, the wrong step before a backup.
    """
    uri = f"{database.resolve().as_uri()}?mode=ro"
    try:
        conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_SECONDS)
        try:
            application_id = int(conn.execute("PRAGMA application_id").fetchone()[0])
            return application_id, int(conn.execute("PRAGMA user_version").fetchone()[0])
        finally:
            conn.close()
    except sqlite3.Error as exc:
        raise UsageError(f"{database}: cannot be read as an SQLite database ({exc})") from None


def _human_size(size: int) -> str:
    value = float(size)
    for unit in ("bytes", "KiB", "MiB", "GiB"):
        if value < 1024 or unit == "GiB":
            return f"{value:.0f} {unit}" if unit == "bytes" else f"{value:.1f} {unit}"
        value /= 1024
    raise AssertionError("unreachable")


__all__ = ["COMPANION_SUFFIXES", "describe", "register", "run"]
