"""Speed of a 16-point sweep: capsweep with its defaults against a plain loop and the bare engine.

    python benchmarks/bench_sweep.py [--repeats 6] [--plain-loops 1] [--workdir DIR]

One invocation measures, on the same machine:

1. capsweep (every repeat): ``capsweep run`` in a fresh process with the sweep's defaults (local Dask cluster,
   default engine and workers, abort on runaway, every point written to the Zarr store). Wall
   time from process start to exit, first with an empty build cache (compile included:
   ``speedup_vs_plain_loop``), then again on a new store with the cache it left
   (``speedup_warm_builds``: a modeller's second sweep over the same network structure).
2. plain loop (once, or ``--plain-loops`` times, after the repeats): what a modeller would otherwise write:
   the same 16 points as a sequential loop of
   Brian2 runtime (cython) simulations in one fresh process, same model and durations, no build
   reuse, no early abort.
3. bare engine (every repeat): the work capsweep does (same engine, abort on runaway, same submission order) in
   a plain ``multiprocessing`` pool of the same size in a fresh process: no Dask, no store, no
   CLI. ``overhead_pct`` is the median of capsweep's cold wall times over the median of the bare
   engine's (empty build caches); ``overhead_warm_pct`` the same with both caches filled.
   ``paired_overhead_pct`` compares the two runs of each repeat.

All three start from a fresh interpreter (``engine_only.py`` for 2 and 3), so each wall time
includes its own imports and process start-up, with Python's default bytecode caching (the
benchmark drops ``PYTHONDONTWRITEBYTECODE`` from their environment: with it set, every process
recompiled the project's own modules, about 0.25 s in capsweep's client alone, which a user's
installation does once). Within a repeat capsweep and the bare engine run
one after the other, capsweep first in even repeats and the bare engine first in odd ones, and
overheads are taken between medians: on this machine a run's wall time varies by about 10 %
from one run to the next (which run goes second in a pair seemed to matter at times), more than
the few seconds being measured, so a balanced order and an even number of repeats matter.

``runaway_cost_pct`` compares, in one warm process, the wall time of each point that ran away
with abort on against the same point run to full length with the same engine.

The plain loop is deterministic work (fixed seeds, one process) and the longest part
(11-21 minutes here for the 60 s retention points of ``sweep16.toml``): ``--plain-loops N``
measures it N times (default 1) and every repeat's speedup uses their median.
The last line prints the medians; the lines above give min / median / max per metric.
"""

from __future__ import annotations

import argparse
import os
import pickle
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from engine_only import run_one

from capsweep.registry import with_execution
from capsweep.runners.builds import BUILD_DIR_ENV
from capsweep.sweeps.dispatch import submission_sequence
from capsweep.sweeps.expand import Grid
from capsweep.sweeps.ids import Point
from capsweep.sweeps.sweepfile import load_sweep

SWEEP_FILE = Path(__file__).with_name("sweep16.toml")
ENGINE_ONLY = Path(__file__).with_name("engine_only.py")
CAPSWEEP = str(Path(sys.executable).with_name("capsweep"))


def user_env(**changes: str) -> dict[str, str]:
    """This process's environment with ``changes``, and Python's default bytecode caching."""
    env = {**os.environ, **changes}
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def time_capsweep(store: Path, env: dict[str, str]) -> float:
    """Wall seconds of ``capsweep run`` (the installed console script, as a user runs it) in a fresh process."""
    start = time.perf_counter()
    subprocess.run([CAPSWEEP, "run", str(SWEEP_FILE), "--store", str(store)], check=True,
                   env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - start


def time_engine_only(jobs: list[tuple[dict[str, Any], int, int]], workers: int, env: dict[str, str]) -> float:
    """Wall seconds of ``engine_only.py`` (plain loop for 0 workers, else a process pool) in a fresh process."""
    start = time.perf_counter()
    subprocess.run([sys.executable, str(ENGINE_ONLY), str(workers)], input=pickle.dumps(jobs), check=True, env=env,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - start


def plain_loop_jobs(points: list[Point]) -> list[tuple[dict[str, Any], int, int]]:
    """The points as a modeller's plain loop runs them: cython runtime engine, no early abort."""
    return [(with_execution(p.config, engine="cython", abort_on_runaway=False), p.seed, p.wiring_seed) for p in points]


def engine_jobs(points: list[Point]) -> list[tuple[dict[str, Any], int, int]]:
    """The points as capsweep runs them (its default engine and abort), in capsweep's submission order."""
    grid = Grid(load_sweep(SWEEP_FILE))
    flat = np.array([np.ravel_multi_index(p.index, grid.shape) for p in points])
    return [(p.config, p.seed, p.wiring_seed) for p in grid.points(submission_sequence(grid, flat))]


def runaway_cost(points: list[Point], store: Path) -> float:
    """Percent: wall of runaway points stopped at onset against the same points run to full length.

    Measured in this (warm) process with the sweep's engine, on the points that ran away in ``store``.
    """
    ds = xr.open_zarr(store)
    runaway = [p for p in points if int(ds["outcome"].values[p.index]) == 1]
    if not runaway:
        return float("nan")
    aborted = full = 0.0
    for p in runaway:
        aborted += run_one((p.config, p.seed, p.wiring_seed))["wall_time_s"]
        full += run_one((with_execution(p.config, abort_on_runaway=False), p.seed, p.wiring_seed))["wall_time_s"]
    return 100.0 * aborted / full


def in_turn(first: Callable[[], float], second: Callable[[], float], swap: bool) -> tuple[float, float]:
    """``(first(), second())``, called in that order, or the other way round when ``swap``.

    Alternating the order between repeats keeps a slow or fast spell of a noisy machine from
    always landing on the same side of a comparison.
    """
    if swap:
        later = second()
        return first(), later
    earlier = first()
    return earlier, second()


def one_repeat(points: list[Point], workdir: Path, repeat: int) -> dict[str, float]:
    """Cold capsweep and bare engine (empty build caches), then both warm (speedups are added later)."""
    jobs = engine_jobs(points)
    workers = points[0].config["execution"]["workers"]
    cap_env = user_env(**{BUILD_DIR_ENV: tempfile.mkdtemp(prefix="builds-cap-", dir=workdir)})
    bare_env = user_env(**{BUILD_DIR_ENV: tempfile.mkdtemp(prefix="builds-bare-", dir=workdir)})
    cold_store, warm_store = workdir / f"cold-{repeat}.zarr", workdir / f"warm-{repeat}.zarr"
    swap = repeat % 2 == 1
    t_cold, t_bare = in_turn(lambda: time_capsweep(cold_store, cap_env),
                             lambda: time_engine_only(jobs, workers, bare_env), swap)
    t_warm, t_bare_warm = in_turn(lambda: time_capsweep(warm_store, cap_env),
                                  lambda: time_engine_only(jobs, workers, bare_env), swap)
    os.environ[BUILD_DIR_ENV] = cap_env[BUILD_DIR_ENV]
    ds = xr.open_zarr(cold_store)
    return {
        "capsweep_cold_s": t_cold, "capsweep_warm_s": t_warm,
        "bare_engine_s": t_bare, "bare_engine_warm_s": t_bare_warm,
        "paired_overhead_pct": 100.0 * (t_cold - t_bare) / t_bare,
        "paired_overhead_warm_pct": 100.0 * (t_warm - t_bare_warm) / t_bare_warm,
        "runaway_cost_pct": runaway_cost(points, cold_store),
        "points_per_s": len(points) / t_cold,
        "sim_s_per_wall_s": float(ds["simulated_time_s"].sum()) / t_cold,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--repeats", type=int, default=6)
    parser.add_argument("--plain-loops", type=int, default=1)
    parser.add_argument("--workdir", type=Path, default=None)
    args = parser.parse_args()
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="capsweep-bench-"))
    workdir.mkdir(parents=True, exist_ok=True)
    points = list(Grid(load_sweep(SWEEP_FILE)).points())
    rows = []
    for repeat in range(args.repeats):
        rows.append(one_repeat(points, workdir, repeat))
        print(f"repeat {repeat}: " + " ".join(f"{k}={v:.3g}" for k, v in rows[-1].items()), flush=True)
    plain = [time_engine_only(plain_loop_jobs(points), 0, user_env()) for _ in range(args.plain_loops)]
    print("plain loop s: " + " ".join(f"{t:.1f}" for t in plain), flush=True)
    for row in rows:
        row["speedup_vs_plain_loop"] = statistics.median(plain) / row["capsweep_cold_s"]
        row["speedup_warm_builds"] = statistics.median(plain) / row["capsweep_warm_s"]
    for key in rows[0]:
        values = sorted(r[key] for r in rows)
        print(f"{key}: min {values[0]:.3g} median {statistics.median(values):.3g} max {values[-1]:.3g}")
    med = {k: statistics.median(r[k] for r in rows) for k in rows[0]}
    med["overhead_pct"] = 100.0 * (med["capsweep_cold_s"] / med["bare_engine_s"] - 1.0)
    med["overhead_warm_pct"] = 100.0 * (med["capsweep_warm_s"] / med["bare_engine_warm_s"] - 1.0)
    print(f"overhead of the medians: cold {med['overhead_pct']:.1f} %, warm {med['overhead_warm_pct']:.1f} %")
    print(f"speedup_vs_plain_loop={med['speedup_vs_plain_loop']:.2f} overhead_pct={med['overhead_pct']:.1f} "
          f"runaway_cost_pct={med['runaway_cost_pct']:.1f} points_per_s={med['points_per_s']:.3f} "
          f"sim_s_per_wall_s={med['sim_s_per_wall_s']:.2f} speedup_warm_builds={med['speedup_warm_builds']:.2f} "
          f"overhead_warm_pct={med['overhead_warm_pct']:.1f}")


if __name__ == "__main__":
    main()
