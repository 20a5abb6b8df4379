"""The invented weekly series of the demo scenario: seeded, deterministic, plain arithmetic.

Every random number comes from ``numpy.random.default_rng([SEED, stream])``, one stream per model
(and per depot), so changing one model leaves the others' numbers alone. Seasonal shapes are
piecewise-linear between mid-month anchor values and the only functions applied to the random
draws are +, −, ×, ÷ and √, which IEEE 754 rounds the same way on every platform; values are
rounded through their printed text, so each predictor a response is computed from is exactly the
number written to the file.

All arrays here are indexed by week number − 1: index 0 is week 1. Predictors run one week past
the last file (the last file carries the plan row for the week after it); responses run to the
last week of the scenario.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

SEED = 20250105

# Mid-month anchors (January first) of the seasonal shapes.
# Outbound volume of a distribution network: a pre-Christmas peak, a quiet late winter and summer.
OUTBOUND_SEASON = (0.92, 0.90, 0.96, 0.98, 1.00, 0.98, 0.95, 0.94, 1.00, 1.04, 1.12, 1.20)
# Inbound pallets: stock is built up ahead of the peak, in September to November.
INBOUND_SEASON = (0.85, 0.88, 0.95, 1.00, 1.00, 0.97, 0.95, 1.02, 1.10, 1.18, 1.15, 0.95)
# Returns: highest in January, after the Christmas peak.
RETURNS_SEASON = (1.25, 1.05, 0.95, 0.95, 0.97, 0.95, 0.93, 0.92, 0.95, 1.00, 1.05, 1.08)
# Mean daily air temperature, °C, of an inland site in a temperate climate.
TEMPERATURE_C = (0.5, 1.5, 5.0, 9.5, 14.0, 17.0, 19.0, 18.5, 14.5, 9.5, 4.5, 1.5)
# Heating degree days are counted below this daily mean temperature (°C).
HDD_BASE_C = 15.5


def rounded(values: Sequence[float] | FloatArray, decimals: int) -> FloatArray:
    """The values as they will be printed with ``decimals`` places, read back as floats."""
    return np.array([float(f"{float(v):.{decimals}f}") for v in values], dtype=np.float64)


def stream(number: int) -> np.random.Generator:
    """The random stream of one part of the scenario."""
    return np.random.default_rng([SEED, number])


def _month_anchor(year: int, month: int) -> date:
    while month < 1:
        year, month = year - 1, month + 12
    while month > 12:
        year, month = year + 1, month - 12
    return date(year, month, 15)


def seasonal(day: date, anchors: Sequence[float]) -> float:
    """A shape given by 12 mid-month values, interpolated linearly by day between the 15ths."""
    if day.day >= 15:
        before = _month_anchor(day.year, day.month)
        after = _month_anchor(day.year, day.month + 1)
    else:
        before = _month_anchor(day.year, day.month - 1)
        after = _month_anchor(day.year, day.month)
    share = (day - before).days / (after - before).days
    low, high = anchors[before.month - 1], anchors[after.month - 1]
    return low + (high - low) * share


def weekly_seasonal(week_endings: Sequence[date], anchors: Sequence[float]) -> FloatArray:
    """The seasonal shape at the middle (Wednesday) of each week ending on a Sunday."""
    return np.array([seasonal(end - timedelta(days=3), anchors) for end in week_endings])


def volume(rng: np.random.Generator, level: float, season: FloatArray, noise: float) -> FloatArray:
    """A weekly count: ``level`` × season × (1 + noise·z), rounded to whole units."""
    z = rng.standard_normal(season.shape[0])
    return rounded(level * season * (1.0 + noise * z), 0)


def linear_response(
    rng: np.random.Generator,
    intercept: float,
    slopes: Sequence[FloatArray],
    predictors: Sequence[FloatArray],
    error_sd: FloatArray,
    decimals: int,
) -> FloatArray:
    """``intercept + Σ slope_j · x_j + error_sd · z`` per week, rounded to ``decimals``.

    ``slopes`` and ``error_sd`` are per week, so a planted change is a change in these arrays.
    Terms are added in a fixed order (no reductions whose order could vary).
    """
    n = error_sd.shape[0]
    value = np.full(n, intercept)
    for slope, x in zip(slopes, predictors, strict=True):
        value = value + slope * x[:n]
    z = rng.standard_normal(n)
    return rounded(value + error_sd * z, decimals)


def step(n: int, before: float, after: float, from_index: int) -> FloatArray:
    """``before`` up to index ``from_index`` (exclusive), ``after`` from it on."""
    values = np.full(n, before)
    values[from_index:] = after
    return values


def heating_degree_days(rng: np.random.Generator, week_endings: Sequence[date]) -> FloatArray:
    """Weekly heating degree days: the sum over the week's 7 days of max(0, base − daily mean).

    Daily means follow the seasonal temperature plus AR(1) weather noise (lag-one correlation
    0.7, standard deviation 3.5 °C), so cold and mild spells last a few days.
    """
    first = week_endings[0] - timedelta(days=6)
    days = [first + timedelta(days=i) for i in range((week_endings[-1] - first).days + 1)]
    z = rng.standard_normal(len(days))
    persistence, spread = 0.7, 3.5
    innovation = spread * math.sqrt(1.0 - persistence * persistence)
    anomaly = spread * float(z[0])
    daily: list[float] = []
    for i, day in enumerate(days):
        if i:
            anomaly = persistence * anomaly + innovation * float(z[i])
        mean_c = seasonal(day, TEMPERATURE_C) + anomaly
        daily.append(HDD_BASE_C - mean_c if mean_c < HDD_BASE_C else 0.0)
    weekly: list[float] = []
    for w in range(len(week_endings)):
        total = 0.0
        for value in daily[7 * w : 7 * w + 7]:
            total += value
        weekly.append(total)
    return rounded(weekly, 1)


@dataclass(frozen=True)
class DepotProfile:
    """The true line of one depot: hours = intercept + slope · drops (before any planted change)."""

    name: str
    mean_drops: float
    intercept: float
    slope: float
    error_sd: float


def depot_profiles(rng: np.random.Generator, count: int) -> list[DepotProfile]:
    """Depots of different sizes: 350–1,400 drops a week, 10–16 minutes a drop, 15–45 fixed
    hours a week, and an error standard deviation of 3.5 % of the mean hours."""
    profiles: list[DepotProfile] = []
    for i in range(count):
        mean_drops = 10.0 * round((350.0 + 1050.0 * rng.random()) / 10.0)
        slope = float(rounded([0.16 + 0.10 * rng.random()], 3)[0])
        intercept = float(rounded([15.0 + 30.0 * rng.random()], 1)[0])
        error_sd = float(rounded([0.035 * (intercept + slope * mean_drops)], 1)[0])
        profiles.append(DepotProfile(f"depot-{i + 1:02d}", mean_drops, intercept, slope, error_sd))
    return profiles
