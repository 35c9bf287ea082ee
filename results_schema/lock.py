"""Store lock: one capsweep run at a time writes a store.

The lock is a file inside the store created with O_CREAT | O_EXCL, holding the host, pid and
start time of its holder. A lock whose holder is a dead process on this host is stale and is
taken over; a lock held from another host is never judged (its pid means nothing here).
"""

from __future__ import annotations

import json
import os
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ..errors import StoreError

LOCK_NAME = ".capsweep.lock"


@contextmanager
def store_lock(path: str | Path) -> Iterator[Path]:
    """Hold the lock of the store at ``path`` for the ``with`` block; yields the lock file path.

    Raises StoreError if another live run holds it. Released on any exit, KeyboardInterrupt included.
    """
    lock = Path(path) / LOCK_NAME
    claim = _acquire(lock)
    try:
        yield lock
    finally:
        _remove_if_unchanged(lock, claim)


def _acquire(lock: Path) -> str:
    """Create the lock file and return the text written into it (this run's claim)."""
    claim = json.dumps({
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "since": datetime.now(UTC).isoformat(timespec="seconds"),
    })
    for _ in range(3):
        try:
            _create_exclusive(lock, claim)
            return claim
        except FileExistsError:
            held = _read(lock)
            if held is None:
                continue
            if not _is_stale(_parse(held)):
                raise _locked_error(lock, held) from None
            _remove_if_unchanged(lock, held)
        except FileNotFoundError:
            raise StoreError(f"no result store at {lock.parent}") from None
    raise _locked_error(lock, _read(lock))


def _create_exclusive(lock: Path, text: str) -> None:
    fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    try:
        os.write(fd, text.encode())
    finally:
        os.close(fd)


def _remove_if_unchanged(lock: Path, text: str) -> None:
    """Remove the lock file if it still holds ``text`` (this run's claim, or the stale one read)."""
    if _read(lock) == text:
        lock.unlink(missing_ok=True)


def _read(lock: Path) -> str | None:
    try:
        return lock.read_text()
    except FileNotFoundError:
        return None


def _parse(text: str) -> dict[str, Any]:
    """The holder recorded in a lock file; empty if the file is unreadable (e.g. being written)."""
    try:
        holder = json.loads(text)
    except json.JSONDecodeError:
        return {}
    return holder if isinstance(holder, dict) else {}


def _is_stale(holder: dict[str, Any]) -> bool:
    """True if the holder ran on this host and its process no longer exists."""
    pid = holder.get("pid")
    if holder.get("host") != socket.gethostname() or not isinstance(pid, int) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    return False


def _locked_error(lock: Path, held: str | None) -> StoreError:
    holder = _parse(held or "")
    return StoreError(
        f"{lock.parent} is locked by pid {holder.get('pid', '?')} on host {holder.get('host', '?')} "
        f"since {holder.get('since', '?')}; another capsweep run is using it. If that run is dead, remove {lock}"
    )
