"""``plumbline rebaseline MODEL [--series S] [--from PERIOD]``: move a baseline after a
confirmed change (DESIGN.md section 7).

The new baseline is the model's baseline length (``window`` rows) starting at ``--from`` (a
period as the feed writes it), or, without ``--from``, the latest full window. Fewer rows than
that are accepted when at least p + 2 exist after ``--from``: the baseline then ends at the
latest actual. Open findings that compare with the old baseline (the kinds declared with
``rebaseline=True`` in ``monitor.vocabulary``) are cleared, and monitoring starts again after
the new baseline's end from the next pass on.
"""

from __future__ import annotations

import argparse
from datetime import UTC, date, datetime

import numpy as np

from monitor.commands._common import add_config_argument, config_from, open_existing_store
from monitor.config import lookup_model
from monitor.errors import UsageError
from monitor.passes import baseline_rows
from monitor.store import BaselineRow, date_period_key
from monitor.text import did_you_mean
from monitor.vocabulary import FindingKind

# The kinds whose declaration says a rebaseline clears them (they compare with the baseline).
BASELINE_KINDS = tuple(kind for kind in FindingKind if kind.declaration.rebaseline)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "rebaseline", help="move a model's baseline after a confirmed change",
        description="Set a new baseline for a model (every series, or one with --series), "
        "starting at --from or at the latest full window.",
    )
    add_config_argument(parser)
    parser.add_argument("model")
    parser.add_argument("--series", help="one series of a per: model")
    parser.add_argument("--from", dest="start", metavar="PERIOD",
                        help="the first period of the new baseline, as the feed writes it")
    parser.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    config = config_from(args)
    model = lookup_model(config, args.model)
    if not model.fitted:
        raise UsageError(f"model {args.model} audits intervals made elsewhere; it has no baseline")
    feed = config.feeds[model.feed]
    start_key: int | None = None
    if args.start is not None:
        try:
            start_key = (int(args.start) if feed.period_type == "integer"
                         else date_period_key(date.fromisoformat(args.start)))
        except ValueError:
            raise UsageError(f"--from {args.start!r} is not a period of feed {model.feed} "
                             f"({'an integer' if feed.period_type == 'integer' else 'a date'})"
                             ) from None
    now = datetime.now(UTC)
    with open_existing_store(config) as store:
        version = store.current_model_version(args.model)
        if version is None:
            raise UsageError(f"model {args.model} has not been through a pass yet")
        columns = (model.response, *(model.predictors or ()))
        windows = store.windows(model.feed, columns)
        if args.series is not None and args.series not in windows.series:
            known = [s for s in windows.series if s is not None]
            raise UsageError(f"model {args.model} has no series {args.series!r}"
                             f"{did_you_mean(args.series, known)}")
        wanted = [args.series] if args.series is not None else list(windows.series)
        length = baseline_rows(model)
        rows: list[BaselineRow] = []
        problems: list[str] = []
        for index, series in enumerate(windows.series):
            if series not in wanted:
                continue
            keys = windows.period_key[windows.rows_of(index)]
            if start_key is None:
                lo = max(0, keys.size - length)
            else:
                lo = int(np.searchsorted(keys, start_key, side="left"))
            hi = min(keys.size, lo + length)
            label = "the model" if series is None else f"series {series}"
            if hi - lo < model.parameter_count + 2:
                problems.append(f"{label} has only {hi - lo} rows from there")
                continue
            after = int(keys[hi]) if hi < keys.size else None
            labels = windows.period_labels
            rows.append(BaselineRow(
                model=args.model, version=version.version, series=series,
                start_period=labels[int(keys[lo])], start_key=int(keys[lo]),
                end_period=labels[int(keys[hi - 1])], end_key=int(keys[hi - 1]),
                set_by="rebaseline",
                monitoring_start=None if after is None else labels[after],
                monitoring_start_key=after,
            ))
        if not rows:
            raise UsageError("no baseline was moved: " + "; ".join(problems or ["no series"]))
        with store.transaction():
            store.set_baselines(rows, created_at=now)
            moved = {row.series for row in rows}
            cleared = 0
            last = store.latest_pass()
            for finding in store.open_findings(model=args.model):
                if finding.kind in BASELINE_KINDS and finding.series in moved:
                    store.clear_finding(finding.id, pass_id=last.id if last else 0, at=now)
                    cleared += 1
    for row in rows:
        name = args.model if row.series is None else f"{row.series} ({args.model})"
        print(f"{name}: monitoring now starts from {row.start_period} to {row.end_period}; "
              "later periods are compared with these.")
    for problem in problems:
        print(f"  not moved: {problem}")
    print(f"{cleared} finding(s) that compared with the earlier starting periods are no longer "
          "seen.")
    return 0
