"""Sequential monitoring for structural change after a stable baseline, batched over series.

Each week the daemon asks of every series: since its baseline ended, has the relationship moved?
Re-running a retrospective break test every week does not control the chance of a false alarm
over many looks; a statistic with a boundary built for the whole horizon does (Chu, Stinchcombe &
White 1996; Leisch, Hornik & Kuan 2000; Zeileis, Leisch, Kleiber & Hornik 2005; bibliographic
details as recalled, MEM in ../shared/reference/CHECK_VALUES.md item 5).

Statistic: our convention is the post-history CUSUM. With a baseline of n rows, p coefficients,
nu = n - p and residual standard error sigma_hat (all from the baseline fit), each new row
t = n+1, n+2, ... gives a recursive residual (Brown, Durbin & Evans 1975), the standardised
one-step-ahead forecast error from the fit on all earlier rows,
w_t = (y_t - x_t' b_{t-1}) / sqrt(1 + x_t' (X_{t-1}' X_{t-1})^-1 x_t). After j new rows
Q_j = (w_{n+1} + ... + w_{n+j}) / sigma_hat, and the alarm is the first j <= H (the horizon) with

    |Q_j| > sqrt((nu + j) * (a^2 + ln(1 + j / nu))).

That is Chu, Stinchcombe & White's (1996) boundary with the sum started after the history rather
than at its start, and the two need different constants (CHECK_VALUES item 5): CSW's published
a^2 = 7.78 (5 %) and 6.25 (10 %) (MEM) belong to the start-of-history sum over an infinite
horizon, crossed with probability 2[1 - Phi(a) + a phi(a)] (0.0508 at 7.78, 5 % at 7.815); the
post-history sum over an infinite horizon is crossed with probability exp(-a^2/2) (about 2 % at
7.78; 5 % at -2 ln 0.05 = 5.991). Over the finite horizon used here (H = 2n by default) either
infinite-horizon constant gives far less than alpha (5.991 gives under 1 % at H = 2 nu), so the
constants are simulated for the finite horizon and baseline; the published ones serve as checks
only (``PUBLISHED_A_SQUARED``, ``history_form_crossing_probability``,
``post_history_crossing_probability``).

Why this statistic. (1) Exact: with normal errors the post-baseline recursive residuals are
independent N(0, sigma^2) and independent of the baseline's residual sum of squares whatever the
predictors, so the false-alarm chance depends on (nu, H, a^2) alone and is tabulated once, exactly
for baselines as short as 20 rows, with no large-sample step for sigma_hat and no dependence on
where the new predictors lie. (2) The sum starts at 0 with monitoring, so after the baseline rolls
forward a fresh start is a new ``start_monitoring`` call; a start-of-history sum would carry the
baseline's own noise into every week. (3) It is quick on a change in the mean forecast error, and
a slope change gives one whenever the predictors' mean is away from 0 in units of their spread
(counts, hours, prices, volumes). Its known blind spot (Kramer, Ploberger & Alt 1988, MEM): a
change that leaves the forecast at the predictors' mean unchanged (a slope turning about the mean)
is not detected; the baseline-vs-recent slope test of ``change.py`` covers it, as would a
fluctuation (recursive-estimates) monitor, whose boundary depends on the design.

Constants (simulated, none published): ``tables/monitoring_boundaries.json``, written by
``tests/simulations/simulate_monitoring.py`` (seed 20261201, 200,000 replications per cell;
metadata from ``boundary_table_description()``), holds a^2 for alpha in
{0.005, 0.01, 0.025, 0.05, 0.10, 0.20}, nu in 4..30 and 35..500 (finite sample: normal errors,
sigma_hat^2 from chi2_nu / nu, checked at every integer j)
and the nu -> infinity limit (Brownian motion, continuous time), for H = r * nu,
r from 0.05 to 12. Between grid points a^2 is interpolated linearly in ln(alpha), ln(H / nu) and
1 / sqrt(nu). A horizon shorter than the table's shortest for its nu takes that shortest (false
alarms below alpha); one longer than 12 nu, or alpha outside [0.005, 0.20], is refused. The false-
alarm chance is alpha up to Monte Carlo error (standard error 0.0005 at 5 %) when errors are
independent, normal and of constant variance, and approximately so otherwise for long baselines.
An alarm is a statistical signal that forecast errors have drifted, not proof of a cause, and it
assumes the baseline itself was stable.

Estimated break: the start k (1 <= k <= first crossing) maximising the mean-shift likelihood ratio
(S_J - S_{k-1})^2 / (J - k + 1) of the post-baseline recursive residuals, S_j = w_{n+1} + ... +
w_{n+j}, J = periods monitored so far (a shift in the mean of independent N(0, sigma^2) errors from
k on; before k the mean is 0, as monitoring assumes).

API (s series, n baseline rows, m new rows, k predictors without the intercept):
``start_monitoring(x_base (s, n, k), y_base (s, n), mask=None, *, intercept=True, names=None)
-> MonitorState``; ``monitor(state, x_new (s, m, k), y_new (s, m), mask_new=None, *, alpha=0.05,
horizon=None) -> MonitorResult`` (stateless: pass every row since the baseline's end each week);
``monitoring_boundary(alpha, residual_df, horizon) -> MonitoringBoundary`` and
``boundary_constant(...) -> float``. Masks: True = row used; rows with NaN or infinity are left out
too. A row left out does not advance the monitoring clock: periods monitored count rows used, and
rows after the horizon's ``horizon`` used rows are ignored until the caller starts again.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import resources
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
BoolArray = NDArray[np.bool_]

__all__ = [
    "DEFAULT_BOUNDARY",
    "ERROR_MODELS",
    "MIN_RESIDUAL_DF",
    "PUBLISHED_A_SQUARED",
    "MonitorResult",
    "MonitorState",
    "MonitoringBoundary",
    "boundary_constant",
    "boundary_table_description",
    "history_form_crossing_probability",
    "monitor",
    "monitoring_boundary",
    "monitoring_p_value",
    "post_history_crossing_probability",
    "start_monitoring",
]

#: Fewest residual degrees of freedom (baseline rows minus coefficients) the table covers.
MIN_RESIDUAL_DF = 4
#: Default horizon, in multiples of the baseline's rows (DESIGN.md section 6).
DEFAULT_HORIZON_FACTOR = 2
#: The boundary family used unless another is asked for (chosen by measured detection delay;
#: DEVELOPERS.md "Sequential monitoring").
DEFAULT_BOUNDARY = "weighted-0"
#: Ways of scaling the forecast errors: "iid" (the baseline's residual standard error) or "ar1"
#: (its long-run version under the AR(1) autocorrelation measured on the baseline residuals).
ERROR_MODELS = ("iid", "ar1")
# The bias-corrected lag-1 autocorrelation used for the long-run scale is clipped to this range.
_AR1_CLIP = (0.0, 0.9)
#: Chu, Stinchcombe & White (1996), start-of-history form, infinite horizon: alpha -> a^2.
#: Published values recalled from memory (MEM, CHECK_VALUES item 5); checks only, not used.
PUBLISHED_A_SQUARED: dict[float, float] = {0.05: 7.78, 0.10: 6.25}

_TABLE_RESOURCE = "tables/monitoring_boundaries.json"
# A baseline whose residuals are this small relative to the response counts as an exact fit.
_EXACT_FIT_RELATIVE = 1e-13
# Collinearity: a pivot of the scaled design this small relative to sqrt(rows).
_RANK_RELATIVE = 1e-9


# --------------------------------------------------------------------------- reference values


def history_form_crossing_probability(a_squared: float) -> float:
    """Infinite-horizon false-alarm chance of CSW's start-of-history CUSUM boundary.

    P(|W(t)| > sqrt(t (a^2 + ln t)) for some t >= 1) = 2[1 - Phi(a) + a phi(a)], W a standard
    Brownian motion (Chu, Stinchcombe & White 1996, via Robbins & Siegmund 1970; derived in
    CHECK_VALUES item 5, CONF-exact). A reference value; Plumbline's statistic does not use it.
    """
    from scipy import stats  # a reference value only: a pass never imports scipy.stats

    a = math.sqrt(a_squared)
    return float(2.0 * (stats.norm.sf(a) + a * stats.norm.pdf(a)))


def post_history_crossing_probability(a_squared: float) -> float:
    """Infinite-horizon false-alarm chance of the post-history form: exp(-a^2 / 2).

    P(|W(s)| > sqrt((1 + s)(a^2 + ln(1 + s))) for some s >= 0), W(0) = 0: the mixture martingale
    (1 + s)^(-1/2) exp(W^2 / (2(1 + s))) starts at 1 and the event is its reaching exp(a^2 / 2)
    (Ville's inequality, attained for continuous paths; CHECK_VALUES item 5). A reference value.
    """
    return math.exp(-a_squared / 2.0)


# --------------------------------------------------------------------------- the table


@dataclass(frozen=True, eq=False)
class _Family:
    residual_df: IntArray  # (D,) ascending, finite
    # per residual df: log horizon ratios (H_i,) ascending and constants (H_i, T), squared scale
    log_ratio: tuple[FloatArray, ...]
    values: tuple[FloatArray, ...]
    limit_log_ratio: FloatArray | None  # None: beyond the largest nu its constants are used
    limit_values: FloatArray | None


@dataclass(frozen=True, eq=False)
class _Table:
    log_tail: FloatArray  # (T,) ascending log tail probabilities
    log_alpha: FloatArray  # (A,) the significance grid (its ends bound the allowed range)
    families: dict[str, _Family]
    max_ratio: float
    metadata: dict[str, Any]


def _family(data: dict[str, Any], order: IntArray) -> _Family:
    cells = sorted(data["finite_sample"], key=lambda cell: cell["residual_df"])
    limit = data.get("limit")
    return _Family(
        residual_df=np.asarray([cell["residual_df"] for cell in cells], dtype=np.int64),
        log_ratio=tuple(
            np.log(np.asarray(cell["horizon"], dtype=np.float64) / cell["residual_df"])
            for cell in cells
        ),
        values=tuple(np.asarray(cell["values"], dtype=np.float64)[:, order] for cell in cells),
        limit_log_ratio=(
            None if limit is None else np.log(np.asarray(limit["horizon_ratio"], dtype=np.float64))
        ),
        limit_values=(
            None if limit is None else np.asarray(limit["values"], dtype=np.float64)[:, order]
        ),
    )


@functools.cache
def _table() -> _Table:
    text = resources.files("monitor.stats").joinpath(_TABLE_RESOURCE).read_text(encoding="utf-8")
    data = json.loads(text)
    tails = np.asarray(data["tail_probabilities"], dtype=np.float64)
    order = np.argsort(tails)
    families = {name: _family(family, order) for name, family in data["boundaries"].items()}
    ratios = [float(np.exp(cell[-1])) for family in families.values() for cell in family.log_ratio]
    metadata = {key: value for key, value in data.items() if key != "boundaries"}
    return _Table(
        log_tail=np.log(tails[order]),
        log_alpha=np.log(np.asarray(data["alpha"], dtype=np.float64)),
        families=families,
        max_ratio=min(ratios) if ratios else 0.0,
        metadata=metadata,
    )


def boundary_table_description() -> dict[str, Any]:
    """Metadata of the committed table: what it holds, seed, replications, grids, self-check."""
    table = _table()
    return {
        **table.metadata,
        "boundaries": sorted(table.families),
        "residual_df": {name: f.residual_df.tolist() for name, f in table.families.items()},
        "max_horizon_ratio": table.max_ratio,
    }


def _interpolate_curve(log_ratio: FloatArray, values: FloatArray, at: float) -> FloatArray:
    """Constants per tail probability at one log horizon ratio, linear in ln(H/nu); clamped."""
    return np.asarray(
        [np.interp(at, log_ratio, values[:, column]) for column in range(values.shape[1])]
    )


def _check_boundary(boundary: str) -> _Family:
    family = _table().families.get(boundary)
    if family is None:
        raise ValueError(
            f"unknown monitoring boundary {boundary!r}; the table has "
            + ", ".join(sorted(_table().families))
        )
    return family


def _check_alpha(alpha: float) -> None:
    table = _table()
    low, high = float(np.exp(table.log_alpha[0])), float(np.exp(table.log_alpha[-1]))
    if not (math.isfinite(alpha) and low * (1 - 1e-9) <= alpha <= high * (1 + 1e-9)):
        raise ValueError(
            f"significance {alpha!r} is outside the monitoring table's range {low:g} to {high:g}"
        )


def _horizon_problem(residual_df: int, horizon: int) -> str | None:
    """Why (nu, H) is outside the table, or None."""
    if residual_df < MIN_RESIDUAL_DF:
        return f"baseline residual df {residual_df} below the minimum {MIN_RESIDUAL_DF}"
    ratio = horizon / residual_df
    if ratio > _table().max_ratio * (1 + 1e-9):
        return (
            f"horizon of {horizon} periods is {ratio:.3g} times the baseline's residual degrees "
            f"of freedom ({residual_df}); the boundary table reaches {_table().max_ratio:g} times: "
            "shorten the horizon or lengthen the baseline"
        )
    return None


def boundary_constant(
    alpha: float, residual_df: int, horizon: int, boundary: str = DEFAULT_BOUNDARY
) -> float:
    """The simulated constant for false-alarm chance ``alpha`` over ``horizon`` new periods.

    On the squared scale: a^2 for "csw", c^2 for "weighted-<gamma>" (module docstring).
    ``residual_df`` is nu = n - p of the baseline fit. Interpolated from the committed table (see
    the module docstring: simulated by tests/simulations/simulate_monitoring.py, none published)
    linearly in ln(alpha), ln(H / nu) and 1 / sqrt(nu). Raises ValueError outside the table.
    """
    _check_boundary(boundary)
    _check_alpha(alpha)
    if horizon < 1:
        raise ValueError(f"horizon must be at least 1 period, got {horizon}")
    problem = _horizon_problem(residual_df, horizon)
    if problem is not None:
        raise ValueError(problem)
    return _constant(boundary, alpha, residual_df, horizon)


@functools.lru_cache(maxsize=4096)
def _constants(boundary: str, residual_df: int, horizon: int) -> FloatArray:
    """Constants at every tabulated tail probability (ascending), for one (nu, H)."""
    table = _table()
    family = table.families[boundary]
    at = math.log(horizon / residual_df)
    dfs = family.residual_df
    if residual_df >= dfs[-1]:
        near = _interpolate_curve(family.log_ratio[-1], family.values[-1], at)
        if family.limit_log_ratio is None or family.limit_values is None:
            return near
        # Between the largest simulated nu and the limit, linear in 1/sqrt(nu) (0 at the limit).
        weight = math.sqrt(float(dfs[-1]) / residual_df)
        far = _interpolate_curve(family.limit_log_ratio, family.limit_values, at)
        return np.asarray(weight * near + (1 - weight) * far)
    index = int(np.searchsorted(dfs, residual_df))
    if dfs[index] == residual_df:
        return _interpolate_curve(family.log_ratio[index], family.values[index], at)
    low_df, high_df = float(dfs[index - 1]), float(dfs[index])
    u, u_low, u_high = (1 / math.sqrt(v) for v in (residual_df, low_df, high_df))
    weight = (u - u_high) / (u_low - u_high)
    low = _interpolate_curve(family.log_ratio[index - 1], family.values[index - 1], at)
    high = _interpolate_curve(family.log_ratio[index], family.values[index], at)
    return np.asarray(weight * low + (1 - weight) * high)


def _constant(boundary: str, alpha: float, residual_df: int, horizon: int) -> float:
    values = _constants(boundary, residual_df, horizon)
    return float(np.interp(math.log(alpha), _table().log_tail, values))


def _tail_probability(
    boundary: str, residual_df: int, horizon: int, statistic: FloatArray
) -> tuple[FloatArray, BoolArray]:
    """P(max_{j <= H} T_j >= statistic) under the null, and where it is extrapolated.

    The inverse of ``_constant``'s interpolation (linear in ln tail probability between the
    tabulated constants). Beyond the smallest tabulated tail probability ln p is extended
    linearly in the statistic with the slope between the two smallest decades of the table,
    floored at 1e-12 (flagged as extrapolated). Below the largest tabulated tail probability the
    p-value runs linearly up to 1 at the least value the statistic can take.
    """
    values = _constants(boundary, residual_df, horizon)  # ascending tails -> descending values
    log_tail = _table().log_tail
    reversed_values, reversed_tail = values[::-1], log_tail[::-1]  # ascending values
    stat = np.asarray(statistic, dtype=np.float64)
    log_p = np.interp(stat, reversed_values, reversed_tail)
    top = values[0]
    decade = int(np.searchsorted(log_tail, log_tail[0] + math.log(10.0)))
    decade = min(max(decade, 1), len(values) - 1)
    slope = (log_tail[decade] - log_tail[0]) / max(values[0] - values[decade], 1e-12)
    beyond = stat > top
    log_p = np.where(beyond, log_tail[0] - slope * (stat - top), log_p)
    p = np.exp(np.maximum(log_p, math.log(1e-12)))
    floor = -math.log1p(1.0 / residual_df) if boundary == "csw" else 0.0
    last, last_tail = values[-1], float(np.exp(log_tail[-1]))
    low = stat < last
    span = max(last - floor, 1e-12)
    p = np.where(low, last_tail + (1 - last_tail) * np.clip((last - stat) / span, 0, 1), p)
    return np.asarray(p, dtype=np.float64), np.asarray(beyond, dtype=bool)


def monitoring_p_value(
    statistic: float, residual_df: int, horizon: int, boundary: str = DEFAULT_BOUNDARY
) -> float:
    """The null chance that the boundary-normalised statistic reaches ``statistic`` within H.

    ``statistic`` on the squared scale of ``boundary`` (the largest T_j so far; module
    docstring). The p-value is at most alpha exactly when T exceeds ``boundary_constant``.
    """
    _check_boundary(boundary)
    problem = _horizon_problem(residual_df, horizon)
    if problem is not None:
        raise ValueError(problem)
    p, _ = _tail_probability(boundary, residual_df, horizon, np.asarray([statistic]))
    return float(p[0])


@dataclass(frozen=True, eq=False)
class MonitoringBoundary:
    """The boundary for one (alpha, nu, H): |Q_j| > values[j - 1] raises an alarm at period j.

    ``values`` (horizon,): for "csw" sqrt((nu + j)(a^2 + ln(1 + j / nu))) (Chu, Stinchcombe &
    White 1996, post-history form), for "weighted-<gamma>" c sqrt(nu) (1 + j/nu) (j/(nu + j))^gamma
    (Horvath, Huskova, Kokoszka & Steinebach 2004), j = 1..H; ``a_squared`` is the constant on the
    squared scale (a^2 or c^2), simulated for the finite horizon (module docs).
    """

    alpha: float
    residual_df: int
    horizon: int
    a_squared: float
    values: FloatArray
    source: str
    boundary: str = DEFAULT_BOUNDARY


def monitoring_boundary(
    alpha: float, residual_df: int, horizon: int, boundary: str = DEFAULT_BOUNDARY
) -> MonitoringBoundary:
    """Constant and boundary curve for false-alarm chance ``alpha`` over ``horizon`` periods.

    ``residual_df`` = n - p of the baseline fit. Returns a ``MonitoringBoundary`` whose ``values``
    has shape (horizon,). Raises ValueError outside the simulated table.
    """
    a_squared = boundary_constant(alpha, residual_df, horizon, boundary)
    return MonitoringBoundary(
        alpha=alpha,
        residual_df=residual_df,
        horizon=horizon,
        a_squared=a_squared,
        values=_boundary_values(boundary, a_squared, residual_df, np.arange(1, horizon + 1)),
        source=(
            "simulated finite-sample constant, tests/simulations/simulate_monitoring.py "
            f"(seed {_table().metadata.get('seed')}, {_table().metadata.get('reps')} replications)"
        ),
        boundary=boundary,
    )


def _gamma(boundary: str) -> float:
    return float(boundary.split("-", 1)[1])


def _boundary_values(
    boundary: str, a_squared: ArrayLike, residual_df: ArrayLike, periods: ArrayLike
) -> FloatArray:
    a2 = np.asarray(a_squared, dtype=np.float64)
    nu = np.asarray(residual_df, dtype=np.float64)
    j = np.asarray(periods, dtype=np.float64)
    if boundary == "csw":
        return np.asarray(np.sqrt((nu + j) * (a2 + np.log1p(j / nu))), dtype=np.float64)
    with np.errstate(divide="ignore"):
        shape = np.sqrt(nu) * (1.0 + j / nu) * (j / (nu + j)) ** _gamma(boundary)
    return np.asarray(np.sqrt(a2) * shape, dtype=np.float64)


def _scores(
    boundary: str, q: FloatArray, residual_df: FloatArray, periods: FloatArray
) -> FloatArray:
    """The statistic on the boundary's squared scale at each period (T_j of the module docs)."""
    if boundary == "csw":
        return np.asarray(q * q / (residual_df + periods) - np.log1p(periods / residual_df))
    shape = _boundary_values(boundary, 1.0, residual_df, periods)
    return np.asarray(q * q / np.maximum(shape * shape, 1e-300))


# --------------------------------------------------------------------------- baseline


@dataclass(frozen=True, eq=False)
class MonitorState:
    """What each week's ``monitor`` call needs from the baseline, for s series.

    Public fields, original units: ``coef`` (s, p) (intercept first when ``intercept``),
    ``cov_unscaled`` (s, p, p) = (X'X)^-1, ``residual_std_error`` (s,) sigma_hat = sqrt(SSE/nu),
    ``n`` (s,) baseline rows used, ``residual_df`` (s,) nu = n - p. ``monitorable`` (s,) is False
    where monitoring cannot run, and ``reason[i]`` says why (else None). Where the baseline is not
    estimable (too few rows, a constant predictor, collinear predictors) the coefficients and
    (X'X)^-1 are 0 and mean nothing. ``exact_fit`` (s,) marks baselines with SSE = 0 to rounding:
    their coefficients are kept, but forecast errors have no scale to be judged against, so they
    are not monitorable (residual_std_error 0) and ``monitor`` reports no alarm for them. The
    ``internal_*`` fields are the same fit in centred and scaled predictor units, used by the
    updating recursion for numerical stability. ``autocorrelation`` (s,) is the lag-1
    autocorrelation of the baseline residuals (0 where not monitorable) and ``error_scale`` (s,)
    the factor the monitoring statistic's scale is multiplied by: 1 with ``errors="iid"``,
    sqrt((1 + r) / (1 - r)) with ``errors="ar1"``, r the bias-corrected autocorrelation clipped to
    [0, 0.9] (the long-run standard deviation of an AR(1); module docstring).
    """

    intercept: bool
    p: int
    n: IntArray
    residual_df: IntArray
    monitorable: BoolArray
    reason: tuple[str | None, ...]
    exact_fit: BoolArray
    coef: FloatArray
    cov_unscaled: FloatArray
    residual_std_error: FloatArray
    internal_center: FloatArray
    internal_scale: FloatArray
    internal_coef: FloatArray
    internal_cov: FloatArray
    autocorrelation: FloatArray
    error_scale: FloatArray

    @property
    def series_count(self) -> int:
        """Number of series s."""
        return int(self.n.shape[0])


def _as_batch(
    x: ArrayLike, y: ArrayLike, mask: ArrayLike | None, what: str
) -> tuple[FloatArray, FloatArray, BoolArray]:
    x_arr = np.asarray(x, dtype=np.float64)
    y_arr = np.asarray(y, dtype=np.float64)
    if x_arr.ndim != 3 or y_arr.ndim != 2 or x_arr.shape[:2] != y_arr.shape:
        raise ValueError(
            f"{what}: x must be (series, rows, predictors) and y (series, rows); "
            f"got {x_arr.shape} and {y_arr.shape}"
        )
    used = np.ones(y_arr.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    if used.shape != y_arr.shape:
        raise ValueError(f"{what}: mask must be {y_arr.shape}, got {used.shape}")
    used = used & np.isfinite(y_arr) & np.all(np.isfinite(x_arr), axis=2)
    return x_arr, y_arr, used


def start_monitoring(
    x_base: ArrayLike,
    y_base: ArrayLike,
    mask: ArrayLike | None = None,
    *,
    intercept: bool = True,
    names: Sequence[str] | None = None,
    errors: str = "iid",
) -> MonitorState:
    """Fit each series' baseline by least squares and keep what monitoring needs.

    ``errors="ar1"`` scales the monitoring statistic by the long-run standard deviation of AR(1)
    errors with the autocorrelation measured on the baseline residuals (module docstring), so
    mildly autocorrelated errors keep roughly the false-alarm rate; "iid" (the default) keeps the
    exact finite-sample table for independent errors.

    ``x_base`` (s, n, k) predictors without an intercept column, ``y_base`` (s, n), ``mask``
    (s, n) bool, True = row used (rows with NaN or infinity are left out too). QR of the centred
    and scaled design, never the normal equations. ``names`` (k,) name predictors in reasons.
    To start again after the horizon passes (the baseline rolled forward), call this on the new
    baseline's rows; nothing else carries over.
    """
    if errors not in ERROR_MODELS:
        raise ValueError(f"errors must be one of {ERROR_MODELS}, got {errors!r}")
    x, y, used = _as_batch(x_base, y_base, mask, "baseline")
    series, rows, k = x.shape
    p = k + int(intercept)
    labels = list(names) if names is not None else [f"predictor {i + 1}" for i in range(k)]
    if len(labels) != k:
        raise ValueError(f"names has {len(labels)} entries for {k} predictors")
    count = used.sum(axis=1).astype(np.int64)
    safe_count = np.maximum(count, 1)[:, None]
    xm = np.where(used[:, :, None], x, 0.0)
    ym = np.where(used, y, 0.0)
    center = xm.sum(axis=1) / safe_count if intercept else np.zeros((series, k))
    centred = np.where(used[:, :, None], x - center[:, None, :], 0.0)
    spread = np.sqrt((centred**2).sum(axis=1) / safe_count)
    magnitude = np.sqrt((xm**2).sum(axis=1) / safe_count)
    constant = spread <= 1e-12 * np.maximum(magnitude, 1e-300)
    scale = np.where(constant, 1.0, spread)
    columns = [centred / scale[:, None, :]]
    if intercept:
        columns.insert(0, used[:, :, None].astype(np.float64))
    design = np.concatenate(columns, axis=2) if p else np.zeros((series, rows, 0))
    if rows < p:  # QR needs at least p rows; zero rows change nothing
        design = np.concatenate([design, np.zeros((series, p - rows, p))], axis=1)
        ym = np.concatenate([ym, np.zeros((series, p - rows))], axis=1)
    q, r = np.linalg.qr(design)
    pivots = np.abs(np.diagonal(r, axis1=1, axis2=2))
    full_rank = np.all(pivots > _RANK_RELATIVE * np.sqrt(safe_count), axis=1)

    residual_df = count - p
    reasons: list[str | None] = []
    ok = np.zeros(series, dtype=bool)
    for i in range(series):
        reason: str | None = None
        if p == 0:
            reason = "the model has no coefficients (no predictors and no intercept)"
        elif residual_df[i] < MIN_RESIDUAL_DF:
            reason = (
                f"too few baseline rows: {count[i]} usable rows for {p} coefficients; "
                f"monitoring needs at least {p + MIN_RESIDUAL_DF}"
            )
        elif intercept and constant[i].any():
            reason = f"{labels[int(np.argmax(constant[i]))]} is constant over the baseline"
        elif not full_rank[i]:
            reason = "the predictors are collinear over the baseline"
        reasons.append(reason)
        ok[i] = reason is None

    eye = np.broadcast_to(np.eye(p), (series, p, p))
    r_safe = np.where(ok[:, None, None], r, eye)
    qty = np.einsum("snp,sn->sp", q, ym)
    coef_internal = np.linalg.solve(r_safe, qty[:, :, None])[:, :, 0]
    r_inv = np.linalg.inv(r_safe)
    cov_internal = r_inv @ np.swapaxes(r_inv, 1, 2)
    fitted = np.einsum("snp,sp->sn", design, coef_internal)
    sse = np.where(ok, ((ym - fitted) ** 2).sum(axis=1), 0.0)
    y_norm = np.sqrt((ym**2).sum(axis=1))
    exact = ok & (np.sqrt(sse) <= _EXACT_FIT_RELATIVE * y_norm)
    for exact_index in np.flatnonzero(exact):
        reasons[exact_index] = (
            "the baseline fits exactly (residual standard error 0), so forecast errors have no "
            "scale to be judged against"
        )
    estimable = ok.copy()
    ok &= ~exact
    sigma = np.where(ok, np.sqrt(sse / np.maximum(residual_df, 1)), 0.0)
    autocorrelation, error_scale = _long_run_scale(
        np.where(used, ym[:, :rows] - fitted[:, :rows], 0.0), used, count, ok, errors
    )

    # Back to original units: slope_j = b_j / scale_j, intercept = b_0 - sum b_j center_j / scale_j.
    transform = np.zeros((series, p, p))
    offset = int(intercept)
    transform[:, np.arange(offset, p), np.arange(offset, p)] = 1.0 / scale
    if intercept:
        transform[:, 0, 0] = 1.0
        transform[:, 0, 1:] = -center / scale
    coef = np.einsum("sij,sj->si", transform, coef_internal)
    cov = transform @ cov_internal @ np.swapaxes(transform, 1, 2)
    zero = ~estimable
    return MonitorState(
        intercept=intercept,
        p=p,
        n=count,
        residual_df=residual_df,
        monitorable=ok,
        reason=tuple(reasons),
        exact_fit=exact,
        coef=np.where(zero[:, None], 0.0, coef),
        cov_unscaled=np.where(zero[:, None, None], 0.0, cov),
        residual_std_error=sigma,
        internal_center=center,
        internal_scale=scale,
        internal_coef=np.where(zero[:, None], 0.0, coef_internal),
        internal_cov=np.where(zero[:, None, None], 0.0, cov_internal),
        autocorrelation=autocorrelation,
        error_scale=error_scale,
    )


def _long_run_scale(
    residuals: FloatArray, used: BoolArray, count: IntArray, ok: BoolArray, errors: str
) -> tuple[FloatArray, FloatArray]:
    """Lag-1 autocorrelation of the baseline residuals and the AR(1) long-run scale factor.

    r1 = sum e_t e_{t-1} / sum e_t^2 over consecutive used rows (the residuals have mean 0 with
    an intercept, so this is the usual sample autocorrelation). The AR(1) long-run variance is
    sigma^2 (1 + rho) / (1 - rho) (the spectral density at frequency 0 of an AR(1), as in Andrews
    1991's AR(1) plug-in); rho is estimated by r1 + (1 + 3 r1) / n, the first-order bias
    correction of the lag-1 autocorrelation of an AR(1) with estimated mean (Kendall 1954, MEM),
    and clipped to [0, 0.9]: a negative estimate is not used to narrow the boundary.
    """
    pairs = used[:, 1:] & used[:, :-1]
    lagged = np.where(pairs, residuals[:, 1:] * residuals[:, :-1], 0.0).sum(axis=1)
    energy = (residuals * residuals).sum(axis=1)
    rho = np.where(ok & (energy > 0), lagged / np.where(energy > 0, energy, 1.0), 0.0)
    if errors == "iid":
        return rho, np.ones_like(rho)
    corrected = rho + (1.0 + 3.0 * rho) / np.maximum(count, 1)
    clipped = np.clip(corrected, *_AR1_CLIP)
    scale = np.where(ok, np.sqrt((1.0 + clipped) / (1.0 - clipped)), 1.0)
    return rho, np.asarray(scale, dtype=np.float64)


# --------------------------------------------------------------------------- weekly monitoring


@dataclass(frozen=True, eq=False)
class MonitorResult:
    """Monitoring of s series over their new rows (m of them in the call's arrays).

    Per series (s,): ``crossed`` (an alarm: |Q_j| passed the boundary at some monitored period
    j <= horizon), ``first_crossing_index`` (0-based index into the call's new rows of the row at
    which it first crossed, -1 if none), ``detection_delay`` (periods monitored up to and
    including that row, 0 if none), ``break_index`` / ``break_offset`` (the estimated first row of
    the new regime as an index into the new rows and as a 1-based count of monitored periods; -1 /
    0 if no alarm), ``statistic`` (Q at the latest monitored period, signed: positive means actuals
    above forecasts), ``boundary`` (the boundary at that period; at j = 0 when none: sqrt(nu a^2)
    for csw, 0 for a weighted boundary with gamma > 0),
    ``latest_ratio`` (|statistic| / boundary) and ``max_ratio`` (largest |Q_j| / boundary so far;
    above 1 means crossed), ``periods_monitored``, ``horizon``, ``horizon_exhausted`` (the
    horizon's periods have all been monitored: with no alarm the caller rolls the baseline forward
    and calls ``start_monitoring`` again), ``critical_value`` (a^2 used), ``monitorable`` and
    ``reason``. Per row (s, m): ``monitored_rows`` (the row entered the statistic),
    ``recursive_residuals`` (w_t, 0 on rows not monitored), ``cusum_path`` (Q after the row,
    carried over rows not monitored, 0 before the first) and ``boundary_path`` (the boundary at
    the same period count). ``boundary_name`` names the boundary family; ``p_value`` (s,) is the
    chance under no change that the statistic would reach, within the horizon, the largest value
    (on the boundary's squared scale) it has reached so far: at most ``alpha`` exactly when
    ``crossed``; 1 where nothing was monitored. ``p_value_extrapolated`` marks p-values below the
    table's smallest tail probability (module docstring). A series that is not monitorable has
    zeros, False and -1 throughout (p-value 1), never NaN.
    """

    alpha: float
    horizon: IntArray
    critical_value: FloatArray
    monitorable: BoolArray
    reason: tuple[str | None, ...]
    periods_monitored: IntArray
    statistic: FloatArray
    boundary: FloatArray
    latest_ratio: FloatArray
    max_ratio: FloatArray
    crossed: BoolArray
    first_crossing_index: IntArray
    detection_delay: IntArray
    break_index: IntArray
    break_offset: IntArray
    horizon_exhausted: BoolArray
    monitored_rows: BoolArray
    recursive_residuals: FloatArray
    cusum_path: FloatArray
    boundary_path: FloatArray
    boundary_name: str = DEFAULT_BOUNDARY
    p_value: FloatArray = dataclasses.field(default_factory=lambda: np.zeros(0))
    p_value_extrapolated: BoolArray = dataclasses.field(
        default_factory=lambda: np.zeros(0, dtype=bool)
    )


def _horizons(state: MonitorState, horizon: int | ArrayLike | None) -> IntArray:
    series = state.series_count
    if horizon is None:
        return np.asarray(DEFAULT_HORIZON_FACTOR * state.n, dtype=np.int64)
    values = np.broadcast_to(np.asarray(horizon), (series,))
    if values.dtype.kind not in "iu" and not np.all(np.equal(np.mod(values, 1), 0)):
        raise ValueError("horizon must be a whole number of periods")
    result = values.astype(np.int64)
    if np.any(result < 1):
        raise ValueError("horizon must be at least 1 period")
    return result


def monitor(
    state: MonitorState,
    x_new: ArrayLike,
    y_new: ArrayLike,
    mask_new: ArrayLike | None = None,
    *,
    alpha: float = 0.05,
    horizon: int | ArrayLike | None = None,
    boundary: str = DEFAULT_BOUNDARY,
) -> MonitorResult:
    """Monitor each series' new rows against its baseline; stateless, recomputed every call.

    ``x_new`` (s, m, k) predictors of every row that arrived after the baseline's end, in period
    order, ``y_new`` (s, m), ``mask_new`` (s, m) bool (True = row used; pad series of different
    lengths with False). ``alpha`` is the chance of any false alarm over the horizon, ``horizon``
    the number of monitored periods (int or (s,); default twice the baseline's rows). The recursive
    residuals continue the baseline's least-squares fit by the rank-one updating formulas (Brown,
    Durbin & Evans 1975), O(m p^2) per series; the statistic, boundary and break estimate are those
    of the module docstring (Chu, Stinchcombe & White 1996, post-history form, constants simulated
    for the finite horizon).
    """
    _check_boundary(boundary)
    _check_alpha(alpha)
    x, y, used = _as_batch(x_new, y_new, mask_new, "new rows")
    series, rows, k = x.shape
    if series != state.series_count:
        raise ValueError(f"new rows are for {series} series, the baseline has {state.series_count}")
    if k != state.p - int(state.intercept):
        raise ValueError(
            f"new rows have {k} predictors, the baseline {state.p - int(state.intercept)}"
        )
    horizons = _horizons(state, horizon)
    active = state.monitorable.copy()
    reasons = list(state.reason)
    critical = np.zeros(series)
    nu = state.residual_df
    pairs = np.stack([nu, horizons], axis=1)[active]
    for residual_df, periods in {(int(a), int(b)) for a, b in pairs}:
        members = active & (nu == residual_df) & (horizons == periods)
        problem = _horizon_problem(residual_df, periods)
        if problem is None:
            critical[members] = _constant(boundary, alpha, residual_df, periods)
        else:
            active &= ~members
            for i in np.flatnonzero(members):
                reasons[i] = problem

    count = np.where(active, np.minimum(used.sum(axis=1), horizons), 0).astype(np.int64)
    steps = int(count.max()) if series else 0
    order = np.argsort(~used, axis=1, kind="stable")[:, :steps]
    live = np.arange(steps)[None, :] < count[:, None]  # (s, steps)
    x_rows = np.take_along_axis(x, order[:, :, None], axis=1)
    x_rows = np.where(live[:, :, None], x_rows - state.internal_center[:, None, :], 0.0)
    x_rows /= state.internal_scale[:, None, :]
    if state.intercept:
        x_rows = np.concatenate([live[:, :, None].astype(np.float64), x_rows], axis=2)
    y_rows = np.where(live, np.take_along_axis(y, order, axis=1), 0.0)

    coef = state.internal_coef.copy()
    cov = state.internal_cov.copy()
    residuals = np.zeros((series, steps))
    for t in range(steps):
        step_live = live[:, t]
        row = x_rows[:, t, :]
        cov_row = np.einsum("sij,sj->si", cov, row)
        variance_factor = 1.0 + np.einsum("si,si->s", row, cov_row)
        error = y_rows[:, t] - np.einsum("si,si->s", row, coef)
        residuals[:, t] = np.where(step_live, error / np.sqrt(variance_factor), 0.0)
        gain = np.where(step_live[:, None], cov_row / variance_factor[:, None], 0.0)
        coef += gain * error[:, None]
        cov -= np.einsum("si,sj->sij", gain, cov_row)

    sigma = np.where(active, state.residual_std_error * state.error_scale, 1.0)
    nu_safe = np.where(active, nu, 1).astype(np.float64)
    running = np.cumsum(residuals, axis=1)
    cusum = running / sigma[:, None]
    step_numbers = np.arange(1, steps + 1, dtype=np.float64)[None, :]
    bound = _boundary_values(boundary, critical[:, None], nu_safe[:, None], step_numbers)
    ratio = np.where(live, np.abs(cusum) / np.where(bound > 0, bound, 1.0), 0.0)
    crossing = ratio > 1.0
    crossed: BoolArray = np.asarray(crossing.any(axis=1), dtype=bool)
    first_step = np.where(crossed, np.argmax(crossing, axis=1) if steps else 0, -1)
    index = np.arange(series)
    last = np.maximum(count - 1, 0)
    has_rows = count > 0
    statistic = np.where(has_rows, cusum[index, last] if steps else 0.0, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        boundary_now = np.where(active, _boundary_values(boundary, critical, nu_safe, count), 0.0)
    latest_ratio = np.where(
        has_rows, np.abs(statistic) / np.where(active & has_rows, boundary_now, 1.0), 0.0
    )
    scores = np.where(live, _scores(boundary, cusum, nu_safe[:, None], step_numbers), -np.inf)
    reached = scores.max(axis=1) if steps else np.full(series, -np.inf)
    p_value = np.ones(series)
    extrapolated = np.zeros(series, dtype=bool)
    for residual_df, periods in {(int(a), int(b)) for a, b in pairs}:
        members = active & has_rows & (nu == residual_df) & (horizons == periods)
        if members.any():
            p_value[members], extrapolated[members] = _tail_probability(
                boundary, residual_df, periods, reached[members]
            )

    # Break start k (0-based step tau = k - 1): argmax of (S_J - S_tau)^2 / (J - tau).
    cumulated = np.concatenate([np.zeros((series, 1)), running], axis=1)
    tau = np.arange(steps)[None, :]
    total = cumulated[index, count][:, None]
    likelihood = (total - cumulated[:, :steps]) ** 2 / np.maximum(count[:, None] - tau, 1)
    allowed = (tau < count[:, None]) & (tau <= first_step[:, None])
    likelihood = np.where(allowed, likelihood, -1.0)
    break_step = np.where(crossed, np.argmax(likelihood, axis=1) if steps else 0, -1)

    def row_of(step: IntArray) -> IntArray:
        picked = order[index, np.maximum(step, 0)] if steps else np.zeros(series, dtype=np.int64)
        return np.where(step >= 0, picked, -1).astype(np.int64)

    monitored_rows = np.zeros((series, rows), dtype=bool)
    row_residuals = np.zeros((series, rows))
    series_of_step = np.broadcast_to(index[:, None], order.shape)
    monitored_rows[series_of_step[live], order[live]] = True
    row_residuals[series_of_step[live], order[live]] = residuals[live]
    count_after_row = np.cumsum(monitored_rows, axis=1)
    cusum_path = np.zeros((series, rows))
    if steps:
        gathered = np.take_along_axis(cusum, np.maximum(count_after_row - 1, 0), axis=1)
        cusum_path = np.where(count_after_row > 0, gathered, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        boundary_path = np.where(
            active[:, None],
            _boundary_values(boundary, critical[:, None], nu_safe[:, None], count_after_row),
            0.0,
        )
    return MonitorResult(
        alpha=alpha,
        horizon=horizons,
        critical_value=critical,
        monitorable=active,
        reason=tuple(reasons),
        periods_monitored=count,
        statistic=statistic,
        boundary=boundary_now,
        latest_ratio=latest_ratio,
        max_ratio=ratio.max(axis=1) if steps else np.zeros(series),
        crossed=crossed,
        first_crossing_index=row_of(first_step),
        detection_delay=np.where(crossed, first_step + 1, 0).astype(np.int64),
        break_index=row_of(break_step),
        break_offset=np.where(crossed, break_step + 1, 0).astype(np.int64),
        horizon_exhausted=active & (count >= horizons),
        monitored_rows=monitored_rows,
        recursive_residuals=row_residuals,
        cusum_path=cusum_path,
        boundary_path=boundary_path,
        boundary_name=boundary,
        p_value=p_value,
        p_value_extrapolated=extrapolated,
    )
