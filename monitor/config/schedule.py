"""Schedules of the config file: a duration or a five-field cron expression, checked here without
the scheduler library (only ``monitor.daemon`` imports APScheduler)."""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import timedelta

from monitor.text import did_you_mean, is_duration, parse_duration

_MONTHS = ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec")
_WEEKDAYS = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
_CRON_ITEM = re.compile(r"^(?:\*|(?P<first>\w+)(?:-(?P<last>\w+))?)(?:/(?P<step>\d+))?$")


@dataclass(frozen=True)
class CronSchedule:
    """A five-field cron expression, checked; ``hours`` lists the hours at which it can fire."""

    minute: str
    hour: str
    day: str
    month: str
    day_of_week: str
    hours: frozenset[int]

    @property
    def expression(self) -> str:
        return " ".join((self.minute, self.hour, self.day, self.month, self.day_of_week))


def parse_schedule(text: str) -> timedelta | CronSchedule:
    """A schedule of the file: a duration (``30s``) or a five-field cron expression.

    Days of the week are written by name (``mon`` … ``sun``): cron programs disagree on what the
    numbers mean (0 is Sunday in crontab, Monday in APScheduler 3), and on whether a day of the
    month and a day of the week must both hold, so restricting both is refused.
    Raises ValueError saying what is wrong.
    """
    if is_duration(text):
        interval = parse_duration(text)
        if interval <= timedelta(0):
            raise ValueError(f"schedule {text!r} must be longer than 0s")
        return interval
    fields = text.split()
    if len(fields) != 5:
        raise ValueError(
            f"{text!r} is neither a duration (30s, 5m) nor a cron expression of five fields "
            "(minute hour day month day-of-week)"
        )
    minute, hour, day, month, weekday = fields
    _cron_values(minute, "minute", 0, 59, ())
    hours = _cron_values(hour, "hour", 0, 23, ())
    _cron_values(day, "day of month", 1, 31, ())
    _cron_values(month, "month", 1, 12, _MONTHS)
    _cron_values(weekday, "day of week", 0, 6, _WEEKDAYS)
    if day != "*" and weekday != "*":
        raise ValueError(
            f"{text!r} restricts both the day of the month and the day of the week; cron "
            "programs disagree on whether both or either must hold, so give one and '*' for "
            "the other"
        )
    return CronSchedule(minute, hour, day, month, weekday, frozenset(hours))


def _cron_values(text: str, label: str, low: int, high: int, names: tuple[str, ...]) -> set[int]:
    names_only = label == "day of week"
    values: set[int] = set()
    for item in text.split(","):
        match = _CRON_ITEM.match(item)
        if match is None:
            raise ValueError(f"cron {label} field {text!r}: cannot read {item!r}")
        step = int(match["step"]) if match["step"] else 1
        named = match["first"] is not None and not match["first"].isdigit()
        if step < 1 or (match["step"] and (names_only or named)):
            # APScheduler 3 reads steps only after numbers or '*'.
            raise ValueError(f"cron {label} field {text!r}: step in {item!r} is not allowed")
        if match["first"] is None:
            first, last = low, high
        else:
            first = _cron_value(match["first"], text, label, low, high, names)
            last = (
                first
                if match["last"] is None
                else _cron_value(match["last"], text, label, low, high, names)
            )
            if match["step"] and match["last"] is None:
                raise ValueError(f"cron {label} field {text!r}: a step needs a range or '*'")
            if last < first:
                raise ValueError(f"cron {label} field {text!r}: range {item!r} runs backwards")
        values.update(range(first, last + 1, step))
    return values


def _cron_value(
    word: str, text: str, label: str, low: int, high: int, names: tuple[str, ...]
) -> int:
    lowered = word.lower()
    if lowered in names:
        return names.index(lowered) + low
    if label == "day of week":
        raise ValueError(
            f"cron day-of-week field {text!r}: write day names (mon, tue, … sun), not "
            f"{word!r}; cron programs number the days differently{did_you_mean(lowered, names)}"
        )
    if not word.isdigit():
        raise ValueError(
            f"cron {label} field {text!r}: {word!r} is not a number{did_you_mean(lowered, names)}"
        )
    if not low <= int(word) <= high:
        raise ValueError(f"cron {label} field {text!r}: {word} is outside {low}–{high}")
    return int(word)


__all__ = ["CronSchedule", "parse_schedule"]
