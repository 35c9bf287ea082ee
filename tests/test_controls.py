"""Controls beside every condition: the control dim a sweep file's [controls] table adds, and the flag rule.

The end-to-end check (a real sham run through the CLI, its success and the flag) is in test_end_to_end.py; here the
capacity report's flag is read from a real store (Zarr, created from a sweep file's text as ``capsweep run`` creates
it) filled with invented point results.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.stats import norm
from test_plots import invented
from typer.testing import CliRunner

from capsweep.errors import ConfigError
from capsweep.registry import flatten
from capsweep.results_schema.store import ResultStore, create_store
from capsweep.sweeps.cli import app
from capsweep.sweeps.control_table import exceeds_false_positive_rate
from capsweep.sweeps.expand import Grid, expand
from capsweep.sweeps.identity import grid_spec, growth_refusal
from capsweep.sweeps.sweepfile import parse_sweep

SWEEP = """
[sweep]
name = "odour-controls"
store = "odour.zarr"
replicates = 2
[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
full = {{}}
triplet_only = {{ "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false }}
[[sweep.axis]]
name = "gain"
key = "assemblies.prewire_gain"
values = [3.0, 5.0]
[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1, 2]
{controls}
[network]
n_exc = 300
[assemblies]
size = 60
imprint = "{imprint}"
"""
ALL = '[controls]\nkinds = ["sham", "frozen", "unstructured"]'
EXPECTED_CHANGES = {
    "sham": {"protocol.cue_rate_hz": 0.0},
    "frozen": {"plasticity.freeze_after_imprint": True},
    "unstructured": {"assemblies.prewire_gain": 1.0, "protocol.imprint_rate_hz": 0.0},
}
"""What each control must change, written out here (issue: sham = no cue input; frozen = plasticity stopped after
imprinting; unstructured = gain 1 for prewired assemblies, no learning input for learned ones)."""


def sweep(controls: str = ALL, imprint: str = "prewired"):
    return parse_sweep(SWEEP.format(controls=controls, imprint=imprint))


@pytest.mark.parametrize("imprint", ["prewired", "learned"])
def test_every_condition_gets_each_control_with_only_its_keys_changed(imprint: str) -> None:
    points = expand(sweep(imprint=imprint))
    assert [a.name for a in sweep().axes] == ["rule", "gain", "n_odours", "control"]
    assert len(points) == 2 * 2 * 2 * 4 * 2
    own = {tuple(v for k, v in p.labels.items() if k != "control"): p for p in points if p.labels["control"] == "none"}
    assert len(own) == 16
    for p in points:
        kind = p.labels["control"]
        if kind == "none":
            continue
        condition = own[tuple(v for k, v in p.labels.items() if k != "control")]
        mine, theirs = flatten(p.config), flatten(condition.config)
        changed = {k: v for k, v in mine.items() if theirs[k] != v}
        expected = {k: v for k, v in EXPECTED_CHANGES[kind].items() if theirs[k] != v}
        assert changed == expected, (p.labels, changed)
        assert p.wiring_seed == condition.wiring_seed, "a control shares its condition's wiring (paired design)"
        assert p.point_id != condition.point_id
    # the unstructured control overrides the gain axis: gain 1 beside both gains
    assert {flatten(p.config)["assemblies.prewire_gain"] for p in points if p.labels["control"] == "unstructured"} \
        == {1.0}


def test_a_sweep_without_controls_has_no_control_dim() -> None:
    assert "control" not in [a.name for a in sweep(controls="").axes]


@pytest.mark.parametrize("controls, named", [
    ('[controls]\nkinds = ["shame"]', "did you mean sham"),
    ('[controls]\nkinds = ["sham", "sham"]', "none repeated"),
    ("[controls]\nkinds = []", "non-empty list"),
    ('[controls]\ntypes = ["sham"]', "'types'"),
])
def test_bad_controls_table_is_named(controls: str, named: str) -> None:
    with pytest.raises(ConfigError, match=r"\[controls\]") as err:
        sweep(controls=controls)
    assert named in str(err.value)


def test_control_is_a_reserved_dim_name() -> None:
    text = SWEEP.format(controls="", imprint="prewired").replace('name = "gain"', 'name = "control"')
    with pytest.raises(ConfigError, match="name 'control' is not allowed"):
        parse_sweep(text)


def test_a_store_grows_by_appended_control_kinds_only() -> None:
    some = sweep(controls='[controls]\nkinds = ["sham"]')
    assert growth_refusal(some, sweep()) == ""
    assert "axis control lost value(s) ['frozen', 'unstructured']" in growth_refusal(sweep(), some)
    assert "axes changed" in growth_refusal(sweep(controls=""), some)


def wilson_low(successes: int, n: int, z: float) -> float:
    """Lower end of the Wilson score interval (Wilson 1927, J Am Stat Assoc 22:209, eq. as in Brown, Cai &
    DasGupta 2001, Stat Sci 16:101, eq. 4), computed here in closed form."""
    p = successes / n
    centre = p + z * z / (2 * n)
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return (centre - half) / (1 + z * z / n)


@pytest.mark.parametrize("alpha", [0.01, 0.05])
def test_flag_is_the_wilson_interval_lying_above_alpha(alpha: float) -> None:
    """A control is flagged when the lower end of its 95 % Wilson interval exceeds the false-positive rate."""
    z = norm.ppf(0.975)
    for n in (1, 3, 12, 48, 200):
        for successes in range(n + 1):
            assert exceeds_false_positive_rate(successes, n, alpha) == (wilson_low(successes, n, z) > alpha), \
                (successes, n)
    assert not exceeds_false_positive_rate(0, 0, alpha), "no done point: nothing to flag"


def test_flag_examples_at_the_default_alpha() -> None:
    """0 successes never flag; 1 of 48 is within chance at alpha = 0.01; 1 of 12 is not [derived: Wilson lower ends
    0.0037 and 0.0149]."""
    assert not exceeds_false_positive_rate(0, 48, 0.01)
    assert not exceeds_false_positive_rate(1, 48, 0.01)
    assert exceeds_false_positive_rate(1, 12, 0.01)


def test_capacity_report_flags_a_sham_that_succeeds_beyond_chance(tmp_path: Path) -> None:
    """Counts 1-2, 6 replicates: the condition succeeds everywhere, its sham in 2 of 12 points (Wilson lower end
    0.046 > alpha 0.01: flagged), its unstructured control in none (not flagged)."""
    sweep = parse_sweep(SWEEP.format(controls='[controls]\nkinds = ["sham", "unstructured"]', imprint="prewired")
                        .replace("replicates = 2", "replicates = 6").replace("values = [3.0, 5.0]", "values = [5.0]")
                        .replace('triplet_only = { "plasticity.heterosynaptic.enabled" = false, '
                                 '"plasticity.transmitter.enabled" = false }\n', ""))
    lattice, path = Grid(sweep), tmp_path / "odour.zarr"
    points, grid = list(lattice.points()), grid_spec(lattice)
    create_store(path, grid, *lattice.ids_and_seeds())
    writer = ResultStore.open(path)
    lucky = [p.index for p in points if p.labels["control"] == "sham"][:2]
    for p in points:
        count = p.config["assemblies"]["count"]
        recalled = count if p.labels["control"] == "none" or p.index in lucky else 0
        writer.write_point(p.index, {**invented(count, "stable", recalled, "stable", p.seed, grid.n_time_bin),
                                     "threads": 1})
    writer.close()
    report = CliRunner().invoke(app, ["capacity", str(path)])
    assert report.exit_code == 0, report.output
    warnings = [line for line in report.output.splitlines() if line.startswith("warning:")]
    assert len(warnings) == 1 and "the sham control of rule=full, gain=5.0 succeeds in 2 of 12" in warnings[0]
    beside = report.output.split("controls beside each condition")[1]
    assert "2/12" in beside and "0/12" in beside
    csv = CliRunner().invoke(app, ["capacity", str(path), "--controls", "--format", "csv"])
    rows = {line.split(",")[2]: line for line in csv.output.splitlines()[1:]}
    assert rows["sham"].endswith(",True") and rows["unstructured"].endswith(",False"), csv.output
