"""User-facing errors: raised by library code, rendered by the CLI as one line and a non-zero exit."""

from __future__ import annotations

import errno


class CapsweepError(Exception):
    """Base of every error whose message is meant for the user (no traceback shown)."""

    exit_code = 2


class ConfigError(CapsweepError):
    """A sweep file is malformed, names an unknown key, or holds a value out of range."""


class StoreError(CapsweepError):
    """A result store is missing, from another sweep, locked, or damaged."""

    exit_code = 3


FILE_SYSTEM_FAULTS: dict[int, tuple[str, str]] = {
    errno.ENOSPC: ("the disk is full", "free some space"),
    errno.EDQUOT: ("the disk quota is used up", "free some space or raise the quota"),
    errno.EROFS: ("the file system is read-only", "use a writable location"),
    errno.EACCES: ("permission denied", "fix the permissions"),
    errno.EPERM: ("operation not permitted", "fix the permissions"),
    errno.ENOENT: ("no such file or folder", "create the folder or fix the path"),
}
"""File-system faults told as one line: errno -> (what happened, what to do). Every message of a file-system fault
says them through :func:`fault_parts`."""


def fault_parts(exc: OSError) -> tuple[str, str]:
    """What happened and what to do, for the file-system fault ``exc``: from FILE_SYSTEM_FAULTS, else the system's
    own words for it."""
    return FILE_SYSTEM_FAULTS.get(exc.errno or 0, (exc.strerror or str(exc), "check the path"))


def fault_line(exc: OSError) -> str:
    """One line for a file-system fault ``exc`` no command named itself: what happened, the file it names, that the
    stored results are kept, and what to do."""
    what, fix = fault_parts(exc)
    where = f" ({exc.filename})" if exc.filename else ""
    return (f"{what}{where}; what was stored before is kept (points not yet written read as pending): {fix} and run "
            "the same command again")
