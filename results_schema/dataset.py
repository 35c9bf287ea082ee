"""Reading a store: the labelled xarray Dataset that queries and plots work on."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .store import check_store
from .upgrade import as_current


def open_dataset(path: str | Path, chunks: Any = None) -> xr.Dataset:
    """Open a store as an xarray Dataset (``xr.open_zarr``; ``chunks=None`` loads lazily without dask).

    Flag variables decode to float with NaN where unset; ``flag_labels`` turns them into labels. A store of an
    earlier schema reads as this schema lays it out (its variables added since read as missing; nothing written).
    Raises StoreError if ``path`` is not a capsweep store, or one whose growth was cut short.
    """
    check_store(path)
    return as_current(xr.open_zarr(path, chunks=chunks))


def flag_labels(flags: xr.DataArray) -> xr.DataArray:
    """Map a CF flag variable's codes to their flag_meanings labels ('' where unset)."""
    meanings = str(flags.attrs["flag_meanings"]).split()
    codes = dict(zip((int(v) for v in flags.attrs["flag_values"]), meanings))
    values = np.asarray(flags.values, dtype=float)
    labels = np.array([codes.get(int(v), "") if np.isfinite(v) else "" for v in values.ravel()], dtype=object)
    return xr.DataArray(labels.reshape(values.shape), coords=flags.coords, dims=flags.dims, name=flags.name)
