"""``plumbline pass [--as-of T] [--strict]``: run one monitoring pass now (for cron or a
Kubernetes CronJob). Takes the database's writer lock; exit 2 when another process holds it,
when the business clock is earlier than the latest pass's or more than one cadence ahead of the
real clock (unless ``--force-clock``), or when the config is invalid; exit 1
with ``--strict`` when a ``critical`` finding is open after the pass."""

from __future__ import annotations

import argparse
import json
import sys
import threading
from datetime import datetime
from pathlib import Path

from monitor.commands._common import add_config_argument, config_from, parse_as_of
from monitor.config import PlumblineConfig
from monitor.lock import DatabaseLock
from monitor.notify import notify_pass
from monitor.passes import PassNotifier, PassReport, clock_tolerance, run_pass
from monitor.store import Store
from monitor.vocabulary import Severity


def pass_notifier(stop: threading.Event | None = None) -> PassNotifier:
    """Step 7 of a pass: write its HTML pages; with ``notify.email``, queue one message per
    owner with the pass's new, more severe and cleared findings, and deliver what the outbox
    has due (retries included), on the real clock."""

    def notify(store: Store, config: PlumblineConfig, report: PassReport, *,
               now: datetime) -> None:
        if report.pass_id is not None:
            notify_pass(store, config, report.pass_id, now=now,
                        notify=report.findings_to_notify, stop=stop)

    return notify


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "pass", help="run one monitoring pass now",
        description="Run one monitoring pass: ingest complete files, score, refit, check, "
        "forecast, record findings and notify.",
    )
    add_config_argument(parser)
    parser.add_argument("--as-of", metavar="TIME",
                        help="the business clock (ISO 8601; default: now)")
    parser.add_argument("--force-clock", action="store_true",
                        help="accept a business clock more than one cadence ahead of the real "
                        "clock, or go back from a latest pass that stands in the future")
    parser.add_argument("--strict", action="store_true",
                        help="exit 1 when a critical finding is open after the pass")
    parser.add_argument("--format", choices=("table", "json"), default="table")
    parser.set_defaults(handler=handle)


def summary(report: PassReport) -> dict[str, object]:
    taken = report.files_taken
    return {
        "pass_id": report.pass_id,
        "as_of": report.as_of.isoformat(),
        "nothing_to_do": report.nothing_to_do,
        "files": [{"feed": f.feed, "name": f.name, "outcome": f.outcome.value,
                   "taken": f in taken, "reason": f.note or None,
                   "rows_ingested": f.rows_ingested, "rows_rejected": f.rows_rejected,
                   "revisions": [{"series": r.series, "period": r.period,
                                  "revision": r.revision} for r in f.revised]}
                  for f in report.files],
        "files_taken": len(taken),
        "files_refused": len(report.files_refused),
        "not_taken": [{"feed": n.feed, "name": n.name, "state": n.state, "reason": n.reason,
                       "action": n.action} for n in report.not_taken],
        "outcomes_scored": report.outcomes_scored,
        "series_analysed": report.series_analysed,
        "forecasts_issued": report.forecasts_issued,
        "findings_raised": list(report.findings_raised),
        "findings_cleared": list(report.findings_cleared),
        "exports": [{"model": e.model, "pass_id": e.pass_id, "path": str(e.path),
                     "forecasts": e.forecasts} for e in report.exports],
        "skipped": list(report.skipped),
        "stopped_early": report.stopped_early,
        "timings": {k: round(v, 3) for k, v in report.timings.items()},
    }


def sentence(report: PassReport) -> str:
    if report.nothing_to_do:
        return (f"Nothing to do at {report.as_of.isoformat()}: no new complete files and the "
                "latest pass ran at this business clock.")
    files = f"{len(report.files_taken)} file(s) taken"
    if report.files_refused:
        files += f", {len(report.files_refused)} refused"
    return (
        f"Pass {report.pass_id} at {report.as_of.isoformat()}: {files}, "
        f"{report.outcomes_scored} actual(s) scored, {report.series_analysed} series refitted, "
        f"{report.forecasts_issued} forecast(s) issued; {len(report.findings_raised)} finding(s) "
        f"raised and {len(report.findings_cleared)} no longer seen."
    )


def shown_path(path: Path) -> str:
    """A path as people type it: relative to the working folder when inside it."""
    try:
        return str(path.relative_to(Path.cwd()))
    except ValueError:
        return str(path)


def table_lines(report: PassReport) -> list[str]:
    """The sentence, then what needs a look: exports, skipped work, refused files, rejected
    rows, revisions, and each file left in an inbox with why and what to do."""
    lines = [sentence(report)]
    for exported in report.exports:
        lines.append(f"  {exported.forecasts} forecast(s) of {exported.model} exported to "
                     f"{shown_path(exported.path)}")
    lines += [f"  skipped: {line}" for line in report.skipped]
    for f in report.files_refused:
        if f.duplicate:
            lines.append(f"  refused {f.feed}/{f.name}: the same bytes as {f.duplicate_of}, "
                         f"taken before; it is in {shown_path(f.stored_path)}")
        else:
            lines.append(f"  refused {f.feed}/{f.name}: {f.note}. Nothing of it was taken; it "
                         f"is in {shown_path(f.stored_path)}, the reason in "
                         f"{f.stored_path.name}.errors.txt beside it")
    for f in report.files_taken:
        if f.rows_rejected:
            lines.append(f"  {f.feed}/{f.name}: {f.rows_rejected} row(s) rejected, listed in "
                         f"{f.stored_path.name}.rejected.csv in the rejected folder"
                         f"{'. ' + f.note if f.note else ''}")
        elif f.outcome.value == "empty":
            lines.append(f"  {f.feed}/{f.name}: {f.note or 'no rows'}; archived")
        if f.revisions:
            keys = ", ".join(r.period if r.series is None else f"{r.series} {r.period}"
                             for r in f.revised)
            lines.append(f"  {f.feed}/{f.name}: {f.revisions} revision(s) of actuals held "
                         f"before ({keys}); the revised values are used from now on")
    lines += [f"  not taken: {note.line()}" for note in report.not_taken]
    return lines


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    as_of = parse_as_of(args.as_of, config) if args.as_of else None
    with DatabaseLock(config.database):
        report = run_pass(config, as_of=as_of, notifier=pass_notifier(),
                          max_ahead=clock_tolerance(config), force_clock=args.force_clock)
    if args.format == "json":
        print(json.dumps(summary(report), indent=2))
    else:
        print("\n".join(table_lines(report)))
    if args.strict:
        with Store.open(config.database, readonly=True) as store:
            critical = [f for f in store.open_findings() if f.severity is Severity.CRITICAL]
        if critical:
            print(f"{len(critical)} critical finding(s) open", file=sys.stderr)
            return 1
    return 0
