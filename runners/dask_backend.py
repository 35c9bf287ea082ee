"""Run points on Dask distributed: a local cluster, an existing scheduler, or batch jobs (dask-jobqueue).

Each point is one Dask task that returns its results to the client process (the single
writer). A task never raises for a simulation error: it returns a :class:`TaskFailure` so the
writer can record the error text. A worker that dies mid-point (its batch job cancelled, the
process killed, memory exhausted) has its point rerun on another worker by the scheduler; a point
whose workers died ``execution.cluster.max_tries`` times surfaces as ``KilledWorker`` from
``Future.result`` and is recorded failed the same way, while the sweep goes on.
"""

from __future__ import annotations

import atexit
import contextlib
import importlib
import math
import os
import shlex
import signal
import sys
import threading
import traceback
from collections.abc import Callable, Iterable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import Any

import dask
from dask.distributed import Client, KilledWorker, LocalCluster, Status, WorkerPlugin, as_completed

from ..errors import CapsweepError, ConfigError
from ..registry import BY_PATH
from .builds import BUILD_DIR_ENV, build_root

Job = tuple[Any, dict[str, Any], int, int]
"""A point to simulate: (tag the caller gets back, config, seed, wiring seed)."""


@dataclass(frozen=True)
class TaskFailure:
    """What a task returns instead of results when its point failed."""

    error: str


def simulate_task(config: dict[str, Any], seed: int, wiring_seed: int) -> dict[str, Any] | TaskFailure:
    """Worker-side entry: run one point (and its prescreen if asked), exceptions become a TaskFailure."""
    from brian2 import BrianLogger

    from .point import run_point

    BrianLogger.log_level_error()
    try:
        result = run_point(config, seed, wiring_seed=wiring_seed)
    except Exception as exc:  # every failure is recorded, none may kill the sweep
        summary = f"{type(exc).__name__}: {exc}"
        return TaskFailure(summary + "\n" + traceback.format_exc(limit=6))
    if config["execution"]["prescreen"]:
        from .theory.prediction import predict

        result["predicted_outcome"] = predict(config).outcome
    return result


class PrepareWorker(WorkerPlugin):
    """Ready a worker for simulations at start-up, and let it leave quickly once closed.

    - Brian2 and the point runner are imported in the worker's main thread: Brian2 installs a
      SIGINT handler when first imported, which Python allows only in the main thread (tasks run
      in an executor thread). Workers of the local cluster have them already: they import
      ``capsweep.runners.model`` (the Brian2 network, imported by every engine) as a Dask
      preload, before they register, which spares the round trip of a plugin that still has
      work to do.
    - With ``leave_fast`` (workers of capsweep's own local cluster), a worker process closed
      cleanly exits without interpreter teardown, which takes about 0.5 s with Brian2 loaded and
      has nothing left to save. Workers of a cluster someone else runs keep their normal exit.
    """

    name = "capsweep-prepare-worker"

    def __init__(self, leave_fast: bool = False) -> None:
        self.leave_fast = leave_fast

    def setup(self, worker: Any) -> None:
        from . import model  # noqa: F401  (imports Brian2)

    def teardown(self, worker: Any) -> None:
        if self.leave_fast and worker.status == Status.closing:
            atexit.register(os._exit, 0)


CLUSTER_SETTINGS = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.scheduler.work-stealing": False,
    "distributed.scheduler.worker-saturation": 1.0,
    "distributed.scheduler.default-task-durations.simulate_task": "10m",
}
"""Dask settings of the clusters capsweep starts: no profiler, slower housekeeping, one task per worker.

- The statistical profiler walks the stack of every running task every 10 ms on the worker's
  event loop; on Brian2's deep code-generation stacks it cost up to half of a worker's first
  point (measured: 10.7 s instead of 5.0 s).
- With the default housekeeping (event-loop tick every 20 ms, system and memory monitors every
  0.5 s and 0.1 s, work stealing every 0.1 s) an idle 2-worker cluster used 1.3 s of CPU per
  20 s here, taken from the simulations on a 2-core machine; with these, 0.33 s.
- A worker holds only the task it runs (the default saturation 1.1 rounds up to two per
  one-thread worker): the next task goes to whichever worker frees up first, so the sweep's
  longest-first order is kept and no worker idles at the end while the other still has a point
  queued. Stealing then has nothing to move.
- Until a point has finished, the scheduler guesses a point takes 10 minutes (its default guess for
  an unknown task is 0.5 s): adaptive scaling of batch jobs then asks for a worker per remaining
  point (up to ``execution.cluster.max_jobs``) from the start instead of one.
"""


@dataclass(frozen=True)
class BatchSystem:
    """How one batch system's dask-jobqueue cluster takes the ``[execution.cluster]`` settings."""

    cluster: str  # class name in dask_jobqueue
    queue: str | None  # its keyword for execution.cluster.queue; None: the system has no queues
    account: str | None  # its keyword for execution.cluster.account; None: no accounts
    clock: str  # wall-time format: "hms" (HH:MM:SS), "hm" (HH:MM), "" (takes none)


BATCH_SYSTEMS: dict[str, BatchSystem] = {
    "slurm": BatchSystem("SLURMCluster", "queue", "account", "hms"),
    "pbs": BatchSystem("PBSCluster", "queue", "account", "hms"),
    "sge": BatchSystem("SGECluster", "queue", "project", "hms"),
    "lsf": BatchSystem("LSFCluster", "queue", "project", "hm"),
    "htcondor": BatchSystem("HTCondorCluster", None, None, ""),
}
"""The batch kinds of ``execution.cluster.kind`` (common practice: dask-jobqueue's keywords per system)."""
WORKER_PRELOAD = "capsweep.runners.model"
"""Imported by every worker before it registers: Brian2, in the worker's main thread (see PrepareWorker)."""


def cluster_table(cluster: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The ``[execution.cluster]`` table: registry defaults overlaid with ``cluster`` (leaf names, checked values)."""
    prefix = "execution.cluster."
    table = {path.removeprefix(prefix): key.default for path, key in BY_PATH.items() if path.startswith(prefix)}
    return {**table, **(cluster or {})}


@contextlib.contextmanager
def dask_client(workers: int, scheduler: str = "", dashboard: bool = False,
                cluster: Mapping[str, Any] | None = None) -> Iterator[Client]:
    """A Dask client on the cluster that ``cluster`` (the ``[execution.cluster]`` table; default: local) names.

    Kind ``local`` runs ``workers`` processes here with one thread each (Brian2 simulations are
    single-threaded and hold the GIL, so processes, not threads, give parallelism); a ``scheduler``
    address (kind ``local`` or ``scheduler``) attaches to a running scheduler instead; a batch kind
    (:data:`BATCH_SYSTEMS`) submits worker jobs, scaled adaptively to the points left. The client is
    closed, not exited as a context manager: ``EarlyClient`` opens it in another thread, and
    ``Client.__exit__`` resets a context variable that only the opening thread may reset.
    """
    table = cluster_table(cluster)
    kind = table["kind"]
    if kind in BATCH_SYSTEMS and scheduler:
        raise ConfigError(f"execution.cluster.kind = {kind!r} starts its own scheduler; leave execution.scheduler "
                          f"(--scheduler) empty, or use kind 'scheduler' to attach to {scheduler!r}")
    if kind in BATCH_SYSTEMS:
        with _batch_client(kind, table, dashboard) as client:
            yield client
    elif scheduler:
        with _attached_client(scheduler) as client:
            yield client
    elif kind == "scheduler":
        raise ConfigError("execution.cluster.kind = 'scheduler' needs the scheduler's address in execution.scheduler "
                          "or --scheduler (e.g. tcp://host:8786)")
    else:
        with dask.config.set({**CLUSTER_SETTINGS, **_fault_settings(table)}), LocalCluster(
            n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0" if dashboard else None,
            silence_logs=50, preload=[WORKER_PRELOAD],
        ) as local, contextlib.closing(Client(local)) as client:
            client.register_plugin(PrepareWorker(leave_fast=True))
            yield client


def _fault_settings(table: Mapping[str, Any]) -> dict[str, Any]:
    """Scheduler settings from the cluster table: a point is tried on at most ``max_tries`` workers that die."""
    return {"distributed.scheduler.allowed-failures": table["max_tries"] - 1}


@contextlib.contextmanager
def _attached_client(scheduler: str) -> Iterator[Client]:
    """A client of the running scheduler at ``scheduler`` (its own settings decide retries of lost points)."""
    try:
        client = Client(scheduler, timeout="10s")
    except (OSError, TimeoutError) as exc:
        raise CapsweepError(
            f"cannot reach the Dask scheduler at {scheduler!r} ({exc}); check the address "
            "(e.g. tcp://host:8786) or omit --scheduler to start a local cluster"
        ) from None
    with contextlib.closing(client):
        client.register_plugin(PrepareWorker())
        yield client


@contextlib.contextmanager
def _batch_client(kind: str, table: Mapping[str, Any], dashboard: bool) -> Iterator[Client]:
    """A client of a dask-jobqueue cluster of ``kind``: worker jobs scaled between 0 and ``max_jobs``.

    The scheduler runs in this process; the jobs are cancelled when the block exits (end of the
    sweep, an error, or Ctrl-C).
    """
    jobqueue = jobqueue_module(kind)
    settings = batch_job_settings(kind, table)
    with dask.config.set({**CLUSTER_SETTINGS, **_fault_settings(table)}):
        batch = getattr(jobqueue, BATCH_SYSTEMS[kind].cluster)(
            **settings, scheduler_options={"dashboard": dashboard, "dashboard_address": ":0"})  # any free port
        with contextlib.closing(batch):
            batch.adapt(minimum_jobs=0, maximum_jobs=table["max_jobs"])
            with contextlib.closing(Client(batch)) as client:
                client.register_plugin(PrepareWorker(leave_fast=True))
                yield client


def jobqueue_module(kind: str) -> ModuleType:
    """dask_jobqueue, without the SIGINT handler its import installs (Ctrl-C must stay a KeyboardInterrupt).

    That import sets a signal handler, which only the main thread may do: call this first from the main
    thread (``EarlyClient`` does); later calls find the module imported.
    """
    handler = signal.getsignal(signal.SIGINT)
    try:
        return importlib.import_module("dask_jobqueue")
    except ImportError:
        raise CapsweepError(f"execution.cluster.kind = {kind!r} needs dask-jobqueue: "
                            "pip install 'capsweep[cluster]'") from None
    finally:
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGINT, handler)


def batch_job_settings(kind: str, table: Mapping[str, Any]) -> dict[str, Any]:
    """Keyword arguments of the dask-jobqueue cluster of batch ``kind`` from the ``[execution.cluster]`` table.

    Each job runs ``cores`` one-thread worker processes. Workers retire gracefully (their running
    point moves elsewhere, not counted as a failure) at ``walltime_min - retire_min`` minutes,
    staggered by up to ``retire_min / 2`` either way, so no job hits its wall time mid-point and the
    adaptive scaling replaces it while points remain. Worker jobs get ``$CAPSWEEP_BUILD_DIR``: the
    scratch directory's ``builds`` (a build cache per node) or, without scratch, this process's cache
    root, which must then be on a filesystem every node shares.
    """
    system = BATCH_SYSTEMS[kind]
    walltime, retire = table["walltime_min"], table["retire_min"]
    if 1.5 * retire >= walltime:
        raise ConfigError(f"execution.cluster.retire_min = {retire:g} is not allowed: it must stay below "
                          f"execution.cluster.walltime_min / 1.5 = {walltime / 1.5:g} min, so that workers retire "
                          "before their job's wall time")
    scratch = table["scratch"]
    builds = Path(scratch) / "builds" if scratch else build_root()
    settings: dict[str, Any] = {
        "cores": table["cores"],
        "processes": table["cores"],
        "memory": f"{table['memory_gb']:g}GB",
        "python": table["python"] or sys.executable,
        "job_extra_directives": [d.strip() for d in table["directives"].split(";") if d.strip()],
        "job_script_prologue": [f"export {BUILD_DIR_ENV}={shlex.quote(str(builds))}", *_worker_environment()],
        "worker_extra_args": ["--lifetime", f"{(walltime - retire) * 60:.0f}s",
                              "--lifetime-stagger", f"{retire * 30:.0f}s", "--preload", WORKER_PRELOAD],
        "local_directory": scratch or None,
        "silence_logs": "error",
    }
    for name, keyword in (("queue", system.queue), ("account", system.account)):
        if not table[name]:
            continue
        if keyword is None:
            raise ConfigError(f"execution.cluster.{name} = {table[name]!r} is not used by kind {kind!r}; "
                              "leave it empty (use execution.cluster.directives for the job's requirements)")
        settings[keyword] = table[name]
    if system.clock:
        settings["walltime"] = _clock(walltime, seconds=system.clock == "hms")
    if kind == "htcondor":
        settings["disk"] = settings["memory"]
    return settings


def _clock(minutes: float, seconds: bool) -> str:
    """``minutes`` as HH:MM:SS, or as HH:MM rounded up to whole minutes."""
    if not seconds:
        hours, mins = divmod(math.ceil(minutes), 60)
        return f"{hours:02d}:{mins:02d}"
    hours, rest = divmod(round(minutes * 60), 3600)
    return f"{hours:02d}:{rest // 60:02d}:{rest % 60:02d}"


def _worker_environment() -> list[str]:
    """``export DASK_…`` lines that give batch workers the worker-side :data:`CLUSTER_SETTINGS`.

    Workers of a local cluster inherit this process's Dask config; a batch job's worker reads only its
    own, so the settings travel as Dask's environment variables.
    """
    worker_side = {k: v for k, v in CLUSTER_SETTINGS.items() if not k.startswith("distributed.scheduler.")}
    return [f"export DASK_{k.upper().replace('.', '__').replace('-', '_')}={shlex.quote(str(v))}"
            for k, v in worker_side.items()]


class EarlyClient:
    """A :func:`dask_client` that can start in a background thread before it is needed.

    Worker processes take seconds to start and import Brian2; ``start()`` begins that while the
    caller does its own preparation (imports, store layout), and ``client()`` waits for it
    (starting it first if ``start()`` was not called). Leaving the ``with`` block closes the
    client and cluster (cancelling batch jobs), after waiting for a start still in progress.
    """

    def __init__(self, workers: int, scheduler: str = "", dashboard: bool = False,
                 cluster: Mapping[str, Any] | None = None) -> None:
        self._context = dask_client(workers, scheduler, dashboard, cluster)
        kind = cluster_table(cluster)["kind"]
        if kind in BATCH_SYSTEMS:
            jobqueue_module(kind)
        self.has_dashboard = dashboard or (bool(scheduler) and kind not in BATCH_SYSTEMS)  # a running one serves one
        self._stack = contextlib.ExitStack()
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="capsweep-dask-start")
        self._started: Future[Client] | None = None

    def start(self) -> Future[Client]:
        """Begin starting the client in the background (once); the future of the client."""
        if self._started is None:
            self._started = self._pool.submit(self._stack.enter_context, self._context)
        return self._started

    def client(self) -> Client:
        """The started client; raises what starting it raised (e.g. an unreachable scheduler)."""
        return self.start().result()

    def worker_count(self) -> int:
        """Workers connected now; 0 before the client has started. Any thread may ask (a progress view does)."""
        started = self._started
        if started is None or not started.done() or started.exception() is not None:
            return 0
        client = started.result()
        if client.cluster is not None:  # a cluster of ours keeps the scheduler's view current: no round trip
            return len(client.cluster.scheduler_info.get("workers", {}))
        return len(client.scheduler_info()["workers"]) if client.status == "running" else 0

    def __enter__(self) -> EarlyClient:
        return self

    def __exit__(self, *exc: object) -> None:
        if self._started is not None:
            with contextlib.suppress(Exception):
                self._started.result()
        self._pool.shutdown()
        self._stack.close()


def run_tasks(
    client: Client,
    jobs: Iterable[Job],
    follow_up: Callable[[Any, dict[str, Any] | TaskFailure], Iterable[Job]] = lambda tag, result: (),
) -> Iterator[tuple[Any, dict[str, Any] | TaskFailure]]:
    """Submit ``(tag, config, seed, wiring_seed)`` jobs and yield ``(tag, result)`` as each finishes.

    After the caller has taken a result, ``follow_up(tag, result)`` may return more jobs, which
    are submitted at once (an adaptive search decides its next points this way); the iteration
    ends when nothing is left in flight. Tasks carry ``pure=False`` so that repeated submissions
    are never merged. A point whose worker died is rerun elsewhere by the scheduler (at most
    ``execution.cluster.max_tries`` tries, its ``allowed-failures``); it is yielded once, after the
    try that finished it. Results come back in completion order.
    """
    futures: dict[Any, Any] = {}  # dask future -> tag
    finished = as_completed()

    def submit(batch: Iterable[Job]) -> None:
        for tag, config, seed, wiring_seed in batch:
            future = client.submit(simulate_task, config, seed, wiring_seed, pure=False)
            futures[future] = tag
            finished.add(future)

    submit(jobs)
    try:
        for future in finished:
            tag = futures.pop(future)
            try:
                result = future.result()
            except KilledWorker as exc:  # workers died on every try: a crash or memory exhaustion
                result = TaskFailure(f"worker lost: the point took down a worker on each of its "
                                     f"{exc.allowed_failures + 1} tries (a crash or memory exhaustion?)")
            except Exception as exc:  # a failed point, not a dead sweep
                result = TaskFailure(f"worker lost: {type(exc).__name__}: {exc}")
            yield tag, result
            submit(follow_up(tag, result))
    finally:
        for future in futures:
            future.cancel()
