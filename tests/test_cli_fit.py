"""``plumbline fit``: JSON checked against statsmodels (a reference library), table wording, errors.

statsmodels is the outside reference for every number (``OLS``, ``get_prediction``,
``het_breuschpagan(robust=True)``, ``durbin_watson``, ``jarque_bera``, ``OLSInfluence``,
``variance_inflation_factor``); scipy's t quantile for the interval width at a non-default level.
"""

from __future__ import annotations

import json
import math
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from _looks import assert_no_borrowed_looks
from numpy.typing import NDArray
from scipy import stats
from statsmodels.stats.diagnostic import het_breuschpagan
from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor
from statsmodels.stats.stattools import durbin_watson, jarque_bera

from monitor.cli import main

REPO_ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = REPO_ROOT / "config" / "example_pick_hours.csv"
RELATIVE = 1e-9


def _write_csv(path: Path, columns: dict[str, NDArray[np.float64]]) -> Path:
    names = list(columns)
    lines = [",".join(names)]
    for row in zip(*columns.values(), strict=True):
        lines.append(",".join(repr(float(v)) for v in row))  # repr keeps every digit
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    status = main(["fit", *argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def _json(capsys: pytest.CaptureFixture[str], *argv: str) -> dict[str, Any]:
    status, out, err = _run(capsys, *argv, "--format", "json")
    assert status == 0, err

    def refuse(constant: str) -> float:
        raise AssertionError(f"{constant} in JSON output")

    report: dict[str, Any] = json.loads(out, parse_constant=refuse)
    return report


def _close(actual: float | None, expected: float) -> None:
    assert actual is not None
    assert math.isclose(actual, float(expected), rel_tol=RELATIVE, abs_tol=1e-300), (
        actual,
        expected,
    )


def _check_against_statsmodels(
    report: dict[str, Any],
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    *,
    intercept: bool,
    level: float,
    points: list[list[float]],
) -> None:
    design = sm.add_constant(x, has_constant="add") if intercept else x
    fit = sm.OLS(y, design).fit()
    assert report["n"] == len(y) and report["residual_df"] == int(fit.df_resid)
    assert report["level"] == level and report["exact_fit"] is False
    _close(report["r_squared"], fit.rsquared)
    _close(report["adj_r_squared"], fit.rsquared_adj)
    _close(report["residual_std_error"], math.sqrt(fit.scale))
    _close(report["f_statistic"], fit.fvalue)
    _close(report["f_p_value"], fit.f_pvalue)
    intervals = fit.conf_int(alpha=1.0 - level)
    for j, row in enumerate(report["coefficients"]):
        _close(row["estimate"], fit.params[j])
        _close(row["standard_error"], fit.bse[j])
        _close(row["t"], fit.tvalues[j])
        _close(row["p_value"], fit.pvalues[j])
        _close(row["lower"], intervals[j, 0])
        _close(row["upper"], intervals[j, 1])
    assert report["coefficients"][0]["term"] == (
        "intercept" if intercept else report["predictors"][0]
    )

    assert len(report["predictions"]) == len(points)
    for i, row in enumerate(report["predictions"]):
        new = np.asarray(points[i : i + 1], dtype=np.float64)
        new_design = sm.add_constant(new, has_constant="add") if intercept else new
        frame = fit.get_prediction(new_design).summary_frame(alpha=1.0 - level)
        assert list(row["at"].values()) == points[i]
        _close(row["point"], frame["mean"].iloc[0])
        _close(row["mean_lower"], frame["mean_ci_lower"].iloc[0])
        _close(row["mean_upper"], frame["mean_ci_upper"].iloc[0])
        _close(row["lower"], frame["obs_ci_lower"].iloc[0])
        _close(row["upper"], frame["obs_ci_upper"].iloc[0])
        leverage = new_design[0] @ fit.normalized_cov_params @ new_design[0]
        _close(row["leverage"], leverage)

    found = report["diagnostics"]
    residuals = np.asarray(fit.resid)
    _close(found["durbin_watson"]["statistic"], durbin_watson(residuals))
    assert 0.0 <= found["durbin_watson"]["p_value"] <= 1.0
    lm, lm_p, _, _ = het_breuschpagan(residuals, sm.add_constant(x), robust=True)
    _close(found["breusch_pagan"]["statistic"], lm)
    _close(found["breusch_pagan"]["p_value"], lm_p)
    jb, jb_p, _, _ = jarque_bera(residuals)
    _close(found["jarque_bera"]["statistic"], jb)
    _close(found["jarque_bera"]["p_value"], jb_p)
    with_constant = sm.add_constant(x, has_constant="add")
    for j, name in enumerate(report["predictors"]):
        _close(found["vif"][name], variance_inflation_factor(with_constant, j + 1))
    influence = OLSInfluence(fit)
    cook = influence.cooks_distance[0]
    # Line numbers: header on line 1, no blank lines, so row i is on line i + 2.
    assert found["largest_cooks_distance"]["line"] == int(np.argmax(cook)) + 2
    _close(found["largest_cooks_distance"]["value"], float(np.max(cook)))
    assert found["largest_leverage"]["line"] == int(np.argmax(influence.hat_matrix_diag)) + 2


def _generated(
    tmp_path: Path, seed: int = 2026, n: int = 50
) -> tuple[Path, NDArray[np.float64], NDArray[np.float64]]:
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.uniform(1000.0, 6000.0, n), rng.uniform(40.0, 180.0, n)])
    y = 120.0 + 0.08 * x[:, 0] + 0.9 * x[:, 1] + rng.normal(0.0, 20.0, n)
    path = _write_csv(
        tmp_path / "generated.csv", {"lines": x[:, 0], "pallets": x[:, 1], "hours": y}
    )
    return path, x, y


def _example_arrays() -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    data = np.genfromtxt(EXAMPLE, delimiter=",", names=True, dtype=None, encoding="utf-8")
    x = np.column_stack([data["order_lines"], data["pallets"]]).astype(np.float64)
    return x, np.asarray(data["pick_hours"], dtype=np.float64)


# --- JSON against statsmodels ------------------------------------------------------------------


def test_json_on_generated_csv_matches_statsmodels(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path, x, y = _generated(tmp_path)
    points = [[4000.0, 100.0], [7000.0, 30.0]]
    report = _json(
        capsys, str(path), "--response", "hours", "--predictors", "lines", "pallets",
        "--at", "lines=4000,pallets=100", "--at", "pallets=30,lines=7000",
    )  # fmt: skip
    _check_against_statsmodels(report, x, y, intercept=True, level=0.95, points=points)
    assert report["predictions"][0]["extrapolation"] is False
    far = report["predictions"][1]
    assert far["extrapolation"] is True and far["outside_range"] == ["lines", "pallets"]
    assert far["leverage_above_window"] is True


def test_json_keys_are_the_documented_contract(capsys: pytest.CaptureFixture[str]) -> None:
    report = _json(
        capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
        "pallets", "--at", "order_lines=5200,pallets=140",
    )  # fmt: skip
    # DESIGN.md section 9's keys for fit, all present.
    for key in (
        "n", "residual_df", "r_squared", "adj_r_squared", "residual_std_error", "f_statistic",
        "f_p_value", "exact_fit", "level", "coefficients", "predictions", "diagnostics",
    ):  # fmt: skip
        assert key in report
    assert set(report["coefficients"][0]) == {
        "term", "estimate", "standard_error", "t", "p_value", "lower", "upper",
    }  # fmt: skip
    assert {"at", "point", "mean_lower", "mean_upper", "lower", "upper", "leverage"} <= set(
        report["predictions"][0]
    )
    assert report["predictions"][0]["at"] == {"order_lines": 5200.0, "pallets": 140.0}
    for test in ("durbin_watson", "breusch_pagan", "jarque_bera"):
        assert {"statistic", "p_value"} <= set(report["diagnostics"][test])
    assert set(report["diagnostics"]["vif"]) == {"order_lines", "pallets"}


def test_json_on_the_example_file_matches_statsmodels(capsys: pytest.CaptureFixture[str]) -> None:
    x, y = _example_arrays()
    report = _json(
        capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
        "pallets", "--at", "order_lines=5200,pallets=140",
    )  # fmt: skip
    _check_against_statsmodels(report, x, y, intercept=True, level=0.95, points=[[5200.0, 140.0]])


def test_non_default_level_uses_the_matching_t_quantile(
    capsys: pytest.CaptureFixture[str],
) -> None:
    x, y = _example_arrays()
    report = _json(
        capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
        "pallets", "--level", "0.80", "--at", "order_lines=5200,pallets=140",
    )  # fmt: skip
    _check_against_statsmodels(report, x, y, intercept=True, level=0.80, points=[[5200.0, 140.0]])
    # An 80 % interval uses t at 0.90 (alpha = 0.20 split over two tails), not t at 0.975.
    df = report["residual_df"]
    s = report["residual_std_error"]
    forecast = report["predictions"][0]
    half_width = (forecast["upper"] - forecast["lower"]) / 2.0
    expected = stats.t.ppf(0.90, df) * s * math.sqrt(1.0 + forecast["leverage"])
    assert math.isclose(half_width, expected, rel_tol=1e-9)
    assert not math.isclose(
        half_width, stats.t.ppf(0.975, df) * s * math.sqrt(1.0 + forecast["leverage"]), rel_tol=1e-3
    )
    slope = report["coefficients"][1]
    assert math.isclose(
        (slope["upper"] - slope["lower"]) / 2.0,
        stats.t.ppf(0.90, df) * slope["standard_error"],
        rel_tol=1e-9,
    )
    # The verdicts' tests keep their own 5 % significance: --level is coverage, not significance.
    assert report["diagnostics"]["verdict_significance"] == 0.05


def test_no_intercept_matches_statsmodels_without_a_constant(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path, x, y = _generated(tmp_path, seed=7)
    report = _json(
        capsys, str(path), "--response", "hours", "--predictors", "lines", "pallets",
        "--no-intercept", "--level", "0.9", "--at", "lines=3000,pallets=90",
    )  # fmt: skip
    assert report["intercept"] is False
    assert [c["term"] for c in report["coefficients"]] == ["lines", "pallets"]
    assert report["f_df"] == [2, 48]
    # statsmodels reports uncentred R² for a model without a constant, as DESIGN.md section 4 asks.
    _check_against_statsmodels(report, x, y, intercept=False, level=0.9, points=[[3000.0, 90.0]])


def test_one_predictor_reports_the_correlation_and_vif_one(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path, x, y = _generated(tmp_path, seed=8)
    report = _json(capsys, str(path), "--response", "hours", "--predictors", "lines")
    r, p_value = stats.pearsonr(x[:, 0], y)  # scipy as the reference for r and its test
    _close(report["correlation"]["r"], r)
    _close(report["correlation"]["p_value"], p_value)
    assert report["diagnostics"]["vif"] == {"lines": 1.0}
    assert report["predictions"] == []
    _check_against_statsmodels(report, x[:, :1], y, intercept=True, level=0.95, points=[])


def test_exact_fit_gives_nulls_not_nan(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    x = np.arange(1.0, 11.0)
    path = _write_csv(tmp_path / "exact.csv", {"x": x, "y": 2.0 + 3.0 * x})
    report = _json(capsys, str(path), "--response", "y", "--predictors", "x", "--at", "x=4.5")
    assert report["exact_fit"] is True and report["r_squared"] == 1.0
    assert report["residual_std_error"] == 0.0
    slope = report["coefficients"][1]
    assert slope["t"] is None and slope["p_value"] is None and slope["standard_error"] == 0.0
    assert math.isclose(slope["estimate"], 3.0, rel_tol=1e-12)
    for test in ("durbin_watson", "breusch_pagan", "jarque_bera"):
        assert report["diagnostics"][test]["statistic"] is None
        assert "exact fit" in report["diagnostics"][test]["reason"]
    assert math.isclose(report["predictions"][0]["point"], 15.5, rel_tol=1e-12)
    status, out, _ = _run(capsys, str(path), "--response", "y", "--predictors", "x")
    assert status == 0 and "The fit is exact" in out and "nan" not in out.lower()
    assert "do not apply to an exact fit" in " ".join(out.split())


# --- the table ------------------------------------------------------------------------------------



def test_table_opens_with_the_result_and_avoids_borrowed_looks(
    capsys: pytest.CaptureFixture[str],
) -> None:
    status, out, err = _run(
        capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
        "pallets", "--at", "order_lines=5200,pallets=140", "--at", "order_lines=9000,pallets=100",
    )  # fmt: skip
    assert status == 0 and err == ""
    # The figures are statsmodels' for this file (the JSON tests above check them to 1e-9),
    # rounded to 3 and 4 significant digits as the sentence prints them.
    first_sentence = out.split("\n\n")[0].replace("\n", " ")
    assert first_sentence.startswith("R² 0.943 on 40 rows: pick_hours rises by 0.07629 for each ")
    assert "(95 % interval 0.05535 to 0.09723)" in first_sentence
    assert first_sentence.endswith("holding the other predictors fixed.")
    flat = " ".join(out.split())  # wording checks ignore where lines wrap
    assert "Coefficients, with 95 % confidence intervals" in flat
    assert re.search(r"^\s+term\s+estimate\s+standard error\s+t\s+p-value\s+lower\s+upper$", out,
                     re.MULTILINE)  # fmt: skip
    assert "< 0.0001" in flat
    assert "Durbin–Watson 1.66" in flat and "no sign of autocorrelated errors" in flat
    assert "Breusch–Pagan" in flat and "Jarque–Bera" in flat
    assert "moderate collinearity" in flat
    assert "Publish the 95 % prediction interval" in flat and "not for scoring" in flat
    assert "Extrapolation at order_lines=9000, pallets=100" in flat
    assert "assumes the model's conditions hold" in flat and "not proof" in flat
    # The F test says what it means for the forecast; its figures go to a footnote (statsmodels'
    # F 303.5 on 2 and 37 degrees of freedom for this file, checked in the JSON tests above).
    assert ("Together, order_lines and pallets explain pick_hours better than its average alone "
            "(p < 0.0001¹)") in flat  # fmt: skip
    assert flat.endswith("¹ The F test that every slope is zero: F = 303.5 with 2 and 37 degrees "
                         "of freedom.")  # fmt: skip
    assert "Test that every slope is zero" not in flat
    assert "summary" not in out.lower()
    assert not re.search(r"\*{1,3}\s*$", out, re.MULTILINE)  # no significance stars
    assert all(len(line) <= 100 for line in out.splitlines())
    assert_no_borrowed_looks(out)  # last: it skips where ../shared is absent


def test_table_verdicts_follow_the_tests(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Errors whose spread grows with x, and a random walk in time: both checks must speak up.
    rng = np.random.default_rng(5)
    n = 80
    x = np.linspace(1.0, 10.0, n)
    errors = np.cumsum(rng.normal(size=n)) * x
    path = _write_csv(tmp_path / "bad.csv", {"x": x, "y": 1.0 + 2.0 * x + errors})
    status, out, _ = _run(capsys, str(path), "--response", "y", "--predictors", "x")
    assert status == 0
    flat = " ".join(out.split())
    assert "successive errors look positively correlated" in flat
    assert "error variance appears to change with the predictors" in flat
    assert "VIF: one predictor" in flat


def test_table_says_when_the_predictors_add_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # y unrelated to x (seeded noise): the F test, here the square of the slope's t test, does
    # not reject, and the sentence says the forecast is little better than the average.
    rng = np.random.default_rng(11)
    x = rng.uniform(0.0, 10.0, 40)
    path = _write_csv(tmp_path / "flat.csv", {"x": x, "y": 50.0 + rng.normal(0.0, 5.0, 40)})
    report = _json(capsys, str(path), "--response", "y", "--predictors", "x")
    assert report["f_p_value"] > 0.05 and report["f_df"] == [1, 38]
    status, out, _ = _run(capsys, str(path), "--response", "y", "--predictors", "x")
    flat = " ".join(out.split())
    assert status == 0
    assert "x explains y no better than its average alone" in flat
    assert "little better than the average repeated" in flat
    assert "with 1 and 38 degrees of freedom." in flat


# --- errors: one line, exit status 2 -------------------------------------------------------------


def _error(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    status, out, err = _run(capsys, *argv)
    assert status == 2 and out == ""
    assert err.startswith("plumbline: ") and err.count("\n") == 1, err
    return err


def test_unknown_column_suggests_the_nearest(capsys: pytest.CaptureFixture[str]) -> None:
    err = _error(capsys, str(EXAMPLE), "--response", "pick_hour", "--predictors", "order_lines")
    assert "'pick_hour' not found" in err and "did you mean 'pick_hours'" in err
    err = _error(capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "palets")
    assert "did you mean 'pallets'" in err


def test_text_in_a_numeric_column_names_line_and_column(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "text.csv"
    path.write_text("x,y\n1,2\n2,4.1\nthree,5.9\n4,8.2\n5,9.9\n", encoding="utf-8")
    err = _error(capsys, str(path), "--response", "y", "--predictors", "x")
    assert "line 4" in err and "column 'x'" in err and "'three'" in err


def test_too_few_rows(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _write_csv(
        tmp_path / "short.csv",
        {"a": np.array([1.0, 2.0, 3.0]), "b": np.array([5.0, 1.0, 4.0]), "y": np.ones(3)},
    )
    err = _error(capsys, str(path), "--response", "y", "--predictors", "a", "b")
    assert "too few rows" in err and "3 row(s)" in err


def test_constant_predictor(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _write_csv(
        tmp_path / "flat.csv",
        {"a": np.arange(6.0), "b": np.full(6, 4.0), "y": np.array([1.0, 3, 2, 5, 4, 6])},
    )
    err = _error(capsys, str(path), "--response", "y", "--predictors", "a", "b")
    assert "'b'" in err and "constant" in err


def test_collinear_predictors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = np.arange(8.0)
    path = _write_csv(
        tmp_path / "twin.csv",
        {"a": a, "b": 2.0 * a + 1.0, "y": np.array([1.0, 3, 2, 5, 4, 6, 8, 7])},
    )
    err = _error(capsys, str(path), "--response", "y", "--predictors", "a", "b")
    assert "collinear" in err and "'a'" in err and "'b'" in err


@pytest.mark.parametrize(
    ("at", "expected"),
    [
        ("order_line=5200,pallets=140", "did you mean 'order_lines'"),
        ("order_lines=5200", "no value for pallets"),
        ("order_lines=lots,pallets=140", "'lots' is not a number"),
        ("order_lines=5200,pallets=inf", "not a finite number"),
        ("order_lines 5200", "NAME=NUMBER"),
        ("order_lines=1,order_lines=2,pallets=3", "given twice"),
    ],
)
def test_bad_at(capsys: pytest.CaptureFixture[str], at: str, expected: str) -> None:
    err = _error(
        capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
        "pallets", "--at", at,
    )  # fmt: skip
    assert expected in err and "--at" in err


@pytest.mark.parametrize("level", ["1.5", "0", "1", "-0.2", "nan", "high"])
def test_level_outside_zero_one(capsys: pytest.CaptureFixture[str], level: str) -> None:
    err = _error(
        capsys, str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
        "--level", level,
    )  # fmt: skip
    assert "--level" in err


def test_other_usage_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    err = _error(capsys, str(EXAMPLE), "--response", "pallets", "--predictors", "pallets")
    assert "both the response and a predictor" in err
    err = _error(capsys, str(tmp_path / "absent.csv"), "--response", "y", "--predictors", "x")
    assert "cannot be read" in err


# --- a real process -------------------------------------------------------------------------------


def test_runs_as_a_real_process() -> None:
    command = [sys.executable, "-m", "monitor", "fit", str(EXAMPLE), "--response", "pick_hours",
               "--predictors", "order_lines", "pallets", "--at", "order_lines=5200,pallets=140",
               "--format", "json"]  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, cwd=REPO_ROOT, timeout=120)
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["n"] == 40 and len(report["predictions"]) == 1
    bad = [*command[:5], "--response", "pick_hour", "--predictors", "order_lines"]
    failed = subprocess.run(bad, capture_output=True, text=True, cwd=REPO_ROOT, timeout=120)
    assert failed.returncode == 2 and failed.stdout == ""
    assert failed.stderr.startswith("plumbline: ") and failed.stderr.count("\n") == 1


def test_two_thousand_rows_get_an_exact_durbin_watson_p_value(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Issue 14: fit crashed past about 265 rows (an overflow in the tail of Imhof's integrand).
    # The statistic against statsmodels' durbin_watson; the p-value exact (not the rule of thumb).
    rng = np.random.default_rng(2000)
    n = 2000
    x = rng.uniform(0.0, 10.0, size=(n, 2))
    y = 3.0 + x @ np.array([1.5, -0.7]) + rng.normal(0.0, 1.0, n)
    path = _write_csv(tmp_path / "long.csv", {"a": x[:, 0], "b": x[:, 1], "y": y})
    report = _json(capsys, str(path), "--response", "y", "--predictors", "a", "b")
    found = report["diagnostics"]["durbin_watson"]
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    _close(found["statistic"], durbin_watson(np.asarray(fit.resid)))
    assert found["p_value"] is not None and 0.0 < found["p_value"] <= 1.0


def test_durbin_watson_verdict_follows_the_announced_significance(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The README walk-through's history: d = 1.46 is below the 1.5 rule of thumb but the exact
    # test gives p = 0.1251, above the 5 % the table announces: the verdict is the test's.
    history = tmp_path / "history.csv"
    history.write_text("\n".join(EXAMPLE.read_text(encoding="utf-8").splitlines()[:31]) + "\n",
                       encoding="utf-8")
    status, out, _ = _run(capsys, str(history), "--response", "pick_hours",
                          "--predictors", "order_lines")
    assert status == 0
    flat = " ".join(out.split())
    assert "tests at the 5 % significance level" in flat
    assert "Durbin–Watson 1.46 (p = 0.1251): no sign of autocorrelated errors" in flat
    assert "look positively correlated" not in flat


# --------------------------------------------------------------------------- plan rows


def test_plan_rows_are_forecast_like_at_points_and_left_out_of_the_fit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Rows with the response empty (the README's plan rows) are forecast, not fitted: the
    result equals fitting the rows with actuals and asking --at the plan rows' values, and both
    match statsmodels' get_prediction."""
    lines = EXAMPLE.read_text(encoding="utf-8").splitlines()
    history = lines[:31]
    plans = [",".join(line.split(",")[:3]) + "," for line in lines[31:33]]
    with_plans = tmp_path / "with_plans.csv"
    with_plans.write_text("\n".join([*history, *plans]) + "\n", encoding="utf-8")
    only_history = tmp_path / "history.csv"
    only_history.write_text("\n".join(history) + "\n", encoding="utf-8")
    values = [float(p.split(",")[1]) for p in plans]
    report = _json(capsys, str(with_plans), "--response", "pick_hours",
                   "--predictors", "order_lines")
    by_at = _json(capsys, str(only_history), "--response", "pick_hours",
                  "--predictors", "order_lines", *(a for v in values
                                                   for a in ("--at", f"order_lines={v!r}")))
    assert report["n"] == 30 == by_at["n"]
    assert report["coefficients"] == by_at["coefficients"]
    assert [p["plan_row"] for p in report["predictions"]] == [
        {"line": 32, "label": f"week_ending {plans[0].split(',')[0]}"},
        {"line": 33, "label": f"week_ending {plans[1].split(',')[0]}"},
    ]
    assert all(p["plan_row"] is None for p in by_at["predictions"])
    for mine, theirs in zip(report["predictions"], by_at["predictions"], strict=True):
        assert {k: v for k, v in mine.items() if k != "plan_row"} == {
            k: v for k, v in theirs.items() if k != "plan_row"}
    # statsmodels on the 30 rows with actuals
    data = np.array([[float(c) for c in line.split(",")[1:]] for line in history[1:]])
    model = sm.OLS(data[:, 2], sm.add_constant(data[:, 0])).fit()
    frame = model.get_prediction(sm.add_constant(np.array(values), has_constant="add"))
    interval = frame.summary_frame(alpha=0.05)
    for i, prediction in enumerate(report["predictions"]):
        assert prediction["point"] == pytest.approx(interval["mean"][i], rel=RELATIVE)
        assert prediction["lower"] == pytest.approx(interval["obs_ci_lower"][i], rel=RELATIVE)
        assert prediction["upper"] == pytest.approx(interval["obs_ci_upper"][i], rel=RELATIVE)
    status, out, _ = _run(capsys, str(with_plans), "--response", "pick_hours",
                          "--predictors", "order_lines")
    assert status == 0
    assert f"week_ending {plans[0].split(',')[0]} (line 32): order_lines=" in out


def test_a_plan_row_without_a_predictor_names_its_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    lines = EXAMPLE.read_text(encoding="utf-8").splitlines()[:31]
    path = tmp_path / "bad_plan.csv"
    path.write_text("\n".join([*lines, "2025-08-03,,118,"]) + "\n", encoding="utf-8")
    err = _error(capsys, str(path), "--response", "pick_hours", "--predictors", "order_lines")
    assert "line 32" in err and "column 'order_lines'" in err and "empty value" in err


def test_only_plan_rows_is_nothing_to_fit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "plans.csv"
    path.write_text("week,x,y\n1,2,\n2,3,\n", encoding="utf-8")
    err = _error(capsys, str(path), "--response", "y", "--predictors", "x")
    assert "nothing to fit" in err and "plan rows" in err
