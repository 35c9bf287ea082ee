"""The protocol timeline: recall tail, cue order, baseline window (no simulation)."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from capsweep.registry import defaults, nest
from capsweep.runners import metrics, protocol
from capsweep.runners.scoring import baseline_rate, onset_in_schedule, recall_metrics, retention_metrics

CONFIG = nest({**defaults(), "assemblies.count": 3, "protocol.hold_s": 2.0, "protocol.cue_gap_s": 0.5})


def test_tail_after_the_last_cue_lets_a_late_runaway_be_established() -> None:
    """A runaway set off by the last cue (E rate 2 Hz before, 30 Hz from the cue's end on) is found.

    The run must last at least runaway_hold_s + smoothing_s after the last cue, or the onset
    cannot be established before it ends; with the tail the onset is the smoothed trace's
    crossing of the threshold (4 x 2 Hz floored at 10 Hz) after the cue.
    """
    sched = protocol.schedule(CONFIG)
    det = CONFIG["detection"]
    last_cue_end = max(b for _, _, b in sched.cue_windows)
    assert sched.seconds(sched.end - last_cue_end) >= det["runaway_hold_s"] + det["smoothing_s"] - 1e-9
    bin_s = det["trace_bin_ms"] * 1e-3
    ends = (np.arange(int(round(sched.seconds(sched.end) / bin_s))) + 1) * bin_s
    rate = np.where(ends > sched.seconds(last_cue_end) + 1e-9, 30.0, 2.0)
    onset = onset_in_schedule(rate, 2.0, det, sched, bin_s)
    assert sched.seconds(last_cue_end) < onset <= sched.seconds(last_cue_end) + det["smoothing_s"]
    # the same trace cut 0.5 s after the last cue (the run's end without a tail) shows no runaway
    cut = int(round((sched.seconds(last_cue_end) + 0.5) / bin_s))
    assert np.isnan(onset_in_schedule(rate[:cut], 2.0, det, sched, bin_s))


def test_cue_order_is_a_permutation_drawn_per_seed() -> None:
    orders = {tuple(protocol.cue_order(6, seed)) for seed in range(20)}
    assert all(sorted(order) == list(range(6)) for order in orders)
    assert len(orders) > 10  # 720 possible orders; 20 seeds give many different ones
    assert protocol.cue_order(6, 5) == protocol.cue_order(6, 5)
    sched = protocol.schedule(CONFIG, [2, 0, 1])
    starts = {k: a for k, a, _ in sched.cue_windows}
    assert starts[2] == sched.hold_end and starts[0] < starts[1]
    assert sched.end == protocol.schedule(CONFIG).end  # the order does not change the length


def test_baseline_window_skips_the_start_up_transient() -> None:
    sched = protocol.schedule(CONFIG)
    assert sched.seconds(sched.baseline_start) == pytest.approx(CONFIG["detection"]["baseline_start_s"])
    # 100 cells firing 50 Hz for the first 0.2 s (the transient), then 3 Hz: the baseline is 3 Hz
    rng = np.random.default_rng(1)
    t = np.concatenate([rng.uniform(0, 0.2, 100 * 10), rng.uniform(0.2, 1.0, int(100 * 3 * 0.8))])
    assert baseline_rate(t, 100, sched) == pytest.approx(3.0, rel=0.01)
    assert metrics.mean_rate(t, 100, 0.0, 1.0) > 4.0  # what a window from 0 would have said


def test_retention_scores_each_recall_test_and_the_last_delay_recalled_in_a_row() -> None:
    """Two assemblies, recall tests at 1 s and 3 s after hold start and the final one at 6 s.

    Spikes are made by hand: in every cue window the cued members and (for a recalled assembly)
    its uncued members fire, others stay silent. Assembly 0 is recalled in all three tests,
    assembly 1 only in the first, so retention_s is 6 s and 1 s and the tests recall 2, 1, 1.
    """
    cfg = nest({**defaults(), "assemblies.count": 2, "protocol.hold_s": 6.0, "protocol.retention_delays_s": [1.0, 3.0],
                "protocol.settle_s": 1.0})
    sched = protocol.schedule(cfg, [1, 0])
    members = np.zeros((2, 40), dtype=bool)
    members[0, :20], members[1, 20:] = True, True
    cued = members & (np.arange(40) % 20 < 10)
    handles = SimpleNamespace(schedule=sched, memberships=members, cued=cued, exc=np.zeros(40))
    times, cells = [], []
    for test, cues in enumerate([sched.retention_windows[:2], sched.retention_windows[2:], sched.cue_windows]):
        for k, a, b in cues:
            recalled = k == 0 or test == 0
            firing = np.flatnonzero(members[k] if recalled else cued[k])
            for cell in firing:  # 20 spikes per cell spread over the cue window
                times += list(np.linspace(sched.seconds(a) + 0.03, sched.seconds(b) - 1e-3, 20))
                cells += [cell] * 20
    times_a, cells_a = np.array(times), np.array(cells)
    # seed 1: where nothing fires (assembly 1 after the first test) every pseudo-assembly ties with it and the
    # randomised p-value is uniform; with this seed it is above alpha in both tests, as it is 99 % of the time
    final = recall_metrics(cfg, handles, times_a, cells_a, 3.0, True, 1, sched.seconds(sched.end))  # type: ignore[arg-type]
    assert final["recall_state"] == ["recalled", "not_recalled"]
    out = retention_metrics(cfg, handles, times_a, cells_a, final, sched.seconds(sched.end), 3.0,
                            1)  # type: ignore[arg-type]
    np.testing.assert_allclose(out["retention_delay_s"], [1.0, 3.0, 6.0])
    np.testing.assert_array_equal(out["retention_recalled"], [2, 1, 1])
    np.testing.assert_allclose(out["retention_s"], [6.0, 1.0])
    # a run that stopped (runaway) before the second test: only the first test was reached
    unreached = recall_metrics(cfg, handles, times_a, cells_a, 3.0, False, 1, 0.0)  # type: ignore[arg-type]
    cut = retention_metrics(cfg, handles, times_a, cells_a, unreached, sched.seconds(sched.retention_windows[1][2])
                            + 0.2, 3.0, 1)  # type: ignore[arg-type]
    np.testing.assert_array_equal(cut["retention_recalled"], [2, -1, -1])
    np.testing.assert_allclose(cut["retention_s"], [1.0, 1.0])
