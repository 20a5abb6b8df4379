"""The database, on real SQLite files in tmp_path."""

from __future__ import annotations

import re
import sqlite3
import threading
import time
from dataclasses import replace
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from _sqlplan import plan_of_statement
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from monitor.store import (
    MIGRATIONS,
    SCHEMA_VERSION,
    BaselineRow,
    FileOutcome,
    FitRow,
    ForecastRow,
    ObservationBatch,
    ObservationRow,
    Store,
    StoreError,
    apply_migrations,
    date_period_key,
    parse_utc,
    period_key_date,
    utc_text,
)
from monitor.vocabulary import (
    Finding,
    FindingKind,
    FindingState,
    Outcome,
    OutcomeKind,
    Severity,
    classify_outcome,
)

T0 = datetime(2024, 3, 4, 8, 0, tzinfo=UTC)
COLUMNS = ("pick_hours", "order_lines")


@pytest.fixture
def store(tmp_path: Path) -> Store:
    opened = Store.open(tmp_path / "state" / "plumbline.sqlite")
    yield opened  # type: ignore[misc]
    opened.close()


def week(n: int) -> tuple[str, int]:
    day = date(2024, 1, 7) + timedelta(weeks=n)
    return day.isoformat(), date_period_key(day)


def a_file(store: Store, name: str = "w.csv", sha: str | None = None) -> int:
    record = store.record_file(
        feed="depot", name=name, sha256=sha or name, size=10, received_at=T0,
        outcome=FileOutcome.ARCHIVED, stored_path=f"/archive/{name}",
    )
    return record.id


def actual(series: str | None, n: int, y: float, x: float, line: int = 2) -> ObservationRow:
    period, key = week(n)
    return ObservationRow(series, period, key, False, (y, x), line)


def plan(series: str | None, n: int, x: float, line: int = 2) -> ObservationRow:
    period, key = week(n)
    return ObservationRow(series, period, key, True, (None, x), line)


# ----------------------------------------------------------------------------- opening


def test_open_creates_folder_and_sets_the_connection_up(tmp_path: Path) -> None:
    path = tmp_path / "deep" / "folder" / "db.sqlite"
    with Store.open(path) as store:
        conn = store._conn
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
        assert conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        assert store.schema_version == SCHEMA_VERSION == MIGRATIONS[-1].version
    assert path.exists()
    with Store.open(path) as again:  # opening again migrates nothing and keeps the version
        assert again.schema_version == SCHEMA_VERSION


def test_a_newer_or_foreign_database_is_refused(tmp_path: Path) -> None:
    newer = tmp_path / "newer.sqlite"
    Store.open(newer).close()
    conn = sqlite3.connect(newer)
    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    conn.close()
    with pytest.raises(StoreError, match="newer than this Plumbline"):
        Store.open(newer)
    foreign = tmp_path / "foreign.sqlite"
    conn = sqlite3.connect(foreign)
    conn.execute("CREATE TABLE t (x)")
    conn.close()
    with pytest.raises(StoreError, match="not a Plumbline database"):
        Store.open(foreign)


def test_readonly_open_never_creates_or_migrates(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match="no database"):
        Store.open(tmp_path / "absent.sqlite", readonly=True)
    assert not (tmp_path / "absent.sqlite").exists()
    old = tmp_path / "old.sqlite"
    conn = sqlite3.connect(old, isolation_level=None)
    apply_migrations(conn, 1)
    conn.close()
    with pytest.raises(StoreError, match="needs migrating"):
        Store.open(old, readonly=True)
    with Store.open(old):
        pass
    with Store.open(old, readonly=True) as reader:
        assert reader.latest_pass() is None
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            reader.record_pass(as_of=T0, started_at=T0)


def test_migration_5_carries_acknowledgements_over_as_notes(tmp_path: Path) -> None:
    # A version-3 database (before owners' notes) with one acknowledged finding and one not.
    path = tmp_path / "v3.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    apply_migrations(conn, 3)
    conn.execute("INSERT INTO passes (as_of, started_at, status) VALUES (?, ?, 'finished')",
                 (utc_text(T0), utc_text(T0)))
    for acknowledged in (utc_text(T0 + timedelta(hours=2)), None):
        conn.execute(
            "INSERT INTO findings (model, series_key, feed, kind, severity, state, message, "
            "action, first_pass_id, last_pass_id, created_at, updated_at, acknowledged_at) "
            "VALUES ('pick', ?, NULL, 'weak_fit', 'notice', 'ongoing', 'm', 'a', 1, 1, ?, ?, ?)",
            ("a" if acknowledged else "b", utc_text(T0), utc_text(T0), acknowledged),
        )
    conn.close()
    with Store.open(path) as store:
        first, second = store.get_finding(1), store.get_finding(2)
        assert first is not None and second is not None
        assert first.noted and first.note_count == 1 and first.note is not None
        assert first.note.at == T0 + timedelta(hours=2)
        assert "acknowledged" in first.note.text and first.note.by == "unknown"
        assert not second.noted and second.note is None


def test_migration_from_version_1_keeps_the_data(tmp_path: Path) -> None:
    path = tmp_path / "v1.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    apply_migrations(conn, 1)
    assert conn.execute("PRAGMA user_version").fetchone()[0] == 1
    tables = {row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert "observations" in tables and "forecasts" not in tables and "findings" not in tables
    # Rows as a version-1 database holds them.
    conn.execute("INSERT INTO passes (as_of, started_at, status) VALUES (?, ?, 'finished')",
                 (utc_text(T0), utc_text(T0)))
    conn.execute(
        "INSERT INTO files (feed, name, sha256, size, received_at, pass_id, outcome, stored_path, "
        "moved_at) VALUES ('depot', 'w.csv', 'abc', 3, ?, 1, 'archived', '/a/w.csv', ?)",
        (utc_text(T0), utc_text(T0)),
    )
    conn.execute("INSERT INTO series (feed, key) VALUES ('depot', 'north')")
    conn.execute("INSERT INTO feed_columns VALUES ('depot', 0, 'pick_hours')")
    conn.execute("INSERT INTO periods VALUES ('depot', ?, ?)", (week(0)[1], week(0)[0]))
    conn.execute(
        "INSERT INTO observations (series_id, period, period_key, is_plan, revision, current, "
        "vals, file_id, line) VALUES (1, ?, ?, 0, 0, 1, ?, 1, 2)",
        (week(0)[0], week(0)[1], np.array([41.5]).astype("<f8").tobytes()),
    )
    conn.close()
    with Store.open(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        assert store.file_by_sha256("abc") is not None
        # migration 6: duplicates per feed, and a random identity of the database
        assert store.file_by_sha256("abc", "depot") is not None
        assert store.file_by_sha256("abc", "other") is None
        assert re.fullmatch(r"[0-9a-f]{32}", store.identity)
        # migration 7: outcomes found by the pass that scored them
        assert ("outcomes_by_pass",) in store._conn.execute(
            "SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = 'outcomes'")
        windows = store.windows("depot", ["pick_hours"])
        assert windows.series == ("north",)
        assert windows.values.tolist() == [[41.5]]
        assert windows.period_labels == {week(0)[1]: "2024-01-07"}
        # the tables of later versions work on the migrated file
        version, _ = store.record_model_version("m", signature="s", config={}, created_at=T0)
        assert store.record_fits(1, [FitRow("m", version.version, "north", 1, False, "few")])
        assert store.list_findings() == []


def test_times_are_utc_fixed_width_and_naive_ones_refused() -> None:
    berlin = datetime(2024, 3, 31, 3, 30, tzinfo=ZoneInfo("Europe/Berlin"))
    text = utc_text(berlin)
    assert text == "2024-03-31T01:30:00.000000Z"
    assert parse_utc(text) == berlin
    assert len(utc_text(T0)) == len(text)
    with pytest.raises(ValueError, match="no time zone"):
        utc_text(datetime(2024, 1, 1))
    assert period_key_date(date_period_key(date(2024, 2, 29))) == date(2024, 2, 29)
    assert date_period_key(date(1970, 1, 2)) == 1


def test_transaction_rolls_back_and_nests_as_savepoints(store: Store) -> None:
    with pytest.raises(RuntimeError), store.transaction():
        store.record_pass(as_of=T0, started_at=T0)
        raise RuntimeError("boom")
    assert store.latest_pass() is None
    with store.transaction():
        store.record_pass(as_of=T0, started_at=T0)
        with pytest.raises(RuntimeError), store.transaction():
            a_file(store)
            raise RuntimeError("inner")
    assert store.latest_pass() is not None
    assert store.list_files() == []


# ----------------------------------------------------------------------------- observations


def test_revisions_are_kept_beside_the_first_and_identical_resends_are_not(store: Store) -> None:
    first = a_file(store, "a.csv")
    counts = store.insert_observations(
        "depot", first, COLUMNS, [actual("north", 0, 40.0, 400.0), actual("north", 1, 42.0, 410.0)]
    )
    assert (counts.new_actuals, counts.revisions, counts.unchanged) == (2, 0, 0)
    second = a_file(store, "b.csv")
    counts = store.insert_observations(
        "depot", second, COLUMNS, [actual("north", 0, 40.0, 400.0), actual("north", 1, 44.0, 410.0)]
    )
    assert (counts.new_actuals, counts.revisions, counts.unchanged) == (0, 1, 1)
    assert [(r.series, r.period, r.revision) for r in counts.revised] == [("north", week(1)[0], 1)]
    history = store.observation_history("depot", "north")
    assert [(h.period, h.revision, h.current, h.values["pick_hours"]) for h in history] == [
        (week(0)[0], 0, True, 40.0),
        (week(1)[0], 0, False, 42.0),
        (week(1)[0], 1, True, 44.0),
    ]
    assert store.windows("depot", COLUMNS).values[:, 0].tolist() == [40.0, 44.0]
    file_b = store.get_file(second)
    assert file_b is not None
    assert (file_b.rows_ingested, file_b.revisions, file_b.unchanged) == (1, 1, 1)


def test_a_batch_with_a_key_twice_or_a_non_finite_value_writes_nothing(store: Store) -> None:
    file_id = a_file(store)
    with pytest.raises(ValueError, match="given twice"):
        store.insert_observations(
            "depot", file_id, COLUMNS, [actual("n", 0, 1.0, 2.0), actual("n", 0, 1.0, 3.0)]
        )
    with pytest.raises(ValueError, match="not a finite number"):
        store.insert_observations(
            "depot", file_id, COLUMNS, [actual("n", 1, 1.0, 2.0), actual("n", 2, float("nan"), 3)]
        )
    assert store.observation_history("depot", "n") == []


def test_plan_rows_wait_for_a_forecast_until_answered(store: Store) -> None:
    store.record_pass(as_of=T0, started_at=T0)
    file_id = a_file(store, "a.csv")
    store.insert_observations("depot", file_id, COLUMNS, [actual(None, 0, 40.0, 400.0),
                                                          plan(None, 1, 405.0)])
    awaiting = store.plan_rows_awaiting_forecast("depot", "pick", ["order_lines"])
    assert awaiting.series == (None,)
    assert awaiting.values.tolist() == [[405.0]]
    plan_id = int(awaiting.observation_id[0])
    forecast = ForecastRow(
        model="pick", feed="depot", series=None, target_period=week(1)[0],
        target_period_key=week(1)[1], issued_at=T0, lead=1, point=41.0, lower=38.0, upper=44.0,
        level=0.95, observation_id=plan_id,
    )
    store.record_forecasts(1, [forecast])
    assert len(store.plan_rows_awaiting_forecast("depot", "pick", ["order_lines"]).series) == 0
    # another model on the same feed still has it to do
    assert len(store.plan_rows_awaiting_forecast("depot", "other", ["order_lines"]).series) == 1
    # a re-sent plan asks again (a new issue, a shorter lead later on)
    store.insert_observations("depot", a_file(store, "b.csv"), COLUMNS, [plan(None, 1, 405.0)])
    again = store.plan_rows_awaiting_forecast("depot", "pick", ["order_lines"])
    assert len(again.series) == 1 and int(again.observation_id[0]) != plan_id
    # the actual answers it; a plan sent after its actual is stored but never awaited
    store.insert_observations("depot", a_file(store, "c.csv"), COLUMNS, [actual(None, 1, 43, 405)])
    store.insert_observations("depot", a_file(store, "d.csv"), COLUMNS, [plan(None, 1, 405.0)])
    assert len(store.plan_rows_awaiting_forecast("depot", "other", ["order_lines"]).series) == 0
    plans = [h for h in store.observation_history("depot", None) if h.is_plan]
    assert len(plans) == 3 and not any(h.current for h in plans)


def test_windows_take_the_latest_rows_per_series_in_one_read(store: Store) -> None:
    file_id = a_file(store)
    rows = [actual(s, n, float(10 * i + n), float(n)) for i, s in enumerate(["b", "a", "c"])
            for n in range(12)]
    rows.append(ObservationRow("a", week(12)[0], week(12)[1], False, (None, 5.0), 2))
    store.insert_observations("depot", file_id, COLUMNS, rows)
    up_to = week(9)[1]
    windows = store.windows("depot", COLUMNS, last=4, up_to_key=up_to)
    assert windows.series == ("a", "b", "c")  # sorted by name, not by arrival
    assert windows.lengths().tolist() == [4, 4, 4]
    assert windows.values[windows.rows_of(0), 0].tolist() == [16.0, 17.0, 18.0, 19.0]
    assert windows.values[windows.rows_of(1), 0].tolist() == [6.0, 7.0, 8.0, 9.0]
    assert windows.period_key[windows.rows_of(2)].max() == up_to
    assert windows.period_labels[up_to] == week(9)[0]
    # the row without a response counts only when the response is not required
    everything = store.windows("depot", COLUMNS, series=["a"])
    assert everything.lengths().tolist() == [12]
    with_x_only = store.windows("depot", COLUMNS, series=["a"], required=["order_lines"])
    assert with_x_only.lengths().tolist() == [13]
    assert np.isnan(with_x_only.values[-1, 0])
    stacked, mask, keys = store.windows("depot", COLUMNS, last=4).stack()
    assert stacked.shape == (3, 4, 2) and mask.all()
    assert keys[0, -1] == week(11)[1]


def test_columns_in_another_order_or_added_later_line_up(store: Store) -> None:
    store.insert_observations("depot", a_file(store, "a.csv"), COLUMNS, [actual("n", 0, 40, 400)])
    store.insert_observations(
        "depot", a_file(store, "b.csv"), ("pallets", "order_lines", "pick_hours"),
        [ObservationRow("n", week(1)[0], week(1)[1], False, (7.0, 410.0, 42.0), 2)],
    )
    assert store.feed_columns("depot") == ["pick_hours", "order_lines", "pallets"]
    windows = store.windows("depot", ("order_lines", "pick_hours", "pallets"), required=[])
    assert windows.values[0, :2].tolist() == [400.0, 40.0] and np.isnan(windows.values[0, 2])
    assert windows.values[1].tolist() == [410.0, 42.0, 7.0]
    # re-sending week 0 with the new column empty is the same row, not a revision
    counts = store.insert_observations(
        "depot", a_file(store, "c.csv"), ("pallets", "order_lines", "pick_hours"),
        [ObservationRow("n", week(0)[0], week(0)[1], False, (None, 400.0, 40.0), 2)],
    )
    assert counts.unchanged == 1 and counts.revisions == 0
    summary = store.feed_summary("depot")
    assert (summary.actual_rows, summary.series, summary.latest_period) == (2, 1, week(1)[0])
    # what the pass's stale_feed check reads, from the index alone; plan rows do not count
    store.insert_observations("depot", a_file(store, "d.csv"), COLUMNS, [plan("n", 5, 400.0)])
    assert store.latest_actual_period("depot") == (week(1)[1], week(1)[0])
    assert store.latest_actual_period("another") is None


def test_stored_rows_cannot_be_changed_or_deleted(store: Store) -> None:
    store.insert_observations("depot", a_file(store), COLUMNS, [actual("n", 0, 40.0, 400.0)])
    conn = store._conn
    for statement in (
        "UPDATE observations SET vals = x'00'",
        "UPDATE observations SET period_key = 1",
        "DELETE FROM observations",
        "DELETE FROM files",
    ):
        with pytest.raises(sqlite3.IntegrityError):
            conn.execute(statement)
    assert len(store.observation_history("depot", "n")) == 1


def as_batch(rows: list[ObservationRow], width: int) -> ObservationBatch:
    """The same rows as the arrays ingest hands over (series and periods by first appearance)."""
    series: dict[str | None, int] = {}
    periods: dict[tuple[str, int], int] = {}
    for row in rows:
        series.setdefault(row.series, len(series))
        periods.setdefault((row.period, row.period_key), len(periods))
    return ObservationBatch(
        series=tuple(series),
        series_index=np.array([series[r.series] for r in rows], dtype=np.int64),
        periods=tuple(p for p, _ in periods),
        period_keys=tuple(k for _, k in periods),
        period_index=np.array([periods[(r.period, r.period_key)] for r in rows], dtype=np.int64),
        is_plan=np.array([r.is_plan for r in rows], dtype=bool),
        values=np.array([[np.nan if v is None else v for v in r.values] for r in rows],
                        dtype=np.float64).reshape(len(rows), width),
        line=np.array([r.line for r in rows], dtype=np.int64),
    )


def stored_state(store: Store) -> list[list[tuple[object, ...]]]:
    conn = store._conn
    return [
        conn.execute(f"SELECT * FROM {table} ORDER BY 1, 2").fetchall()
        for table in ("observations", "series", "periods", "feed_columns", "files")
    ]


# Files of rows: a few series (the unnamed one too), weeks, plans and actuals, values from a
# small set so that re-sends, revisions and answered plans all happen; the columns of a file
# are one of three layouts, so the registry grows and rows are padded.
LAYOUTS = [("pick_hours", "order_lines"), ("order_lines", "pick_hours", "pallets"),
           ("pallets", "pick_hours", "order_lines", "staff")]
ROW = st.tuples(st.sampled_from([None, "a", "b"]), st.integers(0, 3), st.booleans(),
                st.sampled_from([1.0, 2.0, -0.0, 0.0]), st.sampled_from([3.0, 4.0]),
                st.sampled_from([None, 5.0]))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.integers(0, 2), st.lists(ROW, max_size=8)), max_size=5))
# A plan and the actual of one key in one file (both stay current), then the same actual again:
# an unchanged re-send retires nothing, not even the plan it would have answered.
@example([(0, [("a", 0, True, 1.0, 3.0, None), ("a", 0, False, 1.0, 3.0, None)]),
          (0, [("a", 0, False, 1.0, 3.0, None), ("a", 1, True, 1.0, 3.0, None)]),
          (1, [("a", 0, True, 1.0, 4.0, 5.0), ("a", 1, False, 2.0, 3.0, 5.0)])])
def test_rows_given_as_arrays_follow_the_row_by_row_rules(
    files: list[tuple[int, list[tuple[str | None, int, bool, float, float, float | None]]]],
) -> None:
    # The array path of insert_observations (what ingest uses) against the loop over
    # ObservationRow objects: the same stored rows, counts and refusals, file after file.
    import tempfile

    with tempfile.TemporaryDirectory() as folder:
        by_rows = Store.open(Path(folder) / "rows.sqlite")
        by_arrays = Store.open(Path(folder) / "arrays.sqlite")
        try:
            for number, (layout, cells) in enumerate(files):
                names = LAYOUTS[layout]
                rows = []
                for line, (series, n, is_plan, y, x, extra) in enumerate(cells, start=2):
                    named = {"pick_hours": None if is_plan else y, "order_lines": x,
                             "pallets": extra, "staff": extra}
                    period, key = week(n)
                    rows.append(ObservationRow(series, period, key, is_plan,
                                               tuple(named[c] for c in names), line))
                outcomes = []
                for store, given_rows in ((by_rows, rows), (by_arrays, as_batch(rows, len(names)))):
                    file_id = a_file(store, f"f{number}.csv")
                    try:
                        outcomes.append(store.insert_observations("depot", file_id, names,
                                                                  given_rows))
                    except (ValueError, sqlite3.IntegrityError) as error:
                        outcomes.append(type(error))
                assert outcomes[0] == outcomes[1]
                assert stored_state(by_rows) == stored_state(by_arrays)
        finally:
            by_rows.close()
            by_arrays.close()


# ----------------------------------------------------------------------------- files and passes


def test_the_same_bytes_are_recorded_as_ingested_once(store: Store) -> None:
    a_file(store, "a.csv", sha="same")
    with pytest.raises(sqlite3.IntegrityError):
        a_file(store, "b.csv", sha="same")
    rejected = store.record_file(
        feed="depot", name="c.csv", sha256="same", size=1, received_at=T0,
        outcome=FileOutcome.DUPLICATE, stored_path="/rejected/c.csv", duplicate_of=1,
        errors_text="same as a.csv",
    )
    assert store.file_by_sha256("same") == store.get_file(1)
    assert [f.name for f in store.files_awaiting_move("depot")] == ["a.csv", "c.csv"]
    moved = store.mark_file_moved(rejected.id, at=T0, stored_path="/rejected/c-2.csv")
    assert moved.moved_at == T0 and moved.stored_path == Path("/rejected/c-2.csv")
    assert [f.name for f in store.files_awaiting_move("depot")] == ["a.csv"]


def test_a_pass_left_running_is_marked_interrupted(store: Store) -> None:
    first = store.record_pass(as_of=T0, started_at=T0)
    second = store.record_pass(as_of=T0 + timedelta(days=7), started_at=T0 + timedelta(hours=1))
    assert store.get_pass(first.id).status == "interrupted"  # type: ignore[union-attr]
    done = store.finish_pass(second.id, finished_at=T0 + timedelta(hours=2), counts={"files": 3})
    assert (done.status, done.counts) == ("finished", {"files": 3})
    assert store.latest_pass() == done
    assert store.latest_pass(finished_only=True) == done
    with pytest.raises(StoreError, match="no pass"):
        store.finish_pass(99, finished_at=T0)


def test_model_versions_change_only_with_the_signature(store: Store) -> None:
    v1, created = store.record_model_version("m", signature="a", config={"x": 1}, created_at=T0)
    assert (v1.version, created) == (1, True)
    same, created = store.record_model_version("m", signature="a", config={}, created_at=T0)
    assert (same, created) == (v1, False)
    v2, created = store.record_model_version("m", signature="b", config={"x": 2}, created_at=T0)
    assert (v2.version, v2.config, created) == (2, {"x": 2}, True)
    assert [v.version for v in store.model_versions("m")] == [1, 2]


# ----------------------------------------------------------------------------- fits, forecasts


def _pass_with_model(store: Store) -> int:
    store.record_model_version("pick", signature="s", config={}, created_at=T0)
    return store.record_pass(as_of=T0, started_at=T0).id


def test_fits_are_recorded_in_bulk_with_ids_in_order(store: Store) -> None:
    pass_id = _pass_with_model(store)
    fits = [
        FitRow("pick", 1, s, 20, True, coefficients={"slope": np.float64(1.5)},
               inference={"p": float("nan"), "se": np.array([0.1, 0.2])}, window_first="w1")
        for s in ("b", "a", None)
    ]
    ids = store.record_fits(pass_id, fits)
    assert len(set(ids)) == 3
    assert store.record_fits(pass_id, fits) == ids  # again: the same rows, nothing added
    fit = store.get_fit(ids[0])
    assert fit is not None
    assert (fit.series, fit.coefficients, fit.inference) == (
        "b", {"slope": 1.5}, {"p": None, "se": [0.1, 0.2]}
    )
    assert set(store.latest_fits("pick")) == {"a", "b", None}
    with pytest.raises(sqlite3.IntegrityError):  # a fit needs its model version recorded
        store.record_fits(pass_id, [FitRow("unknown", 1, None, 1, False)])


def _forecast(series: str | None, n: int, point: float, *, plan_id: int | None = None,
              lead: int = 1, issued: datetime = T0) -> ForecastRow:
    return ForecastRow(
        model="pick", feed="depot", series=series, target_period=week(n)[0],
        target_period_key=week(n)[1], issued_at=issued, lead=lead, point=point,
        lower=point - 5, upper=point + 5, level=0.9, mean_lower=point - 1, mean_upper=point + 1,
        leverage=0.1, observation_id=plan_id, inputs={"order_lines": 400.0},
    )


def test_forecasts_are_append_only_and_a_rerun_cannot_duplicate_them(store: Store) -> None:
    pass_id = _pass_with_model(store)
    rows = [_forecast("a", 1, 40.0), _forecast("b", 1, 50.0)]
    first = store.record_forecasts(pass_id, rows)
    assert first.inserted == 2
    again = store.record_forecasts(pass_id, rows)
    assert (again.ids, again.inserted) == (first.ids, 0)
    assert len(store.list_forecasts(model="pick")) == 2
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        store._conn.execute("UPDATE forecasts SET point = 0")
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        store._conn.execute("DELETE FROM forecasts")
    record = store.list_forecasts(pass_id=pass_id)[0]
    assert (record.issued_at, record.inputs, record.extrapolation) == (
        T0, {"order_lines": 400.0}, False
    )


# What forecasts_awaiting_outcome answered before the unscored_forecasts table (migration 8):
# every forecast of the model without an outcome whose target has a current actual. The oracle.
AWAITING_BEFORE_MIGRATION_8 = (
    "SELECT f.id FROM forecasts AS f "
    "JOIN series AS s ON s.feed = f.feed AND s.key = f.series_key "
    "JOIN observations AS a ON a.series_id = s.id AND a.period_key = f.target_period_key "
    "AND a.is_plan = 0 AND a.current = 1 WHERE f.model = ? AND NOT EXISTS "
    "(SELECT 1 FROM outcomes AS o WHERE o.forecast_id = f.id) "
    "ORDER BY f.series_key, f.target_period_key, f.id")


def test_forecasts_awaiting_outcome_come_from_the_unscored_ones_only(store: Store) -> None:
    # Our own seeded history: two models, passes issuing forecasts (some twice, some again
    # after a crash, i.e. the same rows recorded twice), actuals arriving late, revised or
    # never, scoring part of what is due each pass. After every write the unscored table holds
    # exactly the forecasts without an outcome, and the awaiting ones equal the old query's.
    rng = np.random.default_rng(20261203)
    store.record_model_version("pick", signature="s", config={}, created_at=T0)
    store.record_model_version("pack", signature="s", config={}, created_at=T0)
    conn = store._conn

    def check() -> None:
        unscored = {row[0] for row in conn.execute("SELECT forecast_id FROM unscored_forecasts")}
        assert unscored == {row[0] for row in conn.execute(
            "SELECT id FROM forecasts AS f WHERE NOT EXISTS "
            "(SELECT 1 FROM outcomes AS o WHERE o.forecast_id = f.id)")}
        for model in ("pick", "pack"):
            got = [a.forecast_id for a in store.forecasts_awaiting_outcome(model, "pick_hours")]
            assert got == [row[0] for row in conn.execute(AWAITING_BEFORE_MIGRATION_8, (model,))]

    line = 2
    for n in range(12):
        pass_id = store.record_pass(as_of=T0 + timedelta(days=7 * n), started_at=T0).id
        rows = [replace(_forecast(s, n + lead, 40.0 + lead, lead=lead), model=model)
                for model in ("pick", "pack") for s in ("a", "b", None)
                for lead in (1, 2) if rng.random() < 0.8]
        store.record_forecasts(pass_id, rows)
        if rng.random() < 0.3:  # a crashed pass's forecasts recorded again: nothing new
            assert store.record_forecasts(pass_id, rows).inserted == 0
        check()
        actuals = [actual(s, n, float(rng.normal(42, 3)), 400.0, line=(line := line + 1))
                   for s in ("a", "b", None) if rng.random() < 0.85]
        store.insert_observations("depot", a_file(store, f"w{n}.csv"), COLUMNS, actuals)
        late = int(rng.integers(0, n + 1))  # a late actual, or a revision of one
        store.insert_observations("depot", a_file(store, f"late{n}.csv"), COLUMNS,
                                  [actual("a", late, float(rng.normal(42, 3)), 400.0)])
        check()
        due = store.forecasts_awaiting_outcome("pick", "pick_hours") + (
            store.forecasts_awaiting_outcome("pack", "pick_hours"))
        chosen = [a for a in due if rng.random() < 0.7]
        scored = store.record_outcomes(pass_id, [
            Outcome(a.forecast_id, a.actual, classify_outcome(a.actual, a.lower, a.upper))
            for a in chosen])
        assert scored == len(chosen)
        assert store.record_outcomes(pass_id, [
            Outcome(a.forecast_id, a.actual, OutcomeKind.HIT) for a in chosen]) == 0
        check()
    assert conn.execute("SELECT count(*) FROM outcomes").fetchone()[0] > 20
    assert conn.execute("SELECT count(*) FROM unscored_forecasts").fetchone()[0] > 5
    _, plan = plan_of_statement(store, lambda: store.forecasts_awaiting_outcome(
        "pick", "pick_hours"))
    assert plan.startswith("SEARCH u USING") and "unscored_forecasts_by_model" in plan, plan


def test_migration_8_finds_the_forecasts_not_scored_yet(tmp_path: Path) -> None:
    # A database written before migration 8 (here: one made now, with the table and its
    # triggers taken away and the version set back) gets the table filled from its forecasts
    # and outcomes when it is opened.
    path = tmp_path / "v7.sqlite"
    with Store.open(path) as store:
        pass_id = _pass_with_model(store)
        ids = store.record_forecasts(pass_id, [_forecast(s, n, 40.0) for s in ("a", "b")
                                                for n in (1, 2, 3)]).ids
        store.record_outcomes(pass_id, [Outcome(i, 41.0, OutcomeKind.HIT) for i in ids[::2]])
    conn = sqlite3.connect(path, isolation_level=None)
    for statement in ("DROP TRIGGER forecasts_await_outcome", "DROP TRIGGER outcomes_scored",
                      "DROP TABLE unscored_forecasts",
                      "ALTER TABLE forecasts DROP COLUMN residual_df",  # migration 9's
                      "PRAGMA user_version = 7"):
        conn.execute(statement)
    conn.close()
    with Store.open(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        assert sorted(row[0] for row in store._conn.execute(
            "SELECT forecast_id FROM unscored_forecasts")) == sorted(ids[1::2])
        later = store.record_pass(as_of=T0, started_at=T0).id
        [new] = store.record_forecasts(later, [_forecast("a", 4, 40.0)]).ids
        store.record_outcomes(later, [Outcome(ids[1], 41.0, OutcomeKind.HIT)])
        assert sorted(row[0] for row in store._conn.execute(
            "SELECT forecast_id FROM unscored_forecasts")) == sorted([*ids[3::2], new])


def test_migration_9_gives_each_forecast_its_fit_s_residual_df(tmp_path: Path) -> None:
    # Forecasts written before migration 9 get the residual degrees of freedom of their fit as
    # the reads used to find it (json_extract of the fit's inference), those written after get
    # it when written; a forecast without a fit has none.
    path = tmp_path / "v8.sqlite"
    with Store.open(path) as store:
        pass_id = _pass_with_model(store)
        fit_ids = store.record_fits(pass_id, [
            FitRow("pick", 1, s, 20, True, inference={"residual_df": df})
            for s, df in (("a", 18), ("b", 17.0), (None, None))])
        rows = [replace(_forecast(s, 1, 40.0), fit_id=f)
                for s, f in zip(("a", "b", None), fit_ids, strict=True)]
        rows.append(_forecast("c", 1, 40.0))  # no fit
        ids = store.record_forecasts(pass_id, rows).ids
    conn = sqlite3.connect(path, isolation_level=None)
    for statement in ("DROP TRIGGER forecasts_no_update",
                      "ALTER TABLE forecasts DROP COLUMN residual_df",
                      "CREATE TRIGGER forecasts_no_update BEFORE UPDATE ON forecasts "
                      "BEGIN SELECT RAISE(ABORT, 'forecasts are append-only'); END",
                      "PRAGMA user_version = 8"):
        conn.execute(statement)
    conn.close()
    with Store.open(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        got = dict(store._conn.execute("SELECT id, residual_df FROM forecasts"))
        assert [got[i] for i in ids] == [18.0, 17.0, None, None]
        later = store.record_pass(as_of=T0, started_at=T0).id
        [new] = store.record_forecasts(later, [replace(_forecast("a", 2, 40.0),
                                                       fit_id=fit_ids[0])]).ids
        assert store._conn.execute(
            "SELECT residual_df FROM forecasts WHERE id = ?", (new,)).fetchone() == (18.0,)
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            store._conn.execute("UPDATE forecasts SET residual_df = 1")


def test_scoring_and_the_audit_views(store: Store) -> None:
    first_pass = _pass_with_model(store)
    # issued twice for week 2 (leads 2 and 1), once for week 1
    store.record_forecasts(first_pass, [_forecast("a", 1, 40.0), _forecast("a", 2, 40.0, lead=2)])
    second_pass = store.record_pass(as_of=T0 + timedelta(days=7), started_at=T0).id
    store.record_forecasts(second_pass, [_forecast("a", 2, 48.0, lead=1)])
    assert store.forecasts_awaiting_outcome("pick", "pick_hours") == []
    store.insert_observations("depot", a_file(store), COLUMNS, [actual("a", 1, 46.0, 400.0),
                                                                actual("a", 2, 44.0, 410.0)])
    awaiting = store.forecasts_awaiting_outcome("pick", "pick_hours")
    assert [(a.target_period, a.lead, a.actual) for a in awaiting] == [
        (week(1)[0], 1, 46.0), (week(2)[0], 2, 44.0), (week(2)[0], 1, 44.0)
    ]
    outcomes = [Outcome(a.forecast_id, a.actual, classify_outcome(a.actual, a.lower, a.upper))
                for a in awaiting]
    assert store.record_outcomes(second_pass, outcomes) == 3
    assert store.record_outcomes(second_pass, outcomes) == 0  # scored once
    assert store.forecasts_awaiting_outcome("pick", "pick_hours") == []
    latest = store.scored_forecasts("pick")
    assert len(latest) == 2  # the last issue for each target period
    assert latest.lead.tolist() == [1, 1]
    assert latest.outcome == (OutcomeKind.MISS_HIGH, OutcomeKind.HIT)
    every = store.scored_forecasts("pick", latest_only=False)
    assert sorted(every.lead.tolist()) == [1, 1, 2]
    last_one = store.scored_forecasts(latest_only=False, last=1)
    assert set(last_one.target_period) == {week(2)[0]} and len(last_one) == 2
    assert last_one.level.tolist() == [0.9, 0.9]


@pytest.mark.parametrize("latest_only", [True, False])
@pytest.mark.parametrize("last", [None, 1, 3])
def test_the_audit_views_agree_with_a_plain_selection(
    store: Store, latest_only: bool, last: int | None
) -> None:
    rng = np.random.default_rng(7)
    store.record_model_version("pick", signature="s", config={}, created_at=T0)
    store.record_model_version("pack", signature="s", config={}, created_at=T0)
    kept: list[tuple[str, str | None, int, int]] = []  # (model, series, target key, id)
    for issue in range(4):
        pass_id = store.record_pass(as_of=T0 + timedelta(days=7 * issue), started_at=T0).id
        rows = [
            ForecastRow(model=m, feed="depot", series=s, target_period=week(n)[0],
                        target_period_key=week(n)[1], issued_at=T0, lead=n - issue + 1,
                        point=1.0, lower=0.0, upper=2.0, level=0.95)
            for m in ("pick", "pack") for s in ("b", None, "a") for n in range(issue, issue + 3)
            if rng.random() < 0.8
        ]
        ids = store.record_forecasts(pass_id, rows).ids
        scored = [i for i in ids if rng.random() < 0.7]
        store.record_outcomes(pass_id, [Outcome(i, 1.0, OutcomeKind.HIT) for i in scored])
        by_id = dict(zip(ids, rows, strict=True))
        kept += [(by_id[i].model, by_id[i].series, by_id[i].target_period_key, i) for i in scored]
    expected = []
    for model in ("pack", "pick"):
        for series in ("", "a", "b"):
            mine = sorted(k for k in kept if k[0] == model and (k[1] or "") == series)
            targets = sorted({k[2] for k in mine})[-last:] if last else None
            for target in sorted({k[2] for k in mine}):
                issues = [k[3] for k in mine if k[2] == target]
                if targets is not None and target not in targets:
                    continue
                expected += [max(issues)] if latest_only else sorted(issues)
    got = store.scored_forecasts(latest_only=latest_only, last=last)
    assert got.forecast_id.tolist() == expected
    only_a = store.scored_forecasts("pick", series="a", all_series=False, latest_only=latest_only)
    assert set(only_a.series) <= {"a"} and set(only_a.model) <= {"pick"}


@pytest.mark.parametrize("last", [1, 3, 5])
@pytest.mark.parametrize("with_df", [False, True])
def test_a_connection_reading_the_latest_scored_week_after_week_reads_what_a_fresh_one_does(
    store: Store, last: int, with_df: bool
) -> None:
    # The pass reads each model's latest scored forecasts every week, and on a connection kept
    # open (the demo's replay) only what was scored since: equal to a fresh read at every step,
    # with forecasts scored late (after newer targets) and several issues per target.
    rng = np.random.default_rng(11)
    store.record_model_version("pick", signature="s", config={}, created_at=T0)
    store.record_model_version("pack", signature="s", config={}, created_at=T0)
    unscored: list[int] = []
    for issue in range(9):
        pass_id = store.record_pass(as_of=T0 + timedelta(days=7 * issue), started_at=T0).id
        rows = [
            ForecastRow(model=m, feed="depot", series=s, target_period=week(n)[0],
                        target_period_key=week(n)[1], issued_at=T0, lead=n - issue + 1,
                        point=float(issue), lower=-1.0, upper=2.0 * n, level=0.95)
            for m in ("pick", "pack") for s in ("b", None, "a") for n in range(issue, issue + 3)
            if rng.random() < 0.8
        ]
        ids = store.record_forecasts(pass_id, rows).ids
        unscored += ids
        scored = [i for i in unscored if rng.random() < 0.5]
        unscored = [i for i in unscored if i not in scored]
        store.record_outcomes(pass_id, [Outcome(i, 1.0, OutcomeKind.HIT) for i in scored])
        fresh = Store.open(store.path)
        try:
            for model in ("pick", "pack"):
                for latest_only in (True, False):
                    kept = store.scored_forecasts(model, last=last, latest_only=latest_only,
                                                  with_df=with_df)
                    again = fresh.scored_forecasts(model, last=last, latest_only=latest_only,
                                                   with_df=with_df)
                    assert kept.forecast_id.tolist() == again.forecast_id.tolist()
                    assert kept.target_period == again.target_period
                    assert kept.point.tolist() == again.point.tolist()
            # Inside a transaction nothing is kept: the rows may yet be rolled back.
            with pytest.raises(RuntimeError, match="rolled back"), store.transaction():
                late = store.record_pass(as_of=T0, started_at=T0).id
                store.record_forecasts(late, [ForecastRow(
                    model="pick", feed="depot", series="a", target_period=week(40)[0],
                    target_period_key=week(40)[1], issued_at=T0, lead=1, point=0.0,
                    lower=-1.0, upper=1.0, level=0.95)])
                store.record_outcomes(late, [Outcome(
                    store.list_forecasts(pass_id=late)[0].id, 1.0, OutcomeKind.HIT)])
                assert week(40)[0] in store.scored_forecasts("pick", last=last).target_period
                raise RuntimeError("rolled back")
            assert week(40)[0] not in store.scored_forecasts("pick", last=last).target_period
        finally:
            fresh.close()


# ----------------------------------------------------------------------------- findings


def finding(kind: FindingKind = FindingKind.SLOPE_SHIFT, *, series: str | None = "a",
            severity: Severity = Severity.WARNING, model: str | None = "pick",
            feed: str | None = "depot") -> Finding:
    return Finding(model, series, feed, kind, severity, week(3)[0], 2.5, 0.01, "moved", "look")


def test_a_finding_that_holds_lapses_once_and_returns_is_one_finding(store: Store) -> None:
    passes = [store.record_pass(as_of=T0 + timedelta(days=7 * i), started_at=T0).id
              for i in range(6)]
    raised = store.upsert_finding(finding(), pass_id=passes[0], at=T0)
    assert raised.created and raised.finding.state == FindingState.NEW
    same_pass = store.upsert_finding(finding(), pass_id=passes[0], at=T0)
    assert not same_pass.created and same_pass.finding.state == FindingState.NEW
    held = store.upsert_finding(finding(severity=Severity.CRITICAL), pass_id=passes[1], at=T0)
    assert (held.finding.state, held.previous_severity) == (FindingState.ONGOING, Severity.WARNING)
    lapsed = store.mark_finding_absent(held.finding.id, pass_id=passes[2], at=T0, clear_after=2)
    assert (lapsed.state, lapsed.false_streak) == (FindingState.ONGOING, 1)
    # counted once per pass, however often it is said
    lapsed = store.mark_finding_absent(held.finding.id, pass_id=passes[2], at=T0, clear_after=2)
    assert lapsed.false_streak == 1
    back = store.upsert_finding(finding(), pass_id=passes[3], at=T0)
    assert back.finding.id == raised.finding.id and back.finding.false_streak == 0
    store.mark_finding_absent(back.finding.id, pass_id=passes[4], at=T0, clear_after=2)
    cleared = store.mark_finding_absent(back.finding.id, pass_id=passes[5], at=T0, clear_after=2)
    assert (cleared.state, cleared.cleared_pass_id) == (FindingState.CLEARED, passes[5])
    assert len(store.list_findings()) == 1
    assert store.list_findings(cleared_in_pass=passes[5]) == [cleared]
    assert store.open_findings() == []


def test_one_open_finding_per_scope_and_feed_level_findings(store: Store) -> None:
    pass_id = store.record_pass(as_of=T0, started_at=T0).id
    store.upsert_finding(finding(), pass_id=pass_id, at=T0)
    store.upsert_finding(finding(series="b"), pass_id=pass_id, at=T0)
    store.upsert_finding(finding(FindingKind.COVERAGE), pass_id=pass_id, at=T0)
    feed_level = Finding(None, None, "depot", FindingKind.REJECTED_INPUT, Severity.NOTICE, None,
                         None, None, "rows rejected", "fix them")
    first = store.upsert_finding(feed_level, pass_id=pass_id, at=T0)
    second = store.upsert_finding(feed_level, pass_id=pass_id, at=T0)
    assert second.finding.id == first.finding.id
    assert len(store.open_findings()) == 4
    assert [f.kind for f in store.open_findings(feed="depot", kind=FindingKind.REJECTED_INPUT)] == [
        FindingKind.REJECTED_INPUT
    ]
    with pytest.raises(sqlite3.IntegrityError):  # the index itself refuses a second open one
        store._conn.execute(
            "INSERT INTO findings (model, series_key, feed, kind, severity, state, message, "
            "action, first_pass_id, last_pass_id, created_at, updated_at) SELECT model, "
            "series_key, feed, kind, severity, 'ongoing', message, action, first_pass_id, "
            "last_pass_id, created_at, updated_at FROM findings WHERE id = 1"
        )
    with pytest.raises(ValueError, match="feed-level finding has no series"):
        store.upsert_finding(
            Finding(None, "a", "depot", FindingKind.STALE_FEED, Severity.WARNING, None, None,
                    None, "m", "a"), pass_id=pass_id, at=T0,
        )


def test_noting_and_listing_findings(store: Store) -> None:
    first = store.record_pass(as_of=T0, started_at=T0).id
    made = store.upsert_finding(finding(), pass_id=first, at=T0).finding
    assert not made.noted and made.note is None and made.note_count == 0
    noted = store.note_finding(made.id, at=T0 + timedelta(hours=1), by="ana", text=" seen ")
    assert noted.noted and noted.acknowledged_at == T0 + timedelta(hours=1)
    assert noted.note is not None and (noted.note.by, noted.note.text) == ("ana", "seen")
    again = store.note_finding(made.id, at=T0 + timedelta(hours=5), by="ben", text="still")
    assert again.acknowledged_at == noted.acknowledged_at  # the first note stops the messages
    assert again.note is not None and again.note.by == "ben" and again.note_count == 2
    history = store.finding_notes(made.id)
    assert [(n.at, n.by, n.text) for n in history] == [
        (T0 + timedelta(hours=1), "ana", "seen"), (T0 + timedelta(hours=5), "ben", "still")]
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):  # the history is kept
        store._conn.execute("UPDATE finding_notes SET text = 'x'")
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        store._conn.execute("DELETE FROM finding_notes")
    with pytest.raises(ValueError, match="needs some text"):
        store.note_finding(made.id, at=T0, by="ana", text="  ")
    with pytest.raises(StoreError, match="no finding with id 99"):
        store.note_finding(99, at=T0, by="ana", text="x")
    second = store.record_pass(as_of=T0 + timedelta(days=7), started_at=T0).id
    assert store.mark_new_findings_ongoing(second) == 1
    assert store.list_findings(state="ongoing") == [store.get_finding(made.id)]
    assert store.list_findings(raised_in_pass=first)[0].id == made.id
    closed = store.clear_finding(made.id, pass_id=second, at=T0)
    assert closed.state == FindingState.CLEARED
    latest = store.latest_finding(model="pick", series="a", feed="depot",
                                  kind=FindingKind.SLOPE_SHIFT)
    assert latest is not None and latest.acknowledged_at is not None
    assert latest.as_finding() == finding()


# ----------------------------------------------------------------------------- baselines, digests


def test_baselines_keep_history_and_the_newest_is_in_force(store: Store) -> None:
    rows = [BaselineRow("pick", 1, s, week(0)[0], week(0)[1], week(9)[0], week(9)[1], "auto",
                        week(10)[0], week(10)[1]) for s in ("a", None)]
    store.set_baselines(rows, created_at=T0)
    store.set_baselines(
        [BaselineRow("pick", 1, "a", week(20)[0], week(20)[1], week(29)[0], week(29)[1],
                     "rebaseline")], created_at=T0 + timedelta(days=1),
    )
    current = store.baselines("pick", 1)
    assert current["a"].start_period == week(20)[0] and current["a"].set_by == "rebaseline"
    assert current[None].monitoring_start == week(10)[0]
    assert store.baseline("pick", 1, "a") == current["a"]
    assert [b.set_by for b in store.baseline_history("pick", "a")] == ["auto", "rebaseline"]
    assert store.baseline("pick", 2, "a") is None
    with pytest.raises(ValueError, match="set_by"):
        store.set_baselines([BaselineRow("p", 1, None, "a", 1, "b", 2, "manual")], created_at=T0)


def test_digests_are_recorded_once_per_period(store: Store) -> None:
    end = datetime(2024, 3, 4, 7, 0, tzinfo=UTC)
    record, created = store.record_digest(period_end=end, created_at=T0, path="/r/d.html")
    assert created
    again, created = store.record_digest(period_end=end, created_at=T0 + timedelta(hours=1))
    assert (again, created) == (record, False)
    later, _ = store.record_digest(period_end=end + timedelta(days=7), created_at=T0)
    assert store.latest_digest() == later


# ----------------------------------------------------------------------------- outbox


def test_outbox_dedupes_retries_with_backoff_and_never_drops(store: Store) -> None:
    message, created = store.enqueue_message(
        kind="pass", dedupe_key="pass:pick:2024-03-04", recipients=["a@example.org"],
        subject="Two new findings", body=b"From: x\r\n\r\nbody", created_at=T0,
    )
    assert created
    same, created = store.enqueue_message(
        kind="pass", dedupe_key="pass:pick:2024-03-04", recipients=["a@example.org"],
        subject="Two new findings", body=b"other", created_at=T0,
    )
    assert (same.id, same.body, created) == (message.id, b"From: x\r\n\r\nbody", False)
    assert [m.id for m in store.due_messages(T0)] == [message.id]
    delays = []
    at = T0
    for _ in range(12):
        next_at = store.mark_failed(message.id, at=at, error="connection refused")
        delays.append(next_at - at)
        assert store.due_messages(next_at - timedelta(seconds=1)) == []
        at = next_at
    assert delays[:4] == [timedelta(minutes=m) for m in (1, 2, 4, 8)]
    assert delays[-1] == timedelta(hours=6)  # capped
    waiting = store.due_messages(at)[0]
    assert (waiting.attempts, waiting.last_error) == (12, "connection refused")
    store.mark_sent(message.id, at=at)
    assert store.due_messages(at + timedelta(days=30)) == []
    assert store.unsent_messages() == []
    with pytest.raises(ValueError, match="line breaks"):
        store.enqueue_message(kind="digest", dedupe_key="d", recipients=["a@x.org\nBcc: b@x.org"],
                              subject="s", body=b"", created_at=T0)


# ----------------------------------------------------------------------------- backup


@pytest.mark.parametrize("readonly", [False, True], ids=["read-write", "read-only"])
def test_backup_of_a_live_database_is_a_consistent_copy(tmp_path: Path, readonly: bool) -> None:
    path = tmp_path / "live.sqlite"
    with Store.open(path) as store:
        rows = [actual(f"s{i:03d}", n, float(n), float(i)) for i in range(300) for n in range(150)]
        store.insert_observations("depot", a_file(store), COLUMNS, rows)
    stop = threading.Event()
    written: list[int] = []

    def writer() -> None:
        # Each transaction writes a pass and a file that names it: a torn copy would show one
        # without the other.
        with Store.open(path) as other:
            while not stop.is_set():
                with other.transaction():
                    pass_id = other.record_pass(as_of=T0, started_at=T0).id
                    other.record_file(
                        feed="depot", name=f"p{pass_id}", sha256=f"p{pass_id}", size=1,
                        received_at=T0, outcome=FileOutcome.REJECTED, stored_path="/r",
                        pass_id=pass_id,
                    )
                written.append(pass_id)

    thread = threading.Thread(target=writer)
    thread.start()
    try:
        while len(written) < 20:
            time.sleep(0.005)
        with Store.open(path, readonly=readonly) as store:
            result = store.backup(tmp_path / "copies" / "copy.sqlite")
        before_stop = len(written)
        while len(written) < before_stop + 20:
            time.sleep(0.005)
    finally:
        stop.set()
        thread.join()
    assert result.integrity == "ok"
    copy = sqlite3.connect(result.path)
    assert copy.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert copy.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
    passes = [row[0] for row in copy.execute("SELECT id FROM passes ORDER BY id")]
    assert passes == list(range(1, len(passes) + 1))  # a prefix of the history, no gaps
    assert 20 <= len(passes) < len(written)  # taken while the writer was going
    orphans = copy.execute(
        "SELECT count(*) FROM passes WHERE id NOT IN (SELECT pass_id FROM files "
        "WHERE pass_id IS NOT NULL)"
    ).fetchone()[0]
    assert orphans == 0
    live = sqlite3.connect(path)
    # The copy holds the rows the live database had then: compare what never changes later (a
    # pass's status does: the writer's next pass marks the one before it 'interrupted').
    for table, columns in (("passes", "id, as_of, started_at"), ("files", "*"),
                           ("observations", "*")):
        copied = copy.execute(f"SELECT {columns} FROM {table} ORDER BY id").fetchall()
        source = live.execute(
            f"SELECT {columns} FROM {table} ORDER BY id LIMIT ?", (len(copied),)
        ).fetchall()
        assert copied == source, table
    copy.close()
    live.close()
    with Store.open(result.path) as reopened:
        assert reopened.windows("depot", COLUMNS).lengths().sum() == 300 * 150


def test_backup_refuses_to_overwrite_unless_asked(tmp_path: Path) -> None:
    with Store.open(tmp_path / "db.sqlite") as store:
        target = tmp_path / "b.sqlite"
        target.write_bytes(b"keep me")
        with pytest.raises(StoreError, match="already exists"):
            store.backup(target)
        assert target.read_bytes() == b"keep me"
        store.record_pass(as_of=T0, started_at=T0)
        store.backup(target, overwrite=True)
    with Store.open(target) as copy:
        assert copy.latest_pass() is not None


def test_calibrated_bounds_are_stored_beside_the_models_own(tmp_path: Path) -> None:
    # A forecast written by a version-3 database (before calibrated intervals) reads back with
    # None; one written now keeps its calibrated bounds and factor, in list_forecasts and in the
    # audit's columns (NaN where none was issued).
    path = tmp_path / "v3.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    apply_migrations(conn, 3)
    conn.execute("INSERT INTO passes (as_of, started_at, status) VALUES (?, ?, 'finished')",
                 (utc_text(T0), utc_text(T0)))
    conn.execute(
        "INSERT INTO forecasts (pass_id, model, feed, series_key, target_period, "
        "target_period_key, issued_at, lead, inputs, point, lower, upper, level, extrapolation) "
        "VALUES (1, 'pick', 'depot', 'a', ?, ?, ?, 1, '{}', 40, 35, 45, 0.9, 0)",
        (week(1)[0], week(1)[1], utc_text(T0)),
    )
    conn.close()
    with Store.open(path) as store:
        old = store.list_forecasts(model="pick")[0]
        assert (old.calibrated_lower, old.calibrated_upper, old.calibrated_factor) == (
            None, None, None)
        pass_id = store.record_pass(as_of=T0 + timedelta(days=7), started_at=T0).id
        row = replace(_forecast("a", 2, 50.0), calibrated_lower=43.0, calibrated_upper=57.0,
                      calibrated_factor=1.4)
        store.record_forecasts(pass_id, [row])
        new = store.list_forecasts(pass_id=pass_id)[0]
        assert (new.calibrated_lower, new.calibrated_upper, new.calibrated_factor) == (
            43.0, 57.0, 1.4)
        store.insert_observations("depot", a_file(store), COLUMNS, [actual("a", 1, 46.0, 400.0),
                                                                    actual("a", 2, 56.0, 410.0)])
        awaiting = store.forecasts_awaiting_outcome("pick", "pick_hours")
        store.record_outcomes(pass_id, [
            Outcome(a.forecast_id, a.actual, classify_outcome(a.actual, a.lower, a.upper))
            for a in awaiting])
        scored = store.scored_forecasts("pick")
        assert scored.calibrated_lower is not None and scored.calibrated_upper is not None
        assert np.isnan(scored.calibrated_lower[0]) and np.isnan(scored.calibrated_upper[0])
        assert scored.calibrated_lower[1] == 43.0 and scored.calibrated_upper[1] == 57.0
