"""The coverage audit over the database: every scored forecast of every model, per series.

One function makes the records of DESIGN.md section 9 (``plumbline audit --format json``), and
every report that shows coverage (the digest, the model pages) takes its numbers from it, so the
figures a reader sees in an e-mail are the figures the command prints for the same database.

    audit_models(store, config, *, model=None, last=None, by_lead=False) -> list[dict]
        One record per (model, series), or per (model, series, lead) with ``by_lead``; keys in
        ``AUDIT_COLUMNS`` order, plus ``window`` with ``last`` and ``lead`` with ``by_lead``.
    summarise_coverage(records) -> dict | None
        The records of one model pooled: counts summed, hit rate with its Clopper–Pearson
        interval, the zone of the pooled miss count, and how many series sit in each zone.
    has_calibrated(records), calibrated_view(record)
        For a model with ``interval_method: calibrated``: each record also carries the audit of
        the calibrated interval issued beside the model's own (``CALIBRATED_COLUMNS``, over the
        forecasts that had one); ``calibrated_view`` gives it under the plain keys, so
        ``summarise_coverage([calibrated_view(r) for r in records])`` pools it.

What is scored (DESIGN.md section 6): by default, per (series, target period) the last forecast
issued before the actual arrived; with ``by_lead`` every issue, split by lead. ``last=N`` keeps
each entry's latest N scored forecasts (with the default audit: the latest N scored periods of each
series). ``nominal`` is the model's level from the config (``interval.level`` for an audited
interval forecast). Point accuracy over the same forecasts (not with ``by_lead``, where those
keys are null): ``mean_error`` (actual − point), ``mean_absolute_error`` and ``mase`` (Hyndman &
Koehler 2006, against the naive last-value forecast; ``monitor.stats.accuracy``). Models come in
config order, series sorted with the single series of a model
without ``per:`` (``null``) first, leads increasing. A model with nothing scored yet has no record.

The audit only reads what passes have scored, so it stands at the latest pass's business clock
(DESIGN.md section 6) without being told.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from monitor.config import PlumblineConfig, lookup_model
from monitor.stats.accuracy import accuracy_batch
from monitor.stats.coverage import audit_batch, clopper_pearson_interval, traffic_light_zone
from monitor.store import ScoredForecasts, Store

# The keys of each record, in the order of DESIGN.md section 9 (``window``/``lead`` may follow).
AUDIT_COLUMNS: tuple[str, ...] = (
    "model",
    "series",
    "scored",
    "hits",
    "hit_rate",
    "hit_rate_lower",
    "hit_rate_upper",
    "misses_high",
    "misses_low",
    "nominal",
    "kupiec_p_value",
    "independence_p_value",
    "christoffersen_p_value",
    "zone",
    "mean_width",
    "interval_score",
    "mean_error",
    "mean_absolute_error",
    "mase",
)

# The calibrated interval's audit (``interval_method: calibrated``), beside the model's own: added
# to every record of a model that has scored calibrated intervals, over the forecasts that had
# one (a series' first 20 scored forecasts have none). Same meanings as the keys without the
# prefix.
CALIBRATED_COLUMNS: tuple[str, ...] = (
    "calibrated_scored",
    "calibrated_hits",
    "calibrated_hit_rate",
    "calibrated_hit_rate_lower",
    "calibrated_hit_rate_upper",
    "calibrated_misses_high",
    "calibrated_misses_low",
    "calibrated_kupiec_p_value",
    "calibrated_independence_p_value",
    "calibrated_christoffersen_p_value",
    "calibrated_zone",
    "calibrated_mean_width",
    "calibrated_interval_score",
)
_PREFIX = "calibrated_"

#: What every report says about the calibrated interval, in one line.
CALIBRATED_LINE = (
    "The calibrated interval comes from the model's own recent forecast errors: it is wider than "
    "the model's where those errors were larger than the model expects, narrower where smaller."
)

# Confidence of the Clopper–Pearson interval around each hit rate (not the intervals' level).
HIT_RATE_CONFIDENCE = 0.95


def audit_models(
    store: Store,
    config: PlumblineConfig,
    *,
    model: str | None = None,
    last: int | None = None,
    by_lead: bool = False,
    scored: ScoredForecasts | None = None,
) -> list[dict[str, Any]]:
    """The coverage audit records of every model in the config (or of ``model``).

    An unknown ``model`` raises ``UsageError`` with the nearest name. ``last`` must be a positive
    whole number. See the module docstring for what is scored and in which order. ``scored``:
    ``model``'s scored forecasts as ``store.scored_forecasts(model)`` gave them, already read
    (the pages hold them; a long history costs seconds to read again); not with ``by_lead``.
    """
    if last is not None and (isinstance(last, bool) or last < 1):
        raise ValueError(f"last must be a positive whole number of periods, not {last!r}")
    if scored is not None and (model is None or by_lead):
        raise ValueError("scored forecasts read already need one model and no by_lead")
    names = [model] if model is not None else list(config.models)
    records: list[dict[str, Any]] = []
    given = scored
    for name in names:
        declared = lookup_model(config, name)
        scored = given if given is not None else store.scored_forecasts(
            name, latest_only=not by_lead)
        if len(scored) == 0:
            continue
        series_names = sorted(set(scored.series), key=_series_order)
        index = {series: i for i, series in enumerate(series_names)}
        group = np.fromiter((index[s] for s in scored.series), np.int64, len(scored))
        batch = audit_batch(
            group,
            scored.actual,
            scored.lower,
            scored.upper,
            declared.nominal_level,
            lead=scored.lead if by_lead else None,
            last=last,
            confidence=HIT_RATE_CONFIDENCE,
        )
        accuracy = None
        if not by_lead:
            # point accuracy over the same forecasts: each series' latest ``last`` (time order)
            keep = np.ones(len(scored), dtype=bool)
            if last is not None:
                # Each row's place within its series (rows of a series in order), counted
                # over arrays: a search of every row per series grew with series × rows.
                order = np.argsort(group, kind="stable")
                counts = np.bincount(group)
                position = np.empty(len(group), dtype=np.int64)
                position[order] = np.arange(len(group)) - np.repeat(
                    np.cumsum(counts) - counts, counts)
                keep = position >= counts[group] - last
            accuracy = accuracy_batch(group[keep], scored.actual[keep], scored.point[keep])
            at = {int(g): j for j, g in enumerate(accuracy.group)}
        calibrated = None
        if scored.calibrated_lower is not None and scored.calibrated_upper is not None and bool(
                np.isfinite(scored.calibrated_lower).any()):
            calibrated = audit_batch(
                group, scored.actual, scored.calibrated_lower, scored.calibrated_upper,
                declared.nominal_level, lead=scored.lead if by_lead else None, last=last,
                confidence=HIT_RATE_CONFIDENCE,
            )
        for i in range(len(batch)):
            audit = batch.audit(i)
            if audit.scored == 0:
                continue
            record: dict[str, Any] = {
                "model": name,
                "series": series_names[int(batch.group[i])],
            }
            record.update(audit.as_record())
            j = None if accuracy is None else at.get(int(batch.group[i]))
            for key, values in (("mean_error", None if accuracy is None else accuracy.mean_error),
                                ("mean_absolute_error",
                                 None if accuracy is None else accuracy.mean_absolute_error),
                                ("mase", None if accuracy is None else accuracy.mase)):
                value = None if values is None or j is None else float(values[j])
                record[key] = None if value is None or not np.isfinite(value) else value
            if calibrated is not None:
                # Same entries in the same order: both batches group every row, scored or not.
                record.update(_calibrated_keys(calibrated.audit(i).as_record()))
            ordered = {key: record[key] for key in AUDIT_COLUMNS}
            ordered.update((k, v) for k, v in record.items() if k not in ordered)
            records.append(ordered)
    return records


def calibrated_sentence(records: list[dict[str, Any]], what: str) -> str | None:
    """The calibrated intervals' pooled coverage over a window, as a sentence to put beside the
    model's own; None when the records carry no calibrated audit."""
    if not has_calibrated(records):
        return None
    views = [calibrated_view(r) for r in records if r.get(_PREFIX + "scored")]
    summary = summarise_coverage(views)
    if summary is None:
        return f"Calibrated intervals {what}: none scored yet."
    level = f"{summary['nominal'] * 100:g} %"
    return (
        f"Calibrated intervals {what}: {summary['hits']} of {summary['scored']} actuals inside "
        f"their {level} calibrated intervals (hit rate {summary['hit_rate'] * 100:.1f} %, "
        f"interval {summary['hit_rate_lower'] * 100:.1f} % to "
        f"{summary['hit_rate_upper'] * 100:.1f} %; zone {summary['zone']})."
    )


def has_calibrated(records: list[dict[str, Any]]) -> bool:
    """True when the records carry the calibrated interval's audit (``CALIBRATED_COLUMNS``)."""
    return any(_PREFIX + "scored" in record for record in records)


def calibrated_view(record: dict[str, Any]) -> dict[str, Any]:
    """A record's calibrated-interval audit under the plain keys (``scored``, ``hit_rate`` …), so
    the code that reads the model's own figures reads these the same way."""
    shared = ("model", "series", "nominal", "window", "lead")
    view: dict[str, Any] = {key: record[key] for key in shared if key in record}
    for column in CALIBRATED_COLUMNS:
        view[column[len(_PREFIX):]] = record.get(column)
    return view


def _calibrated_keys(record: dict[str, Any]) -> dict[str, Any]:
    return {column: record[column[len(_PREFIX):]] for column in CALIBRATED_COLUMNS}


def summarise_coverage(records: list[dict[str, Any]]) -> dict[str, Any] | None:
    """Pool the audit records of one model (one window, no ``by_lead``) into one summary.

    Keys: ``model``, ``series_count``, ``scored``, ``hits``, ``misses_high``, ``misses_low``,
    ``hit_rate`` (pooled hits / pooled scored), ``hit_rate_lower``/``hit_rate_upper`` (Clopper &
    Pearson 1934 on the pooled counts), ``nominal``, ``zone`` (traffic light of the pooled miss
    count, Basel Committee 1996), ``zones`` (series per zone), ``mean_width`` (weighted by
    forecasts scored), ``window``. Pooling treats the series' forecasts as one sample; it is a
    summary for reading, not a test, and no finding is raised from it. None for no records.
    """
    if not records:
        return None
    models = {record["model"] for record in records}
    if len(models) != 1:
        raise ValueError(f"summarise one model's records at a time, not {sorted(models)}")
    if any("lead" in record for record in records):
        raise ValueError("summarise records without by_lead: each forecast must count once")
    scored = sum(int(r["scored"]) for r in records)
    hits = sum(int(r["hits"]) for r in records)
    high = sum(int(r["misses_high"]) for r in records)
    low = sum(int(r["misses_low"]) for r in records)
    nominal = float(records[0]["nominal"])
    lower, upper = clopper_pearson_interval(hits, scored, HIT_RATE_CONFIDENCE)
    zones = {"green": 0, "yellow": 0, "red": 0}
    for record in records:
        if record["zone"] is not None:
            zones[record["zone"]] += 1
    zone = traffic_light_zone(high + low, scored, nominal)
    width_total = sum(
        float(r["mean_width"]) * int(r["scored"]) for r in records if r["mean_width"] is not None
    )
    return {
        "model": records[0]["model"],
        "series_count": len(records),
        "scored": scored,
        "hits": hits,
        "misses_high": high,
        "misses_low": low,
        "hit_rate": hits / scored if scored else None,
        "hit_rate_lower": float(lower) if scored else None,
        "hit_rate_upper": float(upper) if scored else None,
        "nominal": nominal,
        "zone": None if zone is None else zone.value,
        "zones": zones,
        "mean_width": width_total / scored if scored else None,
        "window": records[0].get("window"),
    }


def _series_order(series: str | None) -> tuple[int, str]:
    return (0, "") if series is None else (1, series)


__all__ = [
    "AUDIT_COLUMNS",
    "CALIBRATED_COLUMNS",
    "CALIBRATED_LINE",
    "HIT_RATE_CONFIDENCE",
    "audit_models",
    "calibrated_sentence",
    "calibrated_view",
    "has_calibrated",
    "summarise_coverage",
]
