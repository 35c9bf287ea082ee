"""Growing a finished sweep in place, end to end through the real CLI (Dask, Brian2, Zarr; nothing mocked).

A two-point sweep runs to the end; the same sweep with a third odour count appended and a second
replicate grows the store: the run is killed (SIGKILL of its process group) once some new points
are stored, and a rerun finishes it. The first points must stay bitwise identical. Changes that
are not appended values or more replicates are refused with one line, the store untouched.
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
import zarr
from cli_runs import capsweep, tiny_network

pytestmark = pytest.mark.e2e

SWEEP = """
[sweep]
name = "odour-grow"
store = "{store}"
replicates = {replicates}
base_seed = 11
[[sweep.axis]]
name = "n_odours"
key = "{key}"
values = {values}
[execution]
workers = 1
"""
FIRST = {"replicates": 1, "key": "assemblies.count", "values": [1, 2], "hold_s": 12.0}  # points of ~2 s: time to kill mid-growth
GROWN = {**FIRST, "replicates": 2, "values": [1, 2, 3]}
DONE = 1


def write_sweep(folder: Path, store: Path, name: str, **settings: object) -> Path:
    path = folder / name
    hold_s = settings.pop("hold_s")
    path.write_text(SWEEP.format(store=store, **settings) + tiny_network(float(str(hold_s))))
    return path


def raw_arrays(store: Path) -> dict[str, np.ndarray]:
    """Every array of the store as Zarr holds it (no xarray decoding)."""
    group = zarr.open_group(store, mode="r")
    return {name: np.asarray(group[name][...]) for name in group.array_keys()}


def status(store: Path) -> np.ndarray:
    try:
        return raw_arrays(store)["status"]
    except (KeyError, FileNotFoundError):
        return np.zeros((0, 0), dtype=np.int8)


@pytest.fixture(scope="module")
def grown(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    folder = tmp_path_factory.mktemp("grow")
    store = folder / "odour.zarr"
    first = capsweep("run", str(write_sweep(folder, store, "first.toml", **FIRST)))
    assert first.returncode == 0, first.stderr
    before = raw_arrays(store)
    sweep = write_sweep(folder, store, "grown.toml", **GROWN)
    killed = subprocess.Popen([sys.executable, "-m", "capsweep.sweeps.cli", "run", str(sweep)],
                              start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and (status(store).shape != (3, 2) or (status(store) == DONE).sum() < 3):
        time.sleep(0.2)
    os.killpg(killed.pid, signal.SIGKILL)
    killed.wait()
    at_kill = status(store)
    rerun = capsweep("run", str(sweep))
    return {"folder": folder, "store": store, "sweep": sweep, "before": before, "at_kill": at_kill, "rerun": rerun,
            "after": raw_arrays(store)}


def test_growth_survives_a_kill_and_runs_only_new_points(grown) -> None:
    at_kill, rerun = grown["at_kill"], grown["rerun"]
    assert at_kill.shape == (3, 2), "the store grew to 3 counts x 2 replicates before any new point ran"
    stored_at_kill = int((at_kill == DONE).sum())
    assert 3 <= stored_at_kill < 6, f"killed too early or too late to test resume: {stored_at_kill} of 6 done"
    assert rerun.returncode == 0 and "Warning" not in rerun.stderr, rerun.stderr
    assert f"6 points: {stored_at_kill} stored before, {6 - stored_at_kill} to run" in rerun.stderr
    after = grown["after"]
    assert (after["status"] == DONE).all()
    assert after["n_odours"].tolist() == [1, 2, 3] and after["replicate"].tolist() == [0, 1]
    assert after["assembly"].tolist() == [0, 1, 2], "the assembly dim grew to the largest new count"
    again = capsweep("run", str(grown["sweep"]))
    assert again.returncode == 0 and "0 to run" in again.stderr, again.stderr


def test_stored_points_stay_bitwise_identical(grown) -> None:
    before, after = grown["before"], grown["after"]
    assert before["status"].shape == (2, 1) and (before["status"] == DONE).all()
    for name, old in before.items():
        region = tuple(slice(0, n) for n in old.shape)
        new = after[name][region]
        if old.dtype.kind in "OTU":
            assert new.tolist() == old.tolist(), name
        else:
            assert new.dtype == old.dtype and new.tobytes() == old.tobytes(), name
    # point ids and seeds are functions of config and replicate: the first points keep theirs
    assert after["point_id"][:2, :1].tolist() == before["point_id"].tolist()
    assert len(set(after["point_id"].ravel().tolist())) == 6 and len(set(after["seed"].ravel().tolist())) == 6
    # the grown assembly entries of old points hold the fill value (NaN), not data
    assert np.isnan(after["recall_quality"][:2, 0, 2]).all()


def file_states(store: Path) -> list[tuple[str, int, int]]:
    return sorted((str(p.relative_to(store)), p.stat().st_size, p.stat().st_mtime_ns) for p in store.rglob("*"))


@pytest.mark.parametrize("change, expected", [
    ({"hold_s": 13.0}, "base config protocol.hold_s changed from 12.0 to 13.0"),
    ({"key": "protocol.imprint_repeats"}, "axis n_odours sets assemblies.count in the store but "
                                          "protocol.imprint_repeats in the sweep file"),
    ({"values": [1, 3, 4]}, "axis n_odours lost value(s) [2]"),
    ({"values": [1, 4, 2, 3]}, "must keep its stored values [1, 2, 3] first and in order"),
    ({"replicates": 1}, "replicates fell from 2 to 1"),
])
def test_changes_that_are_not_growth_are_refused(grown, change, expected) -> None:
    store = grown["store"]
    before = file_states(store)
    sweep = write_sweep(grown["folder"], store, "changed.toml", **{**GROWN, **change})
    proc = capsweep("run", str(sweep))
    assert proc.returncode == 3, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and expected in lines[0] and str(store) in lines[0], proc.stderr
    assert "Traceback" not in proc.stderr
    assert file_states(store) == before, "a refused run must not touch the store"
