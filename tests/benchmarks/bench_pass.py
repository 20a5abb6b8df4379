"""Benchmark: one full monitoring pass over 10,000 series (DESIGN.md section 11).

Run by hand on a quiet machine (CI does not run it; pytest does not collect it):

    nice .venv/bin/python tests/benchmarks/bench_pass.py [--series 10000] [--weeks 150]
        [--files 10] [--no-profile] [--notify] [--dir DIR]

Data (seeded, invented): a feed of weekly rows, one series per store (``per: store``), a
response ``hours`` and two predictors ``orders`` and ``staff``; ``hours = a + b·orders +
c·staff + noise`` per store. 2 % of the stores get a slope 40 % steeper from week 100 on and
1 % a threefold noise from week 120 on, so that the checks have something to find. The
``weeks`` weeks of actuals (10,000 × 150 = 1.5 M rows) and one plan row per store for the next
week are split into ``--files`` CSV files of consecutive weeks (10 files of 15 weeks, about
150,000 rows and 6 MB each, by default: the backlog of a feed being brought under monitoring),
renamed into the inbox as a delivery would be.

What is measured, each in a fresh process (so that peak memory is the pass's own):

1. The **first pass** over all files: ingest every file, refit every series on its window
   (``window: 104``), run the checks, forecast every plan row, record the findings. This is the
   target: under 60 s and under 2 GiB peak memory on 2 cores.
2. The **weekly pass** after it: one file with every store's actual for the planned week and the
   next week's plan rows (10,000 + 10,000 rows), at a business clock a week later: scoring
   10,000 forecasts, refitting 10,000 series, forecasting again.
3. The weekly pass's "which series changed since the mark" query, timed alone beside the same
   SQL with SQLite's join order forced (rows after the mark first), on the same database.
4. Unless ``--no-profile``: each pass again on a fresh copy under cProfile; the top 15 entries
   by cumulative time and the top 12 by own time.

``--notify`` adds step 7 (HTML pages; no e-mail configured) to the passes. Printed: rows per
second (rows ingested / ingest time, and / the whole pass), each stage's time from
``PassReport.timings``, peak RSS (``ru_maxrss``), what the pass produced.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import os
import pstats
import resource
import shutil
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections import Counter
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

ZONE = ZoneInfo("Europe/Berlin")
FIRST_WEEK = date(2023, 1, 1)  # a Sunday
SEED = 20230101
SHIFT_SHARE, SHIFT_WEEK, SHIFT_FACTOR = 0.02, 100, 1.4
NOISE_SHARE, NOISE_WEEK, NOISE_FACTOR = 0.01, 120, 3.0
TARGET_SECONDS = 60.0
TARGET_BYTES = 2 * 1024**3
HEADER = "week_ending,store,orders,staff,hours\n"

CONFIG = """\
database: state/plumbline.sqlite
timezone: Europe/Berlin
feeds:
  stores:
    inbox: feeds/stores/inbox
    format: csv
    period: week_ending
    settle: 30s
    cadence: 7d
models:
  store_hours:
    feed: stores
    response: hours
    predictors: [orders, staff]
    per: store
    level: 0.95
    window: 104
    recent: 26
schedule:
  scan: 30s
  digest: "0 8 * * mon"
notify:
  html_dir: reports
"""


# -- data ---------------------------------------------------------------------------------------


class Scenario:
    """Every store's predictors and response for weeks 1 … weeks + 2 (the last two for the
    weekly pass's actual and plan rows)."""

    def __init__(self, series: int, weeks: int) -> None:
        rng = np.random.default_rng(SEED)
        total = weeks + 2
        self.series, self.weeks = series, weeks
        self.names = [f"store-{i:05d}" for i in range(series)]
        base_orders = rng.uniform(200, 900, series)[:, None]
        self.orders = np.round(base_orders * rng.normal(1.0, 0.12, (series, total)), 0)
        self.staff = np.round(rng.uniform(8, 40, series)[:, None]
                              + rng.normal(0, 4.0, (series, total)), 1)
        intercept = rng.uniform(20, 80, series)[:, None]
        slope = rng.uniform(0.15, 0.45, series)[:, None]
        per_staff = rng.uniform(2.0, 4.0, series)[:, None]
        sigma = rng.uniform(4, 12, series)[:, None]
        week_number = np.arange(1, total + 1)[None, :]
        shifted = rng.random(series) < SHIFT_SHARE
        noisy = rng.random(series) < NOISE_SHARE
        slope_now = np.where(shifted[:, None] & (week_number >= SHIFT_WEEK),
                             slope * SHIFT_FACTOR, slope)
        sigma_now = np.where(noisy[:, None] & (week_number >= NOISE_WEEK),
                             sigma * NOISE_FACTOR, sigma)
        noise = rng.normal(0, 1, (series, total)) * sigma_now
        self.hours = np.round(intercept + slope_now * self.orders + per_staff * self.staff
                              + noise, 1)
        self.shifted = int(shifted.sum())
        self.noisy = int(noisy.sum())

    @staticmethod
    def week_ending(number: int) -> str:
        return (FIRST_WEEK + timedelta(weeks=number - 1)).isoformat()

    def lines(self, week: int, *, plan: bool) -> list[str]:
        """Every store's row of ``week`` (1-based); a plan row has an empty response."""
        period = self.week_ending(week)
        j = week - 1
        orders, staff, hours = self.orders[:, j], self.staff[:, j], self.hours[:, j]
        if plan:
            return [f"{period},{name},{o:.0f},{s:.1f},\n"
                    for name, o, s in zip(self.names, orders, staff, strict=True)]
        return [f"{period},{name},{o:.0f},{s:.1f},{h:.1f}\n"
                for name, o, s, h in zip(self.names, orders, staff, hours, strict=True)]


def deliver(inbox: Path, name: str, lines: list[str]) -> int:
    """Write a file under a temporary name, rename it into the inbox and set its ``.ready``
    marker beside it (complete at once, whatever the file system's timestamp resolution)."""
    inbox.mkdir(parents=True, exist_ok=True)
    temporary = inbox / f"{name}.part"
    with temporary.open("w", encoding="utf-8", newline="") as out:
        out.write(HEADER)
        out.writelines(lines)
    os.replace(temporary, inbox / name)
    (inbox / f"{name}.ready").touch()
    return len(lines)


def build_workspace(root: Path, scenario: Scenario, files: int) -> dict[str, int]:
    """The config and the first pass's files; returns the rows written by kind."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "plumbline.yaml").write_text(CONFIG, encoding="utf-8")
    inbox = root / "feeds" / "stores" / "inbox"
    chunks = np.array_split(np.arange(1, scenario.weeks + 1), files)
    actual = plan = 0
    for index, chunk in enumerate(chunks):
        lines = [line for week in chunk for line in scenario.lines(int(week), plan=False)]
        if index == len(chunks) - 1:
            plan_lines = scenario.lines(scenario.weeks + 1, plan=True)
            plan += len(plan_lines)
            lines += plan_lines
        actual += len(lines) - (plan if index == len(chunks) - 1 else 0)
        deliver(inbox, f"weeks_{int(chunk[0]):03d}-{int(chunk[-1]):03d}.csv", lines)
    return {"actual": actual, "plan": plan}


def deliver_weekly_file(root: Path, scenario: Scenario) -> dict[str, int]:
    week = scenario.weeks + 1
    lines = scenario.lines(week, plan=False) + scenario.lines(week + 1, plan=True)
    deliver(root / "feeds" / "stores" / "inbox", f"week_{week:03d}.csv", lines)
    return {"actual": scenario.series, "plan": scenario.series}


def as_of_for(scenario: Scenario, week: int) -> datetime:
    """The business clock of the pass that takes week ``week``: the Monday after, 06:00."""
    monday = FIRST_WEEK + timedelta(weeks=week - 1, days=1)
    return datetime(monday.year, monday.month, monday.day, 6, 0, tzinfo=ZONE)


# -- one pass, in a child process ---------------------------------------------------------------


def child_pass(root: Path, as_of: str, *, profile: bool, notify: bool) -> None:
    """Run one pass on ``root`` and print its figures as one JSON line (the child's own peak
    memory included); with ``profile``, under cProfile, printing the top 15 before it."""
    from monitor.commands.one_pass import pass_notifier
    from monitor.config import load_config
    from monitor.lock import DatabaseLock
    from monitor.passes import run_pass
    from monitor.store import Store

    config = load_config(root / "plumbline.yaml")
    notifier = pass_notifier() if notify else None
    began = time.perf_counter()
    with DatabaseLock(config.database):
        if profile:
            profiler = cProfile.Profile()
            report = profiler.runcall(run_pass, config, as_of=datetime.fromisoformat(as_of),
                                      notifier=notifier)
            stream = io.StringIO()
            stats = pstats.Stats(profiler, stream=stream)
            stats.sort_stats("cumulative").print_stats(15)
            stream.write("   by own time (tottime), top 12:\n")
            stats.sort_stats("tottime").print_stats(12)
            print(_trimmed(stream.getvalue()))
        else:
            report = run_pass(config, as_of=datetime.fromisoformat(as_of), notifier=notifier)
    wall = time.perf_counter() - began
    with Store.open(config.database, readonly=True) as store:
        kinds = Counter(f.kind.value for f in store.open_findings())
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({
        "wall": wall,
        "timings": report.timings,
        "rows_ingested": sum(f.rows_ingested for f in report.files),
        "files": len(report.files),
        "outcomes_scored": report.outcomes_scored,
        "series_analysed": report.series_analysed,
        "fits": report.fits_recorded,
        "forecasts": report.forecasts_issued,
        "findings_raised": len(report.findings_raised),
        "open_findings": dict(sorted(kinds.items())),
        "skipped": list(report.skipped),
        "peak_rss_bytes": peak_kib * 1024,
    }))


def _trimmed(text: str) -> str:
    """The profile listing without pstats' blank lines and preamble repeats."""
    keep = [line for line in text.splitlines() if line.strip()
            and not line.lstrip().startswith(("Ordered by", "List reduced"))]
    return "\n".join(keep)


def run_child(root: Path, as_of: datetime, *, profile: bool, notify: bool) -> tuple[dict, str]:
    command = [sys.executable, __file__, "--child", str(root), "--as-of", as_of.isoformat()]
    if profile:
        command.append("--profile-child")
    if notify:
        command.append("--notify")
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        sys.exit(f"the pass failed (exit {done.returncode}):\n{done.stderr}")
    *text, last = done.stdout.rstrip("\n").split("\n")
    return json.loads(last), "\n".join(text)


# -- report -------------------------------------------------------------------------------------


def show(title: str, figures: dict, rows_in_files: int) -> None:
    timings = figures["timings"]
    total = timings["total"]
    ingest = timings.get("ingest", 0.0)
    peak = figures["peak_rss_bytes"]
    print(f"\n{title}")
    print(f"  rows ingested            {figures['rows_ingested']:>12,} of {rows_in_files:,} "
          f"in {figures['files']} file(s)")
    print(f"  series analysed / fits   {figures['series_analysed']:>12,} / {figures['fits']:,}")
    print(f"  outcomes scored          {figures['outcomes_scored']:>12,}")
    print(f"  forecasts issued         {figures['forecasts']:>12,}")
    print(f"  findings raised          {figures['findings_raised']:>12,}   open by kind: "
          f"{figures['open_findings']}")
    if figures["skipped"]:
        print(f"  skipped                  {figures['skipped']}")
    print("  stage                        seconds   share")
    for stage, seconds in timings.items():
        if stage == "total":
            continue
        print(f"    {stage:<24} {seconds:>9.2f}   {seconds / total:>5.1%}")
    print(f"    {'total':<24} {total:>9.2f}   (process wall {figures['wall']:.2f} s)")
    if ingest > 0:
        print(f"  rows per second, ingest  {figures['rows_ingested'] / ingest:>12,.0f}")
    print(f"  rows per second, pass    {figures['rows_ingested'] / total:>12,.0f}")
    print(f"  peak RSS                 {peak / 1024**2:>12,.0f} MiB")


FORCED_ORDER = (
    "SELECT DISTINCT s.key FROM observations AS o CROSS JOIN series AS s ON s.id = o.series_id "
    "WHERE o.id > ? AND s.feed = ? ORDER BY s.key"
)


def changed_series_query(root: Path) -> None:
    """Which series changed since the first pass's mark (the weekly pass's first question):
    ``Store.series_with_rows_after`` beside the same SQL with the join order forced to start
    from the rows after the mark (SQLite's CROSS JOIN), on the same database."""
    from monitor.store import Store

    database = root / "state" / "plumbline.sqlite"
    with Store.open(database, readonly=True) as store:
        first = min(store.list_passes(10), key=lambda p: p.id)
        mark = int(first.counts["observation_mark"])
        after = store.last_observation_id() - mark
        began = time.perf_counter()
        stored = store.series_with_rows_after("stores", mark)
        store_seconds = time.perf_counter() - began
    conn = sqlite3.connect(f"file:{database}?mode=ro", uri=True)
    try:
        began = time.perf_counter()
        forced = [row[0] for row in conn.execute(FORCED_ORDER, (mark, "stores"))]
        forced_seconds = time.perf_counter() - began
    finally:
        conn.close()
    assert sorted(forced) == sorted("" if s is None else s for s in stored)
    print(f"\n3. series changed since the first pass ({after:,} rows after its mark, "
          f"{len(stored):,} series)")
    print(f"  Store.series_with_rows_after  {store_seconds:8.3f} s")
    print(f"  same SQL, CROSS JOIN order    {forced_seconds:8.3f} s   "
          f"ratio {store_seconds / max(forced_seconds, 1e-9):,.0f} x")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--weeks", type=int, default=150)
    parser.add_argument("--files", type=int, default=10)
    parser.add_argument("--no-profile", action="store_true")
    parser.add_argument("--notify", action="store_true", help="write the HTML pages too")
    parser.add_argument("--dir", type=Path, help="keep the workspaces here (default: a temp dir)")
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--as-of", help=argparse.SUPPRESS)
    parser.add_argument("--profile-child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child is not None:
        child_pass(args.child, args.as_of, profile=args.profile_child, notify=args.notify)
        return

    work = args.dir or Path(tempfile.mkdtemp(prefix="bench_pass_"))
    work.mkdir(parents=True, exist_ok=True)
    root = work / "workspace"
    if root.exists():
        shutil.rmtree(root)
    began = time.perf_counter()
    scenario = Scenario(args.series, args.weeks)
    written = build_workspace(root, scenario, args.files)
    size = sum(p.stat().st_size for p in (root / "feeds" / "stores" / "inbox").glob("*.csv"))
    print(f"bench_pass: {args.series:,} series x {args.weeks} weeks, 2 predictors, per: store; "
          f"{written['actual']:,} actual + {written['plan']:,} plan rows in {args.files} CSV "
          f"files ({size / 1e6:.0f} MB); planted: {scenario.shifted} slope changes, "
          f"{scenario.noisy} noise increases; data written in {time.perf_counter() - began:.1f} s")
    print(f"machine: {os.cpu_count()} CPUs; python {sys.version.split()[0]}; numpy "
          f"{np.__version__}; notify {'on' if args.notify else 'off'}")
    if not args.no_profile:
        profiled_root = work / "workspace_profiled"
        if profiled_root.exists():
            shutil.rmtree(profiled_root)
        shutil.copytree(root, profiled_root)

    first_clock = as_of_for(scenario, args.weeks)
    first, _ = run_child(root, first_clock, profile=False, notify=args.notify)
    show("1. first pass (all files)", first, written["actual"] + written["plan"])

    weekly_clock = as_of_for(scenario, args.weeks + 1)
    if not args.no_profile:
        weekly_profiled_root = work / "workspace_weekly_profiled"
        if weekly_profiled_root.exists():
            shutil.rmtree(weekly_profiled_root)
        shutil.copytree(root, weekly_profiled_root)
        deliver_weekly_file(weekly_profiled_root, scenario)
    weekly_rows = deliver_weekly_file(root, scenario)
    weekly, _ = run_child(root, weekly_clock, profile=False, notify=args.notify)
    show("2. weekly pass (one new week)", weekly, weekly_rows["actual"] + weekly_rows["plan"])

    changed_series_query(root)

    if not args.no_profile:
        for number, (title, where, clock) in enumerate(
            (("first", profiled_root, first_clock),
             ("weekly", weekly_profiled_root, weekly_clock)), start=4,
        ):
            profiled, profile_text = run_child(where, clock, profile=True, notify=args.notify)
            print(f"\n{number}. the {title} pass again under cProfile (total "
                  f"{profiled['timings']['total']:.2f} s with the profiler's overhead); "
                  "top 15 by cumulative time:")
            print(profile_text)

    total = first["timings"]["total"]
    peak = first["peak_rss_bytes"]
    print("\ntarget for the first pass: under 60 s and under 2 GiB peak on 2 cores")
    print(f"  time  {total:7.2f} s   = {total / TARGET_SECONDS:.2f} x the target   "
          f"{'met' if total < TARGET_SECONDS else 'MISSED'}")
    print(f"  peak  {peak / 1024**3:7.2f} GiB = {peak / TARGET_BYTES:.2f} x the target   "
          f"{'met' if peak < TARGET_BYTES else 'MISSED'}")
    if args.dir is None:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
