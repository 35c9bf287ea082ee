"""Theory prescreen of a whole sweep: a predicted outcome per grid point and a predicted capacity per cell.

The prediction is deterministic (rate-form weight dynamics over the protocol with mean-field rates,
:func:`capsweep.runners.theory.prediction.predict`), so one prediction serves every replicate of a
point. Points are predicted in parallel on Dask. :func:`compare` sets the predictions against a store
of the same sweep: outcome agreement over the done points, a confusion table, and predicted against
simulated capacity per cell (the simulated one from :func:`capsweep.sweeps.capacity.capacity_table`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
import xarray as xr

from ..axes import COUNT_KEY
from ..errors import StoreError
from ..runners.dask_backend import dask_client
from .expand import Point, expand, fingerprint
from .sweepfile import Sweep, load_sweep


def predict_row(config: dict[str, Any]) -> dict[str, Any]:
    """Worker-side: the prediction of one config as a flat table row."""
    from ..runners.theory.prediction import predict

    p = predict(config)
    return {
        "predicted_outcome": p.outcome,
        "predicted_success": p.success,
        "runaway_chance": p.runaway_chance,
        "recalled_count": p.recalled_count,
        "recall_state_exists": p.recall_state_exists,
        "recall_state_stable": p.recall_state_stable,
        "background_rate_hz": p.background_rate_hz,
        "runaway_threshold_hz": p.runaway_threshold_hz,
        "runaway_onset_s": p.runaway_onset_s,
        "peak_exc_hz": p.peak_exc_hz,
        "end_within_weight": p.end_within_weight,
        "end_i_to_members": p.end_i_to_members,
        "reasons": p.reasons,
    }


def capacity_from(success_by_count: dict[int, bool]) -> int:
    """Largest count k such that every count <= k (of those given) succeeds; 0 if the smallest fails."""
    capacity = 0
    for count in sorted(success_by_count):
        if not success_by_count[count]:
            break
        capacity = count
    return capacity


def predicted_capacity(configs_by_count: dict[int, dict]) -> int:
    """Predicted capacity of one cell: largest count k such that every count <= k is predicted to succeed.

    ``configs_by_count`` maps an assembly count to the cell's nested config at that count. A count
    succeeds when it is predicted stable (:attr:`capsweep.runners.theory.prediction.Prediction.success`
    says why recall does not enter). 0 if the smallest count fails. Counts are predicted in ascending order
    and the search stops at the first failure.
    """
    from ..runners.theory.prediction import predict

    success: dict[int, bool] = {}
    for count in sorted(configs_by_count):
        success[count] = predict(configs_by_count[count]).success
        if not success[count]:
            break
    return capacity_from(success)


def grid_points(sweep: Sweep) -> list[Point]:
    """One point of ``sweep`` per grid point (replicate 0): replicates share the prediction."""
    return [p for p in expand(sweep) if p.labels["replicate"] == 0]


def count_axis(sweep: Sweep) -> str | None:
    """Name of the sweep's axis over ``assemblies.count``, if any."""
    return next((a.name for a in sweep.axes if a.key == COUNT_KEY), None)


def with_capacity(table: pd.DataFrame, count: str | None) -> pd.DataFrame:
    """``table`` with a ``predicted_capacity`` column: per cell (the other axes), from ``predicted_success``."""
    if count is None or table.empty:
        return table
    others = [c for c in table.columns[:table.columns.get_loc("predicted_outcome")] if c != count]
    groups = table.groupby(others, sort=False, dropna=False) if others else [((), table)]
    capacity = {}
    for _, group in groups:
        value = capacity_from(dict(zip(group[count].astype(int), group["predicted_success"])))
        capacity.update(dict.fromkeys(group.index, value))
    return table.assign(predicted_capacity=pd.Series(capacity))


def prescreen_sweep(
    sweep_file: str | Path,
    workers: int | None = None,
    scheduler: str | None = None,
    on_done: Callable[[int, int], None] = lambda done, total: None,
) -> pd.DataFrame:
    """Prediction per grid point of ``sweep_file`` (replicates share it), with the predicted capacity per cell."""
    sweep = load_sweep(sweep_file)
    todo = grid_points(sweep)
    execution = todo[0].config["execution"]
    rows: list[dict[str, Any]] = []
    with dask_client(workers or execution["workers"], scheduler or execution["scheduler"]) as client:
        futures = client.map(predict_row, [p.config for p in todo], pure=False)
        for i, (point, future) in enumerate(zip(todo, futures)):
            labels = {k: v for k, v in point.labels.items() if k != "replicate"}
            rows.append({**labels, **future.result()})
            on_done(i + 1, len(todo))
    return with_capacity(pd.DataFrame(rows), count_axis(sweep))


POINT_COLUMNS = ("replicate", "outcome", "predicted_outcome", "runaway_chance")
"""Columns of :attr:`Comparison.points` that are not sweep axes."""


def grid_axes(points: pd.DataFrame) -> list[str]:
    """The sweep axes among the columns of a :attr:`Comparison.points` table (what a grid point is grouped by)."""
    return [c for c in points.columns if c not in POINT_COLUMNS]


@dataclass(frozen=True)
class Comparison:
    """Predictions set against a store of the same sweep."""

    points: pd.DataFrame  # per done point: axis labels, replicate, runaway chance, predicted and simulated outcome
    agreement: float  # fraction of done points whose predicted outcome equals the simulated one
    ceiling: float  # the most agreement one verdict per grid point can reach: the replicates' majority outcome
    confusion: pd.DataFrame  # rows: predicted outcome, columns: simulated outcome, values: point counts
    capacity: pd.DataFrame  # per cell: predicted and simulated capacity (empty without a count axis)


def check_same_sweep(sweep: Sweep, attrs: dict[str, Any], store: Path) -> None:
    """Raise StoreError unless the store was made from ``sweep``: the same file text (``sweep_sha256``) or the
    same grid and base config (the store's fingerprint)."""
    from ..results_schema.store import ATTR_FINGERPRINT

    if attrs.get("sweep_sha256") != sweep.text_sha256 and attrs.get(ATTR_FINGERPRINT) != fingerprint(sweep):
        raise StoreError(f"{store} was not made from {sweep.source} (neither its sweep file text nor its grid "
                         "and base config match); --against needs the store that sweep file ran into")


def check_against(sweep_file: str | Path, store: Path) -> None:
    """Raise a one-line CapsweepError unless ``store`` is a capsweep store made from ``sweep_file``."""
    from ..results_schema.dataset import open_dataset

    check_same_sweep(load_sweep(sweep_file), dict(open_dataset(store).attrs), store)


def compare(sweep_file: str | Path, store: Path, predictions: pd.DataFrame) -> Comparison:
    """Set ``predictions`` (a :func:`prescreen_sweep` table of ``sweep_file``) against the simulated ``store``."""
    from ..results_schema.dataset import open_dataset
    from .capacity import capacity_table
    from .query import labelled

    sweep = load_sweep(sweep_file)
    ds = open_dataset(store)
    check_same_sweep(sweep, dict(ds.attrs), store)
    axes = [a.name for a in sweep.axes]
    simulated = xr.Dataset({name: labelled(ds, name) for name in ("status", "outcome")}).reset_coords(
        drop=True).to_dataframe().reset_index()
    simulated = simulated[simulated["status"] == "done"][[*axes, "replicate", "outcome"]]
    points = simulated.merge(predictions[[*axes, "predicted_outcome", "runaway_chance"]], on=axes, how="left")
    confusion = pd.crosstab(points["predicted_outcome"], points["outcome"]).rename_axis(
        index="predicted", columns="simulated")
    agreement = float((points["predicted_outcome"] == points["outcome"]).mean()) if len(points) else float("nan")
    majority = points.groupby(axes, sort=False)["outcome"].agg(lambda o: o.value_counts().iloc[0]).sum()
    ceiling = float(majority / len(points)) if len(points) else float("nan")
    count = count_axis(sweep)
    capacity = pd.DataFrame()
    if count is not None and "predicted_capacity" in predictions:
        others = [a for a in axes if a != count]
        predicted = predictions.drop_duplicates(others)[[*others, "predicted_capacity"]] if others else \
            predictions[["predicted_capacity"]].head(1)
        sim = capacity_table(ds)[[*others, "capacity", "at_least"]].rename(columns={"capacity": "simulated_capacity"})
        capacity = predicted.merge(sim, on=others, how="left") if others else pd.concat(
            [predicted.reset_index(drop=True), sim.reset_index(drop=True)], axis=1)
    return Comparison(points, agreement, ceiling, confusion, capacity)


def outcome_table(points: pd.DataFrame) -> pd.DataFrame:
    """Per grid point of a :class:`Comparison`: runaway chance and predicted outcome, the replicates' simulated
    outcomes, agreement."""
    axes = grid_axes(points)
    rows = []
    for labels, group in points.groupby(axes, sort=False):
        labels = labels if isinstance(labels, tuple) else (labels,)
        agree = int((group["outcome"] == group["predicted_outcome"]).sum())
        rows.append({**dict(zip(axes, labels)), "runaway_chance": f"{group['runaway_chance'].iloc[0]:.0%}",
                     "predicted": group["predicted_outcome"].iloc[0],
                     "simulated": " ".join(group["outcome"]), "agree": f"{agree}/{len(group)}"})
    return pd.DataFrame(rows)


def agreement_plot_path(store: Path, plots_dir: Path | None) -> Path:
    """Where ``--against`` writes its PNG: in ``plots_dir`` if given, else next to the store."""
    name = f"{Path(store).name.removesuffix('.zarr')}_prescreen_agreement.png"
    return (plots_dir or Path(store).parent) / name
