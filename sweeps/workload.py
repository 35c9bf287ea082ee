"""The workload of a sweep, known before running it: points, distinct builds, simulated time, and an estimated
wall time.

:func:`workload` needs no simulation (``capsweep check``); it evaluates builds and durations once per
combination of the axes they depend on, so a sweep of a million points costs what its axes cost.
:func:`estimate_sweep` adds the wall-time estimate (``capsweep estimate``) from this machine's cost
model (:mod:`capsweep.sweeps.costs`): learned from the sweep's own store when it holds done points (and
compared with what they measured), probed once per network size the model does not cover. Points are
then packed onto the workers longest-first (LPT), which is how a Dask cluster with free workers takes
queued tasks. Runaway points that stop early cost less, so the estimate is an upper bound where
abort_on_runaway saves time.
"""

from __future__ import annotations

import heapq
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .. import engines
from ..errors import StoreError
from ..flags import DONE, STATUSES
from ..registry import nest, with_execution
from ..results_schema import attrs
from ..runners.builds import compiled
from ..runners.protocol import total_duration_s
from . import costs
from .costs import Cost, CostModel
from .expand import Grid
from .identity import fingerprint
from .ids import store_basis
from .sweepfile import Sweep, load_sweep

PROBE_HOLD_S = (1.0, 5.0)  # hold lengths of the two probe runs, s
MAX_PROBES = 4  # distinct network sizes probed; others are scaled from the nearest probed size
STARTUP_S = 3.0  # local Dask cluster start and close, imports and store layout, s (measured here: 2.5-3.5 s)
SIZE_KEY = "network.n_exc"
"""The key that sets a point's cost besides its simulated time (number of E cells)."""


@dataclass(frozen=True)
class Workload:
    """What a run of the sweep will do, known without simulating."""

    grid: Grid
    axes: dict[str, tuple[Any, ...]]  # axis name -> its values, in grid order
    replicates: int
    builds: int  # distinct network structures (compiled once per worker with build reuse)
    simulated_s: float  # total planned simulated time, s

    @property
    def n_points(self) -> int:
        """Number of points."""
        return self.grid.n_points


@dataclass(frozen=True)
class Measured:
    """A store's done points against the cost model without what it learned from that store."""

    points: int  # done points compared (run on the estimated engine)
    measured_s: float  # their set-up + wall time, summed, s
    estimated_s: float  # what the model gave for the same points (their simulated time), s

    @property
    def error(self) -> float:
        """Relative error of the estimate (estimated / measured - 1)."""
        return self.estimated_s / self.measured_s - 1.0


@dataclass(frozen=True)
class Estimate:
    """What a run of the sweep will do and roughly how long it takes."""

    workload: Workload
    workers: int
    engine: str
    model: CostModel  # this machine's cost model, as used
    probed: tuple[int, ...]  # network sizes probed for this estimate
    uncompiled: int  # builds not in the build cache
    estimate_s: float  # estimated wall time of the whole run, s
    measured: Measured | None  # the sweep's store against the model, when it holds done points


def probe(config: dict[str, Any], engine: str, seed: int = 1, clock: Callable[[], float] = time.perf_counter) -> Cost:
    """Measure a network's cost with two short runs of different hold lengths.

    A first, uncounted run compiles or generates code (standalone build, cython cache) so that
    the two timed runs see what every later point of the sweep sees. ``clock`` (s) measures the
    runs: wall time by default; a CPU clock (benchmarks on a shared machine) leaves out other
    processes' load.
    """
    from ..runners.point import run_point

    run_point(_probe_config(config, engine, PROBE_HOLD_S[0]), seed)
    walls = []
    for hold in PROBE_HOLD_S:
        cfg = _probe_config(config, engine, hold)
        start = clock()
        run_point(cfg, seed)
        walls.append((clock() - start, total_duration_s(cfg)))
    (w1, t1), (w2, t2) = walls
    per_sim = max((w2 - w1) / (t2 - t1), 0.0)
    return Cost(overhead_s=max(w1 - per_sim * t1, 0.0), per_sim_s=per_sim)


def _probe_config(config: dict[str, Any], engine: str, hold_s: float) -> dict[str, Any]:
    protocol = {**config["protocol"], "settle_s": 0.2, "hold_s": hold_s, "cue_duration_s": 0.05,
                "cue_gap_s": 0.05, "cue_skip_s": 0.01}
    return with_execution({**config, "protocol": protocol}, engine=engine, abort_on_runaway=False)


def makespan(durations: np.ndarray | list[float], workers: int) -> float:
    """Finish time when tasks go longest-first to whichever worker frees up first, s."""
    loads = [0.0] * workers
    for d in sorted(np.asarray(durations, dtype=float).ravel().tolist(), reverse=True):
        heapq.heapreplace(loads, loads[0] + d)
    return max(loads)


def workload(sweep: Sweep) -> Workload:
    """The grid of ``sweep`` (raising ConfigError on an inconsistent point), its builds and simulated time."""
    grid = Grid(sweep)
    return Workload(
        grid=grid,
        axes={a.name: a.values for a in sweep.axes},
        replicates=sweep.replicates,
        builds=len(set(grid.build_keys("standalone").flat)),
        simulated_s=float(np.sum(grid.durations())) * sweep.replicates,
    )


def advised_layout(points: int, cores: int, threaded: bool) -> tuple[int, int]:
    """Workers and threads per point (``execution.workers``, ``execution.threads``) for ``points`` points on
    ``cores`` cores: a worker process per point up to the cores (processes never wait for each other; threads wait at
    every time step's barrier), and threads only where fewer points than cores are left, the spare cores shared among
    the points (``threaded``: the engine runs OpenMP threads)."""
    workers = max(1, min(points, cores))
    return workers, max(1, cores // workers) if threaded else 1


def estimate_sweep(
    sweep_file: str | Path,
    workers: int | None = None,
    engine: str | None = None,
    on_probe: Callable[[int], None] = lambda n_exc: None,
) -> Estimate:
    """The sweep's workload and estimated wall time from this machine's cost model; a store of the sweep with
    done points is compared with the model first, then learned from; sizes the model does not cover are probed."""
    work = workload(load_sweep(sweep_file))
    grid = work.grid
    workers = workers or grid.execution["workers"]
    engine = engine or grid.execution["engine"]
    model = costs.load(engine)
    measured = None
    if Path(grid.sweep.store).is_dir():
        measured, model = _learn_from_store(grid, engine, model)
    sizes = grid.over((SIZE_KEY,), lambda flat: flat[SIZE_KEY], np.int64)
    probed = _probe_missing(grid, sizes, engine, model, on_probe)
    if measured is not None or probed:
        costs.save(engine, model)
    per_cell = _point_costs(model, np.asarray(sizes), np.asarray(grid.durations()))
    builds = set(grid.build_keys(engine).flat) - {""}
    uncompiled = sum(not compiled(key) for key in builds)
    start = STARTUP_S + engines.engine(engine).first_point_s + model.compile_s * math.ceil(uncompiled / workers)
    return Estimate(work, workers, engine, model, probed, uncompiled,
                    start + makespan(np.repeat(per_cell.ravel(), work.replicates), workers), measured)


def _point_costs(model: CostModel, sizes: np.ndarray, durations: np.ndarray) -> np.ndarray:
    """Estimated wall seconds of a point of each cell (cells of ``sizes`` E cells simulating ``durations`` s)."""
    cost = np.empty(sizes.shape)
    for size in np.unique(sizes):
        mine = sizes == size
        cost[mine] = model.point_s(int(size), durations[mine])
    return cost


def _probe_missing(grid: Grid, sizes: np.ndarray, engine: str, model: CostModel,
                   on_probe: Callable[[int], None]) -> tuple[int, ...]:
    """Probe the network sizes of ``grid`` that ``model`` does not cover (largest first, at most MAX_PROBES); the
    costs go into ``model``."""
    missing = sorted({int(n) for n in np.unique(sizes) if not model.covers(int(n))}, reverse=True)[:MAX_PROBES]
    for size in missing:
        on_probe(size)
        cell = tuple(int(i) for i in np.argwhere(sizes == size)[0])
        model.sizes[size] = costs.Entry(probe(grid.config(cell), engine), "probe")
    return tuple(missing)


def _learn_from_store(grid: Grid, engine: str, model: CostModel) -> tuple[Measured | None, CostModel]:
    """The store's done points (run on ``engine``) against ``model``, and ``model`` learned from them."""
    from ..results_schema.store import read_variables

    store = Path(grid.sweep.store)
    try:
        recorded, stored = read_variables(store, ("status", "engine", "setup_time_s", "wall_time_s",
                                                  "simulated_time_s"))
    except StoreError:
        return None, model  # not a store of this capsweep: nothing to learn
    basis = store_basis(recorded)
    if stored["status"].shape != grid.shape or recorded[attrs.FINGERPRINT] != fingerprint(grid.sweep, basis):
        return None, model  # another sweep's store, or not grown to this sweep yet
    done = (stored["status"] == STATUSES.index(DONE)) & (stored["engine"] == engines.NAMES.index(engine))
    if not done.any():
        return None, model
    n_exc = np.broadcast_to(np.expand_dims(grid.over((SIZE_KEY,), lambda f: f[SIZE_KEY], np.int64), -1),
                            grid.shape)[done]
    builds = np.broadcast_to(np.expand_dims(grid.build_keys(engine), -1), grid.shape)[done]
    setup, wall, simulated = (stored[name][done] for name in ("setup_time_s", "wall_time_s", "simulated_time_s"))
    source = f"{store} ({int(done.sum())} points)"
    prior = CostModel({n: e for n, e in model.sizes.items() if not e.source.startswith(f"{store} (")}, model.compile_s)
    measured = None
    if prior.sizes:  # compared only with what the model knew without these points (not after it learned them)
        estimated = sum(float(np.sum(prior.point_s(int(n), simulated[n_exc == n]))) for n in np.unique(n_exc))
        measured = Measured(int(done.sum()), float(np.sum(setup + wall)), estimated)
    return measured, costs.learn(model, source, n_exc, setup, wall, simulated, builds)


@dataclass(frozen=True)
class BuildPlan:
    """The points of one network build and the engine that will run them."""

    label: str  # what sets this build apart from the sweep's others ('' when there is one)
    points: int
    engine: str  # the engine that runs these points
    asked: str  # the engine the sweep asks for
    reason: str | None  # why ``asked`` cannot run them (they fall back to ``engine``), None if it can

    def describe(self) -> str:
        """One line: the build, its point count, its engine (and the fallback with its reason) and what that costs."""
        head = f"build {self.label} ({self.points} points)" if self.label else f"{self.points} points"
        cost = engines.engine(self.engine).cost
        if self.reason is None:
            return f"{head}: {self.engine} engine, which {cost}"
        return (f"{head}: {self.engine} engine instead of {self.asked}, because {self.reason}; {self.engine} "
                f"{cost}")


def engine_plan(grid: Grid, engine: str | None = None) -> list[BuildPlan]:
    """Per distinct build of ``grid`` (in grid order): its points and the engine that runs them (``engine``
    overrides the sweep's), with the reason of any fallback. Worked out once per combination of the axes that set
    the code's keys."""
    from ..runners.builds import KEYS_IN_CODE, structure

    def plan(flat: dict[str, Any]) -> tuple[tuple[str, str, str | None], dict[str, object]]:
        config = with_execution(nest(dict(flat)), engine=engine)
        runner, reason = engines.engine_for(config)
        shape = structure(config)
        return (repr(sorted(shape.items())), runner.name, reason), shape

    counts: dict[tuple[str, str, str | None], int] = {}
    shapes: dict[tuple[str, str, str | None], dict[str, object]] = {}
    for group, shape in grid.over(KEYS_IN_CODE, plan).flat:
        counts[group] = counts.get(group, 0) + grid.sweep.replicates
        shapes.setdefault(group, shape)
    differing = [k for k in next(iter(shapes.values()), {}) if k != "execution.engine"
                 and len({repr(s[k]) for s in shapes.values()}) > 1]
    asked = engine or grid.execution["engine"]
    return [BuildPlan(", ".join(f"{k.rsplit('.', 1)[-1]}={shapes[g][k]}" for k in differing), n, g[1], asked, g[2])
            for g, n in counts.items()]


