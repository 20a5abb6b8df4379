"""The demo scenario's README, written from the same definitions as its data."""

from __future__ import annotations

import textwrap

from monitor.demo.scenario import (
    DELIVERY_TIME,
    DEPOT_COUNT,
    FEEDS,
    FIRST_WEEK_ENDING,
    MODELS,
    RECENT,
    TIMEZONE,
    WEEK_COUNT,
    WINDOW,
    FeedSpec,
    PlantedChange,
    Scenario,
    week_ending,
)
from monitor.demo.series import SEED
from monitor.vocabulary import FindingKind

_WHAT_TO_FIND = {
    FindingKind.STRUCTURAL_BREAK: (
        "a `structural_break` (sequential monitoring crosses its boundary) or a `slope_shift` "
        "(the recent window's slope differs from the baseline's)"
    ),
    FindingKind.COVERAGE: "a `coverage` finding (the hit rate is below the nominal level)",
    FindingKind.EXTRAPOLATION: (
        "an `extrapolation` finding on the forecast issued for that plan row (outside the "
        "fitted range of the predictor)"
    ),
    FindingKind.STALE_FEED: "a `stale_feed` finding on the feed (no new rows for 1.5 cadences)",
}


def _wrap(text: str, bullet: bool = False) -> str:
    """A paragraph (or a ``- `` list item) wrapped at 100 columns."""
    return textwrap.fill(
        text,
        width=100,
        subsequent_indent="  " if bullet else "",
        break_long_words=False,
        break_on_hyphens=False,
    )


def _pass_of(number: int) -> str:
    return f"the pass of week {number} (files of the week ending {week_ending(number).isoformat()})"


def _models_of(feed: FeedSpec) -> str:
    return ", ".join(f"`{model.name}`" for model in MODELS if model.feed == feed.name)


def _feed_rows() -> list[str]:
    rows = ["| feed | folder | columns | files | models |", "|---|---|---|---|---|"]
    for spec in FEEDS:
        columns = ", ".join(f"`{name}`" for name in spec.column_names)
        files = (
            f"{spec.last_week} (weeks 1-{spec.last_week})"
            if spec.last_week < WEEK_COUNT
            else f"{spec.last_week}"
        )
        rows.append(
            f"| `{spec.name}` | `feeds/{spec.folder}/` | {columns} | {files} | {_models_of(spec)} |"
        )
    return rows


def _model_rows() -> list[str]:
    rows = [
        "| model | response ~ predictors | per | level | owner | true relation (invented) |",
        "|---|---|---|---|---|---|",
    ]
    for model in MODELS:
        formula = f"`{model.response}` ~ " + " + ".join(f"`{p}`" for p in model.predictors)
        per = f"`{model.per}`" if model.per else "-"
        rows.append(
            f"| `{model.name}` | {formula} | {per} | {model.level:.2f} | {model.owner} | "
            f"{model.truth} |"
        )
    return rows


def _weeks_text(count: int) -> str:
    return "1 week" if count == 1 else f"{count} weeks"


def _planted_section(change: PlantedChange) -> list[str]:
    target = f"`{change.model}`" + (f", series `{change.series}`" if change.series else "")
    if change.kind is FindingKind.STALE_FEED:
        target = f"feed `{change.feed}` (model {target})"
    lines = [
        f"### Week {change.week_number} ({change.week.isoformat()}): {change.kind.value} on "
        f"{target}",
        "",
        _wrap(change.description),
        "",
        _wrap(
            f"- **What Plumbline should find:** {_WHAT_TO_FIND[change.kind]}, raised by "
            f"{_pass_of(change.first_evidence_week_number)} at the earliest and by "
            f"{_pass_of(change.detect_by_week_number)} at the latest "
            f"({_weeks_text(change.detect_within_weeks)} later).",
            bullet=True,
        ),
    ]
    if change.period_tolerance_weeks is not None:
        lines.append(
            _wrap(
                f"- **Period stated by the finding:** within "
                f"{_weeks_text(change.period_tolerance_weeks)} of {change.week.isoformat()}.",
                bullet=True,
            )
        )
    size = ", ".join(f"{key} {value:g}" for key, value in change.size.items())
    lines += [_wrap(f"- **Size, as planted:** {size}.", bullet=True), ""]
    return lines


def readme_text(scenario: Scenario) -> str:
    """The README of ``demo_feed/`` and of every workspace ``plumbline demo`` writes."""
    first, last = FIRST_WEEK_ENDING.isoformat(), week_ending(WEEK_COUNT).isoformat()
    strict = [h for h in scenario.healthy if h.strict]
    stable_depots = [h for h in scenario.healthy if not h.strict]
    quiet = next(spec for spec in FEEDS if spec.last_week < WEEK_COUNT)
    out = [
        "# The Plumbline demo scenario",
        "",
        _wrap(
            "**Everything in this folder is invented** for Plumbline's demo: the network, its "
            "sites and depots, every number, every e-mail address (all at `example.org`) and "
            "every planted change. It describes no real firm and no real data."
        ),
        "",
        _wrap(
            "The setting: a regional distribution network with one central warehouse, a "
            f"delivery fleet, {DEPOT_COUNT} delivery depots (`depot-01` … "
            f"`depot-{DEPOT_COUNT:02d}`) and a contract packer. Its planners publish weekly "
            "regression forecasts with 95 % intervals (90 % for the building's energy use) and "
            "want to know when a forecast stops deserving trust. The scenario runs for "
            f"{WEEK_COUNT} weeks, from the week ending {first} to the week ending {last}; weeks "
            "end on Sundays and `week_ending` holds that Sunday's date (ISO 8601)."
        ),
        "",
        "## How the files are made",
        "",
        _wrap(
            f"The seeded generator in `monitor/demo/` (numpy's default generator, seed {SEED}) "
            "writes every file here, this README included. `python tests/tools/make_demo_feed.py` "
            "rewrites the folder; `tests/test_demo_scenario.py` checks that the generator "
            "reproduces it byte for byte, with no file missing or extra. `plumbline demo` "
            "writes the same files into a workspace and replays them week by week."
        ),
        "",
        "| path | what it is |",
        "|---|---|",
        "| `plumbline.yaml` | the config: five feeds, seven models, schedule, notify |",
        "| `planted.json` | the planted changes and the healthy series (the demo test's oracle) |",
        "| `README.md` | this description |",
        "| `feeds/<feed>/drops/week_<date>.csv` | each feed's weekly files, as they land |",
        "",
        _wrap(
            "The config's inboxes are `feeds/<feed>/inbox` (archive and rejected folders are "
            "made beside them); the database is `state/plumbline.sqlite` and the reports go to "
            f"`reports/`, all relative to `plumbline.yaml`. Times are shown in {TIMEZONE}."
        ),
        "",
        "## How a week lands",
        "",
        _wrap(
            "After each week every feed delivers one CSV file (`week_<week_ending>.csv`) with "
            "that week's actuals and the next week's *plan rows*: the predictors the planners "
            "expect, with the response left empty, which ask Plumbline for a forecast. The files "
            f"land on the Monday after the week at {DELIVERY_TIME.isoformat('minutes')} local "
            "time. *The pass of week N* below is the pass run when week N's files land, with "
            "the business clock at that moment. In this scenario the planned predictors turn out "
            "exactly as planned (each actual row repeats its plan row's predictors), so every "
            "miss of an interval comes from the model, not from a wrong plan."
        ),
        "",
        "## Feeds",
        "",
        *_feed_rows(),
        "",
        "## Models",
        "",
        _wrap(
            f"Every model uses a rolling window of {WINDOW} weeks and a recent window of "
            f"{RECENT} weeks, so its baseline is its first full window, weeks 1-{WINDOW} (to "
            f"{week_ending(WINDOW).isoformat()}), and sequential monitoring runs from week "
            f"{WINDOW + 1} over the default horizon of {2 * WINDOW} weeks, past the end of the "
            "scenario. Errors are independent and normal with the standard deviation given."
        ),
        "",
        *_model_rows(),
        "",
        "## Planted changes",
        "",
        _wrap(
            f"Week numbers count from week 1 (ending {first}). The planted week is the first "
            "week of the new regime; for a quiet feed, the first week with no file."
        ),
        "",
    ]
    for change in scenario.planted:
        out += _planted_section(change)
    out += [
        "## Healthy series",
        "",
        f"Nothing is planted in these; their true relation holds for all {WEEK_COUNT} weeks:",
        "",
        *[f"- `{h.model}`" for h in strict],
        f"- the other {len(stable_depots)} depots of `delivery_hours`",
        "",
        _wrap(
            f"The {len(strict)} single models should raise no `slope_shift`, `structural_break` "
            "or `coverage` finding. `returns_hours` is one of them: its plan rows leave the "
            "fitted range, but its relationship does not change. `copack_hours` has no new data "
            f"after week {quiet.last_week}, so after that it can raise nothing about its "
            "relationship."
        ),
        "",
        "## What to keep in mind",
        "",
        _wrap(
            "- A finding is a statistical signal, not proof of a cause; the intervals assume the "
            "model's conditions hold (a linear relation, independent errors of constant "
            "variance).",
            bullet=True,
        ),
        _wrap(
            "- Each test keeps its nominal false-alarm rate on a stable series. Among the "
            f"{len(stable_depots)} stable depots a 5 % test is expected to flag one or two by "
            "chance; Benjamini–Hochberg limits the share of false findings, not their number. A "
            "test re-run every week on overlapping windows has more chances to raise a false "
            "alarm than its level suggests; sequential monitoring is built to avoid that.",
            bullet=True,
        ),
        _wrap(
            "- The data are generated, so they are cleaner than real ones: no missing weeks, no "
            "revisions, no bad rows.",
            bullet=True,
        ),
        "",
    ]
    return "\n".join(out)
