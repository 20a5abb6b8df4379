"""``plumbline digest``: build the digest now, write its page, and send it when asked.

    plumbline digest [-c CONFIG] [--send] [--out DIR] [--dry-run]

The digest covers the period ending at the latest pass's business clock (DESIGN.md section 6).
Its page goes to ``--out DIR`` or ``notify.html_dir`` (with the index, and the page of any model
whose page is not there yet); the command prints the page's path and records the digest in the
database, so the next digest reports what changed since this one.

``--send`` puts the digest e-mail in the outbox (once per period: a second ``--send`` for the
same period queues nothing new) and delivers every message due in the outbox now, over the
SMTP server of ``notify.email``. ``--dry-run`` writes the e-mail as a ``.eml`` file beside the
page instead, and changes nothing in the database: no digest recorded, nothing queued or sent.

``send_scheduled_digest(config)`` is the daemon's digest job: the same as ``--send`` (or only
the page when no e-mail is configured); it does nothing before the first pass.

Exit status 0; 2 for an invalid config, a database that does not exist yet, no pass run yet, or
``--send`` without ``notify.email`` in the config (``--dry-run`` works without it: the message
goes to placeholder addresses in the reserved ``.invalid`` domain).
"""

from __future__ import annotations

import argparse
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from monitor.commands.audit import open_database
from monitor.config import Email, PlumblineConfig, load_config
from monitor.errors import UsageError
from monitor.notify import build_digest, digest_message, write_digest
from monitor.notify.mail import compose_digest, deliver_outbox, enqueue_digest, write_eml
from monitor.store import Store

PREVIEW_RECIPIENT = "recipients-not-configured@example.invalid"
PREVIEW_SENDER = "plumbline@example.invalid"


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "digest",
        help="build the digest now (findings, coverage, coming forecasts); send it with --send",
        description="Build the digest for the period ending at the latest pass's business "
        "clock: what needs attention, what changed since the last digest, coverage over the "
        "latest 13 and 52 periods against nominal, and the forecasts for the coming periods. "
        "Writes the HTML page and prints its path.",
    )
    parser.add_argument(
        "-c", "--config", default="plumbline.yaml", metavar="PATH",
        help="the config file (default: ./plumbline.yaml)",
    )
    parser.add_argument(
        "--send", action="store_true",
        help="queue the digest e-mail in the outbox and deliver what is due (needs notify.email)",
    )
    parser.add_argument(
        "--out", metavar="DIR", help="write the page (and .eml files) here instead of html_dir"
    )
    parser.add_argument(
        "--dry-run", action="store_true",
        help="write the e-mail as a .eml file instead of sending it; record nothing",
    )
    parser.set_defaults(handler=run)


def publish(
    store: Store,
    config: PlumblineConfig,
    *,
    out_dir: Path,
    now: datetime,
    send: bool,
    dry_run: bool,
) -> dict[str, Any]:
    """Build and write the digest; then queue and deliver it (``send``) or write its ``.eml``
    (``dry_run``, which also leaves the database as it was). Returns what was done."""
    email = config.notify.email
    digest = build_digest(store, config)
    path = write_digest(store, config, out_dir, digest=digest, now=now, record=not dry_run)
    done: dict[str, Any] = {"digest": str(path), "period_end": digest.period_end.isoformat(),
                            "open_findings": digest.open_total}
    if dry_run:
        # Without notify.email the message is still written, to placeholder addresses in the
        # reserved .invalid domain (RFC 2606), so the e-mail can be looked at before SMTP is set.
        preview = email if email is not None else Email(
            to=[PREVIEW_RECIPIENT], sender=PREVIEW_SENDER)
        content = digest_message(digest)
        message = compose_digest(preview, content, period_end=digest.period_end, created_at=now,
                                 pass_id=digest.pass_id, identity=store.identity)
        done["eml"] = str(write_eml(message.body, out_dir, message.eml_name))
        if email is None:
            done["placeholder_addresses"] = True
        return done
    if email is None or not send:
        return done
    content = digest_message(digest)
    queued = enqueue_digest(store, email, content, period_end=digest.period_end,
                            created_at=now, pass_id=digest.pass_id)
    report = deliver_outbox(store, email, now=now)
    done.update(
        outbox_id=queued.outbox_id, newly_queued=queued.newly_queued, sent=len(report.sent),
        failed=[{"outbox_id": f.outbox_id, "error": f.error,
                 "next_attempt_at": f.next_attempt_at.isoformat()} for f in report.failed],
        notes=list(report.notes),
    )
    return done


def send_scheduled_digest(config: PlumblineConfig) -> dict[str, Any] | None:
    """The daemon's digest job: write the digest and, with ``notify.email``, send it. None (and
    nothing written) when no pass has run yet."""
    if not Path(config.database).exists():
        return None
    with Store.open(config.database) as store:
        if store.latest_pass() is None:
            return None
        return publish(store, config, out_dir=Path(config.notify.html_dir),
                       now=datetime.now(UTC), send=config.notify.email is not None,
                       dry_run=False)


def run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    if args.send and not args.dry_run and config.notify.email is None:
        raise UsageError("--send needs notify.email in the config (sender, to, smtp_host); "
                         "--dry-run writes the message to a file without it")
    out_dir = Path(args.out) if args.out else Path(config.notify.html_dir)
    with open_database(config, readonly=False) as store:
        done = publish(store, config, out_dir=out_dir, now=datetime.now(UTC),
                       send=args.send, dry_run=args.dry_run)
    print(done["digest"])
    if "eml" in done:
        print(done["eml"])
        if done.get("placeholder_addresses"):
            print("note: no notify.email in the config, so the message is addressed to "
                  f"{PREVIEW_RECIPIENT}; nothing was sent")
    if "sent" in done:
        if not done["newly_queued"]:
            print(f"the digest for this period was queued before (outbox message "
                  f"{done['outbox_id']}); not queued again")  # fmt: skip
        for note in done["notes"]:
            print(f"note: {note}")
        print(f"sent {done['sent']} message(s) from the outbox; {len(done['failed'])} left "
              "there for a later retry")  # fmt: skip
        for failure in done["failed"]:
            print(f"  outbox message {failure['outbox_id']}: {failure['error']} (next attempt "
                  f"{failure['next_attempt_at']})")  # fmt: skip
    return 0
