"""``plumbline ack ID``: deprecated; ``plumbline note ID TEXT`` replaces it. Kept for one release:
it records the note "acknowledged" by the login name and says on stderr what to use instead."""

from __future__ import annotations

import argparse
import sys

from monitor.commands._common import (
    add_config_argument,
    config_from,
    finding_id,
    open_existing_store,
)
from monitor.commands.note import default_author, record_note, report

DEPRECATION = (
    "plumbline: 'ack' is deprecated and will be removed in the next release; use "
    "'plumbline note ID \"why\"', which records who, when and why"
)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "ack", help="deprecated: use 'note' (records the note \"acknowledged\")",
        description="Deprecated, to be removed in the next release: use 'plumbline note ID "
        "TEXT'. Records the note \"acknowledged\" on the finding, so no message mentions it again.",
    )
    add_config_argument(parser)
    parser.add_argument("id", type=finding_id, help="the finding's id (12 or #12)")
    parser.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    print(DEPRECATION, file=sys.stderr)
    config = config_from(args)
    with open_existing_store(config) as store:
        record, had_note = record_note(store, args.id, "acknowledged", default_author())
    print(report(record, had_note, config.zone))
    return 0
