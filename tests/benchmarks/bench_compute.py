"""The analysis step at scale: ``engine: local`` against ``engine: dask`` on a local cluster.

    nice .venv/bin/python tests/benchmarks/bench_compute.py [--series 10000 100000]
        [--rows 150] [--batch-size 2000] [--workers 2] [--project 1000000]

For each panel size, in a fresh child process each (so peak memory is that run's own):

- ``local``: ``analyse_batch`` on the whole model in one call, as a pass does with
  ``engine: local``; and the same series cut into ``--batch-size`` batches run one after the
  other in the same process (the per-batch cost without any cluster);
- ``dask``: a ``distributed.LocalCluster`` of ``--workers`` worker processes with one thread
  each, and ``DaskCompute.analyse`` (the pass's own call): split, submit, wait, join. Dask's
  task stream gives each batch's time on its worker (compute, and the transfer of the result).

The arrays are generated directly for ``analyse_batch`` (seeded, invented: one ``per:`` model,
two predictors, ``--rows`` weekly rows per series, a 104-row window, a baseline on the first
104 rows, a 26-row recent block, one plan row per series). A full ingest of 100,000 series
(15 M rows at the ~100,000 rows/s that bench_pass.py measures) would take several minutes
before the first figure; the ingest, SQLite and notify stages stay on the coordinator either
way and are measured by bench_pass.py.

Ends with a projection to ``--project`` series on N workers from the measured costs, with its
assumptions printed beside it. Every result of the dask path is compared with the local one,
bit for bit.
"""

from __future__ import annotations

import argparse
import json
import os
import pickle
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from monitor.analysis import BatchInput, BatchOutput, analyse_batch  # noqa: E402
from monitor.compute import join_outputs, split_batch  # noqa: E402


def panel(series: int, rows: int, seed: int = 20261202) -> BatchInput:
    rng = np.random.default_rng(seed)
    k = 2
    x = rng.uniform(100.0, 600.0, (series, rows, k))
    slopes = rng.uniform(0.1, 0.3, (series, k))
    y = rng.uniform(20.0, 60.0, (series, 1)) + np.einsum("snk,sk->sn", x, slopes)
    y += rng.normal(0.0, 6.0, (series, rows))
    return BatchInput(
        predictors=("orders", "pallets"), intercept=True, level=0.95, significance=0.05,
        x=x, y=y, mask=np.ones((series, rows), dtype=bool), window=104,
        baseline_start=np.zeros(series, dtype=np.int64),
        baseline_end=np.full(series, min(104, rows - 10), dtype=np.int64),
        horizon=np.full(series, 208, dtype=np.int64), recent=26,
        plan_x=rng.uniform(100.0, 600.0, (series, 1, k)),
        plan_mask=np.ones((series, 1), dtype=bool),
    )


SAMPLE_BATCHES = 8


def peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def same_bits(a: BatchOutput, b: BatchOutput) -> bool:
    import dataclasses

    def walk(u: Any, v: Any) -> bool:
        if dataclasses.is_dataclass(u) and not isinstance(u, type):
            return all(walk(getattr(u, f.name), getattr(v, f.name))
                       for f in dataclasses.fields(u))
        if isinstance(u, np.ndarray):
            return u.shape == v.shape and u.dtype == v.dtype and u.tobytes() == v.tobytes()
        return bool(u == v)

    return walk(a, b)


def run_local(series: int, rows: int, batch_size: int) -> dict[str, Any]:
    batch = panel(series, rows)
    begun = time.perf_counter()
    whole = analyse_batch(batch)
    whole_s = time.perf_counter() - begun
    whole_peak = peak_mib()
    split_begun = time.perf_counter()
    parts = split_batch(batch, batch_size)
    split_s = time.perf_counter() - split_begun
    # A sample of the batches, one after another (the whole run is the whole call above, and
    # the dask run below): enough for the per-batch cost and the coordinator's costs per series.
    sample = parts[:SAMPLE_BATCHES]
    sampled = sum(part.y.shape[0] for part in sample)
    times = []
    outputs = []
    for part in sample:
        begun = time.perf_counter()
        outputs.append(analyse_batch(part))
        times.append(time.perf_counter() - begun)
    begun = time.perf_counter()
    joined = join_outputs(outputs)
    join_s = (time.perf_counter() - begun) * series / sampled
    # What the coordinator itself does for a cluster, without one: serialize each batch going
    # out and deserialize each result coming back (plain pickle, protocol 5 in-band; Dask sends
    # numpy buffers out of band, which copies less).
    begun = time.perf_counter()
    sent = [pickle.dumps(part, protocol=5) for part in sample]
    serialize_s = (time.perf_counter() - begun) * series / sampled
    received = [pickle.dumps(out, protocol=5) for out in outputs]
    begun = time.perf_counter()
    for blob in received:
        pickle.loads(blob)
    deserialize_s = (time.perf_counter() - begun) * series / sampled
    head = analyse_batch(split_batch(batch, sampled)[0]) if sampled < series else whole
    return {
        "series": series, "engine": "local", "whole_call_s": whole_s,
        "peak_mib_after_whole_call": whole_peak,
        "batches": len(parts), "batches_timed": len(sample),
        "batch_s_median": float(np.median(times)),
        "batches_s_scaled_to_all": sum(times) * series / sampled,
        "join_s_scaled": join_s, "split_s": split_s, "serialize_inputs_s_scaled": serialize_s,
        "deserialize_outputs_s_scaled": deserialize_s, "equal_bits": same_bits(head, joined),
        "input_bytes_per_series": sum(map(len, sent)) / sampled,
        "output_bytes_per_series": sum(map(len, received)) / sampled,
    }


def warm_up(rows: int) -> bool:
    analyse_batch(panel(4, rows))
    return True


def run_dask(series: int, rows: int, batch_size: int, workers: int) -> dict[str, Any]:
    import distributed

    from monitor.compute import DaskCompute
    from monitor.config import Compute

    batch = panel(series, rows)
    settings = Compute(engine="dask", workers=workers, batch_size=batch_size)
    engine = DaskCompute(settings)
    begun = time.perf_counter()
    engine.connect()
    start_s = time.perf_counter() - begun
    client = engine._client  # the benchmark reads Dask's task stream of the pass's own client
    # warm-up: each worker imports monitor.analysis and loads its tables once, as a running
    # cluster has done before the passes that matter
    client.run(warm_up, rows)
    begun = time.perf_counter()
    parts = split_batch(batch, batch_size)
    split_s = time.perf_counter() - begun
    with distributed.get_task_stream(client=client) as stream:
        begun = time.perf_counter()
        out = engine.analyse(batch, function=analyse_batch)
        analyse_s = time.perf_counter() - begun
    compute, transfer = [], []
    for task in stream.data:
        if not str(task["key"]).startswith("analyse_batch"):
            continue
        for step in task["startstops"]:
            span = step["stop"] - step["start"]
            (compute if step["action"] == "compute" else transfer).append(span)
    coordinator_peak = peak_mib()
    worker_peaks = client.run(lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
    engine.close()
    whole = analyse_batch(batch)
    return {
        "series": series, "engine": "dask", "workers": workers, "cluster_start_s": start_s,
        "batches": len(parts), "split_s": split_s, "analyse_wall_s": analyse_s,
        "batch_compute_s_median": float(np.median(compute)) if compute else None,
        "batch_compute_s_sum": float(np.sum(compute)),
        "other_worker_steps_s_sum": float(np.sum(transfer)),
        "coordinator_peak_mib": coordinator_peak,
        "worker_peak_mib": max(worker_peaks.values()),
        "equal_bits": same_bits(whole, out),
    }


def child(args: argparse.Namespace) -> None:
    series, engine = int(args.one[0]), args.one[1]
    if engine == "local":
        result = run_local(series, args.rows, args.batch_size)
    else:
        result = run_dask(series, args.rows, args.batch_size, args.workers)
    print("RESULT " + json.dumps(result))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--series", type=int, nargs="+", default=[10_000, 100_000])
    parser.add_argument("--rows", type=int, default=150)
    parser.add_argument("--batch-size", type=int, default=2000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--project", type=int, default=1_000_000)
    parser.add_argument("--one", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        child(args)
        return

    print(f"load average before: {os.getloadavg()}; cores: {os.cpu_count()}")
    results: dict[tuple[int, str], dict[str, Any]] = {}
    for series in args.series:
        for engine in ("local", "dask"):
            command = [sys.executable, __file__, "--one", str(series), engine, "--rows",
                       str(args.rows), "--batch-size", str(args.batch_size), "--workers",
                       str(args.workers)]
            begun = time.perf_counter()
            done = subprocess.run(command, capture_output=True, text=True, check=True)
            line = next(x for x in done.stdout.splitlines() if x.startswith("RESULT "))
            results[(series, engine)] = json.loads(line.removeprefix("RESULT "))
            print(f"{series:>8} series, {engine}: {time.perf_counter() - begun:.1f}s in the "
                  f"child; load average now {os.getloadavg()[0]:.1f}")
            for key, value in results[(series, engine)].items():
                shown = f"{value:.3f}" if isinstance(value, float) else value
                print(f"    {key}: {shown}")

    print("\nside by side (seconds):")
    print(f"{'series':>8} {'local whole':>12} {'local batched':>14} {'dask wall':>10} "
          f"{'ratio local/dask':>17} {'equal bits':>11}")
    for series in args.series:
        local, dask = results[(series, "local")], results[(series, "dask")]
        print(f"{series:>8} {local['whole_call_s']:>12.2f} "
              f"{local['batches_s_scaled_to_all']:>14.2f} "
              f"{dask['analyse_wall_s']:>10.2f} "
              f"{local['whole_call_s'] / dask['analyse_wall_s']:>17.2f} "
              f"{local['equal_bits'] and dask['equal_bits']!s:>11}")

    largest = max(args.series)
    local, dask = results[(largest, "local")], results[(largest, "dask")]
    per_batch = local["batch_s_median"]  # one batch on one core, no cluster
    batches = args.project / args.batch_size
    coordinator_s = sum(local[k] for k in ("split_s", "serialize_inputs_s_scaled",
                                           "deserialize_outputs_s_scaled", "join_s_scaled"))
    per_series = coordinator_s / largest
    wire = local["input_bytes_per_series"] + local["output_bytes_per_series"]
    bandwidth = 1e9  # bytes/s: assumed, a 10 Gbit/s link at 80 %
    modelled = (largest * per_series + largest * wire / bandwidth
                + (largest / args.batch_size) * per_batch / args.workers)
    print(f"\nthe model on the measured {largest:,}-series run with {args.workers} workers: "
          f"{modelled:.1f}s modelled against {dask['analyse_wall_s']:.1f}s measured (the "
          "workers here share this machine's cores with the coordinator and other jobs)")
    print(f"projection to {args.project:,} series in one model:")
    print(f"  per batch of {args.batch_size} series on one core: {per_batch:.3f}s; "
          f"{batches:.0f} batches")
    print(f"  coordinator per series: {per_series * 1e6:.1f} µs (split, serialize out, "
          f"deserialize back, join); on the wire {wire / 1024:.1f} KiB per series "
          f"({local['input_bytes_per_series'] / 1024:.1f} out, "
          f"{local['output_bytes_per_series'] / 1024:.1f} back)")
    coordinator = per_series * args.project + wire * args.project / bandwidth
    for n in (1, 2, 8, 16, 32, 64):
        compute = batches * per_batch / n
        print(f"  N={n:>3} workers: analysis ≈ {compute + coordinator:7.1f}s "
              f"(workers {compute:7.1f}s + coordinator {coordinator:5.1f}s)")
    print("  assumptions: each worker a core as fast as this machine's, not shared; batches "
          "independent (they are: each series is analysed on its own); the coordinator's part "
          "grows linearly with the series and is not overlapped with the workers' (an upper "
          "bound); a 10 Gbit/s link at 80 % (1 GB/s); the coordinator holds one model's "
          f"results at once ({local['output_bytes_per_series'] * args.project / 2**30:.1f} GiB "
          f"at {args.project:,} series); ingest, SQLite reads and writes and notify are not "
          "included (bench_pass.py measures them; they stay on the coordinator).")

if __name__ == "__main__":
    main()
