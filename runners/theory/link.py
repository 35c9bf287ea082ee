"""Runaway probability of a point from theory quantities, through a logistic link fitted on a calibration design.

Why a fitted link: the mean field of :mod:`.meanfield` finds no self-sustained assembly state where the
simulated networks hold one (an assembly of 60 cells firing in volleys keeps itself on against an I rate at
which independent Poisson inputs would silence it), and finite-size noise makes the simulated outcome a
matter of chance near the edge: a cued assembly stays on in some replicates and falls back in others, and
the chance grows with every further assembly. A static theory can rank points by how close they are to
that edge, but not say where the edge lies. So the theory supplies quantities that decide the outcome
(:data:`FEATURES`), and one logistic function maps them to the probability that the simulation runs away.
Its coefficients (:data:`INTERCEPT`, :data:`WEIGHTS`) are the only constants of the prescreen fitted to
simulations: by maximum likelihood, with each weight's sign fixed by physics (:data:`SIGNS`), on a scrambled
Sobol design over a box around the demo network (:data:`CALIBRATION_BOX` and :data:`CALIBRATION_HELD`;
``benchmarks/calibrate_prescreen.py`` draws the design from them), never on the region sweeps the prescreen is
validated on. Outside that box the link extrapolates: :func:`outside_calibration` says where a point leaves it.

Features (rates from the mean field at the point's initial weights; T = ``detection.runaway_hold_s +
detection.smoothing_s``, the time the runaway detector needs; weight changes are relative to the initial
weight and compressed by arcsinh so that runaway-fast rules do not dominate the fit):

- ``completion``: log of the uncued members' rate during a cue over their background rate (how far the
  cued half drags the rest of its assembly along);
- ``excitability_after``: the most an assembly's members return of their own rate, max over x >= the active
  threshold of Phi(x) / x (Phi: the members' output when clamped at x, every other group solved), with the
  within-assembly weight the rule reaches after T at the cue's rates (1: a self-sustained state exists);
- ``potentiation_active``: that change of the within-assembly weight (:func:`.drift.linear_drift`,
  heterosynaptic and transmitter-induced terms included, clipped at ``plasticity.triplet.w_max``);
- ``relaxation_active``: arcsinh of k T, with k (1/s) the rate at which the rule pulls a within-assembly weight
  back to its reference at the cue's rates (the heterosynaptic term);
- ``inhibition_active``: relative rise of the I->E weight onto cued members over T at the cue's rates
  (:func:`.drift.inhibitory_drift`), limited by the cap ``plasticity.inhibitory.w_max``;
- ``log_count``: log of the number of assemblies (each is cued in every test, each can ignite);
- ``log_hold``: log of the hold duration in s (time for a spontaneous ignition).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
from scipy import optimize

from ...registry import flatten
from ..metrics import active_threshold
from .drift import inhibitory_drift, linear_drift, relax
from .meanfield import TransferCurve, initial_weights, population_rates

CALIBRATION_BOX: dict[str, tuple[float, float]] = {
    "n_exc": (200.0, 400.0),
    "size_fraction": (0.12, 0.25),
    "count": (1.0, 6.999),
    "prewire_gain": (2.0, 6.0),
    "log10_beta": (-2.0, 0.5),
    "log10_a_ltp": (-2.3, -1.3),
    "log10_eta": (-4.5, -2.0),
    "inhibitory_cap_ratio": (0.8, 3.0),
    "hold_s": (3.0, 10.0),
}
"""Range of each design variable of the link's calibration design (uniform in the stated units; the counts are
whole, 1-6). Variables of a point (:func:`design_values`): network.n_exc; assemblies.size / network.n_exc;
assemblies.count; assemblies.prewire_gain; log10 of plasticity.heterosynaptic.beta (heterosynaptic term on),
plasticity.triplet.a_ltp, plasticity.inhibitory.eta (inhibitory STDP on); plasticity.inhibitory.w_max /
network.w_i_to_e (inhibitory STDP on); protocol.hold_s."""
CALIBRATION_HELD: dict[str, object] = {
    "assemblies.imprint": "prewired",
    "assemblies.overlap": "disjoint",
    "plasticity.heterosynaptic.w_ref_mode": "fixed",
    "plasticity.triplet.enabled": True,
}
"""Settings every design point had. Besides: plasticity.triplet.b_ltd = a_ltp / 5, and the heterosynaptic and
transmitter-induced terms on or off together; every other key at its registry default."""
LTD_PER_LTP = 0.2
"""plasticity.triplet.b_ltd / a_ltp of every design point."""

FEATURES = ("completion", "excitability_after", "potentiation_active", "relaxation_active", "inhibition_active",
            "log_count", "log_hold")
"""Names of the link's inputs, in the order of :func:`features`."""

SIGNS = {"completion": 1, "excitability_after": 1, "potentiation_active": 1, "relaxation_active": -1,
         "inhibition_active": -1, "log_count": 1, "log_hold": 1}
"""Direction in which each feature moves a point towards runaway (physics, not fitted): the fit keeps each weight's
sign, so that no feature can stand in, with the opposite sign, for another one it happens to go with in the
design (without it the hold's potentiation came out stabilising, standing in for the heterosynaptic term)."""

RUNAWAY_AT = 0.5
"""Runaway chance from which the prescreen predicts a runaway: the more likely outcome."""

INTERCEPT = -6.585
WEIGHTS = {"completion": 1.0584, "excitability_after": 1.9143, "potentiation_active": 1.0183,
           "relaxation_active": -0.2015, "inhibition_active": -22.6348, "log_count": 1.1624, "log_hold": 0.7563}
"""Link coefficients (per feature unit), fitted on 4 December 2026 by ``benchmarks/calibrate_prescreen.py``: 512
design points, each simulated once (254 ran away); agreement 83.4 % in sample, 81.8 % in 8-fold cross-validation.
Standardised (times each feature's spread over the design): completion 0.91, excitability_after 1.09,
potentiation_active 0.47, relaxation_active -0.49, inhibition_active -2.74, log_count 0.66, log_hold 0.25."""


def _moved(cfg: dict, pre_hz: float, post_hz: float, w: float, duration_s: float) -> float:
    """E->E weight (g_leak) that starts at ``w`` (its reference) after ``duration_s`` at these rates."""
    c, k = linear_drift(cfg, pre_hz, post_hz, w)
    return float(relax(np.array(w), np.array(c), np.array(k), np.array(w), duration_s,
                       cfg["plasticity"]["triplet"]["w_max"]))


def _inhibition_rise(cfg: dict, pre_hz: float, post_hz: float, duration_s: float) -> float:
    """arcsinh of the relative rise of the I->E weight after ``duration_s`` at these rates, within [0, w_max]."""
    inh, w = cfg["plasticity"]["inhibitory"], cfg["network"]["w_i_to_e"]
    if not inh["enabled"] or w <= 0:
        return 0.0
    start = min(w, inh["w_max"])
    moved = float(np.clip(start + inhibitory_drift(cfg, pre_hz, post_hz) * duration_s, 0.0, inh["w_max"]))
    return math.asinh((moved - start) / w)


def design_values(cfg: dict) -> dict[str, float]:
    """The point's value of each :data:`CALIBRATION_BOX` variable that applies to it (a switched-off term has none)."""
    net, pl = cfg["network"], cfg["plasticity"]
    inh = pl["inhibitory"]
    values = {"n_exc": net["n_exc"], "size_fraction": cfg["assemblies"]["size"] / net["n_exc"],
              "count": cfg["assemblies"]["count"], "prewire_gain": cfg["assemblies"]["prewire_gain"],
              "log10_a_ltp": _log10(pl["triplet"]["a_ltp"]), "hold_s": cfg["protocol"]["hold_s"]}
    if pl["heterosynaptic"]["enabled"]:
        values["log10_beta"] = _log10(pl["heterosynaptic"]["beta"])
    if inh["enabled"]:
        values["log10_eta"] = _log10(inh["eta"])
        values["inhibitory_cap_ratio"] = inh["w_max"] / net["w_i_to_e"] if net["w_i_to_e"] > 0 else math.inf
    return values


def _log10(x: float) -> float:
    return math.log10(x) if x > 0 else -math.inf


def outside_calibration(cfg: dict) -> str:
    """Where the point ``cfg`` leaves the link's calibration design, in words ('' inside; see the module).

    A point without assemblies is inside: its runaway chance is 0 without the link.
    """
    if not cfg["assemblies"]["count"]:
        return ""
    reasons = [f"{name} {value:.3g} not in {lo:g}-{hi:g}" for name, value in design_values(cfg).items()
               for lo, hi in [CALIBRATION_BOX[name]] if not lo <= value <= hi]
    flat = flatten(cfg)
    reasons += [f"{key} = {flat[key]!r}, not {held!r}" for key, held in CALIBRATION_HELD.items() if flat[key] != held]
    a_ltp, b_ltd = flat["plasticity.triplet.a_ltp"], flat["plasticity.triplet.b_ltd"]
    if not math.isclose(b_ltd, LTD_PER_LTP * a_ltp, rel_tol=1e-3):
        reasons.append(f"plasticity.triplet.b_ltd = {b_ltd:g}, not a_ltp x {LTD_PER_LTP:g}")
    if flat["plasticity.heterosynaptic.enabled"] != flat["plasticity.transmitter.enabled"]:
        reasons.append("heterosynaptic and transmitter-induced terms not switched on or off together")
    return "; ".join(reasons)


def runaway_chance(cfg: dict) -> float:
    """Probability that the point described by ``cfg`` runs away in simulation; 0 without assemblies."""
    return float(runaway_probability(features(cfg))) if cfg["assemblies"]["count"] else 0.0


def features(cfg: dict) -> np.ndarray:
    """The link's inputs for one point with at least one assembly (see the module and :data:`FEATURES`)."""
    det, count = cfg["detection"], cfg["assemblies"]["count"]
    pr = population_rates(cfg)
    cue, rest = pr.cue or pr.background, pr.background
    on = active_threshold(det, pr.background_exc_hz)
    window = det["runaway_hold_s"] + det["smoothing_s"]
    start = initial_weights(cfg)
    w = start.within
    after = _moved(cfg, cue["C"], cue["C"], w, window)
    curve = population_rates(cfg, replace(start, within=after), with_cue=False).assembly_curve
    hold = cfg["protocol"]["hold_s"]
    return np.array([
        math.log(max(cue["U"], 1e-3) / max(rest["U"], 1e-3)),
        _excitability(curve, on) if curve is not None else 0.0,
        math.asinh((after - w) / w) if w > 0 else 0.0,
        math.asinh(linear_drift(cfg, cue["C"], cue["C"], w)[1] * window),
        _inhibition_rise(cfg, cue["I"], cue["C"], window),
        math.log(count),
        math.log(max(hold, 0.1)),
    ])


def _excitability(curve: TransferCurve, on_hz: float) -> float:
    """Largest output / input rate ratio of an assembly transfer curve at inputs >= ``on_hz`` (Hz); 0 if none."""
    above = curve.input_hz >= on_hz
    return float(np.max(curve.output_hz[above] / curve.input_hz[above])) if above.any() else 0.0


def runaway_probability(x: np.ndarray, coef: np.ndarray | None = None) -> np.ndarray:
    """Logistic link: probability of a simulated runaway for feature rows ``x`` (coef: intercept, then weights)."""
    c = np.array([INTERCEPT, *(WEIGHTS[f] for f in FEATURES)]) if coef is None else coef
    return 1.0 / (1.0 + np.exp(-(c[0] + np.asarray(x) @ c[1:])))


def fit_logistic(x: np.ndarray, y: np.ndarray, signs: np.ndarray | None = None, ridge: float = 1e-2) -> np.ndarray:
    """Maximum-likelihood logistic coefficients (intercept first) with a small ridge on the standardised weights.

    ``signs`` (+1, -1 or 0 per column): each weight is kept >= 0, <= 0 or left free. The ridge (0.01 per
    standardised weight) only keeps the fit finite when a design separates perfectly.
    """
    mean, sd = x.mean(axis=0), np.where(x.std(axis=0) > 0, x.std(axis=0), 1.0)
    z = (x - mean) / sd

    def loss(c: np.ndarray) -> tuple[float, np.ndarray]:
        eta = c[0] + z @ c[1:]
        p = 1.0 / (1.0 + np.exp(-eta))
        nll = float(np.sum(np.logaddexp(0.0, eta) - y * eta) + ridge * np.sum(c[1:] ** 2))
        grad = np.concatenate([[np.sum(p - y)], z.T @ (p - y) + 2 * ridge * c[1:]])
        return nll, grad

    bounds = [(None, None)] + [(0.0, None) if sg > 0 else (None, 0.0) if sg < 0 else (None, None)
                               for sg in (np.zeros(x.shape[1]) if signs is None else signs)]
    c = optimize.minimize(loss, np.zeros(x.shape[1] + 1), jac=True, method="L-BFGS-B", bounds=bounds).x
    weights = c[1:] / sd
    return np.concatenate([[c[0] - float(weights @ mean)], weights])

