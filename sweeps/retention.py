"""Recall against time, as tables: retention by delay after hold start, forgetting by memory age.

Each row is one condition (a combination of the sweep axes' values) at one delay or age: the fraction of cued
assemblies recalled (by the recall test), its mean over the done replicates, the recalled and tested counts pooled
over them with a 95 % Wilson score interval (Wilson 1927, J Am Stat Assoc 22:209), and a 95 % Student-t interval
across replicates [common practice], with the delay in seconds and in multiples of the condition's
``plasticity.heterosynaptic.tau_consolidation_s`` (:func:`in_tau`, the one conversion).

Why both intervals: when every replicate gives the same fraction (all recalled, say) the Student-t interval has
zero width ([1, 1]), which claims a certainty that three replicates of four odours cannot give; the Wilson interval
of 12 recalled of 12 tested is [0.76, 1]. Pooling treats every test as independent, which it is not: tests within
one replicate share its network and wiring (clustered), so the Wilson interval is too narrow where replicates
differ; the Student-t interval across replicates is the one that sees that spread. Read the wider of the two.

A retention delay is that of a recall test during the hold or of the final test; under
``protocol.retention_design = "separate"`` every point holds one delay (its hold) and the rows of a hold axis make
the curve.
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
from .sequential import wilson_interval

CONFIDENCE = 0.95
"""Coverage of the interval across replicates."""


def in_tau(seconds: Any, tau_s: Any) -> Any:
    """Delays ``seconds`` (s) in multiples of the consolidation time constant ``tau_s`` (s)."""
    return np.asarray(seconds, dtype=float) / np.asarray(tau_s, dtype=float)


def _per_point(ds: xr.Dataset, section: str, key: str) -> xr.DataArray:
    """The config value ``[section] key`` of every point, over the sweep dims (NaN where the store's sweep text is
    unreadable)."""
    dims = sweep_dims(ds)
    values = np.full(ds["point_id"].shape, np.nan)
    for p in recorded_points(ds.attrs, ds["point_id"].shape):
        config = p.config
        for part in section.split("."):
            config = config[part]
        values[p.index] = config[key]
    return xr.DataArray(values, dims=dims, coords={d: ds[d] for d in dims if d in ds.coords})


def _retention_tested(ds: xr.Dataset) -> xr.DataArray:
    """Assemblies each recall test cued; a point written before store schema 3.2 holds none (its tests each cued every
    assembly, before protocol.retention_design): its assembly count where its test was reached."""
    tested = ds["retention_tested"].where(ds["retention_tested"] >= 0)
    every = _per_point(ds, "assemblies", "count").where(ds["retention_recalled"] >= 0)
    return tested.fillna(every)


def _rows(ds: xr.Dataset, recalled: str, tested: xr.DataArray, delay: str, inner: str) -> pd.DataFrame:
    """One row per done point and entry of ``inner`` that was tested: axes, replicate, entry, recalled and tested
    counts, fraction, delay."""
    dims = sweep_dims(ds)
    done = (labelled(ds, "status") == DONE).transpose(*dims)
    table = xr.Dataset({"recalled": ds[recalled], "tested": tested, "delay_s": ds[delay], "finished": done,
                        "tau_s": _per_point(ds, "plasticity.heterosynaptic", "tau_consolidation_s")}
                       ).to_dataframe().reset_index()
    table = table[table["finished"] & (table["tested"] > 0)]
    table = table.assign(fraction=table["recalled"] / table["tested"], delay_tau=in_tau(table["delay_s"],
                                                                                        table["tau_s"]))
    return table[[d for d in dims if d != REPLICATE] + [REPLICATE, inner, "recalled", "tested", "fraction", "delay_s",
                                                        "delay_tau"]]


def _across_replicates(rows: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Per group: mean fraction recalled over replicates, the counts pooled over them with their Wilson interval,
    and the Student-t interval of the fraction across replicates (NaN with one replicate)."""
    out = rows.groupby(by, sort=True).agg(delay_s=("delay_s", "mean"), delay_tau=("delay_tau", "mean"),
                                          fraction=("fraction", "mean"), replicates=("fraction", "size"),
                                          recalled=("recalled", "sum"), tested=("tested", "sum"),
                                          sd=("fraction", "std")).reset_index()
    out = out.astype({"recalled": int, "tested": int})
    wilson = [wilson_interval(r, n, CONFIDENCE) for r, n in zip(out["recalled"], out["tested"])]
    half = stats.t.ppf(0.5 + CONFIDENCE / 2, out["replicates"] - 1) * out["sd"] / np.sqrt(out["replicates"])
    return out.assign(wilson_lo=[w[0] for w in wilson], wilson_hi=[w[1] for w in wilson],
                      t_lo=(out["fraction"] - half).clip(lower=0.0), t_hi=(out["fraction"] + half).clip(upper=1.0)
                      ).drop(columns="sd")


def retention_table(ds: xr.Dataset) -> pd.DataFrame:
    """Fraction of cued assemblies recalled per condition and retention delay, across replicates; delays in s and
    in tau_consolidation."""
    rows = _rows(ds, "retention_recalled", _retention_tested(ds), "retention_delay_s", "retention")
    return _across_replicates(rows, [d for d in sweep_dims(ds) if d != REPLICATE] + ["retention"])


def forgetting_table(ds: xr.Dataset) -> pd.DataFrame:
    """Fraction of assemblies recalled per condition and memory age (learning blocks; blocked learning), across
    replicates; the age also as mean seconds since the assembly's last presentation and in tau_consolidation."""
    rows = _rows(ds, "age_recalled", ds["age_tested"], "age_s", "age")
    return _across_replicates(rows, [d for d in sweep_dims(ds) if d != REPLICATE] + ["age"])
