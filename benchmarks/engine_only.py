"""Run pickled points straight through the engine, no Dask, no store, no CLI (for bench_sweep.py).

    python benchmarks/engine_only.py WORKERS < jobs.pickle

``jobs`` is a list of ``(config, seed, wiring_seed)``. WORKERS = 0 runs them one after another in
this process (the plain loop a modeller would write); WORKERS >= 1 maps them over a plain
``multiprocessing`` pool of that many spawned processes (the bare engine). Each point's engine and
abort setting come from its config.
"""

from __future__ import annotations

import multiprocessing as mp
import pickle
import sys
from typing import Any


def run_one(job: tuple[dict[str, Any], int, int]) -> dict[str, Any]:
    """One point through ``capsweep.runners.point.run_point`` (imported here, so the parent stays light); its result."""
    from capsweep.runners.point import run_point

    config, seed, wiring_seed = job
    return run_point(config, seed, wiring_seed=wiring_seed)


def main() -> None:
    workers = int(sys.argv[1])
    jobs = pickle.load(sys.stdin.buffer)
    if workers == 0:
        for job in jobs:
            run_one(job)
        return
    with mp.get_context("spawn").Pool(workers) as pool:
        pool.map(run_one, jobs, chunksize=1)


if __name__ == "__main__":
    main()
