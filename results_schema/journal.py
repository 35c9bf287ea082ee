"""The journal that makes a change of a store's metadata crash-safe: staged files, one atomic commit, replay.

A change (an upgrade of the store's schema) writes every changed metadata file into
``<store>/.capsweep.upgrade/``, each synced, then the folder renames and the list of those files as ``COMMIT``
(one atomic rename: the commit point). It then renames the folders, moves each file over its old one and
removes the journal. Killed before the commit, the store is the old one and the journal is removed by the next
writer (:func:`discard`); killed after it, the next open of the store replays the renames and moves
(:func:`finish`: each is atomic and repeating them is harmless), so every reader sees the old layout or the new
one. This module knows files only, not what the change means.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

from ..errors import StoreError, fault_parts
from .durable import fsync_dir, fsync_file

JOURNAL = ".capsweep.upgrade"
"""The journal directory inside the store."""
COMMIT = "COMMIT"


def write(path: Path, changed: dict[str, dict[str, Any]], renamed: list[tuple[str, str]]) -> None:
    """Stage the metadata files ``changed`` (path in the store -> JSON) in the journal of the store at ``path``,
    each synced, then commit them and the folder renames ``renamed`` ((old, new), in order) by one rename."""
    journal = path / JOURNAL
    journal.mkdir()
    for name, meta in changed.items():
        target = journal / name
        target.parent.mkdir(exist_ok=True)
        target.write_text(json.dumps(meta, indent=2))
        fsync_file(target)
        fsync_dir(target.parent)
    partial = journal / f"{COMMIT}.partial"
    partial.write_text(json.dumps({"renamed": renamed, "files": list(changed)}))
    fsync_file(partial)
    os.replace(partial, journal / COMMIT)
    fsync_dir(journal)


def finish(path: Path, target_schema: str) -> None:
    """Finish a change of the store at ``path`` (to ``target_schema``) cut short after its commit (nothing to do
    otherwise).

    Raises StoreError if the store cannot be written (the change is then half applied on disk).
    """
    if (path / JOURNAL / COMMIT).exists():
        try:
            apply(path)
        except OSError as exc:
            raise StoreError(f"{path} was being upgraded to store schema {target_schema} when it stopped, and the "
                             f"upgrade cannot be finished here ({fault_parts(exc)[0]}); run `capsweep upgrade "
                             f"{path}` where the store is writable") from None


def discard(path: Path) -> None:
    """Remove a journal that never reached its commit (the store is the old one); the lock holder only."""
    journal = path / JOURNAL
    if journal.exists() and not (journal / COMMIT).exists():
        shutil.rmtree(journal)


def apply(path: Path) -> None:
    """Rename the committed folders, move each staged file over its old one (what was done already is skipped),
    then remove the journal."""
    journal = path / JOURNAL
    try:
        commit = json.loads((journal / COMMIT).read_text())
    except FileNotFoundError:  # another process finished it
        return
    for old, new in commit["renamed"]:
        if (path / old).exists() and not (path / new).exists():
            os.rename(path / old, path / new)
            fsync_dir(path)
    for name in commit["files"]:
        staged, target = journal / name, path / name
        target.parent.mkdir(exist_ok=True)
        try:
            os.replace(staged, target)
        except FileNotFoundError:
            continue
        fsync_dir(target.parent)
    fsync_dir(path)
    (journal / COMMIT).unlink(missing_ok=True)
    shutil.rmtree(journal, ignore_errors=True)
