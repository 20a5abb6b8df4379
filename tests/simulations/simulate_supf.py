"""Simulate the null limit of the sup-F (sup-Wald) break test and write its quantile table.

The limit (Andrews 1993, Theorem 3) of the Wald form p·F of the sup-F statistic with trimming π₀ is

    sup over λ in [π₀, 1 − π₀] of  Σ_{j=1..p} (B_j(λ) − λ·B_j(1))² / (λ(1 − λ)),

with B_1 … B_p independent standard Brownian motions. This script draws the B_j on a grid of step
1/N on [0, 1] (only the points inside [π₀, 1 − π₀] are drawn one by one; B(π₀) and B(1) − B(1 − π₀)
are single normal draws), takes the maximum over the grid points in the trimmed range, and stores,
for p = 1 … max_p restrictions, the quantiles at a fixed list of upper-tail probabilities.

The components are nested: the draw for p restrictions reuses the first p − 1 components of the
draw for p − 1, so one set of max_p components yields every p. Each p's marginal distribution is
exactly the one above; only the estimates for different p are correlated.

A discrete grid misses the peak between grid points, so the simulated quantiles sit slightly below
the continuous limit and approach it roughly like N^(−1/2) (see CHECK_VALUES item 4 in the shared
reference notes). Monte Carlo standard errors of the quantiles are estimated from the spread over
independent batches and written beside the table.

Usage (the committed table was made with the defaults; run it with ``nice``)::

    nice python tests/simulations/simulate_supf.py                  # full run, several minutes
    python tests/simulations/simulate_supf.py --reps 2000 --grid 500 --out /tmp/quick.json  # quick

Seeds: chunk i uses ``numpy.random.default_rng(SeedSequence(seed).spawn(chunks)[i])``, so the
table depends on seed, reps, grid and chunk size, all recorded in the output.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

DEFAULT_OUT = Path(__file__).resolve().parents[2] / "monitor" / "stats" / "tables"
DEFAULT_OUT = DEFAULT_OUT / "supf_quantiles.json"


def tail_probabilities() -> list[float]:
    """Upper-tail probabilities at which quantiles are stored: dense in both tails."""
    grid = np.concatenate(
        [
            np.arange(0.001, 0.01, 0.0005),
            np.arange(0.01, 0.1, 0.005),
            np.arange(0.1, 0.9, 0.01),
            np.arange(0.9, 0.99, 0.005),
            np.arange(0.99, 0.9995, 0.0005),
        ]
    )
    return sorted({round(float(value), 4) for value in grid})


def simulate_sup_wald(
    reps: int,
    grid: int,
    max_p: int,
    trimming: float,
    seed: int,
    chunk: int,
) -> NDArray[np.float64]:
    """Draws of the limit statistic: array (reps, max_p), column p − 1 for p restrictions."""
    lo = round(trimming * grid)
    hi = grid - lo
    # Grid points lo, lo + 1, ..., hi (in units of 1/grid); B at lo is drawn directly.
    lam = np.arange(lo, hi + 1, dtype=np.float64) / grid
    inverse_weight = (1.0 / (lam * (1.0 - lam))).astype(np.float32)
    lam32 = lam.astype(np.float32)
    step_sd = np.float32(np.sqrt(1.0 / grid))
    chunks = -(-reps // chunk)
    streams = np.random.SeedSequence(seed).spawn(chunks)
    out = np.empty((reps, max_p), dtype=np.float64)
    done = 0
    for index, stream in enumerate(streams):
        rng = np.random.default_rng(stream)
        size = min(chunk, reps - done)
        accumulated = np.zeros((size, lam.size), dtype=np.float32)
        for _component in range(max_p):
            start = rng.standard_normal(size) * np.sqrt(lam[0])
            steps = rng.standard_normal((size, lam.size), dtype=np.float32)
            steps[:, 0] = 0.0
            steps *= step_sd
            path = np.cumsum(steps, axis=1, dtype=np.float32)
            path += start.astype(np.float32)[:, None]
            end = path[:, -1].astype(np.float64) + rng.standard_normal(size) * np.sqrt(
                1.0 - lam[-1]
            )
            # Brownian bridge B(λ) − λB(1), squared, summed over components.
            path -= lam32[None, :] * end.astype(np.float32)[:, None]
            np.square(path, out=path)
            accumulated += path
            out[done : done + size, _component] = np.max(accumulated * inverse_weight, axis=1)
        done += size
        if index % 10 == 0:
            print(f"  chunk {index + 1}/{chunks}", file=sys.stderr, flush=True)
    return out


def quantile_table(
    draws: NDArray[np.float64], tails: list[float], batches: int
) -> tuple[dict[str, list[float]], dict[str, dict[str, float]]]:
    """Quantiles per p at the tail probabilities, and batch-spread standard errors at 10/5/1 %."""
    levels = 1.0 - np.asarray(tails)
    quantiles: dict[str, list[float]] = {}
    errors: dict[str, dict[str, float]] = {}
    for column in range(draws.shape[1]):
        values = draws[:, column]
        quantiles[str(column + 1)] = [round(float(v), 5) for v in np.quantile(values, levels)]
        split = np.array_split(values, batches)
        per_batch = np.array([np.quantile(part, [0.90, 0.95, 0.99]) for part in split])
        spread = per_batch.std(axis=0, ddof=1) / np.sqrt(batches)
        errors[str(column + 1)] = {
            "0.10": round(float(spread[0]), 4),
            "0.05": round(float(spread[1]), 4),
            "0.01": round(float(spread[2]), 4),
        }
    return quantiles, errors


def build_table(
    reps: int, grid: int, max_p: int, trimming: float, seed: int, chunk: int, batches: int
) -> dict[str, object]:
    """Run the simulation and return the table as a JSON-ready dict."""
    started = time.perf_counter()
    draws = simulate_sup_wald(reps, grid, max_p, trimming, seed, chunk)
    tails = tail_probabilities()
    quantiles, errors = quantile_table(draws, tails, batches)
    return {
        "what": (
            "Upper-tail quantiles of sup over λ in [trimming, 1 − trimming] of "
            "Σ_j (B_j(λ) − λB_j(1))² / (λ(1 − λ)), the null limit of the Wald form p·F of the "
            "sup-F break test (Andrews 1993). quantiles[p][i] is the value c with "
            "P(limit > c) = tail_probabilities[i]. Simulated, not published."
        ),
        "generated_by": "tests/simulations/simulate_supf.py",
        "trimming": trimming,
        "grid_points": grid,
        "reps": reps,
        "seed": seed,
        "chunk": chunk,
        "batches_for_standard_errors": batches,
        "numpy_version": np.__version__,
        "seconds": round(time.perf_counter() - started, 1),
        "tail_probabilities": tails,
        "quantiles": quantiles,
        "standard_errors": errors,
    }


def extend_table(existing: dict[str, Any], fresh: dict[str, Any]) -> dict[str, Any]:
    """The existing table with the restrictions it lacks taken from ``fresh``.

    Both must share trimming, grid, seed, chunk size and tail probabilities. Chunk i of a run
    draws from ``SeedSequence(seed).spawn(...)[i]`` whatever the number of chunks, and component
    j of a draw is the same whatever ``max_p``, so the fresh run's first components repeat the
    existing run's first draws; the added restrictions rest on the fresh run's ``reps`` draws,
    recorded under "extension".
    """
    for key in ("trimming", "grid_points", "seed", "chunk", "tail_probabilities"):
        if existing[key] != fresh[key]:
            raise SystemExit(f"cannot extend: {key} differs ({existing[key]} vs {fresh[key]})")
    added = sorted(set(fresh["quantiles"]) - set(existing["quantiles"]), key=int)
    merged = dict(existing)
    merged["quantiles"] = {**existing["quantiles"], **{p: fresh["quantiles"][p] for p in added}}
    merged["standard_errors"] = {
        **existing["standard_errors"],
        **{p: fresh["standard_errors"][p] for p in added},
    }
    merged["extension"] = {
        "restrictions": f"{added[0]} to {added[-1]}" if added else "none",
        "reps": fresh["reps"],
        "seconds": fresh["seconds"],
        "numpy_version": fresh["numpy_version"],
        "note": "the same seeded chunks as the main run, fewer of them",
    }
    return merged


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--reps", type=int, default=400_000)
    parser.add_argument("--grid", type=int, default=5000, help="grid points on [0, 1]")
    parser.add_argument("--max-p", type=int, default=10)
    parser.add_argument("--trimming", type=float, default=0.15)
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--chunk", type=int, default=2000)
    parser.add_argument("--batches", type=int, default=20)
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT)
    parser.add_argument(
        "--extend",
        action="store_true",
        help="keep the restrictions already in --out and add the missing ones up to --max-p",
    )
    args = parser.parse_args(argv)
    table = build_table(
        args.reps, args.grid, args.max_p, args.trimming, args.seed, args.chunk, args.batches
    )
    if args.extend:
        table = extend_table(json.loads(args.out.read_text(encoding="utf-8")), table)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(table, indent=1) + "\n", encoding="utf-8")
    print(f"wrote {args.out} in {table['seconds']} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
