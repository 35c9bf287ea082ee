"""One-point runs of a tiny prewired network with real Brian2 (cython engine).

Triplet STDP alone (heterosynaptic, transmitter-induced and inhibitory terms off) lets the
prewired assemblies grow until the network runs away; the full rule (Zenke, Agnes & Gerstner
2015, Nat Commun 6:6922: triplet + heterosynaptic + transmitter-induced, with inhibitory STDP of
Vogels et al. 2011, Science 334:1569) keeps it stable and recalls the assemblies.
"""

from __future__ import annotations

import numpy as np
import pytest

from capsweep.results_schema.layout import VARIABLES
from capsweep.runners.point import run_point
from capsweep.runners.runtime import CHECK_INTERVAL_S
from capsweep.runners.protocol import total_duration_s
from capsweep.errors import ConfigError
from harness import DEMO_NETWORK, TRIPLET_ONLY, point_config

TINY = {**DEMO_NETWORK, "execution.engine": "cython"}
SEED = 1


def _cfg(**changes: object) -> dict:
    return point_config(TINY, changes)


@pytest.fixture(scope="module")
def triplet_only() -> tuple[dict, dict]:
    cfg = _cfg(**TRIPLET_ONLY, **{"execution.abort_on_runaway": True})
    return cfg, run_point(cfg, SEED)


@pytest.fixture(scope="module")
def full_rule() -> tuple[dict, dict]:
    cfg = _cfg(**{"execution.abort_on_runaway": True})
    return cfg, run_point(cfg, SEED)


def test_result_has_every_variable_but_the_prediction(full_rule) -> None:
    cfg, res = full_rule
    assert set(res) == {v.name for v in VARIABLES} - {"predicted_outcome"}
    assert len(res["recall_quality"]) == cfg["assemblies"]["count"]
    assert len(res["weight_correlation"]) == cfg["protocol"]["snapshots"]
    assert len(res["rate_exc_hz"]) == int(np.ceil(total_duration_s(cfg) / 0.01 - 1e-9))


def test_triplet_alone_runs_away_and_abort_shortens_the_run(triplet_only) -> None:
    cfg, res = triplet_only
    assert res["outcome"] == "runaway"
    onset = res["runaway_onset_s"]
    assert cfg["protocol"]["settle_s"] < onset < total_duration_s(cfg)
    # stopped at the first check after onset + hold (runaway_hold_s = 1 s)
    hold = cfg["detection"]["runaway_hold_s"]
    assert onset + hold <= res["simulated_time_s"] <= onset + hold + CHECK_INTERVAL_S + 0.01
    assert res["simulated_time_s"] < total_duration_s(cfg)
    assert np.all(np.isnan(res["recall_quality"]))
    # the stored rate trace really shows the runaway: last second well above the settle baseline
    assert np.mean(res["rate_exc_hz"][-100:]) > 3 * res["rate_exc_baseline_hz"]


def test_full_rule_stays_stable_and_recalls(full_rule) -> None:
    cfg, res = full_rule
    assert res["outcome"] == "stable"
    assert np.isnan(res["runaway_onset_s"])
    assert res["simulated_time_s"] == pytest.approx(total_duration_s(cfg))
    assert np.all(res["recall_quality"] >= 0.5)
    assert res["recalled_count"] == cfg["assemblies"]["count"]
    assert 0.5 < res["rate_exc_baseline_hz"] < 10.0  # asynchronous irregular at a few Hz
    assert res["assembly_contrast"][0] == pytest.approx(cfg["assemblies"]["prewire_gain"], rel=0.1)


def test_same_seed_same_result_other_seed_differs() -> None:
    cfg = _cfg(**{"protocol.hold_s": 0.5, "protocol.settle_s": 0.5, "network.n_exc": 100, "assemblies.size": 20})
    first, again, other = run_point(cfg, 5), run_point(cfg, 5), run_point(cfg, 6)
    for name, value in first.items():
        if name != "wall_time_s":
            np.testing.assert_array_equal(np.asarray(again[name]), np.asarray(value), err_msg=name)
    assert not np.array_equal(first["rate_exc_hz"], other["rate_exc_hz"])


def test_assemblies_that_do_not_fit_are_refused() -> None:
    with pytest.raises(ConfigError, match="assemblies.count = 4"):
        run_point(_cfg(**{"assemblies.count": 4, "assemblies.size": 80}), 1)  # 320 > n_exc = 300
