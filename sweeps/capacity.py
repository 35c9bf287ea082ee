"""Capacity from a store: success of each point, success fractions with intervals, capacity per condition.

The capacity reported first (:func:`capacity_report`) is fitted: where a monotone success curve,
fitted to every decided replicate of the condition, crosses ``min_fraction``, with a 95 % interval
and a censoring side when the grid does not bracket the crossing (:mod:`capsweep.sweeps.capacity_fit`).
Beside it, the *first-failure* capacity of :func:`capacity_table`, defined below.

Definitions (the same words are stored in every store's attrs, see
``capsweep.results_schema.definitions``):

- A point *succeeds* when it is done, its outcome is stable, every one of its assemblies was
  recalled (``recalled_count == assemblies.count``; recall is decided by the recall test against
  pseudo-assemblies, ``capsweep.runners.metrics.recall_test``) and none is stuck on
  (``stuck_count == 0``). A failed (crashed) point is neither success nor failure: it is left
  out and counted. A pending point leaves its condition undecided.
- Fitted capacities read per-count tallies (:func:`condition_tallies`): pending, unneeded and
  crashed points are in no fraction, so they never count as failures.
- Per condition (one combination of the axes other than the count axis) and count: the success
  fraction over the done replicates, with a 95 % Wilson score interval (Wilson 1927, J Am Stat
  Assoc 22:209).
- A count *passes* when it succeeds in at least ``min_fraction`` of its done replicates. The *capacity*
  of a condition is the largest count k such that every count <= k in the grid passes
  (:func:`capsweep.sweeps.success.leading_passes`); 0 when the smallest count already fails. It
  is only a lower bound (``at_least``) when k is the top of the grid, NA while a point of the condition
  is pending or a count up to the deciding one (the first that falls short) has no done
  replicate, and flagged ``non_monotone`` when a count reaches ``min_fraction`` after a smaller
  one fell short (rises of the fraction that do not cross it are left to the per-count table).
- In a store filled by an adaptive count search (``capsweep.sweeps.search``), counts the search never
  ran (status unneeded) pass or fail as monotonicity implies: passing when a larger count passed,
  falling short when a smaller one fell short; the search ran every count this rule needs.
- Its interval is the range of the per-replicate capacities (replicate r: the largest k with every
  count <= k successful in r), a distribution-free summary; a replicate whose run of successes
  ends at a crashed point is left out (its capacity is unknown).
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..axes import COUNT_KEY, REPLICATE
from ..errors import ConfigError
from ..flags import DONE, FAILED, PENDING, UNNEEDED
from ..results_schema import attrs
from .capacity_fit import CapacityFit, fit_capacity
from .query import QueryError, axis_keys, labelled
from .scaling_fit import ScalingFit, fit_scaling
from .sequential import Tally, wilson_interval
from .success import MIN_FRACTION, count_passes, leading_passes, succeeds
from .sweepfile import parse_sweep


def point_success(ds: xr.Dataset) -> xr.DataArray:
    """Per point: 1.0 success, 0.0 failure, NaN undecided (pending, crashed or unneeded); see the module docstring."""
    status, outcome = labelled(ds, "status"), labelled(ds, "outcome")
    ok = succeeds(outcome, ds["recalled_count"], ds["stuck_count"], _count_values(ds))
    return xr.where(status == DONE, ok.astype(float), np.nan)


def count_dim(ds: xr.Dataset) -> str:
    """The sweep dim over ``assemblies.count``; QueryError naming the store's axes if there is none."""
    keys = axis_keys(ds)
    dims = [d for d, k in keys.items() if k == COUNT_KEY]
    if not dims:
        raise QueryError(f"capacity needs an axis over {COUNT_KEY}; this store's axes set: "
                         + (", ".join(f"{d} ({k})" for d, k in keys.items()) or "nothing"))
    return dims[0]


def _count_values(ds: xr.Dataset) -> xr.DataArray | int:
    """Each point's assembly count: the count axis, or the base config's count when no axis sets it."""
    dims = [d for d, k in axis_keys(ds).items() if k == COUNT_KEY]
    return ds[dims[0]] if dims else int(ds["recall_score"].sizes["assembly"])


@dataclass(frozen=True)
class _Condition:
    """One condition: its labels (the other axes) and per-point arrays over (count, replicate)."""

    labels: dict[str, object]
    counts: np.ndarray  # ascending
    success: np.ndarray  # 1 / 0 / NaN, shape (count, replicate)
    status: np.ndarray  # labels, shape (count, replicate)


def _conditions(ds: xr.Dataset) -> Iterator[_Condition]:
    count = count_dim(ds)
    success, status = point_success(ds), labelled(ds, "status")
    order = np.argsort(ds[count].values)
    others = [str(d) for d in success.dims if d not in (count, REPLICATE)]
    for combo in itertools.product(*(range(ds.sizes[d]) for d in others)):
        where = dict(zip(others, combo))
        labels = {d: ds[d].values.tolist()[i] for d, i in where.items()}
        yield _Condition(labels, ds[count].values[order],
                         success.isel(where).transpose(count, REPLICATE).values[order],
                         status.isel(where).transpose(count, REPLICATE).values[order])


def success_table(ds: xr.Dataset) -> pd.DataFrame:
    """Per condition and count: done replicates, successes, fraction with its Wilson interval, failed, pending."""
    count = count_dim(ds)
    rows = []
    for condition in _conditions(ds):
        for k, row, status in zip(condition.counts, condition.success, condition.status):
            done = int(np.sum(np.isfinite(row)))
            wins = int(np.nansum(row))
            low, high = wilson_interval(wins, done)
            rows.append({**condition.labels, count: int(k), "n": done, "successes": wins,
                         "fraction": wins / done if done else np.nan, "wilson_lo": low, "wilson_hi": high,
                         **_status_counts(status)})
    return pd.DataFrame(rows)


def _status_counts(status: np.ndarray) -> dict[str, int]:
    """Points failed, pending and unneeded among the status labels ``status``, by those labels."""
    return {label: int(np.sum(status == label)) for label in (FAILED, PENDING, UNNEEDED)}


def _passes(condition: _Condition, min_fraction: float) -> np.ndarray:
    """Per count: 1.0 passes, 0.0 falls short of ``min_fraction``, NaN undecided (no done replicate).

    Counts an adaptive search never ran (every replicate unneeded) pass or fail as monotonicity
    implies: pass when a larger count passed, fall short when a smaller one did, NaN if both or neither.
    """
    done = np.isfinite(condition.success).sum(axis=1)
    wins = np.nansum(condition.success, axis=1).astype(int)
    passes = np.array([np.nan if (v := count_passes(w, d, min_fraction)) is None else float(v)
                       for w, d in zip(wins, done)])
    inferred = passes.copy()
    for k in np.flatnonzero(np.all(condition.status == UNNEEDED, axis=1)):
        above, below = bool(np.any(passes[k:] == 1.0)), bool(np.any(passes[:k] == 0.0))
        inferred[k] = 1.0 if above and not below else 0.0 if below and not above else np.nan
    return inferred


def _replicate_capacities(condition: _Condition, passes: np.ndarray) -> list[int]:
    """Capacity of each replicate whose run of successes ends at a decided point (not a crash).

    Unneeded points (never run by a search) count as whether their count passes.
    """
    capacities = []
    for r in range(condition.success.shape[1]):
        column = np.where(condition.status[:, r] == UNNEEDED, passes, condition.success[:, r])
        lead = leading_passes(column == 1.0)
        if lead < len(column) and np.isnan(column[lead]):
            continue  # the run ends at a crashed or pending point: capacity unknown
        capacities.append(int(condition.counts[lead - 1]) if lead else 0)
    return capacities


def _rises(passes: np.ndarray) -> bool:
    """Whether a count passes after a smaller one fell short (undecided counts, NaN, break no order)."""
    short = np.flatnonzero(passes == 0.0)
    return bool(len(short) and np.any(passes[short[0]:] == 1.0))


def capacity_table(ds: xr.Dataset, min_fraction: float = MIN_FRACTION) -> pd.DataFrame:
    """Capacity per condition with its replicate range and flags (see the module docstring)."""
    if not 0.0 < min_fraction <= 1.0:
        raise QueryError(f"--min-fraction {min_fraction} is not allowed: expected a number in (0, 1]")
    rows = []
    for condition in _conditions(ds):
        passes = _passes(condition, min_fraction)
        lead = leading_passes(passes == 1.0)
        counts = _status_counts(condition.status)
        undecided = counts[PENDING] > 0 or bool(np.any(np.isnan(passes[:lead + 1])))  # counts above the deciding
        replicates = _replicate_capacities(condition, passes) if not counts[PENDING] else []  # one do not matter
        rows.append({
            **condition.labels,
            "capacity": pd.NA if undecided else int(condition.counts[lead - 1]) if lead else 0,
            "capacity_lo": min(replicates) if replicates else pd.NA,
            "capacity_hi": max(replicates) if replicates else pd.NA,
            "at_least": not undecided and lead == len(condition.counts),
            "non_monotone": _rises(passes),
            "replicates_used": len(replicates),
            **{label: counts[label] for label in (PENDING, FAILED, UNNEEDED)},
        })
    table = pd.DataFrame(rows)
    for column in ("capacity", "capacity_lo", "capacity_hi"):
        table[column] = table[column].astype("Int64")
    return table


SIZE_KEY = "network.n_exc"


def condition_tallies(success: np.ndarray, status: np.ndarray, counts: np.ndarray) -> dict[int, Tally]:
    """Per assembly count: successes among the decided (done) replicates, and the crashed ones.

    ``success`` and ``status`` have shape (count, replicate), ``counts`` the ascending counts; pending and
    unneeded points are in no tally, so they never count as failures.
    """
    return {int(c): Tally(int(np.nansum(row)), int(np.sum(np.isfinite(row))), int(np.sum(labels == FAILED)))
            for c, row, labels in zip(counts, success, status)}


def _fit_of(condition: _Condition, threshold: float) -> CapacityFit | None:
    """The fitted capacity of one condition (None with nothing decided, or at threshold 1: no finite crossing)."""
    if threshold >= 1.0:
        return None
    return fit_capacity(condition_tallies(condition.success, condition.status, condition.counts), threshold)


def _fit_columns(fit: CapacityFit | None) -> dict[str, object]:
    """The fitted capacity's columns: estimate, 95 % interval, censoring side and bound, flag, replicates used."""
    if fit is None:
        return {"capacity": np.nan, "capacity_lo": np.nan, "capacity_hi": np.nan, "censored": "", "bound": pd.NA,
                "non_monotone": False, "replicates": 0}
    return {"capacity": np.nan if fit.estimate is None else round(fit.estimate, 2),
            "capacity_lo": np.nan if fit.low is None else round(fit.low, 2),
            "capacity_hi": np.nan if fit.high is None else round(fit.high, 2),
            "censored": "" if fit.censoring == "inside" else fit.censoring,
            "bound": pd.NA if fit.bound is None else fit.bound,
            "non_monotone": fit.non_monotone, "replicates": fit.replicates}


def capacity_report(ds: xr.Dataset, min_fraction: float = MIN_FRACTION) -> pd.DataFrame:
    """Per condition: the fitted capacity (:mod:`capsweep.sweeps.capacity_fit`) with its 95 % interval and
    censoring, the first-failure capacity of :func:`capacity_table` beside it, replicates and point counts.

    Columns: the condition's axes; ``capacity`` (assemblies, where the fitted success curve crosses
    ``min_fraction``; NaN when censored or nothing is decided), ``capacity_lo``/``capacity_hi`` (95 %
    interval; NaN for an open end), ``censored`` ("below": the capacity lies under ``bound``, the
    smallest decided count; "above": it is at least ``bound``, the largest; empty inside the grid),
    ``first_failure`` (the capacity rule of :func:`capacity_table`; NA while undecided) with
    ``first_failure_at_least`` (it is the top of the grid), ``non_monotone`` (the fit's test: success
    rises with the count beyond chance), ``replicates`` (decided replicates the fit used), and the
    pending, failed and unneeded point counts.
    """
    rule = capacity_table(ds, min_fraction)
    rows = []
    for condition, first in zip(_conditions(ds), rule.itertuples(index=False)):
        rows.append({**condition.labels, **_fit_columns(_fit_of(condition, min_fraction)),
                     "first_failure": first.capacity, "first_failure_at_least": first.at_least,
                     **{label: getattr(first, label) for label in (PENDING, FAILED, UNNEEDED)}})
    table = pd.DataFrame(rows)
    for column in ("bound", "first_failure"):
        table[column] = table[column].astype("Int64")
    return table


def network_sizes(ds: xr.Dataset) -> tuple[str, dict[Any, float]] | None:
    """The dim that sets the network size and the n_exc (cells) of each of its values: an axis over
    ``network.n_exc``, or a variants axis whose every variant sets it (e.g. n_exc with its in-degrees and
    weights), read from the sweep text the store holds; None when there is neither."""
    size = next((d for d, k in axis_keys(ds).items() if k == SIZE_KEY), None)
    if size is not None:
        return size, {v: float(v) for v in ds[size].values.tolist()}
    try:
        sweep = parse_sweep(str(ds.attrs.get(attrs.SWEEP_TEXT, "")))
    except ConfigError:
        return None
    return next(((name, {label: float(overrides[SIZE_KEY]) for label, overrides in table.items()})
                 for name, table in sweep.variants.items()
                 if table and all(SIZE_KEY in overrides for overrides in table.values())), None)


def scaling_sizes(ds: xr.Dataset) -> tuple[str, dict[Any, float]] | None:
    """:func:`network_sizes` of a store that sweeps network size and the count alone (every other axis has one value):
    the stores a scaling fit is made for; None for any other store."""
    sizes = network_sizes(ds)
    if sizes is None or any(ds.sizes[d] > 1 for d in axis_keys(ds) if d not in (sizes[0], count_dim(ds))):
        return None
    return sizes


def scaling_fit(ds: xr.Dataset, min_fraction: float = MIN_FRACTION) -> ScalingFit | None:
    """capacity ~ a n_exc^b over the store's sizes from the fitted capacities, censored ones included.

    Needs an axis that sets n_exc (:func:`network_sizes`) and one over the assembly count, and no other axis
    with more than one value; None otherwise or when :func:`capsweep.sweeps.scaling_fit.fit_scaling` has too
    little to fit. Its ``caveats`` say when to read b with care (few sizes, non-monotone success, censoring).
    """
    sizes = scaling_sizes(ds)
    if sizes is None:
        return None
    fits = [(sizes[1][condition.labels[sizes[0]]], fit) for condition in _conditions(ds)
            if (fit := _fit_of(condition, min_fraction)) is not None]
    return fit_scaling(fits)
