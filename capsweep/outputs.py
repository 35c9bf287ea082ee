"""Where commands write files: folders made as needed, existing files never overwritten, faults as one line.

``plot --out``, ``export --netcdf/--csv``, ``examples --to``, ``replay --out`` and a new store's folder all go
through here, so a folder that does not exist yet is created the same way everywhere, and a file-system fault
(no permission, a file where a folder should be, a full disk) becomes one :class:`~capsweep.errors.CapsweepError`
line naming the path (a :class:`FileFault`, or the error class the caller names, e.g. a store's StoreError).
"""

from __future__ import annotations

from pathlib import Path

from .errors import CapsweepError, fault_parts


class FileFault(CapsweepError):
    """A file or folder a command must write cannot be written."""


def fault(path: Path, exc: OSError, error: type[CapsweepError] = FileFault) -> CapsweepError:
    """The one-line error (of class ``error``) for an OSError met while writing ``path``."""
    what, fix = fault_parts(exc)
    return error(f"cannot write {path}: {what}; {fix}")


def check_folder(folder: Path, option: str, error: type[CapsweepError] = FileFault) -> Path:
    """``folder`` if it is a folder or can become one (its nearest existing ancestor is a folder); else an ``error``
    naming ``option`` (the option or role that gave the folder)."""
    existing = next(p for p in (folder, *folder.absolute().parents) if p.exists())
    if not existing.is_dir():
        what = "is a file" if existing == folder else f"lies under the file {existing}"
        raise error(f"{option} {folder} {what}; expected a folder (existing or new)")
    return folder


def make_folder(folder: Path, option: str, error: type[CapsweepError] = FileFault) -> Path:
    """Create ``folder`` and its parents if missing (checked first with :func:`check_folder`); faults as ``error``."""
    check_folder(folder, option, error)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise fault(folder, exc, error) from None
    return folder


def new_file(path: Path, option: str) -> Path:
    """``path`` for a new file: refused if it exists, its folder created if missing."""
    if path.exists():
        raise FileFault(f"{option} {path} already exists; capsweep never overwrites a file: choose another path")
    make_folder(path.parent, option)
    return path
