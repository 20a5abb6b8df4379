"""What passes tell people: findings with their lifecycle, digests sent, the outbox of e-mail."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from monitor.store.base import StoreBase
from monitor.store.records import (
    DigestRecord,
    FindingNote,
    FindingRecord,
    FindingUpsert,
    OutboxMessage,
    StoreError,
    _finite_or_none,
    _maybe_utc,
    _series,
    _skey,
    parse_utc,
    utc_text,
)
from monitor.vocabulary import Finding, FindingKind, FindingState, Severity

# Every finding is read with its latest note and the number of notes.
_COLUMNS = (
    "findings.*, (SELECT json_object('at', n.noted_at, 'by', n.noted_by, 'text', n.text) "
    "FROM finding_notes n WHERE n.finding_id = findings.id ORDER BY n.id DESC LIMIT 1) "
    "AS latest_note, (SELECT count(*) FROM finding_notes n WHERE n.finding_id = findings.id) "
    "AS note_count, (SELECT p.as_of FROM passes p WHERE p.id = findings.last_pass_id) "
    "AS last_held_at"
)


class NoticesMixin(StoreBase):
    # ----------------------------------------------------------------- findings

    def _finding_where(
        self, model: str | None, series: str | None, feed: str | None, kind: FindingKind
    ) -> tuple[str, tuple[Any, ...]]:
        if model is None:
            if feed is None:
                raise ValueError("a finding names a model, or (feed-level) a feed")
            if series is not None:
                raise ValueError("a feed-level finding has no series")
            return "model IS NULL AND feed = ? AND kind = ?", (feed, FindingKind(kind).value)
        return "model = ? AND series_key = ? AND kind = ?", (
            model,
            _skey(series),
            FindingKind(kind).value,
        )

    def get_finding(self, finding_id: int) -> FindingRecord | None:
        row = self._dict(f"SELECT {_COLUMNS} FROM findings WHERE id = ?", (finding_id,))
        return None if row is None else _finding_record(row)

    def upsert_finding(self, finding: Finding, *, pass_id: int, at: datetime) -> FindingUpsert:
        """Raise a finding, or update the open one of the same (model, series, kind) / (feed, kind).

        An update keeps its first period and first pass, takes the new severity, figures and
        text, resets the count of passes with the condition false, and makes the state
        ``ongoing`` (it stays ``new`` within the pass that raised it).
        """
        where, params = self._finding_where(
            finding.model, finding.series, finding.feed, finding.kind
        )
        stamp = utc_text(at)
        with self.transaction():
            row = self._dict(
                f"SELECT {_COLUMNS} FROM findings WHERE {where} AND state <> 'cleared'", params
            )
            if row is None:
                cursor = self._conn.execute(
                    "INSERT INTO findings (model, series_key, feed, kind, severity, state, "
                    "since_period, statistic, p_value, message, action, first_pass_id, "
                    "last_pass_id, created_at, updated_at) "
                    "VALUES (?, ?, ?, ?, ?, 'new', ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (
                        finding.model, _skey(finding.series), finding.feed,
                        FindingKind(finding.kind).value, Severity(finding.severity).value,
                        finding.since_period, _finite_or_none(finding.statistic),
                        _finite_or_none(finding.p_value), finding.message, finding.action,
                        pass_id, pass_id, stamp, stamp,
                    ),
                )
                record = self.get_finding(int(cursor.lastrowid or 0))
                assert record is not None
                return FindingUpsert(record, True, None)
            previous = _finding_record(row)
            state = (
                FindingState.NEW
                if previous.state == FindingState.NEW and previous.first_pass_id == pass_id
                else FindingState.ONGOING
            )
            self._conn.execute(
                "UPDATE findings SET severity = ?, state = ?, "
                "since_period = coalesce(since_period, ?), statistic = ?, p_value = ?, "
                "message = ?, action = ?, last_pass_id = ?, false_streak = 0, "
                "last_false_pass_id = NULL, updated_at = ? WHERE id = ?",
                (
                    Severity(finding.severity).value, state.value, finding.since_period,
                    _finite_or_none(finding.statistic), _finite_or_none(finding.p_value),
                    finding.message, finding.action, pass_id, stamp, previous.id,
                ),
            )
            record = self.get_finding(previous.id)
            assert record is not None
            return FindingUpsert(record, False, previous.severity)

    def mark_finding_absent(
        self, finding_id: int, *, pass_id: int, at: datetime, clear_after: int
    ) -> FindingRecord:
        """Note that an open finding's condition was false in this pass; clear it after
        ``clear_after`` such passes in a row (hysteresis: findings do not flap).

        Counted once per pass; a pass that also found the condition true is not counted. Call
        it only for series the pass evaluated afresh.
        """
        if clear_after < 1:
            raise ValueError("clear_after must be at least 1")
        with self.transaction():
            row = self._dict(f"SELECT {_COLUMNS} FROM findings WHERE id = ?", (finding_id,))
            if row is None:
                raise StoreError(f"no finding with id {finding_id}")
            record = _finding_record(row)
            if (
                record.state == FindingState.CLEARED
                or row["last_false_pass_id"] == pass_id
                or record.last_pass_id == pass_id
            ):
                return record
            streak = record.false_streak + 1
            clear = streak >= clear_after
            self._conn.execute(
                "UPDATE findings SET false_streak = ?, last_false_pass_id = ?, state = ?, "
                "updated_at = ?, cleared_at = ?, cleared_pass_id = ? WHERE id = ?",
                (
                    streak, pass_id, "cleared" if clear else "ongoing", utc_text(at),
                    utc_text(at) if clear else None, pass_id if clear else None, finding_id,
                ),
            )
        return self._require(self.get_finding(finding_id), "finding", finding_id)

    def clear_finding(self, finding_id: int, *, pass_id: int, at: datetime) -> FindingRecord:
        """Clear an open finding at once (e.g. its model changed version or was rebaselined)."""
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE findings SET state = 'cleared', cleared_at = ?, cleared_pass_id = ?, "
                "updated_at = ? WHERE id = ? AND state <> 'cleared'",
                (utc_text(at), pass_id, utc_text(at), finding_id),
            )
            if cursor.rowcount == 0 and self.get_finding(finding_id) is None:
                raise StoreError(f"no finding with id {finding_id}")
        return self._require(self.get_finding(finding_id), "finding", finding_id)

    def note_finding(self, finding_id: int, *, at: datetime, by: str, text: str) -> FindingRecord:
        """``plumbline note ID TEXT``: record an owner's note. The finding stays listed with its
        state; from its first note on no message mentions it again. Notes are kept, in order."""
        if not text.strip():
            raise ValueError("a note needs some text")
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE findings SET acknowledged_at = coalesce(acknowledged_at, ?) WHERE id = ?",
                (utc_text(at), finding_id),
            )
            if cursor.rowcount != 1:
                raise StoreError(f"no finding with id {finding_id}")
            self._conn.execute(
                "INSERT INTO finding_notes (finding_id, noted_at, noted_by, text) "
                "VALUES (?, ?, ?, ?)",
                (finding_id, utc_text(at), by, text.strip()),
            )
        return self._require(self.get_finding(finding_id), "finding", finding_id)

    def finding_notes(self, finding_id: int) -> list[FindingNote]:
        """Every note on the finding, oldest first."""
        rows = self._dicts(
            "SELECT finding_id, noted_at, noted_by, text FROM finding_notes "
            "WHERE finding_id = ? ORDER BY id", (finding_id,),
        )
        return [FindingNote(r["finding_id"], parse_utc(r["noted_at"]), r["noted_by"], r["text"])
                for r in rows]

    def mark_new_findings_ongoing(self, pass_id: int) -> int:
        """Findings raised before ``pass_id`` are no longer ``new``; returns how many changed."""
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE findings SET state = 'ongoing' WHERE state = 'new' AND first_pass_id < ?",
                (pass_id,),
            )
            return cursor.rowcount

    def open_findings(
        self, *, model: str | None = None, feed: str | None = None, kind: FindingKind | None = None
    ) -> list[FindingRecord]:
        """Findings not cleared (``new`` or ``ongoing``), oldest first."""
        return self.list_findings(state="open", model=model, feed=feed, kind=kind)

    def list_findings(
        self,
        *,
        state: str = "all",
        model: str | None = None,
        feed: str | None = None,
        kind: FindingKind | None = None,
        raised_in_pass: int | None = None,
        cleared_in_pass: int | None = None,
    ) -> list[FindingRecord]:
        """Findings, oldest first. ``state``: ``all``, ``open`` or one of new/ongoing/cleared.

        ``raised_in_pass`` / ``cleared_in_pass`` pick what a pass's message reports.
        """
        if state == "all":
            states: tuple[str, ...] = ("new", "ongoing", "cleared")
        elif state == "open":
            states = ("new", "ongoing")
        else:
            states = (FindingState(state).value,)
        rows = self._dicts(
            f"SELECT {_COLUMNS} FROM findings WHERE state IN (SELECT value FROM json_each(?1)) "
            "AND (?2 IS NULL OR model = ?2) AND (?3 IS NULL OR feed = ?3) "
            "AND (?4 IS NULL OR kind = ?4) AND (?5 IS NULL OR first_pass_id = ?5) "
            "AND (?6 IS NULL OR cleared_pass_id = ?6) ORDER BY id",
            (
                json.dumps(states), model, feed, None if kind is None else FindingKind(kind).value,
                raised_in_pass, cleared_in_pass,
            ),
        )
        return [_finding_record(row) for row in rows]

    def latest_finding(
        self, *, model: str | None, series: str | None, feed: str | None, kind: FindingKind
    ) -> FindingRecord | None:
        """The newest finding of this scope and kind in any state (to carry an ack over)."""
        where, params = self._finding_where(model, series, feed, kind)
        row = self._dict(
            f"SELECT {_COLUMNS} FROM findings WHERE {where} ORDER BY id DESC LIMIT 1", params
        )
        return None if row is None else _finding_record(row)

    # ----------------------------------------------------------------- digests

    def record_digest(
        self,
        *,
        period_end: datetime,
        created_at: datetime,
        pass_id: int | None = None,
        path: str | Path | None = None,
    ) -> tuple[DigestRecord, bool]:
        """Record a digest sent for the period ending ``period_end``; (record, newly recorded)."""
        with self.transaction():
            cursor = self._conn.execute(
                "INSERT INTO digests (period_end, created_at, pass_id, path) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (period_end) DO NOTHING",
                (utc_text(period_end), utc_text(created_at), pass_id,
                 None if path is None else str(path)),
            )
            created = cursor.rowcount == 1
        row = self._dict("SELECT * FROM digests WHERE period_end = ?", (utc_text(period_end),))
        assert row is not None
        return _digest_record(row), created

    def latest_digest(self) -> DigestRecord | None:
        row = self._dict("SELECT * FROM digests ORDER BY period_end DESC LIMIT 1")
        return None if row is None else _digest_record(row)

    # ----------------------------------------------------------------- outbox

    def enqueue_message(
        self,
        *,
        kind: str,
        dedupe_key: str,
        recipients: Sequence[str],
        subject: str,
        body: bytes,
        created_at: datetime,
        pass_id: int | None = None,
    ) -> tuple[OutboxMessage, bool]:
        """Put a message in the outbox, due at once; (message, newly queued).

        ``dedupe_key`` names the message (e.g. ``pass:<model>:<as_of>``): a re-run that would
        queue the same message gets the one already there.
        """
        if kind not in ("pass", "digest"):
            raise ValueError(f"outbox kind is 'pass' or 'digest', not {kind!r}")
        for text in (*recipients, subject):
            if "\n" in text or "\r" in text:
                raise ValueError("recipients and subject must not contain line breaks")
        if not recipients:
            raise ValueError("a message needs at least one recipient")
        stamp = utc_text(created_at)
        with self.transaction():
            cursor = self._conn.execute(
                "INSERT INTO outbox (kind, dedupe_key, recipients, subject, body, created_at, "
                "pass_id, next_attempt_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?) "
                "ON CONFLICT (dedupe_key) DO NOTHING",
                (kind, dedupe_key, json.dumps(list(recipients)), subject, bytes(body), stamp,
                 pass_id, stamp),
            )
            created = cursor.rowcount == 1
        row = self._dict("SELECT * FROM outbox WHERE dedupe_key = ?", (dedupe_key,))
        assert row is not None
        return _outbox_message(row), created

    def due_messages(self, now: datetime, *, limit: int = 100) -> list[OutboxMessage]:
        """Unsent messages whose next attempt is due at ``now``, oldest first."""
        rows = self._dicts(
            "SELECT * FROM outbox WHERE sent_at IS NULL AND next_attempt_at <= ? "
            "ORDER BY next_attempt_at, id LIMIT ?",
            (utc_text(now), limit),
        )
        return [_outbox_message(row) for row in rows]

    def unsent_messages(self) -> list[OutboxMessage]:
        rows = self._dicts("SELECT * FROM outbox WHERE sent_at IS NULL ORDER BY id")
        return [_outbox_message(row) for row in rows]

    def mark_sent(self, message_id: int, *, at: datetime) -> None:
        """The server accepted the message. (A crash between the acceptance and this commit is
        the one case in which a message can go out twice.)"""
        with self.transaction():
            cursor = self._conn.execute(
                "UPDATE outbox SET sent_at = coalesce(sent_at, ?), attempts = attempts + 1 "
                "WHERE id = ?",
                (utc_text(at), message_id),
            )
            if cursor.rowcount != 1:
                raise StoreError(f"no outbox message with id {message_id}")

    def mark_failed(
        self,
        message_id: int,
        *,
        at: datetime,
        error: str,
        base_delay: timedelta = timedelta(minutes=1),
        max_delay: timedelta = timedelta(hours=6),
    ) -> datetime:
        """A send failed: keep the message, retry after base_delay · 2^(attempts − 1), capped.

        Returns the time of the next attempt. Messages are never dropped.
        """
        with self.transaction():
            row = self._conn.execute(
                "SELECT attempts FROM outbox WHERE id = ? AND sent_at IS NULL", (message_id,)
            ).fetchone()
            if row is None:
                raise StoreError(f"no unsent outbox message with id {message_id}")
            attempts = int(row[0]) + 1
            delay = min(max_delay, base_delay * (2 ** min(attempts - 1, 30)))
            next_at = at + delay
            self._conn.execute(
                "UPDATE outbox SET attempts = ?, last_error = ?, next_attempt_at = ? WHERE id = ?",
                (attempts, error, utc_text(next_at), message_id),
            )
        return next_at.astimezone(UTC)


def _finding_record(row: Mapping[str, Any]) -> FindingRecord:
    return FindingRecord(
        id=row["id"],
        model=row["model"],
        series=_series(row["series_key"]),
        feed=row["feed"],
        kind=FindingKind(row["kind"]),
        severity=Severity(row["severity"]),
        state=FindingState(row["state"]),
        since_period=row["since_period"],
        statistic=row["statistic"],
        p_value=row["p_value"],
        message=row["message"],
        action=row["action"],
        first_pass_id=row["first_pass_id"],
        last_pass_id=row["last_pass_id"],
        false_streak=row["false_streak"],
        created_at=parse_utc(row["created_at"]),
        updated_at=parse_utc(row["updated_at"]),
        acknowledged_at=_maybe_utc(row["acknowledged_at"]),
        cleared_at=_maybe_utc(row["cleared_at"]),
        cleared_pass_id=row["cleared_pass_id"],
        note=_note(row["id"], row.get("latest_note")),
        note_count=int(row.get("note_count") or 0),
        last_held_at=_maybe_utc(row.get("last_held_at")),
    )


def _note(finding_id: int, latest: str | None) -> FindingNote | None:
    if latest is None:
        return None
    fields = json.loads(latest)
    return FindingNote(finding_id, parse_utc(fields["at"]), fields["by"], fields["text"])


def _digest_record(row: Mapping[str, Any]) -> DigestRecord:
    return DigestRecord(
        row["id"], parse_utc(row["period_end"]), parse_utc(row["created_at"]), row["pass_id"],
        row["path"],
    )


def _outbox_message(row: Mapping[str, Any]) -> OutboxMessage:
    return OutboxMessage(
        id=row["id"],
        kind=row["kind"],
        dedupe_key=row["dedupe_key"],
        recipients=tuple(json.loads(row["recipients"])),
        subject=row["subject"],
        body=bytes(row["body"]),
        created_at=parse_utc(row["created_at"]),
        pass_id=row["pass_id"],
        attempts=row["attempts"],
        next_attempt_at=parse_utc(row["next_attempt_at"]),
        last_error=row["last_error"],
        sent_at=_maybe_utc(row["sent_at"]),
    )



__all__ = ["NoticesMixin"]
