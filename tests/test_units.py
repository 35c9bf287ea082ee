"""Every unit string a store records parses in pint and in UDUNITS-2 (through cf_units, which the IOOS CF
compliance checker uses): the layout's variables, the counters, every sweepable key as an axis, and upgraded
stores of earlier schemas. A dimensionless weight is "1" and names its scale (g_leak)."""

from __future__ import annotations

import json
from pathlib import Path

import cf_units
import pint
import pytest
from test_old_stores import STORES, copy_fixture, invoke
from test_store import make_store

from capsweep.axes import key_axis
from capsweep.registry import KEYS, WEIGHT_UNIT
from capsweep.results_schema import attrs

UNITS = pint.UnitRegistry()


def recorded_units(path: Path) -> dict[str, dict]:
    """Each variable and coordinate of the store at ``path``: its attrs, from the consolidated metadata."""
    root = json.loads((path / "zarr.json").read_text())
    return {name: meta["attributes"] for name, meta in root["consolidated_metadata"]["metadata"].items()}


def assert_parses(unit: str, where: str) -> None:
    UNITS.parse_units(unit)  # raises for a unit pint does not know
    try:
        cf_units.Unit(unit)
    except ValueError as exc:
        pytest.fail(f"{where}: units {unit!r} are not UDUNITS-2 ({exc})")


def test_every_unit_of_a_new_store_parses_and_weights_name_their_scale(tmp_path: Path) -> None:
    described = recorded_units(make_store(tmp_path))
    for name, found in described.items():
        assert_parses(found["units"], name)
    for name in ("weight_in", "weight_out", "weight_within"):
        assert described[name]["units"] == "1" and described[name][attrs.RELATIVE_TO] == WEIGHT_UNIT
        assert WEIGHT_UNIT in described[name]["long_name"]


def test_every_sweepable_key_makes_an_axis_whose_units_parse() -> None:
    for key in (k for k in KEYS if k.sweepable):
        axis = key_axis("axis", key.path, (1,))
        assert_parses(axis.units, key.path)
        assert (axis.scale != "") == (WEIGHT_UNIT in key.unit), key.path
        assert axis.scale in axis.long_name, key.path


@pytest.mark.parametrize("version", sorted(STORES))
def test_every_unit_of_an_upgraded_store_parses(tmp_path: Path, version: str) -> None:
    path = copy_fixture(version, tmp_path)
    assert invoke("upgrade", path).exit_code == 0
    for name, found in recorded_units(path).items():
        assert_parses(found["units"], name)
