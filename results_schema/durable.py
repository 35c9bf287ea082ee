"""Durable writes and the file-system checks of a store, free of Zarr (a run checks its store path before it
imports Zarr).

Zarr's local store writes a file whole to a temporary file and renames it over the old one, so a file
is never half written; but until the file and the directory entry of the rename reach the disk, a power
cut can still take the write back. :func:`sync_written` syncs both (and every directory the write created,
up to the store's root); the store's Zarr backend calls it before each write returns, so a status written
after a batch's data marks points whose data is on disk. Zarr names its temporary files
``<file>.<uuid>.partial``; a write killed midway can leave one, which :func:`remove_strays` removes.
"""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import StoreError
from ..outputs import make_folder

STRAY_SUFFIX = ".partial"


def fsync_file(path: Path) -> None:
    """Flush the file at ``path`` to disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_dir(path: Path) -> None:
    """Flush the directory ``path`` (its entries: names created, renamed or removed in it) to disk."""
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def sync_written(path: Path, root: Path, new_dirs: bool) -> None:
    """Sync a file just written and its directory; with ``new_dirs``, every directory up to ``root`` too."""
    fsync_file(path)
    folder = path.parent
    fsync_dir(folder)
    while new_dirs and folder != root and root in folder.parents:
        folder = folder.parent
        fsync_dir(folder)


def remove_strays(root: Path) -> list[Path]:
    """Remove the temporary files that writes killed midway left in the store at ``root``; return them."""
    strays = [p for p in root.rglob(f"*{STRAY_SUFFIX}") if p.is_file()]
    for stray in strays:
        stray.unlink(missing_ok=True)
    return strays


def check_writable(path: Path) -> None:
    """Raise StoreError unless this process may write the store at ``path`` (read commands need no such check)."""
    if os.access(path, os.W_OK):
        return
    why = "is on a read-only file system" if os.statvfs(path).f_flag & os.ST_RDONLY else "is not writable by you"
    raise StoreError(f"{path} {why}; status, query, capacity, plot and export read it, run and upgrade need to "
                     "write it")


def make_store_folder(path: Path) -> None:
    """Create the folder a new store at ``path`` goes into, and its parents, as the output folders of plot and export
    are made; a file in the way or a file-system fault (permissions, a full disk) is a StoreError of one line."""
    make_folder(Path(path).absolute().parent, "store folder", StoreError)
