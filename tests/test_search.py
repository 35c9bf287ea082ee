"""The adaptive capacity search: its bracket-and-bisect rule, its sweep-file table, and a real searched sweep.

The reference for the search is the capacity definition itself, applied to the full grid
(``capsweep.sweeps.capacity.capacity_table``): a search must find the capacity the full grid gives.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from cli_runs import capsweep
from hypothesis import given
from hypothesis import strategies as st

from capsweep.errors import ConfigError
from capsweep.flags import STATUSES
from capsweep.sweeps.capacity import capacity_table
from capsweep.sweeps.search import ConditionSearch
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
