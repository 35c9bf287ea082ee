"""Locks across processes and hosts: one mechanism, and two policies for when a lock counts as abandoned.

A lock is a directory made with ``os.mkdir`` (atomic on local and network filesystems alike, unlike
``fcntl`` locks over NFS) that holds its holder's record: host, pid, when it took the lock and when it
last renewed the record (its heartbeat). Whether a lock whose holder seems gone may be taken over is the lock's
:class:`Policy`:

- :data:`STORE_WRITER`: one capsweep run writes a store (:func:`store_lock`). The record is never
  renewed; the lock is taken over only when its holder ran on this host and its process is gone. A
  lock held from another host is never judged (its pid means nothing here): the user removes it.
- :data:`COMPILE`: one process compiles a build while the others wait (the standalone engine's build
  cache, possibly shared by several hosts). The holder renews its record every 10 s from a background
  thread; the lock is taken over when the record is older than 5 minutes (any host), or when its holder
  ran on this host and its process is gone. So a job killed mid-compile blocks the others at most 5 minutes.

A taken-over lock is renamed away before it is removed, so of two processes that judge it abandoned at
once only one removes it. A lock *file* left by an earlier capsweep (the store lock was a file with the
same record; the compile lock an empty ``fcntl`` file) is judged by the same policy.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import socket
import threading
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .errors import StoreError


@dataclass(frozen=True)
class Policy:
    """When a lock's holder renews its record, and when a lock counts as abandoned by a holder on another host."""

    renew_s: float | None
    """The holder rewrites its record this often, s (None: never)."""
    stale_after_s: float | None
    """A record (or a lock that never got one) older than this, s, is abandoned whatever its host (None: never)."""


STORE_WRITER = Policy(renew_s=None, stale_after_s=None)
"""The one-writer lock of a store: taken over only from a dead process on this host."""
COMPILE = Policy(renew_s=10.0, stale_after_s=300.0)
"""The compile lock of a build: far above the renewal period and the clock skew of hosts kept by NTP
(common practice: milliseconds)."""
STORE_LOCK_NAME = ".capsweep.lock"
"""The store lock's name inside the store directory."""
POLL_S = 0.5
"""How often (s) a blocking :func:`held` tries again."""
_RECORD = "holder.json"


@contextlib.contextmanager
def held(path: Path, policy: Policy, blocking: bool = True) -> Iterator[bool]:
    """Hold the lock directory ``path`` for the ``with`` block; yields True, or False if taken and not ``blocking``.

    A lock the ``policy`` judges abandoned is taken over. The parent directory must exist
    (FileNotFoundError otherwise). Released on any exit, KeyboardInterrupt included.
    """
    while not _try_lock(path, policy):
        if not blocking:
            yield False
            return
        time.sleep(POLL_S)
    stop = threading.Event()
    renewer = None
    if policy.renew_s is not None:
        renewer = threading.Thread(target=_renew, args=(path, policy.renew_s, stop), name="capsweep-lock",
                                   daemon=True)
        renewer.start()
    try:
        yield True
    finally:
        stop.set()
        if renewer is not None:
            renewer.join()
        shutil.rmtree(path, ignore_errors=True)


def holder(path: Path) -> dict[str, Any]:
    """The record of the lock at ``path`` (host, pid, since, heartbeat); empty if it has none or is gone."""
    return _parse(_read_record(path, None) or "")


@contextlib.contextmanager
def store_lock(store: str | Path) -> Iterator[Path]:
    """Hold the one-writer lock of the store at ``store`` (:data:`STORE_WRITER`); yields the lock's path.

    Raises StoreError if the store does not exist or another live run holds its lock.
    """
    lock = Path(store) / STORE_LOCK_NAME
    if not Path(store).is_dir():
        raise StoreError(f"no result store at {store}")
    with held(lock, STORE_WRITER, blocking=False) as taken:
        if not taken:
            who = holder(lock)
            raise StoreError(
                f"{store} is locked by pid {who.get('pid', '?')} on host {who.get('host', '?')} since "
                f"{who.get('since', '?')}; another capsweep run is using it. If that run is dead, remove {lock}")
        yield lock


def _try_lock(path: Path, policy: Policy) -> bool:
    """Make the lock directory with this process's record, clearing an abandoned lock first. True if taken."""
    for _ in range(2):  # once more after clearing an abandoned lock
        try:
            os.mkdir(path)
        except FileExistsError:
            record = _read_record(path, policy.stale_after_s)
            if record is None or not _abandoned(_parse(record), policy):
                return False
            _remove_if_unchanged(path, record, policy.stale_after_s)
            continue
        _write_record(path, datetime.now(UTC).isoformat(timespec="seconds"))
        return True
    return False


def _renew(path: Path, every_s: float, stop: threading.Event) -> None:
    since = str(holder(path).get("since", ""))
    while not stop.wait(every_s):
        _write_record(path, since)


def _write_record(path: Path, since: str) -> None:
    """Write host, pid, ``since`` and the renewal time (s since the epoch) into the lock, atomically."""
    record = json.dumps({"host": socket.gethostname(), "pid": os.getpid(), "since": since, "heartbeat": time.time()})
    partial = path / f".{uuid.uuid4().hex}"
    partial.write_text(record)
    os.replace(partial, path / _RECORD)


def _read_record(path: Path, stale_after_s: float | None) -> str | None:
    """The lock's record; None if the lock is gone, or too young to have one yet.

    A lock *file* of an earlier capsweep is its own record. A lock directory without a record that is older
    than ``stale_after_s`` gives '' (an empty record: abandoned under a policy that judges age).
    """
    try:
        return (path / _RECORD).read_text()
    except NotADirectoryError:
        return _read_text(path)
    except FileNotFoundError:
        try:
            old = stale_after_s is not None and time.time() - path.stat().st_mtime > stale_after_s
        except FileNotFoundError:
            return None
        return "" if old else None


def _read_text(path: Path) -> str | None:
    try:
        return path.read_text()
    except FileNotFoundError:
        return None


def _parse(record: str) -> dict[str, Any]:
    """A record as a dict; empty if unreadable (e.g. half written by an earlier capsweep)."""
    try:
        found = json.loads(record)
    except json.JSONDecodeError:
        return {}
    return found if isinstance(found, dict) else {}


def _abandoned(record: dict[str, Any], policy: Policy) -> bool:
    """Whether ``policy`` lets a lock with this holder record be taken over."""
    if policy.stale_after_s is not None:
        if not record or time.time() - float(record.get("heartbeat", 0.0)) > policy.stale_after_s:
            return True
    return record.get("host") == socket.gethostname() and _process_gone(record.get("pid"))


def _process_gone(pid: Any) -> bool:
    """True if ``pid`` names no process on this host (False when it cannot be told)."""
    if not isinstance(pid, int) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except (PermissionError, OverflowError):
        return False
    return False


def _remove_if_unchanged(path: Path, record: str, stale_after_s: float | None) -> None:
    """Remove an abandoned lock if it still holds the record judged: renamed first, so one taker wins."""
    if _read_record(path, stale_after_s) != record:
        return
    grave = path.with_name(f"{path.name}.stale-{uuid.uuid4().hex}")
    with contextlib.suppress(OSError):
        os.rename(path, grave)
        shutil.rmtree(grave) if grave.is_dir() else grave.unlink()
