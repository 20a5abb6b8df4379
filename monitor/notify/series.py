"""What reports read from the database about one model: its scored and open forecasts, fits and
findings, and the chart data of its series.

``load_model`` reads a model's history in a few queries (not one per series), so a page or a
digest for a model with a thousand series costs a handful of reads plus the charts it draws for
the flagged series only. Scored forecasts are read in full once (as arrays, the latest issue of
each target period; the store reads them in chunks, ``Store.scored_forecasts``); the forecast
records themselves only for the forecasts still open, and of the others only their series and
the refits behind them (a coefficient chart's), all from the latest ``FORECAST_LOOKBACK`` passes,
so that the cost of a page stays bounded as years of weekly forecasts pile up and does not grow
with the forecasts already scored.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np
from numpy.typing import NDArray

from monitor.audit import audit_models
from monitor.config import Model, PlumblineConfig
from monitor.notify.charts import (
    ActualsData,
    CoefficientData,
    HitRateData,
    MonitoringData,
    ScatterData,
)
from monitor.notify.fits import monitoring_arrays
from monitor.stats.ols import fit_ols
from monitor.store import (
    FindingRecord,
    FitRecord,
    ForecastRecord,
    ScoredForecasts,
    Store,
    date_period_key,
)
from monitor.vocabulary import FindingKind, OutcomeKind

GRID_POINTS = 60
# Passes whose forecasts a report reads: half a year of weekly passes. Open forecasts older than
# that are overdue rather than coming, and a coefficient chart shows this many refits at most.
FORECAST_LOOKBACK = 26


@dataclass(eq=False)
class ModelHistory:
    """One model's records, as reports need them."""

    name: str
    model: Model
    feed_period_type: str
    scored: ScoredForecasts  # the default audit's rows: the last issue per target period
    # Of the passes read: the forecasts not scored yet, and each series' fits behind its
    # forecasts (``Store.forecast_fits``).
    unscored: list[ForecastRecord]
    forecast_fits: dict[str | None, set[int]]
    latest_fits: dict[str | None, FitRecord]
    open_findings: list[FindingRecord]
    _rows: dict[str | None, NDArray[np.int64]] = field(default_factory=dict)
    _open: dict[datetime | None, list[ForecastRecord]] = field(default_factory=dict)
    _open_by_series: dict[str | None, list[ForecastRecord]] | None = None
    summaries: dict[str, dict[str, Any] | None] = field(default_factory=dict)  # memo for pages
    _audits: dict[int | None, list[dict[str, Any]]] = field(default_factory=dict)

    def audit(self, store: Store, config: PlumblineConfig,
              last: int | None) -> list[dict[str, Any]]:
        """``audit_models`` of this model over each series' latest ``last`` scored forecasts
        (every one: None), from the scored forecasts read. Worked out once per window for all
        the pages that show it (the pass page's 13 is the model page's, the digest's 13 and 52
        are too): at 10,000 series each window costs seconds. Each caller gets its own copies
        of the records."""
        if last not in self._audits:
            self._audits[last] = audit_models(store, config, model=self.name, last=last,
                                              scored=self.scored)
        return [dict(record) for record in self._audits[last]]

    def scored_rows(self, series: str | None) -> NDArray[np.int64]:
        """Indexes into ``scored`` of one series' rows, in target-period order."""
        return self._rows.get(series, np.zeros(0, np.int64))

    @property
    def series(self) -> list[str | None]:
        """Every series with a fit, a forecast or a finding, sorted (None first)."""
        names: set[str | None] = set(self.latest_fits)
        names.update(self.forecast_fits)
        names.update(f.series for f in self.open_findings)
        return sorted(names, key=lambda s: (0, "") if s is None else (1, s))

    @property
    def flagged(self) -> list[str | None]:
        """Series with an open finding, most severe first, then by name."""
        worst: dict[str | None, int] = {}
        for finding in self.open_findings:
            rank = finding.severity.rank
            worst[finding.series] = max(worst.get(finding.series, -1), rank)
        return sorted(worst, key=lambda s: (-worst[s], (0, "") if s is None else (1, s)))

    def findings_of(self, series: str | None) -> list[FindingRecord]:
        return [f for f in self.open_findings if f.series == series]

    def open_forecasts(self, period_end: datetime | None = None) -> list[ForecastRecord]:
        """Forecasts still awaiting their actuals, the latest issue per (series, target period).

        With date periods and ``period_end``, only targets after the period end's date (the
        coming periods); an older target without its actual is overdue, not coming.
        """
        if period_end in self._open:
            return list(self._open[period_end])
        latest: dict[tuple[str | None, int], ForecastRecord] = {}
        for record in self.unscored:
            key = (record.series, record.target_period_key)
            if key not in latest or record.id > latest[key].id:
                latest[key] = record
        rows = list(latest.values())
        if period_end is not None and self.feed_period_type == "date":
            limit = date_period_key(period_end.date())
            rows = [r for r in rows if r.target_period_key > limit]
        rows.sort(key=lambda r: ((0, "") if r.series is None else (1, r.series),
                                 r.target_period_key))
        self._open[period_end] = rows
        return list(rows)

    def open_forecasts_of(self, series: str | None) -> list[ForecastRecord]:
        """``open_forecasts()`` of one series."""
        if self._open_by_series is None:
            grouped: dict[str | None, list[ForecastRecord]] = defaultdict(list)
            for record in self.open_forecasts():
                grouped[record.series].append(record)
            self._open_by_series = dict(grouped)
        return list(self._open_by_series.get(series, ()))


def load_model(
    store: Store, config: PlumblineConfig, name: str, *, lookback: int = FORECAST_LOOKBACK
) -> ModelHistory:
    """Read one model's scored forecasts, its forecasts of the latest ``lookback`` passes (records
    of those not scored yet; of the others their series and fits), latest fits and open
    findings."""
    model = config.models[name]
    scored = store.scored_forecasts(name)
    # Only the open forecasts become records: in a weekly pass of 10,000 series the passes read
    # issued some 260,000 forecasts, nearly all scored since, and building their records took
    # most of a page's time and a third of its memory (DEVELOPERS.md, "The database").
    passes = [record.id for record in store.list_passes(limit=lookback)]
    unscored = ([f.forecast for f in store.issued_forecasts(
        model=name, pass_ids=passes, open_only=True)] if passes else [])
    history = ModelHistory(
        name=name,
        model=model,
        feed_period_type=config.feeds[model.feed].period_type,
        scored=scored,
        unscored=unscored,
        forecast_fits=store.forecast_fits(name, passes),
        latest_fits=store.latest_fits(name),
        open_findings=store.open_findings(model=name),
    )
    grouped: dict[str | None, list[int]] = defaultdict(list)
    for i, series in enumerate(scored.series):
        grouped[series].append(i)
    history._rows = {s: np.asarray(rows, dtype=np.int64) for s, rows in grouped.items()}
    return history


class ModelHistories(dict[str, ModelHistory]):
    """Models' histories, each read from the store (``load_model``) the first time it is asked
    for. What is read is the database as it stands, not as of a pass, so one of these serves
    every page written while the database does not change (``plumbline demo`` shares one
    between its pass pages and digest)."""

    def __init__(self, store: Store, config: PlumblineConfig) -> None:
        super().__init__()
        self.store, self.config = store, config

    def __missing__(self, name: str) -> ModelHistory:
        history = self[name] = load_model(self.store, self.config, name)
        return history


def series_label(series: str | None) -> str:
    return "the whole model" if series is None else f"series {series}"


def actuals_data(
    history: ModelHistory, series: str | None, *, last: int | None = 52
) -> ActualsData:
    """The latest ``last`` scored periods of a series against their intervals, and what is open."""
    rows = history.scored_rows(series)
    if last is not None:
        rows = rows[-last:]
    scored = history.scored
    upcoming = history.open_forecasts_of(series)
    return ActualsData(
        title=f"Actuals against the intervals issued for them, {series_label(series)}",
        periods=tuple(scored.target_period[i] for i in rows),
        actual=scored.actual[rows],
        lower=scored.lower[rows],
        upper=scored.upper[rows],
        point=scored.point[rows],
        level=history.model.nominal_level,
        upcoming_periods=tuple(f.target_period for f in upcoming),
        upcoming_point=np.array([f.point for f in upcoming], dtype=np.float64),
        upcoming_lower=np.array([f.lower for f in upcoming], dtype=np.float64),
        upcoming_upper=np.array([f.upper for f in upcoming], dtype=np.float64),
    )


def hit_rate_data(
    history: ModelHistory, series: str | None = None, *, pooled: bool = True, window: int = 13
) -> HitRateData:
    """Hits per target period, of one series or (``pooled``) of every series of the model."""
    scored = history.scored
    rows = (
        np.arange(len(scored), dtype=np.int64) if pooled else history.scored_rows(series)
    )
    keys = scored.target_period_key[rows]
    order = np.unique(keys)
    position = np.searchsorted(order, keys)
    hit = np.array([scored.outcome[i] is OutcomeKind.HIT for i in rows], dtype=np.int64)
    hits = np.bincount(position, weights=hit, minlength=order.size).astype(np.int64)
    counts = np.bincount(position, minlength=order.size).astype(np.int64)
    labels: dict[int, str] = {}
    for i in rows:
        labels.setdefault(int(scored.target_period_key[i]), scored.target_period[i])
    what = ("every series" if history.model.per else "the whole model") if pooled else (
        series_label(series))
    return HitRateData(
        title=f"Rolling hit rate over {window} periods, {what}",
        periods=tuple(labels[int(k)] for k in order),
        hits=hits,
        scored=counts,
        nominal=history.model.nominal_level,
        window=window,
    )


def fit_history(store: Store, history: ModelHistory, series: str | None) -> list[FitRecord]:
    """The series' refits that issued forecasts in the passes read, and its latest fit, oldest
    first."""
    ids = set(history.forecast_fits.get(series, ()))
    latest = history.latest_fits.get(series)
    if latest is not None:
        ids.add(latest.id)
    fits = [store.get_fit(i) for i in sorted(ids)]
    return [f for f in fits if f is not None and f.estimable]


def _term_row(fit: FitRecord, term: str) -> tuple[float, float, float] | None:
    raw = fit.coefficients
    entry = raw.get(term) if isinstance(raw, dict) else None
    if entry is None and isinstance(raw.get("coefficients"), list):
        entry = next((c for c in raw["coefficients"] if c.get("term") == term), None)
    if not isinstance(entry, dict):
        return None
    values = (entry.get("estimate"), entry.get("lower"), entry.get("upper"))
    if any(not isinstance(v, int | float) for v in values):
        return None
    return float(values[0]), float(values[1]), float(values[2])  # type: ignore[arg-type]


def _window_rows(
    store: Store, history: ModelHistory, series: str | None, *, first_key: int | None,
    last_key: int | None, last: int | None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
    model = history.model
    predictors = list(model.predictors or ())
    columns = [*predictors, model.response]
    windows = store.windows(model.feed, columns, series=[series], up_to_key=last_key, last=last)
    if series not in windows.series:
        return None
    span = windows.rows_of(windows.series.index(series))
    values = windows.values[span]
    if first_key is not None:
        values = values[windows.period_key[span] >= first_key]
    return values[:, :-1], values[:, -1]


def baseline_coefficient(
    store: Store, history: ModelHistory, series: str | None, term: str
) -> tuple[float, float, float] | None:
    """(estimate, lower, upper) of ``term`` at the baseline: as the pass stored it with the latest
    fit, else refitted on the baseline rows in force; None when there is no baseline."""
    model = history.model
    if not model.fitted:
        return None
    latest = history.latest_fits.get(series)
    if latest is None:
        return None
    stored = latest.diagnostics.get("baseline")
    if isinstance(stored, dict) and isinstance(stored.get("coefficients"), dict):
        row = _term_row(FitRecord(**{**latest.__dict__, "coefficients": stored["coefficients"]}),
                        term)
        if row is not None:
            return row
    baseline = store.baseline(history.name, latest.version, series)
    if baseline is None:
        return None
    rows = _window_rows(store, history, series, first_key=baseline.start_key,
                        last_key=baseline.end_key, last=None)
    if rows is None or rows[1].size <= model.parameter_count + 1:
        return None
    fit = fit_ols(rows[0], rows[1], intercept=model.intercept, level=model.level,
                  names=list(model.predictors or ()))
    if not fit.estimable or term not in fit.terms:
        return None
    j = fit.terms.index(term)
    return float(fit.coef[j]), float(fit.lower[j]), float(fit.upper[j])


def coefficient_data(
    store: Store, history: ModelHistory, series: str | None, term: str
) -> CoefficientData | None:
    """``term`` across the series' refits, with the baseline's band; None with under 2 refits."""
    fits = fit_history(store, history, series)
    points = [(f, _term_row(f, term)) for f in fits]
    kept = [(fit, row) for fit, row in points if row is not None]
    if len(kept) < 2:
        return None
    array = np.array([row for _, row in kept], dtype=np.float64)
    latest = history.latest_fits.get(series)
    record = None if latest is None else store.baseline(history.name, latest.version, series)
    after = 0
    if record is not None:
        after = next((i for i, (fit, _) in enumerate(kept)
                      if fit.window_last_key is not None and fit.window_last_key > record.end_key),
                     len(kept))
    return CoefficientData(
        title=f"Coefficient on {term} at each refit, {series_label(series)}",
        term=term,
        periods=tuple(fit.window_last or str(fit.id) for fit, _ in kept),
        estimate=array[:, 0],
        lower=array[:, 1],
        upper=array[:, 2],
        level=history.model.level,
        baseline=baseline_coefficient(store, history, series, term),
        after_baseline=after,
        start_span=None if record is None else (record.start_period, record.end_period),
    )


def monitoring_data(
    store: Store, history: ModelHistory, series: str | None
) -> MonitoringData | None:
    """The monitoring path stored with the series' latest fit, or None when there is none. It is
    named by the last period monitoring started from, as the feed writes it."""
    fit = history.latest_fits.get(series)
    if fit is None:
        return None
    path = monitoring_arrays(fit.diagnostics)
    if path is None:
        return None
    record = store.baseline(history.name, fit.version, series)
    start_end = None if record is None else record.end_period
    since = "" if start_end is None else f" since {start_end}"
    return MonitoringData(
        title=f"Sequential monitoring{since}, {series_label(series)}",
        start_end=start_end,
        periods=path.periods,
        statistic=np.asarray(path.statistic, dtype=np.float64),
        boundary=np.asarray(path.boundary, dtype=np.float64),
        break_period=path.break_period,
    )


def scatter_data(store: Store, history: ModelHistory, series: str | None) -> ScatterData | None:
    """The latest fit's window refitted (one predictor only) with its line and bands."""
    model = history.model
    if not model.fitted or len(model.predictors or ()) != 1:
        return None
    fit_record = history.latest_fits.get(series)
    if fit_record is None or not fit_record.estimable:
        return None
    rows = _window_rows(store, history, series, first_key=fit_record.window_first_key,
                        last_key=fit_record.window_last_key, last=fit_record.n)
    if rows is None or rows[1].size <= model.parameter_count + 1:
        return None
    x, y = rows[0][:, 0], rows[1]
    fit = fit_ols(x[:, None], y, intercept=model.intercept, level=model.level,
                  names=list(model.predictors or ()))
    if not fit.estimable:
        return None
    predictor = (model.predictors or [""])[0]
    upcoming = [f for f in history.open_forecasts_of(series) if predictor in f.inputs]
    plan_x = np.array([f.inputs[predictor] for f in upcoming], dtype=np.float64)
    low = float(min(x.min(), plan_x.min() if plan_x.size else x.min()))
    high = float(max(x.max(), plan_x.max() if plan_x.size else x.max()))
    grid = np.linspace(low, high, GRID_POINTS)
    band = fit.predict(grid[:, None])
    own = fit.predict(x[:, None])
    outside = int(((y < own.lower) | (y > own.upper)).sum())
    return ScatterData(
        title=f"Current window: {model.response} against {predictor}, {series_label(series)}",
        predictor=predictor,
        response=model.response,
        x=x,
        y=y,
        grid=grid,
        fitted=band.point,
        lower=band.lower,
        upper=band.upper,
        mean_lower=band.mean_lower,
        mean_upper=band.mean_upper,
        level=model.level,
        r_squared=float(fit.r_squared),
        slope=float(fit.coef[-1]),
        outside=outside,
        plan_x=plan_x,
        plan_point=np.array([f.point for f in upcoming], dtype=np.float64),
        plan_lower=np.array([f.lower for f in upcoming], dtype=np.float64),
        plan_upper=np.array([f.upper for f in upcoming], dtype=np.float64),
    )


# Which chart best shows each kind of finding (beyond the actuals chart every flagged series gets).
KIND_CHART: dict[FindingKind, str] = {
    FindingKind.SLOPE_SHIFT: "coefficient",
    FindingKind.SIGNIFICANCE_LOST: "coefficient",
    FindingKind.SIGN_FLIP: "coefficient",
    FindingKind.STRUCTURAL_BREAK: "monitoring",
    FindingKind.EXTRAPOLATION: "scatter",
    FindingKind.WEAK_FIT: "scatter",
    FindingKind.HETEROSCEDASTICITY: "scatter",
}


__all__ = [
    "FORECAST_LOOKBACK",
    "KIND_CHART",
    "ModelHistories",
    "ModelHistory",
    "actuals_data",
    "baseline_coefficient",
    "coefficient_data",
    "fit_history",
    "hit_rate_data",
    "load_model",
    "monitoring_data",
    "scatter_data",
    "series_label",
]
