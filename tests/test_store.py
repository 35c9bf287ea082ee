"""Result store and lock: a real Zarr v3 directory in tmp_path, read back with plain xarray."""

from __future__ import annotations

import os
import re
import socket
import subprocess
import sys
import threading
import time
import warnings
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import zarr

from capsweep.axes import key_axis
from capsweep.errors import StoreError
from capsweep.flags import OUTCOMES, STATUSES
from capsweep.locks import STORE_LOCK_NAME as LOCK_NAME
from capsweep.locks import holder, store_lock
from capsweep.results_schema import layout
from capsweep.results_schema import store as store_module
from capsweep.results_schema.dataset import flag_labels, open_dataset
from capsweep.results_schema.layout import GridSpec
from capsweep.results_schema.store import (
    GROWING_NAME,
    STRING_VARIABLES,
    Batching,
    ResultStore,
    create_store,
    grow_store,
    point_block,
)

AXES = (
    key_axis("n_assemblies", "assemblies.count", (1, 2, 4)),
    key_axis("beta", "plasticity.heterosynaptic.beta", (0.0, 0.05)),
    key_axis("imprint", "assemblies.imprint", ("prewired", "learned")),
)
REPLICATES = 2
SHAPE = (3, 2, 2, REPLICATES)
GRID = GridSpec(axes=AXES, replicates=REPLICATES, n_assembly=4, n_snapshot=3, n_time_bin=50, time_bin_s=0.01,
                fingerprint="grid-a", attrs={"sweep_name": "odour-capacity-test", "sweep_file": "[sweep]\n"})
SEEDS = np.arange(np.prod(SHAPE), dtype=np.int64).reshape(SHAPE) * 7919 + 2**40
POINT_IDS = np.array([f"odour-{i:03d}" for i in range(np.prod(SHAPE))], dtype=object).reshape(SHAPE)


def make_store(tmp_path: Path) -> Path:
    path = tmp_path / "odour.zarr"
    create_store(path, GRID, POINT_IDS, SEEDS)
    return path


def plain_open(path: Path, **kwargs) -> xr.Dataset:
    """xr.open_zarr as a user would call it, with every warning turned into an error.

    Tests after the first pass chunks=None (no dask graph of one task per point and variable).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return xr.open_zarr(path, **kwargs).load()


def point_result(n_assemblies: int, recalled: int) -> dict:
    """A result as the runner returns it: flags as labels, inner arrays shorter than their dims."""
    return {
        "outcome": "runaway", "engine": "cython", "runaway_onset_s": 7.5, "recalled_count": recalled,
        "rate_exc_baseline_hz": 2.8, "rate_inh_baseline_hz": 7.4, "isi_cv_exc": 0.9, "rate_exc_hold_end_hz": 15.5,
        "imprint_contrast": np.nan, "wall_time_s": 12.25, "setup_time_s": 0.5, "simulated_time_s": 9.0, "n_synapses": 80000,
        "recall_quality": np.linspace(0.9, 0.6, n_assemblies), "persistence": np.full(n_assemblies, 0.1),
        "completion": np.full(n_assemblies, 0.8), "spurious": np.full(n_assemblies, 0.02),
        "cross_talk": np.full(n_assemblies, 0.05), "weight_correlation": [1.0, 0.97],
        "assembly_contrast": [5.0, 4.8], "snapshot_time_s": [1.0, 5.5],
        "rate_exc_hz": np.arange(30, dtype=float), "rate_inh_hz": np.arange(30, dtype=float) * 2,
        "rate_exc_tail_hz": 3.1, "recall_score": np.linspace(0.95, 0.7, n_assemblies),
        "persistence_score": np.full(n_assemblies, 0.2), "recall_contrast": np.full(n_assemblies, 4.0),
        "cue_time_s": 8.0 + 0.7 * np.arange(n_assemblies), "retention_s": np.full(n_assemblies, 7.0),
        "retention_delay_s": [7.0], "retention_recalled": [recalled], "retention_score": [0.8],
        "retention_tested": [n_assemblies], "age_recalled": np.full(n_assemblies, -1), "age_tested": np.full(n_assemblies, -1),
        "age_score": np.full(n_assemblies, np.nan), "age_s": np.full(n_assemblies, np.nan),
        "weight_in": [0.05, 0.06], "weight_out": [0.05, 0.04], "weight_within": [0.25, 0.27],
        "overlap_recalled_count": recalled, "already_active_count": 1, "stuck_count": 0,
        "recall_state": ["already_active"] + ["recalled"] * (n_assemblies - 1),
        "evoked_completion_hz": np.full(n_assemblies, 12.5), "recall_p_value": np.full(n_assemblies, 0.002),
        "recall_p_cells": np.full(n_assemblies, 0.001), "recall_p_times": np.full(n_assemblies, 0.002),
        "recall_z": np.full(n_assemblies, 4.2), "precue_rate_hz": np.full(n_assemblies, 2.5),
        "stuck_onset_s": np.full(n_assemblies, np.nan), "test_position": np.arange(n_assemblies)[::-1],
        "weight_between": [0.05, 0.05], "threads": 1, "upper_share_within": [np.nan, np.nan],
        "upper_share_between": [np.nan, np.nan], "upper_share_other": [np.nan, np.nan],
    }


def test_template_opens_with_plain_xarray(tmp_path):
    ds = plain_open(make_store(tmp_path))  # exactly xr.open_zarr(path)
    assert dict(ds.sizes) == {"n_assemblies": 3, "beta": 2, "imprint": 2, "replicate": 2,
                              "assembly": 4, "snapshot": 3, "time_bin": 50, "retention": 1, "age": 4}
    assert ds.n_assemblies.values.tolist() == [1, 2, 4]
    assert ds.beta.values.tolist() == [0.0, 0.05]
    assert ds.imprint.values.tolist() == ["prewired", "learned"]
    assert ds.replicate.values.tolist() == [0, 1]
    assert ds.beta.attrs["config_key"] == "plasticity.heterosynaptic.beta"
    np.testing.assert_allclose(ds.time_bin.values, np.arange(50) * 0.01)
    assert ds.time_bin.attrs["units"] == "s"
    expected = {v.name for v in layout.VARIABLES} | {layout.STATUS.name, *STRING_VARIABLES}
    assert set(ds.data_vars) == expected
    for name in expected | set(ds.coords):
        assert ds[name].attrs["units"] and ds[name].attrs["long_name"], name
    for var in layout.VARIABLES:
        assert ds[var.name].dims == ("n_assemblies", "beta", "imprint", "replicate",
                                     *((var.inner,) if var.inner else ())), var.name
        assert ds[var.name].attrs["units"] == var.units
        if var.name != "seed":
            assert ds[var.name].isnull().all(), var.name  # fill decodes to NaN
    outcome = ds.outcome
    assert outcome.attrs["flag_meanings"].split() == list(OUTCOMES)
    assert list(outcome.attrs["flag_values"]) == list(range(len(OUTCOMES)))
    assert outcome.encoding["_FillValue"] == layout.FLAG_FILL
    assert ds.status.dtype == np.int8 and (ds.status == STATUSES.index("pending")).all()
    assert ds.status.attrs["flag_meanings"].split() == list(STATUSES)
    assert (ds.error == "").all()
    np.testing.assert_array_equal(ds.seed.values, SEEDS)
    assert ds.seed.dtype == np.int64
    assert ds.point_id.values.tolist() == POINT_IDS.tolist()


def test_template_root_attrs_and_point_chunks(tmp_path):
    path = make_store(tmp_path)
    ds = plain_open(path, chunks=None)
    assert ds.attrs["capsweep_schema_version"] == layout.SCHEMA_VERSION
    assert ds.attrs["capsweep_fingerprint"] == "grid-a"
    assert ds.attrs["sweep_name"] == "odour-capacity-test" and ds.attrs["sweep_file"] == "[sweep]\n"
    created = datetime.fromisoformat(ds.attrs["created_utc"])
    assert created.utcoffset().total_seconds() == 0
    assert ds.attrs["version_zarr"] == zarr.__version__ and ds.attrs["version_xarray"] == xr.__version__
    for name in ("capsweep", "brian2", "numpy", "dask"):
        assert ds.attrs[f"version_{name}"], name
    group = zarr.open_group(path, mode="r")
    # 24 points x 50 rate bins x 8 bytes fit one file of FILE_BYTES: the whole variable is one chunk (file)
    assert group["rate_exc_hz"].chunks == (3, 2, 2, 2, 50)
    assert group["recall_quality"].chunks == (3, 2, 2, 2, 4)
    assert group["status"].chunks == (3, 2, 2, 2)


def test_point_block_takes_whole_trailing_dims_first():
    assert point_block((4, 50, 10), 600) == (1, 50, 10)  # 10 replicates, then min(50, 600 // 10) counts
    assert point_block((4, 50, 10), 64) == (1, 6, 10)  # 64 // 10 = 6 counts of 10 replicates
    assert point_block((4, 50, 10), 4) == (1, 1, 4)
    assert point_block((3, 2), 4096) == (3, 2)  # never larger than the grid


def test_write_point_reads_back_padded(tmp_path):
    path = make_store(tmp_path)
    store = ResultStore.open(path, fingerprint="grid-a")
    store.write_point((1, 0, 1, 1), point_result(n_assemblies=2, recalled=2))
    ds = plain_open(path, chunks=None)
    point = ds.isel(n_assemblies=1, beta=0, imprint=1, replicate=1)
    assert int(point.status) == STATUSES.index("done")
    assert flag_labels(point.outcome).item() == "runaway" and flag_labels(point.engine).item() == "cython"
    assert np.isnan(point.predicted_outcome)
    assert float(point.runaway_onset_s) == 7.5 and int(point.recalled_count) == 2
    assert int(point.n_synapses) == 80000 and np.isnan(point.imprint_contrast)
    np.testing.assert_allclose(point.recall_quality.values, [0.9, 0.6, np.nan, np.nan])
    # a flag variable over the assembly dim: labels in, codes out, padding as the fill value (unset)
    assert flag_labels(point.recall_state).values.tolist() == ["already_active", "recalled", "", ""]
    np.testing.assert_array_equal(point.test_position.values, [1, 0, np.nan, np.nan])  # -1 is the _FillValue
    np.testing.assert_allclose(point.snapshot_time_s.values, [1.0, 5.5, np.nan])
    np.testing.assert_allclose(point.rate_inh_hz.values[:30], np.arange(30) * 2.0)
    assert np.isnan(point.rate_inh_hz.values[30:]).all()
    assert point.error.item() == ""
    others = ds.status.values.copy()
    others[1, 0, 1, 1] = STATUSES.index("pending")
    assert (others == 0).all()
    assert ds.rate_exc_hz.isnull().sum() == ds.rate_exc_hz.size - 30  # no other point touched


def test_interrupted_write_reads_as_pending(tmp_path, monkeypatch):
    """Data written but the process died before the status write: the point must not look done."""
    path = make_store(tmp_path)
    store = ResultStore.open(path)
    real = store_module._set_points

    def die_at_status(array, values):
        if array.basename == "status":
            raise KeyboardInterrupt  # the process dies between the data and the status write
        real(array, values)

    monkeypatch.setattr(store_module, "_set_points", die_at_status)
    with pytest.raises(KeyboardInterrupt):
        store.write_point((0, 0, 0, 0), {**point_result(1, 1), "wall_time_s": 3.5})
    monkeypatch.undo()
    reopened = ResultStore.open(path)
    assert reopened.status()[0, 0, 0, 0] == STATUSES.index("pending")
    ds = plain_open(path, chunks=None)
    assert float(ds.wall_time_s[0, 0, 0, 0]) == 3.5  # the data did reach the disk
    assert int(ds.status[0, 0, 0, 0]) == STATUSES.index("pending")


def test_write_that_fails_midway_leaves_the_point_pending(tmp_path):
    """A data write that fails (here: a file where a chunk folder must go) must stop before status."""
    path = make_store(tmp_path)
    (path / "rate_exc_hz" / "c").write_text("blocks every rate_exc_hz chunk")
    store = ResultStore.open(path)
    with pytest.raises(OSError):
        store.write_point((0, 0, 0, 0), point_result(1, 1))
    assert ResultStore.open(path).status()[0, 0, 0, 0] == STATUSES.index("pending")


def test_failure_carries_error_text_and_clears_results(tmp_path):
    path = make_store(tmp_path)
    store = ResultStore.open(path)
    store.write_point((2, 1, 0, 0), {**point_result(4, 2), "wall_time_s": 3.5})  # an earlier attempt, rerun
    store.write_failure((2, 1, 0, 0), "BrianObjectException: odour cue group has no members")
    ds = plain_open(path, chunks=None)
    point = ds.isel(n_assemblies=2, beta=1, imprint=0, replicate=0)
    assert int(point.status) == STATUSES.index("failed")
    assert point.error.item() == "BrianObjectException: odour cue group has no members"
    assert np.isnan(point.wall_time_s) and point.rate_exc_hz.isnull().all()
    assert int(point.seed) == SEEDS[2, 1, 0, 0]


def test_prediction_is_stored_with_the_point(tmp_path):
    path = make_store(tmp_path)
    store = ResultStore.open(path)
    store.write_point((0, 1, 0, 1), {**point_result(1, 0), "predicted_outcome": "silent"})
    point = plain_open(path, chunks=None).isel(n_assemblies=0, beta=1, imprint=0, replicate=1)
    assert flag_labels(point.predicted_outcome).item() == "silent"
    assert flag_labels(point.outcome).item() == "runaway"


def test_write_point_rejects_results_that_break_the_layout(tmp_path):
    store = ResultStore.open(make_store(tmp_path))
    with pytest.raises(ValueError, match="exploded"):
        store.write_point((0, 0, 0, 0), {**point_result(1, 1), "outcome": "exploded"})
    with pytest.raises(ValueError, match="rate_exc_hz"):
        store.write_point((0, 0, 0, 0), {**point_result(1, 1), "rate_exc_hz": np.zeros(51)})
    with pytest.raises(ValueError, match="missing"):
        store.write_point((0, 0, 0, 0), {k: v for k, v in point_result(1, 1).items() if k != "isi_cv_exc"})
    with pytest.raises(ValueError, match="seed"):
        store.write_point((0, 0, 0, 0), {**point_result(1, 1), "seed": int(SEEDS[0, 0, 0, 0]) + 1})
    with pytest.raises(IndexError):
        store.write_point((3, 0, 0, 0), point_result(1, 1))
    assert (store.status() == STATUSES.index("pending")).all()


def test_open_refuses_missing_foreign_and_mismatched_stores(tmp_path):
    missing = tmp_path / "nowhere.zarr"
    with pytest.raises(StoreError, match=str(missing)):
        ResultStore.open(missing)
    path = make_store(tmp_path)
    with pytest.raises(StoreError, match=str(path)) as mismatch:
        ResultStore.open(path, fingerprint="grid-b")
    assert "grid-a" in str(mismatch.value) and "grid-b" in str(mismatch.value)
    foreign = tmp_path / "foreign.zarr"
    zarr.create_group(foreign, zarr_format=3)
    with pytest.raises(StoreError, match="not a capsweep result store"):
        ResultStore.open(foreign)
    with pytest.raises(StoreError, match="not a capsweep result store"):
        open_dataset(foreign)
    zarr.open_group(path, mode="r+", use_consolidated=False).attrs["capsweep_schema_version"] = "0.9"
    with pytest.raises(StoreError, match="schema version 0.9"):
        ResultStore.open(path)


def test_coordinates_carry_the_axes_with_their_units(tmp_path):
    ds = plain_open(make_store(tmp_path), chunks=None)
    assert list(ds["status"].dims) == ["n_assemblies", "beta", "imprint", "replicate"]
    for axis in AXES:
        assert tuple(ds[axis.name].values.tolist()) == axis.values
        assert ds[axis.name].attrs["config_key"] == axis.key
        assert ds[axis.name].attrs["units"] == axis.units and ds[axis.name].attrs["long_name"] == axis.long_name
    assert ds["seed"].values.tolist() == SEEDS.tolist()


def test_create_refuses_an_existing_path_and_leaves_it_intact(tmp_path):
    path = make_store(tmp_path)
    ResultStore.open(path).write_point((0, 0, 0, 0), point_result(1, 1))
    other = GridSpec(**{**GRID.__dict__, "fingerprint": "grid-b"})
    with pytest.raises(StoreError, match="already exists"):
        create_store(path, other, POINT_IDS, SEEDS)
    reopened = ResultStore.open(path, fingerprint="grid-a")
    assert reopened.status()[0, 0, 0, 0] == STATUSES.index("done")
    plain_dir = tmp_path / "notes"
    plain_dir.mkdir()
    (plain_dir / "odour-log.txt").write_text("keep me")
    with pytest.raises(StoreError, match="already exists"):
        create_store(plain_dir, GRID, POINT_IDS, SEEDS)
    assert [p.name for p in plain_dir.iterdir()] == ["odour-log.txt"]


def test_create_rejects_ids_of_the_wrong_shape_without_leaving_a_directory(tmp_path):
    with pytest.raises(ValueError, match="point_ids"):
        create_store(tmp_path / "bad.zarr", GRID, POINT_IDS[..., :1], SEEDS)
    assert not (tmp_path / "bad.zarr").exists()


def dead_pid() -> int:
    """Pid of a process that has exited and been reaped."""
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def write_lock(path: Path, host: str, pid: int, as_file: bool = False) -> Path:
    """A store lock held by ``pid`` on ``host``; ``as_file``: the lock file earlier capsweep versions wrote."""
    lock = path / LOCK_NAME
    record = f'{{"host": "{host}", "pid": {pid}, "since": "2026-12-01T10:00:00+00:00"}}'
    if as_file:
        lock.write_text(record)
    else:
        lock.mkdir()
        (lock / "holder.json").write_text(record)
    return lock


def test_lock_refuses_a_second_holder(tmp_path):
    path = make_store(tmp_path)
    with store_lock(path):
        with pytest.raises(StoreError) as refused:
            with store_lock(path):
                pass
    message = str(refused.value)
    assert f"pid {os.getpid()}" in message and socket.gethostname() in message
    assert str(path / LOCK_NAME) in message
    assert not (path / LOCK_NAME).exists()


def test_lock_held_by_a_live_process_is_respected(tmp_path):
    path = make_store(tmp_path)
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        lock = write_lock(path, socket.gethostname(), sleeper.pid)
        with pytest.raises(StoreError, match=f"pid {sleeper.pid}"):
            with store_lock(path):
                pass
        assert lock.exists()
    finally:
        sleeper.kill()
        sleeper.wait()


@pytest.mark.parametrize("as_file", [False, True])
def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path, as_file):
    path = make_store(tmp_path)
    lock = write_lock(path, socket.gethostname(), dead_pid(), as_file)
    with store_lock(path):
        assert holder(lock)["pid"] == os.getpid()
    assert not lock.exists()


def test_lock_from_another_host_is_never_taken_over(tmp_path):
    path = make_store(tmp_path)
    write_lock(path, "olfactory-node-7", dead_pid())
    with pytest.raises(StoreError, match="olfactory-node-7"):
        with store_lock(path):
            pass


@pytest.mark.parametrize("interrupt", [RuntimeError, KeyboardInterrupt])
def test_lock_is_released_when_the_block_raises(tmp_path, interrupt):
    path = make_store(tmp_path)
    with pytest.raises(interrupt):
        with store_lock(path):
            raise interrupt()
    assert not (path / LOCK_NAME).exists()
    with store_lock(path):
        pass


def test_lock_leaves_the_store_readable(tmp_path):
    path = make_store(tmp_path)
    with store_lock(path):
        ResultStore.open(path).write_point((0, 0, 0, 0), point_result(1, 1))
        assert int(plain_open(path, chunks=None).status[0, 0, 0, 0]) == STATUSES.index("done")


def test_lock_on_a_missing_store_names_it(tmp_path):
    with pytest.raises(StoreError, match="nowhere.zarr"):
        with store_lock(tmp_path / "nowhere.zarr"):
            pass


def test_batched_points_reach_the_disk_together_data_before_status(tmp_path):
    path = make_store(tmp_path)
    store = ResultStore.open(path, batching=Batching(points=3, delay_s=0))
    store.write_point((0, 0, 0, 0), point_result(1, 1))
    store.write_failure((1, 0, 0, 0), "odour cue group has no members")
    on_disk = ResultStore.open(path)
    assert (on_disk.status() == STATUSES.index("pending")).all(), "a batch of 3 is not written before its third point"
    store.write_point((2, 0, 0, 1), point_result(4, 3))
    status = ResultStore.open(path).status()
    assert [status[0, 0, 0, 0], status[1, 0, 0, 0], status[2, 0, 0, 1]] == [1, 2, 1]
    store.write_point((0, 1, 0, 0), point_result(1, 0))  # buffered, then the writer dies without closing
    del store
    assert ResultStore.open(path).status()[0, 1, 0, 0] == STATUSES.index("pending"), "unflushed points rerun"


def test_a_batch_is_written_within_its_delay_without_further_points(tmp_path):
    path = make_store(tmp_path)
    with ResultStore.open(path, batching=Batching(points=100, delay_s=0.2)) as store:
        store.write_point((0, 0, 0, 0), point_result(1, 1))
        deadline = time.monotonic() + 30  # generous: a loaded machine delays the flush thread, not the rule
        while time.monotonic() < deadline and int(ResultStore.open(path).status()[0, 0, 0, 0]) == 0:
            time.sleep(0.05)
        # Written while the store is still open and no further point came: only the delay timer can have flushed it.
        assert int(ResultStore.open(path).status()[0, 0, 0, 0]) == STATUSES.index("done")


def test_the_writer_thread_never_makes_the_caller_wait_for_a_write_in_progress(tmp_path, monkeypatch):
    """While the writer thread is inside a batch's write, new points are buffered at once; they reach the disk (data,
    then status) with the next batch, after the first."""
    path = make_store(tmp_path)
    inside, release = threading.Event(), threading.Event()
    real = store_module._set_points

    def held_write(array, values):
        inside.set()
        assert release.wait(60), "the test never released the write"
        real(array, values)

    monkeypatch.setattr(store_module, "_set_points", held_write)
    store = ResultStore.open(path, batching=Batching(points=2, delay_s=60))
    store.write_point((0, 0, 0, 0), point_result(1, 1))
    store.write_point((1, 0, 0, 0), point_result(2, 1))  # a full batch: the writer thread takes it and stops inside
    assert inside.wait(30), "the writer thread did not start the full batch"
    started = time.monotonic()
    store.write_point((2, 0, 0, 1), point_result(4, 3))
    store.write_failure((0, 1, 0, 0), "odour cue group has no members")
    assert time.monotonic() - started < 5, "the caller waited for the write in progress"
    assert (ResultStore.open(path).status() == STATUSES.index("pending")).all()
    release.set()
    store.close()
    monkeypatch.undo()
    status = ResultStore.open(path).status()
    assert [status[0, 0, 0, 0], status[1, 0, 0, 0], status[2, 0, 0, 1], status[0, 1, 0, 0]] == [1, 1, 1, 2]
    assert float(plain_open(path, chunks=None).rate_exc_hz[2, 0, 0, 1, 29]) == 29.0


def test_a_failed_write_of_the_writer_thread_leaves_its_batch_pending_and_reaches_the_caller(tmp_path, monkeypatch):
    path = make_store(tmp_path)
    real = store_module._set_points

    def full_disk(array, values):
        if array.basename == "rate_exc_hz":
            raise OSError(28, "No space left on device")
        real(array, values)

    monkeypatch.setattr(store_module, "_set_points", full_disk)
    store = ResultStore.open(path, batching=Batching(points=2, delay_s=60))
    store.write_point((0, 0, 0, 0), point_result(1, 1))
    store.write_point((1, 0, 0, 0), point_result(2, 1))
    deadline = time.monotonic() + 30
    with pytest.raises(OSError, match="No space left"):
        while time.monotonic() < deadline:  # raised by the first call after the writer thread failed
            store.write_failure((0, 1, 0, 0), "odour cue group has no members")
            time.sleep(0.05)
    monkeypatch.undo()
    store.write_point((2, 0, 0, 1), point_result(4, 3))  # written by the caller from now on
    store.close()
    status = ResultStore.open(path).status()
    assert [status[0, 0, 0, 0], status[1, 0, 0, 0], status[2, 0, 0, 1]] == [0, 0, 1], "no status without its data"


KILLED_WRITER = """
import sys
from capsweep.results_schema.store import ResultStore
store = ResultStore.open(sys.argv[1])
print("ready", flush=True)
k = 0
while True:  # rewrite the files shared with the stored point, until killed
    k += 1
    store.write_failure((0, 0, 1, 1), f"attempt {k}")
"""


def test_a_writer_killed_mid_rewrite_leaves_the_other_points_of_the_file_intact(tmp_path):
    """Zarr rewrites a file through a temporary file renamed over it: a kill never leaves a torn file."""
    path = make_store(tmp_path)
    ResultStore.open(path).write_point((0, 0, 0, 0), point_result(1, 1))
    kept = xr.open_zarr(path, chunks=None).isel(n_assemblies=0, beta=0, imprint=0, replicate=0).load()
    for delay in (0.05, 0.13, 0.31):
        writer = subprocess.Popen([sys.executable, "-c", KILLED_WRITER, str(path)], stdout=subprocess.PIPE, text=True)
        assert writer.stdout is not None and writer.stdout.readline().strip() == "ready"
        time.sleep(delay)
        writer.kill()
        writer.wait()
        ds = xr.open_zarr(path, chunks=None).load()
        point = ds.isel(n_assemblies=0, beta=0, imprint=0, replicate=0)
        xr.testing.assert_identical(point, kept)
        other = ds.isel(n_assemblies=0, beta=0, imprint=1, replicate=1)
        assert re.fullmatch(r"(attempt \d+)?", other.error.item()), "the rewritten point holds one whole write"


def test_files_per_point_stay_far_below_one_per_variable(tmp_path):
    counts = key_axis("n_assemblies", "assemblies.count", tuple(range(1, 31)))
    grid = GridSpec(axes=(counts,), replicates=20, n_assembly=30, n_snapshot=3, n_time_bin=1200, time_bin_s=0.01,
                    fingerprint="grid-files", attrs={})
    shape = (30, 20)
    path = tmp_path / "odour-many.zarr"
    create_store(path, grid, np.array([f"odour-{i}" for i in range(600)], dtype=object).reshape(shape),
                 np.arange(600).reshape(shape))
    with ResultStore.open(path, batching=Batching(points=64, delay_s=60)) as store:
        for index in np.ndindex(shape):
            store.write_point(index, point_result(index[0] + 1, 1))
    files = sum(1 for p in path.rglob("*") if p.is_file())
    variables = len(layout.VARIABLES) + 3  # status, error, point_id
    assert files / 600 < 2, files  # issue 14 target; one chunk per point and variable made 40 per point
    assert files < variables + 50 + 600 * 2 // 8, files  # rate traces (2 x 9.6 kB a point): several points per file
    assert (ResultStore.open(path).status() == STATUSES.index("done")).all()


GROWN_AXES = (
    key_axis("n_assemblies", "assemblies.count", (1, 2, 4, 8)),
    AXES[1],
    AXES[2],
)
GROWN_SHAPE = (4, 2, 2, 3)
GROWN_IDS = np.array([f"odour-{i:03d}" for i in range(np.prod(GROWN_SHAPE))], dtype=object).reshape(GROWN_SHAPE)
GROWN_IDS[:3, :, :, :2] = POINT_IDS
GROWN_SEEDS = np.arange(np.prod(GROWN_SHAPE), dtype=np.int64).reshape(GROWN_SHAPE) + 5
GROWN_SEEDS[:3, :, :, :2] = SEEDS
GROWN = GridSpec(axes=GROWN_AXES, replicates=3, n_assembly=8, n_snapshot=3, n_time_bin=80, time_bin_s=0.01,
                 fingerprint="grid-grown", attrs={"sweep_name": "odour-capacity-test", "sweep_file": "[sweep]\n# grown"})


def raw(path: Path) -> dict[str, np.ndarray]:
    group = zarr.open_group(path, mode="r")
    return {name: np.asarray(group[name][...]) for name in group.array_keys()}


def test_grow_extends_in_place_and_keeps_stored_values_bitwise(tmp_path):
    path = make_store(tmp_path)
    with ResultStore.open(path) as store:
        store.write_point((2, 1, 1, 1), point_result(4, 3))
        store.write_failure((0, 0, 0, 0), "odour cue group has no members")
    before = raw(path)
    grow_store(path, GROWN, GROWN_IDS, GROWN_SEEDS)
    after = raw(path)
    for name, old in before.items():
        new = after[name][tuple(slice(0, n) for n in old.shape)]
        assert new.tolist() == old.tolist() if old.dtype.kind in "OTU" else new.tobytes() == old.tobytes(), name
    ds = plain_open(path)  # exactly xr.open_zarr(path): consolidated metadata is fresh
    assert dict(ds.sizes) == {"n_assemblies": 4, "beta": 2, "imprint": 2, "replicate": 3, "assembly": 8,
                              "snapshot": 3, "time_bin": 80, "retention": 1, "age": 8}
    assert ds.n_assemblies.values.tolist() == [1, 2, 4, 8] and ds.replicate.values.tolist() == [0, 1, 2]
    np.testing.assert_allclose(ds.time_bin.values, np.arange(80) * 0.01)
    assert int((ds.status == 1).sum()) == 1 and int((ds.status == 2).sum()) == 1 and int((ds.status == 0).sum()) == 46
    assert ds.point_id.values.tolist() == GROWN_IDS.tolist() and ds.seed.values.tolist() == GROWN_SEEDS.tolist()
    assert ds.attrs["capsweep_fingerprint"] == "grid-grown" and ds.attrs["sweep_file"].endswith("# grown")
    assert ds.attrs["history"].splitlines()[-1].endswith("grown to (4, 2, 2, 3)")
    assert not (path / GROWING_NAME).exists()
    with ResultStore.open(path, fingerprint="grid-grown") as store:
        store.write_point((3, 1, 1, 2), point_result(8, 8))
    np.testing.assert_allclose(plain_open(path, chunks=None).recall_quality.values[3, 1, 1, 2],
                               np.linspace(0.9, 0.6, 8))


def test_grow_refuses_a_grid_that_moves_stored_points(tmp_path):
    path = make_store(tmp_path)
    before = raw(path)
    reordered = (key_axis("n_assemblies", "assemblies.count", (1, 4, 2, 8)), AXES[1], AXES[2])
    with pytest.raises(StoreError, match="coordinate n_assemblies"):
        grow_store(path, GridSpec(**{**GROWN.__dict__, "axes": reordered}), GROWN_IDS, GROWN_SEEDS)
    other_ids = GROWN_IDS.copy()
    other_ids[0, 0, 0, 0] = "odour-changed"
    with pytest.raises(StoreError, match="point ids differ"):
        grow_store(path, GROWN, other_ids, GROWN_SEEDS)
    assert not (path / GROWING_NAME).exists()
    after = raw(path)
    assert all(after[name].shape == old.shape for name, old in before.items()), "a refused grow changes nothing"


def test_a_grow_killed_midway_is_refused_until_it_is_finished(tmp_path, monkeypatch):
    path = make_store(tmp_path)
    ResultStore.open(path).write_point((1, 1, 0, 0), point_result(2, 2))
    before = raw(path)

    def die(*args):
        raise KeyboardInterrupt  # the process dies after resizing, before ids, seeds and attrs

    monkeypatch.setattr(store_module, "_fill_ids_and_seeds", die)
    with pytest.raises(KeyboardInterrupt):
        grow_store(path, GROWN, GROWN_IDS, GROWN_SEEDS)
    monkeypatch.undo()
    for opening in (lambda: ResultStore.open(path, fingerprint="grid-a"), lambda: open_dataset(path),
                    lambda: grow_store(path, GridSpec(**{**GROWN.__dict__, "fingerprint": "grid-c"}), GROWN_IDS,
                                       GROWN_SEEDS)):
        with pytest.raises(StoreError, match="was being grown"):
            opening()
    grow_store(path, GROWN, GROWN_IDS, GROWN_SEEDS)
    after = raw(path)
    assert after["seed"].tolist() == GROWN_SEEDS.tolist()
    assert after["recall_quality"][1, 1, 0, 0, :4].tobytes() == before["recall_quality"][1, 1, 0, 0].tobytes()
    assert int(ResultStore.open(path, fingerprint="grid-grown").status()[1, 1, 0, 0]) == STATUSES.index("done")


def test_a_second_zarr_implementation_reads_the_same_values(tmp_path):
    """tensorstore (Google's C++ Zarr v3 reader) reads every numeric array bitwise as zarr-python wrote it.

    Its zarr3 driver has no variable-length string type, so point_id, error and text axes are left out.
    """
    tensorstore = pytest.importorskip("tensorstore")
    path = make_store(tmp_path)
    with ResultStore.open(path, batching=Batching(points=4, delay_s=0)) as store:
        store.write_point((1, 0, 1, 1), point_result(2, 2))
        store.write_point((2, 1, 0, 0), {**point_result(4, 0), "predicted_outcome": "silent"})
        store.write_failure((0, 1, 1, 0), "odour cue group has no members")
    grow_store(path, GROWN, GROWN_IDS, GROWN_SEEDS)
    compared = 0
    for name, ours in raw(path).items():
        if ours.dtype.kind in "OTU":
            continue
        spec = {"driver": "zarr3", "kvstore": {"driver": "file", "path": str(path / name)}}
        theirs = np.asarray(tensorstore.open(spec, read=True).result().read().result())
        assert theirs.dtype == ours.dtype and theirs.tobytes() == ours.tobytes(), name
        compared += 1
    assert compared == len(layout.VARIABLES) + 1 + 2 + 5  # status, 2 numeric axes, 4 counters (age has none), time_bin
