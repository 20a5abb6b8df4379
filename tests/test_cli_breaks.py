"""``plumbline breaks``: JSON keys and values, table wording, one-line exit-2 errors.

The numbers are checked against statsmodels (``breaks_cusumolsresid``, the interaction-dummy
``f_test`` for the Chow F at the dated break); the Nile series is in
``tests/stats/test_change_nile.py``.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.diagnostic import breaks_cusumolsresid

from monitor.cli import main


def _write(path: Path, header: list[str], rows: list[list[object]]) -> Path:
    text = "\n".join([",".join(header), *(",".join(str(v) for v in row) for row in rows)])
    path.write_text(text + "\n", encoding="utf-8")
    return path


@pytest.fixture
def demand(tmp_path: Path) -> Path:
    """Invented weekly demand with two drivers; the slope on price changes at week 70."""
    rng = np.random.default_rng(77)
    weeks = 120
    promo = rng.integers(0, 30, size=weeks).astype(float)
    price = rng.normal(10, 1.5, size=weeks).round(2)
    units = 400 + 6 * promo - 12 * price + rng.normal(0, 8, size=weeks)
    units[70:] -= 9 * (price[70:] - 10) + 25
    rows = [
        [f"2024-W{w + 1:03d}", f"{units[w]:.3f}", f"{promo[w]:g}", f"{price[w]:g}"]
        for w in range(weeks)
    ]
    return _write(tmp_path / "demand.csv", ["week", "units", "promo", "price"], rows)


def _run(capsys: Any, *argv: str) -> tuple[int, str, str]:
    status = main(["breaks", *argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def _json(capsys: Any, *argv: str) -> dict[str, Any]:
    status, out, err = _run(capsys, *argv, "--format", "json")
    assert status == 0, err

    def refuse(constant: str) -> float:
        raise AssertionError(f"{constant} in JSON output")

    report: dict[str, Any] = json.loads(out, parse_constant=refuse)
    return report


def test_json_keys_and_values_with_predictors(demand: Path, capsys: Any) -> None:
    report = _json(capsys, str(demand), "--response", "units", "--predictors", "promo", "price",
                   "--period", "week")  # fmt: skip
    assert set(report["cusum"]) >= {"statistic", "crossed", "first_crossing"}
    assert set(report["ols_cusum"]) >= {"statistic", "p_value"}
    assert set(report["sup_f"]) >= {"statistic", "p_value", "break_index", "break_period"}
    assert report["n"] == 120 and report["predictors"] == ["promo", "price"]
    data = np.genfromtxt(demand, delimiter=",", skip_header=1, usecols=(1, 2, 3))
    y, x = data[:, 0], data[:, 1:]
    design = np.column_stack([np.ones(120), x])
    fit = sm.OLS(y, design).fit()
    statistic, p_value, _ = breaks_cusumolsresid(fit.resid, ddof=3)  # statsmodels reference
    assert report["ols_cusum"]["statistic"] == pytest.approx(statistic, rel=1e-9)
    assert report["ols_cusum"]["p_value"] == pytest.approx(p_value, rel=1e-9, abs=1e-15)
    sup_f = report["sup_f"]
    j = sup_f["break_index"]
    assert sup_f["break_period"] == f"2024-W{j + 1:03d}" and sup_f["restrictions"] == 3
    assert abs(j - 70) <= 3  # the invented change is at row 70
    dummy = (np.arange(120) >= j).astype(float)
    chow = sm.OLS(y, np.column_stack([design, design * dummy[:, None]])).fit().f_test(
        np.hstack([np.zeros((3, 3)), np.eye(3)])
    )
    assert sup_f["statistic"] == pytest.approx(float(chow.fvalue), rel=1e-9)
    assert sup_f["p_value"] < 0.01
    assert report["cusum"]["first_crossing"] in (None, *[f"2024-W{w:03d}" for w in range(1, 121)])


def test_without_period_column_periods_are_null_and_lines_given(demand: Path, capsys: Any) -> None:
    report = _json(capsys, str(demand), "--response", "units")
    assert report["predictors"] == [] and report["coefficients"] == 1
    assert report["period_column"] is None and report["sup_f"]["break_period"] is None
    index = report["sup_f"]["break_index"]
    assert report["sup_f"]["break_line"] == index + 2  # header is line 1


def test_table_opens_with_the_result_and_ends_with_a_caution(demand: Path, capsys: Any) -> None:
    status, out, _ = _run(capsys, str(demand), "--response", "units", "--predictors", "promo",
                          "price", "--period", "week")  # fmt: skip
    assert status == 0
    first = out.splitlines()[0]
    assert first.startswith("Change tests of units on promo, price over 120 rows")
    assert "sup-F finds a break" in " ".join(out.split())
    for test_name in ("CUSUM of recursive residuals", "OLS-residual CUSUM", "sup-F, 15 % trimming"):
        assert sum(line.strip().startswith(test_name) for line in out.splitlines()) == 1
    assert "signal, not proof" in " ".join(out.split())
    for borrowed in ("P>|t|", "Prob > F", "Pr > |t|", "SUMMARY", "====", "***", "Sig."):
        assert borrowed not in out


def test_stable_series_reads_as_no_change(tmp_path: Path, capsys: Any) -> None:
    rng = np.random.default_rng(5)
    path = _write(tmp_path / "flat.csv", ["v"], [[f"{v:.4f}"] for v in rng.normal(50, 2, 80)])
    report = _json(capsys, str(path), "--response", "v")
    assert report["cusum"]["crossed"] is False and report["cusum"]["first_crossing"] is None
    assert report["sup_f"]["p_value"] > 0.05 and report["ols_cusum"]["p_value"] > 0.05
    _status, out, _ = _run(capsys, str(path), "--response", "v")
    assert "no test finds a change at the 5 % level" in " ".join(out.split("\n\n")[0].split())


def test_constant_response_is_reported_not_crashed(tmp_path: Path, capsys: Any) -> None:
    path = _write(tmp_path / "const.csv", ["v"], [["3.5"]] * 30)
    report = _json(capsys, str(path), "--response", "v")
    for key in ("cusum", "ols_cusum", "sup_f"):
        assert report[key]["applicable"] is False and "exact" in report[key]["reason"]
        assert report[key]["statistic"] is None
    _status, out, _ = _run(capsys, str(path), "--response", "v")
    assert "none of the tests applies" in " ".join(out.split())


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--response", "unit"], "column 'unit' not found (did you mean 'units'?)"),
        (["--response", "units", "--predictors", "prize"], "column 'prize' not found"),
        (["--response", "units", "--period", "wk"], "column 'wk' not found"),
        (["--response", "week"], "line 2: column 'week' holds '2024-W001' where a number"),
        (["--response", "units", "--predictors", "units"], "both the response and a predictor"),
        (["--response", "units", "--no-intercept"], "leaves no model to test"),
    ],
)
def test_errors_exit_2_with_one_line(
    demand: Path, capsys: Any, argv: list[str], message: str
) -> None:
    status, out, err = _run(capsys, str(demand), *argv)
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and message in err


def test_too_few_rows_and_collinear_predictors(tmp_path: Path, capsys: Any) -> None:
    few = _write(tmp_path / "few.csv", ["y", "x"], [[1, 2], [2, 3], [4, 4], [3, 6], [5, 7]])
    status, _out, err = _run(capsys, str(few), "--response", "y", "--predictors", "x")
    assert status == 2 and "5 data rows" in err and "at least 6" in err
    rows = [[i * 1.5 + (i % 3), i, 2 * i + 1] for i in range(30)]
    both = _write(tmp_path / "both.csv", ["y", "a", "b"], rows)
    status, _out, err = _run(capsys, str(both), "--response", "y", "--predictors", "a", "b")
    assert status == 2 and "'b'" in err and err.count("\n") == 1


def test_console_command_runs(demand: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "monitor", "breaks", str(demand), "--response", "units",
         "--format", "json"],
        capture_output=True, text=True, check=False, timeout=60,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["n"] == 120


def test_readme_example_is_what_the_command_prints(capsys: Any) -> None:
    # The README's JSON example (numbers shortened to 6 significant digits) must match a real run
    # on the example file, key for key, so the documented contract cannot drift.
    import re

    root = Path(__file__).resolve().parent.parent
    readme = (root / "README.md").read_text(encoding="utf-8")
    section = readme.split("<!-- section: breaks -->")[1].split("<!-- end section: breaks -->")[0]
    documented = json.loads(re.findall(r"```json\n(.*?)```", section, re.S)[0])
    example = root / "config" / "example_receiving_hours.csv"
    argv = (str(example), "--response", "receiving_hours", "--predictors", "inbound_pallets",
            "--period", "week_ending")
    actual = _json(capsys, *argv)

    def same(doc: Any, real: Any, where: str) -> None:
        if isinstance(doc, dict):
            assert isinstance(real, dict) and set(doc) == set(real), where
            for key in doc:
                same(doc[key], real[key], f"{where}.{key}")
        elif isinstance(doc, float) and not isinstance(real, bool):
            assert real == pytest.approx(doc, rel=1e-5), where
        else:
            assert doc == real, where

    same(documented, actual, "report")
    shown = re.findall(r"```text\n(.*?)```", section, re.S)[0]
    status, out, _ = _run(capsys, *argv)
    assert status == 0 and out == shown


def _seasonal(tmp_path: Path, predictors: int, rows: int, seed: int) -> tuple[Path, list[str]]:
    """Invented monthly sales on ``predictors`` stable drivers (no change anywhere)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 1, (rows, predictors))
    y = 100 + x @ rng.normal(0, 2, predictors) + rng.normal(0, 1, rows)
    names = [f"d{j + 1}" for j in range(predictors)]
    data = [[f"{y[t]:.5f}", *(f"{v:.5f}" for v in x[t])] for t in range(rows)]
    return _write(tmp_path / "monthly.csv", ["sales", *names], data), names


def test_sup_f_has_a_p_value_up_to_24_coefficients(tmp_path: Path, capsys: Any) -> None:
    # 11 month dummies + a trend + an intercept is 13 coefficients (the table used to stop at
    # 10); 23 predictors + intercept is 24, the table's largest.
    for predictors in (12, 23):
        path, names = _seasonal(tmp_path, predictors, 240, seed=predictors)
        report = _json(capsys, str(path), "--response", "sales", "--predictors", *names)
        assert report["sup_f"]["applicable"] is True
        assert report["sup_f"]["p_value_note"] is None
        assert 0.0 < report["sup_f"]["p_value"] <= 1.0


def test_a_missing_sup_f_p_value_is_not_called_no_change(tmp_path: Path, capsys: Any) -> None:
    # 25 predictors + intercept = 26 coefficients, beyond the table: sup-F is computed but has no
    # p-value, so the opening sentence must not say that no test finds a change.
    path, names = _seasonal(tmp_path, 25, 260, seed=3)
    report = _json(capsys, str(path), "--response", "sales", "--predictors", *names)
    assert report["sup_f"]["applicable"] is True and report["sup_f"]["p_value"] is None
    assert "1 to 24 coefficients" in report["sup_f"]["p_value_note"]
    _status, out, _ = _run(capsys, str(path), "--response", "sales", "--predictors", *names)
    opening = " ".join(out.split("\n\n")[0].split())
    assert "no test finds a change" not in opening
    assert "sup-F cannot be judged" in opening and "no p-value" in opening


def test_readme_example_is_the_demo_receiving_series(capsys: pytest.CaptureFixture[str]) -> None:
    # config/example_receiving_hours.csv is the demo's warehouse receiving series, weeks 1 to 104
    # (its values as the demo's files write them, one decimal), with the planted slope change;
    # `breaks` on it dates the new regime at the planted week, as the README shows.
    from monitor.demo.scenario import build_scenario, week_ending

    root = Path(__file__).resolve().parent.parent
    example = root / "config" / "example_receiving_hours.csv"
    rows = [line.split(",") for line in example.read_text(encoding="utf-8").splitlines()[1:]]
    scenario = build_scenario()
    (table,) = scenario.tables["warehouse"]
    assert len(rows) == 104
    for number, (week, pallets, hours) in enumerate(rows, start=1):
        assert week == week_ending(number).isoformat()
        assert float(pallets) == pytest.approx(table.values["inbound_pallets"][number - 1], abs=0.5)
        assert float(hours) == pytest.approx(table.values["receiving_hours"][number - 1], abs=0.05)
    (planted,) = [p for p in scenario.planted if p.model == "receiving_hours"]
    assert main(["breaks", str(example), "--response", "receiving_hours", "--predictors",
                 "inbound_pallets", "--period", "week_ending", "--format", "json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["sup_f"]["break_period"] == week_ending(planted.week_number).isoformat()
    assert report["sup_f"]["p_value_bound"] == "below" and report["cusum"]["crossed"]
