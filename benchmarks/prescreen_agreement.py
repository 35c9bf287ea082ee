"""Agreement of the prescreen with simulation on the region sweeps configs/region-*.toml.

Run each region first (``capsweep run configs/region-X.toml --store STORES/region-X.zarr``), then::

    python benchmarks/prescreen_agreement.py [--stores /tmp/regions] [--workers 2]

Prints, per region: outcome agreement over the done points (the ``capsweep prescreen --against``
numbers) beside the most any one verdict per grid point could reach (the replicates' majority), the
confusion table, how many conditions have the stability bound equal to the simulated capacity or within one
(conditions whose simulated capacity is decided), and the wall time per predicted grid point; then the
totals over all regions.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from capsweep.errors import CapsweepError
from capsweep.sweeps.prescreen import check_against, compare, prescreen_sweep

CONFIGS = Path(__file__).resolve().parent.parent / "configs"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stores", type=Path, default=Path("/tmp/regions"), help="folder holding REGION.zarr")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    agree = points = majority = equal = near = conditions = 0
    for sweep in sorted(CONFIGS.glob("region-*.toml")):
        store = args.stores / f"{sweep.stem}.zarr"
        if not store.exists():
            print(f"{sweep.stem}: no store at {store}; run it first")
            continue
        try:
            check_against(sweep, store)
        except CapsweepError as exc:
            print(f"{sweep.stem}: {exc}")
            continue
        start = time.perf_counter()
        table = prescreen_sweep(sweep, workers=args.workers)
        wall = time.perf_counter() - start
        result = compare(sweep, store, table)
        cap = result.capacity.dropna(subset=["capacity"]) if not result.capacity.empty else result.capacity
        gap = (cap["stability_bound"] - cap["capacity"]).abs() if len(cap) else cap
        n = len(result.points)
        agree, points, majority = agree + result.agreement * n, points + n, majority + result.ceiling * n
        same, within = int((gap == 0).sum()), int((gap <= 1).sum())
        equal, near, conditions = equal + same, near + within, conditions + len(cap)
        print(f"{sweep.stem}: outcome agreement {result.agreement:.0%} of {n} done points (replicate-majority "
              f"ceiling {result.ceiling:.0%}); bound equal to capacity in {same} of {len(cap)} conditions, within "
              f"one in {within}; "
              f"{wall / len(table):.2f} s wall per grid point ({args.workers} workers)")
        print(result.confusion.to_string())
        if len(cap):
            print(cap.to_string(index=False))
    if points:
        print(f"all regions: outcome agreement {agree / points:.1%} of {points} points (ceiling "
              f"{majority / points:.1%}); bound equal to capacity in {equal} of {conditions} conditions, within one "
              f"in {near}")


if __name__ == "__main__":
    main()
