"""Answer questions from a store: point tables, filters, status counts, plausibility.

Capacity is in :mod:`capsweep.sweeps.capacity`. Everything here reads the store with plain
xarray; filters use pandas' expression engine (``DataFrame.query``), never Python ``eval`` on
user text.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import CapsweepError
from ..results_schema.dataset import flag_labels
from ..results_schema.layout import STATUS

DEFAULT_WHERE = 'status == "done" and outcome == "stable"'
COUNT_KEY = "assemblies.count"


class QueryError(CapsweepError):
    """A filter expression or a requested table does not fit the store."""


def sweep_dims(ds: xr.Dataset) -> list[str]:
    """The store's sweep dims (one per axis, then ``replicate``)."""
    return [str(d) for d in ds[STATUS.name].dims]


def axis_keys(ds: xr.Dataset) -> dict[str, str]:
    """Axis dim name -> the config key it sets."""
    return {d: ds[d].attrs.get("config_key", "") for d in sweep_dims(ds) if d != "replicate"}


def labelled(ds: xr.Dataset, name: str) -> xr.DataArray:
    """A flag variable of ``ds`` as its labels (``status``/``outcome``/...), unwritten entries as ''."""
    return flag_labels(ds[name])


def point_table(ds: xr.Dataset) -> pd.DataFrame:
    """One row per point: axis values, replicate, labels, scalar metrics and per-point summaries."""
    dims = sweep_dims(ds)
    columns: dict[str, xr.DataArray] = {}
    for key, var in ds.data_vars.items():
        name = str(key)
        if tuple(var.dims) != tuple(dims) or name in ("point_id", "error"):
            continue
        columns[name] = labelled(ds, name) if "flag_meanings" in var.attrs else var
    summaries = {
        "recall_score_min": ds["recall_score"].min("assembly", skipna=True),
        "recall_quality_min": ds["recall_quality"].min("assembly", skipna=True),
        "recall_quality_mean": ds["recall_quality"].mean("assembly", skipna=True),
        "cross_talk_max": ds["cross_talk"].max("assembly", skipna=True),
        "weight_correlation_end": ds["weight_correlation"].isel(snapshot=-1),
        "assembly_contrast_end": ds["assembly_contrast"].isel(snapshot=-1),
    }
    table = xr.Dataset({"point_id": ds["point_id"], **columns, **summaries}).reset_coords(drop=True)
    return table.to_dataframe(dim_order=dims).reset_index()


def select(frame: pd.DataFrame, where: str = DEFAULT_WHERE) -> pd.DataFrame:
    """Rows of ``frame`` matching the pandas query ``where`` (e.g. ``'beta > 0 and recalled_count >= 2'``)."""
    if not where.strip():
        return frame
    try:
        return frame.query(where, engine="python")
    except Exception as exc:
        raise QueryError(
            f"--where {where!r} is not a valid filter ({type(exc).__name__}: {exc}). "
            f"Columns: {', '.join(frame.columns)}. Text values need quotes, e.g. outcome == \"stable\""
        ) from None


def status_counts(ds: xr.Dataset) -> dict[str, dict[str, int]]:
    """Counts of points by status and, among done points, by outcome."""
    status = labelled(ds, "status").values.ravel()
    outcome = labelled(ds, "outcome").values.ravel()[status == "done"]
    flags = ds[STATUS.name].attrs["flag_meanings"].split()
    outcomes = ds["outcome"].attrs["flag_meanings"].split()
    return {
        "status": {f: int(np.sum(status == f)) for f in flags},
        "outcome": {o: int(np.sum(outcome == o)) for o in outcomes},
    }


@dataclass(frozen=True)
class Plausibility:
    """Ranges of the base-network statistics over done points (min, max)."""

    rate_exc_hz: tuple[float, float]
    rate_inh_hz: tuple[float, float]
    isi_cv: tuple[float, float]
    warnings: tuple[str, ...]


def plausibility(ds: xr.Dataset) -> Plausibility:
    """Baseline rate and ISI-CV ranges, with warnings for silent or saturated base networks.

    Bands (common practice for cortical asynchronous irregular activity): excitatory rates of
    0.5-20 Hz and ISI CV of 0.5-1.5.
    """
    done = labelled(ds, "status") == "done"

    def span(name: str) -> tuple[float, float]:
        values = ds[name].where(done).values
        if np.all(np.isnan(values)):
            return (float("nan"), float("nan"))
        return (float(np.nanmin(values)), float(np.nanmax(values)))

    exc, inh, cv = span("rate_exc_baseline_hz"), span("rate_inh_baseline_hz"), span("isi_cv_exc")
    warnings = []
    if exc[0] < 0.5:
        warnings.append(f"some base networks are nearly silent (E rate down to {exc[0]:.2f} Hz)")
    if exc[1] > 20:
        warnings.append(f"some base networks fire fast (E rate up to {exc[1]:.1f} Hz)")
    if cv[0] < 0.5:
        warnings.append(f"some base networks fire regularly (ISI CV down to {cv[0]:.2f}), not irregularly")
    return Plausibility(exc, inh, cv, tuple(warnings))
