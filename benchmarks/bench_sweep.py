"""Speed of a 16-point sweep: capsweep with its defaults against a plain loop and the bare engine.

    python benchmarks/bench_sweep.py [--repeats 3] [--workdir DIR] [--warm-builds]

Each repeat measures, on the same machine in the same invocation:

1. capsweep: ``capsweep run`` in a fresh process with the sweep's defaults (local Dask cluster,
   default engine and workers, abort on runaway, every point written to the Zarr store). Wall
   time from process start to exit. Unless ``--warm-builds``, each repeat gets an empty build
   cache, so compile time is included.
2. plain loop: what a modeller would otherwise write: the same 16 points as a sequential loop of
   Brian2 runtime (cython) simulations in one process, same model and durations, no build reuse,
   no early abort.
3. bare engine: the work capsweep does (same engine, abort on runaway) in a plain
   ``multiprocessing`` pool of the same size: no Dask, no store, no CLI. ``overhead_pct`` is
   capsweep's wall time over this one.

``runaway_cost_pct`` compares, in one warm process, the wall time of each point that ran away
with abort on against the same point run to full length with the same engine.
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


def runaway_cost(points: list[Point], store: Path) -> float:
    """Percent: wall of runaway points with abort against the same points at full length (warm)."""
    ds = xr.open_zarr(store)
    runaway = [p for p in points if int(ds["outcome"].values[p.index]) == 1]
    aborted = sum(run_one((p.config, p.seed, p.wiring_seed))["wall_time_s"] for p in runaway)
    full = sum(run_one((with_execution(p, abort_on_runaway=False), p.seed, p.wiring_seed))["wall_time_s"]
               for p in runaway)
    return 100.0 * aborted / full if runaway else float("nan")


def one_repeat(workdir: Path, repeat: int, warm_builds: bool) -> dict[str, float]:
    store = workdir / f"bench-{repeat}.zarr"
    points = expand(load_sweep(SWEEP_FILE))
    workers = points[0].config["execution"]["workers"]
    env = dict(os.environ)
    if not warm_builds:
        env["CAPSWEEP_BUILD_DIR"] = tempfile.mkdtemp(prefix="builds-cap-", dir=workdir)
    t_cap = time_capsweep(store, env)
    if not warm_builds:
        env["CAPSWEEP_BUILD_DIR"] = tempfile.mkdtemp(prefix="builds-bare-", dir=workdir)
    t_bare = time_bare_engine(points, workers, env)
    t_plain = time_plain_loop(points)
    ds = xr.open_zarr(store)
    return {
        "capsweep_s": t_cap, "plain_loop_s": t_plain, "bare_engine_s": t_bare,
        "speedup_vs_plain_loop": t_plain / t_cap,
        "overhead_pct": 100.0 * (t_cap - t_bare) / t_bare,
        "runaway_cost_pct": runaway_cost(points, store),
        "points_per_s": len(points) / t_cap,
        "sim_s_per_wall_s": float(ds["simulated_time_s"].sum()) / t_cap,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--workdir", type=Path, default=None)
    parser.add_argument("--warm-builds", action="store_true", help="keep the user's build cache between runs")
    args = parser.parse_args()
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="capsweep-bench-"))
    rows = []
    for repeat in range(args.repeats):
        rows.append(one_repeat(workdir, repeat, args.warm_builds))
        print(f"repeat {repeat}: " + " ".join(f"{k}={v:.3g}" for k, v in rows[-1].items()), flush=True)
    for key in rows[0]:
        values = sorted(r[key] for r in rows)
        print(f"{key}: min {values[0]:.3g} median {statistics.median(values):.3g} max {values[-1]:.3g}")
    med = {k: statistics.median(r[k] for r in rows) for k in rows[0]}
    print(f"speedup_vs_plain_loop={med['speedup_vs_plain_loop']:.2f} overhead_pct={med['overhead_pct']:.1f} "
          f"runaway_cost_pct={med['runaway_cost_pct']:.1f} points_per_s={med['points_per_s']:.3f} "
          f"sim_s_per_wall_s={med['sim_s_per_wall_s']:.2f}")


if __name__ == "__main__":
    main()
