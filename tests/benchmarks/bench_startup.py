"""Benchmark: how long the light commands take to answer, beside a bare Python.

Run by hand on a quiet machine (CI does not run it; pytest does not collect it):

    .venv/bin/python tests/benchmarks/bench_startup.py [--demo DIR] [--repeat 15]

``--demo DIR`` uses the workspace of an earlier ``plumbline demo --dir DIR`` (the replayed demo
database: 125 passes); without it the demo is replayed into a temporary folder
first (a few minutes). Each command runs ``--repeat`` times as a fresh process
(``python -m monitor ...``, the way the console script starts), in turns, so that a slow moment
of the machine hits every command alike. Printed: the median and the fastest wall-clock time of
each, and the median's ratio to the bare ``python -c pass``. Targets (issue 9): ``--version``
≤ 0.3 s and ``status`` ≤ 0.8 s on the demo database. ``audit`` is there for contrast: it needs
numpy and scipy.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _installed import child_environment, compile_tree

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))


def _time(argv: list[str], environment: dict[str, str]) -> float:
    started = time.perf_counter()
    subprocess.run(argv, env=environment, check=True, stdout=subprocess.DEVNULL,
                   stderr=subprocess.DEVNULL)
    return time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--demo", type=Path, help="an existing demo workspace")
    parser.add_argument("--repeat", type=int, default=15)
    args = parser.parse_args()
    if args.demo is None:
        from monitor.demo.replay import replay_scenario

        folder = Path(tempfile.mkdtemp(prefix="bench-startup-"))
        print(f"replaying the demo into {folder} ...", flush=True)
        replay_scenario(folder)
        demo = folder
    else:
        demo = args.demo
    config = str(demo / "plumbline.yaml")
    compile_tree(REPO)
    environment = child_environment(REPO)
    python = [sys.executable]
    cases = {
        "python -c pass": [*python, "-c", "pass"],
        "plumbline --version": [*python, "-m", "monitor", "--version"],
        "plumbline status": [*python, "-m", "monitor", "status", "-c", config],
        "plumbline status --format json": [*python, "-m", "monitor", "status", "-c", config,
                                           "--format", "json"],
        "plumbline check": [*python, "-m", "monitor", "check", "-c", config],
        "plumbline schema": [*python, "-m", "monitor", "schema"],
        "plumbline audit (contrast)": [*python, "-m", "monitor", "audit", "-c", config],
    }
    for argv in cases.values():  # warm the file cache once
        subprocess.run(argv, env=environment, check=False, stdout=subprocess.DEVNULL,
                       stderr=subprocess.DEVNULL)
    times: dict[str, list[float]] = {name: [] for name in cases}
    for _ in range(args.repeat):
        for name, argv in cases.items():
            times[name].append(_time(argv, environment))
    bare = statistics.median(times["python -c pass"])
    print(f"{'command':34} {'median':>9} {'fastest':>9} {'ratio to bare':>14}")
    for name, values in times.items():
        median = statistics.median(values)
        print(f"{name:34} {median:8.3f}s {min(values):8.3f}s {median / bare:13.1f}x")
    print(f"({args.repeat} runs each, demo database {demo / 'state' / 'plumbline.sqlite'})")


if __name__ == "__main__":
    main()
