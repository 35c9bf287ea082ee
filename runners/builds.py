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
import functools
import hashlib
import importlib.metadata
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
    "protocol.snapshots", "detection.trace_bin_ms", "execution.engine", "execution.threads",
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
    return None


GENERATING_SOURCES: tuple[str, ...] = ("builds.py", "model.py", "protocol.py", "rules.py", "standalone.py")
"""Modules of ``capsweep.runners`` whose text takes part in generating a build's C++ project."""


def fingerprint(sources: list[Path], brian2_version: str) -> str:
    """Hash of the code that generates a build: the bytes of ``sources`` (with their names) and Brian2's version."""
    digest = hashlib.sha256(brian2_version.encode())
    for path in sources:
        digest.update(f"\0{path.name}\0".encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


@functools.cache
def code_fingerprint(*also: str) -> str:
    """:func:`fingerprint` of this capsweep's :data:`GENERATING_SOURCES` (and the runners modules ``also``) and the
    installed Brian2; computed once per process."""
    here = Path(__file__).parent
    return fingerprint([here / name for name in GENERATING_SOURCES + also], importlib.metadata.version("brian2"))


def build_key(cfg: dict) -> str:
    """Hash of a point's compiled code: points with equal keys share one compiled binary.

    Covers the config values that change the generated code (sizes, in-degrees, delay, dt, the
    reference-weight mode, the snapshot count, the trace bin, the engine and its threads: see
    ``KEYS_IN_CODE``) and :func:`code_fingerprint`, so a binary compiled by other capsweep code or
    another Brian2 is never reused; plasticity switches are not structural (see :func:`compiled_form`).
    """
    text = json.dumps({"config": structure(cfg), "code": code_fingerprint()}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def structure(cfg: dict) -> dict[str, object]:
    """The config keys that change the generated code, with this point's values (see ``KEYS_IN_CODE``)."""
    flat = flatten(compiled_form(cfg))
    return {k: flat[k] for k in KEYS_IN_CODE}


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


FIRST_COMPILE_S = 40.0
"""Expected first compile of a build (s) before one was measured here: 20-80 s on 2 cores (December 2026)."""
COMPILE_TIME_FILE = "compile_s"
"""File in a build's directory holding how long its first compile took (s)."""


def expected_compile_s(root: str | os.PathLike | None = None) -> float:
    """How long a first compile takes here (s): the median of the compiles measured in the cache, else
    :data:`FIRST_COMPILE_S`."""
    measured = []
    for path in build_root(root).glob(f"*/{COMPILE_TIME_FILE}"):
        with contextlib.suppress(OSError, ValueError):
            measured.append(float(path.read_text()))
    return float(sorted(measured)[len(measured) // 2]) if measured else FIRST_COMPILE_S


def record_compile_s(key: str, seconds: float, root: str | os.PathLike | None = None) -> None:
    """Keep how long the first compile of build ``key`` took (s), for :func:`expected_compile_s`."""
    with contextlib.suppress(OSError):
        (build_root(root) / key / COMPILE_TIME_FILE).write_text(f"{seconds:.1f}\n")


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
