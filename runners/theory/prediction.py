"""The prescreen's verdict for one point: outcome, recall state, boundedness of high rates.

Rates in Hz, weights in g_leak.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ...flags import OUTCOMES
from ..metrics import active_threshold, runaway_threshold
from .drift import bcm_threshold_hz, drift_zero_crossings, rule_drift, weight_equilibrium
from .meanfield import FixedPoint, PopulationRates, Weights, initial_weights, max_rate, population_rates

STABLE, RUNAWAY, SILENT = OUTCOMES[:3]
"""Outcome labels of :data:`capsweep.flags.OUTCOMES` (their positions are stored integers, so fixed)."""


@dataclass(frozen=True)
class Prediction:
    """Theory prescreen verdict for one point."""

    outcome: str  # one of capsweep.flags.OUTCOMES
    recall_state_exists: bool  # self-sustained active assembly state at the initial weights
    high_rate_bounded: bool  # plasticity keeps a high-rate state from growing without bound
    background_rate_hz: float  # mean E rate of the background state, initial weights
    assembly_rate_hz: float  # member rate of the self-sustained state at initial weights (NaN if none)
    drift_zero_crossings_hz: list[float]  # of assembly synapses at w_max, pre at the member background rate
    reasons: str
    runaway_threshold_hz: float = math.nan
    cued_rate_hz: float = math.nan  # cued members during a cue, initial weights
    uncued_member_rate_hz: float = math.nan  # uncued members during a cue (pattern completion)
    end_within_weight: float = math.nan  # assembly weight plasticity drives toward (g_leak)
    end_assembly_exc_hz: float = math.nan  # population E rate with the focal assembly active at the end weights


def _end_within_weight(cfg: dict, weights: Weights, drive_hz: float, istdp_cap: bool,
                       active_hz: float) -> tuple[float, FixedPoint | None, float]:
    """Joint (rate, weight) equilibrium of an assembly pushed into activity at ``drive_hz``.

    Start from the weight the rule settles at with members firing at ``drive_hz`` (a cue), then
    alternate: self-sustained state at that weight -> weight equilibrium at that state's rate.
    Returns (weight, active state or None, its population E rate).
    """
    w_ref = weights.within
    w = weight_equilibrium(cfg, drive_hz, drive_hz, w_ref)
    active, exc = None, math.nan
    for _ in range(3):
        trial = _with_within(cfg, weights, w, istdp_cap)
        rates = population_rates(cfg, trial, with_cue=False, active_hz=active_hz)
        active, exc = rates.assembly, rates.assembly_exc_hz
        if active is None:
            break
        w_next = weight_equilibrium(cfg, active.rate_hz, active.rate_hz, w_ref)
        if abs(w_next - w) < 1e-3 * max(w, 1e-6):
            break
        w = w_next
    return w, active, exc


def _with_within(cfg: dict, weights: Weights, within: float, istdp_cap: bool) -> Weights:
    """Weights with the assembly weight set, and I->E onto members at the iSTDP cap if asked."""
    i_to_e = dict(weights.i_to_e)
    if istdp_cap:
        cap = cfg["plasticity"]["inhibitory"]["w_max"]
        i_to_e.update({g: max(cap, i_to_e[g]) for g in ("C", "U", "B")})
    return replace(weights, within=within, i_to_e=i_to_e)


@dataclass
class _Reasoning:
    """What the steps of :func:`predict` have established so far."""

    start: PopulationRates  # states at the initial weights
    threshold_hz: float  # runaway threshold
    weights: Weights  # end weights so far
    rule_bounded: bool  # the E->E drift turns negative at high post rates
    istdp: bool  # inhibitory STDP is on with eta > 0
    reasons: list[str]
    w_end: float = math.nan  # assembly weight at the end
    high_exc_hz: float = math.nan  # population E rate of the worst high-rate state found
    held_by_istdp: bool = False


def _start(cfg: dict) -> _Reasoning:
    """Step 2: the background at the initial weights (which step 1 reads) and the runaway threshold it implies."""
    p = cfg["plasticity"]
    w0 = initial_weights(cfg)
    start = population_rates(cfg, w0)
    bg = start.background_exc_hz
    threshold = runaway_threshold(cfg["detection"], bg)
    top = 0.97 * max_rate(cfg, True)
    reasons = [f"background E {bg:.2f} Hz, I {start.background['I']:.2f} Hz; runaway threshold "
               f"{threshold:.1f} Hz; BCM-like threshold {bcm_threshold_hz(cfg):.2f} Hz"]
    return _Reasoning(start, threshold, w0, rule_drift(cfg, top, top, p["triplet"]["w_max"], w0.within) < 0.0,
                      p["inhibitory"]["enabled"] and p["inhibitory"]["eta"] > 0, reasons, w_end=w0.within)


def _common(cfg: dict, r: _Reasoning) -> dict[str, Any]:
    """The Prediction fields every outcome reports: states at the initial weights and the threshold."""
    start, bg = r.start, r.start.background_exc_hz
    member_bg = start.background["U"] if start.assembly_curve is not None else bg
    return dict(
        recall_state_exists=start.assembly is not None, background_rate_hz=bg,
        assembly_rate_hz=start.assembly.rate_hz if start.assembly else math.nan,
        drift_zero_crossings_hz=drift_zero_crossings(cfg, member_bg, cfg["plasticity"]["triplet"]["w_max"],
                                                     r.weights.within),
        runaway_threshold_hz=r.threshold_hz,
        cued_rate_hz=start.cue["C"] if start.cue else math.nan,
        uncued_member_rate_hz=start.cue["U"] if start.cue else math.nan)


def _silent(cfg: dict, r: _Reasoning, common: dict[str, Any]) -> Prediction | None:
    """Step 1: silent when the background E rate is below ``detection.silence_hz``, else None."""
    silence_hz = cfg["detection"]["silence_hz"]
    if not r.start.background_exc_hz < silence_hz:
        return None
    r.reasons.append(f"background below silence threshold {silence_hz} Hz")
    return Prediction(SILENT, high_rate_bounded=True, reasons="; ".join(r.reasons), **common)


def _network_wide_growth(cfg: dict, r: _Reasoning) -> None:
    """Step 5 (needed first by step 3): unbounded positive drift at background rates sends every weight to w_max."""
    bg, w_max = r.start.background_exc_hz, cfg["plasticity"]["triplet"]["w_max"]
    if weight_equilibrium(cfg, bg, bg, r.weights.between) >= w_max and not r.rule_bounded:
        r.weights = replace(r.weights, between=w_max)
        r.reasons.append("drift at background rates is positive and unbounded: all E->E weights go to w_max")


def _assembly_under_plasticity(cfg: dict, r: _Reasoning) -> None:
    """Steps 3-4: the assembly weight the cue drives, and the self-sustained state it supports."""
    if r.start.cue is None:
        return
    drive, active_hz = r.start.cue["C"], active_threshold(cfg["detection"], r.start.background_exc_hz)
    r.w_end, active, r.high_exc_hz = _end_within_weight(cfg, r.weights, drive, r.istdp, active_hz)
    r.reasons.append(f"assembly weight -> {r.w_end:.3f} (from {r.weights.within:.3f}) "
                     f"after cue at {drive:.1f} Hz")
    if active is None:
        r.reasons.append("no self-sustained assembly state at that weight")
    else:
        r.reasons.append(f"self-sustained assembly state {active.rate_hz:.1f} Hz, E mean {r.high_exc_hz:.2f} Hz")
    if r.istdp and active is not None and r.high_exc_hz <= r.threshold_hz:
        r.held_by_istdp = True


def _background_at_end_weights(cfg: dict, r: _Reasoning) -> None:
    """Step 5: with every weight at w_max, the background state at the end weights."""
    if r.weights.between != cfg["plasticity"]["triplet"]["w_max"]:
        return
    active_hz = active_threshold(cfg["detection"], r.start.background_exc_hz)
    end = population_rates(cfg, _with_within(cfg, r.weights, r.w_end, r.istdp), with_cue=False, active_hz=active_hz)
    r.high_exc_hz = float(np.nanmax([r.high_exc_hz, end.background_exc_hz]))
    r.reasons.append(f"background at w_max: E {end.background_exc_hz:.2f} Hz")


def _verdict(cfg: dict, r: _Reasoning, common: dict[str, Any]) -> Prediction:
    """Step 6: runaway if a high-rate state exceeds the threshold, else stable."""
    if r.istdp and not (r.high_exc_hz > r.threshold_hz):
        r.held_by_istdp = True
    bounded = r.rule_bounded or r.held_by_istdp or not (r.high_exc_hz > r.threshold_hz)
    if r.rule_bounded:
        r.reasons.append("drift turns negative at high post rates (heterosynaptic term)")
    if r.held_by_istdp:
        rho0 = cfg["plasticity"]["inhibitory"]["rho0_hz"]
        r.reasons.append(f"inhibitory STDP can hold members near rho0 = {rho0} Hz")
    outcome = RUNAWAY if r.high_exc_hz > r.threshold_hz else STABLE
    return Prediction(outcome, high_rate_bounded=bounded, reasons="; ".join(r.reasons), end_within_weight=r.w_end,
                      end_assembly_exc_hz=r.high_exc_hz, **common)


def predict(cfg: dict) -> Prediction:
    """Predict a point's outcome (stable | runaway | silent) from mean-field theory.

    Reasoning, in order:

    1. Silent: the background fixed point at the initial weights has a mean E rate below
       ``detection.silence_hz``.
    2. Runaway threshold: max(runaway_factor x background rate, runaway_floor_hz), as the
       simulation's detector uses it.
    3. Assembly weights under plasticity (plasticity never switches off; every assembly is
       cued, so members are driven to the cue rate): the E->E rule drives the within weight to
       its equilibrium at that rate (:func:`weight_equilibrium`). Without a heterosynaptic term
       (or with beta = 0) the triplet rule potentiates without bound above its BCM-like
       threshold, so the weight goes to w_max; with the heterosynaptic term on, the drift for
       w > w_ref turns negative at high post rates and the weight settles at a finite value.
       The weight is then iterated with the rate of the self-sustained state it supports.
    4. Inhibitory STDP (Vogels et al. 2011, Science 334:1569; if on, eta > 0) raises I->E
       weights onto over-active cells until they fire at rho0; it can at most reach its cap,
       so the check uses I->E onto members at max(initial, w_max of the inhibitory rule).
    5. Network-wide growth: if the rule has no bound and its drift at the background rates is
       positive, every E->E weight goes to w_max; the background state is re-solved there.
    6. Runaway if, at those end weights, a stable self-sustained state exists whose population
       E rate exceeds the threshold (one assembly active), or the background itself does;
       otherwise stable. ``high_rate_bounded`` says whether the rule or inhibitory STDP holds
       high rates in check.

    Limitations: spike correlations (which add STDP potentiation inside active assemblies) and
    the time it takes plasticity to act are ignored; assemblies are treated as disjoint.
    """
    r = _start(cfg)
    common = _common(cfg, r)
    silent = _silent(cfg, r, common)
    if silent is not None:
        return silent
    _network_wide_growth(cfg, r)
    _assembly_under_plasticity(cfg, r)
    _background_at_end_weights(cfg, r)
    return _verdict(cfg, r, common)
