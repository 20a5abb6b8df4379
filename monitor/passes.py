"""One monitoring pass (DESIGN.md section 5): ingest → score → refit → check → forecast →
findings → notify.

``run_pass(config, as_of=…)`` opens the database, refuses a business clock earlier than the
latest pass's (exit 2), and runs the stages in order, one transaction per file and per stage, so
a crash at any point leaves a database the next pass continues from:

- ingest writes a file's rows and its record in one transaction, then moves the file;
- scoring only scores forecasts that have no outcome yet;
- forecasts answer plan rows the model has not forecast yet (one forecast per plan row);
- the pass remembers, in its counts, the last observation id it analysed (``observation_mark``);
  a later pass re-analyses every series with rows after the last *finished* pass's mark, so work
  a crashed pass did not finish is picked up, and work it did finish is not duplicated.

A pass is idempotent: at the same ``as_of`` with no new complete files it writes nothing at all
(not even a pass record) and sends nothing; at a later ``as_of`` with no new files only
``stale_feed`` can be raised or cleared, because checks run only for series whose data changed.

Which series are analysed: every series of a model whose feed received rows since the mark, or
that gained its baseline. The analysis itself is ``monitor.analysis.analyse_batch``, a pure
function over one model's arrays (DESIGN.md section 14). One model or feed that fails is
reported in ``PassReport.skipped`` and the others go on.

Decisions beyond DESIGN.md, documented in the README:

- Baseline length: ``window`` rows (``window: all`` → ``max(min_rows, recent)``); the baseline is
  the first that many rows of the series, or the declared ``baseline`` once the business clock
  has passed its end. The monitoring horizon (default twice the baseline's rows) starts right
  after it; when it passes with no alarm the baseline rolls forward to the latest full window.
- The recent window for the slope-shift test is the latest complete block of ``recent`` rows
  after the baseline (``monitor.analysis``), with the significance split over the blocks the
  horizon allows.
- The coverage finding audits the latest ``recent`` scored forecasts of a series (the current
  coverage), so a fall in coverage is seen within weeks rather than diluted by years of history;
  ``plumbline audit`` reports any window the user asks for.
- Audited intervals (``interval:`` models) are read from plan rows: the interval must arrive
  before its actual, as a forecast does.
"""

from __future__ import annotations

import gc
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from datetime import UTC, date, datetime, timedelta
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from monitor.analysis import BatchInput, BatchOutput, analyse_batch, looks_per_horizon
from monitor.calibration import calibrations
from monitor.compute import Compute, compute_for
from monitor.config import Feed, Model, PlumblineConfig, model_signature, models_of_feed
from monitor.errors import ClockRefusedError, ComputeLostError, DatabaseFaultError
from monitor.exports import ExportedFile, export_forecasts
from monitor.findings import (
    DIAGNOSTIC_MIN_ROWS,
    Condition,
    RejectedInput,
    autocorrelation_conditions,
    clustered_miss_conditions,
    coverage_conditions,
    extrapolation_conditions,
    forecast_bias_conditions,
    heteroscedasticity_conditions,
    not_estimable_conditions,
    rejected_input_conditions,
    should_notify,
    significance_conditions,
    slope_shift_conditions,
    stale_feed_condition,
    structural_break_conditions,
    weak_fit_conditions,
)
from monitor.ingest import (
    FileReport,
    InboxNote,
    IngestSpec,
    inbox_notes,
    ingest_feed,
    inspect_inbox,
)
from monitor.stats.accuracy import accuracy_batch
from monitor.stats.coverage import audit_batch
from monitor.stats.diagnostics import (
    PredictorCloud,
    new_point_p_value,
    variance_increase_p_value,
)
from monitor.stats.errorcusum import error_cusum_batch, gaussian_scores
from monitor.store import (
    BaselineRow,
    FitRow,
    ForecastRow,
    PlanRows,
    Store,
    date_period_key,
    period_key_date,
)
from monitor.vocabulary import Finding, Outcome, classify_outcome

# The extrapolation *finding* asks for a plan row really outside what the model knows: outside
# the fitted range of a predictor or above the window's largest leverage (each forecast's own
# flag, DESIGN.md section 4) *and* so far from the window's predictor rows that a row drawn like
# them lands there with chance below this (Hotelling's T² for a future observation,
# ``monitor.stats.diagnostics.new_point_p_value``). A stable series issues a plan row a week, so
# over three years (about 150 rows) it raises a false notice with chance about 150 × 1e-4 =
# 1.5 %; a marginal row outside the range, which stable predictors produce on most series over
# that time, raises nothing (issue 14 measured 57 % of stable series with the earlier rule).
EXTRAPOLATION_P_VALUE = 1e-4

# An actual dated more than this many cadences after the business clock's date is refused as a
# row: it cannot be real yet (a mistyped year, a wrong column), and a latest period in the future
# would keep ``stale_feed`` from ever firing. A few cadences leave room for feeds that date a
# period by its end while the business clock stands before it (common practice, no standard).
FUTURE_ACTUAL_CADENCES = 4

# Series of a model with at most this many series get their monitoring path stored with the fit
# (for charts); larger models store it for series that raised an alarm only (DESIGN.md 11).
PATH_SERIES_LIMIT = 25


def utc_now() -> datetime:
    return datetime.now(UTC)


@dataclass(frozen=True)
class PassReport:
    """What one pass did."""

    pass_id: int | None  # None when there was nothing to do (no pass recorded)
    as_of: datetime
    files: tuple[FileReport, ...] = ()
    outcomes_scored: int = 0
    changed: dict[str, set[str | None]] = field(default_factory=dict)
    series_analysed: int = 0
    fits_recorded: int = 0
    forecasts_issued: int = 0
    findings_raised: tuple[int, ...] = ()
    findings_cleared: tuple[int, ...] = ()
    findings_to_notify: tuple[int, ...] = ()
    exports: tuple[ExportedFile, ...] = ()
    not_taken: tuple[InboxNote, ...] = ()  # files left in an inbox, why, and what to do
    skipped: tuple[str, ...] = ()
    timings: dict[str, float] = field(default_factory=dict)
    stopped_early: str | None = None

    @property
    def nothing_to_do(self) -> bool:
        return self.pass_id is None

    @property
    def files_taken(self) -> tuple[FileReport, ...]:
        """Files whose rows were taken (archived, or empty): never a refused file."""
        return tuple(f for f in self.files
                     if not (f.whole_file_rejected or f.duplicate))

    @property
    def files_refused(self) -> tuple[FileReport, ...]:
        """Files refused as a whole or as a duplicate: moved to rejected/, nothing taken."""
        return tuple(f for f in self.files if f.whole_file_rejected or f.duplicate)


class PassNotifier(Protocol):
    """Renders the pass's pages and queues its messages (``monitor.notify``)."""

    def __call__(
        self, store: Store, config: PlumblineConfig, report: PassReport, *, now: datetime
    ) -> None: ...


# --------------------------------------------------------------------------- periods and clocks


def period_key_of(feed: Feed, value: date | int) -> int:
    """The store's sort key for a declared period (a date or an integer)."""
    if feed.period_type == "integer":
        return int(value)  # type: ignore[arg-type]
    assert isinstance(value, date)
    return date_period_key(value)


def business_key(feed: Feed, as_of: datetime, config: PlumblineConfig) -> int | None:
    """The latest period key a pass at ``as_of`` may use (None: no limit, integer periods)."""
    if feed.period_type == "integer":
        return None
    return date_period_key(as_of.astimezone(config.zone).date())


def cadence_steps(feed: Feed, from_key: int, to_key: int) -> int:
    """Lead: the number of cadence steps from ``from_key`` to ``to_key`` (at least 1)."""
    if feed.period_type == "integer":
        step = int(feed.cadence) if isinstance(feed.cadence, int) else 1
    else:
        cadence = feed.cadence
        step_days = cadence.total_seconds() / 86400 if isinstance(cadence, timedelta) else 1.0
        return max(1, round((to_key - from_key) / max(step_days, 1e-9)))
    return max(1, round((to_key - from_key) / max(step, 1)))


def baseline_rows(model: Model) -> int:
    """How many rows the automatic baseline takes (see the module docstring)."""
    if isinstance(model.window, int):
        return model.window
    return max(model.min_rows, model.recent)


# --------------------------------------------------------------------------- the pass


class _Stopped(Exception):
    def __init__(self, stage: str) -> None:
        super().__init__(stage)
        self.stage = stage


@dataclass
class _PassState:
    store: Store
    config: PlumblineConfig
    as_of: datetime
    pass_id: int
    mark: int
    finished_id: int  # the latest finished pass before this one (0: none)
    stop: threading.Event | None
    compute: Compute
    compute_lost: str | None = None  # why the analysis cluster stopped the pass
    skipped: list[str] = field(default_factory=list)
    not_taken: list[InboxNote] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    conditions: list[tuple[Condition, int]] = field(default_factory=list)  # (condition, clear)
    feed_problems: dict[str, list[str]] = field(default_factory=dict)  # files stuck, per feed
    outcomes_scored: int = 0
    changed: dict[str, set[str | None]] = field(default_factory=dict)
    series_analysed: int = 0
    fits_recorded: int = 0
    forecasts_issued: int = 0

    def check_stop(self, stage: str) -> None:
        if self.stop is not None and self.stop.is_set():
            raise _Stopped(stage)

    def add(self, conditions: Sequence[Condition], clear_after: int) -> None:
        self.conditions.extend((c, clear_after) for c in conditions)


@contextmanager
def _collector_paused() -> Iterator[None]:
    """Python's cyclic garbage collector off for the length of a pass, as it was after.

    A pass allocates millions of objects that form no cycles (the rows of the windows' read,
    the records of fits and forecasts), and the collector, which runs every 700 allocations and
    then walks what survived, spent about a tenth of the weekly pass of 10,000 series on them
    (DEVELOPERS.md, "The pass"). Reference counting still frees everything as usual; the few
    cycles a pass leaves are collected once the collector is back on.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def run_pass(
    config: PlumblineConfig,
    *,
    as_of: datetime | None = None,
    stop_requested: threading.Event | None = None,
    real_clock: Callable[[], datetime] = utc_now,
    notifier: PassNotifier | None = None,
    store: Store | None = None,
    compute: Compute | None = None,
    max_ahead: timedelta | None = None,
    force_clock: bool = False,
) -> PassReport:
    """Run one pass at business clock ``as_of`` (default: the real clock). The caller holds the
    writer lock (``monitor.lock.DatabaseLock``). The analysis runs where ``config.compute``
    says (``monitor.compute``); a caller that runs many passes (the daemon) may hand in its own
    ``compute`` to keep a cluster connection between them.

    ``max_ahead`` (``plumbline pass`` gives :func:`clock_tolerance`): a business clock further
    ahead of the real clock is refused, since a pass recorded there would refuse every pass at
    the real clock until then. ``force_clock`` lifts that limit, and lets a pass run earlier
    than a latest pass that stands in the future of the real clock (the way back from such a
    pass); it never lets a pass go back behind a latest pass in the real clock's past.
    """
    own_store = store is None
    own_compute = compute is None
    engine = compute_for(config.compute) if compute is None else compute
    db = Store.open(config.database) if store is None else store
    try:
        with _collector_paused():
            return _run(db, config, as_of or real_clock(), stop_requested, real_clock,
                        notifier, engine, None if force_clock else max_ahead, force_clock)
    finally:
        if own_compute:
            engine.close()
        if own_store:
            db.close()


def _run(
    store: Store,
    config: PlumblineConfig,
    as_of: datetime,
    stop: threading.Event | None,
    real_clock: Callable[[], datetime],
    notifier: PassNotifier | None,
    compute: Compute,
    max_ahead: timedelta | None = None,
    force_clock: bool = False,
) -> PassReport:
    if as_of.tzinfo is None:
        raise ValueError("as_of must carry a time zone")
    as_of = as_of.astimezone(UTC)
    real_now = real_clock().astimezone(UTC)
    if max_ahead is not None and as_of > real_now + max_ahead:
        raise ClockRefusedError(
            f"the business clock {as_of.isoformat()} is {_days(as_of - real_now)} ahead of the "
            f"real clock ({real_now.isoformat(timespec='seconds')}), more than the "
            f"{_days(max_ahead)} allowed (the longest cadence of a feed); a pass recorded there "
            "would refuse every pass at the real clock until then. Check --as-of, or add "
            "--force-clock if you mean it"
        )
    latest = store.latest_pass()
    if latest is not None and as_of < latest.as_of:
        future = latest.as_of > real_now
        if not (force_clock and future):
            recovery = (
                f"; the latest pass (id {latest.id}) stands in the future of the real clock, "
                "probably a mistyped --as-of: 'plumbline pass --force-clock' continues from the "
                "real clock (its results are kept)"
            ) if future else ""
            raise ClockRefusedError(
                f"the business clock {as_of.isoformat()} is earlier than the latest pass's "
                f"({latest.as_of.isoformat()}); passes must move forward in time{recovery}"
            )
    # The last pass that did all its work: a pass stopped early or killed left its series to
    # the next one (its mark did not move), so its fits and forecasts count as this pass's.
    finished = next(
        (p for p in store.list_passes(NOTIFY_LOOKBACK_PASSES)
         if p.status == "finished" and not p.counts.get("stopped_early")),
        None,
    )
    mark = int(finished.counts.get("observation_mark", 0)) if finished else 0
    started = time.perf_counter()
    # Idempotence: same clock, no complete file waiting, nothing left over -> nothing to do.
    if (
        latest is not None
        and as_of == latest.as_of
        and latest.status == "finished"
        and not latest.counts.get("stopped_early")
        and latest.counts.get("notified", True)
        and not files_waiting(store, config, real_clock)
    ):
        return PassReport(None, as_of, not_taken=tuple(files_not_taken(config, real_clock)),
                          timings={"total": time.perf_counter() - started})

    compute.connect()  # an unreachable cluster stops the pass here, before anything is recorded
    record = store.record_pass(as_of=as_of, started_at=real_clock())
    state = _PassState(store, config, as_of, record.id, mark, finished.id if finished else 0,
                       stop, compute)
    files: list[FileReport] = []
    stopped: str | None = None
    new_mark = mark
    try:
        files = _stage(state, "ingest", lambda: _ingest_all(state, real_clock))
        state.check_stop("score")
        _stage(state, "score", lambda: _score_all(state))
        state.check_stop("refit")
        _stage(state, "refit_check_forecast", lambda: _analyse_all(state))
        analysed_mark = store.last_observation_id()
        _stage(state, "feeds", lambda: _feed_conditions(state, files))
        state.check_stop("findings")
        raised, cleared, notify = _stage(state, "findings", lambda: _record_findings(state))
        # The mark moves only once the findings of what was analysed are recorded: a pass
        # stopped before that leaves the series to be analysed again by the next one.
        new_mark = analysed_mark
        exported = _stage(state, "export", lambda: _export(state))
    except _Stopped as stop_at:
        stopped = stop_at.stage
        raised, cleared, notify = (), (), ()
        exported = []
    report = PassReport(
        pass_id=record.id,
        as_of=as_of,
        files=tuple(files),
        outcomes_scored=state.outcomes_scored,
        series_analysed=state.series_analysed,
        fits_recorded=state.fits_recorded,
        forecasts_issued=state.forecasts_issued,
        findings_raised=tuple(raised),
        findings_cleared=tuple(cleared),
        findings_to_notify=tuple(notify),
        exports=tuple(exported),
        not_taken=tuple(state.not_taken),
        skipped=tuple(state.skipped),
        timings=state.timings,
        stopped_early=stopped,
    )
    state.timings["total"] = time.perf_counter() - started
    counts = {
        "observation_mark": new_mark,
        "files": len(report.files_taken),
        "files_refused": len(report.files_refused),
        "outcomes_scored": report.outcomes_scored,
        "series_analysed": report.series_analysed,
        "fits": report.fits_recorded,
        "forecasts": report.forecasts_issued,
        "findings_raised": len(report.findings_raised),
        "findings_cleared": len(report.findings_cleared),
        "skipped": list(state.skipped),
        "timings": {k: round(v, 4) for k, v in state.timings.items()},
        "stopped_early": stopped,
        "notify": list(report.findings_to_notify),
        "exports": [str(e.path) for e in exported],
        "notified": notifier is None,
    }
    store.finish_pass(record.id, finished_at=real_clock(), counts=counts)
    if state.compute_lost is not None:  # recorded as stopped early; the caller hears why
        raise ComputeLostError(state.compute_lost)
    # Step 7 after the pass is recorded as finished, so its pages show it so. Until it has run,
    # the pass's record says ``notified: false``; a later pass finishes the job for any pass a
    # crash interrupted there (the outbox's dedupe keys make a second try queue nothing twice).
    # A problem there is added to the pass's record and never undoes its results.
    if notifier is not None and stopped is None:
        def notify_all() -> None:
            for earlier in _passes_not_notified(store, record.id):
                notifier(store, config, earlier, now=real_clock())
                done = store.get_pass(earlier.pass_id or 0)
                if done is not None:
                    store.finish_pass(done.id, finished_at=done.finished_at or real_clock(),
                                      counts={**done.counts, "notified": True})
            notifier(store, config, report, now=real_clock())

        try:
            _stage(state, "notify", notify_all)
            counts["notified"] = True
        except DatabaseFaultError:
            raise
        except Exception as exc:
            state.skipped.append(f"notify: {type(exc).__name__}: {exc}")
        counts["skipped"] = list(state.skipped)
        counts["timings"] = {k: round(v, 4) for k, v in state.timings.items()}
        store.finish_pass(record.id, finished_at=real_clock(), counts=counts)
    return PassReport(
        **{**report.__dict__, "skipped": tuple(state.skipped), "timings": dict(state.timings)}
    )


def clock_tolerance(config: PlumblineConfig) -> timedelta:
    """How far ahead of the real clock ``plumbline pass --as-of`` may go without
    ``--force-clock``: the longest cadence of the config's date feeds (one day without any)."""
    cadences = [f.cadence for f in config.feeds.values() if isinstance(f.cadence, timedelta)]
    return max(cadences, default=timedelta(days=1))


def _days(span: timedelta) -> str:
    days = span.total_seconds() / 86400
    return f"{days:.1f} days" if days < 10 else f"{days:.0f} days"


# How far back a pass looks for earlier passes whose notify step a crash cut short.
NOTIFY_LOOKBACK_PASSES = 20


def _passes_not_notified(store: Store, current: int) -> list[PassReport]:
    """Earlier finished passes whose pages and messages were never done (oldest first)."""
    due = []
    for earlier in store.list_passes(NOTIFY_LOOKBACK_PASSES):
        if earlier.id == current or earlier.status != "finished":
            continue
        if earlier.counts.get("notified", True) or earlier.counts.get("stopped_early"):
            continue
        due.append(PassReport(
            pass_id=earlier.id, as_of=earlier.as_of,
            findings_to_notify=tuple(int(i) for i in earlier.counts.get("notify", [])),
        ))
    return sorted(due, key=lambda r: r.pass_id or 0)


def _stage(state: _PassState, name: str, work: Callable[[], Any]) -> Any:
    begun = time.perf_counter()
    try:
        return work()
    finally:
        state.timings[name] = state.timings.get(name, 0.0) + time.perf_counter() - begun


# --------------------------------------------------------------------------- 1. ingest


def ingest_spec(
    name: str, feed: Feed, config: PlumblineConfig, as_of: datetime | None = None
) -> IngestSpec:
    """The ingest's view of one feed: which columns play which role for its models. With
    ``as_of`` (the business clock), actuals dated more than ``FUTURE_ACTUAL_CADENCES`` cadences
    after its date are refused as rows."""
    latest_actual = None
    if as_of is not None and feed.period_type == "date" and isinstance(feed.cadence, timedelta):
        latest_actual = as_of.astimezone(config.zone).date() + FUTURE_ACTUAL_CADENCES * (
            feed.cadence)
    models = models_of_feed(config, name).values()
    per = sorted({m.per for m in models if m.per})
    responses = tuple(sorted({m.response for m in models}))
    required = sorted({p for m in models for p in (m.predictors or ())} - set(responses))
    optional = sorted(
        {c for m in models if m.interval is not None
         for c in (m.interval.point, m.interval.lower, m.interval.upper)}
        - set(responses) - set(required)
    )
    return IngestSpec(
        feed=name,
        inbox=feed.inbox,
        archive=feed.archive,
        rejected=feed.rejected,
        period_column=feed.period,
        format=feed.format,
        period_type=feed.period_type,
        per_column=per[0] if per else None,
        responses=responses,
        required=tuple(required),
        optional=tuple(optional),
        settle=feed.settle,
        delimiter=feed.delimiter,
        decimal=feed.decimal,
        latest_actual=latest_actual,
    )


def files_waiting(
    store: Store, config: PlumblineConfig, real_clock: Callable[[], datetime] = utc_now
) -> bool:
    """True when some inbox holds a complete file, or a crash left a move to finish."""
    for name, feed in config.feeds.items():
        spec = ingest_spec(name, feed, config)
        if store.files_awaiting_move(name) or inspect_inbox(spec, real_clock=real_clock).complete:
            return True
    return False


def files_not_taken(
    config: PlumblineConfig, real_clock: Callable[[], datetime] = utc_now
) -> list[InboxNote]:
    """Files in the inboxes that a scan now would leave there, each with why and what to do."""
    notes: list[InboxNote] = []
    for name, feed in config.feeds.items():
        spec = ingest_spec(name, feed, config)
        survey = inspect_inbox(spec, real_clock=real_clock)
        notes.extend(inbox_notes(name, feed.settle.total_seconds(), survey,
                                 now=real_clock().timestamp()))
    return notes


def _ingest_all(state: _PassState, real_clock: Callable[[], datetime]) -> list[FileReport]:
    reports: list[FileReport] = []
    for name, feed in state.config.feeds.items():
        try:
            spec = ingest_spec(name, feed, state.config, state.as_of)
            result = ingest_feed(state.store, spec, pass_id=state.pass_id, real_clock=real_clock)
            reports.extend(result.reports)
            state.not_taken.extend(result.notes)
            state.skipped.extend(f"feed {name}: {problem}" for problem in result.problems)
            state.feed_problems.setdefault(name, []).extend(result.problems)
        except DatabaseFaultError:
            raise
        except Exception as exc:  # one bad feed never stops the others
            problem = f"ingest failed: {type(exc).__name__}: {exc}"
            state.skipped.append(f"feed {name}: {problem}")
            state.feed_problems.setdefault(name, []).append(problem)
    return reports


# --------------------------------------------------------------------------- 2. score


def _score_all(state: _PassState) -> None:
    for name, model in state.config.models.items():
        try:
            awaiting = state.store.forecasts_awaiting_outcome(name, model.response)
            outcomes = [
                Outcome(a.forecast_id, a.actual, classify_outcome(a.actual, a.lower, a.upper))
                for a in awaiting
            ]
            if outcomes:
                state.outcomes_scored += state.store.record_outcomes(state.pass_id, outcomes)
        except DatabaseFaultError:
            raise
        except Exception as exc:
            state.skipped.append(f"model {name}: scoring failed: {type(exc).__name__}: {exc}")


# --------------------------------------------------------------------------- 3-5. analyse


def _analyse_all(state: _PassState) -> None:
    for name, model in state.config.models.items():
        state.check_stop("refit")
        try:
            version, new_version = _model_version(state, name, model)
            if model.fitted:
                _analyse_model(state, name, model, version, new_version)
            else:
                _audit_only_model(state, name, model, version)
            _coverage_conditions(state, name, model)
        except _Stopped:
            raise
        except DatabaseFaultError:
            raise
        except ComputeLostError as exc:  # the whole pass stops; the next one redoes it
            state.compute_lost = f"model {name}: {exc}"
            state.skipped.append(state.compute_lost)
            raise _Stopped("refit") from exc
        except Exception as exc:
            state.skipped.append(f"model {name}: {type(exc).__name__}: {exc}")


def _model_version(state: _PassState, name: str, model: Model) -> tuple[int, bool]:
    record, created = state.store.record_model_version(
        name,
        signature=model_signature(model),
        config=model.model_dump(mode="json"),
        created_at=state.as_of,
    )
    if created and record.version > 1:
        # a new version starts afresh: the old version's open findings no longer apply
        for finding in state.store.open_findings(model=name):
            state.store.clear_finding(finding.id, pass_id=state.pass_id, at=state.as_of)
    return record.version, created


def _changed_series(state: _PassState, feed: str) -> set[str | None]:
    if feed not in state.changed:
        state.changed[feed] = set(state.store.series_with_rows_after(feed, state.mark))
    return state.changed[feed]


def _analyse_model(
    state: _PassState, name: str, model: Model, version: int, new_version: bool
) -> None:
    feed = state.config.feeds[model.feed]
    predictors = tuple(model.predictors or ())
    columns = (model.response, *predictors)
    up_to = business_key(feed, state.as_of, state.config)
    baselines = state.store.baselines(name, version)
    # Only series whose rows changed are analysed, so a pass with no new data re-tests nothing;
    # a new model version (its baselines reset) analyses every series at once.
    changed = None if new_version else sorted(
        _changed_series(state, model.feed), key=lambda v: "" if v is None else v)
    if changed is not None and not changed:
        return
    windows = state.store.windows(model.feed, columns, up_to_key=up_to, series=changed)
    if not windows.series:
        return
    values, mask, keys = windows.stack()
    series = list(windows.series)
    counts = mask.sum(axis=1)
    warm = counts >= max(model.min_rows, model.parameter_count + 2)
    if not warm.any():
        return
    pick = np.flatnonzero(warm)
    values, mask, keys, counts = values[pick], mask[pick], keys[pick], counts[pick]
    series = [series[i] for i in pick]
    labels = windows.period_labels

    # Baselines: existing ones as positions; new ones set now.
    rows_needed = baseline_rows(model)
    start = np.full(len(series), -1, dtype=np.int64)
    end = np.full(len(series), -1, dtype=np.int64)
    new_baselines: list[BaselineRow] = []
    for i, s in enumerate(series):
        key_row = keys[i, : counts[i]]
        record = baselines.get(s)
        if record is not None:
            start[i] = int(np.searchsorted(key_row, record.start_key, side="left"))
            end[i] = int(np.searchsorted(key_row, record.end_key, side="right"))
            continue
        if model.baseline is not None:
            b0 = period_key_of(feed, model.baseline.start)
            b1 = period_key_of(feed, model.baseline.end)
            if up_to is not None and up_to < b1:
                continue
            lo = int(np.searchsorted(key_row, b0, side="left"))
            hi = int(np.searchsorted(key_row, b1, side="right"))
            set_by = "declared"
        elif counts[i] >= rows_needed:
            lo, hi, set_by = 0, rows_needed, "auto"
        else:
            continue
        if hi - lo < model.parameter_count + 2:
            continue
        start[i], end[i] = lo, hi
        new_baselines.append(_baseline_row(name, version, s, key_row, lo, hi, set_by, labels))
    if new_baselines:
        state.store.set_baselines(new_baselines, created_at=state.as_of, pass_id=state.pass_id)

    horizon = np.where(end > start, (end - start) * 2, 1) if model.horizon is None else np.full(
        len(series), model.horizon)
    horizon = np.maximum(horizon.astype(np.int64), 1)

    plans = state.store.plan_rows_awaiting_forecast(model.feed, name, predictors)
    plan_index: dict[str | None, list[int]] = {}
    for row, s in enumerate(plans.series):
        plan_index.setdefault(s, []).append(row)
    wanted = set(series)
    m = max((len(v) for s, v in plan_index.items() if s in wanted), default=0)
    k = len(predictors)
    plan_x = np.zeros((len(series), m, k))
    plan_mask = np.zeros((len(series), m), dtype=bool)
    plan_rows: list[list[int]] = []
    for i, s in enumerate(series):
        rows = plan_index.get(s, [])
        plan_rows.append(rows)
        if rows:
            plan_x[i, : len(rows)] = plans.values[rows]
            plan_mask[i, : len(rows)] = True

    batch = BatchInput(
        predictors=predictors,
        intercept=model.intercept,
        level=model.level,
        significance=model.thresholds.significance,
        x=values[:, :, 1:],
        y=values[:, :, 0],
        mask=mask,
        window=model.window if isinstance(model.window, int) else None,
        baseline_start=start,
        baseline_end=end,
        horizon=horizon,
        recent=model.recent,
        plan_x=plan_x,
        plan_mask=plan_mask,
    )
    state.check_stop("refit")
    out = state.compute.analyse(batch, lambda: state.check_stop("refit"), function=analyse_batch)
    state.series_analysed += len(series)

    # What the last *finished* pass knew: a pass a crash cut short may have fitted and forecast
    # already, and its work must count as this pass's, not as the past.
    previous = state.store.latest_fit_marks(name, version=version, up_to_pass=state.finished_id)
    fit_rows = _fit_rows(name, version, model, out, series, keys, labels)
    fit_ids = state.store.record_fits(state.pass_id, fit_rows)
    state.fits_recorded += len(fit_ids)

    # Roll the baseline forward when the horizon passed with no alarm.
    rolled = [
        _baseline_row(name, version, s, keys[i, : counts[i]], int(counts[i]) - rows_needed,
                      int(counts[i]), "rolled", labels)
        for i, s in enumerate(series)
        if out.monitoring.horizon_exhausted[i] and not out.monitoring.crossed[i]
        and counts[i] >= rows_needed
    ]
    if rolled:
        state.store.set_baselines(rolled, created_at=state.as_of, pass_id=state.pass_id)

    state.check_stop("forecast")
    forecasts, extrapolated_first, worst_leverage = _forecast_rows(
        state, name, model, version, out, series, keys, counts, plans, plan_rows, fit_ids)
    if forecasts:
        if model.calibrated:
            forecasts = _calibrated(state, name, model, forecasts)
        state.forecasts_issued += state.store.record_forecasts(state.pass_id, forecasts).inserted

    answered = [bool(rows) for rows in plan_rows]
    _carry_interrupted_forecasts(state, name, series, out, answered, extrapolated_first)
    _model_conditions(state, name, model, out, series, keys, counts, start, end, labels,
                      previous, answered, extrapolated_first, worst_leverage, horizon)


def _forecast_rows(
    state: _PassState, name: str, model: Model, version: int, out: BatchOutput,
    series: list[str | None], keys: np.ndarray, counts: np.ndarray, plans: PlanRows,
    plan_rows: list[list[int]], fit_ids: Sequence[int],
) -> tuple[list[ForecastRow], list[str | None], np.ndarray]:
    """The forecasts of the plan rows (series by series, plan rows in order), each series'
    first plan period far outside what its model knows, and its largest plan-row leverage
    (NaN where none). The arrays are read as Python lists once, not indexed row by row."""
    feed = state.config.feeds[model.feed]
    predictors = tuple(model.predictors or ())
    forecasts: list[ForecastRow] = []
    extrapolated_first: list[str | None] = [None] * len(series)
    prediction = out.prediction
    m = out.extrapolation.shape[1] if out.extrapolation.ndim == 2 else 0
    with np.errstate(invalid="ignore"):
        far_rows = (np.asarray(out.extrapolation, dtype=bool)
                    & (out.plan_p_value < EXTRAPOLATION_P_VALUE)).tolist()
    answered = np.zeros((len(series), m), dtype=bool)
    for i, rows in enumerate(plan_rows):
        answered[i, : len(rows)] = True
    answered &= np.asarray(out.fit.estimable, dtype=bool)[:, None]
    leverage_array = np.asarray(prediction.leverage, dtype=np.float64).reshape(len(series), m)
    worst_leverage = np.fmax.reduce(np.where(answered, leverage_array, np.nan), axis=1,
                                    initial=np.nan) if m else np.full(len(series), np.nan)
    flags = np.asarray(out.extrapolation, dtype=bool).tolist()
    point, lower, upper = (_listed(prediction.point), _listed(prediction.lower),
                           _listed(prediction.upper))
    mean_lower, mean_upper = _listed(prediction.mean_lower), _listed(prediction.mean_upper)
    leverage = leverage_array.tolist()
    estimable = _listed(out.fit.estimable, bool)
    latest = keys[np.arange(len(series)), np.maximum(counts - 1, 0)].astype(np.int64).tolist()
    period_key = plans.period_key.astype(np.int64).tolist()
    observation_id = plans.observation_id.astype(np.int64).tolist()
    inputs = plans.values.astype(float).tolist()
    for i, s in enumerate(series):
        if not estimable[i] or not plan_rows[i]:
            continue
        latest_key = latest[i]
        for j, row in enumerate(plan_rows[i]):
            if far_rows[i][j] and extrapolated_first[i] is None:
                extrapolated_first[i] = plans.period[row]
            forecasts.append(ForecastRow(
                model=name, feed=model.feed, series=s,
                target_period=plans.period[row],
                target_period_key=period_key[row],
                issued_at=state.as_of,
                lead=cadence_steps(feed, latest_key, period_key[row]),
                point=point[i][j],
                lower=lower[i][j],
                upper=upper[i][j],
                level=model.level,
                mean_lower=mean_lower[i][j],
                mean_upper=mean_upper[i][j],
                leverage=leverage[i][j],
                extrapolation=flags[i][j],
                fit_id=fit_ids[i],
                version=version,
                observation_id=observation_id[row],
                inputs=dict(zip(predictors, inputs[row], strict=True)),
            ))
    return forecasts, extrapolated_first, worst_leverage


def _carry_interrupted_forecasts(
    state: _PassState, name: str, series: list[str | None], out: BatchOutput,
    answered: list[bool], extrapolated_first: list[str | None],
) -> None:
    """Forecasts a crashed pass issued since the last finished one are judged for the
    extrapolation finding as if this pass had issued them (it will not issue them again)."""
    # Only the passes between the last finished one and this one: not this pass's own.
    earlier = state.store.forecasts_issued_after(name, state.finished_id, before=state.pass_id)
    if not earlier:
        return
    position = {s: i for i, s in enumerate(series)}
    fit = out.fit
    max_leverage = np.max(np.where(out.window_mask, np.nan_to_num(fit.leverage), -np.inf), axis=1)
    for forecast in earlier:
        i = position.get(forecast.series)
        if i is None or not fit.estimable[i]:
            continue
        answered[i] = True
        x0 = np.array([forecast.inputs.get(p, np.nan) for p in fit.terms[int(fit.intercept):]])
        low, high = fit.x_min[i], fit.x_max[i]
        outside = bool(np.any((x0 < low) | (x0 > high)))
        above = max_leverage[i] > 0 and (forecast.leverage or 0.0) > max_leverage[i]
        cloud = PredictorCloud(out.cloud.mean[i : i + 1], out.cloud.precision[i : i + 1],
                               out.cloud.n[i : i + 1])
        p_far = float(new_point_p_value(cloud, x0[None, None, :])[0, 0])
        far = (outside or above) and p_far < EXTRAPOLATION_P_VALUE
        if far and extrapolated_first[i] is None:
            extrapolated_first[i] = forecast.target_period


def _baseline_row(
    model: str, version: int, series: str | None, key_row: np.ndarray, lo: int, hi: int,
    set_by: str, labels: dict[int, str],
) -> BaselineRow:
    start_key, end_key = int(key_row[lo]), int(key_row[hi - 1])
    after = int(key_row[hi]) if hi < key_row.size else None
    return BaselineRow(
        model=model, version=version, series=series,
        start_period=labels.get(start_key, str(start_key)), start_key=start_key,
        end_period=labels.get(end_key, str(end_key)), end_key=end_key, set_by=set_by,
        monitoring_start=None if after is None else labels.get(after, str(after)),
        monitoring_start_key=after,
    )


def _label(labels: dict[int, str], key: int) -> str:
    return labels.get(key, str(key))


def _plain(values: Any) -> list[Any]:
    """An array as nested Python lists, non-finite numbers as None (JSON's null)."""
    array = np.asarray(values, dtype=np.float64)
    objects = array.astype(object)
    objects[~np.isfinite(array)] = None
    listed: list[Any] = objects.tolist()
    return listed


def _listed(values: Any, kind: type = float) -> list[Any]:
    """An array as a Python list of ``kind`` (floats keep NaN: the JSON writer nulls them)."""
    listed: list[Any] = np.asarray(values).astype(kind).tolist()
    return listed


def _ends(
    mask: np.ndarray, keys: np.ndarray, labels: dict[int, str]
) -> tuple[list[bool], list[int], list[int], list[str], list[str]]:
    """Per series, whether ``mask`` has a row, and the period key and label of its first and
    of its last row (0 and '' where it has none)."""
    some = mask.any(axis=1)
    width = mask.shape[1]
    rows = np.arange(mask.shape[0])
    first = mask.argmax(axis=1) if width else np.zeros(mask.shape[0], np.int64)
    last = width - 1 - mask[:, ::-1].argmax(axis=1) if width else first
    first_key = np.where(some, keys[rows, first] if width else 0, 0).astype(np.int64).tolist()
    last_key = np.where(some, keys[rows, last] if width else 0, 0).astype(np.int64).tolist()
    has_rows: list[bool] = np.asarray(some).tolist()
    return (
        has_rows, first_key, last_key,
        [_label(labels, key) for key in first_key], [_label(labels, key) for key in last_key],
    )


def _fit_rows(
    name: str, version: int, model: Model, out: BatchOutput, series: list[str | None],
    keys: np.ndarray, labels: dict[int, str],
) -> list[FitRow]:
    """The fit record of every series of the batch. Each array of the output is turned into
    Python lists once (not indexed series by series), so that building 10,000 records is the
    dictionaries alone; what every record holds is as before."""
    fit, base, monitoring = out.fit, out.baseline_fit, out.monitoring
    estimable = _listed(fit.estimable, bool)
    coef, se, t, p = _plain(fit.coef), _plain(fit.standard_error), _plain(fit.t), _plain(
        fit.p_value)
    lower, upper = _plain(fit.lower), _plain(fit.upper)
    n, residual_df = _listed(fit.n, np.int64), _listed(fit.residual_df, np.int64)
    r_squared, adj_r_squared = _plain(fit.r_squared), _plain(fit.adj_r_squared)
    residual_std_error = _plain(fit.residual_std_error)
    f_statistic, f_p_value = _plain(fit.f_statistic), _plain(fit.f_p_value)
    exact_fit = _listed(fit.exact_fit, bool)
    durbin_watson = _plain(out.durbin_watson.statistic)
    bg_statistic, bg_p_value = _plain(out.breusch_godfrey.statistic), _plain(
        out.breusch_godfrey.p_value)
    bp_statistic, bp_p_value = _plain(out.breusch_pagan.statistic), _plain(
        out.breusch_pagan.p_value)
    jb_statistic, jb_p_value = _plain(out.jarque_bera.statistic), _plain(out.jarque_bera.p_value)
    has_baseline = _listed(out.has_baseline, bool)
    base_r_squared, base_coef = _plain(base.r_squared), _plain(base.coef)
    base_lower, base_upper, base_p = _plain(base.lower), _plain(base.upper), _plain(base.p_value)
    base_estimable = _listed(base.estimable, bool)
    monitorable = _listed(monitoring.monitorable, bool)
    crossed = _listed(monitoring.crossed, bool)
    statistic, max_ratio = _listed(monitoring.statistic), _listed(monitoring.max_ratio)
    periods_monitored = _listed(monitoring.periods_monitored, np.int64)
    horizon = _listed(monitoring.horizon, np.int64)
    critical_value, p_value = _listed(monitoring.critical_value), _listed(monitoring.p_value)
    break_index = np.asarray(monitoring.break_index).astype(np.int64)
    rows = np.arange(len(series))
    break_key = np.where(
        break_index >= 0, keys[rows, np.maximum(break_index, 0)] if keys.shape[1] else 0, 0
    ).astype(np.int64).tolist()
    break_at = (break_index >= 0).tolist()
    recent_tested = _listed(out.recent_tested, bool)
    shift_t, shift_p = _plain(out.slope_shift.t), _plain(out.slope_shift.p_value)
    windowed, first_key, last_key, first_label, last_label = _ends(out.window_mask, keys, labels)
    _, _, _, recent_first, recent_last = _ends(out.recent_mask, keys, labels)
    paths = len(series) <= PATH_SERIES_LIMIT
    terms, base_terms = list(fit.terms), list(base.terms)
    level, boundary = model.level, monitoring.boundary_name
    rows_out = []
    for i, s in enumerate(series):
        if estimable[i]:
            c, e, tv, pv, lo, hi = coef[i], se[i], t[i], p[i], lower[i], upper[i]
            coefficients: dict[str, Any] = {
                term: {"estimate": c[j], "standard_error": e[j], "t": tv[j], "p_value": pv[j],
                       "lower": lo[j], "upper": hi[j]}
                for j, term in enumerate(terms)
            }
            inference: dict[str, Any] = {
                "n": n[i], "residual_df": residual_df[i], "r_squared": r_squared[i],
                "adj_r_squared": adj_r_squared[i], "residual_std_error": residual_std_error[i],
                "f_statistic": f_statistic[i], "f_p_value": f_p_value[i],
                "exact_fit": exact_fit[i], "level": level,
            }
        else:
            coefficients, inference = {}, {}
        diagnostics: dict[str, Any] = {
            "durbin_watson": durbin_watson[i],
            "breusch_godfrey": {"statistic": bg_statistic[i], "p_value": bg_p_value[i]},
            "breusch_pagan": {"statistic": bp_statistic[i], "p_value": bp_p_value[i]},
            "jarque_bera": {"statistic": jb_statistic[i], "p_value": jb_p_value[i]},
        }
        if has_baseline[i]:
            bc, bl, bu, bp = base_coef[i], base_lower[i], base_upper[i], base_p[i]
            diagnostics["baseline"] = {
                "r_squared": base_r_squared[i],
                "coefficients": {
                    term: {"estimate": bc[j], "lower": bl[j], "upper": bu[j], "p_value": bp[j]}
                    for j, term in enumerate(base_terms)
                } if base_estimable[i] else {},
            }
        if monitorable[i]:
            entry: dict[str, Any] = {
                "statistic": statistic[i],
                "max_ratio": max_ratio[i],
                "crossed": crossed[i],
                "periods_monitored": periods_monitored[i],
                "horizon": horizon[i],
                "critical_value": critical_value[i],
                "p_value": p_value[i],
                "boundary_family": boundary,
                "break_period": _label(labels, break_key[i]) if break_at[i] else None,
            }
            if paths or crossed[i]:
                monitored = np.flatnonzero(out.monitor_mask[i])
                entry["path"] = {
                    "periods": [_label(labels, key) for key in keys[i, monitored].tolist()],
                    "cusum": monitoring.cusum_path[i, monitored].astype(float).tolist(),
                    "boundary": monitoring.boundary_path[i, monitored].astype(float).tolist(),
                }
            diagnostics["monitoring"] = entry
        if recent_tested[i]:
            diagnostics["slope_shift"] = {
                "recent_first": recent_first[i],
                "recent_last": recent_last[i],
                "t": shift_t[i],
                "p_value": shift_p[i],
            }
        rows_out.append(FitRow(
            model=name, version=version, series=s, n=n[i], estimable=estimable[i],
            reason=fit.reason[i],
            window_first=first_label[i] if windowed[i] else None,
            window_first_key=first_key[i] if windowed[i] else None,
            window_last=last_label[i] if windowed[i] else None,
            window_last_key=last_key[i] if windowed[i] else None,
            coefficients=coefficients, inference=inference, diagnostics=diagnostics,
        ))
    return rows_out


def _model_conditions(
    state: _PassState, name: str, model: Model, out: BatchOutput, series: list[str | None],
    keys: np.ndarray, counts: np.ndarray, start: np.ndarray, end: np.ndarray,
    labels: dict[int, str], previous: dict[str | None, tuple[int | None, bool]],
    answered: list[bool],
    extrapolated_first: list[str | None], worst_leverage: np.ndarray, horizon: np.ndarray,
) -> None:
    t = model.thresholds
    clear = t.clear_after
    predictors = list(model.predictors or ())
    slopes = slice(1, None) if model.intercept else slice(None)
    fit = out.fit
    ok = fit.estimable
    s = len(series)

    rows = np.arange(s)
    width = keys.shape[1] if keys.ndim == 2 else 0

    def periods_at(position: np.ndarray) -> list[str | None]:
        """Each series' period at a row position (None outside its rows), all series at once."""
        position = np.asarray(position, dtype=np.int64)
        inside = ((position >= 0) & (position < counts)).tolist()
        if not width:
            return [None] * s
        at = keys[rows, np.clip(position, 0, width - 1)].astype(np.int64).tolist()
        return [_label(labels, key) if inside[i] else None for i, key in enumerate(at)]

    def last_row(mask: np.ndarray) -> np.ndarray:
        return width - 1 - np.asarray(mask)[:, ::-1].argmax(axis=1) if width else rows

    # The fit's own diagnostics become findings once per block of ``recent`` rows (and at the
    # first fit), not at every weekly step of an overlapping window: a rule of thumb or a 5 %
    # test re-read every week on nearly the same rows raises and clears notices at random.
    block = max(model.recent, 1)
    fresh = np.ones(s, dtype=bool)
    last_seen = [previous.get(sr) for sr in series]
    seen = np.array([p is not None and p[0] is not None for p in last_seen], dtype=bool)
    if seen.any() and width:
        mark = np.array([p[0] if p is not None and p[0] is not None else 0 for p in last_seen],
                        dtype=np.int64)
        # Rows up to the previous fit's last period (searchsorted "right" on each series'
        # sorted keys): the keys at or below the mark among the series' rows.
        own = np.arange(width)[None, :] < counts[:, None]
        before = ((keys <= mark[:, None]) & own).sum(axis=1)
        fresh = np.where(seen, counts // block > before // block, True)
    # ... and only from a window of at least DIAGNOSTIC_MIN_ROWS rows.
    ok_fresh = ok & fresh & (fit.n >= DIAGNOSTIC_MIN_ROWS)
    window_first = periods_at(np.asarray(out.window_mask).argmax(axis=1) if width else rows)
    window_last = periods_at(counts - 1)
    tested = np.asarray(out.recent_tested, dtype=bool)
    recent_first = [
        first if tested[i] else None
        for i, first in enumerate(periods_at(
            np.asarray(out.recent_mask).argmax(axis=1) if width else rows))
    ]
    # The periods compared, by their dates: the baseline's, and the latest complete recent block.
    spanned = ((start >= 0) & (end > start)).tolist()
    start_first, start_last = periods_at(start), periods_at(end - 1)
    start_spans = [
        (start_first[i], start_last[i]) if spanned[i] else None for i in range(s)
    ]
    has_recent = (tested & np.asarray(out.recent_mask).any(axis=1)).tolist() if width else (
        [False] * s)
    recent_last = periods_at(last_row(out.recent_mask))
    recent_spans = [
        (recent_first[i], recent_last[i]) if has_recent[i] else None for i in range(s)
    ]
    nan_if = np.where

    # structural break (sequential monitoring)
    monitoring = out.monitoring
    break_period = periods_at(monitoring.break_index)
    breaks = structural_break_conditions(
        name, series, monitoring.p_value, monitoring.max_ratio, break_period,
        monitoring.monitorable & (monitoring.periods_monitored > 0) & ok, t,
        start_spans=start_spans,
    )
    state.add(breaks, clear)
    held = {c.key.series for c in breaks if c.holds}
    break_held = np.array([sr in held for sr in series], dtype=bool)

    # slope shift: after a structural break, before vs after the estimated break; otherwise
    # over the latest complete recent block
    if predictors:
        looks = looks_per_horizon(int(np.median(horizon)) if s else 1, model.recent)
        state.add(slope_shift_conditions(
            name, series, predictors, out.slope_shift.t, out.slope_shift.p_value, t,
            recent_first, looks=looks, start_spans=start_spans, recent_spans=recent_spans,
            break_statistic=nan_if(out.break_tested[:, None], out.break_shift.t, np.nan),
            break_p_value=nan_if(out.break_tested[:, None], out.break_shift.p_value, np.nan),
            break_held=break_held, break_since=break_period,
        ), clear)
        base = out.baseline_fit
        comparable = (out.has_baseline & base.estimable & ok_fresh)[:, None]
        state.add(significance_conditions(
            name, series, predictors,
            nan_if(comparable, base.coef[:, slopes], np.nan),
            nan_if(comparable, base.p_value[:, slopes], np.nan),
            nan_if(comparable, fit.coef[:, slopes], np.nan),
            nan_if(comparable, fit.p_value[:, slopes], np.nan),
            t, window_last, start_spans=start_spans,
        ), clear)
        state.add(heteroscedasticity_conditions(
            name, series, out.breusch_pagan.statistic,
            nan_if(ok_fresh, out.breusch_pagan.p_value, np.nan), t, window_first,
        ), clear)
    base_ok = out.has_baseline & out.baseline_fit.estimable
    state.add(weak_fit_conditions(
        name, series, nan_if(ok_fresh, fit.r_squared, np.nan),
        nan_if(base_ok, out.baseline_fit.r_squared, np.nan),
        t, window_last, start_spans=start_spans,
        variance_p_value=nan_if(ok_fresh & base_ok, variance_increase_p_value(
            fit.residual_std_error ** 2, fit.residual_df,
            out.baseline_fit.residual_std_error ** 2, out.baseline_fit.residual_df,
        ), np.nan),
    ), clear)
    state.add(autocorrelation_conditions(
        name, series, out.durbin_watson.statistic,
        nan_if(ok_fresh, out.breusch_godfrey.p_value, np.nan), t, window_first,
    ), clear)
    has_plans = np.array(answered, dtype=bool) & ok
    state.add(extrapolation_conditions(
        name, series, [first is not None for first in extrapolated_first], has_plans,
        extrapolated_first, worst_leverage,
    ), clear)
    fitted_before = np.array([
        (prev := previous.get(sr)) is not None and prev[1] for sr in series
    ], dtype=bool)
    state.add(not_estimable_conditions(
        name, series, ok, fitted_before, fit.reason, window_last,
    ), clear)


def _audit_only_model(state: _PassState, name: str, model: Model, version: int) -> None:
    """An ``interval:`` model: record the intervals made elsewhere as forecasts to score."""
    assert model.interval is not None
    cols = (model.interval.point, model.interval.lower, model.interval.upper)
    plans = state.store.plan_rows_awaiting_forecast(model.feed, name, cols)
    rows: list[ForecastRow] = []
    for r, s in enumerate(plans.series):
        point, lower, upper = (float(v) for v in plans.values[r])
        if lower > upper:
            state.skipped.append(
                f"model {name}: plan row {plans.period[r]}{'' if s is None else ' of ' + s} "
                "has its lower bound above its upper bound; not audited"
            )
            continue
        rows.append(ForecastRow(
            model=name, feed=model.feed, series=s, target_period=plans.period[r],
            target_period_key=int(plans.period_key[r]), issued_at=state.as_of, lead=1,
            point=point, lower=lower, upper=upper, level=model.interval.level,
            version=version, observation_id=int(plans.observation_id[r]),
        ))
    if rows:
        if model.calibrated:
            rows = _calibrated(state, name, model, rows)
        state.forecasts_issued += state.store.record_forecasts(state.pass_id, rows).inserted


def _calibrated(
    state: _PassState, name: str, model: Model, rows: list[ForecastRow]
) -> list[ForecastRow]:
    """The forecasts with their calibrated interval beside the model's own
    (``interval_method: calibrated``; ``monitor.calibration``), from each series' scored
    forecasts so far (this pass's scoring included)."""
    wanted = sorted({r.series for r in rows}, key=lambda v: "" if v is None else v)
    factors = calibrations(state.store.scored_forecasts(name), wanted, model.nominal_level)
    out: list[ForecastRow] = []
    for row in rows:
        calibration = factors[row.series]
        bounds = calibration.bounds(row.point, row.lower, row.upper)
        if bounds is None:
            out.append(row)
            continue
        out.append(replace(row, calibrated_lower=bounds[0], calibrated_upper=bounds[1],
                           calibrated_factor=calibration.factor))
    return out


def _coverage_conditions(state: _PassState, name: str, model: Model) -> None:
    """Coverage, clustered misses and forecast bias for the series that had forecasts scored in
    this pass: the chart of the misses over each series' latest horizon of scored forecasts
    (``monitor.stats.misscusum``), the audit, independence and bias tests over the latest
    ``recent``."""
    # Series scored by this pass, or by a pass a crash cut short since the last finished one.
    fresh = state.store.series_scored_after(name, state.finished_id)
    if not fresh:
        return
    horizon = model.horizon if model.horizon is not None else 2 * baseline_rows(model)
    scored = state.store.scored_forecasts(name, last=max(horizon, model.recent), with_df=True)
    names = sorted(set(scored.series) & fresh, key=lambda v: "" if v is None else v)
    if not names:
        return
    position = {n: i for i, n in enumerate(names)}
    keep = np.array([sr in position for sr in scored.series], dtype=bool)
    group = np.array([position.get(sr, -1) for sr in scored.series])[keep]
    actual = scored.actual[keep]
    lower, upper, point = scored.lower[keep], scored.upper[keep], scored.point[keep]
    periods = np.array(scored.target_period, dtype=object)[keep]
    # Rows of one series are in target order; ``recent`` marks each series' latest ``recent``.
    per_group = np.bincount(group, minlength=len(names))
    firsts = np.concatenate(([0], np.cumsum(per_group)[:-1]))
    recent = np.arange(group.size) - firsts[group] >= per_group[group] - model.recent
    audit = audit_batch(group, actual, lower, upper, model.nominal_level, last=model.recent,
                        confidence=None)
    ordered = [names[int(g)] for g in audit.group]
    missed = (actual < lower) | (actual > upper)
    level = model.nominal_level
    assert scored.residual_df is not None
    score = gaussian_scores(actual, point, lower, upper, level, scored.residual_df[keep])
    chart = error_cusum_batch(group, score, missed, horizon, last=horizon)
    since = [None if r < 0 else str(periods[r]) for r in chart.start_row]
    calibrated = calibrated_chart = None
    calibrated_since: list[str | None] | None = None
    if model.calibrated and scored.calibrated_lower is not None and (
            scored.calibrated_upper is not None):
        cal_lower, cal_upper = scored.calibrated_lower[keep], scored.calibrated_upper[keep]
        issued = np.isfinite(cal_lower) & np.isfinite(cal_upper)
        if issued.any():
            # The calibrated intervals issued beside the model's own, judged the same way.
            calibrated = audit_batch(group, actual, cal_lower, cal_upper, model.nominal_level,
                                     last=model.recent, confidence=None)
            with np.errstate(invalid="ignore"):
                cal_missed = issued & ((actual < cal_lower) | (actual > cal_upper))
            # The calibrated interval is no t interval: its errors are scored as normal ones.
            # A series without a calibrated interval yet keeps its entry (its scores are NaN)
            # with an empty chart, so the chart lines up with the audit.
            cal_score = gaussian_scores(actual, point, cal_lower, cal_upper, level)
            calibrated_chart = error_cusum_batch(group, cal_score, cal_missed, horizon,
                                                 last=horizon)
            calibrated_since = [None if r < 0 else str(periods[r])
                                for r in calibrated_chart.start_row]
    t = model.thresholds
    state.add(coverage_conditions(name, ordered, audit, chart, t, since, calibrated,
                                  calibrated_chart, calibrated_since), t.clear_after)
    first_miss = _first_periods(group, periods, recent & missed, audit.group)
    state.add(clustered_miss_conditions(name, ordered, audit, t, first_miss), t.clear_after)
    accuracy = accuracy_batch(group[recent], actual[recent], point[recent])
    first = [str(p) for p in _first_periods(group, periods, recent, accuracy.group)]
    state.add(forecast_bias_conditions(
        name, [names[int(g)] for g in accuracy.group], accuracy, t, first, looks=horizon,
    ), t.clear_after)


def _first_periods(
    group: NDArray[np.int64], periods: NDArray[Any], rows: NDArray[np.bool_], wanted: NDArray[Any]
) -> list[str | None]:
    """Each wanted group's first period among ``rows`` (None where it has none), in one pass
    over the rows: a group's rows come together and in target order."""
    codes, at = np.unique(group[rows], return_index=True)
    first = dict(zip(codes.tolist(), periods[rows][at].tolist(), strict=True))
    return [None if (p := first.get(int(g))) is None else str(p) for g in wanted]


# --------------------------------------------------------------------------- feeds


def _feed_conditions(state: _PassState, files: Sequence[FileReport]) -> None:
    touched_feeds: set[str] = set()
    rejections = [
        RejectedInput(r.feed, r.name, r.whole_file_rejected, r.duplicate, r.rows_rejected,
                      _rejection_reason(r), problem=r.problem or None)
        for r in files if r.raises_finding
    ]
    # Files a crashed pass took since the last finished one count as taken now.
    taken_now = {r.file_id for r in files}
    for record in state.store.list_files(after_pass=state.finished_id):
        if record.id in taken_now or record.pass_id == state.pass_id:
            continue
        bad = record.outcome.value in ("rejected", "duplicate") or record.rows_rejected > 0
        if bad:
            reason = record.note or (record.errors_text.strip().splitlines() or [""])[0]
            rejections.append(RejectedInput(
                record.feed, record.name, record.outcome.value == "rejected",
                record.outcome.value == "duplicate", record.rows_rejected, reason))
        taken_now.add(record.id)
        touched_feeds.add(record.feed)
    for feed_name, problems in state.feed_problems.items():
        rejections += [RejectedInput(feed_name, "", False, False, 0, "", problem=problem)
                       for problem in problems]
        touched_feeds.add(feed_name)
    clear_default = 2
    touched = sorted({r.feed for r in files} | touched_feeds)
    state.add(rejected_input_conditions(touched, rejections), clear_default)
    for name, feed in state.config.feeds.items():
        if feed.period_type == "integer" or not isinstance(feed.cadence, timedelta):
            continue  # integer periods have no calendar to be late against
        found = state.store.latest_actual_period(name)
        if found is None:
            continue
        latest_key, latest_period = found
        latest = period_key_date(latest_key)
        latest_moment = datetime(latest.year, latest.month, latest.day, tzinfo=state.config.zone)
        condition = stale_feed_condition(
            name, latest_moment, latest_period, state.as_of, feed.cadence
        )
        if condition is not None:
            state.add([condition], clear_default)


def _rejection_reason(report: FileReport) -> str:
    if report.duplicate:
        return f"the same bytes as {report.duplicate_of}"
    if report.whole_file_rejected:  # the reason itself (the report's first line only names it)
        return report.note or (report.errors.strip().splitlines() or [""])[0]
    first = report.rejected[0] if report.rejected else None
    where = f"first at line {first.line}: {first.reason}" if first else report.note
    hint = f". {report.note}" if first and report.note else ""
    return f"{where}; see {report.name}.rejected.csv{hint}"


# --------------------------------------------------------------------------- export


def _export(state: _PassState) -> list[ExportedFile]:
    """Write the forecasts this pass issued (and any a crashed pass since the last finished one
    issued) into the export folder. A folder that cannot be written is reported in ``skipped``;
    the forecasts stay in the database and ``plumbline forecasts`` lists them."""
    try:
        return export_forecasts(state.store, state.config,
                                range(state.finished_id + 1, state.pass_id + 1))
    except OSError as exc:
        state.skipped.append(f"export: {exc.strerror or exc} ({exc.filename}); the forecasts are "
                             "in the database: plumbline forecasts lists them")
        return []


# --------------------------------------------------------------------------- 6. findings


def _record_findings(state: _PassState) -> tuple[list[int], list[int], list[int]]:
    raised: list[int] = []
    cleared: list[int] = []
    notify: list[int] = []
    store = state.store
    store.mark_new_findings_ongoing(state.pass_id)
    open_ids = {
        (f.model, f.series, f.feed, f.kind): f.id for f in store.open_findings()
    }
    with store.transaction():
        for condition, clear_after in state.conditions:
            key = condition.key
            if condition.holds:
                upsert = store.upsert_finding(
                    Finding(key.model, key.series, key.feed, key.kind, condition.severity,
                            condition.since_period, condition.statistic, condition.p_value,
                            condition.message, condition.action),
                    pass_id=state.pass_id, at=state.as_of,
                )
                record = upsert.finding
                if upsert.created:
                    raised.append(record.id)
                    if should_notify("raised", acknowledged=record.acknowledged_at is not None):
                        notify.append(record.id)
                elif should_notify("continued", acknowledged=record.acknowledged_at is not None,
                                   severity=record.severity,
                                   previous_severity=upsert.previous_severity):
                    notify.append(record.id)
            else:
                finding_id = open_ids.get((key.model, key.series, key.feed, key.kind))
                if finding_id is None:
                    continue
                after = store.mark_finding_absent(finding_id, pass_id=state.pass_id,
                                                  at=state.as_of, clear_after=clear_after)
                if after.cleared_pass_id == state.pass_id:
                    cleared.append(after.id)
                    if should_notify("cleared", acknowledged=after.acknowledged_at is not None):
                        notify.append(after.id)
    return raised, cleared, notify


__all__ = [
    "PATH_SERIES_LIMIT",
    "PassNotifier",
    "PassReport",
    "baseline_rows",
    "business_key",
    "cadence_steps",
    "clock_tolerance",
    "files_not_taken",
    "files_waiting",
    "ingest_spec",
    "run_pass",
]
