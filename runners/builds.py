"""The compiled-build cache of the standalone engine: build keys, cache root, compile lock, pruning.

A *build* is the compiled C++ project of one network structure. Points whose configs give the
same :func:`build_key` rerun one binary. This module holds everything about builds that does not
need Brian2, so the sweep's client process can group points by build without importing it.

Builds live in ``$CAPSWEEP_BUILD_DIR`` (default ``~/.cache/capsweep/builds``), one directory per
build key. The cache may sit on a filesystem shared by several hosts (each key compiled once
across them) or on node-local scratch (each node compiles once): the compile lock is a lock directory
``<key>.lock`` of :mod:`capsweep.locks` whose holder renews its heartbeat (policy ``COMPILE``).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
from collections.abc import Iterator
from pathlib import Path

from ..locks import COMPILE, held
from ..registry import flatten

BUILD_DIR_ENV = "CAPSWEEP_BUILD_DIR"
KEYS_IN_CODE = (
    "network.n_exc", "network.inh_per_exc", "network.indegree_exc", "network.indegree_inh",
    "network.delay_ms", "network.dt_ms", "plasticity.heterosynaptic.w_ref_mode",
    "protocol.snapshots", "detection.trace_bin_ms", "execution.engine",
)
"""Config keys that change the generated code (everything else is passed per run)."""
_COEFFICIENTS_OF = {
    "triplet": ("a_ltp", "b_ltd"),
    "heterosynaptic": ("beta",),
    "transmitter": ("delta",),
    "inhibitory": ("eta",),
}
"""The coefficients that scale each plasticity term's weight change."""


def compiled_form(cfg: dict) -> dict:
    """``cfg`` with every plasticity term compiled in and a switched-off term's coefficients at 0.

    A term with zero coefficients changes no weight, so the dynamics are those of the switched-off
    term, and points that differ only in which terms are on share one build (e.g. the full rule
    and triplet STDP alone). Weights still pass through the [0, w_max] clip on each spike, which
    changes nothing while initial weights lie inside it.
    """
    plasticity = dict(cfg["plasticity"])
    for term, coefficients in _COEFFICIENTS_OF.items():
        table = plasticity[term]
        zeroed = {} if table["enabled"] else dict.fromkeys(coefficients, 0.0)
        plasticity[term] = {**table, **zeroed, "enabled": True}
    return {**cfg, "plasticity": plasticity}


def unsupported(cfg: dict) -> str | None:
    """Why this point cannot run in standalone (it then falls back to cython), or None."""
    bin_steps = cfg["detection"]["trace_bin_ms"] / cfg["network"]["dt_ms"]
    if abs(bin_steps - round(bin_steps)) > 1e-9:
        return "detection.trace_bin_ms is not a whole number of network.dt_ms steps"
    if cfg["execution"]["checkpoint_interval_s"] > 0:
        return "execution.checkpoint_interval_s > 0: within-point checkpoints need a runtime engine"
    return None


def build_key(cfg: dict) -> str:
    """Structural hash of a point: points with equal keys share one compiled binary.

    Covers sizes, in-degrees, delay, dt, the reference-weight mode, the snapshot count, the
    trace bin and the engine (see ``KEYS_IN_CODE``); plasticity switches are not structural
    (see :func:`compiled_form`).
    """
    flat = flatten(compiled_form(cfg))
    text = json.dumps({k: flat[k] for k in KEYS_IN_CODE}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def compiled(key: str) -> bool:
    """Whether the build of ``key`` is in the cache (compiled: its binary exists)."""
    return (build_root() / key / "main").is_file()


def build_root(root: str | os.PathLike | None = None) -> Path:
    """Cache root of builds: ``root``, else ``$CAPSWEEP_BUILD_DIR``, else ``~/.cache/capsweep/builds``."""
    if root is None:
        root = os.environ.get(BUILD_DIR_ENV) or Path.home() / ".cache" / "capsweep" / "builds"
    return Path(root).expanduser()


@contextlib.contextmanager
def locked(path: Path, blocking: bool = True) -> Iterator[bool]:
    """Hold the compile lock ``path`` (``<key>.lock``, policy :data:`capsweep.locks.COMPILE`); yields False instead
    of waiting if not ``blocking`` and taken. Makes the cache root first if needed."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with held(path, COMPILE, blocking) as taken:
        yield taken


def _dir_bytes(path: Path) -> int:
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file() and not f.is_symlink())


def prune_builds(max_bytes: int, root: str | os.PathLike | None = None) -> int:
    """Delete least-recently-used builds until the cache holds at most ``max_bytes``; return how many.

    A build being compiled (its lock held) is skipped. Runs in progress are not detected: prune
    between sweeps.
    """
    base = build_root(root)
    if not base.is_dir():
        return 0
    builds = [d for d in base.iterdir() if d.is_dir() and not d.suffix]  # keys have no dot; locks end in .lock
    sizes = {d: _dir_bytes(d) for d in builds}
    total, removed = sum(sizes.values()), 0
    for build in sorted(builds, key=_last_used):
        if total <= max_bytes:
            break
        with locked(base / f"{build.name}.lock", blocking=False) as free:
            if not free:
                continue
            shutil.rmtree(build, ignore_errors=True)
        total -= sizes[build]
        removed += 1
    return removed


def _last_used(build: Path) -> float:
    marker = build / "last_used"
    return marker.stat().st_mtime if marker.exists() else build.stat().st_mtime
