"""What every engine's within-point checkpoints share: where they live, whose they are, when they are taken.

A checkpoint holds a point's full state at a step; a rerun of the point (same science config,
seeds, engine and early-abort setting: :func:`point_key`) restores it and continues with bitwise
the result of an uninterrupted run. Each engine writes its own format (:mod:`capsweep.runners.runtime`:
Brian2's stored state; :mod:`capsweep.runners.standalone`: a file the binary writes), under one file
name per point in :func:`checkpoint_root`, and stamps it with the program that wrote it
(:func:`stamp`: the capsweep version and the code that was run, for standalone its build key).

A checkpoint stamped by another program is refused with one line (:func:`refuse_foreign`), never
silently restarted: its point belongs to a sweep that this capsweep did not begin, whose store
would mix the results of two programs, and the user decides (finish with the program that wrote
it, or delete the file to run the point again from the start). Nothing Brian2 here.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any

from .. import __version__
from ..errors import CapsweepError

CHECKPOINT_DIR_ENV = "CAPSWEEP_CHECKPOINT_DIR"
"""Environment variable naming the checkpoint directory (default ``~/.cache/capsweep/checkpoints``)."""


def checkpoint_root() -> Path:
    """Directory of the checkpoint files: ``$CAPSWEEP_CHECKPOINT_DIR``, else ``~/.cache/capsweep/checkpoints``."""
    return Path(os.environ.get(CHECKPOINT_DIR_ENV) or Path.home() / ".cache" / "capsweep" / "checkpoints").expanduser()


def point_key(cfg: dict, seed: int, wiring_seed: int | None) -> str:
    """Hash of what fixes a point's run: science config, seeds, engine and early abort (not the interval)."""
    ex = cfg["execution"]
    run = {"config": {k: v for k, v in cfg.items() if k != "execution"}, "seed": seed, "wiring_seed": wiring_seed,
           "engine": ex["engine"], "abort_on_runaway": ex["abort_on_runaway"]}
    return hashlib.sha256(json.dumps(run, sort_keys=True).encode()).hexdigest()[:24]


def interval_steps(cfg: dict) -> int:
    """Steps of ``network.dt_ms`` between checkpoints (0: checkpoints off)."""
    return int(round(cfg["execution"]["checkpoint_interval_s"] / cfg["network"]["dt_ms"] * 1e3))


def stamp(code: str) -> dict[str, str]:
    """The writer's identity a checkpoint carries: this capsweep's version and ``code`` (what was run)."""
    return {"capsweep": __version__, "code": code}


def refuse_foreign(path: Path, found: Any, expected: dict[str, str]) -> None:
    """CapsweepError (one line) unless the checkpoint at ``path`` carries the stamp ``expected``."""
    if found == expected:
        return
    writer = (f"capsweep {found.get('capsweep')} (code {found.get('code')})" if isinstance(found, dict)
              else "an older capsweep or another program")
    raise CapsweepError(
        f"checkpoint {path} was written by {writer}, not by this capsweep {expected['capsweep']} "
        f"(code {expected['code']}), so the point cannot resume from it: finish the sweep with the capsweep "
        "that wrote it, or delete the file to run the point from the start")
