"""PNG pictures of a store: stability map, capacity curves, rate traces, weight drift.

All functions read a dataset opened with plain xarray and write one PNG (matplotlib, Agg).
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.ticker import MaxNLocator, NullFormatter
from matplotlib.typing import ColorType

from .capacity import MIN_FRACTION, capacity_table, count_dim, point_success, scaling_fit, size_dim, success_table
from .query import COUNT_KEY, QueryError, axis_keys, labelled

OUTCOME_COLOURS = {"stable": "tab:green", "runaway": "tab:red", "silent": "tab:grey"}


def stability_map(ds: xr.Dataset, path: Path, x: str | None = None, y: str | None = None) -> Path:
    """Heat map of the fraction of points stable with full recall over two axes (others averaged)."""
    axes = list(axis_keys(ds))
    x = x or (axes[0] if axes else "replicate")
    y = y or (axes[1] if len(axes) > 1 else "replicate")
    for name in (x, y):
        if name not in ds.dims:
            raise QueryError(f"--x/--y {name!r} is not a sweep axis; axes: {', '.join(axes + ['replicate'])}")
    frac = _average_to(point_success(ds), x, y)
    runaway = _average_to((labelled(ds, "outcome") == "runaway").astype(float), x, y)
    fig, ax = plt.subplots(figsize=(max(5.0, 1.5 + 1.1 * frac.sizes[x]), max(3.5, 1.2 + 0.7 * frac.sizes[y])))
    image = ax.imshow(frac.values, origin="lower", cmap="viridis", vmin=0, vmax=1, aspect="auto")
    for (i, j), value in np.ndenumerate(frac.values):
        label = f"{value:.2f}\nR {runaway.values[i, j]:.2f}"
        ax.text(j, i, label, ha="center", va="center", fontsize=7, color="white" if value < 0.6 else "black")
    ax.set_xticks(range(frac.sizes[x]), [str(v) for v in ds[x].values])
    ax.set_yticks(range(frac.sizes[y]), [str(v) for v in ds[y].values])
    ax.set_xlabel(_axis_label(ds, x))
    ax.set_ylabel(_axis_label(ds, y))
    ax.set_title("fraction stable with full recall (R = fraction runaway)", fontsize=9)
    fig.colorbar(image, ax=ax, label="fraction of points")
    return _save(fig, path)


def _average_to(values: xr.DataArray, x: str, y: str) -> xr.DataArray:
    """Mean of ``values`` over every dim but ``x`` and ``y`` (NaN left out), laid out (y, x)."""
    return values.mean([d for d in values.dims if d not in (x, y)], skipna=True).transpose(y, x)


def capacity_curves(ds: xr.Dataset, path: Path, min_fraction: float = MIN_FRACTION) -> Path:
    """Success fraction against assembly count with 95 % Wilson intervals, one line per cell of the other axes.

    Counts without a done replicate (pending or crashed) are not drawn (never as 0); the legend
    gives each cell's capacity and its number n of done replicates per count, a point with fewer
    is marked with its own n, and the dashed line is the fraction that capacity requires.
    """
    count = count_dim(ds)
    table = success_table(ds)
    capacities = capacity_table(ds, min_fraction)
    others = [c for c in capacities.columns if c in ds.dims and c != count]
    fig, ax = plt.subplots(figsize=(6.0, 4.0))
    groups = list(table.groupby(others, sort=False)) if others else [((), table)]
    for i, ((key, rows), (_, cap)) in enumerate(zip(groups, capacities.iterrows())):
        rows = rows[rows["n"] > 0]
        label = ", ".join(f"{d}={v}" for d, v in zip(others, np.atleast_1d(key))) or "all"
        shown = "NA" if pd.isna(cap["capacity"]) else f"{'>=' if cap['at_least'] else ''}{cap['capacity']}"
        yerr = np.vstack([rows["fraction"] - rows["wilson_lo"], rows["wilson_hi"] - rows["fraction"]])
        dodge = 0.05 * (i - (len(groups) - 1) / 2)  # side by side, so the intervals stay readable
        n_most = int(rows["n"].max()) if len(rows) else 0
        line = ax.errorbar(rows[count] + dodge, rows["fraction"], yerr=yerr, marker="o", capsize=3,
                           label=f"{label}: capacity {shown} (n={n_most} per count)")
        _mark_fewer(ax, rows[count] + dodge, rows["fraction"], rows["n"], n_most, line.lines[0].get_color())
    ax.axhline(min_fraction, color="grey", ls="--", lw=0.8)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel(_axis_label(ds, count))
    ax.set_ylabel("fraction of replicates: stable, all recalled")
    ax.set_ylim(-0.05, 1.05)
    ax.legend(fontsize=7, loc="best")
    ax.set_title("capacity curves (95 % Wilson intervals)", fontsize=9)
    return _save(fig, path)


def _mark_fewer(ax: plt.Axes, x: pd.Series, y: pd.Series, n: pd.Series, n_most: int, colour: ColorType) -> None:
    """Write its own n beside each point with fewer done replicates than the legend's n."""
    for xi, yi, ni in zip(x, y, n):
        if ni < n_most:
            ax.annotate(f"n={ni}", (xi, yi), xytext=(4, -10), textcoords="offset points", fontsize=6, color=colour)


def capacity_scaling(ds: xr.Dataset, path: Path) -> Path | None:
    """Capacity against network size (log-log): per-replicate capacities, their mean, the fitted power law.

    None when the store has no axis over network.n_exc (see :func:`capsweep.sweeps.capacity.scaling_fit`).
    """
    fit = scaling_fit(ds)
    if fit is None:
        return None
    size, count = size_dim(ds), count_dim(ds)
    fig, ax = plt.subplots(figsize=(5.5, 4.0))
    capacities = capacity_table(ds)
    for cell in capacities.itertuples():
        n = getattr(cell, str(size))
        if not pd.isna(cell.capacity_lo):
            ax.plot([n, n], [cell.capacity_lo, cell.capacity_hi], color="grey", lw=2, alpha=0.6)
    ax.plot(fit.sizes, fit.mean_capacity, "o", color="C0", label="mean over replicates (bar: range)")
    grid = np.geomspace(min(fit.sizes), max(fit.sizes), 50)
    ax.plot(grid, fit.prefactor * grid**fit.exponent, color="C1",
            label=f"fit: exponent {fit.exponent:.2f} [{fit.exponent_lo:.2f}, {fit.exponent_hi:.2f}]")
    for n in fit.lower_bounds:
        ax.annotate("top of grid", (n, fit.mean_capacity[fit.sizes.index(n)]), fontsize=7,
                    xytext=(4, 4), textcoords="offset points")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xticks(fit.sizes, [str(n) for n in fit.sizes])
    top = int(np.nanmax(capacities["capacity_hi"].astype(float))) + 1
    ax.set_yticks(range(1, top + 1), [str(k) for k in range(1, top + 1)])
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_minor_formatter(NullFormatter())
    ax.set_xlabel(_axis_label(ds, str(size)))
    ax.set_ylabel(f"capacity ({count}, per replicate)")
    ax.legend(fontsize=7)
    ax.set_title("capacity against network size (95 % bootstrap interval on the exponent)", fontsize=8)
    return _save(fig, path)


def rate_traces(ds: xr.Dataset, path: Path, per_outcome: int = 6, smooth_s: float = 0.1) -> Path:
    """Excitatory population rate against time (moving average over ``smooth_s`` s), a few points
    per outcome, one panel per outcome."""
    outcome = labelled(ds, "outcome").values.ravel()
    width = max(1, int(round(smooth_s / float(ds.attrs["time_bin_s"]))))
    raw = ds["rate_exc_hz"].values.reshape(outcome.size, -1)
    traces = np.apply_along_axis(lambda r: np.convolve(r, np.ones(width) / width, mode="same"), 1, raw)
    t = ds["time_bin"].values
    shown = [o for o in OUTCOME_COLOURS if np.any(outcome == o)] or ["stable"]
    fig, axs = plt.subplots(len(shown), 1, figsize=(7, 2.2 * len(shown)), sharex=True, squeeze=False)
    for ax, name in zip(axs[:, 0], shown):
        for row in np.flatnonzero(outcome == name)[:per_outcome]:
            ax.plot(t, traces[row], lw=0.7, color=OUTCOME_COLOURS[name], alpha=0.8)
        ax.set_ylabel("E rate (Hz)")
        ax.set_title(f"{name} points (up to {per_outcome}; {smooth_s * 1000:.0f} ms moving average)", fontsize=9)
    axs[-1, 0].set_xlabel("time (s)")
    return _save(fig, path)


def weight_drift(ds: xr.Dataset, path: Path) -> Path:
    """Weight correlation with hold start against snapshot time, coloured by outcome."""
    outcome = labelled(ds, "outcome").values.ravel()
    corr = ds["weight_correlation"].values.reshape(outcome.size, -1)
    times = ds["snapshot_time_s"].values.reshape(outcome.size, -1)
    fig, ax = plt.subplots(figsize=(5.5, 3.8))
    for row, name in enumerate(outcome):
        if name in OUTCOME_COLOURS:
            ax.plot(times[row], corr[row], color=OUTCOME_COLOURS[name], alpha=0.6, marker=".")
    for name, colour in OUTCOME_COLOURS.items():
        ax.plot([], [], color=colour, label=name)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("corr(w(t), w(hold start))")
    ax.legend(fontsize=7)
    ax.set_title("E->E weight drift during hold", fontsize=9)
    return _save(fig, path)


def all_plots(ds: xr.Dataset, out_dir: Path, x: str | None = None, y: str | None = None) -> list[Path]:
    """Write every picture that fits the store into ``out_dir``; return their paths."""
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = [
        stability_map(ds, out_dir / "stability_map.png", x, y),
        rate_traces(ds, out_dir / "rate_traces.png"),
        weight_drift(ds, out_dir / "weight_drift.png"),
    ]
    if any(k == COUNT_KEY for k in axis_keys(ds).values()):
        paths.append(capacity_curves(ds, out_dir / "capacity_curves.png"))
        scaling = capacity_scaling(ds, out_dir / "capacity_scaling.png")
        paths += [scaling] if scaling is not None else []
    return paths


def _axis_label(ds: xr.Dataset, dim: str) -> str:
    key = ds[dim].attrs.get("config_key", "")
    return f"{dim} ({key})" if key else dim


def _save(fig: plt.Figure, path: Path) -> Path:
    fig.tight_layout()
    fig.savefig(path, dpi=150)
    plt.close(fig)
    return path
