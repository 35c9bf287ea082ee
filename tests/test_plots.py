"""Figures of a store, read back from their matplotlib objects: ticks, intervals, pending tiles, legends,
shaded cue windows, and that no option combination ends in a traceback or leaves files behind.

The store is real (Zarr, created from a sweep file's text as ``capsweep run`` creates it) and filled
with invented point results (the simulation is tested elsewhere), laid out in PATTERN (numeric axes) and
RULE_PATTERN (a categorical rule axis).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from matplotlib import pyplot as plt
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection
from matplotlib.transforms import Bbox
from typer.testing import CliRunner

from capsweep.results_schema.dataset import open_dataset
from capsweep.results_schema.layout import VARIABLES
from capsweep.results_schema.store import ResultStore, create_store
from capsweep.sweeps.capacity import capacity_table, success_table
from capsweep.sweeps.cli import app
from capsweep.sweeps.expand import Grid, expand
from capsweep.sweeps.identity import grid_spec
from capsweep.sweeps.plots import (
    all_plots,
    capacity_against,
    capacity_curves,
    map_axes,
    point_schedules,
    prediction_confusion,
    rate_traces,
    recall_per_assembly,
    stability_map,
    weight_drift,
)
from capsweep.sweeps.sweepfile import parse_sweep

SETTLE_S, HOLD_S, RETENTION_S, CUE_S, GAP_S = 1.0, 3.0, 0.5, 0.2, 0.5
NUMERIC_AXES = """
[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1, 2, 3]

[[sweep.axis]]
name = "beta"
key = "plasticity.heterosynaptic.beta"
values = [0.0, 0.05]
"""
# three rule families as in configs/demo.toml: names without an order
RULES = ("triplet_only", "triplet_inhibitory", "full")
RULE_AXES = """
[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
triplet_only = { "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false, "plasticity.inhibitory.enabled" = false }
triplet_inhibitory = { "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false }
full = {}

[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1, 2]
"""
SWEEP_BODY = f"""
[network]
n_exc = 100

[assemblies]
size = 20

[protocol]
settle_s = {SETTLE_S}
hold_s = {HOLD_S}
retention_delays_s = [{RETENTION_S}]
cue_duration_s = {CUE_S}
cue_gap_s = {GAP_S}
"""


def sweep_text(axes: str) -> str:
    return f"""
[sweep]
name = "odour-plot-test"
store = "unused.zarr"
replicates = 2
base_seed = 11
{axes}{SWEEP_BODY}"""


# (count index, beta index, replicate) -> (outcome, recalled, predicted); not listed: stable, all recalled,
# predicted stable. "pending" leaves the point unwritten.
PATTERN: dict[tuple[int, int, int], tuple[str, int, str] | str] = {
    (1, 0, 1): ("stable", 1, "stable"),  # beta 0, count 2: one assembly lost in replicate 1
    (2, 0, 0): ("runaway", 0, "runaway"), (2, 0, 1): ("runaway", 0, "stable"),  # beta 0, count 3 runs away
    (1, 1, 0): "pending", (1, 1, 1): "pending",  # beta 0.05, count 2: nothing done yet
    (2, 1, 0): ("stable", 2, "stable"),  # beta 0.05, count 3: one assembly lost in replicate 0
}
# (rule index, count index, replicate), the same way; drift per rule: see rule_ds
RULE_PATTERN: dict[tuple[int, int, int], tuple[str, int, str] | str] = {
    (0, 1, 0): "pending",  # triplet_only, count 2: one replicate done, one pending
    (1, 1, 0): ("stable", 1, "stable"),  # triplet_inhibitory, count 2: 1 of 2 -> capacity at least 2
    (2, 1, 0): ("stable", 1, "stable"), (2, 1, 1): ("runaway", 0, "stable"),  # full, count 2: 0 of 2 -> capacity 1
}
STOPPED_S = 3.0  # where the runaway points' runs stop (early abort)
WRONG_CUES = (0, 1, 1)  # this point stores a final cue time its sweep file cannot give


def invented(count: int, outcome: str, recalled: int, predicted: str, seed: int, n_bins: int,
             cue_time_s: float = np.nan, drift: float = 0.1) -> dict:
    """A runner result with every layout variable; recall scores 0.9 for recalled assemblies, 0.1 else; the
    weight correlation falls by ``drift`` per snapshot."""
    out: dict = {v.name: np.full(1, np.nan) if v.inner else np.nan for v in VARIABLES if v.dtype == "float64"}
    score = np.where(np.arange(count) < recalled, 0.9, 0.1)
    stopped = STOPPED_S if outcome == "runaway" else np.nan
    out.update({
        "outcome": outcome, "predicted_outcome": predicted, "engine": "cython", "seed": seed,
        "recalled_count": recalled, "overlap_recalled_count": recalled, "already_active_count": 0, "stuck_count": 0,
        "recall_state": ["recalled"] * recalled + ["not_recalled"] * (count - recalled),
        "test_position": np.arange(count), "n_synapses": 1000, "threads": 1, "retention_recalled": [recalled],
        "retention_tested": [count], "age_recalled": [-1], "age_tested": [-1], "recall_score": score,
        "simulated_time_s": stopped if outcome == "runaway" else 20.0,
        "weight_correlation": 1.0 - drift * np.arange(3), "snapshot_time_s": np.array([1.0, 2.0, 3.0]),
        "rate_exc_hz": np.full(n_bins, 3.0), "cue_time_s": np.full(count, cue_time_s),
    })
    return out


def filled_store(path: Path, text: str, pattern: dict, drift: Callable[[tuple[int, ...]], float],
                 wrong_cues: tuple[int, ...] | None = None) -> Path:
    """A store created from sweep ``text`` as a run creates it (root attr ``sweep_text``), its points written as
    ``pattern`` says (unlisted: stable, all recalled), the weight correlation falling by ``drift(index)``; point
    ``wrong_cues`` stores a final cue time of 99 s."""
    sweep = parse_sweep(text)
    grid = grid_spec(Grid(sweep))
    create_store(path, grid, *Grid(sweep).ids_and_seeds())
    writer = ResultStore.open(path)
    for p in expand(sweep):
        count = p.config["assemblies"]["count"]
        spec = pattern.get(p.index, ("stable", count, "stable"))
        if spec != "pending":
            cue_time_s = 99.0 if p.index == wrong_cues else np.nan
            writer.write_point(p.index, invented(count, *spec, p.seed, grid.n_time_bin, cue_time_s, drift(p.index)))
    return path


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The PATTERN store over n_odours and beta."""
    return filled_store(tmp_path_factory.mktemp("plots") / "odour.zarr", sweep_text(NUMERIC_AXES), PATTERN,
                        lambda index: 0.1, WRONG_CUES)


@pytest.fixture(scope="module")
def rule_ds(tmp_path_factory: pytest.TempPathFactory) -> xr.Dataset:
    """The RULE_PATTERN store over rule (categorical) and n_odours; rule i's weights drift by 0.1 (i + 1) per
    snapshot, so each trace tells its rule."""
    path = filled_store(tmp_path_factory.mktemp("plots") / "rules.zarr", sweep_text(RULE_AXES), RULE_PATTERN,
                        lambda index: 0.1 * (index[0] + 1))
    return open_dataset(path)


@pytest.fixture(scope="module")
def ds(store: Path) -> xr.Dataset:
    return open_dataset(store)


def _labels(ticks: list) -> list[str]:
    return [t.get_text() for t in ticks]


def test_stability_map_ticks_pooling_wilson_and_pending_cell(ds: xr.Dataset) -> None:
    """x n_odours, y beta, pooled over replicates: beta 0 succeeds 2/2, 1/2, 0/2; beta 0.05 2/2, pending, 1/2."""
    fig = stability_map(ds, "n_odours", "beta")
    ax = fig.axes[0]
    assert _labels(ax.get_xticklabels()) == ["1", "2", "3"]  # integer axis: no "1.0"
    assert "pooled over replicate" in ax.get_title()
    image = ax.get_images()[0].get_array()
    assert image.mask[1, 1] and not image.mask.sum() - 1  # only the pending tile has no fraction, not 0
    np.testing.assert_allclose(image.data[0], [1.0, 0.5, 0.0])
    tiles = {(round(t.get_position()[0]), round(t.get_position()[1])): t.get_text() for t in ax.texts}
    assert tiles[(1, 1)] == "2 pending"
    assert tiles[(1, 0)].splitlines()[0] == "0.50 (n=2)"
    table = success_table(ds).set_index(["n_odours", "beta"])  # one replicate pair per tile: same interval
    low, high = table.loc[(2, 0.0), ["wilson_lo", "wilson_hi"]]
    assert tiles[(1, 0)].splitlines()[1] == f"[{low:.2f}, {high:.2f}]"
    assert tiles[(2, 0)].splitlines()[2] == "R 1.00"  # both count-3 points ran away


def test_stability_map_without_a_second_axis_is_one_row(ds: xr.Dataset) -> None:
    """A store with one axis (beta fixed here) maps n_odours against nothing: one row, no y ticks."""
    one_axis = ds.isel(beta=0)
    assert map_axes(one_axis) == ("n_odours", None)
    ax = stability_map(one_axis, "n_odours").axes[0]
    assert ax.get_images()[0].get_array().shape == (1, 3) and not ax.get_yticks().size


def test_capacity_curve_bars_are_the_wilson_intervals_and_pending_counts_are_not_drawn(ds: xr.Dataset) -> None:
    fig = capacity_curves(ds)
    ax = fig.axes[0]
    assert all(float(v).is_integer() for v in ax.get_xticks()) and _labels(ax.get_xticklabels()) == ["1", "2", "3"]
    table = success_table(ds)
    for container, (_, rows) in zip(ax.containers, table.groupby("beta", sort=False)):
        done = rows[rows["n"] > 0]
        x, y = container.lines[0].get_data()
        np.testing.assert_allclose(np.round(np.asarray(x, float)), done["n_odours"])  # beta 0.05 skips count 2 (pending), no 0
        np.testing.assert_allclose(np.asarray(y, float), done["fraction"])
        segments = container.lines[2][0].get_segments()
        np.testing.assert_allclose([s[0][1] for s in segments], done["wilson_lo"])
        np.testing.assert_allclose([s[1][1] for s in segments], done["wilson_hi"])
    assert not ax.texts and "pending at 2" in _labels(ax.get_legend().get_texts())[1]


def test_capacity_against_beta_bars_are_the_replicate_ranges(ds: xr.Dataset) -> None:
    """beta 0: counts 1 (2/2), 2 (1/2), 3 (0/2) -> capacity 2, replicates 2 and 1; beta 0.05 pending: NA."""
    ax = capacity_against(ds, "beta").axes[0]
    table = capacity_table(ds).set_index("beta")
    assert table.loc[0.0, "capacity"] == 2
    (bars,) = [c for c in ax.collections if isinstance(c, LineCollection) and c.get_gid() == "replicate_range"]
    ((x, lo), (_, hi)), = bars.get_segments()
    assert (x, lo, hi) == (0.0, table.loc[0.0, "capacity_lo"], table.loc[0.0, "capacity_hi"]) == (0.0, 1, 2)
    assert not ax.texts and _labels(ax.get_legend().get_texts())[0] == "all (NA, pending at 0.05)"
    assert _labels(ax.get_xticklabels()) == ["0", "0.05"]
    (curve,) = [line for line in ax.lines if line.get_marker() == "o"]
    assert curve.get_linestyle() == "-"  # a numeric axis keeps its line
    assert all(float(v).is_integer() for v in ax.yaxis.get_major_locator().tick_values(0, 2))


def test_capacity_against_a_categorical_rule_draws_marks_joined_by_no_line(rule_ds: xr.Dataset) -> None:
    """Rule names have no order, so no line may join them: triplet_inhibitory (capacity >= 2, replicates 2 and 1)
    and full (1, both replicates 1) are marks at their category with their replicate range; triplet_only is
    pending (NA), drawn nowhere and named in the legend."""
    ax = capacity_against(rule_ds, "rule").axes[0]
    table = capacity_table(rule_ds).set_index("rule")
    assert table.loc[list(RULES[1:]), ["capacity", "capacity_lo", "capacity_hi"]].values.tolist() == [[2, 1, 2],
                                                                                                     [1, 1, 1]]
    assert _labels(ax.get_xticklabels()) == list(RULES)
    joined = [line for line in ax.lines if line.get_linestyle() not in ("None", "") and len(set(line.get_xdata())) > 1]
    assert not joined
    marks = sorted(tuple(xy) for line in ax.lines if line.get_marker() == "o" for xy in line.get_xydata())
    assert marks == [(1.0, 2.0), (2.0, 1.0)]
    (bars,) = [c for c in ax.collections if isinstance(c, LineCollection) and c.get_gid() == "replicate_range"]
    assert sorted((s[0][0], s[0][1], s[1][1]) for s in bars.get_segments()) == [(1, 1, 2), (2, 1, 1)]
    assert "NA, pending at triplet_only" in " ".join(t.get_text() for t in ax.get_legend().get_texts())


def test_weight_drift_gives_each_rule_its_own_panel(rule_ds: xr.Dataset) -> None:
    """One panel per rule with that rule's done points only (triplet_only: 3, one pending; the others 4);
    rule i's invented weights fall by 0.1 (i + 1) per snapshot, so a trace in the wrong panel would show."""
    fig = weight_drift(rule_ds)
    panels = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title() for ax in panels] == [f"rule={r} ({n} done)" for r, n in zip(RULES, (3, 4, 4))]
    for i, ax in enumerate(panels):
        traces = [line for line in ax.lines if len(line.get_xdata())]
        assert len(traces) == (3, 4, 4)[i]
        for line in traces:
            y = np.asarray(line.get_ydata(), float)
            np.testing.assert_allclose(y[np.isfinite(y)], 1.0 - 0.1 * (i + 1) * np.arange(3))


def _bar_boxes(ax: Axes) -> list[Bbox]:
    """Display extents of every error bar and replicate range (line segments, padded by their width) and cap."""
    to_pixels = ax.figure.dpi / 72  # points to pixels (1 point = 1/72 inch)
    boxes = [Bbox(c.get_transform().transform(segment)).padded(c.get_linewidth()[0] * to_pixels / 2)
             for c in ax.collections if isinstance(c, LineCollection) for segment in c.get_segments()]
    for caps in (cap for container in ax.containers for cap in container.lines[1]):
        half = caps.get_markersize() * to_pixels / 2
        boxes += [Bbox.from_bounds(x - half, y - half, 2 * half, 2 * half)
                  for x, y in caps.get_transform().transform(caps.get_xydata())]
    return boxes


def _text_boxes(ax: Axes) -> dict[str, Bbox]:
    """Display extents of every text on the axes (with its box, if any) and of its legend."""
    boxes = {t.get_text(): Bbox.union([t.get_window_extent()] + ([t.get_bbox_patch().get_window_extent()]
                                                                  if t.get_bbox_patch() else []))
             for t in ax.texts}
    legend = ax.get_legend()
    return boxes | ({"legend": legend.get_window_extent()} if legend else {})


FIGURES_WITH_BARS = {"capacity_curves": capacity_curves, "recall_per_assembly": recall_per_assembly,
                     "capacity_against": lambda d: capacity_against(d, "beta" if "beta" in d.dims else "rule")}


@pytest.mark.parametrize("figure", FIGURES_WITH_BARS)
def test_no_label_or_legend_sits_on_an_error_bar(ds: xr.Dataset, rule_ds: xr.Dataset, figure: str) -> None:
    """In both stores (a pending count beside another condition's bar, a count with one replicate pending):
    no text or legend overlaps a bar or cap, read from the drawn figure's display coordinates."""
    for store in (ds, rule_ds):
        fig = FIGURES_WITH_BARS[figure](store)
        fig.canvas.draw()
        ax = fig.axes[0]
        bars = _bar_boxes(ax)
        assert bars
        assert not [name for name, box in _text_boxes(ax).items() if any(box.overlaps(bar) for bar in bars)]
        plt.close(fig)


def test_what_no_bar_shows_is_in_the_legend(ds: xr.Dataset, rule_ds: xr.Dataset) -> None:
    """beta 0.05 has no done replicate at count 2; triplet_only has one of two, the other pending."""
    curves = _labels(capacity_curves(ds).axes[0].get_legend().get_texts())
    assert curves[1] == "beta=0.05: capacity NA (n=2 per count; pending at 2)"
    rules = _labels(recall_per_assembly(rule_ds).axes[0].get_legend().get_texts())
    assert rules[0] == "rule=triplet_only (n=2 per count; n=1 +1 pending at 2)"


def test_legends_list_only_outcomes_present(ds: xr.Dataset) -> None:
    """PATTERN has stable and runaway points, no silent one."""
    (legend,) = weight_drift(ds).legends
    assert [t.get_text() for t in legend.get_texts()] == ["stable (n=8)", "runaway (n=2)"]


def test_prediction_confusion_counts_done_points(ds: xr.Dataset) -> None:
    """Predicted stable: 8 simulated stable and 1 runaway; predicted runaway: the other runaway (by hand)."""
    ax = prediction_confusion(ds).axes[0]
    np.testing.assert_array_equal(ax.get_images()[0].get_array(), [[8, 1, 0], [0, 1, 0], [0, 0, 0]])
    assert "9 of 10 done points agree" in ax.get_title()


def _spans(ax, gid: str) -> list[tuple[float, float]]:
    return sorted((p.get_x(), p.get_x() + p.get_width()) for p in ax.patches if p.get_gid() == gid)


def test_rate_trace_panels_name_their_point_and_shade_the_cues(ds: xr.Dataset) -> None:
    """Prewired assemblies, so no imprint phase: the hold starts after settle; a recall test at RETENTION_S
    into the hold and one at its end cue each assembly for CUE_S, one every CUE_S + GAP_S [derived from
    the protocol description in runners/protocol.py]. The cue order differs per point; the spans do not."""
    fig = rate_traces(ds, point_schedules(ds), per_outcome=1)
    panels = [ax for ax in fig.axes if ax.get_visible()]
    titles = [ax.get_title() for ax in panels]
    assert titles == ["n_odours=1, beta=0, replicate 0: stable", "n_odours=3, beta=0, replicate 0: runaway"]
    runaway = panels[1]
    starts = [SETTLE_S + RETENTION_S, SETTLE_S + HOLD_S]
    expected = sorted((s + k * (CUE_S + GAP_S), s + k * (CUE_S + GAP_S) + CUE_S) for s in starts for k in range(3))
    np.testing.assert_allclose(_spans(panels[0], "cue"), [(s, s + CUE_S) for s in starts], atol=1e-9)  # 1 odour
    # the runaway run stopped at STOPPED_S: nothing after it is shaded (it used to be, as if the run went on)
    until_stop = [(a, min(b, STOPPED_S)) for a, b in expected if a < STOPPED_S]
    assert len(until_stop) == 3 and until_stop[-1][1] == STOPPED_S  # 1.5-1.7, 2.2-2.4, 2.9-3.0 (cut)
    np.testing.assert_allclose(_spans(runaway, "cue"), until_stop, atol=1e-9)
    np.testing.assert_allclose(_spans(runaway, "settle"), [(0.0, SETTLE_S)])
    assert not _spans(runaway, "tail") and _spans(panels[0], "tail")
    assert not _spans(runaway, "imprint")
    assert [line.get_xdata()[0] for line in runaway.lines if line.get_gid() == "stopped"] == [STOPPED_S]
    assert not [line for line in panels[0].lines if line.get_gid() == "stopped"]


def test_a_timeline_that_disagrees_with_the_stored_cue_times_is_not_shaded(ds: xr.Dataset) -> None:
    schedules = point_schedules(ds)
    assert WRONG_CUES not in schedules and len(schedules) == ds["status"].size - 1
    assert point_schedules(ds.assign_attrs(sweep_text="")) == {}


def test_formats_and_dpi_are_written(ds: xr.Dataset, tmp_path: Path) -> None:
    written = all_plots(ds, tmp_path, formats=["svg,pdf", "png"], dpi=60, capacity_axis="beta")
    by_suffix = {s: sorted(p.stem for p in written.paths if p.suffix == s) for s in (".svg", ".pdf", ".png")}
    assert by_suffix[".svg"] == by_suffix[".pdf"] == by_suffix[".png"]
    assert set(by_suffix[".png"]) == {"stability_map", "rate_traces", "weight_drift", "capacity_curves",
                                      "recall_per_assembly", "capacity_against_beta", "predicted_vs_simulated"}
    png = (tmp_path / "stability_map.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    width_in = stability_map(ds, "n_odours", "beta").get_size_inches()[0]
    assert int.from_bytes(png[16:20], "big") == round(width_in * 60)  # PNG IHDR width, big endian (common practice)
    assert (tmp_path / "stability_map.svg").read_text().lstrip().startswith("<?xml")
    assert (tmp_path / "stability_map.pdf").read_bytes()[:5] == b"%PDF-"


DIMS = ("n_odours", "beta", "replicate")


@pytest.mark.parametrize(("x", "y"), [*((d, None) for d in DIMS), *((None, d) for d in DIMS), *((d, d) for d in DIMS),
                                      ("odours", None), (None, "odours")])
def test_no_option_combination_ends_in_a_traceback(store: Path, tmp_path: Path, x: str | None,
                                                   y: str | None) -> None:
    """Each sweep dim as --x, each as --y, each as both, unknown names: exit 0 with the figures, or one
    error line naming the option and the allowed dims, and no folder."""
    out = tmp_path / "figs"
    args = ["plot", str(store), "--out", str(out), "--dpi", "50"]
    args += ["--x", x] if x else []
    args += ["--y", y] if y else []
    result = CliRunner().invoke(app, args)
    assert "Traceback" not in result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)
    chosen_x = x or ("beta" if y == "n_odours" else "n_odours")
    if "odours" in (x, y) or chosen_x == y:
        assert result.exit_code == 2 and not out.exists()
        line, = result.output.strip().splitlines()
        assert ("--x" if x == "odours" else "--y") in line and all(d in line for d in DIMS if d != x)
    else:
        assert result.exit_code == 0, result.output
        assert (out / "stability_map.png").exists()


@pytest.mark.parametrize("extra", [["--format", "gif"], ["--dpi", "0"], ["--capacity-against", "n_odours"],
                                   ["--capacity-against", "odours"], []])
def test_bad_output_options_and_a_file_as_out_are_one_line(store: Path, tmp_path: Path, extra: list[str]) -> None:
    """Each is refused before anything is written; with no bad option, --out names an existing file."""
    out = tmp_path / "figs" if extra else tmp_path / "figs.png"
    if not extra:
        out.write_bytes(b"keep")
    result = CliRunner().invoke(app, ["plot", str(store), "--out", str(out), *extra])
    assert result.exit_code == 2 and "Traceback" not in result.output
    line, = result.output.strip().splitlines()
    assert (extra[0] if extra else "--out") in line
    assert out.read_bytes() == b"keep" if not extra else not out.exists()


SIZE_AXES = """
[[sweep.axis]]
name = "n_exc"
key = "network.n_exc"
values = [100, 200, 400, 800]

[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1, 2, 3]
"""
# (size index, count index, replicate) of 4 replicates, from "passes up to count c" per size and replicate: 100 cells
# fail at 1 odour in 1 of 4 (an interval open below the grid), 400 cells pass 2 odours in 3 of 4 (open above)
# and 800 cells 3 odours in 2 of 4 (censored above)
PASSES_UP_TO = {0: (0, 1, 1, 1), 1: (1, 1, 2, 2), 2: (1, 2, 2, 2), 3: (2, 3, 2, 3)}
SIZE_PATTERN: dict[tuple[int, int, int], tuple[str, int, str] | str] = {
    (i, k, r): ("stable", k, "stable") for i, tops in PASSES_UP_TO.items() for r, top in enumerate(tops)
    for k in range(3) if k + 1 > top}


def test_capacity_scaling_bars_are_the_fitted_intervals_and_open_ends_reach_the_grid(tmp_path: Path) -> None:
    """Each size's bar runs over its 95 % interval from `capsweep capacity`; where that interval is open (NA: it
    reaches past the counts run), the bar reaches the grid's end count and a marker there says so. Before, an open
    end drew no bar at all, which read as a narrow interval (the fixed-in-degree scaling store, December 2026)."""
    from capsweep.sweeps.capacity import capacity_report
    from capsweep.sweeps.plots import capacity_scaling

    text = sweep_text(SIZE_AXES).replace("replicates = 2", "replicates = 4")
    ds = open_dataset(filled_store(tmp_path / "sizes.zarr", text, SIZE_PATTERN, lambda index: 0.1))
    report = capacity_report(ds).set_index("n_exc")
    inside = report[report["censored"] == ""]
    fig = capacity_scaling(ds)
    assert fig is not None
    ax = fig.axes[0]
    for column, side, end in (("capacity_lo", "below", 1.0), ("capacity_hi", "above", 3.0)):
        opened = inside.index[inside[column].isna()].tolist()
        marks = [line for line in ax.get_lines() if line.get_label() == f"interval open {side} {end:g}"]
        assert len(marks) == (1 if opened else 0), (side, opened)
        if opened:
            assert list(marks[0].get_xdata()) == opened and set(marks[0].get_ydata()) == {end}
    assert inside["capacity_lo"].isna().any() and inside["capacity_hi"].isna().any()
    assert inside["capacity_lo"].notna().any() and inside["capacity_hi"].notna().any()
    bars = next(c for c in ax.collections if isinstance(c, LineCollection))
    for (x, low), (_, high) in bars.get_segments():
        row = inside.loc[round(x)]
        assert low == pytest.approx(1.0 if np.isnan(row["capacity_lo"]) else row["capacity_lo"])
        assert high == pytest.approx(3.0 if np.isnan(row["capacity_hi"]) else row["capacity_hi"])


def test_capacity_says_why_a_store_over_sizes_gets_no_scaling_fit(tmp_path: Path) -> None:
    """Every size passing every count leaves every capacity censored above the grid: `capsweep capacity` used to
    print nothing about the fit then (the proportional scaling sweep mid-run, December 2026); it says what the fit
    needs. The SIZE_PATTERN store (three capacities inside the grid) gets its fit line and not that sentence."""
    from capsweep.sweeps.scaling_fit import NO_FIT

    text = sweep_text(SIZE_AXES).replace("replicates = 2", "replicates = 4")
    all_pass = filled_store(tmp_path / "all_pass.zarr", text, {}, lambda index: 0.1)
    fitted = filled_store(tmp_path / "sizes.zarr", text, SIZE_PATTERN, lambda index: 0.1)
    said = {name: CliRunner().invoke(app, ["capacity", str(path)]) for name, path in
            (("all_pass", all_pass), ("fitted", fitted))}
    assert all(result.exit_code == 0 for result in said.values()), {k: r.output for k, r in said.items()}
    assert NO_FIT in said["all_pass"].output and "capacity ~" not in said["all_pass"].output
    assert NO_FIT not in said["fitted"].output and "capacity ~" in said["fitted"].output
