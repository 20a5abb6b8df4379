"""``plumbline check``: validate the config and look at each feed's inbox, writing nothing.

    plumbline check [-c/--config PATH]

The config is loaded as a pass would load it (``monitor.config.load_config``). Then, for each
feed, the inbox is looked at: does it exist, how many data files wait in it, and does the header
of the newest complete file hold every column the feed's models need (with the nearest name for a
missing one). "Complete" is the ingest's own reading (DESIGN.md section 6): a file with
``NAME.ready`` beside it, one renamed into place, or one unchanged for the feed's ``settle``
time; names starting with ``.`` or ending in ``.part``, ``.tmp`` or ``.ready`` are never data.
Only the header is read: the first line of a CSV, the schema in a Parquet file's footer.

Nothing is written: no database, folder, report or marker is made, and no file is moved.

Exit status: 0 when the config is valid, even with warnings (a missing inbox, a header lacking a
column, an unreadable header, an unset SMTP environment variable, a feed no model reads): they
describe the data and the machine, not the file. 2 when the config is invalid; each problem
is printed on its own line to stderr.
"""

from __future__ import annotations

import argparse
import csv
import os
import sys
import time
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

from monitor.config import (
    CronSchedule,
    Feed,
    PlumblineConfig,
    feed_columns,
    load_config,
    models_of_feed,
    parse_schedule,
)
from monitor.errors import ConfigError
from monitor.ingest.dialect import separator_hint
from monitor.ingest.folders import InboxNote, inbox_notes, survey_inbox
from monitor.lock import database_path_problem
from monitor.text import did_you_mean

HEADER_LIMIT = 1 << 20  # a header line longer than 1 MiB is not a header
# A modification time this far ahead of the real clock is reported (clocks of machines that share
# a folder differ by a little; common practice, not a standard).
FUTURE_SLACK_SECONDS = 60.0


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "check",
        help="validate the config and look at each feed's inbox; writes nothing",
        description="Validate the config file, then look at each feed's inbox: whether it "
        "exists, how many files wait, and whether the newest complete file's header has every "
        "column the models need. Writes nothing. Exit 0 when the config is valid (warnings "
        "included), 2 when it is not.",
    )
    parser.add_argument(
        "-c",
        "--config",
        default="plumbline.yaml",
        metavar="PATH",
        help="the config file (default: ./plumbline.yaml)",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    try:
        config = load_config(args.config)
    except ConfigError as exc:
        problems = str(exc).splitlines()
        for line in problems:
            print(line, file=sys.stderr)
        count = f"{len(problems)} problem" + ("" if len(problems) == 1 else "s")
        print(f"plumbline: the config is invalid ({count}); nothing else was checked",
              file=sys.stderr)  # fmt: skip
        return exc.exit_code
    report = check_config(config, now=time.time())
    for line in report.lines:
        print(line)
    warnings = len(report.warnings)
    verdict = "no warnings" if not warnings else f"{warnings} warning" + "s" * (warnings > 1)
    print(f"config valid; {verdict}")
    return 0


@dataclass
class InboxReport:
    """What ``check`` saw in one feed's inbox."""

    exists: bool
    waiting: list[Path] = field(default_factory=list)  # data files, complete or not
    complete: list[Path] = field(default_factory=list)
    newest: Path | None = None
    header: tuple[str, ...] | None = None
    header_error: str | None = None
    missing: list[str] = field(default_factory=list)  # needed columns the header lacks
    notes: list[InboxNote] = field(default_factory=list)  # files a pass would leave, and why
    future: list[tuple[Path, float]] = field(default_factory=list)  # (file, seconds ahead)
    ignored: list[tuple[str, str]] = field(default_factory=list)  # (name, why) never data


@dataclass
class CheckReport:
    """The lines ``check`` prints, the warnings among them, and each feed's inbox."""

    lines: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    inboxes: dict[str, InboxReport] = field(default_factory=dict)

    def say(self, line: str) -> None:
        self.lines.append(line)

    def warn(self, line: str) -> None:
        self.warnings.append(line)
        self.lines.append(f"  warning: {line}")


def check_config(config: PlumblineConfig, *, now: float) -> CheckReport:
    """Look at what a valid config points to; ``now`` (seconds since the epoch) judges settling."""
    report = CheckReport()
    source = config.source or Path("plumbline.yaml")
    report.say(
        f"{source}: valid; {_count(len(config.feeds), 'feed')}, "
        f"{_count(len(config.models), 'model')}, timezone {config.timezone}"
    )
    problem = database_path_problem(config.database)
    if problem is not None:
        report.say(f"database: {config.database}")
        report.warn(f"database: {problem}; every command that opens it will refuse")
    else:
        state = "exists" if config.database.is_file() else (
            "not created yet; the first pass makes it"
        )
        report.say(f"database: {config.database} ({state})")
    _check_schedules(config, report)
    _check_email(config, report)
    _check_compute(config, report)
    for name, feed in config.feeds.items():
        _check_feed(config, name, feed, now, report)
    return report


def _check_schedules(config: PlumblineConfig, report: CheckReport) -> None:
    parts: list[str] = []
    notes: list[str] = []
    for key in ("scan", "digest"):
        text = getattr(config.schedule, key)
        schedule = parse_schedule(text)
        if not isinstance(schedule, CronSchedule):
            parts.append(f"{key} every {text}")
            continue
        parts.append(f'{key} by cron "{text}" in {config.timezone}')
        night = sorted(schedule.hours & {1, 2})
        if night and schedule.fixed_time and _has_daylight_saving(config):
            notes.append(
                f"  note: schedule.{key} falls in the {night[0]:02d}:00 hour, where the clocks "
                f"of {config.timezone} change twice a year: on those days it runs once, when "
                "the clocks jump forward or at the first of the two repeated hours"
            )
    report.say(f"schedule: {'; '.join(parts)}")
    for line in notes:
        report.say(line)


def _has_daylight_saving(config: PlumblineConfig) -> bool:
    year = datetime.now().year
    offsets = {datetime(year, month, 15, tzinfo=config.zone).utcoffset() for month in (1, 7)}
    return len(offsets) > 1


def _check_email(config: PlumblineConfig, report: CheckReport) -> None:
    email = config.notify.email
    if email is None:
        report.say(f"notify: HTML pages in {config.notify.html_dir}; no e-mail configured")
        return
    report.say(
        f"notify: HTML pages in {config.notify.html_dir}; e-mail from {email.sender} via "
        f"{email.smtp_host}:{email.smtp_port} ({email.security}) to {', '.join(email.to)}"
    )
    for key in ("username_env", "password_env"):
        variable = getattr(email, key)
        if variable is not None and variable not in os.environ:
            report.warn(f"notify.email.{key}: the environment variable {variable} is not set here")
    if email.security == "none" and email.password_env is not None:
        report.warn(
            "notify.email: security is none but a login is configured; Plumbline never sends a "
            "password over an unencrypted connection, so every send will fail: use starttls or "
            "tls, or remove the login settings"
        )


LOCAL_COMPUTE = "local (in the pass's own process)"  # monitor.compute.LocalCompute.describe


def _check_compute(config: PlumblineConfig, report: CheckReport) -> None:
    if config.compute.engine == "local":
        # Said without importing monitor.compute, which loads the statistics: check stays light.
        report.say(f"compute: {LOCAL_COMPUTE}")
        return
    from monitor.compute import probe

    found = probe(config.compute)
    report.say(f"compute: {found.summary}" + (f"; {found.detail}" if found.answered else ""))
    if found.answered is False:
        report.warn(f"compute: {found.detail}; a pass would stop with exit status 2")
    elif found.answered is None and found.detail:
        report.say(f"  {found.detail}")


def _check_feed(
    config: PlumblineConfig, name: str, feed: Feed, now: float, report: CheckReport
) -> None:
    models = models_of_feed(config, name)
    listed = ", ".join(models) if models else "none"
    report.say(
        f"feed {name}: {feed.format}, period {feed.period} ({feed.period_type}); models: {listed}"
    )
    if not models:
        report.warn(f"feed {name}: no model reads this feed")
    needed = set(feed_columns(config, name)) | set(feed.columns or ())
    inbox = inspect_inbox(feed, needed, now=now, name=name)
    report.inboxes[name] = inbox
    if not inbox.exists:
        report.say(f"  inbox {feed.inbox}: does not exist")
        report.warn(f"feed {name}: the inbox does not exist, so no file can arrive yet")
        return
    settling = len(inbox.waiting) - len(inbox.complete)
    waiting = _count(len(inbox.waiting), "data file") + " waiting"
    if settling:
        waiting += f" ({settling} not complete yet)"
    report.say(f"  inbox {feed.inbox}: {waiting}")
    for note in inbox.notes:
        report.say(f"  not taken: {note.name}: {note.reason}; {note.action}")
    for path, ahead in inbox.future:
        report.warn(
            f"feed {name}: {path.name} has a modification time {_ahead_text(ahead)} in the future "
            "(the sender's clock, or times copied from elsewhere); it cannot count as settled "
            f"until then: add a marker {path.name}.ready, or fix the time with touch"
        )
    for entry, why in inbox.ignored:
        if why.startswith("a hard link") or why.startswith("a symbolic link"):
            report.warn(f"feed {name}: {entry} is {why}; it is never read")
    if inbox.newest is None:
        return
    shown = inbox.newest.name
    if inbox.header_error is not None:
        report.warn(f"feed {name}: cannot read the header of {shown}: {inbox.header_error}")
    elif inbox.missing:
        header = inbox.header or ()
        lacking = ", ".join(f"'{column}'{did_you_mean(column, header)}" for column in inbox.missing)
        hint = _separator_hint(inbox.newest, name, feed)
        report.warn(f"feed {name}: {shown} lacks column(s) the config needs: {lacking}{hint}")
    else:
        report.say(f"  newest complete file {shown}: its header has every column needed")


def _separator_hint(path: Path, name: str, feed: Feed) -> str:
    if feed.format != "csv":
        return ""
    try:
        with path.open("rb") as stream:
            head = stream.read(1 << 16)
    except OSError:
        return ""
    return separator_hint(head, name, feed.delimiter, feed.decimal)


def inspect_inbox(feed: Feed, needed: set[str], *, now: float, name: str = "") -> InboxReport:
    """The inbox's data files, which are complete, and the newest complete file's header."""
    if not feed.inbox.is_dir():
        return InboxReport(exists=False)
    report = InboxReport(exists=True)
    # The ingest's own reading of the inbox (marker, rename, settle), so that check and a pass
    # agree on which files are complete; it reads and moves nothing.
    survey = survey_inbox(feed.inbox, settle_seconds=feed.settle.total_seconds(),
                          real_clock=lambda: now, detect_rename=True)
    report.waiting.extend(item.path for item in (*survey.complete, *survey.waiting))
    report.waiting.sort()
    report.notes = list(inbox_notes(name, feed.settle.total_seconds(), survey, now=now))
    report.ignored.extend(survey.ignored)
    for item in (*survey.complete, *survey.waiting):
        ahead = item.mtime_ns / 1e9 - now
        if ahead > FUTURE_SLACK_SECONDS:
            report.future.append((item.path, ahead))
    stamped: list[tuple[int, str, Path]] = []
    for item in survey.complete:
        report.complete.append(item.path)
        stamped.append((item.mtime_ns, item.name, item.path))
    if not stamped:
        return report
    report.newest = max(stamped)[2]
    try:
        report.header = read_header(report.newest, feed.format, feed.delimiter)
    except ValueError as exc:
        report.header_error = str(exc)
        return report
    report.missing = sorted(needed - set(report.header))
    return report


def read_header(path: Path, file_format: str, delimiter: str = ",") -> tuple[str, ...]:
    """The column names of a data file, reading only its header. Raises ValueError."""
    if file_format == "parquet":
        # Imported here: pyarrow is slow to import and only Parquet feeds need it.
        import pyarrow.parquet  # type: ignore[import-untyped]

        try:
            return tuple(pyarrow.parquet.read_schema(path).names)
        except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
            raise ValueError(f"not a readable Parquet file ({exc})") from None
    with path.open("rb") as stream:
        raw = b""
        while not raw.strip():
            line = stream.readline(HEADER_LIMIT)
            if not line:
                raise ValueError("the file is empty (no header line)")
            if not line.endswith(b"\n") and len(line) >= HEADER_LIMIT:
                raise ValueError("the first line is longer than 1 MiB; not a CSV header")
            raw = line
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ValueError(f"not UTF-8 text (byte {exc.start} of the header)") from None
    try:
        cells = next(csv.reader([text], delimiter=delimiter))
    except csv.Error as exc:
        raise ValueError(f"the header is not CSV ({exc})") from None
    return tuple(cell.strip() for cell in cells)


def _ahead_text(seconds: float) -> str:
    if seconds >= 2 * 86400:
        return f"{seconds / 86400:.0f} days"
    if seconds >= 2 * 3600:
        return f"{seconds / 3600:.0f} hours"
    return f"{seconds / 60:.0f} minutes" if seconds >= 120 else f"{seconds:.0f} seconds"


def _count(number: int, noun: str) -> str:
    return f"{number} {noun}" + ("" if number == 1 else "s")


__all__ = ["CheckReport", "InboxReport", "check_config", "inspect_inbox",
           "read_header", "register", "run"]  # fmt: skip
