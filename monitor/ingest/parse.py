"""Reading a dropped file into rows: CSV (UTF-8 with a header) and Parquet, checked row by row.

The parsers never raise on bad input: whatever the bytes, they return a :class:`ParsedFile` that
says the file is usable (with good rows and rejected rows), empty, or refused as a whole with the
reason in words. Line numbers are the file's own: the header is line 1 of a CSV; for Parquet,
``line`` is the row number (first row = 1).
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import date, datetime, time
from decimal import Decimal
from typing import Any

from monitor.store import ObservationRow, RejectedRow, date_period_key
from monitor.text import did_you_mean

_INTEGER = re.compile(r"^[+-]?\d+$")
# A period is a calendar date written in full (2024-01-07). Python also reads ISO week dates
# (2024-W02-1) and the compact forms (20240107) as dates; a feed gets them only by mistake, and
# a week date read as its Monday would put the row on another day than its sender meant.
_CALENDAR_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")
_WEEK_DATE = re.compile(r"^\d{4}-?W\d{2}(-?\d)?$", re.IGNORECASE)
# Numbers whose square is beyond the float range (about 1.8e308): sums of squares in a fit would
# overflow to infinity, so such a value is refused as a row rather than spoiling its series.
LARGEST_VALUE = 1e154

# Fields of any size: a long text in a column the feed does not use must not refuse the file
# (the csv module's default limit is 128 KiB). The whole file is in memory already.
csv.field_size_limit(2**31 - 1)


@dataclass(frozen=True)
class ColumnPlan:
    """What a feed declares about its columns (taken from the IngestSpec)."""

    period: str
    period_type: str  # date | integer
    per: str | None
    responses: tuple[str, ...]  # empty in every one of them: a plan row
    required: tuple[str, ...]  # a number in every row
    optional: tuple[str, ...]  # may be missing from the header, or empty
    # Actuals dated after this period key are refused as rows (plan rows may be dated later):
    # a few cadences past the business clock's date, so a mistyped year cannot hide a stale feed.
    latest_actual: tuple[str, int] | None = None  # (as text, period key)

    @property
    def declared(self) -> tuple[str, ...]:
        """The columns that must be in the header."""
        return (self.period, *((self.per,) if self.per else ()), *self.responses, *self.required)


@dataclass(frozen=True)
class ParsedFile:
    """What a file holds. ``refusal`` set: refused whole. ``note`` set and no rows: empty."""

    header: tuple[str, ...]
    columns: tuple[str, ...]  # the numeric columns each row's values align with
    rows: tuple[ObservationRow, ...]
    rejected: tuple[RejectedRow, ...]
    refusal: str | None = None
    note: str = ""
    line_word: str = "line"  # "line" for CSV, "row" for Parquet

    @property
    def is_empty(self) -> bool:
        return self.refusal is None and not self.rows and not self.rejected


def _refused(reason: str, header: Sequence[str] = ()) -> ParsedFile:
    return ParsedFile(tuple(header), (), (), (), refusal=reason)


def _empty(note: str, header: Sequence[str], line_word: str = "line") -> ParsedFile:
    return ParsedFile(tuple(header), (), (), (), note=note, line_word=line_word)


def check_header(plan: ColumnPlan, header: Sequence[str], *, csv_text: bool = True) -> str | None:
    """Why a header cannot be used, or None. Suggests the nearest name for a misspelt column."""
    seen: set[str] = set()
    for name in header:
        if name in seen and name:
            return f"the column '{name}' appears twice in the header"
        seen.add(name)
    missing = [name for name in plan.declared if name not in seen]
    if not missing:
        return None
    # Real headers hold no numbers or dates; a first line of values does, and names none of
    # the declared columns.
    values_first = any(cell.strip() and _looks_like_a_value(cell) for cell in header)
    if csv_text and values_first and not any(name in seen for name in plan.declared):
        return (
            "the first line holds values, not column names: the file has no header. "
            f"Add a header line naming the columns ({', '.join(plan.declared)})"
        )
    named = "; ".join(f"'{name}'{did_you_mean(name, header)}" for name in missing)
    word = "column" if len(missing) == 1 else "columns"
    return (
        f"declared {word} missing from the header: {named}. "
        f"The header has: {', '.join(repr(h) for h in header) or 'nothing'}"
    )


def _looks_like_a_value(cell: str) -> bool:
    text = cell.strip()
    if not text:
        return True
    try:
        float(text)
        return True
    except ValueError:
        pass
    try:
        date.fromisoformat(text)
        return True
    except ValueError:
        return False


class _RowChecker:
    """Turns one row's cells into an observation or a rejection (all reasons, in words)."""

    def __init__(self, plan: ColumnPlan, header: Sequence[str], line_word: str) -> None:
        self.plan = plan
        self.width = len(header)
        self.line_word = line_word
        index = {name: i for i, name in enumerate(header)}
        self.period_at = index[plan.period]
        self.per_at = None if plan.per is None else index[plan.per]
        present_optional = tuple(name for name in plan.optional if name in index)
        self.columns = (*plan.responses, *plan.required, *present_optional)
        self.value_at = [index[name] for name in self.columns]
        self.responses = len(plan.responses)
        self.required = range(self.responses, self.responses + len(plan.required))
        self.parse_period: Callable[[Any], tuple[str, int] | str] = (
            _integer_period if plan.period_type == "integer" else _date_period
        )
        self.period_cache: dict[Any, tuple[str, int] | str] = {}
        self.series_names: dict[str, str] = {}  # one string object per series, not per row

    def check(self, cells: Sequence[Any], line: int) -> ObservationRow | RejectedRow:
        """The row as an observation, or its rejection with every reason that applies."""
        if len(cells) != self.width:
            return RejectedRow(
                line, f"{len(cells)} fields where the header has {self.width}", _texts(cells)
            )
        # The fast path: every cell fine. Anything doubtful goes to _reject for the words.
        raw_period = cells[self.period_at]
        period = self.period_cache.get(raw_period)
        if period is None:
            period = self.parse_period(raw_period)
            if len(self.period_cache) < 100_000:
                self.period_cache[raw_period] = period
        if isinstance(period, str):
            return self._reject(cells, line)
        series: str | None = None
        if self.per_at is not None:
            raw_series = cells[self.per_at]
            series = self.series_names.get(raw_series)
            if series is None:
                series = _per_value(raw_series)
                if series is None:
                    return self._reject(cells, line)
                series = self.series_names.setdefault(series, series)
                if isinstance(raw_series, str) and len(self.series_names) < 1_000_000:
                    self.series_names[raw_series] = series
        values: list[float | None] = []
        for at in self.value_at:
            cell = cells[at]
            value: float | None
            if type(cell) is str:
                try:
                    parsed = float(cell)
                except ValueError:
                    if cell.strip():
                        return self._reject(cells, line)
                    value = None
                else:
                    # parsed - parsed is 0.0 only for finite numbers
                    if parsed - parsed != 0.0 or "_" in cell or abs(parsed) > LARGEST_VALUE:
                        return self._reject(cells, line)
                    value = parsed
            else:
                number = _number(cell)
                if isinstance(number, str):
                    return self._reject(cells, line)
                value = number
            values.append(value)
        for position in self.required:
            if values[position] is None:
                return self._reject(cells, line)
        responses = self.responses
        is_plan = responses > 0 and all(v is None for v in values[:responses])
        latest = self.plan.latest_actual
        if latest is not None and not is_plan and period[1] > latest[1]:
            return RejectedRow(line, (
                f"'{self.plan.period}' holds {_shown(period[0])}, an actual dated after "
                f"{latest[0]}, far beyond the business clock; an actual cannot come from the "
                "future (a mistyped date?)"
            ), _texts(cells))
        return ObservationRow(series, period[0], period[1], is_plan, tuple(values), line)

    def _reject(self, cells: Sequence[Any], line: int) -> RejectedRow:
        reasons: list[str] = []
        period = self.parse_period(cells[self.period_at])
        if isinstance(period, str):
            reasons.append(f"'{self.plan.period}' {period}")
        if self.per_at is not None and _per_value(cells[self.per_at]) is None:
            reasons.append(f"the per: column '{self.plan.per}' is empty")
        values: list[float | None] = []
        for name, at in zip(self.columns, self.value_at, strict=True):
            value = _number(cells[at])
            if isinstance(value, str):
                reasons.append(f"'{name}' {value}")
                values.append(None)
            else:
                values.append(value)
        for position in self.required:
            name = self.columns[position]
            if values[position] is None and not _said(reasons, name):
                reasons.append(f"'{name}' is empty; it needs a number in every row")
        return RejectedRow(line, "; ".join(reasons), _texts(cells))


def _said(reasons: Sequence[str], column: str) -> bool:
    """Whether a reason about ``column`` was already given (so it is not said twice)."""
    prefix = f"'{column}' "
    return any(reason.startswith(prefix) for reason in reasons)


def _texts(cells: Sequence[Any]) -> tuple[str, ...]:
    return tuple("" if cell is None else str(cell) for cell in cells)


def _number(cell: Any) -> float | str | None:
    """A cell as a number, None when empty, or the reason it is not a usable number."""
    if cell is None:
        return None
    if isinstance(cell, str):
        try:
            value = float(cell)
        except ValueError:
            text = cell.strip()
            if not text:
                return None
            return f"holds {_shown(text)} where a number is needed"
        if "_" in cell:
            return f"holds {_shown(cell.strip())} where a number is needed"
    elif isinstance(cell, bool):
        return f"holds {cell} (true/false) where a number is needed"
    elif isinstance(cell, int | float | Decimal):
        value = float(cell)
    else:
        return f"holds a {type(cell).__name__} where a number is needed"
    if value - value != 0.0:
        return f"holds {_shown(str(cell).strip())}: NaN and infinity are not usable numbers"
    if abs(value) > LARGEST_VALUE:
        return (f"holds {_shown(str(cell).strip())}, too large to compute with (its square is "
                "beyond the range of floating-point numbers; at most 1e154)")
    return value


def _shown(text: str) -> str:
    return repr(text if len(text) <= 40 else text[:37] + "...")


def _per_value(cell: Any) -> str | None:
    if cell is None:
        return None
    text = cell.strip() if isinstance(cell, str) else str(cell)
    return text or None


def _date_period(cell: Any) -> tuple[str, int] | str:
    if isinstance(cell, datetime):
        if cell.time() != time(0) or cell.tzinfo is not None:
            return f"holds {cell.isoformat()}, a moment, where a date is needed"
        return cell.date().isoformat(), date_period_key(cell.date())
    if isinstance(cell, date):
        return cell.isoformat(), date_period_key(cell)
    if not isinstance(cell, str):
        return "is empty" if cell is None else f"holds {cell!r} where an ISO 8601 date is needed"
    text = cell.strip()
    if not text:
        return "is empty"
    if _WEEK_DATE.match(text):
        return (f"holds {_shown(text)}, an ISO week date; write the calendar date of the period "
                "(e.g. 2024-01-07)")
    if not _CALENDAR_DATE.match(text[:10]):
        return f"holds {_shown(text)}, which is not an ISO 8601 date (write e.g. 2024-01-07)"
    try:
        return text, date_period_key(date.fromisoformat(text))
    except ValueError:
        pass
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        return f"holds {_shown(text)}, which is not an ISO 8601 date (write e.g. 2024-01-07)"
    if moment.time() != time(0) or moment.tzinfo is not None:
        return f"holds {_shown(text)}, a moment, where a date is needed"
    return text, date_period_key(moment.date())


def _integer_period(cell: Any) -> tuple[str, int] | str:
    if isinstance(cell, bool) or cell is None:
        return "is empty" if cell is None else f"holds {cell} where an integer period is needed"
    if isinstance(cell, int):
        return str(cell), cell
    if not isinstance(cell, str):
        return f"holds {cell!r} where an integer period is needed"
    text = cell.strip()
    if not text:
        return "is empty"
    if not _INTEGER.match(text):
        return f"holds {_shown(text)}, which is not an integer period"
    return text, int(text)


def _finish(
    plan: ColumnPlan,
    header: tuple[str, ...],
    checker: _RowChecker,
    good: list[ObservationRow],
    bad: list[RejectedRow],
    line_word: str,
    cells_at: Callable[[set[int]], dict[int, tuple[str, ...]]],
) -> ParsedFile:
    """Reject every row of a key that appears more than once; the file is what remains."""
    periods_of: dict[str | None, set[int]] = {}
    repeated: set[tuple[str | None, int]] = set()
    for row in good:
        periods = periods_of.setdefault(row.series, set())
        if row.period_key in periods:
            repeated.add((row.series, row.period_key))
        periods.add(row.period_key)
    del periods_of
    if repeated:
        lines_of: dict[tuple[str | None, int], list[int]] = {}
        kept: list[ObservationRow] = []
        for row in good:
            key = (row.series, row.period_key)
            if key in repeated:
                lines_of.setdefault(key, []).append(row.line)
            else:
                kept.append(row)
        cells = cells_at({line for lines in lines_of.values() for line in lines})
        for (series, _), lines in lines_of.items():
            first = next(row for row in good if row.line == lines[0])
            who = "" if series is None else f"{plan.per} {series!r}, "
            where = ", ".join(str(n) for n in lines)
            reason = (
                f"{who}{plan.period} {first.period} appears {len(lines)} times in the file "
                f"({line_word}s {where}); a key may appear only once in a file, so none of "
                "these rows was used"
            )
            bad.extend(RejectedRow(line, reason, cells.get(line, ())) for line in lines)
        good = kept
    bad.sort(key=lambda rejected: rejected.line)
    return ParsedFile(header, checker.columns, tuple(good), tuple(bad), line_word=line_word)


def _csv_cells(text: str) -> Callable[[set[int]], dict[int, tuple[str, ...]]]:
    def cells_at(lines: set[int]) -> dict[int, tuple[str, ...]]:
        found: dict[int, tuple[str, ...]] = {}
        reader = csv.reader(io.StringIO(text, newline=""), strict=True)
        ended_at = 0
        for record in reader:
            if ended_at + 1 in lines:
                found[ended_at + 1] = tuple(record)
            ended_at = reader.line_num
        return found

    return cells_at


def _utf16(data: bytes) -> str | None:
    """"UTF-16LE" or "UTF-16BE" when the bytes look like UTF-16 text, else None."""
    if data.startswith(b"\xff\xfe"):
        return "UTF-16LE"
    if data.startswith(b"\xfe\xff"):
        return "UTF-16BE"
    head = data[:200]
    if len(head) >= 8:
        odd, even = head[1::2], head[0::2]
        if odd.count(0) >= 0.9 * len(odd) and even.count(0) == 0:
            return "UTF-16LE"
        if even.count(0) >= 0.9 * len(even) and odd.count(0) == 0:
            return "UTF-16BE"
    return None


def parse_csv(data: bytes, plan: ColumnPlan) -> ParsedFile:
    """A UTF-8 CSV with a header: blank lines skipped, each other line a row to check."""
    if data.startswith((b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff")):
        return _refused("the file is UTF-32 text, not UTF-8; save or export the file as UTF-8")
    encoding = _utf16(data)
    if encoding is not None:
        return _refused(
            f"the file is {encoding} text (UTF-16), not UTF-8; save or export the file as UTF-8"
        )
    nul = data.find(b"\x00")
    if nul >= 0:
        return _refused(
            f"the file holds NUL bytes (the first at byte {nul}): it is binary data, not CSV text"
        )
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        return _refused(
            f"the file is not UTF-8 text: byte 0x{data[exc.start]:02x} at offset {exc.start} "
            f"(line {line}) cannot be decoded; save or export the file as UTF-8"
        )
    if not text.strip():
        return _empty("the file is empty", ())
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header: tuple[str, ...] | None = None
    checker: _RowChecker | None = None
    good: list[ObservationRow] = []
    bad: list[RejectedRow] = []
    ended_at = 0
    try:
        for record in reader:
            line = ended_at + 1
            ended_at = reader.line_num
            if not record or (not record[0].strip() and all(not c.strip() for c in record)):
                continue
            if header is None:
                header = tuple(cell.strip() for cell in record)
                problem = check_header(plan, header)
                if problem is not None:
                    return _refused(problem, header)
                checker = _RowChecker(plan, header, "line")
                continue
            assert checker is not None
            checked = checker.check(record, line)
            if isinstance(checked, RejectedRow):
                bad.append(checked)
            else:
                good.append(checked)
    except csv.Error as exc:
        return _refused(f"line {reader.line_num} cannot be read as CSV: {exc}", header or ())
    if header is None or checker is None:
        return _empty("the file is empty", ())
    if not good and not bad:
        return _empty("the file has a header and no rows", header)
    return _finish(plan, header, checker, good, bad, "line", _csv_cells(text))


def _arrow() -> tuple[Any, Any]:
    """pyarrow and its Parquet reader, imported on first use (slow to import; Parquet only)."""
    import pyarrow as pa  # type: ignore[import-untyped]
    import pyarrow.parquet as pq  # type: ignore[import-untyped]

    return pa, pq


def parse_parquet(data: bytes, plan: ColumnPlan) -> ParsedFile:
    """A Parquet file: its column names are the header; ``line`` is the row number."""
    pa, pq = _arrow()
    try:
        table = pq.read_table(io.BytesIO(data))
    except (pa.ArrowException, OSError, ValueError, TypeError, IndexError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        return _refused(f"the file is not a readable Parquet file ({first})")
    header = tuple(str(name) for name in table.column_names)
    problem = check_header(plan, header, csv_text=False)
    if problem is not None:
        return _refused(problem, header)
    if table.num_rows == 0:
        return _empty("the file has columns and no rows", header, "row")
    checker = _RowChecker(plan, header, "row")
    try:
        columns = [table.column(i).to_pylist() for i in range(len(header))]
    except (pa.ArrowException, ValueError, OverflowError) as exc:
        return _refused(f"the Parquet values cannot be read ({exc})", header)
    good: list[ObservationRow] = []
    bad: list[RejectedRow] = []
    for number, cells in enumerate(zip(*columns, strict=True), start=1):
        checked = checker.check(cells, number)
        if isinstance(checked, RejectedRow):
            bad.append(checked)
        else:
            good.append(checked)
    def cells_at(lines: set[int]) -> dict[int, tuple[str, ...]]:
        return {n: _texts([column[n - 1] for column in columns]) for n in lines}

    return _finish(plan, header, checker, good, bad, "row", cells_at)


def read_header(data: bytes, file_format: str) -> tuple[str, ...] | str:
    """The header of a file's bytes, or why it cannot be read (for ``plumbline check``)."""
    if file_format == "parquet":
        pa, pq = _arrow()
        try:
            return tuple(pq.read_schema(io.BytesIO(data)).names)
        except (pa.ArrowException, OSError, ValueError) as exc:
            return f"not a readable Parquet file ({exc})"
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return "not UTF-8 text"
    try:
        for record in csv.reader(io.StringIO(text, newline="")):
            if record and any(cell.strip() for cell in record):
                return tuple(cell.strip() for cell in record)
    except csv.Error as exc:
        return f"cannot be read as CSV ({exc})"
    return "the file is empty"


__all__ = ["ColumnPlan", "ParsedFile", "check_header", "parse_csv", "parse_parquet", "read_header"]
