"""Light commands import only what they use (issue: commands that answer at once).

``plumbline --version``, ``status``, ``ack``, ``check`` and ``schema`` run in real subprocesses
with ``python -X importtime``, which lists every module the interpreter imported; none of the
numerical or drawing stack (numpy, scipy, pandas, pyarrow, matplotlib) nor the scheduler
(APScheduler) may be among them. How long they take is measured by
``tests/benchmarks/bench_startup.py`` beside a bare ``python -c pass`` (DEVELOPERS.md), never
here. Also: the command table of ``monitor.cli`` agrees with what each module registers, and
``status`` shows the next scheduled runs only while a ``plumbline run`` daemon holds the
database.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from monitor.cli import COMMAND_MODULES, COMMANDS, main, modules_needed
from monitor.lock import DatabaseLock

REPO = Path(__file__).resolve().parent.parent
HEAVY = ("numpy", "scipy", "pandas", "pyarrow", "matplotlib", "apscheduler")


def test_the_command_table_is_what_the_modules_register() -> None:
    for module_name in COMMAND_MODULES:
        parser = argparse.ArgumentParser()
        subparsers = parser.add_subparsers()
        importlib.import_module(f"monitor.commands.{module_name}").register(subparsers)
        assert {name for name, module in COMMANDS.items() if module == module_name} == set(
            subparsers.choices), module_name


@pytest.mark.parametrize(
    ("argv", "expected"),
    [
        (["--version"], ()),
        (["status", "-c", "x.yaml"], ("status",)),
        (["-c", "x.yaml"], COMMAND_MODULES),
        (["--help"], COMMAND_MODULES),
        (["pass", "--help"], ("one_pass",)),
        (["stauts"], COMMAND_MODULES),
    ],
)
def test_only_the_named_commands_module_is_loaded(argv: list[str], expected: tuple) -> None:
    assert modules_needed(argv) == expected


def _imported(argv: list[str], cwd: Path) -> tuple[set[str], subprocess.CompletedProcess[str]]:
    environment = {**os.environ, "PYTHONPATH": str(REPO)}
    done = subprocess.run(
        [sys.executable, "-X", "importtime", "-m", "monitor", *argv],
        cwd=cwd, env=environment, capture_output=True, text=True, timeout=120, check=False,
    )
    modules = set()
    for line in done.stderr.splitlines():
        if line.startswith("import time:") and "|" in line:
            modules.add(line.rsplit("|", 1)[1].strip())
    assert modules, done.stderr[-2000:]
    return modules, done


@pytest.fixture(scope="module")
def workspace(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A workspace with a database and an open finding: one pass over the README's example and
    a file with one unreadable row."""
    root = tmp_path_factory.mktemp("light")
    (root / "plumbline.yaml").write_text(
        "feeds:\n  warehouse:\n    inbox: feeds/warehouse/inbox\n    period: week_ending\n"
        "    cadence: 7d\nmodels:\n  pick_hours:\n    feed: warehouse\n    response: pick_hours\n"
        "    predictors: [order_lines]\n    window: 26\n    recent: 13\n",
        encoding="utf-8",
    )
    inbox = root / "feeds" / "warehouse" / "inbox"
    inbox.mkdir(parents=True)
    lines = (REPO / "config" / "example_pick_hours.csv").read_text(encoding="utf-8").splitlines()
    (inbox / "history.csv").write_text("\n".join(lines[:31]) + "\n", encoding="utf-8")
    (inbox / "history.csv.ready").touch()
    # A row with a typo in a second file: the pass refuses it and opens finding 1 on the feed
    # (the README's history alone raises nothing).
    (inbox / "typo.csv").write_text(
        lines[0] + "\n2025-07-27,n/a,120,500.0\n", encoding="utf-8")
    (inbox / "typo.csv.ready").touch()
    assert main(["pass", "-c", str(root / "plumbline.yaml"), "--as-of", "2025-07-28T07:00"]) == 0
    return root


@pytest.mark.parametrize(
    "argv",
    [["--version"], ["status"], ["status", "--format", "json"], ["ack", "#1"], ["check"],
     ["schema"]],
    ids=lambda argv: " ".join(argv),
)
def test_light_commands_do_not_import_the_numerical_stack(argv: list[str], workspace: Path) -> None:
    modules, done = _imported(argv, workspace)
    assert done.returncode == 0, done.stderr[-2000:]
    heavy = sorted(m for m in modules if m.split(".")[0] in HEAVY)
    assert heavy == [], f"plumbline {' '.join(argv)} imported {heavy[:8]}"
    assert "monitor.config" in modules or argv == ["--version"]


def test_a_heavy_command_still_imports_what_it_needs(workspace: Path) -> None:
    """The guard above can fail: ``audit`` does import numpy (its statistics)."""
    modules, done = _imported(["audit"], workspace)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "numpy" in modules


# What a pass does not need: scipy.stats and the rest of scipy beyond scipy.special (about a
# second of imports; the exact Durbin–Watson distribution and the reference values import them
# when called), pandas (pyarrow imports it on any conversion of a Python value or to numpy;
# about 0.3 s) and matplotlib (only for an e-mail's PNG charts).
PASS_NEEDS_NOT = ("scipy.stats", "scipy.integrate", "scipy.optimize", "scipy.linalg", "pandas",
                  "matplotlib")


def test_a_weekly_pass_imports_no_more_than_it_uses(workspace: Path, tmp_path: Path) -> None:
    """A pass that ingests, scores, refits, forecasts and writes pages, in a subprocess with
    ``-X importtime`` (its time is measured by ``tests/benchmarks/bench_pass.py``)."""
    root = tmp_path / "copy"
    shutil.copytree(workspace, root, ignore=shutil.ignore_patterns("*.lock"))
    config = root / "plumbline.yaml"
    with config.open("a", encoding="utf-8") as out:
        out.write("notify:\n  html_dir: reports\n")
    inbox = root / "feeds" / "warehouse" / "inbox"
    header = "week_ending,order_lines,pallets,pick_hours\n"
    (inbox / "w1.csv").write_text(header + "2025-08-03,3900,118,515.2\n2025-08-10,6165,177,\n",
                                  encoding="utf-8")
    (inbox / "w1.csv.ready").touch()
    assert main(["pass", "-c", str(config), "--as-of", "2025-08-04T07:00"]) == 0
    (inbox / "w2.csv").write_text(header + "2025-08-10,6165,177,741.9\n2025-08-17,6037,150,\n",
                                  encoding="utf-8")
    (inbox / "w2.csv.ready").touch()
    modules, done = _imported(["pass", "-c", str(config), "--as-of", "2025-08-11T07:00"], root)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "1 actual(s) scored" in done.stdout and "1 forecast(s) issued" in done.stdout, \
        done.stdout
    assert (root / "reports" / "model-pick_hours.html").is_file()
    assert {"numpy", "scipy.special._ufuncs", "pyarrow", "monitor.passes"} <= modules  # it bites
    needless = sorted(m for m in modules if any(
        m == name or m.startswith(name + ".") for name in PASS_NEEDS_NOT))
    assert needless == [], f"plumbline pass imported {needless[:8]}"


def test_status_shows_next_runs_only_while_a_daemon_holds_the_database(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = str(workspace / "plumbline.yaml")
    capsys.readouterr()
    assert main(["status", "-c", config]) == 0
    out = capsys.readouterr().out
    assert "Next scan" not in out and "No daemon is running" in out
    assert main(["status", "-c", config, "--format", "json"]) == 0
    runs = json.loads(capsys.readouterr().out)["next_runs"]
    assert runs == {"daemon_pid": None, "scan": None, "digest": None}
    # A daemon is a process holding the lock with the role it writes; this test process plays it.
    with DatabaseLock(workspace / "state" / "plumbline.sqlite", role="daemon"):
        assert main(["status", "-c", config]) == 0
        out = capsys.readouterr().out
        assert f"Daemon running (process {os.getpid()}): next scan " in out
        assert main(["status", "-c", config, "--format", "json"]) == 0
        runs = json.loads(capsys.readouterr().out)["next_runs"]
    assert runs["daemon_pid"] == os.getpid()
    for key in ("scan", "digest"):
        assert "." not in runs[key] and runs[key].endswith("+00:00")  # UTC config, no µs
    assert main(["status", "-c", config]) == 0
    assert "No daemon is running" in capsys.readouterr().out


def test_status_times_are_in_the_config_zone_to_the_second(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    capsys.readouterr()
    assert main(["status", "-c", str(workspace / "plumbline.yaml"), "--format", "json"]) == 0
    (latest,) = json.loads(capsys.readouterr().out)["passes"]
    for key in ("as_of", "started_at", "finished_at"):
        assert "." not in latest[key] and latest[key].endswith("+00:00"), latest[key]


def test_finding_ids_are_accepted_with_their_hash(
    workspace: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = str(workspace / "plumbline.yaml")
    capsys.readouterr()
    assert main(["ack", "-c", config, "#1"]) == 0
    assert "Finding 1 " in capsys.readouterr().out
    assert main(["ack", "-c", config, "#one"]) == 2
    assert "not a finding id" in capsys.readouterr().err


def test_checks_local_compute_line_is_the_engines_own() -> None:
    from monitor.commands.check import LOCAL_COMPUTE
    from monitor.compute import LocalCompute

    assert LocalCompute.describe(object.__new__(LocalCompute)) == LOCAL_COMPUTE
