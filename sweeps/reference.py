"""Reference material shipped with capsweep: the sweep-file key table and the example sweep files.

The key table is generated from :mod:`capsweep.registry` (``capsweep keys``, and the README section
between the ``keys:start`` / ``keys:end`` markers); the examples are ``configs/*.toml``, installed as the
package data of ``capsweep.configs`` (``capsweep examples``).

Regenerate the README section after changing the registry::

    python -m capsweep.sweeps.reference README.md
"""

from __future__ import annotations

import re
import sys
from importlib.resources import files
from importlib.resources.abc import Traversable
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from ..outputs import fault, new_file
from ..registry import KEYS, SECTIONS, Key, did_you_mean

KEYS_START = "<!-- keys:start -->"
KEYS_END = "<!-- keys:end -->"
EXAMPLES_PACKAGE = "capsweep.configs"


def keys_under(table: str | None = None) -> tuple[Key, ...]:
    """Every registry key, or those under the dotted ``table`` prefix (e.g. ``plasticity.triplet``)."""
    if not table:
        return KEYS
    chosen = tuple(k for k in KEYS if k.path.startswith(table.rstrip(".") + "."))
    if not chosen:
        tables = sorted({k.path.rsplit(".", 1)[0] for k in KEYS})
        raise ConfigError(f"--table {table!r} holds no keys; {did_you_mean(table, tables, 'tables')}")
    return chosen


def toml_literal(value: Any) -> str:
    """A default written as in a sweep file: true/false, quoted strings, lists in brackets."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, tuple):
        return "[" + ", ".join(map(toml_literal, value)) + "]"
    return repr(value)


def allowed_text(key: Key) -> str:
    """What a key accepts, with its plausible range where a value outside it only draws a warning."""
    span = key.plausible_range
    warn = f"; warning outside {span[0]:g} to {span[1]:g}" if span else ""
    fixed = "; fixed for the whole sweep (not an axis)" if not key.sweepable else ""
    return key.allowed() + warn + fixed


def keys_text(keys: tuple[Key, ...]) -> str:
    """Plain-text listing: ``path = default  [unit; allowed]`` then the description, indented."""
    blocks = []
    for key in keys:
        unit = f"{key.shown_unit}; " if key.shown_unit else ""
        blocks.append(f"{key.path} = {toml_literal(key.default)}  [{unit}{allowed_text(key)}]\n    {key.description}")
    return "\n".join(blocks) + "\n"


def keys_markdown(keys: tuple[Key, ...] = KEYS) -> str:
    """A markdown table of ``keys``: key, default, unit, allowed values, description."""
    lines = ["| key | default | unit | allowed | description |", "|---|---|---|---|---|"]
    for key in keys:
        fields = [f"`{key.path}`", f"`{toml_literal(key.default)}`", key.shown_unit, allowed_text(key),
                  key.description]
        lines.append("| " + " | ".join(text.replace("|", "\\|") for text in fields) + " |")
    return "\n".join(lines) + "\n"


def with_key_section(readme: str) -> str:
    """``readme`` with the text between the key-table markers replaced by the table of every registry key."""
    head, start, rest = readme.partition(KEYS_START)
    _, end, tail = rest.partition(KEYS_END)
    if not start or not end:
        raise ConfigError(f"the README lacks the markers {KEYS_START} and {KEYS_END} around its key table")
    intro = f"Generated from `capsweep/registry.py` (tables: {', '.join(f'[{s}]' for s in SECTIONS)}).\n\n"
    return f"{head}{KEYS_START}\n{intro}{keys_markdown()}{KEYS_END}{tail}"


def examples() -> dict[str, Traversable]:
    """The example sweep files by name (file name without ``.toml``, e.g. ``region-beta``), sorted."""
    return dict(sorted((entry.name.removesuffix(".toml"), entry) for entry in files(EXAMPLES_PACKAGE).iterdir()
                       if entry.name.endswith(".toml")))


def example_summary(example: Traversable) -> str:
    """The first sentence of an example's leading comment block (what the sweep asks)."""
    comment = []
    for line in example.read_text().splitlines():
        if not line.startswith("#"):
            break
        comment.append(line.lstrip("# ").strip())
    return re.split(r"(?<=[.?!])\s", " ".join(comment), maxsplit=1)[0]


def copy_example(name: str, folder: Path) -> Path:
    """Copy example ``name`` (with or without ``.toml``) into ``folder`` (created if missing) under its file name;
    never overwrite."""
    available = examples()
    name = name.removesuffix(".toml")
    if name not in available:
        raise ConfigError(f"no example named {name!r}; {did_you_mean(name, available, 'examples')}")
    target = new_file(folder / f"{name}.toml", "--to")
    try:
        target.write_text(available[name].read_text())
    except OSError as exc:
        raise fault(target, exc) from None
    return target


def main(argv: list[str]) -> int:
    """``python -m capsweep.sweeps.reference README.md``: rewrite the README's key table in place."""
    if len(argv) != 1:
        sys.exit("usage: python -m capsweep.sweeps.reference README.md")
    path = Path(argv[0])
    path.write_text(with_key_section(path.read_text()))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
