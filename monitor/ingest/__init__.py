"""The drop-folder protocol (DESIGN.md section 6): take complete files from an inbox, check them,
store their rows in one transaction per file, and move each to archive or rejected.

The order for one file, and why it survives a crash at any point:

1. read the bytes (skipped if the file changes while read), hash them, parse them;
2. **one transaction**: the file's record (with the destination chosen now, a name free in the
   destination folder), its rejected rows, its observations;
3. move the file (no-clobber), write ``NAME.errors.txt`` / ``NAME.rejected.csv`` from what the
   database holds, move the ``NAME.ready`` marker beside it;
4. mark the record moved.

A crash after 2 leaves a record not marked moved. The next scan finds it first: the file still
in the inbox with the same bytes (or already at its destination) is that very file, so the move
is completed and the file reported, never rejected as a duplicate of itself. A file with bytes
already ingested under any name, that is not such a record's file, goes to rejected with
``NAME.errors.txt`` naming the earlier file. Nothing is ever deleted or altered: files keep their
bytes (moving is a hard link then an unlink, or a copy, fsync and link across file systems).

The ingest writes no findings: each :class:`FileReport` carries the ``rejected_input`` findings to
raise, for the pass to record.
"""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import io
import logging
import os
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, BinaryIO, Literal

if TYPE_CHECKING:
    import numpy as np
else:  # numpy on first use: `plumbline check` reads inboxes without it
    from monitor.store.lazy import np
from monitor.errors import DatabaseFaultError
from monitor.ingest.dialect import (
    DEFAULT_DECIMAL,
    DEFAULT_DELIMITER,
    decimal_comma_hint,
    needs_rewrite,
    separator_hint,
    standard_csv,
)
from monitor.ingest.folders import (
    MARKER_SUFFIX,
    InboxFile,
    InboxNote,
    InboxSurvey,
    free_name,
    inbox_notes,
    is_temporary_name,
    move_no_clobber,
    same_file,
    sha256_of,
    survey_inbox,
    write_new_file,
)
from monitor.ingest.parse import (
    DEFAULT_BLOCK_BYTES,
    ByteScreen,
    ColumnPlan,
    ParsedFile,
    Refused,
    Withheld,
    duplicate_rejections,
    open_csv,
    open_parquet,
    read_header,
)
from monitor.store import (
    FileOutcome,
    FileRecord,
    ObservationCounts,
    RejectedRow,
    Revision,
    Store,
    date_period_key,
)
from monitor.vocabulary import Finding, FindingKind, Severity

log = logging.getLogger(__name__)

# The real clock (never the business clock): POSIX seconds like time.time, or an aware datetime.
RealClock = Callable[[], float | datetime]


def _seconds(real_clock: RealClock) -> float:
    now = real_clock()
    if isinstance(now, datetime):
        if now.tzinfo is None:
            raise ValueError("the real clock must give an aware datetime (or POSIX seconds)")
        return now.timestamp()
    return float(now)


@dataclass(frozen=True)
class IngestSpec:
    """What ingest needs to know about one feed (the pass builds it from the config).

    ``responses``: the response columns of the feed's models; a row with all of them empty is a
    plan row. ``required``: columns that need a number in every row, actual or plan (the
    predictors). ``optional``: numeric columns that may be missing from the header or empty
    (e.g. the interval columns of a model audited only). The period, ``per:``, response and
    required columns must all be in the header, or the file is refused.
    """

    feed: str
    inbox: Path
    archive: Path
    rejected: Path
    period_column: str
    format: Literal["csv", "parquet"] = "csv"
    period_type: Literal["date", "integer"] = "date"
    per_column: str | None = None
    responses: tuple[str, ...] = ()
    required: tuple[str, ...] = ()
    optional: tuple[str, ...] = ()
    settle: timedelta = timedelta(seconds=30)
    detect_rename: bool = True  # rule 2 of monitor.ingest.folders
    delimiter: str = DEFAULT_DELIMITER  # CSV only: see monitor.ingest.dialect
    decimal: str = DEFAULT_DECIMAL
    batch_bytes: int = DEFAULT_BLOCK_BYTES  # how much of a file is read and checked at a time
    # Actuals dated after this day are refused as rows (date periods; the pass gives a few
    # cadences past its business clock's date). None: no limit.
    latest_actual: date | None = None

    def __post_init__(self) -> None:
        if self.format not in ("csv", "parquet"):
            raise ValueError(f"format is csv or parquet, not {self.format!r}")
        if self.period_type not in ("date", "integer"):
            raise ValueError(f"period_type is date or integer, not {self.period_type!r}")
        if self.settle < timedelta(0):
            raise ValueError("settle cannot be negative")
        names = [self.period_column, *([self.per_column] if self.per_column else [])]
        names += [*self.responses, *self.required, *self.optional]
        twice = sorted({name for name in names if names.count(name) > 1})
        if twice:
            raise ValueError(f"columns declared in more than one role: {', '.join(twice)}")

    @property
    def plan(self) -> ColumnPlan:
        latest = None
        if self.latest_actual is not None and self.period_type == "date":
            latest = (self.latest_actual.isoformat(), date_period_key(self.latest_actual))
        return ColumnPlan(
            self.period_column, self.period_type, self.per_column, self.responses,
            self.required, self.optional, latest,
        )


@dataclass(frozen=True)
class FileReport:
    """What became of one file. ``findings`` holds the ``rejected_input`` findings to raise."""

    feed: str
    name: str  # its name in the inbox
    sha256: str
    size: int
    file_id: int
    outcome: FileOutcome
    stored_path: Path
    rule: str  # marker | renamed | settled | recovered (completed after a crash)
    rows_ingested: int  # rows written: new actuals, revisions, plan rows
    plan_rows: int
    rows_rejected: int
    revisions: int
    unchanged: int  # identical re-sends of rows already held
    revised: tuple[Revision, ...]
    rejected: tuple[RejectedRow, ...]
    errors: str  # the text of NAME.errors.txt, or ""
    note: str  # e.g. why an archived file brought no rows
    side_files: tuple[Path, ...]
    duplicate_of: str | None  # the earlier file's name, for a duplicate
    findings: tuple[Finding, ...] = ()
    problem: str = ""  # the file changed after it was read (then it is in rejected, not archive)

    @property
    def whole_file_rejected(self) -> bool:
        return self.outcome == FileOutcome.REJECTED

    @property
    def duplicate(self) -> bool:
        return self.outcome == FileOutcome.DUPLICATE

    @property
    def raises_finding(self) -> bool:
        return bool(self.findings)

    @property
    def reason(self) -> str:
        """One line: why the file was refused, why it brought no rows, or ''."""
        return self.note


@dataclass(frozen=True)
class FeedIngest:
    """One scan of one feed's inbox."""

    feed: str
    reports: tuple[FileReport, ...]
    waiting: tuple[str, ...]  # files not complete yet: they stay and raise nothing
    ignored: tuple[tuple[str, str], ...]  # (name, why) never read as data
    problems: tuple[str, ...] = ()
    notes: tuple[InboxNote, ...] = ()  # why each file left in the inbox was not taken

    @property
    def findings(self) -> tuple[Finding, ...]:
        return tuple(f for report in self.reports for f in report.findings)


@dataclass(frozen=True)
class Committed:
    """A file recorded in the database, not yet in its destination (steps 1–2 done)."""

    record: FileRecord
    source: Path
    rule: str
    parsed: ParsedFile | None = None
    counts: ObservationCounts | None = None
    earlier: FileRecord | None = None
    rejected: tuple[RejectedRow, ...] = field(default=())


def inspect_inbox(spec: IngestSpec, *, real_clock: RealClock = time.time) -> InboxSurvey:
    """Which files of the feed's inbox are complete, waiting or ignored; writes nothing."""
    return survey_inbox(
        spec.inbox,
        settle_seconds=spec.settle.total_seconds(),
        real_clock=lambda: _seconds(real_clock),
        detect_rename=spec.detect_rename,
    )


def ingest_feed(
    store: Store, spec: IngestSpec, *, pass_id: int | None = None, real_clock: RealClock = time.time
) -> FeedIngest:
    """Take every complete file of one feed's inbox, after finishing any move a crash left."""
    for folder in (spec.inbox, spec.archive, spec.rejected):
        folder.mkdir(parents=True, exist_ok=True)
    reports: list[FileReport] = []
    problems: list[str] = []
    for record in store.files_awaiting_move(spec.feed):
        source = spec.inbox / record.name
        in_place = record.stored_path.exists() and _holds(record.stored_path, record.sha256)
        if in_place or (source.exists() and _holds(source, record.sha256)):
            committed = _committed_from_store(store, spec, record, source)
            reports.append(complete_move(store, spec, committed, real_clock=real_clock))
    survey = inspect_inbox(spec, real_clock=real_clock)
    if survey.problem:
        problems.append(survey.problem)
    waiting = [item.name for item in survey.waiting]
    changing: list[str] = []
    for item in survey.complete:
        try:
            report = ingest_file(store, spec, item, pass_id=pass_id, real_clock=real_clock)
        except DatabaseFaultError:
            raise  # the database itself cannot be written: no other file could be either
        except Exception as exc:  # one file's failure must not stop the feed's other files
            problem = _file_problem(store, spec, item, exc)
            problems.append(problem)
            log.warning("feed %s: %s", spec.feed, problem)
            continue
        if report is None:
            waiting.append(item.name)
            changing.append(item.name)
        else:
            reports.append(report)
    for record in store.files_awaiting_move(spec.feed):
        problems.append(
            f"{record.name} was recorded (file id {record.id}) but is neither in the inbox nor "
            f"at {record.stored_path}; if it turns up in the inbox it will be moved"
        )
    notes = inbox_notes(spec.feed, spec.settle.total_seconds(), survey,
                        now=_seconds(real_clock), changing=tuple(changing))
    return FeedIngest(spec.feed, tuple(reports), tuple(waiting), survey.ignored, tuple(problems),
                      notes)


def ingest_file(
    store: Store,
    spec: IngestSpec,
    item: InboxFile,
    *,
    pass_id: int | None = None,
    real_clock: RealClock = time.time,
) -> FileReport | None:
    """Steps 1–4 for one complete file; None when it changed while being read (still arriving)."""
    committed = commit_file(store, spec, item, pass_id=pass_id, real_clock=real_clock)
    if committed is None:
        return None
    return complete_move(store, spec, committed, real_clock=real_clock)


def commit_file(
    store: Store,
    spec: IngestSpec,
    item: InboxFile,
    *,
    pass_id: int | None = None,
    real_clock: RealClock = time.time,
) -> Committed | None:
    """Steps 1–2: read, hash and parse the file, and record it and its rows in one transaction.

    The file stays where it is; :func:`complete_move` does the rest. Returns None when the file
    changed while being read.
    """
    screened = _screen_file(item.path, item.mtime_ns, csv_text=spec.format == "csv")
    if screened is None:
        return None
    sha = screened.sha256
    received = datetime.fromtimestamp(_seconds(real_clock), UTC)
    for pending in store.files_awaiting_move(spec.feed):
        if pending.sha256 == sha:  # this very file, recorded before a crash
            return _committed_from_store(store, spec, pending, item.path)
    earlier = store.file_by_sha256(sha, spec.feed)
    taken = [record.stored_path for record in store.files_awaiting_move(spec.feed)]
    rule = item.rule or "settled"
    if earlier is not None:
        name = free_name(item.name, _slots(spec, FileOutcome.DUPLICATE, False), taken)
        record = store.record_file(
            feed=spec.feed, name=item.name, sha256=sha, size=screened.size,
            received_at=received, outcome=FileOutcome.DUPLICATE, stored_path=spec.rejected / name,
            pass_id=pass_id, errors_text=_duplicate_text(spec, item.name, sha, earlier),
            duplicate_of=earlier.id, note=f"the same content as {earlier.name}, ingested before",
        )
        return Committed(record, item.path, rule, earlier=earlier)
    refusal = screened.problem
    header: tuple[str, ...] = ()
    if refusal is None:
        try:
            with store.transaction():  # the file's record and all its rows, or nothing
                record = store.record_file(
                    feed=spec.feed, name=item.name, sha256=sha, size=screened.size,
                    received_at=received, outcome=FileOutcome.ARCHIVED,
                    stored_path=spec.archive / item.name, pass_id=pass_id,
                )
                try:
                    with store.transaction():
                        stored = _store_rows(store, spec, record.id, item.path, screened, {})
                except _Retry as retry:  # a key appears twice: read again, holding its rows back
                    with store.transaction():
                        stored = _store_rows(
                            store, spec, record.id, item.path, screened, retry.repeated
                        )
                outcome = FileOutcome.ARCHIVED if stored.rows_seen else FileOutcome.EMPTY
                name = free_name(item.name, _slots(spec, outcome, bool(stored.rows_rejected)),
                                 taken)
                store.settle_file(
                    record.id, outcome=outcome, stored_path=spec.archive / name,
                    rows_rejected=stored.rows_rejected, note=stored.note,
                )
        except Refused as refused:
            refusal, header = refused.reason, refused.header
        except _Changed:
            return None
        else:
            final = store.get_file(record.id)
            assert final is not None
            parsed = ParsedFile(stored.header, stored.columns, (), stored.rejected,
                                line_word=stored.line_word)
            return Committed(final, item.path, rule, parsed, stored.counts, None, stored.rejected)
    name = free_name(item.name, _slots(spec, FileOutcome.REJECTED, False), taken)
    record = store.record_file(
        feed=spec.feed, name=item.name, sha256=sha, size=screened.size, received_at=received,
        outcome=FileOutcome.REJECTED, stored_path=spec.rejected / name, pass_id=pass_id,
        errors_text=_refusal_text(spec, item.name, refusal), note=refusal,
    )
    word = "row" if spec.format == "parquet" else "line"
    parsed = ParsedFile(header, (), (), (), refusal=refusal, line_word=word)
    return Committed(record, item.path, rule, parsed, None, None, ())


def complete_move(
    store: Store, spec: IngestSpec, committed: Committed, *, real_clock: RealClock = time.time
) -> FileReport:
    """Steps 3–4: put the file and its side files in place, then mark the record moved.

    Safe to repeat: each step looks at what is already done (after a crash, it is called again).
    """
    record = committed.record
    target = record.stored_path
    source = committed.source
    for folder in (target.parent, spec.rejected):
        folder.mkdir(parents=True, exist_ok=True)
    if target.exists() and source.exists() and same_file(source, target):
        source.unlink()  # a move cut short between its link and its unlink
    elif not (target.exists() and _holds(target, record.sha256)):
        if target.exists():  # the name was taken meanwhile by something else: pick another
            slots = _slots(spec, record.outcome, bool(committed.rejected))
            target = target.with_name(free_name(record.name, slots))
        move_no_clobber(source, target)
    # What was read is what was put in place: a writer that went on after the read (stalled
    # past ``settle``, or appending after its marker) leaves other bytes here. Such a file
    # never stays in the archive as if all its rows were stored: it goes to rejected with a
    # report, and the feed gets a finding.
    taken = record.outcome in (FileOutcome.ARCHIVED, FileOutcome.EMPTY)
    changed = _changed_since_read(target, record) if taken else None
    if changed is not None and target.parent != spec.rejected:
        quarantined = spec.rejected / free_name(
            target.name, [(spec.rejected, ""), (spec.rejected, ".errors.txt")]
        )
        move_no_clobber(target, quarantined)
        target = quarantined
    side_files: list[Path] = []
    if changed is not None:
        errors_path = spec.rejected / (target.name + ".errors.txt")
        write_new_file(errors_path, _changed_text(spec, record, changed).encode("utf-8"))
        side_files.append(errors_path)
    if record.errors_text:
        errors_path = spec.rejected / (target.name + ".errors.txt")
        write_new_file(errors_path, record.errors_text.encode("utf-8"))
        side_files.append(errors_path)
    if committed.rejected:
        rows_path = spec.rejected / (target.name + ".rejected.csv")
        header, word = _header_for_side_file(spec, committed, target)
        rows = (
            committed.rejected if record.rows_rejected <= len(committed.rejected)
            else store.iter_rejected_rows(record.id)
        )
        write_new_file(rows_path, _rejected_csv(rows, header, word))
        side_files.append(rows_path)
    marker = committed.source.with_name(record.name + MARKER_SUFFIX)
    if marker.exists() and committed.source.parent == spec.inbox:
        marker_target = target.with_name(target.name + MARKER_SUFFIX)
        if marker_target.exists():
            marker_target = target.parent / free_name(marker_target.name, [(target.parent, "")])
        move_no_clobber(marker, marker_target)
    moved_at = datetime.fromtimestamp(_seconds(real_clock), UTC)
    record = store.mark_file_moved(
        record.id, at=moved_at, stored_path=None if target == record.stored_path else target
    )
    report = _report(spec, committed, record, tuple(side_files))
    if changed is None:
        return report
    problem = (
        f"{record.name} changed after it was read ({changed}); the rows read "
        f"({record.rows_ingested + record.unchanged} of them) were stored, and the file as it "
        f"is now was put in {target} with a report, not in the archive. Send the complete file "
        "again: rows already stored are recognised and not counted twice"
    )
    log.warning("feed %s: %s", spec.feed, problem)
    finding = Finding(
        None, None, spec.feed, FindingKind.REJECTED_INPUT, Severity.WARNING, None, None, None,
        problem, "Make the writer finish before the file counts as complete (a NAME.ready "
        "marker written last, or a rename), then send the complete file again.",
    )
    return dataclasses.replace(report, problem=problem,
                               findings=(*report.findings, finding))


# ----------------------------------------------------------------------------- helpers


def _file_problem(store: Store, spec: IngestSpec, item: InboxFile, exc: Exception) -> str:
    """One line on a file that could not be taken, saying truthfully where it and its rows are."""
    why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
    why = f"{type(exc).__name__}: {why}" if not isinstance(exc, OSError) else why
    if isinstance(exc, MemoryError):
        why = (f"it is too large to read in the memory available ({item.size:,} bytes); "
               "send it in smaller files")
    pending = next(
        (r for r in store.files_awaiting_move(spec.feed) if r.name == item.name), None
    )
    if pending is not None:
        where = "still in the inbox" if item.path.exists() else f"at {pending.stored_path}"
        return (
            f"{item.name}: its rows are stored (file id {pending.id}) but it could not be put in "
            f"place ({why}); it is {where}, and every scan tries again"
        )
    if not item.path.exists():
        return f"{item.name}: could not be taken ({why}); it is no longer in the inbox"
    return (
        f"{item.name}: could not be taken ({why}); nothing of it was stored and it stays in the "
        "inbox, tried again at every scan"
    )


def _changed_since_read(path: Path, record: FileRecord) -> str | None:
    """None when ``path`` holds exactly the bytes that were read; else what differs."""
    try:
        size = path.stat().st_size
        sha = sha256_of(path)
    except OSError as exc:
        return f"it cannot be read again: {exc.strerror or exc}"
    if sha == record.sha256:
        return None
    if size != record.size:
        return f"{record.size} bytes were read, it now has {size}"
    return f"the same size, {size} bytes, but other content"


def _changed_text(spec: IngestSpec, record: FileRecord, changed: str) -> str:
    return (
        f"Plumbline read {record.name} (feed {spec.feed}) and then found it had changed: "
        f"{changed}.\n\n"
        f"The rows of the version read were stored (SHA-256 {record.sha256}); anything written "
        "after the read was not. The file is here as it is now, not in the archive.\n"
        "To fix: make the writer finish before the file counts as complete (write a NAME.ready "
        "marker last, or write under a temporary name and rename), then drop the complete file "
        f"into the inbox ({spec.inbox}) again. Rows already stored are recognised and not "
        "counted twice.\n"
    )


def _holds(path: Path, sha: str) -> bool:
    try:
        return sha256_of(path) == sha
    except OSError:
        return False


REPORTED_REJECTIONS = 1000  # rejected rows a FileReport carries (NAME.rejected.csv has all)


@dataclass(frozen=True)
class _Screened:
    sha256: str
    size: int
    mtime_ns: int
    problem: str | None  # why the bytes cannot be CSV text (NUL bytes, not UTF-8)


class _Changed(Exception):
    """The file's bytes changed while it was read."""


class _Retry(Exception):
    """Keys appear more than once in the file: read it again holding their rows back."""

    def __init__(self, repeated: dict[tuple[str | None, int], list[int]]) -> None:
        super().__init__(f"{len(repeated)} keys repeated")
        self.repeated = repeated


@dataclass(frozen=True)
class _Stored:
    header: tuple[str, ...]
    columns: tuple[str, ...]
    line_word: str
    rows_seen: int
    rows_rejected: int
    rejected: tuple[RejectedRow, ...]  # the first REPORTED_REJECTIONS, by line
    counts: ObservationCounts | None
    note: str


def _screen_file(path: Path, expected_mtime_ns: int | None, *, csv_text: bool) -> _Screened | None:
    """Hash the file (and, for CSV, look for NUL bytes and bytes that are not UTF-8) in blocks;
    None when it changed while (or since it was surveyed and) read."""
    digest = hashlib.sha256()
    screen = ByteScreen() if csv_text else None
    size = 0
    try:
        with path.open("rb") as handle:
            before = os.fstat(handle.fileno())
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
                if screen is not None:
                    screen.feed(block)
                size += len(block)
            after = os.fstat(handle.fileno())
    except FileNotFoundError:
        return None
    if (before.st_size, before.st_mtime_ns) != (after.st_size, after.st_mtime_ns):
        return None
    if size != after.st_size:
        return None
    if expected_mtime_ns is not None and after.st_mtime_ns != expected_mtime_ns:
        return None
    return _Screened(
        digest.hexdigest(), size, after.st_mtime_ns, None if screen is None else screen.finish()
    )


class _HashingReader:
    """A binary file read through, hashing what passes."""

    def __init__(self, handle: BinaryIO) -> None:
        self.handle = handle
        self.digest = hashlib.sha256()
        self.size = 0

    def read(self, size: int = -1) -> bytes:
        data = self.handle.read(size)
        self.digest.update(data)
        self.size += len(data)
        return data

    def drain(self) -> None:
        while self.read(1 << 20):
            pass


def _store_rows(
    store: Store,
    spec: IngestSpec,
    file_id: int,
    path: Path,
    screened: _Screened,
    withhold: dict[tuple[str | None, int], list[int]],
) -> _Stored:
    """Read the file in batches and store each: rejected rows, then the rows (bulk inserts).

    Raises :class:`Refused` (the file cannot be used), :class:`_Changed` (its bytes are not the
    ones hashed) or :class:`_Retry` (keys repeated in the file, not all in ``withhold``); the
    caller's transaction then undoes whatever was written.
    """
    plan = spec.plan
    with path.open("rb") as handle:
        before = os.fstat(handle.fileno())
        hashing = _HashingReader(handle)
        if spec.format == "parquet":
            reading = open_parquet(handle, plan, block_bytes=spec.batch_bytes)
        elif needs_rewrite(spec.delimiter, spec.decimal):
            # Another locale's CSV (monitor.ingest.dialect): rewritten whole into the standard
            # form, then read like any file; the hash is still of the bytes as sent.
            rewritten = standard_csv(hashing.read(), spec.delimiter, spec.decimal)
            if isinstance(rewritten, str):
                raise Refused(rewritten, ())
            reading = open_csv(io.BytesIO(rewritten), plan, block_bytes=spec.batch_bytes)
        else:
            reading = open_csv(hashing, plan, block_bytes=spec.batch_bytes)  # type: ignore[arg-type]
        if reading.refusal is not None:
            raise Refused(reading.refusal + _separator_hint(path, spec), reading.header)
        codes: dict[str | None, int] = {}
        who: list[np.ndarray] = []
        when: list[np.ndarray] = []
        where: list[np.ndarray] = []
        rejected: list[RejectedRow] = []
        held: list[Withheld] = []
        rows_rejected = rows_seen = 0
        inserting = True
        counts: list[ObservationCounts] = []
        for chunk in (reading.batches(withhold) if reading.batches is not None else ()):
            if chunk.rejected:
                store.record_rejected_rows(file_id, chunk.rejected)
                rows_rejected += len(chunk.rejected)
                room = REPORTED_REJECTIONS - len(rejected)
                rejected.extend(chunk.rejected[: max(room, 0)])
            held.extend(chunk.withheld)
            batch = chunk.rows
            rows_seen += len(chunk.rejected) + len(chunk.withheld) + len(batch)
            if not len(batch):
                continue
            code_of = np.array([codes.setdefault(s, len(codes)) for s in batch.series], np.int64)
            series_codes, period_keys = code_of[batch.series_index], batch.row_keys()
            who.append(series_codes)
            when.append(period_keys)
            where.append(batch.line)
            if inserting and _repeated(series_codes, period_keys, batch.line):
                inserting = False  # the file will be read again: write nothing more
            if inserting:
                counts.append(
                    store.insert_observations(spec.feed, file_id, reading.columns, batch)
                )
        if spec.format == "parquet":
            same = sha256_of(path) == screened.sha256
        else:
            hashing.drain()
            same = hashing.digest.hexdigest() == screened.sha256
        after = os.fstat(handle.fileno())
    if not same or (before.st_size, before.st_mtime_ns) != (after.st_size, after.st_mtime_ns):
        raise _Changed
    if who:
        repeated = _repeated(np.concatenate(who), np.concatenate(when), np.concatenate(where))
        if repeated:
            names = {code: name for name, code in codes.items()}
            raise _Retry({(names[c], k): lines for (c, k), lines in repeated.items()})
    if held:
        twice = duplicate_rejections(plan, held, withhold, reading.line_word)
        store.record_rejected_rows(file_id, twice)
        rows_rejected += len(twice)
        rejected = sorted([*rejected, *twice], key=lambda r: r.line)[:REPORTED_REJECTIONS]
    note = "" if rows_seen else (reading.note or reading.empty_note)
    if rejected and spec.format == "csv":
        hint = decimal_comma_hint(
            [cell for row in rejected[:50] for cell in row.cells], spec.feed, spec.decimal)
        note = f"{note} {hint}".strip()
    return _Stored(
        header=reading.header,
        columns=reading.columns,
        line_word=reading.line_word,
        rows_seen=rows_seen,
        rows_rejected=rows_rejected,
        rejected=tuple(rejected),
        counts=_sum_counts(counts),
        note=note,
    )


def _separator_hint(path: Path, spec: IngestSpec) -> str:
    """For a refused CSV whose fields another separator splits: the sentence naming it."""
    if spec.format != "csv":
        return ""
    try:
        with path.open("rb") as handle:
            head = handle.read(1 << 16)
    except OSError:
        return ""
    return separator_hint(head, spec.feed, spec.delimiter, spec.decimal)


def _repeated(
    series: np.ndarray, keys: np.ndarray, lines: np.ndarray
) -> dict[tuple[int, int], list[int]]:
    """(series code, period key) pairs given by more than one row → their lines, in order."""
    order = np.lexsort((lines, keys, series))
    s, k = series[order], keys[order]
    same = (s[1:] == s[:-1]) & (k[1:] == k[:-1])
    if not same.any():
        return {}
    found: dict[tuple[int, int], list[int]] = {}
    for i in np.flatnonzero(same):
        pair = (int(s[i]), int(k[i]))
        group = found.setdefault(pair, [int(lines[order[i]])])
        group.append(int(lines[order[i + 1]]))
    return found


def _sum_counts(counts: list[ObservationCounts]) -> ObservationCounts | None:
    if not counts:
        return None
    return ObservationCounts(
        sum(c.new_actuals for c in counts),
        sum(c.revisions for c in counts),
        sum(c.plans for c in counts),
        sum(c.unchanged for c in counts),
        tuple(r for c in counts for r in c.revised),
    )


def _slots(spec: IngestSpec, outcome: FileOutcome, rows_rejected: bool) -> list[tuple[Path, str]]:
    """The paths a destination name must have free: the file, its marker, its side files."""
    if outcome in (FileOutcome.REJECTED, FileOutcome.DUPLICATE):
        return [(spec.rejected, ""), (spec.rejected, ".errors.txt"), (spec.rejected, ".ready")]
    slots = [(spec.archive, ""), (spec.archive, ".ready")]
    if rows_rejected:
        slots.append((spec.rejected, ".rejected.csv"))
    return slots


def _committed_from_store(
    store: Store, spec: IngestSpec, record: FileRecord, source: Path
) -> Committed:
    """What :func:`complete_move` needs, rebuilt from the database after a crash."""
    earlier = None if record.duplicate_of is None else store.get_file(record.duplicate_of)
    rejected = tuple(store.rejected_rows(record.id, limit=REPORTED_REJECTIONS))
    return Committed(record, source, "recovered", None, None, earlier, rejected)


def _header_for_side_file(
    spec: IngestSpec, committed: Committed, target: Path
) -> tuple[tuple[str, ...], str]:
    """The file's header and line word; after a crash, read again from the file itself."""
    word = "row" if spec.format == "parquet" else "line"
    if committed.parsed is not None:
        return committed.parsed.header, committed.parsed.line_word
    try:
        data = (target if target.exists() else committed.source).read_bytes()
    except OSError:
        return (), word
    header = read_header(data, spec.format)
    return (header if isinstance(header, tuple) else ()), word


def _rejected_csv(
    rows: Iterable[RejectedRow], header: tuple[str, ...], word: str
) -> Iterator[bytes]:
    """NAME.rejected.csv in pieces of about a thousand rows."""
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([word, "reason", *header])
    for number, row in enumerate(rows, start=1):
        writer.writerow([row.line, row.reason, *row.cells])
        if number % 1000 == 0:
            yield buffer.getvalue().encode("utf-8")
            buffer.seek(0)
            buffer.truncate()
    yield buffer.getvalue().encode("utf-8")


def _refusal_text(spec: IngestSpec, name: str, reason: str) -> str:
    return (
        f"Plumbline did not ingest {name} (feed {spec.feed}).\n\n"
        f"Why: {reason}.\n\n"
        "The file was moved to this folder unchanged; none of its rows were used.\n"
        f"To fix: correct the file and drop it into the inbox ({spec.inbox}) again.\n"
    )


def _duplicate_text(spec: IngestSpec, name: str, sha: str, earlier: FileRecord) -> str:
    received = earlier.received_at.strftime("%Y-%m-%d %H:%M UTC")
    return (
        f"Plumbline did not ingest {name} (feed {spec.feed}): its content is identical to "
        f"{earlier.name}, received {received} and ingested then (now at {earlier.stored_path}).\n"
        f"SHA-256 of both: {sha}\n\n"
        "Its rows are already in the database; nothing was counted twice.\n"
        "If you meant to send new data, check the export. To correct rows already sent, send a\n"
        "file with the corrected rows: a changed row is kept as a revision and used from then on.\n"
    )


def _report(
    spec: IngestSpec, committed: Committed, record: FileRecord, side_files: tuple[Path, ...]
) -> FileReport:
    counts = committed.counts
    earlier = committed.earlier
    report = FileReport(
        feed=spec.feed,
        name=record.name,
        sha256=record.sha256,
        size=record.size,
        file_id=record.id,
        outcome=record.outcome,
        stored_path=record.stored_path,
        rule=committed.rule,
        rows_ingested=record.rows_ingested,
        plan_rows=record.rows_plan,
        rows_rejected=record.rows_rejected,
        revisions=record.revisions,
        unchanged=record.unchanged,
        revised=() if counts is None else counts.revised,
        rejected=committed.rejected,
        errors=record.errors_text,
        note=record.note,
        side_files=side_files,
        duplicate_of=None if earlier is None else earlier.name,
    )
    return dataclasses.replace(report, findings=_findings(spec, report))


def _findings(spec: IngestSpec, report: FileReport) -> tuple[Finding, ...]:
    def finding(severity: Severity, statistic: float | None, message: str, action: str) -> Finding:
        return Finding(
            None, None, spec.feed, FindingKind.REJECTED_INPUT, severity, None, statistic, None,
            message, action,
        )

    where = report.stored_path
    if report.outcome == FileOutcome.REJECTED:
        return (
            finding(
                Severity.WARNING, None,
                f"{report.name} was refused as a whole: {report.note}. None of its rows were used; "
                f"the file is in {where} with the reason in {where.name}.errors.txt.",
                "Correct the file and drop it into the inbox again.",
            ),
        )
    if report.outcome == FileOutcome.DUPLICATE:
        return (
            finding(
                Severity.NOTICE, None,
                f"{report.name} has the same content as {report.duplicate_of}, which was "
                f"ingested before; it was not ingested again and is in {where}.",
                "Nothing to do, unless you meant to send different data.",
            ),
        )
    if report.rows_rejected:
        first = report.rejected[0] if report.rejected else None
        word = "row" if spec.format == "parquet" else "line"
        sample = "" if first is None else f" (the first, {word} {first.line}: {first.reason})"
        total = report.rows_rejected + report.rows_ingested + report.unchanged
        hint = f" {report.note}" if report.note else ""
        return (
            finding(
                Severity.NOTICE, float(report.rows_rejected),
                f"{report.rows_rejected} of {total} rows of {report.name} were rejected{sample}; "
                f"the other rows were ingested. The rejected rows are listed in "
                f"{spec.rejected / (where.name + '.rejected.csv')}.{hint}",
                "Correct the listed rows and send them in a new file; rows already ingested "
                "are recognised and not counted twice.",
            ),
        )
    return ()


__all__ = [
    "Committed",
    "FeedIngest",
    "FileReport",
    "InboxFile",
    "InboxNote",
    "InboxSurvey",
    "IngestSpec",
    "RealClock",
    "commit_file",
    "complete_move",
    "inbox_notes",
    "ingest_feed",
    "ingest_file",
    "inspect_inbox",
    "is_temporary_name",
]
