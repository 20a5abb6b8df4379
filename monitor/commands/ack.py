"""``plumbline ack ID``: acknowledge a finding. It stays listed but is not sent again."""

from __future__ import annotations

import argparse
from datetime import UTC, datetime

from monitor.commands._common import (
    add_config_argument,
    config_from,
    finding_id,
    open_existing_store,
)
from monitor.errors import UsageError


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "ack", help="acknowledge a finding so it is not sent again",
        description="Acknowledge a finding by its id (see 'plumbline status'). It stays listed "
        "and keeps its lifecycle, but no message mentions it again.",
    )
    add_config_argument(parser)
    parser.add_argument("id", type=finding_id, help="the finding's id (12 or #12)")
    parser.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    with open_existing_store(config) as store:
        if store.get_finding(args.id) is None:
            raise UsageError(f"no finding with id {args.id}; 'plumbline status --all' lists them")
        record = store.acknowledge_finding(args.id, at=datetime.now(UTC))
    where = record.model or record.feed
    print(f"Finding {record.id} ({record.kind.value} on {where}"
          f"{'' if record.series is None else ' / ' + record.series}) acknowledged; it will not "
          "be sent again.")
    return 0
