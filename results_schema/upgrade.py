"""Stores of earlier schema versions: read them as this version's layout, and upgrade them in place.

Each schema version that this capsweep reads and that is not the current one has one :class:`Step` to the
next version, in :data:`STEPS`; a store of version ``v`` passes through ``STEPS[v]``, then the step from its
result, and so on to :data:`layout.SCHEMA_VERSION`. A new schema version adds its step here and its name to
:data:`layout.READABLE`. A step changes metadata only (variable attrs, root attrs it records where the store has
none, variables added as unwritten arrays: every entry reads as the fill value, a variable renamed by moving its
folder), never a stored value, so an upgrade leaves every stored value bitwise as it was.

The same steps serve two readers: :func:`as_current` applies them to an opened xarray Dataset (read
commands on a store they may not change), :func:`upgrade_store` to the store's Zarr metadata on disk.

An upgrade on disk is crash-safe by :mod:`~capsweep.results_schema.journal`: every changed metadata file
(each array's ``zarr.json``, the root's last, with the consolidated metadata) and the folder renames are staged
and committed at once, so a kill -9 at any moment leaves the old layout or the new one.
"""

from __future__ import annotations

import copy
import json
from collections.abc import Callable, Collection
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..errors import StoreError
from ..flags import STATUSES
from ..locks import store_lock
from ..registry import cf_unit, in_units_of, relative_scale
from . import attrs, journal, layout
from .durable import check_writable
from .first_defaults import schema_2_defaults

if TYPE_CHECKING:
    import xarray as xr

ROOT_META = "zarr.json"


@dataclass(frozen=True)
class Step:
    """What one schema version changes in the layout of the version before it."""

    changes: Callable[[dict[str, dict[str, Any]]], dict[str, dict[str, Any]]]
    """Stored variables' attrs (name -> attrs) -> the attrs this step sets, by variable."""
    added: tuple[str, ...] = field(default=())
    """Variables the step adds, unwritten (every entry the fill value), with the current layout's dtype and attrs."""
    renamed: tuple[tuple[str, str], ...] = field(default=())
    """(old name, new name): the variable's stored values move to the new name, bitwise (before ``added``)."""
    root: Callable[[], dict[str, Any]] = dict
    """Root attrs the step records where the store has none of that name."""
    adds_missing: bool = False
    """Also add, unwritten, every variable of the current layout the store still lacks (the step to the current
    version: a variable new in that version needs no entry here)."""

    def adds(self, stored: Collection[str]) -> list[str]:
        """The variables this step adds to a store holding the variables ``stored`` (after its renames)."""
        wanted = (*self.added, *(current_variables() if self.adds_missing else ()))
        return [name for name in dict.fromkeys(wanted) if name not in stored]


def current_variables() -> tuple[str, ...]:
    """Every per-point variable of the current layout, status and the string variables included."""
    from .store import stored_variables  # the store module imports Zarr: only an upgrade needs it

    return stored_variables()


def _status_flags(stored: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """2.0 -> 2.1: the status ``unneeded`` joins the status flags."""
    return {layout.STATUS.name: {"flag_values": list(range(len(STATUSES))), "flag_meanings": " ".join(STATUSES)}}


def _parseable_units(stored: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """3.0 -> 3.1: a unit relative to g_leak becomes "1", its scale named in ``relative_to`` and the long name."""
    changed = {}
    for name, described in stored.items():
        unit = str(described.get("units", ""))
        scale = relative_scale(unit)
        if scale:
            changed[name] = {"units": cf_unit(unit), attrs.RELATIVE_TO: scale,
                             "long_name": str(described.get("long_name", "")) + in_units_of(scale)}
    return changed


def _recall_test(stored: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """2.1 -> 3.0: the layout's descriptions of the variables the recall test redefined; retention_recalled keeps the
    counts of the overlap rule, which its comment says."""
    names = ("overlap_recalled_count", "retention_recalled")
    changed = {name: {key: _variable_described(name)[key] for key in ("long_name", "units")} for name in names}
    changed["retention_recalled"]["comment"] = ("points written before store schema 3.0 (capsweep_version '') "
                                                "count by the overlap rule (see overlap_recalled_count)")
    return changed


def _schema_2_identity() -> dict[str, Any]:
    """2.1 -> 3.0: what a 2.x store's point ids rest on, which 2.x stores did not record: their defaults table, whose
    every key the ids hash whole (3.0 added two keys; without this the ids of today's table would differ)."""
    table = schema_2_defaults()
    return {attrs.IDENTITY_DEFAULTS: table, attrs.ID_WHOLE_KEYS: sorted(table)}


def _unchanged(stored: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """A step that changes no stored variable's attrs."""
    return {}


def _variable_described(name: str) -> dict[str, Any]:
    from .store import variable_attrs  # the store module imports Zarr: only an upgrade needs it

    return variable_attrs(layout.BY_NAME[name])


_PER_ASSEMBLY_3_0 = ("recall_state", "evoked_completion_hz", "recall_p_value", "recall_p_cells", "recall_p_times",
                     "recall_z", "precue_rate_hz", "stuck_onset_s", "test_position")
_ENGINE_3_0 = ("threads", "weight_between", "upper_share_within", "upper_share_between", "upper_share_other")
STEPS: dict[str, Step] = {
    "2.0": Step(_status_flags, ("setup_time_s",)),
    # The recall test of 3.0 did not run for a 2.x point: its variables start missing, and the count of 2.x
    # (the overlap rule) moves to the name 3.0 gives that rule. So do the thread count and the weight variables
    # that 3.0 added (no release wrote 3.0 without them).
    "2.1": Step(_recall_test,
                ("recalled_count", "already_active_count", "stuck_count", *_PER_ASSEMBLY_3_0, *_ENGINE_3_0),
                renamed=(("recalled_count", "overlap_recalled_count"),), root=_schema_2_identity),
    "3.0": Step(_parseable_units, (layout.WRITER_VERSION,)),
    # Blocked learning and the retention designs: their variables start missing (the age variables' dim, as long as
    # assembly, has no coordinate array; retention_tested of an earlier point is missing, not the assembly count:
    # the retention tables count every assembly there, as every test then cued every one).
    "3.1": Step(_unchanged, ("retention_tested", "age_recalled", "age_tested", "age_score", "age_s"),
                adds_missing=True),
}
"""The step from each earlier readable schema version (:data:`layout.READABLE`) to the next one."""


def added_attrs(name: str) -> dict[str, Any]:
    """The attrs of a variable a step adds: the current layout's (a string variable: its units and long name)."""
    if name in layout.BY_NAME:
        return _variable_described(name)
    from .store import STRING_VARIABLES

    return {"units": "1", "long_name": STRING_VARIABLES[name]}


def _inner(name: str) -> tuple[str, ...]:
    """The inner dim of the current layout's variable ``name`` (none for a string variable), as a tuple."""
    var = layout.BY_NAME.get(name)
    return () if var is None or var.inner is None else (var.inner,)


def chain(version: str) -> list[Step]:
    """The steps from schema ``version`` to the current one (StoreError for a version this capsweep cannot read)."""
    steps = []
    while version != layout.SCHEMA_VERSION:
        if version not in STEPS:
            raise StoreError(f"store schema version {version} is not one this capsweep reads "
                             f"({', '.join(layout.READABLE)}); use the capsweep version that made it")
        steps.append(STEPS[version])
        version = layout.READABLE[layout.READABLE.index(version) + 1]
    return steps


def as_current(ds: xr.Dataset) -> xr.Dataset:
    """``ds``, a store of a readable schema opened by xarray, as this schema lays it out (in memory only)."""
    import xarray as xr

    for step in chain(str(ds.attrs[attrs.SCHEMA])):
        ds.attrs = {**step.root(), **ds.attrs}
        ds = ds.rename_vars(dict(step.renamed))
        for name, changed in step.changes({str(n): dict(ds[n].attrs) for n in ds.variables}).items():
            ds[name].attrs.update(changed)
        for name in step.adds([str(n) for n in ds.variables]):
            described = {k: v for k, v in added_attrs(name).items() if k != "_FillValue"}
            text = name not in layout.BY_NAME
            dims = (*ds[layout.STATUS.name].dims, *_inner(name))
            shape = [ds.sizes[layout.SIZED_LIKE.get(str(d), str(d))] for d in dims]
            ds[name] = xr.DataArray(np.full(shape, "" if text else np.nan, dtype=object if text else float), dims=dims,
                                    attrs=described)
    return ds


def upgrade_store(path: str | Path) -> tuple[str, str]:
    """Upgrade the store at ``path`` in place to the current schema; return (version before, version after).

    Takes the store's lock. Stored values are untouched; see the module docstring for the journal that makes it
    crash-safe. Raises StoreError for a store this capsweep cannot read or write, or one another run holds.
    """
    path = Path(path)
    if not path.is_dir():
        raise StoreError(f"no result store at {path}")
    check_writable(path)
    with store_lock(path):
        journal.finish(path, layout.SCHEMA_VERSION)
        journal.discard(path)
        metas = _read_metadata(path)
        before = str(metas[ROOT_META]["attributes"][attrs.SCHEMA])
        steps = chain(before)
        if steps:
            journal.write(path, _upgraded(metas, steps, before), [pair for step in steps for pair in step.renamed])
            journal.apply(path)
    return before, layout.SCHEMA_VERSION


def _read_metadata(path: Path) -> dict[str, dict[str, Any]]:
    """Every metadata file of the store: relative path -> its JSON (the root's as ``zarr.json``)."""
    try:
        root = json.loads((path / ROOT_META).read_text())
        names = list(root["consolidated_metadata"]["metadata"])
        metas = {f"{name}/{ROOT_META}": json.loads((path / name / ROOT_META).read_text()) for name in names}
    except (OSError, KeyError, TypeError, ValueError) as exc:
        raise StoreError(f"{path} is not a capsweep result store whose metadata can be read ({exc})") from None
    if attrs.SCHEMA not in root.get("attributes", {}):
        raise StoreError(f"{path} is not a capsweep result store (its root attributes lack {attrs.SCHEMA})")
    return {ROOT_META: root, **metas}


def _upgraded(metas: dict[str, dict[str, Any]], steps: list[Step], before: str) -> dict[str, dict[str, Any]]:
    """The metadata files that ``steps`` change, as they are afterwards (root last)."""
    root = copy.deepcopy(metas[ROOT_META])
    arrays = {name.split("/")[0]: copy.deepcopy(meta) for name, meta in metas.items() if name != ROOT_META}
    touched: set[str] = set()
    for step in steps:
        root["attributes"] = {**step.root(), **root["attributes"]}
        for old, new in step.renamed:
            arrays[new] = arrays.pop(old)
            arrays[new]["attributes"] = {**arrays[new]["attributes"], **_variable_described(new)}
            touched.add(new)
        for name, changed in step.changes({n: a["attributes"] for n, a in arrays.items()}).items():
            arrays[name]["attributes"].update(changed)
            touched.add(name)
        for name in step.adds(arrays):
            arrays[name] = _unwritten(name, arrays)
            touched.add(name)
    now = datetime.now(UTC).isoformat(timespec="seconds")
    history = f"{root['attributes'].get(attrs.HISTORY, '')}\n{now} capsweep {attrs.package_version('capsweep')}: " \
              f"upgraded from store schema {before} to {layout.SCHEMA_VERSION}"
    root["attributes"].update({attrs.SCHEMA: layout.SCHEMA_VERSION, attrs.HISTORY: history.strip()})
    root["consolidated_metadata"]["metadata"] = arrays
    return {**{f"{name}/{ROOT_META}": arrays[name] for name in sorted(touched)}, ROOT_META: root}


def _unwritten(name: str, arrays: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The metadata of the added variable ``name`` in a store of the variables ``arrays`` (name -> metadata): the
    layout's dtype, fill value and attrs, over the status's sweep dims and the stored size of its inner dim."""
    from .store import unwritten_array

    status = arrays[layout.STATUS.name]
    inner = _inner(name)
    shape = (*status["shape"], *(arrays[layout.SIZED_LIKE.get(dim, dim)]["shape"][0] for dim in inner))
    return unwritten_array(name, tuple(shape), (*status["dimension_names"], *inner))
