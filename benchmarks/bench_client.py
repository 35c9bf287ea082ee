"""The client at the size of a study: `capsweep check` of a large sweep, and the orchestration cost per point.

Three measurements, each printed as one line (min / median / max over ``--repeats``):

1. ``check``: wall time and peak resident memory of ``capsweep check`` (a fresh process) on a sweep of
   ``--check-points`` points (default 10^6: 25 x 20 x 20 rule coefficients x 10 counts x 10 replicates).
2. ``orchestration``: ``run_sweep`` of ``--run-points`` points (default 10^5) of the smallest real
   network with a very short protocol, on a local cluster of ``--workers`` workers, with a task that
   returns a stored result at once instead of simulating. Everything else is what ``capsweep run`` does
   (grid, ids and seeds, store layout, windowed submission, Dask scheduler and workers, batched store
   writes), so wall / points is the orchestration cost per point; the time to the first finished
   point bounds the time to the first running point from above.
3. ``bare engine``: the same network's points run by ``run_point`` in this process, one after another
   (the build compiled first, not counted): what a point costs without any orchestration.

Run: ``python benchmarks/bench_client.py [--check-points N] [--run-points N] [--workers 2]``.
"""

from __future__ import annotations

import argparse
import functools
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

CAPSWEEP = str(Path(sys.executable).with_name("capsweep"))
COUNTS = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]


def values(n: int, step: float) -> str:
    return ", ".join(f"{step * (i + 1):.4g}" for i in range(n))


def axis(name: str, key: str, axis_values: object) -> str:
    """A sweep-file axis table over ``key``."""
    return f'[[sweep.axis]]\nname = "{name}"\nkey = "{key}"\nvalues = {axis_values}\n'


def check_sweep(store: Path, points: int) -> str:
    """A sweep of about ``points`` points: three rule coefficients x 10 counts x 10 replicates."""
    side = max(1, round((points / 100) ** (1 / 3)))
    axes = (axis("a_ltp", "plasticity.triplet.a_ltp", f"[{values(side, 0.001)}]")
            + axis("beta", "plasticity.heterosynaptic.beta", f"[{values(side, 0.01)}]")
            + axis("eta", "plasticity.inhibitory.eta", f"[{values(side, 0.0005)}]")
            + axis("n_odours", "assemblies.count", COUNTS))
    return f"""
[sweep]
name = "odour-client-check"
store = "{store}"
replicates = 10
base_seed = 3
{axes}
[network]
n_exc = 1200
[assemblies]
size = 100
"""


def run_sweep_text(store: Path, points: int, workers: int) -> str:
    """About ``points`` points of a 40-cell network simulating about 0.5 s: a_ltp values x 2 counts x 10 replicates."""
    return f"""
[sweep]
name = "odour-client-run"
store = "{store}"
replicates = 10
base_seed = 4
{axis("a_ltp", "plasticity.triplet.a_ltp", f"[{values(max(1, points // 20), 1e-6)}]")}
{axis("n_odours", "assemblies.count", [1, 2])}
[network]
n_exc = 40
indegree_exc = 10
indegree_inh = 5
[assemblies]
size = 10
[protocol]
settle_s = 0.1
hold_s = 0.1
cue_duration_s = 0.05
cue_gap_s = 0.05
cue_skip_s = 0.01
[detection]
baseline_start_s = 0.05
runaway_hold_s = 0.05
smoothing_s = 0.05
[execution]
workers = {workers}
"""


def time_check(sweep: Path) -> tuple[float, float]:
    """Wall s and peak resident MiB of `capsweep check` in a fresh process."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    start = time.perf_counter()
    done = subprocess.run([CAPSWEEP, "check", str(sweep)], capture_output=True, text=True)
    wall = time.perf_counter() - start
    if done.returncode:
        raise SystemExit(done.stderr)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return wall, max(peak, before) / 1024


def stored_result(result: dict[str, Any], config: dict[str, Any], seed: int, wiring_seed: int) -> dict[str, Any]:
    """The task of the orchestration run: a point's ``result`` with this point's seed, returned at once."""
    return {**result, "seed": seed}


def time_orchestration(sweep: Path, result: dict[str, Any]) -> tuple[float, float, float, int]:
    """Wall s of the run, CPU s of this process (client, scheduler, store writer), s to its first finished point,
    points run; each task returns ``result``."""
    from capsweep.sweeps.launch import run_sweep

    start = time.perf_counter()
    first: list[float] = []

    def seen(progress: Any) -> None:
        if progress.finished and not first:
            first.append(time.perf_counter() - start)

    cpu = time.process_time()
    progress = run_sweep(sweep, on_event=seen, task=functools.partial(stored_result, result))
    return time.perf_counter() - start, time.process_time() - cpu, first[0], progress.finished - progress.failed


def time_bare_engine(sweep: Path, points: int) -> tuple[float, dict[str, Any]]:
    """Mean wall s per point of ``points`` points run one after another in this process (after one uncounted point
    that compiles the build), and the first point's result."""
    from capsweep.runners.point import run_point
    from capsweep.sweeps.expand import Grid
    from capsweep.sweeps.sweepfile import load_sweep

    chosen = list(Grid(load_sweep(sweep)).points(range(points + 1)))
    result = run_point(chosen[0].config, chosen[0].seed, chosen[0].wiring_seed)
    start = time.perf_counter()
    for p in chosen[1:]:
        run_point(p.config, p.seed, p.wiring_seed)
    return (time.perf_counter() - start) / points, result


def spread(xs: list[float], fmt: str = ".2f") -> str:
    return f"{min(xs):{fmt}} / {statistics.median(xs):{fmt}} / {max(xs):{fmt}}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check-points", type=int, default=1_000_000)
    parser.add_argument("--run-points", type=int, default=100_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--bare-points", type=int, default=20)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="capsweep-client-"))
    check = work / "check.toml"
    check.write_text(check_sweep(work / "check.zarr", args.check_points))
    timed = [time_check(check) for _ in range(args.repeats)]
    print(f"check of {args.check_points} points: wall {spread([w for w, _ in timed])} s, "
          f"peak memory {spread([m for _, m in timed], '.0f')} MiB (min / median / max of {args.repeats})", flush=True)
    bare_per_point, result = time_bare_engine(_written(work / "bare.toml", work / "bare.zarr", args), args.bare_points)
    print(f"bare engine ({result['engine']}): {1000 * bare_per_point:.1f} ms per point "
          f"(mean of {args.bare_points}, one process)", flush=True)
    rows = []
    for repeat in range(args.repeats):
        sweep = _written(work / f"run{repeat}.toml", work / f"run{repeat}.zarr", args)
        wall, cpu, first, n = time_orchestration(sweep, result)
        rows.append((wall, cpu, first, n))
        print(f"  repeat {repeat}: {n} points in {wall:.1f} s wall, {cpu:.1f} s CPU of the client process, first "
              f"finished after {first:.1f} s", flush=True)
    n = rows[0][3]
    print(f"orchestration of {n} points on {args.workers} workers: {spread([1000 * r[0] / n for r in rows])} ms wall "
          f"and {spread([1000 * r[1] / n for r in rows])} ms client CPU per point, first point after "
          f"{spread([r[2] for r in rows], '.1f')} s; bare engine {1000 * bare_per_point:.1f} ms per point", flush=True)


def _written(path: Path, store: Path, args: argparse.Namespace) -> Path:
    path.write_text(run_sweep_text(store, args.run_points, args.workers))
    return path


if __name__ == "__main__":
    main()
