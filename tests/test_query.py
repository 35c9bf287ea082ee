"""Queries, capacity and plots over a real Zarr store filled with constructed point results.

The results are invented (the simulation is tested elsewhere); what is checked here is the
query logic: filters, status counts, and the capacity rule, whose answers are worked out by hand.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from capsweep.axes import key_axis
from capsweep.results_schema.layout import GridSpec
from capsweep.results_schema.dataset import open_dataset
from capsweep.results_schema.store import ResultStore, create_store
from capsweep.sweeps.plots import all_plots
from capsweep.sweeps.query import QueryError, capacity_table, plausibility, point_table, select, status_counts

AXES = (key_axis("n_odours", "assemblies.count", (1, 2, 3, 4)), key_axis("beta", "plasticity.heterosynaptic.beta", (0.0, 0.05)))
SHAPE = (4, 2, 2)


def result(count: int, outcome: str, recalled: int, seed: int) -> dict:
    quality = np.where(np.arange(count) < recalled, 0.8, 0.1)
    return {
        "outcome": outcome, "engine": "cython", "seed": seed,
        "runaway_onset_s": 5.0 if outcome == "runaway" else np.nan, "recalled_count": recalled,
        "rate_exc_baseline_hz": 3.0, "rate_inh_baseline_hz": 7.0, "isi_cv_exc": 0.9, "rate_exc_hold_end_hz": 3.5,
        "imprint_contrast": np.nan, "wall_time_s": 10.0, "simulated_time_s": 8.0, "n_synapses": 1000,
        "recall_quality": quality, "persistence": quality / 2, "completion": quality, "spurious": 1 - quality,
        "cross_talk": np.full(count, 0.05), "weight_correlation": np.array([1.0, 0.9, 0.8]),
        "assembly_contrast": np.array([5.0, 4.5, 4.0]), "snapshot_time_s": np.array([1.0, 3.0, 5.0]),
        "rate_exc_hz": np.full(20, 3.0), "rate_inh_hz": np.full(20, 7.0),
    }


# (count index, beta index, replicate) -> (outcome, recalled); anything not listed: stable, all recalled
SPECIAL = {
    (2, 0, 1): ("stable", 2),  # beta 0: count 3 misses one assembly in replicate 1
    (3, 0, 0): ("runaway", 0), (3, 0, 1): ("runaway", 0),  # beta 0: count 4 runs away
    (1, 1, 0): ("stable", 1),  # beta 0.05: count 2 fails once, count 3 and 4 succeed
}


@pytest.fixture()
def store(tmp_path: Path) -> Path:
    path = tmp_path / "odour.zarr"
    seeds = np.arange(np.prod(SHAPE)).reshape(SHAPE)
    ids = np.array([f"p{i}" for i in range(np.prod(SHAPE))], dtype=object).reshape(SHAPE)
    grid = GridSpec(AXES, 2, 4, 3, 20, 0.5, "fp", {"sweep_name": "odour-query-test"})
    create_store(path, grid, ids, seeds)
    writer = ResultStore.open(path)
    for index in np.ndindex(*SHAPE):
        if index == (0, 1, 1):
            continue  # left pending
        count = AXES[0].values[index[0]]
        outcome, recalled = SPECIAL.get(index, ("stable", count))
        writer.write_point(index, result(count, outcome, recalled, int(seeds[index])))
    return path


def test_capacity_takes_the_largest_count_stable_and_recalled_in_every_replicate(store: Path) -> None:
    table = capacity_table(open_dataset(store)).set_index("beta")
    # beta 0: counts 1, 2 succeed in both replicates; 3 misses an assembly once; 4 runs away -> 2
    assert table.loc[0.0, "capacity"] == 2
    # beta 0.05: count 1 has a pending replicate, 2 fails once, 3 and 4 succeed -> 4 (largest, as defined)
    assert table.loc[0.05, "capacity"] == 4
    assert bool(table.loc[0.0, "complete"]) and not bool(table.loc[0.05, "complete"])


def test_status_counts_and_default_filter(store: Path) -> None:
    ds = open_dataset(store)
    counts = status_counts(ds)
    assert counts["status"] == {"pending": 1, "done": 15, "failed": 0}
    assert counts["outcome"] == {"stable": 13, "runaway": 2, "silent": 0}
    stable = select(point_table(ds))
    assert len(stable) == 13 and set(stable["outcome"]) == {"stable"}
    narrowed = select(point_table(ds), "n_odours == 3 and recalled_count < n_odours")
    assert [(r.beta, r.replicate) for r in narrowed.itertuples()] == [(0.0, 1)]


def test_bad_filter_names_the_columns(store: Path) -> None:
    with pytest.raises(QueryError, match="Columns: .*n_odours"):
        select(point_table(open_dataset(store)), "odours >> 2")


def test_plausibility_flags_nothing_for_a_few_hertz_irregular_base(store: Path) -> None:
    check = plausibility(open_dataset(store))
    assert check.rate_exc_hz == (3.0, 3.0) and check.warnings == ()


def test_plots_are_written_as_png(store: Path, tmp_path: Path) -> None:
    paths = all_plots(open_dataset(store), tmp_path / "plots")
    assert {p.name for p in paths} == {"stability_map.png", "rate_traces.png", "weight_drift.png",
                                       "capacity_curves.png"}
    for path in paths:
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and path.stat().st_size > 5000
