"""``plumbline audit``: the coverage audit of the forecasts Plumbline has issued and scored.

    plumbline audit [-c CONFIG] [--model M] [--last N] [--by-lead] [--format table|csv|json]

The records come from ``monitor.audit.audit_models`` (DESIGN.md section 9's keys), the same
function the digest and the model pages use. ``json`` prints the list of records, ``csv`` the same
columns with empty cells for null, ``table`` a sentence per model and plain columns. The audit
reads what the passes have scored, so it stands at the latest pass's business clock (DESIGN.md
section 6); the table says which.

Exit status 0; 2 for an invalid config, an unknown model (with the nearest name), a ``--last``
below 1, or a database that does not exist yet.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import sys
import textwrap
from pathlib import Path
from typing import Any

from monitor.audit import (
    AUDIT_COLUMNS,
    CALIBRATED_COLUMNS,
    CALIBRATED_LINE,
    HIT_RATE_CONFIDENCE,
    audit_models,
    calibrated_view,
    has_calibrated,
    summarise_coverage,
)
from monitor.config import PlumblineConfig, load_config, lookup_model
from monitor.errors import UsageError
from monitor.notify.words import (
    MISS_WORDS,
    hit_rate_sentence,
    level_text,
    local_time,
    misses_text,
    number,
    percent,
    plural,
)
from monitor.store import Store
from monitor.text import format_p_value

WIDTH = 100


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "audit",
        help="the coverage audit: how often actuals landed inside the intervals issued",
        description="Score every issued prediction interval against the actual that arrived "
        "for it, per model and series: hits, misses above and below, the hit rate with its "
        "Clopper–Pearson interval against the nominal level, Kupiec's and Christoffersen's "
        "tests, whether the misses are as many as expected, the mean interval width and the "
        "interval score.",
    )
    parser.add_argument(
        "-c", "--config", default="plumbline.yaml", metavar="PATH",
        help="the config file (default: ./plumbline.yaml)",
    )
    parser.add_argument("--model", metavar="M", help="audit this model only")
    parser.add_argument(
        "--last", type=_positive, metavar="N",
        help="only each series' latest N scored periods (adds the key 'window')",
    )
    parser.add_argument(
        "--by-lead", action="store_true",
        help="score every forecast issued, split by lead time (adds the key 'lead')",
    )
    parser.add_argument("--format", choices=("table", "csv", "json"), default="table")
    parser.set_defaults(handler=run)


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} is below 1; give at least 1 period")
    return value


def open_database(config: PlumblineConfig, *, readonly: bool = True) -> Store:
    """The config's database; a clear ``UsageError`` (exit 2) when no pass has made it yet."""
    path = Path(config.database)
    if not path.exists():
        raise UsageError(
            f"no database at {path} yet: run 'plumbline pass' (or the daemon) first to create it"
        )
    return Store.open(path, readonly=readonly)


def run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    if args.model is not None:
        lookup_model(config, args.model)
    with open_database(config) as store:
        records = audit_models(
            store, config, model=args.model, last=args.last, by_lead=args.by_lead
        )
        latest = store.latest_pass()
    if args.format == "json":
        print(json.dumps(records, indent=2, allow_nan=False))
    elif args.format == "csv":
        sys.stdout.write(render_csv(records, last=args.last, by_lead=args.by_lead))
    else:
        clock = None if latest is None else local_time(latest.as_of, config.zone)
        names = [args.model] if args.model is not None else list(config.models)
        sys.stdout.write(
            render_table(records, names, clock=clock, last=args.last, by_lead=args.by_lead)
        )
    return 0


def csv_columns(*, last: int | None, by_lead: bool, calibrated: bool = False) -> list[str]:
    columns = list(AUDIT_COLUMNS)
    if last is not None:
        columns.append("window")
    if by_lead:
        columns.append("lead")
    if calibrated:
        columns += CALIBRATED_COLUMNS
    return columns


def render_csv(records: list[dict[str, Any]], *, last: int | None, by_lead: bool) -> str:
    """The records as CSV: the JSON keys as the header, empty cells for null, numbers in full."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    columns = csv_columns(last=last, by_lead=by_lead, calibrated=has_calibrated(records))
    writer.writerow(columns)
    for record in records:
        writer.writerow(["" if record.get(c) is None else record[c] for c in columns])
    return out.getvalue()


# --- the table ----------------------------------------------------------------------------------

_HEADER = (
    "series", "scored", "hits", "hit rate", "interval", "above", "below", "Kupiec p",
    "indep. p", "misses", "width", "score",
)


def render_table(
    records: list[dict[str, Any]],
    models: list[str],
    *,
    clock: str | None,
    last: int | None,
    by_lead: bool,
) -> str:
    """An opening sentence, then per model a sentence with its pooled hit rate and plain columns."""
    parts = [_wrap(_opening(records, models, clock=clock, last=last, by_lead=by_lead)), ""]
    for name in models:
        rows = [r for r in records if r["model"] == name]
        if not rows:
            parts += [_wrap(f"{name}: no forecasts scored yet."), ""]
            continue
        parts.append(_wrap(_model_sentence(name, rows, by_lead=by_lead)))
        if has_calibrated(rows):
            parts.append(_wrap(_calibrated_sentence(rows, by_lead=by_lead)))
        parts += _columns(rows, by_lead=by_lead)
        if not by_lead:
            parts.append("")
            parts += _accuracy_columns(rows)
        parts.append("")
    parts.append(_wrap(
        "Columns: interval is the hit rate's exact Clopper–Pearson interval at "
        f"{level_text(HIT_RATE_CONFIDENCE)}; above and below count the actuals beyond the upper "
        "or lower bound; Kupiec p tests whether the miss rate matches the nominal one (over the "
        "forecasts shown only: the coverage finding is decided by another test, a cumulative sum "
        "of the errors' size over the monitoring horizon, and quotes that test's p-value, so the "
        "two can differ), indep. p "
        "whether misses come in runs (Christoffersen; the JSON also has the joint test); misses "
        "says whether the count of misses is about as expected for the nominal level, more than "
        "expected or far more than expected, by its cumulative binomial probability (below "
        "95 %, below 99.99 %, above: the Basel Committee's 1996 back-testing thresholds; the "
        "JSON's key zone holds their names); width is the mean width of the prediction "
        "intervals and score their mean interval score (Gneiting and Raftery 2007; lower is "
        "better). Point accuracy: mean error is actual minus forecast (positive: the forecasts "
        "ran low), MASE the mean absolute error over that of the naive last-value forecast on "
        "the same periods (Hyndman and Koehler 2006; below 1 beats it). A low p-value is a "
        "statistical signal, not proof; the intervals assume the "
        "model's conditions hold."
    ))
    return "\n".join(parts) + "\n"


def _opening(
    records: list[dict[str, Any]],
    models: list[str],
    *,
    clock: str | None,
    last: int | None,
    by_lead: bool,
) -> str:
    when = (
        "no pass has run yet" if clock is None
        else f"as of the latest pass (business clock {clock})"
    )
    scope = (
        f"over each series' latest {plural(last, 'scored period')}" if last
        else "over all scored periods"
    )
    if by_lead:
        scope += ", every forecast issued, by lead time"
    if not records:
        return f"Coverage audit of {plural(len(models), 'model')}, {when}: nothing scored yet."
    series = {(r["model"], r["series"]) for r in records}
    scored = sum(int(r["scored"]) for r in records)
    zones = _zone_counts(records)
    zone_text = (
        "every series has about as many misses as expected"
        if not zones["red"] and not zones["yellow"]
        else f"{plural(zones['red'], 'series', 'series')} with far more misses than expected, "
        f"{zones['yellow']} with more than expected"
    )
    return (
        f"Coverage audit of {plural(len(models), 'model')}, {when}, {scope}: "
        f"{plural(scored, 'forecast')} scored across {plural(len(series), 'series', 'series')}; "
        f"{zone_text}."
    )


def _zone_counts(records: list[dict[str, Any]]) -> dict[str, int]:
    counts = {"green": 0, "yellow": 0, "red": 0}
    for record in records:
        if record["zone"] is not None:
            counts[record["zone"]] += 1
    return counts


def _model_sentence(name: str, rows: list[dict[str, Any]], *, by_lead: bool) -> str:
    nominal = float(rows[0]["nominal"])
    if by_lead:
        scored = sum(int(r["scored"]) for r in rows)
        hits = sum(int(r["hits"]) for r in rows)
        return (
            f"{name} (nominal {level_text(nominal)}): {hit_rate_sentence(hits, scored, nominal)} "
            "over every issue and lead."
        )
    summary = summarise_coverage(rows)
    assert summary is not None
    series = "" if summary["series_count"] == 1 else (
        f" across {summary['series_count']} series"
    )
    return (
        f"{name} (nominal {level_text(nominal)}): "
        f"{hit_rate_sentence(summary['hits'], summary['scored'], nominal)}{series}, hit rate "
        f"{percent(summary['hit_rate'], 1)} (interval {percent(summary['hit_rate_lower'], 1)} to "
        f"{percent(summary['hit_rate_upper'], 1)}): {misses_text(summary['zone'])}."
    )


def _calibrated_sentence(rows: list[dict[str, Any]], *, by_lead: bool) -> str:
    """The calibrated interval's pooled coverage beside the model's own, and what it is."""
    views = [calibrated_view(r) for r in rows]
    nominal = float(rows[0]["nominal"])
    scored = sum(int(v["scored"] or 0) for v in views)
    if scored == 0:
        return f"Calibrated intervals: none scored yet. {CALIBRATED_LINE}"
    if by_lead:
        hits = sum(int(v["hits"] or 0) for v in views)
        return (f"Calibrated intervals: {_calibrated_hits(hits, scored, nominal)} over every "
                f"issue and lead. {CALIBRATED_LINE}")
    summary = summarise_coverage([v for v in views if v["scored"]])
    assert summary is not None
    return (
        f"Calibrated intervals (rows marked calibrated): "
        f"{_calibrated_hits(summary['hits'], summary['scored'], nominal)}, hit rate "
        f"{percent(summary['hit_rate'], 1)} (interval {percent(summary['hit_rate_lower'], 1)} to "
        f"{percent(summary['hit_rate_upper'], 1)}): {misses_text(summary['zone'])}. "
        f"{CALIBRATED_LINE}"
    )


def _calibrated_hits(hits: int, scored: int, nominal: float) -> str:
    return f"{hits} of {scored} actuals inside their {level_text(nominal)} calibrated intervals"


def _columns(rows: list[dict[str, Any]], *, by_lead: bool) -> list[str]:
    header = list(_HEADER)
    if by_lead:
        header.insert(1, "lead")
    body: list[list[str]] = []
    calibrated = has_calibrated(rows)
    for record in rows:
        for r, label in ((record, None), (calibrated_view(record), "  calibrated")):
            if label is not None and (not calibrated or not r["scored"]):
                continue
            body.append(_cells(r, label, by_lead=by_lead))
    widths = [max(len(row[i]) for row in (header, *body)) for i in range(len(header))]
    text_columns = {0, header.index("misses")}  # read left to right
    lines = []
    for row in (header, *body):
        cells = [
            row[i].ljust(widths[i]) if i in text_columns else row[i].rjust(widths[i])
            for i in range(len(row))
        ]
        lines.append(("  " + "  ".join(cells)).rstrip())
    return lines


def _accuracy_columns(rows: list[dict[str, Any]]) -> list[str]:
    """Point accuracy per series: mean error, mean absolute error, MASE (issue 14, item 9)."""
    header = ["point accuracy", "mean error", "mean abs. error", "MASE"]
    body = [[
        "(whole model)" if r["series"] is None else str(r["series"]),
        number(r.get("mean_error")),
        number(r.get("mean_absolute_error")),
        number(r.get("mase"), 3),
    ] for r in rows]
    widths = [max(len(row[i]) for row in (header, *body)) for i in range(len(header))]
    return [("  " + "  ".join(row[i].ljust(widths[i]) if i == 0 else row[i].rjust(widths[i])
                              for i in range(len(row)))).rstrip()
            for row in (header, *body)]


def _cells(r: dict[str, Any], label: str | None, *, by_lead: bool) -> list[str]:
    """One row of the table: a series (``label`` None) or its calibrated interval's row."""
    series = "(whole model)" if r["series"] is None else str(r["series"])
    cells = [
        series if label is None else label,
        str(r["scored"]),
        str(r["hits"]),
        percent(r["hit_rate"], 1),
        _interval(r["hit_rate_lower"], r["hit_rate_upper"]),
        str(r["misses_high"]),
        str(r["misses_low"]),
        format_p_value(r["kupiec_p_value"]),
        format_p_value(r["independence_p_value"]),
        "n/a" if r["zone"] is None else MISS_WORDS[r["zone"]],
        number(r["mean_width"]),
        number(r["interval_score"]),
    ]
    if by_lead:
        cells.insert(1, str(r["lead"]))
    return cells


def _interval(lower: float | None, upper: float | None) -> str:
    if lower is None or upper is None:
        return "n/a"
    return f"{lower * 100:.1f}–{upper * 100:.1f} %"


def _wrap(text: str) -> str:
    guarded = text.replace(" %", "\u00a0%").replace("p < ", "p\u00a0<\u00a0")
    return textwrap.fill(guarded, width=WIDTH).replace("\u00a0", " ")
