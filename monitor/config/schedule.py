"""Schedules of the config file: a duration or a five-field cron expression, checked here without
the scheduler library (only ``monitor.daemon`` imports APScheduler).

The cron reading is classic cron's, as the daemon fires it: day-of-week numbers 0–7 with 0 and 7
Sunday (not APScheduler 3's Monday-first numbering), names ``sun`` … ``sat``, and with both day
fields restricted a day matching either one counts. This module accepts what the daemon's trigger
accepts for the five fields, so an expression that loads here also runs there.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import timedelta

from monitor.text import did_you_mean, is_duration, parse_duration

_MONTHS = ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec")
_WEEKDAYS = ("sun", "mon", "tue", "wed", "thu", "fri", "sat")  # cron's numbering: 0 = Sunday
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

    @property
    def fixed_time(self) -> bool:
        """True when minute and hour are fixed (no ``*``): the schedule names times of day."""
        return "*" not in self.minute and "*" not in self.hour


def parse_schedule(text: str) -> timedelta | CronSchedule:
    """A schedule of the file: a duration (``30s``) or a five-field cron expression
    ``minute hour day-of-month month day-of-week``. Raises ValueError saying what is wrong."""
    if is_duration(text):
        interval = parse_duration(text)
        if interval <= timedelta(0):
            raise ValueError(f"schedule {text!r} must be longer than 0s")
        return interval
    fields = text.split()
    if len(fields) != 5:
        raise ValueError(
            f"{text!r} is neither a duration (30s, 5m) nor a cron expression of five fields "
            "(minute hour day-of-month month day-of-week)"
        )
    minute, hour, day, month, weekday = fields
    _cron_values(minute, "minute", 0, 59, ())
    hours = _cron_values(hour, "hour", 0, 23, ())
    days = set() if day.lower() == "last" else _cron_values(day, "day of month", 1, 31, ())
    months = _cron_values(month, "month", 1, 12, _MONTHS)
    _cron_values(weekday, "day of week", 0, 7, _WEEKDAYS)
    if days and weekday == "*" and min(days) > max(_MONTH_DAYS[m] for m in months):
        raise ValueError(f"{text!r} never fires: no month of {month!r} has day {min(days)}")
    return CronSchedule(minute, hour, day, month, weekday, frozenset(hours))


_MONTH_DAYS = {
    1: 31,
    2: 29,
    3: 31,
    4: 30,
    5: 31,
    6: 30,
    7: 31,
    8: 31,
    9: 30,
    10: 31,
    11: 30,
    12: 31,
}


def _cron_values(text: str, label: str, low: int, high: int, names: tuple[str, ...]) -> set[int]:
    values: set[int] = set()
    for item in text.split(","):
        match = _CRON_ITEM.match(item)
        if match is None:
            raise ValueError(f"cron {label} field {text!r}: cannot read {item!r}")
        step = int(match["step"]) if match["step"] else 1
        named = match["first"] is not None and not match["first"].isdigit()
        # APScheduler 3 silently drops a step after month names ('jan-jun/2' fires every month
        # from January to June), so it is refused; the daemon turns day-of-week names into its
        # own form first, so a step after day names works.
        if step < 1 or (match["step"] and named and label == "month"):
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
                if label == "day of week":  # the daemon's reading of day names needs a range
                    raise ValueError(f"cron {label} field {text!r}: a step needs a range or '*'")
                last = high  # '5/10': from 5 to the end of the field in steps of 10
            if last < first:
                raise ValueError(f"cron {label} field {text!r}: range {item!r} runs backwards")
        values.update(range(first, last + 1, step))
    return values


def _cron_value(
    word: str, text: str, label: str, low: int, high: int, names: tuple[str, ...]
) -> int:
    lowered = word.lower()
    if lowered in names:
        # Months count from 1 (jan = 1); days of the week from 0 (sun = 0).
        return names.index(lowered) + (1 if label == "month" else 0)
    if not word.isdigit():
        raise ValueError(
            f"cron {label} field {text!r}: {word!r} is not a number"
            f"{did_you_mean(lowered, names)}"
            + (" (days of the week: 0-7 with 0 and 7 = Sunday, or sun-sat)" if high == 7 else "")
        )
    if not low <= int(word) <= high:
        raise ValueError(f"cron {label} field {text!r}: {word} is outside {low}–{high}")
    return int(word)


__all__ = ["CronSchedule", "parse_schedule"]
