"""``plumbline forecasts``: every forecast issued, to take out of Plumbline.

    plumbline forecasts [-c CONFIG] [--model M] [--series S] [--from P] [--to P] [--open]
                        [--pass N] [--format table|csv|json|parquet] [--out FILE]

The rows and columns are those of the export folder's files (``monitor.exports``), plus the
actual and outcome once a pass has scored a forecast. ``--from``/``--to`` bound the target
period (inclusive), written as the feed writes periods (a date, or an integer). ``--out`` writes
the file atomically (temporary name, then rename); Parquet needs ``--out``.

Exit status 0 (also when no forecast matches); 2 for an invalid config, an unknown model, a
period that cannot be read, Parquet without ``--out``, or a database that does not exist yet.
"""

from __future__ import annotations

import argparse
import sys
from datetime import date
from pathlib import Path
from typing import Any

from monitor.commands._common import add_config_argument, config_from, open_existing_store
from monitor.config import PlumblineConfig, lookup_model
from monitor.errors import UsageError
from monitor.exports import (
    column_names,
    csv_bytes,
    forecast_row,
    json_text,
    parquet_bytes,
    write_atomically,
)
from monitor.figures import level_text, number
from monitor.store import date_period_key


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "forecasts", help="list the forecasts issued, to take them out (CSV, JSON, Parquet)",
        description="List every forecast issued: model, series, target period, point, "
        "prediction and mean-response intervals, level, lead, issue time, leverage, "
        "extrapolation flag, fit and pass, and the actual and outcome once scored.",
    )
    add_config_argument(parser)
    parser.add_argument("--model", metavar="M", help="this model only")
    parser.add_argument("--series", metavar="S", help="this series only (its per: value)")
    parser.add_argument("--from", dest="from_period", metavar="P",
                        help="target periods from P (inclusive; a date, or an integer)")
    parser.add_argument("--to", dest="to_period", metavar="P",
                        help="target periods up to P (inclusive)")
    parser.add_argument("--open", action="store_true",
                        help="only forecasts whose actual has not arrived yet")
    parser.add_argument("--pass", dest="pass_id", type=int, metavar="N",
                        help="only the forecasts pass N issued")
    parser.add_argument("--format", choices=("table", "csv", "json", "parquet"),
                        default="table")
    parser.add_argument("--out", metavar="FILE",
                        help="write to FILE (atomically) instead of standard output")
    parser.set_defaults(handler=handle)


def _period_key(text: str, period_type: str, option: str) -> int:
    try:
        if period_type == "integer":
            return int(text)
        return date_period_key(date.fromisoformat(text))
    except ValueError:
        kind = "an integer" if period_type == "integer" else "an ISO 8601 date (e.g. 2025-08-03)"
        raise UsageError(f"{option} {text!r}: periods of this feed are {kind}") from None


def _period_type(config: PlumblineConfig, model: str | None) -> str:
    """The period type the bounds are read in: the model's feed's, or the one all feeds share."""
    if model is not None:
        return config.feeds[lookup_model(config, model).feed].period_type
    types = {feed.period_type for feed in config.feeds.values()}
    if len(types) > 1:
        raise UsageError("feeds have both date and integer periods; give --model with "
                         "--from or --to")
    return types.pop()


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    if args.model is not None:
        lookup_model(config, args.model)
    if args.format == "parquet" and args.out is None:
        raise UsageError("--format parquet writes a binary file; give --out FILE")
    from_key = to_key = None
    if args.from_period is not None or args.to_period is not None:
        period_type = _period_type(config, args.model)
        if args.from_period is not None:
            from_key = _period_key(args.from_period, period_type, "--from")
        if args.to_period is not None:
            to_key = _period_key(args.to_period, period_type, "--to")
    with open_existing_store(config, readonly=True) as store:
        items = store.issued_forecasts(
            model=args.model, series=args.series, from_key=from_key, to_key=to_key,
            open_only=args.open, pass_ids=None if args.pass_id is None else [args.pass_id],
        )
    columns = column_names(scored=True)
    rows = [forecast_row(item, config.zone, scored=True) for item in items]
    if args.format == "table":
        data = table_text(rows, config).encode("utf-8")
    elif args.format == "csv":
        data = csv_bytes(rows, columns)
    elif args.format == "json":
        data = (json_text(rows, columns) + "\n").encode("utf-8")
    else:
        data = parquet_bytes(rows, columns)
    if args.out is not None:
        write_atomically(Path(args.out), data)
        print(f"{len(rows)} forecast(s) written to {args.out}", file=sys.stderr)
    else:
        sys.stdout.write(data.decode("utf-8"))
    return 0


def table_text(rows: list[dict[str, Any]], config: PlumblineConfig) -> str:
    """A plain table for reading: numbers by the reports' precision rule (``monitor.figures``),
    times in the config's time zone to the minute."""
    if not rows:
        return "No forecasts match.\n"
    header = ("model", "series", "period", "point", "prediction interval", "level", "lead",
              "issued", "actual", "outcome")
    lines = [header]
    for row in rows:
        lines.append((
            row["model"], row["series"] or "-", row["target_period"], number(row["point"]),
            f"{number(row['lower'])} to {number(row['upper'])}", level_text(row["level"]),
            str(row["lead"]), f"{row['issued_at']:%Y-%m-%d %H:%M}",
            "" if row["actual"] is None else number(row["actual"]),
            (row["outcome"] or "open") + (" (extrapolated)" if row["extrapolation"] else ""),
        ))
    widths = [max(len(line[i]) for line in lines) for i in range(len(header))]
    right = {3, 5, 6, 8}
    out = [
        "  ".join(cell.rjust(w) if i in right else cell.ljust(w)
                  for i, (cell, w) in enumerate(zip(line, widths, strict=True))).rstrip()
        for line in lines
    ]
    open_count = sum(1 for row in rows if row["outcome"] is None)
    out.append("")
    out.append(f"{len(rows)} forecast(s), {open_count} still open; times in {config.timezone}; "
               "--format csv or json gives every column (mean-response interval, leverage, "
               "fit and pass ids).")
    return "\n".join(out) + "\n"


__all__ = ["handle", "register", "table_text"]
