"""Run a sweep: open or create its store, lock it, run every point not yet done, write as they arrive.

This is the library function behind ``capsweep run``. It never prints: it reports through an
``on_event`` callback that receives :class:`Progress` snapshots.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..engines import engine
from ..flags import STATUSES
from ..registry import overlay, with_execution
from ..results_schema.definitions import DEFINITIONS
from ..results_schema.lock import store_lock
from ..runners.builds import build_key
from ..runners.dask_backend import EarlyClient, TaskFailure, run_tasks
from ..runners.protocol import total_duration_s
from .expand import Point, expand, fingerprint, grid_spec, id_and_seed_arrays
from .sweepfile import Sweep, load_sweep

if TYPE_CHECKING:
    from ..results_schema.store import ResultStore

DONE = STATUSES.index("done")
FAILED = STATUSES.index("failed")


@dataclass
class Progress:
    """Where a run stands; passed to the ``on_event`` callback after every change."""

    total: int  # points in the grid
    to_run: int  # points this run submits
    already_done: int  # points done before this run started
    finished: int = 0  # points this run has stored (done or failed)
    failed: int = 0
    outcomes: dict[str, int] = field(default_factory=dict)
    engines: dict[str, int] = field(default_factory=dict)  # engine that actually ran each point
    dashboard: str = ""
    engine: str = ""  # engine the run asked for
    started_at: float = field(default_factory=time.monotonic)
    last: str = ""  # description of the last stored point

    @property
    def elapsed_s(self) -> float:
        """Wall time since the run started, in seconds."""
        return time.monotonic() - self.started_at


@dataclass(frozen=True)
class RunOptions:
    """Command-line overrides of the sweep file's [execution] table."""

    store: Path | None = None
    workers: int | None = None
    scheduler: str | None = None
    dashboard: bool | None = None
    engine: str | None = None
    prescreen: bool | None = None
    retry_failed: bool = False


def run_sweep(
    sweep_file: str | Path,
    options: RunOptions = RunOptions(),
    on_event: Callable[[Progress], None] = lambda p: None,
) -> Progress:
    """Run the points of ``sweep_file`` whose status is not done; return the final Progress.

    For a new store every point will run, so the Dask workers start in the background while
    the store is laid out (they take seconds to start and import Brian2); an existing store's
    status is read first, and workers start only if a point is left to run.
    """
    sweep = load_sweep(sweep_file, store=options.store)
    points = expand(sweep)
    with EarlyClient(**_cluster_settings(points[0].config["execution"], options)) as dask:
        if not Path(sweep.store).exists():
            dask.start()
        store = open_or_create(sweep, points)
        with store_lock(sweep.store):
            todo = pending(points, store, options.retry_failed)
            progress = Progress(total=len(points), to_run=len(todo), already_done=len(points) - len(todo))
            if todo:
                _execute(dask, todo, store, options, progress, on_event)
            on_event(progress)
    return progress


def _cluster_settings(execution: dict[str, Any], options: RunOptions) -> dict[str, Any]:
    """Worker count, scheduler address and dashboard switch: the command line over [execution]."""
    chosen = {"workers": options.workers, "scheduler": options.scheduler, "dashboard": options.dashboard}
    return {name: overlay(execution, chosen)[name] for name in chosen}


def open_or_create(sweep: Sweep, points: list[Point]) -> ResultStore:
    """Open the sweep's store (refusing one built from another grid) or lay out a new one."""
    # Imported here, not at the top: Zarr takes about 0.4 s to import, which run_sweep spends
    # while the Dask workers start.
    from ..results_schema.store import ResultStore, create_store

    if not Path(sweep.store).exists():
        ids, seeds = id_and_seed_arrays(sweep, points)
        create_store(sweep.store, grid_spec(sweep, points, _root_attrs(sweep)), ids, seeds)
    return ResultStore.open(sweep.store, fingerprint=fingerprint(sweep))


def _root_attrs(sweep: Sweep) -> dict[str, Any]:
    return {
        "sweep_name": sweep.name,
        "sweep_file": str(sweep.source),
        "sweep_text": sweep.text,
        "sweep_sha256": sweep.text_sha256,
        "replicates": sweep.replicates,
        "base_seed": sweep.base_seed,
        "created_by": "capsweep run",
        "metric_definitions": DEFINITIONS,
    }


def pending(points: list[Point], store: ResultStore, retry_failed: bool) -> list[Point]:
    """Points still to run: not done, and not failed unless ``retry_failed``."""
    status = store.status()
    skip = {DONE} if retry_failed else {DONE, FAILED}
    return [p for p in points if int(status[p.index]) not in skip]


def _execute(
    dask: EarlyClient,
    todo: list[Point],
    store: ResultStore,
    options: RunOptions,
    progress: Progress,
    on_event: Callable[[Progress], None],
) -> None:
    progress.engine = options.engine or todo[0].config["execution"]["engine"]
    jobs = [(p, with_execution(p.config, engine=options.engine, prescreen=options.prescreen), p.seed, p.wiring_seed)
            for p in todo]
    jobs.sort(key=lambda job: submission_order(job[1]))
    client = dask.client()
    progress.dashboard = client.dashboard_link if dask.has_dashboard else ""
    on_event(progress)
    for point, result in run_tasks(client, jobs):
        _store_result(store, point, result, progress)
        on_event(progress)


def submission_order(config: dict[str, Any]) -> tuple[str, float]:
    """Sort key of a job: its compiled-build key ('' unless standalone), then longest planned run first.

    Grouping by build lets each worker rerun one compiled binary many times before it has to
    switch; longest-first within a group (Dask hands out tasks in submission order) leaves the
    short points for the end, so the workers finish close together.
    """
    group = build_key(config) if engine(config["execution"]["engine"]).reuses_builds else ""
    return group, -total_duration_s(config)


def _store_result(store: ResultStore, point: Point, result: Any, progress: Progress) -> None:
    progress.finished += 1
    where = ", ".join(f"{k}={v}" for k, v in point.labels.items())
    if isinstance(result, TaskFailure):
        store.write_failure(point.index, result.error)
        progress.failed += 1
        progress.last = f"{where}: failed ({result.error.splitlines()[0]})"
        return
    store.write_point(point.index, result)
    outcome, engine = str(result["outcome"]), str(result["engine"])
    progress.outcomes[outcome] = progress.outcomes.get(outcome, 0) + 1
    progress.engines[engine] = progress.engines.get(engine, 0) + 1
    progress.last = f"{where}: {outcome}"
