"""Planning: build counting and the longest-first packing used for the wall-time estimate."""

from __future__ import annotations

import numpy as np
import pytest

from capsweep.sweeps.costs import Cost, CostModel, Entry
from capsweep.sweeps.expand import Grid
from capsweep.sweeps.sweepfile import parse_sweep
from capsweep.sweeps.workload import advised_layout, makespan

SWEEP = """
[sweep]
name = "odour-plan"
store = "x.zarr"
[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
full = {}
triplet_only = { "plasticity.heterosynaptic.enabled" = false, "plasticity.inhibitory.enabled" = false }
[[sweep.axis]]
name = "n_exc"
key = "network.n_exc"
values = [300, 600]
[[sweep.axis]]
name = "beta"
key = "plasticity.heterosynaptic.beta"
values = [0.01, 0.03]
[assemblies]
size = 60
[protocol]
hold_s = 4.0
"""


def test_builds_follow_structure_not_coefficients_or_switches() -> None:
    """Network size changes the compiled code; rule coefficients and switched-off terms do not."""
    grid = Grid(parse_sweep(SWEEP))
    assert grid.n_points == 8
    keys = grid.build_keys()
    assert len(set(keys.flat)) == 2
    assert keys[0, 0, 0] != keys[0, 1, 0], "300 and 600 cells"
    assert (keys[1] == keys[0]).all() and (keys[:, :, 1] == keys[:, :, 0]).all(), "rules and beta share builds"


def test_makespan_packs_longest_first() -> None:
    """Longest-processing-time-first list scheduling (Graham 1969, SIAM J Appl Math 17:416), worked
    by hand for [5, 4, 3, 3, 3] on two workers: 5 | 4; 3 -> 4+3 = 7; 3 -> 5+3 = 8; 3 -> 7+3 = 10."""
    assert makespan([3, 5, 3, 4, 3], workers=2) == 10
    assert makespan([2.0] * 6, workers=3) == 4.0
    assert makespan([7.0], workers=4) == 7.0


def test_point_cost_scales_with_size_and_duration() -> None:
    grid = Grid(parse_sweep(SWEEP))
    model = CostModel({300: Entry(Cost(overhead_s=1.0, per_sim_s=0.5), "test")})
    # settle + hold + four cues with gaps + the tail that completes runaway_hold_s + smoothing_s (1 + 0.5 s)
    # after the last cue, s (registry defaults)
    planned = 1.0 + 4.0 + 4 * (0.2 + 0.5) + (1.5 - 0.5)
    assert np.allclose(grid.durations(), planned)
    assert abs(model.point_s(300, planned) - (1.0 + 0.5 * planned)) < 1e-9
    assert abs(model.point_s(600, planned) - (1.0 + 0.5 * 2 * planned)) < 1e-9  # twice the cells


def test_the_cost_model_learns_a_line_and_a_compile_from_stored_points(tmp_path, monkeypatch) -> None:
    """[derived] points whose wall time is exactly 2 s + 0.5 x simulated time and whose set-up is 1 s, except 41 s for
    the first point of build "a" (its compile): the fit must return that line, the median set-up and a 40 s compile."""
    from capsweep.sweeps import costs

    simulated = np.array([4.0, 8.0, 12.0, 16.0, 4.0, 8.0])
    setup = np.array([41.0, 1.0, 1.0, 1.0, 1.0, 1.0])
    builds = np.array(["a", "a", "a", "b", "b", "b"])
    model = costs.learn(CostModel(), "store", np.full(6, 300), setup, 2.0 + 0.5 * simulated, simulated, builds)
    cost = model.sizes[300].cost
    assert cost.per_sim_s == pytest.approx(0.5) and cost.overhead_s == pytest.approx(1.0 + 2.0)
    assert model.compile_s == pytest.approx(40.0)
    assert model.covers(500) and not model.covers(700), "an entry covers sizes within a factor 2"
    monkeypatch.setenv(costs.COST_FILE_ENV, str(tmp_path / "costs.json"))
    costs.save("standalone", model)
    assert costs.load("standalone") == model and costs.load("cython").sizes == {}


@pytest.mark.parametrize(("points", "cores", "threaded", "layout"), [
    (36, 2, True, (2, 1)),  # more points than cores: a process per core, one thread each
    (1, 2, True, (1, 2)),  # one large network on two idle cores: both on its loop
    (4, 32, True, (4, 8)),
    (3, 32, True, (3, 10)),  # the spare cores shared evenly, the rest left idle
    (1, 8, False, (1, 1)),  # an engine without threads
])
def test_advised_layout_uses_processes_first_and_threads_only_for_spare_cores(
        points: int, cores: int, threaded: bool, layout: tuple[int, int]) -> None:
    assert advised_layout(points, cores, threaded) == layout


def test_estimate_advises_workers_and_threads_for_the_cores_it_sees(tmp_path, monkeypatch) -> None:
    """8 points (2 rules x 2 sizes x 2 beta) on 32 cores: 8 workers of 4 threads; the cost model is given, so nothing
    is probed."""
    from typer.testing import CliRunner

    from capsweep.sweeps import costs
    from capsweep.sweeps.cli import app

    monkeypatch.setenv(costs.COST_FILE_ENV, str(tmp_path / "costs.json"))
    model = CostModel({n: Entry(Cost(2.0, 0.5), "probe", "2026-12-05") for n in (300, 600)})
    costs.save("standalone", model)
    monkeypatch.setattr("os.sched_getaffinity", lambda pid: set(range(32)))
    sweep = tmp_path / "plan.toml"
    sweep.write_text(SWEEP.replace('"x.zarr"', repr(str(tmp_path / "x.zarr"))))
    result = CliRunner().invoke(app, ["estimate", str(sweep)])
    assert result.exit_code == 0, result.output
    assert "for 8 points on the 32 cores here: execution.workers = 8; the cores left spare could run " \
           "execution.threads = 4 per point" in " ".join(result.output.split())
