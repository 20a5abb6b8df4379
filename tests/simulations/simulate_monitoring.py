"""Simulate the boundary constants of Plumbline's sequential monitoring and commit them as a table.

Run once by hand (takes a few minutes on two cores; run it with ``nice``)::

    nice python tests/simulations/simulate_monitoring.py            # writes the table
    nice python tests/simulations/simulate_monitoring.py --check    # the self-check only, prints it

The monitored statistic (``monitor/stats/monitoring.py`` has the full account) is the CUSUM of the
recursive residuals that arrive *after* the baseline, divided by the baseline's residual standard
error, Q_j = sigma_hat^-1 (w_{n+1} + ... + w_{n+j}), with the boundary of Chu, Stinchcombe & White
(1996) in its post-history form,

    |Q_j| > sqrt((nu + j) * (a^2 + ln(1 + j / nu))),    j = 1 .. H,  nu = n - p.

Under the null hypothesis with normal errors the recursive residuals are independent N(0, sigma^2)
and independent of the baseline's residual sum of squares (Brown, Durbin & Evans 1975), so the
chance of crossing depends on (nu, H, a^2) only, whatever the predictors are. With
T = max_j [Q_j^2 / (nu + j) - ln(1 + j / nu)], a crossing happens exactly when T > a^2, so the
constant that gives a false-alarm chance alpha over the horizon is the (1 - alpha) quantile of T.

Two kinds of constants are simulated:

* finite-sample: Q_j = (z_1 + ... + z_j) / sqrt(chi2_nu / nu) with z iid N(0, 1), checked at
  every integer j, for each nu of ``RESIDUAL_DF_GRID`` and horizons H = round(r * nu), r in
  ``HORIZON_RATIO_GRID``;
* the large-sample limit (nu -> infinity): Brownian motion W(s) on s in [0, r] with boundary
  sqrt((1 + s)(a^2 + ln(1 + s))), the supremum over continuous time taken by sampling the exact
  maximum and minimum of the Brownian bridge within each (geometric) time step.

The self-check runs the same continuous-time machinery over a long horizon and compares it with
the infinite-horizon results of ../shared/reference/CHECK_VALUES.md item 5: the start-of-history
form |W(t)| > sqrt(t (a^2 + ln t)), t >= 1, crosses with probability 2[1 - Phi(a) + a phi(a)]
(0.05078 at the published a^2 = 7.78 of Chu, Stinchcombe & White 1996, exactly 5 % at 7.815), and
the post-history form with probability exp(-a^2 / 2) (0.0204 at 7.78; 5 % at -2 ln 0.05 = 5.991),
by the mixture-martingale argument behind Robbins & Siegmund (1970). The finite-sample machinery
is checked at H = 1, where the exact constant is t_{nu, 1-alpha/2}^2 / (nu + 1) - ln(1 + 1/nu).
"""

from __future__ import annotations

import argparse
import json
import math
import re
import sys
import time
from pathlib import Path

import numpy as np
from numpy.typing import NDArray
from scipy import stats

FloatArray = NDArray[np.float64]

SEED = 20261201
REPS = 100_000
ALPHA_GRID = (0.005, 0.01, 0.025, 0.05, 0.10, 0.20)
# Upper-tail probabilities tabulated for p-values (every ALPHA_GRID value is among them).
TAIL_GRID = (
    0.0001, 0.0002, 0.0005, 0.001, 0.002, 0.005, 0.01, 0.025, 0.05, 0.10, 0.20, 0.30, 0.50,
    0.70, 0.90,
)  # fmt: skip
# Boundary families: Chu, Stinchcombe & White (1996) in post-history form, and the weighted
# boundaries of Horvath, Huskova, Kokoszka & Steinebach (2004) with these gammas.
BOUNDARIES = ("csw", "weighted-0", "weighted-0.25", "weighted-0.45")
# Families with a continuous-time limit (nu -> infinity) in the table; the others use their
# largest simulated nu beyond it (a weight that vanishes at s = 0 makes the limit a poor guide).
LIMIT_BOUNDARIES = ("csw", "weighted-0")
HORIZON_RATIO_GRID = (
    0.05, 0.1, 0.15, 0.25, 0.35, 0.5, 0.75, 1.0, 1.25, 1.5, 1.75, 2.0, 2.25, 2.5, 2.75, 3.0,
    3.5, 4.0, 5.0, 6.0, 8.0, 10.0, 12.0,
)  # fmt: skip
RESIDUAL_DF_GRID = (
    *range(4, 31), 35, 40, 45, 50, 60, 70, 80, 100, 120, 150, 200, 300, 500,
)  # fmt: skip
# Relative length of one time step in the continuous-time limit (t_{i+1} = t_i (1 + step)).
LIMIT_STEP = 0.001
CHUNK_ELEMENTS = 12_000_000

TABLE_PATH = (
    Path(__file__).resolve().parents[2]
    / "monitor"
    / "stats"
    / "tables"
    / "monitoring_boundaries.json"
)


def horizons_for(residual_df: int) -> list[int]:
    """The distinct horizons (periods) tabulated for one residual df: round(r * nu), at least 1."""
    values = {max(1, round(ratio * residual_df)) for ratio in HORIZON_RATIO_GRID}
    return sorted(values)


def finite_sample_sup(
    residual_df: int, horizons: list[int], reps: int, rng: np.random.Generator
) -> NDArray[np.float32]:
    """T = max_{j <= H} [Q_j^2/(nu+j) - ln(1+j/nu)] for each horizon H; (reps, len(horizons))."""
    return finite_sample_sups(residual_df, horizons, reps, rng, ("csw",))["csw"]


def boundary_weights(boundary: str, residual_df: int, horizon_max: int) -> NDArray[np.float32]:
    """1 / g(j)^2 for a weighted boundary g(j) = sqrt(nu) (1 + j/nu) (j / (nu + j))^gamma.

    ``boundary`` is "weighted-<gamma>" (Horvath, Huskova, Kokoszka & Steinebach 2004); the
    statistic on the squared scale is max_j Q_j^2 / g(j)^2 and the constant is c^2.
    """
    gamma = float(boundary.split("-", 1)[1])
    j = np.arange(1, horizon_max + 1, dtype=np.float64)
    g_squared = residual_df * (1.0 + j / residual_df) ** 2 * (j / (residual_df + j)) ** (2 * gamma)
    return (1.0 / g_squared).astype(np.float32)


def finite_sample_sups(
    residual_df: int,
    horizons: list[int],
    reps: int,
    rng: np.random.Generator,
    boundaries: tuple[str, ...] = BOUNDARIES,
) -> dict[str, NDArray[np.float32]]:
    """Each boundary's statistic on the squared scale, max over j <= H, from the same paths.

    "csw": T = max_j [Q_j^2/(nu+j) - ln(1+j/nu)] (a crossing is T > a^2); "weighted-<gamma>":
    T = max_j Q_j^2 / g(j)^2 (a crossing is T > c^2). Arrays (reps, len(horizons)). The random
    draws do not depend on ``boundaries``.
    """
    horizon_max = horizons[-1]
    steps = np.arange(1, horizon_max + 1, dtype=np.float64)
    inverse_time = (1.0 / (residual_df + steps)).astype(np.float32)
    log_time = np.log1p(steps / residual_df).astype(np.float32)
    weights = {
        name: boundary_weights(name, residual_df, horizon_max)
        for name in boundaries
        if name != "csw"
    }
    # Segment j-ranges ending at each horizon, for a max by segment then a running max.
    starts = np.array([0, *horizons[:-1]], dtype=np.intp)
    chunk = max(1, CHUNK_ELEMENTS // horizon_max)
    out = {name: np.empty((reps, len(horizons)), dtype=np.float32) for name in boundaries}
    for first in range(0, reps, chunk):
        size = min(chunk, reps - first)
        increments = rng.standard_normal((size, horizon_max), dtype=np.float32)
        path = np.cumsum(increments, axis=1)
        variance_ratio = (rng.chisquare(residual_df, size) / residual_df).astype(np.float32)
        path *= path
        path /= variance_ratio[:, None]
        for name in boundaries:
            if name == "csw":
                score = path * inverse_time
                score -= log_time
            else:
                score = path * weights[name]
            segment_max = np.maximum.reduceat(score, starts, axis=1)
            out[name][first : first + size] = np.maximum.accumulate(segment_max, axis=1)
    return out


def geometric_grid(t_start: float, nodes: list[float], step: float) -> tuple[FloatArray, list[int]]:
    """Times from t_start through every node, geometric steps of relative size <= step.

    Returns the grid and the index of each node in it.
    """
    grid = [t_start]
    node_index: list[int] = []
    for node in nodes:
        pieces = max(1, math.ceil(math.log(node / grid[-1]) / step))
        grid.extend(np.geomspace(grid[-1], node, pieces + 1)[1:].tolist())
        node_index.append(len(grid) - 1)
    return np.asarray(grid), node_index


def continuous_sup(
    times: FloatArray,
    node_index: list[int],
    start_at_zero: bool,
    reps: int,
    rng: np.random.Generator,
    boundary: str = "csw",
) -> NDArray[np.float64]:
    """sup over t in [times[0], times[i]] of X(t)^2/t - ln t, for each node i; (reps, nodes).

    With ``boundary="weighted-0"`` the score is X(t)^2 / t^2 instead (the linear boundary
    c (1 + s), t = 1 + s, of Horvath et al. 2004 with gamma = 0).

    X is a Brownian motion in t; X(times[0]) = 0 when ``start_at_zero`` (the post-history form,
    with t = 1 + s) else X(times[0]) ~ N(0, times[0]) (the start-of-history form of Chu,
    Stinchcombe & White). Within each step the maximum and the minimum of the Brownian bridge
    between the two simulated values are drawn exactly (each from its own marginal law; a step in
    which both sides come near the boundary is vanishingly rare) and scored at the step's midpoint.
    """
    widths = np.diff(times)
    middles = 0.5 * (times[1:] + times[:-1])
    inverse_middle = 1.0 / middles
    log_middle = np.log(middles)
    step_count = widths.size
    starts = np.array([0, *node_index[:-1]], dtype=np.intp)
    chunk = max(1, CHUNK_ELEMENTS // (4 * step_count))
    out = np.empty((reps, len(node_index)))
    for first in range(0, reps, chunk):
        size = min(chunk, reps - first)
        increments = rng.standard_normal((size, step_count)) * np.sqrt(widths)
        origin = (
            np.zeros(size) if start_at_zero else rng.standard_normal(size) * math.sqrt(times[0])
        )
        values = np.empty((size, step_count + 1))
        values[:, 0] = origin
        np.cumsum(increments, axis=1, out=values[:, 1:])
        values[:, 1:] += origin[:, None]
        left, right = values[:, :-1], values[:, 1:]
        centre = left + right
        spread = (right - left) ** 2
        upper = 0.5 * (
            centre + np.sqrt(spread - 2.0 * widths * np.log(rng.random((size, step_count))))
        )
        lower = 0.5 * (
            centre - np.sqrt(spread - 2.0 * widths * np.log(rng.random((size, step_count))))
        )
        extreme = np.maximum(upper * upper, lower * lower)
        extreme *= inverse_middle
        if boundary == "csw":
            extreme -= log_middle
        else:
            extreme *= inverse_middle
        segment_max = np.maximum.reduceat(extreme, starts, axis=1)
        running = np.maximum.accumulate(segment_max, axis=1)
        if not start_at_zero:  # the check at t_0 itself, |X(t_0)| > a sqrt(t_0)
            assert boundary == "csw"
            running = np.maximum(running, (origin**2 / times[0] - math.log(times[0]))[:, None])
        out[first : first + size] = running
    return out


def quantiles(sup_values: NDArray[np.floating], alphas: tuple[float, ...]) -> list[list[float]]:
    """a^2 per horizon (rows) and alpha (columns): the (1 - alpha) quantiles of T."""
    levels = [1.0 - alpha for alpha in alphas]
    table = np.quantile(sup_values.astype(np.float64), levels, axis=0).T
    return [[round(float(v), 4) for v in row] for row in table]


def history_form_size(a_squared: float) -> float:
    """2[1 - Phi(a) + a phi(a)]: CHECK_VALUES item 5 (CONF-exact), after Chu et al. (1996)."""
    a = math.sqrt(a_squared)
    return float(2.0 * (stats.norm.sf(a) + a * stats.norm.pdf(a)))


def self_check(reps: int, seed: int, step: float = 0.005, t_end: float = 1e5) -> dict[str, object]:
    """Infinite-horizon crossing probabilities by the continuous-time machinery, against theory."""
    rng = np.random.default_rng([seed, 1])
    times, nodes = geometric_grid(1.0, [t_end], step)
    history = continuous_sup(times, nodes, start_at_zero=False, reps=reps, rng=rng)[:, 0]
    post = continuous_sup(times, nodes, start_at_zero=True, reps=reps, rng=rng)[:, 0]
    rows: list[dict[str, object]] = []
    for form, sample, theory in (
        ("start_of_history", history, history_form_size),
        ("post_history", post, lambda a2: math.exp(-a2 / 2.0)),
    ):
        for a_squared in (6.25, 7.78, 7.815, -2.0 * math.log(0.05)):
            rows.append(
                {
                    "form": form,
                    "a_squared": round(a_squared, 4),
                    "simulated": round(float(np.mean(sample > a_squared)), 5),
                    "theory": round(theory(a_squared), 5),
                    "standard_error": round(
                        math.sqrt(theory(a_squared) * (1 - theory(a_squared)) / reps), 5
                    ),
                }
            )
    finite_rows: list[dict[str, object]] = []
    rng_finite = np.random.default_rng([seed, 2])
    for residual_df in (5, 20, 50):
        sup_values = finite_sample_sups(residual_df, [1], reps, rng_finite)
        for alpha in (0.05, 0.10):
            t_squared = stats.t.isf(alpha / 2, residual_df) ** 2
            for boundary in BOUNDARIES:
                if boundary == "csw":
                    exact = t_squared / (residual_df + 1) - math.log1p(1 / residual_df)
                else:
                    exact = t_squared * float(boundary_weights(boundary, residual_df, 1)[0])
                finite_rows.append(
                    {
                        "boundary": boundary,
                        "residual_df": residual_df,
                        "horizon": 1,
                        "alpha": alpha,
                        "simulated": round(
                            float(np.quantile(sup_values[boundary][:, 0], 1 - alpha)), 4
                        ),
                        "exact": round(float(exact), 4),
                    }
                )
    # The linear boundary (gamma = 0) over an unbounded horizon: sup |W(s)| / (1 + s) is the
    # supremum of a Brownian bridge, so c is Kolmogorov's quantile (scipy's kstwobign).
    rng_linear = np.random.default_rng([seed, 3])
    linear = continuous_sup(times, nodes, True, reps, rng_linear, boundary="weighted-0")[:, 0]
    linear_rows = [
        {
            "alpha": alpha,
            "simulated_c": round(float(np.sqrt(np.quantile(linear, 1 - alpha))), 4),
            "kolmogorov_c": round(float(stats.kstwobign.isf(alpha)), 4),
        }
        for alpha in (0.01, 0.05, 0.10)
    ]
    return {
        "reps": reps,
        "seed": [seed, 1],
        "time_grid": f"geometric, relative step {step}, t in [1, {t_end:g}]",
        "infinite_horizon": rows,
        "finite_sample_horizon_one": finite_rows,
        "linear_boundary_unbounded_horizon": linear_rows,
    }


def build_table(reps: int, seed: int) -> dict[str, object]:
    """Simulate every cell of the table; returns the JSON-ready mapping."""
    finite: dict[str, list[dict[str, object]]] = {name: [] for name in BOUNDARIES}
    for residual_df in RESIDUAL_DF_GRID:
        began = time.perf_counter()
        horizons = horizons_for(residual_df)
        rng = np.random.default_rng([seed, residual_df])
        sup_values = finite_sample_sups(residual_df, horizons, reps, rng)
        for name in BOUNDARIES:
            finite[name].append(
                {
                    "residual_df": residual_df,
                    "horizon": horizons,
                    "values": quantiles(sup_values[name], TAIL_GRID),
                }
            )
        print(f"nu={residual_df}: {time.perf_counter() - began:.1f}s", file=sys.stderr, flush=True)
    limits: dict[str, object] = {}
    for offset, name in enumerate(LIMIT_BOUNDARIES):
        began = time.perf_counter()
        rng = np.random.default_rng([seed, 0] if name == "csw" else [seed, 0, offset])
        times, nodes = geometric_grid(1.0, [1.0 + r for r in HORIZON_RATIO_GRID], LIMIT_STEP)
        limit = continuous_sup(times, nodes, True, reps, rng, boundary=name)
        limits[name] = {
            "what": "nu -> infinity: Brownian motion, continuous-time supremum",
            "time_step": f"geometric, relative step {LIMIT_STEP}",
            "horizon_ratio": list(HORIZON_RATIO_GRID),
            "values": quantiles(limit, TAIL_GRID),
        }
        print(f"limit {name}: {time.perf_counter() - began:.1f}s", file=sys.stderr, flush=True)
    standard_errors = {str(a): round(math.sqrt(a * (1 - a) / reps), 5) for a in TAIL_GRID}
    return {
        "format": 2,
        "what": (
            "Boundary constants for the post-baseline recursive-residual CUSUM "
            "Q_j = (w_{n+1} + ... + w_{n+j}) / sigma_hat, nu = n - p, on a squared scale: "
            "values[h][i] is the constant whose crossing chance for j = 1..H (H = horizon[h]) is "
            "tail_probabilities[i] under the null with normal errors. csw: a^2 of the boundary "
            "sqrt((nu + j) * (a^2 + ln(1 + j / nu))); weighted-<gamma>: c^2 of the boundary "
            "c sqrt(nu) (1 + j/nu) (j / (nu + j))^gamma. All values are simulated (none is "
            "published); see tests/simulations/simulate_monitoring.py."
        ),
        "generated_by": "tests/simulations/simulate_monitoring.py",
        "seed": seed,
        "seed_rule": (
            "numpy default_rng([seed, nu]) for each nu (every boundary from the same paths); "
            "[seed, 0] for the csw limit, [seed, 0, 1] for the weighted-0 limit"
        ),
        "reps": reps,
        "size_standard_error": standard_errors,
        "alpha": list(ALPHA_GRID),
        "tail_probabilities": list(TAIL_GRID),
        "boundaries": {
            name: {
                "finite_sample": finite[name],
                "limit": limits.get(name),
            }
            for name in BOUNDARIES
        },
        "self_check": self_check(min(reps, 100_000), seed),
    }


def dump_table(table: dict[str, object]) -> str:
    """JSON with every innermost list of numbers on one line (a diff per cell, not per value)."""
    text = json.dumps(table, indent=1)
    return re.sub(
        r"\[\s*((?:-?[0-9.e+-]+,\s*)*-?[0-9.e+-]+)\s*\]",
        lambda match: "[" + ", ".join(part.strip() for part in match.group(1).split(",")) + "]",
        text,
    ) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=REPS)
    parser.add_argument("--seed", type=int, default=SEED)
    parser.add_argument("--check", action="store_true", help="run the self-check only and print it")
    parser.add_argument("--out", type=Path, default=TABLE_PATH)
    args = parser.parse_args(argv)
    if args.check:
        print(json.dumps(self_check(args.reps, args.seed), indent=1))
        return 0
    table = build_table(args.reps, args.seed)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(dump_table(table), encoding="utf-8")
    print(f"wrote {args.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
