"""Benchmark: peak memory while ingesting one large CSV file (target: under 1 GiB for 500 MB).

Run by hand (CI does not run it; pytest does not collect it):

    nice .venv/bin/python tests/benchmarks/bench_ingest_large.py [--megabytes 500]
        [--note-bytes 400] [--dir /tmp]

Writes one CSV of about ``--megabytes`` MB into a new folder under ``--dir`` (invented rows: a
week, a depot, two numbers, and a free-text ``note`` column of about ``--note-bytes`` characters
that no model reads, as exports often carry), then ingests it with ``ingest_feed`` in a fresh
process and prints the rows, the time and that process's peak RSS beside the file's size, and
deletes everything it wrote. The note column keeps the row count (and so the run time on a
shared machine) moderate while the file is as large as asked; ``--note-bytes 0`` gives narrow
rows (about 40 bytes each: 13 M rows for 500 MB, several minutes). Check the free space first
(``df -h /tmp``): the file and the database need about twice ``--megabytes``.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import date, timedelta
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

TARGET_BYTES = 1024**3


def write_csv(path: Path, megabytes: int, note_bytes: int) -> int:
    """About ``megabytes`` MB of rows; returns the row count."""
    target = megabytes * 1_000_000
    note = ("lorem ipsum dolor sit amet " * (note_bytes // 27 + 1))[:note_bytes]
    rows = 0
    written = 0
    weeks = [(date(2020, 1, 5) + timedelta(weeks=w)).isoformat() for w in range(520)]
    with path.open("w", encoding="utf-8", newline="") as out:
        out.write("week_ending,depot,pick_hours,order_lines,note\n")
        depot = 0
        while written < target:
            block = []
            for week in weeks:
                block.append(f"{week},depot-{depot:06d},{40 + rows % 17}.5,{400 + rows % 91},"
                             f"{note}\n")
                rows += 1
            text = "".join(block)
            out.write(text)
            written += len(text)
            depot += 1
    return rows


def child(root: Path) -> None:
    from monitor.ingest import IngestSpec, ingest_feed
    from monitor.store import Store

    spec = IngestSpec(
        feed="depots", inbox=root / "inbox", archive=root / "archive",
        rejected=root / "rejected", period_column="week_ending", per_column="depot",
        responses=("pick_hours",), required=("order_lines",),
    )
    began = time.perf_counter()
    with Store.open(root / "db.sqlite") as store:
        result = ingest_feed(store, spec, real_clock=lambda: time.time() + 3600)
    seconds = time.perf_counter() - began
    (report,) = result.reports
    print(json.dumps({
        "seconds": seconds, "rows": report.rows_ingested, "rejected": report.rows_rejected,
        "outcome": report.outcome.value,
        "peak_rss_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
    }))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--megabytes", type=int, default=500)
    parser.add_argument("--note-bytes", type=int, default=400)
    parser.add_argument("--dir", type=Path, default=Path(tempfile.gettempdir()))
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child is not None:
        child(args.child)
        return
    root = Path(tempfile.mkdtemp(prefix="bench_ingest_large_", dir=args.dir))
    try:
        (root / "inbox").mkdir()
        path = root / "inbox" / "large.csv"
        began = time.perf_counter()
        rows = write_csv(path, args.megabytes, args.note_bytes)
        size = path.stat().st_size
        print(f"bench_ingest_large: one CSV of {size / 1e6:,.0f} MB, {rows:,} rows "
              f"(note column {args.note_bytes} characters), written in "
              f"{time.perf_counter() - began:.1f} s; load average "
              f"{' '.join(f'{x:.1f}' for x in os.getloadavg())}")
        done = subprocess.run([sys.executable, __file__, "--child", str(root)],
                              capture_output=True, text=True, check=False)
        if done.returncode != 0:
            sys.exit(f"the ingest failed (exit {done.returncode}):\n{done.stderr}")
        figures = json.loads(done.stdout.strip().splitlines()[-1])
        peak = figures["peak_rss_bytes"]
        print(f"  outcome {figures['outcome']}, rows ingested {figures['rows']:,}, rejected "
              f"{figures['rejected']:,}, in {figures['seconds']:.1f} s "
              f"({figures['rows'] / figures['seconds']:,.0f} rows/s)")
        print(f"  peak RSS of the ingesting process  {peak / 1024**2:,.0f} MiB = "
              f"{peak / size:.2f} x the file's size")
        print(f"  target: under 1 GiB   {peak / TARGET_BYTES:.2f} x the target   "
              f"{'met' if peak < TARGET_BYTES else 'MISSED'}")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
