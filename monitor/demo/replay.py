"""Replaying the demo scenario week by week, as the files would land.

For each week, every feed's file is copied into its inbox under a temporary name and renamed
into place with a ``NAME.ready`` marker beside it (a complete file, DESIGN.md section 6), then
one pass runs with the business clock at the moment the week's files land. The digest is
rendered once at the end by the caller. The workspace is the replay's own and is made again
rather than recovered, so it is written without fsyncs (``monitor.store.without_fsync``).
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from monitor.config import PlumblineConfig, load_config
from monitor.demo.workspace import CONFIG_NAME, ScenarioWeek, inbox_paths, weeks, write_scenario
from monitor.lock import DatabaseLock
from monitor.passes import PassNotifier, PassReport, run_pass
from monitor.store import Store, without_fsync


@dataclass(frozen=True)
class ReplayResult:
    root: Path
    config: PlumblineConfig
    passes: tuple[PassReport, ...]


def drop_week(week: ScenarioWeek, inboxes: dict[str, Path]) -> list[Path]:
    """Put one week's files into their inboxes: temporary name, rename, ``.ready`` marker."""
    placed: list[Path] = []
    for feed, source in week.files.items():
        inbox = inboxes[feed]
        inbox.mkdir(parents=True, exist_ok=True)
        final = inbox / source.name
        temporary = inbox / f"{source.name}.part"
        shutil.copyfile(source, temporary)
        os.replace(temporary, final)
        (inbox / f"{source.name}.ready").touch()
        placed.append(final)
    return placed


def replay_scenario(
    root: str | Path,
    *,
    progress: Callable[[ScenarioWeek, PassReport], None] | None = None,
    notifier: PassNotifier | None = None,
    last_week: int | None = None,
) -> ReplayResult:
    """Write the scenario into ``root`` and replay its weeks in order in this process."""
    base = Path(root)
    write_scenario(base)
    config = load_config(base / CONFIG_NAME)
    inboxes = inbox_paths(base)
    reports: list[PassReport] = []
    with without_fsync(), DatabaseLock(config.database), Store.open(config.database) as store:
        for week in weeks(base):
            if last_week is not None and week.number > last_week:
                break
            drop_week(week, inboxes)
            report = run_pass(config, as_of=week.delivered_at, store=store, notifier=notifier)
            reports.append(report)
            if progress is not None:
                progress(week, report)
    return ReplayResult(base, config, tuple(reports))


__all__ = ["ReplayResult", "drop_week", "replay_scenario"]
