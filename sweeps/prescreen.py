"""Theory prescreen of a whole sweep: a predicted outcome per grid cell, before any simulation.

The prediction is deterministic (mean-field theory, :func:`capsweep.runners.theory.prediction.predict`), so one
prediction serves every replicate of a cell. Cells are predicted in parallel on Dask.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd

from ..runners.dask_backend import dask_client
from .expand import Point, expand
from .sweepfile import load_sweep


def predict_row(config: dict[str, Any]) -> dict[str, Any]:
    """Worker-side: the prediction of one config as a flat table row."""
    from ..runners.theory.prediction import predict

    p = predict(config)
    return {
        "predicted_outcome": p.outcome,
        "recall_state_exists": p.recall_state_exists,
        "high_rate_bounded": p.high_rate_bounded,
        "background_rate_hz": p.background_rate_hz,
        "assembly_rate_hz": p.assembly_rate_hz,
        "runaway_threshold_hz": p.runaway_threshold_hz,
        "end_assembly_exc_hz": p.end_assembly_exc_hz,
        "reasons": p.reasons,
    }


def cells(points: list[Point]) -> list[Point]:
    """One point per grid cell (replicate 0): replicates share the prediction."""
    return [p for p in points if p.labels["replicate"] == 0]


def prescreen_sweep(
    sweep_file: str | Path,
    workers: int | None = None,
    scheduler: str | None = None,
    plots_dir: Path | None = None,
    on_done: Callable[[int, int], None] = lambda done, total: None,
) -> pd.DataFrame:
    """Predicted outcome and mean-field rates for every grid cell of ``sweep_file``.

    With ``plots_dir``, also writes the transfer-curve and drift-curve PNGs of every cell.
    """
    sweep = load_sweep(sweep_file)
    todo = cells(expand(sweep))
    execution = todo[0].config["execution"]
    rows: list[dict[str, Any]] = []
    with dask_client(workers or execution["workers"], scheduler or execution["scheduler"]) as client:
        futures = client.map(predict_row, [p.config for p in todo], pure=False)
        for i, (point, future) in enumerate(zip(todo, futures)):
            labels = {k: v for k, v in point.labels.items() if k != "replicate"}
            rows.append({**labels, **future.result()})
            on_done(i + 1, len(todo))
    if plots_dir is not None:
        write_cell_plots(todo, plots_dir)
    return pd.DataFrame(rows)


def write_cell_plots(points: list[Point], plots_dir: Path) -> list[Path]:
    """Transfer and drift PNGs per grid cell, named after the cell's axis values."""
    from .prescreen_plots import plot_drift, plot_transfer

    plots_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for point in points:
        stem = "_".join(f"{k}-{v}" for k, v in point.labels.items() if k != "replicate") or "base"
        paths.append(plot_transfer(point.config, plots_dir / f"transfer_{stem}.png"))
        paths.append(plot_drift(point.config, plots_dir / f"drift_{stem}.png"))
    return paths
