"""The prescreen's link: its maximum-likelihood fit against closed forms, and theory features that move the way
physics says with the parameters that decide a runaway."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special

from capsweep.runners.theory.link import FEATURES, SIGNS, features, fit_logistic, runaway_probability


def _binary_design(n0: int, k0: int, n1: int, k1: int) -> tuple[np.ndarray, np.ndarray]:
    """n0 rows with x = 0 (k0 of them y = 1), n1 rows with x = 1 (k1 of them y = 1)."""
    x = np.concatenate([np.zeros(n0), np.ones(n1)])[:, None]
    y = np.concatenate([np.arange(n0) < k0, np.arange(n1) < k1]).astype(float)
    return x, y


@pytest.mark.reference
def test_fit_of_one_binary_feature_is_the_log_odds_ratio() -> None:
    """With one binary predictor the maximum-likelihood logistic fit has a closed form: intercept logit(p0), slope
    logit(p1) - logit(p0), the log odds ratio (Agresti 2013, Categorical Data Analysis, 3rd ed., sec. 5.1 [memory])."""
    x, y = _binary_design(400, 100, 600, 420)
    coef = fit_logistic(x, y, ridge=0.0)
    assert coef[0] == pytest.approx(special.logit(0.25), abs=1e-4)
    assert coef[1] == pytest.approx(special.logit(0.7) - special.logit(0.25), abs=1e-4)
    assert runaway_probability(np.array([[1.0]]), coef)[0] == pytest.approx(0.7, abs=1e-5)


def test_sign_constraint_holds_a_weight_at_zero_rather_than_reverse_it() -> None:
    # x = 1 lowers the odds; a weight constrained to be >= 0 stops at 0 and the intercept takes the pooled log odds
    x, y = _binary_design(500, 300, 500, 100)
    free = fit_logistic(x, y, ridge=0.0)
    signed = fit_logistic(x, y, signs=np.array([1]), ridge=0.0)
    assert free[1] < -1.0
    assert signed[1] == pytest.approx(0.0, abs=1e-6)
    assert signed[0] == pytest.approx(special.logit(0.4), abs=1e-4)


def test_fitted_weights_keep_the_signs_physics_gives() -> None:
    from capsweep.runners.theory.link import WEIGHTS

    for name in FEATURES:
        assert WEIGHTS[name] * SIGNS[name] >= 0.0, name


def _feature(point_config, name: str, *overlays: dict, **overrides: object) -> float:
    return float(features(point_config(*overlays, **overrides))[FEATURES.index(name)])


def test_features_move_with_the_parameters_that_decide_a_runaway(point_config, demo_network) -> None:
    """Monotone in the way the model's equations say [derived]: stronger prewiring lets a cue of half an assembly
    drive the other half harder; a faster inhibitory rule raises inhibition faster unless the cap is at the initial weight; a
    larger heterosynaptic beta pulls weights back faster; more assemblies add to log_count."""
    net = dict(demo_network)
    gains = [_feature(point_config, "completion", net, **{"assemblies.prewire_gain": g}) for g in (2.0, 4.0, 6.0)]
    assert gains[0] < gains[1] < gains[2]
    rises = [_feature(point_config, "inhibition_active", net, **{"plasticity.inhibitory.eta": e})
             for e in (1e-4, 1e-3, 1e-2)]
    assert 0.0 < rises[0] < rises[1] < rises[2]
    capped = _feature(point_config, "inhibition_active", net, **{"plasticity.inhibitory.w_max": 0.9})
    assert capped == 0.0  # w_max equals the initial I->E weight (0.9): no room to rise
    pulls = [_feature(point_config, "relaxation_active", net, **{"plasticity.heterosynaptic.beta": b})
             for b in (0.01, 0.1, 1.0)]
    assert pulls[0] < pulls[1] < pulls[2]
    counts = [_feature(point_config, "log_count", net, **{"assemblies.count": c}) for c in (1, 2, 4)]
    assert counts == pytest.approx([0.0, math.log(2), math.log(4)])
