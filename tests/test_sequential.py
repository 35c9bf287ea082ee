"""The sequential design (capsweep.sweeps.sequential): Wilson intervals against scipy, the replicate rule, the open count search."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binomtest

from capsweep.sweeps.sequential import Tally, next_count, replicates_to_add, wilson_interval


@pytest.mark.reference
@settings(deadline=None)  # no timing in tests: the machine may be busy
@given(st.integers(1, 60), st.data(), st.sampled_from([0.8, 0.9, 0.95, 0.99]))
def test_wilson_interval_matches_scipy(trials: int, data: st.DataObject, confidence: float) -> None:
    # Wilson 1927 (J Am Stat Assoc 22:209) score interval, as scipy.stats.binomtest(...).proportion_ci(method="wilson").
    successes = data.draw(st.integers(0, trials))
    expected = binomtest(successes, trials).proportion_ci(confidence_level=confidence, method="wilson")
    assert wilson_interval(successes, trials, confidence) == pytest.approx((expected.low, expected.high), abs=1e-12)


def test_wilson_interval_of_no_trials_is_undefined() -> None:
    assert all(math.isnan(v) for v in wilson_interval(0, 0))


def test_replicates_go_where_the_interval_straddles_the_threshold() -> None:
    # At 95 %: 3 of 3 gives [0.44, 1] (straddles 0.5), 5 of 5 gives [0.57, 1] and 0 of 5 [0, 0.43] (decided);
    # 5 of 10 straddles but has used the cap; crashed replicates count towards the cap.
    tallies = {1: Tally(3, 3), 2: Tally(5, 5), 3: Tally(0, 5), 4: Tally(3, 5), 5: Tally(5, 10), 6: Tally(4, 8, crashed=1),
               7: Tally(0, 0, crashed=2)}
    assert replicates_to_add(tallies) == {1: 2, 4: 2, 6: 1}
    assert replicates_to_add(tallies, cap=20, batch=4) == {1: 4, 4: 4, 5: 4, 6: 4}
    assert replicates_to_add(dict(reversed(list(tallies.items())))) == replicates_to_add(tallies)


def test_replicate_rounds_end_decided_or_at_the_cap() -> None:
    # Whatever the outcomes, rounds of 2 from 3 replicates stop by the cap of 10 (4 rounds: 5, 7, 9, 10).
    for wins in ("all", "none", "half"):
        tally, rounds = Tally(0, 3), 0
        while more := replicates_to_add({4: tally}).get(4, 0):
            added = {"all": more, "none": 0, "half": more // 2}[wins]
            tally, rounds = Tally(tally.successes + added, tally.decided + more), rounds + 1
        assert tally.decided <= 10 and rounds <= 4


@pytest.mark.parametrize(("passes", "start", "ceiling", "expected"), [
    ({}, 4, 64, 4),
    ({4: True}, 4, 64, 8),
    ({4: True, 8: True}, 4, 64, 16),
    ({4: True, 8: True}, 4, 12, 12),
    ({4: True, 12: True}, 4, 12, None),  # censored above: everything up to the ceiling passes
    ({4: True, 8: False}, 4, 64, 6),  # round(sqrt(32))
    ({4: True, 6: True, 8: False}, 4, 64, 7),
    ({4: True, 5: True, 6: False}, 4, 64, None),  # bracketed
    ({4: False}, 4, 64, 2),
    ({1: False, 2: False}, 4, 64, None),  # censored below
    ({4: True, 5: False, 8: True}, 4, 64, None),  # a pass above the failure does not move the bracket
])
def test_next_count_by_hand(passes: dict[int, bool], start: int, ceiling: int, expected: int | None) -> None:
    assert next_count(passes, start, ceiling) == expected


def test_next_count_stays_at_or_above_the_floor() -> None:
    # A grid that starts at 3: halving from 8 gives 4, from 4 gives 3 (not 2), and a failing 3 is censored below.
    assert [next_count({c: False}, c, 64, floor=3) for c in (8, 4, 3)] == [4, 3, None]


@settings(deadline=None)  # no timing in tests: the machine may be busy
@given(st.integers(1, 200), st.data())
def test_open_search_brackets_every_monotone_capacity(ceiling: int, data: st.DataObject) -> None:
    # A monotone truth: counts <= capacity pass, larger ones fail. The search must end with the capacity
    # bracketed (it passes and capacity + 1 fails) or censored (capacity 0, or the ceiling), in few steps.
    capacity = data.draw(st.integers(0, ceiling))
    start = data.draw(st.integers(1, ceiling))
    passes: dict[int, bool] = {}
    while (count := next_count(passes, start, ceiling)) is not None:
        assert count not in passes and 1 <= count <= ceiling
        passes[count] = count <= capacity
    assert capacity == max((c for c, ok in passes.items() if ok), default=0)
    assert capacity == ceiling or passes.get(capacity + 1) is False
    assert len(passes) <= 2 * math.log2(ceiling) + 3
