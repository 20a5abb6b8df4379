"""``plumbline demo [--dir DIR]``: build a workspace from the demo scenario and replay it.

Writes the invented scenario (DESIGN.md section 10) into DIR (a new temporary folder by
default), replays its weeks in order in this process — drop the week's files, run a pass with
the business clock at that week — renders the digest once at the end, and prints its path and
the findings at a glance.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from monitor.config import PlumblineConfig
from monitor.demo import WEEK_COUNT, ScenarioWeek
from monitor.demo.replay import replay_scenario
from monitor.errors import UsageError
from monitor.notify.digest import write_digest
from monitor.notify.html import pass_page_name
from monitor.notify.report import render_pass_report
from monitor.notify.series import ModelHistories
from monitor.notify.words import SEVERITY_MARKS, finding_headline
from monitor.passes import PassReport
from monitor.store import FindingRecord, Store, without_fsync
from monitor.vocabulary import FindingState


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "demo", help="build the demo workspace and replay it",
        description="Write the invented demo scenario into a workspace, replay its weeks in "
        "order, render the digest and show the findings.",
    )
    parser.add_argument("--dir", type=Path, help="the workspace (default: a new temporary "
                        "folder); must be empty or not exist")
    parser.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    if args.dir is None:
        root = Path(tempfile.mkdtemp(prefix="plumbline-demo-"))
    else:
        root = args.dir.resolve()
        if root.exists() and any(root.iterdir()):
            raise UsageError(f"{root} is not empty; give a new or empty folder for the demo")
    started = time.perf_counter()
    tty = sys.stdout.isatty()

    raised = 0

    def progress(week: ScenarioWeek, report: PassReport) -> None:
        nonlocal raised
        raised += len(report.findings_raised)
        line = (f"replaying week {week.number:3d} of {WEEK_COUNT} ({week.week_ending}): "
                f"{raised} finding(s) raised so far")
        if tty:
            # Our own carriage return, past the escaping of control characters (cli.py).
            raw = getattr(sys.stdout, "unescaped", sys.stdout)
            print("\r" + line.ljust(78), end="", flush=True, file=raw)
        elif week.number % 25 == 0 or week.number == WEEK_COUNT:
            print(line, flush=True)

    # Pages and mail are left out of the weekly passes (the demo's addresses are invented);
    # the digest and the model pages are written once, at the end.
    result = replay_scenario(root, progress=progress)
    if tty:
        print()
    with without_fsync(), Store.open(result.config.database) as store:
        # The database stands still while the pages are written, so each model is read once
        # for all of them (ModelHistories), not once per page.
        histories = ModelHistories(store, result.config)
        pass_pages = render_pass_pages(result.config, store=store, histories=histories)
        # ... and the index, which links the pass pages
        digest_path = render_digest(result.config, store=store, histories=histories)
    elapsed = time.perf_counter() - started
    with Store.open(result.config.database, readonly=True) as store:
        findings = store.list_findings(state="all")
    print(f"Replayed {len(result.passes)} weeks in {elapsed:.1f} s into {root}.")
    print(f"Digest: {digest_path}")
    print(f"Pass pages: {len(pass_pages)} (the passes that raised or cleared findings, latest "
          f"{DEMO_PASS_PAGES}), linked from {digest_path.parent / 'index.html'}")
    for line in findings_summary(findings):
        print(line)
    print(f"Look closer: plumbline status -c {root / 'plumbline.yaml'}")
    return 0


# The replay writes no pages while it runs (it would redraw every model's charts 125 times);
# afterwards the pages of the latest passes that raised or cleared findings are written.
DEMO_PASS_PAGES = 12


def render_pass_pages(
    config: PlumblineConfig, *, store: Store | None = None,
    histories: ModelHistories | None = None,
) -> list[Path]:
    """The pages of the latest passes that raised or cleared findings (at most
    ``DEMO_PASS_PAGES``), and of the latest pass."""
    with _opened(config, store) as store:
        passes = store.list_passes(limit=1000)
        if not passes:
            return []
        eventful = [p.id for p in passes
                    if p.counts.get("findings_raised") or p.counts.get("findings_cleared")]
        chosen = sorted({passes[0].id, *eventful[:DEMO_PASS_PAGES - 1]})
        paths = []
        for pass_id in chosen:
            # Pages only: the demo sends nothing, so no e-mail (and no PNG) is built.
            render_pass_report(store, config, pass_id, write_models=False, messages=False,
                               histories=histories)
            paths.append(Path(config.notify.html_dir) / pass_page_name(pass_id))
        return paths


def findings_summary(findings: list[FindingRecord]) -> list[str]:
    """The demo's closing list: how many are open and no longer seen, then each open finding,
    most severe first, led by what and where."""
    open_findings = [f for f in findings if f.state is not FindingState.CLEARED]
    lines = [f"{len(open_findings)} finding(s) open, {len(findings) - len(open_findings)} no "
             "longer seen:"]
    rank = {"critical": 0, "warning": 1, "notice": 2}
    for f in sorted(open_findings, key=lambda f: (rank[f.severity.value], f.kind.value)):
        lines.append(f"  {SEVERITY_MARKS[f.severity]} {f.severity.value:<8} {finding_headline(f)}")
    return lines


def render_digest(
    config: PlumblineConfig, *, store: Store | None = None,
    histories: ModelHistories | None = None,
) -> Path:
    """Write the digest of the replayed database (its period ends at the latest pass)."""
    with _opened(config, store) as store:
        return Path(write_digest(store, config, histories=histories))


@contextmanager
def _opened(config: PlumblineConfig, store: Store | None) -> Iterator[Store]:
    """The store given, or the config's database opened for the duration."""
    if store is not None:
        yield store
        return
    with Store.open(config.database) as opened:
        yield opened
