"""The daemon: scheduled scans and digests under the database's writer lock.

This is the only module that imports APScheduler (3.x), so a later move to 4.x touches one file.
It knows nothing of the pass or the config: the command layer hands it plain values and two
callables.

The job contract (``JobFunction``): ``scan(stop_requested)`` and ``digest(stop_requested)`` are
called with the daemon's :class:`threading.Event` ``stop_requested``. ``scan`` decides by itself
whether complete files are waiting and, if so, runs a pass; it returns ``None`` when there was
nothing to do, or a mapping of fields for the log line (files, findings, ...). ``digest`` builds
and sends the digest and returns fields likewise. A long job should look at
``stop_requested.is_set()`` between stages (a pass: after ingest, after refit, ...) and return
early when it is set; what it committed so far stays, and the next pass carries on from there.
The daemon holds the :class:`~monitor.lock.DatabaseLock` itself, so the callables must not take
it again. An exception from a job is logged (``scan_failed`` / ``digest_failed``) and the daemon
carries on; the next run is tried on schedule.

Schedules (DESIGN.md section 8) are a duration (real elapsed time) or a five-field cron
expression read on the wall clock of the configured IANA zone by our :class:`WallClockCronTrigger`
(APScheduler 3.11's ``CronTrigger`` fires fixed-time schedules twice in the repeated autumn hour
and skips days after the spring change; DEVELOPERS.md, section "daemon", has the reproductions).
Daylight saving follows classic cron: a fixed-time schedule (no ``*`` in minute and hour) whose
time is skipped runs once when the clock jumps, and once only when its time is repeated; a
schedule with ``*`` there follows the clock as it is. Day-of-week numbers are cron's (0 and 7 =
Sunday), and with both day fields restricted either one matching counts.

Missed runs: ``coalesce=True``, ``max_instances=1``, ``misfire_grace_time=None`` and one worker
thread. Missed run times of a job (a suspend, a held-up scheduler) collapse into one late run; a
scan due while a scan runs is dropped; a digest due during a pass runs when the pass ends.

Signals: the first SIGTERM or SIGINT sets ``stop_requested``; nothing new starts, the running
job is waited for, the lock is released and :meth:`MonitorDaemon.run_forever` returns 0. A
second signal ends the process at once with 128 + the signal number.

Logs: one line per event on stderr, plain or JSON (``EventLineFormatter``).
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import re
import select
import signal
import socket
import sys
import threading
import time
import traceback
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import FrameType
from typing import Any, Literal, TextIO, cast
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

from apscheduler.events import (
    EVENT_JOB_MAX_INSTANCES,
    EVENT_JOB_MISSED,
    EVENT_JOB_SUBMITTED,
    JobEvent,
)
from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger

from monitor.errors import ConfigError, UsageError
from monitor.lock import DatabaseLock
from monitor.text import did_you_mean, is_duration, parse_duration, printable

JobResult = Mapping[str, object] | None
JobFunction = Callable[[threading.Event], JobResult]
LogFormat = Literal["plain", "json"]
LOG_FORMATS: tuple[str, ...] = ("plain", "json")
MAX_SLEEP_SECONDS = 60.0
STOP_SIGNALS = (signal.SIGTERM, signal.SIGINT)

logger = logging.getLogger(__name__)

# ---------------------------------------------------------------------------------------------
# Schedules


def resolve_timezone(name: str | ZoneInfo) -> ZoneInfo:
    """The IANA zone ``name`` (``Europe/Berlin``); :class:`ConfigError` for an unknown name."""
    if isinstance(name, ZoneInfo):
        return name
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        hint = did_you_mean(name, available_timezones())
        raise ConfigError(f"timezone: unknown IANA time zone {name!r}{hint}") from None


_WEEKDAYS = ("sun", "mon", "tue", "wed", "thu", "fri", "sat")  # cron's numbering: 0 = Sunday
_PLAIN_FIELDS = ("minute", "hour", "day of month", "month")


def _weekday_number(token: str) -> int:
    """A cron weekday as written: 0-7 (0 and 7 are Sunday) or a name sun-sat (0-6)."""
    text = token.strip().lower()
    if text.isdigit() and int(text) <= 7:
        return int(text)
    if text in _WEEKDAYS:
        return _WEEKDAYS.index(text)
    raise ValueError(f"{token!r} is not a day of the week (0-7 with 0 and 7 = Sunday, or sun-sat)")


def _cron_weekdays(field: str) -> str:
    """A cron day-of-week field as APScheduler day names (APScheduler 3 numbers Monday 0)."""
    if field == "*":
        return "*"
    days: set[int] = set()
    for item in field.split(","):
        base, slash, step_text = item.partition("/")
        step = 1
        if slash:
            if not step_text.isdigit() or int(step_text) == 0:
                raise ValueError(f"day of week {item!r}: the step must be a whole number above 0")
            step = int(step_text)
        if base == "*":
            first, last = 0, 6
        elif "-" in base:
            start_text, end_text = base.split("-", 1)
            first, last = _weekday_number(start_text), _weekday_number(end_text)
            if last < first:
                raise ValueError(f"day of week {item!r}: the range runs backwards")
        elif slash:
            raise ValueError(f"day of week {item!r}: a step needs a range or *")
        else:
            first = last = _weekday_number(base)
        days.update(day % 7 for day in range(first, last + 1, step))
    return ",".join(_WEEKDAYS[day] for day in sorted(days))


def _wall_clock_calculator(
    minute: str, hour: str, day: str, month: str, weekdays: str
) -> CronTrigger:
    # A CronTrigger in UTC has no daylight saving, so it steps through naive wall-clock times
    # correctly; turning those into instants in the real zone is WallClockCronTrigger's job.
    return CronTrigger(
        minute=minute, hour=hour, day=day, month=month, day_of_week=weekdays, second=0,
        timezone=UTC,
    )


class WallClockCronTrigger(BaseTrigger):
    """A five-field cron expression fired by the wall clock of one IANA zone.

    Fire times are the wall-clock times the expression matches, turned into instants with the
    daylight-saving rules of the module docstring (fixed-time schedules: a skipped time fires
    once when the clock jumps, a repeated time fires at its first occurrence; schedules with
    ``*`` in minute or hour: skipped times do not happen, repeated times fire each time).
    ``get_next_fire_time`` returns the earliest such instant strictly after the previous fire
    time (or at/after ``now`` when there is none) as an aware datetime *in UTC*: an instant has
    one reading, while a local time inside the repeated hour depends on ``fold``, which Python
    ignores when it compares two datetimes of the same zone (and which some datetime
    stand-ins, freezegun 1.5's among them, drop in ``astimezone``).
    """

    __slots__ = ("_calculators", "expression", "fixed_time", "timezone")

    def __init__(self, expression: str, timezone: ZoneInfo) -> None:
        fields = expression.split()
        if len(fields) != 5:
            raise ValueError(
                f"{expression!r} is not a schedule: write a duration (30s, 5m) or a cron "
                f"expression of five fields (minute hour day-of-month month day-of-week); "
                f"found {len(fields)} field{'s' if len(fields) != 1 else ''}"
            )
        minute, hour, day, month, weekday = fields
        for name, value in zip(_PLAIN_FIELDS, fields[:4], strict=True):
            option = {"minute": "minute", "hour": "hour", "day of month": "day"}.get(name, name)
            try:
                CronTrigger(**{option: value}, timezone=UTC)
            except ValueError as exc:
                raise ValueError(f"{expression!r}: {name} field {value!r}: {exc}") from None
        weekdays = _cron_weekdays(weekday)
        self.expression = " ".join(fields)
        self.timezone = timezone
        self.fixed_time = "*" not in minute and "*" not in hour
        if day.startswith("*") or weekday.startswith("*"):
            self._calculators: tuple[CronTrigger, ...] = (
                _wall_clock_calculator(minute, hour, day, month, weekdays),
            )
        else:
            # Classic cron: with both day fields restricted, a day matching either one fires.
            self._calculators = (
                _wall_clock_calculator(minute, hour, day, month, "*"),
                _wall_clock_calculator(minute, hour, "*", month, weekdays),
            )
        if self._next_wall_time(datetime(2000, 1, 1)) is None:
            raise ValueError(f"{expression!r} never fires (no date matches it)")

    def _next_wall_time(self, after: datetime) -> datetime | None:
        """The first naive wall-clock time at or after ``after`` that the fields match."""
        probe = after.replace(tzinfo=UTC)
        found = [calc.get_next_fire_time(None, probe) for calc in self._calculators]
        times = [moment.replace(tzinfo=None) for moment in found if moment is not None]
        return min(times) if times else None

    def _offset_bounds(self, instant: datetime) -> tuple[timedelta, timedelta]:
        # Smallest and largest UTC offset of the zone within a day of ``instant``; enough to
        # bound how far wall-clock order and instant order can disagree (one change a day).
        offsets = []
        for shift in (-1, 0, 1):
            offset = (instant + timedelta(days=shift)).astimezone(self.timezone).utcoffset()
            offsets.append(offset if offset is not None else timedelta(0))
        return min(offsets), max(offsets)

    def _end_of_gap(self, earlier: datetime, later: datetime) -> datetime:
        """The instant the clock jumps, between the two readings of a skipped wall time."""
        after_offset = later.astimezone(self.timezone).utcoffset()
        low, high = earlier, later  # the offset at ``high`` is the new one; at ``low`` the old
        while high - low > timedelta(seconds=1):
            middle = low + (high - low) / 2
            middle = middle.replace(microsecond=0)
            if middle.astimezone(self.timezone).utcoffset() == after_offset:
                high = middle
            else:
                low = middle
        return high

    def _instants(self, wall: datetime) -> list[datetime]:
        """The UTC instants at which the wall-clock time ``wall`` fires."""
        first = wall.replace(tzinfo=self.timezone, fold=0).astimezone(UTC)
        second = wall.replace(tzinfo=self.timezone, fold=1).astimezone(UTC)
        exists = first.astimezone(self.timezone).replace(tzinfo=None) == wall
        if exists:
            if first == second or self.fixed_time:
                return [min(first, second)]
            return sorted((first, second))  # the repeated hour really passes twice
        if not self.fixed_time:
            return []
        return [self._end_of_gap(min(first, second), max(first, second))]

    def get_next_fire_time(
        self, previous_fire_time: datetime | None, now: datetime
    ) -> datetime | None:
        if previous_fire_time is not None:
            start = previous_fire_time.astimezone(UTC) + timedelta(microseconds=1)
        else:
            start = now.astimezone(UTC)
        low, _ = self._offset_bounds(start)
        wall = self._next_wall_time(start.replace(tzinfo=None) + low)
        best: datetime | None = None
        best_high = timedelta(0)
        while wall is not None:
            if best is not None and wall - best_high >= best.replace(tzinfo=None):
                break  # every later wall time lands after ``best``
            for instant in self._instants(wall):
                if instant >= start and (best is None or instant < best):
                    best = instant
                    _, best_high = self._offset_bounds(best)
            wall = self._next_wall_time(wall + timedelta(seconds=1))
        return best

    def __str__(self) -> str:
        return f"cron[{self.expression}] {self.timezone.key}"

    def __repr__(self) -> str:
        return f"WallClockCronTrigger({self.expression!r}, {self.timezone.key!r})"


def trigger_for_schedule(
    text: str, timezone: ZoneInfo, *, start: datetime | None = None
) -> BaseTrigger:
    """The APScheduler trigger of a schedule string: a duration or a five-field cron expression.

    A duration counts real elapsed time from ``start`` (default: now + one interval). Raises
    ValueError with a one-line message for anything else.
    """
    if is_duration(text):
        seconds = parse_duration(text).total_seconds()
        if seconds <= 0:
            raise ValueError(f"{text!r}: a schedule's interval must be longer than zero")
        return IntervalTrigger(seconds=seconds, start_date=start, timezone=timezone)
    return WallClockCronTrigger(text, timezone)


def validate_schedule(text: str, where: str = "schedule") -> None:
    """Raise :class:`ConfigError` naming ``where`` (e.g. ``schedule.scan``) for a bad schedule."""
    try:
        trigger_for_schedule(text, ZoneInfo("UTC"), start=datetime(2000, 1, 1, tzinfo=UTC))
    except ValueError as exc:
        raise ConfigError(f"{where}: {exc}") from None


def upcoming_runs(
    text: str, timezone: str | ZoneInfo, after: datetime, count: int = 1
) -> list[datetime]:
    """The next ``count`` run times of a schedule after ``after`` (aware), in the zone.

    For a duration the times are counted from ``after``, as if the daemon started then.
    """
    zone = resolve_timezone(timezone)
    interval_start = after + parse_duration(text) if is_duration(text) else None
    trigger = trigger_for_schedule(text, zone, start=interval_start)
    runs: list[datetime] = []
    previous: datetime | None = None
    while len(runs) < count:
        upcoming = trigger.get_next_fire_time(previous, after)
        if upcoming is None:
            break
        runs.append(upcoming.astimezone(zone))
        previous = upcoming
    return runs


# ---------------------------------------------------------------------------------------------
# Logging: one line per event


def _event(name: str, **fields: object) -> dict[str, object]:
    """``extra=`` for a log call: the event's name and its fields."""
    return {"event": name, "fields": fields}


def _iso_utc(moment: datetime) -> str:
    return moment.astimezone(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _json_value(value: object) -> object:
    return value.isoformat() if isinstance(value, datetime) else str(value)


def _plain_value(value: object) -> str:
    text = value.isoformat() if isinstance(value, datetime) else str(value)
    if text == "" or any(char in text for char in ' ,()="\n\\'):
        return json.dumps(text, ensure_ascii=False)
    return text


# What json.dumps(ensure_ascii=False) leaves raw but a terminal acts on: DEL, C1 controls and the
# bidirectional marks (C0 controls it escapes itself).
_JSON_UNSAFE = re.compile("[\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


class EventLineFormatter(logging.Formatter):
    """One line per log record: time (UTC), level, event, message and fields.

    plain: ``2027-03-29T06:00:00.412Z info digest_done: digest finished in 1.20 s (pages=3)``
    json:  ``{"time": "2027-03-29T06:00:00.412Z", "level": "info", "event": "digest_done",
    "message": "digest finished in 1.20 s", "fields": {"pages": 3, "seconds": 1.2}}``

    A record logged without ``extra=_event(...)`` takes its logger's last name as the event
    (``monitor.passes`` → ``passes``). An exception adds the fields ``error`` and ``where`` (the
    innermost frame); JSON lines also carry the whole ``traceback`` as one string.
    """

    def __init__(self, log_format: LogFormat = "plain") -> None:
        super().__init__()
        if log_format not in LOG_FORMATS:
            raise UsageError(f"unknown log format {log_format!r}: use plain or json")
        self.log_format = log_format

    def format(self, record: logging.LogRecord) -> str:
        moment = _iso_utc(datetime.fromtimestamp(record.created, UTC))
        event = str(getattr(record, "event", "") or record.name.rsplit(".", 1)[-1])
        fields: dict[str, object] = dict(getattr(record, "fields", None) or {})
        message = record.getMessage().replace("\n", "\\n")
        trace = None
        if record.exc_info and record.exc_info[1] is not None:
            error = record.exc_info[1]
            fields["error"] = f"{type(error).__name__}: {error}"
            frames = traceback.extract_tb(record.exc_info[2])
            if frames:
                frames_last = frames[-1]
                fields["where"] = (
                    f"{Path(frames_last.filename).name}:{frames_last.lineno} in {frames_last.name}"
                )
            trace = "".join(traceback.format_exception(*record.exc_info))
        level = record.levelname.lower()
        if self.log_format == "json":
            line: dict[str, object] = {
                "time": moment, "level": level, "event": event, "message": message,
                "fields": fields,
            }
            if trace is not None:
                line["traceback"] = trace
            return _JSON_UNSAFE.sub(
                lambda m: f"\\u{ord(m.group(0)):04x}",
                json.dumps(line, ensure_ascii=False, default=_json_value),
            )
        text = f"{moment} {level} {event}: {message}"
        if fields:
            text += " (" + ", ".join(f"{k}={_plain_value(v)}" for k, v in fields.items()) + ")"
        # Values from data files (series, file names) may hold terminal controls or bidi marks.
        return printable(text, keep_newlines=False)


@contextmanager
def logging_to(
    stream: TextIO, log_format: LogFormat = "plain", level: int = logging.INFO
) -> Iterator[logging.Handler]:
    """Send Plumbline's log records (the ``monitor`` loggers) to ``stream``, one line each.

    APScheduler's own records are passed at level ERROR only; the daemon logs the scheduling
    events itself. Everything is put back as it was on exit.
    """
    handler = logging.StreamHandler(stream)
    handler.setFormatter(EventLineFormatter(log_format))
    targets = {"monitor": level, "apscheduler": logging.ERROR}
    saved = {}
    for name, target_level in targets.items():
        target = logging.getLogger(name)
        saved[name] = (target.level, target.propagate)
        target.addHandler(handler)
        target.setLevel(target_level)
        target.propagate = False
    try:
        yield handler
    finally:
        for name, (old_level, old_propagate) in saved.items():
            target = logging.getLogger(name)
            target.removeHandler(handler)
            target.setLevel(old_level)
            target.propagate = old_propagate
        handler.flush()


# ---------------------------------------------------------------------------------------------
# The daemon


class _WakefulScheduler(BackgroundScheduler):
    """A BackgroundScheduler that re-reads the wall clock at least every MAX_SLEEP_SECONDS.

    Python's timed waits count on the monotonic clock, which on Linux does not advance while
    the machine is suspended; without the cap, a wait for next Monday's digest would stretch
    by the length of every suspend in between.
    """

    def _process_jobs(self) -> float:
        wait_seconds = super()._process_jobs()
        return MAX_SLEEP_SECONDS if wait_seconds is None else min(wait_seconds, MAX_SLEEP_SECONDS)


class MonitorDaemon:
    """Runs the scan and digest jobs on their schedules while holding the database lock.

    ``run_forever()`` is the daemon: it installs the SIGTERM/SIGINT handlers (when called from
    the main thread), takes the lock, runs until a signal or :meth:`request_stop`, waits for the
    running job and returns 0. ``start()`` / ``stop()`` are the same without the waiting, for
    callers that drive the daemon themselves.
    """

    def __init__(
        self,
        *,
        database: str | os.PathLike[str],
        timezone: str | ZoneInfo,
        scan_schedule: str,
        scan: JobFunction,
        digest_schedule: str | None = None,
        digest: JobFunction | None = None,
        scan_at_start: bool = True,
    ) -> None:
        if (digest is None) != (digest_schedule is None):
            raise ValueError("give both digest and digest_schedule, or neither")
        self.database = Path(database)
        self.timezone = resolve_timezone(timezone)
        self.scan_schedule = scan_schedule
        self.digest_schedule = digest_schedule
        self.scan_at_start = scan_at_start
        self.stop_requested = threading.Event()
        self._jobs: dict[str, tuple[BaseTrigger, JobFunction]] = {
            "scan": (self._trigger("schedule.scan", scan_schedule), scan)
        }
        if digest is not None and digest_schedule is not None:
            self._jobs["digest"] = (self._trigger("schedule.digest", digest_schedule), digest)
        self._lock = DatabaseLock(self.database, role="daemon")
        self._scheduler: _WakefulScheduler | None = None
        self._stop_reason = "request"
        self._signal_received: int | None = None
        # A socket pair wakes the main loop: signals write to it (signal.set_wakeup_fd), and so
        # do request_stop() and the end of the shutdown. Made by run_forever() only.
        self._wake_reader: socket.socket | None = None
        self._wake_writer: socket.socket | None = None

    def _trigger(self, where: str, text: str) -> BaseTrigger:
        try:
            return trigger_for_schedule(text, self.timezone)
        except ValueError as exc:
            raise ConfigError(f"{where}: {exc}") from None

    # -- life cycle ----------------------------------------------------------------------------

    def start(self) -> None:
        """Take the lock (or raise DatabaseLockedError) and start the scheduler; returns at once."""
        self._lock.acquire()
        try:
            scheduler = _WakefulScheduler(
                timezone=self.timezone,
                executors={"default": ThreadPoolExecutor(max_workers=1)},
                job_defaults={"coalesce": True, "max_instances": 1, "misfire_grace_time": None},
            )
            scheduler.add_listener(
                self._on_scheduler_event,
                EVENT_JOB_SUBMITTED | EVENT_JOB_MAX_INSTANCES | EVENT_JOB_MISSED,
            )
            for name, (trigger, function) in self._jobs.items():
                options: dict[str, Any] = {}
                if name == "scan" and self.scan_at_start:
                    options["next_run_time"] = datetime.now(self.timezone).replace(microsecond=0)
                scheduler.add_job(
                    self._run_job, trigger=trigger, args=(name, function), id=name, name=name,
                    **options,
                )
            # Paused first, so that the jobs have their next run times and the start line is
            # logged before the first job's lines.
            scheduler.start(paused=True)
            self._scheduler = scheduler
            fields: dict[str, object] = {
                "database": str(self.database), "timezone": self.timezone.key,
                "scan_schedule": self.scan_schedule,
            }
            if self.digest_schedule is not None:
                fields["digest_schedule"] = self.digest_schedule
            for name, moment in self.next_run_times().items():
                fields[f"next_{name}"] = moment
            logger.info(
                "daemon started (pid %d)", os.getpid(), extra=_event("daemon_started", **fields)
            )
            scheduler.resume()
        except BaseException:
            self.stop()
            raise

    def next_run_times(self) -> dict[str, datetime | None]:
        """The next run time of each job, in the daemon's zone (empty before start)."""
        if self._scheduler is None:
            return {}
        return {
            job.id: job.next_run_time.astimezone(self.timezone) if job.next_run_time else None
            for job in self._scheduler.get_jobs()
        }

    def request_stop(self, reason: str = "request") -> None:
        """Ask the daemon to stop, from any thread (what a signal does)."""
        if not self.stop_requested.is_set():
            self._stop_reason = reason
            self.stop_requested.set()
        self._wake()

    def stop(self) -> None:
        """Start no new job, wait for the running one, stop the scheduler, release the lock."""
        self.stop_requested.set()
        scheduler, self._scheduler = self._scheduler, None
        if scheduler is not None and scheduler.running:
            scheduler.shutdown(wait=True)
        self._lock.release()

    def wake(self) -> None:
        """Make the scheduler look at the clock now instead of at its next planned wakeup."""
        if self._scheduler is not None:
            self._scheduler.wakeup()

    def run_forever(self) -> int:
        """The daemon's main loop; returns 0 after a clean stop (raises if the lock is taken)."""
        self._wake_reader, self._wake_writer = socket.socketpair()
        self._wake_reader.setblocking(False)
        self._wake_writer.setblocking(False)
        try:
            with self._signals_handled():
                self.start()
                while not self.stop_requested.is_set():
                    if self._signal_received is not None:
                        self.request_stop(signal.Signals(self._signal_received).name)
                        break
                    self._sleep_until_woken(timeout=5.0)
                logger.info(
                    "stopping: no new runs; waiting for the running job to finish",
                    extra=_event("daemon_stopping", reason=self._stop_reason),
                )
                # The waiting happens in another thread so that the main thread stays free to
                # take a second signal (which ends the process at once).
                stopper = threading.Thread(target=self._stop_then_wake, name="plumbline-stop")
                stopper.start()
                while stopper.is_alive():
                    self._sleep_until_woken(timeout=1.0)
                stopper.join()
        finally:
            self.stop()
            reader, writer = self._wake_reader, self._wake_writer
            self._wake_reader = self._wake_writer = None
            reader.close()
            writer.close()
        logger.info("daemon stopped", extra=_event("daemon_stopped", reason=self._stop_reason))
        return 0

    def _stop_then_wake(self) -> None:
        try:
            self.stop()
        finally:
            self._wake()

    # -- signals and waking the main thread ------------------------------------------------------

    @contextmanager
    def _signals_handled(self) -> Iterator[None]:
        if threading.current_thread() is not threading.main_thread():
            yield  # signal handlers can only be set from the main thread; use request_stop()
            return
        assert self._wake_writer is not None
        previous = {number: signal.signal(number, self._on_signal) for number in STOP_SIGNALS}
        previous_fd = signal.set_wakeup_fd(self._wake_writer.fileno(), warn_on_full_buffer=False)
        try:
            yield
        finally:
            signal.set_wakeup_fd(previous_fd)
            for number, handler in previous.items():
                signal.signal(number, handler)

    def _on_signal(self, number: int, frame: FrameType | None) -> None:
        # Runs in the main thread between two bytecodes: take no locks here beyond logging's
        # re-entrant one. The main loop turns the plain attribute into ``stop_requested``.
        if self._signal_received is not None or self.stop_requested.is_set():
            name = signal.Signals(number).name
            logger.warning(
                "second signal (%s): exiting now without waiting for the running job", name,
                extra=_event("daemon_stop_forced", signal=name, exit_code=128 + number),
            )
            sys.stderr.flush()
            os._exit(128 + number)
        self._signal_received = number

    def _wake(self) -> None:
        writer = self._wake_writer
        if writer is not None:
            with contextlib.suppress(OSError):  # a full buffer means it is awake already
                writer.send(b"\0")

    def _sleep_until_woken(self, timeout: float) -> None:
        reader = self._wake_reader
        assert reader is not None
        select.select([reader], [], [], timeout)
        with contextlib.suppress(OSError):  # BlockingIOError: drained
            while reader.recv(4096):
                pass

    # -- jobs ----------------------------------------------------------------------------------

    def _run_job(self, name: str, function: JobFunction) -> None:
        if self.stop_requested.is_set():
            logger.info(
                "%s not started: the daemon is stopping", name, extra=_event(f"{name}_skipped")
            )
            return
        started = time.monotonic()
        try:
            result = function(self.stop_requested)
        except Exception:
            seconds = round(time.monotonic() - started, 3)
            logger.error(
                "%s failed after %.2f s; the daemon carries on", name, seconds, exc_info=True,
                extra=_event(f"{name}_failed", seconds=seconds),
            )
            return
        seconds = round(time.monotonic() - started, 3)
        if result is None and name == "scan":
            logger.debug("nothing to do", extra=_event("scan_idle", seconds=seconds))
            return
        fields = dict(result or {})
        fields["seconds"] = seconds
        logger.info(
            "%s finished in %.2f s", name, seconds, extra=_event(f"{name}_done", **fields)
        )

    def _on_scheduler_event(self, event: JobEvent) -> None:
        name = str(event.job_id)
        if event.code == EVENT_JOB_SUBMITTED:
            scheduled = cast(datetime, event.scheduled_run_times[-1]).astimezone(self.timezone)
            late = (datetime.now(UTC) - scheduled).total_seconds()
            fields: dict[str, object] = {"scheduled": scheduled}
            if late >= 1.0:
                fields["late_seconds"] = round(late, 1)
            logger.log(
                logging.DEBUG if name == "scan" else logging.INFO,
                "%s due at %s", name, scheduled.isoformat(), extra=_event(f"{name}_due", **fields),
            )
        elif event.code == EVENT_JOB_MAX_INSTANCES:
            logger.debug(
                "%s still running; this run time is dropped", name,
                extra=_event(f"{name}_busy"),
            )
        elif event.code == EVENT_JOB_MISSED:
            logger.warning(
                "%s run time missed", name,
                extra=_event(f"{name}_missed", scheduled=event.scheduled_run_time),
            )


def run_daemon(
    *,
    database: str | os.PathLike[str],
    timezone: str | ZoneInfo,
    scan_schedule: str,
    scan: JobFunction,
    digest_schedule: str | None = None,
    digest: JobFunction | None = None,
    log_format: str = "plain",
    log_level: int = logging.INFO,
    stream: TextIO | None = None,
) -> int:
    """``plumbline run``: log to stderr (or ``stream``) and run the daemon until a signal.

    Returns 0 after SIGTERM or SIGINT. Raises :class:`DatabaseLockedError` when another process
    holds the database, :class:`ConfigError` for a bad time zone or schedule and
    :class:`UsageError` for an unknown log format (all exit code 2 in the CLI).
    """
    if log_format not in LOG_FORMATS:
        raise UsageError(f"--log-format: unknown format {log_format!r}; use plain or json")
    daemon = MonitorDaemon(
        database=database, timezone=timezone, scan_schedule=scan_schedule, scan=scan,
        digest_schedule=digest_schedule, digest=digest,
    )
    with logging_to(stream or sys.stderr, cast(LogFormat, log_format), log_level):
        return daemon.run_forever()


__all__ = [
    "LOG_FORMATS",
    "MAX_SLEEP_SECONDS",
    "EventLineFormatter",
    "JobFunction",
    "JobResult",
    "MonitorDaemon",
    "WallClockCronTrigger",
    "logging_to",
    "resolve_timezone",
    "run_daemon",
    "trigger_for_schedule",
    "upcoming_runs",
    "validate_schedule",
]
