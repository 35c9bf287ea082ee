"""Recall against time, as tables: retention by delay after hold start, forgetting by memory age.

Each row is one condition (a combination of the sweep axes' values) at one delay or age: the fraction of cued
assemblies recalled (by the recall test), its mean over the done replicates and a 95 % Student-t interval across
them [common practice], with the delay in seconds and in multiples of the condition's
``plasticity.heterosynaptic.tau_consolidation_s`` (:func:`in_tau`, the one conversion). A retention delay is that
of a recall test during the hold or of the final test; under ``protocol.retention_design = "separate"`` every
point holds one delay (its hold) and the rows of a hold axis make the curve.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import xarray as xr
from scipy import stats

from ..axes import REPLICATE
from ..flags import DONE
from .expand import recorded_points
from .query import labelled, sweep_dims

CONFIDENCE = 0.95
"""Coverage of the interval across replicates."""


def in_tau(seconds: Any, tau_s: Any) -> Any:
    """Delays ``seconds`` (s) in multiples of the consolidation time constant ``tau_s`` (s)."""
    return np.asarray(seconds, dtype=float) / np.asarray(tau_s, dtype=float)


def _tau_per_point(ds: xr.Dataset) -> np.ndarray:
    """tau_consolidation_s (s) of every point, over the sweep dims (NaN where the store's sweep text is unreadable)."""
    taus = np.full(ds["point_id"].shape, np.nan)
    for p in recorded_points(ds.attrs, ds["point_id"].shape):
        taus[p.index] = p.config["plasticity"]["heterosynaptic"]["tau_consolidation_s"]
    return taus


def _rows(ds: xr.Dataset, recalled: str, tested: str, delay: str, inner: str) -> pd.DataFrame:
    """One row per done point and entry of ``inner`` that was tested: axes, replicate, entry, fraction, delay."""
    dims = sweep_dims(ds)
    done = (labelled(ds, "status") == DONE).transpose(*dims)
    taus = xr.DataArray(_tau_per_point(ds), dims=dims, coords=done.coords)
    table = xr.Dataset({"recalled": ds[recalled], "tested": ds[tested], "delay_s": ds[delay], "finished": done,
                        "tau_s": taus}).to_dataframe().reset_index()
    table = table[table["finished"] & (table["tested"] > 0)]
    table = table.assign(fraction=table["recalled"] / table["tested"], delay_tau=in_tau(table["delay_s"],
                                                                                        table["tau_s"]))
    return table[[d for d in dims if d != REPLICATE] + [REPLICATE, inner, "fraction", "delay_s", "delay_tau"]]


def _across_replicates(rows: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Mean fraction recalled per group with its interval across replicates (NaN with one replicate)."""
    out = rows.groupby(by, sort=True).agg(delay_s=("delay_s", "mean"), delay_tau=("delay_tau", "mean"),
                                          fraction=("fraction", "mean"), sd=("fraction", "std"),
                                          replicates=("fraction", "size")).reset_index()
    half = stats.t.ppf(0.5 + CONFIDENCE / 2, out["replicates"] - 1) * out["sd"] / np.sqrt(out["replicates"])
    return out.assign(ci_lo=(out["fraction"] - half).clip(lower=0.0), ci_hi=(out["fraction"] + half).clip(upper=1.0)
                      ).drop(columns="sd")


def retention_table(ds: xr.Dataset) -> pd.DataFrame:
    """Fraction of cued assemblies recalled per condition and retention delay, across replicates; delays in s and
    in tau_consolidation."""
    rows = _rows(ds, "retention_recalled", "retention_tested", "retention_delay_s", "retention")
    return _across_replicates(rows, [d for d in sweep_dims(ds) if d != REPLICATE] + ["retention"])


def forgetting_table(ds: xr.Dataset) -> pd.DataFrame:
    """Fraction of assemblies recalled per condition and memory age (learning blocks; blocked learning), across
    replicates; the age also as mean seconds since the assembly's last presentation and in tau_consolidation."""
    rows = _rows(ds, "age_recalled", "age_tested", "age_s", "age")
    return _across_replicates(rows, [d for d in sweep_dims(ds) if d != REPLICATE] + ["age"])
