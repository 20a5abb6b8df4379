"""Files taken from inboxes and the observations they brought: the ingest side of the database.

Storage of a row's numbers: each feed has a column registry (``feed_columns``, positions in order
of first appearance, never reordered), and a row's ``vals`` is one little-endian float64 per
position known when it was written, NaN where the row has no value. Reading the windows of
10,000 series × 104 rows then costs one query and one ``numpy.frombuffer``: measured 3.3 times
faster than the same read from JSON text with ``json_extract``, while writing costs about the
same either way (``tests/benchmarks/bench_store.py``). :meth:`FilesMixin.observation_history`
shows a series' rows with their values by name, for people and tests.
"""

from __future__ import annotations

import json
import math
import struct
from collections.abc import Iterable, Iterator, Mapping, Sequence
from datetime import datetime
from operator import itemgetter
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import numpy as np
else:
    from monitor.store.lazy import np

from monitor.store.base import StoreBase
from monitor.store.records import (
    FeedSummary,
    FileOutcome,
    FileRecord,
    ObservationBatch,
    ObservationCounts,
    ObservationRecord,
    ObservationRow,
    PlanRows,
    RejectedRow,
    Revision,
    SeriesWindows,
    StoreError,
    _maybe_utc,
    _series,
    _skey,
    parse_utc,
    to_json,
    utc_text,
)

_NAN = math.nan


def _refuse(row: ObservationRow, value: float) -> float:
    raise ValueError(f"line {row.line}: {value!r} is not a finite number")



def _positions_of(
    slot: Mapping[tuple[int, int], int], old: np.ndarray, series_id: np.ndarray, keys: np.ndarray
) -> np.ndarray:
    """Each row's position in ``slot`` by its (series id, period key), -1 where absent. Only
    rows of a known series whose key is among the keys read are looked up: a batch of new
    periods (a backlog's later files, most weekly files) reads none and looks up nothing."""
    out = np.full(series_id.size, -1, dtype=np.int64)
    if not slot:
        return out
    read_keys = np.fromiter((key for _, key in slot), np.int64, len(slot))
    rows = np.flatnonzero(old & np.isin(keys, read_keys))
    if rows.size:
        pairs = zip(series_id[rows].tolist(), keys[rows].tolist(), strict=True)
        out[rows] = [slot.get(pair, -1) for pair in pairs]
    return out


class FilesMixin(StoreBase):
    # ------------------------------------------------------------------ files

    def record_file(
        self,
        *,
        feed: str,
        name: str,
        sha256: str,
        size: int,
        received_at: datetime,
        outcome: FileOutcome,
        stored_path: str | Path,
        pass_id: int | None = None,
        rows_rejected: int = 0,
        errors_text: str = "",
        note: str = "",
        duplicate_of: int | None = None,
    ) -> FileRecord:
        """Record a file taken from an inbox; ``moved_at`` stays empty until it is in place.

        Row counts start at zero and :meth:`insert_observations` adds to them. A second
        ``archived`` file with the same ``sha256`` breaks a unique index (sqlite3.IntegrityError).
        """
        with self.transaction():
            cursor = self._conn.execute(
                "INSERT INTO files (feed, name, sha256, size, received_at, pass_id, outcome, "
                "duplicate_of, rows_rejected, stored_path, errors_text, note) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    feed, name, sha256, size, utc_text(received_at), pass_id,
                    FileOutcome(outcome).value, duplicate_of, rows_rejected, str(stored_path),
                    errors_text, note,
                ),
            )
            file_id = int(cursor.lastrowid or 0)
        return self._require(self.get_file(file_id), "file", file_id)

    def record_rejected_rows(self, file_id: int, rows: Iterable[RejectedRow]) -> int:
        """Keep the rows ingest refused, with line and reason (the source of NAME.rejected.csv)."""
        params = [(file_id, row.line, row.reason, json.dumps(list(row.cells))) for row in rows]
        with self.transaction():
            self._conn.executemany(
                "INSERT INTO rejected_rows (file_id, line, reason, cells) VALUES (?, ?, ?, ?)",
                params,
            )
        return len(params)

    def rejected_rows(self, file_id: int, *, limit: int | None = None) -> list[RejectedRow]:
        """A file's rejected rows by line (the first ``limit`` of them)."""
        cursor = self._conn.execute(
            "SELECT line, reason, cells FROM rejected_rows WHERE file_id = ? ORDER BY line "
            "LIMIT ?",
            (file_id, -1 if limit is None else limit),
        )
        return [RejectedRow(line, why, tuple(json.loads(cells))) for line, why, cells in cursor]

    def iter_rejected_rows(self, file_id: int) -> Iterator[RejectedRow]:
        """A file's rejected rows by line, read a thousand at a time (for a long list)."""
        last = None
        while True:
            rows = self._conn.execute(
                "SELECT line, reason, cells FROM rejected_rows WHERE file_id = ? "
                "AND (? IS NULL OR line > ?) ORDER BY line LIMIT 1000",
                (file_id, last, last),
            ).fetchall()
            if not rows:
                return
            for line, why, cells in rows:
                yield RejectedRow(line, why, tuple(json.loads(cells)))
            last = rows[-1][0]

    def settle_file(
        self,
        file_id: int,
        *,
        outcome: FileOutcome,
        stored_path: str | Path,
        rows_rejected: int,
        note: str = "",
    ) -> None:
        """Set what became of a file once its rows are read (in the transaction that stored
        them): outcome, destination, rejected-row count, note."""
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE files SET outcome = ?, stored_path = ?, rows_rejected = ?, note = ? "
                "WHERE id = ?",
                (FileOutcome(outcome).value, str(stored_path), rows_rejected, note, file_id),
            )
            if cursor.rowcount != 1:
                raise StoreError(f"no file with id {file_id}")

    def get_file(self, file_id: int) -> FileRecord | None:
        row = self._dict("SELECT * FROM files WHERE id = ?", (file_id,))
        return None if row is None else _file_record(row)

    def file_by_sha256(self, sha256: str, feed: str | None = None) -> FileRecord | None:
        """The file whose rows were ingested with these bytes (outcome ``archived``), or None;
        with ``feed``, in that feed only (duplicates are judged per feed)."""
        if feed is None:
            row = self._dict(
                "SELECT * FROM files WHERE sha256 = ? AND outcome = 'archived' ORDER BY id",
                (sha256,),
            )
        else:
            row = self._dict(
                "SELECT * FROM files WHERE sha256 = ? AND feed = ? AND outcome = 'archived'",
                (sha256, feed),
            )
        return None if row is None else _file_record(row)

    def files_awaiting_move(self, feed: str) -> list[FileRecord]:
        """Files committed but not confirmed in their destination (a crash came between)."""
        rows = self._dicts(
            "SELECT * FROM files WHERE feed = ? AND moved_at IS NULL ORDER BY id", (feed,)
        )
        return [_file_record(row) for row in rows]

    def mark_file_moved(
        self, file_id: int, *, at: datetime, stored_path: str | Path | None = None
    ) -> FileRecord:
        """Confirm a file is in its destination (giving ``stored_path`` when that had to change)."""
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE files SET moved_at = ?, stored_path = coalesce(?, stored_path) "
                "WHERE id = ?",
                (utc_text(at), None if stored_path is None else str(stored_path), file_id),
            )
            if cursor.rowcount != 1:
                raise StoreError(f"no file with id {file_id}")
        return self._require(self.get_file(file_id), "file", file_id)

    def list_files(
        self,
        *,
        feed: str | None = None,
        pass_id: int | None = None,
        limit: int | None = None,
        after_pass: int | None = None,
    ) -> list[FileRecord]:
        """Files taken from inboxes, oldest first, optionally of one feed or one pass, or of the
        passes with an id above ``after_pass``."""
        rows = self._dicts(
            "SELECT * FROM files WHERE (?1 IS NULL OR feed = ?1) AND (?2 IS NULL OR pass_id = ?2) "
            "AND (?4 IS NULL OR pass_id > ?4) ORDER BY id LIMIT ?3",
            (feed, pass_id, -1 if limit is None else limit, after_pass),
        )
        return [_file_record(row) for row in rows]

    # ------------------------------------------------------------------ registry and series

    def feed_columns(self, feed: str) -> list[str]:
        """The numeric columns ever stored for a feed, in storage order."""
        cursor = self._conn.execute(
            "SELECT name FROM feed_columns WHERE feed = ? ORDER BY position", (feed,)
        )
        return [row[0] for row in cursor]

    def _register_columns(self, feed: str, names: Sequence[str]) -> list[str]:
        registry = self.feed_columns(feed)
        for name in names:
            if name not in registry:
                self._conn.execute(
                    "INSERT INTO feed_columns (feed, position, name) VALUES (?, ?, ?)",
                    (feed, len(registry), name),
                )
                registry.append(name)
        return registry

    def _series_ids(self, feed: str) -> dict[str, int]:
        cursor = self._conn.execute("SELECT key, id FROM series WHERE feed = ?", (feed,))
        return dict(cursor.fetchall())

    # ------------------------------------------------------------------ writing rows

    def insert_observations(
        self, feed: str, file_id: int, columns: Sequence[str], rows: Iterable[ObservationRow]
    ) -> ObservationCounts:
        """Store one file's rows in one transaction; keys and revisions as in DESIGN.md section 6.

        An actual for a key that has none is new (revision 0). An actual equal to the key's
        current one is an identical re-send: counted, not stored. A different one is a revision:
        stored beside the old one with revision + 1, and current from then on. Every plan row is
        stored (a re-sent plan asks for a new forecast) and stays open until a newer plan or the
        key's actual arrives; a plan for a key that already has its actual is stored closed.
        ``columns`` names the entries of each row's ``values``. The file's counts are updated.
        """
        names = tuple(columns)
        if len(set(names)) != len(names):
            raise ValueError(f"columns named twice: {names}")
        if isinstance(rows, ObservationBatch):
            fresh_counts = self._insert_batch(feed, file_id, names, rows)
            if fresh_counts is not None:
                return fresh_counts
        batch = rows if isinstance(rows, list) else list(rows)
        new_actuals = revisions = plans = unchanged = 0
        revised: list[Revision] = []
        retire: list[tuple[int]] = []
        insert: list[tuple[Any, ...]] = []
        seen: set[tuple[str | None, int, bool]] = set()
        width_given = len(names)
        with self.transaction():
            registry = self._register_columns(feed, names)
            width = len(registry)
            positions = [registry.index(name) for name in names]
            in_order = positions == list(range(width))
            pack = struct.Struct(f"<{width}d").pack
            absent = pack(*([_NAN] * width))
            known = self._series_ids(feed)
            fresh = sorted({_skey(row.series) for row in batch} - known.keys())
            self._conn.executemany(
                "INSERT INTO series (feed, key) VALUES (?, ?)", [(feed, key) for key in fresh]
            )
            ids_by_series: dict[str | None, int] = {}
            ids_by_series.update(self._series_ids(feed) if fresh else known)
            if "" in ids_by_series:
                ids_by_series[None] = ids_by_series[""]
            labels: dict[int, str] = {}
            for row in batch:
                labels.setdefault(row.period_key, row.period)
            self._conn.executemany(
                "INSERT INTO periods (feed, period_key, period) VALUES (?, ?, ?) "
                "ON CONFLICT DO NOTHING",
                [(feed, key, text) for key, text in labels.items()],
            )
            actual_now, plan_now = self._current_rows(known, batch, labels)
            compare = bool(actual_now or plan_now)
            for row in batch:
                values = row.values
                if len(values) != width_given:
                    raise ValueError(f"line {row.line}: {len(values)} values, {width_given} names")
                seen_key = (row.series or None, row.period_key, row.is_plan)
                if seen_key in seen:
                    raise ValueError(f"series {row.series!r} period {row.period!r} given twice")
                seen.add(seen_key)
                # v - v is 0.0 exactly for finite numbers; + 0.0 turns -0.0 into 0.0.
                cleaned = [
                    _NAN if v is None else (v + 0.0 if v - v == 0.0 else _refuse(row, v))
                    for v in values
                ]
                if not in_order:
                    spread = [_NAN] * width
                    for position, value in zip(positions, cleaned, strict=True):
                        spread[position] = value
                    cleaned = spread
                vals = pack(*cleaned)
                series_id = ids_by_series[row.series or None]
                current = 1
                revision = 0
                if not compare:
                    if row.is_plan:
                        plans += 1
                    else:
                        new_actuals += 1
                    insert.append(
                        (series_id, row.period, row.period_key, int(row.is_plan), 0, 1, vals,
                         file_id, row.line)
                    )
                    continue
                slot = (series_id, row.period_key)
                actual = actual_now.get(slot)
                if row.is_plan:
                    plans += 1
                    previous = plan_now.get(slot)
                    if previous is not None:
                        revision = previous[2] + 1
                        retire.append((previous[0],))
                    if actual is not None:
                        current = 0  # its actual is already here: nothing to forecast
                else:
                    if actual is not None:
                        old = actual[1]
                        if old + absent[len(old) :] == vals:
                            unchanged += 1
                            continue
                        revision = actual[2] + 1
                        retire.append((actual[0],))
                        revisions += 1
                        revised.append(Revision(row.series, row.period, revision))
                    else:
                        new_actuals += 1
                    open_plan = plan_now.get(slot)
                    if open_plan is not None:
                        retire.append((open_plan[0],))  # the request is answered
                insert.append(
                    (series_id, row.period, row.period_key, int(row.is_plan), revision, current,
                     vals, file_id, row.line)
                )
            self._conn.executemany("UPDATE observations SET current = 0 WHERE id = ?", retire)
            self._conn.executemany(
                "INSERT INTO observations (series_id, period, period_key, is_plan, revision, "
                "current, vals, file_id, line) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                insert,
            )
            self._conn.execute(
                "UPDATE files SET rows_ingested = rows_ingested + ?, rows_plan = rows_plan + ?, "
                "revisions = revisions + ?, unchanged = unchanged + ? WHERE id = ?",
                (len(insert), plans, revisions, unchanged, file_id),
            )
        return ObservationCounts(new_actuals, revisions, plans, unchanged, tuple(revised))

    def _insert_batch(
        self, feed: str, file_id: int, names: tuple[str, ...], batch: ObservationBatch
    ) -> ObservationCounts | None:
        """The array path of :meth:`insert_observations`: the same rules as the row-by-row
        loop, decided over numpy columns and written with bulk statements.

        The current actual and open plan of the batch's keys are read once (as the loop reads
        them: the database before the batch, not rows of the batch itself), each row is matched
        to them, and revision, ``current``, what to retire and what to count follow from boolean
        arrays; the rows to store go in with one ``executemany`` in the batch's order, so ids,
        revisions and counts are the loop's. Returns None, having written nothing, when the loop
        would refuse the batch (a key given twice; two rows retiring the same row), so that the
        loop raises its own error."""
        count = len(batch)
        if batch.values.shape != (count, len(names)):
            raise ValueError(f"values of shape {batch.values.shape}, {len(names)} names")
        values = batch.values
        finite = np.isfinite(values) | np.isnan(values)
        if not finite.all():
            row = int(np.flatnonzero(~finite.all(axis=1))[0])
            raise ValueError(f"line {int(batch.line[row])}: not a finite number")
        with self.transaction():
            known = self._series_ids(feed)
            skeys = [_skey(name) for name in batch.series]
            keys = batch.row_keys()
            is_plan = batch.is_plan.astype(bool)
            if count:
                canon: dict[str, int] = {}
                code = np.array([canon.setdefault(k, len(canon)) for k in skeys], np.int64)
                who = code[batch.series_index]
                order = np.lexsort((keys, is_plan, who))
                pairs = np.stack([who[order], keys[order], is_plan[order].astype(np.int64)])
                if (np.diff(pairs, axis=1) == 0).all(axis=0).any():
                    return None  # a key given twice: the row-by-row path names it
            # Series ids known before this batch (-1: a new series, which has no rows yet).
            old_ids = np.array([known.get(key, -1) for key in skeys], dtype=np.int64)
            row_old_id = old_ids[batch.series_index] if count else np.zeros(0, np.int64)
            actual_at, plan_at, found = self._current_of(row_old_id, keys)
            has_actual, has_plan = actual_at >= 0, plan_at >= 0
            oid, blob, rev = found
            # An actual equal to the current one (its bytes, padded to today's width) is an
            # unchanged re-send; any other actual for a key with an actual is a revision.
            registry = self.feed_columns(feed)
            width = len(registry) + sum(1 for name in names if name not in registry)
            packed = self._packed(values, names, registry, width)
            blobs = packed.view(np.dtype((np.void, 8 * width))).ravel().tolist()
            compared = np.flatnonzero(~is_plan & has_actual)
            absent = struct.pack(f"<{width}d", *([_NAN] * width))
            same = np.array(
                [old + absent[len(old) :] == blobs[i]
                 for old, i in zip([blob[j] for j in actual_at[compared].tolist()],
                                   compared.tolist(), strict=True)],
                dtype=bool,
            )
            unchanged = np.zeros(count, dtype=bool)
            unchanged[compared[same]] = True
            revised_rows = np.zeros(count, dtype=bool)
            revised_rows[compared[~same]] = True
            stored = ~unchanged
            rev_array = np.array(rev, dtype=np.int64)
            revision = np.zeros(count, dtype=np.int64)
            plan_revised = is_plan & has_plan
            revision[plan_revised] = rev_array[plan_at[plan_revised]] + 1
            revision[revised_rows] = rev_array[actual_at[revised_rows]] + 1
            current = np.where(is_plan & has_actual, 0, 1)
            # What the loop retires, row by row: a plan's previous plan; a stored actual's
            # revised actual, then the plan it answers.
            oid_array = np.array(oid, dtype=np.int64)
            first = np.where(is_plan, np.where(has_plan, plan_at, -1),
                             np.where(revised_rows, actual_at, -1))
            second = np.where(~is_plan & stored & has_plan, plan_at, -1)
            retire_at = np.stack([first, second], axis=1).ravel()
            retire = oid_array[retire_at[retire_at >= 0]]
            if np.unique(retire).size != retire.size:
                return None  # the loop would retire a row twice and be refused
            registry = self._register_columns(feed, names)
            fresh = sorted({skeys[int(i)] for i in np.unique(batch.series_index).tolist()}
                           - known.keys()) if count else []
            self._conn.executemany(
                "INSERT INTO series (feed, key) VALUES (?, ?)", [(feed, key) for key in fresh]
            )
            if fresh:
                known = self._series_ids(feed)
            series_ids = np.array([known.get(key, -1) for key in skeys], dtype=np.int64)
            labels: dict[int, str] = {}
            if count:
                # Each period key's label from its first row, in the order of first rows.
                _, first_rows = np.unique(batch.period_index, return_index=True)
                for index in batch.period_index[np.sort(first_rows)].tolist():
                    labels.setdefault(batch.period_keys[index], batch.periods[index])
            self._conn.executemany(
                "INSERT INTO periods (feed, period_key, period) VALUES (?, ?, ?) "
                "ON CONFLICT DO NOTHING",
                [(feed, key, text) for key, text in labels.items()],
            )
            if retire.size:
                self._conn.execute(
                    "UPDATE observations SET current = 0 WHERE id IN "
                    "(SELECT value FROM json_each(?))",
                    (json.dumps(retire.tolist()),),
                )
            kept = np.flatnonzero(stored)
            period_text = batch.periods
            self._conn.executemany(
                "INSERT INTO observations (series_id, period, period_key, is_plan, revision, "
                f"current, vals, file_id, line) VALUES (?, ?, ?, ?, ?, ?, ?, {int(file_id)}, ?)",
                zip(
                    series_ids[batch.series_index[kept]].tolist(),
                    [period_text[i] for i in batch.period_index[kept].tolist()],
                    keys[kept].tolist(),
                    is_plan[kept].astype(np.int64).tolist(),
                    revision[kept].tolist(),
                    current[kept].tolist(),
                    [blobs[i] for i in kept.tolist()],
                    batch.line[kept].tolist(),
                    strict=True,
                ),
            )
            plans = int(is_plan.sum())
            revisions = int(revised_rows.sum())
            same_count = int(unchanged.sum())
            self._conn.execute(
                "UPDATE files SET rows_ingested = rows_ingested + ?, rows_plan = rows_plan + ?, "
                "revisions = revisions + ?, unchanged = unchanged + ? WHERE id = ?",
                (int(kept.size), plans, revisions, same_count, file_id),
            )
        revised = tuple(
            Revision(batch.series[s], batch.periods[p], r)
            for s, p, r in zip(
                batch.series_index[revised_rows].tolist(),
                batch.period_index[revised_rows].tolist(),
                revision[revised_rows].tolist(),
                strict=True,
            )
        )
        new_actuals = int((~is_plan & ~has_actual).sum())
        return ObservationCounts(new_actuals, revisions, plans, same_count, revised)

    @staticmethod
    def _packed(
        values: np.ndarray, names: tuple[str, ...], registry: list[str], width: int
    ) -> np.ndarray:
        """Rows' numbers laid out as stored: registry order (new names after the known ones,
        in the order given), little-endian float64, NaN where absent (one NaN, as the loop's
        ``math.nan``), -0.0 as 0.0."""
        order = list(registry)
        order.extend(name for name in names if name not in order)
        packed = np.full((values.shape[0], width), _NAN, dtype="<f8")
        for column, name in enumerate(names):
            cells = values[:, column]
            packed[:, order.index(name)] = np.where(np.isnan(cells), _NAN, cells + 0.0)
        return packed

    def _current_of(
        self, series_id: np.ndarray, keys: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, tuple[list[int], list[bytes], list[int]]]:
        """For each row (series id, -1 for a new series; period key): the position of its
        key's current actual and of its open plan in the rows read (-1: none), and those rows'
        ids, values and revisions. One range read per kind through its partial index."""
        none = np.full(series_id.size, -1, dtype=np.int64)
        found: tuple[list[int], list[bytes], list[int]] = ([], [], [])
        old = series_id >= 0
        if not old.any():
            return none, none.copy(), found
        ids = json.dumps(np.unique(series_id[old]).tolist())
        lo, hi = int(keys[old].min()), int(keys[old].max())
        slots: list[dict[tuple[int, int], int]] = [{}, {}]
        for plan in (0, 1):
            cursor = self._conn.execute(
                "SELECT series_id, period_key, id, vals, revision FROM observations "
                "WHERE series_id IN (SELECT value FROM json_each(?)) AND period_key BETWEEN ? "
                f"AND ? AND is_plan = {plan} AND current = 1",
                (ids, lo, hi),
            )
            for sid, key, row_id, vals, revision in cursor:
                slots[plan][(sid, key)] = len(found[0])
                found[0].append(row_id)
                found[1].append(vals)
                found[2].append(revision)
        return _positions_of(slots[0], old, series_id, keys), _positions_of(
            slots[1], old, series_id, keys), found

    def _current_rows(
        self,
        known: Mapping[str, int],
        batch: Sequence[ObservationRow],
        periods: Mapping[int, str],
    ) -> tuple[dict[tuple[int, int], tuple[int, bytes, int]], ...]:
        """Current actual and open plan of the batch's keys: (series id, period) -> row.

        One range read per kind over the batch's known series and its span of periods; rows
        outside the batch's keys come along and are simply not asked for.
        """
        found: tuple[dict[tuple[int, int], tuple[int, bytes, int]], ...] = ({}, {})
        ids = sorted({known[key] for key in {_skey(row.series) for row in batch} if key in known})
        if not ids or not periods:
            return found  # only new series: nothing to compare with
        params = (json.dumps(ids), min(periods), max(periods))
        for plan in (0, 1):
            cursor = self._conn.execute(
                "SELECT series_id, period_key, id, vals, revision FROM observations "
                "WHERE series_id IN (SELECT value FROM json_each(?)) AND period_key BETWEEN ? "
                f"AND ? AND is_plan = {plan} AND current = 1",
                params,
            )
            found[plan].update(((sid, pk), (oid, vals, rev)) for sid, pk, oid, vals, rev in cursor)
        return found

    # ------------------------------------------------------------------ reading rows

    def series_keys(self, feed: str) -> list[str | None]:
        """The series of a feed that have at least one actual, sorted."""
        cursor = self._conn.execute(
            "SELECT key FROM series AS s WHERE feed = ? AND EXISTS (SELECT 1 FROM observations "
            "AS o WHERE o.series_id = s.id AND o.is_plan = 0 AND o.current = 1) ORDER BY key",
            (feed,),
        )
        return [_series(row[0]) for row in cursor]

    def _decode(
        self, feed: str, blobs: list[bytes], names: Sequence[str]
    ) -> np.ndarray[Any, np.dtype[np.float64]]:
        """(rows, len(names)) values from stored blobs; NaN where absent or never a column."""
        registry = self.feed_columns(feed)
        width = len(registry)
        count = len(blobs)
        if width == 0 or count == 0:
            return np.full((count, len(names)), _NAN)
        full = 8 * width
        joined = b"".join(blobs)  # no blob is longer than the registry: all full if this is
        if len(joined) != full * count:
            padding = struct.pack(f"<{width}d", *([_NAN] * width))
            joined = b"".join(blob + padding[len(blob) :] for blob in blobs)
        matrix = np.frombuffer(joined, dtype="<f8").reshape(count, width)
        out = np.full((count, len(names)), _NAN)
        for index, name in enumerate(names):
            if name in registry:
                out[:, index] = matrix[:, registry.index(name)]
        return out

    def windows(
        self,
        feed: str,
        columns: Sequence[str],
        *,
        last: int | None = None,
        up_to_key: int | None = None,
        series: Sequence[str | None] | None = None,
        required: Sequence[str] | None = None,
    ) -> SeriesWindows:
        """The current actuals of every series of a feed (or of ``series``), from one query.

        A row counts only when every ``required`` column (default: all ``columns``) has a
        value; of those, each series keeps its latest ``last`` rows (all when None) with period
        key ≤ ``up_to_key``. Plan rows are never included. Series come sorted by name.
        """
        names = tuple(columns)
        needed = [names.index(name) for name in (names if required is None else required)]
        if last is not None and last < 1:
            raise ValueError("last must be at least 1")
        ids = self._series_ids(feed)
        if series is not None:
            wanted = {_skey(s) for s in series}
            ids = {key: sid for key, sid in ids.items() if key in wanted}
        key_of = {sid: key for key, sid in ids.items()}
        sql = (
            "SELECT series_id, period_key, vals FROM observations "
            "WHERE series_id IN (SELECT value FROM json_each(?)) AND is_plan = 0 AND current = 1 "
            + ("" if up_to_key is None else "AND period_key <= ? ")
            + "ORDER BY series_id, period_key"
        )
        params: list[Any] = [json.dumps(sorted(key_of))]
        if up_to_key is not None:
            params.append(up_to_key)
        rows = self._conn.execute(sql, params).fetchall()
        count = len(rows)
        series_id = np.fromiter(map(itemgetter(0), rows), np.int64, count)
        period_key = np.fromiter(map(itemgetter(1), rows), np.int64, count)
        values = self._decode(feed, list(map(itemgetter(2), rows)), names)
        del rows
        keep = ~np.isnan(values[:, needed]).any(axis=1) if needed else np.ones(count, bool)
        series_id, period_key, values = series_id[keep], period_key[keep], values[keep]
        starts = np.flatnonzero(np.diff(series_id)) + 1
        bounds = np.concatenate(([0], starts, [series_id.size] if series_id.size else []))
        bounds = bounds.astype(np.int64)
        if last is not None and series_id.size:
            lengths = np.diff(bounds)
            ends = np.repeat(bounds[1:], lengths)
            recent = ends - np.arange(series_id.size) <= last
            series_id, period_key, values = series_id[recent], period_key[recent], values[recent]
            bounds = np.concatenate(([0], np.cumsum(np.minimum(lengths, last)))).astype(np.int64)
        segment_keys = [key_of[int(sid)] for sid in series_id[bounds[:-1]]]
        order = sorted(range(len(segment_keys)), key=segment_keys.__getitem__)
        if order != list(range(len(order))):
            gather = np.concatenate(
                [np.arange(bounds[i], bounds[i + 1]) for i in order] or [np.zeros(0, np.int64)]
            )
            lengths = np.diff(bounds)[order]
            period_key, values = period_key[gather], values[gather]
            bounds = np.concatenate(([0], np.cumsum(lengths))).astype(np.int64)
            segment_keys = [segment_keys[i] for i in order]
        return SeriesWindows(
            feed=feed,
            columns=names,
            series=tuple(_series(key) for key in segment_keys),
            offsets=bounds,
            period_key=period_key,
            values=np.ascontiguousarray(values),
            period_labels=self.period_labels(feed, period_key),
        )

    def period_labels(self, feed: str, keys: Iterable[int]) -> dict[int, str]:
        """Each period key's label as first written in the feed."""
        if isinstance(keys, np.ndarray):
            wanted = set(np.unique(keys).tolist())
        else:
            wanted = {int(key) for key in keys}
        if not wanted:
            return {}
        cursor = self._conn.execute(
            "SELECT period_key, period FROM periods WHERE feed = ? AND period_key BETWEEN ? AND ?",
            (feed, min(wanted), max(wanted)),
        )
        return {key: text for key, text in cursor if key in wanted}

    def plan_rows_awaiting_forecast(
        self, feed: str, model: str, columns: Sequence[str]
    ) -> PlanRows:
        """Open plan rows of a feed that ``model`` has not forecast yet, with every column set.

        Open: the latest plan for its key, whose actual has not arrived.
        """
        names = tuple(columns)
        rows = self._conn.execute(
            "SELECT o.id, s.key, o.period, o.period_key, o.vals FROM observations AS o "
            "JOIN series AS s ON s.id = o.series_id WHERE s.feed = ? AND o.is_plan = 1 "
            "AND o.current = 1 AND NOT EXISTS (SELECT 1 FROM observations AS a "
            "WHERE a.series_id = o.series_id AND a.period_key = o.period_key AND a.is_plan = 0 "
            "AND a.current = 1) AND NOT EXISTS (SELECT 1 FROM forecasts AS f "
            "WHERE f.observation_id = o.id AND f.model = ?) ORDER BY s.key, o.period_key",
            (feed, model),
        ).fetchall()
        values = self._decode(feed, [row[4] for row in rows], names)
        keep = ~np.isnan(values).any(axis=1)
        rows = [row for row, kept in zip(rows, keep, strict=True) if kept]
        return PlanRows(
            columns=names,
            observation_id=np.array([row[0] for row in rows], dtype=np.int64),
            series=tuple(_series(row[1]) for row in rows),
            period=tuple(row[2] for row in rows),
            period_key=np.array([row[3] for row in rows], dtype=np.int64),
            values=values[keep],
        )

    def observation_history(
        self, feed: str, series: str | None = None, *, include_plans: bool = True
    ) -> list[ObservationRecord]:
        """Every stored row of one series (revisions and retired plans too), oldest first."""
        registry = self.feed_columns(feed)
        plans = "" if include_plans else "AND o.is_plan = 0 "
        rows = self._conn.execute(
            "SELECT o.id, o.period, o.period_key, o.is_plan, o.revision, o.current, o.vals, "
            "o.file_id, o.line FROM observations AS o JOIN series AS s ON s.id = o.series_id "
            f"WHERE s.feed = ? AND s.key = ? {plans}ORDER BY o.period_key, o.id",
            (feed, _skey(series)),
        ).fetchall()
        records = []
        for oid, period, key, is_plan, revision, current, vals, file_id, line in rows:
            numbers = struct.unpack(f"<{len(vals) // 8}d", vals)
            named = {n: v for n, v in zip(registry, numbers, strict=False) if not math.isnan(v)}
            records.append(
                ObservationRecord(
                    oid, series, period, key, bool(is_plan), revision, bool(current), named,
                    file_id, line,
                )
            )
        return records

    def series_with_rows_after(self, feed: str, observation_id: int) -> list[str | None]:
        """Series of a feed with any row (actual or plan) stored after ``observation_id``."""
        cursor = self._conn.execute(
            # CROSS JOIN fixes SQLite's join order: walk the rows after the mark (by the
            # primary key) and look each one's series up, instead of scanning the rows after
            # the mark once per series of the feed.
            "SELECT DISTINCT s.key FROM observations AS o CROSS JOIN series AS s "
            "ON s.id = o.series_id WHERE o.id > ? AND s.feed = ? ORDER BY s.key",
            (observation_id, feed),
        )
        return [_series(row[0]) for row in cursor]

    def last_observation_id(self) -> int:
        """The highest observation id so far (0 when none): a mark for "changed since"."""
        return int(self._conn.execute("SELECT ifnull(max(id), 0) FROM observations").fetchone()[0])

    def latest_actual_period(self, feed: str) -> tuple[int, str | None] | None:
        """The latest period key among a feed's current actuals and its label (None: no
        actual yet): :meth:`feed_summary`'s ``latest_period_key`` and ``latest_period``, found
        by one descent of the partial index per series instead of reading every row."""
        latest = self._conn.execute(
            "SELECT max((SELECT max(period_key) FROM observations WHERE series_id = s.id "
            "AND is_plan = 0 AND current = 1)) FROM series AS s WHERE s.feed = ?",
            (feed,),
        ).fetchone()[0]
        if latest is None:
            return None
        return int(latest), self.period_labels(feed, [latest]).get(latest)

    def feed_summary(self, feed: str) -> FeedSummary:
        """Counts and the latest period of a feed's current rows, and when it last sent a file."""
        actual_rows, series, latest_key = self._conn.execute(
            "SELECT count(*), count(DISTINCT o.series_id), max(o.period_key) "
            "FROM observations AS o JOIN series AS s ON s.id = o.series_id "
            "WHERE s.feed = ? AND o.is_plan = 0 AND o.current = 1",
            (feed,),
        ).fetchone()
        plan_rows = self._conn.execute(
            "SELECT count(*) FROM observations AS o JOIN series AS s ON s.id = o.series_id "
            "WHERE s.feed = ? AND o.is_plan = 1 AND o.current = 1",
            (feed,),
        ).fetchone()[0]
        received = self._conn.execute(
            "SELECT max(received_at) FROM files WHERE feed = ?", (feed,)
        ).fetchone()[0]
        latest = None if latest_key is None else self.period_labels(feed, [latest_key])
        return FeedSummary(
            feed=feed,
            actual_rows=int(actual_rows),
            plan_rows=int(plan_rows),
            series=int(series),
            latest_period=None if latest is None else latest.get(latest_key),
            latest_period_key=latest_key,
            last_received_at=_maybe_utc(received),
        )


def _file_record(row: Mapping[str, Any]) -> FileRecord:
    return FileRecord(
        id=row["id"],
        feed=row["feed"],
        name=row["name"],
        sha256=row["sha256"],
        size=row["size"],
        received_at=parse_utc(row["received_at"]),
        pass_id=row["pass_id"],
        outcome=FileOutcome(row["outcome"]),
        duplicate_of=row["duplicate_of"],
        rows_ingested=row["rows_ingested"],
        rows_plan=row["rows_plan"],
        rows_rejected=row["rows_rejected"],
        revisions=row["revisions"],
        unchanged=row["unchanged"],
        stored_path=Path(row["stored_path"]),
        errors_text=row["errors_text"],
        note=row["note"],
        moved_at=_maybe_utc(row["moved_at"]),
    )


__all__ = ["FilesMixin", "to_json"]
