"""``plumbline fit``: fit one candidate model on a CSV and show what monitoring would report.

    plumbline fit FILE --response Y --predictors X1 [X2 ...] [--no-intercept] [--level 0.95]
                  [--at X1=V1,X2=V2 ...] [--format table|json]

The command reads the file (``_csv.read_csv_table``), fits by least squares
(``monitor.stats.ols.fit_ols``), runs the residual diagnostics (``monitor.stats.diagnostics``)
and predicts at each ``--at`` point. ``build_report`` makes one plain dict, which is both the
JSON output (DESIGN.md section 9; NaN never appears, null does) and what the table is written
from, so the two cannot disagree. Anything the file or the command line makes impossible raises
``InputFileError`` or ``UsageError``: one line, exit status 2.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from monitor.commands._csv import CsvTable, check_model_names, read_csv_table
from monitor.errors import InputFileError, UsageError
from monitor.figures import leverage_text, number
from monitor.stats import diagnostics
from monitor.stats.ols import OlsFit, fit_ols
from monitor.text import did_you_mean, format_p_value

# Significance of the tests behind the diagnostic verdicts. It is not the interval level:
# ``--level`` sets the coverage of the intervals and leaves this alone.
VERDICT_SIGNIFICANCE = 0.05

# Common practice, no single source: Durbin–Watson between 1.5 and 2.5 reads as "no worrying
# autocorrelation"; VIF above 5 is moderate and above 10 strong collinearity; Cook's distance
# above 1 marks a row that moves the fit on its own.
DURBIN_WATSON_BAND = (1.5, 2.5)
VIF_MODERATE, VIF_STRONG = 5.0, 10.0
COOKS_DISTANCE_LARGE = 1.0

WIDTH = 100


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "fit",
        help="fit one candidate model on a CSV and show what monitoring would report",
        description="Fit a linear regression on a CSV file: coefficients with confidence "
        "intervals, residual diagnostics, and forecasts with prediction intervals at the "
        "points given by --at.",
    )
    parser.add_argument("file", metavar="FILE", help="CSV file with a header row")
    parser.add_argument("--response", required=True, metavar="Y", help="the response column")
    parser.add_argument(
        "--predictors", required=True, nargs="+", metavar="X", help="one or more predictor columns"
    )
    parser.add_argument("--no-intercept", action="store_true", help="fit a line through the origin")
    parser.add_argument(
        "--level",
        default="0.95",
        metavar="L",
        help="nominal coverage of every interval, strictly between 0 and 1 (default 0.95)",
    )
    parser.add_argument(
        "--at",
        action="append",
        default=[],
        metavar="X1=V1,X2=V2",
        help="a point to forecast at, giving every predictor; repeat for more points",
    )
    parser.add_argument("--format", choices=("table", "json"), default="table")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    level = parse_level(args.level)
    predictors = list(args.predictors)
    check_model_names(args.response, predictors, intercept=not args.no_intercept)
    points = [parse_at(text, predictors) for text in args.at]
    whole = read_csv_table(args.file)
    table, plans = split_plan_rows(whole, args.response)
    if not table.rows:
        raise InputFileError(
            f"{whole.path.name}: every row has an empty {args.response!r}, so there is nothing "
            "to fit; rows with the response empty are plan rows to forecast"
        )
    y = np.asarray(table.numeric_column(args.response), dtype=np.float64)
    columns = [table.numeric_column(name) for name in predictors]
    x = np.asarray(columns, dtype=np.float64).T.reshape(len(y), len(predictors))
    plan_columns = [plans.numeric_column(name) for name in predictors]
    plan_rows = [
        PlanRow(line, _row_label(plans, i, [args.response, *predictors]),
                {name: plan_columns[j][i] for j, name in enumerate(predictors)})
        for i, line in enumerate(plans.line_numbers)
    ]
    fit = fit_ols(x, y, intercept=not args.no_intercept, level=level, names=predictors)
    if not fit.estimable:
        raise InputFileError(
            f"{table.path.name}: cannot fit {args.response!r} on "
            f"{', '.join(repr(p) for p in predictors)}: {fit.reason}"
        )
    report = build_report(
        fit,
        x,
        response=args.response,
        file_name=table.path.name,
        line_numbers=table.line_numbers,
        points=points,
        plan_rows=plan_rows,
    )
    if args.format == "json":
        sys.stdout.write(json.dumps(report, indent=2, allow_nan=False) + "\n")
    else:
        sys.stdout.write(render_table(report))
    return 0


# --- command-line values ------------------------------------------------------------------------


def parse_level(text: str) -> float:
    """``--level`` as a float strictly between 0 and 1; anything else is a UsageError."""
    try:
        level = float(text)
    except ValueError:
        raise UsageError(
            f"--level {text!r} is not a number; give the coverage, e.g. 0.95"
        ) from None
    if not 0.0 < level < 1.0:
        raise UsageError(
            f"--level {text} is outside (0, 1); it is the nominal coverage, e.g. 0.95 or 0.80"
        )
    return level


def parse_at(text: str, predictors: Sequence[str]) -> dict[str, float]:
    """One ``--at X1=V1,X2=V2`` point: every predictor exactly once, each a finite number."""
    values: dict[str, float] = {}
    for item in text.split(","):
        name, equals, value_text = item.partition("=")
        name = name.strip()
        if not equals or not name:
            raise UsageError(
                f"--at {text!r}: write each value as NAME=NUMBER, e.g. {_example(predictors)}"
            )
        if name not in predictors:
            raise UsageError(
                f"--at {text!r}: {name!r} is not a predictor{did_you_mean(name, predictors)}; "
                f"predictors are {', '.join(predictors)}"
            )
        if name in values:
            raise UsageError(f"--at {text!r}: {name!r} is given twice")
        try:
            value = float(value_text.strip())
        except ValueError:
            raise UsageError(
                f"--at {text!r}: {name}={value_text.strip()!r} is not a number"
            ) from None
        if not math.isfinite(value):
            raise UsageError(f"--at {text!r}: {name}={value_text.strip()} is not a finite number")
        values[name] = value
    missing = [name for name in predictors if name not in values]
    if missing:
        raise UsageError(
            f"--at {text!r}: no value for {', '.join(missing)}; a point gives every predictor, "
            f"e.g. {_example(predictors)}"
        )
    return {name: values[name] for name in predictors}


@dataclass(frozen=True)
class PlanRow:
    """A row of the file with its response empty: a request for a forecast, as in a feed."""

    line: int
    label: str | None  # its first column (the period, in the README's format)
    at: dict[str, float]


def split_plan_rows(table: CsvTable, response: str) -> tuple[CsvTable, CsvTable]:
    """The rows with an actual (to fit) and the plan rows (response empty: to forecast, as a
    pass forecasts them; README "Your first model")."""
    texts = table.column_text(response)
    keep = [i for i, text in enumerate(texts) if text.strip()]
    plan = [i for i, text in enumerate(texts) if not text.strip()]

    def subset(indices: list[int]) -> CsvTable:
        return CsvTable(table.path, table.header, tuple(table.rows[i] for i in indices),
                        tuple(table.line_numbers[i] for i in indices))

    return subset(keep), subset(plan)


def _row_label(table: CsvTable, index: int, used: Sequence[str]) -> str | None:
    """What the file says the plan row is for: its first column, when that column is not one
    the model uses (a period, by the README's format)."""
    first = table.header[0]
    if first in used:
        return None
    text = table.rows[index][0].strip()
    return f"{first} {text}" if text else None


def _example(predictors: Sequence[str]) -> str:
    return ",".join(f"{name}=V" for name in predictors)


# --- the report ---------------------------------------------------------------------------------


def _number(value: float | np.floating | None) -> float | None:
    """A finite float, or None for NaN, infinity and None (JSON has no NaN)."""
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _test(result: diagnostics.TestResult) -> dict[str, Any]:
    entry: dict[str, Any] = {
        "statistic": _number(result.statistic),
        "p_value": _number(result.p_value),
    }
    if result.df is not None:
        entry["df"] = result.df
    entry["reason"] = result.reason
    return entry


def build_report(
    fit: OlsFit,
    x: np.ndarray[Any, np.dtype[np.float64]],
    *,
    response: str,
    file_name: str,
    line_numbers: Sequence[int],
    points: Sequence[dict[str, float]],
    plan_rows: Sequence[PlanRow] = (),
) -> dict[str, Any]:
    """The whole result as plain JSON-ready values: DESIGN.md section 9's keys and a few more.

    ``x`` (n, k) are the predictors the fit was made from; ``line_numbers`` the file line of each
    row (for naming the most influential rows); ``points`` the ``--at`` points; ``plan_rows``
    the file's rows with an empty response, forecast after the ``--at`` points.
    """
    predictors = list(fit.terms[int(fit.intercept) :])
    coefficients = [
        {
            "term": term,
            "estimate": _number(fit.coef[j]),
            "standard_error": _number(fit.standard_error[j]),
            "t": _number(fit.t[j]),
            "p_value": _number(fit.p_value[j]),
            "lower": _number(fit.lower[j]),
            "upper": _number(fit.upper[j]),
        }
        for j, term in enumerate(fit.terms)
    ]
    correlation = None
    if fit.correlation is not None:
        correlation = {
            "r": _number(fit.correlation),
            "t": _number(fit.correlation_t),
            "p_value": _number(fit.correlation_p_value),
        }
    return {
        "file": file_name,
        "response": response,
        "predictors": predictors,
        "intercept": fit.intercept,
        "n": fit.n,
        "residual_df": fit.residual_df,
        "r_squared": _number(fit.r_squared),
        "adj_r_squared": _number(fit.adj_r_squared),
        "residual_std_error": _number(fit.residual_std_error),
        "f_statistic": _number(fit.f_statistic),
        "f_p_value": _number(fit.f_p_value),
        "f_df": list(fit.f_df),
        "exact_fit": fit.exact_fit,
        "level": fit.level,
        "correlation": correlation,
        "coefficients": coefficients,
        "predictions": _predictions(fit, predictors, points, plan_rows),
        "diagnostics": _diagnostics(fit, x, predictors, line_numbers),
    }


def _predictions(
    fit: OlsFit, predictors: list[str], at_points: Sequence[dict[str, float]],
    plan_rows: Sequence[PlanRow] = (),
) -> list[dict[str, Any]]:
    sources: list[PlanRow | None] = [None] * len(at_points) + list(plan_rows)
    points = [*at_points, *(plan.at for plan in plan_rows)]
    if not points:
        return []
    x0 = np.array([[point[name] for name in predictors] for point in points], dtype=np.float64)
    forecast = fit.predict(x0)
    window_leverage = float(np.max(fit.leverage))
    rows: list[dict[str, Any]] = []
    for i, point in enumerate(points):
        outside = [
            name
            for j, name in enumerate(predictors)
            if not fit.x_min[j] <= point[name] <= fit.x_max[j]
        ]
        above = bool(forecast.leverage[i] > window_leverage)
        plan = sources[i]
        rows.append(
            {
                "at": dict(point),
                "plan_row": None if plan is None else {"line": plan.line, "label": plan.label},
                "point": _number(forecast.point[i]),
                "mean_lower": _number(forecast.mean_lower[i]),
                "mean_upper": _number(forecast.mean_upper[i]),
                "lower": _number(forecast.lower[i]),
                "upper": _number(forecast.upper[i]),
                "leverage": _number(forecast.leverage[i]),
                "extrapolation": bool(outside) or above,
                "outside_range": outside,
                "leverage_above_window": above,
            }
        )
    return rows


def _diagnostics(
    fit: OlsFit,
    x: np.ndarray[Any, np.dtype[np.float64]],
    predictors: list[str],
    line_numbers: Sequence[int],
) -> dict[str, Any]:
    residuals = np.asarray(fit.residuals)
    vif = diagnostics.variance_inflation(x)
    result: dict[str, Any] = {
        "durbin_watson": _test(diagnostics.durbin_watson_test(residuals, x, fit.intercept)),
        "breusch_pagan": _test(diagnostics.breusch_pagan(residuals, x)),
        "jarque_bera": _test(diagnostics.jarque_bera(residuals)),
        "vif": {name: _number(vif[j]) for j, name in enumerate(predictors)},
        "largest_leverage": _largest(np.asarray(fit.leverage), line_numbers),
        "largest_cooks_distance": _largest(
            diagnostics.cooks_distance(residuals, fit.leverage, fit.p), line_numbers
        ),
        "verdict_significance": VERDICT_SIGNIFICANCE,
    }
    return result


def _largest(
    values: np.ndarray[Any, np.dtype[np.float64]], lines: Sequence[int]
) -> dict[str, Any] | None:
    if values.size == 0 or not np.isfinite(values).any():
        return None
    row = int(np.nanargmax(values))
    return {"line": int(lines[row]), "value": float(values[row])}


# --- the table ----------------------------------------------------------------------------------


def _fmt(value: float | None, digits: int = 4) -> str:
    """``digits`` significant digits without an exponent for everyday sizes; n/a for None."""
    if value is None:
        return "n/a"
    if value == 0.0:
        return "0"
    size = abs(value)
    if size >= 1e9 or size < 1e-4:
        return f"{value:.{digits - 1}e}"
    decimals = max(0, digits - 1 - math.floor(math.log10(size)))
    return f"{value:.{decimals}f}"


def _p(value: float | None) -> str:
    text = format_p_value(value)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


_KEEP_TOGETHER = "\u00a0"  # textwrap never breaks at a no-break space


def _wrap(text: str, indent: str = "") -> str:
    """Fill to WIDTH columns without splitting "p < 0.0001" or "95 %"; indent continuations."""
    guarded = text.replace("p < ", f"p{_KEEP_TOGETHER}<{_KEEP_TOGETHER}").replace(
        " %", f"{_KEEP_TOGETHER}%"
    )
    filled = textwrap.fill(
        guarded,
        width=WIDTH,
        initial_indent=indent,
        subsequent_indent=indent + "  " if indent else "",
    )
    return filled.replace(_KEEP_TOGETHER, " ")


def _degrees(count: int) -> str:
    return f"{count} degree{'' if count == 1 else 's'} of freedom"


def _paragraph(text: str) -> str:
    return _wrap(text) + "\n"


def render_table(report: dict[str, Any]) -> str:
    """The human-readable output: a sentence with the result, columns, verdicts, forecasts."""
    parts = [
        _paragraph(_opening_sentence(report)),
        "\n",
        _paragraph(_fit_sentences(report)),
        "\n",
        _coefficient_table(report),
        "\n",
        _diagnostic_lines(report),
    ]
    if report["predictions"]:
        parts += ["\n", _prediction_lines(report)]
    parts += [
        "\n",
        _paragraph(
            "Caution: every interval here assumes the model's conditions hold (a straight-line "
            "relationship, independent errors of constant variance, roughly normal). A test "
            "result is a statistical signal, not proof."
        ),
    ]
    if report["f_statistic"] is not None:
        parts += ["\n", _paragraph(_footnote(report))]
    return "".join(parts)


def _opening_sentence(report: dict[str, Any]) -> str:
    percent = f"{report['level'] * 100:g} %"
    slopes = [c for c in report["coefficients"] if c["term"] != "intercept"]
    phrases = []
    for coefficient in slopes:
        estimate = coefficient["estimate"]
        direction = "rises" if estimate >= 0 else "falls"
        lower, upper = coefficient["lower"], coefficient["upper"]
        if report["exact_fit"]:
            interval = "exactly"
        else:
            interval = f"{percent} interval {_fmt(lower)} to {_fmt(upper)}"
            if lower <= 0.0 <= upper:
                interval += ", which includes no effect"
        phrases.append(
            f"{direction} by {_fmt(abs(estimate))} for each unit of {coefficient['term']} "
            f"({interval})"
        )
    held = ", holding the other predictors fixed" if len(slopes) > 1 else ""
    r2_name = "R²" if report["intercept"] else "R² (uncentred, no intercept)"
    return (
        f"{r2_name} {_fmt(report['r_squared'], 3)} on {report['n']} rows: "
        f"{report['response']} {' and '.join(phrases)}{held}."
    )


def _fit_sentences(report: dict[str, Any]) -> str:
    terms = (["intercept"] if report["intercept"] else []) + report["predictors"]
    text = (
        f"Model: {report['response']} = {' + '.join(terms)}, least squares on "
        f"{report['n']} rows of {report['file']}. "
    )
    if report["exact_fit"]:
        return text + (
            "The fit is exact: every residual is zero, so there is no error to estimate; "
            "standard errors are 0 and t statistics and p-values do not apply."
        )
    text += (
        f"Adjusted R²{'' if report['intercept'] else ' (uncentred)'} "
        f"{_fmt(report['adj_r_squared'], 3)}. A typical actual lies about "
        f"{_fmt(report['residual_std_error'])} from the fitted value (the residual standard "
        "error). "
    )
    if report["f_statistic"] is not None:
        text += _joint_sentence(report) + " "
    if report["correlation"] is not None:
        text += (
            f"Correlation r = {_fmt(report['correlation']['r'], 3)} "
            f"({_p(report['correlation']['p_value'])})."
        )
    return text.rstrip()


def _joint_sentence(report: dict[str, Any]) -> str:
    """What the F test says for the forecast, in words; its statistic and degrees of freedom go
    to the footnote (``_footnote``) and stay in the JSON (``f_statistic``, ``f_df``)."""
    predictors = report["predictors"]
    names = predictors[0] if len(predictors) == 1 else (
        ", ".join(predictors[:-1]) + " and " + predictors[-1])
    subject = names if len(predictors) == 1 else f"Together, {names}"
    verb = "explains" if len(predictors) == 1 else "explain"
    against = "its average alone" if report["intercept"] else "a forecast of zero"
    p = _p(report["f_p_value"])
    if report["f_p_value"] is not None and report["f_p_value"] < VERDICT_SIGNIFICANCE:
        return (
            f"{subject} {verb} {report['response']} better than {against} ({p}¹): the "
            "forecasts carry information that a flat "
            f"{'average' if report['intercept'] else 'zero'} would not."
        )
    return (
        f"{subject} {verb} {report['response']} no better than {against} ({p}¹): a forecast "
        f"from this model is little better than the {'average' if report['intercept'] else 'zero'}"
        " repeated; look for other predictors before relying on it."
    )


def _footnote(report: dict[str, Any]) -> str:
    numerator, denominator = report["f_df"]
    return (
        f"¹ The F test that every slope is zero: F = {_fmt(report['f_statistic'])} with "
        f"{numerator} and {_degrees(denominator)}."
    )


def _coefficient_table(report: dict[str, Any]) -> str:
    percent = f"{report['level'] * 100:g} %"
    caption = (
        f"Coefficients, with {percent} confidence intervals (lower, upper); t and p-values on "
        f"{_degrees(report['residual_df'])}:"
    )
    header = ("term", "estimate", "standard error", "t", "p-value", "lower", "upper")
    rows = [
        (
            c["term"],
            _fmt(c["estimate"], 6),
            _fmt(c["standard_error"], 4),
            _fmt(c["t"], 4),
            format_p_value(c["p_value"]),
            _fmt(c["lower"], 6),
            _fmt(c["upper"], 6),
        )
        for c in report["coefficients"]
    ]
    widths = [max(len(row[i]) for row in (header, *rows)) for i in range(len(header))]
    lines = [_wrap(caption)]
    for row in (header, *rows):
        cells = [row[0].ljust(widths[0])] + [row[i].rjust(widths[i]) for i in range(1, len(row))]
        lines.append("  " + "   ".join(cells).rstrip())
    return "\n".join(lines) + "\n"


def _diagnostic_lines(report: dict[str, Any]) -> str:
    found = report["diagnostics"]
    significance = f"{VERDICT_SIGNIFICANCE * 100:g} %"
    lines = [f"Checks of the model's conditions (tests at the {significance} significance level):"]
    if report["exact_fit"]:
        lines.append(
            _wrap(
                "Durbin–Watson, Breusch–Pagan, Jarque–Bera: do not apply to an exact fit (no "
                "residual variation to test).",
                "  ",
            )
        )
    else:
        lines.append(_wrap(_durbin_watson_line(found["durbin_watson"]), "  "))
        lines.append(_wrap(_breusch_pagan_line(found["breusch_pagan"]), "  "))
        lines.append(_wrap(_jarque_bera_line(found["jarque_bera"]), "  "))
    lines.append(_wrap(_vif_line(found["vif"]), "  "))
    cook = found["largest_cooks_distance"]
    if cook is not None:
        if cook["value"] > COOKS_DISTANCE_LARGE:
            verdict = (
                "this row alone moves the fit noticeably; check it for an error or a one-off event"
            )
        else:
            verdict = "no single row dominates the fit"
        lines.append(
            _wrap(
                f"Largest Cook's distance {_fmt(cook['value'], 3)} at line {cook['line']}: "
                f"{verdict} (a rule of thumb looks twice at values above 1).",
                "  ",
            )
        )
    return "\n".join(lines) + "\n"


def _undefined(name: str, test: dict[str, Any]) -> str:
    return f"{name}: not computed ({test['reason']})."


def _durbin_watson_line(test: dict[str, Any]) -> str:
    d = test["statistic"]
    if d is None:
        return _undefined("Durbin–Watson", test)
    low, high = DURBIN_WATSON_BAND
    shown = f"Durbin–Watson {_fmt(d, 3)}"
    if test["p_value"] is not None:
        shown += f" ({_p(test['p_value'])})"
    elif test["reason"]:
        shown += f" (no exact p-value: {test['reason']})"
    if test["p_value"] is None:
        # No exact p-value (too many rows or too few degrees of freedom): the rule of thumb
        # speaks, and says it is one.
        if d < low:
            verdict = ("successive errors look positively correlated, so the intervals are "
                       "likely too narrow (d below 1.5, a rule of thumb, not a test)")
        elif d > high:
            verdict = ("successive errors look negatively correlated (d above 2.5, a rule of "
                       "thumb, not a test)")
        else:
            verdict = "d is inside the usual 1.5 to 2.5 band (a rule of thumb, not a test)"
        return f"{shown}: {verdict}."
    # With the exact p-value the verdict is the test's at the announced significance; the
    # rule of thumb only adds words where it disagrees.
    significant = test["p_value"] < VERDICT_SIGNIFICANCE
    outside = d < low or d > high
    if significant and d < 2.0:
        verdict = ("successive errors look positively correlated, so the intervals are likely "
                   "too narrow")
    elif significant:
        verdict = "successive errors look negatively correlated"
    else:
        verdict = "no sign of autocorrelated errors"
    if significant and not outside:
        verdict += " (d is inside the usual 1.5 to 2.5 band of the rule of thumb, but the exact " \
                   "test rejects)"
    elif outside and not significant:
        verdict += (" (d is outside the usual 1.5 to 2.5 band of the rule of thumb, but the "
                    "exact test does not reject)")
    return f"{shown}: {verdict}."


def _breusch_pagan_line(test: dict[str, Any]) -> str:
    if test["statistic"] is None:
        return _undefined("Breusch–Pagan", test)
    shown = (
        f"Breusch–Pagan {_fmt(test['statistic'], 3)} on {_degrees(test['df'])} "
        f"({_p(test['p_value'])})"
    )
    if test["p_value"] < VERDICT_SIGNIFICANCE:
        verdict = (
            "the error variance appears to change with the predictors, so the intervals are "
            "too narrow where the scatter is wide and too wide where it is tight"
        )
    else:
        verdict = "no sign that the error variance changes with the predictors"
    return f"{shown}: {verdict}."


def _jarque_bera_line(test: dict[str, Any]) -> str:
    if test["statistic"] is None:
        return _undefined("Jarque–Bera", test)
    shown = f"Jarque–Bera {_fmt(test['statistic'], 3)} ({_p(test['p_value'])})"
    if test["p_value"] < VERDICT_SIGNIFICANCE:
        verdict = (
            "the residuals do not look normal (skewed or heavy-tailed), so the prediction "
            "intervals' coverage may differ from the nominal level"
        )
    else:
        verdict = "no sign of non-normal errors"
    return f"{shown}: {verdict}."


def _vif_line(vif: dict[str, float | None]) -> str:
    if len(vif) < 2:
        return "VIF: one predictor, so there is no collinearity to measure (VIF 1)."
    shown = ", ".join(f"{name} {_fmt(value, 3)}" for name, value in vif.items())
    largest = max((v for v in vif.values() if v is not None), default=0.0)
    if largest > VIF_STRONG:
        verdict = (
            "strong collinearity (above 10, a rule of thumb): the predictors move together, "
            "so their separate slopes are poorly determined even if the forecasts are fine"
        )
    elif largest > VIF_MODERATE:
        verdict = (
            "moderate collinearity (above 5, a rule of thumb): the slopes' standard errors are "
            "inflated"
        )
    else:
        verdict = "the predictors are not strongly related to each other"
    return f"VIF {shown}: {verdict}."


def _at_text(row: dict[str, Any]) -> str:
    """Where a forecast is made: the predictor values, and for a plan row its line and label."""
    at = ", ".join(f"{name}={value:g}" for name, value in row["at"].items())
    plan = row.get("plan_row")
    if plan is None:
        return at
    return f"{plan['label'] or 'plan row'} (line {plan['line']}): {at}"


def _prediction_lines(report: dict[str, Any]) -> str:
    percent = f"{report['level'] * 100:g} %"
    lines = [
        _wrap(
            f"Forecasts. Publish the {percent} prediction interval: it is meant to hold a new "
            "actual. The mean-response interval beside it is narrower because it covers only "
            "the average at that point; it is not for scoring."
        )
    ]
    header = ("at", "point", "prediction interval", "mean-response interval", "leverage")
    rows = [
        (
            _at_text(row),
            # forecasts by the reports' rule for them (monitor.figures): 4 significant digits
            number(row["point"]),
            f"{number(row['lower'])} to {number(row['upper'])}",
            f"{number(row['mean_lower'])} to {number(row['mean_upper'])}",
            leverage_text(row["leverage"]),
        )
        for row in report["predictions"]
    ]
    widths = [max(len(row[i]) for row in (header, *rows)) for i in range(len(header))]
    for row in (header, *rows):
        cells = [row[0].ljust(widths[0])] + [row[i].rjust(widths[i]) for i in range(1, len(row))]
        lines.append("  " + "   ".join(cells).rstrip())
    for row in report["predictions"]:
        if not row["extrapolation"]:
            continue
        at = _at_text(row)
        reasons = []
        if row["outside_range"]:
            reasons.append(f"{', '.join(row['outside_range'])} outside the range of the data")
        if row["leverage_above_window"]:
            reasons.append("leverage above every row of the data")
        lines.append(
            _wrap(
                f"Extrapolation at {at}: {'; '.join(reasons)}. The interval assumes the line "
                "holds there too.",
                "  ",
            )
        )
    return "\n".join(lines) + "\n"


__all__ = ["build_report", "parse_at", "parse_level", "register", "render_table", "run"]
