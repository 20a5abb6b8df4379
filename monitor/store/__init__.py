"""The database: one SQLite file holding everything Plumbline knows, and every read and write of it.

Connection settings, and why:

- ``journal_mode=WAL``: readers (``status``, ``audit``, a backup) never block the one writer.
- ``synchronous=FULL``: each commit is on disk before the call returns. In WAL mode ``NORMAL``
  cannot corrupt the file, but a power cut may roll back the latest commits. Ingest commits a
  file's rows and *then* moves the file out of the inbox, and the outbox marks a message sent
  after the SMTP server accepted it; a commit lost behind a completed move would leave a file in
  the archive that the database has never seen. One fsync per transaction is cheap here: a pass
  makes one transaction per file and per stage. (``without_fsync`` lifts it, and the files'
  fsyncs, for the demo's replay into a throwaway workspace only.)
- ``foreign_keys=ON``; a busy timeout of 30 s, so that a short write from the command line
  (``ack``) waits for the daemon's current transaction instead of failing.

Conventions: times are UTC text of one fixed width (``2024-01-07T08:00:00.000000Z``, so that text
order is time order); methods take and return timezone-aware datetimes and refuse naive ones. A
period is kept as written plus an integer sort key: days since 1970-01-01 for dates
(:func:`date_period_key`), the number itself for integer periods. A series is its ``per:`` value;
a model without ``per:`` has the one series ``None``, stored as ``''`` so that unique indexes work
(ingest rejects empty ``per:`` values, so ``''`` is never a real one).

Forecasts, outcomes and observations are append-only: triggers refuse deletes, and any update of
an observation except retiring it (``current`` 1 → 0) when a revision or its actual arrives.

The schema is versioned by ``PRAGMA user_version`` and built by the ordered
:data:`~monitor.store.schema.MIGRATIONS`; opening an older database migrates it, opening a newer
one is refused. A :class:`Store` wraps one connection; use it from the thread that opened it.

The parts: ``schema`` (migrations), ``records`` (conventions and record types), ``base``
(connection, transactions, backup), ``observations`` (files and rows), ``results`` (passes, model
versions, fits, forecasts, outcomes, baselines), ``notices`` (findings, digests, outbox).
"""

from __future__ import annotations

from monitor.store.base import (
    BUSY_TIMEOUT_SECONDS,
    BackupResult,
    fsync_dir,
    fsync_file,
    without_fsync,
)
from monitor.store.notices import NoticesMixin
from monitor.store.observations import FilesMixin
from monitor.store.records import (
    AwaitingOutcome,
    BaselineRecord,
    BaselineRow,
    DigestRecord,
    FeedSummary,
    FileOutcome,
    FileRecord,
    FindingNote,
    FindingRecord,
    FindingUpsert,
    FitRecord,
    FitRow,
    ForecastRecord,
    ForecastRow,
    IssuedForecast,
    ModelVersionRecord,
    ObservationBatch,
    ObservationCounts,
    ObservationRecord,
    ObservationRow,
    OutboxMessage,
    PassRecord,
    PlanRows,
    RecordedForecasts,
    RejectedRow,
    Revision,
    ScoredForecasts,
    SeriesWindows,
    StoreError,
    date_period_key,
    parse_utc,
    period_key_date,
    to_json,
    utc_text,
)
from monitor.store.results import ResultsMixin
from monitor.store.schema import MIGRATIONS, SCHEMA_VERSION, Migration, apply_migrations


class Store(FilesMixin, ResultsMixin, NoticesMixin):
    """One connection to a Plumbline database. ``Store.open(path)``; close it, or use ``with``."""


__all__ = [
    "BUSY_TIMEOUT_SECONDS",
    "MIGRATIONS",
    "SCHEMA_VERSION",
    "AwaitingOutcome",
    "BackupResult",
    "BaselineRecord",
    "BaselineRow",
    "DigestRecord",
    "FeedSummary",
    "FileOutcome",
    "FileRecord",
    "FindingNote",
    "FindingRecord",
    "FindingUpsert",
    "FitRecord",
    "FitRow",
    "ForecastRecord",
    "ForecastRow",
    "IssuedForecast",
    "Migration",
    "ModelVersionRecord",
    "ObservationBatch",
    "ObservationCounts",
    "ObservationRecord",
    "ObservationRow",
    "OutboxMessage",
    "PassRecord",
    "PlanRows",
    "RecordedForecasts",
    "RejectedRow",
    "Revision",
    "ScoredForecasts",
    "SeriesWindows",
    "Store",
    "StoreError",
    "apply_migrations",
    "date_period_key",
    "fsync_dir",
    "fsync_file",
    "parse_utc",
    "period_key_date",
    "to_json",
    "utc_text",
    "without_fsync",
]
