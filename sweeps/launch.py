"""Run a sweep: the orchestration behind ``capsweep run``.

It lays out the sweep's grid (:class:`~capsweep.sweeps.expand.Grid`: points are made as they are
submitted), gets its Dask client (:mod:`capsweep.sweeps.dispatch`) and its store
(:mod:`capsweep.sweeps.identity`), holds the store's lock, runs every point not yet done (or a count
search, :mod:`capsweep.sweeps.search`), a bounded window of them in flight, and writes each result as it
arrives. It never prints: it reports
through an ``on_event`` callback that receives :class:`Progress` snapshots.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Hashable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..flags import DONE, FAILED, STATUSES, UNNEEDED
from ..locks import store_lock
from ..results_schema.durable import make_store_folder
from ..runners.notices import COMPILE_TOPIC
from ..runners.task import TaskFailure, simulate_task
from .dispatch import EarlyClient, Job, early_client, point_jobs, run_tasks, submission_sequence, task_window
from .expand import Grid
from .identity import open_or_create
from .ids import Point
from .search import plan_search
from .sweepfile import load_sweep

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
    threads: int = 1  # execution.threads the run asked for
    started_at: float = field(default_factory=time.monotonic)
    last: str = ""  # description of the last stored point
    worker_count: Callable[[], int] = lambda: 0  # Dask workers connected now (asked live: batch jobs come and go)
    failed_before: int = 0  # failed points stored before this run and not run again (no --retry-failed)
    store: Path = Path()
    compiling: dict[str, float] = field(default_factory=dict)  # build key -> expected first compile (s), while it lasts
    searches_open: int = 0  # conditions whose count search has not closed: how many of to_run will run is not known

    @property
    def planned(self) -> int:
        """Points this run submits: those to run, less those a count search decided without (at most, while searches
        are open)."""
        return self.to_run - self.unneeded

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
    task: Callable[..., Any] = simulate_task,
) -> Progress:
    """Run the points of ``sweep_file`` whose status is not done; return the final Progress.

    For a new store every point will run, so the Dask workers start in the background while
    the store is laid out (they take seconds to start and import Brian2); an existing store's
    status is read first, and workers start only if a point is left to run. Each point runs
    ``task(config, seed, wiring_seed)`` on a worker (``simulate_task``; a benchmark times the
    orchestration alone with a task that does not simulate). Points are made as they are
    submitted, a bounded window of them in flight (:func:`~capsweep.sweeps.dispatch.run_tasks`).
    """
    sweep = load_sweep(sweep_file, store=options.store)
    grid = Grid(sweep)
    with early_client(grid.execution, options.workers, options.scheduler, options.dashboard,
                      options.cluster) as dask:
        if not Path(sweep.store).exists():
            make_store_folder(Path(sweep.store))
            dask.start()
        store, grid = open_or_create(grid)
        with store_lock(sweep.store), store:  # closing the store writes its last batch
            store.tidy()
            todo = pending(store, options.retry_failed)
            progress = Progress(total=grid.n_points, to_run=todo.size, already_done=grid.n_points - todo.size,
                                failed_before=pending(store, True).size - todo.size, store=sweep.store)
            if todo.size and sweep.search is not None:
                _execute_search(dask, grid, store, options, progress, on_event, task)
            elif todo.size:
                _execute(dask, grid, todo, store, options, progress, on_event, task)
            workers = dask.worker_count()
            progress.worker_count = lambda: workers  # the count at the end, kept once the cluster is closed
            on_event(progress)
    return progress


def pending(store: ResultStore, retry_failed: bool) -> np.ndarray:
    """Flat indices (C order) of the points still to run: not done, not unneeded, and not failed unless
    ``retry_failed``."""
    skip = [STATUSES.index(s) for s in ((DONE, UNNEEDED) if retry_failed else (DONE, UNNEEDED, FAILED))]
    return np.flatnonzero(~np.isin(store.status().ravel(), skip))


def _execute(dask: EarlyClient, grid: Grid, todo: np.ndarray, store: ResultStore, options: RunOptions,
             progress: Progress, on_event: Callable[[Progress], None], task: Callable[..., Any]) -> None:
    jobs = point_jobs(grid.points(submission_sequence(grid, todo, options.engine)), options.engine,
                      options.prescreen)
    client = _started(dask, grid, options, progress, on_event)
    for point, result in run_tasks(client, task, jobs, window=task_window(dask.slots()), group=cost_group(grid)):
        _store_result(store, point, result, progress)
        on_event(progress)


def _started(dask: EarlyClient, grid: Grid, options: RunOptions, progress: Progress,
             on_event: Callable[[Progress], None]) -> Client:
    """The Dask client, once started; reports the engine and dashboard first."""
    progress.engine = options.engine or grid.execution["engine"]
    progress.threads = grid.execution["threads"]
    progress.worker_count = dask.worker_count
    client = dask.client()
    client.subscribe_topic(COMPILE_TOPIC, lambda event: _compile_notice(progress, event[1]))
    progress.dashboard = client.dashboard_link if dask.has_dashboard else ""
    on_event(progress)
    return client


def _compile_notice(progress: Progress, message: dict[str, Any]) -> None:
    """Keep a build's first compile in ``progress.compiling`` while it lasts (runs in the client's event loop)."""
    if message["finished"]:
        progress.compiling.pop(message["build"], None)
    else:
        progress.compiling[message["build"]] = float(message["expected_s"])


def _execute_search(dask: EarlyClient, grid: Grid, store: ResultStore, options: RunOptions, progress: Progress,
                    on_event: Callable[[Progress], None], task: Callable[..., Any]) -> None:
    """Run a count search (``capsweep.sweeps.search``): submit each condition's next probe as verdicts arrive."""
    sweep = grid.sweep
    assert sweep.search is not None
    count_pos = [a.name for a in sweep.axes].index(sweep.search.axis)
    client = _started(dask, grid, options, progress, on_event)
    search = plan_search(sweep.axes[count_pos].values, count_pos, search_starts(grid, count_pos, client),
                         sweep.search.method, store.status(), store.scalar_values("outcome"),
                         store.scalar_values("recalled_count"), store.scalar_values("stuck_count"),
                         options.retry_failed, sweep.search.replicate_rule)

    def advance(keys: list[tuple[int, ...]] | None = None) -> Iterator[Job]:
        """The jobs the search wants next (in the conditions ``keys``, default all); points decided without marked."""
        wanted, unneeded = search.advance(keys)
        store.mark_unneeded(unneeded)
        progress.unneeded += len(unneeded)
        progress.searches_open = len(search.conditions) - len(search.closed)
        return point_jobs(grid.points(wanted), options.engine, options.prescreen)

    def follow_up(point: Point, result: Any) -> Iterator[Job]:
        return advance([search.record_result(point.index, None if isinstance(result, TaskFailure) else result)])

    first = advance()
    on_event(progress)
    for point, result in run_tasks(client, task, first, follow_up, window=task_window(dask.slots()),
                                   group=cost_group(grid)):
        _store_result(store, point, result, progress)
        on_event(progress)


def search_starts(grid: Grid, count_pos: int, client: Client) -> dict[tuple[int, ...], int]:
    """Count index each condition's search probes first: the sweep's start, or the prescreen's stability bound."""
    search = grid.sweep.search
    assert search is not None
    counts = list(grid.sweep.axes[count_pos].values)
    if search.start is not None:
        conditions = grid.cells[:count_pos] + grid.cells[count_pos + 1:]
        return dict.fromkeys(np.ndindex(conditions), counts.index(search.start))
    from .prescreen import grid_points, stability_bounds

    bounds = stability_bounds(client, grid_points(grid.sweep), count_pos)
    return {key: min(max(bound - counts[0], 0), len(counts) - 1) for key, bound in bounds.items()}


def cost_group(grid: Grid) -> Callable[[Point], Hashable]:
    """A point's group of points expected to cost the same (:meth:`~capsweep.sweeps.expand.Grid.cost_groups`): short
    points of one group share Dask tasks (:func:`~capsweep.sweeps.dispatch.run_tasks`)."""
    groups = grid.cost_groups()
    return lambda point: groups[point.index[:-1]]


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
