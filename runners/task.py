"""What a Dask worker runs for capsweep: the point task, the prediction task, and the worker's preparation.

This is the worker side only; creating clients and clusters, submitting tasks and following them is
:mod:`capsweep.sweeps.dispatch`. A task never raises for a failure of its point: it returns a
:class:`TaskFailure` with the error text, so the one writing process can record it and the sweep goes on.
"""

from __future__ import annotations

import atexit
import functools
import os
import signal
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

from dask.distributed import Status, WorkerPlugin

T = TypeVar("T")

WORKER_PRELOAD = "capsweep.runners.task"
"""Preloaded by every worker before it registers: :func:`dask_setup` runs in the worker's main thread."""


@dataclass(frozen=True)
class TaskFailure:
    """What a task returns instead of its result when its point failed."""

    error: str


def _guarded(work: Callable[[], T]) -> T | TaskFailure:
    """``work()``, or a TaskFailure holding the exception and the last frames of its traceback."""
    try:
        return work()
    except Exception as exc:  # every failure is recorded, none may kill the sweep
        return TaskFailure(f"{type(exc).__name__}: {exc}\n{traceback.format_exc(limit=6)}")


def run_parcel(task: Callable[..., T], arguments: list[tuple[Any, ...]]) -> list[tuple[T | TaskFailure, float]]:
    """Run ``task(*args)`` for each of ``arguments`` in turn (a parcel of short points in one Dask task): each result,
    a TaskFailure for one that raised, with its wall time on this worker in seconds."""
    timed = []
    for args in arguments:
        start = time.perf_counter()
        result = _guarded(functools.partial(task, *args))
        timed.append((result, time.perf_counter() - start))
    return timed


def simulate_task(config: dict[str, Any], seed: int, wiring_seed: int) -> dict[str, Any] | TaskFailure:
    """Run one point (and its prescreen prediction if ``execution.prescreen``): its store results, or a TaskFailure."""
    from brian2 import BrianLogger

    BrianLogger.log_level_error()
    return _guarded(lambda: _simulate(config, seed, wiring_seed))


def _simulate(config: dict[str, Any], seed: int, wiring_seed: int) -> dict[str, Any]:
    from .point import run_point

    result = run_point(config, seed, wiring_seed=wiring_seed)
    if config["execution"]["prescreen"]:
        result["predicted_outcome"] = prediction_row(config)["predicted_outcome"]
    return result


def predict_task(config: dict[str, Any]) -> dict[str, Any] | TaskFailure:
    """The prescreen's prediction of one point as a table row (:func:`prediction_row`), or a TaskFailure."""
    return _guarded(lambda: prediction_row(config))


def prediction_row(config: dict[str, Any]) -> dict[str, Any]:
    """The prescreen's prediction of one point (:func:`capsweep.runners.theory.prediction.predict`) as a table row."""
    from .theory.prediction import predict

    p = predict(config)
    return {
        "predicted_outcome": p.outcome,
        "predicted_stable": p.stable,
        "runaway_chance": p.runaway_chance,
        "outside_calibration": p.outside_calibration,
        "recalled_count": p.recalled_count,
        "recall_state_exists": p.recall_state_exists,
        "recall_state_stable": p.recall_state_stable,
        "background_rate_hz": p.background_rate_hz,
        "runaway_threshold_hz": p.runaway_threshold_hz,
        "runaway_onset_s": p.runaway_onset_s,
        "peak_exc_hz": p.peak_exc_hz,
        "end_within_weight": p.end_within_weight,
        "end_i_to_members": p.end_i_to_members,
        "reasons": p.reasons,
    }


def dask_setup(worker: Any) -> None:
    """Dask's preload hook, in the worker's main thread before it registers: import Brian2 (see PrepareWorker),
    then ignore SIGINT.

    Ctrl-C in the terminal reaches every process of the foreground group; the ``capsweep run`` process handles
    it and closes the cluster, so a worker has nothing to do on it (and would print a traceback). A local
    cluster's workers ignore it from their first import on (``capsweep.sweeps.console``); Brian2's import
    installs its own handler, which is replaced here.
    """
    from . import model  # noqa: F401  (imports Brian2)

    signal.signal(signal.SIGINT, signal.SIG_IGN)


class PrepareWorker(WorkerPlugin):
    """Ready a worker for simulations at start-up, and let it leave quickly once closed.

    - Brian2 and the point runner are imported in the worker's main thread: Brian2 installs a
      SIGINT handler when first imported, which Python allows only in the main thread (tasks run
      in an executor thread). Workers of the clusters capsweep starts have them already: they preload
      :data:`WORKER_PRELOAD` (:func:`dask_setup` imports the Brian2 network, imported by every engine)
      before they register, which spares the round trip of a plugin that still has work to do.
    - With ``leave_fast`` (workers of capsweep's own clusters), a worker process closed cleanly
      exits without interpreter teardown, which takes about 0.5 s with Brian2 loaded and has
      nothing left to save. Workers of a cluster someone else runs keep their normal exit.
    """

    name = "capsweep-prepare-worker"

    def __init__(self, leave_fast: bool = False) -> None:
        self.leave_fast = leave_fast

    def setup(self, worker: Any) -> None:
        from . import model  # noqa: F401  (imports Brian2)

    def teardown(self, worker: Any) -> None:
        if self.leave_fast and worker.status == Status.closing:
            atexit.register(os._exit, 0)
