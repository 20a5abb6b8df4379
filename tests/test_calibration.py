"""The calibrated interval in a real pass (``interval_method: calibrated``; monitor/calibration.py).

Invented, seeded scenario: one feed, one file a week for WEEKS weeks (that week's actual and next
week's plan row), ``hours = 5 + 0.5 lines + e`` with an error sd that grows towards 8 after the
baseline, so the model's own interval falls short. Two models read the same columns: ``own``
(the default, ``interval_method: model``) and ``calibrated``. One pass per week.

What is checked:
- the default model stores no calibrated interval, and the schema default is ``model``;
- the calibrated model stores none until a series has MIN_SCORES scored forecasts, then one for
  every forecast, equal to point ± q·h with q recomputed here from the stored history by
  ``adaptive_conformal`` (Gibbs & Candès 2021) — the pass's wiring (order, scale, warm-up);
- its model-own bounds equal the default model's (the calibrated interval is beside, not instead);
- over the weeks after the warm-up, the calibrated interval misses less often than the model's
  own, which falls short as the variance grows.
"""

from __future__ import annotations

import csv
import io
import json
import math

import numpy as np
import pytest
from _workspace import Workspace, config_yaml, csv_bytes, delivered, feed_yaml, week_ending

from monitor.audit import CALIBRATED_COLUMNS, audit_models
from monitor.calibration import GAMMA, MIN_SCORES, WINDOW, Calibration
from monitor.cli import main
from monitor.config import load_config
from monitor.stats.conformal import adaptive_conformal
from monitor.store import Store

WEEKS = 90
SEED = 20261202
COLUMNS = ("week_ending", "lines", "hours")


def _config() -> str:
    common = ["feed: shop", "response: hours", "predictors: [lines]", "window: 30",
              "recent: 26", "min_rows: 10"]
    return config_yaml(
        [feed_yaml("shop", COLUMNS)],
        [
            "\n".join(["  own:", *(f"    {line}" for line in common)]),
            "\n".join(["  calibrated:", *(f"    {line}" for line in common),
                       "    interval_method: calibrated"]),
        ],
    )


def _replay(workspace: Workspace) -> None:
    rng = np.random.default_rng(SEED)
    lines = rng.uniform(20, 80, WEEKS + 1).round(1)
    sd = np.where(np.arange(WEEKS + 1) < 30, 1.0, np.linspace(1.0, 8.0, WEEKS + 1))
    hours = (5 + 0.5 * lines + rng.standard_normal(WEEKS + 1) * sd).round(3)
    for week in range(1, WEEKS + 1):
        rows = [
            (week_ending(week).isoformat(), lines[week - 1], hours[week - 1]),
            (week_ending(week + 1).isoformat(), lines[week], None),  # next week's plan row
        ]
        workspace.drop("shop", f"week_{week:03d}.csv", csv_bytes(COLUMNS, rows))
        workspace.run(delivered(week))


@pytest.fixture(scope="module")
def replayed(tmp_path_factory: pytest.TempPathFactory) -> Workspace:
    workspace = Workspace.create(tmp_path_factory.mktemp("calibrated") / "ws", _config())
    _replay(workspace)
    return workspace


def test_calibrated_interval_beside_the_models_own(replayed: Workspace) -> None:
    workspace = replayed
    assert load_config(workspace.config_path).models["own"].interval_method == "model"

    own = workspace.query(
        "SELECT target_period_key, point, lower, upper, calibrated_lower, calibrated_upper, "
        "calibrated_factor FROM forecasts WHERE model = 'own' ORDER BY target_period_key")
    assert own and all(row[4] is None and row[5] is None and row[6] is None for row in own)

    rows = workspace.query(
        "SELECT f.target_period_key, f.point, f.lower, f.upper, f.calibrated_lower, "
        "f.calibrated_upper, f.calibrated_factor, f.pass_id, o.actual, o.pass_id "
        "FROM forecasts AS f LEFT JOIN outcomes AS o ON o.forecast_id = f.id "
        "WHERE f.model = 'calibrated' ORDER BY f.target_period_key")
    # Same model, same data: the model's own bounds are the default model's, to the bit.
    assert [r[:4] for r in rows] == [r[:4] for r in own]

    issued = 0
    for i, (_key, point, lower, upper, c_lower, c_upper, factor, pass_id, _a, _p) in enumerate(
            rows):
        # What the pass knew when it issued forecast i: the forecasts scored by then.
        history = [r for r in rows[:i] if r[9] is not None and r[9] <= pass_id]
        if len(history) < MIN_SCORES:
            assert c_lower is None and c_upper is None and factor is None
            continue
        scores = [abs(r[8] - r[1]) / ((r[3] - r[2]) / 2) for r in history]
        expected = adaptive_conformal(np.array(scores), 0.95, gamma=GAMMA, window=WINDOW,
                                      min_scores=MIN_SCORES)
        q = expected.next_quantile
        assert q is not None
        if math.isinf(q):
            q = expected.next_widest
        assert factor == q
        half = (upper - lower) / 2
        assert math.isclose(c_lower, point - q * half, rel_tol=1e-12)
        assert math.isclose(c_upper, point + q * half, rel_tol=1e-12)
        assert Calibration(q, len(history), False, None).bounds(point, lower, upper) == (
            c_lower, c_upper)
        issued += 1
    assert issued >= WEEKS - 30 - MIN_SCORES

    scored = [r for r in rows if r[8] is not None and r[4] is not None]
    own_misses = sum(not (r[2] <= r[8] <= r[3]) for r in scored)
    calibrated_misses = sum(not (r[4] <= r[8] <= r[5]) for r in scored)
    assert own_misses > calibrated_misses
    assert own_misses / len(scored) > 0.10  # the model's own falls short as the variance grows


def _scored(workspace: Workspace, model: str) -> list[tuple]:
    return workspace.query(
        "SELECT o.actual, f.lower, f.upper, f.calibrated_lower, f.calibrated_upper "
        "FROM forecasts AS f JOIN outcomes AS o ON o.forecast_id = f.id WHERE f.model = ? "
        "ORDER BY f.target_period_key", (model,))


def test_audit_shows_both_intervals_side_by_side(
    replayed: Workspace, capsys: pytest.CaptureFixture[str]
) -> None:
    workspace = replayed
    config = workspace.config
    with Store.open(workspace.database, readonly=True) as store:
        records = audit_models(store, config)
        last = audit_models(store, config, last=26)
    own_record = next(r for r in records if r["model"] == "own")
    cal_record = next(r for r in records if r["model"] == "calibrated")
    assert not any(column in own_record for column in CALIBRATED_COLUMNS)
    assert all(column in cal_record for column in CALIBRATED_COLUMNS)
    rows = _scored(workspace, "calibrated")
    with_cal = [r for r in rows if r[3] is not None]
    # Counted here from the database, not from the audit's code.
    assert cal_record["scored"] == len(rows)
    assert cal_record["hits"] == sum(r[1] <= r[0] <= r[2] for r in rows)
    assert cal_record["calibrated_scored"] == len(with_cal)
    assert cal_record["calibrated_hits"] == sum(r[3] <= r[0] <= r[4] for r in with_cal)
    assert cal_record["calibrated_misses_high"] == sum(r[0] > r[4] for r in with_cal)
    widths = [r[4] - r[3] for r in with_cal]
    assert cal_record["calibrated_mean_width"] == pytest.approx(sum(widths) / len(widths))
    latest = next(r for r in last if r["model"] == "calibrated")
    assert latest["calibrated_scored"] == 26

    capsys.readouterr()
    assert main(["audit", "-c", str(workspace.config_path)]) == 0
    table = capsys.readouterr().out
    words = " ".join(table.split())
    assert "Calibrated intervals (rows marked calibrated):" in words
    assert "95 % calibrated intervals" in words
    assert "comes from the model's own recent forecast errors" in words
    assert "  calibrated  " in table
    assert main(["audit", "-c", str(workspace.config_path), "--format", "csv"]) == 0
    reader = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    by_model = {row["model"]: row for row in reader}
    assert by_model["calibrated"]["calibrated_scored"] == str(len(with_cal))
    assert by_model["own"]["calibrated_scored"] == ""
    assert main(["audit", "-c", str(workspace.config_path), "--format", "json",
                 "--model", "own"]) == 0
    assert "calibrated_scored" not in json.loads(capsys.readouterr().out)[0]


def test_coverage_finding_names_the_interval_that_fell_short(replayed: Workspace) -> None:
    found = {model: (message, holds) for model, message, holds in replayed.query(
        "SELECT model, message, state <> 'cleared' FROM findings WHERE kind = 'coverage' "
        "ORDER BY id")}
    own_message, _ = found["own"]
    message, _ = found["calibrated"]
    assert own_message.endswith("narrower than the errors they meet.")
    assert message.startswith(("The model's intervals fell short; the calibrated ones held",
                               "Both the model's intervals and the calibrated ones fell short"))
    assert "inside the calibrated intervals issued beside them" in message


def test_pages_and_digest_show_both_intervals(replayed: Workspace) -> None:
    from monitor.audit import CALIBRATED_LINE
    from monitor.notify.digest import build_digest, render_digest_html, render_digest_text
    from monitor.notify.html import build_model_page, render_model_page

    config = replayed.config
    with Store.open(replayed.database, readonly=True) as store:
        page = build_model_page(store, config, "calibrated")
        plain = build_model_page(store, config, "own")
        digest = build_digest(store, config)
    sentences = [line.sentence for line in page.coverage_sentences]
    assert any(s.startswith("Calibrated intervals over the latest 13 scored periods: ")
               for s in sentences)
    assert sentences[-1] == CALIBRATED_LINE
    assert [r.series for r in page.coverage_rows] == ["whole model",
                                                      "whole model, calibrated interval"]
    assert not any("alibrated" in line.sentence for line in plain.coverage_sentences)
    html = render_model_page(page, clock=None)
    assert "whole model, calibrated interval" in html and "recent forecast errors" in html
    # The forecasts awaiting their actuals show the calibrated interval beside the model's.
    assert page.forecasts and all(f.calibrated for f in page.forecasts)
    assert "<th>calibrated interval</th>" in html
    assert "<th>calibrated interval</th>" not in render_model_page(plain, clock=None)
    by_model = {c.model: c for c in digest.coverage}
    assert by_model["own"].calibrated == ()
    assert by_model["calibrated"].calibrated[-1] == CALIBRATED_LINE
    text = " ".join(render_digest_text(digest).split())
    assert "Calibrated intervals over the latest 52 scored periods:" in text
    assert CALIBRATED_LINE in text
    assert "Calibrated intervals over the latest 13" in render_digest_html(digest)[0]


def test_calibrations_from_scored_columns() -> None:
    # Two series interleaved row by row, one with a zero-width interval, and one absent: each
    # series' scores are its own, in order; zero width gives no score.
    from monitor.calibration import calibrations
    from monitor.store import ScoredForecasts
    from monitor.vocabulary import OutcomeKind

    rng = np.random.default_rng(5)
    n = 60
    series = tuple(["a"] * n + ["b"] * n)
    actual = rng.standard_normal(2 * n)
    point = np.zeros(2 * n)
    half = np.concatenate([np.full(n, 2.0), np.full(n, 1.0)])
    half[n + 3] = 0.0  # b's fourth forecast: an exact fit
    mix = np.ravel(np.column_stack([np.arange(n), np.arange(n, 2 * n)]))  # a, b, a, b, …
    scored = ScoredForecasts(
        forecast_id=np.arange(2 * n), model=("m",) * (2 * n),
        series=tuple(series[i] for i in mix),
        target_period=tuple(str(i) for i in range(2 * n)),
        target_period_key=np.arange(2 * n), lead=np.ones(2 * n, dtype=np.int64),
        issued_at=("",) * (2 * n), actual=actual[mix], point=point[mix],
        lower=(point - half)[mix], upper=(point + half)[mix], level=np.full(2 * n, 0.9),
        outcome=(OutcomeKind.HIT,) * (2 * n))
    out = calibrations(scored, ["b", "a", "c"], 0.9)
    a = adaptive_conformal(np.abs(actual[:n]) / 2.0, 0.9, gamma=GAMMA, window=WINDOW,
                           min_scores=MIN_SCORES)
    b_scores = np.abs(actual[n:]) / 1.0
    b = adaptive_conformal(np.delete(b_scores, 3), 0.9, gamma=GAMMA, window=WINDOW,
                           min_scores=MIN_SCORES)
    assert out["a"].factor == a.next_quantile and out["a"].scored == n
    assert out["b"].factor == b.next_quantile and out["b"].scored == n - 1
    assert out["c"].factor is None and out["c"].reason is not None
    assert out["c"].bounds(1.0, 0.0, 2.0) is None
    assert out["a"].bounds(10.0, 8.0, 12.0) == (10.0 - 2 * a.next_quantile,
                                                10.0 + 2 * a.next_quantile)


def test_forecasts_and_exports_carry_the_calibrated_interval(
    replayed: Workspace, capsys: pytest.CaptureFixture[str]
) -> None:
    """`plumbline forecasts` and the export folder give the calibrated bounds and factor as
    stored, and the calibrated outcome as counted here from the stored bounds."""
    stored = {key: rest for key, *rest in replayed.query(
        "SELECT f.id, f.calibrated_lower, f.calibrated_upper, f.calibrated_factor, o.actual "
        "FROM forecasts AS f LEFT JOIN outcomes AS o ON o.forecast_id = f.id "
        "WHERE f.model = 'calibrated'")}
    capsys.readouterr()
    assert main(["forecasts", "-c", str(replayed.config_path), "--model", "calibrated",
                 "--format", "json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert len(listed) == len(stored)
    with_bounds = 0
    for row in listed:
        c_lower, c_upper, factor, actual = stored[row["forecast_id"]]
        assert (row["calibrated_lower"], row["calibrated_upper"], row["calibrated_factor"]) == (
            c_lower, c_upper, factor)
        if c_lower is None or actual is None:
            assert row["calibrated_outcome"] is None
            continue
        with_bounds += 1
        side = "hit" if c_lower <= actual <= c_upper else (
            "miss_high" if actual > c_upper else "miss_low")
        assert row["calibrated_outcome"] == side
    assert with_bounds >= WEEKS - 30 - MIN_SCORES

    exports = sorted((replayed.root / "exports" / "calibrated").glob("pass-*.csv"))
    last = list(csv.DictReader(io.StringIO(exports[-1].read_text(encoding="utf-8"))))
    assert len(last) == 1 and "calibrated_outcome" not in last[0]
    c_lower, c_upper, factor, _actual = stored[int(last[0]["forecast_id"])]
    assert c_lower is not None
    assert (float(last[0]["calibrated_lower"]), float(last[0]["calibrated_upper"]),
            float(last[0]["calibrated_factor"])) == (c_lower, c_upper, factor)
    own = list(csv.DictReader(io.StringIO(
        sorted((replayed.root / "exports" / "own").glob("pass-*.csv"))[-1].read_text(
            encoding="utf-8"))))
    assert own[0]["calibrated_lower"] == "" and own[0]["calibrated_factor"] == ""
