"""Agreement of the theory prescreen with simulation on the region sweeps configs/region-*.toml.

Run each region first (``capsweep run configs/region-X.toml --store STORES/region-X.zarr``), then::

    python benchmarks/prescreen_agreement.py [--stores /tmp/regions] [--workers 2]

Prints, per region: outcome agreement over the done points (the ``capsweep prescreen --against``
numbers), the confusion table, how many cells have the predicted capacity equal to the simulated
one (cells whose simulated capacity is decided), and the wall time per predicted grid point.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from capsweep.sweeps.prescreen import check_against, compare, prescreen_sweep

CONFIGS = Path(__file__).resolve().parent.parent / "configs"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stores", type=Path, default=Path("/tmp/regions"), help="folder holding REGION.zarr")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    for sweep in sorted(CONFIGS.glob("region-*.toml")):
        store = args.stores / f"{sweep.stem}.zarr"
        if not store.exists():
            print(f"{sweep.stem}: no store at {store}; run it first")
            continue
        check_against(sweep, store)
        start = time.perf_counter()
        table = prescreen_sweep(sweep, workers=args.workers)
        wall = time.perf_counter() - start
        result = compare(sweep, store, table)
        cap = result.capacity.dropna(subset=["simulated_capacity"]) if not result.capacity.empty else result.capacity
        same = int((cap["predicted_capacity"] == cap["simulated_capacity"]).sum()) if len(cap) else 0
        print(f"{sweep.stem}: outcome agreement {result.agreement:.0%} of {len(result.points)} done points; "
              f"capacity equal in {same} of {len(cap)} cells; {wall / len(table):.2f} s wall per grid point "
              f"({args.workers} workers)")
        print(result.confusion.to_string())
        if len(cap):
            print(cap.to_string(index=False))


if __name__ == "__main__":
    main()
