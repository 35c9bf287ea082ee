"""Point ids and seeds, relative to a defaults table: the one place they are computed.

Every id is relative to an :class:`IdBasis`: a *defaults table* (today's: :func:`identity_defaults`, the
registry's default of every key outside ``[execution]``), which each store records (root attr
``identity_defaults``), and the keys hashed whole. A point's id is the SHA-256 of its *id entries*
(:func:`id_entries`) and its replicate number: the keys hashed whole (those of the first table,
:data:`~capsweep.results_schema.first_defaults.FIRST_DEFAULTS`, unless the store records fewer: the stores of
schema 2.x hashed two keys fewer) with their values, and any other key only where it differs from the table.
So a key added to the registry at its default changes no id, and ids of the first stores stay valid. A
point's seed derives from ``base_seed`` and its id, so results never depend on execution order or worker
count. An existing store's ids stay relative to the basis it recorded (:func:`store_basis`).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..registry import defaults
from ..results_schema import attrs
from ..results_schema.first_defaults import FIRST_DEFAULTS
from .sweepfile import Sweep

EXECUTION = "execution."
"""Prefix of the execution settings: they never enter an id or the fingerprint."""
_ABSENT = object()


@dataclass(frozen=True)
class Point:
    """One simulation of the sweep."""

    index: tuple[int, ...]  # position along each axis, then the replicate number
    labels: dict[str, Any]  # axis name -> value, plus the replicate (capsweep.axes.REPLICATE)
    config: dict[str, Any]  # nested, fully resolved config
    point_id: str
    seed: int  # noise, initial voltages, cued members
    wiring_seed: int  # connectivity and membership: shared by every point of one replicate (paired design)


FIRST_KEYS: frozenset[str] = frozenset(FIRST_DEFAULTS)
"""The keys every id hashes whole unless its store records others (stores made before stores recorded theirs)."""


@dataclass(frozen=True)
class IdBasis:
    """What point ids are relative to: a defaults table and the keys they hash whatever their value."""

    table: dict[str, Any]  # flat key -> default, [execution] left out
    whole: frozenset[str] = field(default=FIRST_KEYS)


def identity_defaults() -> dict[str, Any]:
    """Today's defaults table: the registry default of every key that enters a point's identity."""
    return {path: value for path, value in defaults().items() if not path.startswith(EXECUTION)}


def today_basis() -> IdBasis:
    """The basis of a new store: today's defaults table, the first table's keys hashed whole."""
    return IdBasis(identity_defaults())


def identity_basis(recorded: Mapping[str, Any]) -> dict[str, Any]:
    """The defaults table ids are relative to: ``recorded`` (a store's) for the keys it holds, today's defaults for
    keys added to the registry since."""
    return {path: _from_json(recorded[path]) if path in recorded else value
            for path, value in identity_defaults().items()}


def store_basis(stored: Mapping[str, Any]) -> IdBasis:
    """The basis the ids of a store with root attrs ``stored`` rest on: the defaults table it recorded, the first
    table (:data:`FIRST_DEFAULTS`) if it records none (made before stores recorded theirs); the keys it records as
    hashed whole (an upgraded schema 2.x store), else the first table's."""
    return IdBasis(identity_basis(stored.get(attrs.IDENTITY_DEFAULTS, FIRST_DEFAULTS)),
                   frozenset(stored.get(attrs.ID_WHOLE_KEYS, FIRST_KEYS)))


def _from_json(value: Any) -> Any:
    """A recorded value as the registry holds it (JSON has lists where the registry has tuples)."""
    return tuple(value) if isinstance(value, list) else value


def id_entries(flat: Mapping[str, Any], basis: IdBasis) -> dict[str, Any]:
    """The entries of a flat config that enter its id, outside ``[execution]``: every key ``basis`` hashes whole,
    any other key where it differs from the basis's table."""
    return {path: value for path, value in flat.items() if not path.startswith(EXECUTION)
            and (path in basis.whole or basis.table.get(path, _ABSENT) != value)}


def config_text(entries: Mapping[str, Any]) -> str:
    """The canonical text of a config's id entries (:func:`id_entries`): JSON with sorted keys."""
    return json.dumps(entries, sort_keys=True)


def _id_head(text: str) -> Any:
    """SHA-256 fed with the id text of a config (:func:`config_text`) up to its replicate number."""
    return hashlib.sha256(f'{{"config": {text}, "replicate": '.encode())


def _id_of(head: Any, replicate: int) -> str:
    digest = head.copy()
    digest.update(f"{replicate}}}".encode())
    return digest.hexdigest()[:16]


def point_id(flat: Mapping[str, Any], replicate: int, basis: IdBasis | None = None) -> str:
    """16-hex-digit id: SHA-256 of ``json.dumps({"config": entries, "replicate": replicate}, sort_keys=True)``,
    where ``entries`` are the flat config's :func:`id_entries` on ``basis`` (default: today's table)."""
    # "replicate" is part of the hashed text, spelled out: renaming the dim must not change any stored id.
    entries = id_entries(flat, today_basis() if basis is None else basis)
    return _id_of(_id_head(config_text(entries)), replicate)


def point_seed(base_seed: int, pid: str) -> int:
    """Seed in [0, 2**31) derived from ``base_seed`` and the point id: the first 4 bytes (little-endian) of
    SHA-256 of ``f"{base_seed}/{pid}"``, its top bit cleared."""
    return _seed_of(_seed_head(base_seed), pid)


def _seed_head(base_seed: int) -> Any:
    return hashlib.sha256(f"{base_seed}/".encode())


def _seed_of(head: Any, pid: str) -> int:
    digest = head.copy()
    digest.update(pid.encode())
    return int.from_bytes(digest.digest()[:4], "little") & 0x7FFFFFFF


def wiring_seed(base_seed: int, replicate: int) -> int:
    """Seed of the connectivity and membership of replicate ``replicate``: shared by every grid point (paired)."""
    return point_seed(base_seed, f"wiring/{replicate}")


def ids_and_seeds(entries: Iterable[Mapping[str, Any]], shape: tuple[int, ...], base_seed: int) -> tuple[np.ndarray,
                                                                                                     np.ndarray]:
    """Every point's id (str) and seed (int64) over a grid of ``shape`` (cells, then replicates), from each cell's
    :func:`id_entries` in C order; each cell's config text is made once."""
    replicates = range(shape[-1])
    ids = np.empty((math.prod(shape[:-1]), len(replicates)), dtype=object)
    seeds = np.empty(ids.shape, dtype=np.int64)
    seed_head = _seed_head(base_seed)
    for n, cell in enumerate(entries):
        head = _id_head(config_text(cell))
        row = [_id_of(head, replicate) for replicate in replicates]
        ids[n] = row
        seeds[n] = [_seed_of(seed_head, pid) for pid in row]
    return ids.reshape(shape).astype(str), seeds.reshape(shape)


def grid_shape(sweep: Sweep) -> tuple[int, ...]:
    """Number of entries along each axis, then replicates."""
    return tuple(len(a.values) for a in sweep.axes) + (sweep.replicates,)
