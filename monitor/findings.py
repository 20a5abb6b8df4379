"""The decision policy: rules that turn statistics into findings, and the findings' lifecycle.

Two halves, both pure (no database access; the pass reads and writes through ``monitor.store``):

1. **Rules** (DESIGN.md section 7). Each ``*_conditions`` function takes one model's results as
   arrays over its series and returns a ``Condition`` per series that was evaluated this pass:
   ``holds`` says whether the finding's rule is met. Series that could not be evaluated (a test
   with too few rows, a series warming up) get no condition at all, so an open finding on them is
   neither renewed nor counted towards clearing. Tests of one kind across the series of one model
   are controlled together with Benjamini–Hochberg at ``thresholds.fdr`` before they hold.

2. **Lifecycle** (DESIGN.md section 7) is kept by the store, which holds the findings: the pass
   calls ``Store.upsert_finding`` for each condition that holds (raising a ``new`` finding or
   keeping the open one ``ongoing``) and ``Store.mark_finding_absent`` for each evaluated
   condition that does not (clearing it after ``thresholds.clear_after`` such passes in a row, so
   a one-pass lapse does not flap). ``should_notify`` below says which of those changes go into
   the pass's message: a finding raised, a finding whose severity rose, a finding cleared;
   never one with an owner's note (``plumbline note``), and never a finding that merely continues.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Literal, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray

from monitor.figures import level_text, percent, statistic_number
from monitor.stats.accuracy import AccuracyBatch
from monitor.stats.coverage import CoverageBatch, CoverageZone
from monitor.stats.errorcusum import ErrorCusumBatch, implied_coverage
from monitor.stats.multitest import benjamini_hochberg
from monitor.text import format_p_value
from monitor.vocabulary import FindingKind, Severity

# No finding from the fit's own diagnostics (autocorrelation, heteroscedasticity, weak fit,
# significance lost, sign flip) on a fit window of fewer rows than this: the tests' χ²
# references are large-sample approximations and a handful of rows cannot be judged (a
# floor of about 20 observations for LM tests is common practice; on the issue-14 panel the
# Durbin–Watson rule alone fired on 41 % of stable series at 10 rows).
DIAGNOSTIC_MIN_ROWS = 20
# A feed is stale when nothing new arrived for this many cadences past its latest period.
STALE_CADENCES = 1.5


class DecisionThresholds(Protocol):
    """What the rules read from a model's ``thresholds`` (DESIGN.md section 7)."""

    significance: float
    fdr: float
    min_scored: int
    min_r2: float | None
    max_r2_drop: float
    clear_after: int


@dataclass(frozen=True)
class FindingKey:
    """What makes two findings the same finding: at most one is open per key."""

    kind: FindingKind
    model: str | None
    series: str | None
    feed: str | None


@dataclass(frozen=True)
class Condition:
    """One rule evaluated on one series (or feed) in this pass."""

    key: FindingKey
    holds: bool
    severity: Severity
    statistic: float | None
    p_value: float | None
    since_period: str | None
    message: str
    action: str


def should_notify(
    change: Literal["raised", "continued", "cleared"],
    *,
    acknowledged: bool,
    severity: Severity | None = None,
    previous_severity: Severity | None = None,
) -> bool:
    """Whether a lifecycle change goes into the pass's message (see the module docstring)."""
    if acknowledged:
        return False
    if change == "continued":
        return (
            severity is not None
            and previous_severity is not None
            and severity.rank > previous_severity.rank
        )
    return True


# ---------------------------------------------------------------------------------------------
# Rules. Arrays have one entry per series (shape (s,)), or (s, k) per slope; NaN = not evaluated.


def _finite(value: float) -> bool:
    return not math.isnan(value)


def reject(
    kind: FindingKind, p_values: NDArray[np.float64], thresholds: DecisionThresholds
) -> NDArray[np.bool_]:
    """Which tests of ``kind`` reject, as its declaration's ``family`` says (NaN = not tested).

    Every test runs at level ``significance``; for a controlled family (``series``, ``slopes``)
    the p-values of the model are also put through Benjamini–Hochberg (1995) at ``fdr`` and a
    test rejects only when both do. (BH alone would flag a lone series at p <= fdr, looser than
    the configured test level.)
    """
    with np.errstate(invalid="ignore"):
        significant = p_values < thresholds.significance
    if not kind.declaration.family.controlled:
        return np.asarray(significant, dtype=bool)
    return benjamini_hochberg(p_values, thresholds.fdr).reject & significant


def _series_label(series: str | None) -> str:
    return "" if series is None else f" for {series}"


# The periods a finding compares, named by their dates as the feed writes them (first, last);
# None where the caller does not know them.
Span = tuple[str | None, str | None] | None


def _span_text(span: Span) -> str:
    """"2025-01-05 to 2025-12-28", or a description when the dates are not known."""
    if span is None or span[0] is None or span[1] is None:
        return "the periods monitoring started from"
    return f"{span[0]} to {span[1]}"


def _start_text(span: Span) -> str:
    """"over 2025-01-05 to 2025-12-28, the periods monitoring started from"."""
    if span is None or span[0] is None or span[1] is None:
        return "over the periods monitoring started from"
    return f"over {span[0]} to {span[1]}, the periods monitoring started from"


def _spans(spans: Sequence[Span] | None, count: int) -> Sequence[Span]:
    return [None] * count if spans is None else spans


def coverage_conditions(
    model: str,
    series: Sequence[str | None],
    audit: CoverageBatch,
    chart: ErrorCusumBatch,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
    calibrated: CoverageBatch | None = None,
    calibrated_chart: ErrorCusumBatch | None = None,
    calibrated_since: Sequence[str | None] | None = None,
) -> list[Condition]:
    """``coverage``: the errors outgrew the intervals by more than chance allows.

    The decision is the chart of ``monitor.stats.errorcusum``, a cumulative sum of the errors'
    size against their intervals. A series is judged once it has ``min_scored`` scored
    forecasts, and the condition holds while the chart's current excursion is under way (the
    chart above zero) with more misses in it than the interval's level leads one to expect,
    while the hit rate of the latest ``recent`` forecasts is below the level (so a finding
    clears once the recent forecasts cover again, not only when the chart is back at zero,
    which after a large climb takes many forecasts), and the chance that a series with correct
    intervals climbs as high within the horizon survives Benjamini–Hochberg across the model's
    series at ``fdr`` and is below ``significance``. The chart only climbs on errors larger
    than the intervals assume, so intervals that are too wide never raise it. That p-value is
    valid whichever pass reads it, so the false share among the coverage findings raised over
    a whole horizon stays within ``fdr``, not only pass by pass
    (see the module).

    ``audit`` (the latest ``recent`` forecasts) gives the hit rate and its Basel zone (Basel
    Committee 1996) the message shows: severity ``critical`` in the red zone, ``warning``
    otherwise. ``since``: the period of the forecast that started the current excursion.
    ``audit``, ``chart`` and ``since`` align with ``series``.

    ``calibrated`` and ``calibrated_chart``: for a model with ``interval_method: calibrated``,
    the same for the calibrated intervals issued beside the model's own. Each interval is judged
    by the same rule (its own BH family); the condition holds when either fell short, and its
    message says which (statistic and p-value are those of the one that fell short, the model's
    own when both did; so is ``since_period``, from ``calibrated_since`` for the calibrated one).
    """
    scored = np.asarray(audit.scored)
    p = _chart_p_values(chart, thresholds)
    rejected = reject(FindingKind.COVERAGE, p, thresholds)
    if calibrated is not None:
        if calibrated_chart is None:
            raise ValueError("the calibrated intervals' audit needs their chart beside it")
        cal_scored = np.asarray(calibrated.scored)
        cal_p = _chart_p_values(calibrated_chart, thresholds)
        cal_rejected = reject(FindingKind.COVERAGE, cal_p, thresholds)
    declared = FindingKind.COVERAGE.declaration

    def severity_in(zone: CoverageZone | None) -> Severity:
        return (declared.raised_to if zone is CoverageZone.RED and declared.raised_to
                else declared.severity)

    out: list[Condition] = []
    for i, name in enumerate(series):
        own_judged = _finite(float(p[i]))
        cal_judged = calibrated is not None and _finite(float(cal_p[i]))
        if not own_judged and not cal_judged:
            continue
        hit_rate = float(audit.hit_rate[i])
        own_short = (own_judged and bool(rejected[i]) and _short(chart, i, audit.nominal)
                     and hit_rate < audit.nominal)
        zone = audit.zone[i]
        own_text = (
            f"{int(audit.hits[i])} of the latest {int(scored[i])} actuals{_series_label(name)} "
            f"fell inside their {level_text(audit.nominal)} prediction intervals (hit rate "
            f"{percent(hit_rate)}: {_misses_words(zone)})"
            + (f"; {_excursion_words(chart, i, since[i], float(p[i]), audit.nominal)}"
               if own_judged else "")
        )
        if calibrated is None:
            out.append(Condition(
                FindingKey(FindingKind.COVERAGE, model, name, None), own_short,
                severity_in(zone), hit_rate, float(p[i]), since[i],
                own_text + ". The intervals issued are narrower than the errors they meet.",
                "Check for a change in the error variance or a missing predictor; widen or "
                "refit before relying on these intervals.",
            ))
            continue
        assert calibrated_chart is not None
        cal_rate = float(calibrated.hit_rate[i])
        cal_short = (cal_judged and bool(cal_rejected[i])
                     and _short(calibrated_chart, i, calibrated.nominal)
                     and cal_rate < calibrated.nominal)
        cal_zone = calibrated.zone[i]
        cal_first = None if calibrated_since is None else calibrated_since[i]
        level = calibrated.nominal
        cal_text = (
            f"{int(calibrated.hits[i])} of {int(cal_scored[i])} inside the calibrated intervals "
            f"issued beside them (from the model's own recent errors; hit rate {percent(cal_rate)}"
            + (f"; {_excursion_words(calibrated_chart, i, cal_first, float(cal_p[i]), level)})"
               if cal_judged else ")")
            if cal_scored[i] else "no calibrated interval scored yet"
        )
        if own_short and cal_short:
            lead = "Both the model's intervals and the calibrated ones fell short: "
            action = ("The errors changed faster than even the calibration follows. Look for a "
                      "sudden change in the series or a missing predictor; refit before relying "
                      "on either interval.")
        elif own_short:
            lead = "The model's intervals fell short; the calibrated ones held: "
            action = ("Check for a change in the error variance or a missing predictor; widen or "
                      "refit. Meanwhile the calibrated intervals kept their level here.")
        elif cal_short:
            lead = "The calibrated intervals fell short; the model's own held: "
            action = ("The recent errors moved faster than the calibration follows; look for a "
                      "sudden change in the series and read the calibrated intervals with care "
                      "until they catch up.")
        else:
            lead = "Both intervals held: "
            action = "Nothing to do."
        statistic, p_value = (hit_rate, float(p[i])) if own_short or not cal_short else (
            cal_rate, float(cal_p[i]))
        own_first = own_short or not cal_short
        worst = zone if own_first else cal_zone
        first_miss = since[i] if own_first or calibrated_since is None else calibrated_since[i]
        out.append(Condition(
            FindingKey(FindingKind.COVERAGE, model, name, None), own_short or cal_short,
            severity_in(worst), statistic, p_value if _finite(p_value) else None, first_miss,
            f"{lead}{own_text}; {cal_text}.",
            action,
        ))
    return out


def _chart_p_values(chart: ErrorCusumBatch, thresholds: DecisionThresholds) -> NDArray[np.float64]:
    """The chart's p-values where at least ``min_scored`` forecasts were scored, else NaN."""
    return np.where(np.asarray(chart.scored) >= thresholds.min_scored, chart.p_value, np.nan)


def _short(chart: ErrorCusumBatch, i: int, level: float) -> bool:
    """The chart's excursion is under way with more misses than ``level`` leads one to expect."""
    return (float(chart.height[i]) > 0
            and int(chart.excursion_misses[i]) > int(chart.excursion_scored[i]) * (1 - level))


def _excursion_words(chart: ErrorCusumBatch, i: int, since: str | None, p: float,
                     level: float) -> str:
    """What the chart of the errors' size says, in words, since its excursion began."""
    test = (f"cumulative-sum test of the errors' size over a horizon of {chart.horizon} "
            f"forecasts, p {format_p_value(p)}")
    if float(chart.height[i]) == 0:
        return f"the errors are back within the size the intervals assume ({test})"
    scored, misses = int(chart.excursion_scored[i]), int(chart.excursion_misses[i])
    expected = scored * (1 - level)
    square = float(chart.excursion_mean_square[i])
    start = f"since {since}" if since is not None else "in the latest run"
    return (f"{start}, {misses} of {scored} missed where about {expected:.1f} were expected, "
            f"and the errors were about {math.sqrt(square):.2g} times the size the intervals "
            f"assume, which would put their real coverage near "
            f"{percent(implied_coverage(square, level))} ({test})")


def _misses_words(zone: CoverageZone | None) -> str:
    """The count of misses in words: its Basel zone (Basel Committee 1996) said plainly."""
    return {
        CoverageZone.GREEN: "misses about as expected",
        CoverageZone.YELLOW: "more misses than expected",
        CoverageZone.RED: "far more misses than expected",
    }.get(zone, "misses not graded") if zone is not None else "misses not graded"


def clustered_miss_conditions(
    model: str,
    series: Sequence[str | None],
    audit: CoverageBatch,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
) -> list[Condition]:
    """``clustered_misses``: Christoffersen's (1998) independence test rejects after BH."""
    scored = np.asarray(audit.scored)
    p = np.where(scored >= thresholds.min_scored, audit.independence_p_value, np.nan)
    rejected = reject(FindingKind.CLUSTERED_MISSES, p, thresholds)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if not _finite(float(p[i])):
            continue
        out.append(Condition(
            FindingKey(FindingKind.CLUSTERED_MISSES, model, name, None), bool(rejected[i]),
            FindingKind.CLUSTERED_MISSES.declaration.severity,
            float(audit.independence_statistic[i]), float(p[i]), since[i],
            f"Misses{_series_label(name)} come in runs rather than one at a time "
            f"(independence p {format_p_value(float(p[i]))}): a miss makes the next one likelier.",
            "Look for autocorrelated errors or a lagging predictor; consider adding last "
            "period's error or a trend term.",
        ))
    return out


def forecast_bias_conditions(
    model: str,
    series: Sequence[str | None],
    accuracy: AccuracyBatch,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
    *,
    looks: int = 1,
) -> list[Condition]:
    """``forecast_bias``: the latest scored forecasts' mean error differs from zero.

    The test of ``monitor.stats.accuracy`` (mean error over a Newey & West 1987 long-run
    standard error, Student t) on at least ``min_scored`` scored forecasts. It is re-read at
    every pass that scores the series, on a window that moves by one forecast, so each p-value
    is multiplied by ``looks``, the passes in a monitoring horizon (Bonferroni over every look:
    a stable series raises a false ``forecast_bias`` over a horizon with chance at most
    ``significance``, conservatively since the looks overlap), then tested at ``significance``
    with BH across the model's series. The statistic shown is the tracking signal (cumulative
    error over mean absolute error; limits of ±4 are common practice, but it is not what
    decides). ``accuracy`` entries align with ``series``.
    """
    scored = np.asarray(accuracy.scored)
    p = np.where(scored >= thresholds.min_scored,
                 np.minimum(1.0, np.asarray(accuracy.bias_p_value) * max(1, looks)), np.nan)
    rejected = reject(FindingKind.FORECAST_BIAS, p, thresholds)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if not _finite(float(p[i])):
            continue
        mean_error = float(accuracy.mean_error[i])
        side = "above" if mean_error > 0 else "below"  # error = actual − point
        signal = float(accuracy.tracking_signal[i])
        out.append(Condition(
            FindingKey(FindingKind.FORECAST_BIAS, model, name, None), bool(rejected[i]),
            FindingKind.FORECAST_BIAS.declaration.severity,
            None if math.isnan(signal) else signal, float(p[i]), since[i],
            f"Over the latest {int(scored[i])} scored forecasts{_series_label(name)} the actuals "
            f"came in {side} the forecasts on average by {abs(mean_error):.4g} (tracking signal "
            f"{statistic_number(signal)}; test of the mean error p {format_p_value(float(p[i]))}).",
            "Look for a level change or a missing predictor; the intervals are centred in the "
            "wrong place until the model follows it.",
        ))
    return out


def slope_shift_conditions(
    model: str,
    series: Sequence[str | None],
    slopes: Sequence[str],
    statistic: ArrayLike,
    p_value: ArrayLike,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
    *,
    looks: int = 1,
    break_statistic: ArrayLike | None = None,
    break_p_value: ArrayLike | None = None,
    break_held: ArrayLike | None = None,
    break_since: Sequence[str | None] | None = None,
    start_spans: Sequence[Span] | None = None,
    recent_spans: Sequence[Span] | None = None,
) -> list[Condition]:
    """``slope_shift``: which slope moved, from one of two tests, each family under BH.

    After a ``structural_break`` that holds (``break_held``), the slopes fitted before the
    monitoring's estimated break (from the baseline's start) are compared with those fitted on
    every row since it (``break_statistic`` / ``break_p_value``, (s, k), NaN where not tested):
    the monitoring alarm has already controlled the chance of a false change, and this test names
    the slope that moved with the most rows on both sides. These series form one family under
    Benjamini–Hochberg. Every other series keeps the baseline-vs-recent-block test
    (``statistic`` / ``p_value``) that also sees a slope turning about the predictors' mean,
    which the monitoring statistic cannot: ``looks`` is how many disjoint recent windows the
    monitoring horizon allows (see ``monitor.analysis``), each p-value is multiplied by it
    (Bonferroni over the looks) and those series form a second BH family. A series holds when
    any of its slopes rejects; the condition reports its smallest p-value. ``start_spans`` and
    ``recent_spans`` (first, last period of each series' baseline and of its latest complete
    recent block) name the two periods the block test compared in the message.
    """
    shape = (len(series), len(slopes))
    stat = np.asarray(statistic, dtype=float).reshape(shape)
    p = np.minimum(1.0, np.asarray(p_value, dtype=float).reshape(shape) * max(1, looks))
    held = (np.zeros(len(series), dtype=bool) if break_held is None
            else np.asarray(break_held, dtype=bool))
    if break_p_value is not None and break_statistic is not None:
        p_break = np.asarray(break_p_value, dtype=float).reshape(shape)
        stat_break = np.asarray(break_statistic, dtype=float).reshape(shape)
    else:
        p_break = np.full(shape, np.nan)
        stat_break = np.full(shape, np.nan)
    after_break = held & ~np.isnan(p_break).all(axis=1)
    p_block = np.where(after_break[:, None], np.nan, p)
    p_after = np.where(after_break[:, None], p_break, np.nan)
    rejected = (reject(FindingKind.SLOPE_SHIFT, p_block.ravel(), thresholds).reshape(shape)
                | reject(FindingKind.SLOPE_SHIFT, p_after.ravel(), thresholds).reshape(shape))
    starts, recents = _spans(start_spans, len(series)), _spans(recent_spans, len(series))
    # Each series' tested p-values and statistics, its smallest p-value's slope (np.nanargmin's
    # choice: NaN counts as +inf, the first of equal values wins), all series at once.
    p_used = np.where(after_break[:, None], p_after, p_block)
    stat_used = np.where(after_break[:, None], stat_break, stat)
    untested: list[bool] = np.asarray(np.isnan(p_used).all(axis=1)).tolist()
    if not len(slopes):
        return []  # nothing tested
    smallest = np.argmin(np.where(np.isnan(p_used), np.inf, p_used), axis=1)
    rows = np.arange(len(series))
    t_values: list[float] = stat_used[rows, smallest].astype(float).tolist()
    p_values: list[float] = p_used[rows, smallest].astype(float).tolist()
    holding: list[bool] = np.asarray(rejected.any(axis=1)).tolist()
    breaks: list[bool] = after_break.tolist()
    which: list[int] = smallest.tolist()
    out: list[Condition] = []
    for i, name in enumerate(series):
        if untested[i]:
            continue
        use_break, j, holds = breaks[i], which[i], holding[i]
        t_value, p_j = t_values[i], p_values[i]
        if use_break:
            first = break_since[i] if break_since is not None else None
            message = (
                f"Since the estimated break at {first}, the slope on {slopes[j]}"
                f"{_series_label(name)} differs from the one before it by "
                f"{statistic_number(abs(t_value))} combined standard errors "
                f"(p {format_p_value(p_j)})."
            )
        else:
            first = since[i]
            message = (
                f"The slope on {slopes[j]}{_series_label(name)} over "
                f"{_span_text(recents[i]) if recents[i] else 'the latest periods'} differs from "
                f"its slope {_start_text(starts[i])}, by {statistic_number(abs(t_value))} "
                f"combined standard errors (p {format_p_value(p_j)})."
            )
        out.append(Condition(
            FindingKey(FindingKind.SLOPE_SHIFT, model, name, None), holds,
            FindingKind.SLOPE_SHIFT.declaration.severity, t_value, p_j, first, message,
            "Confirm whether the process changed; if it did, rebaseline the model "
            "(plumbline rebaseline) so forecasts use the new relationship.",
        ))
    return out


def structural_break_conditions(
    model: str,
    series: Sequence[str | None],
    p_value: ArrayLike,
    ratio: ArrayLike,
    break_period: Sequence[str | None],
    evaluated: ArrayLike,
    thresholds: DecisionThresholds,
    *,
    start_spans: Sequence[Span] | None = None,
) -> list[Condition]:
    """``structural_break``: the sequential monitoring statistic's p-value rejects after BH.

    ``p_value`` is the chance under no change that the monitoring statistic would reach, within
    the horizon, as far as it has reached by now (at most the significance exactly when it has
    crossed its boundary); the family of a model's monitored series is controlled with
    Benjamini–Hochberg at ``fdr``, and each series must also reject at ``significance`` (so a
    single-series model keeps its per-series level: an alarm exactly when the boundary is
    crossed). ``ratio`` is the statistic over its boundary (above 1 = crossed); ``break_period``
    the estimated first period of the new regime; ``evaluated`` False for series not monitored;
    ``start_spans`` the periods monitoring started from, to name them in the message.
    """
    starts = _spans(start_spans, len(series))
    evaluated_a = np.asarray(evaluated, dtype=bool)
    p = np.where(evaluated_a, np.asarray(p_value, dtype=float), np.nan)
    ratio_a = np.asarray(ratio, dtype=float)
    rejected = reject(FindingKind.STRUCTURAL_BREAK, p, thresholds)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if not evaluated_a[i]:
            continue
        start = (f"; the new relationship is estimated to start at {break_period[i]}"
                 if break_period[i] is not None else "")
        out.append(Condition(
            FindingKey(FindingKind.STRUCTURAL_BREAK, model, name, None), bool(rejected[i]),
            FindingKind.STRUCTURAL_BREAK.declaration.severity, float(ratio_a[i]), float(p[i]),
            break_period[i],
            f"Since {_after_text(starts[i])}, the forecast errors{_series_label(name)} have "
            f"added up past the monitoring boundary ({statistic_number(float(ratio_a[i]))} "
            f"times it; p {format_p_value(float(p[i]))} over the monitoring horizon, controlled "
            f"across the model's series){start}.",
            "The relationship the forecasts rest on has probably changed: review recent "
            "periods, then rebaseline from the estimated break or refit with the cause.",
        ))
    return out


def _after_text(span: Span) -> str:
    """"the periods monitoring started from (2025-01-05 to 2025-12-28)"."""
    if span is None or span[0] is None or span[1] is None:
        return "the periods monitoring started from"
    return f"the periods monitoring started from ({_span_text(span)})"


def significance_conditions(
    model: str,
    series: Sequence[str | None],
    slopes: Sequence[str],
    baseline_estimate: ArrayLike,
    baseline_p_value: ArrayLike,
    current_estimate: ArrayLike,
    current_p_value: ArrayLike,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
    *,
    start_spans: Sequence[Span] | None = None,
) -> list[Condition]:
    """``significance_lost`` and ``sign_flip`` from the baseline's and the current slopes
    (``since``: the last period of the current fit; ``start_spans``: the baseline's periods).

    Lost: the baseline's slope was significant and the current fit's slope interval (at the
    ``significance`` level) contains 0, i.e. its p-value is at least ``significance``. Flip: the
    current slope is significant with the opposite sign to the baseline's. (s, k) arrays.
    """
    shape = (len(series), len(slopes))
    b0 = np.asarray(baseline_estimate, dtype=float).reshape(shape)
    p0 = np.asarray(baseline_p_value, dtype=float).reshape(shape)
    b1 = np.asarray(current_estimate, dtype=float).reshape(shape)
    p1 = np.asarray(current_p_value, dtype=float).reshape(shape)
    alpha = thresholds.significance
    starts = _spans(start_spans, len(series))
    out: list[Condition] = []
    for i, name in enumerate(series):
        valid = ~(np.isnan(p0[i]) | np.isnan(p1[i]))
        if not valid.any():
            continue
        lost = valid & (p0[i] < alpha) & (p1[i] >= alpha)
        flip = valid & (p1[i] < alpha) & (np.sign(b1[i]) == -np.sign(b0[i])) & (b0[i] != 0)
        j_lost = int(np.argmax(lost)) if lost.any() else int(np.argmax(valid))
        out.append(Condition(
            FindingKey(FindingKind.SIGNIFICANCE_LOST, model, name, None), bool(lost.any()),
            FindingKind.SIGNIFICANCE_LOST.declaration.severity,
            float(b1[i, j_lost]), float(p1[i, j_lost]), since[i],
            f"The slope on {slopes[j_lost]}{_series_label(name)} was clearly non-zero "
            f"{_start_text(starts[i])}, but in the fit to {since[i] or 'the latest period'} "
            f"its interval includes zero (p {format_p_value(float(p1[i, j_lost]))}).",
            f"Ask whether {slopes[j_lost]} still drives the response; forecasts from this model "
            "may be no better than the average.",
        ))
        j_flip = int(np.argmax(flip)) if flip.any() else j_lost
        out.append(Condition(
            FindingKey(FindingKind.SIGN_FLIP, model, name, None), bool(flip.any()),
            FindingKind.SIGN_FLIP.declaration.severity,
            float(b1[i, j_flip]), float(p1[i, j_flip]), since[i],
            f"The slope on {slopes[j_flip]}{_series_label(name)} in the fit to "
            f"{since[i] or 'the latest period'} is significant with the opposite sign to its "
            f"slope {_start_text(starts[i])} ({float(b0[i, j_flip]):.4g} then, "
            f"{float(b1[i, j_flip]):.4g} now).",
            "Stop using this model's forecasts until the reversal is understood: check the data "
            "feed for a changed unit or definition, then rebaseline or redesign.",
        ))
    return out


def weak_fit_conditions(
    model: str,
    series: Sequence[str | None],
    r_squared: ArrayLike,
    baseline_r_squared: ArrayLike,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
    variance_p_value: ArrayLike | None = None,
    *,
    start_spans: Sequence[Span] | None = None,
) -> list[Condition]:
    """``weak_fit``: the fit got worse than chance explains, or R² is below ``min_r2``.

    Dropped: R² more than ``max_r2_drop`` below the baseline's *and* the error variance has
    grown by more than sampling noise explains: the one-sided variance-ratio F test of the
    current residual variance against the baseline's (``variance_p_value``,
    ``monitor.stats.diagnostics.variance_increase_p_value``) rejects at ``significance`` after
    BH across the model's series. An R² drop alone is not evidence: on a stable series the R² of
    a 52-row window wanders by that much by sampling noise (issue 14 measured 7.5 % of stable
    series raising it). Low: R² below ``min_r2`` when the owner set one (a stated rule, not a
    test). ``variance_p_value`` None = not judged against chance (every drop counts).
    """
    starts = _spans(start_spans, len(series))
    r2 = np.asarray(r_squared, dtype=float)
    r2_base = np.asarray(baseline_r_squared, dtype=float)
    if variance_p_value is None:
        grown = np.ones(r2.shape, dtype=bool)
        p = np.full(r2.shape, np.nan)
    else:
        p = np.asarray(variance_p_value, dtype=float)
        dropped_now = ~np.isnan(r2) & ~np.isnan(r2_base) & (r2_base - r2 > thresholds.max_r2_drop)
        # the family: every judged series' variance test; a series whose R² did not drop
        # cannot hold, but its p-value is part of the family
        grown = reject(FindingKind.WEAK_FIT, np.where(np.isnan(r2), np.nan, p), thresholds)
        grown &= dropped_now
    out: list[Condition] = []
    for i, name in enumerate(series):
        if math.isnan(r2[i]):
            continue
        low = thresholds.min_r2 is not None and r2[i] < thresholds.min_r2
        dropped = (not math.isnan(r2_base[i]) and (r2_base[i] - r2[i]) > thresholds.max_r2_drop
                   and bool(grown[i]))
        base_text = "" if math.isnan(r2_base[i]) else (
            f" against {r2_base[i]:.2f} {_start_text(starts[i])}")
        p_i = None if math.isnan(p[i]) else float(p[i])
        test_text = ("" if p_i is None else
                     f"; the error variance grew beyond chance (F test p {format_p_value(p_i)})")
        out.append(Condition(
            FindingKey(FindingKind.WEAK_FIT, model, name, None), bool(low or dropped),
            FindingKind.WEAK_FIT.declaration.severity, float(r2[i]), p_i, since[i],
            f"The fit{_series_label(name)} to {since[i] or 'the latest period'} explains less of "
            f"the response: R² {r2[i]:.2f}{base_text}{test_text}.",
            "Intervals are wider and forecasts less informative; look for a missing predictor "
            "or a change in how the data are recorded.",
        ))
    return out


def extrapolation_conditions(
    model: str,
    series: Sequence[str | None],
    flagged: ArrayLike,
    evaluated: ArrayLike,
    first_period: Sequence[str | None],
    worst_leverage: ArrayLike,
) -> list[Condition]:
    """``extrapolation``: a plan row outside the fitted range or above the largest leverage."""
    flagged_a = np.asarray(flagged, dtype=bool)
    evaluated_a = np.asarray(evaluated, dtype=bool)
    lev = np.asarray(worst_leverage, dtype=float)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if not evaluated_a[i]:
            continue
        out.append(Condition(
            FindingKey(FindingKind.EXTRAPOLATION, model, name, None), bool(flagged_a[i]),
            FindingKind.EXTRAPOLATION.declaration.severity,
            None if math.isnan(lev[i]) else float(lev[i]), None,
            first_period[i],
            f"A plan row{_series_label(name)} asks for a forecast outside the range of "
            "predictor values the model was fitted on; the straight line is an assumption "
            "there, and the interval understates the risk.",
            "Treat this forecast with extra caution, or gather observations at such values "
            "before relying on it.",
        ))
    return out


def autocorrelation_conditions(
    model: str,
    series: Sequence[str | None],
    durbin_watson: ArrayLike,
    p_value: ArrayLike,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
) -> list[Condition]:
    """``autocorrelation``: the Breusch–Godfrey test of first-order autocorrelation rejects
    after BH (Breusch 1978, Godfrey 1978; ``monitor.stats.diagnostics.breusch_godfrey_batch``).

    ``p_value`` is the test's (NaN = not judged this pass); ``durbin_watson`` the fit's d, shown
    beside it because it says the direction (below 2 positive, above 2 negative). The
    1.5–2.5 rule of thumb for d is no longer a finding.
    """
    dw = np.asarray(durbin_watson, dtype=float)
    p = np.asarray(p_value, dtype=float)
    rejected = reject(FindingKind.AUTOCORRELATION, p, thresholds)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if math.isnan(p[i]):
            continue
        d = float(dw[i])
        direction = "positively" if math.isnan(d) or d < 2 else "negatively"
        d_text = "" if math.isnan(d) else f", Durbin–Watson {d:.2f}"
        out.append(Condition(
            FindingKey(FindingKind.AUTOCORRELATION, model, name, None), bool(rejected[i]),
            FindingKind.AUTOCORRELATION.declaration.severity,
            None if math.isnan(d) else d, float(p[i]), since[i],
            f"Consecutive errors{_series_label(name)} look {direction} correlated "
            f"(Breusch–Godfrey p {format_p_value(float(p[i]))}{d_text}); the intervals assume "
            "independent errors and may be too narrow.",
            "Consider a lagged or seasonal term; read hit rates with that in mind.",
        ))
    return out


def heteroscedasticity_conditions(
    model: str,
    series: Sequence[str | None],
    statistic: ArrayLike,
    p_value: ArrayLike,
    thresholds: DecisionThresholds,
    since: Sequence[str | None],
) -> list[Condition]:
    """``heteroscedasticity``: Breusch–Pagan (Koenker) rejects after BH."""
    stat = np.asarray(statistic, dtype=float)
    p = np.asarray(p_value, dtype=float)
    rejected = reject(FindingKind.HETEROSCEDASTICITY, p, thresholds)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if math.isnan(p[i]):
            continue
        out.append(Condition(
            FindingKey(FindingKind.HETEROSCEDASTICITY, model, name, None), bool(rejected[i]),
            FindingKind.HETEROSCEDASTICITY.declaration.severity,
            float(stat[i]), float(p[i]), since[i],
            f"The spread of the errors{_series_label(name)} changes with the predictors "
            f"(Breusch–Pagan p {format_p_value(float(p[i]))}); one interval width does not fit "
            "all plan rows.",
            "Expect misses at the high end of the predictors; consider modelling a transformed "
            "response.",
        ))
    return out


def not_estimable_conditions(
    model: str,
    series: Sequence[str | None],
    estimable: ArrayLike,
    fitted_before: ArrayLike,
    reasons: Sequence[str | None],
    since: Sequence[str | None],
) -> list[Condition]:
    """``not_estimable``: a series fitted before can no longer be fitted."""
    ok = np.asarray(estimable, dtype=bool)
    before = np.asarray(fitted_before, dtype=bool)
    out: list[Condition] = []
    for i, name in enumerate(series):
        if not before[i]:
            continue
        out.append(Condition(
            FindingKey(FindingKind.NOT_ESTIMABLE, model, name, None), not bool(ok[i]),
            FindingKind.NOT_ESTIMABLE.declaration.severity, None, None, since[i],
            f"The model{_series_label(name)} can no longer be fitted: {reasons[i] or 'unknown'}. "
            "No new forecasts are issued for it.",
            "Check the feed for a predictor that stopped varying or columns that now move "
            "together.",
        ))
    return out


def stale_feed_condition(
    feed: str,
    latest_period: datetime | None,
    latest_period_text: str | None,
    as_of: datetime,
    cadence: timedelta,
) -> Condition | None:
    """``stale_feed``: no new rows for 1.5 × cadence past the latest period (business clock).

    None when the feed has never delivered a row (nothing to be late against).
    """
    if latest_period is None:
        return None
    overdue = as_of - latest_period
    limit = cadence * STALE_CADENCES
    days = overdue.total_seconds() / 86400
    return Condition(
        FindingKey(FindingKind.STALE_FEED, None, None, feed), overdue > limit,
        FindingKind.STALE_FEED.declaration.severity,
        days, None, latest_period_text,
        f"Feed {feed} has delivered nothing newer than {latest_period_text}: {days:.0f} days "
        f"before the business clock of the pass that checked it ({as_of:%Y-%m-%d}), more than "
        f"{STALE_CADENCES:g} × its cadence of {_cadence_text(cadence)}; forecasts for its models "
        "are not being scored or refreshed.",
        "Check the upstream export that drops files into the inbox.",
    )


def _cadence_text(cadence: timedelta) -> str:
    days = cadence.total_seconds() / 86400
    return f"{days:g} days" if days >= 1 else f"{cadence.total_seconds() / 3600:g} hours"


@dataclass(frozen=True)
class RejectedInput:
    """One rejection from ingest, as the rule needs it."""

    feed: str
    file_name: str
    whole_file: bool
    duplicate: bool
    rows_rejected: int
    reason: str
    # A file the feed could not take or put in place (it cannot be moved, it failed to be read,
    # it changed after it was read): the whole sentence, naming the file and why. A warning.
    problem: str | None = None


def _rejected_severity(whole_file: bool) -> Severity:
    declared = FindingKind.REJECTED_INPUT.declaration
    return declared.raised_to if whole_file and declared.raised_to else declared.severity


def rejected_input_conditions(
    feeds: Iterable[str], rejections: Iterable[RejectedInput]
) -> list[Condition]:
    """``rejected_input`` per feed: holds when this pass rejected a file or rows of that feed.

    One finding per feed (the store keeps one open finding per feed and kind); its message lists
    what was rejected. ``warning`` when a whole file was refused or a file is stuck (``problem``:
    it cannot be read or moved, or changed after it was read), ``notice`` for rows or a
    duplicate. Every feed in ``feeds`` that ingested files in this pass gets a condition, so a
    feed whose files are clean again counts towards clearing.
    """
    by_feed: dict[str, list[RejectedInput]] = {feed: [] for feed in feeds}
    for item in rejections:
        by_feed.setdefault(item.feed, []).append(item)
    out: list[Condition] = []
    for feed, items in by_feed.items():
        key = FindingKey(FindingKind.REJECTED_INPUT, None, None, feed)
        if not items:
            out.append(Condition(key, False, _rejected_severity(False), None, None, None, "", ""))
            continue
        whole = any((item.whole_file and not item.duplicate) or item.problem for item in items)
        parts = []
        for item in items:
            if item.problem:
                parts.append(item.problem)
            elif item.duplicate:
                parts.append(f"{item.file_name} was already ingested ({item.reason})")
            elif item.whole_file:
                parts.append(f"{item.file_name} was refused ({item.reason})")
            else:
                parts.append(f"{item.rows_rejected} row(s) of {item.file_name} were refused "
                             f"({item.reason})")
        out.append(Condition(
            key, True, _rejected_severity(whole),
            float(sum(item.rows_rejected for item in items)), None, None,
            f"Feed {feed}: " + "; ".join(parts) + ". Nothing was deleted or altered.",
            "See the report beside each file in the rejected folder; fix the export and drop a "
            "corrected file.",
        ))
    return out


__all__ = [
    "DIAGNOSTIC_MIN_ROWS",
    "STALE_CADENCES",
    "Condition",
    "DecisionThresholds",
    "FindingKey",
    "RejectedInput",
    "autocorrelation_conditions",
    "clustered_miss_conditions",
    "coverage_conditions",
    "extrapolation_conditions",
    "forecast_bias_conditions",
    "heteroscedasticity_conditions",
    "not_estimable_conditions",
    "reject",
    "rejected_input_conditions",
    "should_notify",
    "significance_conditions",
    "slope_shift_conditions",
    "stale_feed_condition",
    "structural_break_conditions",
    "weak_fit_conditions",
]
