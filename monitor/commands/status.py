"""``plumbline status [--all] [--format table|json]``: open findings (all with ``--all``), the
latest passes and the next scheduled runs. Reads the database only."""

from __future__ import annotations

import argparse
import json
from datetime import UTC, datetime, timedelta
from typing import Any

from monitor.commands._common import (
    add_config_argument,
    config_from,
    local_moment,
    open_existing_store,
)
from monitor.config import PlumblineConfig
from monitor.lock import running_daemon
from monitor.notify.words import (
    KIND_WORDS,
    SEVERITY_MARKS,
    STATE_WORDS,
    finding_headline,
    local_date,
    local_time,
    plural,
)
from monitor.store import FindingRecord, OutboxMessage, PassRecord

# A latest pass this far ahead of the real clock is shown as a problem (a day: a pass at the
# start of the business day may stand a few hours ahead by design).
FUTURE_PASS_SLACK = timedelta(days=1)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "status", help="open findings, the latest passes and the next runs",
        description="Show the open findings (every finding with --all), the latest passes and "
        "the next scheduled scan and digest. Reads the database only.",
    )
    add_config_argument(parser)
    parser.add_argument("--all", action="store_true", help="include cleared findings")
    parser.add_argument("--format", choices=("table", "json"), default="table")
    parser.set_defaults(handler=handle)


def finding_record(f: FindingRecord) -> dict[str, Any]:
    return {
        "id": f.id, "model": f.model, "series": f.series, "feed": f.feed,
        "kind": f.kind.value, "severity": f.severity.value, "state": f.state.value,
        "since_period": f.since_period, "statistic": f.statistic, "p_value": f.p_value,
        "message": f.message, "action": f.action,
        # kept for one release: true once an owner's note is recorded (use "note")
        "acknowledged": f.noted,
        "note": None if f.note is None else {
            "at": f.note.at.isoformat(), "by": f.note.by, "text": f.note.text,
        },
        "note_count": f.note_count,
        # the check its figures came from: the latest pass in which the condition held
        "checked_pass": f.last_pass_id,
        "checked_at": None if f.last_held_at is None else f.last_held_at.isoformat(),
    }


def pass_record(p: PassRecord, config: PlumblineConfig) -> dict[str, Any]:
    return {
        "id": p.id, "as_of": local_moment(p.as_of, config),
        "started_at": local_moment(p.started_at, config),
        "finished_at": None if p.finished_at is None else local_moment(p.finished_at, config),
        "status": p.status,
        "files": p.counts.get("files"), "files_refused": p.counts.get("files_refused", 0),
        "forecasts": p.counts.get("forecasts"),
        "findings_raised": p.counts.get("findings_raised"),
        "findings_cleared": p.counts.get("findings_cleared"),
    }


def next_runs(config: PlumblineConfig, now: datetime) -> dict[str, Any]:
    """The daemon's next scan and digest, when a ``plumbline run`` daemon holds the database;
    null times otherwise (nothing runs on a schedule then, unless cron starts it)."""
    pid = running_daemon(config.database)
    runs: dict[str, Any] = {"daemon_pid": pid, "scan": None, "digest": None}
    if pid is None:
        return runs
    from monitor.daemon import upcoming_runs  # APScheduler: only when a daemon runs

    for name, text in (("scan", config.schedule.scan), ("digest", config.schedule.digest)):
        (when,) = upcoming_runs(text, config.zone, now, 1)
        runs[name] = local_moment(when, config)
    return runs


def problems(passes: list[PassRecord], unsent: list[OutboxMessage], now: datetime) -> list[str]:
    """What is stuck, in one line each: a latest pass in the future of the real clock, what the
    latest pass could not do (files that cannot be read or moved, pages that cannot be written),
    and messages the outbox keeps failing to send."""
    lines: list[str] = []
    latest = passes[0] if passes else None
    if latest is not None and latest.as_of > now + FUTURE_PASS_SLACK:
        lines.append(
            f"the latest pass (id {latest.id}) stands at business clock "
            f"{latest.as_of.isoformat()}, in the future of the real clock: passes at the real "
            "clock are refused until then; if that clock was a mistake, 'plumbline pass "
            "--force-clock' continues from now"
        )
    if latest is not None:
        lines += [f"pass {latest.id} could not do everything: {item}"
                  for item in latest.counts.get("skipped") or ()]
    failing = [m for m in unsent if m.attempts > 0]
    if failing:
        worst = max(failing, key=lambda m: (m.attempts, m.id))
        soonest = min(m.next_attempt_at for m in failing)
        lines.append(
            f"outbox: {len(failing)} message(s) not sent yet, the oldest queued "
            f"{min(m.created_at for m in failing).isoformat(timespec='minutes')} and tried "
            f"{worst.attempts} time(s); last error: {worst.last_error or 'none recorded'}; next "
            f"try {soonest.isoformat(timespec='minutes')}"
        )
    return lines


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    with open_existing_store(config, readonly=True) as store:
        findings = store.list_findings(state="all" if args.all else "open")
        passes = store.list_passes(10)
        unsent = store.unsent_messages()
    rank = {"critical": 0, "warning": 1, "notice": 2}
    findings.sort(key=lambda f: (rank[f.severity.value], f.model or "", f.series or "", f.id))
    document = {
        "findings": [finding_record(f) for f in findings],
        "passes": [pass_record(p, config) for p in passes],
        "next_runs": next_runs(config, datetime.now(UTC)),
        "problems": problems(passes, unsent, datetime.now(UTC)),
    }
    if args.format == "json":
        print(json.dumps(document, indent=2))
        return 0
    open_count = sum(1 for f in findings if f.state.value != "cleared")
    noted = sum(1 for f in findings if f.state.value != "cleared" and f.noted)
    latest = passes[0] if passes else None
    clock = local_time(latest.as_of, config.zone) if latest else "never"
    with_notes = f", {noted} with an owner's note" if noted else ""
    print(f"{plural(open_count, 'open finding')}{with_notes}; latest pass "
          f"{latest.id if latest else '-'} at business clock {clock}.")
    for f in findings:
        print(f"  {SEVERITY_MARKS[f.severity]} {f.severity.value:<8} {finding_headline(f)}")
        state = STATE_WORDS[f.state.value]
        if f.state.value == "cleared" and f.cleared_at is not None:
            state += f" from {local_date(f.cleared_at, config.zone)}"
        print(f"      Finding {f.id}, {KIND_WORDS[f.kind]}, {state}. {f.message}")
        if f.note is not None:
            more = "" if f.note_count == 1 else f" (latest of {f.note_count})"
            print(f"      Note{more}, {local_time(f.note.at, config.zone)}, {f.note.by}: "
                  f"{f.note.text}")
    for line in document["problems"]:
        print(f"  problem: {line}")
    runs = document["next_runs"]
    assert isinstance(runs, dict)
    if runs["daemon_pid"] is None:
        print("No daemon is running on this database ('plumbline run'), so nothing is scheduled "
              "here; passes and digests run when started (by cron, or by hand).")
    else:
        print(f"Daemon running (process {runs['daemon_pid']}): next scan {runs['scan']}; next "
              f"digest {runs['digest']}.")
    return 0
