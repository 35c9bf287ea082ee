"""Within-point checkpoints: a point killed mid-run resumes from its last checkpoint with the same result.

A tiny learned-assembly point on the cython engine (100 E cells, one assembly imprinted once,
consolidating reference weight, about 2.3 simulated s), checkpointed every 0.25 s. It runs in a
subprocess that is SIGKILLed once a checkpoint past the imprint phase exists; the same point run
again in this process must resume from that checkpoint and give every result value of an
uninterrupted run without checkpoints, bit for bit.
"""

from __future__ import annotations

import os
import pickle
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from capsweep.engines import engine_for
from capsweep.registry import defaults, flatten, nest
from capsweep.results_schema.layout import TIMINGS
from capsweep.runners import protocol
from capsweep.runners.point import run_point
from capsweep.runners.runtime import CHECKPOINT_DIR_ENV
from capsweep.sweeps.ids import point_id

SEED, WIRING = 5, 9
TINY = {
    "network.n_exc": 100, "network.indegree_exc": 40, "network.indegree_inh": 10,
    "assemblies.count": 1, "assemblies.size": 25, "assemblies.imprint": "learned",
    "plasticity.heterosynaptic.w_ref_mode": "consolidating", "plasticity.heterosynaptic.tau_consolidation_s": 1.0,
    "protocol.settle_s": 0.3, "protocol.imprint_on_s": 0.3, "protocol.imprint_off_s": 0.2,
    "protocol.imprint_repeats": 1, "protocol.hold_s": 1.0, "protocol.cue_gap_s": 0.3,
    "detection.runaway_hold_s": 0.2, "detection.smoothing_s": 0.1, "execution.engine": "cython",
}
"""A 2.3 s learned point: settle 0.3, imprint 0.5, hold 1.0, one cue 0.2 + gap 0.3 (dotted keys)."""
INTERVAL_S = 0.25

_CHILD = """
import pickle, sys
from capsweep.runners.point import run_point
cfg = pickle.load(open(sys.argv[1], "rb"))
run_point(cfg, {seed}, {wiring})
"""


def _equal(a: object, b: object) -> bool:
    """Same value, NaN equal to NaN, arrays element by element (bitwise for floats)."""
    if isinstance(a, (str, int)) and not isinstance(a, bool):
        return a == b
    return np.array_equal(np.asarray(a), np.asarray(b), equal_nan=True)


def _run_until_checkpoint(cfg: dict, folder: Path, after_step: int) -> dict:
    """Run the point in a subprocess, SIGKILL it once its checkpoint is past ``after_step``; the checkpoint's content."""
    cfg_file = folder / "cfg.pkl"
    cfg_file.write_bytes(pickle.dumps(cfg))
    env = {**os.environ, CHECKPOINT_DIR_ENV: str(folder / "checkpoints")}
    child = subprocess.Popen([sys.executable, "-c", _CHILD.format(seed=SEED, wiring=WIRING), str(cfg_file)], env=env)
    deadline = time.monotonic() + 300
    try:
        while time.monotonic() < deadline and child.poll() is None:
            files = list((folder / "checkpoints").glob("*.pkl"))
            if files:
                saved = pickle.loads(files[0].read_bytes())
                if saved["progress"]["step"] > after_step:
                    child.send_signal(signal.SIGKILL)
                    child.wait()
                    return saved
            time.sleep(0.02)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    pytest.fail("the point ended (or timed out) before writing a checkpoint past the imprint phase")


def test_killed_point_resumes_from_its_checkpoint_bitwise(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Uninterrupted run (checkpoints off) == run killed after a checkpoint and resumed, in every result value."""

    base = nest({**defaults(), **TINY})
    uninterrupted = run_point(base, SEED, WIRING)
    cfg = nest({**flatten(base), "execution.checkpoint_interval_s": INTERVAL_S})
    sched = protocol.schedule(cfg)
    saved = _run_until_checkpoint(cfg, tmp_path, sched.imprint_end)
    assert sched.imprint_end < saved["progress"]["step"] < sched.end  # killed mid-point, after imprinting
    monkeypatch.setenv(CHECKPOINT_DIR_ENV, str(tmp_path / "checkpoints"))
    checkpoint = next((tmp_path / "checkpoints").glob("*.pkl"))
    resumed = run_point(cfg, SEED, WIRING)
    assert uninterrupted["outcome"] == "stable" and uninterrupted["simulated_time_s"] == pytest.approx(2.3)
    different = [k for k in uninterrupted if k not in TIMINGS and not _equal(uninterrupted[k], resumed[k])]
    assert different == []
    assert not list((tmp_path / "checkpoints").iterdir())  # removed once the point completed

    # the resumed run read the checkpoint: a checkpoint whose copy of the imprint-end weights is
    # replaced by a constant gives an imprint contrast of exactly 1 (uninterrupted: > 1, learned)
    saved["progress"]["weights"]["imprint"] = np.full_like(saved["progress"]["weights"]["imprint"], 0.05)
    checkpoint.write_bytes(pickle.dumps(saved))
    tampered = run_point(cfg, SEED, WIRING)
    assert uninterrupted["imprint_contrast"] > 1.2
    assert tampered["imprint_contrast"] == pytest.approx(1.0, abs=1e-12)
    assert _equal(tampered["recall_score"], uninterrupted["recall_score"])  # the rest of the state was restored


def test_checkpoints_fall_back_from_standalone_and_stay_out_of_point_ids() -> None:
    flat = {**defaults(), "execution.engine": "standalone"}

    engine, reason = engine_for(nest({**flat, "execution.checkpoint_interval_s": 60.0}))
    assert engine.name == "cython" and reason is not None and "execution.checkpoint_interval_s" in reason
    assert engine_for(nest(flat))[0].name == "standalone"
    assert point_id({**flat, "execution.checkpoint_interval_s": 60.0}, 0) == point_id(flat, 0)
