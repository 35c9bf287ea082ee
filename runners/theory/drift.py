"""Rate form of capsweep's plasticity rules for independent Poisson pre and post trains.

Rates in Hz, weights in g_leak, drift in g_leak per second.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special


def _trace_third_moment(rate_hz: float, tau_s: float) -> float:
    """E[z**3] of an exponential trace (jump 1, decay tau_s) driven by a Poisson train.

    Shot-noise cumulants are kappa_n = rate * tau / n, so
    E[z^3] = kappa3 + 3 kappa2 kappa1 + kappa1^3 = (r tau)^3 + 1.5 (r tau)^2 + (r tau) / 3.
    """
    x = rate_hz * tau_s
    return x**3 + 1.5 * x**2 + x / 3.0


_NODES = 16
"""Gauss-Jacobi and generalised Gauss-Laguerre nodes per dimension for trace averages."""
_SPARSE = 1e-6
"""r tau below which :func:`relaxation_per_spike` keeps the first-order term (numerical guard)."""


def relaxation_per_spike(beta: float, rate_hz: float, tau_s: float) -> float:
    """Mean fraction E[1 - exp(-beta z^3)] of ``w - w_ref`` that one post spike removes (the simulated step).

    ``z`` is the post trace (jump 1, decay ``tau_s``) just before a spike of a Poisson train (rate r).
    Going back one spike [derived]: ``z = u (1 + z')`` with ``u = exp(-T / tau)`` for the exponential
    interval T to the previous spike, so ``u ~ Beta(r tau, 1)``, and ``z'`` an independent copy of z. Here
    ``z'`` is replaced by a gamma variable with its exact mean r tau and variance r tau / 2 (moment
    matching, common practice for shot noise). The result is scaled so that its first order in beta is the
    published ``beta E[z^3]`` exactly: ``beta E[z^3] * E_a[1 - exp(-beta z^3)] / (beta E_a[z^3])``.
    """
    x = rate_hz * tau_s
    if beta <= 0.0 or x <= 0.0:
        return 0.0
    if x < _SPARSE:  # the quadrature's weight u^(x-1) degenerates; the term vanishes with the rate anyway
        return beta * _trace_third_moment(rate_hz, tau_s)
    return beta * _trace_third_moment(rate_hz, tau_s) * _saturation(beta, float(f"{x:.4g}"))


@functools.lru_cache(maxsize=65536)
def _saturation(beta: float, x: float) -> float:
    """E_a[1 - exp(-beta z^3)] / (beta E_a[z^3]) under the approximation of :func:`relaxation_per_spike` (r tau = x;
    cached on x rounded to 4 digits)."""
    t, wu = special.roots_jacobi(_NODES, 0.0, x - 1.0)
    u, wu = 0.5 * (1.0 + t), wu / wu.sum()
    if 2.0 * x < 0.05:  # the earlier spikes add little: z' at its mean
        zp, wz = np.array([x]), np.ones(1)
    else:
        nodes, wz = special.roots_genlaguerre(_NODES, 2.0 * x - 1.0)
        zp, wz = 0.5 * nodes, wz / wz.sum()
    z3 = (np.outer(u, 1.0 + zp)) ** 3
    weights = np.outer(wu, wz)
    saturating = float(np.sum(weights * -np.expm1(-beta * z3)))
    linear = float(np.sum(weights * beta * z3))
    return saturating / linear if linear > 0 else 1.0


@dataclass(frozen=True)
class Lagged:
    """Rates (Hz) as the traces see them: each low-passed with the trace's time constant.

    A trace of a Poisson train of rate r(t) has mean tau * r_f(t), with ``tau dr_f/dt = r - r_f``;
    for a stationary train r_f = r.
    """

    pre_plus_hz: float  # presynaptic rate through tau_plus
    post_minus_hz: float  # postsynaptic rate through tau_minus
    post_slow_hz: float  # postsynaptic rate through tau_slow


def rule_drift(cfg: dict, rate_pre_hz: float, rate_post_hz: float, w: float, w_ref: float,
               lagged: Lagged | None = None) -> float:
    """Mean E->E weight drift (g_leak/s) for independent Poisson pre and post trains.

    Rate form of the rule in :mod:`capsweep.runners.rules` (Zenke, Agnes & Gerstner 2015, Nat
    Commun 6:6922), each term only when its ``enabled`` key is true. The heterosynaptic term is
    that of the simulated step, ``w - w_ref <- (w - w_ref) exp(-beta z^3)`` per post spike
    (:func:`relaxation_per_spike`); to first order in beta z^3 it is the published
    ``- beta (w - w_ref) ry E[z_minus^3]``::

        triplet:        A tau_plus tau_slow rx ry^2 - B tau_minus rx ry
        heterosynaptic: - (w - w_ref) ry E[1 - exp(-beta z_minus^3)]
        transmitter:    + delta rx

    Traces are read before their own increment, so no extra pairing terms appear. Clipping to
    ``[0, w_max]`` is not applied (the drift is that of an interior weight). With ``lagged``, the
    traces' means follow rates that changed recently (:class:`Lagged`): each rate inside a trace is
    replaced by its low-passed value, the rates of the spikes that read the traces stay as they are.
    """
    p = cfg["plasticity"]
    tri, het, trans = p["triplet"], p["heterosynaptic"], p["transmitter"]
    rx, ry = float(rate_pre_hz), float(rate_post_hz)
    seen = lagged or Lagged(rx, ry, ry)
    tau_minus = tri["tau_minus_ms"] * 1e-3
    drift = 0.0
    if tri["enabled"]:
        tau_plus, tau_slow = tri["tau_plus_ms"] * 1e-3, tri["tau_slow_ms"] * 1e-3
        drift += (tri["a_ltp"] * tau_plus * tau_slow * seen.pre_plus_hz * seen.post_slow_hz * ry
                  - tri["b_ltd"] * tau_minus * rx * seen.post_minus_hz)
    if het["enabled"]:
        drift -= (w - w_ref) * ry * relaxation_per_spike(het["beta"], seen.post_minus_hz, tau_minus)
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
    c, k = linear_drift(cfg, rate_pre_hz, rate_post_hz, w_ref)
    if k > 0:
        return float(np.clip(w_ref + c / k, 0.0, w_max))
    if c > 0:
        return w_max
    return 0.0 if c < 0 else w_ref


def inhibitory_drift(cfg: dict, rate_pre_hz: float, rate_post_hz: float,
                     lagged_hz: tuple[float, float] | None = None) -> float:
    """Mean I->E weight drift (g_leak/s) of inhibitory STDP for independent Poisson pre (I) and post (E) trains.

    Rate form of the rule in :mod:`capsweep.runners.rules` (Vogels et al. 2011, Science 334:1569): a pre
    spike adds ``eta (z_exc - alpha)``, a post spike ``eta z_inh``, with ``alpha = 2 rho0 tau`` and traces
    of the other side's spikes (each update reads the trace of the other cell, so its own increment does
    not enter). For independent Poisson trains E[z_exc] = r_post tau and E[z_inh] = r_pre tau, hence
    [derived]::

        dw/dt = eta r_pre (r_post tau - alpha) + eta r_post r_pre tau = 2 eta tau r_pre (r_post - rho0)

    which vanishes at the target rate r_post = rho0 (Vogels et al. 2011, supplementary eq. for the rate
    form). ``lagged_hz``: (pre, post) rates low-passed with the rule's tau, as its traces see them
    (see :class:`Lagged`). 0 when the rule is off.
    """
    inh = cfg["plasticity"]["inhibitory"]
    if not inh["enabled"]:
        return 0.0
    pre_seen, post_seen = lagged_hz or (rate_pre_hz, rate_post_hz)
    tau = inh["tau_ms"] * 1e-3
    return inh["eta"] * tau * (rate_pre_hz * (post_seen - 2.0 * inh["rho0_hz"]) + rate_post_hz * pre_seen)


def linear_drift(cfg: dict, rate_pre_hz: float, rate_post_hz: float, w_ref: float,
                 lagged: Lagged | None = None) -> tuple[float, float]:
    """(c, k) of the E->E drift written as ``c - k (w - w_ref)`` (g_leak/s and 1/s); it is linear in w."""
    c = rule_drift(cfg, rate_pre_hz, rate_post_hz, w_ref, w_ref, lagged)
    return c, c - rule_drift(cfg, rate_pre_hz, rate_post_hz, w_ref + 1.0, w_ref, lagged)


def relax(w: np.ndarray, c: np.ndarray, k: np.ndarray, w_ref: np.ndarray, dt_s: float, w_max: float) -> np.ndarray:
    """Weights (g_leak) after ``dt_s`` seconds of ``dw/dt = c - k (w - w_ref)`` with rates fixed, clipped to [0, w_max].

    Exact: ``w_eq + (w - w_eq) exp(-k dt)`` with ``w_eq = w_ref + c/k`` for k > 0, ``w + c dt`` for k = 0.
    The solution moves monotonically, so clipping at the end equals clipping all along.
    """
    w, c, k, w_ref = (np.asarray(a, dtype=float) for a in (w, c, k, w_ref))
    bounded = k > 0
    w_eq = w_ref + c / np.where(bounded, k, 1.0)
    moved = np.where(bounded, w_eq + (w - w_eq) * np.exp(-np.where(bounded, k, 0.0) * dt_s), w + c * dt_s)
    return np.clip(moved, 0.0, w_max)
