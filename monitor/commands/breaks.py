"""``plumbline breaks``: the retrospective change tests on one CSV.

    plumbline breaks FILE --response Y [--predictors X ...] [--period COL] [--no-intercept]
                     [--format table|json]

Rows are taken in file order, which must be time order. Without ``--predictors`` the model is
the mean alone (the intercept), so the tests look for a shift in level. Three tests run on the
same least-squares model (``monitor.stats.supf.break_tests``):

- the CUSUM of recursive residuals (Brown, Durbin & Evans 1975) against its 5 % lines;
- the OLS-residual CUSUM (Ploberger & Krämer 1992);
- sup-F over every split with 15 % trimming (Andrews 1993, 2003), which also dates the break.

``build_report`` makes one plain dict, both the JSON output (DESIGN.md section 9's keys, no NaN)
and the source of the table. A bad file or command line raises ``InputFileError`` or
``UsageError``: one line, exit status 2.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import textwrap
from collections.abc import Sequence
from typing import Any

import numpy as np

from monitor.commands._csv import CsvTable, check_model_names, read_csv_table
from monitor.errors import InputFileError, UsageError
from monitor.stats.supf import DEFAULT_TRIMMING, break_tests
from monitor.text import format_p_value

# The level at which the verdicts are worded; the CUSUM lines are drawn for it.
SIGNIFICANCE = 0.05
WIDTH = 100


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "breaks",
        help="test a CSV's regression for a change over time (CUSUM, OLS-CUSUM, sup-F)",
        description="Test whether a regression on a CSV file stayed the same over its rows (in "
        "file order): the CUSUM of recursive residuals, the OLS-residual CUSUM, and sup-F over "
        "every candidate break, which also estimates where the break is. Without --predictors "
        "the model is the mean alone.",
    )
    parser.add_argument(
        "file", metavar="FILE", help="CSV file with a header row, rows in time order"
    )
    parser.add_argument("--response", required=True, metavar="Y", help="the response column")
    parser.add_argument(
        "--predictors",
        nargs="*",
        default=[],
        metavar="X",
        help="predictor columns (none: the mean alone)",
    )
    parser.add_argument(
        "--period", metavar="COL", help="column naming each row's period, shown as written"
    )
    parser.add_argument("--no-intercept", action="store_true", help="fit without an intercept")
    parser.add_argument("--format", choices=("table", "json"), default="table")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    predictors = list(args.predictors)
    intercept = not args.no_intercept
    check_model_names(args.response, predictors, intercept)
    if not intercept and not predictors:
        raise UsageError("--no-intercept without --predictors leaves no model to test")
    table = read_csv_table(args.file)
    y = np.asarray(table.numeric_column(args.response), dtype=np.float64)
    columns = [table.numeric_column(name) for name in predictors]
    periods = None
    if args.period is not None:
        periods = [text.strip() for text in table.column_text(args.period)]
    x = np.asarray(columns, dtype=np.float64).T.reshape(len(y), len(predictors))
    report = build_report(
        table, x, y, response=args.response, predictors=predictors, intercept=intercept,
        periods=periods, period_column=args.period,
    )  # fmt: skip
    if args.format == "json":
        sys.stdout.write(json.dumps(report, indent=2, allow_nan=False) + "\n")
    else:
        sys.stdout.write(render_table(report))
    return 0


def minimum_rows(p: int) -> int:
    """Fewest rows for which every test can run with p coefficients: each sup-F regime needs
    p + 1 rows, so 2p + 2 (and the CUSUM then has p + 2 ≥ 2 recursive residuals)."""
    return 2 * p + 2


# --- the report ---------------------------------------------------------------------------------


def _number(value: float | None) -> float | None:
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def build_report(
    table: CsvTable,
    x: np.ndarray[Any, np.dtype[np.float64]],
    y: np.ndarray[Any, np.dtype[np.float64]],
    *,
    response: str,
    predictors: Sequence[str],
    intercept: bool,
    periods: Sequence[str] | None,
    period_column: str | None,
) -> dict[str, Any]:
    """Run the three tests and return the JSON-ready report (DESIGN.md section 9's keys).

    x (n, k) predictors, y (n,); ``periods`` the period column's text per row, or None.
    """
    n = int(y.size)
    p = len(predictors) + int(intercept)
    if n < minimum_rows(p):
        raise InputFileError(
            f"{table.path.name}: {n} data rows; the break tests with {p} coefficient(s) need "
            f"at least {minimum_rows(p)}"
        )
    names = list(predictors)
    tests = break_tests(x, y, intercept=intercept, names=names)
    recursive = tests.recursive
    cusum = tests.cusum.series(0)
    ols = tests.ols_cusum.series(0)
    sup_f = tests.sup_f.series(0)
    if not ols.applicable and ols.reason is not None and not ols.reason.startswith("the fit"):
        raise InputFileError(f"{table.path.name}: cannot test {response!r}: {ols.reason}")
    lines = table.line_numbers

    def period_of(index: int | None) -> str | None:
        if index is None or periods is None:
            return None
        return periods[index]

    def line_of(index: int | None) -> int | None:
        return None if index is None else int(lines[index])

    crossings = {
        f"{level:.2f}": {"index": index, "period": period_of(index), "line": line_of(index)}
        for level, index in cusum.first_crossing.items()
    }
    return {
        "file": table.path.name,
        "response": response,
        "predictors": list(predictors),
        "intercept": intercept,
        "n": n,
        "coefficients": p,
        "period_column": period_column,
        "first_period": period_of(0),
        "last_period": period_of(n - 1),
        "significance": SIGNIFICANCE,
        "cusum": {
            "statistic": _number(cusum.statistic),
            "crossed": cusum.crossed,
            "first_crossing": period_of(cusum.first_crossing_index),
            "first_crossing_index": cusum.first_crossing_index,
            "first_crossing_line": line_of(cusum.first_crossing_index),
            "crossings_by_level": crossings,
            "p_value": _number(cusum.p_value),
            "sigma": _number(cusum.sigma),
            "recursive_residuals": int(recursive.count[0]),
            "applicable": cusum.applicable,
            "reason": cusum.reason,
        },
        "ols_cusum": {
            "statistic": _number(ols.statistic),
            "p_value": _number(ols.p_value),
            "peak_index": ols.peak_index,
            "peak_period": period_of(ols.peak_index),
            "peak_line": line_of(ols.peak_index),
            "applicable": ols.applicable,
            "reason": ols.reason,
        },
        "sup_f": {
            "statistic": _number(sup_f.statistic),
            "p_value": _number(sup_f.p_value),
            "p_value_bound": sup_f.p_value_bound,
            "p_value_note": sup_f.p_value_note,
            "break_index": sup_f.break_index,
            "break_period": period_of(sup_f.break_index),
            "break_line": line_of(sup_f.break_index),
            "last_period_before_break": period_of(
                None if sup_f.break_index is None else sup_f.break_index - 1
            ),
            "first_regime_rows": sup_f.first_regime_rows,
            "wald_statistic": _number(sup_f.wald),
            "restrictions": sup_f.restrictions,
            "trimming": DEFAULT_TRIMMING,
            "candidates": sup_f.candidates,
            "applicable": sup_f.applicable,
            "reason": sup_f.reason,
        },
    }


# --- the table ----------------------------------------------------------------------------------


def _fmt(value: float | None, digits: int = 4) -> str:
    if value is None:
        return "n/a"
    if value == 0.0:
        return "0"
    size = abs(value)
    if size >= 1e9 or size < 1e-4:
        return f"{value:.{digits - 1}e}"
    decimals = max(0, digits - 1 - math.floor(math.log10(size)))
    return f"{value:.{decimals}f}"


def _p_text(p_value: float | None, bound: str | None = None) -> str:
    if p_value is None:
        return "n/a"
    if bound == "below":
        return f"< {p_value:g}"
    if bound == "above":
        return f"> {p_value:g}"
    return format_p_value(p_value)


def _p_phrase(p_value: float | None, bound: str | None = None) -> str:
    text = _p_text(p_value, bound)
    return f"p {text}" if text.startswith(("<", ">")) else f"p = {text}"


def _where(report: dict[str, Any], index: int | None, line: int | None, period: str | None) -> str:
    if index is None:
        return "nowhere"
    if period is not None:
        return f"{report['period_column']} {period} (line {line})"
    return f"line {line} of the file"


def _wrap(text: str, indent: str = "") -> str:
    keep = "\u00a0"  # textwrap never breaks at a no-break space
    guarded = text.replace("p < ", f"p{keep}<{keep}").replace(" %", f"{keep}%")
    filled = textwrap.fill(
        guarded, width=WIDTH, initial_indent=indent, subsequent_indent=indent + "  "
    )
    return filled.replace(keep, " ")


def _model_words(report: dict[str, Any]) -> str:
    if not report["predictors"]:
        return f"the mean of {report['response']}"
    on = ", ".join(report["predictors"])
    through = "" if report["intercept"] else ", through the origin"
    return f"{report['response']} on {on}{through}"


def _opening(report: dict[str, Any]) -> str:
    span = ""
    if report["first_period"] is not None:
        span = f" ({report['first_period']} to {report['last_period']})"
    head = (
        f"Change tests of {_model_words(report)} over {report['n']} rows{span} of "
        f"{report['file']}: "
    )
    sup_f = report["sup_f"]
    signals = [
        name
        for name, key in (("CUSUM", "cusum"), ("OLS-CUSUM", "ols_cusum"))
        if _signals(report, key)
    ]
    if sup_f["applicable"] and _signals(report, "sup_f"):
        where = _where(report, sup_f["break_index"], sup_f["break_line"], sup_f["break_period"])
        text = (
            f"sup-F finds a break, with the new regime starting at {where}: sup-F "
            f"{_fmt(sup_f['statistic'])}, {_p_phrase(sup_f['p_value'], sup_f['p_value_bound'])}"
        )
        if signals:
            text += f"; {' and '.join(signals)} also signal a change."
        else:
            text += "; the CUSUM tests do not confirm it at the 5 % level."
        return head + text
    unjudged = sup_f["applicable"] and sup_f["p_value"] is None
    if signals:
        if unjudged:
            return head + (
                f"{' and '.join(signals)} signal a change; sup-F has no p-value here "
                f"({sup_f['p_value_note']}), so it neither dates nor rules out a break."
            )
        return head + f"{' and '.join(signals)} signal a change; sup-F does not date one."
    applicable = [report[key]["applicable"] for key in ("cusum", "ols_cusum", "sup_f")]
    if not any(applicable):
        return head + "none of the tests applies (see the reasons below)."
    if unjudged:
        # A missing p-value is not evidence of no change: say which tests looked and which could
        # not be judged.
        looked = [name for name, key in (("CUSUM", "cusum"), ("OLS-CUSUM", "ols_cusum"))
                  if report[key]["applicable"]]
        found = f"{' and '.join(looked)} find no change at the 5 % level; " if looked else ""
        return head + (
            f"{found}sup-F cannot be judged: it has no p-value here ({sup_f['p_value_note']})."
        )
    return head + "no test finds a change at the 5 % level."


def _signals(report: dict[str, Any], key: str) -> bool:
    test = report[key]
    if not test["applicable"]:
        return False
    if key == "cusum":
        return bool(test["crossed"])
    return test["p_value"] is not None and test["p_value"] < report["significance"]


def _cusum_verdict(report: dict[str, Any]) -> str:
    test = report["cusum"]
    if not test["applicable"]:
        return f"not applicable: {test['reason']}"
    if test["crossed"]:
        where = _where(
            report,
            test["first_crossing_index"],
            test["first_crossing_line"],
            test["first_crossing"],
        )
        return f"crossed the 5 % lines, first at {where}"
    return "stayed inside the 5 % lines: no sign of instability"


def _ols_verdict(report: dict[str, Any]) -> str:
    test = report["ols_cusum"]
    if not test["applicable"]:
        return f"not applicable: {test['reason']}"
    if _signals(report, "ols_cusum"):
        index = test["peak_index"]
        where = _where(report, index, test["peak_line"], test["peak_period"])
        return f"the residuals drift from zero: a change, cumulative sum largest at {where}"
    return "the residuals do not drift: no sign of a change"


def _sup_f_verdict(report: dict[str, Any]) -> str:
    test = report["sup_f"]
    if not test["applicable"]:
        return f"not applicable: {test['reason']}"
    where = _where(report, test["break_index"], test["break_line"], test["break_period"])
    rows = test["first_regime_rows"]
    if _signals(report, "sup_f"):
        return f"a break: new regime from {where}, after {rows} rows"
    if test["p_value"] is None:
        return f"no p-value: {test['p_value_note']}; the best split starts at {where}"
    return f"no break at the 5 % level; the best split would start at {where}"


def render_table(report: dict[str, Any]) -> str:
    """The readable output: a sentence with the result, one line per test, notes, a caution."""
    cusum, ols, sup_f = report["cusum"], report["ols_cusum"], report["sup_f"]
    trim = f"{sup_f['trimming'] * 100:g} %"
    rows = [
        ("CUSUM of recursive residuals", _fmt(cusum["statistic"]),
         _p_text(cusum["p_value"]), _cusum_verdict(report)),
        ("OLS-residual CUSUM", _fmt(ols["statistic"]), _p_text(ols["p_value"]),
         _ols_verdict(report)),
        (f"sup-F, {trim} trimming", _fmt(sup_f["statistic"]),
         _p_text(sup_f["p_value"], sup_f["p_value_bound"]), _sup_f_verdict(report)),
    ]  # fmt: skip
    header = ("test", "statistic", "p-value", "verdict")
    widths = [max(len(row[i]) for row in (header, *rows)) for i in range(3)]
    lines = [_wrap(_opening(report)), ""]
    for row in (header, *rows):
        left = (
            f"  {row[0].ljust(widths[0])}   {row[1].rjust(widths[1])}   "
            f"{row[2].rjust(widths[2])}   "
        )
        verdict = textwrap.wrap(row[3], width=max(30, WIDTH - len(left))) or [""]
        lines.append(left + verdict[0])
        lines.extend(" " * len(left) + more for more in verdict[1:])
    lines.append("")
    notes = (
        "How to read it: the CUSUM statistic is the largest ratio of the cumulative recursive "
        "residuals to the 5 % boundary line (above 1 means crossed; its p-value is Durbin's "
        "approximation). The OLS-CUSUM statistic is the largest cumulative residual sum over "
        "σ̂√n, referred to the Kolmogorov distribution. sup-F is the largest Chow F over every "
        f"split leaving at least {trim} of the rows on each side; its p-value comes "
        "from a simulated table of the limit distribution (reported as below 0.001 beyond it). "
        "The break period named is the first row of the new regime."
    )
    lines.append(_wrap(notes))
    lines.append("")
    lines.append(
        _wrap(
            "Caution: a test result is a statistical signal, not proof that anything changed in "
            "the business; it assumes the rows are in time order and the model's conditions hold "
            "(independent errors of constant variance). Autocorrelated errors alone can make "
            "these tests signal a change that is not there."
        )
    )
    return "\n".join(lines) + "\n"


__all__ = ["build_report", "minimum_rows", "register", "render_table", "run"]
