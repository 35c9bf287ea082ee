"""The result store: one Zarr v3 directory per sweep, readable with plain ``xarray.open_zarr``.

This module writes with Zarr alone; reading as xarray is :mod:`capsweep.results_schema.dataset`, so
that a run, which only writes, never imports xarray (about 0.7 s).

``create_store`` lays out the whole grid once as an empty template: one array per variable of
``layout`` over the sweep dims (one per axis, then ``replicate``) plus the variable's inner dim.
Each variable keeps a block of points per file (``point_block``): a variable with an inner dim is
a Zarr shard of one compressed chunk per point, a per-point scalar one uncompressed chunk. Zarr
rewrites a touched file whole, through a temporary file renamed over the old one, so a write
killed midway leaves every file as it was before or after. ``ResultStore`` writes points in
batches: every data variable of the batch first, ``status`` last, so a point whose write was
cut short still reads as pending. ``grow_store`` extends a store in place to a larger grid.
See SPEC.md beside this module for the full layout.
"""

from __future__ import annotations

import asyncio
import base64
import json
import math
import shutil
import struct
import threading
import time
import warnings
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any, Literal

import numpy as np
import zarr
from zarr.core.buffer import Buffer
from zarr.errors import ZarrUserWarning
from zarr.storage import LocalStore, MemoryStore

from ..axes import REPLICATE, Axis
from ..errors import StoreError
from ..flags import DONE, FAILED, PENDING, STATUSES, UNNEEDED
from . import attrs, journal, layout
from .durable import check_writable, make_store_folder, remove_strays, sync_written
from .layout import GridSpec

# Variables whose every entry holds a value from creation on: no _FillValue, so they decode to
# their integer dtype (an unwritten status chunk holds the Zarr fill value 0 = pending).
ALWAYS_SET: frozenset[str] = frozenset({layout.STATUS.name, "seed"})
STRING_VARIABLES: dict[str, str] = {
    layout.ERROR: "error text of a failed point ('' when none)",
    layout.POINT_ID: "hash of the point's resolved config on the store's defaults table",
    layout.WRITER_VERSION: "version of the capsweep that wrote the point ('' if unwritten or written before store "
                           "schema 3.1)",
}
# Result variables a runner result must hold; seed is fixed at creation, the prediction optional.
OPTIONAL_RESULTS: frozenset[str] = frozenset({"seed", "predicted_outcome"})
REQUIRED_RESULTS: tuple[str, ...] = tuple(v.name for v in layout.VARIABLES if v.name not in OPTIONAL_RESULTS)

# Points per file: a file holds about FILE_BYTES of one variable (uncompressed), at most MAX_POINTS_PER_FILE points.
# Larger files mean fewer files but more bytes rewritten per batch (bench_store.py measures both).
FILE_BYTES = 256 * 1024
MAX_POINTS_PER_FILE = 4096
STRING_BYTES = 32  # assumed per point of a string variable (a point id is 16 characters, error text mostly empty)
GROWING_NAME = ".capsweep.growing"  # present while grow_store extends the store; holds the target fingerprint


@dataclass(frozen=True)
class Batching:
    """When the writer flushes buffered points: at ``points`` points, or once the oldest waited ``delay_s`` s.

    With ``delay_s`` > 0 (and ``points`` > 1) a writer thread writes the batches, so that the caller
    never waits for a write; it waits only if ``backlog`` batches' worth of points are buffered (the
    writer has fallen that far behind), which bounds the buffer's memory.
    """

    points: int = 1
    delay_s: float = 0.0
    backlog: int = 16


IMMEDIATE = Batching()
"""Write every point at once (the default of :meth:`ResultStore.open`)."""
WRITER_BATCHING = Batching(points=64, delay_s=1.0)
"""How ``capsweep run`` writes: a batch of 64 points mostly shares each variable's files (bench_store.py)."""


def create_store(path: str | Path, grid: GridSpec, point_ids: np.ndarray, seeds: np.ndarray) -> None:
    """Write the empty template of ``grid`` at ``path`` (a new directory).

    ``point_ids`` (str) and ``seeds`` (int) have shape (len(axis 0 values), ..., replicates).
    Raises StoreError if ``path`` exists (it is left untouched), ValueError for a malformed grid.
    """
    path = Path(path)
    if path.exists():
        raise StoreError(
            f"{path} already exists; capsweep never overwrites a store. To resume the sweep that made it, "
            "run that sweep against it; to start afresh choose another store path or delete it"
        )
    make_store_folder(path)
    sweep_shape = _check_grid(grid, point_ids, seeds)
    try:
        _write_template(path, grid, sweep_shape, point_ids, seeds)
    except BaseException:
        shutil.rmtree(path, ignore_errors=True)
        raise


class DurableStore(LocalStore):
    """Zarr's local store, but a write is on disk (file and directory entries synced) when it returns."""

    async def _set(self, key: str, value: Buffer, exclusive: bool = False) -> None:
        path = self.root / key
        new_dirs = not path.parent.exists()
        await super()._set(key, value, exclusive)
        await asyncio.to_thread(sync_written, path, self.root, new_dirs)


class ResultStore:
    """An opened result store; the single writer of a sweep writes points through it.

    Points are buffered and written in batches (see :class:`Batching`): by the caller once a batch
    is full, or, with a delay, by a writer thread once a batch is full or its oldest point waited
    ``delay_s`` (taking every point buffered by then). Batches are written one at a time, in the
    order they were taken, each data first and status last. Reads (``status``, ``scalar_values``)
    flush first. Use the store as a context manager, or call ``close``, to flush the last batch:
    points still buffered when the process dies read as pending and run again.
    """

    def __init__(self, path: Path, group: zarr.Group, batching: Batching = IMMEDIATE) -> None:
        self.path = path
        self._group = group
        self._arrays: dict[str, zarr.Array] = {name: _array(group, name) for name in stored_variables()}
        self._seeds = np.asarray(self._arrays["seed"][...])
        self._inner_sizes = {v.name: self._arrays[v.name].shape[-1] for v in layout.VARIABLES if v.inner is not None}
        self._fills = {name: self._fill_block(layout.BY_NAME[name]) for name in REQUIRED_RESULTS}
        self._version = attrs.package_version("capsweep")
        self._batching = batching
        self._buffer: dict[tuple[int, ...], tuple[dict[str, Any], str]] = {}
        self._oldest = 0.0  # time.monotonic() when the oldest buffered point arrived
        self._lock = threading.Lock()  # guards the buffer, held only to change it
        self._changed = threading.Condition(self._lock)  # points buffered or taken, the store closed, a failure
        self._writing = threading.Lock()  # held while a batch is taken and written: one batch at a time, in order
        self._closed = False
        self._failure: BaseException | None = None  # raised by the writer thread, re-raised to the caller
        self._writer: threading.Thread | None = None
        if batching.points > 1 and batching.delay_s > 0:
            self._writer = threading.Thread(target=self._write_when_due, name="capsweep-store-writer", daemon=True)
            self._writer.start()

    @classmethod
    def open(cls, path: str | Path, fingerprint: str | None = None, batching: Batching = IMMEDIATE) -> ResultStore:
        """Open the store at ``path`` for writing.

        Raises StoreError naming the path if it is missing, read-only, not a capsweep store, of another
        schema version, damaged, half grown, or (with ``fingerprint``) built from another grid.
        """
        path = Path(path)
        group = _open_group(path, consolidated=False)
        _check_identity(path, dict(group.attrs), fingerprint, writing=True)
        check_writable(path)
        missing = [name for name in stored_variables() if name not in group]  # no listing: the lock file is there
        if missing:
            raise StoreError(f"{path} is damaged: variables {', '.join(missing)} are missing")
        return cls(path, group, batching)

    def __enter__(self) -> ResultStore:
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None,
                 trace: TracebackType | None) -> None:
        self.close()

    @property
    def sweep_dims(self) -> tuple[str, ...]:
        """Dims that index a point: the axis names, then ``replicate``."""
        return (*_names(self._group.attrs[attrs.AXES]), REPLICATE)

    @property
    def shape(self) -> tuple[int, ...]:
        """Number of points along each sweep dim."""
        return tuple(self._seeds.shape)

    def status(self) -> np.ndarray:
        """Status code of every point (capsweep.flags.STATUSES index), int8 over the sweep dims."""
        self.flush()
        return np.asarray(self._arrays[layout.STATUS.name][...])

    def scalar_values(self, name: str) -> np.ndarray:
        """Stored codes of a per-point scalar variable (e.g. outcome, recalled_count), over the sweep dims."""
        if layout.BY_NAME[name].inner is not None:
            raise ValueError(f"{name} has an inner dim; scalar_values reads per-point scalars only")
        self.flush()
        return np.asarray(self._arrays[name][...])

    def tidy(self) -> list[Path]:
        """Remove what writes and upgrades killed midway left (temporary files, an uncommitted upgrade's journal);
        return the files removed. Only the holder of the store's lock may call it."""
        journal.discard(self.path)
        return remove_strays(self.path)

    def mark_unneeded(self, indices: Iterable[tuple[int, ...]]) -> None:
        """Set pending points' status to unneeded: an adaptive search decided without them (their writer recorded,
        nothing else written).

        Written with the next batch of points, however many there are.
        """
        checked = [self._check_index(index) for index in indices]
        with self._lock:
            self._raise_failure()
            if checked and not self._buffer:
                self._oldest = time.monotonic()
            self._buffer.update((index, ({layout.WRITER_VERSION: self._version}, UNNEEDED)) for index in checked)
            self._changed.notify_all()

    def write_point(self, index: tuple[int, ...], result: Mapping[str, Any]) -> None:
        """Write a finished point: every result variable and an empty error, then status done.

        ``result`` maps each layout variable name to its value: flags as label strings, inner
        arrays at most as long as their dim (padded with the fill value), None or NaN for a
        missing number. ``predicted_outcome`` is optional (kept if absent); ``seed``, if given,
        must equal the stored seed. Raises ValueError if the result breaks the layout.
        """
        index = self._check_index(index)
        values = self._encode_result(index, result)
        values[layout.ERROR] = ""
        values[layout.WRITER_VERSION] = self._version
        self._queue(index, values, DONE)

    def write_failure(self, index: tuple[int, ...], error_text: str) -> None:
        """Record a failed point: error text, fill in every result, then status failed."""
        index = self._check_index(index)
        values = {name: self._fills[name] for name in REQUIRED_RESULTS}
        values[layout.ERROR] = str(error_text)
        values[layout.WRITER_VERSION] = self._version
        self._queue(index, values, FAILED)

    def flush(self) -> None:
        """Write every buffered point now (data first, status last); returns when all are on disk, including a batch
        the writer thread was writing."""
        self._write_buffered(raise_failure=True)

    def close(self) -> None:
        """Stop the writer thread and write the points still buffered."""
        with self._lock:
            self._closed = True
            self._changed.notify_all()
        if self._writer is not None:
            self._writer.join()
        self.flush()

    def _queue(self, index: tuple[int, ...], values: dict[str, Any], label: str) -> None:
        """Buffer one point; write the batch now if it is full and no writer thread does (else wake that thread)."""
        threaded = self._writer is not None and self._writer.is_alive()  # (it stops after a failure)
        with self._lock:
            self._raise_failure()
            while threaded and len(self._buffer) >= self._batching.points * self._batching.backlog:
                self._changed.wait()  # the writer is that far behind: let it catch up
                self._raise_failure()
            first = not self._buffer
            if first:
                self._oldest = time.monotonic()
            self._buffer[index] = (values, label)
            full = len(self._buffer) >= self._batching.points
            if first or full:  # the writer thread's clock starts, or its batch is due
                self._changed.notify_all()
        if full and not threaded:
            self.flush()

    def _write_when_due(self) -> None:
        """Writer thread: write the buffered points whenever a batch is full or its oldest point waited ``delay_s``."""
        while self._wait_until_due():
            try:
                self._write_buffered(raise_failure=False)
            except BaseException as exc:  # handed to the caller's next call
                with self._lock:
                    self._failure = exc
                    self._changed.notify_all()
                return

    def _write_buffered(self, raise_failure: bool) -> None:
        """Take every buffered point and write it (one batch at a time, in order); ``raise_failure``: first re-raise
        a failure of the writer thread (the caller's path; the thread itself does not)."""
        with self._writing:
            with self._lock:
                if raise_failure:
                    self._raise_failure()
                batch = self._take()
            _write_batch(self._arrays, batch)

    def _wait_until_due(self) -> bool:
        """Block until a batch is due to be written (True) or the store is closed (False)."""
        with self._lock:
            while not self._closed:
                waited = time.monotonic() - self._oldest
                if self._buffer and (len(self._buffer) >= self._batching.points or waited >= self._batching.delay_s):
                    return True
                self._changed.wait(self._batching.delay_s - waited if self._buffer else None)
            return False

    def _raise_failure(self) -> None:
        if self._failure is not None:
            failure, self._failure = self._failure, None
            raise failure

    def _take(self) -> dict[tuple[int, ...], tuple[dict[str, Any], str]]:
        """Empty the buffer (the lock held): the batch to write; wakes a caller waiting for room."""
        batch, self._buffer = self._buffer, {}
        self._changed.notify_all()
        return batch

    def _encode_result(self, index: tuple[int, ...], result: Mapping[str, Any]) -> dict[str, Any]:
        unknown = sorted(set(result) - set(layout.BY_NAME))
        missing = [name for name in REQUIRED_RESULTS if name not in result]
        if unknown or missing:
            raise ValueError(f"result does not match the store layout: unknown {unknown}, missing {missing}")
        if "seed" in result and int(result["seed"]) != int(self._seeds[index]):
            raise ValueError(f"result seed {result['seed']} differs from the stored seed {self._seeds[index]}")
        return {
            name: encode_value(layout.BY_NAME[name], value, self._inner_size(layout.BY_NAME[name]))
            for name, value in result.items()
            if name != "seed"
        }

    def _check_index(self, index: tuple[int, ...]) -> tuple[int, ...]:
        index = tuple(int(i) for i in index)
        shape = self.shape
        if len(index) != len(shape) or not all(0 <= i < n for i, n in zip(index, shape)):
            raise IndexError(f"point index {index} is outside the sweep grid of shape {shape} {self.sweep_dims}")
        return index

    def _inner_size(self, var: layout.Variable) -> int | None:
        return self._inner_sizes.get(var.name)

    def _fill_block(self, var: layout.Variable) -> Any:
        size = self._inner_size(var)
        return var.fill if size is None else np.full(size, var.fill, dtype=var.dtype)


def _write_batch(arrays: Mapping[str, zarr.Array],
                 batch: Mapping[tuple[int, ...], tuple[dict[str, Any], str]]) -> None:
    """Write a batch of points (index -> (encoded values, status label)): each data variable in one Zarr call (one
    rewrite per touched file), then status.

    The batch has left the buffer first: if a data write raises, none of its points gets a status,
    so all read as pending and run again.
    """
    if not batch:
        return
    names = dict.fromkeys(name for values, _ in batch.values() for name in values)
    for name in names:
        _set_points(arrays[name], {index: values[name] for index, (values, _) in batch.items() if name in values})
    _set_points(arrays[layout.STATUS.name], {index: STATUSES.index(label) for index, (_, label) in batch.items()})


def _set_points(array: zarr.Array, values: Mapping[tuple[int, ...], Any]) -> None:
    """Write one value (a row, for an inner dim) per point index into ``array``: one rewrite per touched file."""
    coords = np.array(list(values), dtype=np.int64).T
    n_sweep = coords.shape[0]
    if array.ndim == n_sweep:
        data = np.array(list(values.values()), dtype=object if array.dtype.kind in "OTU" else array.dtype)
        array.set_coordinate_selection(tuple(coords), data)
        return
    inner = np.arange(array.shape[-1])[None, :]
    array.set_coordinate_selection((*(c[:, None] for c in coords), inner), np.stack(list(values.values())))


def check_store(path: str | Path) -> None:
    """Raise StoreError unless ``path`` is a capsweep store of a readable schema, not half grown (opens it
    read-only)."""
    stored_attrs(path)


def stored_attrs(path: str | Path, growing: str | None = None) -> dict[str, Any]:
    """Root attributes of the capsweep store at ``path`` (StoreError as ``check_store``).

    ``growing``: a fingerprint; the store may be half grown to that grid.
    """
    path = Path(path)
    stored = dict(_open_group(path, mode="r", consolidated=False).attrs)
    _check_identity(path, stored, None, growing)
    return stored


def read_variables(path: str | Path, names: tuple[str, ...]) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """The root attrs of the store at ``path`` and its variables ``names`` as stored (codes for flags), read-only
    (StoreError as ``check_store``)."""
    path = Path(path)
    group = _open_group(path, mode="r", consolidated=False)
    stored = dict(group.attrs)
    _check_identity(path, stored, None)
    return stored, {name: np.asarray(_array(group, name)[...]) for name in names}


def growing_to(path: str | Path) -> str | None:
    """Fingerprint of the grid an interrupted ``grow_store`` was extending ``path`` to, None if none was."""
    marker = Path(path) / GROWING_NAME
    return str(json.loads(marker.read_text())["fingerprint"]) if marker.exists() else None


def grow_store(path: str | Path, grid: GridSpec, point_ids: np.ndarray, seeds: np.ndarray) -> None:
    """Extend the store at ``path`` in place to ``grid``, whose axes extend the stored ones by appended values.

    Axis values may be appended, replicates and inner dims may grow; stored values stay as they
    are (bitwise), new points read as pending. ``point_ids`` and ``seeds`` cover the new grid and
    must equal the stored ones where a point is stored. While growing, ``<path>/.capsweep.growing``
    names the target: a grow killed midway is finished by calling ``grow_store`` again with the
    same grid, and every other open is refused until then. Raises StoreError otherwise.
    """
    path = Path(path)
    group = _open_group(path, consolidated=False)
    _check_identity(path, dict(group.attrs), None, growing=grid.fingerprint, writing=True)
    shape = _check_grid(grid, point_ids, seeds)
    if growing_to(path) is None:
        _check_extension(path, group, grid, shape, point_ids)
        (path / GROWING_NAME).write_text(json.dumps({"fingerprint": grid.fingerprint}))
    sizes = _inner_sizes(grid)
    for var in (*layout.VARIABLES, layout.STATUS):
        _array(group, var.name).resize((*shape, *((sizes[var.inner],) if var.inner else ())))
    for name in STRING_VARIABLES:
        _array(group, name).resize(shape)
    for name, (values, _) in _coordinates(grid).items():
        _array(group, name).resize(values.shape)
        _array(group, name)[...] = values
    _fill_ids_and_seeds(group, point_ids, seeds)
    history = f"{group.attrs.get(attrs.HISTORY, '')}\n{_now()} capsweep {attrs.package_version('capsweep')}: " \
              f"grown to {shape}"
    group.attrs.update({**grid.attrs, attrs.FINGERPRINT: grid.fingerprint, attrs.HISTORY: history.strip()})
    _consolidate(path)
    (path / GROWING_NAME).unlink()


def _check_extension(path: Path, group: zarr.Group, grid: GridSpec, shape: tuple[int, ...],
                     point_ids: np.ndarray) -> None:
    """Raise StoreError unless ``grid`` keeps every stored coordinate and point id where it is."""
    stored_axes = _names(group.attrs[attrs.AXES])
    if stored_axes != [axis.name for axis in grid.axes]:
        raise StoreError(f"{path} has axes {stored_axes}; a grown grid must keep them, in order")
    if group.attrs[attrs.TIME_BIN] != float(grid.time_bin_s):
        raise StoreError(f"{path} has rate bins of {group.attrs[attrs.TIME_BIN]} s; a grown grid must keep them")
    stored_ids = np.asarray(_array(group, layout.POINT_ID)[...])
    if any(n < m for n, m in zip(shape, stored_ids.shape)):
        raise StoreError(f"{path} has sweep shape {stored_ids.shape}; a grown grid cannot be smaller: {shape}")
    for name, (values, _) in _coordinates(grid).items():
        stored = np.asarray(_array(group, name)[...])
        if _kind(stored) != _kind(values) or stored.tolist() != values[: stored.size].tolist():
            raise StoreError(f"{path}: coordinate {name} {stored.tolist()} is not the start of {values.tolist()}")
    if not np.array_equal(stored_ids, np.asarray(point_ids)[tuple(slice(0, n) for n in stored_ids.shape)]):
        raise StoreError(f"{path}: the stored point ids differ from this sweep's; it was made by another capsweep")


def _kind(values: np.ndarray) -> str:
    """Kind of an array's values: 'b' bool, 'i' int, 'f' float, 's' text (however it is held)."""
    return "s" if values.dtype.kind in "OTU" else values.dtype.kind


def stored_variables() -> tuple[str, ...]:
    """Every per-point array of the layout: the result variables, status, then the string variables."""
    return (*(v.name for v in layout.VARIABLES), layout.STATUS.name, *STRING_VARIABLES)


def encode_value(var: layout.Variable, value: Any, inner_size: int | None) -> Any:
    """Turn one result value into what the variable's array holds (codes for flags, padded rows)."""
    if var.flags and inner_size is None:
        return _flag_code(var, value)
    if inner_size is None:
        return _encode_scalar(var, value)
    row = np.array([_flag_code(var, v) for v in value]) if var.flags else np.asarray(value, dtype=float).ravel()
    if row.size > inner_size:
        raise ValueError(f"{var.name} has {row.size} entries but its {var.inner} dim holds {inner_size}")
    padded = np.full(inner_size, var.fill, dtype=var.dtype)
    padded[: row.size] = row
    return padded


def _flag_code(var: layout.Variable, label: Any) -> int:
    """The stored code of one label of a flag variable; None (unset) becomes the fill value."""
    if label is None:
        return int(var.fill)
    if label not in var.flags:
        raise ValueError(f"{var.name} = {label!r} is not one of {', '.join(var.flags)}")
    return var.flags.index(label)


def _encode_scalar(var: layout.Variable, value: Any) -> Any:
    """A scalar as the variable's dtype; None (or NaN for an int variable) becomes the fill value."""
    if value is None:
        return var.fill
    if var.dtype.startswith("int"):
        return var.fill if np.isnan(value) else int(value)
    return float(value)


def _check_grid(grid: GridSpec, point_ids: np.ndarray, seeds: np.ndarray) -> tuple[int, ...]:
    """Return the sweep shape, or raise ValueError for a grid the layout cannot hold."""
    names = [axis.name for axis in grid.axes]
    taken = {REPLICATE, *layout.INNER_DIMS, *stored_variables()}
    clashes = sorted(set(names) & taken)
    if clashes or len(set(names)) != len(names):
        raise ValueError(f"axis names must be unique and not among {sorted(taken)}: {names}")
    for axis in grid.axes:
        if not axis.values or len(set(axis.values)) != len(axis.values):
            raise ValueError(f"axis {axis.name} needs distinct values, got {axis.values}")
    if grid.replicates < 1:
        raise ValueError(f"replicates must be at least 1, got {grid.replicates}")
    reserved = sorted(attrs.RESERVED & set(grid.attrs))
    if reserved:
        raise ValueError(f"grid attrs may not set the store's own attributes {reserved}")
    shape = (*(len(axis.values) for axis in grid.axes), grid.replicates)
    for label, array in (("point_ids", point_ids), ("seeds", seeds)):
        if np.shape(array) != shape:
            raise ValueError(f"{label} has shape {np.shape(array)}, the grid needs {shape}")
    return shape


def _write_template(path: Path, grid: GridSpec, sweep_shape: tuple[int, ...],
                    point_ids: np.ndarray, seeds: np.ndarray) -> None:
    """Create the group, coordinates and empty variables; mark it a capsweep store last."""
    group = zarr.create_group(DurableStore(path), zarr_format=3, attributes=attrs.root_attrs(grid, _now()))
    sweep_dims = (*(axis.name for axis in grid.axes), REPLICATE)
    sizes = _inner_sizes(grid)
    for name, (values, described) in _coordinates(grid).items():
        dtype = str if values.dtype == object else values.dtype
        group.create_array(name, shape=values.shape, chunks=(max(values.size, 1),), dtype=dtype,
                           dimension_names=(name,), fill_value=None, attributes=described)
        _array(group, name)[...] = values
    for var in layout.VARIABLES + (layout.STATUS,):
        inner = () if var.inner is None else (var.inner,)
        _create_point_variable(group, var.name, sweep_dims, sweep_shape, inner, tuple(sizes[d] for d in inner),
                               var.dtype, _zarr_fill(var), variable_attrs(var))
    for name, long_name in STRING_VARIABLES.items():
        _create_point_variable(group, name, sweep_dims, sweep_shape, (), (), str, "",
                               {"units": "1", "long_name": long_name})
    _fill_ids_and_seeds(group, point_ids, seeds)
    group.attrs[attrs.SCHEMA] = layout.SCHEMA_VERSION
    _consolidate(path)


def _fill_ids_and_seeds(group: zarr.Group, point_ids: np.ndarray, seeds: np.ndarray) -> None:
    _array(group, "seed")[...] = np.asarray(seeds, dtype=np.int64)
    _array(group, layout.POINT_ID)[...] = np.asarray(point_ids, dtype=object)


def _consolidate(path: Path) -> None:
    with warnings.catch_warnings():
        # Consolidated metadata is not yet in the Zarr v3 spec; xarray reads it and without it
        # plain xr.open_zarr(path) warns on every open.
        warnings.simplefilter("ignore", ZarrUserWarning)
        zarr.consolidate_metadata(DurableStore(path))


def _inner_sizes(grid: GridSpec) -> dict[str, int]:
    sizes = {"assembly": grid.n_assembly, "snapshot": grid.n_snapshot, "time_bin": grid.n_time_bin,
             "retention": grid.n_retention}
    return {**sizes, **{dim: sizes[like] for dim, like in layout.SIZED_LIKE.items()}}


def _coordinates(grid: GridSpec) -> dict[str, tuple[np.ndarray, dict[str, Any]]]:
    """Every coordinate of ``grid``: name -> (values, attrs); axes first, then the counters and time_bin."""
    coords = {axis.name: (_axis_array(axis), {"units": axis.units, "long_name": axis.long_name,
                                              attrs.AXIS_KEY: axis.key,
                                              **({attrs.RELATIVE_TO: axis.scale} if axis.scale else {})})
              for axis in grid.axes}
    counters = (
        (REPLICATE, grid.replicates, "replicate (independent seed) of a grid point"),
        ("assembly", grid.n_assembly, "assembly index"),
        ("snapshot", grid.n_snapshot, "weight snapshot index during the hold phase"),
        ("retention", grid.n_retention, "recall test index (tests during the hold, then the final test)"),
    )
    for name, size, long_name in counters:
        coords[name] = (np.arange(size, dtype=np.int64), {"units": "1", "long_name": long_name})
    coords["time_bin"] = (np.arange(grid.n_time_bin) * grid.time_bin_s,
                          {"units": "s", "long_name": "start time of the population rate bin"})
    return coords


def _axis_array(axis: Axis) -> np.ndarray:
    """Axis values as an array of one kind: bool, int64, float64 or str (object)."""
    values = np.asarray(axis.values)
    kinds = {"b": bool, "i": np.int64, "u": np.int64, "f": np.float64, "U": object}
    mixed = values.dtype.kind == "U" and not all(isinstance(v, str) for v in axis.values)
    if values.dtype.kind not in kinds or mixed:
        raise ValueError(f"axis {axis.name} values must be all int, all float, all str or all bool: {axis.values}")
    return values.astype(kinds[values.dtype.kind])


def _create_point_variable(group: zarr.Group, name: str, sweep_dims: tuple[str, ...], sweep_shape: tuple[int, ...],
                           inner_dims: tuple[str, ...], inner_shape: tuple[int, ...], dtype: Any, fill: Any,
                           described: dict[str, Any]) -> None:
    """Create one per-point array whose chunks (one file each) hold ``point_block`` points, whole along inner dims.

    Variables with an inner dim are compressed (zstd); per-point scalars are not (a few bytes a
    point: compressing them costs time on every write and saves little).
    """
    itemsize = STRING_BYTES if dtype is str else np.dtype(dtype).itemsize
    inner = tuple(max(n, 1) for n in inner_shape)
    block = point_block(sweep_shape, max(1, min(MAX_POINTS_PER_FILE, FILE_BYTES // (itemsize * math.prod(inner)))))
    group.create_array(name, shape=(*sweep_shape, *inner_shape), chunks=(*block, *inner), dtype=dtype,
                       dimension_names=(*sweep_dims, *inner_dims), fill_value=fill, attributes=described,
                       compressors="auto" if inner else None)


def unwritten_array(name: str, shape: tuple[int, ...], dims: tuple[str, ...]) -> dict[str, Any]:
    """The Zarr metadata (``zarr.json``) of the variable ``name`` of the layout (or a string variable) as an array of
    ``shape`` over ``dims``, chunked as a new store would be, with nothing written: what an upgrade adds. Made in
    memory: no file is written anywhere."""
    var = layout.BY_NAME.get(name)
    files: dict[str, Buffer] = {}
    group = zarr.create_group(MemoryStore(files), zarr_format=3)
    if var is None:
        _create_point_variable(group, name, dims, shape, (), (), str, "",
                               {"units": "1", "long_name": STRING_VARIABLES[name]})
    else:
        swept = len(shape) - (1 if var.inner else 0)
        _create_point_variable(group, name, dims[:swept], shape[:swept], dims[swept:], shape[swept:], var.dtype,
                               _zarr_fill(var), variable_attrs(var))
    return dict(json.loads(files[f"{name}/zarr.json"].to_bytes()))


def point_block(sweep_shape: tuple[int, ...], points: int) -> tuple[int, ...]:
    """A block of about ``points`` neighbouring points (at most the grid): whole trailing dims first, as in C order.

    Points run in about grid order, so the points of one write batch mostly share a block (file).
    """
    block = []
    for size in reversed(sweep_shape):
        side = max(1, min(size, points))
        block.append(side)
        points = max(1, points // side)
    return tuple(reversed(block))


def _zarr_fill(var: layout.Variable) -> float | int:
    """What an unwritten chunk holds: pending for status, the layout's fill value otherwise."""
    return STATUSES.index(PENDING) if var is layout.STATUS else var.fill


def variable_attrs(var: layout.Variable) -> dict[str, Any]:
    """The attrs of ``var``'s array: CF units and long name, the scale of a relative unit, flags, _FillValue."""
    described: dict[str, Any] = {"units": var.units, "long_name": var.long_name}
    if var.scale:
        described[attrs.RELATIVE_TO] = var.scale
    if var.flags:
        described["flag_values"] = list(range(len(var.flags)))
        described["flag_meanings"] = " ".join(var.flags)
    if var.name not in ALWAYS_SET:
        described["_FillValue"] = _fill_attr(var.fill)
    return described


def _fill_attr(fill: float | int) -> float | int | str:
    """A _FillValue attr as xarray reads it from Zarr v3: ints as is, floats as base64 of '<d'."""
    if isinstance(fill, float):
        return base64.standard_b64encode(struct.pack("<d", fill)).decode()
    return fill


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def _array(group: zarr.Group, name: str) -> zarr.Array:
    """The array ``name`` of ``group`` (StoreError if it is a group: a damaged store)."""
    node = group[name]
    if not isinstance(node, zarr.Array):
        raise StoreError(f"{group.store} is damaged: {name} is not an array")
    return node


def _names(value: Any) -> list[str]:
    """A JSON attribute that holds a list of names, as a list of str."""
    return [str(v) for v in value] if isinstance(value, list) else []


def _open_group(path: Path, mode: Literal["r", "r+"] = "r+", consolidated: bool | None = None) -> zarr.Group:
    """The store's root group (an upgrade cut short after its commit finished first); ``consolidated=False`` reads
    every array's own metadata (what a writer needs)."""
    if not path.exists():
        raise StoreError(f"no result store at {path}")
    journal.finish(path, layout.SCHEMA_VERSION)
    try:
        return zarr.open_group(DurableStore(path, read_only=mode == "r"), mode=mode, use_consolidated=consolidated)
    except (FileNotFoundError, NotADirectoryError, ValueError) as exc:
        raise StoreError(f"{path} is not a capsweep result store (no Zarr v3 group there: {exc})") from None


def _check_identity(path: Path, stored: dict[str, Any], fingerprint: str | None, growing: str | None = None,
                    writing: bool = False) -> None:
    """Raise StoreError unless the root attrs ``stored`` are those of a capsweep store of a readable schema (of this
    schema for ``writing``, and of this grid for ``fingerprint``), not half grown.

    ``growing``: the fingerprint of the grid the caller grows the store to (a half-grown store is then accepted).
    """
    if attrs.SCHEMA not in stored:
        raise StoreError(f"{path} is not a capsweep result store (its root attributes lack {attrs.SCHEMA})")
    version = stored[attrs.SCHEMA]
    if version not in layout.READABLE:
        raise StoreError(
            f"{path} has store schema version {version}; this capsweep reads versions "
            f"{', '.join(layout.READABLE)}: use the capsweep version that made it or start a new store"
        )
    if writing and version != layout.SCHEMA_VERSION:
        raise StoreError(
            f"{path} has store schema version {version}, this capsweep writes version {layout.SCHEMA_VERSION}; "
            f"`capsweep upgrade {path}` upgrades it in place (status, query, capacity, plot and export read it as "
            "it is)"
        )
    target = growing_to(path)
    if target is not None and target != growing:
        raise StoreError(
            f"{path} was being grown to a larger sweep grid (fingerprint {target}) when it stopped; run the sweep "
            "file that grows it again to finish"
        )
    if fingerprint is not None and stored.get(attrs.FINGERPRINT) != fingerprint:
        raise StoreError(
            f"{path} was built from a different sweep grid or base config (store fingerprint "
            f"{stored.get(attrs.FINGERPRINT)}, this sweep {fingerprint}); use another store path or delete it"
        )
