"""The compiled-build cache of the standalone engine: build keys, cache root, compile lock, pruning.

A *build* is the compiled C++ project of one network structure. Points whose configs give the
same :func:`build_key` rerun one binary. This module holds everything about builds that does not
need Brian2, so the sweep's client process can group points by build without importing it.

Builds live in ``$CAPSWEEP_BUILD_DIR`` (default ``~/.cache/capsweep/builds``), one directory per
build key. The cache may sit on a filesystem shared by several hosts (each key compiled once
across them) or on node-local scratch (each node compiles once): the compile lock is a directory
``<key>.lock`` made with ``os.mkdir`` (atomic on local and network filesystems alike, unlike
``fcntl`` locks over NFS), holding its holder's host, pid and a heartbeat time the holder renews.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import socket
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

from ..registry import flatten

BUILD_DIR_ENV = "CAPSWEEP_BUILD_DIR"
_KEYS_IN_CODE = (
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
    trace bin and the engine (see ``_KEYS_IN_CODE``); plasticity switches are not structural
    (see :func:`compiled_form`).
    """
    flat = flatten(compiled_form(cfg))
    text = json.dumps({k: flat[k] for k in _KEYS_IN_CODE}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def build_root(root: str | os.PathLike | None = None) -> Path:
    """Cache root of builds: ``root``, else ``$CAPSWEEP_BUILD_DIR``, else ``~/.cache/capsweep/builds``."""
    if root is None:
        root = os.environ.get(BUILD_DIR_ENV) or Path.home() / ".cache" / "capsweep" / "builds"
    return Path(root).expanduser()


HEARTBEAT_S = 10.0
"""How often (s) a lock's holder renews its heartbeat time."""
STALE_AFTER_S = 300.0
"""A lock whose heartbeat is older than this (s) is stale whatever its host: far above the heartbeat period and
the clock skew of hosts kept by NTP (common practice: milliseconds)."""
_HOLDER = "holder.json"
_POLL_S = 0.5


@contextlib.contextmanager
def locked(path: Path, blocking: bool = True) -> Iterator[bool]:
    """Hold the lock directory ``path`` (``<key>.lock``); yields False instead of waiting if not ``blocking`` and taken.

    A lock is taken over when stale: its heartbeat is older than ``STALE_AFTER_S``, or its holder ran on
    this host and its process is gone. The holder renews the heartbeat every ``HEARTBEAT_S`` from a
    background thread while the ``with`` block runs (a compile takes minutes).
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    while not _try_lock(path):
        if not blocking:
            yield False
            return
        time.sleep(_POLL_S)
    stop = threading.Event()
    beat = threading.Thread(target=_heartbeat, args=(path, stop), name="capsweep-build-lock", daemon=True)
    beat.start()
    try:
        yield True
    finally:
        stop.set()
        beat.join()
        shutil.rmtree(path, ignore_errors=True)


def _try_lock(path: Path) -> bool:
    """Make the lock directory with this process's holder record, clearing a stale lock first. True if taken."""
    for _ in range(2):  # once more after clearing a stale lock
        try:
            os.mkdir(path)
        except FileExistsError:
            held = _read_holder(path)
            if held is None or not _is_stale(_parse(held)):
                return False
            _remove_if_unchanged(path, held)
            continue
        _write_holder(path)
        return True
    return False


def _heartbeat(path: Path, stop: threading.Event) -> None:
    while not stop.wait(HEARTBEAT_S):
        _write_holder(path)


def _write_holder(path: Path) -> None:
    """Write host, pid and the heartbeat time (s since the epoch) into the lock, replacing the file atomically."""
    record = json.dumps({"host": socket.gethostname(), "pid": os.getpid(), "heartbeat": time.time()})
    partial = path / f".{uuid.uuid4().hex}"
    partial.write_text(record)
    os.replace(partial, path / _HOLDER)


def _read_holder(path: Path) -> str | None:
    """The lock's holder record; None if the lock is gone or too young to have one yet.

    '' (stale) for a lock directory older than ``STALE_AFTER_S`` without a record, and for a lock *file* left by
    earlier capsweep versions (an fcntl lock, which nobody holds in this form).
    """
    try:
        return (path / _HOLDER).read_text()
    except NotADirectoryError:
        return ""
    except FileNotFoundError:
        try:
            return "" if time.time() - path.stat().st_mtime > STALE_AFTER_S else None
        except FileNotFoundError:
            return None


def _parse(held: str) -> dict:
    """A holder record as a dict; empty if unreadable."""
    try:
        holder = json.loads(held)
    except json.JSONDecodeError:
        return {}
    return holder if isinstance(holder, dict) else {}


def _is_stale(holder: dict) -> bool:
    """True if a build lock's holder record (host, pid, heartbeat) shows a dead holder; an empty record is stale."""
    if not holder:
        return True
    if time.time() - float(holder.get("heartbeat", 0.0)) > STALE_AFTER_S:
        return True
    if holder.get("host") != socket.gethostname():
        return False
    try:
        os.kill(int(holder.get("pid", 0)), 0)
    except ProcessLookupError:
        return True
    except (PermissionError, ValueError, OverflowError):
        return False
    return False


def _remove_if_unchanged(path: Path, held: str) -> None:
    """Remove a stale lock if it still holds the record judged stale: renamed first, so one taker wins."""
    if _read_holder(path) != held:
        return
    grave = path.with_name(f"{path.name}.stale-{uuid.uuid4().hex}")
    with contextlib.suppress(OSError):
        os.rename(path, grave)
        shutil.rmtree(grave) if grave.is_dir() else grave.unlink()


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
