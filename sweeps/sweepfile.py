"""Read and validate a TOML sweep file into a :class:`Sweep`.

Every key is checked against :mod:`capsweep.registry`; an unknown key, a wrong type or an
out-of-range value raises :class:`~capsweep.errors.ConfigError` whose message names the file,
the key, the value and what is allowed.
"""

from __future__ import annotations

import hashlib
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..axes import VARIANT_KEY, Axis, key_axis, variant_axis
from ..errors import ConfigError
from ..registry import SECTIONS, Key, defaults, flatten, lookup
from ..results_schema.layout import INNER_DIMS

SWEEP_KEYS = {
    "name": "sweep name (a non-empty string)",
    "store": "path of the Zarr store directory, relative to the working directory",
    "replicates": "seeds per grid cell (integer >= 1)",
    "base_seed": "seed all point seeds derive from (integer >= 0)",
    "axis": "array of tables [[sweep.axis]] with name, key, values",
}
AXIS_KEYS = {
    "name": "dim name",
    "key": "config key it sets",
    "values": "list of values",
    "variants": "table of named variants, each a table of config overrides (instead of key and values)",
}
_DIM_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_RESERVED_DIMS = set(INNER_DIMS) | {"replicate"}


@dataclass(frozen=True)
class Sweep:
    """A validated sweep: base config (flat, every key), axes and replication."""

    name: str
    store: Path
    replicates: int
    base_seed: int
    axes: tuple[Axis, ...]
    base: dict[str, Any] = field(repr=False)
    text: str = field(repr=False)
    source: Path = Path("<memory>")
    variants: dict[str, dict[str, dict[str, Any]]] = field(default_factory=dict, repr=False)

    @property
    def text_sha256(self) -> str:
        """SHA-256 of the sweep file text."""
        return hashlib.sha256(self.text.encode()).hexdigest()


def load_sweep(path: str | Path, store: str | Path | None = None) -> Sweep:
    """Read, parse and validate the sweep file at ``path`` (``store`` overrides ``[sweep].store``)."""
    path = Path(path)
    try:
        text = path.read_text()
    except OSError as exc:
        raise ConfigError(f"cannot read sweep file {path}: {exc.strerror}") from None
    return parse_sweep(text, source=path, store=store)


def parse_sweep(text: str, source: Path = Path("<memory>"), store: str | Path | None = None) -> Sweep:
    """Validate sweep-file ``text``; ``source`` names it in messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - {"sweep", *SECTIONS})
    if unknown:
        raise ConfigError(
            f"{source}: unknown table [{unknown[0]}]; valid tables: [sweep], "
            + ", ".join(f"[{s}]" for s in SECTIONS)
        )
    base = _base_config(doc, source)
    head = _sweep_table(doc, source)
    parsed = [_axis(raw, i, source) for i, raw in enumerate(head.get("axis", []))]
    axes = tuple(axis for axis, _ in parsed)
    _check_axis_names(axes, source)
    touched = {key for _, table in parsed for overrides in table.values() for key in overrides}
    clash = sorted(touched & {a.key for a in axes})
    if clash:
        raise ConfigError(f"{source}: {clash[0]} is set both by an axis and by a variant; set it in one place")
    return Sweep(
        name=head["name"],
        store=Path(store) if store is not None else Path(head["store"]),
        replicates=head["replicates"],
        base_seed=head["base_seed"],
        axes=axes,
        base=base,
        variants={axis.name: table for axis, table in parsed if table},
        text=text,
        source=source,
    )


def _sweep_table(doc: dict[str, Any], source: Path) -> dict[str, Any]:
    head = doc.get("sweep")
    if not isinstance(head, dict):
        raise ConfigError(f"{source}: missing table [sweep] (needs at least name and store)")
    for key in head:
        if key not in SWEEP_KEYS:
            valid = ", ".join(f"sweep.{k}" for k in SWEEP_KEYS)
            raise ConfigError(f"{source}: unknown key sweep.{key}; valid keys: {valid}")
    for key in ("name", "store"):
        if not isinstance(head.get(key), str) or not head[key].strip():
            raise ConfigError(f"{source}: sweep.{key} is required: {SWEEP_KEYS[key]}")
    out = dict(head)
    out["replicates"] = _bounded_int(head, "replicates", 1, 1, source)
    out["base_seed"] = _bounded_int(head, "base_seed", 0, 0, source)
    if not isinstance(head.get("axis", []), list):
        raise ConfigError(f"{source}: sweep.axis must be written as [[sweep.axis]] tables")
    return out


def _bounded_int(head: dict[str, Any], key: str, default: int, low: int, source: Path) -> int:
    value = head.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ConfigError(f"{source}: sweep.{key} = {value!r} is not allowed: {SWEEP_KEYS[key]}")
    return value


def _base_config(doc: dict[str, Any], source: Path) -> dict[str, Any]:
    """Flat config: registry defaults overlaid with the file's sections, every value checked."""
    flat = defaults()
    for section in SECTIONS:
        node = doc.get(section, {})
        leaves = flatten(node, section + ".") if isinstance(node, dict) else {section: node}
        for path, value in leaves.items():
            flat[path] = lookup(path, where=str(source)).check(value, where=str(source))
    return flat


def _axis(raw: Any, position: int, source: Path) -> tuple[Axis, dict[str, dict[str, Any]]]:
    """One ``[[sweep.axis]]``: an Axis, plus its variant overrides (empty for a key axis)."""
    where = f"{source}: sweep.axis #{position + 1}"
    if not isinstance(raw, dict):
        raise ConfigError(f"{where} must be a table with name, key, values (or name, variants)")
    for key in raw:
        if key not in AXIS_KEYS:
            raise ConfigError(f"{where}: unknown key {key!r}; valid keys: {', '.join(AXIS_KEYS)}")
    name = raw.get("name")
    if not isinstance(name, str) or not _DIM_NAME.match(name) or name in _RESERVED_DIMS:
        raise ConfigError(
            f"{where}: name {name!r} is not allowed: a Python-style identifier other than "
            + ", ".join(sorted(_RESERVED_DIMS))
        )
    if "variants" in raw:
        return _variant_axis(raw, name, where)
    missing = [k for k in ("key", "values") if k not in raw]
    if missing:
        raise ConfigError(f"{where}: missing {', '.join(missing)} (each axis needs name, key, values, "
                          "or name and variants)")
    key, values = raw["key"], raw["values"]
    if not isinstance(key, str):
        raise ConfigError(f"{where}: key must be a dotted config key such as 'assemblies.count'")
    spec = _sweepable(key, where)
    if not isinstance(values, list) or not values:
        raise ConfigError(f"{where}: values must be a non-empty list of {spec.allowed()}")
    checked = tuple(spec.check(v, where=f"{where} ({name})") for v in values)
    if len(set(checked)) != len(checked):
        raise ConfigError(f"{where}: values of axis {name!r} repeat: {list(values)}")
    return key_axis(name, key, checked), {}


def _sweepable(key: str, where: str) -> Key:
    spec = lookup(key, where=where)
    if not spec.sweepable:
        raise ConfigError(f"{where}: {key} cannot be swept (it is fixed for the whole sweep)")
    return spec


def _variant_axis(raw: dict[str, Any], name: str, where: str) -> tuple[Axis, dict[str, dict[str, Any]]]:
    """An axis over named variants: ``variants = { full = {}, triplet_only = {"a.b" = v, ...} }``."""
    extra = sorted(set(raw) & {"key", "values"})
    table = raw["variants"]
    if extra or not isinstance(table, dict) or not table:
        raise ConfigError(f"{where}: an axis with variants takes name and a non-empty variants table only "
                          "(each variant a table of 'dotted.key' = value overrides)")
    checked: dict[str, dict[str, Any]] = {}
    for label, overrides in table.items():
        if not isinstance(overrides, dict):
            raise ConfigError(f"{where}: variant {label!r} must be a table of 'dotted.key' = value overrides")
        place = f"{where} (variant {label})"
        checked[label] = {k: _sweepable(k, place).check(v, where=place) for k, v in flatten(overrides).items()}
    return variant_axis(name, tuple(checked)), checked


def _check_axis_names(axes: tuple[Axis, ...], source: Path) -> None:
    for attr in ("name", "key"):
        labels = [getattr(a, attr) for a in axes if a.key != VARIANT_KEY or attr == "name"]
        repeated = sorted({x for x in labels if labels.count(x) > 1})
        if repeated:
            raise ConfigError(f"{source}: two axes share the {attr} {repeated[0]!r}; each axis needs its own")
