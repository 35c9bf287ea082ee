"""Retention and forgetting tables (capsweep.sweeps.retention) on a hand-built store Dataset.

The Dataset below is written out by hand (not by the runner or the store code): two conditions (tau_consolidation
10 s and 1200 s, an axis of the sweep text the tables read tau from), three replicates, two recall tests (during the
hold at 5 s, final at 20 s) and, for blocked learning, two memory ages. Every expected number is worked out from
those counts in the test: fraction = recalled / tested per point and test; its mean over done replicates; a 95 %
Student-t interval across replicates, mean +- t(0.975, n - 1) s / sqrt(n) [common practice; Student 1908,
Biometrika 6:1, cited from memory], computed here with ``scipy.stats.t.interval`` and clipped to [0, 1].
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


def _expected(fractions: list[float], delay_s: float, tau_s: float) -> dict[str, float]:
    """Mean, interval and delays of one row, from the per-replicate fractions worked out by hand."""
    n, mean = len(fractions), float(np.mean(fractions))
    lo = hi = np.nan if n == 1 else mean  # one replicate: no interval; no spread: zero width (s = 0 in the formula)
    if n > 1 and np.std(fractions) > 0:
        lo, hi = stats.t.interval(0.95, n - 1, loc=mean, scale=stats.sem(fractions))
    return {"fraction": mean, "ci_lo": max(lo, 0.0) if n > 1 else np.nan, "ci_hi": min(hi, 1.0) if n > 1 else np.nan,
            "replicates": n, "delay_s": delay_s, "delay_tau": delay_s / tau_s}


def _check(table: pd.DataFrame, inner: str, expected: dict[tuple[float, int], dict[str, float]]) -> None:
    assert list(table.columns) == ["tau", inner, "delay_s", "delay_tau", "fraction", "replicates", "ci_lo", "ci_hi"]
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
        (10.0, 0): _expected([4 / 4, 3 / 4, 2 / 4], 5.0, 10.0),      # mean 0.75: interval 0.129 .. 1 (clipped 1.371)
        (10.0, 1): _expected([2 / 4, 1 / 4, 0 / 4], 20.0, 10.0),     # mean 0.25
        (1200.0, 0): _expected([4 / 4, 1 / 2], 5.0, 1200.0),         # 5 s is 1/240 tau
        (1200.0, 1): _expected([4 / 4], 20.0, 1200.0),               # replicate 1 never reached the final test
    })
    row = table.iloc[0]
    assert row["ci_lo"] == pytest.approx(0.75 - 4.303 * 0.25 / np.sqrt(3), abs=1e-3)  # t(0.975, 2) = 4.303 (printed tables)


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
        (10.0, 0): _expected([1.0, 0.5, 1.0], 0.7, 10.0),
        (10.0, 1): _expected([1.0, 0.0, 0.0], 2.2, 10.0),
        (1200.0, 0): _expected([0.5, 0.0], 0.8, 1200.0),
        (1200.0, 1): _expected([1.0, 1.0], 2.4, 1200.0),     # no spread: a zero-width interval at 1
    })


def test_a_store_with_nothing_done_gives_an_empty_table() -> None:
    recalled = np.zeros((2, 3, 2), dtype=int).tolist()
    ds = _dataset("retention", recalled, np.full((2, 3, 2), 4).tolist(), np.tile([5.0, 20.0], (2, 3, 1)).tolist())
    ds["status"][:] = PENDING
    assert retention_table(ds).empty
