"""Reading a dropped file into rows: CSV (UTF-8 with a header) and Parquet, checked row by row.

The parsers never raise on bad input: whatever the bytes, they return a :class:`ParsedFile` that
says the file is usable (with good rows and rejected rows), empty, or refused as a whole with the
reason in words. Line numbers are the file's own: the header is line 1 of a CSV; for Parquet,
``line`` is the row number (first row = 1).
"""

from __future__ import annotations

import codecs
import csv
import io
import math
import re
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime, time
from decimal import Decimal
from functools import cache
from typing import TYPE_CHECKING, Any, BinaryIO

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray
else:  # numpy on first use: `plumbline check` reads inboxes without it (DEVELOPERS, Startup)
    from monitor.store.lazy import np
from monitor.store import ObservationBatch, ObservationRow, RejectedRow, date_period_key
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

# Fields of any size on the csv module's path (long lines go there): a long text in a column the
# feed does not use must not refuse the file (the module's default limit is 128 KiB).
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
        if not -(2**63) <= cell < 2**63:
            return f"holds {cell}, an integer period beyond the range that can be stored"
        return str(cell), cell
    if not isinstance(cell, str):
        return f"holds {cell!r} where an integer period is needed"
    text = cell.strip()
    if not text:
        return "is empty"
    if not _INTEGER.match(text):
        return f"holds {_shown(text)}, which is not an integer period"
    value = int(text)
    if not -(2**63) <= value < 2**63:
        return f"holds {_shown(text)}, an integer period beyond the range that can be stored"
    return text, value


def _arrow() -> tuple[Any, Any]:
    """pyarrow and its Parquet reader, imported on first use (slow to import)."""
    import pyarrow as pa  # type: ignore[import-untyped]
    import pyarrow.parquet as pq  # type: ignore[import-untyped]

    return pa, pq


# ----------------------------------------------------------------------------- reading in batches
#
# A file is read in blocks of about ``block_bytes`` and each block's rows are checked as arrays:
# pyarrow splits the fields and converts the numbers, numpy finds the lines, and only rows with
# something doubtful (a cell that is not a plain number, a bad period, a ragged line) go through
# the row checker above, which gives the reasons in words. The rows a block yields are exactly
# those the row checker would give for the same lines (tests/test_ingest_batches.py compares
# them). Where a block cannot be read that way (quotes, a lone carriage return, a line longer
# than the csv module's field limit) the rest of the file is read by the csv module, row by row,
# still in batches.

DEFAULT_BLOCK_BYTES = 8 << 20  # about 200,000 rows of a narrow feed
_SPLIT_ROWS = 256  # up to this many rows a block is split here, not by pyarrow
_FIELD_LIMIT = 131_072  # csv.field_size_limit()'s default: a longer line goes the csv way
_NUMBER = r"^[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$"


@cache
def _significant() -> NDArray[np.bool_]:
    """A byte that makes a line non-blank for sure (a table, made on first use)."""
    table = np.ones(256, dtype=bool)
    table[[9, 10, 11, 12, 13, 28, 29, 30, 31, 32, ord(",")]] = False
    table[128:] = False  # non-ASCII: maybe Unicode white space; checked in Python
    return table



class Refused(Exception):
    """The file cannot be used as a whole (raised part-way through reading it)."""

    def __init__(self, reason: str, header: Sequence[str] = ()) -> None:
        super().__init__(reason)
        self.reason = reason
        self.header = tuple(header)


@dataclass(frozen=True)
class Withheld:
    """A row held back from its batch because its key appears more than once in the file."""

    line: int
    series: str | None
    period: str
    period_key: int
    cells: tuple[str, ...]


@dataclass(frozen=True)
class Chunk:
    """One batch of a file: the rows to store, the rows rejected, the rows withheld."""

    rows: ObservationBatch
    rejected: tuple[RejectedRow, ...]
    withheld: tuple[Withheld, ...] = ()


Keys = Mapping[tuple[str | None, int], Any]


@dataclass
class Reading:
    """An opened file: its header, or why it is refused or empty, and its batches."""

    header: tuple[str, ...]
    columns: tuple[str, ...] = ()
    line_word: str = "line"
    refusal: str | None = None
    note: str = ""
    empty_note: str = "the file has a header and no rows"
    batches: Callable[[Keys], Iterator[Chunk]] | None = None


def _batch_of(rows: Sequence[ObservationRow], width: int) -> ObservationBatch:
    """Rows checked one by one, as arrays."""
    series: dict[str | None, int] = {}
    periods: dict[tuple[str, int], int] = {}
    count = len(rows)
    series_index = np.fromiter(
        (series.setdefault(r.series, len(series)) for r in rows), np.int64, count
    )
    period_index = np.fromiter(
        (periods.setdefault((r.period, r.period_key), len(periods)) for r in rows), np.int64, count
    )
    values = np.full((count, width), math.nan)
    for i, row in enumerate(rows):
        values[i] = [math.nan if v is None else v for v in row.values]
    return ObservationBatch(
        series=tuple(series),
        series_index=series_index,
        periods=tuple(text for text, _ in periods),
        period_keys=tuple(key for _, key in periods),
        period_index=period_index,
        is_plan=np.fromiter((r.is_plan for r in rows), bool, count),
        values=values,
        line=np.fromiter((r.line for r in rows), np.int64, count),
    )


def _joined(parts: Sequence[ObservationBatch], width: int) -> ObservationBatch:
    """Several batches as one, rows in line order."""
    parts = [part for part in parts if len(part)]
    if not parts:
        return _batch_of([], width)
    if len(parts) == 1:
        return parts[0]
    series: list[str | None] = []
    periods: list[str] = []
    keys: list[int] = []
    series_index, period_index = [], []
    for part in parts:
        series_index.append(part.series_index + len(series))
        period_index.append(part.period_index + len(periods))
        series.extend(part.series)
        periods.extend(part.periods)
        keys.extend(part.period_keys)
    line = np.concatenate([part.line for part in parts])
    order = np.argsort(line, kind="stable")
    return ObservationBatch(
        series=tuple(series),
        series_index=np.concatenate(series_index)[order],
        periods=tuple(periods),
        period_keys=tuple(keys),
        period_index=np.concatenate(period_index)[order],
        is_plan=np.concatenate([part.is_plan for part in parts])[order],
        values=np.concatenate([part.values for part in parts])[order],
        line=line[order],
    )


def _withhold(
    batch: ObservationBatch, keys: Keys, cells_of: Callable[[int], tuple[str, ...]]
) -> tuple[ObservationBatch, tuple[Withheld, ...]]:
    """Take the rows whose (series, period key) is in ``keys`` out of the batch."""
    if not keys or not len(batch):
        return batch, ()
    row_keys = batch.row_keys().tolist()
    hit = np.fromiter(
        ((batch.series[s], k) in keys for s, k in zip(batch.series_index.tolist(), row_keys,
                                                        strict=True)),
        bool, len(batch),
    )
    if not hit.any():
        return batch, ()
    held = tuple(
        Withheld(
            int(batch.line[i]), batch.series[int(batch.series_index[i])],
            batch.periods[int(batch.period_index[i])], row_keys[i], cells_of(int(batch.line[i])),
        )
        for i in np.flatnonzero(hit)
    )
    keep = ~hit
    kept = ObservationBatch(
        batch.series, batch.series_index[keep], batch.periods, batch.period_keys,
        batch.period_index[keep], batch.is_plan[keep], batch.values[keep], batch.line[keep],
    )
    return kept, held


def _python_rows(
    lines: Iterable[str],
    plan: ColumnPlan,
    first_line: int,
    header: tuple[str, ...],
    keys: Keys,
    rows_per_batch: int,
) -> Iterator[Chunk]:
    """The csv module's way, row by row (any CSV that is valid UTF-8), in batches."""
    reader = csv.reader(lines, strict=True)
    checker = _RowChecker(plan, header, "line")
    good: list[ObservationRow] = []
    bad: list[RejectedRow] = []
    cells: dict[int, tuple[str, ...]] = {}
    ended_at = first_line - 1

    def flush() -> Chunk:
        batch, held = _withhold(_batch_of(good, len(checker.columns)), keys, cells.__getitem__)
        chunk = Chunk(batch, tuple(bad), held)
        good.clear()
        bad.clear()
        cells.clear()
        return chunk

    try:
        for record in reader:
            line = ended_at + 1
            ended_at = first_line - 1 + reader.line_num
            if not record or (not record[0].strip() and all(not c.strip() for c in record)):
                continue
            checked = checker.check(record, line)
            if isinstance(checked, RejectedRow):
                bad.append(checked)
            else:
                good.append(checked)
                if keys:
                    cells[line] = tuple(record)
            if len(good) + len(bad) >= rows_per_batch:
                yield flush()
    except csv.Error as exc:
        raise Refused(
            f"line {first_line - 1 + reader.line_num} cannot be read as CSV: {exc}", header
        ) from None
    if good or bad:
        yield flush()


class _Blocks:
    """A binary stream cut into blocks that end at a line end (the last may not)."""

    def __init__(self, stream: BinaryIO, block_bytes: int) -> None:
        self.stream = stream
        self.block_bytes = max(int(block_bytes), 1)
        self.carry = b""
        self.first = True

    def next(self) -> bytes:
        """The next block of whole lines; b"" at the end."""
        while True:
            data = self.stream.read(self.block_bytes)
            if self.first:
                self.first = False
                if data.startswith(b"\xef\xbb\xbf"):
                    data = data[3:]
            if not data:
                block, self.carry = self.carry, b""
                return block
            buffer = self.carry + data if self.carry else data
            cut = buffer.rfind(b"\n") + 1
            if cut == 0:
                self.carry = buffer
                continue
            self.carry = buffer[cut:]
            return buffer[:cut]

    def rest(self, pending: bytes) -> Iterator[str]:
        """``pending`` and the rest of the stream as text lines (the csv module's input)."""
        raw = _ChainedRaw(pending + self.carry, self.stream)
        self.carry = b""
        text = io.TextIOWrapper(io.BufferedReader(raw, 1 << 16), encoding="utf-8", newline="")
        return iter(text)


class _ChainedRaw(io.RawIOBase):
    def __init__(self, head: bytes, stream: BinaryIO) -> None:
        self.head = memoryview(head)
        self.stream = stream

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        if self.head.nbytes:
            size = min(len(buffer), self.head.nbytes)
            buffer[:size] = self.head[:size]
            self.head = self.head[size:]
            return size
        data = self.stream.read(len(buffer))
        buffer[: len(data)] = data
        return len(data)


class _FastCsv:
    """Blocks of a CSV without quotes: one physical line is one row."""

    def __init__(self, plan: ColumnPlan, header: tuple[str, ...], checker: _RowChecker) -> None:
        self.plan = plan
        self.checker = checker
        self.width = len(header)
        self.names = [f"c{i}" for i in range(self.width)]
        self.period_cache: dict[str, tuple[str, int] | str] = {}
        self.series_cache: dict[str, str | None] = {}
        needed = [checker.period_at, *([] if checker.per_at is None else [checker.per_at])]
        needed += checker.value_at
        self.needed = sorted(set(needed))

    def chunk(self, buf: bytes, first_line: int, keys: Keys) -> Chunk | None:
        """The block's rows, or None when the block must be read the csv module's way."""
        if b'"' in buf or buf.count(b"\r") != buf.count(b"\r\n"):
            return None
        arr = np.frombuffer(buf, np.uint8)
        newlines = np.flatnonzero(arr == 10)
        ends = newlines if buf.endswith(b"\n") else np.append(newlines, len(buf))
        starts = np.concatenate(([0], newlines + 1))[: ends.size]
        crlf = (ends > starts) & (arr[np.maximum(ends - 1, 0)] == 13)
        ends = ends - crlf
        length = ends - starts
        if length.size and int(length.max()) > _FIELD_LIMIT:
            return None
        line_numbers = first_line + np.arange(ends.size, dtype=np.int64)
        nonempty = np.flatnonzero(length > 0)
        marked = np.zeros(ends.size, bool)
        if nonempty.size:
            marked[nonempty] = np.logical_or.reduceat(_significant()[arr], starts[nonempty])
        blank = ~marked
        for i in np.flatnonzero(~marked & (length > 0)):  # white space or commas only, maybe
            cells = buf[starts[i] : ends[i]].decode("utf-8").split(",")
            blank[i] = all(not c.strip() for c in cells)
        commas = np.flatnonzero(arr == 44)
        fields = np.searchsorted(commas, ends) - np.searchsorted(commas, starts) + 1
        ragged = ~blank & (fields != self.width)
        take = ~blank & ~ragged

        def cells_of(line: int) -> tuple[str, ...]:
            i = line - first_line
            return tuple(buf[starts[i] : ends[i]].decode("utf-8").split(","))

        rejected: list[RejectedRow] = []
        extra: list[ObservationRow] = []
        for i in np.flatnonzero(ragged):
            line = int(line_numbers[i])
            checked = self.checker.check(cells_of(line), line)
            assert isinstance(checked, RejectedRow)
            rejected.append(checked)
        rows = np.flatnonzero(take)
        batch = _batch_of([], len(self.checker.columns))
        if rows.size:
            if rows.size == int((length > 0).sum()):
                text = buf  # empty lines aside (which pyarrow skips), every line is a row
            else:
                text = b"\n".join(buf[starts[i] : ends[i]] for i in rows.tolist())
            table = (self._split(buf, starts, ends, rows) if rows.size <= _SPLIT_ROWS
                     else self._read(text))
            if table is None or table.num_rows != rows.size:
                return None
            batch = self._checked(table, line_numbers[rows], cells_of, rejected, extra)
        if extra:
            batch = _joined([batch, _batch_of(extra, len(self.checker.columns))],
                            len(self.checker.columns))
        batch, held = _withhold(batch, keys, cells_of)
        rejected.sort(key=lambda r: r.line)
        return Chunk(batch, tuple(rejected), held)

    def _split(self, buf: bytes, starts: NDArray[np.int64], ends: NDArray[np.int64],
               rows: NDArray[np.int64]) -> Any:
        """``_read``'s table for a few rows, split at the commas here: the block has no quote
        and each of these lines has the header's number of fields, so each field is the text
        between two commas, as pyarrow reads it (no null values, white space kept). pyarrow's
        reader costs about 0.8 ms a call whatever the size, which a weekly file of a few dozen
        rows pays in full. None, like ``_read``, where a needed field is not UTF-8."""
        pa, _ = _arrow_csv()
        columns: list[list[bytes]] = [[] for _ in self.needed]
        for i in rows.tolist():
            cells = buf[starts[i] : ends[i]].split(b",")
            for out, at in zip(columns, self.needed, strict=True):
                out.append(cells[at])
        arrays = []
        for values in columns:
            data = b"".join(values)
            try:
                # Valid as a whole exactly when every cell is: a comma is never inside a
                # character's bytes.
                data.decode("utf-8")
            except UnicodeDecodeError:
                return None
            offsets = np.zeros(len(values) + 1, np.int32)
            np.cumsum([len(v) for v in values], out=offsets[1:])
            # From the bytes as they are (``pa.array`` of Python strings would import pandas).
            arrays.append(pa.StringArray.from_buffers(
                len(values), pa.py_buffer(offsets.tobytes()), pa.py_buffer(data)))
        return pa.Table.from_arrays(arrays, names=[self.names[at] for at in self.needed])

    def _read(self, text: bytes) -> Any:
        pa, pacsv = _arrow_csv()
        try:
            return pacsv.read_csv(
                pa.BufferReader(text),
                read_options=pacsv.ReadOptions(
                    column_names=self.names, block_size=len(text) + 1024, use_threads=False
                ),
                parse_options=pacsv.ParseOptions(newlines_in_values=False),
                convert_options=pacsv.ConvertOptions(
                    column_types={self.names[i]: pa.string() for i in self.needed},
                    include_columns=[self.names[i] for i in self.needed],
                    strings_can_be_null=False,
                    quoted_strings_can_be_null=False,
                ),
            )
        except (pa.ArrowException, ValueError):
            return None

    def _checked(
        self,
        table: Any,
        lines: NDArray[np.int64],
        cells_of: Callable[[int], tuple[str, ...]],
        rejected: list[RejectedRow],
        extra: list[ObservationRow],
    ) -> ObservationBatch:
        """Check the rows' cells as arrays; doubtful rows go to the row checker."""
        pa, _ = _arrow_csv()
        import pyarrow.compute as pc  # type: ignore[import-untyped]

        checker = self.checker
        count = table.num_rows
        doubt = np.zeros(count, bool)

        def column(at: int) -> Any:
            return table.column(self.names[at]).combine_chunks()

        encoded = column(checker.period_at).dictionary_encode()
        period_index = _numpy_of(encoded.indices)
        texts: list[str] = []
        keys: list[int] = []
        for raw in encoded.dictionary.to_pylist():
            found = self.period_cache.get(raw)
            if found is None:
                found = checker.parse_period(raw)
                if len(self.period_cache) < 100_000:
                    self.period_cache[raw] = found
            if isinstance(found, str):
                texts.append("")
                keys.append(0)
                doubt |= period_index == len(texts) - 1
            else:
                texts.append(found[0])
                keys.append(found[1])
        if checker.per_at is None:
            series: tuple[str | None, ...] = (None,)
            series_index = np.zeros(count, np.int64)
        else:
            encoded = column(checker.per_at).dictionary_encode()
            series_index = _numpy_of(encoded.indices)
            names: list[str | None] = []
            for raw in encoded.dictionary.to_pylist():
                name = self.series_cache.get(raw, "")
                if name == "":
                    name = _per_value(raw)
                    if len(self.series_cache) < 1_000_000:
                        self.series_cache[raw] = name
                names.append(name)
                if name is None:
                    doubt |= series_index == len(names) - 1
            series = tuple(names)
        values = np.empty((count, len(checker.columns)))
        for j, at in enumerate(checker.value_at):
            cells = column(at)
            empty = _numpy_of(pc.binary_length(cells)) == 0
            matched = pc.match_substring_regex(cells, _NUMBER)
            number = _numpy_of(matched)
            plain = cells
            if not number.all():
                plain = pc.if_else(matched, cells, pa.nulls(len(cells), pa.string()))
            converted = np.where(number, _numpy_of(pc.cast(plain, pa.float64())), math.nan)
            doubt |= ~number & ~empty
            doubt |= number & ~(np.abs(converted) <= LARGEST_VALUE)  # NaN, infinite, too large
            values[:, j] = converted
        required = list(checker.required)
        if required:
            doubt |= np.isnan(values[:, required]).any(axis=1)
        responses = checker.responses
        is_plan: NDArray[np.bool_] = np.zeros(count, bool)
        if responses:
            is_plan = np.asarray(np.isnan(values[:, :responses]).all(axis=1))
        latest = checker.plan.latest_actual
        if latest is not None and keys:
            # Actuals dated far beyond the business clock: the row checker gives the reason.
            doubt |= (np.asarray(keys, np.int64)[period_index] > latest[1]) & ~is_plan
        for i in np.flatnonzero(doubt):
            line = int(lines[i])
            checked = checker.check(cells_of(line), line)
            (rejected if isinstance(checked, RejectedRow) else extra).append(checked)  # type: ignore[arg-type]
        keep = ~doubt
        return ObservationBatch(
            series=series,
            series_index=series_index[keep],
            periods=tuple(texts),
            period_keys=tuple(keys),
            period_index=period_index[keep],
            is_plan=is_plan[keep],
            values=values[keep],
            line=lines[keep],
        )


def _numpy_of(array: Any) -> NDArray[Any]:
    """A pyarrow array's values as numpy, read from its buffers: booleans as bool, float64 as
    float64 (a null's slot holds whatever is there: callers mask nulls themselves), integers as
    int64. ``Array.to_numpy``, ``np.asarray`` and any conversion of a Python value import pandas
    (about 0.3 s, once per process), which a pass of a few files does not otherwise need."""
    length, offset = len(array), array.offset
    data = array.buffers()[1]
    kind = str(array.type)
    if kind == "bool":
        bits = np.unpackbits(np.frombuffer(data, np.uint8), bitorder="little")
        return bits[offset : offset + length].astype(bool)
    dtypes = {"double": np.float64, "int32": np.int32, "int64": np.int64, "int8": np.int8,
              "int16": np.int16}
    if kind not in dtypes:
        raise TypeError(f"no buffer reading for a pyarrow array of {kind}")
    values = np.frombuffer(data, dtypes[kind])[offset : offset + length]
    return values.astype(np.float64 if kind == "double" else np.int64)


def _arrow_csv() -> tuple[Any, Any]:
    import pyarrow as pa
    import pyarrow.csv as pacsv  # type: ignore[import-untyped]

    return pa, pacsv


def open_csv(
    stream: BinaryIO, plan: ColumnPlan, *, block_bytes: int = DEFAULT_BLOCK_BYTES
) -> Reading:
    """Open a CSV stream (UTF-8 without NUL bytes: see :func:`screen_bytes`) for batch reading.

    The header is read at once (a refusal or an empty file is known then); ``Reading.batches``
    yields the rows in blocks of about ``block_bytes`` and raises :class:`Refused` when the file
    turns out to be broken part-way (a bad quote).
    """
    blocks = _Blocks(stream, block_bytes)
    rows_per_batch = max(block_bytes // 40, 1)
    first = blocks.next()
    line = 1  # the number of the first line of ``first``
    header: tuple[str, ...] | None = None
    body = b""
    # The header: the first record that is not blank.
    while first and header is None:
        if b'"' in first or first.count(b"\r") != first.count(b"\r\n"):
            break  # quotes or lone carriage returns: the csv module finds it
        parts = first.split(b"\n")
        for number, raw in enumerate(parts[:-1] if first.endswith(b"\n") else parts):
            record = raw.rstrip(b"\r").decode("utf-8").split(",")
            if not any(cell.strip() for cell in record):
                continue
            header = tuple(cell.strip() for cell in record)
            body = first[sum(len(part) + 1 for part in parts[: number + 1]) :]
            line += number + 1
            break
        else:
            line += first.count(b"\n")
            first = blocks.next()
    text: Iterator[str] | None = None
    if header is None and first:
        text = blocks.rest(first)
        reader = csv.reader(text, strict=True)
        try:
            for record in reader:
                if record and any(cell.strip() for cell in record):
                    header = tuple(cell.strip() for cell in record)
                    break
        except csv.Error as exc:
            return Reading((), refusal=f"line {line - 1 + reader.line_num} cannot be read as "
                                       f"CSV: {exc}")
        line += reader.line_num
    if header is None:
        return Reading((), note="the file is empty")
    problem = check_header(plan, header)
    if problem is not None:
        return Reading(header, refusal=problem)
    checker = _RowChecker(plan, header, "line")
    found = header

    def batches(keys: Keys) -> Iterator[Chunk]:
        nonlocal line
        if text is not None:  # the csv module's way from the header on
            yield from _python_rows(text, plan, line, found, keys, rows_per_batch)
            return
        fast = _FastCsv(plan, found, checker)
        block = body
        while True:
            if not block:
                block = blocks.next()
                if not block:
                    return
            chunk = fast.chunk(block, line, keys)
            if chunk is None:
                yield from _python_rows(blocks.rest(block), plan, line, found, keys,
                                        rows_per_batch)
                return
            line += block.count(b"\n")
            block = b""
            yield chunk

    return Reading(header, checker.columns, batches=batches)


def open_parquet(
    source: Any, plan: ColumnPlan, *, block_bytes: int = DEFAULT_BLOCK_BYTES
) -> Reading:
    """Open a Parquet file (a path or a seekable binary stream) for batch reading: its column
    names are the header, ``line`` is the row number."""
    pa, pq = _arrow()
    try:
        reader = pq.ParquetFile(source)
        header = tuple(str(name) for name in reader.schema_arrow.names)
    except (pa.ArrowException, OSError, ValueError, TypeError, IndexError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        return Reading((), line_word="row",
                       refusal=f"the file is not a readable Parquet file ({first})")
    problem = check_header(plan, header, csv_text=False)
    if problem is not None:
        return Reading(header, line_word="row", refusal=problem)
    if reader.metadata.num_rows == 0:
        return Reading(header, line_word="row", note="the file has columns and no rows")
    checker = _RowChecker(plan, header, "row")
    rows_per_batch = max(block_bytes // (16 * max(len(header), 1)), 1)

    def batches(keys: Keys) -> Iterator[Chunk]:
        number = 0
        try:
            for record_batch in reader.iter_batches(batch_size=rows_per_batch):
                columns = [record_batch.column(i).to_pylist() for i in range(len(header))]
                good: list[ObservationRow] = []
                bad: list[RejectedRow] = []
                for cells in zip(*columns, strict=True):
                    number += 1
                    checked = checker.check(cells, number)
                    (bad if isinstance(checked, RejectedRow) else good).append(checked)  # type: ignore[arg-type]
                start = number - record_batch.num_rows + 1

                def cells_of(line: int, columns: list[list[Any]] = columns,
                             start: int = start) -> tuple[str, ...]:
                    return _texts([column[line - start] for column in columns])

                batch, held = _withhold(_batch_of(good, len(checker.columns)), keys, cells_of)
                yield Chunk(batch, tuple(bad), held)
        except (pa.ArrowException, OSError, ValueError, TypeError, IndexError,
                OverflowError) as exc:
            raise Refused(f"the Parquet values cannot be read ({exc})", header) from None

    return Reading(header, checker.columns, "row", empty_note="the file has columns and no rows",
                   batches=batches)


def screen_bytes(data: bytes) -> str | None:
    """Why bytes cannot be CSV text (NUL bytes, not UTF-8), or None. See :class:`ByteScreen`."""
    screen = ByteScreen()
    screen.feed(data)
    return screen.finish()


_HEAD_BYTES = 200


def _wide_text(head: bytes) -> str | None:
    """How to name UTF-16 or UTF-32 text from a file's first bytes, or None."""
    if head.startswith((b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff")):
        return "UTF-32 text"
    if head.startswith(b"\xff\xfe"):
        return "UTF-16LE text (UTF-16)"
    if head.startswith(b"\xfe\xff"):
        return "UTF-16BE text (UTF-16)"
    if len(head) >= 8:
        odd, even = head[1::2], head[0::2]
        if odd.count(0) >= 0.9 * len(odd) and even.count(0) == 0:
            return "UTF-16LE text (UTF-16)"
        if even.count(0) >= 0.9 * len(even) and odd.count(0) == 0:
            return "UTF-16BE text (UTF-16)"
    return None


class ByteScreen:
    """Checks a file's bytes as they stream past: the first NUL byte, the first byte that is not
    UTF-8 (with its offset and line). A NUL anywhere is reported before any UTF-8 error."""

    def __init__(self) -> None:
        self.offset = 0  # bytes seen
        self.newlines = 0  # line ends seen before ``pending``
        self.pending = b""  # the undecoded end of the last block (a character cut in two)
        self.nul_at: int | None = None
        self.bad: tuple[int, int, int] | None = None  # offset, byte, line
        self.head = b""  # the first bytes, to name UTF-16 and UTF-32 text

    def feed(self, block: bytes) -> None:
        if len(self.head) < _HEAD_BYTES:
            self.head += block[: _HEAD_BYTES - len(self.head)]
        if self.nul_at is None:
            nul = block.find(b"\x00")
            if nul >= 0:
                self.nul_at = self.offset + nul
        if self.bad is None:
            data = self.pending + block if self.pending else block
            base = self.offset - len(self.pending)
            if base == 0 and data.startswith(b"\xef\xbb\xbf"):
                data, base = data[3:], 3
                self._decode(data, base, final=False)
            else:
                self._decode(data, base, final=False)
        self.offset += len(block)

    def _decode(self, data: bytes, base: int, *, final: bool) -> None:
        try:
            _, used = codecs.utf_8_decode(data, "strict", final)
        except UnicodeDecodeError as exc:
            at = base + exc.start
            line = self.newlines + data.count(b"\n", 0, exc.start) + 1
            self.bad = (at, data[exc.start], line)
            self.pending = b""
            return
        self.newlines += data.count(b"\n", 0, used)
        self.pending = data[used:]

    def finish(self) -> str | None:
        if self.bad is None and self.pending:
            self._decode(self.pending, self.offset - len(self.pending), final=True)
        wide = _wide_text(self.head)
        if wide is not None:
            return f"the file is {wide}, not UTF-8; save or export the file as UTF-8"
        if self.nul_at is not None:
            return (
                f"the file holds NUL bytes (the first at byte {self.nul_at}): it is binary "
                "data, not CSV text"
            )
        if self.bad is not None:
            at, byte, line = self.bad
            return (
                f"the file is not UTF-8 text: byte 0x{byte:02x} at offset {at} (line {line}) "
                "cannot be decoded; save or export the file as UTF-8"
            )
        return None


def _whole(open_again: Callable[[], Reading], plan: ColumnPlan) -> ParsedFile:
    """Every batch of a file gathered in memory (small files, tests), duplicate keys rejected
    as the ingest rejects them: a second reading withholds the rows of the repeated keys."""
    reading = open_again()
    if reading.refusal is not None:
        return _refused(reading.refusal, reading.header)
    if reading.batches is None:
        return _empty(reading.note, reading.header, reading.line_word)
    good: list[ObservationRow] = []
    bad: list[RejectedRow] = []
    try:
        for chunk in reading.batches({}):
            good.extend(chunk.rows)
            bad.extend(chunk.rejected)
        if not good and not bad:
            return _empty(reading.empty_note, reading.header, reading.line_word)
        repeated = duplicate_keys(good)
        if repeated:
            again = open_again()
            assert again.batches is not None
            good, bad = [], []
            held: list[Withheld] = []
            for chunk in again.batches(repeated):
                good.extend(chunk.rows)
                bad.extend(chunk.rejected)
                held.extend(chunk.withheld)
            bad.extend(duplicate_rejections(plan, held, repeated, reading.line_word))
    except Refused as refused:
        return _refused(refused.reason, refused.header)
    bad.sort(key=lambda rejected: rejected.line)
    return ParsedFile(reading.header, reading.columns, tuple(good), tuple(bad),
                      line_word=reading.line_word)


def duplicate_keys(rows: Iterable[ObservationRow]) -> dict[tuple[str | None, int], list[int]]:
    """Keys given by more than one row: (series, period key) → the rows' lines, in order."""
    lines_of: dict[tuple[str | None, int], list[int]] = {}
    for row in rows:
        lines_of.setdefault((row.series, row.period_key), []).append(row.line)
    return {key: sorted(lines) for key, lines in lines_of.items() if len(lines) > 1}


def duplicate_rejections(
    plan: ColumnPlan,
    rows: Iterable[Withheld],
    repeated: Keys,
    line_word: str,
) -> list[RejectedRow]:
    """The rejection of every row whose key appears more than once in the file."""
    mine = [row for row in rows if (row.series, row.period_key) in repeated]
    mine.sort(key=lambda row: row.line)
    first: dict[tuple[str | None, int], str] = {}
    for row in mine:
        first.setdefault((row.series, row.period_key), row.period)
    out: list[RejectedRow] = []
    for row in mine:
        key = (row.series, row.period_key)
        lines = repeated[key]
        who = "" if row.series is None else f"{plan.per} {row.series!r}, "
        where = ", ".join(str(n) for n in lines)
        reason = (
            f"{who}{plan.period} {first[key]} appears {len(lines)} times in the file "
            f"({line_word}s {where}); a key may appear only once in a file, so none of "
            "these rows was used"
        )
        out.append(RejectedRow(row.line, reason, row.cells))
    return out


def parse_csv(
    data: bytes, plan: ColumnPlan, *, block_bytes: int = DEFAULT_BLOCK_BYTES
) -> ParsedFile:
    """A UTF-8 CSV with a header, from bytes: blank lines skipped, each other line a row."""
    problem = screen_bytes(data)
    if problem is not None:
        return _refused(problem)
    return _whole(lambda: open_csv(io.BytesIO(data), plan, block_bytes=block_bytes), plan)


def parse_parquet(
    data: bytes, plan: ColumnPlan, *, block_bytes: int = DEFAULT_BLOCK_BYTES
) -> ParsedFile:
    """A Parquet file from bytes: its column names are the header; ``line`` is the row number."""
    return _whole(lambda: open_parquet(io.BytesIO(data), plan, block_bytes=block_bytes), plan)

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


__all__ = [
    "DEFAULT_BLOCK_BYTES",
    "ByteScreen",
    "Chunk",
    "ColumnPlan",
    "ParsedFile",
    "Reading",
    "Refused",
    "Withheld",
    "check_header",
    "duplicate_keys",
    "duplicate_rejections",
    "open_csv",
    "open_parquet",
    "parse_csv",
    "parse_parquet",
    "read_header",
    "screen_bytes",
]
