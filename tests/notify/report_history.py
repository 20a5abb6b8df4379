"""A small, realistic Plumbline database for the report tests, built through the Store API.

Two invented models over 60 weekly passes (every name and number is made up):

- ``pick_hours`` (feed ``warehouse``, no ``per:``, 95 % intervals): pick hours on order lines;
  from week 40 the error spread triples, so coverage falls and a ``coverage`` finding is raised
  by the real rule (``monitor.findings.coverage_conditions``) on the real audit.
- ``delivery_hours`` (feed ``depots``, ``per: depot``, 90 % intervals): three depots, ``North``,
  ``South`` and one named ``<script>alert(1)</script>``. South's slope on drops doubles from week
  30, and the real sequential monitoring (``monitor.stats.monitoring``) raises a
  ``structural_break``; week 55 brings a plan row for North far outside its fitted range
  (``extrapolation``); week 50 rejects a file named ``<img src=x onerror=alert(1)>.csv``
  (``rejected_input`` on the feed, cleared two passes later).

Each week: a pass at Monday 07:00 UTC; the week's actuals and next week's plan rows are ingested;
forecasts awaiting their actuals are scored; each series is refitted on its latest 52 rows
(``fit_ols``), with its diagnostics and monitoring path stored; every plan row is forecast; the
findings rules run and the lifecycle follows ``plan_transitions``. A digest is recorded at week
52, and ``pick_hours`` becomes version 2 at week 56 (its predictors changed).

``scored_log`` keeps every scoring as it was done, for independent counts in the tests.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path

import numpy as np

from monitor.config import PlumblineConfig, load_config
from monitor.findings import (
    Condition,
    RejectedInput,
    autocorrelation_conditions,
    coverage_conditions,
    extrapolation_conditions,
    rejected_input_conditions,
    structural_break_conditions,
)
from monitor.passes import baseline_rows
from monitor.stats.coverage import audit_batch
from monitor.stats.diagnostics import (
    breusch_godfrey,
    breusch_pagan,
    durbin_watson,
    jarque_bera,
)
from monitor.stats.errorcusum import error_cusum_batch, gaussian_scores
from monitor.stats.monitoring import monitor, start_monitoring
from monitor.stats.ols import fit_ols
from monitor.store import (
    BaselineRow,
    FileOutcome,
    FitRow,
    ForecastRow,
    ObservationRow,
    Store,
    date_period_key,
)
from monitor.vocabulary import Finding, Outcome, classify_outcome

WEEKS = 60
FIRST_WEEK = date(2024, 1, 7)  # a Sunday; periods are week endings
BASELINE_ROWS = 20
WINDOW = 52
SCRIPT_SERIES = "<script>alert(1)</script>"
IMG_FILE = "<img src=x onerror=alert(1)>.csv"
DEPOTS = ("North", "South", SCRIPT_SERIES)
DIGEST_WEEK = 52
VERSION_WEEK = 56

CONFIG_TEXT = """\
database: state/plumbline.sqlite
timezone: Europe/Berlin
feeds:
  warehouse:
    inbox: feeds/warehouse/inbox
    period: week_ending
    cadence: 7d
    columns: [week_ending, order_lines, pick_hours]
  depots:
    inbox: feeds/depots/inbox
    period: week_ending
    cadence: 7d
    columns: [week_ending, depot, drops, delivery_hours]
models:
  pick_hours:
    feed: warehouse
    response: pick_hours
    predictors: [order_lines]
    level: 0.95
    window: 52
    recent: 13
    owners: [warehouse@example.org]
  delivery_hours:
    feed: depots
    response: delivery_hours
    predictors: [drops]
    per: depot
    level: 0.90
    window: 52
    recent: 13
    owners: [depots@example.org, warehouse@example.org]
notify:
  html_dir: reports
  email:
    to: [planning@example.org]
    sender: plumbline@example.org
    smtp_host: localhost
"""


@dataclass
class History:
    root: Path
    config: PlumblineConfig
    pass_ids: list[int] = field(default_factory=list)
    scored_log: list[tuple[str, str | None, str, float, float, float]] = field(
        default_factory=list
    )  # (model, series, target period, actual, lower, upper)

    @property
    def database(self) -> Path:
        return Path(self.config.database)

    def open(self) -> Store:
        return Store.open(self.database)


def week_ending(week: int) -> date:
    return FIRST_WEEK + timedelta(days=7 * week)


def as_of(week: int) -> datetime:
    return datetime.combine(week_ending(week) + timedelta(days=1), time(7, 0), tzinfo=UTC)


@dataclass
class _Series:
    model: str
    feed: str
    series: str | None
    predictor: str
    response: str
    level: float
    x: list[float] = field(default_factory=list)
    y: list[float] = field(default_factory=list)
    periods: list[str] = field(default_factory=list)


def _generate(rng: np.random.Generator, week: int,
              planned: dict[tuple[str, str | None], float]) -> dict[tuple[str, str | None], tuple]:
    """This week's actual (x, y) and next week's planned x, per (model, series). The actual x is
    what was planned for the week (the plan row), so forecast errors are the model's own."""
    out: dict[tuple[str, str | None], tuple] = {}
    lines = planned.get(("pick_hours", None), float(rng.normal(4000, 600)))
    spread = 60.0 if week < 40 else 180.0
    hours = 120 + 0.08 * lines + float(rng.normal(0, spread))
    out[("pick_hours", None)] = (lines, hours, float(rng.normal(4000, 600)))
    for depot in DEPOTS:
        drops = planned.get(("delivery_hours", depot), float(rng.normal(300, 40)))
        slope = 0.5 if not (depot == "South" and week >= 30) else 1.0
        base = {"North": 20.0, "South": 35.0}.get(depot, 25.0)
        deliveries = base + slope * drops + float(rng.normal(0, 8))
        plan = float(rng.normal(300, 40))
        if depot == "North" and week == 55:
            plan = 900.0  # far outside the fitted range
        out[("delivery_hours", depot)] = (drops, deliveries, plan)
    return out


def _fit_json(fit, predictor: str) -> tuple[dict, dict]:
    coefficients = {
        term: {
            "estimate": float(fit.coef[j]), "standard_error": float(fit.standard_error[j]),
            "t": float(fit.t[j]), "p_value": float(fit.p_value[j]),
            "lower": float(fit.lower[j]), "upper": float(fit.upper[j]),
        }
        for j, term in enumerate(fit.terms)
    }
    inference = {
        "r_squared": float(fit.r_squared), "adj_r_squared": float(fit.adj_r_squared),
        "residual_std_error": float(fit.residual_std_error), "residual_df": int(fit.residual_df),
        "f_statistic": fit.f_statistic, "f_p_value": fit.f_p_value, "level": float(fit.level),
        "exact_fit": bool(fit.exact_fit),
    }
    return coefficients, inference


def build_history(root: Path, *, weeks: int = WEEKS, seed: int = 20240107) -> History:
    """Write the config into ``root`` and replay ``weeks`` passes into a fresh database."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "plumbline.yaml").write_text(CONFIG_TEXT, encoding="utf-8")
    config = load_config(root / "plumbline.yaml")
    history = History(root, config)
    rng = np.random.default_rng(seed)
    series = {("pick_hours", None): _Series("pick_hours", "warehouse", None, "order_lines",
                                            "pick_hours", 0.95)}
    for depot in DEPOTS:
        series[("delivery_hours", depot)] = _Series(
            "delivery_hours", "depots", depot, "drops", "delivery_hours", 0.90)
    columns = {"warehouse": ("order_lines", "pick_hours"), "depots": ("drops", "delivery_hours")}
    baselines: dict[tuple[str, str | None], tuple[int, int]] = {}
    planned: dict[tuple[str, str | None], float] = {}
    with Store.open(config.database) as store:
        for name, model in config.models.items():
            predictors = ["order_lines", "pallets"] if name == "pick_hours" else model.predictors
            store.record_model_version(
                name, signature=f"{name}-1",
                config={"response": model.response, "predictors": predictors, "per": model.per,
                        "intercept": True},
                created_at=as_of(0),
            )
        for week in range(weeks):
            clock = as_of(week)
            record = store.record_pass(as_of=clock, started_at=clock)
            pass_id = record.id
            history.pass_ids.append(pass_id)
            store.mark_new_findings_ongoing(pass_id)
            if week == VERSION_WEEK:
                store.record_model_version(
                    "pick_hours", signature="pick_hours-2",
                    config={"response": "pick_hours", "predictors": ["order_lines"],
                            "per": None, "intercept": True},
                    created_at=clock,
                )
            if week == DIGEST_WEEK:
                store.record_digest(period_end=clock, created_at=clock, pass_id=pass_id)
            data = _generate(rng, week, planned)
            planned = {k: v[2] for k, v in data.items()}
            period = week_ending(week).isoformat()
            next_period = week_ending(week + 1).isoformat()
            key = date_period_key(week_ending(week))
            next_key = date_period_key(week_ending(week + 1))
            for feed in ("warehouse", "depots"):
                name = f"week_{period}.csv"
                file = store.record_file(
                    feed=feed, name=name,
                    sha256=hashlib.sha256(f"{feed}{name}".encode()).hexdigest(),
                    size=100, received_at=clock, outcome=FileOutcome.ARCHIVED,
                    stored_path=root / "feeds" / feed / "archive" / name, pass_id=pass_id,
                )
                rows = []
                line = 2
                for (model, ser), (x, y, plan_x) in data.items():
                    if series[(model, ser)].feed != feed:
                        continue
                    rows.append(ObservationRow(ser, period, key, False, (x, y), line))
                    rows.append(ObservationRow(ser, next_period, next_key, True, (plan_x, None),
                                               line + 1))
                    line += 2
                store.insert_observations(feed, file.id, columns[feed], rows)
                store.mark_file_moved(file.id, at=clock)
                for (model, ser), (x, y, _planned) in data.items():
                    s = series[(model, ser)]
                    if s.feed == feed:
                        s.x.append(x)
                        s.y.append(y)
                        s.periods.append(period)
            _score(store, history, config, pass_id)
            fit_ids = _refit(store, config, series, baselines, pass_id, week, clock)
            _forecast(store, config, series, fit_ids, pass_id, clock)
            _findings(store, config, series, baselines, pass_id, week, clock, fit_ids)
            store.finish_pass(pass_id, finished_at=clock + timedelta(minutes=1),
                              counts={"files": 2, "series_refitted": len(fit_ids)})
    return history


def _score(store: Store, history: History, config: PlumblineConfig, pass_id: int) -> None:
    for name, model in config.models.items():
        awaiting = store.forecasts_awaiting_outcome(name, model.response)
        outcomes = [Outcome(a.forecast_id, a.actual, classify_outcome(a.actual, a.lower, a.upper))
                    for a in awaiting]
        store.record_outcomes(pass_id, outcomes)
        history.scored_log += [(name, a.series, a.target_period, a.actual, a.lower, a.upper)
                               for a in awaiting]


def _monitoring(s: _Series, start: int) -> dict | None:
    x = np.asarray(s.x)
    y = np.asarray(s.y)
    if x.size <= start + 1:
        return None
    state = start_monitoring(x[None, :start, None], y[None, :start])
    result = monitor(state, x[None, start:, None], y[None, start:], alpha=0.05)
    used = result.monitored_rows[0]
    periods = [p for p, u in zip(s.periods[start:], used, strict=True) if u]
    crossed = bool(result.crossed[0])
    brk = int(result.break_index[0])
    return {
        "statistic": float(result.statistic[0]),
        "max_ratio": float(result.max_ratio[0]),
        "p_value": float(result.p_value[0]),
        "crossed": crossed,
        "periods_monitored": int(result.periods_monitored[0]),
        "break_period": s.periods[start + brk] if crossed and brk >= 0 else None,
        "path": {
            "periods": periods,
            "cusum": [float(v) for v, u in zip(result.cusum_path[0], used, strict=True) if u],
            "boundary": [float(v) for v, u in zip(result.boundary_path[0], used, strict=True)
                         if u],
        },
    }


def _refit(store, config, series, baselines, pass_id, week, clock) -> dict:
    rows = []
    order = []
    for (model, ser), s in series.items():
        if len(s.y) < 10:
            continue
        x = np.asarray(s.x[-WINDOW:])
        y = np.asarray(s.y[-WINDOW:])
        periods = s.periods[-WINDOW:]
        fit = fit_ols(x[:, None], y, level=s.level, names=[s.predictor])
        coefficients, inference = _fit_json(fit, s.predictor)
        residuals = fit.residuals
        bg = breusch_godfrey(residuals, x[:, None])
        diagnostics = {
            "durbin_watson": durbin_watson(residuals).statistic,
            "breusch_godfrey": {"statistic": bg.statistic, "p_value": bg.p_value},
            "breusch_pagan": {"statistic": breusch_pagan(residuals, x[:, None]).statistic,
                              "p_value": breusch_pagan(residuals, x[:, None]).p_value},
            "jarque_bera": {"statistic": jarque_bera(residuals).statistic,
                            "p_value": jarque_bera(residuals).p_value},
        }
        if (model, ser) not in baselines and len(s.y) >= BASELINE_ROWS:
            baselines[(model, ser)] = (0, BASELINE_ROWS)
            first, last = s.periods[0], s.periods[BASELINE_ROWS - 1]
            store.set_baselines([BaselineRow(
                model, store.current_model_version(model).version, ser, first,
                date_period_key(date.fromisoformat(first)), last,
                date_period_key(date.fromisoformat(last)), "auto",
            )], created_at=clock, pass_id=pass_id)
        if (model, ser) in baselines:
            base = fit_ols(np.asarray(s.x[:BASELINE_ROWS])[:, None],
                           np.asarray(s.y[:BASELINE_ROWS]), level=s.level, names=[s.predictor])
            base_coefficients, _ = _fit_json(base, s.predictor)
            diagnostics["baseline"] = {"r_squared": float(base.r_squared),
                                       "coefficients": base_coefficients}
            path = _monitoring(s, BASELINE_ROWS)
            if path is not None:
                diagnostics["monitoring"] = path
        rows.append(FitRow(
            model=model, version=store.current_model_version(model).version, series=ser,
            n=int(y.size), estimable=True, window_first=periods[0],
            window_first_key=date_period_key(date.fromisoformat(periods[0])),
            window_last=periods[-1],
            window_last_key=date_period_key(date.fromisoformat(periods[-1])),
            coefficients=coefficients, inference=inference, diagnostics=diagnostics,
        ))
        order.append(((model, ser), fit, x))
    ids = store.record_fits(pass_id, rows)
    return {key: (fit_id, fit, x) for (key, fit, x), fit_id in zip(order, ids, strict=True)}


def _forecast(store, config, series, fit_ids, pass_id, clock) -> None:
    for name, model in config.models.items():
        plans = store.plan_rows_awaiting_forecast(model.feed, name, model.predictors)
        rows = []
        for i, ser in enumerate(plans.series):
            if (name, ser) not in fit_ids:
                continue
            fit_id, fit, x = fit_ids[(name, ser)]
            value = float(plans.values[i, 0])
            prediction = fit.predict(np.array([[value]]))
            rows.append(ForecastRow(
                model=name, feed=model.feed, series=ser, target_period=plans.period[i],
                target_period_key=int(plans.period_key[i]), issued_at=clock, lead=1,
                point=float(prediction.point[0]), lower=float(prediction.lower[0]),
                upper=float(prediction.upper[0]), level=model.level,
                mean_lower=float(prediction.mean_lower[0]),
                mean_upper=float(prediction.mean_upper[0]),
                leverage=float(prediction.leverage[0]),
                extrapolation=bool(value < x.min() or value > x.max()), fit_id=fit_id,
                version=store.current_model_version(name).version,
                observation_id=int(plans.observation_id[i]), inputs={model.predictors[0]: value},
            ))
        store.record_forecasts(pass_id, rows)


def _apply(store: Store, conditions: list[Condition], pass_id: int, clock: datetime,
           clear_after: int = 2) -> None:
    """The lifecycle as the store keeps it: upsert what holds, count what lapsed."""
    for c in conditions:
        if c.holds:
            store.upsert_finding(Finding(c.key.model, c.key.series, c.key.feed, c.key.kind,
                                         c.severity, c.since_period, c.statistic, c.p_value,
                                         c.message, c.action), pass_id=pass_id, at=clock)
            continue
        for record in store.open_findings(model=c.key.model, feed=c.key.feed, kind=c.key.kind):
            if record.series == c.key.series and (c.key.model is not None or
                                                  record.model is None):
                store.mark_finding_absent(record.id, pass_id=pass_id, at=clock,
                                          clear_after=clear_after)


def _findings(store, config, series, baselines, pass_id, week, clock, fit_ids) -> None:
    conditions: list[Condition] = []
    thresholds = config.models["pick_hours"].thresholds
    scored = store.scored_forecasts("pick_hours")
    if len(scored):
        one = np.zeros(len(scored), np.int64)
        batch = audit_batch(one, scored.actual, scored.lower, scored.upper, 0.95, last=26)
        missed = (scored.actual < scored.lower) | (scored.actual > scored.upper)
        model = config.models["pick_hours"]
        horizon = model.horizon if model.horizon is not None else 2 * baseline_rows(model)
        scores = gaussian_scores(scored.actual, scored.point, scored.lower, scored.upper, 0.95)
        chart = error_cusum_batch(one, scores, missed, horizon, last=horizon)
        start = int(chart.start_row[0])
        conditions += coverage_conditions("pick_hours", [None], batch, chart, thresholds,
                                          [scored.target_period[start] if start >= 0 else None])
    dws, bgs, names = [], [], []
    for (model, ser), (_fit_id, fit, x) in fit_ids.items():
        if model == "pick_hours":
            dws.append(durbin_watson(fit.residuals).statistic or math.nan)
            bgs.append(breusch_godfrey(fit.residuals, x).p_value or math.nan)
            names.append(ser)
    conditions += autocorrelation_conditions("pick_hours", names, dws, bgs, thresholds,
                                             [None] * len(names))
    depot_names = [d for d in DEPOTS if ("delivery_hours", d) in baselines]
    p_values, ratio, brk, evaluated = [], [], [], []
    for depot in depot_names:
        path = _monitoring(series[("delivery_hours", depot)], BASELINE_ROWS)
        evaluated.append(path is not None)
        p_values.append(path["p_value"] if path else math.nan)
        ratio.append(path["max_ratio"] if path else math.nan)
        brk.append(path["break_period"] if path else None)
    conditions += structural_break_conditions("delivery_hours", depot_names, p_values, ratio,
                                              brk, evaluated, thresholds)
    plans = [f for f in store.list_forecasts(model="delivery_hours", pass_id=pass_id)]
    flagged = [any(f.extrapolation for f in plans if f.series == d) for d in depot_names]
    first = [next((f.target_period for f in plans if f.series == d and f.extrapolation), None)
             for d in depot_names]
    leverage = [max((f.leverage or 0.0 for f in plans if f.series == d), default=math.nan)
                for d in depot_names]
    conditions += extrapolation_conditions("delivery_hours", depot_names, flagged,
                                           [True] * len(depot_names), first, leverage)
    rejections = []
    if week == 50:
        rejections.append(RejectedInput("depots", IMG_FILE, True, False, 0,
                                        "line 1: no header row"))
    conditions += rejected_input_conditions(["warehouse", "depots"], rejections)
    _apply(store, conditions, pass_id, clock)


def copy_history(history: History, dest: Path) -> History:
    """A private copy of a built history (the database is closed, so one file holds it)."""
    import shutil

    shutil.copytree(history.root, dest)
    copy = History(dest, load_config(dest / "plumbline.yaml"))
    copy.pass_ids = list(history.pass_ids)
    copy.scored_log = list(history.scored_log)
    return copy

