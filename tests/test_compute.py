"""The analysis step on a Dask cluster (``compute: {engine: dask}``, ``monitor.compute``).

Everything here runs on a real ``distributed.LocalCluster``: two worker processes with one thread
each, bound to 127.0.0.1, started once for the module. No part of Dask is replaced.

- Split and join: ``analyse_batch`` on a whole model equals the join of its batches, bit for bit,
  field by field, on seeded simulated panels (invented data; the property, not a figure).
- Equal results: the demo scenario (a part of its replay: every week up to a copy point run
  locally, then the following weeks both locally and on the cluster) and a ``per:`` panel of 40
  series (seeded, invented) give the same database rows on ``local`` and ``dask``, bit for bit
  (the stored floats are compared as stored).
- A worker process killed with SIGKILL while it runs a batch: the scheduler runs the batch again
  and the pass records the same rows as the local path.
- Workers that die more often than the scheduler allows: the pass stops early, records nothing
  of the model, keeps its mark, exits 2, and the next pass at the same clock redoes the work.
- A scheduler process that dies mid-pass: the pass stops early with exit 2, records nothing of
  the model, keeps its mark, and the next pass redoes the work.
- An unreachable scheduler: exit 2 with a clear message, and no pass, file move or row recorded.
- ``compute: {engine: dask, workers: 2}`` through ``plumbline pass`` in a child process, which
  starts and stops its own local cluster.
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import distributed
import numpy as np
import pytest
from _workspace import Workspace, config_yaml, csv_bytes, delivered, feed_yaml, week_ending
from distributed.diagnostics.plugin import SchedulerPlugin

from monitor import analysis
from monitor.analysis import BatchInput, analyse_batch
from monitor.cli import main
from monitor.compute import join_outputs, split_batch
from monitor.config import load_config
from monitor.demo import CONFIG_NAME, inbox_paths, weeks
from monitor.demo.replay import drop_week, replay_scenario
from monitor.lock import DatabaseLock
from monitor.passes import run_pass
from monitor.store import Store

REPO_ROOT = Path(__file__).resolve().parent.parent
PASS_NUMBER = re.compile(r"pass[: ]\d+")
# An export file's path, less the workspace folder it lies in (which differs between runs).
EXPORT_PATH = re.compile(r'"[^"]*[/\\](exports[/\\][^"]+)"')

# --------------------------------------------------------------------------- split and join


def _simulated_batch(seed: int, series: int = 40, rows: int = 150) -> BatchInput:
    """A seeded panel of invented series: ragged lengths, a few missing actuals, baselines on
    most series, plan rows on some."""
    rng = np.random.default_rng(seed)
    k, plans = 2, 3
    x = rng.normal(10.0, 3.0, (series, rows, k))
    slopes = rng.normal(1.0, 0.3, (series, k))
    y = 5.0 + np.einsum("snk,sk->sn", x, slopes) + rng.normal(0.0, 2.0, (series, rows))
    counts = rng.integers(5, rows + 1, series)
    mask = np.arange(rows)[None, :] < counts[:, None]
    y[~mask] = 0.0
    y[rng.random((series, rows)) < 0.01] = np.nan
    start = np.where(rng.random(series) < 0.8, 0, -1).astype(np.int64)
    end = np.where(start >= 0, np.minimum(52, counts), -1).astype(np.int64)
    return BatchInput(
        predictors=("a", "b"), intercept=bool(seed % 3), level=0.95, significance=0.05,
        x=x, y=y, mask=mask, window=104 if seed % 2 else None, baseline_start=start,
        baseline_end=end, horizon=np.full(series, 104, dtype=np.int64), recent=26,
        plan_x=rng.normal(10.0, 5.0, (series, plans, k)),
        plan_mask=rng.random((series, plans)) < 0.7,
    )


def _bit_differences(a: Any, b: Any, path: str = "output") -> list[str]:
    """Fields where two outputs differ in any bit (NaN payloads and signed zeros included)."""
    if dataclasses.is_dataclass(a) and not isinstance(a, type):
        return [d for f in dataclasses.fields(a)
                for d in _bit_differences(getattr(a, f.name), getattr(b, f.name),
                                          f"{path}.{f.name}")]
    if isinstance(a, np.ndarray):
        same = (isinstance(b, np.ndarray) and a.shape == b.shape and a.dtype == b.dtype
                and a.tobytes() == b.tobytes())
        return [] if same else [path]
    return [] if a == b else [path]


@pytest.mark.parametrize("seed", range(4))
def test_batches_joined_equal_the_whole_model_bit_for_bit(seed: int) -> None:
    batch = _simulated_batch(seed)
    whole = analyse_batch(batch)
    assert whole.fit.estimable.sum() > 20  # most simulated series are fitted
    for size in (1, 3, 7, 39, 40):
        parts = split_batch(batch, size)
        assert [p.y.shape[0] for p in parts][:1] == [min(size, 40)]
        assert sum(p.y.shape[0] for p in parts) == 40
        joined = join_outputs([analyse_batch(part) for part in parts])
        assert _bit_differences(whole, joined) == [], f"batch size {size}"


@pytest.mark.parametrize("seed", range(4))
def test_fits_made_together_equal_fits_made_one_by_one_bit_for_bit(
    seed: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A small batch's window, baseline and recent-block fits (and after an alarm the fits on
    # either side of the break) are made in one stacked fit_batch call; above
    # STACKED_SERIES they are made one call each. Both must give the same bits.
    batch = _simulated_batch(seed)
    together = analyse_batch(batch)
    monkeypatch.setattr(analysis, "STACKED_SERIES", 0)
    apart = analyse_batch(batch)
    assert _bit_differences(together, apart) == []
    if seed == 0:
        assert together.monitoring.crossed.any()  # the fits after a break were stacked too


def test_join_refuses_a_field_it_does_not_know() -> None:
    # A new output field must say how batches join it rather than be joined by guesswork.
    @dataclasses.dataclass(frozen=True)
    class Odd:
        scale: float

    with pytest.raises(TypeError, match="scale"):
        join_outputs([Odd(1.0), Odd(1.0)])  # type: ignore[list-item]


# --------------------------------------------------------------------------- the cluster


@pytest.fixture(scope="module")
def cluster() -> Iterator[distributed.LocalCluster]:
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
        scheduler_port=0, dashboard_address=None,
    ) as local:
        yield local


@pytest.fixture(scope="module")
def client(cluster: distributed.LocalCluster) -> Iterator[distributed.Client]:
    with distributed.Client(cluster, set_as_default=False) as connected:
        yield connected


def _compute_yaml(address: str, batch_size: int) -> str:
    return (f"compute:\n  engine: dask\n  scheduler: {address}\n  batch_size: {batch_size}\n"
            "  connect_timeout: 30s\n")


def _closed_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _rows(database: Path, sql: str) -> list[tuple[Any, ...]]:
    conn = sqlite3.connect(f"file:{database}?mode=ro", uri=True)
    try:
        return conn.execute(sql).fetchall()
    finally:
        conn.close()


# Every table a pass writes, as stored, less the real-clock columns (start and finish times,
# stage timings, file arrival and move times), which differ between any two runs.
RESULT_QUERIES = {
    "fits": "SELECT * FROM fits ORDER BY id",
    "forecasts": "SELECT * FROM forecasts ORDER BY id",
    "outcomes": "SELECT * FROM outcomes ORDER BY id",
    "baselines": "SELECT * FROM baselines ORDER BY id",
    "findings": "SELECT * FROM findings ORDER BY id",
    "model_versions": "SELECT * FROM model_versions ORDER BY model, version",
    "passes": "SELECT id, as_of, status, json_remove(counts, '$.timings') FROM passes "
              "ORDER BY id",
}


def _results(database: Path) -> dict[str, list[tuple[Any, ...]]]:
    """The stored results; the export paths in a pass's counts are kept from the workspace's
    exports folder down, so two workspaces that wrote the same files compare equal."""
    return {name: [tuple(EXPORT_PATH.sub(r'"\1"', v) if isinstance(v, str) else v for v in row)
                   for row in _rows(database, sql)]
            for name, sql in RESULT_QUERIES.items()}


def _without_pass_ids(database: Path) -> dict[str, list[tuple[Any, ...]]]:
    """The results named by what they are, not by the pass that wrote them (for histories that
    differ by a stopped pass)."""
    queries = {
        "fits": "SELECT model, version, series_key, window_first, window_last, n, estimable, "
                "reason, coefficients, inference, diagnostics FROM fits",
        "forecasts": "SELECT model, series_key, target_period, lead, inputs, point, mean_lower, "
                     "mean_upper, lower, upper, level, leverage, extrapolation FROM forecasts",
        "outcomes": "SELECT f.model, f.series_key, f.target_period, o.actual, o.outcome "
                    "FROM outcomes o JOIN forecasts f ON f.id = o.forecast_id",
        "baselines": "SELECT model, series_key, start_period, end_period, set_by FROM baselines",
        "findings": "SELECT model, series_key, feed, kind, severity, state, since_period, "
                    "statistic, p_value, message FROM findings",
    }
    return {
        name: sorted(tuple(PASS_NUMBER.sub("pass N", v) if isinstance(v, str) else v
                           for v in row) for row in _rows(database, sql))
        for name, sql in queries.items()
    }


# --------------------------------------------------------------------------- a per: panel

STORES = tuple(f"s{number:02d}" for number in range(40))
PANEL_COLUMNS = ("week_ending", "store", "units", "hours")
FIRST_DROP = 60  # weeks 1-60 arrive in one file, then one file a week
LAST_WEEK = 64
MOVED = {"s03", "s17", "s28"}  # their slope moves at week 50


def _panel_files() -> dict[int, bytes]:
    """Seeded invented panel: hours = a + b × units + noise per store; the file of week w holds
    its actuals and the plan row (units only) of week w + 1."""
    rng = np.random.default_rng(20260612)
    intercept = rng.uniform(20.0, 60.0, len(STORES))
    slope = rng.uniform(0.15, 0.30, len(STORES))
    units = rng.uniform(200.0, 600.0, (len(STORES), LAST_WEEK + 1))
    noise = rng.normal(0.0, 6.0, (len(STORES), LAST_WEEK + 1))

    def row(i: int, week: int, plan: bool) -> list[Any]:
        b = slope[i] * (1.35 if STORES[i] in MOVED and week >= 50 else 1.0)
        hours = intercept[i] + b * units[i, week - 1] + noise[i, week - 1]
        return [week_ending(week).isoformat(), STORES[i], f"{units[i, week - 1]:.1f}",
                None if plan else f"{hours:.2f}"]

    def file(first: int, last: int) -> bytes:
        rows = [row(i, w, False) for w in range(first, last + 1) for i in range(len(STORES))]
        rows += [row(i, last + 1, True) for i in range(len(STORES))]
        return csv_bytes(PANEL_COLUMNS, rows)

    return {FIRST_DROP: file(1, FIRST_DROP),
            **{w: file(w, w) for w in range(FIRST_DROP + 1, LAST_WEEK + 1)}}


PANEL_FILES = _panel_files()


def _panel(root: Path, compute: str = "") -> Workspace:
    model = "\n".join([
        "  store_hours:", "    feed: stores", "    response: hours", "    predictors: [units]",
        "    per: store", "    window: 30", "    recent: 10", "    min_rows: 10",
    ])
    text = config_yaml([feed_yaml("stores", PANEL_COLUMNS)], [model]) + compute
    return Workspace.create(root, text)


def _drop(workspace: Workspace, week: int) -> None:
    workspace.drop("stores", f"week_{week:02d}.csv", PANEL_FILES[week])


def _run_panel(workspace: Workspace, weeks: list[int]) -> None:
    """One pass per file, without the notify step (pages and mail are not what is compared)."""
    for week in weeks:
        _drop(workspace, week)
        report = workspace.run(delivered(week))
        assert report.skipped == () and report.stopped_early is None


@pytest.fixture(scope="module")
def panel_oracle(tmp_path_factory: pytest.TempPathFactory) -> Workspace:
    """The panel on the local path: the reference every cluster run must equal."""
    workspace = _panel(tmp_path_factory.mktemp("panel-local"))
    _run_panel(workspace, sorted(PANEL_FILES))
    findings = workspace.query("SELECT DISTINCT series_key FROM findings")
    assert {key for (key,) in findings} & MOVED, "the moved stores raise nothing: a weak panel"
    return workspace


def test_per_panel_equal_on_the_cluster(
    tmp_path: Path, cluster: distributed.LocalCluster, panel_oracle: Workspace
) -> None:
    workspace = _panel(tmp_path, _compute_yaml(cluster.scheduler_address, batch_size=7))
    _run_panel(workspace, sorted(PANEL_FILES))
    assert _results(workspace.database) == _results(panel_oracle.database)
    assert workspace.query("SELECT count(DISTINCT series_key) FROM fits") == [(40,)]


# --------------------------------------------------------------------------- the demo, part


COPY_WEEK = 56  # weeks 1-56 replayed once, locally; then the same weeks on both paths
DEMO_WEEKS = range(COPY_WEEK + 1, COPY_WEEK + 5)


@pytest.fixture(scope="module")
def demo_copy_point(tmp_path_factory: pytest.TempPathFactory) -> Path:
    replayed = replay_scenario(tmp_path_factory.mktemp("demo-base"), last_week=COPY_WEEK)
    return replayed.root


def _replay_weeks(root: Path) -> None:
    config = load_config(root / CONFIG_NAME)
    inboxes = inbox_paths(root)
    with DatabaseLock(config.database), Store.open(config.database) as store:
        for week in weeks(root):
            if week.number in DEMO_WEEKS:
                drop_week(week, inboxes)
                run_pass(config, as_of=week.delivered_at, store=store)


def test_demo_replay_equal_on_the_cluster(
    tmp_path: Path, cluster: distributed.LocalCluster, demo_copy_point: Path
) -> None:
    local, on_cluster = tmp_path / "local", tmp_path / "dask"
    shutil.copytree(demo_copy_point, local)
    shutil.copytree(demo_copy_point, on_cluster)
    with (on_cluster / CONFIG_NAME).open("a", encoding="utf-8") as config:
        config.write(_compute_yaml(cluster.scheduler_address, batch_size=4))
    _replay_weeks(local)
    _replay_weeks(on_cluster)
    database = load_config(local / CONFIG_NAME).database.name
    expected = _results(local / "state" / database)
    assert _results(on_cluster / "state" / database) == expected
    new_fits = [row for row in expected["fits"] if row[1] > COPY_WEEK]
    assert len({row[2] for row in new_fits}) >= 5  # the weeks compared refit every model


# --------------------------------------------------------------------------- lost workers


class KillWorkerRunningBatch(SchedulerPlugin):
    """In the scheduler (this process): SIGKILL the worker process a batch is handed to, once,
    and note when that batch's result is in after all."""

    name = "kill-worker-running-batch"

    def __init__(self, scheduler: Any, pids: dict[str, int]) -> None:
        self.scheduler = scheduler
        self.pids = pids
        self.killed: str | None = None
        self.finished_after_kill = False

    def transition(self, key: Any, start: str, finish: str, *args: Any, **kwargs: Any) -> None:
        if not str(key).startswith("analyse_batch"):
            return
        if self.killed is None and finish == "processing":
            worker = self.scheduler.tasks[key].processing_on
            os.kill(self.pids[worker.address], signal.SIGKILL)
            self.killed = str(key)
        elif str(key) == self.killed and finish == "memory":
            self.finished_after_kill = True


def _kill_plugin(cluster: distributed.LocalCluster,
                 client: distributed.Client) -> KillWorkerRunningBatch:
    client.wait_for_workers(2, timeout=120)
    plugin = KillWorkerRunningBatch(cluster.scheduler, client.run(os.getpid))
    cluster.scheduler.add_plugin(plugin)
    return plugin


def test_a_worker_killed_mid_pass_has_its_batch_run_again(
    tmp_path: Path, cluster: distributed.LocalCluster, client: distributed.Client,
    panel_oracle: Workspace,
) -> None:
    workspace = _panel(tmp_path, _compute_yaml(cluster.scheduler_address, batch_size=5))
    plugin = _kill_plugin(cluster, client)
    try:
        _run_panel(workspace, [FIRST_DROP])
    finally:
        cluster.scheduler.remove_plugin(name=plugin.name)
    assert plugin.killed is not None
    assert plugin.finished_after_kill
    _run_panel(workspace, sorted(PANEL_FILES)[1:])
    assert _results(workspace.database) == _results(panel_oracle.database)


def test_workers_lost_too_often_stop_the_pass_cleanly(
    tmp_path: Path, cluster: distributed.LocalCluster, client: distributed.Client,
    panel_oracle: Workspace, capsys: pytest.CaptureFixture[str],
) -> None:
    workspace = _panel(tmp_path, _compute_yaml(cluster.scheduler_address, batch_size=5))
    _run_panel(workspace, [FIRST_DROP])
    [(mark,)] = workspace.query("SELECT json_extract(counts, '$.observation_mark') FROM passes")
    capsys.readouterr()

    week = FIRST_DROP + 1
    _drop(workspace, week)
    plugin = _kill_plugin(cluster, client)
    allowed = cluster.scheduler.allowed_failures
    cluster.scheduler.allowed_failures = 0  # the first death fails the batch (KilledWorker)
    try:
        assert workspace.cli_pass(delivered(week)) == 2
    finally:
        cluster.scheduler.allowed_failures = allowed
        cluster.scheduler.remove_plugin(name=plugin.name)
    assert plugin.killed is not None and not plugin.finished_after_kill
    err = capsys.readouterr().err
    assert "workers died 1 times running one batch" in err
    assert "the next pass redoes them" in err

    # Recorded as stopped early with its mark unmoved, and nothing of the model written.
    (status, stopped, new_mark) = workspace.query(
        "SELECT status, json_extract(counts, '$.stopped_early'), "
        "json_extract(counts, '$.observation_mark') FROM passes ORDER BY id DESC LIMIT 1")[0]
    assert (status, stopped, new_mark) == ("finished", "refit", mark)
    assert workspace.query("SELECT count(*) FROM fits WHERE pass_id = 2") == [(0,)]
    assert workspace.query("SELECT count(*) FROM forecasts WHERE pass_id = 2") == [(0,)]

    # The next pass, at the same clock with the cluster whole again, redoes the work.
    client.wait_for_workers(2, timeout=120)
    assert workspace.run(delivered(week)).stopped_early is None
    _run_panel(workspace, sorted(PANEL_FILES)[2:])
    assert _without_pass_ids(workspace.database) == _without_pass_ids(panel_oracle.database)


# --------------------------------------------------------------------------- a lost scheduler

# Loaded into a scheduler process of its own (``--preload``): the scheduler ends its own process
# at once, as a crash would, when the first batch of a pass is handed to a worker.
SCHEDULER_DIES = """
import os
from distributed.diagnostics.plugin import SchedulerPlugin


class DieAtFirstBatch(SchedulerPlugin):
    name = "die-at-first-batch"

    def transition(self, key, start, finish, *args, **kwargs):
        if str(key).startswith("analyse_batch") and finish == "processing":
            os._exit(1)


def dask_setup(scheduler):
    scheduler.add_plugin(DieAtFirstBatch())
"""


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def test_the_scheduler_lost_mid_pass_stops_the_pass_cleanly(
    tmp_path: Path, panel_oracle: Workspace, capsys: pytest.CaptureFixture[str]
) -> None:
    """A scheduler process that dies while the pass waits for its batches: the pass stops early
    with exit 2 and a message that says so, records nothing of the model and keeps its mark;
    the next pass (here on the local engine, as an operator would fall back) redoes the work
    and the history ends equal to the local path's."""
    preload = tmp_path / "scheduler_dies.py"
    preload.write_text(SCHEDULER_DIES, encoding="utf-8")
    address = f"tcp://127.0.0.1:{_free_port()}"
    environment = {**os.environ, "PYTHONPATH": str(REPO_ROOT)}
    scheduler = subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
         "--port", address.rsplit(":", 1)[1], "--no-dashboard", "--no-show",
         "--preload", str(preload)],
        env=environment, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    worker = subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
         "--nworkers", "1", "--no-dashboard", "--host", "127.0.0.1"],
        env=environment, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    try:
        workspace = _panel(tmp_path / "ws", _compute_yaml(address, batch_size=5))
        _drop(workspace, FIRST_DROP)
        capsys.readouterr()
        assert workspace.cli_pass(delivered(FIRST_DROP)) == 2
        assert scheduler.wait(timeout=120) == 1  # it died by its own hand, as planned
        err = capsys.readouterr().err
        assert "compute: lost the Dask scheduler mid-pass" in err, err
        assert "the pass stopped before recording the model's results" in err
        assert "the next pass redoes them" in err
    finally:
        for process in (worker, scheduler):
            if process.poll() is None:
                process.kill()
            process.wait(timeout=60)

    (status, stopped, mark) = workspace.query(
        "SELECT status, json_extract(counts, '$.stopped_early'), "
        "json_extract(counts, '$.observation_mark') FROM passes ORDER BY id DESC LIMIT 1")[0]
    assert (status, stopped, mark) == ("finished", "refit", 0)
    assert workspace.query("SELECT count(*) FROM fits") == [(0,)]
    assert workspace.query("SELECT count(*) FROM forecasts") == [(0,)]
    assert workspace.query("SELECT count(*) FROM observations") != [(0,)]  # ingest kept

    # The operator falls back to the local engine; the next pass at the same clock redoes it.
    workspace.config_path.write_text(
        workspace.config_path.read_text(encoding="utf-8").split("compute:")[0], encoding="utf-8")
    assert workspace.run(delivered(FIRST_DROP)).stopped_early is None
    _run_panel(workspace, sorted(PANEL_FILES)[1:])
    assert _without_pass_ids(workspace.database) == _without_pass_ids(panel_oracle.database)


# --------------------------------------------------------------------------- unreachable


def test_an_unreachable_scheduler_exits_2_and_records_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    address = f"tcp://127.0.0.1:{_closed_port()}"
    workspace = _panel(tmp_path, f"compute:\n  engine: dask\n  scheduler: {address}\n"
                                 "  connect_timeout: 2s\n")
    _drop(workspace, FIRST_DROP)
    assert workspace.cli_pass(delivered(FIRST_DROP)) == 2
    err = capsys.readouterr().err
    assert f"cannot reach the Dask scheduler at {address} within 2s" in err
    assert "recorded nothing" in err
    assert (workspace.inbox("stores") / f"week_{FIRST_DROP:02d}.csv").exists()
    for table in ("passes", "files", "observations", "fits"):
        assert workspace.query(f"SELECT count(*) FROM {table}") == [(0,)], table


def test_check_reports_the_compute_section(
    tmp_path: Path, cluster: distributed.LocalCluster, capsys: pytest.CaptureFixture[str]
) -> None:
    answering = _panel(tmp_path / "up", _compute_yaml(cluster.scheduler_address, 500))
    assert main(["check", "-c", str(answering.config_path)]) == 0
    out = capsys.readouterr().out
    assert f"compute: dask, scheduler {cluster.scheduler_address}, batches of 500 series" in out
    assert "the scheduler answers" in out and "2 worker(s), 2 thread(s)" in out

    address = f"tcp://127.0.0.1:{_closed_port()}"
    silent = _panel(tmp_path / "down", f"compute:\n  engine: dask\n  scheduler: {address}\n"
                                       "  connect_timeout: 1s\n")
    assert main(["check", "-c", str(silent.config_path)]) == 0  # a warning, as for an inbox
    out = capsys.readouterr().out
    assert f"warning: compute: the scheduler at {address} does not answer within 1s" in out

    local = _panel(tmp_path / "local")
    assert main(["check", "-c", str(local.config_path)]) == 0
    assert "compute: local (in the pass's own process)" in capsys.readouterr().out


# --------------------------------------------------------------------------- workers: N


def test_pass_with_its_own_local_workers(tmp_path: Path, panel_oracle: Workspace) -> None:
    """``workers: 2`` through the real command line in a child process: it starts two worker
    processes for the pass (the spawn start method imports ``monitor.__main__`` again in each,
    which must not run the command line) and stops them when the pass ends."""
    workspace = _panel(tmp_path, "compute:\n  engine: dask\n  workers: 2\n  batch_size: 9\n")
    _drop(workspace, FIRST_DROP)
    environment = {**os.environ, "PYTHONPATH": str(REPO_ROOT)}
    done = subprocess.run(
        [sys.executable, "-m", "monitor", "pass", "-c", str(workspace.config_path), "--as-of",
         delivered(FIRST_DROP).isoformat(), "--format", "json"],
        capture_output=True, text=True, env=environment, timeout=300, check=False,
    )
    assert done.returncode == 0, done.stderr
    summary = json.loads(done.stdout)
    assert summary["series_analysed"] == 40 and summary["skipped"] == []
    oracle_first = [row for row in _results(panel_oracle.database)["fits"] if row[1] == 1]
    assert _results(workspace.database)["fits"] == oracle_first

