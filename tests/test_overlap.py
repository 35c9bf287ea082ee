"""Overlapping assemblies on every engine: a cell shared by two assemblies follows both cues.

With random membership (``assemblies.overlap = "random"``) assemblies share cells, so capacity
can exceed n_exc / size. Each cue must then drive every cued member of its assembly, shared
or not. Checked on real Brian2 runs of each engine: in each cue window the cells cued for that
assembly fire far above the cells the cue does not reach, and cells cued for two assemblies do
so in both of their windows.
"""

from __future__ import annotations

import numpy as np
import pytest

from capsweep.engines import ENGINES, engine_for, resolve
from capsweep.registry import defaults, nest
from capsweep.runners import metrics

CONFIG = {
    "network.n_exc": 120, "assemblies.count": 4, "assemblies.size": 40, "assemblies.overlap": "random",
    "assemblies.prewire_gain": 1.0, "protocol.cue_fraction": 1.0, "protocol.settle_s": 0.3,
    "protocol.hold_s": 0.2, "protocol.cue_duration_s": 0.1, "protocol.cue_gap_s": 0.1,
    "network.w_e_to_e": 0.01, "plasticity.freeze_after_imprint": True, "protocol.cue_weight": 0.2,
    "execution.abort_on_runaway": False,
}
"""Weak, frozen E->E weights: the cue's own input, not recurrent spread, decides who fires in a window."""


@pytest.mark.parametrize("engine", [name for name in ENGINES if name != "numpy"])
def test_every_cue_drives_all_its_members_shared_or_not(engine: str) -> None:
    cfg = nest({**defaults(), **CONFIG, "execution.engine": engine})
    assert engine_for(cfg)[0].name == engine  # no fallback: the engine expresses overlap itself
    handles, rec = resolve(ENGINES[engine].simulate)(cfg, 3, 5)
    cued = handles.cued
    shared = cued.sum(axis=0) >= 2
    assert shared.sum() >= 10, "the draw should give shared cells"
    for k, a, b in handles.schedule.cue_windows:
        t0, t1 = handles.schedule.seconds(a), handles.schedule.seconds(b)
        rate = metrics.window_counts(rec.t_exc, rec.i_exc, 120, t0, t1) / (t1 - t0)
        driven, idle = rate[cued[k]], rate[~cued[k]]
        assert np.median(driven) > 5 * max(np.median(idle), 5.0), (k, np.median(driven), np.median(idle))
        # every shared cell cued for k fires in k's window (the old one-schedule-per-cell stimulus failed here)
        assert np.all(rate[cued[k] & shared] > np.median(idle)), k
