"""Pieces shared by the commands that read the config and the database."""

from __future__ import annotations

import argparse
from datetime import datetime
from pathlib import Path

from monitor.config import PlumblineConfig, load_config
from monitor.errors import UsageError
from monitor.store import Store


def add_config_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "-c", "--config", default="plumbline.yaml", metavar="PATH",
        help="the configuration file (default: ./plumbline.yaml)",
    )


def config_from(args: argparse.Namespace) -> PlumblineConfig:
    return load_config(Path(args.config))


def open_existing_store(config: PlumblineConfig, *, readonly: bool = False) -> Store:
    """The configured database; a missing one is a usage error (exit 2), never created here."""
    if not Path(config.database).exists():
        raise UsageError(
            f"the database {config.database} does not exist yet; run 'plumbline pass' first"
        )
    return Store.open(config.database, readonly=readonly)


def finding_id(text: str) -> int:
    """A finding's id as typed: ``12`` or ``#12``, the way ``plumbline status`` shows it (an
    argparse ``type``)."""
    stripped = text.strip()
    digits = stripped[1:] if stripped.startswith("#") else stripped
    if not digits.isdigit():
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a finding id; give the number 'plumbline status' shows, e.g. 12 or "
            "#12"
        )
    return int(digits)


def local_moment(moment: datetime, config: PlumblineConfig) -> str:
    """A moment for people: ISO 8601 in the config's time zone, to the second."""
    return moment.astimezone(config.zone).replace(microsecond=0).isoformat()


def parse_as_of(text: str, config: PlumblineConfig) -> datetime:
    """``--as-of``: ISO 8601; a time without an offset is read in the config's time zone, and a
    bare date means its midnight there (DESIGN.md section 6)."""
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise UsageError(
            f"--as-of {text!r} is not an ISO 8601 time (e.g. 2025-03-03T06:00 or "
            "2025-03-03T06:00+01:00)"
        ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=config.zone)
    return moment


__all__ = ["add_config_argument", "config_from", "finding_id", "local_moment",
           "open_existing_store", "parse_as_of"]
