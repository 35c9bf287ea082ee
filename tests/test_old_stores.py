"""Stores written by earlier capsweep releases: every read command reads them, `capsweep upgrade` brings them to
this schema crash-safely, and a run of their sweep file then computes nothing.

The fixtures were written by capsweep at the commit of each schema (2.0: 39a272a, 2.1: 551b9ed) from
``fixtures/odour-fixture.toml``: 2 odour counts x 2 rules (full, triplet STDP alone) x 2 replicates, 200 E
cells. Expected values come from the fixture's arrays read with zarr alone, never through capsweep.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import zarr
from cli_runs import capsweep
from typer.testing import CliRunner, Result

from capsweep.flags import OUTCOMES, STABLE, STATUSES
from capsweep.results_schema import attrs, layout
from capsweep.results_schema.dataset import open_dataset
from capsweep.results_schema.first_defaults import ADDED_IN_3_0, schema_2_defaults
from capsweep.results_schema.journal import JOURNAL
from capsweep.results_schema.store import stored_attrs, stored_variables
from capsweep.sweeps.cli import app
from capsweep.sweeps.expand import Grid, recorded_points
from capsweep.sweeps.identity import open_or_create
from capsweep.sweeps.ids import id_entries
from capsweep.sweeps.sweepfile import parse_sweep

FIXTURES = Path(__file__).parent / "fixtures"
SWEEP = FIXTURES / "odour-fixture.toml"
STORES = {"2.0": "schema20.zarr", "2.1": "schema21.zarr"}
"""Fixture store of each earlier schema version."""


def invoke(*args: str | Path) -> Result:
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture(params=sorted(STORES))
def old_store(request: pytest.FixtureRequest, tmp_path: Path) -> Path:
    """A copy of the fixture store of one earlier schema version."""
    return copy_fixture(request.param, tmp_path)


def copy_fixture(version: str, folder: Path) -> Path:
    path = folder / STORES[version]
    shutil.copytree(FIXTURES / STORES[version], path)
    return path


def files(path: Path, metadata: bool = True) -> dict[str, bytes]:
    """Every file of the store at ``path`` (with ``metadata=False``: data files only, no zarr.json) and its bytes;
    capsweep's own lock and journal left out."""
    return {str(p.relative_to(path)): p.read_bytes() for p in sorted(path.rglob("*"))
            if p.is_file() and (metadata or p.name != "zarr.json") and not p.relative_to(path).parts[0].startswith(
                ".capsweep.")}


def moved(data: dict[str, bytes]) -> dict[str, bytes]:
    """Data files of a 2.x store where a 3.x store keeps them: the 2.x recalled_count is overlap_recalled_count."""
    return {name.replace("recalled_count/", "overlap_recalled_count/") if name.startswith("recalled_count/")
            else name: data for name, data in data.items()}


def raw(path: Path, name: str) -> np.ndarray:
    """A stored array as zarr reads it, flattened over the sweep dims (sweep order) with inner dims kept."""
    values = np.asarray(zarr.open_array(path / name, mode="r")[...])
    return values.reshape(8, *values.shape[3:])


def test_the_read_commands_read_an_old_store_and_change_nothing(old_store: Path, tmp_path: Path) -> None:
    before = files(old_store)
    outcome, recalled = raw(old_store, "outcome"), raw(old_store, "recalled_count")
    stable = outcome == OUTCOMES.index(STABLE)

    status = invoke("status", old_store)
    assert status.exit_code == 0, status.output
    assert f"done {np.sum(raw(old_store, 'status') == STATUSES.index('done'))}," in status.stdout
    assert f"stable {stable.sum()}, runaway {np.sum(outcome == OUTCOMES.index('runaway'))}" in status.stdout

    query = invoke("query", old_store, "--all", "--format", "csv")
    assert query.exit_code == 0, query.output
    table = pd.read_csv(io.StringIO(query.stdout))
    np.testing.assert_array_equal(table["overlap_recalled_count"], recalled)  # the 2.x count, under its 3.x name
    assert table["recalled_count"].isna().all(), "the 3.x recall test never ran for a 2.x point"
    # CSV holds floats to 15 significant digits (query.CSV_DIGITS): equal up to the 16th
    np.testing.assert_allclose(table["rate_exc_baseline_hz"], raw(old_store, "rate_exc_baseline_hz"), rtol=1e-14)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a point with no assembly scored: all NaN
        lowest = np.nanmin(raw(old_store, "recall_score"), axis=1)
    np.testing.assert_allclose(table["recall_score_min"], lowest, rtol=1e-14)

    per_count = invoke("capacity", old_store, "--per-count", "--format", "csv")
    assert per_count.exit_code == 0, per_count.output
    counts = pd.read_csv(io.StringIO(per_count.stdout)).set_index(["rule", "n_odours"])
    done = (raw(old_store, "status") == STATUSES.index("done")).reshape(2, 2, 2).sum(axis=2)  # n_odours x rule
    for i, count in enumerate((1, 2)):
        for j, rule in enumerate(("full", "triplet_only")):
            assert counts.loc[(rule, count), "n"] == done[i, j], (rule, count)
            # [derived] success needs the 3.x recall test's recalled_count, missing for every 2.x point
            assert counts.loc[(rule, count), "successes"] == 0, (rule, count)

    plots = invoke("plot", old_store, "--out", tmp_path / "plots")
    assert plots.exit_code == 0, plots.output
    assert (tmp_path / "plots" / "stability_map.png").stat().st_size > 0

    exported = invoke("export", old_store, "--netcdf", tmp_path / "all.nc", "--csv", tmp_path / "points.csv")
    assert exported.exit_code == 0, exported.output
    import netCDF4

    with netCDF4.Dataset(tmp_path / "all.nc") as nc:
        within = nc["weight_within"]
        assert within.units == "1" and within.relative_to == "g_leak"
        assert np.asarray(within[:].filled(np.nan)).reshape(8, -1).tobytes() == raw(old_store, "weight_within").tobytes()
    assert len(pd.read_csv(tmp_path / "points.csv")) == 8
    assert files(old_store) == before, "a read command changed the store"


def test_upgrade_keeps_every_stored_value(old_store: Path) -> None:
    data = files(old_store, metadata=False)
    version = json.loads((old_store / "zarr.json").read_text())["attributes"][attrs.SCHEMA]
    upgraded = invoke("upgrade", old_store)
    assert upgraded.exit_code == 0, upgraded.output
    assert f"upgraded from store schema {version} to {layout.SCHEMA_VERSION}" in upgraded.stdout
    assert "already has" in invoke("upgrade", old_store).stdout
    root = json.loads((old_store / "zarr.json").read_text())["attributes"]
    assert root[attrs.SCHEMA] == layout.SCHEMA_VERSION
    assert f"upgraded from store schema {version}" in root[attrs.HISTORY].splitlines()[-1]

    assert files(old_store, metadata=False) == moved(data), "the upgrade changed a stored value"
    ds = open_dataset(old_store)
    assert set(ds[layout.WRITER_VERSION].values.ravel()) == {""}, "points written before 3.1 name no writer"
    assert set(stored_variables()) <= set(ds.variables), "the upgrade left out a variable of the current layout"
    for name in ("threads", "weight_between", "upper_share_within", "upper_share_between", "upper_share_other"):
        assert bool(ds[name].isnull().all()), f"{name} (new in 3.0) was never computed for a 2.x point"
    assert zarr.open_array(old_store / "threads", mode="r").dtype == np.dtype(layout.BY_NAME["threads"].dtype)
    assert ds.sizes["age"] == ds.sizes["assembly"], "the age dim (new in 3.2) is as long as assembly, as in a new store"
    for name in ("retention_tested", "age_recalled", "age_tested", "age_score", "age_s"):
        assert bool(ds[name].isnull().all()), f"{name} (new in 3.2) was never computed for a 2.x point"


def test_after_the_upgrade_the_old_sweep_file_runs_nothing(old_store: Path) -> None:
    data = files(old_store, metadata=False)
    assert invoke("upgrade", old_store).exit_code == 0
    # the ids the upgraded store's record gives the old sweep are the ids the old release wrote, read with zarr alone
    stored_ids = np.asarray(zarr.open_array(old_store / layout.POINT_ID, mode="r")[...])
    points = recorded_points(stored_attrs(old_store), stored_ids.shape)
    assert [p.point_id for p in points] == list(stored_ids.ravel())
    run = capsweep("run", str(SWEEP), "--store", str(old_store))
    said = " ".join((run.stdout + run.stderr).split())
    assert run.returncode == 0, said
    assert "0 to run nothing to run: 8 of 8 points were already stored" in said, said
    assert files(old_store, metadata=False) == moved(data), "upgrade or run changed a stored value"


def test_a_grown_upgraded_store_keeps_the_ids_of_its_old_points(old_store: Path) -> None:
    """Growth rewrites the store's record of its defaults table (today's keys filled in); the keys its ids hash whole
    stay those of the 2.x table, so no old id moves, and the points added hash no key that is at today's default."""
    assert invoke("upgrade", old_store).exit_code == 0
    old_ids = np.asarray(zarr.open_array(old_store / layout.POINT_ID, mode="r")[...])
    grown = parse_sweep(SWEEP.read_text().replace("replicates = 2", "replicates = 3"), SWEEP, old_store)
    store, grid = open_or_create(Grid(grown))
    store.close()
    ids = np.asarray(zarr.open_array(old_store / layout.POINT_ID, mode="r")[...])
    assert ids.shape == (*old_ids.shape[:-1], 3)
    np.testing.assert_array_equal(ids[..., :2], old_ids)
    recorded = stored_attrs(old_store)
    assert sorted(recorded[attrs.ID_WHOLE_KEYS]) == sorted(schema_2_defaults())
    new_point = grid.point((0, 0, 2))
    assert new_point.point_id == ids[0, 0, 2]
    assert not set(ADDED_IN_3_0) & set(id_entries(grid.flat((0, 0)), grid.basis)), "a key at its default was hashed"


CHILD = """
import os, pathlib, shutil, sys, time
hook, at, ready = sys.argv[2], int(sys.argv[3]), pathlib.Path(sys.argv[4])
real = getattr(os if hook == "replace" else shutil, {"replace": "replace", "rmtree": "rmtree"}[hook])
calls = []
def paused(*args, **kwargs):
    if ".capsweep.lock" in str(args[-1]) or not str(args[-1]).startswith(sys.argv[1]):  # the lock's, not the store's
        return real(*args, **kwargs)
    if len(calls) == at:
        ready.touch()
        time.sleep(600)
    calls.append(args)
    return real(*args, **kwargs)
setattr(os if hook == "replace" else shutil, hook, paused)
from capsweep.results_schema.upgrade import upgrade_store
upgrade_store(sys.argv[1])
"""


def kill_upgrade_at(path: Path, hook: str, at: int) -> None:
    """Run an upgrade of ``path`` in a child process and kill -9 it at call ``at`` of os.replace or shutil.rmtree
    (on the store's files, the lock's left alone)."""
    ready = path.parent / "paused"
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(path), hook, str(at), str(ready)])
    deadline = time.monotonic() + 120
    while not ready.exists() and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    assert ready.exists(), "the upgrade never reached the point to kill it at"
    os.kill(child.pid, signal.SIGKILL)
    child.wait()


@pytest.mark.parametrize(("hook", "at", "after"), [
    ("replace", 0, "2.1"),  # journal written, not committed
    ("replace", 1, layout.SCHEMA_VERSION),  # committed, nothing moved yet
    ("replace", 3, layout.SCHEMA_VERSION),  # half the files moved
    ("rmtree", 0, layout.SCHEMA_VERSION),  # every file moved, the journal not yet removed
])
def test_an_upgrade_killed_at_any_moment_leaves_the_old_or_the_new_layout(tmp_path: Path, hook: str, at: int,
                                                                         after: str) -> None:
    path = copy_fixture("2.1", tmp_path)
    data = files(path, metadata=False)
    kill_upgrade_at(path, hook, at)

    assert stored_attrs(path)[attrs.SCHEMA] == after  # an open finishes a committed upgrade
    root = json.loads((path / "zarr.json").read_text())
    for name, meta in root["consolidated_metadata"]["metadata"].items():
        assert json.loads((path / name / "zarr.json").read_text()) == meta, f"{name}: old and new layout mixed"
    assert open_dataset(path)["weight_in"].attrs["units"] == "1"
    assert files(path, metadata=False) == (data if after == "2.1" else moved(data))

    again = invoke("upgrade", path)
    assert again.exit_code == 0, again.output
    assert not (path / JOURNAL).exists()
    reference = copy_fixture("2.1", tmp_path / "uninterrupted")
    invoke("upgrade", reference)
    assert files(path).keys() == files(reference).keys()
    for name in files(path):
        if name.endswith("zarr.json") and name != "zarr.json":
            assert (path / name).read_bytes() == (reference / name).read_bytes(), name
