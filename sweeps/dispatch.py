"""The client side of Dask: start the cluster a sweep asks for, submit its tasks, and follow them as they finish.

Where the workers run is the ``[execution.cluster]`` table (:mod:`capsweep.clusters` lists the kinds):
worker processes here, a running scheduler, or batch jobs through dask-jobqueue. ``capsweep run``,
``capsweep prescreen`` and a count search's predictions all get their client from :func:`early_client`,
with the sweep file's settings under the command line's, and run their tasks through :func:`run_tasks`; point
tasks go in the order of :func:`submission_sequence` (grouped by compiled build, longest first).
What a worker runs is :mod:`capsweep.runners.task`.

Each task returns its result to this process (the single writer). A worker that dies mid-task (its
batch job cancelled, the process killed, memory exhausted) has its task rerun on another worker by the
scheduler; a task whose workers died ``execution.cluster.max_tries`` times comes back as a
:class:`~capsweep.runners.task.TaskFailure`, while the sweep goes on.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import shlex
import signal
import sys
import threading
from collections import deque
from collections.abc import Callable, Hashable, Iterable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from types import ModuleType
from typing import TYPE_CHECKING, Any

import dask
import numpy as np
from dask.distributed import Client, KilledWorker, LocalCluster, as_completed

from ..clusters import SCHEDULER, cluster_kind
from ..errors import CapsweepError, ConfigError
from ..registry import BY_PATH, lookup, overlay, with_execution
from ..runners.builds import BUILD_DIR_ENV, build_root
from ..runners.task import WORKER_PRELOAD, PrepareWorker, TaskFailure, run_parcel
from .ids import Point

if TYPE_CHECKING:
    from .expand import Grid

Job = tuple[Any, tuple[Any, ...]]
"""A task to run: (tag the caller gets back, the task function's arguments)."""

CLUSTER_SETTINGS = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.scheduler.work-stealing": False,
    "distributed.scheduler.worker-saturation": 1.0,
    "distributed.scheduler.default-task-durations.run_parcel": "10m",
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
- Until a task has finished, the scheduler guesses a task (a parcel, :func:`run_tasks`: one point until
  points have been measured) takes 10 minutes (its default guess for an unknown task is 0.5 s): adaptive
  scaling of batch jobs then asks for a worker per remaining point (up to ``execution.cluster.max_jobs``)
  from the start instead of one.
"""


WORKER_DEATH_TIMEOUT_S = 60.0
"""Longest time (s) a batch worker waits for its scheduler (the ``capsweep run`` process) before its job ends.

It bounds what a job costs once its client is gone: a worker whose scheduler dies mid-sweep stops within
seconds (its connection breaks), but a job still queued then starts later, finds no scheduler, and ends after
this long. It also bounds a worker's start (Brian2's import included) on a loaded node. dask-jobqueue's default
is the same 60 s; set here, a user's Dask configuration cannot lift the bound (e.g. to no timeout at all)."""


QUIET_HTTP_ADDRESS = "127.0.0.1:0"
"""Where a local scheduler without dashboard serves its small HTTP endpoint (health, metrics): any free port on
this host. Dask's default, port 8787, warns whenever another Dask cluster on the machine holds it."""


def cluster_table(cluster: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The ``[execution.cluster]`` table: registry defaults overlaid with ``cluster`` (leaf names, checked values)."""
    prefix = "execution.cluster."
    table = {path.removeprefix(prefix): key.default for path, key in BY_PATH.items() if path.startswith(prefix)}
    return {**table, **(cluster or {})}


def early_client(execution: Mapping[str, Any], workers: int | None = None, scheduler: str | None = None,
                 dashboard: bool | None = None, cluster: Mapping[str, Any] | None = None) -> EarlyClient:
    """The client of a sweep whose ``[execution]`` table is ``execution``, with command-line overrides.

    ``workers``, ``scheduler`` and ``dashboard`` replace the sweep file's when given; each ``cluster``
    entry (leaf name of ``[execution.cluster]``, e.g. ``kind``) is checked against the registry and
    replaces the sweep file's.
    """
    where = "the command line (--cluster/--cluster-set)"
    checked = {name: lookup(f"execution.cluster.{name}", where=where).check(value, where=where)
               for name, value in (cluster or {}).items()}
    chosen = overlay(dict(execution), dict(workers=workers, scheduler=scheduler, dashboard=dashboard))
    return EarlyClient(chosen["workers"], chosen["scheduler"], chosen["dashboard"],
                       overlay(execution["cluster"], checked))


@contextlib.contextmanager
def dask_client(workers: int, scheduler: str = "", dashboard: bool = False,
                cluster: Mapping[str, Any] | None = None) -> Iterator[Client]:
    """A Dask client on the cluster that ``cluster`` (the ``[execution.cluster]`` table; default: local) names.

    Kind ``local`` runs ``workers`` processes here with one thread each (Brian2 simulations are
    single-threaded and hold the GIL, so processes, not threads, give parallelism); a ``scheduler``
    address (kind ``local`` or ``scheduler``) attaches to a running scheduler instead; a batch kind
    submits worker jobs, scaled adaptively to the tasks left. The client is closed, not exited as a
    context manager: ``EarlyClient`` opens it in another thread, and ``Client.__exit__`` resets a
    context variable that only the opening thread may reset.
    """
    table = cluster_table(cluster)
    kind = cluster_kind(table["kind"])
    if kind.batch and scheduler:
        raise ConfigError(f"execution.cluster.kind = {kind.name!r} starts its own scheduler; leave "
                          f"execution.scheduler (--scheduler) empty, or use kind {SCHEDULER!r} to attach to "
                          f"{scheduler!r}")
    if kind.batch:
        with _batch_client(kind.name, table, dashboard) as client:
            yield client
    elif scheduler:
        with _attached_client(scheduler) as client:
            yield client
    elif kind.name == SCHEDULER:
        raise ConfigError(f"execution.cluster.kind = {SCHEDULER!r} needs the scheduler's address in "
                          "execution.scheduler or --scheduler (e.g. tcp://host:8786)")
    else:
        with dask.config.set({**CLUSTER_SETTINGS, **_fault_settings(table)}), LocalCluster(
            n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0" if dashboard else None,
            scheduler_kwargs={} if dashboard else {"dashboard_address": QUIET_HTTP_ADDRESS},
            silence_logs=50, preload=[WORKER_PRELOAD],
        ) as local, contextlib.closing(Client(local)) as client:
            client.register_plugin(PrepareWorker(leave_fast=True))
            yield client


def _fault_settings(table: Mapping[str, Any]) -> dict[str, Any]:
    """Scheduler settings from the cluster table: a task is tried on at most ``max_tries`` workers that die."""
    return {"distributed.scheduler.allowed-failures": table["max_tries"] - 1}


@contextlib.contextmanager
def _attached_client(scheduler: str) -> Iterator[Client]:
    """A client of the running scheduler at ``scheduler`` (its own settings decide retries of lost tasks)."""
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
        batch = getattr(jobqueue, cluster_kind(kind).jobqueue)(
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
    root, which must then be on a filesystem every node shares. A worker that loses its scheduler, or
    finds none within :data:`WORKER_DEATH_TIMEOUT_S`, exits and its job ends.
    """
    system = cluster_kind(kind)
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
        "death_timeout": WORKER_DEATH_TIMEOUT_S,
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
    clock = system.walltime(walltime)
    if clock is not None:
        settings["walltime"] = clock
    settings.update({setting: settings[source] for setting, source in system.copies})
    return settings


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
        table = cluster_table(cluster)
        kind = cluster_kind(table["kind"])
        if kind.batch:
            jobqueue_module(kind.name)
        self._planned_slots = table["max_jobs"] * table["cores"] if kind.batch else None if scheduler else workers
        self.has_dashboard = dashboard or (bool(scheduler) and not kind.batch)  # a running one serves one
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

    def slots(self) -> int:
        """Worker threads the cluster has or may grow to: local workers, batch jobs x cores each, or those of an
        attached scheduler's workers now (the client is started first)."""
        if self._planned_slots is not None:
            return int(self._planned_slots)
        return sum(self.client().nthreads().values())

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


MIN_WINDOW = 512
"""Fewest tasks :func:`run_tasks` keeps in flight (more on a cluster with more worker threads: :func:`task_window`)."""

PARCEL_TARGET_S = 1.0
"""Worker time (s) a parcel of short points aims at. Dask costs about 4-6 ms of wall time per task here, 13 ms under
load (a round trip between scheduler and worker; 2-core machine, December 2026): under 2 % of a parcel this long."""

MAX_PARCEL = 32
"""Most points in one parcel: bounds the points in flight to :func:`task_window` x 32 configs (about 2.4 KB each)."""


def task_window(slots: int) -> int:
    """Tasks to keep in flight for ``slots`` worker threads: twice as many (a queued task per thread while each
    runs one), at least :data:`MIN_WINDOW` (batch jobs scale adaptively to the tasks the scheduler sees)."""
    return max(MIN_WINDOW, 2 * slots)


class ParcelSizes:
    """How many jobs of one group go in one task, from the measured worker time of the group's finished jobs.

    A group's jobs go one per task until one has finished; then as many as fill :data:`PARCEL_TARGET_S` at the
    mean of its last 64 measured jobs, at most :data:`MAX_PARCEL`. The mean, not the median: a parcel lasts the sum
    of its jobs, and in a group where most points run away and stop early the median would parcel the full-length
    ones too. Jobs of a group whose mean exceeds half the target, and jobs without a group (``group`` None), run
    alone.
    """

    def __init__(self, group: Callable[[Any], Hashable] | None) -> None:
        self._group = group
        self._seconds: dict[Hashable, deque[float]] = {}

    def group(self, tag: Any) -> Hashable | None:
        """The group of the job tagged ``tag``; None: it runs alone."""
        return None if self._group is None else self._group(tag)

    def size(self, group: Hashable | None) -> int:
        """Jobs of ``group`` to put in the next task."""
        seconds = self._seconds.get(group)
        if group is None or not seconds:
            return 1
        return int(min(MAX_PARCEL, max(1, PARCEL_TARGET_S // max(float(np.mean(seconds)), 1e-6))))

    def record(self, group: Hashable | None, seconds: float) -> None:
        """Note that a job of ``group`` took ``seconds`` of worker time."""
        if group is not None:
            self._seconds.setdefault(group, deque(maxlen=64)).append(seconds)


def run_tasks(
    client: Client,
    task: Callable[..., Any],
    jobs: Iterable[Job],
    follow_up: Callable[[Any, Any], Iterable[Job]] = lambda tag, result: (),
    window: int = MIN_WINDOW,
    group: Callable[[Any], Hashable] | None = None,
) -> Iterator[tuple[Any, Any]]:
    """Submit ``task(*args)`` for each ``(tag, args)`` job and yield ``(tag, result)`` as each finishes.

    At most ``window`` tasks are in flight: ``jobs`` is read lazily, the free places of the window
    filled as earlier results are taken, so the client's memory and the scheduler's load do not grow
    with the sweep. After the caller has taken a result, ``follow_up(tag, result)`` may return more
    jobs, which go before the rest of ``jobs`` (an adaptive search decides its next points this way);
    the iteration ends when nothing is left to submit or in flight. Tasks carry ``pure=False`` so that
    repeated submissions are never merged. A task whose worker died is rerun elsewhere by the
    scheduler (at most ``execution.cluster.max_tries`` tries, its ``allowed-failures``); it is
    yielded once, after the try that finished it, or as a TaskFailure when every try lost its
    worker. Results come back in completion order.

    Short jobs go in parcels: neighbouring jobs of one ``group(tag)`` (points expected to cost the same) share a
    task, as many as :class:`ParcelSizes` says, so that Dask's cost per task is shared too. A parcel whose
    workers all died is split: each of its jobs is tried again alone (so a point that crashes its worker fails
    alone, after taking its parcel down ``max_tries`` times).

    Tasks go to the scheduler in chunks (one ``client.map`` per refill, each a later generation than
    the last, so the scheduler starts them in submission order) and results come back in batches
    (every result finished meanwhile in one gather): one message each way per batch, not per task.
    The window is refilled once an eighth of it is free (or nothing is in flight), so that a chunk
    is not a task or two whenever results trickle in.
    """
    futures: dict[Any, tuple[Hashable | None, list[Job]]] = {}  # dask future -> its parcel's group and jobs
    finished = as_completed()
    source, follow_ups, alone = iter(jobs), deque[Job](), deque[Job]()
    sizes = ParcelSizes(group)
    least = max(1, window // 8)  # fewest free places worth a refill while tasks are in flight
    parcel_task = functools.partial(run_parcel, task)

    def next_job() -> Job | None:
        return follow_ups.popleft() if follow_ups else next(source, None)

    def next_parcel() -> tuple[Hashable | None, list[Job]]:
        """The next job, and the jobs after it while they are of its group, up to the group's parcel size; with
        their group."""
        if alone:
            retried = alone.popleft()
            return sizes.group(retried[0]), [retried]
        first = next_job()
        if first is None:
            return None, []
        parcel, kind = [first], sizes.group(first[0])
        limit = sizes.size(kind)
        while len(parcel) < limit and (job := next_job()) is not None:
            if sizes.group(job[0]) != kind:
                follow_ups.appendleft(job)
                break
            parcel.append(job)
        return kind, parcel

    def refill() -> None:
        if futures and window - len(futures) < least:
            return
        chunk: list[tuple[Hashable | None, list[Job]]] = []
        while len(futures) + len(chunk) < window and (parcel := next_parcel())[1]:
            chunk.append(parcel)
        if chunk:
            submitted = client.map(parcel_task, [[args for _, args in jobs] for _, jobs in chunk], pure=False,
                                   fifo_timeout="0ms")
            futures.update(zip(submitted, chunk))
            finished.update(submitted)

    refill()
    try:
        for batch in finished.batches():
            for future, outcome in zip(batch, _results(client, batch)):
                kind, parcel = futures.pop(future)
                if isinstance(outcome, TaskFailure) and len(parcel) > 1:
                    alone.extend(parcel)  # its workers died: each job is tried alone
                    continue
                timed = [(outcome, None)] if isinstance(outcome, TaskFailure) else outcome
                for (tag, _), (result, seconds) in zip(parcel, timed):
                    if seconds is not None:
                        sizes.record(kind, seconds)
                    yield tag, result
                    follow_ups.extend(follow_up(tag, result))
            refill()
    finally:
        client.cancel(list(futures))


def _results(client: Client, futures: list[Any]) -> list[Any]:
    """The results of finished ``futures``, gathered at once; a TaskFailure for a task that failed or lost its
    workers."""
    done = [f for f in futures if f.status == "finished"]
    try:
        gathered = dict(zip(done, client.gather(done)))
    except Exception:  # a result lost meanwhile: each is asked for on its own below
        gathered = {}
    return [gathered[f] if f in gathered else _result(f) for f in futures]


def _result(future: Any) -> Any:
    """The result of one finished future, or a TaskFailure naming why it has none."""
    try:
        return future.result()
    except KilledWorker as exc:  # workers died on every try: a crash or memory exhaustion
        return TaskFailure(f"worker lost: the point took down a worker on each of its "
                           f"{exc.allowed_failures + 1} tries (a crash or memory exhaustion?)")
    except Exception as exc:  # a failed point, not a dead sweep
        return TaskFailure(f"worker lost: {type(exc).__name__}: {exc}")


def point_jobs(points: Iterable[Point], engine: str | None = None, prescreen: bool | None = None) -> Iterator[Job]:
    """The ``simulate_task`` jobs of ``points`` (made as they are read): (point, (config, seed, wiring seed)), each
    config with the command line's ``engine`` and ``prescreen`` over its ``[execution]`` entries when given."""
    for p in points:
        yield p, (with_execution(p.config, engine=engine, prescreen=prescreen), p.seed, p.wiring_seed)


def submission_sequence(grid: Grid, indices: np.ndarray, engine: str | None = None) -> np.ndarray:
    """The flat point indices ``indices`` of ``grid`` in the order to submit them: one point of every compiled build
    first, then the rest grouped by build, longest planned run first within a build (then in grid order).

    Dask hands out tasks in submission order. Grouping by build lets each worker rerun one compiled
    binary many times before it has to switch; longest-first within a group leaves the short points
    for the end, so the workers finish close together. With several builds (network sizes) the
    first tasks go to different workers, each compiling a different build at the same time (the
    compile lock is per build key) instead of waiting for the one compile of a build its neighbour
    holds. Points of engines without builds keep longest first alone. Build keys and durations are
    computed once per combination of the axes they depend on.
    """
    indices = np.asarray(indices, dtype=np.int64)
    cells = indices // grid.shape[-1]
    names, rank = np.unique(np.asarray(grid.build_keys(engine)).ravel(), return_inverse=True)
    group, duration = rank[cells], np.asarray(grid.durations()).ravel()[cells]
    order = np.lexsort((indices, -duration, group))
    starts = np.flatnonzero(np.diff(group[order], prepend=-1))  # first position of each build in that order
    starts = starts[names[group[order][starts]] != ""]
    leaders = starts[np.argsort(-duration[order][starts], kind="stable")]
    return np.concatenate([indices[order][leaders], np.delete(indices[order], leaders)])
