"""Where the analysis step of a pass runs: in the pass's own process, or on a Dask cluster.

DESIGN.md section 14 kept ``monitor.analysis.analyse_batch`` a pure function from one batch's
arrays to its results. This module is the one place that knows where it runs (config
``compute:``):

- ``engine: local`` (the default): ``analyse_batch`` runs here, once per model, as it always did.
- ``engine: dask``: each model's series are cut into batches of ``batch_size`` series, each batch
  is submitted to Dask's distributed scheduler (an existing engine; nothing of our own), and the
  outputs are joined back in series order before the pass records anything. The pass therefore
  records the same rows in the same order and transactions as with ``local``; ``analyse_batch``
  treats every series on its own, so the joined figures are the local ones bit for bit (checked
  by tests/test_compute.py on a real ``distributed.LocalCluster``).

Failures. A worker that dies while running a batch is Dask's to handle: the scheduler runs the
batch again on another worker, up to its ``distributed.scheduler.allowed-failures`` (default 3).
Past that, or when the scheduler itself goes away, ``analyse`` raises ``ComputeLostError``; the
pass has recorded nothing of that model (its batches are joined before any write) and stops
early with its mark unmoved, so the next pass redoes the work. A scheduler that cannot be
reached at the start raises ``ComputeUnavailableError`` before the pass records anything.

Dask (the ``distributed`` package, ``pip install 'plumbline[dask]'``) is an optional extra and is
imported here only, inside the functions that need it: ``engine: local`` never imports it.

Public API::

    compute_for(settings) -> Compute            LocalCompute or DaskCompute, not yet connected
    Compute.connect()                           reach the cluster (idempotent); may raise
                                                ComputeUnavailableError
    Compute.analyse(batch, check_stop=None, function=analyse_batch)
                                                BatchOutput, as function(batch) would give
    Compute.close()
    probe(settings) -> Probe                    what ``plumbline check`` reports
    split_batch(batch, size) / join_outputs(parts)
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Sequence
from concurrent.futures import CancelledError
from dataclasses import dataclass
from typing import Any

import numpy as np

from monitor.analysis import BatchInput, BatchOutput, analyse_batch
from monitor.config import Compute as ComputeSettings
from monitor.errors import ComputeLostError, ComputeUnavailableError

Analyse = Callable[[BatchInput], BatchOutput]

# How often a pass waiting for its batches looks at its stop request (seconds).
POLL_SECONDS = 0.05

# Fields of the output dataclasses that describe the whole call, not one series each: equal in
# every batch, taken once. Every other field has the series as its first axis and is joined.
SHARED_FIELDS = frozenset({"terms", "intercept", "level", "p", "alpha", "boundary_name"})

INSTALL_HINT = "install the optional extra: pip install 'plumbline[dask]'"


# --------------------------------------------------------------------------- batches


def split_batch(batch: BatchInput, size: int) -> list[BatchInput]:
    """``batch`` cut along the series axis into consecutive parts of at most ``size`` series.

    Every array field of ``BatchInput`` has the series as its first axis; the other fields
    (predictors, level, window ...) are the model's and go unchanged into every part. The row
    and plan axes keep their full width, so each series meets exactly the arrays it met whole.
    """
    if size < 1:
        raise ValueError("a batch holds at least one series")
    total = batch.y.shape[0]
    if total <= size:
        return [batch]
    parts = []
    for start in range(0, total, size):
        cut = slice(start, start + size)
        changes: dict[str, Any] = {
            f.name: np.ascontiguousarray(getattr(batch, f.name)[cut])
            for f in dataclasses.fields(batch)
            if isinstance(getattr(batch, f.name), np.ndarray)
        }
        parts.append(dataclasses.replace(batch, **changes))
    return parts


def join_outputs(parts: Sequence[BatchOutput]) -> BatchOutput:
    """The outputs of consecutive batches as one output, series in the same order."""
    if not parts:
        raise ValueError("nothing to join")
    if len(parts) == 1:
        return parts[0]
    joined = _join(list(parts), "output")
    assert isinstance(joined, BatchOutput)
    return joined


def _join(values: list[Any], name: str) -> Any:
    first = values[0]
    if dataclasses.is_dataclass(first) and not isinstance(first, type):
        changes = {
            f.name: _join([getattr(v, f.name) for v in values], f.name)
            for f in dataclasses.fields(first)
        }
        return dataclasses.replace(first, **changes)
    if name in SHARED_FIELDS:
        if any(not _same(first, v) for v in values[1:]):
            raise ValueError(f"field {name} differs between batches of one model")
        return first
    if first is None:
        if any(v is not None for v in values):
            raise ValueError(f"field {name} is None in some batches only")
        return None
    if isinstance(first, np.ndarray) and first.ndim >= 1:
        return np.concatenate(values, axis=0)
    if isinstance(first, list):
        return [item for v in values for item in v]
    if isinstance(first, tuple):
        return tuple(item for v in values for item in v)
    raise TypeError(
        f"field {name} ({type(first).__name__}) is neither per series nor in SHARED_FIELDS; "
        "say in monitor.compute how batches join it"
    )


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return bool(np.array_equal(a, b, equal_nan=True))
    return bool(a == b)


# --------------------------------------------------------------------------- engines


class Compute:
    """Runs ``analyse_batch``; ``LocalCompute`` here, ``DaskCompute`` on a cluster."""

    def describe(self) -> str:
        raise NotImplementedError

    def connect(self) -> None:
        """Make ready to analyse. Called by a pass before it records anything."""

    def analyse(
        self, batch: BatchInput, check_stop: Callable[[], None] | None = None, *,
        function: Analyse = analyse_batch,
    ) -> BatchOutput:
        raise NotImplementedError

    def close(self) -> None:
        """Let go of any connection or worker process."""


class LocalCompute(Compute):
    """``engine: local``: ``analyse_batch`` in this process, the whole model at once."""

    def describe(self) -> str:
        return "local (in the pass's own process)"

    def analyse(
        self, batch: BatchInput, check_stop: Callable[[], None] | None = None, *,
        function: Analyse = analyse_batch,
    ) -> BatchOutput:
        return function(batch)


class DaskCompute(Compute):
    """``engine: dask``: batches of ``batch_size`` series on a Dask distributed cluster, either
    the scheduler at ``scheduler`` or ``workers`` local worker processes started by
    ``connect`` (one thread each, bound to 127.0.0.1) and stopped by ``close``."""

    def __init__(self, settings: ComputeSettings) -> None:
        self.settings = settings
        self._client: Any = None
        self._cluster: Any = None
        self.batches_submitted = 0

    def describe(self) -> str:
        size = f"batches of {self.settings.batch_size} series"
        if self.settings.scheduler is not None:
            return f"dask, scheduler {self.settings.scheduler}, {size}"
        return f"dask, {self.settings.workers} local worker process(es), {size}"

    def connect(self) -> None:
        if self._client is not None and self._client.status == "running":
            return
        self.close()
        distributed = _import_distributed()
        timeout = self.settings.connect_timeout.total_seconds()
        try:
            if self.settings.scheduler is not None:
                self._client = distributed.Client(
                    self.settings.scheduler, timeout=timeout, set_as_default=False
                )
            else:
                self._cluster = distributed.LocalCluster(
                    n_workers=self.settings.workers, threads_per_worker=1, processes=True,
                    host="127.0.0.1", scheduler_port=0, dashboard_address=None,
                )
                self._client = distributed.Client(
                    self._cluster, timeout=timeout, set_as_default=False
                )
        except (OSError, TimeoutError) as exc:
            self.close()
            where = (f"the Dask scheduler at {self.settings.scheduler}"
                     if self.settings.scheduler is not None
                     else f"{self.settings.workers} local Dask worker process(es)")
            raise ComputeUnavailableError(
                f"compute: cannot reach {where} within {timeout:g}s ({_reason(exc)}); the pass "
                "did not start and recorded nothing"
            ) from exc
        try:
            self._client.wait_for_workers(1, timeout=timeout)
        except (OSError, TimeoutError) as exc:
            self.close()
            raise ComputeUnavailableError(
                f"compute: the Dask scheduler at {self.settings.scheduler} answers but has no "
                f"worker after {timeout:g}s; the pass did not start and recorded nothing"
            ) from exc

    def analyse(
        self, batch: BatchInput, check_stop: Callable[[], None] | None = None, *,
        function: Analyse = analyse_batch,
    ) -> BatchOutput:
        try:
            self.connect()  # connected by the pass already; again only if the link dropped
        except ComputeUnavailableError as exc:
            raise ComputeLostError(str(exc).replace("the pass did not start and recorded "
                                                    "nothing", "the pass stopped")) from exc
        distributed = _import_distributed()
        import dask

        parts = split_batch(batch, self.settings.batch_size)
        # Each batch travels inside its task rather than scattered ahead: scattered data dies
        # with the worker holding it, a task's own arguments can be run again elsewhere. The
        # size warning for such tasks is therefore expected, and raised out of the way.
        with dask.config.set({"distributed.admin.large-graph-warning-threshold": "2GiB"}):
            futures = [self._client.submit(function, part, pure=False) for part in parts]
        self.batches_submitted += len(futures)
        try:
            outputs = _results(self._client, futures, check_stop)
        except CancelledError as exc:  # one future or several (Future[s]CancelledError)
            what = ("lost the Dask scheduler mid-pass" if "scheduler-connection-lost" in str(exc)
                    else "the Dask cluster dropped a batch")
            raise ComputeLostError(
                f"compute: {what} ({_reason(exc)}); the pass stopped before recording the "
                "model's results and the next pass redoes them"
            ) from exc
        except _killed_worker() as exc:
            raise ComputeLostError(
                f"compute: Dask workers died {getattr(exc, 'allowed_failures', 0) + 1} times "
                "running one batch "
                "(distributed.scheduler.allowed-failures); the pass stopped before recording "
                "the model's results and the next pass redoes them"
            ) from exc
        except (OSError, distributed.comm.CommClosedError) as exc:
            raise ComputeLostError(
                f"compute: lost the Dask scheduler mid-pass ({_reason(exc)}); the pass stopped "
                "before recording the model's results and the next pass redoes them"
            ) from exc
        finally:
            self._client.cancel([f for f in futures if not f.done()])
        return join_outputs(outputs)

    def close(self) -> None:
        client, cluster = self._client, self._cluster
        self._client = self._cluster = None
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()


def _results(client: Any, futures: list[Any],
             check_stop: Callable[[], None] | None) -> list[BatchOutput]:
    """The batches' results in order, each taken as soon as it is ready (so a worker holds a
    finished result only until the next look), looking at the pass's stop request between
    short sleeps. The first failure is raised: a batch's own error, ``KilledWorker``, or a
    cancellation when the scheduler went away."""
    outputs: list[BatchOutput | None] = [None] * len(futures)
    pending = list(range(len(futures)))
    while pending:
        ready = [i for i in pending if futures[i].done()]
        if not ready:
            if check_stop is not None:
                check_stop()
            time.sleep(POLL_SECONDS)
            continue
        for i, output in zip(ready, client.gather([futures[i] for i in ready]), strict=True):
            outputs[i] = output
            futures[i].release()  # the worker may drop it now
        pending = [i for i in pending if i not in set(ready)]
    return [output for output in outputs if output is not None]


def _killed_worker() -> type[Exception]:
    from distributed.scheduler import KilledWorker

    return KilledWorker


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError as exc:
        raise ComputeUnavailableError(
            f"compute: engine dask needs the distributed package ({INSTALL_HINT})"
        ) from exc
    return distributed


def _reason(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


def compute_for(settings: ComputeSettings) -> Compute:
    """The engine the ``compute:`` section asks for, not yet connected."""
    if settings.engine == "dask":
        return DaskCompute(settings)
    return LocalCompute()


# --------------------------------------------------------------------------- check


@dataclass(frozen=True)
class Probe:
    """What ``plumbline check`` says about the compute section."""

    summary: str
    answered: bool | None  # None: nothing to ask (local, or local workers started by a pass)
    detail: str


def probe(settings: ComputeSettings) -> Probe:
    """Ask the scheduler whether it answers and how many workers it has; start nothing."""
    engine = compute_for(settings)
    summary = engine.describe()
    if settings.engine == "local":
        return Probe(summary, None, "")
    try:
        distributed = _import_distributed()
    except ComputeUnavailableError as exc:
        return Probe(summary, False, str(exc))
    if settings.scheduler is None:
        return Probe(summary, None, f"distributed {distributed.__version__} installed; the "
                                    "worker processes start with the pass")
    timeout = settings.connect_timeout.total_seconds()
    begun = time.perf_counter()
    try:
        client = distributed.Client(settings.scheduler, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        return Probe(summary, False, f"the scheduler at {settings.scheduler} does not answer "
                                     f"within {timeout:g}s ({_reason(exc)})")
    try:
        workers = client.scheduler_info(n_workers=-1).get("workers", {})
        threads = sum(int(w.get("nthreads", 0)) for w in workers.values())
    finally:
        client.close()
    waited = time.perf_counter() - begun
    return Probe(summary, True, f"the scheduler answers ({waited:.2f}s): {len(workers)} "
                                f"worker(s), {threads} thread(s)")


__all__ = [
    "Compute",
    "DaskCompute",
    "LocalCompute",
    "Probe",
    "compute_for",
    "join_outputs",
    "probe",
    "split_batch",
]
