"""Controls beside each condition: how often each control of a store's ``control`` dim succeeds.

A *condition* here is a combination of the axes other than the count and the control dim. Per condition and
control kind (``capsweep.controls``), the success of its points is pooled over every count and replicate (done
points only) with a 95 % Wilson score interval (Wilson 1927, J Am Stat Assoc 22:209).

Without a memory or without a cue, a point succeeds by chance with probability at most the recall test's per-test
false-positive rate ``detection.recall_alpha`` (see the recall test's definition: success needs every assembly
recalled). A condition is *flagged* when a control that removes the memory or the cue (``Control.false_positive``:
sham and unstructured) succeeds more often than that beyond chance: :func:`exceeds_false_positive_rate`.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..axes import COUNT_KEY
from ..controls import AS_IS, BY_NAME, CONTROL_DIM
from .capacity import point_success, wilson_interval
from .expand import recorded_points
from .query import QueryError, axis_keys

STAT_COLUMNS: tuple[str, ...] = ("n", "successes", "fraction", "wilson_lo", "wilson_hi", "alpha", "flagged")
"""The columns of :func:`control_success` after the condition's labels and the control kind."""


def exceeds_false_positive_rate(successes: int, done: int, alpha: float) -> bool:
    """The flag: the lower end of the 95 % Wilson interval of ``successes`` of ``done`` lies above ``alpha``.

    So 0 successes never flag, 1 of 48 does not at alpha = 0.01 (the interval starts at 0.4 %), 1 of 12 does
    (1.5 %): a control is flagged when its success is more than chance alone gives at the false-positive rate.
    """
    return done > 0 and wilson_interval(successes, done)[0] > alpha


def control_success(ds: xr.Dataset) -> pd.DataFrame:
    """Per condition and control kind: done points, successes, fraction, Wilson interval, alpha, flag.

    Empty when the store has no control dim. ``alpha`` is the largest ``detection.recall_alpha`` among the
    control's points, read from the sweep the store records.
    """
    if CONTROL_DIM not in ds.dims:
        return pd.DataFrame()
    success, alpha = point_success(ds), _alphas(ds)
    others = [d for d, key in axis_keys(ds).items() if d != CONTROL_DIM and key != COUNT_KEY]
    rows = []
    for combo in itertools.product(*(range(ds.sizes[d]) for d in others)):
        where = dict(zip(others, combo))
        labels = {d: ds[d].values.tolist()[i] for d, i in where.items()}
        for kind in ds[CONTROL_DIM].values.tolist():
            if kind == AS_IS:
                continue
            values = success.isel(where).sel({CONTROL_DIM: kind}).values
            done, wins = int(np.isfinite(values).sum()), int(np.nansum(values))
            low, high = wilson_interval(wins, done)
            rate = float(np.max(alpha.isel(where).sel({CONTROL_DIM: kind}).values))
            rows.append({**labels, CONTROL_DIM: kind, "n": done, "successes": wins,
                         "fraction": wins / done if done else np.nan, "wilson_lo": low, "wilson_hi": high,
                         "alpha": rate,
                         "flagged": BY_NAME[kind].false_positive and exceeds_false_positive_rate(wins, done, rate)})
    return pd.DataFrame(rows)


def _alphas(ds: xr.Dataset) -> xr.DataArray:
    """Each point's ``detection.recall_alpha``, from the sweep file text the store records (``sweep_text``)."""
    ids = ds["point_id"]
    points = recorded_points(ds.attrs, ids.shape)
    if not points:
        raise QueryError("the controls' false-positive rate (detection.recall_alpha) cannot be read: the store's "
                         "recorded sweep file does not expand to its grid")
    values = np.empty(ids.shape)
    for p in points:
        values[p.index] = p.config["detection"]["recall_alpha"]
    return xr.DataArray(values, dims=ids.dims, coords={d: ds[d] for d in ids.dims})


def controls_beside(capacity: pd.DataFrame, controls: pd.DataFrame,
                    shown: Sequence[str] = ("capacity",)) -> pd.DataFrame:
    """One row per condition: the ``shown`` columns of ``capacity``'s row for the condition itself, each control's
    success from ``controls`` (:func:`control_success`) as 'successes/n (Wilson lo-hi %)', and the kinds flagged
    (``over_alpha``)."""
    if controls.empty:
        return controls
    labels = [c for c in controls.columns if c not in (*STAT_COLUMNS, CONTROL_DIM)]
    rows = []
    for key, group in controls.groupby(labels, sort=False) if labels else [((), controls)]:
        where = dict(zip(labels, key if isinstance(key, tuple) else (key,)))
        own = capacity[CONTROL_DIM] == AS_IS
        for label, value in where.items():
            own &= capacity[label] == value
        rows.append({**where, **capacity.loc[own, list(shown)].iloc[0].to_dict(),
                     **{getattr(row, CONTROL_DIM): _fraction_text(row) for row in group.itertuples()},
                     "over_alpha": ", ".join(group.loc[group["flagged"], CONTROL_DIM])})
    return pd.DataFrame(rows)


def _fraction_text(row: Any) -> str:
    """'successes/n (lo-hi %)' of a control_success row."""
    if not row.n:
        return "NA"
    return f"{row.successes}/{row.n} ({100 * row.wilson_lo:.0f}-{100 * row.wilson_hi:.0f} %)"
