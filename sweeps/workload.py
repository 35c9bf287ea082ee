"""The workload of a sweep, known before running it: points, distinct builds, simulated time, and an estimated
wall time.

:func:`workload` needs no simulation (``capsweep check``); :func:`estimate_sweep` adds the
wall-time estimate (``capsweep estimate``).

The estimate is calibrated by probe simulations of each distinct network size: after one
uncounted run that compiles the size's build (which stays cached for the sweep), two short runs
of different lengths separate the per-point overhead (set-up, scoring) from the cost per
simulated second. Points are then packed onto the workers longest-first (LPT), which is how a
Dask cluster with free workers takes queued tasks. Runaway points that stop early cost less, so
the estimate is an upper bound where abort_on_runaway saves time.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .. import engines
from ..registry import with_execution
from ..runners.protocol import total_duration_s
from .expand import expand
from .identity import Point
from .sweepfile import Sweep, load_sweep

PROBE_HOLD_S = (1.0, 5.0)  # hold lengths of the two probe runs, s
MAX_PROBES = 4  # distinct network sizes probed; others are scaled from the nearest probed size
STARTUP_S = 3.0  # local Dask cluster start and close, imports and store layout, s (measured here: 2.5-3.5 s)


@dataclass(frozen=True)
class Cost:
    """Measured cost model of one network size: wall = overhead_s + per_sim_s x simulated seconds."""

    overhead_s: float
    per_sim_s: float


@dataclass(frozen=True)
class Workload:
    """What a run of the sweep will do, known without simulating."""

    points: list[Point]
    axes: dict[str, tuple[Any, ...]]  # axis name -> its values, in grid order
    replicates: int
    builds: int  # distinct network structures (compiled once per worker with build reuse)
    simulated_s: float  # total planned simulated time, s


@dataclass(frozen=True)
class Estimate:
    """What a run of the sweep will do and roughly how long it takes."""

    workload: Workload
    workers: int
    engine: str
    costs: dict[int, Cost]  # n_exc -> measured cost model
    estimate_s: float  # estimated wall time of the whole run, s


def size_key(point: Point) -> int:
    """Network size that sets a point's cost (number of E cells)."""
    return int(point.config["network"]["n_exc"])


def structure_key(point: Point) -> str:
    """Key of the compiled build a point needs (its standalone build key)."""
    from ..runners.builds import build_key

    return build_key(point.config)


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


def point_cost(point: Point, costs: dict[int, Cost]) -> float:
    """Estimated wall seconds of one point, scaling from the nearest probed size by cell count.

    Cell count, not synapse count: at N_E = 8000 and 16,000 a network with a fixed connection
    probability (2-4 times the synapses) cost what the fixed in-degree network of its size did
    (``benchmarks/bench_scaling.py``, December 2026): the per-cell drive and integration dominate.
    """
    size = size_key(point)
    nearest = min(costs, key=lambda s: abs(s - size))
    scale = size / nearest
    cost = costs[nearest]
    return cost.overhead_s + cost.per_sim_s * max(scale, 1e-9) * total_duration_s(point.config)


def makespan(durations: list[float], workers: int) -> float:
    """Finish time when tasks go longest-first to whichever worker frees up first, s."""
    loads = [0.0] * workers
    for d in sorted(durations, reverse=True):
        loads[loads.index(min(loads))] += d
    return max(loads)


def workload(sweep: Sweep) -> Workload:
    """Expand ``sweep`` (raising ConfigError on an inconsistent point) and count its points, builds and time."""
    points = expand(sweep)
    return Workload(
        points=points,
        axes={a.name: a.values for a in sweep.axes},
        replicates=sweep.replicates,
        builds=len({structure_key(p) for p in points}),
        simulated_s=sum(total_duration_s(p.config) for p in points),
    )


def estimate_sweep(
    sweep_file: str | Path,
    workers: int | None = None,
    engine: str | None = None,
    on_probe: Callable[[int], None] = lambda n_exc: None,
) -> Estimate:
    """Expand ``sweep_file``, probe its network sizes, and estimate the run's wall time."""
    work = workload(load_sweep(sweep_file))
    points = work.points
    execution = points[0].config["execution"]
    workers = workers or execution["workers"]
    engine = engine or execution["engine"]
    costs: dict[int, Cost] = {}
    for size in sorted({size_key(p) for p in points}, reverse=True)[:MAX_PROBES]:
        on_probe(size)
        example = next(p for p in points if size_key(p) == size)
        costs[size] = probe(example.config, engine)
    durations = [point_cost(p, costs) for p in points]
    return Estimate(
        workload=work,
        workers=workers,
        engine=engine,
        costs=costs,
        estimate_s=STARTUP_S + engines.engine(engine).first_point_s + makespan(durations, workers),
    )



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


def engine_plan(points: list[Point], engine: str | None = None) -> list[BuildPlan]:
    """Per distinct build of ``points`` (in grid order): its points and the engine that runs them (``engine``
    overrides the sweep's), with the reason of any fallback."""
    from ..runners.builds import structure

    groups: dict[tuple[str, str, str | None], list[Point]] = {}
    shapes: dict[tuple[str, str, str | None], dict[str, object]] = {}
    for point in points:
        config = with_execution(point.config, engine=engine)
        runner, reason = engines.engine_for(config)
        shape = structure(config)
        group = (repr(sorted(shape.items())), runner.name, reason)
        groups.setdefault(group, []).append(point)
        shapes.setdefault(group, shape)
    differing = [k for k in next(iter(shapes.values()), {}) if k != "execution.engine"
                 and len({repr(s[k]) for s in shapes.values()}) > 1]
    asked = engine or (points[0].config["execution"]["engine"] if points else "")
    return [BuildPlan(", ".join(f"{k.rsplit('.', 1)[-1]}={shapes[g][k]}" for k in differing), len(members), g[1],
                      asked, g[2]) for g, members in groups.items()]
