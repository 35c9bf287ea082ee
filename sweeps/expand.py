"""Expand a :class:`~capsweep.sweeps.sweepfile.Sweep` into points: grid index, config, stable id, seed.

A point is the base config with its axis values applied. Its id is a hash of the fully
resolved config (execution settings excluded) and its replicate number, and its seed derives
from ``base_seed`` and that id, so results never depend on execution order or worker count.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ConfigError
from ..registry import inhibitory_count, nest, resolve_derived
from ..results_schema.layout import GridSpec
from ..runners.protocol import total_duration_s
from .sweepfile import Sweep


@dataclass(frozen=True)
class Point:
    """One simulation of the sweep."""

    index: tuple[int, ...]  # position along each axis, then the replicate number
    labels: dict[str, Any]  # axis name -> value, plus "replicate"
    config: dict[str, Any]  # nested, fully resolved config
    point_id: str
    seed: int  # noise, initial voltages, cued members
    wiring_seed: int  # connectivity and membership: shared by every point of one replicate (paired design)


def identity_config(flat: dict[str, Any]) -> dict[str, Any]:
    """The part of a flat config that defines a point's science (execution settings left out)."""
    return {k: v for k, v in sorted(flat.items()) if not k.startswith("execution.")}


def point_id(flat: dict[str, Any], replicate: int) -> str:
    """16-hex-digit id: SHA-256 of the resolved science config and the replicate number."""
    blob = json.dumps({"config": identity_config(flat), "replicate": replicate}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def point_seed(base_seed: int, pid: str) -> int:
    """Seed in [0, 2**31) derived from ``base_seed`` and the point id."""
    digest = hashlib.sha256(f"{base_seed}/{pid}".encode()).digest()
    return int.from_bytes(digest[:4], "little") & 0x7FFFFFFF


def grid_shape(sweep: Sweep) -> tuple[int, ...]:
    """Number of entries along each axis, then replicates."""
    return tuple(len(a.values) for a in sweep.axes) + (sweep.replicates,)


def expand(sweep: Sweep) -> list[Point]:
    """All points of ``sweep`` in grid order; raises ConfigError if any point is inconsistent."""
    points = []
    for index in itertools.product(*(range(n) for n in grid_shape(sweep))):
        *cell, replicate = index
        flat = dict(sweep.base)
        labels: dict[str, Any] = {}
        for axis, i in zip(sweep.axes, cell):
            value = axis.values[i]
            flat.update(sweep.variants[axis.name][value] if axis.name in sweep.variants else {axis.key: value})
            labels[axis.name] = value
        labels["replicate"] = replicate
        flat = resolve_derived(flat)
        check_consistency(flat, f"{sweep.source}: point {_describe(labels)}")
        pid = point_id(flat, replicate)
        wiring = point_seed(sweep.base_seed, f"wiring/{replicate}")
        points.append(Point(index, labels, nest(flat), pid, point_seed(sweep.base_seed, pid), wiring))
    return points


def _describe(labels: dict[str, Any]) -> str:
    return ", ".join(f"{k}={v}" for k, v in labels.items())


_RULES: tuple[tuple[Callable[[dict[str, Any]], bool], str], ...] = (
    (lambda f: f["network.indegree_exc"] <= f["network.n_exc"],
     "network.indegree_exc ({network.indegree_exc}) must not exceed network.n_exc ({network.n_exc})"),
    (lambda f: f["network.indegree_inh"] <= inhibitory_count(f["network.n_exc"], f["network.inh_per_exc"]),
     "network.indegree_inh ({network.indegree_inh}) must not exceed the inhibitory count "
     "round(network.n_exc x network.inh_per_exc)"),
    (lambda f: f["assemblies.size"] >= 2,
     "assemblies.size ({assemblies.size}) must be at least 2 (assemblies.coding_level x network.n_exc rounds "
     "below 2 here)"),
    (lambda f: f["assemblies.size"] <= f["network.n_exc"],
     "assemblies.size ({assemblies.size}) must not exceed network.n_exc ({network.n_exc})"),
    (lambda f: f["assemblies.overlap"] != "disjoint"
     or f["assemblies.count"] * f["assemblies.size"] <= f["network.n_exc"],
     "disjoint assemblies need assemblies.count x assemblies.size ({assemblies.count} x {assemblies.size}) "
     "<= network.n_exc ({network.n_exc}); use fewer or smaller assemblies, or assemblies.overlap = 'random'"),
    (lambda f: f["network.v_reset_mv"] < f["network.v_threshold_mv"],
     "network.v_reset_mv ({network.v_reset_mv}) must be below network.v_threshold_mv ({network.v_threshold_mv})"),
    (lambda f: f["detection.baseline_start_s"] < f["protocol.settle_s"] or f["protocol.settle_s"] == 0,
     "detection.baseline_start_s ({detection.baseline_start_s}) must be shorter than protocol.settle_s "
     "({protocol.settle_s}): the baseline window runs from the one to the other"),
    (lambda f: _retention_tests_fit(f),
     "protocol.retention_delays_s ({protocol.retention_delays_s}) must leave each recall test (assemblies.count x "
     "(protocol.cue_duration_s + protocol.cue_gap_s)) room before the next one and before the end of "
     "protocol.hold_s ({protocol.hold_s})"),
    (lambda f: f["protocol.cue_skip_s"] < f["protocol.cue_duration_s"],
     "protocol.cue_skip_s ({protocol.cue_skip_s}) must be shorter than protocol.cue_duration_s "
     "({protocol.cue_duration_s})"),
)


def _retention_tests_fit(flat: dict[str, Any]) -> bool:
    """Whether every recall test during the hold ends before the next test starts and before the hold ends."""
    length = flat["assemblies.count"] * (flat["protocol.cue_duration_s"] + flat["protocol.cue_gap_s"])
    starts = [*flat["protocol.retention_delays_s"], flat["protocol.hold_s"]]
    return all(a + length <= b + 1e-9 for a, b in zip(starts, starts[1:]))


def check_consistency(flat: dict[str, Any], where: str) -> None:
    """Raise ConfigError if keys that are valid alone contradict each other."""
    for ok, message in _RULES:
        if not ok(flat):
            for key, value in flat.items():
                message = message.replace("{" + key + "}", str(value))
            raise ConfigError(f"{where}: {message}")


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


def grid_spec(sweep: Sweep, points: list[Point], attrs: dict[str, Any]) -> GridSpec:
    """Store layout of ``sweep``: axes, replicates and inner-dim sizes over all ``points``."""
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
        attrs=attrs,
    )


def id_and_seed_arrays(sweep: Sweep, points: list[Point]) -> tuple[np.ndarray, np.ndarray]:
    """Point ids (str) and seeds (int64) laid out over the grid shape."""
    ids = np.empty(grid_shape(sweep), dtype=object)
    seeds = np.zeros(grid_shape(sweep), dtype=np.int64)
    for p in points:
        ids[p.index] = p.point_id
        seeds[p.index] = p.seed
    return ids.astype(str), seeds
