"""Run points on Dask distributed: a local cluster by default, or an existing scheduler.

Each point is one Dask task that returns its results to the client process (the single
writer). A task never raises for a simulation error: it returns a :class:`TaskFailure` so the
writer can record the error text; a worker that dies (segfault, out of memory) surfaces as an
exception from ``Future.result`` and is recorded the same way.
"""

from __future__ import annotations

import contextlib
import traceback
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any

from dask.distributed import Client, LocalCluster, WorkerPlugin, as_completed

from sweeps.errors import CapsweepError


@dataclass(frozen=True)
class TaskFailure:
    """What a task returns instead of results when its point failed."""

    error: str


def simulate_task(config: dict[str, Any], seed: int, wiring_seed: int) -> dict[str, Any] | TaskFailure:
    """Worker-side entry: run one point (and its prescreen if asked), exceptions become a TaskFailure."""
    from brian2 import BrianLogger

    from runners.point import run_point

    BrianLogger.log_level_error()
    try:
        result = run_point(config, seed, wiring_seed=wiring_seed)
    except Exception as exc:  # noqa: BLE001 - every failure is recorded, none may kill the sweep
        summary = f"{type(exc).__name__}: {exc}"
        return TaskFailure(summary + "\n" + traceback.format_exc(limit=6))
    if config["execution"]["prescreen"]:
        from runners.theory import predict

        result["predicted_outcome"] = predict(config).outcome
    return result


class ImportBrian2(WorkerPlugin):
    """Import Brian2 in each worker's main thread at start-up.

    Brian2 installs a SIGINT handler when first imported, which Python allows only in the main
    thread; tasks run in a worker's executor thread, so the import must happen here first.
    """

    name = "capsweep-import-brian2"

    def setup(self, worker: Any) -> None:
        import brian2  # noqa: F401


@contextlib.contextmanager
def dask_client(workers: int, scheduler: str = "") -> Iterator[Client]:
    """A Dask client: attached to ``scheduler`` if given, else on a fresh LocalCluster.

    The local cluster runs ``workers`` processes with one thread each (Brian2 simulations are
    single-threaded and hold the GIL, so processes, not threads, give parallelism).
    """
    if scheduler:
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as exc:
            raise CapsweepError(
                f"cannot reach the Dask scheduler at {scheduler!r} ({exc}); check the address "
                "(e.g. tcp://host:8786) or omit --scheduler to start a local cluster"
            ) from None
        with client:
            client.register_plugin(ImportBrian2())
            yield client
        return
    with LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0",
        silence_logs=50,
    ) as cluster, Client(cluster) as client:
        client.register_plugin(ImportBrian2())
        yield client


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
            except Exception as exc:  # noqa: BLE001 - a dead worker is a failed point, not a dead sweep
                result = TaskFailure(f"worker lost: {type(exc).__name__}: {exc}")
            yield tag, result
    finally:
        for future in futures:
            future.cancel()
