"""Within-point checkpoints: a point killed mid-run resumes from its last checkpoint with the same result.

The tiny learned-assembly point of ``conftest.py`` (100 E cells, one assembly imprinted once) on each
engine that writes checkpoints: on cython about 2.3 simulated s with a consolidating reference weight,
checkpointed every 0.25 s; on standalone a 21.5 s point with a bistable reference weight,
checkpointed every 0.5 s (the binary runs the point in about a second, so a longer hold leaves
time to kill it). The point runs in a subprocess whose process group (the binary included) is
SIGKILLed once a checkpoint past the imprint phase exists; the same point run again in this
process must resume from that checkpoint and give every result value of an uninterrupted run
without checkpoints, bit for bit.

Every test on a killed point is slow (kept out of CI, run with ``pytest -m slow``): on 2 shared cores, 5 December
2026, the cython point took 155 s (setup 90 s, resume 47 s, tampered resume 17 s) and the standalone one 272 s
(setup with its compile 253 s); the whole file 7.4 min. The engine and id check below stays in CI.
"""

from __future__ import annotations

import json
import os
import pickle
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from capsweep.engines import engine_for
from capsweep.errors import CapsweepError
from capsweep.registry import defaults, flatten, nest
from capsweep.results_schema.layout import TIMINGS
from capsweep.runners import protocol
from capsweep.runners.checkpoints import CHECKPOINT_DIR_ENV
from capsweep.runners.point import run_point
from capsweep.runners.standalone import read_checkpoint
from capsweep.sweeps.ids import point_id

SEED, WIRING = 5, 9
STANDALONE = {"plasticity.heterosynaptic.w_ref_mode": "bistable", "protocol.hold_s": 20.0, "protocol.cue_gap_s": 0.5}
"""The standalone point: bistable reference weight, 20 s hold, a 0.5 s gap after the cue (21.5 s)."""
POINTS = {"cython": ({}, 0.25, 2.3), "standalone": (STANDALONE, 0.5, 21.5)}
"""Engine -> (dotted keys over the tiny learned point, checkpoint interval in s, simulated s)."""
FILES = {"cython": "*.pkl", "standalone": "*.bin"}


def _pickled_step(path: Path) -> int:
    return int(pickle.loads(path.read_bytes())["progress"]["step"])


STEP_OF: dict[str, Callable[[Path], int]] = {"cython": _pickled_step, "standalone": lambda p: read_checkpoint(p)[1]}
"""Engine -> the step a checkpoint file of that engine holds."""

_CHILD = """
import pickle, sys
from capsweep.runners.point import run_point
cfg = pickle.load(open(sys.argv[1], "rb"))
run_point(cfg, int(sys.argv[2]), {wiring})
"""


def _equal(a: object, b: object) -> bool:
    """Same value, NaN equal to NaN, arrays element by element (bitwise for floats)."""
    if isinstance(a, (str, int)) and not isinstance(a, bool):
        return a == b
    left, right = np.asarray(a), np.asarray(b)
    return np.array_equal(left, right, equal_nan=left.dtype.kind == "f")  # lists of labels (recall_state) hold no NaN


def _different(a: dict, b: dict) -> list[str]:
    """Result variables (timings aside) in which two results differ."""
    return [k for k in a if k not in TIMINGS and not _equal(a[k], b[k])]


def _run_until_checkpoint(cfg: dict, folder: Path, after_step: int, seed: int = SEED) -> Path:
    """Run the point in a subprocess, SIGKILL its process group once its checkpoint is past ``after_step``.

    Returns the checkpoint file the killed run left.
    """
    engine = cfg["execution"]["engine"]
    cfg_file = folder / "cfg.pkl"
    cfg_file.write_bytes(pickle.dumps(cfg))
    env = {**os.environ, CHECKPOINT_DIR_ENV: str(folder / "checkpoints")}
    child = subprocess.Popen([sys.executable, "-c", _CHILD.format(wiring=WIRING), str(cfg_file), str(seed)], env=env,
                             start_new_session=True)
    deadline = time.monotonic() + 600
    try:
        while time.monotonic() < deadline and child.poll() is None:
            for path in (folder / "checkpoints").glob(FILES[engine]):
                try:
                    step = STEP_OF[engine](path)
                except (OSError, EOFError, pickle.UnpicklingError):
                    continue  # replaced while read
                if step > after_step:
                    os.killpg(child.pid, signal.SIGKILL)
                    child.wait()
                    return path
            time.sleep(0.005)
    finally:
        if child.poll() is None:
            os.killpg(child.pid, signal.SIGKILL)
            child.wait()
    pytest.fail("the point ended (or timed out) before writing a checkpoint past the imprint phase")


@pytest.fixture(scope="module", params=[pytest.param(engine, marks=pytest.mark.slow) for engine in POINTS])
def killed(request, tmp_path_factory: pytest.TempPathFactory, build_root: Path,
           tiny_learned: dict[str, object]) -> tuple[dict, dict, Path, bytes]:
    """(checkpointed config, uninterrupted result, checkpoint file of a killed run, its bytes) per engine."""
    overlay, interval, _ = POINTS[request.param]
    base = nest({**defaults(), **tiny_learned, **overlay, "execution.engine": request.param})
    uninterrupted = run_point(base, SEED, WIRING)
    cfg = nest({**flatten(base), "execution.checkpoint_interval_s": interval})
    folder = tmp_path_factory.mktemp(f"killed-{request.param}")
    path = _run_until_checkpoint(cfg, folder, protocol.schedule(cfg).imprint_end)
    return cfg, uninterrupted, path, path.read_bytes()


def test_killed_point_resumes_from_its_checkpoint_bitwise(killed, monkeypatch: pytest.MonkeyPatch) -> None:
    """Uninterrupted run (checkpoints off) == run killed after a checkpoint and resumed, in every result value."""
    cfg, uninterrupted, path, content = killed
    path.write_bytes(content)
    sched = protocol.schedule(cfg)
    engine = cfg["execution"]["engine"]
    assert sched.imprint_end < STEP_OF[engine](path) < sched.end  # killed mid-point, after imprinting
    monkeypatch.setenv(CHECKPOINT_DIR_ENV, str(path.parent))
    resumed = run_point(cfg, SEED, WIRING)
    assert uninterrupted["engine"] == resumed["engine"] == engine
    assert uninterrupted["outcome"] == "stable"
    assert uninterrupted["simulated_time_s"] == pytest.approx(POINTS[engine][2])
    assert uninterrupted["imprint_contrast"] > 1.2  # the assembly was learned before the checkpoint
    assert _different(uninterrupted, resumed) == []
    assert not list(path.parent.iterdir())  # removed once the point completed


def test_resumed_cython_point_takes_the_checkpointed_state(killed, monkeypatch: pytest.MonkeyPatch) -> None:
    """A checkpoint whose copy of the imprint-end weights is a constant gives an imprint contrast of exactly 1."""
    cfg, uninterrupted, path, content = killed
    if cfg["execution"]["engine"] != "cython":
        pytest.skip("the pickled progress is the runtime engines' form")
    saved = pickle.loads(content)
    saved["progress"]["weights"]["imprint"] = np.full_like(saved["progress"]["weights"]["imprint"], 0.05)
    path.write_bytes(pickle.dumps(saved))
    monkeypatch.setenv(CHECKPOINT_DIR_ENV, str(path.parent))
    tampered = run_point(cfg, SEED, WIRING)
    assert tampered["imprint_contrast"] == pytest.approx(1.0, abs=1e-12)
    assert _equal(tampered["recall_score"], uninterrupted["recall_score"])  # the rest of the state was restored


def test_resumed_standalone_point_takes_the_checkpointed_state(killed, tmp_path: Path,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    """The checkpoint of the same point run with another seed, put in its place, decides the spikes before it."""
    cfg, uninterrupted, path, _ = killed
    if cfg["execution"]["engine"] != "standalone":
        pytest.skip("the standalone binary's checkpoint")
    sched = protocol.schedule(cfg)
    other = _run_until_checkpoint(cfg, tmp_path, sched.imprint_end, seed=SEED + 1)
    step = read_checkpoint(other)[1]
    path.write_bytes(other.read_bytes())
    monkeypatch.setenv(CHECKPOINT_DIR_ENV, str(path.parent))
    swapped = run_point(cfg, SEED, WIRING)
    bins = int(step * sched.dt_s / (cfg["detection"]["trace_bin_ms"] * 1e-3))
    assert not np.array_equal(swapped["rate_exc_hz"][:bins], uninterrupted["rate_exc_hz"][:bins])
    assert swapped["simulated_time_s"] == uninterrupted["simulated_time_s"]


def _restamp(path: Path, engine: str, content: bytes) -> None:
    """Write ``content`` to ``path`` with the writer's stamp of another capsweep version."""
    if engine == "cython":
        saved = pickle.loads(content)
        saved["stamp"] = {**saved["stamp"], "capsweep": "0.0.1"}
        path.write_bytes(pickle.dumps(saved))
        return
    length = int(np.frombuffer(content[8:16], dtype=np.uint64)[0])
    found = json.loads(content[16:16 + length])
    text = json.dumps({**found, "capsweep": "0.0.1"}, sort_keys=True).encode()
    path.write_bytes(content[:8] + np.uint64(len(text)).tobytes() + text + content[16 + length:])


def test_a_checkpoint_of_another_capsweep_is_refused_in_one_line(killed, monkeypatch: pytest.MonkeyPatch) -> None:
    cfg, _, path, content = killed
    _restamp(path, cfg["execution"]["engine"], content)
    monkeypatch.setenv(CHECKPOINT_DIR_ENV, str(path.parent))
    with pytest.raises(CapsweepError, match="capsweep 0.0.1") as refused:
        run_point(cfg, SEED, WIRING)
    message = str(refused.value)
    assert "\n" not in message and str(path) in message and "delete the file" in message
    assert path.exists()  # never removed: the user decides


def test_checkpoints_run_on_the_configured_engine_and_stay_out_of_point_ids() -> None:
    flat = {**defaults(), "execution.engine": "standalone"}
    assert engine_for(nest({**flat, "execution.checkpoint_interval_s": 60.0}))[0].name == "standalone"
    assert point_id({**flat, "execution.checkpoint_interval_s": 60.0}, 0) == point_id(flat, 0)
