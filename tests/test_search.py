"""The adaptive capacity search: its bracket-and-bisect rule, its sweep-file table, and a real searched sweep.

The reference for the search is the capacity definition itself, applied to the full grid
(``capsweep.sweeps.capacity.capacity_table``): a search must find the capacity the full grid gives.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from cli_runs import capsweep
from hypothesis import given, settings
from hypothesis import strategies as st

from capsweep.errors import ConfigError
from capsweep.flags import DONE, FAILED, OUTCOMES, RUNAWAY, STABLE, STATUSES, UNNEEDED
from capsweep.sweeps.capacity import capacity_table
from capsweep.sweeps.expand import expand
from capsweep.sweeps.search import ConditionSearch, SearchRun, plan_search
from capsweep.sweeps.sequential import wilson_interval
from capsweep.sweeps.success import succeeds
from capsweep.sweeps.sweepfile import parse_sweep


def _search(passes: list[bool], start: int, method: str) -> tuple[int, list[int]]:
    """Run one condition's search against known passes; (found capacity as a number of counts, probed indices)."""
    search = ConditionSearch(len(passes), start, method)
    probed: list[int] = []
    while probes := search.next_probes():
        assert not set(probes) & set(probed), "a count is never probed twice"
        probed += probes
        search.passes.update({k: passes[k] for k in probes})
    if method == "scan":
        return next((k for k in range(len(passes)) if not search.passes.get(k, False)), len(passes)), probed
    return search.bounds()[0] + 1, probed


def _grid_capacity(passes: list[bool]) -> int:
    """The capacity definition on a full grid: the number of leading passing counts."""
    return next((k for k, ok in enumerate(passes) if not ok), len(passes))


@given(st.lists(st.booleans(), min_size=1, max_size=40), st.data())
def test_scan_gives_the_full_grid_capacity_on_any_grid(passes: list[bool], data: st.DataObject) -> None:
    start = data.draw(st.integers(0, len(passes) - 1))
    found, probed = _search(passes, start, "scan")
    assert found == _grid_capacity(passes)
    needed = set(range(min(found + 1, len(passes))))
    assert needed <= set(probed) <= needed | set(range(start + 1)), "runs what certifies the capacity, and the seed"


@given(st.integers(1, 64), st.data())
def test_bisect_finds_the_capacity_of_every_monotone_grid(n: int, data: st.DataObject) -> None:
    capacity = data.draw(st.integers(0, n))
    start = data.draw(st.integers(0, n - 1))
    found, probed = _search([k < capacity for k in range(n)], start, "bisect")
    assert found == capacity
    assert len(probed) <= 2 * int(np.ceil(np.log2(n + 1))) + 2, "galloping then bisecting: O(log n) probes"


def test_search_probes_few_counts_from_the_bottom() -> None:
    """Counts 1..32 with capacity 4: scan runs 1-5, bisect 1, 2, 4, 8, 6, 5."""
    assert [k + 1 for k in _search([k < 4 for k in range(32)], 0, "scan")[1]] == [1, 2, 3, 4, 5]
    assert [k + 1 for k in _search([k < 4 for k in range(32)], 0, "bisect")[1]] == [1, 2, 4, 8, 6, 5]


def test_bisect_assumes_monotone_success_where_scan_does_not() -> None:
    """A failing count below passing ones: bisect from count 4 reports 4, the grid's definition (and scan) 0."""
    passes = [False, False, False, True, False, False, False, False]
    assert _search(passes, 3, "bisect")[0] == 4
    assert _search(passes, 3, "scan")[0] == _grid_capacity(passes) == 0


@settings(deadline=None)  # no timing in tests: the machine may be busy
@given(st.integers(1, 64), st.data())
def test_grow_brackets_the_capacity_of_every_monotone_grid(n: int, data: st.DataObject) -> None:
    """The open upper end: whatever the start, grow ends with the capacity bracketed by a passing and a failing
    count (or censored at the grid's ends) in O(log n) probes."""
    capacity = data.draw(st.integers(0, n))
    start = data.draw(st.integers(0, n - 1))
    search = ConditionSearch(n, start, "grow", first_count=1)
    probed = []
    while probes := search.next_probes():
        probed += probes
        search.passes.update({k: k < capacity for k in probes})
    assert search.bounds()[0] + 1 == capacity
    assert capacity in (0, n) or (search.passes[capacity - 1] and not search.passes[capacity])
    assert len(probed) <= 2 * int(np.ceil(np.log2(n + 1))) + 3


def _verdict(index: tuple[int, ...], p: float) -> bool:
    """A point's synthetic verdict: a function of its index alone (as a simulation is of its config and seed)."""
    return bool(np.random.default_rng(list(index)).random() < p)


def _drive(run: SearchRun, verdict: Callable[[tuple[int, ...]], bool | None],
           stop_after: int | None = None) -> dict[tuple[int, ...], bool | None]:
    """Run the search one point at a time, each point's verdict from ``verdict`` (by index); the verdicts stored,
    stopping (as if killed) after ``stop_after`` points."""
    stored: dict[tuple[int, ...], bool | None] = {}
    queue, _ = run.advance()
    while queue:
        index = queue.pop(0)
        stored[index] = verdict(index)
        if stop_after is not None and len(stored) == stop_after:
            break
        more, _ = run.advance([run.record(index, stored[index])])
        queue += more
    return stored


def _replan(stored: dict[tuple[int, ...], bool | None], unneeded: set[tuple[int, ...]], method: str) -> SearchRun:
    """A search rebuilt from a store's arrays, as a resumed ``capsweep run`` rebuilds it."""
    status = np.zeros((16, 10), dtype=np.int8)
    outcome, recalled = np.zeros_like(status), np.zeros((16, 10), dtype=np.int32)
    for index, ok in stored.items():
        status[index], recalled[index] = STATUSES.index(DONE), index[0] + 1 if ok else 0
        outcome[index] = OUTCOMES.index(STABLE if ok else RUNAWAY)
    for index in unneeded:
        status[index] = STATUSES.index(UNNEEDED)
    return plan_search(tuple(range(1, 17)), 0, {(): 3}, method, status, outcome, recalled, np.zeros_like(recalled),
                       False, (3, 2))


@pytest.mark.parametrize("method", ["scan", "grow"])
def test_replicates_where_they_decide_and_an_exact_resume(method: str) -> None:
    """Counts 1-16, success chance falling from 1 through 0.5 at count 6 to 0; 3 replicates first, 2 more while
    the Wilson interval holds 0.5, at most 10. Only counts whose 3 replicates straddle get more; no count
    uses more than 10; a run killed after 7 points and rebuilt from its stored verdicts runs exactly the
    points an uninterrupted run runs."""
    chance = [float(1 / (1 + (k / 6) ** 5)) for k in range(1, 17)]
    verdict = lambda index: _verdict(index, chance[index[0]])
    full = _drive(_replan({}, set(), method), verdict)
    straddles = lambda k, n: (lambda low, high: low < 0.5 <= high)(*wilson_interval(sum(full[k, r] for r in range(n)), n))
    for k in {c for c, _ in full}:
        n = sum(c == k for c, _ in full)
        assert all((k, r) in full for r in range(n)) and 3 <= n <= 10, "the first replicates, 3 to 10 of them"
        assert n == 3 or straddles(k, n - 1 if n == 10 else n - 2), f"count {k + 1} got more needlessly"
        assert n == 10 or not straddles(k, n), f"count {k + 1} stopped undecided"
    killed = _replan({}, set(), method)
    first = _drive(killed, verdict, stop_after=7)
    resumed = _replan(first, set(), method)
    second = _drive(resumed, verdict)
    assert {**first, **second} == full


SEARCH_HEAD = """
[sweep]
name = "odour-search"
store = "{store}"
replicates = 1
base_seed = 11
[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
triplet_inhibitory = {{ "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false }}
full = {{}}
[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
{counts}
[network]
n_exc = 300
[assemblies]
size = 30
prewire_gain = 5.0
[plasticity.triplet]
a_ltp = 0.03
b_ltd = 0.006
[protocol]
settle_s = 1.0
hold_s = 3.0
[execution]
workers = 2
"""


@pytest.mark.parametrize("counts, message", [
    ("search = { low = 1, high = 1 }", "search.high = 1 is not allowed"),
    ("search = { low = 1, high = 8, start = 9 }", "search.start = 9 is not allowed"),
    ("search = { low = 1, high = 8, step = 2 }", "unknown key search.step"),
    ("search = { low = 1, high = 8, method = 'halving' }", "search.method = 'halving' is not allowed"),
    ("values = [1, 2]\nsearch = { low = 1, high = 8 }", "without values"),
    ("search = { low = 1, high = 8, first_replicates = 2 }", "first_replicates = 2 is not allowed"),
    ("search = { low = 1, high = 8, more_replicates = 2 }", "together with search.first_replicates"),
])
def test_bad_search_tables_are_named(counts: str, message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        parse_sweep(SEARCH_HEAD.format(store="s.zarr", counts=counts))


def test_search_on_another_key_is_refused() -> None:
    text = SEARCH_HEAD.format(store="s.zarr", counts="values = [1]").replace(
        'name = "rule"\n', 'name = "rate"\nkey = "protocol.cue_rate_hz"\nsearch = { low = 1, high = 8 }\n', 1)
    with pytest.raises(ConfigError, match="on key assemblies.count"):
        parse_sweep(text.replace("[sweep.axis.variants]", "").replace(
            'triplet_inhibitory = { "plasticity.heterosynaptic.enabled" = false, '
            '"plasticity.transmitter.enabled" = false }\nfull = {}\n', ""))


def _status(store: Path) -> np.ndarray:
    try:
        return xr.open_zarr(store)["status"].values
    except (KeyError, FileNotFoundError, ValueError):
        return np.zeros(1, dtype=np.int8)


@pytest.mark.e2e
def test_killed_search_resumes_and_matches_the_full_grid(tmp_path: Path) -> None:
    grid_sweep, grid_store = tmp_path / "grid.toml", tmp_path / "grid.zarr"
    grid_sweep.write_text(SEARCH_HEAD.format(store=grid_store, counts="values = [1, 2, 3, 4, 5, 6, 7, 8]"))
    search_sweep, search_store = tmp_path / "search.toml", tmp_path / "search.zarr"
    search_sweep.write_text(SEARCH_HEAD.format(store=search_store, counts="search = { low = 1, high = 8 }"))

    first = subprocess.Popen([sys.executable, "-m", "capsweep.sweeps.cli", "run", str(search_sweep)],
                             start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and (_status(search_store) == STATUSES.index("done")).sum() < 3:
        time.sleep(0.2)
    os.killpg(first.pid, signal.SIGKILL)
    first.wait()
    killed = _status(search_store)
    assert (killed == STATUSES.index("done")).sum() >= 3, "the search stored nothing before the kill"
    assert (killed == STATUSES.index("pending")).any(), "killed too late to test resume"

    resumed = capsweep("run", str(search_sweep))
    assert resumed.returncode == 0, resumed.stderr
    full = capsweep("run", str(grid_sweep))
    assert full.returncode == 0, full.stderr

    searched, grid = xr.open_zarr(search_store), xr.open_zarr(grid_store)
    status = searched["status"].values
    assert not (status == STATUSES.index("pending")).any(), "a finished search leaves no point pending"
    assert (status == STATUSES.index("unneeded")).sum() > 0, "the search skipped nothing on this grid"
    expected, found = capacity_table(grid), capacity_table(searched)
    assert list(found["capacity"]) == list(expected["capacity"])
    assert list(found["at_least"]) == list(expected["at_least"])
    # points the search ran are the grid's points, bitwise (a point is a function of its config and seed)
    ran = status == STATUSES.index("done")
    for name in ("recalled_count", "rate_exc_baseline_hz", "rate_exc_tail_hz", "runaway_onset_s"):
        np.testing.assert_array_equal(searched[name].values[ran], grid[name].values[ran])


@pytest.mark.e2e
def test_grown_search_with_replicates_where_they_decide_resumes_exactly(tmp_path: Path) -> None:
    """A real grown search (counts 1-4, start 2, 2 replicates first, 2 more while undecided, at most 4), killed
    after two stored points and resumed. Exact resume: a search replayed from scratch on the stored verdicts
    (each point's verdict is a function of its config and seed) asks for exactly the points the store holds as
    done, and every other point is unneeded; the capacity report fits those replicates."""
    sweep_file, store = tmp_path / "grow.toml", tmp_path / "grow.zarr"
    text = SEARCH_HEAD.format(store=store, counts='search = { low = 1, high = 4, start = 2, method = "grow", '
                                                  "first_replicates = 2, more_replicates = 2 }")
    text = text.replace("replicates = 1", "replicates = 4").replace(
        'triplet_inhibitory = { "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false }\n',
        "")
    sweep_file.write_text(text)
    first = subprocess.Popen([sys.executable, "-m", "capsweep.sweeps.cli", "run", str(sweep_file)],
                             start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and (_status(store) == STATUSES.index(DONE)).sum() < 2:
        time.sleep(0.2)
    os.killpg(first.pid, signal.SIGKILL)
    first.wait()
    killed = _status(store)
    assert (killed == STATUSES.index(DONE)).sum() >= 2 and (killed == STATUSES.index("pending")).any()
    resumed = capsweep("run", str(sweep_file))
    assert resumed.returncode == 0, resumed.stderr

    ds = xr.open_zarr(store)
    status = ds["status"].values
    assert not (status == STATUSES.index("pending")).any()
    sweep = parse_sweep(text)
    points = expand(sweep)
    done = {p.index for p in points if STATUSES[status[p.index]] in (DONE, FAILED)}
    stored = {p.index: bool(succeeds(OUTCOMES[int(ds["outcome"].values[p.index])],
                                     int(ds["recalled_count"].values[p.index]), int(ds["stuck_count"].values[p.index]),
                                     p.config["assemblies"]["count"]))
              if status[p.index] == STATUSES.index(DONE) else None for p in points if p.index in done}
    empty = np.zeros(status.shape, dtype=np.int8)
    replay = plan_search(sweep.axes[1].values, 1, {(0,): 1}, "grow", empty, empty, empty.astype(np.int32),
                         empty.astype(np.int32), False, (2, 2))
    asked = _drive(replay, lambda index: stored.get(index))
    assert set(asked) == done
    assert all(status[p.index] == STATUSES.index(UNNEEDED) for p in points if p.index not in done)
    report = json.loads(capsweep("capacity", str(store), "--format", "json").stdout)["rows"]
    assert len(report) == 1 and report[0]["replicates"] + report[0]["failed"] == len(done)
    assert report[0]["pending"] == 0
    per_count = [sum(1 for index in done if index[1] == k) for k in range(4)]
    assert all(n in (0, 2, 4) for n in per_count) and any(per_count), per_count
