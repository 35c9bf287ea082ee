"""The cost model behind ``capsweep estimate``: what a point costs on this machine, kept in a file between runs.

A point of ``n_exc`` excitatory cells that simulates ``t`` seconds costs ``overhead_s + per_sim_s * t``
wall seconds (set-up, simulation, scoring); the first point of a build that is not compiled yet adds
the compile. The model is kept per machine (host name and core count) and engine, one :class:`Entry`
per network size, in :func:`cost_file` (``$CAPSWEEP_COST_FILE``, default ``~/.cache/capsweep/costs.json``);
a size without an entry is scaled from the nearest one by cell count.

Entries come from two places:

- stores the user ran (:func:`learn`, called by ``capsweep estimate`` on a sweep whose store holds done
  points): per size, the median ``setup_time_s`` (a build's compile is an outlier there) plus a straight
  line of ``wall_time_s`` against ``simulated_time_s``; a build's compile is its largest ``setup_time_s``
  above the median. These are the costs under the run's own load (its workers, its client).
- probe runs (``capsweep.sweeps.workload.probe``), once per size and machine, when no entry lies within a
  factor :data:`COVERS` of a size the sweep needs.
"""

from __future__ import annotations

import json
import os
import socket
import tempfile
from dataclasses import asdict, dataclass, field
from datetime import date
from pathlib import Path

import numpy as np

COST_FILE_ENV = "CAPSWEEP_COST_FILE"
COVERS = 2.0
"""An entry covers sizes within this factor of its own (cost scales with the cell count, measured to within a few
per cent from 8,000 to 16,000 cells: README, engine scaling)."""
COMPILE_S = 40.0
"""A build's compile (s) until one is measured (20-80 s measured on 2 cores, December 2026)."""
COMPILE_OUTLIER_S = 5.0
"""A build's largest set-up time counts as a compile when it exceeds the median set-up by more than this (s)."""
MIN_SPREAD = 1.2
"""Simulated times must span this ratio (largest / smallest) to fit a line; otherwise cost is taken as proportional."""


@dataclass(frozen=True)
class Cost:
    """Cost of one point of a network size: wall = overhead_s + per_sim_s x simulated seconds."""

    overhead_s: float
    per_sim_s: float

    def of(self, simulated_s: float | np.ndarray, scale: float = 1.0) -> float | np.ndarray:
        """Wall seconds of points simulating ``simulated_s`` s, the simulation ``scale`` times as costly."""
        return self.overhead_s + self.per_sim_s * scale * simulated_s


@dataclass(frozen=True)
class Entry:
    """A cost with where it comes from: a probe, or the store it was learned from; and the date."""

    cost: Cost
    source: str
    on: str = field(default_factory=lambda: date.today().isoformat())


@dataclass
class CostModel:
    """This machine's costs for one engine: an entry per network size (n_exc) and a build's compile time (s)."""

    sizes: dict[int, Entry] = field(default_factory=dict)
    compile_s: float = COMPILE_S
    compile_source: str = "default"

    def covers(self, n_exc: int) -> bool:
        """Whether an entry lies within a factor :data:`COVERS` of ``n_exc`` cells."""
        return any(1 / COVERS <= n_exc / size <= COVERS for size in self.sizes)

    def point_s(self, n_exc: int, simulated_s: float | np.ndarray) -> float | np.ndarray:
        """Estimated wall seconds of points of ``n_exc`` cells simulating ``simulated_s`` s, scaled from the nearest
        size by cell count.

        Cell count, not synapse count: at N_E = 8000 and 16,000 a network with a fixed connection
        probability (2-4 times the synapses) cost what the fixed in-degree network of its size did
        (``benchmarks/bench_scaling.py``, December 2026): the per-cell drive and integration dominate.
        """
        nearest = min(self.sizes, key=lambda s: abs(s - n_exc))
        return self.sizes[nearest].cost.of(simulated_s, max(n_exc / nearest, 1e-9))


def cost_file() -> Path:
    """Where the cost model is kept: ``$CAPSWEEP_COST_FILE``, else ``~/.cache/capsweep/costs.json``."""
    return Path(os.environ.get(COST_FILE_ENV) or Path.home() / ".cache" / "capsweep" / "costs.json").expanduser()


def machine_engine(engine: str) -> str:
    """Key of this machine and ``engine`` in the cost file: host name, core count, engine."""
    return f"{socket.gethostname()}/{os.cpu_count()} cores/{engine}"


def _read_all() -> dict[str, dict]:
    try:
        data = json.loads(cost_file().read_text())
    except (OSError, ValueError):  # none yet, or unreadable: start afresh (it is a cache)
        return {}
    return data if isinstance(data, dict) else {}


def load(engine: str) -> CostModel:
    """This machine's cost model for ``engine`` (empty if none is kept or the file is unreadable)."""
    raw = _read_all().get(machine_engine(engine), {})
    try:
        sizes = {int(n): Entry(Cost(**e["cost"]), e["source"], e["on"]) for n, e in raw.get("sizes", {}).items()}
        return CostModel(sizes, float(raw.get("compile_s", COMPILE_S)), str(raw.get("compile_source", "default")))
    except (KeyError, TypeError, ValueError):
        return CostModel()


def save(engine: str, model: CostModel) -> None:
    """Keep ``model`` as this machine's for ``engine`` (the file is replaced whole, by rename)."""
    path = cost_file()
    data = _read_all()
    data[machine_engine(engine)] = {"sizes": {str(n): asdict(e) for n, e in sorted(model.sizes.items())},
                                    "compile_s": model.compile_s, "compile_source": model.compile_source}
    path.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.NamedTemporaryFile("w", dir=path.parent, prefix=".costs-", suffix=".json", delete=False) as tmp:
        json.dump(data, tmp, indent=1, sort_keys=True)
    Path(tmp.name).replace(path)


def fit(setup_s: np.ndarray, wall_s: np.ndarray, simulated_s: np.ndarray) -> Cost:
    """The cost of points from their measured set-up, wall and simulated times (s), one entry per point.

    Set-up is the median (a compile in the first point of a build does not move it); wall time is a
    least-squares line against simulated time where simulated times span :data:`MIN_SPREAD`, else
    proportional to it.
    """
    setup = float(np.median(setup_s))
    if simulated_s.max() >= MIN_SPREAD * max(simulated_s.min(), 1e-9):
        slope, intercept = np.polyfit(simulated_s, wall_s, 1)
        if slope > 0:
            return Cost(setup + max(float(intercept), 0.0), float(slope))
    return Cost(setup, float(wall_s.sum() / max(simulated_s.sum(), 1e-9)))


def compile_times(setup_s: np.ndarray, builds: np.ndarray) -> list[float]:
    """Compiles seen in points' set-up times (s): per build (``builds``: each point's build key), its largest set-up
    above the build's median by more than :data:`COMPILE_OUTLIER_S`."""
    seen = []
    for key in np.unique(builds):
        setups = setup_s[builds == key]
        extra = float(setups.max() - np.median(setups))
        if key and extra > COMPILE_OUTLIER_S:
            seen.append(extra)
    return seen


def learn(model: CostModel, source: str, n_exc: np.ndarray, setup_s: np.ndarray, wall_s: np.ndarray,
          simulated_s: np.ndarray, builds: np.ndarray) -> CostModel:
    """``model`` with the sizes and compiles measured in one store's done points (arrays with one entry per point:
    cells, set-up, wall and simulated time in s, build key), each tagged with ``source``."""
    sizes = dict(model.sizes)
    for size in np.unique(n_exc):
        mine = n_exc == size
        sizes[int(size)] = Entry(fit(setup_s[mine], wall_s[mine], simulated_s[mine]), source)
    compiles = compile_times(setup_s, builds)
    if compiles:
        return CostModel(sizes, float(np.median(compiles)), source)
    return CostModel(sizes, model.compile_s, model.compile_source)
