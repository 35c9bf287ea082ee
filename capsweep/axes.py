"""Sweep axes: a dim name, the config key it sets (or named variants), its values, units and long name.

An axis carries its own description, so the store that writes its coordinate needs no registry. A
combination of values of the axes other than the assembly count is a *condition*: capacity is a
property of a condition, measured along its counts.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .registry import BY_PATH, cf_unit, in_units_of, relative_scale

COUNT_KEY = "assemblies.count"
"""The config key of an assembly-count axis (the axis capacity is measured along)."""
REPLICATE = "replicate"
"""The sweep dim after the axes: independent seeds of one grid point."""
VARIANT_KEY = "variants"
"""The ``key`` of an axis over named variants (each a table of config overrides)."""


@dataclass(frozen=True)
class Axis:
    """One sweep axis: dim name, config key, coordinate values, and the coordinate's CF description."""

    name: str
    key: str
    values: tuple[Any, ...]
    units: str = "1"
    long_name: str = ""
    scale: str = ""  # for units "1": the unit the values are multiples of, e.g. g_leak ('' if none)


def key_axis(name: str, key: str, values: tuple[Any, ...]) -> Axis:
    """An axis over one registry key; units and long name are the key's (a weight's units "1", its scale named)."""
    spec = BY_PATH[key]
    scale = relative_scale(spec.unit)
    return Axis(name, key, tuple(values), cf_unit(spec.unit), spec.description + in_units_of(scale), scale)


def variant_axis(name: str, labels: tuple[str, ...]) -> Axis:
    """An axis over named variants of the config."""
    long_name = f"named variant of the config (overrides listed in the sweep file's axis {name!r})"
    return Axis(name, VARIANT_KEY, tuple(labels), "1", long_name)
