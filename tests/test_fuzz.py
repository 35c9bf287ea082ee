"""Mutated sweep files through the real command line: every bad file gives one clear line, never a traceback.

Each example starts from ``configs/demo.toml`` and breaks it in exactly one way: a required key deleted, a key
misspelt, a wrong type, NaN or +-inf, a value out of range (in the base config, in an axis's values or in a
variant's overrides, for any registry key), broken TOML, or a bad axis. ``capsweep check`` (which simulates
nothing) must then exit non-zero with one line on stderr that names the offending key, and no traceback.
"""

from __future__ import annotations

import copy
import json
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from hypothesis import assume, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from capsweep.registry import KEYS, Key
from capsweep.sweeps.cli import app

DEMO = Path(__file__).resolve().parents[1] / "configs" / "demo.toml"
BASE = tomllib.loads(DEMO.read_text())
VALID_NAMES = {k.path for k in KEYS} | {"sweep", "network", "assemblies", "plasticity", "protocol", "detection",
                                        "execution", "name", "store", "replicates", "base_seed", "axis", "key",
                                        "values", "variants", "search", "quiet_warnings"}
MIN_FILES = 500


@dataclass(frozen=True)
class Mutant:
    """A broken sweep file: its TOML text and what its error message must name."""

    text: str
    needle: str
    how: str


def toml(value: Any) -> str:
    """``value`` as a TOML literal; tables inline, keys quoted (so any dotted key survives)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, (int, float, str)):
        return json.dumps(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml(v) for v in value) + "]"
    return "{" + ", ".join(f"{json.dumps(k)} = {toml(v)}" for k, v in value.items()) + "}"


def document(doc: dict[str, Any]) -> str:
    """A whole sweep file: one line per top-level table."""
    return "".join(f"{json.dumps(name)} = {toml(table)}\n" for name, table in doc.items())


def misspell(draw: st.DrawFn, word: str) -> str:
    """``word`` with one character doubled, dropped or swapped with its neighbour; never a valid name."""
    i = draw(st.integers(0, len(word) - 2))
    op = draw(st.sampled_from(["double", "drop", "swap"]))
    new = {"double": word[:i] + word[i] + word[i:], "drop": word[:i] + word[i + 1:],
           "swap": word[:i] + word[i + 1] + word[i] + word[i + 2:]}[op]
    assume(new != word and new.rsplit(".", 1)[-1] not in VALID_NAMES and new not in VALID_NAMES)
    return new


def bad_value(draw: st.DrawFn, key: Key) -> tuple[Any, str]:
    """A value ``key`` must refuse, and what kind of defect it is."""
    kind = key.kind
    candidates: list[tuple[Any, str]] = [(math.nan, "nan"), (math.inf, "inf"), (-math.inf, "-inf"),
                                         ({"x": 1}, "table"), ({}, "empty table")]
    if kind is not str:
        candidates.append(("text", "string"))
    if kind is not bool:
        candidates.append((True, "bool"))
    if kind in (int, float, str, bool):
        candidates.append(([1, 2], "list"))
    if kind is int:
        candidates.append((1.5, "fraction"))
    if key.choices:
        candidates.append(("warp", "not a choice"))
    if kind in (int, float, tuple):
        if key.high is not None:
            candidates.append((key.high + abs(key.high) + 1, "above range"))
        if key.low is not None:
            candidates.append((key.low - abs(key.low) - 1, "below range"))
    value, how = draw(st.sampled_from(candidates))
    if kind is tuple and how in ("nan", "inf", "-inf", "above range", "below range"):
        value = [0.5, value]  # the bad number inside the list
    if kind is int and how in ("above range", "below range"):
        value = int(value)
    return value, how


def set_path(tree: dict[str, Any], dotted: str, value: Any) -> None:
    node = tree
    *parents, leaf = dotted.split(".")
    for part in parents:
        node = node.setdefault(part, {})
    node[leaf] = value


@st.composite
def bad_key_value(draw: st.DrawFn) -> Mutant:
    """Any registry key given a bad value: in the base config, as an axis value, or in a variant's overrides."""
    doc = copy.deepcopy(BASE)
    place = draw(st.sampled_from(["base", "axis", "variant"]))
    key = draw(st.sampled_from([k for k in KEYS if k.sweepable or place == "base"]))
    value, how = bad_value(draw, key)
    if place == "base":
        set_path(doc, key.path, value)
    elif place == "axis":
        doc["sweep"]["axis"].append({"name": "fuzzed", "key": key.path, "values": [key.default, value]})
    else:
        doc["sweep"]["axis"][0]["variants"]["full"] = {key.path: value}
    return Mutant(document(doc), key.path, f"{key.path} {how} in {place}")


@st.composite
def bad_sweep_table(draw: st.DrawFn) -> Mutant:
    """The [sweep] table: a required key deleted, a key misspelt, or a bad value for its own keys."""
    doc = copy.deepcopy(BASE)
    head = doc["sweep"]
    how = draw(st.sampled_from(["delete", "misspell", "count", "text", "quiet"]))
    if how == "delete":
        name = draw(st.sampled_from(["name", "store"]))
        del head[name]
        return Mutant(document(doc), f"sweep.{name}", f"sweep.{name} deleted")
    if how == "misspell":
        name = draw(st.sampled_from(sorted(k for k in head if k != "axis")))
        typo = misspell(draw, name)
        head[typo] = head.pop(name)
        return Mutant(document(doc), f"sweep.{typo}", f"sweep.{name} -> {typo}")
    if how == "count":
        name = draw(st.sampled_from(["replicates", "base_seed"]))
        head[name] = draw(st.sampled_from([-1, 1.5, 2.0, math.nan, math.inf, -math.inf, "3", True, [2]]))
        return Mutant(document(doc), f"sweep.{name}", f"sweep.{name} = {head[name]!r}")
    if how == "text":
        name = draw(st.sampled_from(["name", "store"]))
        head[name] = draw(st.sampled_from(["", "  ", 3, math.nan, True, ["x"]]))
        return Mutant(document(doc), f"sweep.{name}", f"sweep.{name} = {head[name]!r}")
    quiet = draw(st.sampled_from([["protocol.hold"], "protocol.hold_s", [3], [math.nan]]))
    head["quiet_warnings"] = quiet
    needle = "protocol.hold" if quiet == ["protocol.hold"] else "sweep.quiet_warnings"
    return Mutant(document(doc), needle, f"quiet_warnings = {quiet!r}")


@st.composite
def bad_axis(draw: st.DrawFn) -> Mutant:
    """An axis made invalid: fields deleted or misspelt, names clashing or reserved, values empty or repeated."""
    doc = copy.deepcopy(BASE)
    rule, count = doc["sweep"]["axis"]  # a variant axis and a key axis over assemblies.count
    how = draw(st.sampled_from(["delete", "misspell", "clash", "reserved", "empty", "repeat", "unsweepable",
                                "unknown key", "no variants", "variant not a table"]))
    if how == "delete":
        field = draw(st.sampled_from(["key", "values"]))
        del count[field]
        needle = f"missing {field}"
    elif how == "misspell":
        field = draw(st.sampled_from(["name", "key", "values"]))
        needle = misspell(draw, field)
        count[needle] = count.pop(field)
    elif how == "clash":
        count["name"] = rule["name"]
        needle = repr(rule["name"])
    elif how == "reserved":
        count["name"] = draw(st.sampled_from(["replicate", "2x", "", "n odours"]))
        needle = repr(count["name"])
    elif how == "empty":
        count["values"] = draw(st.sampled_from([[], "1, 2", 4]))
        needle = "values"
    elif how == "repeat":
        count["values"] = [1, 2, 2]
        needle = repr(count["name"])
    elif how == "unsweepable":
        count["key"] = draw(st.sampled_from([k.path for k in KEYS if not k.sweepable]))
        needle = count["key"]
    elif how == "unknown key":
        count["key"] = misspell(draw, count["key"])
        needle = count["key"]
    elif how == "no variants":
        rule["variants"] = {}
        needle = "variants"
    else:
        rule["variants"]["full"] = draw(st.sampled_from([3, "full", [1]]))
        needle = "'full'"
    return Mutant(document(doc), needle, f"axis: {how}")


@st.composite
def bad_table(draw: st.DrawFn) -> Mutant:
    """A top-level table misspelt or unknown."""
    doc = copy.deepcopy(BASE)
    name = draw(st.sampled_from([*(t for t in doc if t != "sweep"), "extra"]))
    if name == "extra":
        doc["extra"] = {"x": 1}
        return Mutant(document(doc), "[extra]", "unknown table")
    typo = misspell(draw, name)
    doc[typo] = doc.pop(name)
    return Mutant(document(doc), f"[{typo}]", f"table {name} -> {typo}")


@st.composite
def broken_toml(draw: st.DrawFn) -> Mutant:
    """Text that is not TOML: a stray line inserted anywhere."""
    lines = document(BASE).splitlines(keepends=True)
    at = draw(st.integers(0, len(lines)))
    junk = draw(st.sampled_from(["= 3\n", "[network\n", "sweep = {}\n", "x = [1, \n", "n = nan nan\n", "'a' = \"b\n"]))
    return Mutant("".join(lines[:at] + [junk] + lines[at:]), "not valid TOML", f"broken TOML: {junk!r} at {at}")


MUTANTS = st.one_of(bad_key_value(), bad_sweep_table(), bad_axis(), bad_table(), broken_toml())


def check(path: Path, text: str) -> Any:
    path.write_text(text)
    return CliRunner().invoke(app, ["check", str(path)])


def test_the_unmutated_demo_passes_check(tmp_path: Path) -> None:
    """The fuzzer's starting file, written by its own TOML writer, is valid: the mutations alone make files bad."""
    result = check(tmp_path / "demo.toml", document(BASE))
    assert result.exit_code == 0, result.output
    assert "36 points" in result.stdout  # 3 rules x 4 counts x 3 replicates (configs/demo.toml)


def test_every_mutated_sweep_file_gets_one_line_naming_the_key(tmp_path: Path) -> None:
    seen: list[str] = []
    path = tmp_path / "fuzzed.toml"

    @settings(max_examples=MIN_FILES + 50, deadline=None, database=None)
    @given(mutant=MUTANTS)
    def one_file(mutant: Mutant) -> None:
        result = check(path, mutant.text)
        context = f"{mutant.how}\n{mutant.text}\n-> {result.output}"
        assert result.exit_code != 0, context
        assert "Traceback" not in result.output, context
        assert isinstance(result.exception, SystemExit), context  # an exit with a message, not a crash
        assert result.stdout == "", context
        assert result.stderr.startswith("capsweep: error: ") and result.stderr.count("\n") == 1, context
        assert mutant.needle in result.stderr, context
        seen.append(mutant.how)

    one_file()
    assert len(seen) >= MIN_FILES
