"""Expand a :class:`~capsweep.sweeps.sweepfile.Sweep` into points: grid index, resolved config, id, seeds.

A point is the base config with its axis values applied, checked against the rules between keys;
its id and seeds come from :mod:`capsweep.sweeps.identity`.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from typing import Any

from ..axes import REPLICATE
from ..errors import ConfigError
from ..registry import inhibitory_count, nest, resolve_derived
from .identity import Point, grid_shape, point_id, point_seed
from .sweepfile import Sweep


def expand(sweep: Sweep) -> list[Point]:
    """All points of ``sweep`` in grid order; raises ConfigError if any point is inconsistent."""
    points = []
    for index in itertools.product(*(range(n) for n in grid_shape(sweep))):
        *position, replicate = index
        flat = dict(sweep.base)
        labels: dict[str, Any] = {}
        for axis, i in zip(sweep.axes, position):
            value = axis.values[i]
            flat.update(sweep.variants[axis.name][value] if axis.name in sweep.variants else {axis.key: value})
            labels[axis.name] = value
        labels[REPLICATE] = replicate
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
