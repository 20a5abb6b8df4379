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
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Literal

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
    read_stable,
    same_file,
    sha256_of,
    survey_inbox,
    write_new_file,
)
from monitor.ingest.parse import ColumnPlan, ParsedFile, parse_csv, parse_parquet, read_header
from monitor.store import (
    FileOutcome,
    FileRecord,
    ObservationCounts,
    RejectedRow,
    Revision,
    Store,
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
        return ColumnPlan(
            self.period_column, self.period_type, self.per_column, self.responses,
            self.required, self.optional,
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
        except OSError as exc:
            problems.append(f"{item.name}: {exc.strerror or exc}; left in the inbox for now")
            log.warning("feed %s: %s could not be taken: %s", spec.feed, item.name, exc)
            continue
        except Exception as exc:  # one file's failure must not stop the feed's other files
            problems.append(
                f"{item.name}: could not be taken ({type(exc).__name__}: {exc}); its "
                "transaction was rolled back and the file left in the inbox"
            )
            log.exception("feed %s: %s could not be taken", spec.feed, item.name)
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
    data = read_stable(item.path, item.mtime_ns)
    if data is None:
        return None
    sha = hashlib.sha256(data).hexdigest()
    received = datetime.fromtimestamp(_seconds(real_clock), UTC)
    for pending in store.files_awaiting_move(spec.feed):
        if pending.sha256 == sha:  # this very file, recorded before a crash
            return _committed_from_store(store, spec, pending, item.path)
    earlier = store.file_by_sha256(sha)
    taken = [record.stored_path for record in store.files_awaiting_move(spec.feed)]
    if earlier is not None:
        name = free_name(item.name, _slots(spec, FileOutcome.DUPLICATE, False), taken)
        record = store.record_file(
            feed=spec.feed, name=item.name, sha256=sha, size=len(data), received_at=received,
            outcome=FileOutcome.DUPLICATE, stored_path=spec.rejected / name, pass_id=pass_id,
            errors_text=_duplicate_text(spec, item.name, sha, earlier), duplicate_of=earlier.id,
            note=f"the same content as {earlier.name}, ingested before",
        )
        return Committed(record, item.path, item.rule or "settled", earlier=earlier)
    parsed = _parse(data, spec)
    if parsed.refusal is not None:
        outcome, folder = FileOutcome.REJECTED, spec.rejected
    elif parsed.is_empty:
        outcome, folder = FileOutcome.EMPTY, spec.archive
    else:
        outcome, folder = FileOutcome.ARCHIVED, spec.archive
    name = free_name(item.name, _slots(spec, outcome, bool(parsed.rejected)), taken)
    errors = "" if parsed.refusal is None else _refusal_text(spec, item.name, parsed.refusal)
    counts: ObservationCounts | None = None
    with store.transaction():
        record = store.record_file(
            feed=spec.feed, name=item.name, sha256=sha, size=len(data), received_at=received,
            outcome=outcome, stored_path=folder / name, pass_id=pass_id,
            rows_rejected=len(parsed.rejected), errors_text=errors,
            note=parsed.refusal or parsed.note,
        )
        if parsed.rejected:
            store.record_rejected_rows(record.id, parsed.rejected)
        if parsed.rows:
            counts = store.insert_observations(spec.feed, record.id, parsed.columns, parsed.rows)
    stored = store.get_file(record.id)
    assert stored is not None
    rule = item.rule or "settled"
    return Committed(stored, item.path, rule, parsed, counts, None, parsed.rejected)


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
    side_files: list[Path] = []
    if record.errors_text:
        errors_path = spec.rejected / (target.name + ".errors.txt")
        write_new_file(errors_path, record.errors_text.encode("utf-8"))
        side_files.append(errors_path)
    if committed.rejected:
        rows_path = spec.rejected / (target.name + ".rejected.csv")
        header, word = _header_for_side_file(spec, committed, target)
        write_new_file(rows_path, _rejected_csv(committed.rejected, header, word))
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
    return _report(spec, committed, record, tuple(side_files))


# ----------------------------------------------------------------------------- helpers


def _holds(path: Path, sha: str) -> bool:
    try:
        return sha256_of(path) == sha
    except OSError:
        return False


def _parse(data: bytes, spec: IngestSpec) -> ParsedFile:
    if spec.format == "parquet":
        return parse_parquet(data, spec.plan)
    readable = data
    if needs_rewrite(spec.delimiter, spec.decimal):
        rewritten = standard_csv(data, spec.delimiter, spec.decimal)
        if isinstance(rewritten, str):
            return ParsedFile((), (), (), (), refusal=rewritten)
        readable = rewritten
    parsed = parse_csv(readable, spec.plan)
    if parsed.refusal is not None:
        hint = separator_hint(data, spec.feed, spec.delimiter, spec.decimal)
        if hint:
            parsed = dataclasses.replace(parsed, refusal=parsed.refusal + hint)
    elif parsed.rejected:
        hint = decimal_comma_hint(
            [cell for row in parsed.rejected[:50] for cell in row.cells], spec.feed, spec.decimal)
        if hint:
            parsed = dataclasses.replace(parsed, note=f"{parsed.note} {hint}".strip())
    return parsed


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
    rejected = tuple(store.rejected_rows(record.id))
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


def _rejected_csv(rows: tuple[RejectedRow, ...], header: tuple[str, ...], word: str) -> bytes:
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([word, "reason", *header])
    for row in rows:
        writer.writerow([row.line, row.reason, *row.cells])
    return buffer.getvalue().encode("utf-8")


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
