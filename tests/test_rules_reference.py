"""Mean weight drift of capsweep's plasticity rules under independent Poisson pre/post trains.

Many independent synapses, each between its own Poisson pre cell (rate rx) and Poisson post cell
(rate ry), use the rules from ``runners.rules``; the mean drift is compared with closed forms
computed here with numpy.

Minimal triplet rule (Pfister & Gerstner 2006, J Neurosci 26:9673; A2p = A3m = 0) [derived]:
on a post spike ``w += A3p z_plus z_slow``, on a pre spike ``w -= A2m z_minus``. For independent
Poisson trains the trace seen by an event of the *other* train has mean ``rate * tau``; the slow
post trace read at a post spike *before* its own increment also has mean ``ry * tau_y`` (Poisson
spikes are independent of the past), and it is independent of the pre trace, so

    <dw/dt> = rx ry (A3p tau_plus tau_y ry - A2m tau_minus).

Reading z_slow *after* its increment adds 1 to it at every post spike, i.e. an extra
``A3p tau_plus rx ry``; at rx = 10 Hz, ry = 30 Hz that is 0.033 /s against a true drift of 0.040 /s,
and at ry = 10 Hz 0.011 /s against -0.011 /s: far outside the 10 % tolerance used below.

Inhibitory STDP (Vogels et al. 2011, Science 334:1569) [derived]: a pre spike adds
``eta (z_post - alpha)`` with mean ``eta (ry tau - 2 rho0 tau)``, a post spike adds ``eta z_pre``
with mean ``eta rx tau``; so ``<dw/dt> = 2 eta tau rx (ry - rho0)``.
"""

from __future__ import annotations

import brian2 as b2
import numpy as np
import pytest

from runners import rules
from sweeps.registry import defaults, nest

# Pfister & Gerstner 2006 minimal all-to-all visual-cortex fit [paper, via REFERENCES.md 1]
A3P, A2M, TAU_PLUS, TAU_MINUS, TAU_Y = 6.5e-3, 7.1e-3, 16.8e-3, 33.7e-3, 114e-3
RX = 10.0
RY = (10.0, 30.0)  # below and above the BCM threshold theta = 19.2 Hz
ETA, RHO0, TAU_I = 1e-3, 3.0, 20e-3
N_SYN = 1000  # per post rate
DURATION_S = 20.0
W0 = 50.0  # far from both clip bounds
DT = 0.5 * b2.ms  # event-driven traces are exact; spikes on a 0.5 ms grid bias the drift by ~dt/(2 tau) < 2 %


def _cfg() -> dict:
    flat = defaults()
    flat.update({
        "plasticity.triplet.a_ltp": A3P, "plasticity.triplet.b_ltd": A2M,
        "plasticity.triplet.tau_plus_ms": TAU_PLUS * 1e3, "plasticity.triplet.tau_minus_ms": TAU_MINUS * 1e3,
        "plasticity.triplet.tau_slow_ms": TAU_Y * 1e3, "plasticity.triplet.w_max": 100.0,
        "plasticity.heterosynaptic.enabled": False, "plasticity.transmitter.enabled": False,
        "plasticity.inhibitory.eta": ETA, "plasticity.inhibitory.rho0_hz": RHO0,
        "plasticity.inhibitory.tau_ms": TAU_I * 1e3, "plasticity.inhibitory.w_max": 100.0,
    })
    return nest(flat)


def _attach(rule: rules.Rule, pre: b2.PoissonGroup, post: b2.PoissonGroup, name: str) -> b2.Synapses:
    syn = b2.Synapses(pre, post, rule.model, on_pre=rule.on_pre, on_post=rule.on_post, name=name, dt=DT)
    syn.connect(j="i")
    syn.w = W0
    return syn


@pytest.fixture(scope="module")
def drifts() -> dict[str, np.ndarray]:
    """Mean drift (1/s) and its standard error per post rate, for both rules, from one run."""
    b2.prefs.codegen.target = "cython"
    b2.seed(2006)
    cfg = _cfg()
    n = N_SYN * len(RY)
    pre = b2.PoissonGroup(n, RX * b2.Hz, dt=DT)
    post = b2.PoissonGroup(n, np.repeat(RY, N_SYN) * b2.Hz, dt=DT)
    ee, ie = rules.ee_rule(cfg), rules.ie_rule(cfg)
    s_ee, s_ie = _attach(ee, pre, post, "ee_ref"), _attach(ie, pre, post, "ie_ref")
    net = b2.Network(pre, post, s_ee, s_ie)
    net.run(DURATION_S * b2.second, namespace={**ee.namespace, **ie.namespace})
    out = {}
    for name, syn in (("ee", s_ee), ("ie", s_ie)):
        rate = (np.asarray(syn.w[:]) - W0).reshape(len(RY), N_SYN) / DURATION_S
        out[name] = rate.mean(axis=1)
        out[name + "_se"] = rate.std(axis=1, ddof=1) / np.sqrt(N_SYN)
    return out


@pytest.mark.reference
def test_triplet_drift_matches_pfister_gerstner_and_flips_sign(drifts) -> None:
    ry = np.asarray(RY)
    expected = RX * ry * (A3P * TAU_PLUS * TAU_Y * ry - A2M * TAU_MINUS)  # [derived], module docstring
    wrong_order = expected + A3P * TAU_PLUS * RX * ry
    tol = 0.1 * np.abs(expected) + 3 * drifts["ee_se"]
    np.testing.assert_array_less(np.abs(drifts["ee"] - expected), tol)
    assert np.all(np.abs(wrong_order - expected) > tol + 3 * drifts["ee_se"])  # the check can tell
    theta = A2M * TAU_MINUS / (A3P * TAU_PLUS * TAU_Y)  # 19.2 Hz (REFERENCES.md 1)
    assert ry[0] < theta < ry[1]
    assert drifts["ee"][0] < 0 < drifts["ee"][1]  # BCM-like sign flip [paper]


@pytest.mark.reference
def test_inhibitory_drift_matches_vogels(drifts) -> None:
    expected = 2 * ETA * TAU_I * RX * (np.asarray(RY) - RHO0)  # Vogels et al. 2011 [derived]
    np.testing.assert_array_less(np.abs(drifts["ie"] - expected), 0.05 * np.abs(expected) + 3 * drifts["ie_se"])
