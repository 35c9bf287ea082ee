"""The recall test (evoked completion against two nulls) and per-assembly stability, on constructed spike trains.

Nothing here simulates a network: spike trains are Poisson or regular trains made in the test,
so the expected verdicts follow from the rates chosen, not from the code under test.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.stats import binom

from capsweep.errors import ConfigError
from capsweep.registry import defaults, nest
from capsweep.runners import metrics, protocol
from capsweep.runners.scoring import onset_in_schedule, recall_metrics, stuck_onsets
from capsweep.sweeps.expand import check_consistency

ALPHA = 0.01
DRAWS = 199  # the randomised p-value is exact for any number of draws; alpha x (draws + 1) >= 1


def _poisson(rates_hz: np.ndarray, t0: float, t1: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Spike times (s) and cells of independent Poisson trains, cell i at ``rates_hz[i]``, over ``[t0, t1)``."""
    counts = rng.poisson(rates_hz * (t1 - t0))
    cells = np.repeat(np.arange(len(rates_hz)), counts)
    return rng.uniform(t0, t1, len(cells)), cells


def _calibration_trial(rate_hz: float, rng: np.random.Generator) -> metrics.RecallTest:
    """One recall test on 60 cells all firing ``rate_hz`` (no assembly): 20 'members', 10 of them 'cued'.

    10 s of background, then a 0.2 s cue at 10 s whose first 0.02 s is skipped (the registry's
    default windows): recall window [10.02, 10.2), pre-cue window [9.82, 10.0).
    """
    n_cells, cue = 60, 10.0
    members = np.arange(n_cells) < 20
    cued = np.arange(n_cells) < 10
    times, cells = _poisson(np.full(n_cells, rate_hz), 0.0, cue + 1.0, rng)
    recall, pre = (0.02, 0.2), (-0.18, 0.0)
    during = metrics.window_counts(times, cells, n_cells, cue + recall[0], cue + recall[1])
    before = metrics.window_counts(times, cells, n_cells, cue + pre[0], cue + pre[1])
    starts = metrics.uniform_in_spans([(0.18, cue - 0.2)], DRAWS, rng)
    order = np.argsort(times)
    uncued = (members & ~cued)[cells[order]]
    shifted = metrics.shifted_differences(times[order][uncued], starts, recall, pre)
    return metrics.recall_test(during, before, 0.18, members, cued, shifted, rng, np.inf, ALPHA)


@pytest.mark.parametrize("rate_hz", [0.5, 3.0, 10.0])
def test_false_positive_rate_is_alpha_for_cells_without_an_assembly(rate_hz: float) -> None:
    """Equal-rate Poisson cells (no assembly, no effect of the cue): each null's randomised p-value
    is at most alpha in a fraction alpha of tests, within the binomial 99 % interval over 1000
    tests (scipy.stats.binom). At 0.5 Hz a cell has 0.09 expected spikes per 0.18 s window, so
    nearly every count is zero and most null values tie with the observed one: the random tie
    break keeps the test exact (randomised permutation p-value, [common practice]; the (b + 1) /
    (m + 1) form of Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39 [memory], with ties split
    at random). The rule (both nulls beaten) is at most as often positive as either null."""
    rng = np.random.default_rng(int(rate_hz * 10))
    trials = 1000
    tests = [_calibration_trial(rate_hz, rng) for _ in range(trials)]
    low, high = binom.interval(0.99, trials, ALPHA)
    for name in ("p_cells", "p_times"):
        positives = sum(getattr(t, name) <= ALPHA for t in tests)
        assert low <= positives <= high, (name, positives, (low, high))
    recalled = sum(t.state == "recalled" for t in tests)
    assert recalled == sum(t.p_value <= ALPHA for t in tests) and recalled <= high


def test_randomised_p_splits_ties_at_random() -> None:
    """Every null value ties with the observed one: p = u (t + 1) / (n + 1) with t = n, i.e. p = u."""
    null = np.zeros(99, dtype=np.int64)
    assert metrics.randomised_p(0, null, 0.3) == pytest.approx(0.3)
    assert metrics.randomised_p(1, null, 0.3) == pytest.approx(0.3 / 100)  # above every null value
    assert metrics.randomised_p(-1, null, 0.3) == pytest.approx((99 + 0.3) / 100)  # below every one


N_EXC, SIZE, BASELINE_HZ = 2000, 400, 2.5


def _one_assembly() -> tuple[dict, protocol.Schedule, SimpleNamespace]:
    """Registry defaults with one prewired assembly of 400 of 2000 cells (200 cued), settle 1 s, hold 8 s."""
    cfg = nest({**defaults(), "assemblies.count": 1, "protocol.settle_s": 1.0, "protocol.hold_s": 8.0})
    sched = protocol.schedule(cfg)
    members = np.zeros((1, N_EXC), dtype=bool)
    members[0, :SIZE] = True
    cued = members & (np.arange(N_EXC) < SIZE // 2)
    return cfg, sched, SimpleNamespace(schedule=sched, memberships=members, cued=cued, exc=np.zeros(N_EXC))


def _cue_experiment(member_before_hz: float, member_during_hz: float, other_before_hz: float,
                    other_during_hz: float) -> dict[str, object]:
    """Scores of one cue: uncued members and non-members fire at the 'before' rates everywhere except
    during the cue, where they fire at the 'during' rates; cued members fire 80 Hz during the cue."""
    cfg, sched, handles = _one_assembly()
    _, a, b = sched.cue_windows[0]
    cue_start, cue_stop, end = sched.seconds(a), sched.seconds(b), sched.seconds(sched.end)
    members, cued = handles.memberships[0], handles.cued[0]
    rng = np.random.default_rng(11)
    before = np.where(members, member_before_hz, other_before_hz)
    during = np.where(members, member_during_hz, other_during_hz)
    during[cued] = 80.0
    parts = [_poisson(before, 0.0, cue_start, rng), _poisson(during, cue_start, cue_stop, rng),
             _poisson(before, cue_stop, end, rng)]
    times, cells = np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
    order = np.argsort(times)
    return recall_metrics(cfg, handles, times[order], cells[order], BASELINE_HZ, True, 5,  # type: ignore[arg-type]
                          end)


def test_pre_active_assembly_is_already_active_not_recalled() -> None:
    """Members at 15 Hz before and during the cue, others at 2.5 Hz: the overlap score sees
    1 - 2.5 / 15 = 0.83 [derived] and counts a recall; the members fired above the active threshold
    (max(3 x 2.5 Hz, 5 Hz) = 7.5 Hz) before the cue, so the assembly is already active."""
    out = _cue_experiment(15.0, 15.0, 2.5, 2.5)
    assert out["recall_score"][0] >= 0.5  # type: ignore[index]
    assert out["recall_state"] == ["already_active"]
    assert out["precue_rate_hz"][0] == pytest.approx(15.0, rel=0.15)  # type: ignore[index]


def test_true_completion_is_recalled_by_both() -> None:
    """Uncued members rise from 3 to 20 Hz during the cue, others stay at 3 Hz: recalled by the
    overlap score (1 - 3 / 20 = 0.85 [derived]) and by the recall test (evoked completion 17 Hz)."""
    out = _cue_experiment(3.0, 20.0, 3.0, 3.0)
    assert out["recall_score"][0] >= 0.5  # type: ignore[index]
    assert out["recall_state"] == ["recalled"]
    assert out["evoked_completion_hz"][0] == pytest.approx(17.0, abs=2.0)  # type: ignore[index]


def test_suppressed_others_with_members_not_raised_is_not_recalled() -> None:
    """Members fall from 2.2 to 0.6 Hz during the cue while the others fall from 2.5 to 0.2 Hz: the
    overlap score is 1 - 0.2 / 0.6 = 0.67 [derived], a 'recall'; the members did not rise against
    their own pre-cue rate (evoked completion -1.6 Hz), so the null of background times rejects it
    even though the members fell less than the pseudo-assemblies did."""
    out = _cue_experiment(2.2, 0.6, 2.5, 0.2)
    assert out["recall_score"][0] >= 0.5  # type: ignore[index]
    assert out["recall_state"] == ["not_recalled"]
    assert out["evoked_completion_hz"][0] < 0  # type: ignore[index]
    assert out["recall_p_times"][0] > 0.5  # type: ignore[index]


def _regular(n_cells: int, rate_hz: float, t0: float, t1: float, first_cell: int) -> tuple[np.ndarray, np.ndarray]:
    """Evenly spaced spikes: ``n_cells`` cells at ``rate_hz`` each, in turn, so each 10 ms bin holds the same count."""
    total = int(round(n_cells * rate_hz * (t1 - t0)))
    times = t0 + (np.arange(total) + 0.5) / (n_cells * rate_hz)
    return times, first_cell + np.arange(total) % n_cells


def test_an_assembly_stuck_on_is_flagged_while_the_population_is_not() -> None:
    """300 cells, assemblies 0-59 and 60-119. Assembly 0 goes from 5 to 20 Hz at 5 s and stays there;
    the rest fire 2.5 Hz (assembly 1 included), so the population rate is (60 x 20 + 240 x 2.5) / 300
    = 6 Hz, below the runaway threshold max(4 x 2.5 Hz, 10 Hz) = 10 Hz. The members' 0.5 s moving
    average (50 bins of 10 ms) reaches 10 Hz when n bins at 20 Hz satisfy (5 (50 - n) + 20 n) / 50
    >= 10, i.e. n >= 16.7 -> 17 bins -> onset 5.17 s [derived]; assembly 1 is never flagged."""
    cfg = nest({**defaults(), "assemblies.count": 2, "protocol.settle_s": 1.0, "protocol.hold_s": 8.0})
    sched = protocol.schedule(cfg)
    members = np.zeros((2, 300), dtype=bool)
    members[0, :60], members[1, 60:120] = True, True
    handles = SimpleNamespace(schedule=sched, memberships=members, cued=members & False, exc=np.zeros(300))
    end = sched.seconds(sched.end)
    parts = [_regular(60, 5.0, 0.0, 5.0, 0), _regular(60, 20.0, 5.0, end, 0), _regular(240, 2.5, 0.0, end, 60)]
    times, cells = np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
    det = cfg["detection"]
    onsets = stuck_onsets(det, handles, times, cells, BASELINE_HZ, end)  # type: ignore[arg-type]
    assert onsets[0] == pytest.approx(5.17) and np.isnan(onsets[1])
    bin_s = det["trace_bin_ms"] * 1e-3
    population = metrics.binned_rate(times, 300, bin_s, end)
    assert np.isnan(onset_in_schedule(population, BASELINE_HZ, det, sched, bin_s))


@pytest.mark.parametrize("overrides, named", [
    ({"protocol.cue_gap_s": 0.1}, "protocol.cue_gap_s"),  # pre-cue window (0.18 s) would reach into the cue before
    ({"protocol.settle_s": 0.1, "protocol.hold_s": 0.0, "detection.baseline_start_s": 0.0}, "protocol.hold_s"),
    ({"detection.recall_alpha": 0.01, "detection.recall_null_draws": 50}, "detection.recall_null_draws"),
])
def test_configs_whose_windows_cannot_be_placed_are_refused(overrides: dict, named: str) -> None:
    flat = {**defaults(), **overrides}
    with pytest.raises(ConfigError, match=named.replace(".", r"\.")):
        check_consistency(flat, "test")
