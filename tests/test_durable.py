"""Durable writes and file-system faults: faults injected at the OS-call boundary (os.replace, os.fsync, os.mkdir)
into a real store, and a read-only bind mount (root may write through chmod, not through a read-only mount)."""

from __future__ import annotations

import errno
import os
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import zarr
from test_old_stores import SWEEP, copy_fixture, files, invoke
from test_store import GRID, POINT_IDS, SEEDS, make_store, point_result

from capsweep.flags import STATUSES
from capsweep.results_schema import attrs, layout
from capsweep.results_schema.journal import JOURNAL
from capsweep.results_schema.store import Batching, ResultStore, create_store, stored_attrs

BATCH = {(1, 0, 0, 0): (2, 2), (2, 0, 0, 1): (4, 3), (0, 1, 0, 0): (1, 0)}
"""A batch of three points: index -> (assemblies, recalled)."""
CHECKED = ("outcome", "recalled_count", "recall_score", "weight_within", "rate_exc_hz", layout.WRITER_VERSION)


def target(call: str, args: tuple) -> str:
    """The file an os.replace (its destination) or os.fsync (its open file) acts on."""
    return str(args[-1]) if call == "replace" else os.readlink(f"/proc/self/fd/{args[0]}")


def stored(path: Path, index: tuple[int, ...]) -> dict[str, np.ndarray]:
    """The CHECKED variables and the status of one point, read with zarr alone."""
    return {name: np.asarray(zarr.open_array(path / name, mode="r")[index]) for name in (*CHECKED, "status")}


def test_every_data_file_and_its_folder_is_synced_before_the_status_is_written(tmp_path: Path,
                                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    path = make_store(tmp_path)
    events: list[tuple[str, str]] = []
    for call in ("replace", "fsync"):
        real = getattr(os, call)

        def logged(*args: object, call: str = call, real=real) -> object:
            events.append((call, target(call, args)))
            return real(*args)
        monkeypatch.setattr(os, call, logged)
    with ResultStore.open(path, batching=Batching(points=3, delay_s=0)) as store:
        for index, (count, recalled) in BATCH.items():
            store.write_point(index, point_result(count, recalled))
    monkeypatch.undo()
    status_at = next(i for i, (call, p) in enumerate(events) if call == "replace" and "/status/c/" in p)
    written = {p for call, p in events[:status_at] if call == "replace"}
    synced = {p for call, p in events[:status_at] if call == "fsync"}
    assert len(written) >= len(CHECKED), "every variable of the batch is written before its status"
    assert written <= synced, f"not synced before the status: {sorted(written - synced)}"
    assert {str(Path(p).parent) for p in written} <= synced, "a data file's folder is not synced before the status"
    status_file = events[status_at][1]
    assert ("fsync", status_file) in events[status_at:], "the status file itself is synced"


@pytest.mark.parametrize(("call", "when"), [
    ("replace", "0"), ("replace", "20"), ("replace", "status"), ("fsync", "1"), ("fsync", "30"), ("fsync", "status"),
])
def test_a_full_disk_mid_batch_loses_no_done_point_and_marks_none_done_without_its_data(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, call: str, when: str) -> None:
    path = make_store(tmp_path)
    with ResultStore.open(path) as store:
        store.write_point((0, 0, 0, 0), point_result(1, 1))
    earlier = stored(path, (0, 0, 0, 0))
    real, calls = getattr(os, call), []

    def failing(*args: object) -> object:
        hit = "/status/c/" in target(call, args) if when == "status" else len(calls) == int(when)
        if hit:
            raise OSError(errno.ENOSPC, "No space left on device", target(call, args))
        calls.append(args)
        return real(*args)
    monkeypatch.setattr(os, call, failing)
    store = ResultStore.open(path, batching=Batching(points=3, delay_s=0))
    with pytest.raises(OSError, match="No space left"):
        for index, (count, recalled) in BATCH.items():
            store.write_point(index, point_result(count, recalled))
    monkeypatch.undo()

    for name, value in stored(path, (0, 0, 0, 0)).items():
        assert value.tobytes() == earlier[name].tobytes(), f"the earlier done point lost {name}"
    with ResultStore.open(path) as fresh:
        fresh.tidy()
    (tmp_path / "blank").mkdir()
    blank = make_store(tmp_path / "blank")
    with ResultStore.open(blank) as reference:
        for index, (count, recalled) in BATCH.items():
            reference.write_point(index, point_result(count, recalled))
    for index in BATCH:
        now = stored(path, index)
        assert STATUSES[int(now["status"])] in ("done", "pending")
        if STATUSES[int(now["status"])] == "done":
            for name, value in stored(blank, index).items():
                assert now[name].tobytes() == value.tobytes(), f"{index} is marked done without its {name}"
    assert not list(path.rglob("*.partial"))


def test_tidy_removes_what_killed_writes_and_upgrades_left(tmp_path: Path) -> None:
    path = make_store(tmp_path)
    with ResultStore.open(path) as store:
        store.write_point((0, 0, 0, 0), point_result(1, 1))
    data = files(path)
    stray = path / "status" / "c" / "0" / "0" / "0" / "0.5d1e0c.partial"
    stray.write_bytes(b"half")
    (path / JOURNAL).mkdir()
    (path / JOURNAL / "zarr.json").write_text("{}")  # never committed
    with ResultStore.open(path) as store:
        assert store.tidy() == [stray]
    assert not (path / JOURNAL).exists() and files(path) == data


def test_a_new_store_gets_its_missing_folders_as_output_folders_do(tmp_path: Path) -> None:
    """The README's first command writes results/odour-demo.zarr in a fresh clone, where results/ does not exist."""
    path = tmp_path / "no" / "such" / "odour.zarr"
    create_store(path, GRID, POINT_IDS, SEEDS)
    with ResultStore.open(path) as store:
        assert store.shape == SEEDS.shape


def test_a_store_under_a_file_is_one_line_and_nothing_is_made(tmp_path: Path) -> None:
    (tmp_path / "notes").write_text("not a folder")
    result = invoke("run", SWEEP, "--store", tmp_path / "notes" / "such" / "odours.zarr")
    assert result.exit_code == 3
    assert result.output.strip().splitlines() == [
        f"capsweep: error: store folder {tmp_path / 'notes' / 'such'} lies under the file {tmp_path / 'notes'}; "
        "expected a folder (existing or new)"]
    assert (tmp_path / "notes").read_text() == "not a folder"


@pytest.mark.parametrize(("call", "code", "said"), [
    ("replace", errno.ENOSPC, "the disk is full"), ("mkdir", errno.EACCES, "permission denied"),
])
def test_a_file_system_fault_is_one_line_and_the_store_stays_as_it_was(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, call: str, code: int, said: str) -> None:
    path = copy_fixture("2.1", tmp_path)
    before = files(path)
    real = getattr(os, call)

    def failing(*args: object, **kwargs: object) -> object:
        if str(args[-1 if call == "replace" else 0]).startswith(str(path)):
            raise OSError(code, os.strerror(code), str(args[0]))
        return real(*args, **kwargs)
    monkeypatch.setattr(os, call, failing)
    result = invoke("upgrade", path)
    monkeypatch.undo()
    assert result.exit_code == 3
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"capsweep: error: {said} (") and "kept" in lines[0], lines
    assert files(path) == before
    assert stored_attrs(path)[attrs.SCHEMA] == "2.1"


@pytest.fixture
def read_only(tmp_path: Path) -> Iterator[tuple[Path, Path]]:
    """A schema 2.1 fixture store and its upgraded copy, seen through a read-only bind mount (root only)."""
    source = tmp_path / "source"
    copy_fixture("2.1", source)
    shutil.copytree(source / "schema21.zarr", source / "current.zarr")
    assert invoke("upgrade", source / "current.zarr").exit_code == 0
    mounted = tmp_path / "mounted"
    mounted.mkdir()
    bind = subprocess.run(["mount", "--bind", str(source), str(mounted)], capture_output=True)
    if bind.returncode != 0:
        pytest.skip(f"no bind mount here (needs root): {bind.stderr.decode().strip()}")
    try:
        subprocess.run(["mount", "-o", "remount,ro,bind", str(mounted)], check=True)
        yield mounted / "schema21.zarr", mounted / "current.zarr"
    finally:
        subprocess.run(["umount", str(mounted)], check=True)


def test_a_read_only_store_reads_and_refuses_run_and_upgrade_in_one_line(read_only: tuple[Path, Path]) -> None:
    old, current = read_only
    before = files(old.parent)
    for store in (old, current):
        result = invoke("status", store)
        assert result.exit_code == 0 and "done 8" in result.output, result.output
    for args in (("run", SWEEP, "--store", current), ("upgrade", old), ("upgrade", current)):
        result = invoke(*args)
        assert result.exit_code == 3, result.output
        assert result.output.strip().splitlines() == [
            f"capsweep: error: {args[-1]} is on a read-only file system; status, query, capacity, plot and export "
            "read it, run and upgrade need to write it"]
    assert files(old.parent) == before
