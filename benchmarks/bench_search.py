"""Adaptive count search against the full grid: points simulated, wall time, and the capacities both give.

One sweep (counts 1..32, 4 conditions of the other axes, 2 replicates) runs three times into fresh stores
on the same local Dask cluster size: as a full grid, as a scan search and as a bisect search. Not
collected by pytest. Run:

    python benchmarks/bench_search.py [--workers 2] [--out /tmp/bench-search]
"""

from __future__ import annotations

import argparse
import shutil
import time
from pathlib import Path

import numpy as np
import xarray as xr

from capsweep.flags import STATUSES
from capsweep.sweeps.capacity import capacity_table
from capsweep.sweeps.launch import RunOptions, run_sweep

SWEEP = """
[sweep]
name = "bench-search"
store = "{store}"
replicates = 2
base_seed = 2026

[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
triplet_inhibitory = {{ "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false }}
full = {{}}

[[sweep.axis]]
name = "prewire_gain"
key = "assemblies.prewire_gain"
values = [4.0, 6.0]

[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
{counts}

[network]
n_exc = 320

[assemblies]
size = 10

[plasticity.triplet]
a_ltp = 0.03
b_ltd = 0.006

[protocol]
settle_s = 1.0
hold_s = 3.0
"""

COUNTS = {
    "grid": "values = [" + ", ".join(str(k) for k in range(1, 33)) + "]",
    "scan": 'search = { low = 1, high = 32, method = "scan" }',
    "bisect": 'search = { low = 1, high = 32, method = "bisect" }',
}


def run(kind: str, out: Path, workers: int) -> tuple[float, int, xr.Dataset]:
    """Run one variant into a fresh store; (wall s, points simulated, dataset)."""
    store = out / f"{kind}.zarr"
    shutil.rmtree(store, ignore_errors=True)
    sweep = out / f"{kind}.toml"
    sweep.write_text(SWEEP.format(store=store, counts=COUNTS[kind]))
    start = time.perf_counter()
    run_sweep(sweep, RunOptions(workers=workers))
    wall = time.perf_counter() - start
    ds = xr.open_zarr(store)
    simulated = int(np.isin(ds["status"].values, [STATUSES.index("done"), STATUSES.index("failed")]).sum())
    return wall, simulated, ds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--out", type=Path, default=Path("/tmp/bench-search"))
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    print(f"{time.strftime('%Y-%m-%d %H:%M')}, {args.workers} workers")
    results = {kind: run(kind, args.out, args.workers) for kind in COUNTS}
    grid_wall, grid_points, grid = results["grid"]
    expected = capacity_table(grid)
    print(expected.to_string(index=False))
    for kind, (wall, points, ds) in results.items():
        found = capacity_table(ds)
        same = list(found["capacity"]) == list(expected["capacity"]) and \
            list(found["at_least"]) == list(expected["at_least"])
        print(f"{kind:>6}: {points:4d} points simulated ({points / grid_points:5.1%} of the grid), "
              f"wall {wall:6.1f} s ({wall / grid_wall:5.1%} of the grid's); capacities "
              f"{list(found['capacity'])} {'same as' if same else 'DIFFER from'} the grid's")


if __name__ == "__main__":
    main()
