"""``plumbline note ID TEXT [--by NAME]``: the owner records a short note on a finding (who, when,
why). From its first note on, no message mentions the finding again; it stays listed, with its
latest note, in ``status`` and on the pages. Notes are kept, oldest first
(``plumbline note ID --history`` prints them)."""

from __future__ import annotations

import argparse
import getpass
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

from monitor.commands._common import (
    add_config_argument,
    config_from,
    finding_id,
    open_existing_store,
)
from monitor.errors import UsageError
from monitor.notify.words import finding_headline, local_time
from monitor.store import FindingNote, FindingRecord, Store


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "note", help="record an owner's note on a finding; its messages stop",
        description="Record a short note on a finding by its id (see 'plumbline status'): who "
        "looked at it, and why it needs no further message. The finding stays listed, with the "
        "note, in status and on the pages; no message mentions it again. Every note is kept.",
    )
    add_config_argument(parser)
    parser.add_argument("id", type=finding_id, help="the finding's id (12 or #12)")
    parser.add_argument("text", nargs="?", help="the note, e.g. \"roadworks on the A7 until "
                        "March; expected\" (quote it)")
    parser.add_argument("--by", metavar="NAME",
                        help="who writes the note (default: the login name)")
    parser.add_argument("--history", action="store_true",
                        help="print the finding's notes, oldest first, and record nothing")
    parser.set_defaults(handler=handle)


def default_author() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name in this environment
        return "unknown"


def note_line(note: FindingNote, zone: ZoneInfo) -> str:
    return f"{local_time(note.at, zone)}, {note.by}: {note.text}"


def record_note(store: Store, finding_id: int, text: str, by: str) -> tuple[FindingRecord, bool]:
    """Record the note; returns the finding after it and whether it had a note already."""
    before = store.get_finding(finding_id)
    if before is None:
        raise UsageError(f"no finding with id {finding_id}; 'plumbline status --all' lists them")
    after = store.note_finding(finding_id, at=datetime.now(UTC), by=by, text=text)
    return after, before.noted


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    if args.history:
        with open_existing_store(config, readonly=True) as store:
            record = store.get_finding(args.id)
            if record is None:
                raise UsageError(
                    f"no finding with id {args.id}; 'plumbline status --all' lists them")
            notes = store.finding_notes(args.id)
        print(f"Finding {record.id}: {finding_headline(record)}.")
        if not notes:
            print("  No note yet.")
        for note in notes:
            print(f"  {note_line(note, config.zone)}")
        return 0
    if args.text is None or not args.text.strip():
        raise UsageError("say why in a few words: plumbline note ID \"TEXT\"")
    with open_existing_store(config) as store:
        record, had_note = record_note(store, args.id, args.text, args.by or default_author())
    print(report(record, had_note, config.zone))
    return 0


def report(record: FindingRecord, had_note: bool, zone: ZoneInfo) -> str:
    assert record.note is not None
    noted = note_line(record.note, zone)
    if had_note:
        return (
            f"Finding {record.id} ({finding_headline(record)}) already had a note, so its "
            f"messages had already stopped; this one is added to its history "
            f"({record.note_count} notes): {noted}"
        )
    return (
        f"Noted on finding {record.id} ({finding_headline(record)}): {noted}. No message will "
        "mention it again; it stays listed, with this note, in status and on the pages."
    )
