"""Schedules across daylight-saving changes, with a frozen clock and the real trigger objects.

Europe/Berlin changes on the last Sunday of March (02:00 → 03:00) and of October (03:00 → 02:00):
2026-03-29, 2026-10-25, 2027-03-28, 2027-10-31 (EU summer-time rule, Directive 2000/84/EC; the
zone data are the tzdata package's). Each test walks a trigger the way the scheduler does: ask
for the next fire time, move the frozen clock a little past it, ask again. The expected times
are written out by hand, or come from ``oracle_fires``, an independent minute-by-minute reading
of the wall clock that implements the classic cron rules (Vixie cron's cron(8) manual: jobs in
skipped time run right after the change; fixed-time jobs in repeated time are not run twice;
jobs with '*' in the minute or hour field follow the new time).
"""

from __future__ import annotations

import itertools
from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest
from freezegun import freeze_time

from monitor.daemon import (
    WallClockCronTrigger,
    resolve_timezone,
    trigger_for_schedule,
    upcoming_runs,
    validate_schedule,
)
from monitor.errors import ConfigError

BERLIN = ZoneInfo("Europe/Berlin")
SPRING_2026 = date(2026, 3, 29)
AUTUMN_2026 = date(2026, 10, 25)
SPRING_2027 = date(2027, 3, 28)
AUTUMN_2027 = date(2027, 10, 31)
CHANGES = [SPRING_2026, AUTUMN_2026, SPRING_2027, AUTUMN_2027]
LATENESS = timedelta(milliseconds=250)  # the scheduler wakes a little after each fire time


def local(*parts: int, fold: int = 0) -> datetime:
    return datetime(*parts, tzinfo=BERLIN, fold=fold)  # type: ignore[misc]


def utc(moment: datetime) -> datetime:
    return moment.astimezone(UTC)


def walk(text: str, start: datetime, end: datetime) -> list[datetime]:
    """Successive fire times in [start, end] as the scheduler would ask for them, in Berlin."""
    trigger = trigger_for_schedule(text, BERLIN)
    fires: list[datetime] = []
    previous: datetime | None = None
    with freeze_time(start) as clock:
        while True:
            now = datetime.now(UTC)
            upcoming = trigger.get_next_fire_time(previous, now)
            if upcoming is None or utc(upcoming) > utc(end):
                break
            if previous is not None:
                assert utc(upcoming) > utc(previous), f"{text}: no progress after {previous}"
            assert utc(upcoming) >= utc(now) - LATENESS
            fires.append(upcoming)
            assert len(fires) < 5000, f"{text}: runaway"
            previous = upcoming
            clock.move_to(utc(upcoming) + LATENESS)
    # Read in Berlin once the clock is real again: freezegun 1.5's datetime stand-in drops
    # ``fold`` in astimezone(), which would misreport the second 02:30 of an autumn night.
    return [datetime.fromtimestamp(fire.timestamp(), BERLIN) for fire in fires]


def span(change: date, days: int = 7) -> tuple[datetime, datetime]:
    """A two-week span centred on a change day, local midnight to local midnight."""
    first = change - timedelta(days=days)
    last = change + timedelta(days=days)
    return local(first.year, first.month, first.day), local(last.year, last.month, last.day)


# -- an independent reading of the wall clock, minute by minute ---------------------------------

WEEKDAY_NAMES = ["sun", "mon", "tue", "wed", "thu", "fri", "sat"]


def _field_values(field: str, low: int, high: int, names: list[str] | None = None) -> set[int]:
    values: set[int] = set()
    for item in field.split(","):
        base, _, step = item.partition("/")
        if base == "*":
            first, last = low, high
        elif "-" in base:
            a, b = base.split("-")
            first, last = _number(a, names), _number(b, names)
        else:
            first = last = _number(base, names)
        values.update(range(first, last + 1, int(step) if step else 1))
    return values


def _number(token: str, names: list[str] | None) -> int:
    return names.index(token) if names and token in names else int(token)


class CronReading:
    """Which wall-clock minutes a five-field expression names (cron's numbering, 0 = Sunday)."""

    def __init__(self, text: str) -> None:
        minute, hour, dom, month, dow = text.split()
        self.minutes = _field_values(minute, 0, 59)
        self.hours = _field_values(hour, 0, 23)
        self.days = _field_values(dom, 1, 31)
        self.months = _field_values(month, 1, 12)
        self.weekdays = {d % 7 for d in _field_values(dow, 0, 6, WEEKDAY_NAMES)}
        self.either_day = not dom.startswith("*") and not dow.startswith("*")
        self.fixed_time = "*" not in minute and "*" not in hour

    def matches(self, wall: datetime) -> bool:
        if wall.minute not in self.minutes or wall.hour not in self.hours:
            return False
        if wall.month not in self.months:
            return False
        dom_ok = wall.day in self.days
        dow_ok = wall.isoweekday() % 7 in self.weekdays
        return (dom_ok or dow_ok) if self.either_day else (dom_ok and dow_ok)


def oracle_fires(text: str, start: datetime, end: datetime) -> list[datetime]:
    """Fire instants by stepping through every UTC minute and reading the local clock."""
    cron = CronReading(text)
    fires = []
    moment = utc(start).replace(second=0, microsecond=0)
    before = (moment - timedelta(minutes=1)).astimezone(BERLIN).replace(tzinfo=None)
    while moment <= utc(end):
        reading = moment.astimezone(BERLIN)
        wall = reading.replace(tzinfo=None)
        fire = cron.matches(wall) and (not cron.fixed_time or reading.fold == 0)
        if cron.fixed_time and wall - before > timedelta(minutes=1):  # the clock jumped forward
            skipped = before + timedelta(minutes=1)
            while skipped < wall and not fire:
                fire = cron.matches(skipped)
                skipped += timedelta(minutes=1)
        if fire and moment >= utc(start):
            fires.append(moment)
        before = wall
        moment += timedelta(minutes=1)
    return fires


# -- daily schedules: one fire per day, at the right wall time ----------------------------------


@pytest.mark.parametrize("change", CHANGES, ids=str)
@pytest.mark.parametrize(
    ("text", "hour", "minute"),
    [
        ("30 2 * * *", 2, 30),  # inside the window that is skipped in spring, repeated in autumn
        ("0 2 * * *", 2, 0),
        ("59 2 * * *", 2, 59),
        ("0 0 * * *", 0, 0),  # APScheduler 3.11's CronTrigger skips the day after spring change
        ("30 1 * * *", 1, 30),
        ("0 3 * * *", 3, 0),
        ("0 8 * * *", 8, 0),
    ],
)
def test_daily_schedule_fires_once_a_day_at_its_wall_time(
    change: date, text: str, hour: int, minute: int
) -> None:
    start, end = span(change)
    fires = walk(text, start, end - timedelta(microseconds=1))
    days = [fire.date() for fire in fires]
    expected_days = [start.date() + timedelta(days=i) for i in range(14)]
    assert days == expected_days  # exactly one a day, none skipped, none doubled
    for fire in fires:
        skipped = fire.date() == change and change.month == 3 and hour == 2
        if skipped:
            # 02:xx does not exist that day: run once, the moment the clock jumps to 03:00.
            assert (fire.hour, fire.minute) == (3, 0)
            assert utc(fire) == datetime(change.year, 3, change.day, 1, 0, tzinfo=UTC)
        else:
            assert (fire.hour, fire.minute) == (hour, minute)
            assert fire.fold == 0  # the first of two 02:30s in autumn, never the second
    assert [utc(f) for f in fires] == oracle_fires(text, start, end - timedelta(microseconds=1))


def test_half_past_two_by_hand_2027() -> None:
    """The 02:30 schedule around both 2027 changes, every instant written out in UTC."""
    spring = walk("30 2 * * *", local(2027, 3, 27), local(2027, 3, 30))
    assert [utc(f) for f in spring] == [
        datetime(2027, 3, 27, 1, 30, tzinfo=UTC),  # 02:30 CET (+01:00)
        datetime(2027, 3, 28, 1, 0, tzinfo=UTC),  # 03:00 CEST: right after the gap
        datetime(2027, 3, 29, 0, 30, tzinfo=UTC),  # 02:30 CEST (+02:00)
    ]
    autumn = walk("30 2 * * *", local(2027, 10, 30), local(2027, 11, 2))
    assert [utc(f) for f in autumn] == [
        datetime(2027, 10, 30, 0, 30, tzinfo=UTC),  # 02:30 CEST
        datetime(2027, 10, 31, 0, 30, tzinfo=UTC),  # first 02:30 (CEST); not again at 01:30Z
        datetime(2027, 11, 1, 1, 30, tzinfo=UTC),  # 02:30 CET
    ]
    assert [f.isoformat() for f in autumn] == [
        "2027-10-30T02:30:00+02:00",
        "2027-10-31T02:30:00+02:00",
        "2027-11-01T02:30:00+01:00",
    ]


@pytest.mark.parametrize("change", CHANGES, ids=str)
def test_several_skipped_times_of_one_gap_fire_once(change: date) -> None:
    start, end = span(change, days=1)
    fires = walk("0,20,40 2 * * *", start, end)
    on_change_day = [f for f in fires if f.date() == change]
    if change.month == 3:
        assert [(f.hour, f.minute) for f in on_change_day] == [(3, 0)]
    else:
        assert [(f.hour, f.minute) for f in on_change_day] == [(2, 0), (2, 20), (2, 40)]
        assert all(f.fold == 0 for f in on_change_day)
    assert [utc(f) for f in fires] == oracle_fires("0,20,40 2 * * *", start, end)


# -- the default digest schedule ------------------------------------------------------------------


@pytest.mark.parametrize("change", CHANGES, ids=str)
def test_default_digest_fires_mondays_at_eight_local(change: date) -> None:
    start, end = span(change, days=21)
    fires = walk("0 8 * * mon", start, end)
    mondays = [
        start.date() + timedelta(days=i)
        for i in range(42)
        if (start.date() + timedelta(days=i)).weekday() == 0
    ]
    assert [f.date() for f in fires] == mondays
    assert all((f.hour, f.minute, f.second) == (8, 0, 0) for f in fires)
    summer = {f: f.utcoffset() == timedelta(hours=2) for f in fires}
    for fire, is_summer in summer.items():
        assert is_summer == (date(fire.year, 3, 29 if fire.year == 2026 else 28) < fire.date()
                             < date(fire.year, 10, 25 if fire.year == 2026 else 31))


def test_weekly_midnight_keeps_every_week() -> None:
    # APScheduler 3.11's CronTrigger loses the Monday after the spring change for this one.
    fires = walk("0 0 * * mon", local(2027, 3, 15), local(2027, 4, 13))
    assert [f.date() for f in fires] == [
        date(2027, 3, 15), date(2027, 3, 22), date(2027, 3, 29), date(2027, 4, 5),
        date(2027, 4, 12),
    ]


# -- schedules with '*' in the minute or hour field follow the clock as it is --------------------


@pytest.mark.parametrize("change", CHANGES, ids=str)
@pytest.mark.parametrize(("text", "step_minutes"), [("*/30 * * * *", 30), ("0 * * * *", 60),
                                                    ("*/5 * * * *", 5)])
def test_wildcard_schedule_keeps_even_real_time_spacing(
    change: date, text: str, step_minutes: int
) -> None:
    start, end = span(change, days=1)
    fires = walk(text, start, end)
    gaps = {utc(b) - utc(a) for a, b in itertools.pairwise(fires)}
    assert gaps == {timedelta(minutes=step_minutes)}
    per_day = sum(1 for f in fires if f.date() == change)
    hours_that_day = 23 if change.month == 3 else 25
    assert per_day == hours_that_day * 60 // step_minutes
    assert [utc(f) for f in fires] == oracle_fires(text, start, end)


@pytest.mark.parametrize("change", CHANGES, ids=str)
@pytest.mark.parametrize("text", ["15,45 * * * *", "0 1-3 * * *", "*/20 2 * * *", "45 1,2 * * *"])
def test_mixed_schedules_agree_with_the_wall_clock_reading(change: date, text: str) -> None:
    start, end = span(change, days=2)
    assert [utc(f) for f in walk(text, start, end)] == oracle_fires(text, start, end)


@pytest.mark.parametrize("change", CHANGES, ids=str)
@pytest.mark.parametrize("text", ["30 2 * * *", "*/30 * * * *", "0 8 * * mon"])
def test_next_fire_from_any_moment_of_the_change_day(change: date, text: str) -> None:
    """From every 7 minutes of the change day (both readings of the repeated hour), the next
    fire time is the first one the wall-clock reading gives: never the past, never a loop.
    ``now`` is passed explicitly here (the trigger never reads the clock itself)."""
    trigger = trigger_for_schedule(text, BERLIN)
    start, end = span(change, days=15)
    reference = oracle_fires(text, start, end)
    moment = utc(local(change.year, change.month, change.day)) - timedelta(hours=2)
    readings_with_fold = 0
    while moment < utc(local(change.year, change.month, change.day)) + timedelta(hours=26):
        # The scheduler passes now in its zone; a real datetime keeps fold=1 in the repeated hour.
        local_now = moment.astimezone(BERLIN)
        readings_with_fold += local_now.fold
        for now in (local_now, moment):
            upcoming = trigger.get_next_fire_time(None, now)
            assert upcoming is not None
            assert utc(upcoming) == min(f for f in reference if f >= moment)
            again = trigger.get_next_fire_time(upcoming, now)
            assert again is not None
            assert utc(again) == min(f for f in reference if f > utc(upcoming))
        moment += timedelta(minutes=7)
    assert readings_with_fold == (9 if change.month == 10 else 0)  # 60 min / 7 min, rounded up


# -- cron syntax ----------------------------------------------------------------------------------


def test_weekday_numbers_are_cron_numbers_not_apscheduler_numbers() -> None:
    week = (local(2027, 5, 2), local(2027, 5, 9))  # Sunday 2 May to Sunday 9 May 2027
    assert [f.strftime("%a") for f in walk("0 8 * * 1", *week)] == ["Mon"]
    assert [f.strftime("%a") for f in walk("0 8 * * 0", *week)] == ["Sun"]
    assert [f.strftime("%a") for f in walk("0 8 * * 7", *week)] == ["Sun"]
    assert [f.strftime("%a") for f in walk("0 8 * * 1-5", *week)] == [
        "Mon", "Tue", "Wed", "Thu", "Fri"
    ]
    assert [f.strftime("%a") for f in walk("0 8 * * 5-7", *week)] == ["Sun", "Fri", "Sat"]
    assert [f.strftime("%a") for f in walk("0 8 * * sat,SUN", *week)] == ["Sun", "Sat"]


def test_day_of_month_and_weekday_both_given_means_either() -> None:
    # Classic cron: "0 8 13 * fri" runs on every 13th and on every Friday.
    fires = walk("0 8 13 * fri", local(2027, 8, 1), local(2027, 9, 1))
    assert [f.day for f in fires] == [6, 13, 20, 27]  # Fridays of August 2027, and the 13th
    fires = walk("0 8 12 * fri", local(2027, 8, 1), local(2027, 9, 1))
    assert [f.day for f in fires] == [6, 12, 13, 20, 27]


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("* * * *", "found 4 fields"),
        ("0 8 * * * *", "found 6 fields"),
        ("61 * * * *", "minute field '61'"),
        ("0 24 * * *", "hour field '24'"),
        ("0 8 32 * *", "day of month field '32'"),
        ("0 8 * 13 *", "month field '13'"),
        ("0 8 * * funday", "'funday' is not a day of the week"),
        ("0 8 * * 5-1", "runs backwards"),
        ("0 8 * * 8", "'8' is not a day of the week"),
        ("0 0 31 2 *", "never fires"),
        ("0s", "longer than zero"),
        ("every monday", "not a schedule"),
    ],
)
def test_bad_schedules_are_refused_with_a_clear_message(text: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        trigger_for_schedule(text, BERLIN)
    with pytest.raises(ConfigError, match=r"^schedule\.digest: "):
        validate_schedule(text, "schedule.digest")


def test_good_schedules_validate() -> None:
    for text in ["30s", "5m", "1s", "7d", "0 8 * * mon", "*/5 * * * *", "0 6 1 jan-mar *"]:
        validate_schedule(text, "schedule.scan")


# -- durations are real elapsed time --------------------------------------------------------------


def test_duration_schedule_counts_real_time_across_the_autumn_change() -> None:
    start = local(2027, 10, 31, 1, 55)
    with freeze_time(start):
        trigger = trigger_for_schedule("30m", BERLIN)
    fires = []
    previous = None
    for _ in range(5):
        previous = trigger.get_next_fire_time(previous, start)
        fires.append(previous)
    assert [utc(f) - utc(start) for f in fires] == [timedelta(minutes=30 * (i + 1))
                                                    for i in range(5)]
    # Wall clock: 02:25 CEST, 02:55 CEST, 02:25 CET, 02:55 CET, 03:25 CET.
    assert [f.strftime("%H:%M %Z") for f in fires] == [
        "02:25 CEST", "02:55 CEST", "02:25 CET", "02:55 CET", "03:25 CET"
    ]


def test_upcoming_runs_of_the_default_digest() -> None:
    after = local(2027, 3, 24, 12, 0)
    runs = upcoming_runs("0 8 * * mon", "Europe/Berlin", after, count=3)
    assert [r.isoformat() for r in runs] == [
        "2027-03-29T08:00:00+02:00",
        "2027-04-05T08:00:00+02:00",
        "2027-04-12T08:00:00+02:00",
    ]
    assert upcoming_runs("30s", BERLIN, after, count=2) == [
        after + timedelta(seconds=30), after + timedelta(seconds=60)
    ]


def test_trigger_describes_itself() -> None:
    trigger = WallClockCronTrigger("0   8 * *  mon", BERLIN)
    assert str(trigger) == "cron[0 8 * * mon] Europe/Berlin"
    assert trigger.fixed_time
    assert not WallClockCronTrigger("*/5 * * * *", BERLIN).fixed_time


def test_unknown_time_zone_suggests_the_nearest_name() -> None:
    with pytest.raises(ConfigError, match=r"timezone: unknown IANA time zone 'Europe/Berln' "
                                          r"\(did you mean 'Europe/Berlin'\?\)"):
        resolve_timezone("Europe/Berln")
    assert resolve_timezone("America/New_York").key == "America/New_York"


def test_another_zone_with_its_own_dates() -> None:
    # America/New_York: 2027-03-14 02:00 → 03:00 and 2027-11-07 02:00 → 01:00 (US rule since
    # 2007, Energy Policy Act of 2005); the repeated hour there is 01:xx.
    new_york = ZoneInfo("America/New_York")
    trigger = trigger_for_schedule("30 1 * * *", new_york)
    fire = trigger.get_next_fire_time(None, datetime(2027, 11, 7, 0, 0, tzinfo=new_york))
    assert fire is not None
    assert fire.astimezone(new_york).isoformat() == "2027-11-07T01:30:00-04:00"  # the first, EDT
    after = trigger.get_next_fire_time(fire, fire)
    assert after is not None and utc(after) == datetime(2027, 11, 8, 6, 30, tzinfo=UTC)
    spring = trigger_for_schedule("30 2 * * *", new_york).get_next_fire_time(
        None, datetime(2027, 3, 14, 0, 0, tzinfo=new_york)
    )
    assert spring is not None
    assert spring.astimezone(new_york).isoformat() == "2027-03-14T03:00:00-04:00"
