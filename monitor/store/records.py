"""Conventions and record types of the database: what the :class:`~monitor.store.Store` takes and
returns. See the package docstring for the conventions (UTC text, period keys, series '')."""

from __future__ import annotations

import json
import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any, NamedTuple

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray
else:
    from monitor.store.lazy import np
from monitor.errors import PlumblineError
from monitor.store.lazy import is_numpy_value
from monitor.vocabulary import Finding, FindingKind, FindingState, OutcomeKind, Severity


class StoreError(PlumblineError):
    """The database cannot be used as asked (not Plumbline's, newer than this program, missing,
    or an id that does not exist)."""


# --------------------------------------------------------------------------- conventions


def utc_text(moment: datetime) -> str:
    """The stored form of a moment: UTC, fixed width, so that text order is time order."""
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError(f"{moment!r} has no time zone; the database stores UTC moments only")
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def parse_utc(text: str) -> datetime:
    """A stored moment back as an aware UTC datetime."""
    return datetime.fromisoformat(text).astimezone(UTC)


def _maybe_utc(text: str | None) -> datetime | None:
    return None if text is None else parse_utc(text)


_EPOCH = date(1970, 1, 1)


def date_period_key(day: date) -> int:
    """The sort key of a date period: days since 1970-01-01."""
    return (day - _EPOCH).days


def period_key_date(key: int) -> date:
    """The date whose period key is ``key`` (inverse of :func:`date_period_key`)."""
    return _EPOCH + timedelta(days=key)


def _skey(series: str | None) -> str:
    return "" if series is None else series


def _series(key: str) -> str | None:
    return None if key == "" else key


def _plain(value: Any) -> Any:
    """A JSON-ready copy: numpy scalars and arrays to Python, NaN and infinities to null."""
    if is_numpy_value(value):
        return _plain(value.tolist())
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if value is None or isinstance(value, str | int):
        return value
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    raise TypeError(f"{type(value).__name__} cannot be stored as JSON")


# What json.dumps(value, separators=(",", ":"), allow_nan=False) makes, without building an
# encoder at each call (a pass writes four documents per series).
_encode = json.JSONEncoder(separators=(",", ":"), allow_nan=False).encode


def to_json(value: Any) -> str:
    """Compact JSON with NaN written as null (strict JSON has no NaN)."""
    try:  # plain Python values with finite numbers: the C encoder alone, no copy
        return _encode(value)
    except (TypeError, ValueError):
        return _encode(_plain(value))


# --------------------------------------------------------------------------- record types


class FileOutcome(StrEnum):
    """What became of a file taken from an inbox."""

    ARCHIVED = "archived"  # rows ingested (some may have been rejected), file in archive/
    REJECTED = "rejected"  # the whole file refused; it is in rejected/ with NAME.errors.txt
    EMPTY = "empty"  # no rows (empty or header only); archived with a note
    DUPLICATE = "duplicate"  # the same bytes were ingested before; moved to rejected/


@dataclass(frozen=True)
class FileRecord:
    id: int
    feed: str
    name: str  # its name in the inbox
    sha256: str
    size: int
    received_at: datetime  # real clock
    pass_id: int | None
    outcome: FileOutcome
    duplicate_of: int | None  # the earlier file with the same bytes
    rows_ingested: int  # rows written: new actuals, revisions and plan rows
    rows_plan: int
    rows_rejected: int
    revisions: int
    unchanged: int  # identical re-sends of actuals already held (not written again)
    stored_path: Path  # where the file is (or is going: see moved_at)
    errors_text: str  # the text of NAME.errors.txt; '' when there is none
    note: str
    moved_at: datetime | None  # None: committed, file not yet in place (a crash came between)


@dataclass(frozen=True)
class RejectedRow:
    """One row refused by ingest: its line (CSV, header = 1) or row number (Parquet)."""

    line: int
    reason: str
    cells: tuple[str, ...]


class ObservationRow(NamedTuple):
    """One row to store; ``values`` aligns with the ``columns`` given beside it, None = empty."""

    series: str | None
    period: str  # as written
    period_key: int
    is_plan: bool
    values: tuple[float | None, ...]
    line: int


@dataclass(frozen=True, eq=False)
class ObservationBatch:
    """Rows to store as arrays (what ingest hands over): the same rows as a sequence of
    :class:`ObservationRow`, without one Python object per row.

    Row ``i`` is series ``series[series_index[i]]``, period ``periods[period_index[i]]`` (key
    ``period_keys[period_index[i]]``), ``values[i]`` aligned with the columns given beside it
    (NaN = empty), ``line[i]``. Iterating yields :class:`ObservationRow` objects (for code that
    wants them one by one); :meth:`Store.insert_observations` reads the arrays.
    """

    series: tuple[str | None, ...]
    series_index: NDArray[np.int64]
    periods: tuple[str, ...]
    period_keys: tuple[int, ...]
    period_index: NDArray[np.int64]
    is_plan: NDArray[np.bool_]
    values: NDArray[np.float64]  # (rows, columns)
    line: NDArray[np.int64]

    def __len__(self) -> int:
        return int(self.line.size)

    def row_keys(self) -> NDArray[np.int64]:
        """Each row's period key."""
        return np.array(self.period_keys, dtype=np.int64).reshape(-1)[self.period_index]

    def __iter__(self) -> Iterator[ObservationRow]:
        values = self.values
        for i in range(len(self)):
            p = int(self.period_index[i])
            yield ObservationRow(
                self.series[int(self.series_index[i])], self.periods[p], self.period_keys[p],
                bool(self.is_plan[i]),
                tuple(None if v != v else float(v) for v in values[i].tolist()), int(self.line[i]),
            )


@dataclass(frozen=True)
class ObservationRecord:
    """One stored row, for display and checks (``values`` by column name, absent ones left out)."""

    id: int
    series: str | None
    period: str
    period_key: int
    is_plan: bool
    revision: int
    current: bool  # the actual in use for its key, or a plan still awaiting its actual
    values: dict[str, float]
    file_id: int
    line: int


@dataclass(frozen=True)
class Revision:
    series: str | None
    period: str
    revision: int  # 1 for the first revision of the actual, 2 for the next, ...


@dataclass(frozen=True)
class ObservationCounts:
    """What one batch of rows did: ``written`` = new actuals + revisions + plans."""

    new_actuals: int
    revisions: int
    plans: int
    unchanged: int
    revised: tuple[Revision, ...]

    @property
    def written(self) -> int:
        return self.new_actuals + self.revisions + self.plans


@dataclass(frozen=True, eq=False)
class SeriesWindows:
    """Rows of many series in flat arrays: series sorted by name, each oldest row first.

    Series ``i`` owns rows ``offsets[i]:offsets[i + 1]``. ``values`` is (rows, columns) with NaN
    where a row has no value. ``period_labels`` maps each period key to its label as first
    written in the feed.
    """

    feed: str
    columns: tuple[str, ...]
    series: tuple[str | None, ...]
    offsets: NDArray[np.int64]  # (s + 1,)
    period_key: NDArray[np.int64]  # (rows,)
    values: NDArray[np.float64]  # (rows, columns)
    period_labels: dict[int, str]

    def rows_of(self, index: int) -> slice:
        return slice(int(self.offsets[index]), int(self.offsets[index + 1]))

    def lengths(self) -> NDArray[np.int64]:
        return np.diff(self.offsets)

    def stack(self) -> tuple[NDArray[np.float64], NDArray[np.bool_], NDArray[np.int64]]:
        """(s, n_max, columns) values, (s, n_max) mask of real rows, (s, n_max) period keys.

        Rows are left-aligned (row 0 is each series' oldest); padding is NaN, mask False, key -1.
        """
        lengths = self.lengths()
        n_max = int(lengths.max()) if lengths.size else 0
        s = len(self.series)
        stacked = np.full((s, n_max, len(self.columns)), np.nan)
        keys = np.full((s, n_max), -1, dtype=np.int64)
        mask = np.arange(n_max)[None, :] < lengths[:, None]
        stacked[mask] = self.values
        keys[mask] = self.period_key
        return stacked, mask, keys


@dataclass(frozen=True, eq=False)
class PlanRows:
    """Plan rows awaiting a forecast from one model; ``values`` is (rows, columns)."""

    columns: tuple[str, ...]
    observation_id: NDArray[np.int64]
    series: tuple[str | None, ...]
    period: tuple[str, ...]
    period_key: NDArray[np.int64]
    values: NDArray[np.float64]


@dataclass(frozen=True)
class PassRecord:
    id: int
    as_of: datetime  # the business clock
    started_at: datetime
    finished_at: datetime | None
    status: str  # running | finished | failed | interrupted
    counts: dict[str, Any]


@dataclass(frozen=True)
class ModelVersionRecord:
    model: str
    version: int
    signature: str
    config: dict[str, Any]
    created_at: datetime


@dataclass(frozen=True)
class FitRow:
    """One refit of one series, to record."""

    model: str
    version: int
    series: str | None
    n: int
    estimable: bool
    reason: str | None = None
    window_first: str | None = None
    window_first_key: int | None = None
    window_last: str | None = None
    window_last_key: int | None = None
    coefficients: Mapping[str, Any] = field(default_factory=dict)
    inference: Mapping[str, Any] = field(default_factory=dict)
    diagnostics: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class FitRecord:
    id: int
    pass_id: int
    model: str
    version: int
    series: str | None
    n: int
    estimable: bool
    reason: str | None
    window_first: str | None
    window_first_key: int | None
    window_last: str | None
    window_last_key: int | None
    coefficients: dict[str, Any]
    inference: dict[str, Any]
    diagnostics: dict[str, Any]


@dataclass(frozen=True)
class ForecastRow:
    """One forecast to record (append-only once written)."""

    model: str
    feed: str
    series: str | None
    target_period: str
    target_period_key: int
    issued_at: datetime  # business clock
    lead: int
    point: float
    lower: float
    upper: float
    level: float
    mean_lower: float | None = None
    mean_upper: float | None = None
    leverage: float | None = None
    extrapolation: bool = False
    fit_id: int | None = None
    version: int | None = None
    observation_id: int | None = None  # the plan row this forecast answers
    inputs: Mapping[str, float] = field(default_factory=dict)
    # The calibrated interval beside the model's own (interval_method: calibrated), or None.
    calibrated_lower: float | None = None
    calibrated_upper: float | None = None
    calibrated_factor: float | None = None


@dataclass(frozen=True)
class ForecastRecord:
    id: int
    pass_id: int
    fit_id: int | None
    model: str
    version: int | None
    feed: str
    series: str | None
    target_period: str
    target_period_key: int
    observation_id: int | None
    issued_at: datetime
    lead: int
    inputs: dict[str, float]
    point: float
    mean_lower: float | None
    mean_upper: float | None
    lower: float
    upper: float
    level: float
    leverage: float | None
    extrapolation: bool
    calibrated_lower: float | None = None
    calibrated_upper: float | None = None
    calibrated_factor: float | None = None


@dataclass(frozen=True)
class IssuedForecast:
    """A forecast as the ``forecasts`` command and the export list it: the record, plus its
    actual and outcome once a pass has scored it (None until then)."""

    forecast: ForecastRecord
    actual: float | None
    outcome: OutcomeKind | None


@dataclass(frozen=True)
class RecordedForecasts:
    ids: tuple[int, ...]  # aligned with the rows given, whether new or already there
    inserted: int


@dataclass(frozen=True)
class AwaitingOutcome:
    """A forecast whose target period now has an actual, not yet scored."""

    forecast_id: int
    series: str | None
    target_period: str
    target_period_key: int
    lead: int
    point: float
    lower: float
    upper: float
    actual: float


@dataclass(frozen=True, eq=False)
class ScoredForecasts:
    """Scored forecasts as columns, ordered by model, series, target period, issue."""

    forecast_id: NDArray[np.int64]
    model: tuple[str, ...]
    series: tuple[str | None, ...]
    target_period: tuple[str, ...]
    target_period_key: NDArray[np.int64]
    lead: NDArray[np.int64]
    issued_at: tuple[str, ...]  # stored UTC text
    actual: NDArray[np.float64]
    point: NDArray[np.float64]
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    level: NDArray[np.float64]
    outcome: tuple[OutcomeKind, ...]
    # The calibrated interval issued beside the model's own; NaN where none was issued.
    calibrated_lower: NDArray[np.float64] | None = None
    calibrated_upper: NDArray[np.float64] | None = None
    # The residual degrees of freedom of each forecast's fit (NaN: no fit, an interval supplied
    # from outside); only when asked for (``Store.scored_forecasts(with_df=True)``).
    residual_df: NDArray[np.float64] | None = None

    def __len__(self) -> int:
        return int(self.forecast_id.shape[0])


@dataclass(frozen=True)
class FindingRecord:
    id: int
    model: str | None
    series: str | None
    feed: str | None
    kind: FindingKind
    severity: Severity
    state: FindingState
    since_period: str | None
    statistic: float | None
    p_value: float | None
    message: str
    action: str
    first_pass_id: int
    last_pass_id: int  # the latest pass in which the condition held
    false_streak: int  # consecutive passes with the condition false
    created_at: datetime
    updated_at: datetime
    acknowledged_at: datetime | None  # when its first owner's note was recorded
    cleared_at: datetime | None
    cleared_pass_id: int | None
    note: FindingNote | None = None  # the latest owner's note
    note_count: int = 0
    # The business clock of the pass ``last_pass_id``: when the figures behind it were computed.
    last_held_at: datetime | None = None

    @property
    def noted(self) -> bool:
        """Whether an owner has recorded a note on it (its messages then stop)."""
        return self.acknowledged_at is not None

    def as_finding(self) -> Finding:
        return Finding(
            self.model, self.series, self.feed, self.kind, self.severity, self.since_period,
            self.statistic, self.p_value, self.message, self.action,
        )


@dataclass(frozen=True)
class FindingNote:
    """One owner's note on a finding: who wrote it, when (UTC), and what it says."""

    finding_id: int
    at: datetime
    by: str
    text: str


@dataclass(frozen=True)
class FindingUpsert:
    finding: FindingRecord
    created: bool  # True: raised now; False: an open one was updated
    previous_severity: Severity | None  # before this update (None when created)


@dataclass(frozen=True)
class BaselineRow:
    model: str
    version: int
    series: str | None
    start_period: str
    start_key: int
    end_period: str
    end_key: int
    set_by: str  # auto | declared | rolled | rebaseline
    monitoring_start: str | None = None
    monitoring_start_key: int | None = None


@dataclass(frozen=True)
class BaselineRecord:
    id: int
    model: str
    version: int
    series: str | None
    start_period: str
    start_key: int
    end_period: str
    end_key: int
    set_by: str
    monitoring_start: str | None
    monitoring_start_key: int | None
    created_at: datetime
    pass_id: int | None


@dataclass(frozen=True)
class DigestRecord:
    id: int
    period_end: datetime
    created_at: datetime
    pass_id: int | None
    path: str | None


@dataclass(frozen=True)
class OutboxMessage:
    id: int
    kind: str  # pass | digest
    dedupe_key: str
    recipients: tuple[str, ...]
    subject: str
    body: bytes  # the whole MIME message
    created_at: datetime
    pass_id: int | None
    attempts: int
    next_attempt_at: datetime
    last_error: str | None
    sent_at: datetime | None


@dataclass(frozen=True)
class FeedSummary:
    feed: str
    actual_rows: int  # current actuals (revised rows count once)
    plan_rows: int
    series: int
    latest_period: str | None
    latest_period_key: int | None
    last_received_at: datetime | None  # the latest file taken from the inbox (any outcome)


def _finite_or_none(value: float | None) -> float | None:
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None
