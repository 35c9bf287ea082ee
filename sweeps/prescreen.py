"""The prescreen of a whole sweep: a predicted outcome per grid point, a stability bound per condition.

The prescreen is a fitted surrogate built on mean-field quantities
(:func:`capsweep.runners.theory.prediction.predict`): its runaway verdict is a logistic link fitted
to simulations of a calibration design (:mod:`capsweep.runners.theory.link`, which lists the design's
box; a point outside it is flagged in ``outside_calibration``). It is deterministic, so one prediction
serves every replicate of a grid point. Its *stability bound* per condition (a combination of the axes
other than the count) is the capacity rule (:func:`capsweep.sweeps.success.capacity_of`) applied to
"predicted stable": recall does not enter it, so where the stable verdicts are right it bounds the capacity from
above rather than predicting it.
Predictions run as Dask tasks (:func:`capsweep.runners.task.predict_task`) on the client
:func:`capsweep.sweeps.dispatch.early_client` gives, the one ``capsweep run`` uses. :func:`compare` sets the
predictions against a store of the same sweep: outcome agreement over the done points, a confusion table, and
the stability bound beside the simulated capacity per condition
(:func:`capsweep.sweeps.capacity.capacity_table`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd
import xarray as xr

from ..axes import REPLICATE
from ..errors import StoreError
from ..flags import DONE
from ..results_schema import attrs
from ..runners.task import TaskFailure, predict_task
from .dispatch import early_client, run_tasks
from .expand import Grid
from .identity import fingerprint
from .ids import Point
from .search import condition_key
from .success import capacity_of
from .sweepfile import Sweep, load_sweep

if TYPE_CHECKING:
    from distributed import Client

OUTSIDE_CALIBRATION = "outside_calibration"
"""Column of the prediction table: why a grid point lies outside the link's calibration box ('' inside)."""


def grid_points(sweep: Sweep) -> list[Point]:
    """One point of ``sweep`` per grid point (replicate 0): replicates share the prediction."""
    grid = Grid(sweep)
    return list(grid.points(range(0, grid.n_points, sweep.replicates)))


def prescreen_sweep(
    sweep_file: str | Path,
    workers: int | None = None,
    scheduler: str | None = None,
    cluster: Mapping[str, Any] | None = None,
    on_done: Callable[[int, int], None] = lambda done, total: None,
) -> pd.DataFrame:
    """Prediction per grid point of ``sweep_file`` (replicates share it), with the stability bound per condition.

    The predictions run where the sweep file's ``[execution]`` table says, under the overrides ``workers``,
    ``scheduler`` and ``cluster`` (``[execution.cluster]`` entries by leaf name), as for ``capsweep run``.
    """
    sweep = load_sweep(sweep_file)
    todo = grid_points(sweep)
    with early_client(todo[0].config["execution"], workers, scheduler, cluster=cluster) as dask:
        rows = predict_points(dask.client(), todo, on_done)
    return with_stability_bound(pd.DataFrame(rows), sweep.count_dim)


def predict_points(client: Client, points: list[Point],
                   on_done: Callable[[int, int], None] = lambda done, total: None) -> list[dict[str, Any]]:
    """The prediction of each of ``points`` as a row (axis labels, then prediction), in the order of ``points``."""
    rows: dict[tuple[int, ...], dict[str, Any]] = {}
    # predictions cost about the same (no simulation): one group, so that quick ones share Dask tasks
    for point, row in run_tasks(client, predict_task, [(p, (p.config,)) for p in points], group=lambda p: "predict"):
        labels = {k: v for k, v in point.labels.items() if k != REPLICATE}
        rows[point.index] = {**labels, **_prediction(point, row)}
        on_done(len(rows), len(points))
    return [rows[p.index] for p in points]


def _prediction(point: Point, row: dict[str, Any] | TaskFailure) -> dict[str, Any]:
    """A prediction task's row; a failed prediction is a bug, raised with the worker's error text."""
    if isinstance(row, TaskFailure):
        raise RuntimeError(f"the prediction of point {point.labels} failed: {row.error}")
    return row


def stability_bounds(client: Client, points: list[Point], count_pos: int) -> dict[tuple[int, ...], int]:
    """The stability bound of each condition of ``points`` (count axis at index position ``count_pos``).

    Each condition's counts are predicted from the smallest up, the next only once the one before is
    predicted stable, so a condition costs one prediction more than its bound; conditions run in parallel.
    """
    ladders: dict[tuple[int, ...], list[Point]] = {}
    for p in sorted((p for p in points if p.labels[REPLICATE] == 0), key=lambda p: p.index[count_pos]):
        ladders.setdefault(condition_key(p.index, count_pos), []).append(p)
    stable: dict[tuple[int, ...], list[bool]] = {key: [] for key in ladders}

    def climb(point: Point, row: dict[str, Any] | TaskFailure) -> list[tuple[Point, tuple[Any, ...]]]:
        key = condition_key(point.index, count_pos)
        stable[key].append(bool(_prediction(point, row)["predicted_stable"]))
        above = ladders[key][len(stable[key]):]
        return [(above[0], (above[0].config,))] if stable[key][-1] and above else []

    for _ in run_tasks(client, predict_task, [(ladder[0], (ladder[0].config,)) for ladder in ladders.values()], climb):
        pass
    return {key: capacity_of([p.config["assemblies"]["count"] for p in ladder], stable[key])
            for key, ladder in ladders.items()}


def with_stability_bound(table: pd.DataFrame, count: str | None) -> pd.DataFrame:
    """``table`` with a ``stability_bound`` column per condition (the other axes), from ``predicted_stable``."""
    if count is None or table.empty:
        return table
    others = [c for c in table.columns[:table.columns.get_loc("predicted_outcome")] if c != count]
    groups = table.groupby(others, sort=False, dropna=False) if others else [((), table)]
    bound = {}
    for _, group in groups:
        ladder = group.sort_values(count)
        value = capacity_of(ladder[count].astype(int).tolist(), ladder["predicted_stable"].astype(bool).tolist())
        bound.update(dict.fromkeys(group.index, value))
    return table.assign(stability_bound=pd.Series(bound))


POINT_COLUMNS = (REPLICATE, "outcome", "predicted_outcome", "runaway_chance")
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
    capacity: pd.DataFrame  # per condition: stability bound and simulated capacity (empty without a count axis)


def check_same_sweep(sweep: Sweep, stored: dict[str, Any], store: Path) -> None:
    """Raise StoreError unless the store was made from ``sweep``: the same file text or the same grid and base
    config (the store's fingerprint)."""
    if stored.get(attrs.SWEEP_SHA256) != sweep.text_sha256 and stored.get(attrs.FINGERPRINT) != fingerprint(sweep):
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
    simulated = simulated[simulated["status"] == DONE][[*axes, REPLICATE, "outcome"]]
    points = simulated.merge(predictions[[*axes, "predicted_outcome", "runaway_chance"]], on=axes, how="left")
    confusion = pd.crosstab(points["predicted_outcome"], points["outcome"]).rename_axis(
        index="predicted", columns="simulated")
    agreement = float((points["predicted_outcome"] == points["outcome"]).mean()) if len(points) else float("nan")
    majority = points.groupby(axes, sort=False)["outcome"].agg(lambda o: o.value_counts().iloc[0]).sum()
    ceiling = float(majority / len(points)) if len(points) else float("nan")
    count = sweep.count_dim
    capacity = pd.DataFrame()
    if count is not None and "stability_bound" in predictions:
        others = [a for a in axes if a != count]
        bound = predictions.drop_duplicates(others)[[*others, "stability_bound"]] if others else \
            predictions[["stability_bound"]].head(1)
        sim = capacity_table(ds)[[*others, "capacity", "at_least"]]
        capacity = bound.merge(sim, on=others, how="left") if others else pd.concat(
            [bound.reset_index(drop=True), sim.reset_index(drop=True)], axis=1)
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
