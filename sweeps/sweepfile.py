"""Read and validate a TOML sweep file into a :class:`Sweep`.

Every key is checked against :mod:`capsweep.registry`; an unknown key, a wrong type or an
out-of-range value raises :class:`~capsweep.errors.ConfigError` whose message names the file,
the key, the value and what is allowed. A value that is allowed but outside its key's plausible range
(a likely unit slip) only warns (:class:`~capsweep.registry.ImplausibleValue`), unless the file lists the key
in ``[sweep] quiet_warnings``.
"""

from __future__ import annotations

import hashlib
import keyword
import tomllib
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..axes import COUNT_KEY, REPLICATE, VARIANT_KEY, Axis, key_axis, variant_axis
from ..controls import AS_IS, BY_NAME, CONTROL_DIM, control_axis
from ..errors import ConfigError
from ..registry import BY_PATH, SECTIONS, ImplausibleValue, Key, did_you_mean, flatten, lookup
from ..registry import defaults as registry_defaults
from ..results_schema.layout import INNER_DIMS

SWEEP_KEYS = {
    "name": "sweep name (a non-empty string)",
    "store": "path of the Zarr store directory, relative to the working directory",
    "replicates": "seeds per grid point (integer >= 1)",
    "base_seed": "seed all point seeds derive from (integer >= 0)",
    "axis": "array of tables [[sweep.axis]] with name, key, values",
    "quiet_warnings": "list of config keys whose plausibility warnings are not shown, e.g. [\"protocol.hold_s\"]",
}
AXIS_KEYS = {
    "name": "dim name",
    "key": "config key it sets",
    "values": "list of values",
    "variants": "table of named variants, each a table of config overrides (instead of key and values)",
    "search": "adaptive capacity search over assemblies.count instead of values: "
              "{low = 1, high = 32, start = 1, method = \"scan\"} (start: a count, or \"prescreen\" for the "
              "prescreen's stability bound; method: \"scan\" (exact), \"bisect\" or \"grow\" (double from start "
              "until a count fails, high the ceiling; both assume monotone success); first_replicates = 3 runs "
              "3 replicates per count and more_replicates (default 2) more while their 95 % Wilson interval holds "
              "the pass fraction, up to sweep.replicates)",
}
CONTROLS_TABLE = "controls"
"""The sweep file's table that adds controls beside every condition."""
CONTROL_KEYS = {
    "kinds": "non-empty list of control kinds, each added beside every condition on the dim "
             f"{CONTROL_DIM!r}: " + ", ".join(repr(k) for k in BY_NAME),
}
SEARCH_KEYS = ("low", "high", "start", "method", "first_replicates", "more_replicates")
SEARCH_METHODS = ("scan", "bisect", "grow")
"""How a count search moves: see ``capsweep.sweeps.search``."""
DEFAULT_MORE_REPLICATES = 2
"""Replicates a count search adds per round to an undecided count (``search.more_replicates``)."""
PRESCREEN_START = "prescreen"
"""``start`` value that seeds a count search with the prescreen's stability bound."""
_RESERVED_DIMS = set(INNER_DIMS) | {REPLICATE, CONTROL_DIM}


@dataclass(frozen=True)
class CountSearch:
    """An adaptive capacity search over the count axis ``axis`` (its values: every count from low to high)."""

    axis: str
    start: int | None  # count probed first (bisect) or scanned up to at once (scan); None: the prescreen's bound
    method: str = "scan"  # one of SEARCH_METHODS
    first_replicates: int | None = None  # replicates a probed count runs first; None: all of them at once
    more_replicates: int | None = None  # replicates added while the count is undecided (with first_replicates)

    @property
    def replicate_rule(self) -> tuple[int, int] | None:
        """(first, more) replicates per probed count, or None when every replicate runs at once."""
        if self.first_replicates is None:
            return None
        return self.first_replicates, self.more_replicates or DEFAULT_MORE_REPLICATES


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
    search: CountSearch | None = None
    explicit: frozenset[str] = frozenset()  # keys the file's tables set (the others hold their defaults)

    @property
    def text_sha256(self) -> str:
        """SHA-256 of the sweep file text."""
        return hashlib.sha256(self.text.encode()).hexdigest()

    @property
    def count_dim(self) -> str | None:
        """Name of the axis over ``assemblies.count`` (capacity is measured along it), if any."""
        return next((a.name for a in self.axes if a.key == COUNT_KEY), None)


def load_sweep(path: str | Path, store: str | Path | None = None) -> Sweep:
    """Read, parse and validate the sweep file at ``path`` (``store`` overrides ``[sweep].store``)."""
    path = Path(path)
    try:
        text = path.read_text()
    except OSError as exc:
        raise ConfigError(f"cannot read sweep file {path}: {exc.strerror}") from None
    return parse_sweep(text, source=path, store=store)


def parse_sweep(text: str, source: Path = Path("<memory>"), store: str | Path | None = None,
                defaults: Mapping[str, Any] | None = None) -> Sweep:
    """Validate sweep-file ``text``; ``source`` names it in messages. Keys the file leaves out take ``defaults`` (a
    flat table of every key; default: the registry's)."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - {"sweep", CONTROLS_TABLE, *SECTIONS})
    if unknown:
        hint = did_you_mean(f"[{unknown[0]}]", [f"[{s}]" for s in ("sweep", CONTROLS_TABLE, *SECTIONS)],
                            "valid tables")
        raise ConfigError(f"{source}: unknown table [{unknown[0]}]; {hint}")
    base, explicit = _base_config(doc, source, registry_defaults() if defaults is None else defaults)
    head = _sweep_table(doc, source)
    parsed = [_axis(raw, i, source) for i, raw in enumerate(head.get("axis", []))]
    axes = tuple(axis for axis, _ in parsed)
    _check_axis_names(axes, source)
    touched = {key for _, table in parsed for overrides in table.values() for key in overrides}
    clash = sorted(touched & {a.key for a in axes})
    if clash:
        raise ConfigError(f"{source}: {clash[0]} is set both by an axis and by a variant; set it in one place")
    parsed += _controls(doc, source)  # last: a control's overrides win over the axes it contradicts
    axes = tuple(axis for axis, _ in parsed)
    sweep = Sweep(
        name=head["name"],
        store=Path(store) if store is not None else Path(head["store"]),
        replicates=head["replicates"],
        base_seed=head["base_seed"],
        axes=axes,
        base=base,
        variants={axis.name: table for axis, table in parsed if table},
        search=_count_search(head.get("axis", []), axes, head["replicates"], source),
        text=text,
        source=source,
        explicit=explicit,
    )
    _warn_implausible(sweep, head["quiet_warnings"])
    return sweep


def _warn_implausible(sweep: Sweep, quiet: frozenset[str]) -> None:
    """Warn (ImplausibleValue, one line each) about values outside their key's plausible range, unless quieted."""
    settings = [(sweep.base, str(sweep.source))]
    settings += [({axis.key: value}, f"{sweep.source} (axis {axis.name})")
                 for axis in sweep.axes if axis.key != VARIANT_KEY for value in axis.values]
    settings += [(overrides, f"{sweep.source} (variant {label})")
                 for table in sweep.variants.values() for label, overrides in table.items()]
    for values, where in settings:
        for path, value in values.items():
            message = BY_PATH[path].implausible(value, where)
            if message and path not in quiet:
                warnings.warn(f'{message}; to silence: [sweep] quiet_warnings = ["{path}"]', ImplausibleValue,
                              stacklevel=2)


def _sweep_table(doc: dict[str, Any], source: Path) -> dict[str, Any]:
    head = doc.get("sweep")
    if not isinstance(head, dict):
        raise ConfigError(f"{source}: missing table [sweep] (needs at least name and store)")
    for key in head:
        if key not in SWEEP_KEYS:
            hint = did_you_mean(f"sweep.{key}", (f"sweep.{k}" for k in SWEEP_KEYS))
            raise ConfigError(f"{source}: unknown key sweep.{key}; {hint}")
    for key in ("name", "store"):
        if not isinstance(head.get(key), str) or not head[key].strip():
            raise ConfigError(f"{source}: sweep.{key} is required: {SWEEP_KEYS[key]}")
    out = dict(head)
    out["replicates"] = _bounded_int(head, "replicates", 1, 1, source)
    out["base_seed"] = _bounded_int(head, "base_seed", 0, 0, source)
    out["quiet_warnings"] = _quiet_warnings(head, source)
    if not isinstance(head.get("axis", []), list):
        raise ConfigError(f"{source}: sweep.axis must be written as [[sweep.axis]] tables")
    return out


def _bounded_int(head: dict[str, Any], key: str, default: int, low: int, source: Path) -> int:
    value = head.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ConfigError(f"{source}: sweep.{key} = {value!r} is not allowed: {SWEEP_KEYS[key]}")
    return value


def _quiet_warnings(head: dict[str, Any], source: Path) -> frozenset[str]:
    """The config keys listed in ``sweep.quiet_warnings``, each checked against the registry."""
    keys = head.get("quiet_warnings", [])
    if not isinstance(keys, list) or not all(isinstance(k, str) for k in keys):
        raise ConfigError(f"{source}: sweep.quiet_warnings = {keys!r} is not allowed: {SWEEP_KEYS['quiet_warnings']}")
    return frozenset(lookup(k, where=f"{source} (sweep.quiet_warnings)").path for k in keys)


def _base_config(doc: dict[str, Any], source: Path, defaults: Mapping[str, Any]) -> tuple[dict[str, Any],
                                                                                           frozenset[str]]:
    """Flat config: ``defaults`` overlaid with the file's sections, every value checked; and the keys the file set."""
    flat = dict(defaults)
    explicit = set()
    for section in SECTIONS:
        node = doc.get(section, {})
        leaves = flatten(node, section + ".") if isinstance(node, dict) else {section: node}
        for path, value in leaves.items():
            flat[path] = lookup(path, where=str(source)).check(value, where=str(source))
            explicit.add(path)
    return flat, frozenset(explicit)


def _axis(raw: Any, position: int, source: Path) -> tuple[Axis, dict[str, dict[str, Any]]]:
    """One ``[[sweep.axis]]``: an Axis, plus its variant overrides (empty for a key axis)."""
    where = f"{source}: sweep.axis #{position + 1}"
    if not isinstance(raw, dict):
        raise ConfigError(f"{where} must be a table with name, key, values (or name, variants)")
    for key in raw:
        if key not in AXIS_KEYS:
            raise ConfigError(f"{where}: unknown key {key!r}; {did_you_mean(key, AXIS_KEYS)}")
    name = raw.get("name")
    if not isinstance(name, str) or not name.isidentifier() or keyword.iskeyword(name) or name in _RESERVED_DIMS:
        raise ConfigError(
            f"{where}: name {name!r} is not allowed: a Python identifier (letters of any script, digits, '_'; not "
            "a keyword) other than "
            + ", ".join(sorted(_RESERVED_DIMS))
        )
    if "variants" in raw:
        return _variant_axis(raw, name, where)
    if "search" in raw:
        raw = {**raw, "values": _search_values(raw, where)}
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


def _controls(doc: dict[str, Any], source: Path) -> list[tuple[Axis, dict[str, dict[str, Any]]]]:
    """The control axis that the ``[controls]`` table asks for, with each kind's overrides (none without it)."""
    if CONTROLS_TABLE not in doc:
        return []
    table, where = doc[CONTROLS_TABLE], f"{source}: [{CONTROLS_TABLE}]"
    unknown = sorted(set(table) - set(CONTROL_KEYS)) if isinstance(table, dict) else []
    if unknown:
        raise ConfigError(f"{where}: unknown key {unknown[0]!r}; {did_you_mean(unknown[0], CONTROL_KEYS)}")
    kinds = table.get("kinds") if isinstance(table, dict) else None
    if not isinstance(kinds, list) or not kinds or not all(isinstance(k, str) for k in kinds) \
            or len(set(kinds)) != len(kinds):
        raise ConfigError(f"{where}: kinds = {kinds!r} is not allowed: {CONTROL_KEYS['kinds']}, none repeated")
    for kind in kinds:
        if kind not in BY_NAME:
            raise ConfigError(f"{where}: unknown control kind {kind!r}; {did_you_mean(kind, BY_NAME, 'valid kinds')}")
    variants = {AS_IS: {}, **{kind: {k: _sweepable(k, where).check(v, where=where)
                                     for k, v in BY_NAME[kind].overrides.items()} for kind in kinds}}
    return [(control_axis(tuple(variants)), variants)]


def _check_axis_names(axes: tuple[Axis, ...], source: Path) -> None:
    for attr in ("name", "key"):
        labels = [getattr(a, attr) for a in axes if a.key != VARIANT_KEY or attr == "name"]
        repeated = sorted({x for x in labels if labels.count(x) > 1})
        if repeated:
            raise ConfigError(f"{source}: two axes share the {attr} {repeated[0]!r}; each axis needs its own")


def _search_values(raw: dict[str, Any], where: str) -> list[int]:
    """Every count from ``search.low`` to ``search.high`` of a searched axis (its grid in the store)."""
    table = raw["search"]
    if "values" in raw or raw.get("key") != COUNT_KEY or not isinstance(table, dict):
        raise ConfigError(f"{where}: search must be a table {{low = 1, high = 32, start = 1}} on key {COUNT_KEY}, "
                          "without values")
    unknown = sorted(set(table) - set(SEARCH_KEYS))
    if unknown:
        raise ConfigError(f"{where}: unknown key search.{unknown[0]}; valid keys: {', '.join(SEARCH_KEYS)}")
    count = lookup(COUNT_KEY, where=where)
    low = count.check(table.get("low", 1), where=f"{where} (search.low)")
    high = count.check(table.get("high", low), where=f"{where} (search.high)")
    if high <= low:
        raise ConfigError(f"{where}: search.high = {table.get('high')!r} is not allowed: expected an integer "
                          f"above search.low ({low}) and at most {count.high:g}")
    return list(range(low, high + 1))


def _count_search(raw_axes: list[Any], axes: tuple[Axis, ...], replicates: int, source: Path) -> CountSearch | None:
    """The sweep's count search, if an axis asks for one (its table was checked by ``_search_values``)."""
    searched = [(raw["search"], axis) for raw, axis in zip(raw_axes, axes) if "search" in raw]
    if not searched:
        return None
    table, axis = searched[0]
    where = f"{source}: sweep.axis {axis.name!r}: search"
    method = table.get("method", SEARCH_METHODS[0])
    if method not in SEARCH_METHODS:
        raise ConfigError(f"{where}.method = {method!r} is not allowed: expected "
                          + " or ".join(repr(m) for m in SEARCH_METHODS))
    first, more = _replicate_rule(table, replicates, where)
    start = table.get("start", axis.values[0])
    if start == PRESCREEN_START:
        return CountSearch(axis.name, None, method, first, more)
    if isinstance(start, bool) or start not in axis.values:
        raise ConfigError(f"{where}.start = {start!r} is not allowed: expected "
                          f"a count from {axis.values[0]} to {axis.values[-1]} or {PRESCREEN_START!r}")
    return CountSearch(axis.name, int(start), method, first, more)


def _replicate_rule(table: dict[str, Any], replicates: int, where: str) -> tuple[int | None, int | None]:
    """``search.first_replicates`` (1 to sweep.replicates) and ``search.more_replicates`` (>= 1, needs the first)."""
    first, more = table.get("first_replicates"), table.get("more_replicates")
    if first is not None and (isinstance(first, bool) or not isinstance(first, int) or not 1 <= first <= replicates):
        raise ConfigError(f"{where}.first_replicates = {first!r} is not allowed: expected an integer from 1 to "
                          f"sweep.replicates ({replicates}), the most a count may use")
    if more is not None and (first is None or isinstance(more, bool) or not isinstance(more, int) or more < 1):
        raise ConfigError(f"{where}.more_replicates = {more!r} is not allowed: expected an integer >= 1, "
                          "together with search.first_replicates")
    return first, more
