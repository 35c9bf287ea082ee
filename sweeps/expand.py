"""A sweep's points without building them all: the :class:`Grid`.

A point is the base config with its axis values applied, at one replicate; a *cell* is its position
along the axes (a grid point: its replicates share its config). The grid makes a cell's config on
demand, and evaluates a function of the config that reads only some keys once per combination of the
axes that set those keys (:meth:`Grid.over`), so checking the rules between keys, counting builds and
summing simulated time cost the size of those axes, not of the sweep. Ids and seeds come from
:mod:`capsweep.sweeps.ids`, relative to the grid's defaults table (``basis``).
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..axes import REPLICATE, VARIANT_KEY, Axis
from ..engines import engine as engine_named
from ..errors import ConfigError
from ..registry import DERIVED_FROM, inhibitory_count, nest, resolve_derived
from ..results_schema import attrs
from ..runners.builds import KEYS_IN_CODE, build_key
from ..runners.protocol import SCHEDULE_KEYS, test_windows, total_duration_s
from .ids import (
    EXECUTION,
    IdBasis,
    Point,
    grid_shape,
    id_entries,
    ids_and_seeds,
    point_id,
    point_seed,
    store_basis,
    today_basis,
    wiring_seed,
)
from .sweepfile import Sweep, parse_sweep

Cell = tuple[int, ...]
"""Position of a grid point along each axis (a point's index without its replicate)."""
_KEPT_CONFIGS = 64  # nested configs kept for reuse: replicates of a cell are submitted one after another


class Grid:
    """Every point of a sweep, made on demand: shape, cell configs, points, functions of the config per cell."""

    def __init__(self, sweep: Sweep, basis: IdBasis | None = None) -> None:
        """Check every rule between keys on every cell (ConfigError naming the first inconsistent one)."""
        self.sweep = sweep
        self.basis = today_basis() if basis is None else basis
        self.shape = grid_shape(sweep)
        self.cells = self.shape[:-1]
        self._settings = tuple(tuple(_setting(sweep, axis, value) for value in axis.values) for axis in sweep.axes)
        self._touched = tuple(frozenset(k for s in settings for k in s) for settings in self._settings)
        self._wiring = tuple(wiring_seed(sweep.base_seed, r) for r in range(sweep.replicates))
        self._configs: dict[Cell, dict[str, Any]] = {}
        for rule in RULES:
            self._check(rule)
        for derived, source in GIVEN_TOGETHER:
            self._check_given(derived, source)

    def on_basis(self, basis: IdBasis) -> Grid:
        """This grid with ids relative to ``basis`` (a store's)."""
        grid = copy.copy(self)
        grid.basis, grid._configs = basis, {}
        return grid

    @property
    def n_points(self) -> int:
        """Number of points (cells x replicates)."""
        return math.prod(self.shape)

    @property
    def execution(self) -> dict[str, Any]:
        """The ``[execution]`` table (nested), the same for every point: execution keys are not sweepable."""
        return dict(nest({k: v for k, v in self.sweep.base.items() if k.startswith(EXECUTION)})["execution"])

    def flat(self, cell: Cell) -> dict[str, Any]:
        """The resolved flat config of ``cell``."""
        return resolve_derived(self._given(cell))

    def _given(self, cell: Cell) -> dict[str, Any]:
        """The flat config of ``cell`` as the sweep file sets it, derived keys not yet resolved."""
        flat = dict(self.sweep.base)
        for settings, i in zip(self._settings, cell):
            flat.update(settings[i])
        return flat

    def config(self, cell: Cell) -> dict[str, Any]:
        """The resolved nested config of ``cell`` (shared by its replicates' points: do not change it)."""
        found = self._configs.get(cell)
        if found is None:
            if len(self._configs) >= _KEPT_CONFIGS:
                self._configs.clear()
            found = self._configs[cell] = nest(self.flat(cell))
        return found

    def labels(self, index: tuple[int, ...]) -> dict[str, Any]:
        """Axis name -> value of the point at ``index``, then its replicate."""
        labels: dict[str, Any] = {axis.name: axis.values[i] for axis, i in zip(self.sweep.axes, index)}
        labels[REPLICATE] = int(index[-1])
        return labels

    def point(self, index: tuple[int, ...]) -> Point:
        """The point at ``index`` (position along each axis, then the replicate)."""
        index = tuple(int(i) for i in index)
        cell, replicate = index[:-1], index[-1]
        pid = point_id(self.flat(cell), replicate, self.basis)
        return Point(index, self.labels(index), self.config(cell), pid, point_seed(self.sweep.base_seed, pid),
                     self._wiring[replicate])

    def points(self, indices: Iterable[int | tuple[int, ...]] | None = None) -> Iterator[Point]:
        """The points at ``indices`` (flat positions in C order, or index tuples; default every point, in order)."""
        for index in np.ndindex(self.shape) if indices is None else indices:
            yield self.point(index if isinstance(index, tuple) else
                             tuple(int(i) for i in np.unravel_index(int(index), self.shape)))

    def cell_entries(self) -> Iterator[dict[str, Any]]:
        """Each cell's id entries on the grid's defaults table (:func:`~capsweep.sweeps.ids.id_entries`), in
        C order; the entries no axis changes are taken once."""
        varying = set().union(*self._touched, DERIVED_FROM)
        constant = id_entries({k: v for k, v in self.sweep.base.items() if k not in varying}, self.basis)
        for cell in np.ndindex(self.cells):
            flat = self.flat(cell)
            yield {**constant, **id_entries({k: flat[k] for k in varying}, self.basis)}

    def ids_and_seeds(self) -> tuple[np.ndarray, np.ndarray]:
        """Every point's id (str) and seed (int64) over the grid shape, on the grid's defaults table."""
        return ids_and_seeds(self.cell_entries(), self.shape, self.sweep.base_seed)

    def axes_setting(self, keys: Iterable[str]) -> tuple[int, ...]:
        """Positions of the axes that set any of ``keys`` (``"table."`` names every key of a table) or a key one of
        them is derived from (:data:`~capsweep.registry.DERIVED_FROM`)."""
        wanted = set(keys)
        wanted |= {source for target, sources in DERIVED_FROM.items() if _named(target, wanted) for source in sources}
        return tuple(pos for pos, touched in enumerate(self._touched) if any(_named(k, wanted) for k in touched))

    def over(self, keys: Iterable[str], f: Callable[[dict[str, Any]], Any], dtype: Any = object) -> np.ndarray:
        """``f(flat config)`` of every cell, an array of shape ``cells`` (a read-only view).

        ``keys`` must hold every key ``f`` reads: ``f`` runs once per combination of the axes that
        set them (:meth:`axes_setting`), the others held at their first value, and its result is
        broadcast along the others.
        """
        positions = self.axes_setting(keys)
        sub = tuple(n if pos in positions else 1 for pos, n in enumerate(self.cells))
        values = np.empty(sub, dtype=dtype)
        for cell in np.ndindex(sub):
            values[cell] = f(self.flat(cell))
        return np.broadcast_to(values, self.cells)

    def durations(self) -> np.ndarray:
        """Planned simulated time of each cell's points (s, no early abort), over ``cells``."""
        return self.over(SCHEDULE_KEYS, _planned_s, float)

    def cost_groups(self) -> np.ndarray:
        """Each cell's group of points expected to cost about the same, over ``cells``: a tuple of the values of the
        keys that shape its compiled code (:data:`~capsweep.runners.builds.KEYS_IN_CODE`, network size among them)
        and its planned simulated time (s)."""
        return self.over((*KEYS_IN_CODE, *SCHEDULE_KEYS),
                         lambda flat: (*(flat[k] for k in KEYS_IN_CODE), _planned_s(flat)))

    def build_keys(self, engine: str | None = None) -> np.ndarray:
        """Key of the compiled build each cell's points rerun on ``engine`` (default: the sweep's), '' where that
        engine compiles no builds; over ``cells``."""
        name = engine or self.sweep.base["execution.engine"]
        if not engine_named(name).reuses_builds:
            return np.broadcast_to(np.array("", dtype=object), self.cells)
        return self.over(KEYS_IN_CODE, lambda flat: build_key(nest({**flat, "execution.engine": name})))

    def _check_given(self, derived: str, source: str) -> None:
        """Raise ConfigError naming the first cell whose sweep file sets ``derived`` together with ``source`` (above
        0), which derives it alone."""
        positions = self.axes_setting((derived, source))
        for cell in np.ndindex(tuple(n if pos in positions else 1 for pos, n in enumerate(self.cells))):
            given = set(self.sweep.explicit).union(*(self._settings[p][i] for p, i in enumerate(cell)))
            flat = self._given(cell)
            if {derived, source} <= given and flat[source] > 0:
                where = ", ".join(f"{self.sweep.axes[p].name}={self.sweep.axes[p].values[cell[p]]}" for p in positions)
                raise ConfigError(f"{self.sweep.source}: {f'point {where}: ' if where else ''}{derived} "
                                  f"({flat[derived]}) and {source} ({flat[source]}) are both set, but {source} decides "
                                  f"the size alone (round({source} x network.n_exc)); set only one")

    def _check(self, rule: Rule) -> None:
        """Raise ConfigError naming the first cell where ``rule`` does not hold (by the axes it depends on)."""
        holds = self.over(rule.keys, rule.holds, bool)
        if holds.all():
            return
        cell = tuple(int(i) for i in np.argwhere(~holds)[0])
        message = rule.text(self.flat(cell))
        positions = self.axes_setting(rule.keys)
        where = ", ".join(f"{self.sweep.axes[p].name}={self.sweep.axes[p].values[cell[p]]}" for p in positions)
        raise ConfigError(f"{self.sweep.source}: {f'point {where}: ' if where else ''}{message}")


def _planned_s(flat: dict[str, Any]) -> float:
    """Planned simulated time (s, no early abort) of the point whose flat config is ``flat``."""
    return total_duration_s(nest(flat))


def expand(sweep: Sweep) -> list[Point]:
    """All points of ``sweep`` in grid order, as a list (for small sweeps; :class:`Grid` makes them on demand)."""
    return list(Grid(sweep).points())


def _setting(sweep: Sweep, axis: Axis, value: Any) -> dict[str, Any]:
    """The flat config entries one value of ``axis`` sets."""
    return dict(sweep.variants[axis.name][value]) if axis.key == VARIANT_KEY else {axis.key: value}


def recorded_points(stored: Mapping[str, Any], shape: tuple[int, ...]) -> list[Point]:
    """The points of the sweep a store records (root attrs ``stored``: its ``sweep_text``, ids on the defaults it
    records), in grid order; none when that text does not parse or does not expand to the store's grid ``shape``."""
    try:
        sweep = parse_sweep(str(stored.get(attrs.SWEEP_TEXT, "")))
        if grid_shape(sweep) != shape:
            return []
        return list(Grid(sweep).on_basis(store_basis(dict(stored))).points())
    except ConfigError:
        return []


def _named(path: str, keys: set[str]) -> bool:
    """Whether ``path`` is among ``keys`` or in a table ``keys`` names with a trailing dot."""
    return path in keys or any(k.endswith(".") and path.startswith(k) for k in keys)


@dataclass(frozen=True)
class Rule:
    """A rule between keys that are valid alone: ``holds(flat)`` reads only ``keys``; ``message`` names their values
    as ``{key}``."""

    keys: tuple[str, ...]
    holds: Callable[[Mapping[str, Any]], bool]
    message: str

    def text(self, flat: Mapping[str, Any]) -> str:
        """The message with the values of ``flat`` filled in."""
        message = self.message
        for key, value in flat.items():
            message = message.replace("{" + key + "}", str(value))
        return message


def check_consistency(flat: Mapping[str, Any], where: str) -> None:
    """Raise ConfigError (prefixed with ``where``) if keys of one flat config that are valid alone contradict each
    other (:data:`RULES`)."""
    for rule in RULES:
        if not rule.holds(flat):
            raise ConfigError(f"{where}: {rule.text(flat)}")


def _windows(flat: Mapping[str, Any]) -> tuple[tuple[float, float], tuple[float, float]]:
    """This config's recall and pre-cue windows, as offsets (s) from a cue's start."""
    pr = nest(dict(flat))["protocol"]
    return test_windows(0.0, pr["cue_duration_s"], pr, flat["detection.recall_mode"])


def _recall_window_s(flat: Mapping[str, Any]) -> float:
    """Length (s) of the recall window, and so of the pre-cue window, of this config's recall test."""
    (t0, t1), _ = _windows(flat)
    return t1 - t0


def _window_pair_s(flat: Mapping[str, Any]) -> float:
    """Time (s) from a pre-cue window's start to its recall window's end."""
    (_, t1), (p0, _) = _windows(flat)
    return t1 - p0


def _first_test_start_s(flat: Mapping[str, Any]) -> float:
    """Background time (s) before the first recall test's first cue: from the last imprint input (learned) or the
    start of the run (prewired) to the test."""
    lead = flat["protocol.imprint_off_s"] if flat["assemblies.imprint"] == "learned" else flat["protocol.settle_s"]
    return lead + min([*flat["protocol.retention_delays_s"], flat["protocol.hold_s"]])


def _retention_tests_fit(flat: Mapping[str, Any]) -> bool:
    """Whether every recall test during the hold ends before the next test starts and before the hold ends."""
    length = flat["assemblies.count"] * (flat["protocol.cue_duration_s"] + flat["protocol.cue_gap_s"])
    starts = [*flat["protocol.retention_delays_s"], flat["protocol.hold_s"]]
    return all(a + length <= b + 1e-9 for a, b in zip(starts, starts[1:]))


RULES: tuple[Rule, ...] = (
    Rule(("network.indegree_exc", "network.n_exc"),
         lambda f: f["network.indegree_exc"] <= f["network.n_exc"],
         "network.indegree_exc ({network.indegree_exc}) must not exceed network.n_exc ({network.n_exc})"),
    Rule(("network.indegree_inh", "network.n_exc", "network.inh_per_exc"),
         lambda f: f["network.indegree_inh"] <= inhibitory_count(f["network.n_exc"], f["network.inh_per_exc"]),
         "network.indegree_inh ({network.indegree_inh}) must not exceed the inhibitory count "
         "round(network.n_exc x network.inh_per_exc)"),
    Rule(("assemblies.size",),
         lambda f: f["assemblies.size"] >= 2,
         "assemblies.size ({assemblies.size}) must be at least 2 (assemblies.coding_level x network.n_exc rounds "
         "below 2 here)"),
    Rule(("assemblies.size", "network.n_exc"),
         lambda f: f["assemblies.size"] <= f["network.n_exc"],
         "assemblies.size ({assemblies.size}) must not exceed network.n_exc ({network.n_exc})"),
    Rule(("assemblies.overlap", "assemblies.count", "assemblies.size", "network.n_exc"),
         lambda f: f["assemblies.overlap"] != "disjoint"
         or f["assemblies.count"] * f["assemblies.size"] <= f["network.n_exc"],
         "disjoint assemblies need assemblies.count x assemblies.size ({assemblies.count} x {assemblies.size}) "
         "<= network.n_exc ({network.n_exc}); use fewer or smaller assemblies, or assemblies.overlap = 'random'"),
    Rule(("network.v_reset_mv", "network.v_threshold_mv"),
         lambda f: f["network.v_reset_mv"] < f["network.v_threshold_mv"],
         "network.v_reset_mv ({network.v_reset_mv}) must be below network.v_threshold_mv ({network.v_threshold_mv})"),
    Rule(("detection.baseline_start_s", "protocol.settle_s"),
         lambda f: f["detection.baseline_start_s"] < f["protocol.settle_s"] or f["protocol.settle_s"] == 0,
         "detection.baseline_start_s ({detection.baseline_start_s}) must be shorter than protocol.settle_s "
         "({protocol.settle_s}): the baseline window runs from the one to the other"),
    Rule(("assemblies.count", "protocol.cue_duration_s", "protocol.cue_gap_s", "protocol.retention_delays_s",
          "protocol.hold_s"),
         _retention_tests_fit,
         "protocol.retention_delays_s ({protocol.retention_delays_s}) must leave each recall test (assemblies.count x "
         "(protocol.cue_duration_s + protocol.cue_gap_s)) room before the next one and before the end of "
         "protocol.hold_s ({protocol.hold_s})"),
    Rule(("protocol.cue_skip_s", "protocol.cue_duration_s"),
         lambda f: f["protocol.cue_skip_s"] < f["protocol.cue_duration_s"],
         "protocol.cue_skip_s ({protocol.cue_skip_s}) must be shorter than protocol.cue_duration_s "
         "({protocol.cue_duration_s})"),
    Rule(("protocol.", "detection.recall_mode"),
         lambda f: _recall_window_s(f) <= f["protocol.cue_gap_s"] + 1e-9,
         "the recall window (protocol.cue_duration_s - protocol.cue_skip_s, or protocol.persistence_window_s with "
         "detection.recall_mode = 'persistent') must not be longer than protocol.cue_gap_s ({protocol.cue_gap_s}): "
         "the pre-cue window of equal length must lie in the background gap after the previous cue"),
    Rule(("protocol.", "detection.recall_mode", "assemblies.imprint"),
         lambda f: _first_test_start_s(f) >= _recall_window_s(f) - 1e-9,
         "the first recall test (at the first of protocol.retention_delays_s {protocol.retention_delays_s}, else after "
         "protocol.hold_s {protocol.hold_s}) starts too soon: its pre-cue window, as long as the recall window, must "
         "lie after the start of the run and after the last imprint input (protocol.settle_s, or "
         "protocol.imprint_off_s for learned assemblies, counts before hold start)"),
    Rule(("protocol.", "detection.recall_mode", "detection.runaway_hold_s", "detection.smoothing_s"),
         lambda f: max(f["protocol.cue_gap_s"], f["detection.runaway_hold_s"] + f["detection.smoothing_s"])
         >= _window_pair_s(f) - 1e-9,
         "the background after the last cue (the larger of protocol.cue_gap_s ({protocol.cue_gap_s}) and "
         "detection.runaway_hold_s + detection.smoothing_s) must hold the recall test's pre-cue and recall windows "
         "once, for its null of background times"),
    Rule(("protocol.retention_design", "protocol.retention_delays_s"),
         lambda f: f["protocol.retention_design"] != "separate" or not f["protocol.retention_delays_s"],
         "protocol.retention_design = 'separate' tests each point once, after its hold: protocol.retention_delays_s "
         "({protocol.retention_delays_s}) must be empty (sweep protocol.hold_s for the delays)"),
    Rule(("protocol.imprint_order", "assemblies.imprint"),
         lambda f: f["protocol.imprint_order"] != "blocked" or f["assemblies.imprint"] == "learned",
         "protocol.imprint_order = 'blocked' orders learning: it needs assemblies.imprint = 'learned' "
         "(not {assemblies.imprint})"),
    Rule(("protocol.", "detection.recall_mode"),
         lambda f: f["protocol.imprint_order"] != "blocked"
         or f["protocol.imprint_off_s"] >= _recall_window_s(f) - 1e-9,
         "with protocol.imprint_order = 'blocked' the test after each block starts protocol.imprint_off_s "
         "({protocol.imprint_off_s}) after the last presentation, which must hold the pre-cue window (as long as the "
         "recall window)"),
    Rule(("detection.recall_alpha", "detection.recall_null_draws"),
         lambda f: f["detection.recall_alpha"] * (f["detection.recall_null_draws"] + 1) >= 1 - 1e-9,
         "detection.recall_null_draws ({detection.recall_null_draws}) must be at least 1 / detection.recall_alpha - 1 "
         "({detection.recall_alpha}): with fewer pseudo-assemblies no assembly can reach that p-value for certain"),
    Rule(("network.w_e_to_e", "assemblies.imprint", "assemblies.count", "assemblies.prewire_gain",
          "plasticity.triplet.w_max"),
         lambda f: _initial_ee_weight(f) <= f["plasticity.triplet.w_max"],
         "the initial E->E weights (network.w_e_to_e ({network.w_e_to_e}), x assemblies.prewire_gain "
         "({assemblies.prewire_gain}) within prewired assemblies) must not exceed their clip plasticity.triplet.w_max "
         "({plasticity.triplet.w_max}): the first spike would cut them down"),
)
"""Rules between keys, each checked on every combination of the axes that set its keys."""
GIVEN_TOGETHER = (("assemblies.size", "assemblies.coding_level"),)
"""Keys a point may not both set: the second, when above 0, derives the first (size = round(level x n_exc))."""


def _initial_ee_weight(flat: Mapping[str, Any]) -> float:
    """The largest initial E->E weight of a point (g_leak): within a prewired assembly it is multiplied by the gain."""
    prewired = flat["assemblies.imprint"] == "prewired" and flat["assemblies.count"] > 0
    return float(flat["network.w_e_to_e"] * (max(flat["assemblies.prewire_gain"], 1.0) if prewired else 1.0))
