"""Answer questions from a store: point tables, filters, status counts, plausibility.

Capacity is in :mod:`capsweep.sweeps.capacity`. Everything here reads the store with plain
xarray; filters use pandas' expression engine (``DataFrame.query``), never Python ``eval`` on
user text.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from ..axes import REPLICATE
from ..errors import CapsweepError
from ..flags import DONE, FAILED, OUTCOMES, STABLE, STATUSES
from ..registry import DIMENSIONLESS
from ..results_schema import attrs, layout
from ..results_schema.dataset import flag_labels, open_dataset
from ..results_schema.layout import STATUS

DEFAULT_WHERE = f'status == "{DONE}" and outcome == "{STABLE}"'
SUCCESS = "success"
"""Column of the point table: whether a done point succeeds (the success rule of ``capsweep.sweeps.success``)."""

# Per-point summaries of inner-dim variables: column -> (source variable, reduction).
SUMMARIES: dict[str, tuple[str, Callable[[xr.DataArray], xr.DataArray]]] = {
    "recall_score_min": ("recall_score", lambda v: v.min("assembly", skipna=True)),
    "recall_quality_min": ("recall_quality", lambda v: v.min("assembly", skipna=True)),
    "recall_quality_mean": ("recall_quality", lambda v: v.mean("assembly", skipna=True)),
    "cross_talk_max": ("cross_talk", lambda v: v.max("assembly", skipna=True)),
    "weight_correlation_end": ("weight_correlation", lambda v: v.isel(snapshot=-1)),
    "assembly_contrast_end": ("assembly_contrast", lambda v: v.isel(snapshot=-1)),
}


class QueryError(CapsweepError):
    """A filter expression or a requested table does not fit the store."""


def sweep_dims(ds: xr.Dataset) -> list[str]:
    """The store's sweep dims (one per axis, then ``replicate``)."""
    return [str(d) for d in ds[STATUS.name].dims]


def axis_keys(ds: xr.Dataset) -> dict[str, str]:
    """Axis dim name -> the config key it sets."""
    return {d: ds[d].attrs.get(attrs.AXIS_KEY, "") for d in sweep_dims(ds) if d != REPLICATE}


def labelled(ds: xr.Dataset, name: str) -> xr.DataArray:
    """A flag variable of ``ds`` as its labels (``status``/``outcome``/...), unwritten entries as ''."""
    return flag_labels(ds[name])


def open_store(path: str | Path, command: str) -> xr.Dataset:
    """Open the store at ``path`` for ``capsweep COMMAND``; a sweep file given instead names its store.

    Raises StoreError if ``path`` is not a store, CapsweepError naming the store if it is a sweep file.
    """
    path = Path(path)
    if path.is_file():
        from .sweepfile import load_sweep

        store = load_sweep(path).store
        raise CapsweepError(f"{path} is a sweep file; its store is {store} (run `capsweep {command} {store}`)")
    return open_dataset(path)


def point_table(ds: xr.Dataset, success: xr.DataArray | None = None) -> pd.DataFrame:
    """One row per point, in sweep order (axes and values as in the sweep file, then replicate).

    Columns: the sweep dims, ``point_id``, ``status``, ``success`` when given (per point 1.0, 0.0 or NaN,
    as ``capsweep.sweeps.capacity.point_success`` gives it: shown True, False or NA), the scalar variables in
    layout order (flags as labels, integers as pandas ``Int64`` with missing values as NA), then the
    ``SUMMARIES``.
    """
    dims = sweep_dims(ds)
    scalars = [v for v in layout.VARIABLES if tuple(ds[v.name].dims) == tuple(dims)]
    columns: dict[str, xr.DataArray] = {"point_id": ds[layout.POINT_ID], "status": labelled(ds, STATUS.name)}
    if success is not None:
        columns[SUCCESS] = success
    for var in scalars:
        columns[var.name] = labelled(ds, var.name) if var.flags else ds[var.name]
    columns.update({name: reduce(ds[source]) for name, (source, reduce) in SUMMARIES.items()})
    frame = xr.Dataset(columns).reset_coords(drop=True).to_dataframe(dim_order=dims).reset_index()
    integers = [v.name for v in scalars if v.dtype.startswith("int") and not v.flags]
    frame = frame.astype({name: "Int64" for name in integers})
    if success is not None:
        frame[SUCCESS] = frame[SUCCESS].map({1.0: True, 0.0: False}).astype("boolean")
    return frame


def column_units(ds: xr.Dataset, columns: list[str]) -> dict[str, str]:
    """Units of each of ``columns`` that has one: the CF ``units`` if not "1", else the scale of a relative unit
    (weights: g_leak); labels have none."""
    units = {}
    for name in columns:
        source = SUMMARIES[name][0] if name in SUMMARIES else name
        described = ds[source].attrs if source in ds.variables else {}
        unit = str(described.get(attrs.RELATIVE_TO) or described.get("units", DIMENSIONLESS))
        if unit != DIMENSIONLESS:
            units[name] = unit
    return units


CSV_DIGITS = 15
"""Significant digits of floats in CSV: every digit a float64 holds reliably, without the last one's noise
(0.9999999999999999 is written 1)."""


def table_csv(frame: pd.DataFrame, units: dict[str, str]) -> str:
    """``frame`` as CSV; a column whose name does not already end in its unit is headed ``name [unit]``."""
    def header(name: str) -> str:
        unit = units.get(name)
        return name if unit is None or name.lower().endswith("_" + unit.lower()) else f"{name} [{unit}]"

    return frame.rename(columns=header).to_csv(index=False, float_format=f"%.{CSV_DIGITS}g")


def table_json(frame: pd.DataFrame, units: dict[str, str], where: str) -> str:
    """``frame`` as one JSON document: ``{"units": {column: unit}, "filter": where, "rows": [...]}``.

    The one JSON shape of every table capsweep writes (query, capacity); ``where`` is '' for no filter.
    """
    rows = json.loads(frame.to_json(orient="records"))
    return json.dumps({"units": units, "filter": where, "rows": rows}, indent=1) + "\n"


def active_filter(where: str | None, every_point: bool) -> tuple[str, str]:
    """The filter expression a query applies and how to describe it.

    ``where`` narrows the default filter (done and stable points); ``every_point`` (``--all``) drops the
    default, so ``where`` alone applies.
    """
    if every_point:
        return (where, f"{where} (--all: the default filter dropped)") if where else ("", "none (--all: every point)")
    if where:
        return f"{DEFAULT_WHERE} and ({where})", f"{DEFAULT_WHERE} (default) and ({where}); --all drops the default"
    return DEFAULT_WHERE, f"{DEFAULT_WHERE} (default; --all for every point)"


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
    """Counts of points by every status of ``capsweep.flags.STATUSES`` and, among done points, by outcome."""
    status = labelled(ds, STATUS.name).values.ravel()
    outcome = labelled(ds, "outcome").values.ravel()[status == DONE]
    return {
        "status": {label: int(np.sum(status == label)) for label in STATUSES},
        "outcome": {label: int(np.sum(outcome == label)) for label in OUTCOMES},
    }


@dataclass(frozen=True)
class FailedPoint:
    """A failed point: its labels along the sweep dims, its id and the first line of its stored error."""

    labels: dict[str, object]
    point_id: str
    error: str


def failed_points(ds: xr.Dataset) -> list[FailedPoint]:
    """Every failed point in sweep order, with the first line of its error text."""
    frame = xr.Dataset({"status": labelled(ds, STATUS.name), "point_id": ds[layout.POINT_ID],
                        "error": ds[layout.ERROR]}).to_dataframe(dim_order=sweep_dims(ds)).reset_index()
    failed = frame[frame["status"] == FAILED]
    return [FailedPoint({d: row[d] for d in sweep_dims(ds)}, str(row["point_id"]),
                        (str(row["error"]).strip().splitlines() or [""])[0])
            for _, row in failed.iterrows()]


def failures_by_error(ds: xr.Dataset) -> dict[str, list[FailedPoint]]:
    """Failed points grouped by the first line of their error, the most frequent error first (then sweep order)."""
    groups: dict[str, list[FailedPoint]] = {}
    for point in failed_points(ds):
        groups.setdefault(point.error, []).append(point)
    return dict(sorted(groups.items(), key=lambda item: -len(item[1])))


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
    done = labelled(ds, "status") == DONE

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
