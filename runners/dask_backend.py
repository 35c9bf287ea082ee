"""Run points on Dask distributed: a local cluster by default, or an existing scheduler.

Each point is one Dask task that returns its results to the client process (the single
writer). A task never raises for a simulation error: it returns a :class:`TaskFailure` so the
writer can record the error text; a worker that dies (segfault, out of memory) surfaces as an
exception from ``Future.result`` and is recorded the same way.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import traceback
from collections.abc import Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import dask
from dask.distributed import Client, LocalCluster, Status, WorkerPlugin, as_completed

from ..errors import CapsweepError


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


LOCAL_CLUSTER_SETTINGS = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.scheduler.work-stealing": False,
    "distributed.scheduler.worker-saturation": 1.0,
}
"""Dask settings of the local cluster: no profiler, slower housekeeping, one task per worker.

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
"""


@contextlib.contextmanager
def dask_client(workers: int, scheduler: str = "", dashboard: bool = False) -> Iterator[Client]:
    """A Dask client: attached to ``scheduler`` if given, else on a fresh LocalCluster.

    The local cluster runs ``workers`` processes with one thread each (Brian2 simulations are
    single-threaded and hold the GIL, so processes, not threads, give parallelism). The client is
    closed, not exited as a context manager: ``EarlyClient`` opens it in another thread, and
    ``Client.__exit__`` resets a context variable that only the opening thread may reset.
    """
    if scheduler:
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
        return
    with dask.config.set(LOCAL_CLUSTER_SETTINGS), LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0" if dashboard else None,
        silence_logs=50, preload=["capsweep.runners.model"],
    ) as cluster, contextlib.closing(Client(cluster)) as client:
        client.register_plugin(PrepareWorker(leave_fast=True))
        yield client


class EarlyClient:
    """A :func:`dask_client` that can start in a background thread before it is needed.

    Worker processes take seconds to start and import Brian2; ``start()`` begins that while the
    caller does its own preparation (imports, store layout), and ``client()`` waits for it
    (starting it first if ``start()`` was not called). Leaving the ``with`` block closes the
    client and cluster, after waiting for a start still in progress.
    """

    def __init__(self, workers: int, scheduler: str = "", dashboard: bool = False) -> None:
        self._context = dask_client(workers, scheduler, dashboard)
        self.has_dashboard = dashboard or bool(scheduler)  # a running scheduler usually serves one
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

    def __enter__(self) -> EarlyClient:
        return self

    def __exit__(self, *exc: object) -> None:
        if self._started is not None:
            with contextlib.suppress(Exception):
                self._started.result()
        self._pool.shutdown()
        self._stack.close()


def run_tasks(
    client: Client, jobs: Iterable[tuple[Any, dict[str, Any], int, int]]
) -> Iterator[tuple[Any, dict[str, Any] | TaskFailure]]:
    """Submit ``(tag, config, seed, wiring_seed)`` jobs and yield ``(tag, result)`` as each finishes.

    Tasks carry ``pure=False`` so that repeated submissions are never merged, and one retry is
    allowed for a worker that died. Results come back in completion order.
    """
    futures = {}
    for tag, config, seed, wiring_seed in jobs:
        future = client.submit(simulate_task, config, seed, wiring_seed, pure=False, retries=1)
        futures[future] = tag
    try:
        for future in as_completed(futures):
            tag = futures.pop(future)
            try:
                result = future.result()
            except Exception as exc:  # a dead worker is a failed point, not a dead sweep
                result = TaskFailure(f"worker lost: {type(exc).__name__}: {exc}")
            yield tag, result
    finally:
        for future in futures:
            future.cancel()
