"""Figures of a store: stability map, capacity curves, capacity against an axis, recall per assembly,
prescreen prediction against simulated outcome, rate traces, weight drift.

Every figure function returns a matplotlib Figure (Agg) and writes nothing, so its axes can be read
back. :func:`all_plots` checks every option against the store first, draws every figure that fits,
and only then creates the folder and saves each figure in the asked formats: an error leaves
nothing behind. Points that are not done (pending or crashed) are never drawn as 0: they are
marked as such or left out with their count stated.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.artist import Artist
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator, NullFormatter

from ..axes import COUNT_KEY, REPLICATE
from ..errors import CapsweepError
from ..flags import DONE, OUTCOMES, PENDING, RUNAWAY, UNNEEDED
from ..outputs import check_folder, make_folder
from ..results_schema import attrs
from ..runners.protocol import Schedule, cue_order, recall_end, schedule
from .capacity import (
    MIN_FRACTION,
    capacity_report,
    capacity_table,
    count_dim,
    network_sizes,
    point_success,
    scaling_fit,
    success_table,
    wilson_interval,
)
from .expand import recorded_points
from .query import QueryError, axis_keys, labelled, sweep_dims

OUTCOME_COLOURS = dict(zip(OUTCOMES, ("tab:green", "tab:red", "tab:grey")))
FORMATS = ("png", "svg", "pdf")
"""Figure file formats ``--format`` accepts."""
DEFAULT_DPI = 200
"""Resolution of raster output (dots per inch)."""
DPI_RANGE = (50, 1200)
NO_DATA_COLOUR = "0.85"
"""Colour of map tiles and marks that hold no done point."""
PHASE_COLOURS = {"settle": "0.85", "imprint": "tab:purple", "final recall": "tab:blue", "tail": "0.92"}
CUE_COLOUR = "tab:orange"
LEGEND_BESIDE_WIDTH = 9.0
"""Width (inches) of a one-axes figure whose legend stands right of its axes."""


@dataclass(frozen=True)
class PlotSet:
    """What :func:`all_plots` wrote, and why a figure was left out (one sentence each)."""

    paths: list[Path]
    notes: list[str] = field(default_factory=list)


# ---------------------------------------------------------------- options


def map_axes(ds: xr.Dataset, x: str | None = None, y: str | None = None) -> tuple[str, str | None]:
    """The stability map's dims: ``x`` (default the first axis) and ``y`` (default the first other axis;
    None for a one-row map when there is none). QueryError naming the option and the allowed dims."""
    dims = sweep_dims(ds)
    for option, name in (("--x", x), ("--y", y)):
        if name is not None and name not in dims:
            raise QueryError(f"{option} {name!r} is not a sweep dim of this store; allowed: {', '.join(dims)}")
    axes = [d for d in dims if d != REPLICATE]
    x = x or next((d for d in axes if d != y), REPLICATE)
    if x == y:
        raise QueryError(f"--y {y!r} is the same dim as --x; choose another of: {', '.join(d for d in dims if d != x)}")
    return x, y or next((d for d in axes if d != x), None)


def output_formats(formats: Sequence[str] | None) -> tuple[str, ...]:
    """Formats from repeated and/or comma-separated ``--format`` values (default PNG only)."""
    names = [f.strip().lower() for item in formats or () for f in item.split(",") if f.strip()]
    bad = [n for n in names if n not in FORMATS]
    if bad:
        raise CapsweepError(f"--format {bad[0]!r} is not allowed: expected {', '.join(FORMATS)} "
                            "(repeat the option or separate with commas)")
    return tuple(dict.fromkeys(names)) or ("png",)


def check_dpi(dpi: int) -> int:
    """``dpi`` if it lies in DPI_RANGE, else CapsweepError naming --dpi."""
    if not DPI_RANGE[0] <= dpi <= DPI_RANGE[1]:
        raise CapsweepError(f"--dpi {dpi} is not allowed: expected a whole number from {DPI_RANGE[0]} to "
                            f"{DPI_RANGE[1]}")
    return dpi


def capacity_axes(ds: xr.Dataset, axis: str | None = None) -> list[str]:
    """Axes to draw capacity against: ``axis`` (checked), else every axis but the count (none without one)."""
    keys = axis_keys(ds)
    if axis is None:
        return [d for d, k in keys.items() if k != COUNT_KEY] if COUNT_KEY in keys.values() else []
    count = count_dim(ds)
    allowed = [d for d in keys if d != count]
    if axis not in allowed:
        raise QueryError(f"--capacity-against {axis!r} is not allowed: expected a sweep axis other than "
                         f"{count}: {', '.join(allowed) or 'this store has none'}")
    return [axis]


# ---------------------------------------------------------------- stability map


def stability_map(ds: xr.Dataset, x: str, y: str | None = None) -> Figure:
    """Fraction of done points stable with full recall per (y, x) tile, pooled over the other sweep dims.

    Each tile states the fraction, its 95 % Wilson interval, n (done points), the runaway fraction and
    how many points are pending; a tile without a done point is grey, hatched and labelled.
    """
    success, status = point_success(ds), labelled(ds, "status")
    kept = [x] + ([y] if y else [])
    pooled = [str(d) for d in success.dims if d not in kept]

    def grid(values: xr.DataArray) -> np.ndarray:
        summed = values.sum(pooled)
        return summed.transpose(y, x).values if y else summed.values[None, :]

    done, wins = grid(success.notnull()).astype(int), grid(success.fillna(0)).astype(int)
    runaway, pending = grid(labelled(ds, "outcome") == RUNAWAY), grid(status == PENDING)
    frac = np.ma.masked_where(done == 0, wins / np.maximum(done, 1))
    fig, ax = plt.subplots(figsize=(max(5.0, 1.6 + 1.3 * frac.shape[1]), max(2.6, 1.4 + 0.9 * frac.shape[0])))
    image = ax.imshow(frac, origin="lower", cmap=plt.get_cmap("viridis").with_extremes(bad=NO_DATA_COLOUR),
                      vmin=0, vmax=1, aspect="auto")
    for (i, j), n in np.ndenumerate(done):
        ax.text(j, i, _tile_text(int(wins[i, j]), int(n), int(runaway[i, j]), int(pending[i, j])), ha="center",
                va="center", fontsize=6.5, color="white" if n and frac[i, j] < 0.6 else "black")
        if not n:
            ax.add_patch(plt.Rectangle((j - 0.5, i - 0.5), 1, 1, fill=False, hatch="///", lw=0, ec="0.6"))
    _category_ticks(ax.set_xticks, ds, x)
    ax.set_xlabel(_axis_label(ds, x))
    if y:
        _category_ticks(ax.set_yticks, ds, y)
        ax.set_ylabel(_axis_label(ds, y))
    else:
        ax.set_yticks([])
    ax.set_title("fraction stable with full recall [95 % Wilson], n done points, R runaway fraction\n"
                 + _pooled_text(pooled), fontsize=8)
    fig.colorbar(image, ax=ax, label="fraction of done points")
    return _finish(fig)


def _tile_text(wins: int, n: int, runaway: int, pending: int) -> str:
    """A stability-map tile: fraction, Wilson interval, n, runaway fraction; or why it holds no fraction."""
    waiting = f"{pending} pending" if pending else ""
    if not n:
        return waiting or "no done point"
    low, high = wilson_interval(wins, n)
    lines = [f"{wins / n:.2f} (n={n})", f"[{low:.2f}, {high:.2f}]", f"R {runaway / n:.2f}"]
    return "\n".join(lines + ([f"+{waiting}"] if waiting else []))


def _pooled_text(pooled: list[str]) -> str:
    """'pooled over rule, beta and replicate' (the dims a map tile sums over)."""
    if not pooled:
        return "one point per tile"
    return "pooled over " + (f"{', '.join(pooled[:-1])} and {pooled[-1]}" if len(pooled) > 1 else pooled[0])


# ---------------------------------------------------------------- capacity


def capacity_curves(ds: xr.Dataset, min_fraction: float = MIN_FRACTION) -> Figure:
    """Success fraction against assembly count with 95 % Wilson intervals, one line per condition (combination of
    the other axes).

    Counts without a done replicate are not drawn; the legend (beside the axes) gives each condition's capacity,
    its n of done replicates per count, the counts with fewer or with pending replicates and their n, and the
    counts not drawn and why ("pending at 2"). The dashed line is the fraction capacity requires.
    """
    count = count_dim(ds)
    table = success_table(ds)
    capacities = capacity_table(ds, min_fraction)
    others = _other_axes(ds)
    shown = ["NA" if pd.isna(c.capacity) else f"{'>=' if c.at_least else ''}{c.capacity}"
             for c in capacities.itertuples()]
    missing = np.select([table[PENDING] > 0, table[UNNEEDED] > 0], [PENDING, "not needed by the search"],
                        "crashed")
    fig, ax = plt.subplots(figsize=(LEGEND_BESIDE_WIDTH, 4.0))
    _count_lines(ax, table.assign(missing=missing), count, others, ("fraction", "wilson_lo", "wilson_hi"),
                 [f": capacity {c}" for c in shown])
    ax.axhline(min_fraction, color="grey", ls="--", lw=0.8)
    ax.set_xlabel(_axis_label(ds, count))
    ax.set_ylabel("fraction of replicates: stable, all recalled")
    ax.set_ylim(-0.05, 1.05)
    _legend_beside(ax)
    ax.set_title("capacity curves (95 % Wilson intervals; one line per " + (", ".join(others) or "store")
                 + f"; dashed: {min_fraction:g})", fontsize=8)
    return _finish(fig)


def _count_lines(ax: plt.Axes, table: pd.DataFrame, count: str, others: list[str], columns: tuple[str, str, str],
                 legend_extra: list[str] | None = None) -> None:
    """One line per condition of the ``others`` axes (table order): the ``columns`` (value, low, high) against
    ``count`` with bars from low to high, integer ticks at the counts; ``legend_extra`` follows each condition's
    legend label. Rows need ``n`` (values behind a point) and ``pending``; a row with n = 0 is not drawn. Its
    ``missing`` text, and the n of a point with fewer values than the condition's most or with pending ones, go in
    the condition's legend label (beside the axes): written beside a point they covered a neighbour's bar."""
    value, low, high = columns
    groups = _groups(table, others)
    for i, ((key, rows), extra) in enumerate(zip(groups, legend_extra or [""] * len(groups))):
        dodge = 0.05 * (i - (len(groups) - 1) / 2)  # side by side, so the bars stay readable
        drawn = rows[rows["n"] > 0]
        n_most = int(drawn["n"].max()) if len(drawn) else 0
        fewer = drawn[(drawn["n"] < n_most) | (drawn[PENDING] > 0)]
        notes = _where([f"n={r.n}" + (f" +{r.pending} pending" if r.pending else "") for r in fewer.itertuples()],
                       fewer[count])
        notes += _where(rows["missing"][rows["n"] == 0], rows[count][rows["n"] == 0])
        yerr = np.vstack([drawn[value] - drawn[low], drawn[high] - drawn[value]])
        ax.errorbar(drawn[count] + dodge, drawn[value], yerr=yerr, marker="o", capsize=3,
                    label=f"{_condition_label(others, key)}{extra} (" + "; ".join([f"n={n_most} per count", *notes])
                    + ")")
    _integer_ticks(ax.set_xticks, sorted(table[count].unique()))


def capacity_against(ds: xr.Dataset, axis: str, min_fraction: float = MIN_FRACTION) -> Figure:
    """Capacity of each condition (value of the remaining axes) against ``axis``: a line on a numeric axis; on a
    categorical one (rule names have no order) separate marks, joined by no line. The vertical bar is the range of
    the per-replicate capacities, a triangle a lower bound (top of the count grid); an undecided capacity (NA) is
    not drawn, its value and reason named in the legend (beside the axes, where no text covers a bar)."""
    count = count_dim(ds)
    table = capacity_table(ds, min_fraction)
    others = [d for d in _other_axes(ds) if d != axis]
    values = list(ds[axis].values)
    numeric = ds[axis].dtype.kind in "iuf"
    spacing = float(np.ptp(values)) / max(len(values) - 1, 1) if numeric else 1.0
    fig, ax = plt.subplots(figsize=(LEGEND_BESIDE_WIDTH, 4.0))
    groups = _groups(table, others)
    for i, (key, rows) in enumerate(groups):
        dodge = 0.06 * spacing * (i - (len(groups) - 1) / 2)
        x = np.array([(v if numeric else values.index(v)) for v in rows[axis]], dtype=float) + dodge
        known = rows["capacity"].notna().to_numpy()
        undecided = _where([PENDING if row.pending else "crashed" for row in rows[~known].itertuples()],
                           rows[axis][~known])
        line, = ax.plot(x[known], rows["capacity"][known].astype(float), marker="o", ls="-" if numeric else "none",
                        label=_condition_label(others, key) + (f" (NA, {'; '.join(undecided)})" if undecided else ""))
        colour = line.get_color()
        ranged = rows["capacity_lo"].notna().to_numpy()
        ax.vlines(x[ranged], rows["capacity_lo"][ranged].astype(float), rows["capacity_hi"][ranged].astype(float),
                  colors=colour, lw=2.5, alpha=0.4, gid="replicate_range")
        top = (rows["at_least"] & known).to_numpy()
        ax.plot(x[top], rows["capacity"][top].astype(float), "^", ms=9, mfc="none", mec=colour)
    if numeric:
        (_integer_ticks if ds[axis].dtype.kind in "iu" else _value_ticks)(ax.set_xticks, values)
    else:
        _category_ticks(ax.set_xticks, ds, axis)
        ax.set_xlim(-0.5, len(values) - 0.5)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.plot([], [], "^", mfc="none", mec="k", label="at least (top of the count grid)")
    ax.plot([], [], color="k", lw=2.5, alpha=0.4, label="range over replicates")
    ax.set_xlabel(_axis_label(ds, axis))
    ax.set_ylabel(f"capacity ({count})")
    _legend_beside(ax)
    ax.set_title(f"capacity against {axis} (every count up to it succeeds in >= {min_fraction:g} of replicates)",
                 fontsize=8)
    return _finish(fig)


def capacity_scaling(ds: xr.Dataset) -> Figure | None:
    """Capacity against network size (log-log): fitted capacities with their 95 % intervals, censored ones as
    arrows from their bound, and the fitted power law.

    None when there is no scaling fit (see :func:`capsweep.sweeps.capacity.scaling_fit`).
    """
    fit = scaling_fit(ds)
    if fit is None:
        return None
    sizes, count = network_sizes(ds), count_dim(ds)
    assert sizes is not None, "a scaling fit has network sizes"
    size = sizes[0]
    fig, ax = plt.subplots(figsize=(5.5, 4.0))
    table = capacity_report(ds)
    table["n_exc_cells"] = table[size].map(sizes[1])
    inside = table[table["censored"] == ""]
    # an interval open at an end (NA: it reaches past the counts) is drawn to the grid's end count, marked there
    ends = {"capacity_lo": float(ds[count].min()), "capacity_hi": float(ds[count].max())}
    bars = [(inside["capacity"] - inside["capacity_lo"].fillna(ends["capacity_lo"])).clip(lower=0),
            (inside["capacity_hi"].fillna(ends["capacity_hi"]) - inside["capacity"]).clip(lower=0)]
    ax.errorbar(inside["n_exc_cells"], inside["capacity"], yerr=bars, fmt="o", color="C0",
                label="fitted capacity (bar: 95 % interval)")
    for column, marker, side in (("capacity_lo", "v", "below"), ("capacity_hi", "^", "above")):
        open_end = inside[inside[column].isna()]
        ax.plot(open_end["n_exc_cells"], [ends[column]] * len(open_end), marker, color="C0", ls="none",
                label=f"interval open {side} {ends[column]:g}" if len(open_end) else None)
    for side, marker in (("above", "^"), ("below", "v")):
        rows = table[table["censored"] == side]
        ax.plot(rows["n_exc_cells"], rows["bound"].astype(float), marker, color="C2", ls="none",
                label=f"censored {side} (bound)" if len(rows) else None)
    grid = np.geomspace(min(fit.sizes), max(fit.sizes), 50)
    ax.plot(grid, fit.prefactor * grid**fit.exponent, color="C1",
            label=f"fit: exponent {fit.exponent:.2f} [{fit.exponent_low:.2f}, {fit.exponent_high:.2f}]")
    ax.set_xscale("log")
    ax.set_yscale("log")
    _integer_ticks(ax.set_xticks, sorted(set(fit.sizes)))
    top = np.nanmax(table[["capacity", "capacity_hi"]].to_numpy(float).ravel().tolist()
                    + table["bound"].astype(float).tolist())
    _integer_ticks(ax.set_yticks, range(1, int(top) + 2))
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_minor_formatter(NullFormatter())
    ax.set_xlabel(_axis_label(ds, str(size)) if ds[size].dtype.kind in "iuf" else "excitatory cells (n_exc)")
    ax.set_ylabel(f"capacity ({count})")
    ax.legend(fontsize=7)
    ax.set_title("capacity against network size (95 % profile-likelihood interval on the exponent)"
                 + ("\n" + "; ".join(fit.caveats) if fit.caveats else ""), fontsize=7)
    return _finish(fig)


# ---------------------------------------------------------------- recall and prediction


def recall_per_assembly(ds: xr.Dataset) -> Figure:
    """Recall score per assembly (mean over a done point's assemblies) against assembly count: mean over
    replicates with their range as bars, one line per condition of the other axes; counts without a scored
    replicate are not drawn, the legend names them with the reason (pending, crashed, or done without a recall
    score, as after an early abort) and the counts with fewer replicates than the most with their n."""
    count, status = count_dim(ds), labelled(ds, "status")
    per_point = ds["recall_score"].where(status == DONE).mean("assembly", skipna=True)
    stats = xr.Dataset({"mean": per_point.mean(REPLICATE), "lo": per_point.min(REPLICATE),
                        "hi": per_point.max(REPLICATE), "n": per_point.notnull().sum(REPLICATE),
                        **{label: (status == label).sum(REPLICATE) for label in (DONE, PENDING, UNNEEDED)}})
    table = stats.to_dataframe().reset_index().sort_values(count)
    missing = np.select([table[PENDING] > 0, table[UNNEEDED] > 0, table[DONE] > 0],
                        [PENDING, "not needed by the search", "no recall score"], "crashed")
    others = _other_axes(ds)
    fig, ax = plt.subplots(figsize=(LEGEND_BESIDE_WIDTH, 4.0))
    _count_lines(ax, table.assign(missing=missing), count, others, ("mean", "lo", "hi"))
    ax.set_xlabel(_axis_label(ds, count))
    ax.set_ylabel("recall score per assembly\n(1 perfect completion, 0 chance)")
    _legend_beside(ax)
    ax.set_title("recall per assembly: mean over replicates (bar: range over replicates)", fontsize=8)
    return _finish(fig)


def prediction_confusion(ds: xr.Dataset) -> Figure | None:
    """Counts of done points by prescreen-predicted outcome (rows) and simulated outcome (columns);
    None when no done point holds a prediction."""
    predicted = labelled(ds, "predicted_outcome").values.ravel()
    simulated = labelled(ds, "outcome").values.ravel()
    both = (labelled(ds, "status").values.ravel() == DONE) & (predicted != "") & (simulated != "")
    if not both.any():
        return None
    matrix = np.array([[np.sum(both & (predicted == p) & (simulated == s)) for s in OUTCOMES] for p in OUTCOMES])
    fig, ax = plt.subplots(figsize=(4.6, 3.8))
    image = ax.imshow(matrix, cmap="Blues", vmin=0)
    for (i, j), n in np.ndenumerate(matrix):
        ax.text(j, i, str(n), ha="center", va="center", fontsize=9,
                color="white" if n > 0.6 * matrix.max() else "black")
    ax.set_xticks(range(len(OUTCOMES)), OUTCOMES)
    ax.set_yticks(range(len(OUTCOMES)), OUTCOMES)
    ax.set_xlabel("simulated outcome")
    ax.set_ylabel("prescreen prediction")
    agree = int(np.trace(matrix))
    ax.set_title(f"prediction against simulation: {agree} of {int(matrix.sum())} done points agree", fontsize=8)
    fig.colorbar(image, ax=ax, label="done points")
    return _finish(fig)


# ---------------------------------------------------------------- time courses


def point_schedules(ds: xr.Dataset) -> dict[tuple[int, ...], Schedule]:
    """Protocol timeline of each point, from the sweep file text the store holds (``sweep_text``) and the
    point's stored seed (which draws its cue order).

    A timeline is kept only where it agrees with what the point stored: the start of each assembly's
    final cue (``cue_time_s``), where written. None at all when the store holds no readable sweep text.
    """
    points = recorded_points(ds.attrs, ds["point_id"].shape)
    seeds, stored = ds["seed"].values, ds["cue_time_s"].values
    timelines = {}
    for p in points:
        sched = schedule(p.config, cue_order(p.config["assemblies"]["count"], int(seeds[p.index])))
        planned = np.full(stored.shape[-1], np.nan)
        for k, start, _ in sched.cue_windows:
            planned[k] = sched.seconds(start)
        written = np.isfinite(stored[p.index])
        if np.allclose(stored[p.index][written], planned[written], atol=1e-9):
            timelines[p.index] = sched
    return timelines


def rate_traces(ds: xr.Dataset, schedules: dict[tuple[int, ...], Schedule], per_outcome: int = 3,
                smooth_s: float = 0.1) -> Figure:
    """Excitatory population rate (Hz; moving average over ``smooth_s`` s) of up to ``per_outcome`` done
    points per outcome spread over the grid, one panel per point titled with its labels; protocol phases
    and cue windows of ``schedules`` shaded up to where the run stopped, a dotted line where it stopped before its
    planned end."""
    outcome, status = labelled(ds, "outcome").values, labelled(ds, "status").values
    present = [o for o in OUTCOMES if np.any((status == DONE) & (outcome == o))]
    width = max(1, int(round(smooth_s / float(ds.attrs[attrs.TIME_BIN]))))
    t = ds["time_bin"].values
    fig, axs = plt.subplots(len(present), per_outcome, figsize=(3.6 * per_outcome, 2.3 * len(present)),
                            sharex=True, squeeze=False)
    shaded: set[str] = set()
    for ax_row, name in zip(axs, present):
        chosen = np.argwhere((status == DONE) & (outcome == name))
        picks = np.unique(np.linspace(0, len(chosen) - 1, per_outcome).round().astype(int))
        for ax, index in itertools.zip_longest(ax_row, (tuple(int(i) for i in chosen[k]) for k in picks)):
            if index is None:
                ax.set_visible(False)
                continue
            rate = ds["rate_exc_hz"].values[index]
            ax.plot(t, np.convolve(rate, np.ones(width) / width, mode="same"), lw=0.7, color=OUTCOME_COLOURS[name])
            stopped = float(ds["simulated_time_s"].values[index])
            shaded |= _shade_schedule(ax, schedules.get(index), stopped)
            if index in schedules and stopped < schedules[index].seconds(schedules[index].end):
                ax.axvline(stopped, color="k", ls=":", lw=1, gid="stopped")
                shaded.add("run stopped early")
            ax.set_title(_point_label(ds, index) + ("" if index in schedules else "\n(cue schedule unknown)"),
                         fontsize=7)
        ax_row[0].set_ylabel("E rate (Hz)")
    for ax in axs[-1]:
        ax.set_xlabel("time (s)")
    handles: list[Artist] = [Patch(color=c, alpha=_alpha(p), label=p)
                             for p, c in {**PHASE_COLOURS, "cue": CUE_COLOUR}.items() if p in shaded]
    handles += [Line2D([], [], color="k", ls=":", label="run stopped early")] if "run stopped early" in shaded else []
    if handles:
        fig.legend(handles=handles, loc="lower center", ncol=len(handles), fontsize=7, frameon=False)
    fig.suptitle(f"excitatory rate, {smooth_s * 1000:.0f} ms moving average (white: hold)", fontsize=9)
    fig.tight_layout(rect=(0, 0.05 if handles else 0, 1, 1))
    return fig


def _alpha(phase: str) -> float:
    return 0.35 if phase == "cue" else 0.12 if phase in ("imprint", "final recall") else 0.6


def _shade_schedule(ax: plt.Axes, sched: Schedule | None, until_s: float = np.inf) -> set[str]:
    """Shade the phases and every cue window of ``sched`` on ``ax`` up to ``until_s`` (s; where a run stopped
    early, nothing after it ran); the names shaded."""
    if sched is None:
        return set()
    spans = {"settle": (0, sched.settle_end), "imprint": (sched.settle_end, sched.imprint_end),
             "final recall": (sched.hold_end, recall_end(sched)), "tail": (recall_end(sched), sched.end)}
    windows = [(name, sched.seconds(a), sched.seconds(b)) for name, (a, b) in spans.items() if b > a]
    windows += [("cue", sched.seconds(a), sched.seconds(b)) for _, a, b in sched.all_cues]
    drawn = set()
    for name, start, stop in windows:
        if start < until_s:
            ax.axvspan(start, min(stop, until_s), color=CUE_COLOUR if name == "cue" else PHASE_COLOURS[name],
                       alpha=_alpha(name), lw=0, gid=name, zorder=0)
            drawn.add(name)
    return drawn


def weight_drift(ds: xr.Dataset, columns: int = 3) -> Figure:
    """Weight correlation with hold start against snapshot time (s) of every done point, coloured by outcome, one
    panel per condition (value of the axes other than the assembly count: each rule its own panel, never pooled
    with another); a panel holds its condition's counts and replicates, up to ``columns`` panels a row.
    Conditions without a done point are left out and counted in the title."""
    others = _other_axes(ds)
    status, outcome = labelled(ds, "status"), labelled(ds, "outcome")
    conditions = [dict(zip(others, c)) for c in itertools.product(*(range(ds.sizes[d]) for d in others))]
    conditions = [c for c in conditions if np.any(status.isel(c).values == DONE)]
    rows = -(-len(conditions) // columns)
    fig, axs = plt.subplots(rows, min(columns, len(conditions)), squeeze=False, sharex=True, sharey=True,
                            figsize=(0.4 + 3.3 * min(columns, len(conditions)), 0.8 + 2.6 * rows))
    for ax, condition in itertools.zip_longest(axs.flat, conditions):
        if condition is None:
            ax.set_visible(False)
            continue
        done = status.isel(condition).values.ravel() == DONE
        corr = ds["weight_correlation"].isel(condition).values.reshape(done.size, -1)[done]
        times = ds["snapshot_time_s"].isel(condition).values.reshape(done.size, -1)[done]
        for t, c, name in zip(times, corr, outcome.isel(condition).values.ravel()[done]):
            ax.plot(t, c, color=OUTCOME_COLOURS[name], alpha=0.6, marker=".")
        label = _condition_label(others, [_tick_text(ds[d].values[i]) for d, i in condition.items()])
        ax.set_title(f"{label} ({int(done.sum())} done)", fontsize=8)
    for ax in axs[-1]:
        ax.set_xlabel("time (s)")
    for ax in axs[:, 0]:
        ax.set_ylabel("corr(w(t), w(hold start))")
    names = outcome.values[status.values == DONE]
    fig.legend(handles=[Line2D([], [], color=OUTCOME_COLOURS[o], label=f"{o} (n={int(np.sum(names == o))})")
                        for o in OUTCOMES if o in names], loc="lower center", ncol=len(OUTCOMES), fontsize=7,
               frameon=False)
    left_out = int(np.prod([ds.sizes[d] for d in others])) - len(conditions)
    fig.suptitle("E->E weight drift during hold (done points)"
                 + (f"; {left_out} conditions without a done point left out" if left_out else ""), fontsize=9)
    fig.tight_layout(rect=(0, 0.06, 1, 1))
    return fig


# ---------------------------------------------------------------- all together


def all_plots(ds: xr.Dataset, out_dir: Path, x: str | None = None, y: str | None = None,
              formats: Sequence[str] | None = None, dpi: int | None = None,
              capacity_axis: str | None = None) -> PlotSet:
    """Check every option, draw every figure that fits the store, then write them into ``out_dir``
    (``dpi`` default DEFAULT_DPI, ``formats`` default PNG)."""
    x, y = map_axes(ds, x, y)
    kinds, dpi = output_formats(formats), check_dpi(DEFAULT_DPI if dpi is None else dpi)
    against = capacity_axes(ds, capacity_axis)
    check_folder(out_dir, "--out")
    figures, notes = _figures(ds, x, y, against)
    try:
        make_folder(out_dir, "--out")
        paths = [_save(fig, out_dir / f"{stem}.{kind}", dpi) for stem, fig in figures.items() for kind in kinds]
    finally:
        for fig in figures.values():
            plt.close(fig)
    return PlotSet(paths, notes)


def _figures(ds: xr.Dataset, x: str, y: str | None, against: list[str]) -> tuple[dict[str, Figure], list[str]]:
    """Every figure that fits ``ds``, by file stem, and a note for each one left out."""
    figures: dict[str, Figure] = {"stability_map": stability_map(ds, x, y)}
    notes = []
    if np.any(labelled(ds, "status").values == DONE):
        schedules = point_schedules(ds)
        figures["rate_traces"] = rate_traces(ds, schedules)
        figures["weight_drift"] = weight_drift(ds)
        if not schedules:
            notes.append("rate traces: no cue schedule shaded (the store holds no readable sweep file text)")
    else:
        notes.append("rate traces and weight drift left out: no point is done yet")
    if COUNT_KEY in axis_keys(ds).values():
        figures["capacity_curves"] = capacity_curves(ds)
        figures["recall_per_assembly"] = recall_per_assembly(ds)
        figures.update({f"capacity_against_{axis}": capacity_against(ds, axis) for axis in against})
        scaling = capacity_scaling(ds)
        figures.update({"capacity_scaling": scaling} if scaling is not None else {})
    else:
        notes.append(f"capacity figures left out: the store has no axis over {COUNT_KEY}")
    confusion = prediction_confusion(ds)
    if confusion is None:
        notes.append("prediction against simulation left out: no done point holds a prescreen prediction "
                     "(run with --prescreen)")
    else:
        figures["predicted_vs_simulated"] = confusion
    return figures, notes


# ---------------------------------------------------------------- helpers


def _other_axes(ds: xr.Dataset) -> list[str]:
    """Sweep axes other than the count axis (replicate excluded), in store order."""
    return [d for d, key in axis_keys(ds).items() if key != COUNT_KEY]


def _groups(table: pd.DataFrame, others: list[str]) -> list[tuple[Any, pd.DataFrame]]:
    """Rows of ``table`` per condition of the ``others`` axes, in table order (one group of all rows if none)."""
    return list(table.groupby(others, sort=False)) if others else [((), table)]


def _condition_label(others: list[str], key: Any) -> str:
    return ", ".join(f"{d}={_tick_text(v)}" for d, v in zip(others, np.atleast_1d(key))) or "all"


def _point_label(ds: xr.Dataset, index: tuple[int, ...]) -> str:
    """'n_odours=3, beta=0.05, replicate 1: runaway' for the point at positional ``index``."""
    dims = sweep_dims(ds)
    labels = [f"{d}={_tick_text(ds[d].values[i])}" for d, i in zip(dims, index) if d != REPLICATE]
    return ", ".join(labels + [f"replicate {index[-1]}: {labelled(ds, 'outcome').values[index]}"])


def _where(labels: Sequence[str], at: Sequence[Any]) -> list[str]:
    """'pending at 2, 3' for each distinct label (in order of first appearance): what holds at which axis values."""
    places: dict[str, list[str]] = {}
    for label, value in zip(labels, at):
        places.setdefault(label, []).append(_tick_text(value))
    return [f"{label} at {', '.join(values)}" for label, values in places.items()]


def _legend_beside(ax: plt.Axes) -> None:
    """The axes' legend right of it, outside the data, so no legend text covers a bar or a mark."""
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)


def _tick_text(value: Any) -> str:
    """A coordinate value as a label: integers as integers, reals in the shortest form, the rest as text."""
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return f"{value:g}" if isinstance(value, (float, np.floating)) else str(value)


def _category_ticks(set_ticks: Any, ds: xr.Dataset, dim: str) -> None:
    """One tick per coordinate value of ``dim`` at positions 0, 1, ..."""
    set_ticks(range(ds.sizes[dim]), [_tick_text(v) for v in ds[dim].values])


def _integer_ticks(set_ticks: Any, values: Any) -> None:
    """Ticks at whole-number data values, labelled without a decimal point."""
    ints = [int(v) for v in values]
    set_ticks(ints, [str(v) for v in ints])


def _value_ticks(set_ticks: Any, values: Any) -> None:
    """Ticks at the coordinate values of a real-valued axis."""
    set_ticks(list(values), [f"{v:g}" for v in values])


def _axis_label(ds: xr.Dataset, dim: str) -> str:
    key = ds[dim].attrs.get(attrs.AXIS_KEY, "")
    return f"{dim} ({key})" if key else dim


def _finish(fig: Figure) -> Figure:
    fig.tight_layout()
    return fig


def _save(fig: Figure, path: Path, dpi: int) -> Path:
    fig.savefig(path, dpi=dpi, format=path.suffix[1:])
    return path
