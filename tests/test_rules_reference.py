"""Mean weight drift of capsweep's plasticity rules under independent Poisson pre/post trains.

Many independent synapses, each between its own Poisson pre cell (rate rx) and Poisson post cell
(rate ry), use the rules from ``capsweep.runners.rules``; the mean drift is compared with closed forms
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

The full E->E rule (triplet + heterosynaptic + transmitter-induced; Zenke, Agnes & Gerstner 2015) is
derived in its test's docstring.

Inhibitory STDP (Vogels et al. 2011, Science 334:1569) [derived]: a pre spike adds
``eta (z_post - alpha)`` with mean ``eta (ry tau - 2 rho0 tau)``, a post spike adds ``eta z_pre``
with mean ``eta rx tau``; so ``<dw/dt> = 2 eta tau rx (ry - rho0)``.
"""

from __future__ import annotations

import brian2 as b2
import numpy as np
import pytest

from harness import poisson_drift
from capsweep.runners import rules
from capsweep.registry import defaults, nest

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


@pytest.fixture(scope="module")
def drifts() -> dict[str, np.ndarray]:
    """Mean drift (1/s) and its standard error per post rate, for both rules, from one run."""
    cfg = _cfg()
    runs = poisson_drift({"ee": (rules.ee_rule(cfg), {"w": W0}), "ie": (rules.ie_rule(cfg), {"w": W0})},
                         RX, RY, N_SYN, DURATION_S, DT, seed=2006)
    return {"ee": runs["ee"][0], "ee_se": runs["ee"][1], "ie": runs["ie"][0], "ie_se": runs["ie"][1]}


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


# Full E->E rule (Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922; REFERENCES.md 2). Coefficients are chosen so
# that every term is a sizeable part of the drift at one of the post rates; the heterosynaptic term acts on a
# large w - w_ref (beta small) so that w - w_ref changes by < 0.1 % during the run.
FULL = dict(a=1e-3, b=1e-3, tau_p=16.8e-3, tau_m=33.7e-3, tau_s=100e-3, beta=1e-6, delta=1e-4)
RY_FULL = (3.0, 15.0, 40.0)
W_FULL, W_REF_FULL = 150.0, 50.0
FULL_DURATION_S = 10.0
FULL_DT = 0.1 * b2.ms  # grid bias ~dt / (2 tau) < 0.3 % per term (0.5 ms gave 10-15 % of the net drift)


def _zenke_terms(ry: np.ndarray, e_z3: np.ndarray) -> dict[str, np.ndarray]:
    """Terms (1/s) of the REFERENCES.md 2 rate form at post rates ``ry`` (Hz), given E[z_minus^3] there."""
    f = FULL
    return {
        "triplet LTP": f["a"] * f["tau_p"] * f["tau_s"] * RX * ry**2,
        "pair LTD": -f["b"] * f["tau_m"] * RX * ry,
        "heterosynaptic": -f["beta"] * (W_FULL - W_REF_FULL) * ry * e_z3,
        "transmitter": np.full_like(ry, f["delta"] * RX),
    }


@pytest.fixture(scope="module")
def full_drift() -> tuple[np.ndarray, np.ndarray]:
    """Mean drift (1/s) and standard error per post rate of the full ee_rule with w != w_ref."""
    f = FULL
    flat = defaults()
    flat.update({
        "plasticity.triplet.a_ltp": f["a"], "plasticity.triplet.b_ltd": f["b"],
        "plasticity.triplet.tau_plus_ms": f["tau_p"] * 1e3, "plasticity.triplet.tau_minus_ms": f["tau_m"] * 1e3,
        "plasticity.triplet.tau_slow_ms": f["tau_s"] * 1e3, "plasticity.triplet.w_max": 1000.0,
        "plasticity.heterosynaptic.beta": f["beta"], "plasticity.transmitter.delta": f["delta"],
    })
    cfg = nest(flat)
    assert all(cfg["plasticity"][term]["enabled"] for term in ("triplet", "heterosynaptic", "transmitter"))
    runs = poisson_drift({"full": (rules.ee_rule(cfg), {"w": W_FULL, "w_ref": W_REF_FULL})},
                         RX, RY_FULL, N_SYN, FULL_DURATION_S, FULL_DT, seed=2015)
    return runs["full"]


@pytest.mark.reference
def test_full_ee_rule_drift_matches_zenke_rate_form(full_drift) -> None:
    """Zenke, Agnes & Gerstner 2015 (Nat Commun 6:6922) rate form, REFERENCES.md 2 [derived]:

        <dw/dt> = A tau_plus tau_slow rx ry^2 - B tau_minus rx ry - beta (w - w_ref) ry E[z^3] + delta rx.

    runners/rules.py applies the heterosynaptic step at a post spike with z_minus read *before*
    its own increment (the traces are incremented after the weight update). For a Poisson post
    train that z is the stationary shot noise of unit jumps at rate ry filtered by tau_minus
    (Poisson arrivals see time averages), whose cumulants are k_n = ry tau_minus / n (Campbell), so
    with m = ry tau_minus: E[z^3] = k3 + 3 k2 k1 + k1^3 = m^3 + 1.5 m^2 + m / 3. The triplet and
    transmitter terms follow as in the module docstring. Tolerance: 1 % of the sum of the terms'
    magnitudes (spikes on the 0.1 ms grid shift each term by ~dt / (2 tau) < 0.3 %) plus 3 standard
    errors. Measured (seed 2015) at ry = 3, 15, 40 Hz: 1.37e-4, -1.269e-3, -8.017e-3 /s against 1.25e-4,
    -1.296e-3, -8.098e-3 /s (1.5, 1.1, 0.5 standard errors).
    """
    measured, se = full_drift
    ry = np.asarray(RY_FULL)
    m = ry * FULL["tau_m"]
    e_z3 = m**3 + 1.5 * m**2 + m / 3.0
    terms = _zenke_terms(ry, e_z3)
    expected = sum(terms.values())
    tol = 0.01 * sum(np.abs(t) for t in terms.values()) + 3 * se
    np.testing.assert_array_less(np.abs(measured - expected), tol)  # Zenke et al. 2015 rate form [derived]
    # The tolerance tells a wrong rule: each term missing or with its sign flipped, E[z^3] replaced by the
    # mean-field m^3 (no fluctuations) or by E[(z + 1)^3] (z read after its increment).
    catch = tol + 3 * se
    for name, term in terms.items():
        for wrong in (expected - term, expected - 2 * term):
            assert np.any(np.abs(wrong - expected) > catch), name
    for wrong_z3 in (m**3, e_z3 + 3 * (m**2 + m / 2.0) + 3 * m + 1):  # E[z^2] = m^2 + m/2
        wrong = sum(_zenke_terms(ry, wrong_z3).values())
        assert np.any(np.abs(wrong - expected) > catch)
    # Shape [paper, qualitative]: positive at low post rate (delta), LTD in the middle, and for w > w_ref the
    # heterosynaptic downturn makes the drift negative at 40 Hz although triplet LTP exceeds pair LTD there.
    assert measured[0] > 0 > measured[1] and measured[2] < 0
    assert terms["triplet LTP"][2] + terms["pair LTD"][2] + terms["transmitter"][2] > 0
