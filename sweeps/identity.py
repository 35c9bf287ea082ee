"""What identifies a point and a store: point ids and seeds, the grid fingerprint, the store's layout and record,
and whether an existing store may take this sweep (open it, lay it out, grow it, or refuse).

A point's id is a hash of its fully resolved config (execution settings excluded) and its replicate
number; its seed derives from ``base_seed`` and that id, so results never depend on execution order or
worker count. The grid's fingerprint hashes everything that fixes the grid. A store holds the fingerprint
and the record of the sweep that made it (:func:`capsweep.results_schema.attrs.sweep_record`); a sweep
that only appends axis values or replicates grows it, any other change is refused with one line.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..axes import Axis
from ..errors import ConfigError, StoreError
from ..locks import store_lock
from ..registry import ImplausibleValue
from ..results_schema import attrs
from ..results_schema.layout import GridSpec
from ..runners.protocol import total_duration_s
from .success import MIN_FRACTION
from .sweepfile import PRESCREEN_START, Sweep, parse_sweep

if TYPE_CHECKING:
    from ..results_schema.store import ResultStore


@dataclass(frozen=True)
class Point:
    """One simulation of the sweep."""

    index: tuple[int, ...]  # position along each axis, then the replicate number
    labels: dict[str, Any]  # axis name -> value, plus the replicate (capsweep.axes.REPLICATE)
    config: dict[str, Any]  # nested, fully resolved config
    point_id: str
    seed: int  # noise, initial voltages, cued members
    wiring_seed: int  # connectivity and membership: shared by every point of one replicate (paired design)


def identity_config(flat: dict[str, Any]) -> dict[str, Any]:
    """The part of a flat config that defines a point's science (execution settings left out)."""
    return {k: v for k, v in sorted(flat.items()) if not k.startswith("execution.")}


def point_id(flat: dict[str, Any], replicate: int) -> str:
    """16-hex-digit id: SHA-256 of the resolved science config and the replicate number."""
    # "replicate" is part of the hashed text, spelled out: renaming the dim must not change any stored id.
    blob = json.dumps({"config": identity_config(flat), "replicate": replicate}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def point_seed(base_seed: int, pid: str) -> int:
    """Seed in [0, 2**31) derived from ``base_seed`` and the point id."""
    digest = hashlib.sha256(f"{base_seed}/{pid}".encode()).digest()
    return int.from_bytes(digest[:4], "little") & 0x7FFFFFFF


def grid_shape(sweep: Sweep) -> tuple[int, ...]:
    """Number of entries along each axis, then replicates."""
    return tuple(len(a.values) for a in sweep.axes) + (sweep.replicates,)


def fingerprint(sweep: Sweep) -> str:
    """Hash of everything that fixes the grid: axes, replicates, base seed, base science config, count search."""
    identity: dict[str, Any] = {
        "axes": [[a.name, a.key, list(a.values)] for a in sweep.axes],
        "variants": sweep.variants,
        "replicates": sweep.replicates,
        "base_seed": sweep.base_seed,
        "base": identity_config(sweep.base),
    }
    if sweep.search is not None:  # only then, so that stores of grids without a search keep their fingerprint
        identity["search"] = dataclasses.asdict(sweep.search)
    blob = json.dumps(identity, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def grid_spec(sweep: Sweep, points: list[Point]) -> GridSpec:
    """Store layout of ``sweep``: axes, replicates and inner-dim sizes over all ``points``, and the sweep's record."""
    bin_s = sweep.base["detection.trace_bin_ms"] / 1000.0
    longest = max(total_duration_s(p.config) for p in points)
    return GridSpec(
        axes=sweep.axes,
        replicates=sweep.replicates,
        n_assembly=max(1, max(p.config["assemblies"]["count"] for p in points)),
        n_snapshot=sweep.base["protocol.snapshots"],
        n_retention=len(sweep.base["protocol.retention_delays_s"]) + 1,
        n_time_bin=int(math.ceil(longest / bin_s - 1e-9)),
        time_bin_s=bin_s,
        fingerprint=fingerprint(sweep),
        attrs=_record(sweep),
    )


def _record(sweep: Sweep) -> dict[str, Any]:
    """The store's record of ``sweep``; a count search is recorded with its first probe and the pass fraction."""
    search = None if sweep.search is None else {
        "axis": sweep.search.axis, "method": sweep.search.method,
        "start": PRESCREEN_START if sweep.search.start is None else sweep.search.start, "min_fraction": MIN_FRACTION}
    return attrs.sweep_record(sweep.name, str(sweep.source), sweep.text, sweep.text_sha256, sweep.replicates,
                              sweep.base_seed, search)


def id_and_seed_arrays(sweep: Sweep, points: list[Point]) -> tuple[np.ndarray, np.ndarray]:
    """Point ids (str) and seeds (int64) laid out over the grid shape."""
    ids = np.empty(grid_shape(sweep), dtype=object)
    seeds = np.zeros(grid_shape(sweep), dtype=np.int64)
    for p in points:
        ids[p.index] = p.point_id
        seeds[p.index] = p.seed
    return ids.astype(str), seeds


def open_or_create(sweep: Sweep, points: list[Point]) -> ResultStore:
    """Open the sweep's store, lay out a new one, or grow the stored grid in place to the sweep's.

    A sweep that only appends values to the stored axes or adds replicates grows the store (new
    points pending); any other change of grid or base config is refused with StoreError.
    """
    # Imported here, not at the top: Zarr takes about 0.4 s to import, which run_sweep spends
    # while the Dask workers start.
    from ..results_schema import store

    path, target = Path(sweep.store), fingerprint(sweep)
    if not path.exists():
        store.create_store(path, grid_spec(sweep, points), *id_and_seed_arrays(sweep, points))
    elif store.growing_to(path) == target or store.stored_attrs(path)[attrs.FINGERPRINT] != target:
        reason = growth_refusal(recorded_sweep(path, store.stored_attrs(path, growing=target)), sweep)
        if reason:
            raise StoreError(f"{path} was built from a different sweep grid: {reason}; a store grows only by values "
                             "appended to its axes and by more replicates (use another store path for another grid)")
        with store_lock(path):
            store.grow_store(path, grid_spec(sweep, points), *id_and_seed_arrays(sweep, points))
    return store.ResultStore.open(path, fingerprint=target, batching=store.WRITER_BATCHING)


def recorded_sweep(path: Path, stored: dict[str, Any]) -> Sweep:
    """The sweep a store was built from, parsed from its recorded sweep text (StoreError if unreadable)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ImplausibleValue)  # shown when that sweep ran
            return parse_sweep(str(stored[attrs.SWEEP_TEXT]), source=Path(str(stored.get(attrs.SWEEP_FILE, path))))
    except (KeyError, ConfigError) as exc:
        raise StoreError(f"{path} was built from a different sweep grid whose recorded sweep file cannot be read "
                         f"({exc}); use another store path") from None


def growth_refusal(stored: Sweep, sweep: Sweep) -> str:
    """Why ``sweep`` is not ``stored`` grown by appended axis values and more replicates ('' if it is)."""
    if sweep.base_seed != stored.base_seed:
        return f"base_seed changed from {stored.base_seed} to {sweep.base_seed}"
    old, new = identity_config(stored.base), identity_config(sweep.base)
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
