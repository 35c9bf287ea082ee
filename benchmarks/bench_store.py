"""Store benchmark: lay out a large grid, fill it with synthetic point results, count files, read it back.

No simulation: every point gets one of a pool of synthetic results (random values of the
layout's dtypes and inner sizes), written through ``ResultStore`` as ``capsweep run`` writes
them. Prints layout time, writer throughput (points per second, the final flush included),
files on disk per point, peak RSS of this process (layout, writer and result pool) and the time
of a whole-store read with plain ``xarray.open_zarr``; checks that every point reads back done
with the values written.

    python benchmarks/bench_store.py [--points 20000] [--order grid|shuffled] [--batch 64] [--no-sync]

``--no-sync`` writes as capsweep did before durable writes (files and folders not synced before the status):
the baseline of the cost of syncing, run beside the default.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import resource
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from zarr.storage import LocalStore

from capsweep.axes import key_axis, variant_axis
from capsweep.flags import STATUSES
from capsweep.results_schema import layout
from capsweep.results_schema.layout import GridSpec
from capsweep.results_schema.store import WRITER_BATCHING, Batching, DurableStore, ResultStore, create_store

RULES = ("triplet_only", "triplet_inhibitory", "full", "full_no_transmitter")
COUNTS = tuple(range(1, 51))
INNER = {"snapshot": 5, "time_bin": 1200, "retention": 3}  # 12 s of 10 ms rate bins
POOL = 64  # distinct synthetic results, cycled over the points


def odour_grid(points: int) -> GridSpec:
    """4 rule variants x 50 odour counts x enough replicates for ``points`` points."""
    replicates = max(1, points // (len(RULES) * len(COUNTS)))
    axes = (variant_axis("rule", RULES), key_axis("n_odours", "assemblies.count", COUNTS))
    return GridSpec(axes=axes, replicates=replicates, n_assembly=max(COUNTS), n_snapshot=INNER["snapshot"],
                    n_time_bin=INNER["time_bin"], time_bin_s=0.01, fingerprint="bench", attrs={},
                    n_retention=INNER["retention"])


def synthetic_result(rng: np.random.Generator, count: int) -> dict[str, Any]:
    """A result of every required variable: labels for flags, Poisson-like rate traces, random floats."""
    result: dict[str, Any] = {}
    for var in layout.VARIABLES:
        if var.name == "seed":
            continue
        if var.flags and var.inner is not None:
            result[var.name] = [var.flags[int(i)] for i in rng.integers(len(var.flags), size=count)]
        elif var.flags:
            result[var.name] = var.flags[int(rng.integers(len(var.flags)))]
        elif var.inner is not None:
            size = count if var.inner == "assembly" else INNER[var.inner]
            result[var.name] = rng.poisson(3.0, size) / 3.0 if var.inner == "time_bin" else rng.random(size)
        elif var.dtype.startswith("int"):
            result[var.name] = int(rng.integers(0, 1000))
        else:
            result[var.name] = float(rng.random())
    return result


def count_files(path: Path) -> int:
    return sum(len(files) for _, _, files in os.walk(path))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=20_000)
    parser.add_argument("--order", choices=("grid", "shuffled"), default="grid",
                        help="write order: grid order (as capsweep run submits) or random")
    parser.add_argument("--batch", type=int, default=WRITER_BATCHING.points, help="points per write batch")
    parser.add_argument("--no-sync", action="store_true", help="baseline: no file or folder synced")
    args = parser.parse_args()
    with unsynced() if args.no_sync else contextlib.nullcontext():
        measure(args)


@contextlib.contextmanager
def unsynced() -> Any:
    """The store's writes without their syncs (Zarr's plain local store)."""
    durable = DurableStore._set
    DurableStore._set = LocalStore._set  # type: ignore[method-assign]
    try:
        yield
    finally:
        DurableStore._set = durable  # type: ignore[method-assign]


def measure(args: argparse.Namespace) -> None:
    """Lay out, write and read back the grid of ``args``; print the figures."""
    grid = odour_grid(args.points)
    shape = (len(RULES), len(COUNTS), grid.replicates)
    n = int(np.prod(shape))
    ids = np.array([f"{i:016x}" for i in range(n)], dtype=object).reshape(shape)
    seeds = np.arange(n, dtype=np.int64).reshape(shape)
    rng = np.random.default_rng(2026)
    pool = [synthetic_result(rng, COUNTS[i % len(COUNTS)]) for i in range(POOL)]
    order = list(np.ndindex(shape))
    if args.order == "shuffled":
        order = [order[i] for i in rng.permutation(n)]

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "odour-bench.zarr"
        start = time.perf_counter()
        create_store(path, grid, ids, seeds)
        layout_s = time.perf_counter() - start
        layout_files = count_files(path)

        start = time.perf_counter()
        with ResultStore.open(path, batching=Batching(args.batch, WRITER_BATCHING.delay_s)) as store:
            for k, index in enumerate(order):
                store.write_point(index, {**pool[k % POOL], "n_synapses": k})
        write_s = time.perf_counter() - start
        files = count_files(path)
        peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

        start = time.perf_counter()
        ds = xr.open_zarr(path, chunks=None).load()
        read_s = time.perf_counter() - start
        assert (ds.status.values == STATUSES.index("done")).all(), "a point did not read back done"
        for k in range(0, n, max(1, n // 200)):
            assert int(ds.n_synapses.values[order[k]]) == k, order[k]
            np.testing.assert_array_equal(ds.rate_exc_hz.values[order[k]], pool[k % POOL]["rate_exc_hz"])

    print(f"grid {shape} = {n} points, {args.order} order, batches of {args.batch}, "
          f"{'no sync' if args.no_sync else 'synced'}")
    print(f"layout: {layout_s:.2f} s, {layout_files} files")
    print(f"writer: {n / write_s:.0f} points/s ({write_s:.1f} s)")
    print(f"files: {files} = {files / n:.3f} per point")
    print(f"peak RSS: {peak_mib:.0f} MiB")
    print(f"read whole store (xr.open_zarr, chunks=None): {read_s:.1f} s")


if __name__ == "__main__":
    main()
