"""Run one sweep point: pick its engine, simulate, score.

``run_point(cfg, seed, wiring_seed=None)`` returns one entry per result variable of
``capsweep.results_schema.layout.VARIABLES`` except ``predicted_outcome``. The engine comes from
the table in :mod:`capsweep.engines`; a point its engine cannot express runs on the fallback.
"""

from __future__ import annotations

import time
from typing import TYPE_CHECKING

from ..engines import engine_for, resolve
from ..registry import with_execution
from .scoring import Recording, score

if TYPE_CHECKING:
    from .model import Handles


def run_point(cfg: dict, seed: int, wiring_seed: int | None = None) -> dict[str, object]:
    """Simulate one point and return its metrics (see ``capsweep.results_schema.layout.VARIABLES``).

    ``cfg`` is the nested, fully resolved config; ``wiring_seed`` (default ``seed``) draws
    assembly membership and connectivity, ``seed`` cued members, initial voltages and Brian2's
    RNG. Same cfg and seeds give identical results with the same engine. The ``engine`` entry
    says which engine ran the point (the fallback when the configured one cannot express it).
    """
    return run_point_recorded(cfg, seed, wiring_seed)[0]


def run_point_recorded(cfg: dict, seed: int, wiring_seed: int | None = None
                       ) -> tuple[dict[str, object], Handles, Recording]:
    """:func:`run_point`, also returning the network's handles and what it recorded (spikes, weights)."""
    start = time.perf_counter()
    engine, _ = engine_for(cfg)
    cfg = with_execution(cfg, engine=engine.name)
    handles, recording = resolve(engine.simulate)(cfg, seed, wiring_seed)
    return score(cfg, seed, engine.name, handles, recording, start), handles, recording
