"""Export a store for tools outside capsweep: a CF netCDF file of everything, a CSV of the point table.

The store already carries CF metadata (``Conventions``, ``title``, ``history``, ``units``,
``long_name``, flag attributes). What netCDF or CF does not allow is converted here, in the copy
only: text arrays become netCDF strings, attributes holding lists of text or mappings become JSON
text, flag_values take their variable's dtype, a sweep axis whose values are not numeric and
strictly monotonic becomes an index coordinate with the values beside it (CF coordinate variables
must be both).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..outputs import fault, new_file
from ..results_schema import attrs
from .capacity import point_success
from .query import axis_keys, column_units, point_table, table_csv

AXIS_VALUE_SUFFIX = "_value"


def write_netcdf(ds: xr.Dataset, source: Path, path: Path) -> None:
    """Write the whole store ``ds`` (opened from ``source``) as a CF netCDF-4 file at ``path`` (a new file; its
    folder is created if missing), through h5netcdf (pure Python on h5py, installed with capsweep).

    Raises CapsweepError if ``path`` exists or cannot be written.
    """
    new_file(path, "--netcdf")
    partial = path.with_name(path.name + ".partial")
    try:
        netcdf_dataset(ds, f"capsweep export: {source} -> {path}").to_netcdf(partial, engine="h5netcdf",
                                                                             format="NETCDF4")
        partial.rename(path)
    except OSError as exc:
        raise fault(path, exc) from None
    finally:
        partial.unlink(missing_ok=True)


def write_csv(ds: xr.Dataset, path: Path) -> None:
    """Write every point of ``ds`` as CSV at ``path`` (a new file; its folder is created if missing), columns as
    ``query --all --format csv`` writes them."""
    frame = point_table(ds, point_success(ds))
    text = table_csv(frame, column_units(ds, list(frame.columns)))
    new_file(path, "--csv")
    try:
        with path.open("x") as handle:
            handle.write(text)
    except OSError as exc:
        raise fault(path, exc) from None


def netcdf_dataset(ds: xr.Dataset, history_line: str) -> xr.Dataset:
    """A loaded copy of ``ds`` that netCDF-4 can hold and CF accepts; ``history_line`` is appended to ``history``."""
    out = ds.load().copy()
    for name in list(out.variables):
        out[name] = _netcdf_variable(out[name].variable, is_coordinate=name in out.coords)
    for axis in axis_keys(ds):
        out = _index_axis(out, axis) if not _is_cf_coordinate(out[axis].values) else out
    defaults = attrs.cf_root_attrs(str(ds.attrs.get(attrs.SWEEP_NAME, "")), str(ds.attrs.get(attrs.CREATED, "")))
    merged = {**defaults, **ds.attrs}
    merged[attrs.HISTORY] = f"{merged[attrs.HISTORY]}\n{datetime.now(UTC).isoformat(timespec='seconds')} {history_line}"
    out.attrs = {key: _netcdf_attr(value) for key, value in merged.items()}
    return out


def _netcdf_variable(var: xr.Variable, is_coordinate: bool) -> xr.Variable:
    """``var`` with text as object strings, only the dtype and fill encodings, legal attrs and flag dtypes."""
    text = var.dtype.kind not in "biuf"
    data = np.asarray(var.values, dtype=object) if text else var.values
    encoding = {key: var.encoding[key] for key in ("dtype", "_FillValue") if key in var.encoding and not text}
    if is_coordinate:
        encoding["_FillValue"] = None  # CF: coordinate variables have no missing values
    attrs = {key: _netcdf_attr(value) for key, value in var.attrs.items()}
    if "flag_values" in attrs:
        attrs["flag_values"] = np.asarray(var.attrs["flag_values"], dtype=encoding.get("dtype", var.dtype))
    return xr.Variable(var.dims, data, attrs, encoding)


def _is_cf_coordinate(values: np.ndarray) -> bool:
    """Whether ``values`` may be a CF coordinate variable: numeric and strictly monotonic."""
    if values.dtype.kind not in "iuf":
        return False
    steps = np.diff(values.astype(float))
    return bool(np.all(steps > 0) or np.all(steps < 0))


def _index_axis(ds: xr.Dataset, axis: str) -> xr.Dataset:
    """Replace the coordinate of ``axis`` by 0..n-1 and keep its values as the auxiliary coordinate ``<axis>_value``."""
    values = ds[axis].variable
    index = xr.Variable(axis, np.arange(values.size), {"units": "1", "long_name": f"index along the {axis} axis"},
                        {"_FillValue": None})
    return ds.assign_coords({axis: index, axis + AXIS_VALUE_SUFFIX: values})


def _netcdf_attr(value: Any) -> Any:
    """An attribute value netCDF can hold: text and numbers as they are, numeric lists as arrays, the rest as JSON."""
    if isinstance(value, str | int | float | np.ndarray | np.number) and not isinstance(value, bool):
        return value
    if isinstance(value, list | tuple) and value and all(isinstance(v, int | float) and not isinstance(v, bool)
                                                         for v in value):
        return np.asarray(value)
    return json.dumps(value)

