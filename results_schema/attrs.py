"""The store's root attributes: every name, defined once, and the one function that assembles them.

Three parts make a store's root attrs: the store's own (schema version, grid fingerprint, axes, rate bin,
creation time, package versions, the CF global attributes), the record of the sweep that made it
(its name, file and text, replicates, base seed, metric definitions, count search), and what its point
ids rest on (defaults table, resolved base config, axis settings, id scheme); the sweep side hands the
last two over through :func:`sweep_record` and :func:`identity_record`. Readers use the names below.
Import-light (no Zarr): the sweep side reads and records attrs without loading the store's libraries.
"""

from __future__ import annotations

import importlib.metadata
from typing import Any

from .definitions import DEFINITIONS as METRIC_DEFINITIONS
from .layout import GridSpec

SCHEMA = "capsweep_schema_version"
FINGERPRINT = "capsweep_fingerprint"
AXES = "sweep_axes"
CREATED = "created_utc"
TIME_BIN = "time_bin_s"
CONVENTIONS, TITLE, HISTORY = "Conventions", "title", "history"
"""The CF global attributes."""
SWEEP_NAME = "sweep_name"
SWEEP_FILE = "sweep_file"
SWEEP_TEXT = "sweep_text"
SWEEP_SHA256 = "sweep_sha256"
REPLICATES = "replicates"
BASE_SEED = "base_seed"
CREATED_BY = "created_by"
DEFINITIONS = "metric_definitions"
COUNT_SEARCH = "count_search"
IDENTITY_DEFAULTS = "identity_defaults"
"""The defaults table (flat key -> default, execution settings left out) the store's point ids are relative to."""
ID_WHOLE_KEYS = "id_whole_keys"
"""The keys every point id of the store hashes with their value, whatever it is (the first stores hashed whole
configs); a store without this attr: the keys of ``first_defaults.FIRST_DEFAULTS``. Only an upgrade writes it."""
BASE_CONFIG = "base_config"
"""The sweep's resolved base config (flat key -> value, execution settings left out)."""
AXIS_SETTINGS = "axis_settings"
"""Per axis: name, config key, values, and for an axis over variants each variant's overrides."""
POINT_ID_SCHEME = "point_id_scheme"
"""How the stored point ids were made (:data:`ID_SCHEME`)."""
ID_SCHEME = ("sha256(json.dumps({'config': the point's resolved config minus [execution] entries, keeping the keys "
             "of id_whole_keys (default: the first defaults table, store schema 3.0) and any other key where it "
             "differs from identity_defaults, 'replicate': replicate}, sort_keys=True))[:16]; seed: "
             "sha256(f'{base_seed}/{point_id}')[:4] little-endian & 0x7FFFFFFF")
"""The value of :data:`POINT_ID_SCHEME` this capsweep writes (see ``capsweep.sweeps.identity``)."""
AXIS_KEY = "config_key"
"""Attribute of an axis coordinate (not a root attr): the config key the axis sets."""
RELATIVE_TO = "relative_to"
"""Attribute of a variable or coordinate of units "1" (not a root attr): the unit its values are multiples of."""

CF_CONVENTIONS = "CF-1.11"  # the newest CF version the IOOS compliance checker (6.1) has a suite for
VERSIONED_PACKAGES: tuple[str, ...] = ("capsweep", "brian2", "numpy", "xarray", "zarr", "dask")
RESERVED: frozenset[str] = frozenset(
    {SCHEMA, FINGERPRINT, AXES, CREATED, TIME_BIN, CONVENTIONS, TITLE, HISTORY}
    | {f"version_{name}" for name in VERSIONED_PACKAGES}
)
"""The store's own root attrs: a sweep record may not set them."""


def sweep_record(name: str, file: str, text: str, sha256: str, replicates: int, base_seed: int,
                 count_search: dict[str, Any] | None) -> dict[str, Any]:
    """The record of the sweep that makes a store (a :class:`GridSpec`'s ``attrs``), by the names above."""
    return {
        SWEEP_NAME: name, SWEEP_FILE: file, SWEEP_TEXT: text, SWEEP_SHA256: sha256, REPLICATES: replicates,
        BASE_SEED: base_seed, CREATED_BY: "capsweep run", DEFINITIONS: METRIC_DEFINITIONS,
        **({COUNT_SEARCH: count_search} if count_search else {}),
    }


def identity_record(defaults: dict[str, Any], base: dict[str, Any], axes: list[dict[str, Any]]) -> dict[str, Any]:
    """What a store's ids rest on, by the names above: the defaults table, the resolved base config, the axes'
    settings; with them every point's resolved config and id can be rebuilt without the sweep file."""
    return {IDENTITY_DEFAULTS: defaults, BASE_CONFIG: base, AXIS_SETTINGS: axes, POINT_ID_SCHEME: ID_SCHEME}


def root_attrs(grid: GridSpec, created_utc: str) -> dict[str, Any]:
    """Every root attr of a new store of ``grid`` created at ``created_utc`` (ISO 8601, UTC) but the schema version,
    which the store writes last (it marks a finished template): the store's own, then the sweep record."""
    return {
        **cf_root_attrs(str(grid.attrs.get(SWEEP_NAME, "")), created_utc),
        FINGERPRINT: grid.fingerprint,
        AXES: [axis.name for axis in grid.axes],
        TIME_BIN: float(grid.time_bin_s),
        CREATED: created_utc,
        **{f"version_{name}": package_version(name) for name in VERSIONED_PACKAGES},
        **grid.attrs,
    }


def cf_root_attrs(sweep_name: str, created_utc: str) -> dict[str, str]:
    """The CF global attributes of a store of sweep ``sweep_name`` created at ``created_utc`` (ISO 8601, UTC)."""
    return {
        CONVENTIONS: CF_CONVENTIONS,
        TITLE: f"capsweep results of sweep {sweep_name or '(unnamed)'}: memory capacity of a plastic spiking network",
        HISTORY: f"{created_utc} capsweep {package_version('capsweep')}: store created",
    }


def package_version(name: str) -> str:
    """The installed version of package ``name``; 'unknown' if it is not installed."""
    try:
        return importlib.metadata.version(name)
    except importlib.metadata.PackageNotFoundError:
        return "unknown"
