"""Sweep-file validation through the CLI, and grid expansion properties.

Every bad input must give one message naming the key (or file), the value and what is allowed,
a non-zero exit and no traceback, before anything is run or stored.
"""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from capsweep.errors import ConfigError
from capsweep.registry import KEYS, defaults
from capsweep.sweeps.cli import app
from capsweep.sweeps.expand import expand
from capsweep.sweeps.ids import grid_shape, point_id
from capsweep.sweeps.sweepfile import parse_sweep

GOOD = """
[sweep]
name = "odour-check"
store = "{store}"
replicates = 2
[[sweep.axis]]
name = "n_assemblies"
key = "assemblies.count"
values = [1, 2]
[network]
n_exc = 200
[assemblies]
size = 40
"""


def run_cli(tmp_path: Path, text: str) -> tuple[int, str]:
    """Run ``capsweep run`` on ``text``; return (exit code, stderr+stdout)."""
    sweep = tmp_path / "sweep.toml"
    sweep.write_text(text.replace("{store}", str(tmp_path / "store.zarr")))
    result = CliRunner().invoke(app, ["run", str(sweep)])
    return result.exit_code, result.output


@pytest.mark.parametrize(
    ("edit", "needles"),
    [
        (("n_exc = 200", "n_excc = 200"), ["unknown key network.n_excc", "did you mean network.n_exc?"]),
        (("n_exc = 200", "n_foo = 200"), ["unknown key network.n_foo", "valid keys here: network.n_exc,"]),
        (("replicates = 2", "replicats = 2"), ["unknown key sweep.replicats", "did you mean sweep.replicates?"]),
        (("n_exc = 200", "n_exc = 5"), ["network.n_exc = 5", "from 20 to 50000"]),
        (("n_exc = 200", 'n_exc = "many"'), ["network.n_exc = 'many'", "an integer"]),
        (("size = 40", 'overlap = "sometimes"'), ["assemblies.overlap", "'disjoint', 'random'"]),
        (("replicates = 2", "replicates = 0"), ["sweep.replicates = 0", "integer >= 1"]),
        (('key = "assemblies.count"', 'key = "assemblies.cout"'), ["assemblies.cout", "assemblies.count"]),
        (("values = [1, 2]", "values = [1, 1]"), ["repeat"]),
        (("values = [1, 2]", "values = []"), ["non-empty list"]),
        (("values = [1, 2]", "values = [1, -3]"), ["assemblies.count = -3", "from 0 to 1000"]),
        (('name = "n_assemblies"', 'name = "replicate"'), ["'replicate'", "identifier"]),
        (("[network]", "[netwerk]"), ["unknown table [netwerk]", "did you mean [network]?"]),
        (("values = [1, 2]", "values = [1, 2]\nunit = 3"), ["unknown key 'unit'", "name, key, values"]),
        (('store = "{store}"', "store = "), ["not valid TOML"]),
        (("values = [1, 2]", "values = [1, 6]"), ["6 x 40", "network.n_exc (200)", "n_assemblies=6"]),
        (('key = "assemblies.count"', 'key = "network.dt_ms"'), ["network.dt_ms cannot be swept"]),
        (("size = 40", "size = 40\n[plasticity.heterosynaptic]\nbeta = nan"), ["beta = nan", "from 0 to 10"]),
        (("size = 40", "size = 40\n[protocol]\nhold_s = inf"), ["hold_s = inf", "from 0 to 1e+06"]),
        (("size = 40", "size = 40\n[protocol]\nhold_s = -inf"), ["hold_s = -inf", "from 0 to 1e+06 (s)"]),
        (("size = 40", "size = 40\n[protocol]\nretention_delays_s = [1.0, nan]"), ["retention_delays_s = [1.0, nan]"]),
        (("values = [1, 2]", "values = [1, nan]"), ["assemblies.count = nan", "n_assemblies"]),
        (("values = [1, 2]", "values = [1, 2]\n[[sweep.axis]]\nname = \"rule\"\n[sweep.axis.variants]\n"
          "slow = { \"plasticity.triplet.tau_slow_ms\" = inf }"), ["plasticity.triplet.tau_slow_ms = inf", "variant slow"]),
        (("size = 40", "size = 40\n[protocol]\nretention_delays_s = [3.0, 1.0]"),
         ["retention_delays_s = [3.0, 1.0]", "increasing list"]),
        (("size = 40", "size = 40\n[protocol]\nhold_s = 4.0\nretention_delays_s = [1.0, 1.5]"),
         ["retention_delays_s", "room before the next"]),
        (("size = 40", "size = 40\n[protocol]\nhold_s = 4.0\nretention_delays_s = [3.5]"),
         ["retention_delays_s", "protocol.hold_s (4.0)"]),
        (("n_exc = 200", "n_exc = 200\n[detection]\nbaseline_start_s = 2.0"),
         ["detection.baseline_start_s (2.0)", "protocol.settle_s"]),
    ],
)
def test_bad_sweep_file_gives_one_clear_message(tmp_path: Path, edit: tuple[str, str], needles: list[str]) -> None:
    code, output = run_cli(tmp_path, GOOD.replace(*edit))
    assert code == 2
    assert output.startswith("capsweep: error:")
    for needle in needles:
        assert needle in output, output
    assert "Traceback" not in output
    assert not (tmp_path / "store.zarr").exists(), "a bad sweep file must not create a store"


def test_missing_sweep_file_is_named(tmp_path: Path) -> None:
    result = CliRunner().invoke(app, ["run", str(tmp_path / "nope.toml")])
    assert result.exit_code == 2
    assert "nope.toml" in result.output and "Traceback" not in result.output


def test_error_in_a_real_process_has_no_traceback(tmp_path: Path) -> None:
    """The console script path, not only the in-process runner, stays traceback-free."""
    sweep = tmp_path / "sweep.toml"
    sweep.write_text(GOOD.replace("n_exc = 200", "n_exc = 20.5"))
    proc = subprocess.run(
        [sys.executable, "-m", "capsweep.sweeps.cli", "run", str(sweep)], capture_output=True, text=True, timeout=120
    )
    assert proc.returncode == 2
    assert "network.n_exc = 20.5" in proc.stderr and "Traceback" not in proc.stderr


axis_values = st.lists(st.integers(min_value=1, max_value=6), min_size=1, max_size=4, unique=True)


@settings(max_examples=25, deadline=None)
@given(counts=axis_values, betas=st.lists(st.sampled_from([0.0, 0.01, 0.03, 0.05, 0.1]), min_size=1,
                                          max_size=3, unique=True), replicates=st.integers(1, 3))
def test_expansion_counts_ids_and_seeds(counts: list[int], betas: list[float], replicates: int) -> None:
    text = f"""
[sweep]
name = "prop"
store = "x.zarr"
replicates = {replicates}
[[sweep.axis]]
name = "n_assemblies"
key = "assemblies.count"
values = {counts}
[[sweep.axis]]
name = "beta"
key = "plasticity.heterosynaptic.beta"
values = {betas}
[assemblies]
size = 50
"""
    sweep = parse_sweep(text)
    points = expand(sweep)
    assert len(points) == math.prod([len(counts), len(betas), replicates]) == math.prod(grid_shape(sweep))
    assert len({p.point_id for p in points}) == len(points)
    assert len({p.seed for p in points}) == len(points)
    again = expand(parse_sweep(text))
    assert [(p.point_id, p.seed) for p in again] == [(p.point_id, p.seed) for p in points]
    for p in points:
        assert p.config["assemblies"]["count"] == p.labels["n_assemblies"]
        assert p.config["plasticity"]["heterosynaptic"]["beta"] == p.labels["beta"]


def test_point_id_ignores_execution_settings_and_axis_order() -> None:
    """Ids depend on the science config only: worker count or engine must not change them."""
    flat = defaults()
    changed = {**flat, "execution.workers": 7, "execution.engine": "numpy"}
    assert point_id(flat, 0) == point_id(changed, 0)
    assert point_id(flat, 0) != point_id(flat, 1)
    assert point_id(flat, 0) != point_id({**flat, "plasticity.triplet.a_ltp": 0.021}, 0)


def test_every_key_default_is_allowed() -> None:
    for key in KEYS:
        assert key.check(key.default) == key.default, key.path


def test_every_key_default_is_plausible() -> None:
    """Defaults never draw a unit-slip warning."""
    for key in KEYS:
        assert key.implausible(key.default) is None, key.path


@pytest.mark.parametrize(("edit", "unit"), [(("n_exc = 200", "n_exc = 5"), None), (("size = 40", "size = 40\noverlap = 1"), None),
                                            (("n_exc = 200", "n_exc = 200\ndelay_ms = 0"), "(ms)"),
                                            (("n_exc = 200", "n_exc = 200\nw_e_to_e = -1"), "(g_leak)")])
def test_messages_show_units_only_where_values_have_one(tmp_path: Path, edit: tuple[str, str], unit: str | None) -> None:
    """Counts, choices and switches are dimensionless (unit "1"): no "(1)" after what is allowed."""
    code, output = run_cli(tmp_path, GOOD.replace(*edit))
    assert code == 2
    assert "(1)" not in output
    assert unit is None or unit in output, output


VARIANTS = """
[sweep]
name = "rules"
store = "x.zarr"
[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
full = {}
triplet_only = { "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false }
[[sweep.axis]]
name = "n_assemblies"
key = "assemblies.count"
values = [1, 2]
[assemblies]
size = 50
"""


def test_variant_axis_applies_its_overrides() -> None:
    points = expand(parse_sweep(VARIANTS))
    by_rule = {(p.labels["rule"], p.labels["n_assemblies"]): p.config["plasticity"] for p in points}
    assert len(points) == 4
    assert by_rule[("full", 2)]["heterosynaptic"]["enabled"] is True
    assert by_rule[("triplet_only", 1)]["heterosynaptic"]["enabled"] is False
    assert by_rule[("triplet_only", 1)]["transmitter"]["enabled"] is False
    assert by_rule[("triplet_only", 1)]["triplet"]["enabled"] is True


@pytest.mark.parametrize(
    ("edit", "needle"),
    [
        (('"plasticity.transmitter.enabled" = false', '"plasticity.transmiter.enabled" = false'),
         "plasticity.transmiter.enabled"),
        (('"plasticity.transmitter.enabled" = false', '"plasticity.transmitter.enabled" = 3'), "true or false"),
        (('key = "assemblies.count"\nvalues = [1, 2]', 'key = "plasticity.heterosynaptic.enabled"\nvalues = [true]'),
         "both by an axis and by a variant"),
    ],
)
def test_bad_variant_is_named(edit: tuple[str, str], needle: str) -> None:
    text = VARIANTS.replace(*edit)
    assert text != VARIANTS
    with pytest.raises(ConfigError) as info:
        parse_sweep(text)
    assert needle in str(info.value)


def test_coding_level_sets_the_assembly_size_per_network_size() -> None:
    text = GOOD.replace("size = 40", "coding_level = 0.1").replace("[network]\nn_exc = 200", "") + """
[[sweep.axis]]
name = "n_exc"
key = "network.n_exc"
values = [300, 1200]
"""
    points = expand(parse_sweep(text))
    sizes = {(p.labels["n_exc"], p.config["assemblies"]["size"]) for p in points}
    assert sizes == {(300, 30), (1200, 120)}


@pytest.mark.parametrize("name", ["règle", "odeur_2", "Δw"])
def test_axis_names_may_use_any_script_python_accepts(name: str) -> None:
    """'règle' was refused as "not a Python-style identifier" though Python accepts it: Python's own compiler
    is the reference here."""
    compile(f"{name} = 1", "<axis name>", "exec")  # the language accepts it as a name
    sweep = parse_sweep(GOOD.replace('name = "n_assemblies"', f'name = "{name}"'))
    assert [axis.name for axis in sweep.axes] == [name]


@pytest.mark.parametrize("name", ["class", "2odours", "rule-set"])
def test_axis_names_python_refuses_are_refused(name: str) -> None:
    with pytest.raises(SyntaxError):
        compile(f"{name} = 1", "<axis name>", "exec")
    with pytest.raises(ConfigError, match="not allowed"):
        parse_sweep(GOOD.replace('name = "n_assemblies"', f'name = "{name}"'))


def test_a_coding_level_axis_beside_a_fixed_size_is_refused_per_point() -> None:
    """A size in [assemblies] and a coding_level from an axis: the level silently decided the size."""
    text = GOOD + '[[sweep.axis]]\nname = "level"\nkey = "assemblies.coding_level"\nvalues = [0.1]\n'
    with pytest.raises(ConfigError, match=r"assemblies\.size \(40\) and assemblies\.coding_level \(0\.1\)"):
        expand(parse_sweep(text))
    assert len(expand(parse_sweep(text.replace("size = 40\n", "")))) == 4
