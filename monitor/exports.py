"""Forecasts out: the rows ``plumbline forecasts`` lists and the files each pass exports.

Each pass writes the forecasts it issued into the export folder (``export.folder``), one
subfolder per model and one file per pass that issued forecasts for that model:
``exports/pick_hours/pass-000012.csv``. It is the counterpart of a feed's drop folder, with the
same rule for completeness: a file is written under a temporary name starting with ``.`` (and
ending ``.tmp``), flushed to disk, and renamed to its final name, so a job that takes every
``*.csv`` never reads half a file.

CSV is the default because it is what the feeds themselves are and what a scheduler's next job,
a database loader or a spreadsheet takes without another library; floats are written with
Python's shortest round-trip form, so reading them back gives the same numbers. Parquet
(``export.format: parquet``) keeps the column types (float64, int64, booleans, timestamps in UTC)
for jobs that load a data lake.

The columns (``FORECAST_COLUMNS``) are the same in the export, in ``plumbline forecasts --format
csv|json|parquet`` and in this order; the command adds ``actual``, ``outcome`` and
``calibrated_outcome`` (``SCORED_COLUMNS``), which the export at issue time cannot know yet.
"""

from __future__ import annotations

import csv
import io
import json
import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from monitor.config import PlumblineConfig
from monitor.store import IssuedForecast, Store, fsync_dir, fsync_file
from monitor.vocabulary import classify_outcome

# (column, what it holds). Issue order: pass, model, series, target period.
FORECAST_COLUMNS: tuple[tuple[str, str], ...] = (
    ("model", "the model's name"),
    ("series", "the series (its `per:` value); empty for a model without `per:`"),
    ("target_period", "the period forecast, as the plan row wrote it"),
    ("point", "the point forecast"),
    ("lower", "lower bound of the prediction interval (where the actual should fall)"),
    ("upper", "upper bound of the prediction interval"),
    ("level", "the intervals' nominal coverage (0.95 = 95 %)"),
    ("mean_lower", "lower bound of the mean-response interval (the average, not one actual); "
                   "empty for an audited interval made elsewhere"),
    ("mean_upper", "upper bound of the mean-response interval"),
    ("lead", "cadence steps from the latest actual used to the target period"),
    ("issued_at", "the pass's business clock, ISO 8601 in the config's time zone"),
    ("leverage", "the plan row's leverage h₀ against the fit window"),
    ("extrapolation", "true when the plan row lies outside what the fit has seen"),
    ("fit_id", "the fit the forecast came from (the model page shows it)"),
    ("pass_id", "the pass that issued it"),
    ("forecast_id", "the forecast's id in the database"),
    ("calibrated_lower", "lower bound of the calibrated interval (`interval_method: calibrated`); "
                         "empty for a model that does not calibrate or before it has enough "
                         "scored errors"),
    ("calibrated_upper", "upper bound of the calibrated interval"),
    ("calibrated_factor", "how far the calibrated interval's half-width stands from the model's "
                          "own (1.2 = 20 % wider)"),
)  # fmt: skip
SCORED_COLUMNS: tuple[tuple[str, str], ...] = (
    ("actual", "the actual, once a pass has scored the forecast; empty until then"),
    ("outcome", "`hit`, `miss_high` or `miss_low` once scored; empty until then"),
    ("calibrated_outcome", "the same against the calibrated interval; empty without one"),
)
EXPORT_SUFFIX = {"csv": ".csv", "parquet": ".parquet"}


@dataclass(frozen=True)
class ExportedFile:
    """One file a pass wrote into the export folder."""

    model: str
    pass_id: int
    path: Path
    forecasts: int


def column_names(*, scored: bool) -> list[str]:
    return [name for name, _ in FORECAST_COLUMNS + (SCORED_COLUMNS if scored else ())]


def forecast_row(
    item: IssuedForecast, zone: ZoneInfo, *, scored: bool,
    stamps: dict[datetime, datetime] | None = None,
) -> dict[str, Any]:
    """One forecast as plain values (None for an empty cell), columns in order. ``stamps``, a
    dict kept across the calls for many forecasts, holds each issue time in ``zone`` once made
    (a pass issues its forecasts at one moment)."""
    f = item.forecast
    issued_at = None if stamps is None else stamps.get(f.issued_at)
    if issued_at is None:
        issued_at = f.issued_at.astimezone(zone).replace(microsecond=0)
        if stamps is not None:
            stamps[f.issued_at] = issued_at
    row: dict[str, Any] = {
        "model": f.model,
        "series": f.series,
        "target_period": f.target_period,
        "point": f.point,
        "lower": f.lower,
        "upper": f.upper,
        "level": f.level,
        "mean_lower": f.mean_lower,
        "mean_upper": f.mean_upper,
        "lead": f.lead,
        "issued_at": issued_at,
        "leverage": f.leverage,
        "extrapolation": f.extrapolation,
        "fit_id": f.fit_id,
        "pass_id": f.pass_id,
        "forecast_id": f.id,
        "calibrated_lower": f.calibrated_lower,
        "calibrated_upper": f.calibrated_upper,
        "calibrated_factor": f.calibrated_factor,
    }
    if scored:
        row["actual"] = item.actual
        row["outcome"] = None if item.outcome is None else item.outcome.value
        row["calibrated_outcome"] = (
            None if item.actual is None or f.calibrated_lower is None
            or f.calibrated_upper is None
            else classify_outcome(item.actual, f.calibrated_lower, f.calibrated_upper).value)
    return row


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)  # the shortest text that reads back as the same float
    if isinstance(value, datetime):
        return value.isoformat()
    return str(value)


def csv_bytes(rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> bytes:
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow([_cell(row[c]) for c in columns])
    return buffer.getvalue().encode("utf-8")


def json_text(rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> str:
    def plain(value: Any) -> Any:
        return value.isoformat() if isinstance(value, datetime) else value

    return json.dumps([{c: plain(row[c]) for c in columns} for row in rows], indent=2)


def parquet_bytes(rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> bytes:
    """The rows as a Parquet file (pyarrow, imported only here)."""
    import pyarrow as pa  # type: ignore[import-untyped]
    import pyarrow.parquet as pq  # type: ignore[import-untyped]

    types = {
        "model": pa.string(), "series": pa.string(), "target_period": pa.string(),
        "point": pa.float64(), "lower": pa.float64(), "upper": pa.float64(),
        "level": pa.float64(), "mean_lower": pa.float64(), "mean_upper": pa.float64(),
        "lead": pa.int64(), "issued_at": pa.timestamp("s", tz="UTC"),
        "leverage": pa.float64(), "extrapolation": pa.bool_(), "fit_id": pa.int64(),
        "pass_id": pa.int64(), "forecast_id": pa.int64(), "actual": pa.float64(),
        "outcome": pa.string(), "calibrated_lower": pa.float64(),
        "calibrated_upper": pa.float64(), "calibrated_factor": pa.float64(),
        "calibrated_outcome": pa.string(),
    }  # fmt: skip
    schema = pa.schema([(c, types[c]) for c in columns])
    table = pa.Table.from_pydict({c: [row[c] for row in rows] for c in columns}, schema=schema)
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def write_atomically(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that no reader ever sees part of it: a temporary name
    starting with ``.`` in the same folder, flushed, then renamed over ``path``."""
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(temporary, "wb") as handle:
            handle.write(data)
            handle.flush()
            fsync_file(handle.fileno())
        os.replace(temporary, path)
    finally:
        temporary.unlink(missing_ok=True)
    fsync_dir(path.parent)


def export_name(pass_id: int, file_format: str) -> str:
    return f"pass-{pass_id:06d}{EXPORT_SUFFIX[file_format]}"


ENCODERS: dict[str, Callable[[Sequence[dict[str, Any]], Sequence[str]], bytes]] = {
    "csv": csv_bytes,
    "parquet": parquet_bytes,
}


def export_forecasts(
    store: Store, config: PlumblineConfig, pass_ids: Iterable[int]
) -> list[ExportedFile]:
    """Write one file per pass and model for the forecasts those passes issued (as issued:
    no actual yet). Writing the same pass again replaces its files with the same rows."""
    wanted = sorted(set(pass_ids))
    if not wanted:
        return []
    columns = column_names(scored=False)
    zone = config.zone
    groups: dict[tuple[str, int], list[dict[str, Any]]] = {}
    stamps: dict[datetime, datetime] = {}
    for item in store.issued_forecasts(pass_ids=wanted):
        key = (item.forecast.model, item.forecast.pass_id)
        groups.setdefault(key, []).append(
            forecast_row(item, zone, scored=False, stamps=stamps))
    file_format = config.export.format
    written: list[ExportedFile] = []
    for (model, pass_id), rows in sorted(groups.items(), key=lambda kv: (kv[0][1], kv[0][0])):
        path = config.export.model_folder(model) / export_name(pass_id, file_format)
        write_atomically(path, ENCODERS[file_format](rows, columns))
        written.append(ExportedFile(model, pass_id, path, len(rows)))
    return written


__all__ = [
    "ENCODERS",
    "FORECAST_COLUMNS",
    "SCORED_COLUMNS",
    "ExportedFile",
    "column_names",
    "csv_bytes",
    "export_forecasts",
    "export_name",
    "forecast_row",
    "json_text",
    "parquet_bytes",
    "write_atomically",
]
