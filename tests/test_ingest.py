"""The drop-folder protocol on real folders and a real SQLite file in tmp_path."""

from __future__ import annotations

import csv
import hashlib
import io
import os
import sqlite3
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.errors import DatabaseFaultError
from monitor.ingest import (
    FeedIngest,
    FileReport,
    IngestSpec,
    commit_file,
    ingest_feed,
    inspect_inbox,
)
from monitor.ingest.folders import move_no_clobber, read_stable
from monitor.ingest.parse import parse_csv, parse_parquet
from monitor.store import FileOutcome, ObservationCounts, ObservationRow, Store
from monitor.vocabulary import FindingKind, Severity

HEADER = "week_ending,depot,pick_hours,order_lines\n"


def later() -> float:
    """A real clock an hour ahead: every file has settled."""
    return time.time() + 3600


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@dataclass
class Feed:
    spec: IngestSpec
    store: Store

    def drop(self, name: str, content: bytes | str) -> bytes:
        data = content.encode("utf-8") if isinstance(content, str) else content
        (self.spec.inbox / name).write_bytes(data)
        return data

    def scan(self, clock: Callable[[], float] = later) -> FeedIngest:
        return ingest_feed(self.store, self.spec, pass_id=None, real_clock=clock)

    def only_report(self, clock: Callable[[], float] = later) -> FileReport:
        result = self.scan(clock)
        assert len(result.reports) == 1, result
        return result.reports[0]

    def actuals(self, series: str = "north") -> list[tuple[str, float | None, int]]:
        return [
            (row.period, row.values.get("pick_hours"), row.revision)
            for row in self.store.observation_history(self.spec.feed, series, include_plans=False)
            if row.current
        ]

    def inbox_names(self) -> list[str]:
        return sorted(p.name for p in self.spec.inbox.iterdir())


@pytest.fixture
def feed(tmp_path: Path) -> Feed:
    spec = IngestSpec(
        feed="depot_weekly",
        inbox=tmp_path / "feeds" / "inbox",
        archive=tmp_path / "feeds" / "archive",
        rejected=tmp_path / "feeds" / "rejected",
        period_column="week_ending",
        per_column="depot",
        responses=("pick_hours",),
        required=("order_lines",),
        optional=("pallets",),
        settle=timedelta(seconds=30),
    )
    spec.inbox.mkdir(parents=True)
    store = Store.open(tmp_path / "state" / "plumbline.sqlite")
    yield Feed(spec, store)  # type: ignore[misc]
    store.close()


def assert_kept(path: Path, data: bytes) -> None:
    """The original bytes survive, unchanged, at ``path``."""
    assert path.exists(), path
    assert sha(path.read_bytes()) == sha(data)


def rejected_input(report: FileReport, severity: Severity) -> None:
    assert len(report.findings) == 1
    finding = report.findings[0]
    assert (finding.kind, finding.severity) == (FindingKind.REJECTED_INPUT, severity)
    assert (finding.model, finding.series, finding.feed) == (None, None, "depot_weekly")
    assert finding.message and finding.action


# ----------------------------------------------------------------------------- good files


def test_a_good_file_is_ingested_and_archived_byte_for_byte(feed: Feed) -> None:
    data = feed.drop(
        "week_02.csv",
        HEADER + "2024-01-07,north,40.5,400\n2024-01-14,north,41,410\n\n2024-01-21,north,,420\n",
    )
    report = feed.only_report()
    assert report.outcome == FileOutcome.ARCHIVED
    assert (report.rows_ingested, report.plan_rows, report.rows_rejected) == (3, 1, 0)
    assert report.findings == ()
    assert_kept(feed.spec.archive / "week_02.csv", data)
    assert feed.inbox_names() == []
    assert feed.actuals() == [("2024-01-07", 40.5, 0), ("2024-01-14", 41.0, 0)]
    plans = feed.store.plan_rows_awaiting_forecast("depot_weekly", "pick", ["order_lines"])
    assert (plans.period, plans.values.tolist()) == (("2024-01-21",), [[420.0]])
    record = feed.store.get_file(report.file_id)
    assert record is not None and record.moved_at is not None and record.sha256 == sha(data)


def test_empty_and_header_only_files_are_archived_with_a_note(feed: Feed) -> None:
    empty = feed.drop("a_empty.csv", b"")
    result = feed.scan()
    header_only = feed.drop("b_header.csv", HEADER)
    second_empty = feed.drop("c_empty.csv", b"")  # same bytes as a_empty.csv: still no duplicate
    result = FeedIngest("f", result.reports + feed.scan().reports, (), ())
    by_name = {report.name: report for report in result.reports}
    assert {r.outcome for r in result.reports} == {FileOutcome.EMPTY}
    assert by_name["a_empty.csv"].note == "the file is empty"
    assert by_name["b_header.csv"].note == "the file has a header and no rows"
    assert all(r.findings == () for r in result.reports)  # not an error
    assert_kept(feed.spec.archive / "a_empty.csv", empty)
    assert_kept(feed.spec.archive / "b_header.csv", header_only)
    assert_kept(feed.spec.archive / "c_empty.csv", second_empty)
    assert not feed.spec.rejected.exists() or list(feed.spec.rejected.iterdir()) == []


# ----------------------------------------------------------------------------- whole-file refusals


@pytest.mark.parametrize(
    ("content", "reason"),
    [
        (bytes(range(256)) * 4, "binary data, not CSV text"),
        ((HEADER + "2024-01-07,Göteborg,40,400\n").encode("latin-1"), "not UTF-8 text"),
        ("week_ending,depot,pick_hours,order_line\n2024-01-07,n,4,5\n",
         "'order_lines' (did you mean 'order_line'?)"),
        ("2024-01-07,north,40,400\n2024-01-14,north,41,410\n", "the file has no header"),
        ('week_ending,depot,pick_hours,order_lines\n2024-01-07,"north,40,400\n',
         "cannot be read as CSV"),
    ],
    ids=["binary-junk", "not-utf8", "missing-column", "no-header", "broken-quote"],
)
def test_a_file_that_cannot_be_used_is_refused_whole(
    feed: Feed, content: bytes | str, reason: str
) -> None:
    data = feed.drop("week_03.csv", content)
    report = feed.only_report()
    assert report.outcome == FileOutcome.REJECTED and report.whole_file_rejected
    assert report.rows_ingested == 0
    assert reason in report.errors and reason in report.reason
    assert_kept(feed.spec.rejected / "week_03.csv", data)
    errors = (feed.spec.rejected / "week_03.csv.errors.txt").read_text(encoding="utf-8")
    assert errors == report.errors and "none of its rows were used" in errors
    rejected_input(report, Severity.WARNING)
    assert feed.store.observation_history("depot_weekly", "north") == []


def test_not_utf8_names_the_byte_and_line(feed: Feed) -> None:
    text = HEADER + "2024-01-07,north,40,400\n2024-01-14,Malmö,1,2\n"
    feed.drop("w.csv", text.encode("cp1252"))
    report = feed.only_report()
    assert "byte 0xf6" in report.note and "(line 3)" in report.note


# ----------------------------------------------------------------------------- row rejections


def rejected_lines(feed: Feed, report: FileReport) -> list[list[str]]:
    text = (feed.spec.rejected / (report.stored_path.name + ".rejected.csv")).read_text("utf-8")
    return list(csv.reader(io.StringIO(text)))


@pytest.mark.parametrize(
    ("bad_line", "reason"),
    [
        ("2024-01-14,north,lots,410", "'pick_hours' holds 'lots' where a number is needed"),
        ("2024-01-14,north,1_000,410", "'pick_hours' holds '1_000' where a number is needed"),
        ("2024-01-14,north,NaN,410", "'pick_hours' holds 'NaN': NaN and infinity"),
        ("2024-01-14,north,40,-inf", "'order_lines' holds '-inf': NaN and infinity"),
        ("2024-01-14,north,Infinity,410", "'pick_hours' holds 'Infinity': NaN and infinity"),
        ("2024-13-01,north,40,410", "'week_ending' holds '2024-13-01', which is not an ISO 8601"),
        ("14/01/2024,north,40,410", "'week_ending' holds '14/01/2024', which is not an ISO 8601"),
        ("2024-01-14T09:30,north,40,410", "a moment, where a date is needed"),
        (",north,40,410", "'week_ending' is empty"),
        ("2024-01-14,,40,410", "the per: column 'depot' is empty"),
        ("2024-01-14,north,40,", "'order_lines' is empty; it needs a number in every row"),
        ("2024-01-14,north,40", "3 fields where the header has 4"),
    ],
    ids=["text", "underscore", "nan", "minus-inf", "infinity", "bad-month", "not-iso",
         "time-of-day", "no-period", "no-series", "no-predictor", "ragged"],
)
def test_bad_rows_are_listed_and_the_good_rows_ingested(
    feed: Feed, bad_line: str, reason: str
) -> None:
    data = feed.drop("w.csv", HEADER + "2024-01-07,north,40,400\n" + bad_line + "\n"
                     "2024-01-21,north,42,420\n")
    report = feed.only_report()
    assert report.outcome == FileOutcome.ARCHIVED
    assert (report.rows_ingested, report.rows_rejected) == (2, 1)
    assert [(r.line, reason in r.reason) for r in report.rejected] == [(3, True)], report.rejected
    assert_kept(feed.spec.archive / "w.csv", data)
    listed = rejected_lines(feed, report)
    assert listed[0] == ["line", "reason", "week_ending", "depot", "pick_hours", "order_lines"]
    assert listed[1][0] == "3" and reason in listed[1][1]
    assert listed[1][2:] == next(csv.reader([bad_line]))
    rejected_input(report, Severity.NOTICE)
    assert [p for p, _, _ in feed.actuals()] == ["2024-01-07", "2024-01-21"]


def test_a_key_twice_in_one_file_rejects_every_row_of_that_key(feed: Feed) -> None:
    feed.drop("w.csv", HEADER + "2024-01-07,north,40,400\n2024-01-07,south,30,300\n"
              "2024-01-07,north,41,400\n2024-01-14,north,42,410\n")
    report = feed.only_report()
    assert [r.line for r in report.rejected] == [2, 4]
    assert all("depot 'north', week_ending 2024-01-07 appears 2 times in the file (lines 2, 4)"
               in r.reason for r in report.rejected)
    assert [row[0] for row in rejected_lines(feed, report)[1:]] == ["2", "4"]
    assert feed.actuals() == [("2024-01-14", 42.0, 0)]
    assert feed.actuals("south") == [("2024-01-07", 30.0, 0)]


def test_several_reasons_on_one_row_are_all_given(feed: Feed) -> None:
    feed.drop("w.csv", HEADER + "someday,north,many,\n")
    (row,) = feed.only_report().rejected
    assert row.reason == (
        "'week_ending' holds 'someday', which is not an ISO 8601 date (write e.g. 2024-01-07); "
        "'pick_hours' holds 'many' where a number is needed; "
        "'order_lines' is empty; it needs a number in every row"
    )


# ----------------------------------------------------------------------------- completeness


def test_a_file_still_being_written_stays_and_raises_nothing(feed: Feed) -> None:
    data = feed.drop("week_04.csv", HEADER + "2024-01-07,north,40,400\n")
    result = feed.scan(clock=time.time)  # the real clock: written just now, not settled
    assert result.reports == () and result.waiting == ("week_04.csv",)
    in_25s = datetime.now(UTC) + timedelta(seconds=25)  # an aware datetime works as well
    assert ingest_feed(feed.store, feed.spec, real_clock=lambda: in_25s).reports == ()
    assert feed.inbox_names() == ["week_04.csv"]
    assert feed.store.list_files() == []
    assert_kept(feed.spec.inbox / "week_04.csv", data)
    assert feed.only_report(clock=later).outcome == FileOutcome.ARCHIVED


def test_a_ready_marker_makes_a_file_complete_at_once(feed: Feed) -> None:
    data = feed.drop("week_05.csv", HEADER + "2024-01-07,north,40,400\n")
    feed.drop("week_05.csv.ready", b"")
    report = feed.only_report(clock=time.time)
    assert (report.rule, report.outcome) == ("marker", FileOutcome.ARCHIVED)
    assert_kept(feed.spec.archive / "week_05.csv", data)
    assert (feed.spec.archive / "week_05.csv.ready").exists()  # moved beside it, not deleted
    assert feed.inbox_names() == []


def _renames_move_the_change_time(folder: Path) -> bool:
    probe = folder / ".probe.part"
    probe.write_bytes(b"x")
    time.sleep(0.05)
    os.rename(probe, folder / ".probe")
    info = os.stat(folder / ".probe")
    os.unlink(folder / ".probe")
    return info.st_ctime_ns > info.st_mtime_ns


def test_temporary_names_are_never_read_and_a_rename_completes_a_file(feed: Feed) -> None:
    body = HEADER + "2024-01-07,north,40,400\n"
    for name in ("week_06.csv.part", "week_06.csv.tmp", ".week_06.csv", "UPPER.PART"):
        feed.drop(name, body)
    feed.drop("orphan.csv.ready", b"")
    (feed.spec.inbox / "a_folder").mkdir()
    result = feed.scan()
    assert result.reports == ()
    assert {name for name, _ in result.ignored} == {
        "week_06.csv.part", "week_06.csv.tmp", ".week_06.csv", "UPPER.PART", "a_folder"
    }
    assert len(feed.inbox_names()) == 6  # all left where they were
    if not _renames_move_the_change_time(feed.spec.inbox):
        pytest.skip("this file system's timestamps are too coarse to see a rename")
    time.sleep(0.05)
    os.rename(feed.spec.inbox / "week_06.csv.part", feed.spec.inbox / "week_06.csv")
    report = feed.only_report(clock=time.time)  # not settled by time: taken by the rename rule
    assert (report.rule, report.name, report.outcome) == ("renamed", "week_06.csv", "archived")


def test_a_file_that_changes_after_the_survey_is_left_for_later(feed: Feed) -> None:
    path = feed.spec.inbox / "w.csv"
    feed.drop("w.csv", HEADER + "2024-01-07,north,40,400\n")
    (item,) = inspect_inbox(feed.spec, real_clock=later).complete
    with path.open("a") as handle:
        handle.write("2024-01-14,north,41,410\n")
    os.utime(path, ns=(item.mtime_ns + 5_000_000, item.mtime_ns + 5_000_000))
    assert read_stable(path, item.mtime_ns) is None
    assert commit_file(feed.store, feed.spec, item, real_clock=later) is None
    assert feed.store.list_files() == [] and feed.inbox_names() == ["w.csv"]


# ----------------------------------------------------------------------------- identity, revisions


def test_the_same_file_under_two_names_is_ingested_once(feed: Feed) -> None:
    data = feed.drop("week_07.csv", HEADER + "2024-01-07,north,40,400\n")
    first = feed.only_report()
    feed.drop("week_07_copy.csv", data)
    second = feed.only_report()
    assert second.outcome == FileOutcome.DUPLICATE and second.duplicate
    assert second.rows_ingested == 0 and second.raises_finding
    assert second.duplicate_of == "week_07.csv"
    assert_kept(feed.spec.archive / "week_07.csv", data)
    assert_kept(feed.spec.rejected / "week_07_copy.csv", data)
    errors = (feed.spec.rejected / "week_07_copy.csv.errors.txt").read_text("utf-8")
    assert "identical to week_07.csv" in errors and sha(data) in errors
    rejected_input(second, Severity.NOTICE)
    assert feed.actuals() == [("2024-01-07", 40.0, 0)]
    record = feed.store.get_file(second.file_id)
    assert record is not None and record.duplicate_of == first.file_id
    # dropped a third time under the first name: a duplicate again, and nothing overwritten
    feed.drop("week_07.csv", data)
    third = feed.only_report()
    assert third.outcome == FileOutcome.DUPLICATE
    assert third.stored_path == feed.spec.rejected / "week_07.csv"


def test_a_name_dropped_twice_never_overwrites_the_first(feed: Feed) -> None:
    one = feed.drop("week.csv", HEADER + "2024-01-07,north,40,400\n")
    feed.scan()
    two = feed.drop("week.csv", HEADER + "2024-01-14,north,41,410\nbad,north,1,2\n")
    report = feed.only_report()
    assert report.stored_path == feed.spec.archive / "week-2.csv"
    assert_kept(feed.spec.archive / "week.csv", one)
    assert_kept(feed.spec.archive / "week-2.csv", two)
    assert (feed.spec.rejected / "week-2.csv.rejected.csv").exists()


def test_a_revision_is_kept_beside_the_first_and_used_from_then_on(feed: Feed) -> None:
    feed.drop("a.csv", HEADER + "2024-01-07,north,40,400\n2024-01-14,north,41,410\n")
    feed.scan()
    feed.drop("b.csv", HEADER + "2024-01-07,north,40.0,400\n2024-01-14,north,45,410\n"
              "2024-01-21,north,42,420\n")
    report = feed.only_report()
    assert (report.rows_ingested, report.revisions, report.unchanged) == (2, 1, 1)
    assert [(r.series, r.period, r.revision) for r in report.revised] == [
        ("north", "2024-01-14", 1)
    ]
    assert report.findings == ()  # a revision is reported, not an error
    assert feed.actuals() == [("2024-01-07", 40.0, 0), ("2024-01-14", 45.0, 1),
                              ("2024-01-21", 42.0, 0)]
    history = feed.store.observation_history("depot_weekly", "north", include_plans=False)
    assert [(h.period, h.values["pick_hours"], h.current) for h in history][1:3] == [
        ("2024-01-14", 41.0, False), ("2024-01-14", 45.0, True)
    ]


def test_integer_periods(tmp_path: Path) -> None:
    spec = IngestSpec(
        feed="yearly", inbox=tmp_path / "in", archive=tmp_path / "ar", rejected=tmp_path / "rj",
        period_column="year", period_type="integer", responses=("sales",), required=("ads",),
    )
    spec.inbox.mkdir()
    (spec.inbox / "y.csv").write_text("year,sales,ads\n2019,10,1\n2020,11,2\n2020.5,1,1\n")
    with Store.open(tmp_path / "db.sqlite") as store:
        (report,) = ingest_feed(store, spec, real_clock=later).reports
        assert [(r.line, r.reason) for r in report.rejected] == [
            (4, "'year' holds '2020.5', which is not an integer period")
        ]
        windows = store.windows("yearly", ["sales", "ads"])
        assert windows.series == (None,)
        assert windows.period_key.tolist() == [2019, 2020]


# ----------------------------------------------------------------------------- Parquet


def parquet_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def test_parquet_good_and_bad_rows(tmp_path: Path, feed: Feed) -> None:
    spec = IngestSpec(**{**feed.spec.__dict__, "format": "parquet"})
    table = pa.table({
        "week_ending": pa.array([date(2024, 1, 7), date(2024, 1, 14), date(2024, 1, 21),
                                 date(2024, 1, 28), None], pa.date32()),
        "depot": ["north", "north", "north", "north", "north"],
        "pick_hours": pa.array([40.0, float("nan"), None, 43.0, 1.0]),
        "order_lines": pa.array([400, 410, 420, None, 5], pa.int64()),
    })
    data = parquet_bytes(table)
    (spec.inbox / "w.parquet").write_bytes(data)
    (report,) = ingest_feed(feed.store, spec, real_clock=later).reports
    assert report.outcome == FileOutcome.ARCHIVED
    assert (report.rows_ingested, report.plan_rows) == (2, 1)
    assert [(r.line, r.reason) for r in report.rejected] == [
        (2, "'pick_hours' holds 'nan': NaN and infinity are not usable numbers"),
        (4, "'order_lines' is empty; it needs a number in every row"),
        (5, "'week_ending' is empty"),
    ]
    assert_kept(spec.archive / "w.parquet", data)
    assert rejected_lines(feed, report)[0][:2] == ["row", "reason"]
    assert "row 2" in report.findings[0].message
    assert feed.actuals() == [("2024-01-07", 40.0, 0)]


def test_parquet_files_refused_whole(feed: Feed) -> None:
    spec = IngestSpec(**{**feed.spec.__dict__, "format": "parquet"})
    missing = parquet_bytes(pa.table({"week_ending": ["2024-01-07"], "depot": ["n"],
                                      "pick_hours": [1.0]}))
    (spec.inbox / "a.parquet").write_bytes(missing)
    junk = b"PAR1" + bytes(range(200)) + b"PAR1"
    (spec.inbox / "b.parquet").write_bytes(junk)
    csv_text = (HEADER + "2024-01-07,north,40,400\n").encode()
    (spec.inbox / "c.parquet").write_bytes(csv_text)
    reports = {r.name: r for r in ingest_feed(feed.store, spec, real_clock=later).reports}
    assert {r.outcome for r in reports.values()} == {FileOutcome.REJECTED}
    assert "'order_lines'" in reports["a.parquet"].note
    assert "not a readable Parquet file" in reports["b.parquet"].note
    assert "not a readable Parquet file" in reports["c.parquet"].note
    for name, data in (("a.parquet", missing), ("b.parquet", junk), ("c.parquet", csv_text)):
        assert_kept(spec.rejected / name, data)


# ----------------------------------------------------------------------------- crash safety


def committed(feed: Feed, name: str) -> object:
    (item,) = [i for i in inspect_inbox(feed.spec, real_clock=later).complete if i.name == name]
    result = commit_file(feed.store, feed.spec, item, real_clock=later)
    assert result is not None
    return result


def test_a_crash_between_commit_and_move_is_finished_not_rejected(feed: Feed) -> None:
    data = feed.drop("week_08.csv", HEADER + "2024-01-07,north,40,400\n2024-01-14,north,x,1\n")
    committed(feed, "week_08.csv")  # the process dies here: rows committed, file not moved
    assert feed.inbox_names() == ["week_08.csv"]
    assert len(feed.store.files_awaiting_move("depot_weekly")) == 1
    report = feed.only_report()
    assert (report.outcome, report.rule) == (FileOutcome.ARCHIVED, "recovered")
    assert_kept(feed.spec.archive / "week_08.csv", data)
    assert (feed.spec.rejected / "week_08.csv.rejected.csv").exists()
    assert [r.line for r in report.rejected] == [3]
    rejected_input(report, Severity.NOTICE)  # the crashed pass never raised it: raised now
    assert feed.actuals() == [("2024-01-07", 40.0, 0)]  # rows once
    assert len(feed.store.list_files()) == 1
    assert feed.store.files_awaiting_move("depot_weekly") == []
    assert feed.scan().reports == ()  # and nothing more to do


def test_a_crash_inside_the_move_is_finished(feed: Feed) -> None:
    data = feed.drop("a.csv", HEADER + "2024-01-07,north,40,400\n")
    first = committed(feed, "a.csv")
    target = first.record.stored_path  # type: ignore[attr-defined]
    target.parent.mkdir(parents=True)
    os.link(feed.spec.inbox / "a.csv", target)  # the link was made, the unlink was not
    feed.drop("b.csv", HEADER + "2024-01-14,north,41,410\n")
    second = committed(feed, "b.csv")
    move_no_clobber(feed.spec.inbox / "b.csv", second.record.stored_path)  # type: ignore[attr-defined]
    reports = feed.scan().reports  # moved, never marked moved
    assert sorted((r.name, r.rule, r.outcome) for r in reports) == [
        ("a.csv", "recovered", FileOutcome.ARCHIVED), ("b.csv", "recovered", FileOutcome.ARCHIVED)
    ]
    assert feed.inbox_names() == []
    assert_kept(target, data)
    assert [p for p, _, _ in feed.actuals()] == ["2024-01-07", "2024-01-14"]
    assert feed.store.files_awaiting_move("depot_weekly") == []


def test_after_a_crash_a_copy_under_another_name_is_still_a_duplicate(feed: Feed) -> None:
    data = feed.drop("a.csv", HEADER + "2024-01-07,north,40,400\n")
    committed(feed, "a.csv")
    feed.drop("copy_of_a.csv", data)
    reports = {r.name: r for r in feed.scan().reports}
    assert reports["a.csv"].outcome == FileOutcome.ARCHIVED
    assert reports["copy_of_a.csv"].outcome == FileOutcome.DUPLICATE
    assert_kept(feed.spec.archive / "a.csv", data)
    assert_kept(feed.spec.rejected / "copy_of_a.csv", data)
    assert feed.actuals() == [("2024-01-07", 40.0, 0)]


def test_after_a_crash_a_renamed_file_is_recognised_by_its_bytes(feed: Feed) -> None:
    data = feed.drop("a.csv", HEADER + "2024-01-07,north,40,400\n")
    committed(feed, "a.csv")
    os.rename(feed.spec.inbox / "a.csv", feed.spec.inbox / "renamed.csv")
    report = feed.only_report()
    assert (report.outcome, report.rule) == (FileOutcome.ARCHIVED, "recovered")
    assert_kept(feed.spec.archive / "a.csv", data)
    assert feed.inbox_names() == []


# ----------------------------------------------------------------------------- spec, properties


def test_a_column_in_two_roles_is_a_spec_error(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="more than one role: x"):
        IngestSpec(feed="f", inbox=tmp_path, archive=tmp_path, rejected=tmp_path,
                   period_column="p", responses=("x",), required=("x",))


PLAN = IngestSpec(
    feed="f", inbox=Path("i"), archive=Path("a"), rejected=Path("r"), period_column="week_ending",
    per_column="depot", responses=("pick_hours",), required=("order_lines",),
).plan


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.binary(max_size=400))
def test_the_csv_parser_never_crashes_on_arbitrary_bytes(data: bytes) -> None:
    parsed = parse_csv(data, PLAN)
    assert parsed.refusal is not None or parsed.is_empty or parsed.rows or parsed.rejected
    assert all(row.line >= 2 for row in parsed.rows + parsed.rejected)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.lists(st.text(max_size=12), min_size=0, max_size=6), max_size=8))
def test_every_row_is_either_ingested_or_rejected_once(cells: list[list[str]]) -> None:
    buffer = io.StringIO()
    writer = csv.writer(buffer)
    writer.writerow(["week_ending", "depot", "pick_hours", "order_lines"])
    writer.writerows(cells)
    parsed = parse_csv(buffer.getvalue().encode("utf-8", "surrogatepass"), PLAN)
    if parsed.refusal is not None:  # NUL characters or lone surrogates: not CSV text
        assert any("\x00" in c or any(0xD800 <= ord(ch) <= 0xDFFF for ch in c)
                   for row in cells for c in row)
        return
    written = [row for row in cells if any(cell.strip() for cell in row)]
    lines = [row.line for row in parsed.rows] + [row.line for row in parsed.rejected]
    assert len(lines) == len(set(lines)) == len(written)


@settings(max_examples=100, deadline=None)
@given(st.binary(max_size=300))
def test_the_parquet_parser_never_crashes_on_arbitrary_bytes(data: bytes) -> None:
    parsed = parse_parquet(b"PAR1" + data + b"PAR1", PLAN)
    assert parsed.refusal is not None or parsed.is_empty or parsed.rows or parsed.rejected


class StoreWithAFailingInsert(Store):
    """The real store, whose row insert fails for one file (``error`` is what it raises)."""

    error: Exception = sqlite3.IntegrityError("CHECK constraint failed: a stand-in")

    def insert_observations(
        self, feed: str, file_id: int, columns: Sequence[str], rows: Iterable[ObservationRow]
    ) -> ObservationCounts:
        batch = list(rows)
        if any(row.period == "2024-01-07" for row in batch):
            raise self.error
        return super().insert_observations(feed, file_id, columns, batch)


class StoreWithAFullDisk(StoreWithAFailingInsert):
    error = sqlite3.OperationalError("database or disk is full")


def test_a_file_whose_rows_cannot_be_stored_is_rolled_back_and_the_others_go_on(
    tmp_path: Path, feed: Feed
) -> None:
    store = StoreWithAFailingInsert.open(tmp_path / "failing.sqlite")
    failing = Feed(feed.spec, store)
    data = failing.drop("a.csv", HEADER + "2024-01-07,north,40,400\n")
    failing.drop("b.csv", HEADER + "2024-01-14,north,41,410\n")
    result = failing.scan()
    assert [r.name for r in result.reports] == ["b.csv"]
    assert len(result.problems) == 1 and "a.csv" in result.problems[0]
    assert "CHECK constraint failed" in result.problems[0]
    assert "nothing of it was stored and it stays in the inbox" in result.problems[0]
    assert [f.name for f in store.list_files()] == ["b.csv"]  # a.csv's record rolled back too
    assert_kept(feed.spec.inbox / "a.csv", data)
    assert failing.actuals() == [("2024-01-14", 41.0, 0)]
    store.close()


def test_a_full_disk_stops_the_scan_with_nothing_half_stored(tmp_path: Path, feed: Feed) -> None:
    # Changed by issue 11: a full disk is the database's fault, not the file's, so the scan
    # stops (the command prints one line and exits 3) instead of going on to the next file.
    store = StoreWithAFullDisk.open(tmp_path / "full.sqlite")
    full = Feed(feed.spec, store)
    data_a = full.drop("a.csv", HEADER + "2024-01-07,north,40,400\n")
    data_b = full.drop("b.csv", HEADER + "2024-01-14,north,41,410\n")
    with pytest.raises(DatabaseFaultError, match="is full"):
        full.scan()
    assert store.list_files() == []
    assert_kept(feed.spec.inbox / "a.csv", data_a)
    assert_kept(feed.spec.inbox / "b.csv", data_b)
    store.close()
