"""A model's scored history read in chunks equals it read at once, value for value and bit for bit.

``Store.scored_forecasts`` fetches its rows ``SCORED_CHUNK`` at a time and makes each chunk
columns before the next (``_read_scored_columns``). These tests build a real database (several
models, series including the whole model's ``None``, several issues per target period, forecasts
left unscored, calibrated intervals on some, fits with residual degrees of freedom) and compare
the chunked read, at chunk sizes that do and do not divide the row count, with the conversion of
all rows fetched at once (``_scored_columns`` of ``fetchall()``, the read before chunks).
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from _sqlplan import plan_of_statement

from monitor.config import parse_config
from monitor.notify.series import load_model
from monitor.store import FitRow, ForecastRow, ScoredForecasts, Store, date_period_key, results
from monitor.store.results import (
    SCORED_CHUNK,
    _every_scored_sql,
    _in_scored_order,
    _latest_scored_sql,
    _read_scored_columns,
    _scan_scored_sql,
    _scored_columns,
    _scored_rows_to_keep,
    _scored_select,
)
from monitor.vocabulary import Outcome, OutcomeKind, classify_outcome

T0 = datetime(2024, 3, 4, 8, 0, tzinfo=UTC)
MODELS = ("pick", "pack")
SERIES = ("b", None, "a", "Zürich")


def week(n: int) -> tuple[str, int]:
    day = date(2024, 1, 7) + timedelta(weeks=n)
    return day.isoformat(), date_period_key(day)


@pytest.fixture
def store(tmp_path: Path) -> Store:
    """Ten passes; each fits every (model, series), forecasts the next three weeks (so a target
    is issued up to three times) and scores about two thirds of what is due."""
    rng = np.random.default_rng(20261203)
    opened = Store.open(tmp_path / "state" / "plumbline.sqlite")
    for model in MODELS:
        opened.record_model_version(model, signature="s", config={}, created_at=T0)
    due: list[tuple[int, float, float, float, int]] = []  # (id, point, lower, upper, week)
    for issue in range(10):
        at = T0 + timedelta(days=7 * issue)
        pass_id = opened.record_pass(as_of=at, started_at=at).id
        fits = [FitRow(m, 1, s, 20 + issue, True, inference={"residual_df": 18 + issue})
                for m in MODELS for s in SERIES]
        fit_ids = dict(zip([(f.model, f.series) for f in fits],
                           opened.record_fits(pass_id, fits), strict=True))
        rows = []
        for m in MODELS:
            for s in SERIES:
                for n in range(issue + 1, issue + 4):
                    if rng.random() < 0.15:
                        continue
                    point = float(rng.normal(100.0, 10.0))
                    half = float(rng.uniform(1.0, 8.0))
                    calibrated = rng.random() < 0.5
                    rows.append(ForecastRow(
                        model=m, feed="depot", series=s, target_period=week(n)[0],
                        target_period_key=week(n)[1], issued_at=at, lead=n - issue,
                        point=point, lower=point - half, upper=point + half, level=0.9,
                        fit_id=fit_ids[(m, s)] if rng.random() < 0.9 else None,
                        calibrated_lower=point - 1.3 * half if calibrated else None,
                        calibrated_upper=point + 1.3 * half if calibrated else None,
                    ))
        ids = opened.record_forecasts(pass_id, rows).ids
        due += [(i, r.point, r.lower, r.upper, r.target_period_key)
                for i, r in zip(ids, rows, strict=True)]
        now = week(issue)[1]
        ready = [d for d in due if d[4] <= now and rng.random() < 0.7]
        due = [d for d in due if d not in ready]
        outcomes = []
        for fid, point, lower, upper, _key in ready:
            actual = point + float(rng.normal(0.0, 4.0))
            outcomes.append(Outcome(fid, actual, classify_outcome(actual, lower, upper)))
        opened.record_outcomes(pass_id, outcomes)
        opened.finish_pass(pass_id, finished_at=at)
    yield opened  # type: ignore[misc]
    opened.close()


def _same_columns(got: list[np.ndarray], want: list[np.ndarray]) -> None:
    """Equal column by column: the same dtype and shape, numbers bit for bit (NaN included),
    texts equal and of the same type."""
    assert len(got) == len(want) == 16
    for g, w in zip(got, want, strict=True):
        assert (g.dtype, g.shape) == (w.dtype, w.shape)
        if w.dtype == object:
            assert g.tolist() == w.tolist()
            assert [type(v) for v in g.tolist()] == [type(v) for v in w.tolist()]
        else:
            assert g.tobytes() == w.tobytes()


def _same_scored(got: ScoredForecasts, want: ScoredForecasts) -> None:
    for name in ScoredForecasts.__dataclass_fields__:
        g, w = getattr(got, name), getattr(want, name)
        if isinstance(w, np.ndarray):
            assert (g.dtype, g.shape, g.tobytes()) == (w.dtype, w.shape, w.tobytes()), name
        else:
            assert g == w, name


@pytest.mark.parametrize("with_df", [False, True])
def test_a_chunked_read_equals_every_row_converted_at_once(store: Store, with_df: bool) -> None:
    sql = _every_scored_sql(_scored_select(with_df))
    params = (None, 1, "")
    rows = store._conn.execute(sql, params).fetchall()
    count = len(rows)
    # Enough rows for chunks to matter, every model and series among them, some issued twice.
    assert count > 100
    assert {r[1] for r in rows} == set(MODELS) and {r[2] for r in rows} == {"", "a", "b",
                                                                              "Zürich"}
    assert len({(r[1], r[2], r[4]) for r in rows}) < count
    assert any(r[13] is None for r in rows) and any(r[13] is not None for r in rows)
    if with_df:
        assert any(r[15] is None for r in rows) and any(r[15] is not None for r in rows)
    want = _scored_columns(rows)
    for chunk in (1, 2, 7, count - 1, count, count + 1, None):
        got = _read_scored_columns(store._conn.execute(sql, params), chunk)
        _same_columns(got, want)
        # Arrays made ``capacity`` long at once: too short (the rest joined after), exact, long.
        for capacity in (1, 5, count // 2, count - 1, count, 3 * count):
            got = _read_scored_columns(store._conn.execute(sql, params), chunk, capacity)
            _same_columns(got, want)
    # Filtered to one model and one series: fewer rows, same agreement.
    one = ("pack", 0, "Zürich")
    rows = store._conn.execute(sql, one).fetchall()
    assert 0 < len(rows) < count
    _same_columns(_read_scored_columns(store._conn.execute(sql, one), 3), _scored_columns(rows))


@pytest.mark.parametrize("with_df", [False, True])
@pytest.mark.parametrize("params", [(None, 1, ""), ("pick", 1, ""), ("pack", 1, ""),
                                    ("pack", 0, "Zürich"), ("pick", 0, "")])
def test_the_outcomes_scanned_and_sorted_equal_the_read_in_index_order(
    store: Store, with_df: bool, params: tuple[str | None, int, str]
) -> None:
    select = _scored_select(with_df)
    want = _scored_columns(store._conn.execute(_every_scored_sql(select), params).fetchall())
    scanned = store._conn.execute(_scan_scored_sql(select), params).fetchall()
    assert len(scanned) == len(want[0]) > 1
    # The scan does give the rows in another order (else the sort would not be tested).
    assert [r[0] for r in scanned] != want[0].tolist()
    for chunk in (1, 4, None):
        got = _in_scored_order(_read_scored_columns(
            store._conn.execute(_scan_scored_sql(select), params), chunk))
        _same_columns(got, want)


def test_an_empty_read_has_empty_columns_of_the_right_types(store: Store) -> None:
    sql = _every_scored_sql(_scored_select(False))
    nothing = ("no such model", 1, "")
    want = _scored_columns(store._conn.execute(sql, nothing).fetchall())
    assert all(len(column) == 0 for column in want)
    _same_columns(_read_scored_columns(store._conn.execute(sql, nothing), 4), want)
    with pytest.raises(ValueError, match="chunk"):
        _read_scored_columns(store._conn.execute(sql, nothing), 0)


def test_repeated_texts_are_one_object_each(store: Store) -> None:
    sql = _every_scored_sql(_scored_select(False))
    columns = _read_scored_columns(store._conn.execute(sql, (None, 1, "")), 5)
    for i in (1, 2, 3, 6, 12):  # model, series key, target period, issue time, outcome
        values = columns[i].tolist()
        assert len({id(v) for v in values}) == len(set(values)) < len(values)


def _read_at_once(store: Store, model: str | None, latest_only: bool,
                  with_df: bool) -> ScoredForecasts:
    """``scored_forecasts(model)`` as it was read before chunks: one ordered query through the
    index, every row fetched at once, then converted."""
    columns = _scored_columns(store._conn.execute(
        _every_scored_sql(_scored_select(with_df)), (model, 1, "")).fetchall())
    keep = _scored_rows_to_keep(columns[1], columns[2], columns[4], latest_only, None)
    columns = [column[keep] for column in columns]
    kinds = {kind.value: kind for kind in OutcomeKind}
    return ScoredForecasts(
        forecast_id=columns[0], model=tuple(columns[1].tolist()),
        series=tuple(None if key == "" else key for key in columns[2].tolist()),
        target_period=tuple(columns[3].tolist()), target_period_key=columns[4],
        lead=columns[5], issued_at=tuple(columns[6].tolist()), actual=columns[7],
        point=columns[8], lower=columns[9], upper=columns[10], level=columns[11],
        outcome=tuple(kinds[kind] for kind in columns[12].tolist()),
        calibrated_lower=columns[13], calibrated_upper=columns[14],
        residual_df=columns[15] if with_df else None,
    )


@pytest.mark.parametrize("latest_only", [True, False])
@pytest.mark.parametrize("with_df", [False, True])
@pytest.mark.parametrize("share", [0, 10])
def test_a_model_s_whole_history_equals_it_read_at_once(
    store: Store, latest_only: bool, with_df: bool, share: int,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # share 0: through the index; 10: each model is half the forecasts, so the outcomes are
    # scanned and the columns sorted.
    monkeypatch.setattr(results, "SCAN_SHARE", share)
    for model in (*MODELS, None):
        want = _read_at_once(store, model, latest_only, with_df)
        assert len(want) > 0
        for chunk in (1, 3, None):
            _same_scored(store.scored_forecasts(model, latest_only=latest_only, with_df=with_df,
                                                chunk=chunk), want)


@pytest.mark.parametrize("latest_only", [True, False])
@pytest.mark.parametrize("last", [None, 1, 4])
@pytest.mark.parametrize("with_df", [False, True])
def test_the_audit_views_do_not_depend_on_the_chunk_size_or_the_way_read(
    store: Store, latest_only: bool, last: int | None, with_df: bool,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    fresh = Store.open(store.path)  # no per-connection columns kept from an earlier read
    try:
        for model in (*MODELS, None):
            # A model's rows through the index (no model is a large enough share) in one fetch.
            monkeypatch.setattr(results, "SCAN_SHARE", 0)
            whole = fresh.scored_forecasts(model, latest_only=latest_only, last=last,
                                           with_df=with_df, chunk=10**9)
            assert len(whole) > 0
            # Each model is half the forecasts: read by the scan of the outcomes, sorted.
            monkeypatch.setattr(results, "SCAN_SHARE", 10)
            for chunk in (1, 3, len(whole) - 1):
                again = Store.open(store.path)
                try:
                    _same_scored(again.scored_forecasts(
                        model, latest_only=latest_only, last=last, with_df=with_df,
                        chunk=chunk), whole)
                finally:
                    again.close()
            one = fresh.scored_forecasts(model, series=None, all_series=False,
                                         latest_only=latest_only, last=last, chunk=2)
            assert set(one.series) == {None}
            _same_scored(one, fresh.scored_forecasts(
                model, series=None, all_series=False, latest_only=latest_only, last=last,
                chunk=10**9))
    finally:
        fresh.close()


def test_the_kept_latest_columns_grow_by_chunked_reads_as_a_fresh_read_gives(
    store: Store, tmp_path: Path
) -> None:
    # ``last=`` on one connection keeps its columns and then reads only what was scored since;
    # both the first read and the later ones go by chunks.
    kept = store.scored_forecasts("pick", last=3, chunk=2)
    at = T0 + timedelta(days=7 * 10)
    pass_id = store.record_pass(as_of=at, started_at=at).id
    open_ids = [f.forecast.id for f in store.issued_forecasts(model="pick", open_only=True)]
    assert len(open_ids) > 3
    store.record_outcomes(pass_id, [Outcome(i, 100.0, classify_outcome(100.0, 90.0, 110.0))
                                    for i in open_ids])
    again = store.scored_forecasts("pick", last=3, chunk=2)
    fresh = Store.open(store.path)
    try:
        _same_scored(again, fresh.scored_forecasts("pick", last=3, chunk=10**9))
    finally:
        fresh.close()
    assert again.forecast_id.tolist() != kept.forecast_id.tolist()  # the late scores count


def test_the_default_chunk_is_a_useful_size() -> None:
    # Large enough that fetching is not the cost, small enough that a chunk's Python rows stay
    # some tens of megabytes (about 800 bytes a row, measured by tests/benchmarks/bench_history).
    assert 1_000 <= SCORED_CHUNK <= 200_000


def test_the_pages_know_which_of_their_forecasts_are_scored(store: Store) -> None:
    config = parse_config(
        "feeds:\n  depot:\n    inbox: in\n    period: week_ending\n    cadence: 7d\n"
        "models:\n  pick:\n    feed: depot\n    response: y\n    predictors: [x]\n"
        "    per: site\n")
    history = load_model(store, config, "pick", lookback=4)
    passes = [p.id for p in store.list_passes(limit=4)]
    # Every forecast of the latest four passes, pass by pass and as issued: what the pages
    # read in full before they kept records of the open ones only.
    want = [f for p in sorted(passes) for f in store.list_forecasts(model="pick", pass_id=p)]
    scored = set(store.scored_forecasts("pick", latest_only=False).forecast_id.tolist())
    assert sorted(history.unscored, key=lambda f: f.id) == [f for f in want if f.id not in scored]
    expected: dict[tuple[str | None, int], int] = {}
    for record in want:
        if record.id not in scored:
            key = (record.series, record.target_period_key)
            expected[key] = max(expected.get(key, 0), record.id)
    got = history.open_forecasts()
    assert sorted(r.id for r in got) == sorted(expected.values())
    assert 0 < len(got) < len(want)
    # Of the scored ones the pages keep each series and the fits behind its forecasts (the
    # coefficient chart's refits), the same as from the records.
    fits: dict[str | None, set[int]] = {}
    for record in want:
        fits.setdefault(record.series, set()).update(
            () if record.fit_id is None else (record.fit_id,))
    assert history.forecast_fits == fits
    only_open: dict[str | None, set[int]] = {}
    for record in history.unscored:
        only_open.setdefault(record.series, set()).update(
            () if record.fit_id is None else (record.fit_id,))
    assert fits != only_open  # the scored forecasts' fits count too


def test_what_passes_scored_is_found_by_the_pass_that_scored_it(store: Store) -> None:
    # Every pass asks, for every model, which series were scored since the last finished pass,
    # and the pages which models a pass changed. Both look the outcomes up by the pass that
    # scored them (migration 7's index): walking every forecast a model ever issued to find
    # them took 2.3 s at 10,000 series × 156 weeks and grew with the history.
    scored = store._conn.execute(
        "SELECT o.pass_id, f.model, f.series_key FROM outcomes AS o JOIN forecasts AS f "
        "ON f.id = o.forecast_id").fetchall()
    last = max(p for p, _, _ in scored)
    assert len({p for p, _, _ in scored}) > 3
    for model in MODELS:
        for after in range(last + 1):
            want = {key for p, m, key in scored if m == model and p > after}
            got, plan = plan_of_statement(store, lambda m=model, a=after: (
                store.series_scored_after(m, a)))
            assert {"" if s is None else s for s in got} == want, (model, after)
            assert "USING INDEX outcomes_by_pass" in plan, plan
    for pass_id in range(1, last + 1):
        changed, plan = plan_of_statement(store, lambda p=pass_id: store.models_changed_in_pass(p))
        assert {m for p, m, _ in scored if p == pass_id} <= changed
        assert "SCAN o" not in plan and "outcomes_by_pass" in plan, plan


@pytest.mark.parametrize("with_df", [False, True])
@pytest.mark.parametrize("last", [1, 2, 3, 5, 50])
def test_the_latest_read_by_scan_equals_the_read_through_the_index(
    store: Store, monkeypatch: pytest.MonkeyPatch, with_df: bool, last: int
) -> None:
    # A fresh ``last=`` read of a model that is most of the forecasts, with a history not much
    # longer than ``last``, scans the outcomes and cuts each series afterwards; through the
    # index otherwise. The columns must be the same either way, and equal to the query.
    path = store.path

    def read(share: int) -> ScoredForecasts:
        monkeypatch.setattr(results, "SCAN_SHARE", share)
        fresh = Store.open(path)  # no rows kept from an earlier read on the connection
        try:
            return fresh.scored_forecasts("pick", last=last, with_df=with_df, chunk=3)
        finally:
            fresh.close()

    scanned, indexed = read(10**6), read(0)
    _same_scored(scanned, indexed)
    want = _scored_columns(store._conn.execute(
        _latest_scored_sql(_scored_select(with_df), "pick"),
        ("pick", 1, "", last - 1, 10**12)).fetchall())
    keep = _scored_rows_to_keep(want[1], want[2], want[4], True, last)
    assert scanned.forecast_id.tolist() == want[0][keep].tolist()
    assert len(scanned) > 0


def test_each_scored_forecast_s_residual_df_is_its_fit_s(store: Store) -> None:
    # Stored beside each forecast when it is written (migration 9); the reads used to take it
    # from the fit's inference row by row. The same values, and some differ between fits.
    oracle = dict(store._conn.execute(
        "SELECT f.id, (SELECT json_extract(fi.inference, '$.residual_df') FROM fits AS fi "
        "WHERE fi.id = f.fit_id) FROM forecasts AS f"))
    for last in (None, 3):
        got = store.scored_forecasts(latest_only=False, last=last, with_df=True)
        assert got.residual_df is not None and len(got) > 0
        want = [np.nan if oracle[i] is None else float(oracle[i])
                for i in got.forecast_id.tolist()]
        assert np.array_equal(got.residual_df, np.array(want), equal_nan=True)
        assert len(set(want)) > 3
