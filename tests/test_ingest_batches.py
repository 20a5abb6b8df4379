"""Reading a file in batches gives exactly what reading it whole gives.

The array checks (pyarrow splits fields and converts numbers; numpy finds lines) must agree with
the row checker, which reads with the csv module and gives every reason in words. A file whose
header is quoted is read the csv module's way from the start, so the same rows behind a quoted
and a plain header compare the two paths; a small ``batch_bytes`` cuts a file into many blocks.
"""

from __future__ import annotations

import csv
import io
import time
from datetime import date, timedelta
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.ingest import FileReport, IngestSpec, ingest_feed, parse
from monitor.ingest.parse import ColumnPlan, ParsedFile, parse_csv, parse_parquet
from monitor.store import Store

PLAN = ColumnPlan("week_ending", "date", "depot", ("pick_hours",), ("order_lines",), ("pallets",))
PLAIN = "week_ending,depot,pick_hours,order_lines,pallets\n"
QUOTED = '"week_ending","depot","pick_hours","order_lines","pallets"\n'


def messy_rows(count: int) -> list[str]:
    """Good rows with every kind of bad one mixed in (invented data)."""
    lines = []
    for i in range(count):
        day = (date(2024, 1, 7) + timedelta(weeks=i % 40)).isoformat()
        depot = f"depot-{i // 40:03d}"
        kind = i % 23
        if kind == 0:
            lines.append(f"{day},{depot},lots,{i}\n")  # text: a ragged line too (4 fields)
        elif kind == 1:
            lines.append(f"{day},{depot},NaN,{i},\n")
        elif kind == 2:
            lines.append(f"2024-13-01,{depot},1,{i},\n")
        elif kind == 3:
            lines.append("\n")
        elif kind == 4:
            lines.append(" , ,,\u00a0,\n")  # blank: white space and commas only
        elif kind == 5:
            lines.append(f"{day},{depot},,{i},\n")  # a plan row
        elif kind == 6:
            lines.append(f"{day},{depot},1_000,{i},\n")
        elif kind == 7:
            lines.append(f"{day},{depot}, 12.5 ,{i},3\r\n")  # spaces around a number; CRLF
        elif kind == 8:
            lines.append(f"{day},,1,{i},\n")
        elif kind == 9:
            lines.append(f"{day},{depot},1e999,{i},\n")
        elif kind == 10:
            lines.append(f"{day},{depot},4,,\n")  # required column empty
        elif kind == 11:
            lines.append(f"{day}T10:00,{depot},4,5,\n")
        elif kind == 12:
            lines.append(f"{day},{depot},\u0661\u0662,5,\n")  # Arabic-Indic digits: float() takes

        elif kind == 13:
            lines.append(f"{day},{depot},+.5,-0,7\n")
        else:
            lines.append(f"{day},{depot},{i * 0.1:.3f},{i},\n")
    repeat = (date(2024, 1, 7) + timedelta(weeks=20)).isoformat()
    lines.append(f"{repeat},depot-000,9,9,\n")  # the key of row 20 (line 22) again
    return lines


def same(a: ParsedFile, b: ParsedFile) -> None:
    assert (a.refusal, a.note, a.columns, a.line_word) == (b.refusal, b.note, b.columns,
                                                          b.line_word)
    assert a.rows == b.rows
    assert a.rejected == b.rejected


def test_array_checks_agree_with_the_row_checker_in_any_block_size() -> None:
    body = "".join(messy_rows(2000))
    by_rows = parse_csv((QUOTED + body).encode(), PLAN)  # the csv module's way throughout
    whole = parse_csv((PLAIN + body).encode(), PLAN)
    assert len(whole.rows) > 1000 and len(whole.rejected) > 500
    assert [r.line for r in whole.rejected][:3] == [2, 3, 4]
    assert any("appears 2 times" in r.reason for r in whole.rejected)
    same(whole, by_rows)
    for block in (64, 300, 4096):
        same(parse_csv((PLAIN + body).encode(), PLAN, block_bytes=block), whole)


def test_a_quote_part_way_switches_to_the_csv_module_at_a_line_boundary() -> None:
    body = messy_rows(600)
    body[400] = '2024-01-07,"depot,with comma",1,2,\n'
    body[401] = '2024-01-14,"two\nlines",1,2,\n'
    data = (PLAIN + "".join(body)).encode()
    whole = parse_csv((QUOTED + "".join(body)).encode(), PLAN)
    for block in (100, 2048, 1 << 20):
        same(parse_csv(data, PLAN, block_bytes=block), whole)
    assert any(row.series == "two\nlines" for row in whole.rows)


def test_a_few_rows_split_here_read_as_pyarrow_reads_them(monkeypatch: pytest.MonkeyPatch) -> None:
    # Blocks of up to _SPLIT_ROWS rows are split at the commas in Python (pyarrow's reader costs
    # about 0.8 ms a call whatever the size); larger ones go to pyarrow. Every block size, either
    # way, gives what the csv module's way gives (bytes that are not UTF-8 refuse the whole file
    # before any block is read: ``test_ingest.py``).
    body = "".join(messy_rows(300)).encode() + "2024-01-07,dépôt-ü,1,2,\n".encode()
    by_rows = parse_csv(QUOTED.encode() + body, PLAN)
    assert any(row.series == "dépôt-ü" for row in by_rows.rows)
    for split_rows in (0, 256, 10_000):
        monkeypatch.setattr(parse, "_SPLIT_ROWS", split_rows)
        for block in (64, 700, 1 << 20):
            same(parse_csv(PLAIN.encode() + body, PLAN, block_bytes=block), by_rows)


CELLS = st.sampled_from(["", " ", "1", "2.5", "-3", "x", "NaN", "1e5", "2024-01-07", "2024-01-14",
                         "2024-02-30", "a", "b", "+1", ".5", "1_0", "inf", "\u00a0"])


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.lists(CELLS, min_size=0, max_size=6), max_size=30),
       st.integers(min_value=1, max_value=200))
def test_random_rows_read_alike_both_ways_and_in_blocks(rows: list[list[str]], block: int) -> None:
    text = "".join(",".join(row) + "\n" for row in rows)
    same(parse_csv((PLAIN + text).encode(), PLAN, block_bytes=block),
         parse_csv((QUOTED + text).encode(), PLAN))


def ingest(tmp_path: Path, name: str, data: bytes, batch_bytes: int, fmt: str = "csv") -> tuple:
    root = tmp_path / name
    spec = IngestSpec(
        feed="depot_weekly", inbox=root / "inbox", archive=root / "archive",
        rejected=root / "rejected", period_column="week_ending", per_column="depot",
        responses=("pick_hours",), required=("order_lines",), optional=("pallets",),
        batch_bytes=batch_bytes, format=fmt,  # type: ignore[arg-type]
    )
    spec.inbox.mkdir(parents=True)
    (spec.inbox / f"week.{fmt}").write_bytes(data)
    with Store.open(root / "db.sqlite") as store:
        (report,) = ingest_feed(store, spec, real_clock=lambda: time.time() + 3600).reports
        rows = [
            (o.series, o.period, o.period_key, o.is_plan, o.values, o.line, o.revision, o.current)
            for series in [*store.series_keys("depot_weekly"), "depot-bad"]
            for o in store.observation_history("depot_weekly", series)
        ]
        stored_rejections = store.rejected_rows(report.file_id)
    side = (spec.rejected / f"week.{fmt}.rejected.csv").read_text("utf-8")
    return report, rows, stored_rejections, side


def summary(report: FileReport) -> tuple:
    return (report.outcome, report.rows_ingested, report.plan_rows, report.rows_rejected,
            report.rejected, report.note,
            [f.message.replace(str(report.stored_path.parents[1]), "ROOT")
             for f in report.findings])


def test_a_file_larger_than_a_batch_is_ingested_as_if_whole(tmp_path: Path) -> None:
    data = (PLAIN + "".join(messy_rows(3000))).encode()
    small = ingest(tmp_path, "small", data, 512)  # about 20 rows a batch: ~150 batches
    whole = ingest(tmp_path, "whole", data, 1 << 24)
    assert len(data) > 100 * 512
    assert summary(small[0]) == summary(whole[0])
    assert small[1] == whole[1] and len(small[1]) > 1500
    assert small[2] == whole[2]
    assert small[3] == whole[3]
    # line numbers: each stored row's line holds that row in the file
    lines = data.decode().split("\n")
    for series, period, _, _, _, line, _, _ in small[1][:200]:
        assert lines[line - 1].startswith(f"{period},{series},")
    reasons = {r.line: r.reason for r in small[2]}
    assert "appears 2 times in the file (lines 22, 3002)" in reasons[22]
    assert next(csv.reader(io.StringIO(small[3])))[:2] == ["line", "reason"]


def test_a_parquet_file_larger_than_a_batch_is_ingested_as_if_whole(tmp_path: Path) -> None:
    count = 3000
    days = [date(2024, 1, 7) + timedelta(weeks=i % 40) for i in range(count)]
    hours = [None if i % 7 == 0 else (float("nan") if i % 11 == 0 else i * 0.5)
             for i in range(count)]
    table = pa.table({
        "week_ending": pa.array(days, pa.date32()),
        "depot": [f"d{i // 40}" if i % 13 else "" for i in range(count)],
        "pick_hours": pa.array(hours, pa.float64()),
        "order_lines": pa.array([i if i % 17 else None for i in range(count)], pa.int64()),
    })
    sink = io.BytesIO()
    pq.write_table(table, sink, row_group_size=500)
    data = sink.getvalue()
    small = ingest(tmp_path, "small", data, 2048, "parquet")
    whole = ingest(tmp_path, "whole", data, 1 << 24, "parquet")
    assert summary(small[0]) == summary(whole[0]) and small[0].rows_rejected > 300
    assert small[1:] == whole[1:]
    in_blocks = parse_parquet(data, PLAN, block_bytes=2048)
    assert in_blocks.rejected == parse_parquet(data, PLAN).rejected


def test_arrays_are_read_from_their_buffers_as_numpy_would() -> None:
    # parse._numpy_of reads pyarrow arrays without Array.to_numpy (which imports pandas); the
    # reference is to_numpy itself, on slices that start inside a byte of a boolean bitmap.
    import numpy as np

    from monitor.ingest.parse import _numpy_of

    flags = pa.array([True, False, True, True, False, False, True, False, True, True, False])
    numbers = pa.array([1.5, -2.0, 3.25, 1e300, -0.0, 7.0, 8.5])
    counts = pa.array([3, 1, 4, 1, 5, 9, 2, 6], pa.int32())
    for array in (flags, numbers, counts):
        for start in range(4):
            part = array.slice(start, len(array) - start - 1)
            ours = _numpy_of(part)
            reference = part.to_numpy(zero_copy_only=False)
            assert ours.tolist() == reference.tolist(), (array.type, start)
    assert _numpy_of(counts).dtype == np.int64 and _numpy_of(numbers).dtype == np.float64
    with pytest.raises(TypeError):
        _numpy_of(pa.array(["a"]))
