"""Critical values and p-values of the change tests, each marked published or simulated.

Published (copied from the literature; the tests check them against independent computation):

- ``BDE_PUBLISHED_A``: the CUSUM boundary constants a = 1.143, 0.948, 0.850 for significance
  1 %, 5 %, 10 % of Brown, Durbin & Evans (1975). ``solve_bde_constant`` recomputes a from their
  equation Q(3a) + exp(−4a²)·Φ(a) = α/2 (Durbin 1971's approximation to the crossing probability
  of Brownian motion over the two lines).
- ``KOLMOGOROV_PUBLISHED``: 1.63, 1.36, 1.22 at 1 %, 5 %, 10 % for the OLS-CUSUM test of
  Ploberger & Krämer (1992), the quantiles of sup|Brownian bridge|; computed exactly by
  ``scipy.stats.kstwobign``, which the p-values use.
- ``ANDREWS_2003_SUP_WALD``: sup-F critical values, Wald form p·F, 15 % trimming, 1–3
  restrictions, from the corrigendum's Table 1 (Andrews 2003). Used only as a check.

Simulated (by ``tests/simulations/simulate_supf.py``; the table in ``monitor/stats/tables/
supf_quantiles.json`` records seed, replications, grid and Monte Carlo standard errors):

- the quantiles of the null limit of p·sup-F with 15 % trimming for p = 1 … 24 restrictions
  (1 … 10 from 400,000 draws, 11 … 24 from the first 100,000 of the same seeded draws), which
  ``supf_p_value`` and ``supf_critical_value`` interpolate. The table covers upper-tail
  probabilities 0.001 … 0.999; beyond it a p-value is clipped to 0.001 or 0.999 and flagged
  (``SupFPValue.bound`` = "below" means the true p-value is below the reported 0.001).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

FloatArray = NDArray[np.float64]

#: Brown, Durbin & Evans (1975): boundary constant a by significance level (published).
BDE_PUBLISHED_A: dict[float, float] = {0.01: 1.143, 0.05: 0.948, 0.10: 0.850}

#: Ploberger & Krämer (1992): OLS-CUSUM critical values by significance level (published, rounded).
KOLMOGOROV_PUBLISHED: dict[float, float] = {0.01: 1.63, 0.05: 1.36, 0.10: 1.22}

#: Andrews (2003, corrigendum Table 1), 15 % trimming, Wald form p·F: {p: {significance: value}}.
ANDREWS_2003_SUP_WALD: dict[int, dict[float, float]] = {
    1: {0.10: 7.12, 0.05: 8.68, 0.01: 12.16},
    2: {0.10: 10.00, 0.05: 11.72, 0.01: 15.56},
    3: {0.10: 12.28, 0.05: 14.13, 0.01: 18.07},
}

SUPF_TABLE_RESOURCE = "supf_quantiles.json"


def bde_crossing_probability(a: ArrayLike) -> FloatArray:
    """Approximate chance that Brownian motion on [0, 1] leaves the lines ±(a + 2a·t).

    2·[Q(3a) + exp(−4a²)·Φ(a)], Q = 1 − Φ (Durbin 1971, used by Brown, Durbin & Evans 1975 to
    set their boundaries); accurate in the tail that matters (it reproduces α at the published a
    for 1 %, 5 % and 10 %), rougher for large probabilities; clipped to [0, 1], and 1 for a ≤ 0.
    a: any shape; returns an array of the same shape.
    """
    a_arr = np.asarray(a, dtype=np.float64)
    positive = np.isfinite(a_arr) & (a_arr > 0)
    safe = np.where(positive, a_arr, 1.0)
    value = 2.0 * (stats.norm.sf(3.0 * safe) + np.exp(-4.0 * safe * safe) * stats.norm.cdf(safe))
    return np.asarray(np.where(positive, np.clip(value, 0.0, 1.0), 1.0), dtype=np.float64)


def solve_bde_constant(significance: float) -> float:
    """The a solving Q(3a) + exp(−4a²)·Φ(a) = α/2 (Brown, Durbin & Evans 1975), by brentq."""
    if not 0.0 < significance < 0.5:
        raise ValueError(f"significance must be in (0, 0.5); got {significance}")

    def excess(a: float) -> float:
        return float(stats.norm.sf(3 * a) + math.exp(-4 * a * a) * stats.norm.cdf(a)) - (
            significance / 2.0
        )

    return float(optimize.brentq(excess, 0.2, 5.0, xtol=1e-12))


def bde_boundary_constant(significance: float) -> float:
    """Boundary constant a: the published value at 1 %, 5 %, 10 %, else the solved one."""
    for level, value in BDE_PUBLISHED_A.items():
        if abs(significance - level) < 1e-12:
            return value
    return solve_bde_constant(significance)


def ols_cusum_critical_value(significance: float) -> float:
    """Critical value of the OLS-CUSUM test: the Kolmogorov quantile ``kstwobign.isf(α)``."""
    return float(stats.kstwobign.isf(significance))


@dataclass(frozen=True)
class SupFTable:
    """The simulated table: quantiles[p] (ascending) at tail_probabilities (descending)."""

    trimming: float
    grid_points: int
    reps: int
    seed: int
    tail_probabilities: tuple[float, ...]
    quantiles: dict[int, tuple[float, ...]]
    standard_errors: dict[int, dict[float, float]]

    @property
    def max_restrictions(self) -> int:
        return max(self.quantiles)


@lru_cache(maxsize=1)
def supf_table() -> SupFTable:
    """Load the committed simulated table (a package resource; read once)."""
    text = (
        resources.files("monitor.stats")
        .joinpath("tables", SUPF_TABLE_RESOURCE)
        .read_text(encoding="utf-8")
    )
    raw = json.loads(text)
    tails = [float(t) for t in raw["tail_probabilities"]]
    order = np.argsort(tails)[::-1]  # descending tail probability = ascending quantile
    quantiles = {
        int(p): tuple(float(values[j]) for j in order) for p, values in raw["quantiles"].items()
    }
    errors = {
        int(p): {float(level): float(se) for level, se in by_level.items()}
        for p, by_level in raw["standard_errors"].items()
    }
    return SupFTable(
        trimming=float(raw["trimming"]),
        grid_points=int(raw["grid_points"]),
        reps=int(raw["reps"]),
        seed=int(raw["seed"]),
        tail_probabilities=tuple(tails[j] for j in order),
        quantiles=quantiles,
        standard_errors=errors,
    )


@dataclass(frozen=True)
class SupFPValue:
    """A sup-F p-value from the simulated table.

    ``bound`` is None inside the table, "below" when the statistic lies beyond the 0.001 quantile
    (the true p-value is below ``p_value`` = 0.001) and "above" when it lies below the 0.999
    quantile (the true p-value is above 0.999).
    """

    p_value: float
    bound: str | None


def supf_p_value(wald_statistic: float, restrictions: int, trimming: float = 0.15) -> SupFPValue:
    """Asymptotic p-value of sup-F from its Wald form p·sup-F, by the simulated table.

    Interpolates log(tail probability) linearly in the statistic between the simulated quantiles
    (Andrews 1993 limit, 15 % trimming). Raises ValueError for a trimming or a number of
    restrictions the table does not cover.
    """
    table = supf_table()
    if abs(trimming - table.trimming) > 1e-12:
        raise ValueError(f"the simulated table is for trimming {table.trimming}, not {trimming}")
    if restrictions not in table.quantiles:
        raise ValueError(
            f"the simulated table covers 1 to {table.max_restrictions} restrictions, "
            f"not {restrictions}"
        )
    q = np.asarray(table.quantiles[restrictions])
    tails = np.asarray(table.tail_probabilities)
    if wald_statistic >= q[-1]:
        return SupFPValue(float(tails[-1]), "below")
    if wald_statistic <= q[0]:
        return SupFPValue(float(tails[0]), "above")
    log_tail = np.interp(wald_statistic, q, np.log(tails))
    return SupFPValue(float(np.exp(log_tail)), None)


def supf_p_values(
    wald_statistics: ArrayLike, restrictions: int, trimming: float = 0.15
) -> tuple[FloatArray, list[str | None]]:
    """``supf_p_value`` for an array of Wald statistics (s,): p-values (s,) and bounds."""
    table = supf_table()
    if abs(trimming - table.trimming) > 1e-12 or restrictions not in table.quantiles:
        raise ValueError("no simulated table for this trimming or number of restrictions")
    wald = np.asarray(wald_statistics, dtype=np.float64).reshape(-1)
    q = np.asarray(table.quantiles[restrictions])
    tails = np.asarray(table.tail_probabilities)
    p_values = np.exp(np.interp(wald, q, np.log(tails)))
    below = wald >= q[-1]
    above = wald <= q[0]
    p_values = np.where(below, tails[-1], np.where(above, tails[0], p_values))
    bounds: list[str | None] = [
        "below" if b else ("above" if a else None)
        for b, a in zip(below.tolist(), above.tolist(), strict=True)
    ]
    return p_values, bounds


def supf_critical_value(restrictions: int, significance: float) -> float:
    """Simulated critical value of p·sup-F (15 % trimming) at a significance in [0.001, 0.999]."""
    table = supf_table()
    if restrictions not in table.quantiles:
        raise ValueError(f"the simulated table covers 1 to {table.max_restrictions} restrictions")
    tails = np.asarray(table.tail_probabilities)
    if not tails[-1] <= significance <= tails[0]:
        raise ValueError(f"significance {significance} is outside the table")
    q = np.asarray(table.quantiles[restrictions])
    # Invert the same log-linear interpolation that supf_p_value uses.
    return float(np.interp(np.log(significance), np.log(tails)[::-1], q[::-1]))


__all__ = [
    "ANDREWS_2003_SUP_WALD",
    "BDE_PUBLISHED_A",
    "KOLMOGOROV_PUBLISHED",
    "SupFPValue",
    "SupFTable",
    "bde_boundary_constant",
    "bde_crossing_probability",
    "ols_cusum_critical_value",
    "solve_bde_constant",
    "supf_critical_value",
    "supf_p_value",
    "supf_p_values",
    "supf_table",
]
