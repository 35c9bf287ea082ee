"""Speed of a 16-point sweep: capsweep with its defaults against a plain loop and the bare engine.

    python benchmarks/bench_sweep.py [--repeats 3] [--workdir DIR]

Each repeat measures, on the same machine in the same invocation:

1. capsweep: ``capsweep run`` in a fresh process with the sweep's defaults (local Dask cluster,
   default engine and workers, abort on runaway, every point written to the Zarr store). Wall
   time from process start to exit, first with an empty build cache (compile included:
   ``speedup_vs_plain_loop``), then again on a new store with the cache it left
   (``speedup_warm_builds``: a modeller's second sweep over the same network structure).
2. plain loop: what a modeller would otherwise write: the same 16 points as a sequential loop of
   Brian2 runtime (cython) simulations in one process, same model and durations, no build reuse,
   no early abort.
3. bare engine: the work capsweep does (same engine, abort on runaway) in a plain
   ``multiprocessing`` pool of the same size: no Dask, no store, no CLI. ``overhead_pct`` is
   capsweep's wall time over this one.

``runaway_cost_pct`` compares, in one warm process, the wall time of each point that ran away
with abort on against the same point run to full length with the same engine;
``runaway_cost_long_pct`` does the same for two of them with a 60 s hold phase, the length of a
real retention study (the sweep's own points are short, so fixed per-point costs weigh more).
The last line prints the medians; the lines above give min / median / max per metric.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import xarray as xr

from sweeps.expand import Point, expand
from sweeps.sweepfile import load_sweep

SWEEP_FILE = Path(__file__).with_name("sweep16.toml")
LONG_HOLD_S = 60.0  # hold of the long-run runaway comparison, s


def with_execution(point: Point, **changes: Any) -> dict[str, Any]:
    """The point's config with execution settings changed."""
    return {**point.config, "execution": {**point.config["execution"], **changes}}


def run_one(args: tuple[dict[str, Any], int, int]) -> dict[str, Any]:
    """Pool task: one point through the engine; returns its result."""
    from runners.point import run_point

    config, seed, wiring_seed = args
    return run_point(config, seed, wiring_seed=wiring_seed)


def time_capsweep(store: Path, env: dict[str, str]) -> float:
    """Wall seconds of ``capsweep run`` in a fresh process."""
    start = time.perf_counter()
    subprocess.run([sys.executable, "-m", "sweeps.cli", "run", str(SWEEP_FILE), "--store", str(store)], check=True,
                   env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - start


def time_plain_loop(points: list[Point]) -> float:
    """Wall seconds of a sequential loop of cython runtime simulations, no abort."""
    code = (
        "import pickle, sys\nfrom runners.point import run_point\n"
        "for cfg, seed, wiring in pickle.load(sys.stdin.buffer):\n    run_point(cfg, seed, wiring_seed=wiring)\n"
    )
    import pickle

    jobs = [(with_execution(p, engine="cython", abort_on_runaway=False), p.seed, p.wiring_seed) for p in points]
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], input=pickle.dumps(jobs), check=True)
    return time.perf_counter() - start


def time_bare_engine(points: list[Point], workers: int, env: dict[str, str]) -> float:
    """Wall seconds of the same engine work in a plain process pool (spawned with ``env``)."""
    jobs = [(p.config, p.seed, p.wiring_seed) for p in points]
    saved = dict(os.environ)
    os.environ.update(env)
    try:
        start = time.perf_counter()
        with mp.get_context("spawn").Pool(workers) as pool:
            pool.map(run_one, jobs, chunksize=1)
        return time.perf_counter() - start
    finally:
        os.environ.clear()
        os.environ.update(saved)


def runaway_cost(points: list[Point], store: Path, hold_s: float | None = None, limit: int = 8) -> float:
    """Percent: wall of runaway points stopped at onset against the same points run to full length.

    Measured in this (warm) process with the sweep's engine, on up to ``limit`` points that ran
    away in ``store``; ``hold_s`` lengthens their hold phase (a long run, as in real studies).
    """
    ds = xr.open_zarr(store)
    runaway = [p for p in points if int(ds["outcome"].values[p.index]) == 1][:limit]
    if not runaway:
        return float("nan")
    aborted = full = 0.0
    for p in runaway:
        config = p.config if hold_s is None else {**p.config, "protocol": {**p.config["protocol"], "hold_s": hold_s}}
        point = Point(p.index, p.labels, config, p.point_id, p.seed, p.wiring_seed)
        aborted += run_one((point.config, p.seed, p.wiring_seed))["wall_time_s"]
        full += run_one((with_execution(point, abort_on_runaway=False), p.seed, p.wiring_seed))["wall_time_s"]
    return 100.0 * aborted / full


def one_repeat(workdir: Path, repeat: int) -> dict[str, float]:
    """Cold capsweep (empty build cache), bare engine (empty cache), warm capsweep, plain loop."""
    points = expand(load_sweep(SWEEP_FILE))
    workers = points[0].config["execution"]["workers"]
    cap_env = {**os.environ, "CAPSWEEP_BUILD_DIR": tempfile.mkdtemp(prefix="builds-cap-", dir=workdir)}
    bare_env = {**os.environ, "CAPSWEEP_BUILD_DIR": tempfile.mkdtemp(prefix="builds-bare-", dir=workdir)}
    cold_store, warm_store = workdir / f"cold-{repeat}.zarr", workdir / f"warm-{repeat}.zarr"
    t_cold = time_capsweep(cold_store, cap_env)
    t_bare = time_bare_engine(points, workers, bare_env)
    t_warm = time_capsweep(warm_store, cap_env)
    t_plain = time_plain_loop(points)
    os.environ["CAPSWEEP_BUILD_DIR"] = cap_env["CAPSWEEP_BUILD_DIR"]
    ds = xr.open_zarr(cold_store)
    return {
        "capsweep_cold_s": t_cold, "capsweep_warm_s": t_warm, "plain_loop_s": t_plain, "bare_engine_s": t_bare,
        "speedup_vs_plain_loop": t_plain / t_cold,
        "speedup_warm_builds": t_plain / t_warm,
        "overhead_pct": 100.0 * (t_cold - t_bare) / t_bare,
        "runaway_cost_pct": runaway_cost(points, cold_store),
        "runaway_cost_long_pct": runaway_cost(points, cold_store, hold_s=LONG_HOLD_S, limit=2),
        "points_per_s": len(points) / t_cold,
        "sim_s_per_wall_s": float(ds["simulated_time_s"].sum()) / t_cold,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--workdir", type=Path, default=None)
    args = parser.parse_args()
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="capsweep-bench-"))
    rows = []
    for repeat in range(args.repeats):
        rows.append(one_repeat(workdir, repeat))
        print(f"repeat {repeat}: " + " ".join(f"{k}={v:.3g}" for k, v in rows[-1].items()), flush=True)
    for key in rows[0]:
        values = sorted(r[key] for r in rows)
        print(f"{key}: min {values[0]:.3g} median {statistics.median(values):.3g} max {values[-1]:.3g}")
    med = {k: statistics.median(r[k] for r in rows) for k in rows[0]}
    print(f"speedup_vs_plain_loop={med['speedup_vs_plain_loop']:.2f} overhead_pct={med['overhead_pct']:.1f} "
          f"runaway_cost_pct={med['runaway_cost_pct']:.1f} points_per_s={med['points_per_s']:.3f} "
          f"sim_s_per_wall_s={med['sim_s_per_wall_s']:.2f} speedup_warm_builds={med['speedup_warm_builds']:.2f} "
          f"runaway_cost_long_pct={med['runaway_cost_long_pct']:.1f}")


if __name__ == "__main__":
    main()
