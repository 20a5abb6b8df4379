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

5. The **floor** of the first pass, in a fresh process on the same files: pyarrow parses every
   CSV, one SQLite transaction inserts the same rows (series id, period, key, the numbers packed
   as the store packs them) into a table with the store's index, and one query reads them back
   into arrays. Nothing is checked: this is what reading, writing and reading back must cost.
6. The **statsmodels loop** the weekly pass is measured against: for each series, statsmodels
   ``OLS`` on its latest 104 rows and ``get_prediction(...).summary_frame`` for its plan row (the
   95 % prediction interval), one series after another (``--loop-series N`` times N series and
   scales to all).

Printed at the end, as ratios measured in the same run (``--repeat N`` repeats the passes, the
floor and the loop and prints each run's ratios and their median): first pass ÷ floor (target
≤ 2), weekly pass ÷ statsmodels loop (target ≤ 0.3), peak memory of the first pass (≤ 1 GiB).

Each is also given in CPU time (``time.process_time`` around the work in each process), which
other jobs on a shared machine disturb far less than wall time; both are printed.

``--notify`` adds step 7 (HTML pages; no e-mail configured) to the passes. Printed: rows per
second (rows ingested / ingest time, and / the whole pass), each stage's time from
``PassReport.timings``, peak RSS (``ru_maxrss``), what the pass produced, and the whole child
process's wall time taken from outside (the interpreter's start and every import included,
as a one-shot ``plumbline pass`` pays them; issue 15 asks at most 1 s for a weekly pass of
200 series: ``--series 200 --notify``).
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
import statistics
import subprocess
import sys
import tempfile
import time
from collections import Counter
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
from _installed import child_environment, compile_tree

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

ZONE = ZoneInfo("Europe/Berlin")
FIRST_WEEK = date(2023, 1, 1)  # a Sunday
SEED = 20230101
SHIFT_SHARE, SHIFT_WEEK, SHIFT_FACTOR = 0.02, 100, 1.4
NOISE_SHARE, NOISE_WEEK, NOISE_FACTOR = 0.01, 120, 3.0
TARGET_FLOOR_RATIO = 2.0
TARGET_LOOP_RATIO = 0.3
TARGET_BYTES = 1024**3
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
    parts = _time_parts() if not profile else {}
    began = time.perf_counter()
    cpu_began = time.process_time()
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
    cpu = time.process_time() - cpu_began
    with Store.open(config.database, readonly=True) as store:
        kinds = Counter(f.kind.value for f in store.open_findings())
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({
        "wall": wall,
        "cpu": cpu,
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
        "parts": parts,
    }))


def _time_parts() -> dict[str, float]:
    """Time two parts of the refit stage from inside, around their calls (no profiler, whose
    per-call cost would distort them): reading the windows (``Store.windows``) and the analysis
    (``analyse_batch`` through the local engine). Returns the dict the timings accumulate in."""
    import monitor.compute
    from monitor.store import Store

    parts = {"windows": 0.0, "analyse": 0.0}

    def timed(name: str, function: Any) -> Any:
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            began = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                parts[name] += time.perf_counter() - began
        return wrapper

    Store.windows = timed("windows", Store.windows)  # type: ignore[method-assign]
    local = monitor.compute.LocalCompute
    local.analyse = timed("analyse", local.analyse)  # type: ignore[method-assign]
    return parts


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
    began = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True, check=False,
                          env=child_environment(REPO))
    whole = time.perf_counter() - began
    if done.returncode != 0:
        sys.exit(f"the pass failed (exit {done.returncode}):\n{done.stderr}")
    *text, last = done.stdout.rstrip("\n").split("\n")
    figures = json.loads(last)
    # The whole child process from outside: the interpreter's start and every import (what a
    # one-shot ``plumbline pass`` pays) with the pass and the child's short read of findings.
    figures["whole_process"] = whole
    return figures, "\n".join(text)


# -- the floor and the statsmodels loop, each in a child process ------------------------------


def child_floor(root: Path, files: list[Path]) -> None:
    """Parse the CSV files with pyarrow, insert the rows in one SQLite transaction into a table
    with the store's index, read them back; print the three times as one JSON line."""
    import pyarrow.csv as pacsv

    database = root / "floor.sqlite"
    if database.exists():
        database.unlink()
    began = time.perf_counter()
    cpu_began = time.process_time()
    tables = [pacsv.read_csv(path) for path in files]
    parse = time.perf_counter() - began
    conn = sqlite3.connect(database, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")
    conn.execute("CREATE TABLE obs (id INTEGER PRIMARY KEY, series_id INTEGER NOT NULL, "
                 "period TEXT NOT NULL, period_key INTEGER NOT NULL, vals BLOB NOT NULL)")
    conn.execute("CREATE INDEX obs_key ON obs(series_id, period_key)")
    began = time.perf_counter()
    conn.execute("BEGIN")
    rows = 0
    for table in tables:
        store = table.column("store").to_numpy(zero_copy_only=False)
        _, series_id = np.unique(store, return_inverse=True)
        period = table.column("week_ending").cast("string").to_pylist()
        key = (table.column("week_ending").cast("int32").to_numpy()).astype(np.int64)
        values = np.column_stack([
            table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)
            for name in ("orders", "staff", "hours")
        ])
        blobs = values.view(np.dtype((np.void, 24))).ravel().tolist()
        conn.executemany("INSERT INTO obs (series_id, period, period_key, vals) "
                         "VALUES (?, ?, ?, ?)",
                         zip(series_id.tolist(), period, key.tolist(), blobs, strict=True))
        rows += table.num_rows
    conn.execute("COMMIT")
    insert = time.perf_counter() - began
    began = time.perf_counter()
    fetched = conn.execute("SELECT series_id, period_key, vals FROM obs "
                           "ORDER BY series_id, period_key").fetchall()
    ids = np.fromiter((r[0] for r in fetched), np.int64, len(fetched))
    matrix = np.frombuffer(b"".join(r[2] for r in fetched), "<f8").reshape(-1, 3)
    read_back = time.perf_counter() - began
    cpu = time.process_time() - cpu_began
    conn.close()
    database.unlink()
    assert ids.size == rows and matrix.shape[0] == rows
    print(json.dumps({"parse": parse, "insert": insert, "read_back": read_back, "rows": rows,
                      "cpu": cpu,
                      "peak_rss_bytes":
                      resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))


def child_loop(series: int, weeks: int, count: int) -> None:
    """statsmodels OLS + get_prediction for ``count`` series (their latest 104 weeks and the
    plan row after them), one after another; print the time as one JSON line."""
    import statsmodels.api as sm

    scenario = Scenario(series, weeks)
    began = time.perf_counter()
    cpu_began = time.process_time()
    width = 0.0
    for i in range(count):
        rows = slice(max(weeks + 1 - 104, 0), weeks + 1)  # the latest 104 actuals
        x = sm.add_constant(np.column_stack([scenario.orders[i, rows], scenario.staff[i, rows]]))
        fit = sm.OLS(scenario.hours[i, rows], x).fit()
        plan = np.array([[1.0, scenario.orders[i, weeks + 1], scenario.staff[i, weeks + 1]]])
        frame = fit.get_prediction(plan).summary_frame(alpha=0.05)
        width += float(frame["obs_ci_upper"].iloc[0] - frame["obs_ci_lower"].iloc[0])
    seconds = time.perf_counter() - began
    cpu = time.process_time() - cpu_began
    print(json.dumps({"seconds": seconds, "cpu": cpu, "series": count,
                      "mean_width": width / count}))


def run_json(arguments: list[str]) -> dict:
    done = subprocess.run([sys.executable, __file__, *arguments], capture_output=True,
                          text=True, check=False, env=child_environment(REPO))
    if done.returncode != 0:
        sys.exit(f"{arguments[0]} failed (exit {done.returncode}):\n{done.stderr}")
    return json.loads(done.stdout.rstrip("\n").split("\n")[-1])


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
    # ``total`` is the pass's stages up to the export; the notify stage (pages) comes after it,
    # so each share is of the two together: the pass as a user waits for it.
    whole = total + timings.get("notify", 0.0)
    print("  stage                        seconds   share")
    for stage, seconds in timings.items():
        if stage == "total":
            continue
        print(f"    {stage:<24} {seconds:>9.2f}   {seconds / whole:>5.1%}")
    print(f"    {'total':<24} {total:>9.2f}   (without notify; process wall "
          f"{figures['wall']:.2f} s, CPU {figures['cpu']:.2f} s)")
    print(f"  whole child process      {figures['whole_process']:>12.2f} s   (interpreter start, "
          "imports, the pass)")
    parts = figures.get("parts") or {}
    if parts:
        rest = total - parts["windows"] - parts["analyse"]
        print(f"  within the pass: reading windows {parts['windows']:.2f} s, analyse_batch "
              f"{parts['analyse']:.2f} s, everything else {rest:.2f} s")
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
    parser.add_argument("--repeat", type=int, default=1, help="runs of the passes, floor, loop")
    parser.add_argument("--loop-series", type=int, help="series the statsmodels loop times "
                        "(scaled to all; default all)")
    parser.add_argument("--no-profile", action="store_true")
    parser.add_argument("--notify", action="store_true", help="write the HTML pages too")
    parser.add_argument("--dir", type=Path, help="keep the workspaces here (default: a temp dir)")
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--as-of", help=argparse.SUPPRESS)
    parser.add_argument("--profile-child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--floor-child", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--loop-child", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child is not None:
        child_pass(args.child, args.as_of, profile=args.profile_child, notify=args.notify)
        return
    if args.floor_child is not None:
        child_floor(args.floor_child, sorted(args.floor_child.glob("feeds/stores/*/weeks_*.csv")))
        return
    if args.loop_child is not None:
        child_loop(args.series, args.weeks, args.loop_child)
        return

    compile_tree(REPO)  # the children import the package as installed: from bytecode
    work = args.dir or Path(tempfile.mkdtemp(prefix="bench_pass_"))
    work.mkdir(parents=True, exist_ok=True)
    pristine = work / "pristine"
    if pristine.exists():
        shutil.rmtree(pristine)
    began = time.perf_counter()
    scenario = Scenario(args.series, args.weeks)
    written = build_workspace(pristine, scenario, args.files)
    size = sum(p.stat().st_size for p in (pristine / "feeds" / "stores" / "inbox").glob("*.csv"))
    print(f"bench_pass: {args.series:,} series x {args.weeks} weeks, 2 predictors, per: store; "
          f"{written['actual']:,} actual + {written['plan']:,} plan rows in {args.files} CSV "
          f"files ({size / 1e6:.0f} MB); planted: {scenario.shifted} slope changes, "
          f"{scenario.noisy} noise increases; data written in {time.perf_counter() - began:.1f} s")
    print(f"machine: {os.cpu_count()} CPUs; python {sys.version.split()[0]}; numpy "
          f"{np.__version__}; notify {'on' if args.notify else 'off'}; load average "
          f"{' '.join(f'{x:.1f}' for x in os.getloadavg())}")
    first_clock = as_of_for(scenario, args.weeks)
    weekly_clock = as_of_for(scenario, args.weeks + 1)
    loop_count = min(args.loop_series or args.series, args.series)
    runs = []
    for run in range(1, args.repeat + 1):
        root = work / "workspace"
        if root.exists():
            shutil.rmtree(root)
        shutil.copytree(pristine, root)
        first, _ = run_child(root, first_clock, profile=False, notify=args.notify)
        show(f"1. first pass (all files), run {run}", first, written["actual"] + written["plan"])
        weekly_rows = deliver_weekly_file(root, scenario)
        weekly, _ = run_child(root, weekly_clock, profile=False, notify=args.notify)
        show(f"2. weekly pass (one new week), run {run}", weekly,
             weekly_rows["actual"] + weekly_rows["plan"])
        if run == 1:
            changed_series_query(root)
        floor = run_json(["--floor-child", str(root)])
        floor_total = floor["parse"] + floor["insert"] + floor["read_back"]
        print(f"\n5. floor, run {run}: pyarrow parse {floor['parse']:.2f} s + SQLite insert "
              f"{floor['insert']:.2f} s + read back {floor['read_back']:.2f} s = "
              f"{floor_total:.2f} s for {floor['rows']:,} rows (peak "
              f"{floor['peak_rss_bytes'] / 1024**2:,.0f} MiB)")
        loop = run_json(["--loop-child", str(loop_count), "--series", str(args.series),
                         "--weeks", str(args.weeks)])
        loop_total = loop["seconds"] * args.series / loop_count
        print(f"6. statsmodels loop, run {run}: {loop['seconds']:.2f} s for {loop_count:,} "
              f"series -> {loop_total:.2f} s for {args.series:,}")
        loop_cpu = loop["cpu"] * args.series / loop_count
        print(f"   CPU time: floor {floor['cpu']:.2f} s, loop {loop_cpu:.2f} s, first pass "
              f"{first['cpu']:.2f} s, weekly pass {weekly['cpu']:.2f} s")
        runs.append({
            "first_cpu_ratio": first["cpu"] / floor["cpu"],
            "weekly_cpu_ratio": weekly["cpu"] / loop_cpu,
            "first": first["timings"]["total"], "weekly": weekly["timings"]["total"],
            "floor": floor_total, "loop": loop_total, "peak": first["peak_rss_bytes"],
            "weekly_peak": weekly["peak_rss_bytes"],
            "first_ratio": first["timings"]["total"] / floor_total,
            "weekly_ratio": weekly["timings"]["total"] / loop_total,
            # The weekly pass less its read of the windows and its analysis, over the loop:
            # what the ratio would be if those two cost nothing.
            "weekly_rest_ratio": (weekly["timings"]["total"] - weekly["parts"]["windows"]
                                  - weekly["parts"]["analyse"]) / loop_total,
        })

    if not args.no_profile:
        profiled_root = work / "workspace_profiled"
        if profiled_root.exists():
            shutil.rmtree(profiled_root)
        shutil.copytree(pristine, profiled_root)
        profiled, profile_text = run_child(profiled_root, first_clock, profile=True,
                                           notify=args.notify)
        print(f"\n4a. the first pass again under cProfile (total "
              f"{profiled['timings']['total']:.2f} s with the profiler's overhead):")
        print(profile_text)
        deliver_weekly_file(profiled_root, scenario)
        profiled, profile_text = run_child(profiled_root, weekly_clock, profile=True,
                                           notify=args.notify)
        print(f"\n4b. the weekly pass again under cProfile (total "
              f"{profiled['timings']['total']:.2f} s with the profiler's overhead):")
        print(profile_text)

    print(f"\nratios, measured side by side (load average now "
          f"{' '.join(f'{x:.1f}' for x in os.getloadavg())}):")
    print("  run   first pass   floor   ratio (<= 2)   weekly pass   statsmodels loop   "
          "ratio (<= 0.3)   peak first / weekly")
    for number, r in enumerate(runs, start=1):
        print(f"  {number:>3}   {r['first']:>8.2f} s {r['floor']:>6.2f} s {r['first_ratio']:>10.2f}"
              f"     {r['weekly']:>9.2f} s {r['loop']:>14.2f} s {r['weekly_ratio']:>13.3f}"
              f"        {r['peak'] / 1024**2:,.0f} / {r['weekly_peak'] / 1024**2:,.0f} MiB")
    print("  the same ratios in CPU time (less sensitive to other jobs on a shared machine):")
    for number, r in enumerate(runs, start=1):
        print(f"  {number:>3}   first pass / floor {r['first_cpu_ratio']:6.2f}   weekly pass / "
              f"loop {r['weekly_cpu_ratio']:6.3f}")
    print(f"  median CPU-time ratios: first pass / floor "
          f"{statistics.median(r['first_cpu_ratio'] for r in runs):.2f}, weekly pass / loop "
          f"{statistics.median(r['weekly_cpu_ratio'] for r in runs):.3f}")
    first_ratio = statistics.median(r["first_ratio"] for r in runs)
    weekly_ratio = statistics.median(r["weekly_ratio"] for r in runs)
    peak = max(r["peak"] for r in runs)
    rest_ratio = statistics.median(r["weekly_rest_ratio"] for r in runs)
    print(f"  first pass / floor         median {first_ratio:6.2f}   target <= "
          f"{TARGET_FLOOR_RATIO}   {'met' if first_ratio <= TARGET_FLOOR_RATIO else 'MISSED'}")
    print(f"  weekly pass / loop         median {weekly_ratio:6.3f}   target <= "
          f"{TARGET_LOOP_RATIO}   {'met' if weekly_ratio <= TARGET_LOOP_RATIO else 'MISSED'}")
    print(f"  the weekly pass without reading windows and analyse_batch / loop  median "
          f"{rest_ratio:6.3f}   (the ratio if those two cost nothing)")
    print(f"  peak memory, first pass    max {peak / 1024**3:6.2f} GiB  target <= 1 GiB   "
          f"{'met' if peak <= TARGET_BYTES else 'MISSED'}")
    if args.dir is None:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
