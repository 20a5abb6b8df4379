"""Benchmark: rendering the digest for a model with 1,000 series (run by hand; not a test).

Target (DESIGN.md section 11, issue 5): under 10 s. The database is populated synthetically but
through the Store API, as passes would: 1,000 invented stores (``per: store``), 60 weekly
periods, a batched refit (``fit_batch``) of each week's latest 52 rows, one forecast per series
per week with its prediction interval, every forecast scored when its actual arrives, and the
coverage and Durbin–Watson rules run on the last pass (so some dozens of series are flagged and
get charts, capped at 25 per model). Setting up takes a while; only the digest is timed.

    nice /work/venv/bin/python tests/benchmarks/bench_digest.py

Prints the time of each step, the total against the 10 s target, and the pages' sizes.
"""

from __future__ import annotations

import hashlib
import tempfile
import time
from datetime import UTC, date, datetime, timedelta
from datetime import time as clock_time
from pathlib import Path

import numpy as np

from monitor.config import load_config
from monitor.findings import autocorrelation_conditions, coverage_conditions
from monitor.notify import build_digest, digest_message, render_pass_report, write_digest
from monitor.notify.digest import render_digest_html
from monitor.notify.html import write_model_pages
from monitor.stats.coverage import audit_batch
from monitor.stats.diagnostics import breusch_godfrey_batch, durbin_watson_batch
from monitor.stats.errorcusum import error_cusum_batch, gaussian_scores
from monitor.stats.ols import fit_batch
from monitor.store import FileOutcome, FitRow, ForecastRow, ObservationRow, Store, date_period_key
from monitor.vocabulary import Finding, Outcome, classify_outcome

SERIES = 1_000
WEEKS = 60
WINDOW = 52
MIN_ROWS = 12
TARGET_SECONDS = 10.0
FIRST_WEEK = date(2024, 1, 7)

CONFIG = """\
database: state/plumbline.sqlite
timezone: Europe/Berlin
feeds:
  tills:
    inbox: feeds/tills/inbox
    period: week_ending
    cadence: 7d
    columns: [week_ending, store, footfall, basket_value]
models:
  basket_value:
    feed: tills
    response: basket_value
    predictors: [footfall]
    per: store
    level: 0.95
    window: 52
    owners: [retail@example.org]
notify:
  html_dir: reports
  email: {to: [retail@example.org], sender: plumbline@example.org, smtp_host: localhost}
"""


def _as_of(week: int) -> datetime:
    day = FIRST_WEEK + timedelta(days=7 * week + 1)
    return datetime.combine(day, clock_time(7, 0), tzinfo=UTC)


def populate(root: Path) -> Path:
    (root / "plumbline.yaml").write_text(CONFIG, encoding="utf-8")
    config = load_config(root / "plumbline.yaml")
    rng = np.random.default_rng(11)
    names = [f"store-{i:04d}" for i in range(SERIES)]
    footfall = rng.normal(500, 80, size=(SERIES, WEEKS + 1))
    noise = rng.normal(0, 10, size=(SERIES, WEEKS + 1))
    noise[:40, 45:] *= 3  # forty stores whose error spread triples late on
    basket = 20 + 0.4 * footfall + noise
    with Store.open(config.database) as store:
        store.record_model_version("basket_value", signature="v1",
                                   config={"response": "basket_value"}, created_at=_as_of(0))
        for week in range(WEEKS):
            at = _as_of(week)
            pass_id = store.record_pass(as_of=at, started_at=at).id
            period = (FIRST_WEEK + timedelta(days=7 * week)).isoformat()
            upcoming = (FIRST_WEEK + timedelta(days=7 * week + 7)).isoformat()
            key = date_period_key(date.fromisoformat(period))
            next_key = date_period_key(date.fromisoformat(upcoming))
            file = store.record_file(
                feed="tills", name=f"week_{period}.csv",
                sha256=hashlib.sha256(period.encode()).hexdigest(), size=1, received_at=at,
                outcome=FileOutcome.ARCHIVED, stored_path=root / period, pass_id=pass_id)
            rows = []
            for i, name in enumerate(names):
                rows.append(ObservationRow(name, period, key, False,
                                           (float(footfall[i, week]), float(basket[i, week])), 2))
                rows.append(ObservationRow(name, upcoming, next_key, True,
                                           (float(footfall[i, week + 1]), None), 3))
            store.insert_observations("tills", file.id, ("footfall", "basket_value"), rows)
            awaiting = store.forecasts_awaiting_outcome("basket_value", "basket_value")
            store.record_outcomes(pass_id, [
                Outcome(a.forecast_id, a.actual, classify_outcome(a.actual, a.lower, a.upper))
                for a in awaiting])
            first = max(0, week + 1 - WINDOW)
            if week + 1 < MIN_ROWS:
                store.finish_pass(pass_id, finished_at=at)
                continue
            x = footfall[:, first:week + 1, None]
            y = basket[:, first:week + 1]
            fit = fit_batch(x, y, level=0.95, names=["footfall"])
            dw = durbin_watson_batch(fit.residuals)
            bg = breusch_godfrey_batch(fit.residuals, x)
            window_first = (FIRST_WEEK + timedelta(days=7 * first)).isoformat()
            fits = [FitRow(
                model="basket_value", version=1, series=name, n=int(y.shape[1]), estimable=True,
                window_first=window_first,
                window_first_key=date_period_key(date.fromisoformat(window_first)),
                window_last=period, window_last_key=key,
                coefficients={term: {"estimate": float(fit.coef[i, j]),
                                     "standard_error": float(fit.standard_error[i, j]),
                                     "t": float(fit.t[i, j]), "p_value": float(fit.p_value[i, j]),
                                     "lower": float(fit.lower[i, j]),
                                     "upper": float(fit.upper[i, j])}
                              for j, term in enumerate(fit.terms)},
                inference={"r_squared": float(fit.r_squared[i]),
                           "residual_std_error": float(fit.residual_std_error[i]),
                           "residual_df": int(fit.residual_df[i]), "level": 0.95},
                diagnostics={"durbin_watson": float(dw.statistic[i])},
            ) for i, name in enumerate(names)]
            fit_ids = store.record_fits(pass_id, fits)
            plans = store.plan_rows_awaiting_forecast("tills", "basket_value", ["footfall"])
            # One open plan row per series, in series order (names sort as they are numbered).
            assert list(plans.series) == names
            prediction = fit.predict(plans.values[:, None, :1])
            forecasts = [ForecastRow(
                model="basket_value", feed="tills", series=series,
                target_period=plans.period[i], target_period_key=int(plans.period_key[i]),
                issued_at=at, lead=1, point=float(prediction.point[i, 0]),
                lower=float(prediction.lower[i, 0]), upper=float(prediction.upper[i, 0]),
                level=0.95, mean_lower=float(prediction.mean_lower[i, 0]),
                mean_upper=float(prediction.mean_upper[i, 0]),
                leverage=float(prediction.leverage[i, 0]), fit_id=fit_ids[i], version=1,
                observation_id=int(plans.observation_id[i]),
                inputs={"footfall": float(plans.values[i, 0])},
            ) for i, series in enumerate(plans.series)]
            store.record_forecasts(pass_id, forecasts)
            if week == WEEKS - 1:
                scored = store.scored_forecasts("basket_value", last=26)
                groups = {name: i for i, name in enumerate(names)}
                codes = np.array([groups[s] for s in scored.series])  # type: ignore[index]
                batch = audit_batch(codes, scored.actual, scored.lower, scored.upper, 0.95)
                missed = (scored.actual < scored.lower) | (scored.actual > scored.upper)
                scores = gaussian_scores(scored.actual, scored.point, scored.lower,
                                         scored.upper, 0.95)
                chart = error_cusum_batch(codes, scores, missed, 104)
                thresholds = config.models["basket_value"].thresholds
                since = [None] * SERIES
                conditions = coverage_conditions("basket_value", names, batch, chart, thresholds,
                                                 since)
                conditions += autocorrelation_conditions("basket_value", names, dw.statistic,
                                                         bg.p_value, thresholds, since)
                for c in conditions:
                    if c.holds:
                        store.upsert_finding(Finding(
                            c.key.model, c.key.series, c.key.feed, c.key.kind, c.severity,
                            c.since_period, c.statistic, c.p_value, c.message, c.action),
                            pass_id=pass_id, at=at)
            store.finish_pass(pass_id, finished_at=at)
    return root / "plumbline.yaml"


def main() -> None:
    with tempfile.TemporaryDirectory() as folder:
        root = Path(folder)
        start = time.perf_counter()
        config_path = populate(root)
        setup = time.perf_counter() - start
        config = load_config(config_path)
        with Store.open(config.database) as store:
            counts = store.table_counts()
            flagged = len({f.series for f in store.open_findings()})
            steps: list[tuple[str, float]] = []
            start = time.perf_counter()
            digest = build_digest(store, config)
            steps.append(("build_digest (content)", time.perf_counter() - start))
            start = time.perf_counter()
            html, charts = render_digest_html(digest)
            steps.append((f"HTML with {len(charts)} inline SVG charts",
                          time.perf_counter() - start))
            start = time.perf_counter()
            message = digest_message(digest)
            steps.append((f"e-mail form, {len(message.images)} PNG charts",
                          time.perf_counter() - start))
            digest_total = sum(seconds for _, seconds in steps)
            start = time.perf_counter()
            path = write_digest(store, config, digest=digest, record=False)
            written = time.perf_counter() - start
            start = time.perf_counter()
            (model_page,) = write_model_pages(store, config)
            model_seconds = time.perf_counter() - start
            start = time.perf_counter()
            render_pass_report(store, config, store.latest_pass().id,  # type: ignore[union-attr]
                               write_models=False)
            pass_seconds = time.perf_counter() - start
        print(f"database: {SERIES} series x {WEEKS} weeks; {counts['fits']} fits, "
              f"{counts['forecasts']} forecasts, {counts['outcomes']} outcomes, "
              f"{counts['findings']} findings on {flagged} series (setup {setup:.1f} s)")
        for label, seconds in steps:
            print(f"  {label:<40} {seconds:7.2f} s")
        print(f"digest total (content + HTML + e-mail):   {digest_total:7.2f} s  (target "
              f"{TARGET_SECONDS:.0f} s; ratio to target {digest_total / TARGET_SECONDS:.2f})")
        print(f"write_digest (page + index + model page): {written:7.2f} s, "
              f"{len(html) / 1e6:.2f} MB page at {path.name}")
        print(f"model page of the 1,000-series model:     {model_seconds:7.2f} s, "
              f"{model_page.stat().st_size / 1e6:.2f} MB")
        print(f"pass page (no model pages):               {pass_seconds:7.2f} s")


if __name__ == "__main__":
    main()
