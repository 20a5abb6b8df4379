"""Benchmark: ``plumbline demo`` end to end, against the issue-15 target of 10 s.

Run by hand (CI does not run it; pytest does not collect it):

    nice .venv/bin/python tests/benchmarks/bench_demo.py [--repeat 5] [--against TREE]

Each run is a fresh ``python -m monitor demo --dir DIR`` process into a new folder (the README's
first command, imports included), timed from outside: wall time, and the child's user and
system CPU time (``os.wait4``), which other jobs on a shared machine disturb far less than wall
time. ``--against TREE`` (another checkout of the repository, e.g. ``git worktree add`` of
main) alternates its runs with this tree's, so both meet the same load; the two are printed
side by side with their medians and the load average before each run.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _installed import child_environment, compile_tree

HERE = Path(__file__).resolve().parents[2]
TARGET_SECONDS = 10.0


def run_demo(tree: Path) -> tuple[float, float, float]:
    """One demo in a fresh process from ``tree``: (wall, user CPU, system CPU) seconds."""
    with tempfile.TemporaryDirectory(prefix="bench-demo-") as scratch:
        env = child_environment(tree)
        errors = Path(scratch) / "stderr.txt"
        with errors.open("wb") as stderr:
            started = time.perf_counter()
            child = subprocess.Popen(
                [sys.executable, "-m", "monitor", "demo", "--dir", str(Path(scratch) / "demo")],
                cwd=tree, env=env, stdout=subprocess.DEVNULL, stderr=stderr,
            )
            _, status, usage = os.wait4(child.pid, 0)
            wall = time.perf_counter() - started
        child.returncode = os.waitstatus_to_exitcode(status)
        if child.returncode != 0:
            raise SystemExit(f"the demo from {tree} failed ({child.returncode}): "
                             f"{errors.read_text(errors='replace')}")
    return wall, usage.ru_utime, usage.ru_stime


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--against", type=Path, help="another tree, run alternately")
    args = parser.parse_args()
    trees = [("this tree", HERE)]
    if args.against is not None:
        trees.append(("against", args.against.resolve()))
    results: dict[str, list[tuple[float, float, float]]] = {label: [] for label, _ in trees}
    for _, tree in trees:
        compile_tree(tree)
    print(f"plumbline demo, {args.repeat} run(s) each, fresh process and folder per run; "
          f"{os.cpu_count()} CPUs")
    print(f"{'run':>3}  {'tree':<10} {'load':>5}  {'wall':>7}  {'user':>7}  {'system':>7}")
    for number in range(1, args.repeat + 1):
        for label, tree in trees:
            load = os.getloadavg()[0]
            wall, user, system = run_demo(tree)
            results[label].append((wall, user, system))
            print(f"{number:>3}  {label:<10} {load:5.2f}  {wall:6.2f}s  {user:6.2f}s  "
                  f"{system:6.2f}s", flush=True)
    print("medians:")
    for label, runs in results.items():
        wall = statistics.median(r[0] for r in runs)
        cpu = statistics.median(r[1] + r[2] for r in runs)
        met = "met" if wall <= TARGET_SECONDS else "MISSED"
        print(f"  {label:<10} wall {wall:6.2f} s   CPU {cpu:6.2f} s   target <= "
              f"{TARGET_SECONDS:.0f} s wall: {met}")


if __name__ == "__main__":
    main()
