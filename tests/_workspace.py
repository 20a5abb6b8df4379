"""Building real Plumbline workspaces in a test's ``tmp_path``: a config file written as YAML
text, drop folders, weekly files landing with a ``NAME.ready`` marker, passes at a business
clock, and a snapshot of every table of the SQLite file for before/after comparisons.

Imported by ``tests/test_passes.py`` and ``tests/test_pass_inputs.py`` as ``_workspace`` (the
tests folder has no ``__init__.py``, so pytest puts it on ``sys.path``).
"""

from __future__ import annotations

import csv
import hashlib
import io
import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from monitor.cli import main
from monitor.config import PlumblineConfig, load_config
from monitor.passes import PassReport, run_pass

ZONE_NAME = "Europe/Berlin"
ZONE = ZoneInfo(ZONE_NAME)
FIRST_WEEK_ENDING = date(2024, 1, 7)  # a Sunday
DELIVERY = time(6, 0)  # files land on the Monday after the week, 06:00 local time


def week_ending(number: int) -> date:
    """The Sunday that ends week ``number`` (week 1 ends 2024-01-07)."""
    return FIRST_WEEK_ENDING + timedelta(days=7 * (number - 1))


def delivered(number: int) -> datetime:
    """The business clock of week ``number``'s pass: the Monday after it, 06:00 Berlin time."""
    return datetime.combine(week_ending(number) + timedelta(days=1), DELIVERY, tzinfo=ZONE)


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def csv_bytes(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> bytes:
    """A UTF-8 CSV with ``\\n`` line ends; None cells are written empty."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow(["" if cell is None else cell for cell in row])
    return out.getvalue().encode("utf-8")


def feed_yaml(
    name: str,
    columns: Sequence[str],
    *,
    period: str = "week_ending",
    file_format: str = "csv",
    settle: str = "30s",
    inbox: str | None = None,
) -> str:
    return "\n".join([
        f"  {name}:",
        f"    inbox: {inbox or f'feeds/{name}/inbox'}",
        f"    format: {file_format}",
        f"    period: {period}",
        f"    settle: {settle}",
        "    cadence: 7d",
        f"    columns: [{', '.join(columns)}]",
    ])


def config_yaml(feeds: Sequence[str], models: Sequence[str]) -> str:
    """A whole config file from the feed and model blocks (each indented two spaces)."""
    return "\n".join([
        "database: state/plumbline.sqlite",
        f"timezone: {ZONE_NAME}",
        "feeds:",
        *feeds,
        "models:",
        *models,
        "schedule:",
        "  scan: 30s",
        '  digest: "0 8 * * mon"',
        "notify:",
        "  html_dir: reports",
        "",
    ])


@dataclass
class Workspace:
    """One config file and its folders under ``root``."""

    root: Path

    @classmethod
    def create(cls, root: Path, config_text: str) -> Workspace:
        root.mkdir(parents=True, exist_ok=True)
        (root / "plumbline.yaml").write_text(config_text, encoding="utf-8")
        workspace = cls(root)
        for feed in workspace.config.feeds.values():
            if not (feed.inbox.exists() or feed.inbox.is_symlink()):
                feed.inbox.mkdir(parents=True)
        return workspace

    @property
    def config_path(self) -> Path:
        return self.root / "plumbline.yaml"

    @property
    def config(self) -> PlumblineConfig:
        return load_config(self.config_path)

    @property
    def database(self) -> Path:
        return self.config.database

    def inbox(self, feed: str) -> Path:
        return self.config.feeds[feed].inbox

    def archive(self, feed: str) -> Path:
        return self.config.feeds[feed].archive

    def rejected(self, feed: str) -> Path:
        return self.config.feeds[feed].rejected

    def drop(self, feed: str, name: str, data: bytes, *, marker: bool = True) -> bytes:
        """Write a file into the feed's inbox (with ``NAME.ready`` beside it unless asked not)."""
        path = self.inbox(feed) / name
        path.write_bytes(data)
        if marker:
            (self.inbox(feed) / f"{name}.ready").touch()
        return data

    def run(self, as_of: datetime, **kwargs: Any) -> PassReport:
        return run_pass(self.config, as_of=as_of, **kwargs)

    def cli_pass(self, as_of: datetime | str, *extra: str) -> int:
        moment = as_of if isinstance(as_of, str) else as_of.isoformat()
        return main(["pass", "-c", str(self.config_path), "--as-of", moment, *extra])

    def query(self, sql: str, params: Sequence[Any] = ()) -> list[tuple[Any, ...]]:
        """Rows of a read-only query on the database, through a connection of our own."""
        conn = sqlite3.connect(f"file:{self.database}?mode=ro", uri=True)
        try:
            return conn.execute(sql, params).fetchall()
        finally:
            conn.close()

    def snapshot(self) -> dict[str, list[tuple[Any, ...]]]:
        """Every row of every table, in rowid (or key) order."""
        conn = sqlite3.connect(f"file:{self.database}?mode=ro", uri=True)
        try:
            names = [
                row[0] for row in conn.execute(
                    "SELECT name FROM sqlite_master WHERE type = 'table' "
                    "AND name NOT LIKE 'sqlite_%' ORDER BY name"
                )
            ]
            return {
                name: conn.execute(f'SELECT * FROM "{name}" ORDER BY 1, 2').fetchall()
                for name in names
            }
        finally:
            conn.close()

    def observation_count(self) -> int:
        return int(self.query("SELECT count(*) FROM observations")[0][0])


__all__ = [
    "DELIVERY",
    "FIRST_WEEK_ENDING",
    "ZONE",
    "ZONE_NAME",
    "Workspace",
    "config_yaml",
    "csv_bytes",
    "delivered",
    "feed_yaml",
    "sha256",
    "week_ending",
]
