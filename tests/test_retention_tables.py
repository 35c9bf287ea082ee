"""Retention and forgetting tables (capsweep.sweeps.retention) on a hand-built store Dataset.

The Dataset below is written out by hand (not by the runner or the store code): two conditions (tau_consolidation
10 s and 1200 s, an axis of the sweep text the tables read tau from), three replicates, two recall tests (during the
hold at 5 s, final at 20 s) and, for blocked learning, two memory ages. Every expected number is worked out from
those counts in the test: fraction = recalled / tested per point and test; its mean over done replicates; a 95 %
Student-t interval across replicates, mean +- t(0.975, n - 1) s / sqrt(n) [common practice; Student 1908,
Biometrika 6:1, cited from memory], computed here with ``scipy.stats.t.interval`` and clipped to [0, 1]; and the
counts pooled over done replicates with their 95 % Wilson score interval (Wilson 1927, J Am Stat Assoc 22:209),
computed here by ``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")`` and, where all were recalled, by
hand: the lower end of k = n is n / (n + z^2), z = 1.959964 (the standard normal 0.975 quantile).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from capsweep.flags import STATUSES
from capsweep.sweeps.retention import forgetting_table, retention_table

SWEEP_TEXT = """
[sweep]
name = "retention-table-test"
store = "unused.zarr"
replicates = 3
base_seed = 1

[[sweep.axis]]
name = "tau"
key = "plasticity.heterosynaptic.tau_consolidation_s"
values = [10.0, 1200.0]
"""
"""A sweep of two consolidation time constants (s), three replicates: the grid of the Dataset below."""

DONE, FAILED, PENDING = STATUSES.index("done"), STATUSES.index("failed"), STATUSES.index("pending")


def _dataset(inner: str, recalled: list, tested: list, delay_s: list) -> xr.Dataset:
    """The store's variables the tables read, over (tau, replicate, ``inner``); statuses per (tau, replicate):
    tau 10 s all done; tau 1200 s replicate 2 failed (its counts must not enter), replicate 1 done, 0 done."""
    dims = ("tau", "replicate", inner)
    status = np.array([[DONE, DONE, DONE], [DONE, DONE, FAILED]])
    names = {"retention": ("retention_recalled", "retention_tested", "retention_delay_s"),
             "age": ("age_recalled", "age_tested", "age_s")}[inner]
    return xr.Dataset(
        {"status": (("tau", "replicate"), status,
                    {"flag_values": list(range(len(STATUSES))), "flag_meanings": " ".join(STATUSES)}),
         "point_id": (("tau", "replicate"), np.array([[f"p{i}{r}" for r in range(3)] for i in range(2)], dtype=object)),
         names[0]: (dims, np.array(recalled)), names[1]: (dims, np.array(tested)), names[2]: (dims, np.array(delay_s))},
        coords={"tau": [10.0, 1200.0], "replicate": [0, 1, 2]}, attrs={"sweep_text": SWEEP_TEXT})


def _expected(counts: list[tuple[int, int]], delay_s: float, tau_s: float) -> dict[str, float]:
    """Mean, intervals and delays of one row, from the (recalled, tested) counts of its done replicates."""
    fractions = [r / t for r, t in counts]
    n, mean = len(fractions), float(np.mean(fractions))
    lo = hi = np.nan if n == 1 else mean  # one replicate: no interval; no spread: zero width (s = 0 in the formula)
    if n > 1 and np.std(fractions) > 0:
        lo, hi = stats.t.interval(0.95, n - 1, loc=mean, scale=stats.sem(fractions))
    recalled, tested = sum(r for r, _ in counts), sum(t for _, t in counts)
    wilson = stats.binomtest(recalled, tested).proportion_ci(0.95, method="wilson")
    return {"fraction": mean, "replicates": n, "recalled": recalled, "tested": tested,
            "wilson_lo": wilson.low, "wilson_hi": wilson.high,
            "t_lo": max(lo, 0.0) if n > 1 else np.nan, "t_hi": min(hi, 1.0) if n > 1 else np.nan,
            "delay_s": delay_s, "delay_tau": delay_s / tau_s}


def _check(table: pd.DataFrame, inner: str, expected: dict[tuple[float, int], dict[str, float]]) -> None:
    assert list(table.columns) == ["tau", inner, "delay_s", "delay_tau", "fraction", "replicates", "recalled",
                                   "tested", "wilson_lo", "wilson_hi", "t_lo", "t_hi"]
    assert [(row.tau, getattr(row, inner)) for row in table.itertuples()] == list(expected)
    for (_, row), want in zip(table.iterrows(), expected.values()):
        for column, value in want.items():
            assert row[column] == pytest.approx(value, rel=1e-12, nan_ok=True), (row["tau"], row[inner], column)


def test_retention_table_by_hand() -> None:
    """Four cued odours per test (two under a once-like design in one point); a -1 (test not reached) and the
    failed point are left out; one replicate left gives no interval."""
    recalled = [[[4, 2], [3, 1], [2, 0]],
                [[4, 4], [1, -1], [0, 0]]]   # tau 1200 s, replicate 2: failed
    tested = [[[4, 4], [4, 4], [4, 4]],
              [[4, 4], [2, -1], [4, 4]]]
    delays = np.tile([5.0, 20.0], (2, 3, 1)).tolist()
    table = retention_table(_dataset("retention", recalled, tested, delays))
    _check(table, "retention", {
        (10.0, 0): _expected([(4, 4), (3, 4), (2, 4)], 5.0, 10.0),    # mean 0.75: t interval 0.129 .. 1 (clipped 1.371)
        (10.0, 1): _expected([(2, 4), (1, 4), (0, 4)], 20.0, 10.0),   # mean 0.25, pooled 3 of 12
        (1200.0, 0): _expected([(4, 4), (1, 2)], 5.0, 1200.0),        # 5 s is 1/240 tau; mean 0.75, pooled 5 of 6
        (1200.0, 1): _expected([(4, 4)], 20.0, 1200.0),               # replicate 1 never reached the final test
    })
    row = table.iloc[0]
    assert row["t_lo"] == pytest.approx(0.75 - 4.303 * 0.25 / np.sqrt(3), abs=1e-3)  # t(0.975, 2) = 4.303 (printed tables)
    # 4 of 4 in one replicate: no t interval, Wilson [n / (n + z^2), 1] = [4 / 7.8415, 1] = [0.5101, 1]
    assert table.iloc[3]["wilson_lo"] == pytest.approx(4 / (4 + 1.959964**2), rel=1e-6)
    assert table.iloc[3]["wilson_hi"] == 1.0


def test_forgetting_table_by_hand() -> None:
    """Blocked learning of two odours: age 0 tested twice per point, age 1 once; the age in seconds is the mean over
    replicates of each point's mean age, and in tau its ratio to the condition's tau."""
    recalled = [[[2, 1], [1, 0], [2, 0]],
                [[1, 1], [0, 1], [2, 1]]]   # tau 1200 s, replicate 2: failed
    tested = [[[2, 1], [2, 1], [2, 1]],
              [[2, 1], [2, 1], [2, 1]]]
    ages = [[[0.7, 2.2], [0.8, 2.4], [0.6, 2.0]],
            [[0.7, 2.2], [0.9, 2.6], [5.0, 9.0]]]
    table = forgetting_table(_dataset("age", recalled, tested, ages))
    _check(table, "age", {
        (10.0, 0): _expected([(2, 2), (1, 2), (2, 2)], 0.7, 10.0),
        (10.0, 1): _expected([(1, 1), (0, 1), (0, 1)], 2.2, 10.0),
        (1200.0, 0): _expected([(1, 2), (0, 2)], 0.8, 1200.0),
        (1200.0, 1): _expected([(1, 1), (1, 1)], 2.4, 1200.0),     # no spread: a zero-width t interval at 1
    })
    agree = table.iloc[3]
    assert (agree["t_lo"], agree["t_hi"]) == (1.0, 1.0), "the Student-t interval of replicates that agree"
    # Wilson of 2 of 2 by hand: [2 / (2 + z^2), 1] = [0.3424, 1]: two tests cannot show recall is certain
    assert agree["wilson_lo"] == pytest.approx(2 / (2 + 1.959964**2), rel=1e-6) and agree["wilson_hi"] == 1.0


def test_points_written_before_schema_3_2_count_every_assembly_tested() -> None:
    """A point of an upgraded store holds no retention_tested (missing: -1 on disk); every test then cued all of the
    point's assemblies (assemblies.count, 4 by default), so a reached test counts 4 tested and an unreached one
    (recalled -1) is left out."""
    recalled = [[[4, 2], [3, 1], [2, 0]],
                [[4, 4], [1, -1], [0, 0]]]
    missing = np.full((2, 3, 2), -1).tolist()
    table = retention_table(_dataset("retention", recalled, missing, np.tile([5.0, 20.0], (2, 3, 1)).tolist()))
    assert table["tested"].tolist() == [12, 12, 8, 4]
    assert table["recalled"].tolist() == [9, 3, 5, 4]


def test_a_store_with_nothing_done_gives_an_empty_table() -> None:
    recalled = np.zeros((2, 3, 2), dtype=int).tolist()
    ds = _dataset("retention", recalled, np.full((2, 3, 2), 4).tolist(), np.tile([5.0, 20.0], (2, 3, 1)).tolist())
    ds["status"][:] = PENDING
    assert retention_table(ds).empty
