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
from ..runners.protocol import test_windows
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
    (lambda f: _recall_window_s(f) <= f["protocol.cue_gap_s"] + 1e-9,
     "the recall window (protocol.cue_duration_s - protocol.cue_skip_s, or protocol.persistence_window_s with "
     "detection.recall_mode = 'persistent') must not be longer than protocol.cue_gap_s ({protocol.cue_gap_s}): "
     "the pre-cue window of equal length must lie in the background gap after the previous cue"),
    (lambda f: _first_test_start_s(f) >= _recall_window_s(f) - 1e-9,
     "the first recall test (at the first of protocol.retention_delays_s {protocol.retention_delays_s}, else after "
     "protocol.hold_s {protocol.hold_s}) starts too soon: its pre-cue window, as long as the recall window, must "
     "lie after the start of the run and after the last imprint input (protocol.settle_s, or protocol.imprint_off_s "
     "for learned assemblies, counts before hold start)"),
    (lambda f: max(f["protocol.cue_gap_s"], f["detection.runaway_hold_s"] + f["detection.smoothing_s"])
     >= _window_pair_s(f) - 1e-9,
     "the background after the last cue (the larger of protocol.cue_gap_s ({protocol.cue_gap_s}) and "
     "detection.runaway_hold_s + detection.smoothing_s) must hold the recall test's pre-cue and recall windows "
     "once, for its null of background times"),
    (lambda f: f["protocol.retention_design"] != "separate" or not f["protocol.retention_delays_s"],
     "protocol.retention_design = 'separate' tests each point once, after its hold: protocol.retention_delays_s "
     "({protocol.retention_delays_s}) must be empty (sweep protocol.hold_s for the delays)"),
    (lambda f: f["protocol.imprint_order"] != "blocked" or f["assemblies.imprint"] == "learned",
     "protocol.imprint_order = 'blocked' orders learning: it needs assemblies.imprint = 'learned' "
     "(not {assemblies.imprint})"),
    (lambda f: f["protocol.imprint_order"] != "blocked" or f["protocol.imprint_off_s"] >= _recall_window_s(f) - 1e-9,
     "with protocol.imprint_order = 'blocked' the test after each block starts protocol.imprint_off_s "
     "({protocol.imprint_off_s}) after the last presentation, which must hold the pre-cue window (as long as the "
     "recall window)"),
    (lambda f: f["detection.recall_alpha"] * (f["detection.recall_null_draws"] + 1) >= 1 - 1e-9,
     "detection.recall_null_draws ({detection.recall_null_draws}) must be at least 1 / detection.recall_alpha - 1 "
     "({detection.recall_alpha}): with fewer pseudo-assemblies no assembly can reach that p-value for certain"),
)


def _windows(flat: dict[str, Any]) -> tuple[tuple[float, float], tuple[float, float]]:
    """This config's recall and pre-cue windows, as offsets (s) from a cue's start."""
    pr = nest(flat)["protocol"]
    return test_windows(0.0, pr["cue_duration_s"], pr, flat["detection.recall_mode"])


def _recall_window_s(flat: dict[str, Any]) -> float:
    """Length (s) of the recall window, and so of the pre-cue window, of this config's recall test."""
    (t0, t1), _ = _windows(flat)
    return t1 - t0


def _window_pair_s(flat: dict[str, Any]) -> float:
    """Time (s) from a pre-cue window's start to its recall window's end."""
    (_, t1), (p0, _) = _windows(flat)
    return t1 - p0


def _first_test_start_s(flat: dict[str, Any]) -> float:
    """Background time (s) before the first recall test's first cue: from the last imprint input (learned) or the
    start of the run (prewired) to the test."""
    lead = flat["protocol.imprint_off_s"] if flat["assemblies.imprint"] == "learned" else flat["protocol.settle_s"]
    return lead + min([*flat["protocol.retention_delays_s"], flat["protocol.hold_s"]])


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
