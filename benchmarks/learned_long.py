"""Recall against time in the long learned example (configs/learned-long.toml): numbers and one figure.

Run the sweep first (about 15 min on 2 cores), then plot::

    capsweep run configs/learned-long.toml
    python benchmarks/learned_long.py [--store results/odour-learned-long.zarr] [--out results/learned-long.png]

Prints, per point: outcome, runaway onset, wall and simulated time, recalled count, the mean recall
score of every recall test (hold delay in s) and the E->E pathway weights at hold start and end.
The figure has three panels: the E rate over the whole run (1 s moving average) with the learning
phase shaded, the mean within/inflow/outflow E->E weight over the hold snapshots, and the mean
recall score of each test against its time after hold start (full-rule points only).
"""

from __future__ import annotations

import argparse
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import xarray as xr
from matplotlib.figure import Figure

from capsweep.registry import BY_PATH
from capsweep.results_schema.dataset import open_dataset
from capsweep.sweeps.query import labelled

PATHWAYS = {"weight_within": "within", "weight_in": "inflow", "weight_out": "outflow"}


def _report(ds: xr.Dataset, outcome: xr.DataArray) -> None:
    for rule in ds["rule"].values:
        for count in ds["n_odours"].values:
            d = ds.sel(rule=rule, n_odours=count, replicate=0)
            tests = ", ".join(f"{t:g} s: {s:.2f}" for t, s in zip(d["retention_delay_s"].values,
                                                                 d["retention_score"].values))
            print(f"{rule}, {count} odours: {outcome.sel(rule=rule, n_odours=count, replicate=0).item()}, "
                  f"onset {float(d['runaway_onset_s']):.1f} s, wall {float(d['wall_time_s']):.0f} s for "
                  f"{float(d['simulated_time_s']):.0f} simulated s, recalled {int(d['recalled_count'])}; "
                  f"mean recall score per test ({tests}); weights within/in/out at hold start "
                  + "/".join(f"{float(d[v][0]):.3f}" for v in PATHWAYS) + ", at hold end "
                  + "/".join(f"{float(d[v][-1]):.3f}" for v in PATHWAYS))


def _figure(ds: xr.Dataset) -> Figure:
    fig, (rate_ax, weight_ax, recall_ax) = plt.subplots(1, 3, figsize=(13, 3.6))
    bin_s = float(ds.attrs["time_bin_s"])
    width = int(round(1.0 / bin_s))
    counts = ds["n_odours"].values
    for count, colour in zip(counts, plt.get_cmap("viridis")(np.linspace(0, 0.85, len(counts)))):
        d = ds.sel(rule="full", n_odours=count, replicate=0)
        ran = ds["time_bin"].values < float(d["simulated_time_s"])
        rate = np.convolve(d["rate_exc_hz"].values[ran], np.ones(width) / width, mode="same")
        rate_ax.plot(ds["time_bin"].values[ran], rate, lw=0.6, color=colour, label=f"{count} odours")
        hold_start = float(d["snapshot_time_s"][0])
        rate_ax.axvspan(0, hold_start, color=colour, alpha=0.06)
        for var, style in zip(PATHWAYS, ("-", "--", ":")):
            weight_ax.plot(d["snapshot_time_s"].values - hold_start, d[var].values, style, color=colour,
                           label=f"{PATHWAYS[var]}, {count} odours")
        recall_ax.plot(d["retention_delay_s"].values, d["retention_score"].values, "o-", color=colour,
                       label=f"{count} odours")
    triplet = ", ".join(f"{c}: {float(ds['runaway_onset_s'].sel(rule='triplet_only', n_odours=c, replicate=0)):.1f} s"
                        for c in ds["n_odours"].values)
    rate_ax.set(xlabel="time (s; shaded: learning)", ylabel="E rate (Hz)", title="E rate, 1 s moving average")
    rate_ax.text(0.02, 0.97, f"triplet STDP alone: runaway at\n{triplet}", transform=rate_ax.transAxes, fontsize=6,
                 va="top")
    weight_ax.set(xlabel="time after hold start (s)", ylabel="mean E->E weight (g_leak)", title="pathway weights")
    recall_ax.axhline(BY_PATH["detection.recall_threshold"].default, color="grey", lw=0.8, ls="--")
    recall_ax.set(xlabel="time after hold start (s)", ylabel="mean recall score", ylim=(0, 1),
                  title="recall of the cued odours")
    for ax in (rate_ax, weight_ax, recall_ax):
        ax.legend(fontsize=6)
    fig.suptitle("learned odour assemblies, full rule with bistable consolidation", fontsize=9)
    fig.tight_layout()
    return fig


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--store", type=Path, default=Path("results/odour-learned-long.zarr"))
    parser.add_argument("--out", type=Path, default=Path("results/learned-long.png"))
    args = parser.parse_args()
    ds = open_dataset(args.store)
    outcome = labelled(ds, "outcome")
    _report(ds, outcome)
    _figure(ds).savefig(args.out, dpi=130)
    print(f"figure: {args.out}")


if __name__ == "__main__":
    main()
