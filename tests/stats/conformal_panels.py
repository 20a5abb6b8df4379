"""Seeded panels for the calibrated interval: a regression fitted on a baseline, then forecasts.

Shared by tests/stats/test_conformal.py (small, fast) and tests/benchmarks/bench_conformal.py
(large). Invented data only (seeded simulation, as the contributor rules allow).

Each series: y_t = 10 + 2 x_t + e_t with x_t ~ N(0, 1), t = 1 … baseline + forecasts. The model is
fitted once by ``fit_batch`` on the first ``baseline`` rows and its 95 % (``level``) prediction
interval issued for every later row — what Plumbline issues. The calibrated interval is
point ± q_t · h_t, with h_t the model's own half-width and q_t from ``adaptive_conformal_batch``
on the scores |actual − point| / h of the forecasts before t (the pass's recipe).

Error processes (``KINDS``):
- ``iid``: e_t ~ N(0, 1);
- ``ar1``: e_t = 0.5 e_{t−1} + u_t, u_t ~ N(0, 1 − 0.5²), started stationary, so e_t ~ N(0, 1);
- ``growing``: e_t ~ N(0, σ_t²), σ_t = 1 + 1.5 (t − 1)/(rows − 1), from 1 to 2.5;
- ``t3``: e_t ~ Student t with 3 degrees of freedom.

**The oracle interval** is the true conditional quantile interval of y_t given x_t and t under
the data-generating process: [μ_t + σ_t F⁻¹(α/2), μ_t + σ_t F⁻¹(1 − α/2)] with μ_t = 10 + 2 x_t,
F the standard normal (t₃ for ``t3``) and σ_t as above (1 for ``iid``, ``ar1`` and ``t3``; the
marginal sd for ``ar1``). It knows the true coefficients and the true error scale at every t, but
not the unobserved earlier errors, which neither interval uses either. For ``ar1`` an oracle that
also knew e_{t−1} would be narrower by √(1 − 0.5²) = 0.866; ``ar1_past_aware_factor`` gives it.
Its width is 2 σ_t F⁻¹(1 − α/2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from monitor.stats.conformal import adaptive_conformal_batch
from monitor.stats.ols import fit_batch

KINDS = ("iid", "ar1", "growing", "t3")
RHO = 0.5


@dataclass(frozen=True)
class PanelResult:
    """Pooled over series and over the forecasts that had a calibrated interval."""

    kind: str
    forecasts: int
    own_coverage: float
    calibrated_coverage: float
    own_width_ratio: float  # mean own width / mean oracle width
    calibrated_width_ratio: float
    oracle_coverage: float  # a check of the simulation itself
    unbounded_share: float  # share of calibrated intervals that were the whole line (α_t < 0)


def error_scale(kind: str, rows: int) -> np.ndarray:
    """σ_t for t = 1 … rows."""
    if kind == "growing":
        return 1.0 + 1.5 * np.arange(rows) / (rows - 1)
    return np.ones(rows)


def draw_errors(kind: str, rng: np.random.Generator, series: int, rows: int) -> np.ndarray:
    if kind == "iid":
        return rng.standard_normal((series, rows))
    if kind == "ar1":
        u = rng.standard_normal((series, rows)) * np.sqrt(1 - RHO**2)
        e = np.empty((series, rows))
        e[:, 0] = rng.standard_normal(series)
        for t in range(1, rows):
            e[:, t] = RHO * e[:, t - 1] + u[:, t]
        return e
    if kind == "growing":
        return rng.standard_normal((series, rows)) * error_scale(kind, rows)
    if kind == "t3":
        return rng.standard_t(3, size=(series, rows))
    raise ValueError(kind)


def oracle_half_width(kind: str, rows: int, level: float) -> np.ndarray:
    """Half-width of the oracle interval at every t (see the module docstring)."""
    tail = 0.5 + level / 2
    z = stats.t.ppf(tail, 3) if kind == "t3" else stats.norm.ppf(tail)
    return z * error_scale(kind, rows)


def run_panel(
    kind: str, *, series: int, baseline: int, forecasts: int, level: float, seed: int,
    gamma: float, window: int, min_scores: int, cap_unbounded: bool = True,
) -> PanelResult:
    """Simulate one panel and score the model's own, the calibrated and the oracle intervals.

    With ``cap_unbounded`` an interval that ACI makes the whole line is issued, as the pass
    issues it, as the widest score of the window (see monitor/stats/conformal.py); its miss is
    counted as issued.
    """
    rng = np.random.default_rng(seed)
    rows = baseline + forecasts
    x = rng.standard_normal((series, rows, 1))
    mean = 10.0 + 2.0 * x[:, :, 0]
    y = mean + draw_errors(kind, rng, series, rows)
    fit = fit_batch(x[:, :baseline], y[:, :baseline], level=level)
    prediction = fit.predict(x[:, baseline:])
    point = prediction.point
    half = (prediction.upper - prediction.lower) / 2
    actual = y[:, baseline:]
    scores = np.abs(actual - point) / half
    aci = adaptive_conformal_batch(scores, None, level, gamma=gamma, window=window,
                                   min_scores=min_scores)
    issued = aci.issued
    q = aci.quantile
    unbounded = np.isinf(q) & issued
    if cap_unbounded:
        widest = running_window_max(scores, window)
        q = np.where(np.isinf(q), widest, q)
    calibrated_half = q * half
    calibrated_hit = np.abs(actual - point) <= calibrated_half
    own_hit = np.abs(actual - point) <= half
    oracle = np.broadcast_to(oracle_half_width(kind, rows, level)[baseline:], actual.shape)
    oracle_hit = np.abs(actual - mean[:, baseline:]) <= oracle
    used = issued
    oracle_width = float(np.mean(oracle[used]))
    return PanelResult(
        kind=kind,
        forecasts=int(used.sum()),
        own_coverage=float(np.mean(own_hit[used])),
        calibrated_coverage=float(np.mean(calibrated_hit[used])),
        own_width_ratio=float(np.mean(half[used]) / oracle_width),
        calibrated_width_ratio=float(np.mean(calibrated_half[used]) / oracle_width),
        oracle_coverage=float(np.mean(oracle_hit[used])),
        unbounded_share=float(np.mean(unbounded[used])),
    )


def running_window_max(scores: np.ndarray, window: int) -> np.ndarray:
    """The largest of the ``window`` scores before each entry (NaN at the first)."""
    series, n = scores.shape
    out = np.full((series, n), np.nan)
    for t in range(1, n):
        out[:, t] = np.max(scores[:, max(0, t - window):t], axis=1)
    return out


def ar1_past_aware_factor() -> float:
    """Width of an oracle that also knew e_{t−1}, relative to ours, for ``ar1``: √(1 − ρ²)."""
    return float(np.sqrt(1 - RHO**2))
