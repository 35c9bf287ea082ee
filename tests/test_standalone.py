"""The standalone engine (real Brian2 C++ standalone): build reuse, early abort, agreement with cython.

One compile per run of this file (a fresh build root); every other point reruns that binary.
The model contrast is the one of tests/test_point.py: triplet STDP alone (Pfister & Gerstner
2006, J Neurosci 26:9673) lets prewired assemblies grow into runaway; the full rule (Zenke,
Agnes & Gerstner 2015, Nat Commun 6:6922, with inhibitory STDP of Vogels et al. 2011, Science
334:1569) stays stable and recalls. Random streams differ between engines, so outcomes and
rough rates are compared, not spikes.
"""

from __future__ import annotations

import os
import pickle
import subprocess
import sys
import time

import numpy as np
import pytest

from capsweep.runners import builds, standalone
from capsweep.runners.point import run_point
from capsweep.runners.protocol import total_duration_s
from harness import DEMO_NETWORK, TRIPLET_ONLY, point_config

TINY = {**DEMO_NETWORK, "execution.engine": "standalone"}
NO_STABILISERS = TRIPLET_ONLY
"""Switched-off terms are compiled in with zero coefficients, so triplet alone shares the full rule's build."""
WIRING = 7


def _cfg(**changes: object) -> dict:
    return point_config(TINY, changes)


@pytest.fixture(scope="module")
def build_root(tmp_path_factory, monkeypatch_module) -> str:
    root = tmp_path_factory.mktemp("builds")
    monkeypatch_module.setenv(builds.BUILD_DIR_ENV, str(root))
    return str(root)


@pytest.fixture(scope="module")
def monkeypatch_module():
    with pytest.MonkeyPatch.context() as patch:
        yield patch


@pytest.fixture(scope="module")
def full_rule(build_root) -> tuple[dict, dict]:
    cfg = _cfg()
    return cfg, run_point(cfg, 1, wiring_seed=WIRING)


@pytest.fixture(scope="module")
def triplet_alone(build_root, full_rule) -> tuple[dict, dict, float]:
    """Same build as ``full_rule``; also returns the compiled binary's mtime before this run."""
    cfg = _cfg(**NO_STABILISERS)
    binary = builds.build_root() / builds.build_key(cfg) / "main"
    before = binary.stat().st_mtime
    return cfg, run_point(cfg, 2, wiring_seed=WIRING), before


def test_coefficients_and_durations_do_not_change_the_build() -> None:
    base = _cfg()
    same = [_cfg(**NO_STABILISERS), _cfg(**{"assemblies.count": 2, "assemblies.prewire_gain": 3.0}),
            _cfg(**{"protocol.hold_s": 3.0, "network.drive_rate_exc_hz": 20.0, "assemblies.imprint": "learned"}),
            _cfg(**{"plasticity.triplet.enabled": False})]
    other = [_cfg(**{"network.n_exc": 400}), _cfg(**{"plasticity.heterosynaptic.w_ref_mode": "consolidating"}),
             _cfg(**{"network.delay_ms": 2.0})]
    assert all(builds.build_key(c) == builds.build_key(base) for c in same)
    assert all(builds.build_key(c) != builds.build_key(base) for c in other)


def test_full_rule_stays_stable_and_recalls(full_rule) -> None:
    cfg, res = full_rule
    assert res["engine"] == "standalone"
    assert res["outcome"] == "stable"
    assert res["simulated_time_s"] == pytest.approx(total_duration_s(cfg))
    assert res["recalled_count"] == cfg["assemblies"]["count"]
    assert 0.5 < res["rate_exc_baseline_hz"] < 10.0  # asynchronous irregular at a few Hz, as with cython
    assert res["assembly_contrast"][0] == pytest.approx(cfg["assemblies"]["prewire_gain"], rel=0.1)


def test_second_point_reuses_the_binary_and_runs_away(full_rule, triplet_alone) -> None:
    _, full = full_rule
    cfg, res, mtime_before = triplet_alone
    binary = builds.build_root() / builds.build_key(cfg) / "main"
    assert binary.stat().st_mtime == mtime_before  # not recompiled
    assert res["engine"] == "standalone"
    assert res["outcome"] == "runaway"
    onset, hold = res["runaway_onset_s"], cfg["detection"]["runaway_hold_s"]
    assert cfg["protocol"]["settle_s"] < onset < total_duration_s(cfg)
    # the watch stops exactly when the offline definition can first establish the onset
    assert res["simulated_time_s"] == pytest.approx(onset + hold, abs=1e-9)
    assert np.all(np.isnan(res["recall_quality"]))
    assert np.mean(res["rate_exc_hz"][-100:]) > 3 * res["rate_exc_baseline_hz"]
    # same wiring (membership) in both points, different seeds: different settle activity
    assert not np.array_equal(full["rate_exc_hz"][:100], res["rate_exc_hz"][:100])


def test_a_new_process_regenerates_the_same_code(full_rule) -> None:
    """A fresh worker process with other Brian2 objects alive and other wiring reruns the build as is.

    The generated C++ must depend on the build key alone: here a new process first creates three
    unnamed Networks (Brian2 auto-names by the instances alive, so a name taken from them would
    shift) and runs a point of another wiring seed; the sources and the binary stay untouched.
    """
    cfg, _ = full_rule
    build = builds.build_root() / builds.build_key(cfg)
    sources = {path.name: path.read_bytes() for path in build.glob("*.cpp")}
    binary_mtime = (build / "main").stat().st_mtime
    script = ("import pickle, sys, brian2; stray = [brian2.Network() for _ in range(3)]; "
              "from capsweep.runners.point import run_point; run_point(pickle.load(sys.stdin.buffer), 3, wiring_seed=8)")
    subprocess.run([sys.executable, "-c", script], input=pickle.dumps(cfg), check=True, env=os.environ)
    assert {path.name: path.read_bytes() for path in build.glob("*.cpp")} == sources
    assert (build / "main").stat().st_mtime == binary_mtime


def test_runaway_abort_costs_at_most_a_quarter_of_a_full_run(build_root, full_rule) -> None:
    """A runaway point stopped at onset + hold costs <= 25% of the same point run to the end.

    Both runs use the cached build; wall times include the per-run overhead (value pass, I/O).
    """
    cfg = _cfg(**NO_STABILISERS, **{"protocol.hold_s": 60.0})
    start = time.perf_counter()
    aborted = run_point(cfg, 2, wiring_seed=WIRING)
    t_abort = time.perf_counter() - start
    start = time.perf_counter()
    full = run_point(_cfg(**NO_STABILISERS, **{"protocol.hold_s": 60.0, "execution.abort_on_runaway": False}),
                     2, wiring_seed=WIRING)
    t_full = time.perf_counter() - start
    assert aborted["outcome"] == full["outcome"] == "runaway"
    assert aborted["runaway_onset_s"] == full["runaway_onset_s"]  # same seeds, same run up to the stop
    assert full["simulated_time_s"] == pytest.approx(total_duration_s(cfg))
    assert t_abort <= 0.25 * t_full, (t_abort, t_full)


def test_random_overlap_falls_back_to_cython() -> None:
    cfg = _cfg(**{"assemblies.overlap": "random", "network.n_exc": 100, "assemblies.size": 20,
                  "protocol.settle_s": 0.3, "protocol.hold_s": 0.3})
    assert builds.unsupported(cfg) is not None
    assert run_point(cfg, 3)["engine"] == "cython"
