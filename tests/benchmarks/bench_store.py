"""Benchmark: bulk observation writes and window reads, and ingest of one large CSV.

Run by hand on a quiet machine (CI does not run it; pytest does not collect it):

    .venv/bin/python tests/benchmarks/bench_store.py [--series 10000] [--rows 150]

Data: seeded, s series × n weekly rows of a response and two predictors (1.5 M rows by default).

1. Writes: ``Store.insert_observations`` of all rows in one transaction, beside the same rows
   written as JSON text (``{"y": …}``) into a table of the same shape with the same indexes (the
   layout the store does not use), with plain ``executemany``. Then the same rows again
   (identical re-sends of known keys, the path a re-sent history takes).
2. Reads: ``Store.windows`` of the latest 104 rows of every series up to a period, beside the
   same window read from the JSON table with ``json_extract`` and ``row_number()``.
3. Ingest: one CSV of all rows dropped into an inbox, taken by ``ingest_feed`` (read, hash,
   parse, commit, move): rows per second, and the parse alone.

Timings are wall-clock, best of ``--repeat`` for the reads. The last lines are the ratios.
"""

from __future__ import annotations

import argparse
import shutil
import sqlite3
import sys
import tempfile
import time
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from monitor.ingest import IngestSpec, ingest_feed
from monitor.ingest.parse import parse_csv
from monitor.store import FileOutcome, ObservationRow, Store, date_period_key

COLUMNS = ("pick_hours", "order_lines", "pallets")
T0 = datetime(2024, 1, 1, tzinfo=UTC)


def make_rows(series: int, rows: int) -> list[ObservationRow]:
    rng = np.random.default_rng(20240101)
    first = date(2022, 1, 2)
    periods = [(first + timedelta(weeks=j)) for j in range(rows)]
    labels = [(p.isoformat(), date_period_key(p)) for p in periods]
    out: list[ObservationRow] = []
    for i in range(series):
        y = rng.normal(100, 10, rows).round(3)
        x = rng.normal(400, 40, rows).round(2)
        z = rng.normal(20, 2, rows).round(2)
        name = f"D{i:05d}"
        out.extend(
            ObservationRow(name, labels[j][0], labels[j][1], False,
                           (float(y[j]), float(x[j]), float(z[j])), j + 2)
            for j in range(rows)
        )  # fmt: skip
    return out


def json_table(path: Path, rows: list[ObservationRow]) -> tuple[sqlite3.Connection, float]:
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")
    conn.execute(
        "CREATE TABLE obs (id INTEGER PRIMARY KEY, feed TEXT, series_key TEXT, period TEXT, "
        "period_key INTEGER, is_plan INTEGER, revision INTEGER, current INTEGER, vals TEXT, "
        "file_id INTEGER, line INTEGER)"
    )
    for plan in (0, 1):
        conn.execute(
            f"CREATE UNIQUE INDEX obs_{plan} ON obs(feed, series_key, period_key) "
            f"WHERE is_plan = {plan} AND current = 1"
        )
    begun = time.perf_counter()
    template = '{"pick_hours":%r,"order_lines":%r,"pallets":%r}'
    params = [
        ("depot", r.series, r.period, r.period_key, 0, 0, 1, template % r.values, 1, r.line)
        for r in rows
    ]
    conn.execute("BEGIN")
    conn.executemany("INSERT INTO obs VALUES (NULL, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", params)
    conn.execute("COMMIT")
    return conn, time.perf_counter() - begun


def json_window(conn: sqlite3.Connection, last: int, up_to: int) -> int:
    rows = conn.execute(
        "SELECT series_key, period_key, y, x, z FROM (SELECT series_key, period_key, "
        "json_extract(vals, '$.pick_hours') AS y, json_extract(vals, '$.order_lines') AS x, "
        "json_extract(vals, '$.pallets') AS z, row_number() OVER (PARTITION BY series_key "
        "ORDER BY period_key DESC) AS newest FROM obs WHERE feed = 'depot' AND is_plan = 0 "
        "AND current = 1 AND period_key <= ?) WHERE newest <= ? ORDER BY series_key, period_key",
        (up_to, last),
    ).fetchall()
    series, keys, y, x, z = zip(*rows, strict=True)
    # the same shaping Store.windows does: series boundaries, keys and a (rows, 3) array
    names = np.array(series, dtype=object)
    starts = np.flatnonzero(names[1:] != names[:-1]) + 1
    period_key = np.array(keys, dtype=np.int64)
    values = np.ascontiguousarray(np.array([y, x, z], dtype=np.float64).T)
    assert period_key.size == values.shape[0] and starts.size < values.shape[0]
    return int(values.shape[0])


def best(repeat: int, work: object) -> float:
    times = []
    for _ in range(repeat):
        begun = time.perf_counter()
        work()  # type: ignore[operator]
        times.append(time.perf_counter() - begun)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--rows", type=int, default=150)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    workdir = Path(tempfile.mkdtemp(prefix="bench_store_"))
    try:
        rows = make_rows(args.series, args.rows)
        total = len(rows)
        print(f"{args.series} series x {args.rows} rows = {total:,} observation rows")

        store = Store.open(workdir / "store.sqlite")
        file_id = store.record_file(
            feed="depot", name="history.csv", sha256="h", size=1, received_at=T0,
            outcome=FileOutcome.ARCHIVED, stored_path=workdir / "history.csv",
        ).id  # fmt: skip
        begun = time.perf_counter()
        store.insert_observations("depot", file_id, COLUMNS, rows)
        store_write = time.perf_counter() - begun
        again_id = store.record_file(
            feed="depot", name="again.csv", sha256="a", size=1, received_at=T0,
            outcome=FileOutcome.ARCHIVED, stored_path=workdir / "again.csv",
        ).id  # fmt: skip
        begun = time.perf_counter()
        counts = store.insert_observations("depot", again_id, COLUMNS, rows)
        store_resend = time.perf_counter() - begun
        assert counts.unchanged == total
        conn, json_write = json_table(workdir / "json.sqlite", rows)

        up_to = rows[args.rows - 1].period_key
        last = min(104, args.rows)
        store_read = best(args.repeat, lambda: store.windows("depot", COLUMNS, last=last,
                                                             up_to_key=up_to))  # fmt: skip
        json_read = best(args.repeat, lambda: json_window(conn, last, up_to))
        windows = store.windows("depot", COLUMNS, last=last, up_to_key=up_to)
        assert windows.values.shape == (args.series * last, 3)
        assert json_window(conn, last, up_to) == args.series * last
        store.close()
        conn.close()

        inbox = workdir / "feed" / "inbox"
        inbox.mkdir(parents=True)
        with (inbox / "history.csv").open("w", encoding="utf-8") as handle:
            handle.write("week_ending,depot,pick_hours,order_lines,pallets\n")
            handle.writelines(
                f"{r.period},{r.series},{r.values[0]!r},{r.values[1]!r},{r.values[2]!r}\n"
                for r in rows
            )
        del rows
        size_mb = (inbox / "history.csv").stat().st_size / 1e6
        spec = IngestSpec(
            feed="depot", inbox=inbox, archive=workdir / "feed" / "archive",
            rejected=workdir / "feed" / "rejected", period_column="week_ending",
            per_column="depot", responses=("pick_hours",), required=("order_lines", "pallets"),
        )  # fmt: skip
        data = (inbox / "history.csv").read_bytes()
        begun = time.perf_counter()
        parsed = parse_csv(data, spec.plan)
        parse_time = time.perf_counter() - begun
        assert len(parsed.rows) == total
        del parsed, data
        with Store.open(workdir / "ingest.sqlite") as fresh:
            begun = time.perf_counter()
            result = ingest_feed(fresh, spec, real_clock=lambda: time.time() + 3600)
            ingest_time = time.perf_counter() - begun
        assert result.reports[0].rows_ingested == total

        print()
        print(f"{'':34}{'seconds':>10}{'rows/s':>14}")
        for label, seconds in (
            ("write, Store (packed float64)", store_write),
            ("write, JSON text baseline", json_write),
            ("re-send of known keys, Store", store_resend),
            (f"window last {last}, Store", store_read),
            (f"window last {last}, JSON baseline", json_read),
            ("parse CSV only", parse_time),
            (f"ingest_feed, one {size_mb:.0f} MB CSV", ingest_time),
        ):
            print(f"{label:34}{seconds:>10.2f}{total / seconds:>14,.0f}")
        print()
        print(f"write_ratio_json_over_store: {json_write / store_write:.2f}")
        print(f"read_ratio_json_over_store: {json_read / store_read:.2f}")
        print(f"ingest_rows_per_second: {total / ingest_time:,.0f}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
