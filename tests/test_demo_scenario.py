"""The demo scenario: the generator reproduces demo_feed/, the files are shaped as the design says,
the config loads, and the planted changes are in the data with the size the manifest claims.

The statistical checks run on the published files (parsed back from the generator's bytes, which
the first test proves identical to demo_feed/). They use Plumbline's own statistics, which are
checked elsewhere against NIST StRD, statsmodels and scipy; the thresholds used here are named
beside each check.
"""

from __future__ import annotations

import csv
import hashlib
import io
import itertools
import json
import os
import subprocess
import sys
from datetime import date, time, timedelta
from functools import cache
from pathlib import Path

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import stats

from monitor.config import load_config
from monitor.demo import (
    FEEDS,
    MODELS,
    WEEK_COUNT,
    healthy_series,
    planted_changes,
    scenario_files,
    week_ending,
    weeks,
    write_scenario,
)
from monitor.demo.render import manifest_record
from monitor.demo.workspace import scenario
from monitor.stats.coverage import audit_coverage
from monitor.stats.diagnostics import variance_inflation
from monitor.stats.monitoring import monitor, start_monitoring
from monitor.stats.ols import OlsFit, fit_ols
from monitor.stats.shift import slope_shift_test
from monitor.vocabulary import FindingKind

REPO_ROOT = Path(__file__).resolve().parent.parent
DEMO_FEED = REPO_ROOT / "demo_feed"
FloatArray = NDArray[np.float64]
BASELINE = 52  # every model's window, so the baseline is weeks 1-52


def _tree(folder: Path) -> dict[str, bytes]:
    return {
        path.relative_to(folder).as_posix(): path.read_bytes()
        for path in sorted(folder.rglob("*"))
        # The digest picture (tests/tools/screenshot_digest.py) is kept here, not generated.
        if path.is_file() and path.name != "digest.png"
    }


# ---------------------------------------------------------------------------------------------
# The files


def test_generator_reproduces_demo_feed_byte_for_byte() -> None:
    generated = scenario_files()
    committed = _tree(DEMO_FEED)
    assert sorted(set(generated) - set(committed)) == [], "files missing from demo_feed/"
    assert sorted(set(committed) - set(generated)) == [], "extra files in demo_feed/"
    differing = [path for path in generated if generated[path] != committed[path]]
    assert differing == [], "rerun tests/tools/make_demo_feed.py"


def test_demo_feed_stays_small() -> None:
    total = sum(len(content) for content in scenario_files().values())
    assert total < 1_000_000, f"{total} bytes"


def test_generation_does_not_depend_on_the_process() -> None:
    # A fresh interpreter with a different hash seed must give the same bytes (no dependence
    # on set or dict ordering, module state or the order of calls).
    digest = hashlib.sha256()
    for path, content in scenario_files().items():
        digest.update(path.encode() + b"\0" + content)
    code = (
        "import hashlib\n"
        "from monitor.demo import scenario_files\n"
        "d = hashlib.sha256()\n"
        "for p, c in scenario_files().items():\n"
        "    d.update(p.encode() + b'\\0' + c)\n"
        "print(d.hexdigest())\n"
    )
    env = {**os.environ, "PYTHONHASHSEED": "12345"}
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True
    )
    assert result.stdout.strip() == digest.hexdigest()


def test_write_scenario_writes_the_generated_files_and_empty_inboxes(tmp_path: Path) -> None:
    manifest = write_scenario(tmp_path / "ws")
    root = tmp_path / "ws"
    written = _tree(root)
    assert written == scenario_files()
    assert manifest.files == tuple(sorted(root / path for path in written))
    assert manifest.config_path == root / "plumbline.yaml"
    assert json.loads(manifest.manifest_path.read_text(encoding="utf-8"))["weeks"] == WEEK_COUNT
    assert set(manifest.inboxes) == {spec.name for spec in FEEDS}
    for inbox in manifest.inboxes.values():
        assert inbox.is_dir() and not any(inbox.iterdir())
    assert manifest.planted == planted_changes() and manifest.healthy == healthy_series()

    bare = write_scenario(tmp_path / "bare", make_inboxes=False)
    assert not any(inbox.exists() for inbox in bare.inboxes.values())


def test_weeks_give_the_replay_order_and_the_business_clock(tmp_path: Path) -> None:
    replay = weeks(tmp_path)
    assert [w.number for w in replay] == list(range(1, WEEK_COUNT + 1))
    assert replay[0].week_ending == date(2025, 1, 5)
    for previous, current in itertools.pairwise(replay):
        assert current.week_ending - previous.week_ending == timedelta(days=7)
    for week in replay:
        assert week.week_ending.weekday() == 6  # Sunday
        local = week.delivered_at
        assert local.date() == week.week_ending + timedelta(days=1)
        assert local.time() == time(6, 0) and str(local.tzinfo) == "Europe/Berlin"
        for feed, path in week.files.items():
            assert path == tmp_path / "feeds" / feed / "drops" / f"week_{week.week_ending}.csv"
    assert [w.number for w in replay if "copacker" in w.files] == list(range(1, 100))
    others = {spec.name for spec in FEEDS} - {"copacker"}
    assert all(others <= set(w.files) for w in replay)
    # Winter and summer time both occur: the offsets differ.
    assert {w.delivered_at.utcoffset() for w in replay} == {timedelta(hours=1), timedelta(hours=2)}


def _rows(content: bytes) -> tuple[list[str], list[dict[str, str]]]:
    reader = csv.DictReader(io.StringIO(content.decode("utf-8"), newline=""))
    return list(reader.fieldnames or []), list(reader)


def test_each_file_holds_the_weeks_actuals_then_next_weeks_plan_rows() -> None:
    files = scenario_files()
    for spec in FEEDS:
        responses = {c.name for c in spec.columns if c.response}
        numeric = [c for c in spec.columns if not c.text]
        series = 30 if spec.name == "depots" else 1
        for number in range(1, spec.last_week + 1):
            content = files[f"feeds/{spec.folder}/drops/week_{week_ending(number)}.csv"]
            assert content.endswith(b"\n") and b"\r" not in content
            header, rows = _rows(content)
            assert tuple(header) == spec.column_names
            assert len(rows) == 2 * series
            actual, plan = rows[:series], rows[series:]
            assert {r["week_ending"] for r in actual} == {week_ending(number).isoformat()}
            assert {r["week_ending"] for r in plan} == {week_ending(number + 1).isoformat()}
            for row in actual + plan:
                for column in numeric:
                    text = row[column.name]
                    if column.name in responses and row in plan:
                        assert text == ""
                        continue
                    value = float(text)
                    assert np.isfinite(value) and value >= 0.0
                    decimals = len(text.split(".")[1]) if "." in text else 0
                    assert decimals == column.decimals, (spec.name, column.name, text)
            if spec.name == "depots":
                names = [f"depot-{i:02d}" for i in range(1, 31)]
                assert [r["depot"] for r in actual] == names == [r["depot"] for r in plan]


def test_plan_rows_carry_the_predictors_of_the_actual_that_follows() -> None:
    # A plan row's predictors are what the later actual row reports (plans come true here).
    files = scenario_files()
    for spec in FEEDS:
        predictors = [c.name for c in spec.columns if not c.response and not c.text]
        for number in range(1, spec.last_week):
            _, now = _rows(files[f"feeds/{spec.folder}/drops/week_{week_ending(number)}.csv"])
            _, then = _rows(files[f"feeds/{spec.folder}/drops/week_{week_ending(number + 1)}.csv"])
            half = len(now) // 2
            for plan, actual in zip(now[half:], then[:half], strict=True):
                assert [plan[p] for p in predictors] == [actual[p] for p in predictors]


def test_config_is_accepted_by_load_config_and_declares_the_scenario() -> None:
    config = load_config(DEMO_FEED / "plumbline.yaml")
    assert config.timezone == "Europe/Berlin"
    assert config.database == DEMO_FEED / "state" / "plumbline.sqlite"
    assert config.notify.html_dir == DEMO_FEED / "reports"
    assert config.notify.email is not None
    assert set(config.feeds) == {spec.name for spec in FEEDS}
    assert set(config.models) == {model.name for model in MODELS}
    for spec in FEEDS:
        feed = config.feeds[spec.name]
        assert feed.inbox == DEMO_FEED / "feeds" / spec.folder / "inbox"
        assert feed.columns is not None and tuple(feed.columns) == spec.column_names
    owners: set[str] = set()
    for model in MODELS:
        declared = config.models[model.name]
        assert declared.feed == model.feed and declared.response == model.response
        assert tuple(declared.predictors or ()) == model.predictors
        assert declared.per == model.per and declared.level == model.level
        assert declared.window == BASELINE
        assert declared.owners is not None
        owners.update(declared.owners)
    addresses = owners | set(config.notify.email.to) | {config.notify.email.sender}
    assert len(owners) >= 2
    assert all(address.endswith("@example.org") for address in addresses)


def test_planted_json_is_the_api_oracle() -> None:
    manifest = json.loads(scenario_files()["planted.json"])
    assert manifest == json.loads(json.dumps(manifest_record(scenario())))
    assert [c["model"] for c in manifest["planted"]] == [c.model for c in planted_changes()]
    kinds = {c.kind for c in planted_changes()}
    assert kinds == {
        FindingKind.STRUCTURAL_BREAK,
        FindingKind.COVERAGE,
        FindingKind.EXTRAPOLATION,
        FindingKind.STALE_FEED,
    }
    models = {model.name: model for model in MODELS}
    for change in planted_changes():
        assert models[change.model].feed == change.feed
        assert change.kind in change.accepted_kinds
        assert BASELINE < change.week_number <= WEEK_COUNT
        assert change.first_evidence_week_number <= change.week_number
    for healthy in healthy_series():
        # A healthy relationship may still carry a planted change of another kind (inputs out
        # of range, a quiet feed), never one of the kinds it must not raise.
        for change in planted_changes():
            if (change.model, change.series) == (healthy.model, healthy.series):
                assert not set(change.accepted_kinds) & set(healthy.absent_kinds)
    assert sum(1 for h in healthy_series() if h.model == "delivery_hours") == 29


# ---------------------------------------------------------------------------------------------
# The series, parsed back from the files


@cache
def _series() -> dict[tuple[str, str | None], dict[str, FloatArray]]:
    """(feed, per value) -> column -> values by week: actuals from each week's own rows; each
    predictor also gets the last file's plan row (one more week)."""
    files = scenario_files()
    out: dict[tuple[str, str | None], dict[str, list[float]]] = {}
    for spec in FEEDS:
        per = next((c.name for c in spec.columns if c.text), None)
        numeric = [c.name for c in spec.columns if not c.text]
        responses = {c.name for c in spec.columns if c.response}
        for number in range(1, spec.last_week + 1):
            _, rows = _rows(files[f"feeds/{spec.folder}/drops/week_{week_ending(number)}.csv"])
            half = len(rows) // 2
            last = number == spec.last_week
            for row in rows[:half] + (rows[half:] if last else []):
                columns = out.setdefault((spec.name, row[per] if per else None), {})
                for name in numeric:
                    if row[name] != "" or name not in responses:
                        columns.setdefault(name, []).append(float(row[name]))
    return {key: {k: np.array(v) for k, v in cols.items()} for key, cols in out.items()}


def _xy(model: str, series: str | None = None) -> tuple[FloatArray, FloatArray]:
    spec = next(m for m in MODELS if m.name == model)
    columns = _series()[(spec.feed, series)]
    y = columns[spec.response]
    x = np.column_stack([columns[p][: len(y) + 1] for p in spec.predictors])
    return x, y  # x has one row more than y: the last plan row


def _week_slice(first: int, last: int) -> slice:
    return slice(first - 1, last)


def _fit(
    model: str, first: int, last: int, series: str | None = None, level: float = 0.99
) -> OlsFit:
    x, y = _xy(model, series)
    rows = _week_slice(first, last)
    return fit_ols(x[rows], y[rows], level=level)


def _monitoring(model: str, series: str | None = None) -> tuple[bool, int, int]:
    """Sequential monitoring (monitor.stats.monitoring, alpha 0.05 over the default horizon) from
    the baseline of weeks 1-52 over weeks 53 on: (crossed, week of first crossing, estimated
    first week of the new regime)."""
    x, y = _xy(model, series)
    n = len(y)
    state = start_monitoring(x[None, :BASELINE], y[None, :BASELINE])
    result = monitor(state, x[None, BASELINE:n], y[None, BASELINE:n], alpha=0.05)
    if not result.crossed[0]:
        return False, -1, -1
    first = BASELINE + 1 + int(result.first_crossing_index[0])
    return True, first, BASELINE + 1 + int(result.break_index[0])


def _rolling_forecasts(model: str, level: float) -> tuple[FloatArray, FloatArray, FloatArray]:
    """The intervals a weekly pass issues: for each target week from 11 on, the prediction
    interval at the plan row's predictors from a fit on the latest 52 earlier weeks (weeks
    11+ because min_rows is 10). Returns (actual, lower, upper) by target week 11, 12, …"""
    x, y = _xy(model)
    actual, lower, upper = [], [], []
    for target in range(11, len(y) + 1):
        rows = slice(max(0, target - 1 - BASELINE), target - 1)
        fit = fit_ols(x[rows], y[rows], level=level)
        prediction = fit.predict(x[target - 1 : target])
        actual.append(y[target - 1])
        lower.append(prediction.lower[0])
        upper.append(prediction.upper[0])
    return np.array(actual), np.array(lower), np.array(upper)


def _inside(value: float, fit: OlsFit, j: int) -> bool:
    return bool(fit.lower[j] <= value <= fit.upper[j])


# ---------------------------------------------------------------------------------------------
# Planted changes: really there, with the size claimed


def test_receiving_slope_shifts_by_35_percent_at_week_80() -> None:
    # 99 % confidence intervals of the slope (t intervals, Draper & Smith 1998) before and after.
    before = _fit("receiving_hours", 1, 79)
    after = _fit("receiving_hours", 80, WEEK_COUNT)
    assert _inside(0.42, before, 1) and _inside(0.567, after, 1)
    assert not _inside(0.42, after, 1) and not _inside(0.567, before, 1)
    assert 1.25 < after.coef[1] / before.coef[1] < 1.45
    x, y = _xy("receiving_hours")
    shift = slope_shift_test(x[:BASELINE], y[:BASELINE], x[79:105], y[79:105])
    assert shift.coefficients.p_value[0, 1] < 1e-6
    crossed, first, break_week = _monitoring("receiving_hours")
    assert crossed and 80 <= first <= 84 and abs(break_week - 80) <= 4


def test_depot_17_slope_shifts_by_30_percent_at_week_90_and_the_others_stay() -> None:
    before = _fit("delivery_hours", 1, 89, "depot-17")
    after = _fit("delivery_hours", 90, WEEK_COUNT, "depot-17")
    assert _inside(0.162, before, 1) and _inside(0.2106, after, 1)
    assert not _inside(0.162, after, 1)
    crossed, first, break_week = _monitoring("delivery_hours", "depot-17")
    assert crossed and 90 <= first <= 96 and abs(break_week - 90) <= 4
    # The other 29 are stable; at alpha 0.05 each, about 1.5 chance alarms are expected
    # (binomial: P(more than 4 of 29) < 0.01), so more than 4 would mean a planted fault.
    alarms = [
        name
        for name in (f"depot-{i:02d}" for i in range(1, 31))
        if name != "depot-17" and _monitoring("delivery_hours", name)[0]
    ]
    assert len(alarms) <= 4, alarms
    profiles = {p.name: p for p in scenario().depots}
    for number in (1, 9, 23):  # the planted slopes of a few stable depots, all weeks
        name = f"depot-{number:02d}"
        assert _inside(profiles[name].slope, _fit("delivery_hours", 1, WEEK_COUNT, name), 1)


def test_fuel_error_spread_triples_at_week_75_and_coverage_falls() -> None:
    x, y = _xy("fuel_litres")
    residual = y - (450.0 + 0.305 * x[: len(y), 0])  # from the planted line
    planted_sd = np.where(
        np.arange(1, len(y) + 1) < 75, 160.0, 160.0 * (3.0 + 2.0 * (np.arange(len(y)) - 74) / 50)
    )
    # sum (e/sd)^2 ~ chi-square(n) when the sd is as planted; 99.9 % two-sided bounds (scipy).
    for rows in (slice(0, 74), slice(74, len(y))):
        z = residual[rows] / planted_sd[rows]
        n = z.size
        assert stats.chi2.ppf(0.0005, n) < float(z @ z) < stats.chi2.ppf(0.9995, n)
    ratio = residual[74:100].std() / residual[:74].std()
    assert 2.2 < ratio < 5.0
    # The pass's intervals (52-week window, 95 %): calibrated before week 75 (Kupiec does not
    # reject at 0.05), too narrow after it (the last 26 scored by week 101 reject strongly).
    actual, lower, upper = _rolling_forecasts("fuel_litres", 0.95)
    before = audit_coverage(actual[: 75 - 11], lower[: 75 - 11], upper[: 75 - 11], 0.95)
    assert before.kupiec_p_value is not None and before.kupiec_p_value > 0.05
    by_101 = slice(101 - 11 - 25, 101 - 11 + 1)
    after = audit_coverage(actual[by_101], lower[by_101], upper[by_101], 0.95)
    assert after.scored == 26 and after.hit_rate is not None and after.hit_rate < 0.85
    assert after.kupiec_p_value is not None and after.kupiec_p_value < 0.01


def test_returns_plan_rows_leave_the_fitted_range_from_week_96_on_the_same_line() -> None:
    x, _ = _xy("returns_hours")
    items = x[:, 0]
    historical_max = items[:95].max()
    window_max = items[95 - BASELINE : 95].max()  # the window of the pass of week 95
    assert items[95] >= 2.0 * historical_max and items[95] > window_max
    assert np.all(items[95:] >= 2.0 * historical_max)
    assert np.all(items[95:] <= 2.9 * historical_max + 0.5)
    assert np.all(items[:95] <= historical_max)
    # The actuals keep to the planted line: 99 % intervals on all weeks contain it, and the
    # baseline's monitoring sees no break.
    whole = _fit("returns_hours", 1, WEEK_COUNT)
    assert _inside(0.085, whole, 1) and _inside(35.0, whole, 0)
    assert _monitoring("returns_hours")[0] is False


def test_copacker_goes_quiet_after_week_99() -> None:
    files = scenario_files()
    names = [p for p in files if p.startswith("feeds/copacker/drops/")]
    assert len(names) == 99 and max(names).endswith(f"week_{week_ending(99)}.csv")
    change = next(c for c in planted_changes() if c.kind is FindingKind.STALE_FEED)
    assert change.feed == "copacker" and change.week_number == 100


# ---------------------------------------------------------------------------------------------
# Healthy models: nothing planted, and nothing in the data that looks planted


@pytest.mark.parametrize("model", ["pick_hours", "returns_hours", "site_energy", "copack_hours"])
def test_strict_healthy_models_show_no_break_and_calibrated_intervals(model: str) -> None:
    level = next(m.level for m in MODELS if m.name == model)
    assert _monitoring(model)[0] is False
    actual, lower, upper = _rolling_forecasts(model, level)
    audit = audit_coverage(actual, lower, upper, level)
    assert audit.kupiec_p_value is not None and audit.kupiec_p_value > 0.05


def test_pick_hours_is_stable_across_the_whole_span() -> None:
    first_year = _fit("pick_hours", 1, BASELINE)
    rest = _fit("pick_hours", BASELINE + 1, WEEK_COUNT)
    assert _inside(0.0235, first_year, 1) and _inside(0.0235, rest, 1)
    # Residual spread near the planted 28 h: chi-square 99 % interval for sigma (scipy).
    for fit in (first_year, rest):
        df = fit.residual_df
        low = 28.0 * np.sqrt(stats.chi2.ppf(0.005, df) / df)
        high = 28.0 * np.sqrt(stats.chi2.ppf(0.995, df) / df)
        assert low < fit.residual_std_error < high


def test_site_energy_is_a_two_predictor_model_with_planted_coefficients() -> None:
    whole = _fit("site_energy", 1, WEEK_COUNT)
    assert whole.p == 3
    assert _inside(230.0, whole, 1) and _inside(1.45, whole, 2)
    x, _ = _xy("site_energy")
    vif = variance_inflation(x[:WEEK_COUNT])
    # VIF below 5: the two predictors are not collinear (a rule of thumb, common practice).
    assert np.all(vif < 5.0)
    hdd = x[:WEEK_COUNT, 0]
    months = np.array([week_ending(n).month for n in range(1, WEEK_COUNT + 1)])
    # Plausible heating degree days at base 15.5 °C: near 0 in high summer, about 100 in January.
    assert hdd[np.isin(months, (7, 8))].mean() < 10.0
    assert 70.0 < hdd[months == 1].mean() < 130.0
