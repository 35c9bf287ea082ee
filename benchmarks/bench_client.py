"""The client at the size of a study: `capsweep check` of a large sweep, and the orchestration cost per point.

Four measurements, each printed as one line (min / median / max over ``--repeats``):

1. ``check``: wall time and peak resident memory of ``capsweep check`` (a fresh process) on a sweep of
   ``--check-points`` points (default 10^6: 25 x 20 x 20 rule coefficients x 10 counts x 10 replicates;
   0 leaves it out).
2. ``orchestration``: ``run_sweep`` of ``--run-points`` points (default 10^5) of the smallest real
   network with a very short protocol, on a local cluster of ``--workers`` workers, with a task that
   returns a stored result at once (or after ``--task-ms``) instead of simulating. Everything else is
   what ``capsweep run`` does (grid, ids and seeds, store layout, windowed submission in parcels,
   Dask scheduler and workers, batched store writes), so wall / points is the orchestration cost per
   point (with ``--task-ms``, beyond the tasks' own time); the time to the first finished
   point bounds the time to the first running point from above. Also per point from the first
   finished point to the last (the steady rate, without the cluster's start and the store's layout).
3. ``plain Dask``: the same tasks (of a sweep of ``--plain-points`` points, default 10^4: one task per point
   costs Dask 4-13 ms here) on the same kind of cluster (capsweep's settings), all given to one
   ``client.map`` and their results gathered as they finish, with no grid, window, parcels or store: what
   Dask alone costs per point on this machine at this moment, measured between the repeats of 2.
4. ``bare engine``: the same network's points run by ``run_point`` in this process, one after another
   (the build compiled first, not counted): what a point costs without any orchestration.

CPU is that of this process: the client, the scheduler (a local cluster's runs here) and the store
writer; the workers' CPU is not counted.

Run: ``python benchmarks/bench_client.py [--check-points N] [--run-points N] [--plain-points N] [--task-ms X]
[--workers 2]``.
"""

from __future__ import annotations

import argparse
import functools
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
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


def stored_result(result: dict[str, Any], sleep_s: float, config: dict[str, Any], seed: int,
                  wiring_seed: int) -> dict[str, Any]:
    """The task of the orchestration run: a point's ``result`` with this point's seed, returned after ``sleep_s``
    seconds (0: at once)."""
    time.sleep(sleep_s)
    return {**result, "seed": seed}


@dataclass
class Timing:
    """A timed run: wall and CPU s of this process in all, and at its first and last finished point."""

    wall: float = 0.0
    cpu: float = 0.0
    points: int = 0
    first: tuple[float, float] = (0.0, 0.0)  # (wall, CPU) s from the start to the first finished point
    last: tuple[float, float] = (0.0, 0.0)  # the same to the last

    def seen(self, start: tuple[float, float]) -> None:
        """Note a finished point at this moment (``start``: wall and CPU clock readings when the run began)."""
        self.points += 1
        self.last = (time.perf_counter() - start[0], time.process_time() - start[1])
        if self.points == 1:
            self.first = self.last

    def per_point(self) -> tuple[float, float]:
        """Wall and CPU ms per point in all."""
        return 1000 * self.wall / self.points, 1000 * self.cpu / self.points

    def steady(self) -> tuple[float, float]:
        """Wall and CPU ms per point from the first finished point to the last."""
        n = max(self.points - 1, 1)
        return 1000 * (self.last[0] - self.first[0]) / n, 1000 * (self.last[1] - self.first[1]) / n


def timed(run: Any) -> Timing:
    """Time ``run(note)``, which calls ``note()`` once per finished point."""
    timing, start = Timing(), (time.perf_counter(), time.process_time())
    run(lambda: timing.seen(start))
    timing.wall, timing.cpu = time.perf_counter() - start[0], time.process_time() - start[1]
    return timing


def time_orchestration(sweep: Path, task: Any) -> Timing:
    """``run_sweep`` of ``sweep`` with ``task`` for its points."""
    from capsweep.sweeps.launch import run_sweep

    def run(note: Any) -> None:
        counted = [0]

        def seen(progress: Any) -> None:
            while counted[0] < progress.finished:
                counted[0] += 1
                note()

        run_sweep(sweep, on_event=seen, task=task)

    return timed(run)


def time_plain_dask(sweep: Path, task: Any, workers: int) -> Timing:
    """The tasks of ``sweep`` on a fresh local cluster of ``workers``, all in one ``client.map``, gathered as they
    finish: no grid window, store or progress (the cluster's start counted, as in ``run_sweep``)."""
    from dask.distributed import as_completed

    from capsweep.sweeps.dispatch import dask_client
    from capsweep.sweeps.expand import Grid
    from capsweep.sweeps.sweepfile import load_sweep

    points = list(Grid(load_sweep(sweep)).points())

    def run(note: Any) -> None:
        with dask_client(workers) as client:
            futures = client.map(task, [p.config for p in points],
                                 [p.seed for p in points], [p.wiring_seed for p in points], pure=False)
            for batch in as_completed(futures).batches():
                for _ in client.gather(batch):
                    note()

    return timed(run)


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
    parser.add_argument("--plain-points", type=int, default=10_000,
                        help="points of the plain-Dask baseline (a sweep of its own; 0 leaves it out)")
    parser.add_argument("--bare-points", type=int, default=20)
    parser.add_argument("--task-ms", type=float, default=0.0,
                        help="each task sleeps this long before it returns (e.g. the bare engine's time per point, so "
                             "that points are parcelled as real ones would be); the overhead line subtracts it")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="capsweep-client-"))
    if args.check_points:
        check = work / "check.toml"
        check.write_text(check_sweep(work / "check.zarr", args.check_points))
        checks = [time_check(check) for _ in range(args.repeats)]
        print(f"check of {args.check_points} points: wall {spread([w for w, _ in checks])} s, peak memory "
              f"{spread([m for _, m in checks], '.0f')} MiB (min / median / max of {args.repeats})", flush=True)
    bare = _written(work / "bare.toml", work / "bare.zarr", args.run_points, args.workers)
    bare_per_point, result = time_bare_engine(bare, args.bare_points)
    print(f"bare engine ({result['engine']}): {1000 * bare_per_point:.1f} ms per point "
          f"(mean of {args.bare_points}, one process)", flush=True)
    task = functools.partial(stored_result, result, args.task_ms / 1000)
    runs: dict[str, list[Timing]] = {"orchestration": [], "plain Dask": []}
    for repeat in range(args.repeats):
        sweep = _written(work / f"run{repeat}.toml", work / f"run{repeat}.zarr", args.run_points, args.workers)
        plain = _written(work / f"plain{repeat}.toml", work / f"plain{repeat}.zarr", args.plain_points, args.workers)
        measured = [("orchestration", time_orchestration(sweep, task))]
        if args.plain_points:
            measured.append(("plain Dask", time_plain_dask(plain, task, args.workers)))
        for name, timing in measured:
            runs[name].append(timing)
            print(f"  repeat {repeat}, {name}: {timing.points} points in {timing.wall:.1f} s wall, {timing.cpu:.1f} s "
                  f"CPU of this process, first finished after {timing.first[0]:.1f} s; load {_load()}", flush=True)
    for name, timings in runs.items():
        if not timings:
            continue
        print(f"{name}, {timings[0].points} points on {args.workers} workers (ms per point, min / median / max of "
              f"{args.repeats}): in all {spread([t.per_point()[0] for t in timings])} wall, "
              f"{spread([t.per_point()[1] for t in timings])} CPU; after the first point "
              f"{spread([t.steady()[0] for t in timings])} wall, {spread([t.steady()[1] for t in timings])} CPU; "
              f"first point after {spread([t.first[0] for t in timings], '.1f')} s", flush=True)
        if args.task_ms:
            beyond = [t.per_point()[0] - args.task_ms / args.workers for t in timings]
            print(f"  {name}: wall per point beyond the tasks' own {args.task_ms:g} ms on {args.workers} workers: "
                  f"{spread(beyond)} ms", flush=True)


def _load() -> str:
    """The 1, 5 and 15 minute load averages."""
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def _written(path: Path, store: Path, points: int, workers: int) -> Path:
    path.write_text(run_sweep_text(store, points, workers))
    return path


if __name__ == "__main__":
    main()
