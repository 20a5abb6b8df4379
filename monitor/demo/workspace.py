"""Writing the demo scenario to a folder, and the order in which its weekly files land.

Layout under the output folder (paths in the config are relative to it)::

    plumbline.yaml                      the config: feeds, models, schedule, notify
    planted.json                        the planted changes and the healthy series (the oracle)
    README.md                           the scenario in words
    feeds/<feed>/drops/week_<date>.csv  each feed's weekly files, as they will land

The inboxes (``feeds/<feed>/inbox``) are made empty by ``write_scenario`` unless asked not to; a
replay moves one week's files from ``drops`` into the inboxes and runs a pass with the business
clock at ``ScenarioWeek.delivered_at``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime
from functools import lru_cache
from pathlib import Path, PurePosixPath

from monitor.demo.readme import readme_text
from monitor.demo.render import config_text, drop_file_name, feed_file_text, manifest_text
from monitor.demo.scenario import (
    FEEDS,
    WEEK_COUNT,
    HealthySeries,
    PlantedChange,
    Scenario,
    build_scenario,
    delivered_at,
    week_ending,
)

CONFIG_NAME = "plumbline.yaml"
MANIFEST_NAME = "planted.json"
README_NAME = "README.md"


@dataclass(frozen=True)
class ScenarioWeek:
    """One week of the replay: the files that land after it, by feed, and when they land."""

    number: int
    week_ending: date
    delivered_at: datetime  # aware, Europe/Berlin: the business clock of that week's pass
    # feed name -> the week's file under drops/ (a quiet feed has no entry)
    files: dict[str, Path] = field(hash=False)


@dataclass(frozen=True)
class ScenarioManifest:
    """What ``write_scenario`` wrote, with the replay order and the oracle."""

    root: Path
    config_path: Path
    manifest_path: Path
    readme_path: Path
    inboxes: dict[str, Path] = field(hash=False)
    weeks: tuple[ScenarioWeek, ...]
    planted: tuple[PlantedChange, ...]
    healthy: tuple[HealthySeries, ...]
    files: tuple[Path, ...]  # every file written, sorted


def _drop_path(feed_folder: str, number: int) -> PurePosixPath:
    return PurePosixPath("feeds", feed_folder, "drops", drop_file_name(number))


@lru_cache(maxsize=1)
def scenario() -> Scenario:
    """The generated scenario (built once per process)."""
    return build_scenario()


def planted_changes() -> tuple[PlantedChange, ...]:
    """The planted changes, in order of week."""
    return scenario().planted


def healthy_series() -> tuple[HealthySeries, ...]:
    """The series with nothing planted."""
    return scenario().healthy


def scenario_files() -> dict[str, bytes]:
    """Every file of the scenario: relative POSIX path -> bytes, in a fixed order."""
    generated = scenario()
    files: dict[str, str] = {
        CONFIG_NAME: config_text(),
        MANIFEST_NAME: manifest_text(generated),
        README_NAME: readme_text(generated),
    }
    for spec in FEEDS:
        tables = generated.tables[spec.name]
        for number in range(1, spec.last_week + 1):
            files[str(_drop_path(spec.folder, number))] = feed_file_text(spec, tables, number)
    return {path: text.encode("utf-8") for path, text in files.items()}


def weeks(root: str | Path) -> list[ScenarioWeek]:
    """The replay order under ``root``: weeks 1 … 125, each with the files that land after it."""
    base = Path(root)
    result: list[ScenarioWeek] = []
    for number in range(1, WEEK_COUNT + 1):
        files = {
            spec.name: base.joinpath(*_drop_path(spec.folder, number).parts)
            for spec in FEEDS
            if number <= spec.last_week
        }
        result.append(ScenarioWeek(number, week_ending(number), delivered_at(number), files))
    return result


def inbox_paths(root: str | Path) -> dict[str, Path]:
    """Each feed's inbox under ``root``, as the config declares it."""
    base = Path(root)
    return {spec.name: base / "feeds" / spec.folder / "inbox" for spec in FEEDS}


def write_scenario(root: str | Path, *, make_inboxes: bool = True) -> ScenarioManifest:
    """Write the scenario into ``root`` (created if needed; existing files are overwritten).

    Returns the paths written, the replay order and the oracle. ``make_inboxes`` also creates
    the empty inbox folders the config names (``demo_feed/`` in the repository has none).
    """
    base = Path(root)
    written: list[Path] = []
    for relative, content in scenario_files().items():
        path = base.joinpath(*PurePosixPath(relative).parts)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(content)
        written.append(path)
    inboxes = inbox_paths(base)
    if make_inboxes:
        for inbox in inboxes.values():
            inbox.mkdir(parents=True, exist_ok=True)
    generated = scenario()
    return ScenarioManifest(
        root=base,
        config_path=base / CONFIG_NAME,
        manifest_path=base / MANIFEST_NAME,
        readme_path=base / README_NAME,
        inboxes=inboxes,
        weeks=tuple(weeks(base)),
        planted=generated.planted,
        healthy=generated.healthy,
        files=tuple(sorted(written)),
    )
