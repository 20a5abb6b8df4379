"""The demo scenario (DESIGN.md section 10): an invented regional distribution network.

A seeded generator writes weekly files for five feeds and seven models over 125 weeks, with
changes planted at known weeks, plus the config that declares them and a manifest of what was
planted. Everything in it is made up; no real firm's name or data.

Public API::

    write_scenario(root, make_inboxes=True) -> ScenarioManifest
        write plumbline.yaml, planted.json, README.md and feeds/<feed>/drops/week_<date>.csv
    weeks(root) -> list[ScenarioWeek]
        the replay order: each week's number, week_ending, delivered_at (the business clock of
        its pass, aware, Europe/Berlin) and {feed: path of the week's file}
    inbox_paths(root) -> {feed: inbox folder}
    scenario_files() -> {relative POSIX path: bytes}     every file, without writing
    planted_changes() -> tuple[PlantedChange, ...]       the oracle, in order of week
    healthy_series() -> tuple[HealthySeries, ...]        the series with nothing planted
"""

from monitor.demo.scenario import (
    FEEDS,
    MODELS,
    TIMEZONE,
    WEEK_COUNT,
    FeedSpec,
    HealthySeries,
    ModelSpec,
    PlantedChange,
    delivered_at,
    week_ending,
)
from monitor.demo.workspace import (
    CONFIG_NAME,
    MANIFEST_NAME,
    README_NAME,
    ScenarioManifest,
    ScenarioWeek,
    healthy_series,
    inbox_paths,
    planted_changes,
    scenario_files,
    weeks,
    write_scenario,
)

__all__ = [
    "CONFIG_NAME",
    "FEEDS",
    "MANIFEST_NAME",
    "MODELS",
    "README_NAME",
    "TIMEZONE",
    "WEEK_COUNT",
    "FeedSpec",
    "HealthySeries",
    "ModelSpec",
    "PlantedChange",
    "ScenarioManifest",
    "ScenarioWeek",
    "delivered_at",
    "healthy_series",
    "inbox_paths",
    "planted_changes",
    "scenario_files",
    "week_ending",
    "weeks",
    "write_scenario",
]
