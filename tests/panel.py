"""A seeded panel of weekly series pushed through the real pass, week by week (issue 14).

This is the acceptance harness for the finding kinds' error rates and detection delays. It
writes a real workspace (config file, drop folder, one CSV file per week with a ``.ready``
marker, a SQLite database) and runs ``monitor.passes.run_pass`` (what ``plumbline pass`` runs)
once per week at the business clock of that week's delivery, then reads every finding the
passes raised from the database and tallies them per kind.

The panel (invented data, seeded): ``series`` series (``per: unit``), each
``y = a + b1·x1 + b2·x2 + e`` over ``weeks`` weeks. The predictors of a series are drawn every
week from one unchanging normal distribution (its own mean and spread), so a plan row is never
really outside what the model knows. The errors are iid normal with the series' SD ``sigma``,
or a stationary AR(1) with coefficient ``rho`` and the same marginal SD (innovations of SD
``sigma·sqrt(1 − rho²)``). ``b1`` is set so that one SD of ``x1`` moves ``y`` by about 3
error SDs (R² around 0.9, usual for operational regressions), which makes a 30 % slope change
worth about 0.9 error SD per SD of ``x1``. The mean of ``x1`` is 1.5 to 3 of its SDs, so the
slope change also moves the level at the mean by about 1.4 to 2.7 error SDs (a predictor whose
mean is many SDs from zero would turn every slope change into a large level shift, which any
test finds at once); one SD of ``x2`` moves it by 1 to 2 error SDs, up or
down, so both predictors clearly matter (a slope near zero would make ``significance_lost``
a coin toss on every series, which is not what a stable panel is about).

Planted changes (``planted_share`` of the series, split evenly among the three kinds, from
week ``change_week`` on): ``slope`` multiplies ``b1`` by 1.3, ``level`` adds 3 error SDs,
``spread`` doubles the error SD. Each week's file holds that week's actuals of every series
and the next week's plan rows (predictors only), so every warm series is forecast a week ahead
and scored when the actual arrives.

The model uses ``window: 52`` and every other setting at its default (``level`` 0.95,
``recent`` 26, ``min_rows`` 10, ``thresholds.significance`` 0.05, ``fdr`` 0.10, the horizon
twice the baseline's length).

Used by ``tests/test_panel.py`` (reduced size, in CI) and
``tests/benchmarks/bench_stable_panel.py`` (the full 200 × 156 panels, by hand).
"""

from __future__ import annotations

import os
import sqlite3
import statistics
import tempfile
from collections import defaultdict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import date, datetime, time, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

from monitor.config import load_config
from monitor.lock import DatabaseLock
from monitor.passes import run_pass
from monitor.store import Store
from monitor.vocabulary import FindingKind, Severity

ZONE = ZoneInfo("Europe/Berlin")
FIRST_WEEK_ENDING = date(2022, 1, 2)  # a Sunday
CHANGES = ("slope", "level", "spread")
# Which kinds name each planted change (issue 14, "What it must show").
NAMING_KINDS: dict[str, tuple[FindingKind, ...]] = {
    "slope": (FindingKind.SLOPE_SHIFT, FindingKind.STRUCTURAL_BREAK),
    "level": (FindingKind.STRUCTURAL_BREAK, FindingKind.COVERAGE),
    "spread": (FindingKind.COVERAGE,),
}

CONFIG = """\
database: state/plumbline.sqlite
timezone: Europe/Berlin
feeds:
  units:
    inbox: feeds/units/inbox
    format: csv
    period: week_ending
    settle: 30s
    cadence: 7d
    columns: [week_ending, unit, x1, x2, y]
models:
  unit_output:
    feed: units
    response: y
    predictors: [x1, x2]
    per: unit
    window: {window}
schedule:
  scan: 30s
  digest: "0 8 * * mon"
notify:
  html_dir: reports
"""


@dataclass(frozen=True)
class PanelSpec:
    """What to simulate; the defaults are the issue's stable panel (200 × 156, window 52)."""

    series: int = 200
    weeks: int = 156
    window: int = 52
    rho: float = 0.0
    planted_share: float = 0.0
    change_week: int = 104
    seed: int = 14

    def label(self) -> str:
        errors = "iid errors" if self.rho == 0 else f"AR(1) errors, rho {self.rho:g}"
        planted = (f", changes in {self.planted_share:.0%} at week {self.change_week}"
                   if self.planted_share else "")
        return f"{self.series} series x {self.weeks} weeks, window {self.window}, {errors}{planted}"


@dataclass
class Panel:
    """The simulated values: arrays of shape (series, weeks + 1) (the last week is plan only)."""

    spec: PanelSpec
    names: list[str]
    x1: np.ndarray
    x2: np.ndarray
    y: np.ndarray
    change: list[str | None]  # per series: None (untouched) or one of CHANGES


def simulate(spec: PanelSpec) -> Panel:
    """The seeded panel of the module docstring."""
    rng = np.random.default_rng(spec.seed)
    s, total = spec.series, spec.weeks + 1
    names = [f"u{i:04d}" for i in range(s)]
    sd1 = rng.uniform(5, 15, s)
    mean1 = sd1 * rng.uniform(1.5, 3.0, s)
    mean2, sd2 = rng.uniform(10, 30, s), rng.uniform(1, 4, s)
    sigma = rng.uniform(2, 6, s)
    a = rng.uniform(10, 50, s)
    b1 = 3.0 * sigma / sd1 * rng.uniform(0.8, 1.2, s)
    b2 = sigma / sd2 * rng.uniform(1.0, 2.0, s) * rng.choice([-1.0, 1.0], s)
    x1 = np.round(mean1[:, None] + sd1[:, None] * rng.standard_normal((s, total)), 2)
    x2 = np.round(mean2[:, None] + sd2[:, None] * rng.standard_normal((s, total)), 2)
    innovations = rng.standard_normal((s, total))
    e = np.empty((s, total))
    e[:, 0] = innovations[:, 0]
    scale = np.sqrt(1.0 - spec.rho**2)
    for t in range(1, total):
        e[:, t] = spec.rho * e[:, t - 1] + scale * innovations[:, t]
    change: list[str | None] = [None] * s
    planted = round(spec.planted_share * s)
    if planted:
        chosen = rng.choice(s, size=planted, replace=False)
        for j, i in enumerate(chosen):
            change[int(i)] = CHANGES[j % len(CHANGES)]
    week = np.arange(1, total + 1)
    after = week >= spec.change_week
    slope = np.repeat(b1[:, None], total, axis=1)
    level = np.zeros((s, total))
    spread = np.repeat(sigma[:, None], total, axis=1)
    for i, kind in enumerate(change):
        if kind == "slope":
            slope[i, after] *= 1.3
        elif kind == "level":
            level[i, after] = 3.0 * sigma[i]
        elif kind == "spread":
            spread[i, after] *= 2.0
    y = np.round(a[:, None] + slope * x1 + b2[:, None] * x2 + level + spread * e, 3)
    return Panel(spec, names, x1, x2, y, change)


def week_ending(week: int) -> date:
    return FIRST_WEEK_ENDING + timedelta(weeks=week - 1)


def delivered(week: int) -> datetime:
    """The business clock of week ``week``'s pass: the Monday after it, 06:00 Berlin time."""
    return datetime.combine(week_ending(week) + timedelta(days=1), time(6, 0), tzinfo=ZONE)


def week_file(panel: Panel, week: int) -> str:
    """Week ``week``'s actuals of every series and week ``week + 1``'s plan rows."""
    lines = ["week_ending,unit,x1,x2,y"]
    j = week - 1
    this, following = week_ending(week).isoformat(), week_ending(week + 1).isoformat()
    for i, name in enumerate(panel.names):
        lines.append(f"{this},{name},{panel.x1[i, j]:.2f},{panel.x2[i, j]:.2f},"
                     f"{panel.y[i, j]:.3f}")
    for i, name in enumerate(panel.names):
        lines.append(f"{following},{name},{panel.x1[i, j + 1]:.2f},{panel.x2[i, j + 1]:.2f},")
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class Raised:
    """One finding raised by a pass of the replay."""

    series: str
    kind: FindingKind
    severity: Severity
    week: int  # the week whose delivery's pass raised it
    p_value: float | None


@dataclass
class PanelResult:
    spec: PanelSpec
    change: dict[str, str | None]
    raised: list[Raised]
    seconds: float = 0.0
    first_kind_week: dict[tuple[str, FindingKind], int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for item in sorted(self.raised, key=lambda r: r.week):
            self.first_kind_week.setdefault((item.series, item.kind), item.week)

    @property
    def untouched(self) -> list[str]:
        return [name for name, change in self.change.items() if change is None]

    def share_with(self, kind: FindingKind, names: Iterable[str] | None = None) -> float:
        """Share of ``names`` (default: the untouched series) that ever got ``kind``."""
        group = list(self.untouched if names is None else names)
        hit = sum((name, kind) in self.first_kind_week for name in group)
        return hit / len(group) if group else float("nan")

    def count_with(self, kind: FindingKind, names: Iterable[str] | None = None) -> int:
        group = self.untouched if names is None else list(names)
        return sum((name, kind) in self.first_kind_week for name in group)

    def share_alarmed(self, names: Iterable[str] | None = None) -> float:
        """Share of ``names`` (default: untouched) that ever got a warning or critical finding."""
        group = list(self.untouched if names is None else names)
        alarmed = {r.series for r in self.raised
                   if r.severity in (Severity.WARNING, Severity.CRITICAL)}
        return sum(name in alarmed for name in group) / len(group) if group else float("nan")

    def detection(self, change: str) -> tuple[int, int, float | None]:
        """(series detected, series with the change, median delay in weeks) for a planted
        change, by the kinds that name it, raised at or after the change week. The delay is the
        week of the delivery whose pass raised it minus the change week (0 = the first week of
        the new regime)."""
        names = [n for n, c in self.change.items() if c == change]
        delays: list[int] = []
        for name in names:
            weeks = [r.week for r in self.raised if r.series == name
                     and r.kind in NAMING_KINDS[change] and r.week >= self.spec.change_week]
            if weeks:
                delays.append(min(weeks) - self.spec.change_week)
        median = statistics.median(delays) if delays else None
        return len(delays), len(names), median

    def coverage_false_share(self) -> tuple[int, int]:
        """(coverage findings raised on untouched series, coverage findings raised) over the
        whole replay: the horizon-wide false discovery proportion of ``coverage``."""
        coverage = [r for r in self.raised if r.kind is FindingKind.COVERAGE]
        false = [r for r in coverage if self.change[r.series] is None]
        return len(false), len(coverage)

    def table(self) -> str:
        """Per kind: untouched series that ever got it, as a count and a share."""
        group = self.untouched
        lines = [f"{self.spec.label()} ({len(group)} untouched series, {self.seconds:.0f} s)",
                 f"  {'kind':<20} {'series':>7} {'share':>7}"]
        for kind in FindingKind:
            if kind.declaration.scope == "feed":
                continue
            count = self.count_with(kind)
            lines.append(f"  {kind.value:<20} {count:>7} {count / len(group):>7.1%}")
        lines.append(f"  {'warning or critical':<20} "
                     f"{round(self.share_alarmed() * len(group)):>7} {self.share_alarmed():>7.1%}")
        if self.spec.planted_share:
            for change in CHANGES:
                found, total, median = self.detection(change)
                kinds = " or ".join(k.value for k in NAMING_KINDS[change])
                delay = "n/a" if median is None else f"{median:g} weeks"
                lines.append(f"  planted {change:<7} found {found}/{total} by {kinds}; "
                             f"median delay {delay}")
            false, total = self.coverage_false_share()
            lines.append(f"  coverage findings on untouched series over the replay: "
                         f"{false} of {total}")
        return "\n".join(lines)


def run_panel(
    spec: PanelSpec,
    root: Path | None = None,
    *,
    progress: Callable[[int], None] | None = None,
) -> PanelResult:
    """Simulate ``spec``, replay it week by week through the real pass, and read the findings."""
    import time as clock

    started = clock.perf_counter()
    panel = simulate(spec)
    # In memory where the machine has it: the replay commits a few thousand transactions.
    shm = Path("/dev/shm")
    scratch_dir = str(shm) if shm.is_dir() and os.access(shm, os.W_OK) else None
    with tempfile.TemporaryDirectory(prefix="plumbline-panel-", dir=scratch_dir) as scratch:
        base = Path(root) if root is not None else Path(scratch)
        base.mkdir(parents=True, exist_ok=True)
        (base / "plumbline.yaml").write_text(CONFIG.format(window=spec.window), encoding="utf-8")
        config = load_config(base / "plumbline.yaml")
        inbox = config.feeds["units"].inbox
        inbox.mkdir(parents=True, exist_ok=True)
        pass_week: dict[int, int] = {}
        with DatabaseLock(config.database), Store.open(config.database) as store:
            for week in range(1, spec.weeks + 1):
                name = f"units-{week_ending(week).isoformat()}.csv"
                (inbox / name).write_text(week_file(panel, week), encoding="utf-8")
                (inbox / f"{name}.ready").touch()
                report = run_pass(config, as_of=delivered(week), store=store)
                if report.pass_id is not None:
                    pass_week[report.pass_id] = week
                if progress is not None:
                    progress(week)
        conn = sqlite3.connect(f"file:{config.database}?mode=ro", uri=True)
        try:
            rows = conn.execute(
                "SELECT series_key, kind, severity, first_pass_id, p_value FROM findings "
                "WHERE model = 'unit_output' ORDER BY id"
            ).fetchall()
        finally:
            conn.close()
    raised = [Raised(str(series), FindingKind(kind), Severity(severity), pass_week[int(first)],
                     None if p is None else float(p))
              for series, kind, severity, first, p in rows]
    result = PanelResult(spec, dict(zip(panel.names, panel.change, strict=True)), raised)
    result.seconds = clock.perf_counter() - started
    return result


def by_kind(result: PanelResult) -> dict[str, int]:
    """Untouched series that ever got each kind (for printing side by side)."""
    counts: dict[str, int] = defaultdict(int)
    for kind in FindingKind:
        counts[kind.value] = result.count_with(kind)
    return dict(counts)


__all__ = [
    "CHANGES",
    "NAMING_KINDS",
    "Panel",
    "PanelResult",
    "PanelSpec",
    "Raised",
    "by_kind",
    "run_panel",
    "simulate",
    "week_ending",
]
