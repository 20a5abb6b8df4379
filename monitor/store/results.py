"""What passes produce: passes, model versions, fits, forecasts, outcomes, baselines."""

from __future__ import annotations

import json
import sqlite3
import struct
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime
from operator import itemgetter
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray
else:
    from monitor.store.lazy import np

from monitor.store.base import StoreBase
from monitor.store.records import (
    AwaitingOutcome,
    BaselineRecord,
    BaselineRow,
    FitRecord,
    FitRow,
    ForecastRecord,
    ForecastRow,
    IssuedForecast,
    ModelVersionRecord,
    PassRecord,
    RecordedForecasts,
    ScoredForecasts,
    StoreError,
    _maybe_utc,
    _series,
    _skey,
    parse_utc,
    to_json,
    utc_text,
)
from monitor.vocabulary import Outcome, OutcomeKind


class ResultsMixin(StoreBase):
    # ----------------------------------------------------------------- passes

    def record_pass(self, *, as_of: datetime, started_at: datetime) -> PassRecord:
        """Start a pass (status ``running``); returns it with its id.

        Only one process writes at a time (the writer lock), so a pass still ``running`` here is
        one that died: it is marked ``interrupted``.
        """
        with self.transaction():
            self._conn.execute("UPDATE passes SET status = 'interrupted' WHERE status = 'running'")
            cursor = self._conn.execute(
                "INSERT INTO passes (as_of, started_at, status) VALUES (?, ?, 'running')",
                (utc_text(as_of), utc_text(started_at)),
            )
            pass_id = int(cursor.lastrowid or 0)
        return self._require(self.get_pass(pass_id), "pass", pass_id)

    def finish_pass(
        self,
        pass_id: int,
        *,
        finished_at: datetime,
        status: str = "finished",
        counts: Mapping[str, Any] | None = None,
    ) -> PassRecord:
        """Close a pass with its status (``finished`` or ``failed``) and counts (JSON)."""
        if status not in ("finished", "failed"):
            raise ValueError(f"a pass finishes as 'finished' or 'failed', not {status!r}")
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE passes SET finished_at = ?, status = ?, counts = ? WHERE id = ?",
                (utc_text(finished_at), status, to_json(dict(counts or {})), pass_id),
            )
            if cursor.rowcount != 1:
                raise StoreError(f"no pass with id {pass_id}")
        return self._require(self.get_pass(pass_id), "pass", pass_id)

    def get_pass(self, pass_id: int) -> PassRecord | None:
        row = self._dict("SELECT * FROM passes WHERE id = ?", (pass_id,))
        return None if row is None else _pass_record(row)

    def latest_pass(self, *, finished_only: bool = False) -> PassRecord | None:
        """The most recent pass (its ``as_of`` is the latest business clock), or None."""
        where = "WHERE status = 'finished'" if finished_only else ""
        row = self._dict(f"SELECT * FROM passes {where} ORDER BY id DESC LIMIT 1")
        return None if row is None else _pass_record(row)

    def list_passes(self, limit: int = 10) -> list[PassRecord]:
        """The latest ``limit`` passes, newest first."""
        rows = self._dicts("SELECT * FROM passes ORDER BY id DESC LIMIT ?", (limit,))
        return [_pass_record(row) for row in rows]

    # ----------------------------------------------------------------- model versions

    def record_model_version(
        self, model: str, *, signature: str, config: Mapping[str, Any], created_at: datetime
    ) -> tuple[ModelVersionRecord, bool]:
        """The model's current version if its signature is unchanged, else a new version.

        Returns (version, created). ``signature`` is whatever identifies the model's shape
        (response, predictors, ``per:``); editing it starts a new version (DESIGN.md section 6).
        """
        with self.transaction():
            current = self.current_model_version(model)
            if current is not None and current.signature == signature:
                return current, False
            version = 1 if current is None else current.version + 1
            self._conn.execute(
                "INSERT INTO model_versions (model, version, signature, config, created_at) "
                "VALUES (?, ?, ?, ?, ?)",
                (model, version, signature, to_json(dict(config)), utc_text(created_at)),
            )
        record = self.current_model_version(model)
        assert record is not None
        return record, True

    def current_model_version(self, model: str) -> ModelVersionRecord | None:
        row = self._dict(
            "SELECT * FROM model_versions WHERE model = ? ORDER BY version DESC LIMIT 1", (model,)
        )
        return None if row is None else _model_version(row)

    def model_versions(self, model: str) -> list[ModelVersionRecord]:
        rows = self._dicts(
            "SELECT * FROM model_versions WHERE model = ? ORDER BY version", (model,)
        )
        return [_model_version(row) for row in rows]

    # ----------------------------------------------------------------- fits

    def record_fits(self, pass_id: int, fits: Sequence[FitRow]) -> tuple[int, ...]:
        """Store a pass's fits in one transaction; returns their ids in the order given.

        One fit per (pass, model, series): recording the same one again returns the stored id.
        """
        params = [
            (
                pass_id, fit.model, fit.version, _skey(fit.series), fit.window_first,
                fit.window_first_key, fit.window_last, fit.window_last_key, fit.n,
                int(fit.estimable), fit.reason, to_json(dict(fit.coefficients)),
                to_json(dict(fit.inference)), to_json(dict(fit.diagnostics)),
            )
            for fit in fits
        ]
        with self.transaction():
            self._conn.executemany(
                "INSERT INTO fits (pass_id, model, version, series_key, window_first, "
                "window_first_key, window_last, window_last_key, n, estimable, reason, "
                "coefficients, inference, diagnostics) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) "
                "ON CONFLICT (pass_id, model, series_key) DO NOTHING",
                params,
            )
            ids = {
                (model, skey): fit_id
                for fit_id, model, skey in self._conn.execute(
                    "SELECT id, model, series_key FROM fits WHERE pass_id = ?", (pass_id,)
                )
            }
        return tuple(ids[(fit.model, _skey(fit.series))] for fit in fits)

    def get_fit(self, fit_id: int) -> FitRecord | None:
        row = self._dict("SELECT * FROM fits WHERE id = ?", (fit_id,))
        return None if row is None else _fit_record(row)

    def latest_fits(
        self, model: str, *, version: int | None = None, up_to_pass: int | None = None
    ) -> dict[str | None, FitRecord]:
        """The latest fit of each series of a model (of one version if given; made in a pass
        with id at most ``up_to_pass`` if given)."""
        rows = self._dicts(
            "SELECT * FROM fits WHERE id IN (SELECT max(id) FROM fits WHERE model = ?1 "
            "AND (?2 IS NULL OR version = ?2) AND (?3 IS NULL OR pass_id <= ?3) "
            "GROUP BY series_key) ORDER BY series_key",
            (model, version, up_to_pass),
        )
        return {_series(row["series_key"]): _fit_record(row) for row in rows}

    def latest_fit_marks(
        self, model: str, *, version: int | None = None, up_to_pass: int | None = None
    ) -> dict[str | None, tuple[int | None, bool]]:
        """Of the latest fit of each series (as :meth:`latest_fits` picks it), only the last
        period key of its window and whether it was estimable: what a pass compares with,
        without reading the fits' JSON. Each series' index is walked back from its latest
        fit, which usually qualifies at once, instead of reading every fit of the model (a pass
        asks this of every model)."""
        rows = self._conn.execute(
            "SELECT f.series_key, f.window_last_key, f.estimable FROM (SELECT DISTINCT "
            "series_key FROM fits WHERE model = ?1) AS k JOIN fits AS f ON f.id = (SELECT id "
            "FROM fits WHERE model = ?1 AND series_key = k.series_key AND (?2 IS NULL OR "
            "version = ?2) AND (?3 IS NULL OR pass_id <= ?3) ORDER BY id DESC LIMIT 1)",
            (model, version, up_to_pass),
        )
        return {_series(key): (last, bool(estimable)) for key, last, estimable in rows}

    def models_changed_in_pass(self, pass_id: int) -> set[str]:
        """Models that a pass gave fits, forecasts, outcomes or finding changes."""
        cursor = self._conn.execute(
            "SELECT model FROM fits WHERE pass_id = ?1 "
            "UNION SELECT model FROM forecasts WHERE pass_id = ?1 "
            "UNION SELECT f.model FROM outcomes AS o JOIN forecasts AS f ON f.id = o.forecast_id "
            "WHERE o.pass_id = ?1 "
            "UNION SELECT model FROM findings WHERE model IS NOT NULL AND (first_pass_id = ?1 "
            "OR last_pass_id = ?1 OR last_false_pass_id = ?1 OR cleared_pass_id = ?1)",
            (pass_id,),
        )
        return {row[0] for row in cursor}

    # ----------------------------------------------------------------- forecasts and outcomes

    def record_forecasts(self, pass_id: int, rows: Sequence[ForecastRow]) -> RecordedForecasts:
        """Append a pass's forecasts in one transaction; ids come back in the order given.

        Unique per (pass, model, series, target period): recording one again changes nothing.
        """
        stamps: dict[datetime, str] = {}  # a pass issues its forecasts at one or few moments
        params = []
        for row in rows:
            stamp = stamps.get(row.issued_at)
            if stamp is None:
                stamp = stamps[row.issued_at] = utc_text(row.issued_at)
            params.append(
                (
                    pass_id, row.fit_id, row.model, row.version, row.feed, _skey(row.series),
                    row.target_period, row.target_period_key, row.observation_id, stamp,
                    row.lead, to_json(dict(row.inputs)) if row.inputs else "{}", row.point,
                    row.mean_lower, row.mean_upper, row.lower, row.upper, row.level,
                    row.leverage, int(row.extrapolation), row.calibrated_lower,
                    row.calibrated_upper, row.calibrated_factor, row.fit_id,
                )
            )
        with self.transaction():
            # The statement's own rows: total_changes would count the rows its trigger adds to
            # unscored_forecasts too.
            written = self._conn.executemany(
                "INSERT INTO forecasts (pass_id, fit_id, model, version, feed, series_key, "
                "target_period, target_period_key, observation_id, issued_at, lead, inputs, "
                "point, mean_lower, mean_upper, lower, upper, level, leverage, extrapolation, "
                "calibrated_lower, calibrated_upper, calibrated_factor, residual_df) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, "
                # The fit's residual degrees of freedom as its inference records them, found
                # once here rather than at every read of the scored forecasts (migration 9).
                "(SELECT json_extract(fi.inference, '$.residual_df') FROM fits AS fi "
                "WHERE fi.id = ?)) "
                "ON CONFLICT (pass_id, model, series_key, target_period_key) DO NOTHING",
                params,
            )
            inserted = written.rowcount
            ids = {
                (model, skey, key): forecast_id
                for forecast_id, model, skey, key in self._conn.execute(
                    "SELECT id, model, series_key, target_period_key FROM forecasts "
                    "WHERE pass_id = ?",
                    (pass_id,),
                )
            }
        aligned = tuple(ids[(r.model, _skey(r.series), r.target_period_key)] for r in rows)
        return RecordedForecasts(aligned, inserted)

    def list_forecasts(
        self, *, model: str | None = None, pass_id: int | None = None
    ) -> list[ForecastRecord]:
        """Forecasts in the order issued, optionally of one model or one pass."""
        rows = self._dicts(
            "SELECT * FROM forecasts WHERE (?1 IS NULL OR model = ?1) "
            "AND (?2 IS NULL OR pass_id = ?2) ORDER BY id",
            (model, pass_id),
        )
        return [_forecast_record(row) for row in rows]

    def issued_forecasts(
        self,
        *,
        model: str | None = None,
        series: str | None = None,
        from_key: int | None = None,
        to_key: int | None = None,
        open_only: bool = False,
        pass_ids: Sequence[int] | None = None,
    ) -> list[IssuedForecast]:
        """Every forecast issued, with its actual and outcome once scored, in issue order
        (pass, then model, series and target period). Filters: one model, one series (its
        ``per:`` value), target period keys from/to (inclusive), only those not scored yet,
        only those issued by the passes given."""
        clauses = ["1 = 1"]
        params: list[Any] = []
        if model is not None:
            clauses.append("f.model = ?")
            params.append(model)
        if series is not None:
            clauses.append("f.series_key = ?")
            params.append(_skey(series))
        if from_key is not None:
            clauses.append("f.target_period_key >= ?")
            params.append(from_key)
        if to_key is not None:
            clauses.append("f.target_period_key <= ?")
            params.append(to_key)
        if open_only:
            clauses.append("o.id IS NULL")
        if pass_ids is not None:
            clauses.append(f"f.pass_id IN ({', '.join('?' for _ in pass_ids) or 'NULL'})")
            params.extend(pass_ids)
        rows = self._dicts(
            "SELECT f.*, o.actual AS o_actual, o.outcome AS o_outcome FROM forecasts AS f "
            "LEFT JOIN outcomes AS o ON o.forecast_id = f.id "
            f"WHERE {' AND '.join(clauses)} "
            "ORDER BY f.pass_id, f.model, f.series_key, f.target_period_key, f.id",
            tuple(params),
        )
        stamps: dict[str, datetime] = {}
        return [
            IssuedForecast(
                _forecast_record(row, stamps), row["o_actual"],
                None if row["o_outcome"] is None else OutcomeKind(row["o_outcome"]),
            )
            for row in rows
        ]

    def forecast_fits(
        self, model: str, pass_ids: Sequence[int]
    ) -> dict[str | None, set[int]]:
        """Each series of ``model`` with a forecast issued by the passes given, and the fits
        those forecasts came from (an empty set for forecasts without a fit, e.g. of an
        ``interval:`` model); one query on the unique index's (pass, model) prefix."""
        if not pass_ids:
            return {}
        cursor = self._conn.execute(
            "SELECT DISTINCT series_key, fit_id FROM forecasts WHERE model = ? "
            f"AND pass_id IN ({', '.join('?' for _ in pass_ids)})",
            (model, *pass_ids),
        )
        fits: dict[str | None, set[int]] = {}
        for key, fit_id in cursor:
            ids = fits.setdefault(_series(key), set())
            if fit_id is not None:
                ids.add(int(fit_id))
        return fits

    def actual_row_counts(self, feed: str) -> dict[str | None, int]:
        """Rows with an actual (not plan rows), current revisions only, per series of a feed:
        what a series warming up has so far."""
        cursor = self._conn.execute(
            "SELECT s.key, count(*) FROM observations AS o JOIN series AS s "
            "ON s.id = o.series_id WHERE s.feed = ? AND o.is_plan = 0 AND o.current = 1 "
            "GROUP BY s.key",
            (feed,),
        )
        return {_series(key): int(count) for key, count in cursor}

    def forecasts_issued_after(
        self, model: str, pass_id: int, *, before: int | None = None
    ) -> list[ForecastRecord]:
        """Forecasts of ``model`` issued by passes with an id above ``pass_id`` (and below
        ``before``, when given). With both bounds, the unique index's pass range is read
        (``+model`` keeps SQLite from choosing the model's index instead, which reads every
        forecast of the model: each pass asks this of every model, for a range of one pass or
        none)."""
        which, upper, params = ("model", "", (model, pass_id)) if before is None else (
            "+model", " AND pass_id < ?", (model, pass_id, before))
        rows = self._dicts(
            f"SELECT * FROM forecasts WHERE {which} = ? AND pass_id > ?{upper} ORDER BY id",
            params)
        return [_forecast_record(row) for row in rows]

    def series_scored_after(self, model: str, pass_id: int) -> set[str | None]:
        """Series of ``model`` with an outcome scored by a pass with an id above ``pass_id``."""
        # The outcomes first, by the pass that scored them (``outcomes_by_pass``): a pass reads
        # the few it and a crashed one since scored, not every forecast of the model.
        cursor = self._conn.execute(
            "SELECT DISTINCT f.series_key FROM outcomes AS o CROSS JOIN forecasts AS f "
            "ON f.id = o.forecast_id WHERE o.pass_id > ? AND f.model = ?",
            (pass_id, model),
        )
        return {_series(row[0]) for row in cursor}

    def forecasts_awaiting_outcome(self, model: str, response: str) -> list[AwaitingOutcome]:
        """Unscored forecasts of ``model`` whose target now has an actual ``response`` value.

        The actual is the key's current row (the latest revision) when the pass scores it.
        """
        registries: dict[str, list[str]] = {}
        awaiting: list[AwaitingOutcome] = []
        # From the forecasts not scored yet (``unscored_forecasts``, kept by triggers), not from
        # every forecast of the model.
        cursor = self._conn.execute(
            "SELECT f.id, f.feed, f.series_key, f.target_period, f.target_period_key, f.lead, "
            "f.point, f.lower, f.upper, a.vals FROM unscored_forecasts AS u "
            "CROSS JOIN forecasts AS f ON f.id = u.forecast_id "
            "JOIN series AS s ON s.feed = f.feed AND s.key = f.series_key "
            "JOIN observations AS a ON a.series_id = s.id AND a.period_key = f.target_period_key "
            "AND a.is_plan = 0 AND a.current = 1 WHERE u.model = ? "
            "ORDER BY f.series_key, f.target_period_key, f.id",
            (model,),
        )
        for fid, feed, skey, period, key, lead, point, lower, upper, vals in cursor.fetchall():
            if feed not in registries:
                registries[feed] = [
                    row[0]
                    for row in self._conn.execute(
                        "SELECT name FROM feed_columns WHERE feed = ? ORDER BY position", (feed,)
                    )
                ]
            registry = registries[feed]
            if response not in registry or 8 * registry.index(response) >= len(vals):
                continue
            (actual,) = struct.unpack_from("<d", vals, 8 * registry.index(response))
            if actual != actual:  # NaN: this row has no value for the response
                continue
            awaiting.append(
                AwaitingOutcome(
                    int(fid), _series(skey), period, int(key), int(lead), float(point),
                    float(lower), float(upper), float(actual),
                )
            )
        return awaiting

    def record_outcomes(self, pass_id: int, outcomes: Iterable[Outcome]) -> int:
        """Score forecasts; a forecast is scored once (again is ignored). Returns how many new."""
        params = [
            (o.forecast_id, float(o.actual), OutcomeKind(o.outcome).value, pass_id)
            for o in outcomes
        ]
        with self.transaction():
            written = self._conn.executemany(  # its trigger leaves unscored_forecasts
                "INSERT INTO outcomes (forecast_id, actual, outcome, pass_id) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (forecast_id) DO NOTHING",
                params,
            )
            return written.rowcount

    def scored_forecasts(
        self,
        model: str | None = None,
        *,
        series: str | None = None,
        all_series: bool = True,
        latest_only: bool = True,
        last: int | None = None,
        with_df: bool = False,
        chunk: int | None = None,
    ) -> ScoredForecasts:
        """Scored forecasts for the coverage audit, as columns.

        ``latest_only``: per (model, series, target period) only the last forecast issued (the
        default audit); False keeps every issue (``--by-lead``). ``last``: only each series'
        latest ``last`` scored target periods. ``all_series=False`` restricts to ``series``.
        ``with_df``: also each forecast's fit's residual degrees of freedom (``residual_df``).
        ``chunk``: rows fetched and made columns at a time (default ``SCORED_CHUNK``); the result
        is the same whatever it is, only the memory a read holds at once changes.
        """
        if last is not None and last < 1:
            raise ValueError("last must be at least 1")
        # One ordered read (through the (model, series, target) index, or for most of the
        # history a scan put in that order: ``_every_scored_columns``) in chunks; the choice of
        # rows is made below on arrays (window functions in SQL were five times slower). With
        # ``last``, each series' earliest wanted target comes first from a short walk back its
        # index.
        select = _scored_select(with_df)
        params: tuple[Any, ...] = (model, int(all_series), _skey(series))
        if last is None:
            columns = self._every_scored_columns(params, with_df, chunk)
        elif model is not None and all_series:
            columns = self._latest_scored_columns(model, last, select, with_df, chunk)
        else:
            columns = _read_scored_columns(self._conn.execute(
                _latest_scored_sql(select, model), (*params, last - 1, _NO_BOUND)), chunk)
        keep = _scored_rows_to_keep(columns[1], columns[2], columns[4], latest_only, last)
        if not keep.all():
            columns = list(columns)  # the kept columns (``last=``) stay as they are
            for i, column in enumerate(columns):  # one column's copy at a time
                columns[i] = column[keep]
        kinds = {kind.value: kind for kind in OutcomeKind}
        return ScoredForecasts(
            forecast_id=columns[0],
            model=tuple(columns[1].tolist()),
            series=tuple(None if key == "" else key for key in columns[2].tolist()),
            target_period=tuple(columns[3].tolist()),
            target_period_key=columns[4],
            lead=columns[5],
            issued_at=tuple(columns[6].tolist()),
            actual=columns[7],
            point=columns[8],
            lower=columns[9],
            upper=columns[10],
            level=columns[11],
            outcome=tuple(kinds[kind] for kind in columns[12].tolist()),
            calibrated_lower=columns[13],
            calibrated_upper=columns[14],
            residual_df=columns[15] if with_df else None,
        )

    def _every_scored_columns(
        self, params: tuple[Any, ...], with_df: bool, chunk: int | None
    ) -> list[NDArray[Any]]:
        """The columns of ``scored_forecasts`` without ``last``, before the choice of issues.

        In the order of the (model, series, target) index, SQLite fetches each forecast's row
        from wherever the pass that issued it put it: a page read per row, since a pass writes
        every series' forecast side by side (1.9 M rows fetched in 33 s on the shared machine,
        ``tests/benchmarks/bench_history.py``'s database). Reading the outcomes in the order
        they were written, each with its forecast, takes the pages in order instead (11 s); the
        rows are then put in the index's order by sorting on (model, series key, target key,
        forecast id), which orders them totally (the id is unique) and as SQLite's ORDER BY does
        (its binary order of UTF-8 text is Python's order of the text), so the columns are the
        same. That scan passes over every model's outcomes, so it is taken only when the
        model's forecasts are at least ``1 / SCAN_SHARE`` of all (each row passed over costs
        about a tenth of a row fetched out of order); a model with few rows, or one series,
        is read through the index."""
        model, all_series = params[0], params[1]
        capacity = 0  # one series: not counted, the arrays grow as read
        if model is not None and all_series:
            scan, capacity = self._scan_pays(model)
            if scan:
                return self._one_model_scanned(model, with_df, chunk, capacity)
        if model is None:
            # Forecasts (scored or not) bound the rows read: the arrays are made that long.
            capacity = int(self._conn.execute(
                "SELECT ifnull(max(id), 0) FROM forecasts").fetchone()[0])
            select = _scored_select(with_df)
            return _in_scored_order(_read_scored_columns(
                self._conn.execute(_scan_scored_sql(select), params), chunk, capacity))
        columns = _read_scored_columns(self._conn.execute(
            _every_scored_sql(_scored_select(with_df, "NULL")), params), chunk, capacity)
        columns[1] = np.full(len(columns[0]), model, dtype="O")
        return columns

    def _scan_pays(self, model: str) -> tuple[bool, int]:
        """Whether ``model``'s forecasts are at least ``1 / SCAN_SHARE`` of all, so that a scan
        of every outcome costs less than reading its rows through the index; and how many it
        has (the arrays of a read are made that long at once)."""
        total = int(self._conn.execute("SELECT ifnull(max(id), 0) FROM forecasts").fetchone()[0])
        capacity = int(self._conn.execute(
            "SELECT count(*) FROM forecasts WHERE model = ?", (model,)).fetchone()[0])
        return capacity * SCAN_SHARE >= total, capacity

    def _one_model_scanned(
        self, model: str, with_df: bool, chunk: int | None, capacity: int,
        bound: int | None = None,
    ) -> list[NDArray[Any]]:
        """Every scored forecast of ``model`` (with outcome ids up to ``bound``, when given) by
        a scan of the outcomes, put in the index's order. Every row's model is that name
        (``f.model = ?1`` compares the stored text byte for byte): it is not fetched row by row
        (a string each) but filled in."""
        sql = _scan_scored_sql(_scored_select(with_df, "NULL"))
        params: tuple[Any, ...] = (model, 1, "")
        if bound is not None:
            sql, params = sql + " AND o.id <= ?4", (*params, bound)
        columns = _read_scored_columns(self._conn.execute(sql, params), chunk, capacity)
        columns[1] = np.full(len(columns[0]), model, dtype="O")
        return _in_scored_order(columns)

    def _latest_scored_columns(
        self, model: str, last: int, select: str, with_df: bool, chunk: int | None = None
    ) -> list[NDArray[Any]]:
        """The columns of ``scored_forecasts(model, last=…)`` before the choice of issues, read
        once per connection and then only what was scored since (the pass reads a model's latest
        horizon of scored forecasts every week; the demo's replay does so 875 times on one
        connection).

        Forecasts and outcomes are append-only, so the rows scored since the last read are the
        outcomes with a higher id. Each series' ``last``-th latest scored target can only move
        forward as outcomes arrive, so a row cut off before stays cut off: the kept rows plus the
        new ones, sorted as the query sorts them and cut again, equal a fresh read (every read
        stops at the outcomes id it started from, so both sides see the same rows). The columns
        are kept as arrays, so a read converts only the new rows.
        """
        bound = int(self._conn.execute("SELECT ifnull(max(id), 0) FROM outcomes").fetchone()[0])
        key = (model, last, with_df)
        # Inside a transaction the rows read may yet be rolled back: read them, keep nothing.
        settled = not self._conn.in_transaction
        held = self._scored_cache.get(key) if settled else None
        if held is None:
            columns = self._latest_scored_read(model, last, select, with_df, chunk, bound)
        elif held[0] == bound:
            columns = held[1]
        else:
            fresh = _read_scored_columns(self._conn.execute(
                select + "FROM outcomes AS o JOIN forecasts AS f ON f.id = o.forecast_id "
                "WHERE o.id > ?2 AND o.id <= ?3 AND f.model = ?1", (model, held[0], bound),
            ), chunk)
            # Back in the query's order (one model: series key, target period, forecast id).
            columns = _in_scored_order(
                [np.concatenate((a, b)) for a, b in zip(held[1], fresh, strict=True)])
            within = _scored_rows_to_keep(columns[1], columns[2], columns[4], False, last)
            columns = [column[within] for column in columns]
        if settled:
            self._scored_cache[key] = (bound, columns)
        return columns

    def _latest_scored_read(
        self, model: str, last: int, select: str, with_df: bool, chunk: int | None, bound: int
    ) -> list[NDArray[Any]]:
        """Each series' rows from its ``last``-th latest scored target on (every issue), with
        outcome ids up to ``bound``, in the index's order: a fresh read for
        ``_latest_scored_columns``.

        Through the index a row costs a page read wherever its pass wrote it. When the model is
        a large share of the forecasts and its history is not much longer than ``last`` periods
        (at most ``SCAN_SHARE`` times as many passes as ``last``), reading all of its outcomes in
        the order written and cutting each series to its latest ``last`` targets afterwards is
        cheaper, as for the whole history (``_every_scored_columns``): a weekly model with a
        horizon of 208 keeps the whole of its first four years anyway. Both give the same
        columns (``tests/test_scored_read.py``).
        """
        scan, capacity = self._scan_pays(model)
        passes = int(self._conn.execute("SELECT count(*) FROM passes").fetchone()[0])
        if not scan or passes > SCAN_SHARE * last:
            return _read_scored_columns(self._conn.execute(
                _latest_scored_sql(select, model), (model, 1, "", last - 1, bound)), chunk)
        columns = self._one_model_scanned(model, with_df, chunk, capacity, bound)
        within = _scored_rows_to_keep(columns[1], columns[2], columns[4], False, last)
        return [column[within] for column in columns]

    # ----------------------------------------------------------------- baselines

    def set_baselines(
        self, rows: Sequence[BaselineRow], *, created_at: datetime, pass_id: int | None = None
    ) -> int:
        """Set baselines (history kept: the newest per model, version and series is in force)."""
        for row in rows:
            if row.set_by not in ("auto", "declared", "rolled", "rebaseline"):
                raise ValueError(f"set_by is auto, declared, rolled or rebaseline: {row.set_by!r}")
        params = [
            (
                row.model, row.version, _skey(row.series), row.start_period, row.start_key,
                row.end_period, row.end_key, row.set_by, row.monitoring_start,
                row.monitoring_start_key, utc_text(created_at), pass_id,
            )
            for row in rows
        ]
        with self.transaction():
            self._conn.executemany(
                "INSERT INTO baselines (model, version, series_key, start_period, start_key, "
                "end_period, end_key, set_by, monitoring_start, monitoring_start_key, "
                "created_at, pass_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                params,
            )
        return len(params)

    def baseline(self, model: str, version: int, series: str | None) -> BaselineRecord | None:
        row = self._dict(
            "SELECT * FROM baselines WHERE model = ? AND version = ? AND series_key = ? "
            "ORDER BY id DESC LIMIT 1",
            (model, version, _skey(series)),
        )
        return None if row is None else _baseline_record(row)

    def baselines(self, model: str, version: int) -> dict[str | None, BaselineRecord]:
        """The baseline in force for each series of a model version."""
        rows = self._dicts(
            "SELECT * FROM baselines WHERE id IN (SELECT max(id) FROM baselines "
            "WHERE model = ? AND version = ? GROUP BY series_key) ORDER BY series_key",
            (model, version),
        )
        return {_series(row["series_key"]): _baseline_record(row) for row in rows}

    def baseline_history(self, model: str, series: str | None) -> list[BaselineRecord]:
        rows = self._dicts(
            "SELECT * FROM baselines WHERE model = ? AND series_key = ? ORDER BY id",
            (model, _skey(series)),
        )
        return [_baseline_record(row) for row in rows]


_NO_BOUND = 9223372036854775807  # no outcomes id is above it


def _scored_select(with_df: bool, model: str = "f.model") -> str:
    """The columns of a scored-forecasts read, in ``_SCORED_TYPES``'s order (``model``: what is
    read as the model's name)."""
    return (
        f"SELECT f.id, {model}, f.series_key, f.target_period, f.target_period_key, f.lead, "
        "f.issued_at, o.actual, f.point, f.lower, f.upper, f.level, o.outcome, "
        "f.calibrated_lower, f.calibrated_upper"
        + (", f.residual_df " if with_df else ", NULL ")
    )


def _every_scored_sql(select: str) -> str:
    """Every scored forecast of model ``?1`` (every model when NULL), of series ``?3`` unless
    ``?2``, in order of model, series, target period and issue."""
    return (
        select + "FROM forecasts AS f JOIN outcomes AS o ON o.forecast_id = f.id "
        "WHERE (?1 IS NULL OR f.model = ?1) AND (?2 OR f.series_key = ?3) "
        "ORDER BY f.model, f.series_key, f.target_period_key, f.id"
    )


def _scan_scored_sql(select: str) -> str:
    """``_every_scored_sql``'s rows in the order the outcomes were written (no ORDER BY): the
    outcomes scanned, each forecast fetched by its id."""
    return (
        select + "FROM outcomes AS o CROSS JOIN forecasts AS f ON f.id = o.forecast_id "
        "WHERE (?1 IS NULL OR f.model = ?1) AND (?2 OR f.series_key = ?3)"
    )


def _latest_scored_sql(select: str, model: str | None) -> str:
    """Each series' rows from its ``?4 + 1``-th latest scored target period on (every issue),
    among the outcomes with ids up to ``?5``."""
    # With a model, its own part of the index is searched, not the whole index scanned.
    which = "(?1 IS NULL OR model = ?1)" if model is None else "model = ?1"
    return (
        f"WITH scope AS (SELECT DISTINCT model, series_key FROM forecasts WHERE {which} "
        "AND (?2 OR series_key = ?3)), "
        "since AS (SELECT model, series_key, ifnull((SELECT DISTINCT "
        "b.target_period_key FROM forecasts AS b JOIN outcomes AS c "
        "ON c.forecast_id = b.id AND c.id <= ?5 WHERE b.model = scope.model "
        "AND b.series_key = scope.series_key ORDER BY b.target_period_key DESC "
        "LIMIT 1 OFFSET ?4), -9223372036854775808) AS first_key FROM scope) "
        + select + "FROM since JOIN forecasts AS f ON f.model = since.model "
        "AND f.series_key = since.series_key AND f.target_period_key >= since.first_key "
        "JOIN outcomes AS o ON o.forecast_id = f.id AND o.id <= ?5"
        " ORDER BY f.model, f.series_key, f.target_period_key, f.id"
    )


# dtype names, not numpy's types: the store must not import numpy before a read needs it (the
# light commands never do; tests/test_cli_startup.py).
_SCORED_TYPES = ("int64", "O", "O", "O", "int64", "int64", "O", "float64", "float64", "float64",
                 "float64", "float64", "O", "float64", "float64", "float64")

#: Rows a scored-forecasts read fetches and converts to columns at a time. SQLite's rows as
#: Python tuples cost about 800 bytes each (sixteen objects, five of them strings), so a model's
#: whole history read at once (three years of weekly passes at 10,000 series: 1.5 M rows) held
#: more than a gigabyte before it became arrays; a chunk holds some 40 MB.
SCORED_CHUNK = 50_000


#: A model's scored forecasts are read by a scan of every outcome (``_every_scored_columns``)
#: when its forecasts are at least this fraction of all forecasts, inverted (measured by
#: tests/benchmarks/bench_history.py: a row fetched in index order costs about ten times a row
#: passed over in a scan).
SCAN_SHARE = 10


def _in_scored_order(columns: list[NDArray[Any]]) -> list[NDArray[Any]]:
    """The columns sorted by model, series key, target period key and forecast id: the order of
    the scored-forecasts queries' ORDER BY."""
    if len(columns[0]) < 2:
        return columns
    keys = [columns[0], columns[4]]
    for i in (2, 1):  # series key, then model: each text's rank among the column's texts
        rank = {text: r for r, text in enumerate(sorted(set(columns[i].tolist())))}
        keys.append(np.fromiter(map(rank.__getitem__, columns[i].tolist()), np.int64,
                                len(columns[i])))
    order = np.lexsort(keys)
    del keys
    for i, column in enumerate(columns):  # one column's copy at a time
        columns[i] = column[order]
    return columns


def _read_scored_columns(
    cursor: sqlite3.Cursor, chunk: int | None = None, capacity: int = 0
) -> list[NDArray[Any]]:
    """The rows of a scored-forecasts query (an executed cursor) as one array per column, read
    ``chunk`` rows at a time (default ``SCORED_CHUNK``), each chunk made columns before the next
    is fetched. The arrays equal ``_scored_columns`` of all rows at once, value for value; a text
    that repeats (model, series key, target period, issue time, outcome) is one object
    throughout, so the columns of a long history hold a few thousand strings, not millions.

    ``capacity``: the rows expected (at most), when the caller knows: the chunks are copied into
    arrays of that length, cut to the rows read at the end, instead of being joined once all are
    read (which holds every chunk and the joined columns at once). Rows beyond it are joined."""
    size = SCORED_CHUNK if chunk is None else chunk
    if size < 1:
        raise ValueError("chunk must be at least 1")
    texts: dict[str, str] = {}
    block = [np.empty(capacity, dtype=kind) for kind in _SCORED_TYPES] if capacity > 0 else []
    filled = 0
    parts: list[list[NDArray[Any]]] = []
    while rows := cursor.fetchmany(size):
        part = _scored_columns(rows, texts)
        count = len(rows)
        del rows
        if not parts and filled + count <= capacity:  # rows past the block never go back in
            for column, values in zip(block, part, strict=True):
                column[filled:filled + count] = values
            filled += count
        else:
            parts.append(part)
    if filled:
        for i, column in enumerate(block):  # cut to the rows read, one column's copy at a time
            block[i] = column if filled == capacity else column[:filled].copy()
        parts.insert(0, block)
    del block
    if len(parts) < 2:
        return parts[0] if parts else _scored_columns(())
    columns: list[NDArray[Any]] = []
    for i in range(len(_SCORED_TYPES)):
        columns.append(np.concatenate([part[i] for part in parts]))
        for part in parts:  # each chunk's column is let go once joined: one copy at a time
            part[i] = columns[i][:0]
    return columns


def _scored_columns(
    rows: Sequence[tuple[Any, ...]], texts: dict[str, str] | None = None
) -> list[NDArray[Any]]:
    """The rows of a scored-forecasts query as one array per column (text as objects; NULL
    numbers as NaN). With ``texts``, each text is replaced by the first equal one seen (kept
    there across calls)."""
    count = len(rows)
    if texts is None:
        return [np.array(list(map(itemgetter(i), rows)), dtype=kind).reshape(count)
                for i, kind in enumerate(_SCORED_TYPES)]
    same = texts.setdefault
    columns = []
    for i, kind in enumerate(_SCORED_TYPES):
        values = list(map(itemgetter(i), rows))
        if kind == "O":
            values = list(map(same, values, values))
        columns.append(np.array(values, dtype=kind).reshape(count))
    return columns


def _scored_rows_to_keep(
    models: Sequence[str] | NDArray[Any],
    series_keys: Sequence[str] | NDArray[Any],
    target_keys: Sequence[int] | NDArray[Any],
    latest_only: bool,
    last: int | None,
) -> NDArray[np.bool_]:
    """Which rows (ordered by model, series, target, issue) the audit wants."""
    count = len(models)
    keep = np.ones(count, dtype=bool)
    if count == 0 or (not latest_only and last is None):
        return keep
    model = np.array(models, dtype=object)
    series = np.array(series_keys, dtype=object)
    target = np.array(target_keys, dtype=np.int64)
    new_group = np.ones(count, dtype=bool)  # first row of a (model, series)
    new_group[1:] = (model[1:] != model[:-1]) | (series[1:] != series[:-1])
    new_target = new_group.copy()  # first row of a (model, series, target)
    new_target[1:] |= target[1:] != target[:-1]
    if latest_only:
        keep[:-1] = new_target[1:]  # the last issue of each target period
    if last is not None:
        group = np.cumsum(new_group) - 1
        run = np.cumsum(new_target) - 1
        first_run = run[new_group]
        ends = np.append(np.flatnonzero(new_group)[1:] - 1, count - 1)
        targets_in_group = run[ends] - first_run + 1
        from_latest = targets_in_group[group] - (run - first_run[group])  # 1 = the latest
        keep &= from_latest <= last
    return keep


def _pass_record(row: Mapping[str, Any]) -> PassRecord:
    return PassRecord(
        id=row["id"],
        as_of=parse_utc(row["as_of"]),
        started_at=parse_utc(row["started_at"]),
        finished_at=_maybe_utc(row["finished_at"]),
        status=row["status"],
        counts=json.loads(row["counts"]),
    )


def _model_version(row: Mapping[str, Any]) -> ModelVersionRecord:
    return ModelVersionRecord(
        row["model"], row["version"], row["signature"], json.loads(row["config"]),
        parse_utc(row["created_at"]),
    )


def _fit_record(row: Mapping[str, Any]) -> FitRecord:
    return FitRecord(
        id=row["id"],
        pass_id=row["pass_id"],
        model=row["model"],
        version=row["version"],
        series=_series(row["series_key"]),
        n=row["n"],
        estimable=bool(row["estimable"]),
        reason=row["reason"],
        window_first=row["window_first"],
        window_first_key=row["window_first_key"],
        window_last=row["window_last"],
        window_last_key=row["window_last_key"],
        coefficients=json.loads(row["coefficients"]),
        inference=json.loads(row["inference"]),
        diagnostics=json.loads(row["diagnostics"]),
    )


def _forecast_record(
    row: Mapping[str, Any], stamps: dict[str, datetime] | None = None
) -> ForecastRecord:
    """A forecast row as its record; ``stamps``, kept across many rows, parses each issue time
    once (a pass issues its forecasts at one moment)."""
    issued_at = None if stamps is None else stamps.get(row["issued_at"])
    if issued_at is None:
        issued_at = parse_utc(row["issued_at"])
        if stamps is not None:
            stamps[row["issued_at"]] = issued_at
    return ForecastRecord(
        id=row["id"],
        pass_id=row["pass_id"],
        fit_id=row["fit_id"],
        model=row["model"],
        version=row["version"],
        feed=row["feed"],
        series=_series(row["series_key"]),
        target_period=row["target_period"],
        target_period_key=row["target_period_key"],
        observation_id=row["observation_id"],
        issued_at=issued_at,
        lead=row["lead"],
        inputs=json.loads(row["inputs"]),
        point=row["point"],
        mean_lower=row["mean_lower"],
        mean_upper=row["mean_upper"],
        lower=row["lower"],
        upper=row["upper"],
        level=row["level"],
        leverage=row["leverage"],
        extrapolation=bool(row["extrapolation"]),
        calibrated_lower=row["calibrated_lower"],
        calibrated_upper=row["calibrated_upper"],
        calibrated_factor=row["calibrated_factor"],
    )


def _baseline_record(row: Mapping[str, Any]) -> BaselineRecord:
    return BaselineRecord(
        id=row["id"],
        model=row["model"],
        version=row["version"],
        series=_series(row["series_key"]),
        start_period=row["start_period"],
        start_key=row["start_key"],
        end_period=row["end_period"],
        end_key=row["end_key"],
        set_by=row["set_by"],
        monitoring_start=row["monitoring_start"],
        monitoring_start_key=row["monitoring_start_key"],
        created_at=parse_utc(row["created_at"]),
        pass_id=row["pass_id"],
    )


__all__ = ["ResultsMixin"]
