"""Figures of the prescreen: rate transfer curves, plasticity drift, agreement with a store (PNG, Agg)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from ..axes import REPLICATE
from ..flags import OUTCOMES, RUNAWAY
from ..runners.metrics import active_threshold
from ..runners.theory.drift import bcm_threshold_hz, drift_zero_crossings, rule_drift
from ..runners.theory.link import RUNAWAY_AT
from ..runners.theory.meanfield import TransferCurve, initial_weights, population_rates
from .ids import Point
from .prescreen import Comparison, grid_axes


def _mark_fixed_points(ax, curve: TransferCurve, color: str) -> None:
    for fp in curve.fixed_points:
        face = color if fp.stable else "white"
        ax.plot(fp.rate_hz, fp.rate_hz, "o", ms=8, mfc=face, mec=color, mew=1.5, zorder=3)
        ax.annotate(f"{fp.rate_hz:.1f} Hz", (fp.rate_hz, fp.rate_hz), textcoords="offset points",
                    xytext=(8, -14) if fp.stable else (-10, 10), ha="left" if fp.stable else "right",
                    fontsize=8, color=color)


def plot_transfer(cfg: dict, path: str | Path) -> Path:
    """Rate transfer curves vs the identity with fixed points (filled = stable, open = unstable).

    Left: whole E population (all E clamped at the input rate, I solved). Right: the focal
    assembly's members (co-members clamped at the input rate, rest solved), at the initial
    within weight and at w_max. Rates in Hz.
    """
    rates = population_rates(cfg, with_cue=False)
    fig, axes = plt.subplots(1, 2, figsize=(10, 4.2))
    ax = axes[0]
    curve = rates.background_curve
    ax.plot(curve.input_hz, curve.output_hz, color="C0", label="mean E output")
    _mark_fixed_points(ax, curve, "C0")
    zoom = max(20.0, 3.0 * max(fp.rate_hz for fp in curve.fixed_points))
    ax.set_xlim(0, zoom)
    ax.set_ylim(0, zoom)
    ax.set_title("Background (initial weights), low-rate range")
    ax.set_xlabel("presynaptic E rate (Hz)")
    ax.set_ylabel("output E rate (Hz)")
    ax = axes[1]
    if rates.assembly_curve is not None:
        w0 = initial_weights(cfg)
        w_max = cfg["plasticity"]["triplet"]["w_max"]
        on_hz = active_threshold(cfg["detection"], rates.background_exc_hz)
        at_max = population_rates(cfg, replace(w0, within=w_max), with_cue=False, active_hz=on_hz)
        for member_curve, color, label in ((rates.assembly_curve, "C1", f"within w = {w0.within:g}"),
                                           (at_max.assembly_curve, "C3", f"within w = w_max = {w_max:g}")):
            if member_curve is not None:
                ax.plot(member_curve.input_hz, member_curve.output_hz, color=color, label=label)
                _mark_fixed_points(ax, member_curve, color)
        ax.axhline(on_hz, color="grey", ls=":", lw=1, label=f"active threshold {on_hz:.1f} Hz")
    else:
        ax.text(0.5, 0.5, "no assemblies", ha="center", transform=ax.transAxes)
    ax.set_title("Assembly members (other groups solved)")
    ax.set_xlabel("co-member rate (Hz)")
    ax.set_ylabel("member output rate (Hz)")
    for ax in axes:
        lim = ax.get_xlim()
        ax.plot(lim, lim, "k--", lw=1, label="identity")
        ax.set_xlim(0, lim[1])
        ax.set_ylim(0, lim[1])
        ax.legend(fontsize=8, loc="upper left")
    fig.tight_layout()
    return _save(fig, path)


def plot_drift(cfg: dict, path: str | Path, rate_pre_hz: float | None = None,
               ratios: tuple[float, ...] = (0.5, 1.0, 1.5, 2.0), max_rate_hz: float = 100.0) -> Path:
    """Rate-form E->E drift (g_leak/s) vs post rate at a few w/w_ref, zero crossings marked.

    ``rate_pre_hz`` defaults to 10 Hz. w_ref is the initial E->E weight. The vertical line is
    the BCM-like threshold of the triplet part. The y axis is symlog so the LTD dip shows.
    """
    pre = 10.0 if rate_pre_hz is None else rate_pre_hz
    w_ref = cfg["network"]["w_e_to_e"]
    post = np.linspace(0.0, max_rate_hz, 800)
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for i, ratio in enumerate(ratios):
        w = ratio * w_ref
        drift = [rule_drift(cfg, pre, r, w, w_ref) for r in post]
        ax.plot(post, drift, color=f"C{i}", label=f"w/w_ref = {ratio:g}")
        for x in drift_zero_crossings(cfg, pre, w, w_ref, max_rate_hz):
            ax.plot(x, 0.0, "o", color=f"C{i}", ms=6)
    theta = bcm_threshold_hz(cfg)
    if np.isfinite(theta) and theta <= max_rate_hz:
        ax.axvline(theta, color="grey", ls=":", label=f"BCM-like threshold {theta:.1f} Hz")
    ax.axhline(0.0, color="k", lw=0.8)
    ax.set_yscale("symlog", linthresh=1e-4)
    ax.set_xlabel("postsynaptic rate (Hz)")
    ax.set_ylabel("mean drift dw/dt (g_leak / s)")
    ax.set_title(f"E->E rule drift, presynaptic rate {pre:g} Hz, w_ref = {w_ref:g} g_leak")
    ax.legend(fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def _save(fig, path: str | Path) -> Path:
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out


def plot_agreement(result: Comparison, path: str | Path) -> Path:
    """Three panels: the confusion table of outcomes, the runaway chance against the simulated runaway fraction per
    grid point, and the stability bound against the simulated capacity per condition."""
    fig, axes = plt.subplots(1, 3, figsize=(15, 4.4))
    _confusion_panel(axes[0], result.confusion, result.agreement, result.ceiling)
    _chance_panel(axes[1], result.points)
    _capacity_panel(axes[2], result.capacity)
    fig.tight_layout()
    return _save(fig, path)


def _confusion_panel(ax: plt.Axes, confusion: pd.DataFrame, agreement: float, ceiling: float) -> None:
    """Heatmap of point counts: rows predicted, columns simulated outcome."""
    labels = list(OUTCOMES)
    table = confusion.reindex(index=labels, columns=labels, fill_value=0).fillna(0).to_numpy(dtype=int)
    ax.imshow(table, cmap="Blues")
    for (i, j), n in np.ndenumerate(table):
        ax.text(j, i, str(n), ha="center", va="center", color="white" if n > table.max() / 2 else "black")
    ax.set_xticks(range(3), labels)
    ax.set_yticks(range(3), labels)
    ax.set_xlabel("simulated outcome")
    ax.set_ylabel("predicted outcome")
    ax.set_title(f"Outcome per point: agreement {agreement:.0%} (ceiling {ceiling:.0%})")


def _chance_panel(ax: plt.Axes, points: pd.DataFrame) -> None:
    """Per grid point: predicted runaway chance against the fraction of its replicates that ran away (marker area:
    replicates done). A calibrated link puts the points around the identity."""
    grouped = points.assign(ran=points["outcome"] == RUNAWAY).groupby(grid_axes(points), sort=False)
    per_point = grouped.agg(chance=("runaway_chance", "first"), fraction=("ran", "mean"), n=("ran", "size"))
    ax.scatter(per_point["chance"], per_point["fraction"], s=25 * per_point["n"], alpha=0.5, color="C3",
               label="grid point")
    ax.plot([0, 1], [0, 1], "k--", lw=1, label="identity")
    ax.axvline(RUNAWAY_AT, color="grey", lw=0.8, ls=":", label=f"predicted runaway from {RUNAWAY_AT:.0%}")
    ax.set_xlim(-0.03, 1.03)
    ax.set_ylim(-0.05, 1.05)
    ax.set_xlabel("predicted runaway chance")
    ax.set_ylabel("simulated runaway fraction (replicates)")
    ax.set_title("Runaway chance per grid point")
    ax.legend(fontsize=8, loc="lower right")


def _capacity_panel(ax: plt.Axes, capacity: pd.DataFrame) -> None:
    """Stability bound against simulated capacity per condition (open markers: the simulated capacity is only a
    lower bound, the top of the grid). The bound ignores recall, so points above the identity are expected."""
    if capacity.empty or capacity["capacity"].isna().all():
        ax.text(0.5, 0.5, "no capacity (no count axis or undecided conditions)", ha="center", transform=ax.transAxes)
    else:
        decided = capacity.dropna(subset=["capacity"])
        sim = decided["capacity"].astype(float).to_numpy()
        pred = decided["stability_bound"].astype(float).to_numpy()
        jitter = np.linspace(-0.12, 0.12, len(sim)) if len(sim) > 1 else np.zeros(1)
        bound = decided["at_least"].astype(bool).to_numpy()
        ax.plot(sim[~bound] + jitter[~bound], pred[~bound], "o", color="C0", label="simulated capacity")
        ax.plot(sim[bound] + jitter[bound], pred[bound], "o", mfc="white", color="C0", label="simulated: at least")
        top = max(sim.max(), pred.max()) + 0.5
        ax.plot([-0.5, top], [-0.5, top], "k--", lw=1, label="identity")
        ax.set_xlim(-0.5, top)
        ax.set_ylim(-0.5, top)
        ax.legend(fontsize=8, loc="upper left")
    ax.set_xlabel("simulated capacity (assemblies)")
    ax.set_ylabel("prescreen stability bound (assemblies)")
    ax.set_title("Capacity per condition")


def write_point_plots(points: list[Point], plots_dir: Path) -> list[Path]:
    """Transfer and drift PNGs per grid point, named after the point's axis values."""
    plots_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for point in points:
        stem = "_".join(f"{k}-{v}" for k, v in point.labels.items() if k != REPLICATE) or "base"
        paths.append(plot_transfer(point.config, plots_dir / f"transfer_{stem}.png"))
        paths.append(plot_drift(point.config, plots_dir / f"drift_{stem}.png"))
    return paths
