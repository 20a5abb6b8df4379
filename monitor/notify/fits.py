"""A stored fit as reports show it: the opening sentence, the coefficient columns and one line per
diagnostic with its verdict in words (DESIGN.md section 2).

The pass stores each fit's ``coefficients``, ``inference`` and ``diagnostics`` as JSON
(:class:`monitor.store.FitRecord`). This module reads them in the shapes below and tolerates the
absence of any key (it then says "not recorded" rather than guessing):

- ``coefficients``: ``{term: {estimate, standard_error, t, p_value, lower, upper}}`` in term
  order (the intercept's term is ``intercept``), or a list of such dicts each with ``term``.
- ``inference``: ``r_squared``, ``adj_r_squared``, ``residual_std_error``, ``residual_df``,
  ``f_statistic``, ``f_p_value``, ``level``, ``exact_fit``.
- ``diagnostics`` (as ``monitor.passes`` writes them): ``durbin_watson`` as a number (or
  ``{statistic, p_value}``), ``breusch_pagan`` and ``jarque_bera`` as ``{statistic, p_value}``,
  ``vif`` as ``{predictor: value}``, ``baseline`` as ``{r_squared, coefficients: {term:
  {estimate, lower, upper, p_value}}}``, ``monitoring`` (see :func:`monitoring_arrays`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from monitor.notify.words import level_text, number, p_text
from monitor.store import FitRecord
from monitor.text import format_p_value

# Significance at which the diagnostic verdicts are worded when a model gives none.
DEFAULT_SIGNIFICANCE = 0.05
VIF_HIGH = 5.0  # common practice: above 5 the slopes' standard errors are noticeably inflated

# Durbin–Watson outside 1.5–2.5 is a rule of thumb (common practice), not a test: used only for
# fits recorded without the Breusch–Godfrey p-value.
DURBIN_WATSON_LOW = 1.5
DURBIN_WATSON_HIGH = 2.5


@dataclass(frozen=True)
class CoefficientRow:
    term: str
    estimate: float | None
    standard_error: float | None
    t: float | None
    p_value: float | None
    lower: float | None
    upper: float | None

    @property
    def cells(self) -> tuple[str, ...]:
        """The row as the columns show it: estimate, standard error, t, p-value, lower, upper."""
        return (
            number(self.estimate, 6), number(self.standard_error, 4), number(self.t, 4),
            format_p_value(self.p_value), number(self.lower, 6), number(self.upper, 6),
        )


@dataclass(frozen=True)
class FitView:
    """One stored fit, ready for a page."""

    fit_id: int
    series: str | None
    n: int
    estimable: bool
    reason: str | None
    window_first: str | None
    window_last: str | None
    level: float
    r_squared: float | None
    residual_std_error: float | None
    residual_df: int | None
    coefficients: tuple[CoefficientRow, ...]
    diagnostics: tuple[str, ...]
    sentence: str
    caption: str

    def slope(self, term: str | None = None) -> CoefficientRow | None:
        """The first slope (or the named term's row)."""
        for row in self.coefficients:
            if (term is None and row.term != "intercept") or row.term == term:
                return row
        return None


def _float(value: Any) -> float | None:
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, int | float):
        return float(value)
    return None


def _coefficient_rows(raw: Any) -> tuple[CoefficientRow, ...]:
    items: list[tuple[str, Mapping[str, Any]]] = []
    if isinstance(raw, Mapping):
        nested = raw.get("coefficients") if "coefficients" in raw else None
        if isinstance(nested, list):
            raw = nested
        else:
            items = [(str(term), v) for term, v in raw.items() if isinstance(v, Mapping)]
    if isinstance(raw, list):
        items = [(str(v.get("term")), v) for v in raw if isinstance(v, Mapping)]
    return tuple(
        CoefficientRow(
            term, _float(v.get("estimate")), _float(v.get("standard_error")), _float(v.get("t")),
            _float(v.get("p_value")), _float(v.get("lower")), _float(v.get("upper")),
        )
        for term, v in items
    )


def read_fit(record: FitRecord, *, response: str, significance: float | None = None) -> FitView:
    """The page view of a stored fit; ``response`` names the model's response column."""
    inference = record.inference
    level = _float(inference.get("level")) or 0.95
    coefficients = _coefficient_rows(record.coefficients)
    alpha = DEFAULT_SIGNIFICANCE if significance is None else significance
    r2 = _float(inference.get("r_squared"))
    df = inference.get("residual_df")
    residual_df = int(df) if isinstance(df, int | float) and not isinstance(df, bool) else None
    view = FitView(
        fit_id=record.id,
        series=record.series,
        n=record.n,
        estimable=record.estimable,
        reason=record.reason,
        window_first=record.window_first,
        window_last=record.window_last,
        level=level,
        r_squared=r2,
        residual_std_error=_float(inference.get("residual_std_error")),
        residual_df=residual_df,
        coefficients=coefficients,
        diagnostics=tuple(diagnostic_lines(record.diagnostics, alpha)),
        sentence="",
        caption=(
            f"Coefficients with {level_text(level)} confidence intervals (lower, upper)"
            + ("" if residual_df is None else f"; t and p-values on {residual_df} degrees of "
               "freedom")
            + "."
        ),
    )
    return _with_sentence(view, response, bool(inference.get("exact_fit")))


def _with_sentence(view: FitView, response: str, exact: bool) -> FitView:
    if not view.estimable:
        sentence = f"Not estimable on {view.n} rows: {view.reason or 'no reason recorded'}."
    else:
        window = ""
        if view.window_first and view.window_last:
            window = f" ({view.window_first} to {view.window_last})"
        r2 = "n/a" if view.r_squared is None else f"{view.r_squared:.2f}"
        parts = [f"R² {r2} on {view.n} periods{window}"]
        for row in view.coefficients:
            if row.term == "intercept":
                continue
            if exact:
                parts.append(f"slope {number(row.estimate)} per {row.term}, exactly")
                continue
            interval = (f"{level_text(view.level)} interval {number(row.lower)} to "
                        f"{number(row.upper)}")
            if row.lower is not None and row.upper is not None and row.lower <= 0 <= row.upper:
                interval += ", which includes no effect"
            parts.append(f"slope {number(row.estimate)} per {row.term}, {interval}")
        sentence = "; ".join(parts) + "."
        if exact:
            sentence += f" The fit of {response} is exact: no error is left to estimate."
    return FitView(**{**view.__dict__, "sentence": sentence})


def diagnostic_lines(diagnostics: Mapping[str, Any], alpha: float) -> list[str]:
    """One line per recorded diagnostic, each with its verdict in words."""
    lines: list[str] = []
    dw = diagnostics.get("durbin_watson")
    if isinstance(dw, Mapping):
        dw_value, p = _float(dw.get("statistic")), _float(dw.get("p_value"))
    else:
        dw_value, p = _float(dw), None
    bg = diagnostics.get("breusch_godfrey")
    bg_p = _float(bg.get("p_value")) if isinstance(bg, Mapping) else None
    if dw_value is not None and bg_p is not None:
        # The verdict is the Breusch–Godfrey test's at ``alpha`` (what the finding uses).
        if bg_p < alpha:
            side = "positively" if dw_value < 2 else "negatively"
            verdict = (f"consecutive errors look {side} correlated, so the intervals may be too "
                       "narrow")  # fmt: skip
        else:
            verdict = "no sign that consecutive errors follow each other"
        lines.append(f"Durbin–Watson {dw_value:.2f}; Breusch–Godfrey {p_text(bg_p)}: {verdict}.")
    elif dw_value is not None:
        # Fits recorded before the Breusch–Godfrey test was kept: the rule of thumb, said so.
        value = dw_value
        p_part = "" if p is None else f", {p_text(p)}"
        if DURBIN_WATSON_LOW <= value <= DURBIN_WATSON_HIGH:
            verdict = "no sign that consecutive errors follow each other"
        else:
            side = "positively" if value < 2 else "negatively"
            verdict = (f"consecutive errors look {side} correlated, so the intervals may be too "
                       "narrow")  # fmt: skip
        lines.append(
            f"Durbin–Watson {value:.2f}{p_part}: {verdict} (the 1.5 to 2.5 band is a "
            "rule of thumb)."
        )
    bp = diagnostics.get("breusch_pagan")
    if isinstance(bp, Mapping) and _float(bp.get("statistic")) is not None:
        p = _float(bp.get("p_value"))
        verdict = (
            "the spread of the errors changes with the predictors"
            if p is not None and p < alpha
            else "no sign that the spread of the errors changes with the predictors"
        )
        lines.append(f"Breusch–Pagan {number(_float(bp['statistic']), 3)}, {p_text(p)}: {verdict}.")
    jb = diagnostics.get("jarque_bera")
    if isinstance(jb, Mapping) and _float(jb.get("statistic")) is not None:
        p = _float(jb.get("p_value"))
        verdict = (
            "the errors do not look normal; intervals for small windows may be off"
            if p is not None and p < alpha
            else "no sign of non-normal errors"
        )
        lines.append(f"Jarque–Bera {number(_float(jb['statistic']), 3)}, {p_text(p)}: {verdict}.")
    vif = diagnostics.get("vif")
    if isinstance(vif, Mapping) and len(vif) >= 2:
        values = {str(k): _float(v) for k, v in vif.items()}
        high = [k for k, v in values.items() if v is not None and v > VIF_HIGH]
        listing = ", ".join(f"{k} {number(v, 3)}" for k, v in values.items())
        verdict = (
            f"{', '.join(high)} inflated by the other predictors (above 5, common practice)"
            if high else "no troubling collinearity (all at most 5, common practice)"
        )
        lines.append(f"VIF {listing}: {verdict}.")
    return lines


@dataclass(frozen=True, eq=False)
class MonitoringPath:
    """The sequential monitoring statistic of one series, per monitored period."""

    periods: tuple[str, ...]
    statistic: tuple[float, ...]
    boundary: tuple[float, ...]
    crossed: bool
    break_period: str | None


def monitoring_arrays(diagnostics: Mapping[str, Any]) -> MonitoringPath | None:
    """The monitoring path stored in a fit's diagnostics, or None when there is none.

    Reads ``diagnostics["monitoring"]`` as the pass writes it: ``crossed``, ``break_period`` and
    ``path`` with ``periods``, ``cusum`` and ``boundary`` (equal-length lists, one entry per
    monitored period; the pass keeps the path for small models and for crossed series).
    """
    raw = diagnostics.get("monitoring")
    if not isinstance(raw, Mapping):
        return None
    path = raw.get("path")
    if not isinstance(path, Mapping):
        return None
    values, limits, periods = path.get("cusum"), path.get("boundary"), path.get("periods")
    if not isinstance(values, list) or not isinstance(limits, list) or not values:
        return None
    if len(values) != len(limits):
        return None
    labels = (
        tuple(str(p) for p in periods)
        if isinstance(periods, list) and len(periods) == len(values)
        else tuple(str(i + 1) for i in range(len(values)))
    )
    statistic = tuple(_float(v) or 0.0 for v in values)
    boundary = tuple(_float(v) or 0.0 for v in limits)
    crossed = raw.get("crossed")
    if not isinstance(crossed, bool):
        crossed = any(abs(v) > b for v, b in zip(statistic, boundary, strict=True))
    brk = raw.get("break_period")
    return MonitoringPath(labels, statistic, boundary, crossed, None if brk is None else str(brk))


__all__ = [
    "CoefficientRow",
    "FitView",
    "MonitoringPath",
    "diagnostic_lines",
    "monitoring_arrays",
    "read_fit",
]
