"""Run a sweep: the orchestration behind ``capsweep run``.

It expands the sweep, gets its Dask client (:mod:`capsweep.sweeps.dispatch`) and its store
(:mod:`capsweep.sweeps.identity`), holds the store's lock, runs every point not yet done (or a count
search, :mod:`capsweep.sweeps.search`) and writes each result as it arrives. It never prints: it reports
through an ``on_event`` callback that receives :class:`Progress` snapshots.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..flags import DONE, FAILED, STATUSES, UNNEEDED
from ..locks import store_lock
from ..results_schema.durable import check_new_store
from ..runners.task import TaskFailure, simulate_task
from .dispatch import EarlyClient, Job, early_client, point_jobs, run_tasks, submission_sequence
from .expand import expand
from .identity import Point, open_or_create
from .search import condition_key, plan_search
from .sweepfile import Sweep, load_sweep

if TYPE_CHECKING:
    from distributed import Client

    from ..results_schema.store import ResultStore


@dataclass
class Progress:
    """Where a run stands; passed to the ``on_event`` callback after every change."""

    total: int  # points in the grid
    to_run: int  # points this run submits
    already_done: int  # points done before this run started
    finished: int = 0  # points this run has stored (done or failed)
    failed: int = 0
    unneeded: int = 0  # points an adaptive search decided without (they leave to_run)
    outcomes: dict[str, int] = field(default_factory=dict)
    engines: dict[str, int] = field(default_factory=dict)  # engine that actually ran each point
    dashboard: str = ""
    engine: str = ""  # engine the run asked for
    started_at: float = field(default_factory=time.monotonic)
    last: str = ""  # description of the last stored point
    worker_count: Callable[[], int] = lambda: 0  # Dask workers connected now (asked live: batch jobs come and go)

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
    cluster: dict[str, Any] = field(default_factory=dict)  # [execution.cluster] entries by leaf name, e.g. kind


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
    execution = points[0].config["execution"]
    with early_client(execution, options.workers, options.scheduler, options.dashboard, options.cluster) as dask:
        if not Path(sweep.store).exists():
            check_new_store(Path(sweep.store))
            dask.start()
        store = open_or_create(sweep, points)
        with store_lock(sweep.store), store:  # closing the store writes its last batch
            store.tidy()
            todo = pending(points, store, options.retry_failed)
            progress = Progress(total=len(points), to_run=len(todo), already_done=len(points) - len(todo))
            if todo and sweep.search is not None:
                _execute_search(dask, sweep, points, store, options, progress, on_event)
            elif todo:
                _execute(dask, todo, store, options, progress, on_event)
            on_event(progress)
    return progress


def pending(points: list[Point], store: ResultStore, retry_failed: bool) -> list[Point]:
    """Points still to run: not done, not unneeded, and not failed unless ``retry_failed``."""
    status = store.status()
    skip = {DONE, UNNEEDED} if retry_failed else {DONE, UNNEEDED, FAILED}
    return [p for p in points if STATUSES[int(status[p.index])] not in skip]


def _execute(
    dask: EarlyClient,
    todo: list[Point],
    store: ResultStore,
    options: RunOptions,
    progress: Progress,
    on_event: Callable[[Progress], None],
) -> None:
    jobs = submission_sequence(point_jobs(todo, options.engine, options.prescreen))
    client = _started(dask, todo, options, progress, on_event)
    for point, result in run_tasks(client, simulate_task, jobs):
        _store_result(store, point, result, progress)
        on_event(progress)


def _started(dask: EarlyClient, todo: list[Point], options: RunOptions, progress: Progress,
             on_event: Callable[[Progress], None]) -> Client:
    """The Dask client, once started; reports the engine and dashboard first."""
    progress.engine = options.engine or todo[0].config["execution"]["engine"]
    progress.worker_count = dask.worker_count
    client = dask.client()
    progress.dashboard = client.dashboard_link if dask.has_dashboard else ""
    on_event(progress)
    return client


def _execute_search(dask: EarlyClient, sweep: Sweep, points: list[Point], store: ResultStore, options: RunOptions,
                    progress: Progress, on_event: Callable[[Progress], None]) -> None:
    """Run a count search (``capsweep.sweeps.search``): submit each condition's next probe as verdicts arrive."""
    assert sweep.search is not None
    count_pos = [a.name for a in sweep.axes].index(sweep.search.axis)
    client = _started(dask, points, options, progress, on_event)
    starts = search_starts(sweep, points, count_pos, client)
    search = plan_search(points, count_pos, starts, sweep.search.method, store.status(),
                         store.scalar_values("outcome"), store.scalar_values("recalled_count"),
                         store.scalar_values("stuck_count"), options.retry_failed)

    def advance(keys: list[tuple[int, ...]] | None = None) -> list[Job]:
        """The jobs the search wants next (in the conditions ``keys``, default all); points decided without marked."""
        wanted, unneeded = search.advance(keys)
        _mark_unneeded(store, unneeded, progress)
        return point_jobs(wanted, options.engine, options.prescreen)

    def follow_up(point: Point, result: Any) -> list[Job]:
        return advance([search.record_result(point, None if isinstance(result, TaskFailure) else result)])

    first = advance()
    on_event(progress)
    for point, result in run_tasks(client, simulate_task, first, follow_up):
        _store_result(store, point, result, progress)
        on_event(progress)


def _mark_unneeded(store: ResultStore, points: list[Point], progress: Progress) -> None:
    for point in points:
        store.mark_unneeded(point.index)
    progress.unneeded += len(points)


def search_starts(sweep: Sweep, points: list[Point], count_pos: int, client: Client) -> dict[tuple[int, ...], int]:
    """Count index each condition's search probes first: the sweep's start, or the prescreen's stability bound."""
    assert sweep.search is not None
    counts = list(sweep.axes[count_pos].values)
    if sweep.search.start is not None:
        return {condition_key(p.index, count_pos): counts.index(sweep.search.start) for p in points}
    from .prescreen import stability_bounds

    bounds = stability_bounds(client, points, count_pos)
    return {key: min(max(bound - counts[0], 0), len(counts) - 1) for key, bound in bounds.items()}


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
