"""``plumbline run``: the daemon — scheduled passes and digests until SIGTERM or SIGINT.

The scan job runs a pass when complete files wait in an inbox, or when no pass has run for a
day on the real clock (so that a feed gone quiet is noticed: ``stale_feed`` needs a pass to be
raised); between passes it delivers the outbox's messages whose retry time has come. The
digest job builds and sends the digest on its cron schedule. Schedules, time zones, missed
runs and signals: see ``monitor.daemon`` and the README.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import threading
from collections.abc import Mapping
from datetime import UTC, datetime, timedelta

from monitor.commands._common import add_config_argument, config_from
from monitor.commands.one_pass import pass_notifier
from monitor.compute import Compute, compute_for
from monitor.config import PlumblineConfig
from monitor.daemon import JobFunction, run_daemon
from monitor.errors import PlumblineError
from monitor.notify.mail import deliver_outbox
from monitor.passes import files_waiting, run_pass
from monitor.store import Store

IDLE_PASS_AFTER = timedelta(days=1)

pass_log = logging.getLogger("monitor.pass")
outbox_log = logging.getLogger("monitor.outbox")


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "run", help="the daemon: scheduled passes and digests until stopped",
        description="Run the daemon: a scan job that runs a pass when complete files wait (and "
        "at least once a day), and the digest on its schedule, until SIGTERM or SIGINT.",
    )
    add_config_argument(parser)
    parser.add_argument("--log-format", choices=("plain", "json"), default="plain")
    parser.set_defaults(handler=handle)


def scan_job(config: PlumblineConfig, compute: Compute | None = None) -> JobFunction:
    """``compute``: one analysis engine kept over the daemon's passes (a Dask connection, or
    the local worker processes of ``compute.workers``, started once rather than per pass)."""

    def scan(stop: threading.Event) -> Mapping[str, object] | None:
        now = datetime.now(UTC)
        with Store.open(config.database) as store:
            latest = store.latest_pass()
            idle = latest is None or now - latest.started_at >= IDLE_PASS_AFTER
            if not idle and not files_waiting(store, config):
                return _retry_outbox(store, config, now, stop)
            report = run_pass(config, stop_requested=stop, notifier=pass_notifier(stop),
                              store=store, compute=compute)
            # What the pass could not do (a file that cannot be read or moved, pages that
            # cannot be written) and mail that keeps failing: a warning line each, every pass.
            for line in report.skipped:
                pass_log.warning("pass %s could not do everything: %s", report.pass_id, line)
            _warn_failing_outbox(store, now)
        return {
            "pass_id": report.pass_id, "files": len(report.files_taken),
            "refused": len(report.files_refused),
            "forecasts": report.forecasts_issued, "raised": len(report.findings_raised),
            "cleared": len(report.findings_cleared), "skipped": len(report.skipped),
            "stopped_early": report.stopped_early,
        }

    return scan


def _retry_outbox(
    store: Store, config: PlumblineConfig, now: datetime, stop: threading.Event | None = None
) -> Mapping[str, object] | None:
    """Between passes, deliver the outbox's messages whose retry time has come (no connection
    is made when none is due)."""
    email = config.notify.email
    if email is None or not store.due_messages(now, limit=1):
        return None
    report = deliver_outbox(store, email, now=now, stop=stop)
    _warn_failing_outbox(store, now)
    return {"outbox_sent": len(report.sent), "outbox_failed": len(report.failed)}


def _warn_failing_outbox(store: Store, now: datetime) -> None:
    failing = [m for m in store.unsent_messages() if m.attempts > 0]
    if failing:
        worst = max(failing, key=lambda m: (m.attempts, m.id))
        outbox_log.warning(
            "%d message(s) not sent yet, tried up to %d time(s); last error: %s",
            len(failing), worst.attempts, worst.last_error or "none recorded",
        )


def digest_job(config: PlumblineConfig) -> JobFunction:
    def digest(stop: threading.Event) -> Mapping[str, object] | None:
        del stop
        from monitor.commands.digest import send_scheduled_digest

        return send_scheduled_digest(config)

    return digest


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    try:
        return _run(args, config)
    except PlumblineError as exc:
        if args.log_format != "json":
            raise
        # stderr is read by a log collector: the refusal is an event line too
        moment = datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
        print(json.dumps({"time": moment, "level": "error", "event": "refused",
                          "message": str(exc), "fields": {"exit_code": exc.exit_code}}),
              file=sys.stderr)
        return exc.exit_code


def _run(args: argparse.Namespace, config: PlumblineConfig) -> int:
    compute = compute_for(config.compute)  # connects at the first pass, reconnects if dropped
    try:
        return run_daemon(
            database=config.database,
            timezone=config.zone,
            scan_schedule=config.schedule.scan,
            scan=scan_job(config, compute),
            digest_schedule=config.schedule.digest,
            digest=digest_job(config),
            log_format=args.log_format,
        )
    finally:
        compute.close()
