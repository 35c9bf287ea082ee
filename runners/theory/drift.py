"""Rate form of capsweep's plasticity rules for independent Poisson pre and post trains.

Rates in Hz, weights in g_leak, drift in g_leak per second.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from scipy import optimize


def _trace_third_moment(rate_hz: float, tau_s: float) -> float:
    """E[z**3] of an exponential trace (jump 1, decay tau_s) driven by a Poisson train.

    Shot-noise cumulants are kappa_n = rate * tau / n, so
    E[z^3] = kappa3 + 3 kappa2 kappa1 + kappa1^3 = (r tau)^3 + 1.5 (r tau)^2 + (r tau) / 3.
    """
    x = rate_hz * tau_s
    return x**3 + 1.5 * x**2 + x / 3.0


def rule_drift(cfg: dict, rate_pre_hz: float, rate_post_hz: float, w: float, w_ref: float) -> float:
    """Mean E->E weight drift (g_leak/s) for independent Poisson pre and post trains.

    Rate form of the rule in :mod:`capsweep.runners.rules` (Zenke, Agnes & Gerstner 2015, Nat
    Commun 6:6922), each term only when its ``enabled`` key is true; the heterosynaptic term is
    the published linear step, which the rule's exact per-spike step equals to first order in
    beta z^3::

        triplet:        A tau_plus tau_slow rx ry^2 - B tau_minus rx ry
        heterosynaptic: - beta (w - w_ref) ry E[z_minus^3]
        transmitter:    + delta rx

    Traces are read before their own increment, so no extra pairing terms appear. Clipping to
    ``[0, w_max]`` is not applied (the drift is that of an interior weight).
    """
    p = cfg["plasticity"]
    tri, het, trans = p["triplet"], p["heterosynaptic"], p["transmitter"]
    rx, ry = float(rate_pre_hz), float(rate_post_hz)
    tau_minus = tri["tau_minus_ms"] * 1e-3
    drift = 0.0
    if tri["enabled"]:
        tau_plus, tau_slow = tri["tau_plus_ms"] * 1e-3, tri["tau_slow_ms"] * 1e-3
        drift += tri["a_ltp"] * tau_plus * tau_slow * rx * ry**2 - tri["b_ltd"] * tau_minus * rx * ry
    if het["enabled"]:
        drift -= het["beta"] * (w - w_ref) * ry * _trace_third_moment(ry, tau_minus)
    if trans["enabled"]:
        drift += trans["delta"] * rx
    return drift


def sign_changes(f: Callable[[float], float], grid: np.ndarray) -> list[float]:
    """Points where ``f`` changes sign on ``grid``, refined with brentq (exact grid zeros kept)."""
    values = np.array([f(x) for x in grid])
    roots: list[float] = []
    for i in range(len(grid) - 1):
        a, b = values[i], values[i + 1]
        if a == 0.0 and 0 < i and values[i - 1] * b < 0:
            roots.append(float(grid[i]))
        elif a * b < 0:
            roots.append(float(optimize.brentq(f, grid[i], grid[i + 1], xtol=1e-10, rtol=1e-12)))
    return roots


def drift_zero_crossings(cfg: dict, rate_pre_hz: float, w: float, w_ref: float,
                         max_rate_hz: float = 200.0) -> list[float]:
    """Post rates (Hz, ascending) in (0, max_rate_hz] where ``rule_drift`` changes sign.

    Bracketed on a 2001-point grid and refined with ``scipy.optimize.brentq``. The trivial zero
    at post rate 0 of a rule without transmitter term is not a sign change and is not listed.
    """
    grid = np.linspace(0.0, max_rate_hz, 2001)
    return sign_changes(lambda ry: rule_drift(cfg, rate_pre_hz, ry, w, w_ref), grid)


def bcm_threshold_hz(cfg: dict) -> float:
    """Post rate (Hz) where the triplet part alone changes sign: B tau_minus / (A tau_plus tau_slow).

    Infinite when the triplet term is off or has no LTP.
    """
    tri = cfg["plasticity"]["triplet"]
    ltp = tri["a_ltp"] * tri["tau_plus_ms"] * tri["tau_slow_ms"] * 1e-6
    if not tri["enabled"] or ltp <= 0:
        return math.inf
    return tri["b_ltd"] * tri["tau_minus_ms"] * 1e-3 / ltp


def weight_equilibrium(cfg: dict, rate_pre_hz: float, rate_post_hz: float, w_ref: float) -> float:
    """Weight (g_leak) an E->E synapse settles at when its pre/post rates stay at the given values.

    The drift is linear in w: drift = c - k (w - w_ref) with k = beta ry E[z^3] (heterosynaptic
    term on) or k = 0. With k > 0 the zero w_ref + c/k is stable (clipped to [0, w_max]); with
    k = 0 the weight runs to w_max when c > 0 and to 0 when c < 0 (rates held fixed).
    """
    w_max = cfg["plasticity"]["triplet"]["w_max"]
    c = rule_drift(cfg, rate_pre_hz, rate_post_hz, w_ref, w_ref)
    k = c - rule_drift(cfg, rate_pre_hz, rate_post_hz, w_ref + 1.0, w_ref)
    if k > 0:
        return float(np.clip(w_ref + c / k, 0.0, w_max))
    if c > 0:
        return w_max
    return 0.0 if c < 0 else w_ref
