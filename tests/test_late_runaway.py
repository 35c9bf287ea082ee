"""A runaway set off by the last cue is detected (real Brian2 runs of each CI engine).

One prewired assembly (gain 5) under the E->E rule without inhibitory plasticity sits at a few Hz
through the hold, and the recall cue at its end sets off a runaway (measured with capsweep on
this machine, December 2026). The run must go on after the cue for at least runaway_hold_s +
smoothing_s, or the onset cannot be established: without that tail the run ended 0.5 s after
the cue and such a point was scored stable.
"""

from __future__ import annotations

import pytest

from capsweep.registry import defaults, nest
from capsweep.runners import metrics, protocol
from capsweep.runners.point import run_point

LATE = {
    "network.n_exc": 300, "assemblies.count": 1, "assemblies.size": 60, "assemblies.prewire_gain": 5.0,
    "plasticity.triplet.a_ltp": 0.03, "plasticity.triplet.b_ltd": 0.006, "plasticity.inhibitory.enabled": False,
    "protocol.settle_s": 1.0, "protocol.hold_s": 1.0,
}


@pytest.mark.parametrize("engine", ["standalone",  # the cython case: 37 s; its abort is checked in CI by test_engines
                                    pytest.param("cython", marks=pytest.mark.slow)])
def test_runaway_after_the_last_cue_is_caught(engine: str) -> None:
    cfg = nest({**defaults(), **LATE, "execution.engine": engine})
    result = run_point(cfg, 1, wiring_seed=7)
    det = cfg["detection"]
    sched = protocol.schedule(cfg)
    cue_end = sched.seconds(sched.cue_windows[-1][2])
    threshold = metrics.runaway_threshold(det, float(result["rate_exc_baseline_hz"]))
    assert result["rate_exc_hold_end_hz"] < threshold  # no runaway before the cue
    assert result["outcome"] == "runaway"
    assert result["runaway_onset_s"] > cue_end  # set off by the cue, after it (cue periods are excluded)
    assert result["simulated_time_s"] >= result["runaway_onset_s"] + det["runaway_hold_s"] - 1e-9
    assert cue_end + cfg["protocol"]["cue_gap_s"] < result["runaway_onset_s"] + det["runaway_hold_s"]  # past the old end
