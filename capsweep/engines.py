"""The simulation engines: one table that defines each, read by every place that names one.

An engine is a way to run a point's Brian2 network. The table says how it simulates (a
``module:function`` imported only on the worker that runs it), what it cannot express and
which engine then runs the point instead, and what a worker's first point costs on it (for the
wall-time estimate). The registry's choices, the store's engine flags, the estimate, the command
line's help and its fallback notes all read from here. Nothing here imports Brian2.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from importlib import import_module
from typing import Any

from .errors import ConfigError


@dataclass(frozen=True)
class Engine:
    """One engine: how it runs a point, what it cannot run, and what it costs to start."""

    name: str
    summary: str
    simulate: str
    """``module:function`` with signature ``(cfg, seed, wiring_seed) -> (Handles, Recording)``."""
    first_point_s: float
    """Extra wall time (s) of each worker's first point: code generation or loading compiled modules."""
    reuses_builds: bool = False
    """Points of one network structure rerun one compiled binary (submitted grouped by build key)."""
    limits: str = ""
    """``module:function`` with signature ``(cfg) -> str | None``: why ``cfg`` cannot run here."""
    cannot: str = ""
    """What the engine cannot express, in words (for notes and docs)."""
    fallback: str = ""
    """Engine that runs a point this one cannot express."""
    threads: bool = False
    """Runs a point on ``execution.threads`` threads (the others run on one and ignore the key)."""
    cost: str = ""
    """What the engine costs on a 2-core machine (December 2026), in words (``capsweep check`` names it)."""


ENGINES: dict[str, Engine] = {
    engine.name: engine
    for engine in (
        # Order fixes the store's engine flag codes: append new engines at the end.
        Engine("cython", "Brian2 runtime with compiled cython code; a network operation stops runaway points",
               "capsweep.runners.runtime:simulate", first_point_s=2.0,
               cost="compiles its code cache once per machine (1.5-5 min), then about 1.5-2.5 s wall per simulated s "
                    "at N_E = 800-1000 (standalone: 0.2-0.6)"),
        Engine("numpy", "Brian2 runtime in pure numpy (no compiler needed, slow)",
               "capsweep.runners.runtime:simulate", first_point_s=0.5,
               cost="compiles nothing; several times slower per simulated s than cython"),
        Engine("standalone", "Brian2 C++ standalone: one binary compiled per network structure, rerun per point",
               "capsweep.runners.standalone:simulate", first_point_s=2.5, reuses_builds=True,
               limits="capsweep.runners.builds:unsupported",
               cannot="a detection.trace_bin_ms that is not a whole number of network.dt_ms steps",
               fallback="cython", threads=True,
               cost="compiles one binary per network structure (20-80 s, once; cached), then about 0.2-0.6 s wall "
                    "per simulated s at N_E = 800-1000"),
    )
}
"""Every engine by name. First-point costs measured on a 2-core machine (December 2026):
standalone regenerates the project's code in a fresh process (2.3-3 s; the binary is reused),
cython loads its compiled modules (1-3 s)."""

NAMES: tuple[str, ...] = tuple(ENGINES)


def engine(name: str) -> Engine:
    """The engine called ``name``; ConfigError naming the allowed ones otherwise."""
    if name not in ENGINES:
        raise ConfigError(f"engine {name!r} is not allowed: expected one of {', '.join(NAMES)}")
    return ENGINES[name]


def resolve(ref: str) -> Callable[..., Any]:
    """The function a ``module:function`` reference names (imported now)."""
    module, _, function = ref.partition(":")
    found: Callable[..., Any] = getattr(import_module(module), function)
    return found


def threads_of(cfg: dict[str, Any]) -> int:
    """Threads a point of ``cfg`` runs on: ``execution.threads`` on an engine that uses it, else 1."""
    return int(cfg["execution"]["threads"]) if engine(cfg["execution"]["engine"]).threads else 1


def engine_for(cfg: dict[str, Any]) -> tuple[Engine, str | None]:
    """The engine that runs ``cfg``: the configured one, or its fallback with the reason it was needed."""
    chosen = engine(cfg["execution"]["engine"])
    reason = resolve(chosen.limits)(cfg) if chosen.limits else None
    if reason is None:
        return chosen, None
    return engine(chosen.fallback), reason
