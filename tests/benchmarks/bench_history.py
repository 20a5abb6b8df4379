"""Benchmark: reading a model's whole scored history, the time and peak memory of each reader.

Run by hand on a quiet machine (CI does not run it; pytest does not collect it):

    nice /work/venv/bin/python tests/benchmarks/bench_history.py [--series 10000] [--weeks 156]
        [--cache DIR] [--before TREE] [--repeat 1]

Data: seeded, one model (``interval_method: calibrated``, ``per: depot``) with s series × w weekly
passes, built through the store's public recording methods as a pass records them: each pass
records one fit per series (its inference with ``residual_df``), one forecast per series for the
next week (lower < point < upper at 95 %, the calibrated interval beside it from week 21 on) and
scores the forecasts of the week before (``record_outcomes``). A sixth of the series have errors
twice as wide as their intervals assume, so there are misses (about 5 % elsewhere). Every fourth
week, each series also gets a second forecast two weeks ahead, so some targets have two issues
(``latest_only=False`` reads more rows than the default). 10,000 × 156 is three years of weekly
passes: about 1.5 M scored forecasts. Building that takes a few minutes; the database is kept
in ``--cache`` (default: the system's temporary folder) and reused by later runs of the same size.

Each reader runs in a fresh subprocess (``python this-file --measure WHAT``), so its peak
resident memory (``resource.getrusage``'s ``ru_maxrss``) is that call's own; the process's
resident memory just before the call (imports, store opened) is printed beside it:

- ``scored``: ``Store.scored_forecasts(model)``, the last issue per target (the pages, the audit);
- ``every``: ``Store.scored_forecasts(model, latest_only=False)`` (``audit --by-lead``);
- ``calibrations``: ``calibrations(store.scored_forecasts(model), series, level)`` for every
  series, as the pass's ``_calibrated`` calls it each week for a calibrated model;
- ``load_model``: the pages' ``monitor.notify.series.load_model`` (which also reads the forecast
  records of the latest 26 passes, the latest fits and the open findings);
- ``audit``: ``monitor.audit.audit_models(model, last=13)``, what ``plumbline audit --last 13``
  computes per model (the read, then each series' latest 13).

``--before TREE``: also run every reader with the package imported from TREE (the package of an
earlier commit, e.g. ``mkdir /tmp/before && git archive COMMIT monitor | tar -x -C /tmp/before``)
on the same database, and print the two side by side with the ratios. Time is wall-clock, best
of ``--repeat`` subprocesses; memory the largest peak among them.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve()
TREE = HERE.parents[2]
MODEL = "depot_hours"
LEVEL = 0.95
T_95 = 2.0  # roughly the t quantile of a window of 52 rows; the data need not be exact
FIRST_WEEK = date(2023, 1, 1)
READERS = ("scored", "every", "calibrations", "load_model", "audit")

CONFIG = """\
database: {database}
feeds:
  depots:
    inbox: feeds/depots/inbox
    period: week_ending
    cadence: 7d
    columns: [week_ending, depot, hours, orders]
models:
  {model}:
    feed: depots
    response: hours
    predictors: [orders]
    per: depot
    level: {level}
    interval_method: calibrated
"""


def _as_of(week: int) -> datetime:
    return datetime.combine(FIRST_WEEK + timedelta(days=7 * week + 1),
                            datetime.min.time(), tzinfo=UTC) + timedelta(hours=6)


def _period(week: int) -> tuple[str, int]:
    from monitor.store import date_period_key

    day = FIRST_WEEK + timedelta(days=7 * week)
    return day.isoformat(), date_period_key(day)


def build(path: Path, series: int, weeks: int) -> None:
    """The database: ``weeks`` passes over ``series`` series, through the store's API."""
    import numpy as np

    from monitor.store import FitRow, ForecastRow, Store
    from monitor.vocabulary import Outcome, classify_outcome

    rng = np.random.default_rng(20261203)
    names = [f"D{i:05d}" for i in range(series)]
    sigma = rng.uniform(5.0, 15.0, series)
    wide = np.arange(series) % 6 == 0  # errors twice what the intervals assume
    started = time.perf_counter()
    with Store.open(path) as store:
        store.record_model_version(MODEL, signature="v1", config={"response": "hours"},
                                   created_at=_as_of(0))
        due: dict[int, list[tuple[int, int, float, float, float]]] = {}  # target week → rows
        for week in range(weeks):
            at = _as_of(week)
            pass_id = store.record_pass(as_of=at, started_at=at).id
            # Score what targeted this week.
            rows = due.pop(week, [])
            if rows:
                which = np.array([r[1] for r in rows])
                noise = rng.normal(0.0, 1.0, len(rows)) * sigma[which] * np.where(
                    wide[which], 2.0, 1.0)
                store.record_outcomes(pass_id, [
                    Outcome(fid, actual := float(point + e),
                            classify_outcome(actual, lower, upper))
                    for (fid, _i, point, lower, upper), e in zip(rows, noise, strict=True)])
            period, key = _period(week)
            first, first_key = _period(max(0, week - 51))
            n = min(week + 1, 52)
            fits = [FitRow(
                model=MODEL, version=1, series=name, n=max(n, 3), estimable=True,
                window_first=first, window_first_key=first_key, window_last=period,
                window_last_key=key,
                coefficients={"intercept": {"estimate": 20.0}, "orders": {"estimate": 0.4}},
                inference={"r_squared": 0.8, "residual_std_error": float(sigma[i]),
                           "residual_df": max(n, 3) - 2, "level": LEVEL},
                diagnostics={"durbin_watson": 2.0},
            ) for i, name in enumerate(names)]
            fit_ids = store.record_fits(pass_id, fits)
            leads = (1, 2) if week % 4 == 0 else (1,)
            forecasts: list[ForecastRow] = []
            meta: list[tuple[int, int, float, float, float]] = []
            for lead in leads:
                target, target_key = _period(week + lead)
                orders = rng.normal(400.0, 40.0, series)
                point = 20.0 + 0.4 * orders
                half = T_95 * sigma * (1.0 + 0.05 * rng.random(series))
                for i, name in enumerate(names):
                    p, h = float(point[i]), float(half[i])
                    cal = (p - 1.1 * h, p + 1.1 * h) if week >= 20 else (None, None)
                    forecasts.append(ForecastRow(
                        model=MODEL, feed="depots", series=name, target_period=target,
                        target_period_key=target_key, issued_at=at, lead=lead, point=p,
                        lower=p - h, upper=p + h, level=LEVEL, mean_lower=p - h / 4,
                        mean_upper=p + h / 4, leverage=0.03, fit_id=fit_ids[i], version=1,
                        inputs={"orders": float(orders[i])}, calibrated_lower=cal[0],
                        calibrated_upper=cal[1], calibrated_factor=None if week < 20 else 1.1,
                    ))
                    meta.append((week + lead, i, p, p - h, p + h))
            ids = store.record_forecasts(pass_id, forecasts).ids
            for fid, (target_week, i, p, lo, hi) in zip(ids, meta, strict=True):
                due.setdefault(target_week, []).append((fid, i, p, lo, hi))
            store.finish_pass(pass_id, finished_at=at)
            if week % 26 == 25:
                print(f"  built {week + 1} of {weeks} weeks "
                      f"({time.perf_counter() - started:.0f} s)", flush=True)
    print(f"  built in {time.perf_counter() - started:.0f} s", flush=True)


def _rss_kib() -> int:
    with open("/proc/self/statm") as statm:
        return int(statm.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") // 1024


def measure(what: str, database: Path, config_path: Path, series: int) -> dict[str, Any]:
    """One reader, timed, in this (fresh) process."""
    from monitor.config import load_config
    from monitor.store import Store

    config = load_config(config_path)
    with Store.open(database, readonly=True) as store:
        if what == "calibrations":
            from monitor.calibration import calibrations
        if what == "load_model":
            from monitor.notify.series import load_model
        if what == "audit":
            from monitor.audit import audit_models
        before = _rss_kib()
        started = time.perf_counter()
        if what == "scored":
            rows = len(store.scored_forecasts(MODEL))
        elif what == "every":
            rows = len(store.scored_forecasts(MODEL, latest_only=False))
        elif what == "calibrations":
            wanted = [f"D{i:05d}" for i in range(series)]
            factors = calibrations(store.scored_forecasts(MODEL), wanted, LEVEL)
            rows = sum(1 for c in factors.values() if c.factor is not None)
        elif what == "audit":
            rows = len(audit_models(store, config, model=MODEL, last=13))
        else:
            history = load_model(store, config, MODEL)
            rows = len(history.scored)
        seconds = time.perf_counter() - started
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"seconds": seconds, "peak_mib": peak / 1024, "before_mib": before / 1024,
            "rows": rows}


def _run(tree: Path, what: str, database: Path, config: Path, series: int,
         repeat: int) -> dict[str, Any]:
    best: dict[str, Any] | None = None
    for _ in range(repeat):
        out = subprocess.run(
            [sys.executable, str(HERE), "--measure", what, "--tree", str(tree),
             "--db", str(database), "--config", str(config), "--series", str(series)],
            check=True, capture_output=True, text=True)
        got = json.loads(out.stdout.strip().splitlines()[-1])
        if best is None:
            best = got
        else:
            best["seconds"] = min(best["seconds"], got["seconds"])
            best["peak_mib"] = max(best["peak_mib"], got["peak_mib"])
    assert best is not None
    return best


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--weeks", type=int, default=156)
    parser.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()))
    parser.add_argument("--before", type=Path, help="a source tree to compare with")
    parser.add_argument("--repeat", type=int, default=1, help="subprocesses per reader")
    parser.add_argument("--only", choices=READERS, action="append", help="run only these")
    parser.add_argument("--measure", choices=READERS, help=argparse.SUPPRESS)
    parser.add_argument("--tree", type=Path, default=TREE, help=argparse.SUPPRESS)
    parser.add_argument("--db", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--config", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    sys.path.insert(0, str(args.tree))
    if args.measure:
        print(json.dumps(measure(args.measure, args.db, args.config, args.series)))
        return 0

    folder = args.cache / f"plumbline-bench-history-{args.series}x{args.weeks}"
    folder.mkdir(parents=True, exist_ok=True)
    database = folder / "plumbline.sqlite"
    config = folder / "plumbline.yaml"
    config.write_text(CONFIG.format(database=database, model=MODEL, level=LEVEL),
                      encoding="utf-8")
    done = folder / "built"
    if not done.exists():
        for stale in folder.glob("plumbline.sqlite*"):
            stale.unlink()
        print(f"building {args.series} series × {args.weeks} weeks in {database}", flush=True)
        build(database, args.series, args.weeks)
        done.write_text("ok\n", encoding="utf-8")
    print(f"database: {database} ({database.stat().st_size / 2**20:.0f} MiB)")

    print(f"{'reader':<14}{'rows':>10}  {'after s':>8} {'peak MiB':>9} {'(before call)':>14}"
          + (f"  {'before s':>8} {'peak MiB':>9}  {'time ×':>7} {'peak ×':>7}"
             if args.before else ""))
    for what in args.only or READERS:
        after = _run(args.tree, what, database, config, args.series, args.repeat)
        line = (f"{what:<14}{after['rows']:>10}  {after['seconds']:>8.2f} "
                f"{after['peak_mib']:>9.0f} {after['before_mib']:>14.0f}")
        if args.before:
            old = _run(args.before, what, database, config, args.series, args.repeat)
            assert old["rows"] == after["rows"], (old, after)
            line += (f"  {old['seconds']:>8.2f} {old['peak_mib']:>9.0f}  "
                     f"{old['seconds'] / after['seconds']:>7.2f} "
                     f"{old['peak_mib'] / after['peak_mib']:>7.2f}")
        print(line, flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
