"""Where commands write files: folders made as needed, existing files never overwritten, faults as one line.

``plot --out``, ``export --netcdf/--csv``, ``examples --to`` and ``replay --out`` all go through here, so a
folder that does not exist yet is created the same way everywhere, and a file-system fault (no permission,
a file where a folder should be, a full disk) becomes one :class:`~capsweep.errors.CapsweepError` line
naming the path.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import CapsweepError, fault_parts


class FileFault(CapsweepError):
    """A file or folder a command must write cannot be written."""


def fault(path: Path, exc: OSError) -> FileFault:
    """The one-line error for an OSError met while writing ``path``."""
    what, fix = fault_parts(exc)
    return FileFault(f"cannot write {path}: {what}; {fix}")


def check_folder(folder: Path, option: str) -> Path:
    """``folder`` if it is a folder or can become one (its nearest existing ancestor is a folder)."""
    existing = next(p for p in (folder, *folder.absolute().parents) if p.exists())
    if not existing.is_dir():
        what = "is a file" if existing == folder else f"lies under the file {existing}"
        raise FileFault(f"{option} {folder} {what}; expected a folder (existing or new)")
    return folder


def make_folder(folder: Path, option: str) -> Path:
    """Create ``folder`` and its parents if missing (checked first with :func:`check_folder`)."""
    check_folder(folder, option)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise fault(folder, exc) from None
    return folder


def new_file(path: Path, option: str) -> Path:
    """``path`` for a new file: refused if it exists, its folder created if missing."""
    if path.exists():
        raise FileFault(f"{option} {path} already exists; capsweep never overwrites a file: choose another path")
    make_folder(path.parent, option)
    return path
