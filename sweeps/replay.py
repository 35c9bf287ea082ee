"""Rerun one stored point with its own seeds and engine, and look at it closely (``capsweep replay``).

The point is found by its id in the store; its config and seeds come from the sweep file recorded in the
store, its engine from the store's ``engine`` variable (the engine that actually ran it). The rerun keeps
every spike and weight snapshot, checks that its metrics equal the stored ones bit for bit (wall-clock
times aside), and writes:

- ``<id>_raster.png``: every E spike, cells sorted by their first assembly, I spike times below;
- ``<id>_rates.png``: E and I population rates and each assembly's rate (Hz per cell);
- ``<id>_weights.png``: the E->E weight matrix (g_leak) at each snapshot, cells sorted as in the raster;
- ``<id>.nwb``: the spikes in NWB 2 (one unit per E cell, with its assemblies; the I population's spikes as
  one more unit), readable with pynwb.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import zarr

from ..errors import CapsweepError
from ..flags import DONE
from ..outputs import fault, make_folder, new_file
from ..registry import with_execution
from ..results_schema import layout
from ..results_schema.store import encode_value, stored_attrs
from .identity import recorded_sweep
from .ids import Point, store_basis

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from ..runners.model import Handles
    from ..runners.scoring import Recording

UNCHECKED = (*layout.TIMINGS, "predicted_outcome")
"""Result variables a rerun cannot reproduce (wall-clock times) or does not compute (the prescreen's verdict)."""
INHIBITORY_UNIT = "inhibitory population"
"""Name of the NWB unit that holds every inhibitory spike (the runners keep I spike times, not I cell indices)."""


@dataclass
class Replay:
    """A rerun point: what it recorded, its metrics, and the stored variables it does not reproduce."""

    point: Point
    engine: str
    result: dict[str, object]
    handles: Handles
    recording: Recording
    differing: list[str]  # stored variables whose rerun value differs (empty: reproduced exactly)


def find_point(store: Path, point_id: str) -> tuple[Point, str]:
    """The point ``point_id`` of ``store`` (config and seeds from the recorded sweep) and the engine that ran it.

    Raises CapsweepError if the store has no such point or the point is not done.
    """
    from .expand import Grid

    stored = stored_attrs(store)
    basis = store_basis(stored)
    points = {p.point_id: p for p in Grid(recorded_sweep(store, stored, basis)).on_basis(basis).points()}
    if point_id not in points:
        raise CapsweepError(f"{store} has no point {point_id!r}; `capsweep query {store} --all --format csv` lists "
                            "the point_id of every point")
    point = points[point_id]
    status = layout.STATUS.flags[int(np.asarray(_stored(store, layout.STATUS.name)[point.index]))]
    if status != DONE:
        raise CapsweepError(f"point {point_id} is {status}, not {DONE}: only a done point has metrics to reproduce")
    return point, layout.BY_NAME["engine"].flags[int(np.asarray(_stored(store, "engine")[point.index]))]


def _stored(store: Path, name: str) -> zarr.Array:
    """The store's array of variable ``name`` (read only)."""
    return zarr.open_array(store / name, mode="r")


def replay(store: Path, point_id: str) -> Replay:
    """Rerun point ``point_id`` of ``store`` on the engine that ran it and compare its metrics with the stored ones."""
    from ..runners.point import run_point_recorded

    point, engine = find_point(store, point_id)
    config = with_execution(point.config, engine=engine)
    result, handles, recording = run_point_recorded(config, point.seed, point.wiring_seed)
    return Replay(point, engine, result, handles, recording, differing_variables(store, point, result))


def differing_variables(store: Path, point: Point, result: dict[str, object]) -> list[str]:
    """Stored variables of ``point`` that ``result`` does not reproduce bit for bit (:data:`UNCHECKED` aside)."""
    differing = []
    for var in layout.VARIABLES:
        if var.name in UNCHECKED:
            continue
        array = _stored(store, var.name)
        inner = array.shape[-1] if var.inner is not None else None
        fresh = np.asarray(encode_value(var, result[var.name], inner), dtype=array.dtype)
        if not np.array_equal(fresh, np.asarray(array[point.index]), equal_nan=fresh.dtype.kind == "f"):
            differing.append(var.name)
    return differing


def write_outputs(run: Replay, folder: Path, dpi: int = 150) -> list[Path]:
    """Write the figures and the NWB file of ``run`` into ``folder`` (created if missing; no file overwritten)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    stem = run.point.point_id
    targets = {kind: new_file(folder / f"{stem}_{kind}.png", "--out") for kind in ("raster", "rates", "weights")}
    nwb = new_file(folder / f"{stem}.nwb", "--out")
    make_folder(folder, "--out")
    written = []
    for kind, draw in (("raster", raster), ("rates", rates), ("weights", weights)):
        fig = draw(run)
        try:
            fig.savefig(targets[kind], dpi=dpi)
        except OSError as exc:
            raise fault(targets[kind], exc) from None
        finally:
            plt.close(fig)
        written.append(targets[kind])
    write_nwb(run, nwb)
    return [*written, nwb]


def cell_order(memberships: np.ndarray) -> np.ndarray:
    """E cells sorted by their first assembly (cells in none last), for rasters and weight matrices."""
    first = np.where(memberships.any(axis=0), memberships.argmax(axis=0), memberships.shape[0])
    return np.argsort(first, kind="stable")


def raster(run: Replay) -> Figure:
    """Every E spike (cells sorted by assembly, members coloured) and the I spike times, against time (s)."""
    import matplotlib.pyplot as plt

    rec, members = run.recording, run.handles.memberships
    rank = np.empty(members.shape[1], dtype=int)
    rank[cell_order(members)] = np.arange(members.shape[1])
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(8, 5), sharex=True, height_ratios=(4, 1))
    top.scatter(rec.t_exc, rank[rec.i_exc], s=0.3, color="0.5", lw=0)
    for k, row in enumerate(members):
        chosen = row[rec.i_exc]
        top.scatter(rec.t_exc[chosen], rank[rec.i_exc[chosen]], s=0.5, lw=0, color=f"C{k % 10}",
                    label=f"assembly {k}")
    top.set_ylabel("E cell (sorted by assembly)")
    if len(members):
        top.legend(fontsize=7, loc="upper right", markerscale=8)
    bottom.hist(rec.t_inh, bins=max(int(rec.sim_time_s / 0.01), 1), range=(0, rec.sim_time_s), color="C3")
    bottom.set_ylabel("I spikes / 10 ms")
    bottom.set_xlabel("time (s)")
    top.set_title(_title(run), fontsize=9)
    fig.tight_layout()
    return fig


def rates(run: Replay) -> Figure:
    """E and I population rates and each assembly's mean rate (Hz per cell, bins of detection.trace_bin_ms)."""
    import matplotlib.pyplot as plt

    from ..runners.metrics import binned_rate

    rec, h = run.recording, run.handles
    bin_s = run.point.config["detection"]["trace_bin_ms"] * 1e-3
    fig, (pop, asm) = plt.subplots(2, 1, figsize=(8, 5), sharex=True)
    times = np.arange(len(run.result["rate_exc_hz"])) * bin_s  # type: ignore[arg-type]
    pop.plot(times, np.asarray(run.result["rate_exc_hz"]), color="C0", lw=0.8, label="E")
    pop.plot(times, np.asarray(run.result["rate_inh_hz"]), color="C3", lw=0.8, label="I")
    pop.set_ylabel("population rate (Hz)")
    pop.legend(fontsize=7)
    for k, row in enumerate(h.memberships):
        spikes = rec.t_exc[row[rec.i_exc]]
        asm.plot(times, binned_rate(spikes, int(row.sum()), bin_s, rec.sim_time_s), lw=0.8, color=f"C{k % 10}",
                 label=f"assembly {k}")
    asm.set_ylabel("assembly rate (Hz)")
    asm.set_xlabel("time (s)")
    if len(h.memberships):
        asm.legend(fontsize=7)
    pop.set_title(_title(run), fontsize=9)
    fig.tight_layout()
    return fig


def weights(run: Replay) -> Figure:
    """The E->E weight matrix (g_leak; post rows, pre columns; cells sorted by assembly) at each snapshot."""
    import matplotlib.pyplot as plt

    h, snapshots = run.handles, run.recording.weights
    pre, post = h.wiring["ee"]
    order = cell_order(h.memberships)
    rank = np.empty(len(order), dtype=int)
    rank[order] = np.arange(len(order))
    names = list(snapshots) or ["none"]
    fig, axes = plt.subplots(1, len(names), figsize=(3.2 * len(names), 3.4), squeeze=False)
    top = max((float(np.max(w)) for w in snapshots.values() if len(w)), default=1.0)
    for ax, name in zip(axes[0], names):
        matrix = np.zeros((len(order), len(order)))
        if name in snapshots:
            np.add.at(matrix, (rank[post], rank[pre]), snapshots[name])
        image = ax.imshow(matrix, cmap="viridis", vmin=0, vmax=top, interpolation="nearest")
        ax.set_title(name, fontsize=8)
        ax.set_xlabel("pre E cell")
    axes[0][0].set_ylabel("post E cell")
    fig.colorbar(image, ax=axes[0].tolist(), label="weight (g_leak)", shrink=0.8)
    fig.suptitle(_title(run), fontsize=9)
    return fig


def _title(run: Replay) -> str:
    labels = ", ".join(f"{name}={value}" for name, value in run.point.labels.items())
    return f"point {run.point.point_id} ({labels}; {run.engine}; outcome {run.result['outcome']})"


def write_nwb(run: Replay, path: Path) -> None:
    """The point's spikes as an NWB 2 file (pynwb): one unit per E cell, with its assemblies, and one unit for the
    whole I population; times in s."""
    from pynwb import NWBHDF5IO, NWBFile

    rec, h = run.recording, run.handles
    nwb = NWBFile(session_description=f"capsweep replay of point {run.point.point_id}: " + _title(run),
                  identifier=f"capsweep-{run.point.point_id}-{time.time_ns()}",
                  session_start_time=datetime.now(UTC))
    nwb.add_unit_column("population", "E or I")
    nwb.add_unit_column("assemblies", "assemblies the cell belongs to, comma-separated ('' for none; I: '')")
    order = np.argsort(rec.i_exc, kind="stable")
    cells, starts = np.unique(rec.i_exc[order], return_index=True)
    by_cell = dict(zip(cells.tolist(), np.split(rec.t_exc[order], starts[1:]))) if len(cells) else {}
    for cell in range(h.memberships.shape[1]):
        member_of = ",".join(str(k) for k in np.flatnonzero(h.memberships[:, cell]))
        nwb.add_unit(id=cell, spike_times=np.sort(by_cell.get(cell, np.array([]))), population="E",
                     assemblies=member_of)
    nwb.add_unit(id=h.memberships.shape[1], spike_times=np.sort(rec.t_inh), population=INHIBITORY_UNIT,
                 assemblies="")
    try:
        with NWBHDF5IO(str(path), mode="w") as io:
            io.write(nwb)
    except OSError as exc:
        path.unlink(missing_ok=True)
        raise fault(path, exc) from None


def summary(run: Replay) -> list[str]:
    """Lines saying what was rerun and whether it reproduced the stored metrics."""
    head = _title(run)
    if not run.differing:
        return [f"{head}: reproduces every stored metric exactly (wall-clock times aside)"]
    return [f"{head}: differs from the stored point in {', '.join(run.differing)}"]
