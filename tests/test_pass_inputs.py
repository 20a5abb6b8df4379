"""Bad input through a whole pass (DESIGN.md sections 5 and 6), each case its own workspace.

Every case starts from the same history: a feed ``depots`` (``per: depot``, two depots) that has
delivered twelve weeks of actuals and week 13's plan rows, and one pass at week 12's business
clock. Then the case's file lands beside a clean file for week 13, and ``plumbline pass`` runs
through the command line. In each case the test checks that the pass exits 0, that good files
and rows are stored exactly once (counting observations, also after another pass), that the
dropped bytes are found unchanged in archive or rejected (SHA-256), that the report beside the
file gives the line and the reason, and which ``rejected_input`` finding the feed gets: a
``warning`` for a file refused as a whole, a ``notice`` for rejected rows or a duplicate, none for
an empty file (archived with a note, not an error) or for a file that has not settled.
"""

from __future__ import annotations

import csv
import io
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm
from _workspace import (
    Workspace,
    config_yaml,
    csv_bytes,
    delivered,
    feed_yaml,
    sha256,
    week_ending,
)

from monitor.passes import run_pass
from monitor.store import FindingRecord, Store
from monitor.vocabulary import FindingKind, Severity

COLUMNS = ("week_ending", "depot", "drops", "delivery_hours")
HEADER = ",".join(COLUMNS) + "\n"
DEPOTS = ("north", "south")
HISTORY_WEEKS = 12
SEED_ROWS = HISTORY_WEEKS * len(DEPOTS) + len(DEPOTS)  # actuals of weeks 1-12, plans of week 13
COMPANION_ROWS = 2 * len(DEPOTS)  # week 13's actuals and week 14's plans
W14 = week_ending(14).isoformat()
W15 = week_ending(15).isoformat()


def _config(file_format: str = "csv") -> str:
    model = "\n".join([
        "  delivery_hours:",
        "    feed: depots",
        "    response: delivery_hours",
        "    predictors: [drops]",
        "    per: depot",
        "    window: 30",
        "    recent: 10",
        "    min_rows: 10",
    ])
    return config_yaml([feed_yaml("depots", COLUMNS, file_format=file_format)], [model])


def _history() -> dict[int, dict[str, tuple[float, float]]]:
    """week -> depot -> (drops, delivery_hours) for weeks 1-15, seeded."""
    rng = np.random.default_rng(1313)
    out: dict[int, dict[str, tuple[float, float]]] = {}
    for w in range(1, 16):
        out[w] = {}
        for d in DEPOTS:
            drops = float(round(rng.uniform(80, 160)))
            out[w][d] = (drops, round(6 + 0.5 * drops + float(rng.normal(0, 2.5)), 2))
    return out


HISTORY = _history()


def _rows(actual_weeks: Sequence[int], plan_week: int | None) -> list[list[object]]:
    rows: list[list[object]] = []
    for w in actual_weeks:
        rows += [[week_ending(w).isoformat(), d, *HISTORY[w][d]] for d in DEPOTS]
    if plan_week is not None:
        rows += [[week_ending(plan_week).isoformat(), d, HISTORY[plan_week][d][0], None]
                 for d in DEPOTS]
    return rows


COMPANION = csv_bytes(COLUMNS, _rows([13], 14))


def _seeded(root: Path, file_format: str = "csv") -> Workspace:
    """The common start: weeks 1-12 and the plans for week 13, taken by one pass."""
    workspace = Workspace.create(root, _config(file_format))
    rows = _rows(range(1, HISTORY_WEEKS + 1), HISTORY_WEEKS + 1)
    data = _parquet(rows) if file_format == "parquet" else csv_bytes(COLUMNS, rows)
    workspace.drop("depots", f"history.{file_format}", data)
    report = workspace.run(delivered(HISTORY_WEEKS))
    assert [f.outcome.value for f in report.files] == ["archived"]
    assert report.forecasts_issued == len(DEPOTS)  # both depots warm at 12 rows
    assert workspace.observation_count() == SEED_ROWS
    return workspace


def _parquet(rows: Sequence[Sequence[object]]) -> bytes:
    table = pa.table({
        "week_ending": pa.array([datetime.fromisoformat(str(r[0])).date() for r in rows],
                                pa.date32()),
        "depot": pa.array([r[1] for r in rows], pa.string()),
        "drops": pa.array([r[2] for r in rows], pa.float64()),
        "delivery_hours": pa.array([r[3] for r in rows], pa.float64()),
    })
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def _rejected_input(workspace: Workspace) -> list[FindingRecord]:
    with Store.open(workspace.database, readonly=True) as store:
        return store.list_findings(state="open", kind=FindingKind.REJECTED_INPUT)


def _stored_keys(workspace: Workspace, file_name: str) -> set[tuple[str, str, int]]:
    """(depot, period, is_plan) of every observation stored from the named file."""
    rows = workspace.query(
        "SELECT s.key, o.period, o.is_plan FROM observations AS o "
        "JOIN series AS s ON s.id = o.series_id JOIN files AS f ON f.id = o.file_id "
        "WHERE f.name = ?", (file_name,))
    return {(r[0], r[1], r[2]) for r in rows}


def _report_rows(path: Path) -> list[list[str]]:
    with path.open(encoding="utf-8", newline="") as handle:
        return list(csv.reader(handle))


@dataclass(frozen=True)
class Case:
    name: str
    content: bytes
    outcome: str  # the files table's outcome
    good: frozenset[tuple[str, str]]  # (depot, period) rows the case file should store
    severity: Severity | None
    errors: tuple[str, ...] = ()  # phrases of NAME.errors.txt (a file refused as a whole)
    rejected: tuple[tuple[int, str], ...] = ()  # (line, phrase of the reason) in NAME.rejected.csv
    note: str = ""  # phrase of the note an empty file is archived with


CASES = (
    Case("empty", b"", "empty", frozenset(), None, note="the file is empty"),
    Case("header_only", HEADER.encode(), "empty", frozenset(), None,
         note="a header and no rows"),
    Case("binary_junk", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x01\xff\xfe" * 4, "rejected",
         frozenset(), Severity.WARNING, errors=("NUL bytes", "the first at byte 8", "binary")),
    Case("not_utf8",
         (HEADER + f"{W14},north,120,66.10\n" + f"{W14},s\u00fcd,118,65.00\n").encode("latin-1"),
         "rejected", frozenset(), Severity.WARNING,
         errors=("not UTF-8", "0xfc", "(line 3)")),
    Case("missing_column",
         f"week_ending,depot,delivery_hours\n{W14},north,66.10\n".encode(), "rejected",
         frozenset(), Severity.WARNING,
         errors=("declared column missing from the header", "'drops'")),
    Case("text_in_a_number",
         (HEADER + f"{W14},north,120,66.10\n{W14},south,n/a,70.20\n").encode(), "archived",
         frozenset({("north", W14)}), Severity.NOTICE,
         rejected=((3, "'drops' holds 'n/a' where a number is needed"),)),
    Case("nan_and_infinity",
         (HEADER + f"{W14},north,120,NaN\n{W14},south,inf,70.20\n{W15},south,118,-Infinity\n"
          f"{W15},north,121,66.70\n").encode(), "archived",
         frozenset({("north", W15)}), Severity.NOTICE,
         rejected=((2, "'delivery_hours' holds 'NaN': NaN and infinity are not usable"),
                   (3, "'drops' holds 'inf': NaN and infinity are not usable"),
                   (4, "'delivery_hours' holds '-Infinity': NaN and infinity"))),
    Case("unparseable_date",
         (HEADER + f"2024-13-45,north,120,66.10\n07/04/2024,south,118,65.00\n"
          f"{W14},south,118,65.00\n").encode(), "archived",
         frozenset({("south", W14)}), Severity.NOTICE,
         rejected=((2, "'week_ending' holds '2024-13-45', which is not an ISO 8601 date"),
                   (3, "'week_ending' holds '07/04/2024', which is not an ISO 8601 date"))),
    Case("a_key_twice",
         (HEADER + f"{W14},north,120,66.10\n{W14},north,121,66.90\n{W14},south,118,65.00\n")
         .encode(), "archived",
         frozenset({("south", W14)}), Severity.NOTICE,
         rejected=((2, f"depot 'north', week_ending {W14} appears 2 times in the file"),
                   (3, "lines 2, 3"))),
)


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.name)
def test_a_bad_file_through_a_pass(
    case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = _seeded(tmp_path)
    workspace.drop("depots", "week_13.csv", COMPANION)
    workspace.drop("depots", "case.csv", case.content)
    capsys.readouterr()
    assert workspace.cli_pass(delivered(13)) == 0

    # good files and rows exactly once, bad rows not at all
    expected = SEED_ROWS + COMPANION_ROWS + len(case.good)
    assert workspace.observation_count() == expected
    assert {(k[0], k[1]) for k in _stored_keys(workspace, "case.csv")} == set(case.good)
    assert len(_stored_keys(workspace, "week_13.csv")) == COMPANION_ROWS
    assert workspace.cli_pass(delivered(13) + timedelta(hours=1)) == 0
    assert workspace.observation_count() == expected

    # the bytes survive where they belong, and nothing is left in the inbox
    archive, rejected = workspace.archive("depots"), workspace.rejected("depots")
    folder = rejected if case.outcome == "rejected" else archive
    assert sha256((folder / "case.csv").read_bytes()) == sha256(case.content)
    assert sha256((archive / "week_13.csv").read_bytes()) == sha256(COMPANION)
    assert sorted(p.name for p in workspace.inbox("depots").iterdir()) == []
    (record,) = workspace.query(
        "SELECT outcome, rows_rejected, note, sha256, size FROM files WHERE name = 'case.csv'")
    assert record[0] == case.outcome
    assert record[1] == len(case.rejected)
    assert record[3] == sha256(case.content) and record[4] == len(case.content)

    # the report beside the file: the reason, and the line where there is one
    errors = rejected / "case.csv.errors.txt"
    rows_report = rejected / "case.csv.rejected.csv"
    assert errors.exists() == bool(case.errors)
    assert rows_report.exists() == bool(case.rejected)
    if case.errors:
        text = errors.read_text(encoding="utf-8")
        for phrase in case.errors:
            assert phrase in text, (phrase, text)
        assert "case.csv" in text
    if case.rejected:
        table = _report_rows(rows_report)
        assert table[0] == ["line", "reason", *COLUMNS]
        assert [int(row[0]) for row in table[1:]] == [line for line, _ in case.rejected]
        original = case.content.decode("utf-8").splitlines()
        for row, (line, phrase) in zip(table[1:], case.rejected, strict=True):
            assert phrase in row[1], (phrase, row[1])
            assert ",".join(row[2:]) == original[line - 1]  # the row's cells as written
    if case.note:
        assert case.note in record[2]

    # the finding of DESIGN.md section 6 (none for an empty file: it is not an error)
    findings = _rejected_input(workspace)
    if case.severity is None:
        assert findings == []
    else:
        (finding,) = findings
        assert finding.feed == "depots" and finding.model is None and finding.series is None
        assert finding.severity == case.severity
        assert "case.csv" in finding.message
    # and the clean file's plans for week 14 were still answered by the same pass, except
    # where the case file brought week 14's actual with them (the request is then closed)
    with Store.open(workspace.database, readonly=True) as store:
        answered = {f.series for f in store.list_forecasts() if f.target_period == W14}
    assert answered == {d for d in DEPOTS if (d, W14) not in case.good}


@pytest.mark.parametrize("when", ["next_pass", "same_pass"])
def test_the_same_file_under_a_second_name_is_not_ingested_again(
    when: str, tmp_path: Path
) -> None:
    workspace = _seeded(tmp_path)
    workspace.drop("depots", "week_13.csv", COMPANION)
    if when == "same_pass":
        # written after the original, and its name sorts after it: files are taken oldest
        # first (modification time, then name), so the copy is the one found a duplicate
        workspace.drop("depots", "week_13_resent.csv", COMPANION)
    assert workspace.cli_pass(delivered(13)) == 0
    after_first = workspace.observation_count()
    assert after_first == SEED_ROWS + COMPANION_ROWS

    week_14 = csv_bytes(COLUMNS, _rows([14], 15))
    workspace.drop("depots", "week_14.csv", week_14)
    if when == "next_pass":
        workspace.drop("depots", "week_13_resent.csv", COMPANION)
    assert workspace.cli_pass(delivered(14)) == 0
    assert workspace.observation_count() == after_first + len(_stored_keys(workspace,
                                                                            "week_14.csv"))
    assert _stored_keys(workspace, "week_13_resent.csv") == set()
    rejected = workspace.rejected("depots")
    assert sha256((rejected / "week_13_resent.csv").read_bytes()) == sha256(COMPANION)
    assert sha256((workspace.archive("depots") / "week_13.csv").read_bytes()) == sha256(COMPANION)
    text = (rejected / "week_13_resent.csv.errors.txt").read_text(encoding="utf-8")
    assert "identical to week_13.csv" in text and sha256(COMPANION) in text
    (outcome,) = workspace.query("SELECT outcome FROM files WHERE name = 'week_13_resent.csv'")
    assert outcome == ("duplicate",)
    with Store.open(workspace.database, readonly=True) as store:
        (finding,) = store.list_findings(state="all", kind=FindingKind.REJECTED_INPUT)
    assert finding.severity == Severity.NOTICE
    assert "week_13_resent.csv" in finding.message and "week_13.csv" in finding.message
    (raised_at,) = workspace.query(
        "SELECT p.as_of FROM passes AS p WHERE p.id = ?", (finding.first_pass_id,))
    duplicate_week = 13 if when == "same_pass" else 14
    assert datetime.fromisoformat(raised_at[0]) == delivered(duplicate_week)
    # the second pass scored week 14's actuals once, not twice
    outcomes = workspace.query("SELECT count(*), count(DISTINCT forecast_id) FROM outcomes")
    assert outcomes[0][0] == outcomes[0][1]


def test_a_file_still_being_written_stays_in_the_inbox_and_raises_nothing(
    tmp_path: Path,
) -> None:
    workspace = _seeded(tmp_path)
    workspace.drop("depots", "week_13.csv", COMPANION)
    growing = (HEADER + f"{W14},north,120,66.10\n{W14},sou").encode()
    path = workspace.inbox("depots") / "week_14.csv"
    path.write_bytes(growing)  # no marker, written just now (settle is 30 s, on the real clock)
    info = os.stat(path)
    assert info.st_ctime_ns == info.st_mtime_ns  # written in place, not renamed into the inbox
    assert time.time() - info.st_mtime < 20

    assert workspace.cli_pass(delivered(13)) == 0
    assert path.read_bytes() == growing  # left alone, unchanged
    assert workspace.query("SELECT count(*) FROM files WHERE name = 'week_14.csv'") == [(0,)]
    assert workspace.observation_count() == SEED_ROWS + COMPANION_ROWS
    assert _rejected_input(workspace) == []
    for folder in (workspace.archive("depots"), workspace.rejected("depots")):
        assert not any(p.name.startswith("week_14") for p in folder.iterdir())

    # Once it has settled (a real clock a minute on) the next pass takes it like any file.
    with path.open("ab") as handle:
        handle.write(b"th,118,65.00\n")
    finished = path.read_bytes()
    report = workspace.run(
        delivered(13) + timedelta(hours=1),
        real_clock=lambda: datetime.now(UTC) + timedelta(seconds=60),
    )
    (taken,) = report.files
    assert (taken.name, taken.rule, taken.outcome.value) == ("week_14.csv", "settled", "archived")
    assert sha256((workspace.archive("depots") / "week_14.csv").read_bytes()) == sha256(finished)


def test_a_revision_is_kept_beside_the_first_actual_and_used_from_then_on(
    tmp_path: Path,
) -> None:
    workspace = _seeded(tmp_path)
    drops_12, hours_12 = HISTORY[12]["north"]
    revised_hours = round(hours_12 + 9.5, 2)
    rows = _rows([13], 14)
    rows.insert(0, [week_ending(12).isoformat(), "north", drops_12, revised_hours])
    data = csv_bytes(COLUMNS, rows)
    workspace.drop("depots", "week_13.csv", data)
    assert workspace.cli_pass(delivered(13)) == 0

    with Store.open(workspace.database, readonly=True) as store:
        history = [
            r for r in store.observation_history("depots", "north", include_plans=False)
            if r.period == week_ending(12).isoformat()
        ]
        fits = store.latest_fits("delivery_hours")
        findings = _rejected_input(workspace)
    assert [(r.revision, r.current, r.values["delivery_hours"]) for r in history] == [
        (0, False, hours_12), (1, True, revised_hours)]
    assert workspace.query("SELECT revisions FROM files WHERE name = 'week_13.csv'") == [(1,)]
    assert findings == []  # a revision is not a rejection
    # "used from then on": north's fit at week 13 is the fit of the revised rows
    # (reference: statsmodels OLS on weeks 1-13 as the test wrote them, week 12 revised)
    drops = np.array([HISTORY[w]["north"][0] for w in range(1, 14)])
    hours = np.array([HISTORY[w]["north"][1] for w in range(1, 14)])
    hours_revised = hours.copy()
    hours_revised[11] = revised_hours
    fit = fits["north"]
    assert fit.n == 13
    used = sm.OLS(hours_revised, sm.add_constant(drops)).fit()
    unrevised = sm.OLS(hours, sm.add_constant(drops)).fit()
    assert fit.coefficients["drops"]["estimate"] == pytest.approx(used.params[1], rel=1e-10)
    assert fit.coefficients["intercept"]["estimate"] == pytest.approx(used.params[0], rel=1e-10)
    assert abs(used.params[1] - unrevised.params[1]) > 1e-3  # the revision matters
    assert fit.inference["residual_std_error"] == pytest.approx(
        float(np.sqrt(used.scale)), rel=1e-10)
    assert workspace.observation_count() == SEED_ROWS + COMPANION_ROWS + 1
    assert sha256((workspace.archive("depots") / "week_13.csv").read_bytes()) == sha256(data)


def test_plumbline_pass_reports_a_revision(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """DESIGN.md section 6 (and the README): a revision is kept, *reported*, and used."""
    workspace = _seeded(tmp_path)
    drops_12, hours_12 = HISTORY[12]["north"]
    rows = [[week_ending(12).isoformat(), "north", drops_12, round(hours_12 + 9.5, 2)],
            *_rows([13], 14)]
    workspace.drop("depots", "week_13.csv", csv_bytes(COLUMNS, rows))
    capsys.readouterr()
    assert workspace.cli_pass(delivered(13)) == 0
    out = capsys.readouterr().out
    lines = [line for line in out.splitlines() if "revis" in line.lower()]
    assert lines, f"the pass's output says nothing of the revision:\n{out}"
    assert any("week_13.csv" in line for line in lines), lines


PARQUET_CASES = ("good", "truncated", "nan_row")


@pytest.mark.parametrize("kind", PARQUET_CASES)
def test_a_parquet_file_through_a_pass(kind: str, tmp_path: Path) -> None:
    workspace = _seeded(tmp_path, "parquet")
    companion = _parquet(_rows([13], 14))
    workspace.drop("depots", "week_13.parquet", companion)
    if kind == "good":
        content, good, severity = _parquet(_rows([14], None)), len(DEPOTS), None
    elif kind == "truncated":
        whole = _parquet(_rows([14], None))
        content, good, severity = whole[: len(whole) // 2], 0, Severity.WARNING
    else:
        rows = _rows([14], None)
        rows[1][3] = float("nan")  # row 2: south's response
        content, good, severity = _parquet(rows), 1, Severity.NOTICE
    workspace.drop("depots", "case.parquet", content)
    assert workspace.cli_pass(delivered(13)) == 0
    expected = SEED_ROWS + COMPANION_ROWS + good
    assert workspace.observation_count() == expected
    assert workspace.cli_pass(delivered(13) + timedelta(hours=1)) == 0
    assert workspace.observation_count() == expected

    archive, rejected = workspace.archive("depots"), workspace.rejected("depots")
    folder = rejected if kind == "truncated" else archive
    assert sha256((folder / "case.parquet").read_bytes()) == sha256(content)
    assert sha256((archive / "week_13.parquet").read_bytes()) == sha256(companion)
    findings = _rejected_input(workspace)
    if severity is None:
        assert findings == []
        assert not any(rejected.iterdir())
    else:
        (finding,) = findings
        assert finding.severity == severity and "case.parquet" in finding.message
    if kind == "truncated":
        text = (rejected / "case.parquet.errors.txt").read_text(encoding="utf-8")
        assert "not a readable Parquet file" in text
    if kind == "nan_row":
        table = _report_rows(rejected / "case.parquet.rejected.csv")
        assert table[0] == ["row", "reason", *COLUMNS]
        assert [row[0] for row in table[1:]] == ["2"]
        assert "NaN and infinity are not usable numbers" in table[1][1]
        assert table[1][3] == "south"  # the row's cells follow (week_ending, depot, ...)
        assert _stored_keys(workspace, "case.parquet") == {("north", W14, 0)}


def test_two_bad_files_in_one_pass_give_one_finding_at_the_worse_severity(
    tmp_path: Path,
) -> None:
    """Two bad files in one pass give one finding on the feed, at the worse severity."""
    workspace = _seeded(tmp_path)
    workspace.drop("depots", "week_13.csv", COMPANION)
    workspace.drop("depots", "rows.csv", CASES[5].content)  # rows rejected: notice
    workspace.drop("depots", "whole.csv", CASES[2].content)  # refused whole: warning
    report = run_pass(workspace.config, as_of=delivered(13))
    assert sorted((f.name, f.outcome.value) for f in report.files) == [
        ("rows.csv", "archived"), ("week_13.csv", "archived"), ("whole.csv", "rejected")]
    (finding,) = _rejected_input(workspace)
    assert finding.severity == Severity.WARNING
    assert "rows.csv" in finding.message and "whole.csv" in finding.message
    assert report.findings_raised == (finding.id,)
    # a clean file next week: the finding stays open (clear_after 2), is not raised again
    workspace.drop("depots", "week_14.csv", csv_bytes(COLUMNS, _rows([14], 15)))
    report = run_pass(workspace.config, as_of=delivered(14))
    assert finding.id not in report.findings_raised
    assert [f.id for f in _rejected_input(workspace)] == [finding.id]
