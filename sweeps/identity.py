"""What identifies a store: the grid fingerprint, the store's layout and record, and whether an existing store may
take this sweep (open it, lay it out, grow it, or refuse).

The grid's fingerprint hashes everything that fixes the grid, the base config as its id entries on the
store's defaults table (:mod:`capsweep.sweeps.ids`), so a key added to the registry at its default
leaves it unchanged. A store records the sweep that made it and what its ids rest on: the defaults
table, the resolved base config and the axes' settings. An existing store's ids stay relative to the
table it recorded (:func:`~capsweep.sweeps.ids.store_basis`). A default that changed since and that
the store's sweep took must be set in the sweep file to its old value to resume or grow the store
(:func:`default_change`). A sweep that only appends axis values or replicates grows a store; any other
change is refused with one line.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..axes import Axis
from ..errors import ConfigError, StoreError
from ..locks import store_lock
from ..registry import ImplausibleValue, defaults, resolve_derived
from ..results_schema import attrs
from ..results_schema.durable import check_writable
from ..results_schema.layout import GridSpec
from .ids import EXECUTION, IdBasis, id_entries, identity_defaults, store_basis, today_basis
from .success import MIN_FRACTION
from .sweepfile import PRESCREEN_START, Sweep, parse_sweep

if TYPE_CHECKING:
    from ..results_schema.store import ResultStore
    from .expand import Grid

def science(flat: Mapping[str, Any]) -> dict[str, Any]:
    """The entries of a flat config outside ``[execution]`` (execution settings never enter an id), sorted."""
    return {k: v for k, v in sorted(flat.items()) if not k.startswith(EXECUTION)}


def fingerprint(sweep: Sweep, basis: IdBasis | None = None) -> str:
    """Hash of everything that fixes the grid: axes, replicates, base seed, the base config's :func:`id_entries` on
    ``basis`` (default: today's table), count search."""
    identity: dict[str, Any] = {
        "axes": [[a.name, a.key, list(a.values)] for a in sweep.axes],
        "variants": sweep.variants,
        "replicates": sweep.replicates,
        "base_seed": sweep.base_seed,
        "base": id_entries(sweep.base, today_basis() if basis is None else basis),
    }
    if sweep.search is not None:  # only then, so that stores of grids without a search keep their fingerprint
        identity["search"] = {k: v for k, v in dataclasses.asdict(sweep.search).items()  # unset replicate keys left
                              if v is not None or k == "start"}  # out: older search stores keep their fingerprint
    blob = json.dumps(identity, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def grid_spec(grid: Grid) -> GridSpec:
    """Store layout of ``grid``: axes, replicates and inner-dim sizes over all its points, and the sweep's record."""
    sweep = grid.sweep
    bin_s = sweep.base["detection.trace_bin_ms"] / 1000.0
    longest = float(np.max(grid.durations()))
    counts = grid.over(("assemblies.count",), lambda flat: flat["assemblies.count"], np.int64)
    return GridSpec(
        axes=sweep.axes,
        replicates=sweep.replicates,
        n_assembly=max(1, int(np.max(counts))),
        n_snapshot=sweep.base["protocol.snapshots"],
        n_retention=len(sweep.base["protocol.retention_delays_s"]) + 1,
        n_time_bin=int(math.ceil(longest / bin_s - 1e-9)),
        time_bin_s=bin_s,
        fingerprint=fingerprint(sweep, grid.basis),
        attrs=_record(sweep, grid.basis),
    )


def _record(sweep: Sweep, basis: IdBasis) -> dict[str, Any]:
    """The store's record of ``sweep``: the sweep record (a count search with its first probe and the pass
    fraction) and what its ids rest on (defaults table, resolved base config, axis settings)."""
    search = None if sweep.search is None else {
        "axis": sweep.search.axis, "method": sweep.search.method,
        "start": PRESCREEN_START if sweep.search.start is None else sweep.search.start, "min_fraction": MIN_FRACTION,
        **({} if sweep.search.replicate_rule is None else dict(zip(("first_replicates", "more_replicates"),
                                                                   sweep.search.replicate_rule)))}
    settings = [{"name": a.name, "key": a.key, "values": list(a.values),
                 **({"variants": sweep.variants[a.name]} if a.name in sweep.variants else {})} for a in sweep.axes]
    base = science(resolve_derived(sweep.base))
    return {**attrs.sweep_record(sweep.name, str(sweep.source), sweep.text, sweep.text_sha256, sweep.replicates,
                                 sweep.base_seed, search),
            **attrs.identity_record(dict(basis.table), base, settings)}


def open_or_create(grid: Grid) -> tuple[ResultStore, Grid]:
    """Open the sweep's store, lay out a new one, or grow the stored grid in place to the sweep's; with the grid
    on the defaults table the store's ids rest on.

    A sweep that only appends values to the stored axes or adds replicates grows the store (new
    points pending); a changed default the stored points ran with (unless the sweep file sets the
    key), or any other change of grid or base config, is refused with StoreError.
    """
    # Imported here, not at the top: Zarr takes about 0.4 s to import, which run_sweep spends
    # while the Dask workers start.
    from ..results_schema import store

    sweep = grid.sweep
    path = Path(sweep.store)
    if not path.exists():
        grid = grid.on_basis(today_basis())
        store.create_store(path, grid_spec(grid), *grid.ids_and_seeds())
        return store.ResultStore.open(path, fingerprint=fingerprint(sweep), batching=store.WRITER_BATCHING), grid
    check_writable(path)  # before the lock: whose file a read-only store cannot take
    growing = store.growing_to(path)
    stored = store.stored_attrs(path, growing=growing)
    grid = grid.on_basis(store_basis(stored))
    target = fingerprint(sweep, grid.basis)
    if growing == target or stored[attrs.FINGERPRINT] != target:
        recorded = recorded_sweep(path, stored, grid.basis)
        changed = default_change(recorded, sweep, grid.basis)
        if changed:
            raise StoreError(f"{path}: {changed}")
        reason = growth_refusal(recorded, sweep)
        if reason:
            raise StoreError(f"{path} was built from a different sweep grid: {reason}; a store grows only by values "
                             "appended to its axes and by more replicates (use another store path for another grid)")
        with store_lock(path):
            store.grow_store(path, grid_spec(grid), *grid.ids_and_seeds())
    return store.ResultStore.open(path, fingerprint=target, batching=store.WRITER_BATCHING), grid


def recorded_sweep(path: Path, stored: dict[str, Any], basis: IdBasis) -> Sweep:
    """The sweep a store was built from: its recorded sweep text on the defaults it was made under (StoreError if
    unreadable)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ImplausibleValue)  # shown when that sweep ran
            return parse_sweep(str(stored[attrs.SWEEP_TEXT]), source=Path(str(stored.get(attrs.SWEEP_FILE, path))),
                               defaults={**defaults(), **basis.table})
    except (KeyError, ConfigError) as exc:
        raise StoreError(f"{path} was built from a different sweep grid whose recorded sweep file cannot be read "
                         f"({exc}); use another store path") from None


def default_change(stored: Sweep, sweep: Sweep, basis: IdBasis) -> str:
    """Why ``sweep`` cannot take the store of ``stored``: a registry default has changed since ``basis`` (the store's
    table), ``stored`` took the old default and ``sweep`` leaves the key to today's ('' if no such key)."""
    today = identity_defaults()
    for key in sorted(basis.table):
        was, now = basis.table[key], today[key]
        if was != now and stored.base.get(key) == was and key not in sweep.explicit:
            table, _, leaf = key.rpartition(".")
            return (f"the default of {key} changed from {_toml(was)} to {_toml(now)} since this store was made, and "
                    f"its points ran with {_toml(was)}; to resume or grow the store, set {key} = {_toml(was)} in the "
                    f"sweep file ([{table}] {leaf} = {_toml(was)}), or use another store path to run with "
                    f"{_toml(now)}")
    return ""


def _toml(value: Any) -> str:
    """A config value as a sweep file writes it."""
    return json.dumps(list(value) if isinstance(value, tuple) else value)


def growth_refusal(stored: Sweep, sweep: Sweep) -> str:
    """Why ``sweep`` is not ``stored`` grown by appended axis values and more replicates ('' if it is)."""
    if sweep.base_seed != stored.base_seed:
        return f"base_seed changed from {stored.base_seed} to {sweep.base_seed}"
    old, new = science(stored.base), science(sweep.base)
    changed = sorted(key for key in old.keys() | new.keys() if old.get(key) != new.get(key))
    if changed:
        return f"base config {changed[0]} changed from {old.get(changed[0])!r} to {new.get(changed[0])!r}"
    names, new_names = [a.name for a in stored.axes], [a.name for a in sweep.axes]
    if names != new_names:
        return f"axes changed from {names} to {new_names} (axes cannot be added, removed, renamed or reordered)"
    for axis, grown in zip(stored.axes, sweep.axes):
        reason = _axis_refusal(axis, grown, stored.variants.get(axis.name, {}), sweep.variants.get(axis.name, {}))
        if reason:
            return reason
    if sweep.replicates < stored.replicates:
        return f"replicates fell from {stored.replicates} to {sweep.replicates}"
    return "the count search changed" if sweep.search != stored.search else ""


def _axis_refusal(axis: Axis, grown: Axis, variants: dict[str, Any], grown_variants: dict[str, Any]) -> str:
    """Why ``grown`` is not ``axis`` with values appended ('' if it is); variants map label -> overrides."""
    if grown.key != axis.key:
        return f"axis {axis.name} sets {axis.key} in the store but {grown.key} in the sweep file"
    removed = [v for v in axis.values if v not in grown.values]
    if removed:
        return f"axis {axis.name} lost value(s) {removed}"
    if grown.values[: len(axis.values)] != axis.values:
        return (f"axis {axis.name} must keep its stored values {list(axis.values)} first and in order (append new "
                f"values at the end), got {list(grown.values)}")
    changed = [label for label in variants if variants[label] != grown_variants.get(label)]
    return f"variant {changed[0]} of axis {axis.name} changed its overrides" if changed else ""
