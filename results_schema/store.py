"""The result store: one Zarr v3 directory per sweep, readable with plain ``xarray.open_zarr``.

This module writes with Zarr alone; reading as xarray is :mod:`capsweep.results_schema.dataset`, so
that a run, which only writes, never imports xarray (about 0.7 s).

``create_store`` lays out the whole grid once as an empty template: one array per variable of
``layout`` over the sweep dims (one per axis, then ``replicate``) plus the variable's inner dim.
Every array is chunked one point per chunk, so each finished point fills its own chunks and
nothing else. ``ResultStore`` keeps one opened Zarr group and writes a point's region straight
with Zarr: data variables first, ``status`` last, so a point whose write was cut short still
reads as pending. See SPEC.md beside this module for the full layout.
"""

from __future__ import annotations

import asyncio
import base64
import importlib.metadata
import shutil
import struct
import warnings
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Literal

import numpy as np
import zarr
from zarr.core.sync import sync
from zarr.errors import ZarrUserWarning

from ..axes import Axis
from ..errors import StoreError
from ..flags import STATUSES
from . import layout
from .layout import GridSpec

REPLICATE = "replicate"
ATTR_SCHEMA = "capsweep_schema_version"
ATTR_FINGERPRINT = "capsweep_fingerprint"
ATTR_AXES = "sweep_axes"
ATTR_CREATED = "created_utc"
ATTR_TIME_BIN = "time_bin_s"
AXIS_KEY_ATTR = "config_key"
VERSIONED_PACKAGES: tuple[str, ...] = ("capsweep", "brian2", "numpy", "xarray", "zarr", "dask")
RESERVED_ATTRS: frozenset[str] = frozenset(
    {ATTR_SCHEMA, ATTR_FINGERPRINT, ATTR_AXES, ATTR_CREATED, ATTR_TIME_BIN}
    | {f"version_{name}" for name in VERSIONED_PACKAGES}
)

# Variables whose every entry holds a value from creation on: no _FillValue, so they decode to
# their integer dtype (an unwritten status chunk holds the Zarr fill value 0 = pending).
ALWAYS_SET: frozenset[str] = frozenset({layout.STATUS.name, "seed"})
STRING_VARIABLES: dict[str, str] = {
    layout.ERROR: "error text of a failed point ('' when none)",
    layout.POINT_ID: "hash of the point's fully resolved config",
}
# Result variables a runner result must hold; seed is fixed at creation, the prediction optional.
OPTIONAL_RESULTS: frozenset[str] = frozenset({"seed", "predicted_outcome"})
REQUIRED_RESULTS: tuple[str, ...] = tuple(v.name for v in layout.VARIABLES if v.name not in OPTIONAL_RESULTS)


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
    sweep_shape = _check_grid(grid, point_ids, seeds)
    try:
        _write_template(path, grid, sweep_shape, point_ids, seeds)
    except BaseException:
        shutil.rmtree(path, ignore_errors=True)
        raise


class ResultStore:
    """An opened result store; the single writer of a sweep writes points through it."""

    def __init__(self, path: Path, group: zarr.Group) -> None:
        self.path = path
        self._group = group
        self._arrays: dict[str, zarr.Array] = {name: _array(group, name) for name in _stored_variables()}
        self._seeds = np.asarray(self._arrays["seed"][...])
        self._fills = {name: self._fill_block(layout.BY_NAME[name]) for name in REQUIRED_RESULTS}

    @classmethod
    def open(cls, path: str | Path, fingerprint: str | None = None) -> ResultStore:
        """Open the store at ``path`` for writing.

        Raises StoreError naming the path if it is missing, not a capsweep store, of another
        schema version, damaged, or (with ``fingerprint``) built from another grid.
        """
        path = Path(path)
        group = _open_group(path)
        _check_identity(path, dict(group.attrs), fingerprint)
        missing = sorted(set(_stored_variables()) - set(group.array_keys()))
        if missing:
            raise StoreError(f"{path} is damaged: variables {', '.join(missing)} are missing")
        return cls(path, group)

    @property
    def sweep_dims(self) -> tuple[str, ...]:
        """Dims that index a point: the axis names, then ``replicate``."""
        return (*_names(self._group.attrs[ATTR_AXES]), REPLICATE)

    @property
    def shape(self) -> tuple[int, ...]:
        """Number of points along each sweep dim."""
        return tuple(self._seeds.shape)

    def status(self) -> np.ndarray:
        """Status code of every point (capsweep.flags.STATUSES index), int8 over the sweep dims."""
        return np.asarray(self._arrays[layout.STATUS.name][...])

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
        self._write_values(index, values)
        self._set_status(index, "done")

    def write_failure(self, index: tuple[int, ...], error_text: str) -> None:
        """Record a failed point: error text, fill in every result, then status failed."""
        index = self._check_index(index)
        values = {name: self._fills[name] for name in REQUIRED_RESULTS}
        values[layout.ERROR] = str(error_text)
        self._write_values(index, values)
        self._set_status(index, "failed")

    def _write_values(self, index: tuple[int, ...], values: Mapping[str, Any]) -> None:
        """Write encoded per-point values into their chunks, all at once; returns when all are on disk.

        Concurrent chunk writes take about half the time of one-by-one writes (one file per
        variable and point). Status is never among them: it is written after they all finished.
        """
        async def write_all() -> None:
            await asyncio.gather(*(self._arrays[name].async_array.setitem(index, value)
                                   for name, value in values.items()))

        sync(write_all())

    def _set_status(self, index: tuple[int, ...], label: str) -> None:
        self._arrays[layout.STATUS.name][index] = STATUSES.index(label)

    def _encode_result(self, index: tuple[int, ...], result: Mapping[str, Any]) -> dict[str, Any]:
        unknown = sorted(set(result) - set(layout.BY_NAME))
        missing = [name for name in REQUIRED_RESULTS if name not in result]
        if unknown or missing:
            raise ValueError(f"result does not match the store layout: unknown {unknown}, missing {missing}")
        if "seed" in result and int(result["seed"]) != int(self._seeds[index]):
            raise ValueError(f"result seed {result['seed']} differs from the stored seed {self._seeds[index]}")
        return {
            name: _encode_value(layout.BY_NAME[name], value, self._inner_size(layout.BY_NAME[name]))
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
        return None if var.inner is None else self._arrays[var.name].shape[-1]

    def _fill_block(self, var: layout.Variable) -> Any:
        size = self._inner_size(var)
        return var.fill if size is None else np.full(size, var.fill, dtype=var.dtype)


def check_store(path: str | Path) -> None:
    """Raise StoreError unless ``path`` is a capsweep store of this schema (opens it read-only)."""
    path = Path(path)
    _check_identity(path, dict(_open_group(path, mode="r").attrs), None)


def _stored_variables() -> tuple[str, ...]:
    return (*(v.name for v in layout.VARIABLES), layout.STATUS.name, *STRING_VARIABLES)


def _encode_value(var: layout.Variable, value: Any, inner_size: int | None) -> Any:
    """Turn one result value into what the variable's array holds (codes for flags, padded rows)."""
    if var.flags:
        if value is None:
            return var.fill
        if value not in var.flags:
            raise ValueError(f"{var.name} = {value!r} is not one of {', '.join(var.flags)}")
        return var.flags.index(value)
    if inner_size is None:
        return _encode_scalar(var, value)
    row = np.asarray(value, dtype=float).ravel()
    if row.size > inner_size:
        raise ValueError(f"{var.name} has {row.size} entries but its {var.inner} dim holds {inner_size}")
    padded = np.full(inner_size, var.fill, dtype=var.dtype)
    padded[: row.size] = row
    return padded


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
    taken = {REPLICATE, *layout.INNER_DIMS, *_stored_variables()}
    clashes = sorted(set(names) & taken)
    if clashes or len(set(names)) != len(names):
        raise ValueError(f"axis names must be unique and not among {sorted(taken)}: {names}")
    for axis in grid.axes:
        if not axis.values or len(set(axis.values)) != len(axis.values):
            raise ValueError(f"axis {axis.name} needs distinct values, got {axis.values}")
    if grid.replicates < 1:
        raise ValueError(f"replicates must be at least 1, got {grid.replicates}")
    reserved = sorted(RESERVED_ATTRS & set(grid.attrs))
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
    group = zarr.create_group(path, zarr_format=3, attributes=_root_attrs(grid))
    sweep_dims = (*(axis.name for axis in grid.axes), REPLICATE)
    inner_sizes = {"assembly": grid.n_assembly, "snapshot": grid.n_snapshot, "time_bin": grid.n_time_bin,
                   "retention": grid.n_retention}
    _write_coordinates(group, grid)
    for var in layout.VARIABLES + (layout.STATUS,):
        inner = () if var.inner is None else (var.inner,)
        _create_variable(group, var.name, sweep_dims + inner, (*sweep_shape, *(inner_sizes[d] for d in inner)),
                         var.dtype, _zarr_fill(var), _variable_attrs(var), len(sweep_dims))
    for name, long_name in STRING_VARIABLES.items():
        _create_variable(group, name, sweep_dims, sweep_shape, str, "", {"units": "1", "long_name": long_name},
                         len(sweep_dims))
    _array(group, "seed")[...] = np.asarray(seeds, dtype=np.int64)
    _array(group, layout.POINT_ID)[...] = np.asarray(point_ids, dtype=object)
    group.attrs[ATTR_SCHEMA] = layout.SCHEMA_VERSION
    with warnings.catch_warnings():
        # Consolidated metadata is not yet in the Zarr v3 spec; xarray reads it and without it
        # plain xr.open_zarr(path) warns on every open.
        warnings.simplefilter("ignore", ZarrUserWarning)
        zarr.consolidate_metadata(path)


def _write_coordinates(group: zarr.Group, grid: GridSpec) -> None:
    for axis in grid.axes:
        values = _axis_array(axis)
        _create_variable(group, axis.name, (axis.name,), values.shape, values.dtype if values.dtype != object else str,
                         None, {"units": axis.units, "long_name": axis.long_name, AXIS_KEY_ATTR: axis.key})
        _array(group, axis.name)[...] = values
    counters = (
        (REPLICATE, grid.replicates, "replicate (independent seed) of a grid cell"),
        ("assembly", grid.n_assembly, "assembly index"),
        ("snapshot", grid.n_snapshot, "weight snapshot index during the hold phase"),
        ("retention", grid.n_retention, "recall test index (tests during the hold, then the final test)"),
    )
    for name, size, long_name in counters:
        _create_variable(group, name, (name,), (size,), "int64", None, {"units": "1", "long_name": long_name})
        _array(group, name)[...] = np.arange(size)
    _create_variable(group, "time_bin", ("time_bin",), (grid.n_time_bin,), "float64", None,
                     {"units": "s", "long_name": "start time of the population rate bin"})
    _array(group, "time_bin")[...] = np.arange(grid.n_time_bin) * grid.time_bin_s


def _axis_array(axis: Axis) -> np.ndarray:
    """Axis values as an array of one kind: bool, int64, float64 or str (object)."""
    values = np.asarray(axis.values)
    kinds = {"b": bool, "i": np.int64, "u": np.int64, "f": np.float64, "U": object}
    mixed = values.dtype.kind == "U" and not all(isinstance(v, str) for v in axis.values)
    if values.dtype.kind not in kinds or mixed:
        raise ValueError(f"axis {axis.name} values must be all int, all float, all str or all bool: {axis.values}")
    return values.astype(kinds[values.dtype.kind])


def _create_variable(group: zarr.Group, name: str, dims: tuple[str, ...], shape: tuple[int, ...],
                     dtype: Any, fill: Any, attrs: dict[str, Any], n_point_dims: int = 0) -> None:
    """Create one array chunked 1 along its first ``n_point_dims`` dims and whole along the rest.

    Arrays of one value per point are stored uncompressed: compressing a few bytes costs time
    on every point write and saves nothing.
    """
    chunks = (*(1 for _ in shape[:n_point_dims]), *(max(n, 1) for n in shape[n_point_dims:]))
    per_point_scalar = 0 < n_point_dims == len(shape)
    group.create_array(name, shape=shape, chunks=chunks, dtype=dtype, dimension_names=dims, fill_value=fill,
                       attributes=attrs, compressors=None if per_point_scalar else "auto")


def _zarr_fill(var: layout.Variable) -> float | int:
    """What an unwritten chunk holds: pending for status, the layout's fill value otherwise."""
    return STATUSES.index("pending") if var is layout.STATUS else var.fill


def _variable_attrs(var: layout.Variable) -> dict[str, Any]:
    attrs: dict[str, Any] = {"units": var.units, "long_name": var.long_name}
    if var.flags:
        attrs["flag_values"] = list(range(len(var.flags)))
        attrs["flag_meanings"] = " ".join(var.flags)
    if var.name not in ALWAYS_SET:
        attrs["_FillValue"] = _fill_attr(var.fill)
    return attrs


def _fill_attr(fill: float | int) -> float | int | str:
    """A _FillValue attr as xarray reads it from Zarr v3: ints as is, floats as base64 of '<d'."""
    if isinstance(fill, float):
        return base64.standard_b64encode(struct.pack("<d", fill)).decode()
    return fill


def _root_attrs(grid: GridSpec) -> dict[str, Any]:
    return {
        ATTR_FINGERPRINT: grid.fingerprint,
        ATTR_AXES: [axis.name for axis in grid.axes],
        ATTR_TIME_BIN: float(grid.time_bin_s),
        ATTR_CREATED: datetime.now(UTC).isoformat(timespec="seconds"),
        **{f"version_{name}": _package_version(name) for name in VERSIONED_PACKAGES},
        **grid.attrs,
    }


def _package_version(name: str) -> str:
    try:
        return importlib.metadata.version(name)
    except importlib.metadata.PackageNotFoundError:
        return "unknown"


def _array(group: zarr.Group, name: str) -> zarr.Array:
    """The array ``name`` of ``group`` (StoreError if it is a group: a damaged store)."""
    node = group[name]
    if not isinstance(node, zarr.Array):
        raise StoreError(f"{group.store} is damaged: {name} is not an array")
    return node


def _names(value: Any) -> list[str]:
    """A JSON attribute that holds a list of names, as a list of str."""
    return [str(v) for v in value] if isinstance(value, list) else []


def _open_group(path: Path, mode: Literal["r", "r+"] = "r+") -> zarr.Group:
    if not path.exists():
        raise StoreError(f"no result store at {path}")
    try:
        return zarr.open_group(path, mode=mode)
    except (FileNotFoundError, NotADirectoryError, ValueError) as exc:
        raise StoreError(f"{path} is not a capsweep result store (no Zarr v3 group there: {exc})") from None


def _check_identity(path: Path, attrs: dict[str, Any], fingerprint: str | None) -> None:
    """Raise StoreError unless ``attrs`` are those of a capsweep store of this schema (and grid)."""
    if ATTR_SCHEMA not in attrs:
        raise StoreError(f"{path} is not a capsweep result store (its root attributes lack {ATTR_SCHEMA})")
    if attrs[ATTR_SCHEMA] != layout.SCHEMA_VERSION:
        raise StoreError(
            f"{path} has store schema version {attrs[ATTR_SCHEMA]}, this capsweep writes version "
            f"{layout.SCHEMA_VERSION}; use the capsweep version that made it or start a new store"
        )
    if fingerprint is not None and attrs.get(ATTR_FINGERPRINT) != fingerprint:
        raise StoreError(
            f"{path} was built from a different sweep grid or base config (store fingerprint "
            f"{attrs.get(ATTR_FINGERPRINT)}, this sweep {fingerprint}); use another store path or delete it"
        )
