"""Run a sweep: open or create its store, lock it, run every point not yet done, write as they arrive.

This is the library function behind ``capsweep run``. It never prints: it reports through an
``on_event`` callback that receives :class:`Progress` snapshots.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..axes import Axis
from ..engines import engine
from ..errors import ConfigError, StoreError
from ..flags import STATUSES
from ..locks import store_lock
from ..registry import ImplausibleValue, lookup, overlay, with_execution
from ..results_schema.definitions import DEFINITIONS
from ..runners.builds import build_key
from ..runners.dask_backend import EarlyClient, Job, TaskFailure, run_tasks
from ..runners.protocol import total_duration_s
from .expand import Point, expand, fingerprint, grid_spec, id_and_seed_arrays, identity_config
from .success import MIN_FRACTION, succeeds
from .sweepfile import PRESCREEN_START, CountSearch, Sweep, load_sweep, parse_sweep

if TYPE_CHECKING:
    from distributed import Client

    from ..results_schema.store import ResultStore

DONE = STATUSES.index("done")
FAILED = STATUSES.index("failed")
UNNEEDED = STATUSES.index("unneeded")


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
    with EarlyClient(**_cluster_settings(points[0].config["execution"], options)) as dask:
        if not Path(sweep.store).exists():
            dask.start()
        store = open_or_create(sweep, points)
        with store_lock(sweep.store), store:  # closing the store writes its last batch
            todo = pending(points, store, options.retry_failed)
            progress = Progress(total=len(points), to_run=len(todo), already_done=len(points) - len(todo))
            if todo and sweep.search is not None:
                _execute_search(dask, sweep, points, store, options, progress, on_event)
            elif todo:
                _execute(dask, todo, store, options, progress, on_event)
            on_event(progress)
    return progress


def _cluster_settings(execution: dict[str, Any], options: RunOptions) -> dict[str, Any]:
    """Worker count, scheduler address, dashboard switch and [execution.cluster] table: the command line over the
    sweep file; each command-line cluster entry is checked against the registry."""
    chosen = {"workers": options.workers, "scheduler": options.scheduler, "dashboard": options.dashboard}
    where = "the command line (--cluster/--cluster-set)"
    cluster = {name: lookup(f"execution.cluster.{name}", where=where).check(value, where=where)
               for name, value in options.cluster.items()}
    return {**{name: overlay(execution, chosen)[name] for name in chosen},
            "cluster": overlay(execution["cluster"], cluster)}


def open_or_create(sweep: Sweep, points: list[Point]) -> ResultStore:
    """Open the sweep's store, lay out a new one, or grow the stored grid in place to the sweep's.

    A sweep that only appends values to the stored axes or adds replicates grows the store (new
    points pending); any other change of grid or base config is refused with StoreError.
    """
    # Imported here, not at the top: Zarr takes about 0.4 s to import, which run_sweep spends
    # while the Dask workers start.
    from ..results_schema import store

    path, target = Path(sweep.store), fingerprint(sweep)
    if not path.exists():
        ids, seeds = id_and_seed_arrays(sweep, points)
        store.create_store(path, grid_spec(sweep, points, _root_attrs(sweep)), ids, seeds)
    elif store.growing_to(path) == target or store.stored_attrs(path)[store.ATTR_FINGERPRINT] != target:
        reason = growth_refusal(_recorded_sweep(path, store.stored_attrs(path, growing=target)), sweep)
        if reason:
            raise StoreError(f"{path} was built from a different sweep grid: {reason}; a store grows only by values "
                             "appended to its axes and by more replicates (use another store path for another grid)")
        ids, seeds = id_and_seed_arrays(sweep, points)
        with store_lock(path):
            store.grow_store(path, grid_spec(sweep, points, _root_attrs(sweep)), ids, seeds)
    return store.ResultStore.open(path, fingerprint=target, batching=store.WRITER_BATCHING)


def _recorded_sweep(path: Path, attrs: dict[str, Any]) -> Sweep:
    """The sweep a store was built from, parsed from its ``sweep_text`` attr (StoreError if unreadable)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ImplausibleValue)  # shown when that sweep ran
            return parse_sweep(str(attrs["sweep_text"]), source=Path(str(attrs.get("sweep_file", path))))
    except (KeyError, ConfigError) as exc:
        raise StoreError(f"{path} was built from a different sweep grid whose recorded sweep file cannot be read "
                         f"({exc}); use another store path") from None


def growth_refusal(stored: Sweep, sweep: Sweep) -> str:
    """Why ``sweep`` is not ``stored`` grown by appended axis values and more replicates ('' if it is)."""
    if sweep.base_seed != stored.base_seed:
        return f"base_seed changed from {stored.base_seed} to {sweep.base_seed}"
    old, new = identity_config(stored.base), identity_config(sweep.base)
    changed = sorted(key for key in old.keys() | new.keys() if old.get(key) != new.get(key))
    if changed:
        return f"base config {changed[0]} changed from {old.get(changed[0])!r} to {new.get(changed[0])!r}"
    names, new_names = [a.name for a in stored.axes], [a.name for a in sweep.axes]
    if names != new_names:
        return f"axes changed from {names} to {new_names} (axes cannot be added, removed, renamed or reordered)"
    for axis, grown in zip(stored.axes, sweep.axes):
        reason = _axis_refusal(axis, grown, stored.variants.get(axis.name, {}), sweep.variants.get(axis.name, {}))
        if reason:
            return reason
    if sweep.replicates < stored.replicates:
        return f"replicates fell from {stored.replicates} to {sweep.replicates}"
    return "the count search changed" if sweep.search != stored.search else ""


def _axis_refusal(axis: Axis, grown: Axis, variants: dict[str, Any], grown_variants: dict[str, Any]) -> str:
    """Why ``grown`` is not ``axis`` with values appended ('' if it is); variants map label -> overrides."""
    if grown.key != axis.key:
        return f"axis {axis.name} sets {axis.key} in the store but {grown.key} in the sweep file"
    removed = [v for v in axis.values if v not in grown.values]
    if removed:
        return f"axis {axis.name} lost value(s) {removed}"
    if grown.values[: len(axis.values)] != axis.values:
        return (f"axis {axis.name} must keep its stored values {list(axis.values)} first and in order (append new "
                f"values at the end), got {list(grown.values)}")
    changed = [label for label in variants if variants[label] != grown_variants.get(label)]
    return f"variant {changed[0]} of axis {axis.name} changed its overrides" if changed else ""


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
        **({"count_search": _search_attrs(sweep.search)} if sweep.search else {}),
    }


def _search_attrs(search: CountSearch) -> dict[str, Any]:
    """The store's record of its count search: axis, first probe and the success rule's fraction."""
    return {"axis": search.axis, "method": search.method,
            "start": PRESCREEN_START if search.start is None else search.start, "min_fraction": MIN_FRACTION}


def pending(points: list[Point], store: ResultStore, retry_failed: bool) -> list[Point]:
    """Points still to run: not done, not unneeded, and not failed unless ``retry_failed``."""
    status = store.status()
    skip = {DONE, UNNEEDED} if retry_failed else {DONE, UNNEEDED, FAILED}
    return [p for p in points if int(status[p.index]) not in skip]


def _execute(
    dask: EarlyClient,
    todo: list[Point],
    store: ResultStore,
    options: RunOptions,
    progress: Progress,
    on_event: Callable[[Progress], None],
) -> None:
    jobs = submission_sequence(_jobs(todo, options))
    client = _started(dask, todo, options, progress, on_event)
    for point, result in run_tasks(client, jobs):
        _store_result(store, point, result, progress)
        on_event(progress)


def _jobs(points: list[Point], options: RunOptions) -> list[Job]:
    """Dask jobs of ``points``: (point, config with the command line's execution overrides, seed, wiring seed)."""
    return [(p, with_execution(p.config, engine=options.engine, prescreen=options.prescreen), p.seed, p.wiring_seed)
            for p in points]


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
    """Run a count search (``capsweep.sweeps.search``): submit each cell's next probe as verdicts arrive."""
    from .search import plan_search

    assert sweep.search is not None
    count_axis = [a.name for a in sweep.axes].index(sweep.search.axis)
    client = _started(dask, points, options, progress, on_event)
    starts = search_starts(sweep, points, count_axis, client)
    search = plan_search(points, count_axis, starts, sweep.search.method, store.status(),
                         store.scalar_values("outcome"), store.scalar_values("recalled_count"), options.retry_failed)

    def advance(keys: list[tuple[int, ...]] | None = None) -> list[Job]:
        """The jobs the search wants next (in the cells ``keys``, default all); points it decided without marked."""
        wanted, unneeded = search.advance(keys)
        _mark_unneeded(store, unneeded, progress)
        return _jobs(wanted, options)

    def follow_up(point: Point, result: Any) -> list[Job]:
        verdict = None if isinstance(result, TaskFailure) else \
            bool(succeeds(result["outcome"], result["recalled_count"], point.config["assemblies"]["count"]))
        return advance([search.record(point, verdict)])

    first = advance()
    on_event(progress)
    for point, result in run_tasks(client, first, follow_up):
        _store_result(store, point, result, progress)
        on_event(progress)


def _mark_unneeded(store: ResultStore, points: list[Point], progress: Progress) -> None:
    for point in points:
        store.mark_unneeded(point.index)
    progress.unneeded += len(points)


def search_starts(sweep: Sweep, points: list[Point], count_axis: int, client: Client) -> dict[tuple[int, ...], int]:
    """Count index each cell's search probes first: the sweep's start, or the prescreen's predicted capacity."""
    from .search import cell_key

    assert sweep.search is not None
    counts = list(sweep.axes[count_axis].values)
    if sweep.search.start is not None:
        return {cell_key(p.index, count_axis): counts.index(sweep.search.start) for p in points}
    from .prescreen import predicted_capacity

    cells: dict[tuple[int, ...], dict[int, dict[str, Any]]] = {}
    for p in points:
        if p.labels["replicate"] == 0:
            cells.setdefault(cell_key(p.index, count_axis), {})[p.labels[sweep.search.axis]] = p.config

    keys = list(cells)
    predicted = client.gather(client.map(predicted_capacity, [cells[k] for k in keys], pure=False))
    return {key: min(max(int(c) - counts[0], 0), len(counts) - 1) for key, c in zip(keys, predicted)}


def submission_order(config: dict[str, Any]) -> tuple[str, float]:
    """Sort key of a job: its compiled-build key ('' unless standalone), then longest planned run first.

    Grouping by build lets each worker rerun one compiled binary many times before it has to
    switch; longest-first within a group (Dask hands out tasks in submission order) leaves the
    short points for the end, so the workers finish close together.
    """
    group = build_key(config) if engine(config["execution"]["engine"]).reuses_builds else ""
    return group, -total_duration_s(config)


def submission_sequence(jobs: list[Job]) -> list[Job]:
    """Jobs in the order to submit them: one point of every compiled build first, then the rest by build.

    Dask hands out tasks in submission order, so with several builds (network sizes) the first
    tasks go to different workers and each compiles a different build at the same time (the compile
    lock is per build key) instead of waiting for the one compile of a build its neighbour holds;
    the remaining points follow grouped by build (:func:`submission_order`). Jobs of engines without
    builds keep :func:`submission_order` alone.
    """
    keyed = sorted(((submission_order(job[1]), i) for i, job in enumerate(jobs)))  # each build key hashed once
    leaders: dict[str, int] = {}
    for (group, _), i in keyed:
        if group:
            leaders.setdefault(group, i)
    first = sorted(leaders.values(), key=lambda i: -total_duration_s(jobs[i][1]))
    chosen = set(first)
    return [jobs[i] for i in first] + [jobs[i] for _, i in keyed if i not in chosen]


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
