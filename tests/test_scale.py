"""The client at the size of a study: a million-point sweep is checked without making its points, and a run keeps a
bounded window of tasks in flight. Behaviour, not time: how many configs are made, peak memory, tasks in flight
(timings are in benchmarks/bench_client.py)."""

from __future__ import annotations

import itertools
import time
import tracemalloc
from collections.abc import Iterator

import pytest
from dask.distributed import Client, LocalCluster, get_task_stream

from capsweep.errors import ConfigError
from capsweep.sweeps.dispatch import MAX_PARCEL, PARCEL_TARGET_S, ParcelSizes, run_tasks
from capsweep.sweeps.expand import Grid
from capsweep.sweeps.sweepfile import parse_sweep
from capsweep.sweeps.workload import workload


def values(n: int, step: float) -> list[float]:
    return [round(step * (i + 1), 6) for i in range(n)]


def axis(name: str, key: str, axis_values: object) -> str:
    """A sweep-file axis table over ``key``."""
    return f'[[sweep.axis]]\nname = "{name}"\nkey = "{key}"\nvalues = {axis_values}\n'


def million(counts: list[int], size: int = 100) -> str:
    """25 x 20 x 20 rule coefficients x ``counts`` x 10 replicates, 1200 cells."""
    return f"""
[sweep]
name = "odour-million"
store = "unused.zarr"
replicates = 10
base_seed = 3
{axis("a_ltp", "plasticity.triplet.a_ltp", values(25, 0.001))}
{axis("beta", "plasticity.heterosynaptic.beta", values(20, 0.01))}
{axis("eta", "plasticity.inhibitory.eta", values(20, 0.0005))}
{axis("n_odours", "assemblies.count", counts)}
[network]
n_exc = 1200
[assemblies]
size = {size}
[protocol]
hold_s = 20.0
"""


def test_a_million_point_sweep_is_checked_from_its_axes(monkeypatch) -> None:
    made = []
    flat = Grid.flat
    monkeypatch.setattr(Grid, "flat", lambda self, cell: made.append(cell) or flat(self, cell))
    tracemalloc.start()
    work = workload(parse_sweep(million(list(range(1, 11)))))
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert work.n_points == 1_000_000 and work.builds == 1
    # every rule, duration and build key is read from the axes that set its keys: at most 10 counts x 25 a_ltp etc.,
    # far fewer than the 100,000 grid points
    assert len(made) < 1_000, f"{len(made)} cell configs made"
    assert peak < 64 * 2**20, f"peak traced memory {peak / 2**20:.0f} MiB"
    # [derived] planned time of a point with k odours (registry defaults, as in test_plan.py): settle 1 s + hold 20 s
    # + k cues of 0.2 s each followed by a 0.5 s gap + a tail completing runaway_hold_s + smoothing_s (1 + 0.5 s)
    # after the last cue (1 s); 25 x 20 x 20 x 10 replicates = 100,000 points per count
    per_count = [1.0 + 20.0 + k * (0.2 + 0.5) + (1.5 - 0.5) for k in range(1, 11)]
    assert work.simulated_s == pytest.approx(100_000 * sum(per_count))


def test_an_inconsistent_point_deep_in_a_large_grid_is_found_and_named() -> None:
    """Disjoint assemblies of 120 fit 1200 cells 10 times: the count 11 fails, on every combination of the rest."""
    with pytest.raises(ConfigError, match=r"point n_odours=11: disjoint assemblies need .* \(11 x 120\)"):
        workload(parse_sweep(million([1, 5, 10, 11], size=120)))


def test_points_are_made_when_they_are_submitted() -> None:
    grid = Grid(parse_sweep(million(list(range(1, 11)))))
    first = list(itertools.islice(grid.points(), 3))
    assert [p.index for p in first] == [(0, 0, 0, 0, 0), (0, 0, 0, 0, 1), (0, 0, 0, 0, 2)]
    last = next(grid.points([grid.n_points - 1]))
    assert last.index == (24, 19, 19, 9, 9) and last.labels["n_odours"] == 10
    assert last.config["plasticity"]["triplet"]["a_ltp"] == pytest.approx(0.025)


def double(x: int) -> int:
    return 2 * x


def test_run_tasks_keeps_at_most_a_window_in_flight() -> None:
    """Jobs are read as results are taken: read minus yielded never exceeds the window; follow-ups go first."""
    read = [0]

    def jobs() -> Iterator[tuple[int, tuple[int]]]:
        for i in range(300):
            read[0] += 1
            yield i, (i,)

    def follow_up(tag: int, result: int) -> list[tuple[int, tuple[int]]]:
        return [(-tag, (-tag,))] if tag in (5, 6) else []

    window, seen, most = 16, {}, 0
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        for tag, result in run_tasks(client, double, jobs(), follow_up, window=window):
            most = max(most, read[0] - len(seen))
            seen[tag] = result
    assert most <= window, f"{most} tasks in flight for a window of {window}"
    assert sorted(seen) == sorted([*range(300), -5, -6]) and all(seen[t] == 2 * t for t in seen)


def sleep_then_double(x: int, seconds: float) -> int:
    time.sleep(seconds)
    return 2 * x


def test_short_jobs_of_one_group_share_tasks_and_long_ones_run_alone() -> None:
    """Jobs of 5 ms go in parcels once one has been measured; jobs longer than half the parcel target never do; a
    job without a group runs alone. Every result comes back once, to its own tag."""
    short = [((("short", i)), (i, 0.005)) for i in range(200)]
    long = [((("long", i)), (i, 0.6 * PARCEL_TARGET_S)) for i in range(4)]
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client, get_task_stream(client) as stream:
        seen = dict(run_tasks(client, sleep_then_double, short + long, window=4, group=lambda tag: tag[0]))
    assert seen == {tag: 2 * args[0] for tag, args in short + long}
    tasks = len(stream.data)
    # the first window goes one job a task, then at most MAX_PARCEL jobs of 5 ms share one: far fewer than 204
    assert len(long) + 4 < tasks < len(short) // 4, f"{tasks} tasks for {len(short)} short and {len(long)} long jobs"


def test_parcel_sizes_follow_the_mean_measured_job() -> None:
    sizes = ParcelSizes(lambda tag: tag)
    assert sizes.size("a") == 1  # nothing measured yet
    for seconds in (0.0625, 0.125, 0.1875):  # mean 1/8 s: eight jobs fill the target of 1 s
        sizes.record("a", seconds)
    assert sizes.size("a") == int(PARCEL_TARGET_S * 8)
    for seconds in (0.01, 0.01, 2 * PARCEL_TARGET_S):  # two runaways stopped early, one full-length point:
        sizes.record("runaway", seconds)  # the sum is what a parcel lasts, so the full-length one is not parcelled
    assert sizes.size("runaway") == 1
    sizes.record("b", 1e-9)
    assert sizes.size("b") == MAX_PARCEL
    sizes.record("c", 0.6 * PARCEL_TARGET_S)
    assert sizes.size("c") == 1
    assert ParcelSizes(None).size(None) == 1
