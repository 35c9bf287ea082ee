"""Queries, capacity and plots over a real Zarr store filled with constructed point results.

The results are invented (the simulation is tested elsewhere); what is checked here is the
query logic: filters, status counts, and the capacity rule, whose answers are worked out by hand.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import linregress, norm
from scipy.stats import t as student
from typer.testing import CliRunner

from capsweep.axes import key_axis, variant_axis
from capsweep.flags import PENDING, STATUSES
from capsweep.results_schema import attrs
from capsweep.results_schema.dataset import open_dataset
from capsweep.results_schema.layout import VARIABLES, GridSpec
from capsweep.results_schema.store import ResultStore, create_store
from capsweep.sweeps.capacity import capacity_report, capacity_table, scaling_fit, success_table, wilson_interval
from capsweep.sweeps.capacity_fit import fit_capacity
from capsweep.sweeps.cli import app
from capsweep.sweeps.query import QueryError, plausibility, point_table, select, status_counts
from capsweep.sweeps.sequential import Tally

AXES = (key_axis("n_odours", "assemblies.count", (1, 2, 3, 4)), key_axis("beta", "plasticity.heterosynaptic.beta", (0.0, 0.05)))
SHAPE = (4, 2, 2)


def result(count: int, outcome: str, recalled: int, seed: int) -> dict:
    """A runner result with every layout variable (unset ones NaN), invented for the query logic."""
    score = np.where(np.arange(count) < recalled, 0.8, 0.1)
    out: dict = {v.name: (np.full(1, np.nan) if v.inner else np.nan) for v in VARIABLES
                 if not v.flags and not v.dtype.startswith("int")}
    out.update({
        "outcome": outcome, "engine": "cython", "seed": seed, "predicted_outcome": None,
        "runaway_onset_s": 5.0 if outcome == "runaway" else np.nan, "recalled_count": recalled,
        "overlap_recalled_count": recalled, "already_active_count": 0, "stuck_count": 0,
        "recall_state": ["recalled"] * recalled + ["not_recalled"] * (count - recalled),
        "test_position": np.arange(count), "n_synapses": 1000, "retention_recalled": [recalled], "threads": 1,
        "retention_tested": [count], "age_recalled": [-1], "age_tested": [-1],
        "rate_exc_baseline_hz": 3.0, "rate_inh_baseline_hz": 7.0, "isi_cv_exc": 0.9, "rate_exc_hold_end_hz": 3.5,
        "wall_time_s": 10.0, "simulated_time_s": 8.0,
        "recall_quality": score, "recall_score": score, "persistence": score / 2, "completion": score,
        "spurious": 1 - score, "cross_talk": np.full(count, 0.05), "weight_correlation": np.array([1.0, 0.9, 0.8]),
        "assembly_contrast": np.array([5.0, 4.5, 4.0]), "snapshot_time_s": np.array([1.0, 3.0, 5.0]),
        "rate_exc_hz": np.full(20, 3.0), "rate_inh_hz": np.full(20, 7.0),
    })
    return out


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


def test_capacity_needs_every_smaller_count_to_succeed_and_waits_for_pending_points(store: Path) -> None:
    """Hand-worked on SPECIAL: beta 0 succeeds at counts 1, 2 (2/2), 3 (1/2), not 4 (0/2): with the
    default fraction 0.5 the capacity is 3, its replicates' capacities 3 and 2. beta 0.05 has a
    pending point: NA, not 0."""
    table = capacity_table(open_dataset(store)).set_index("beta")
    assert table.loc[0.0, "capacity"] == 3 and not table.loc[0.0, "at_least"]
    assert (table.loc[0.0, "capacity_lo"], table.loc[0.0, "capacity_hi"]) == (2, 3)
    assert pd.isna(table.loc[0.05, "capacity"]) and table.loc[0.05, "pending"] == 1
    strict = capacity_table(open_dataset(store), min_fraction=1.0).set_index("beta")
    assert strict.loc[0.0, "capacity"] == 2  # count 3 succeeds in only one of two replicates


def _filled_store(tmp_path: Path, pattern: dict[tuple[int, int, int], tuple[str, int] | str | None],
                  replicates: int = 2) -> Path:
    """A store over n_odours 1-4 x beta (one value) x replicates; every point stable and fully
    recalled unless ``pattern`` says otherwise ((outcome, recalled), None for a crash, PENDING to leave it)."""
    axes = (AXES[0], key_axis("beta", "plasticity.heterosynaptic.beta", (0.0,)))
    shape = (4, 1, replicates)
    path = tmp_path / "pattern.zarr"
    seeds = np.arange(np.prod(shape)).reshape(shape)
    ids = np.array([f"p{i}" for i in range(np.prod(shape))], dtype=object).reshape(shape)
    create_store(path, GridSpec(axes, replicates, 4, 3, 20, 0.5, "fp", {}), ids, seeds)
    writer = ResultStore.open(path)
    for index in np.ndindex(*shape):
        count = axes[0].values[index[0]]
        spec = pattern.get(index, ("stable", count))
        if spec == PENDING:
            continue
        if spec is None:
            writer.write_failure(index, "RuntimeError: worker lost")
        else:
            writer.write_point(index, result(count, spec[0], int(spec[1]), int(seeds[index])))
    return path


def test_non_monotone_success_is_flagged_and_warned(tmp_path: Path) -> None:
    """Counts 1-4 succeed in 3, 0, 3, 0 of 3 replicates: first-failure capacity 1, non-monotone.

    The warning follows the fit's test [derived]: the isotonic fit pools counts 2 and 3 to 0.5, deviance
    G^2 = 2 (3 ln 2 + 3 ln 2) = 8.3; under that fit a draw as extreme needs 0 of 3 at count 2 and 3 of 3
    at count 3 (or a pooled pair as skewed), probability about 2 / 64 < 0.05."""
    path = _filled_store(tmp_path, {(k, 0, r): ("runaway", 0) for k in (1, 3) for r in range(3)}, replicates=3)
    row = capacity_table(open_dataset(path)).iloc[0]
    assert row["capacity"] == 1 and bool(row["non_monotone"]) and not bool(row["at_least"])
    result_ = CliRunner().invoke(app, ["capacity", str(path)])
    assert result_.exit_code == 0, result_.output
    warnings = [line for line in result_.output.splitlines() if line.startswith("warning:")]
    assert len(warnings) == 1 and "beta=0.0" in warnings[0] and "not monotone" in warnings[0]


def test_an_interrupted_store_reports_no_pending_count_as_failed_or_non_monotone(tmp_path: Path) -> None:
    """As after Ctrl-C on a run that starts with the highest counts: counts 3 and 4 done (3 passes in both
    replicates, 4 fails in both), counts 1 and 2 pending. No count below 3 is read as a failure: the
    first-failure capacity waits (NA), nothing is flagged non-monotone, and the fit uses counts 3-4 only
    (4 replicates), its crossing between them."""
    pending = {(k, 0, r): PENDING for k in (0, 1) for r in range(2)}
    path = _filled_store(tmp_path, {**pending, (3, 0, 0): ("runaway", 0), (3, 0, 1): ("runaway", 0)})
    ds = open_dataset(path)
    assert not bool(capacity_table(ds).iloc[0]["non_monotone"])
    row = capacity_report(ds).iloc[0]
    assert pd.isna(row["first_failure"]) and not bool(row["non_monotone"])
    assert (row["replicates"], row["pending"], row["censored"]) == (4, 4, "")
    assert 3 < row["capacity"] < 4
    result_ = CliRunner().invoke(app, ["capacity", str(path)])
    assert result_.exit_code == 0 and "warning" not in result_.output, result_.output


def test_top_of_the_grid_is_only_a_lower_bound(tmp_path: Path) -> None:
    row = capacity_table(open_dataset(_filled_store(tmp_path, {}))).iloc[0]
    assert row["capacity"] == 4 and bool(row["at_least"]) and not bool(row["non_monotone"])


def test_crashed_points_are_left_out_and_counted(tmp_path: Path) -> None:
    """Count 2 crashed in replicate 0 and succeeded in replicate 1: the fraction is 1/1, not 1/2,
    and replicate 0's capacity is unknown (its run of successes ends at the crash)."""
    path = _filled_store(tmp_path, {(1, 0, 0): None})
    ds = open_dataset(path)
    counts = success_table(ds).set_index("n_odours")
    assert counts.loc[2, "n"] == 1 and counts.loc[2, "fraction"] == 1.0 and counts.loc[2, "failed"] == 1
    row = capacity_table(ds).iloc[0]
    assert row["capacity"] == 4 and row["failed"] == 1 and row["replicates_used"] == 1


def _wilson(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson 1927, J Am Stat Assoc 22:209, score interval without continuity correction [memory: recalled]:
    (p + z^2/2n -+ z sqrt(p(1-p)/n + z^2/4n^2)) / (1 + z^2/n), z the normal quantile at (1 + confidence)/2."""
    z, n, p = norm.ppf((1 + confidence) / 2), trials, successes / trials
    centre, half = p + z**2 / (2 * n), z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2))
    return (centre - half) / (1 + z**2 / n), (centre + half) / (1 + z**2 / n)


# replicate 0 fails everywhere, 1 succeeds at count 1 only, 2 up to 3, 3 everywhere; 4 succeeds at 1, crashes at 2
RANGE_PATTERN: dict[tuple[int, int, int], tuple[str, int] | None] = {
    (0, 0, 0): ("runaway", 0), (1, 0, 0): ("runaway", 0), (2, 0, 0): ("runaway", 0), (3, 0, 0): ("runaway", 0),
    (1, 0, 1): ("stable", 1), (2, 0, 1): ("stable", 2), (3, 0, 1): ("runaway", 0),
    (3, 0, 2): ("stable", 3),
    (1, 0, 4): None, (2, 0, 4): ("silent", 0), (3, 0, 4): ("runaway", 0),
}


def test_capacity_and_replicate_range_on_a_hand_worked_pattern(tmp_path: Path) -> None:
    """RANGE_PATTERN by hand [derived]: successes per count 1-4 are 4/5, 2/4 (one crash), 2/5, 1/5.
    Capacity at fraction 0.5: counts 1 (0.8) and 2 (0.5) pass, 3 (0.4) fails -> 2; at 0.4 -> 3; at 0.9
    count 1 already fails -> 0, not NA. Per-replicate capacities 0, 1, 3, 4 (replicate 4's run of
    successes ends at its crash: left out) -> range 0-4 over 4 replicates; the top count 4 is
    reached by replicate 3 only, so the condition's capacity is no lower bound."""
    ds = open_dataset(_filled_store(tmp_path, RANGE_PATTERN, replicates=5))
    row = capacity_table(ds).iloc[0]
    assert (row["capacity"], row["capacity_lo"], row["capacity_hi"]) == (2, 0, 4)
    assert (row["replicates_used"], row["failed"], row["pending"]) == (4, 1, 0)
    assert not bool(row["at_least"]) and not bool(row["non_monotone"])
    assert capacity_table(ds, min_fraction=0.4).iloc[0]["capacity"] == 3
    assert capacity_table(ds, min_fraction=0.9).iloc[0]["capacity"] == 0
    counts = success_table(ds).set_index("n_odours")
    assert list(counts["successes"]) == [4, 2, 2, 1] and list(counts["n"]) == [5, 4, 5, 5]
    for k, (wins, done) in zip((1, 2, 3, 4), ((4, 5), (2, 4), (2, 5), (1, 5))):
        assert (counts.loc[k, "wilson_lo"], counts.loc[k, "wilson_hi"]) == pytest.approx(_wilson(wins, done), abs=1e-12)


def test_capacity_csv_and_json_keep_integers_and_write_na_as_empty(store: Path) -> None:
    """SPECIAL by hand: beta 0 succeeds in 2, 2, 1, 0 of 2 replicates at counts 1-4: first-failure capacity 3,
    fitted from exactly those tallies. beta 0.05 has count 1 pending in one replicate (first failure NA) and
    succeeds in 1/1, 1/2, 2/2, 2/2: no fall with the count, so the fit is censored above 4 [derived: the flat
    penalized fit is (7 + 1) / (7 + 2) = 0.89 > 0.5]."""
    runner = CliRunner()
    csv_out = runner.invoke(app, ["capacity", str(store), "--format", "csv"])
    assert csv_out.exit_code == 0, csv_out.output
    rows = pd.read_csv(io.StringIO(csv_out.output), dtype=str, keep_default_na=False)
    assert list(rows["first_failure"]) == ["3", ""] and list(rows["pending"]) == ["0", "1"]
    assert list(rows["censored"]) == ["", "above"] and list(rows["bound"]) == ["", "4"]
    assert list(rows["replicates"]) == ["8", "7"] and rows["capacity"][1] == ""
    expected = fit_capacity({1: Tally(2, 2), 2: Tally(2, 2), 3: Tally(1, 2), 4: Tally(0, 2)})
    assert expected is not None and expected.estimate is not None and expected.low is not None
    assert float(rows["capacity"][0]) == pytest.approx(expected.estimate, abs=0.005)
    assert float(rows["capacity_lo"][0]) == pytest.approx(expected.low, abs=0.005)
    records = json.loads(runner.invoke(app, ["capacity", str(store), "--format", "json"]).output)["rows"]
    assert records[0]["first_failure"] == 3 and isinstance(records[0]["first_failure"], int)
    assert records[1]["first_failure"] is None and records[1]["bound"] == 4 and records[1]["capacity"] is None
    per_count = runner.invoke(app, ["capacity", str(store), "--format", "csv", "--per-count"])
    counts = pd.read_csv(io.StringIO(per_count.output), dtype=str)
    assert list(counts.columns[2:]) == ["n", "successes", "fraction", "wilson_lo", "wilson_hi", "failed", "pending",
                                      "unneeded"]
    assert list(counts["n"][:4]) == ["2", "2", "2", "2"] and list(counts["successes"][:4]) == ["2", "2", "1", "0"]


def test_capacity_of_a_store_without_a_count_axis_is_one_error_line(tmp_path: Path) -> None:
    axes = (key_axis("beta", "plasticity.heterosynaptic.beta", (0.0, 0.05)),)
    path = tmp_path / "no_count.zarr"
    create_store(path, GridSpec(axes, 1, 4, 3, 20, 0.5, "fp", {}), np.array([["p0"], ["p1"]], dtype=object),
                 np.arange(2).reshape(2, 1))
    result_ = CliRunner().invoke(app, ["capacity", str(path)])
    assert result_.exit_code == 2 and "Traceback" not in result_.output
    assert result_.output.count("\n") == 1 and "assemblies.count" in result_.output and "beta" in result_.output


@pytest.mark.parametrize(("successes", "trials", "low", "high"), [
    (81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611), (1, 29, 0.0061, 0.1718),
])
def test_wilson_interval_matches_published_examples(successes: int, trials: int, low: float, high: float) -> None:
    """Newcombe 1998, Statistics in Medicine 17:857, Table I, score method without continuity
    correction (Wilson 1927) [memory: recalled, not re-read]."""
    assert wilson_interval(successes, trials) == pytest.approx((low, high), abs=1e-4)


def test_wilson_interval_contains_the_observed_fraction() -> None:
    """The Wilson score interval always contains the sample proportion (Wilson 1927, J Am Stat Assoc 22:209; its
    centre lies between p and 1/2). Rounding broke this at 0/n and n/n for 24 of 1,829 (k, n) up to n = 59, and the
    capacity-curve plot of a scaling store then failed with matplotlib's 'yerr must not contain negative values'."""
    for n in range(1, 60):
        for k in range(n + 1):
            low, high = wilson_interval(k, n)
            assert low <= k / n <= high, (k, n, low, high)


def test_status_counts_and_default_filter(store: Path) -> None:
    ds = open_dataset(store)
    counts = status_counts(ds)
    assert counts["status"] == {"pending": 1, "done": 15, "failed": 0, "unneeded": 0}
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


def _scaling_store(tmp_path: Path, capacities: dict[int, list[int]], as_variants: bool = False) -> Path:
    """A store over n_exc x n_odours (1-8) x 3 replicates where replicate r of size n succeeds up to
    ``capacities[n][r]`` assemblies and runs away above; ``as_variants``: the sizes as named variants that each
    set network.n_exc (and an in-degree), recorded in the store's sweep text as ``capsweep run`` records it."""
    counts = (1, 2, 3, 4, 5, 6, 7, 8)
    sizes = key_axis("n_exc", "network.n_exc", tuple(capacities))
    text = ""
    if as_variants:
        sizes = variant_axis("size", tuple(f"n{n}" for n in capacities))
        text = ('[sweep]\nname = "odour-sizes"\nstore = "s.zarr"\nreplicates = 3\n[[sweep.axis]]\nname = "size"\n'
                "[sweep.axis.variants]\n" + "".join(f'n{n} = {{ "network.n_exc" = {n}, "network.indegree_exc" = '
                                                    f"{n // 10} }}\n" for n in capacities)
                + '[[sweep.axis]]\nname = "n_odours"\nkey = "assemblies.count"\nvalues = [1, 2, 3, 4, 5, 6, 7, 8]\n')
    axes = (sizes, key_axis("n_odours", "assemblies.count", counts))
    shape = (len(capacities), len(counts), 3)
    path = tmp_path / ("variants.zarr" if as_variants else "scaling.zarr")
    seeds = np.arange(np.prod(shape)).reshape(shape)
    ids = np.array([f"p{i}" for i in range(np.prod(shape))], dtype=object).reshape(shape)
    create_store(path, GridSpec(axes, 3, 8, 3, 20, 0.5, "fp", {attrs.SWEEP_TEXT: text}), ids, seeds)
    writer = ResultStore.open(path)
    for (i, j, r) in np.ndindex(*shape):
        count = counts[j]
        ok = count <= list(capacities.values())[i][r]
        writer.write_point((i, j, r), result(count, "stable" if ok else "runaway", count if ok else 0, int(seeds[i, j, r])))
    return path


@pytest.mark.slow  # 38 s; tests/test_scaling_fit.py checks the fit itself in CI
def test_scaling_fits_the_fitted_capacities_and_says_three_sizes_are_few(tmp_path: Path) -> None:
    """Per-replicate capacities 1-3 at 300, 2-5 at 1200, 5-8 at 4800 cells (grid 1-8): every fitted capacity
    lies inside the grid, so the exponent is the least-squares slope of ln(fitted capacity) on ln(n_exc)
    (scipy.stats.linregress) and its interval the t-interval with 1 degree of freedom; with three sizes the
    CLI states the caveat."""
    capacities = {300: [1, 2, 3], 1200: [2, 4, 5], 4800: [5, 6, 8]}
    path = _scaling_store(tmp_path, capacities)
    fit = scaling_fit(open_dataset(path))
    report = capacity_report(open_dataset(path))
    assert fit is not None and list(report["censored"]) == ["", "", ""]
    expected = linregress(np.log(list(capacities)), np.log(report["capacity"].to_numpy(float)))
    assert fit.exponent == pytest.approx(expected.slope, abs=0.005)  # the report rounds to 0.01 assemblies
    half = student.ppf(0.975, 1) * expected.stderr
    assert (fit.exponent_low, fit.exponent_high) == pytest.approx((expected.slope - half, expected.slope + half),
                                                                  abs=0.05)
    output = CliRunner().invoke(app, ["capacity", str(path)]).output
    assert "caveat: only 3 network sizes" in output
    by_variants = scaling_fit(open_dataset(_scaling_store(tmp_path, capacities, as_variants=True)))
    assert by_variants is not None and by_variants.sizes == fit.sizes and by_variants.exponent == fit.exponent


def test_point_table_rows_keep_their_own_point_id_and_sweep_order(store: Path) -> None:
    """The store's dims are (n_odours, beta, replicate), not alphabetical: each row's point_id must be
    the one stored at that row's labels, and rows come in the sweep file's axis order."""
    ds = open_dataset(store)
    frame = point_table(ds)
    assert list(frame.columns[:3]) == ["n_odours", "beta", "replicate"]
    for row in frame.itertuples():
        stored = ds["point_id"].sel(n_odours=row.n_odours, beta=row.beta, replicate=row.replicate).item()
        assert row.point_id == stored


def test_crashes_above_the_deciding_count_do_not_hide_the_capacity(tmp_path: Path) -> None:
    """Count 2 fails in both replicates and every count-4 point crashed: capacity is 1, decided at
    count 2; what happened above it does not matter (worked by hand)."""
    pattern = {(1, 0, 0): ("runaway", 0), (1, 0, 1): ("runaway", 0), (3, 0, 0): None, (3, 0, 1): None}
    row = capacity_table(open_dataset(_filled_store(tmp_path, pattern))).iloc[0]
    assert row["capacity"] == 1 and row["failed"] == 2 and bool(row["non_monotone"])


def test_where_applies_together_with_all_and_the_table_names_its_filter(store: Path) -> None:
    """--all drops only the default filter: with --where, only the matching points remain (all 4 count-4
    points are done, one runs away in each replicate of beta 0 per SPECIAL). Without --all, --where narrows
    the default filter (the issue: it used to replace it, so runaway points came back)."""
    runner = CliRunner()
    shown = json.loads(runner.invoke(app, ["query", str(store), "--all", "--where", "n_odours == 4",
                                           "--format", "json"]).stdout)
    assert [(r["beta"], r["replicate"], r["outcome"]) for r in shown["rows"]] == [
        (0.0, 0, "runaway"), (0.0, 1, "runaway"), (0.05, 0, "stable"), (0.05, 1, "stable")]
    assert shown["filter"] == "n_odours == 4"
    narrowed = runner.invoke(app, ["query", str(store), "--where", "n_odours == 4", "--format", "json"])
    assert [(r["beta"], r["outcome"]) for r in json.loads(narrowed.stdout)["rows"]] == [(0.05, "stable")] * 2
    assert narrowed.stderr.startswith('filter: status == "done" and outcome == "stable" (default) and (n_odours == 4)')
    table = runner.invoke(app, ["query", str(store), "--wide"])
    assert table.exit_code == 0 and table.stderr.splitlines() == [
        'filter: status == "done" and outcome == "stable" (default; --all for every point)']
    everything = runner.invoke(app, ["query", str(store), "--all", "--format", "json"])
    assert len(json.loads(everything.stdout)["rows"]) == 16  # 15 done and 1 pending point


def test_rows_and_columns_follow_the_sweep_file_not_the_alphabet(tmp_path: Path) -> None:
    """Axis values given out of order (count 3, 1; beta 0.05, 0.0) stay in that order; the columns are the
    axes in sweep-file order, replicate, point_id, status, then the layout's scalars in layout order."""
    axes = (key_axis("n_odours", "assemblies.count", (3, 1)),
            key_axis("beta", "plasticity.heterosynaptic.beta", (0.05, 0.0)))
    path = tmp_path / "order.zarr"
    ids = np.array([f"q{i}" for i in range(4)], dtype=object).reshape(2, 2, 1)
    create_store(path, GridSpec(axes, 1, 3, 3, 20, 0.5, "fp", {}), ids, np.arange(4).reshape(2, 2, 1))
    frame = point_table(open_dataset(path))
    assert [(r.n_odours, r.beta) for r in frame.itertuples()] == [(3, 0.05), (3, 0.0), (1, 0.05), (1, 0.0)]
    assert list(frame["point_id"]) == ["q0", "q1", "q2", "q3"]
    scalars = [v.name for v in VARIABLES if v.inner is None]
    assert list(frame.columns[:5]) == ["n_odours", "beta", "replicate", "point_id", "status"]
    assert list(frame.columns[5:5 + len(scalars)]) == scalars


def test_integers_stay_integers_and_missing_values_are_empty(store: Path) -> None:
    """recalled_count 2 at count 3, beta 0, replicate 1 (SPECIAL); the pending point (1, 0.05, 1) has none."""
    runner = CliRunner()
    rows = json.loads(runner.invoke(app, ["query", str(store), "--all", "--format", "json"]).stdout)["rows"]
    by_point = {(r["n_odours"], r["beta"], r["replicate"]): r for r in rows}
    assert by_point[(3, 0.0, 1)]["recalled_count"] == 2 and isinstance(by_point[(3, 0.0, 1)]["recalled_count"], int)
    assert isinstance(by_point[(3, 0.0, 1)]["n_synapses"], int)
    assert by_point[(1, 0.05, 1)]["recalled_count"] is None and by_point[(1, 0.05, 1)]["status"] == "pending"
    table = pd.read_csv(io.StringIO(runner.invoke(app, ["query", str(store), "--all", "--format", "csv"]).stdout),
                        dtype=str, keep_default_na=False)
    assert list(table["recalled_count"][:4]) == ["1", "1", "1", ""]  # count 1: beta 0 (x2), beta 0.05 (done, pending)
    assert table["n_synapses"][0] == "1000"


def test_csv_and_json_carry_the_store_units(tmp_path: Path) -> None:
    """A hold-duration axis (protocol.hold_s, seconds) gets 'hold [s]'; names that end in their unit keep
    their name; dimensionless columns and labels get no unit. Units as declared in results_schema/layout.py."""
    axes = (key_axis("hold", "protocol.hold_s", (5.0, 10.0)),)
    path = tmp_path / "units.zarr"
    create_store(path, GridSpec(axes, 1, 3, 3, 20, 0.5, "fp", {}), np.array([["a"], ["b"]], dtype=object),
                 np.arange(2).reshape(2, 1))
    runner = CliRunner()
    header = runner.invoke(app, ["query", str(path), "--all", "--format", "csv"]).stdout.splitlines()[0].split(",")
    assert header[:3] == ["hold [s]", "replicate", "point_id"]
    assert "wall_time_s" in header and "rate_exc_baseline_hz" in header and "recalled_count" in header
    units = json.loads(runner.invoke(app, ["query", str(path), "--all", "--format", "json"]).stdout)["units"]
    assert units["hold"] == "s" and units["wall_time_s"] == "s" and units["rate_exc_baseline_hz"] == "Hz"
    assert units["runaway_onset_s"] == "s"
    assert not {"recalled_count", "recall_score_min", "outcome", "status", "point_id", "replicate"} & set(units)


def test_status_lists_every_label_and_each_failed_point_with_its_error(tmp_path: Path) -> None:
    path = _filled_store(tmp_path, {(1, 0, 0): None})
    shown = CliRunner().invoke(app, ["status", str(path), "--failed"])
    assert shown.exit_code == 0, shown.output
    lines = shown.stdout.splitlines()
    counts = next(line for line in lines if line.startswith("status:")).removeprefix("status:").split(",")
    assert [c.split()[0] for c in counts] == list(STATUSES)
    assert dict(c.split() for c in counts) == {**{s: "0" for s in STATUSES}, "done": "7", "failed": "1"}
    failed = lines[lines.index(next(line for line in lines if line.startswith("failed "))):][:2]
    assert failed == ["failed 1x: RuntimeError: worker lost", "  n_odours=2 beta=0.0 replicate=0 (p2)"]


def test_status_of_a_store_with_nothing_done_says_so(tmp_path: Path) -> None:
    path = tmp_path / "empty.zarr"
    create_store(path, GridSpec(AXES, 1, 4, 3, 20, 0.5, "fp", {}), np.array([f"p{i}" for i in range(8)],
                 dtype=object).reshape(4, 2, 1), np.arange(8).reshape(4, 2, 1))
    shown = CliRunner().invoke(app, ["status", str(path)])
    assert shown.exit_code == 0 and "nan" not in shown.stdout
    assert shown.stdout.splitlines()[-1] == "no point done yet"


@pytest.mark.parametrize("command", ["status", "query", "capacity", "plot", "export"])
def test_a_sweep_file_instead_of_a_store_names_its_store(tmp_path: Path, command: str) -> None:
    sweep = tmp_path / "odour.toml"
    sweep.write_text('[sweep]\nname = "odour-pointer"\nstore = "results/odour-pointer.zarr"\n\n'
                     '[[sweep.axis]]\nname = "n_odours"\nkey = "assemblies.count"\nvalues = [1, 2]\n')
    shown = CliRunner().invoke(app, [command, str(sweep), *(["--csv", str(tmp_path / "x.csv")]
                                                          if command == "export" else [])])
    assert shown.exit_code != 0 and "Traceback" not in shown.output and shown.output.count("\n") == 1
    assert shown.stderr.strip() == (f"capsweep: error: {sweep} is a sweep file; its store is results/odour-pointer.zarr "
                                    f"(run `capsweep {command} results/odour-pointer.zarr`)")


def test_success_and_status_columns_tell_partial_recall_from_success(store: Path) -> None:
    """Stable points that recalled only some odours looked like successes; `query --all` had no status column
    and its pending point was a blank row. SPECIAL: (count 3, beta 0, replicate 1) is stable but recalls 2 of 3;
    (count 1, beta 0.05, replicate 1) is pending."""
    shown = CliRunner().invoke(app, ["query", str(store), "--all", "--format", "json"])
    rows = {(r["n_odours"], r["beta"], r["replicate"]): r for r in json.loads(shown.stdout)["rows"]}
    partial = rows[(3, 0.0, 1)]
    assert (partial["status"], partial["outcome"], partial["recalled_count"], partial["success"]) == (
        "done", "stable", 2, False)
    assert (rows[(4, 0.0, 0)]["outcome"], rows[(4, 0.0, 0)]["success"]) == ("runaway", False)
    assert rows[(3, 0.0, 0)]["success"] is True
    assert (rows[(1, 0.05, 1)]["status"], rows[(1, 0.05, 1)]["success"]) == ("pending", None)
    table = CliRunner().invoke(app, ["query", str(store), "--all", "--wide"]).stdout.splitlines()
    assert table[0].split()[:5] == ["n_odours", "beta", "replicate", "status", "success"]
    assert [line.split()[3:5] for line in table[1:] if line.split()[:3] == ["1", "0.05", "1"]] == [["pending", "NA"]]


@pytest.mark.parametrize("fmt", ["csv", "json"])
def test_every_format_states_its_filter_on_stderr(store: Path, fmt: str) -> None:
    shown = CliRunner().invoke(app, ["query", str(store), "--format", fmt])
    assert shown.stderr == 'filter: status == "done" and outcome == "stable" (default; --all for every point)\n'


def test_query_and_capacity_json_share_one_shape(store: Path) -> None:
    """`capacity --format json` was a bare list, `query --format json` an object with units and filter."""
    query = json.loads(CliRunner().invoke(app, ["query", str(store), "--format", "json"]).stdout)
    capacity = json.loads(CliRunner().invoke(app, ["capacity", str(store), "--format", "json"]).stdout)
    assert set(query) == set(capacity) == {"units", "filter", "rows"}
    assert query["units"]["rate_exc_baseline_hz"] == "Hz"


def test_capacity_table_keeps_capacity_numeric_and_per_count_applies_to_the_table(store: Path) -> None:
    """The capacity column mixed numbers and 'at least 4'; `--per-count` without csv/json was silently ignored.
    SPECIAL: beta 0 succeeds in 2, 2, 1, 0 of 2 replicates at counts 1-4 (fitted crossing inside the grid, first
    failure 3); beta 0.05 succeeds at every count, so its fit is censored above 4 (a number with a 'lower bound'
    mark), and its pending point leaves the first-failure capacity NA."""
    shown = CliRunner().invoke(app, ["capacity", str(store), "--wide"]).stdout
    capacity_rows = shown.split("capacity (fitted")[1].splitlines()[1:]
    header = capacity_rows[0].split()
    assert header[:5] == ["beta", "capacity", "censored", "interval_95", "first_failure"]
    expected = fit_capacity({1: Tally(2, 2), 2: Tally(2, 2), 3: Tally(1, 2), 4: Tally(0, 2)})
    assert expected is not None and expected.estimate is not None
    inside, censored = capacity_rows[1].split(), capacity_rows[2].split()
    assert inside[0] == "0" and float(inside[1]) == pytest.approx(expected.estimate, abs=0.005) and inside[3] == "3"
    assert censored[:4] == ["0.05", "4.00", "lower", "bound"] and censored[5] == "NA"
    per_count = CliRunner().invoke(app, ["capacity", str(store), "--per-count"]).stdout
    assert "success per count" in per_count and "capacity (fitted" not in per_count


def test_a_censored_capacity_is_a_number_with_a_lower_bound_mark(tmp_path: Path) -> None:
    shown = CliRunner().invoke(app, ["capacity", str(_filled_store(tmp_path, {}))]).stdout
    row = shown.split("capacity (fitted")[1].splitlines()[2].split()
    assert row[1:4] == ["4", "lower", "bound"]
