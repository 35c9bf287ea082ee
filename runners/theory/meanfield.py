"""Network mean field: populations C, U, B, O, I, their self-consistent rates, transfer curves, fixed points.

Rates in Hz, weights in g_leak.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from ..metrics import active_threshold
from .drift import sign_changes
from .transfer import Input, cell_rate

E_GROUPS = ("C", "U", "B", "O")
"""Excitatory groups: cued / uncued members of the focal assembly, other members, non-members."""


MEMBERS = ("C", "U", "B")
"""Groups of assembly members (C and U: the focal assembly; B: the other assemblies)."""


@dataclass(frozen=True)
class Weights:
    """Synaptic weights (g_leak) the mean field uses, per E->E pathway; I->E per E group (inhibitory STDP)."""

    within: float  # E->E inside the focal assembly
    between: float  # E->E among non-members
    e_to_i: float
    i_to_i: float
    i_to_e: dict[str, float] = field(default_factory=dict)  # E group -> weight
    within_other: float = math.nan  # inside each other assembly (NaN: as ``within``)
    into: float = math.nan  # non-member -> member (NaN: as ``between``)
    out: float = math.nan  # member -> non-member (NaN: as ``between``)
    across: float = math.nan  # member -> member of another assembly (NaN: as ``between``)
    focal: dict[tuple[str, str], float] = field(default_factory=dict)  # (pre, post) in C/U -> weight (else within)

    def ee(self, pre: str, post: str) -> float:
        """E->E weight from a cell of group ``pre`` to one of group ``post`` (not the same assembly unless both
        are focal groups; a B cell's own assembly is :meth:`own_other`)."""
        if pre in ("C", "U") and post in ("C", "U"):
            return self.focal.get((pre, post), self.within)
        if pre == "O" and post == "O":
            return self.between
        chosen = self.into if pre == "O" else self.out if post == "O" else self.across
        return self.between if math.isnan(chosen) else chosen

    def own_other(self) -> float:
        """Weight inside a B cell's own assembly."""
        return self.within if math.isnan(self.within_other) else self.within_other


def initial_weights(cfg: dict) -> Weights:
    """Weights at the start of a run: prewired assemblies at prewire_gain x w_e_to_e, every other E->E at w_e_to_e."""
    net, asm = cfg["network"], cfg["assemblies"]
    gain = asm["prewire_gain"] if asm["imprint"] == "prewired" else 1.0
    w = net["w_e_to_e"]
    return Weights(within=gain * w, between=w, e_to_i=net["w_e_to_i"], i_to_i=net["w_i_to_i"],
                   i_to_e={g: net["w_i_to_e"] for g in E_GROUPS}, within_other=gain * w, into=w, out=w, across=w)


def group_fractions(cfg: dict, cued: float = 0.0) -> dict[str, float]:
    """Fraction of the E cells in each group, the fraction ``cued`` of the focal assembly in group C.

    Disjoint assemblies are capped at n_exc. With ``assemblies.overlap = "random"`` the union of
    ``count`` independent draws of ``size`` cells covers ``1 - (1 - size/n)^count`` of the cells, so the
    other assemblies add only the part of that union outside the focal assembly.
    """
    net, asm = cfg["network"], cfg["assemblies"]
    n = net["n_exc"]
    f = min(asm["size"], n) / n if asm["count"] > 0 else 0.0
    if asm["overlap"] == "random":
        union = 1.0 - (1.0 - f) ** asm["count"] if asm["count"] > 0 else 0.0
        f_other = max(union - f, 0.0)
    else:
        f_other = min(max(asm["count"] - 1, 0) * f, 1.0 - f)
    return {"C": cued * f, "U": (1.0 - cued) * f, "B": f_other, "O": max(1.0 - f - f_other, 0.0)}


@dataclass(frozen=True)
class Scenario:
    """What the mean field is asked about: weights, group sizes and the extra Poisson input onto group C."""

    weights: Weights
    fractions: dict[str, float]
    stimulus: tuple[float, float] | None = None  # (weight in g_leak, rate in Hz) of one input per target cell
    targets: tuple[str, ...] = ("C",)  # groups the stimulus reaches


def _inputs(cfg: dict, sc: Scenario, target: str, rates: dict[str, float]) -> list[Input]:
    """Poisson inputs onto one cell of group ``target`` ("I" or an E group) at the given rates."""
    net = cfg["network"]
    k_e, k_i, w = net["indegree_exc"], net["indegree_inh"], sc.weights
    if target == "I":
        ins = [Input(net["drive_inputs"], net["drive_weight"], net["drive_rate_inh_hz"], True)]
        ins += [Input(k_e * sc.fractions[g], w.e_to_i, rates[g], True) for g in E_GROUPS]
        ins.append(Input(k_i, w.i_to_i, rates["I"], False))
        return ins
    ins = [Input(net["drive_inputs"], net["drive_weight"], net["drive_rate_exc_hz"], True)]
    if target in sc.targets and sc.stimulus is not None:
        ins.append(Input(1.0, sc.stimulus[0], sc.stimulus[1], True))
    size_frac = sc.fractions["C"] + sc.fractions["U"]
    for g in E_GROUPS:
        frac = sc.fractions[g]
        if target == "B" and g == "B":  # a B cell's own assembly is one of the other assemblies
            own = min(size_frac, frac)
            ins.append(Input(k_e * own, w.own_other(), rates[g], True))
            frac -= own
        ins.append(Input(k_e * frac, w.ee(g, target), rates[g], True))
    ins.append(Input(k_i, w.i_to_e[target], rates["I"], False))
    return ins


def cue_stimulus(cfg: dict) -> tuple[float, float]:
    """(weight in g_leak, rate in Hz) of the cue input each cued cell receives."""
    pr = cfg["protocol"]
    return pr["cue_weight"], pr["cue_rate_hz"]


def group_rate(cfg: dict, sc: Scenario, target: str, rates: dict[str, float]) -> float:
    """Output rate (Hz) of one cell of group ``target`` given all presynaptic group rates."""
    return cell_rate(cfg, _inputs(cfg, sc, target, rates), excitatory=(target != "I"))


def max_rate(cfg: dict, excitatory: bool) -> float:
    net = cfg["network"]
    t_ref = (net["refractory_exc_ms"] if excitatory else net["refractory_inh_ms"]) * 1e-3
    return 1.0 / t_ref if t_ref > 0 else 1000.0


def _solve_inh(cfg: dict, sc: Scenario, rates: dict[str, float]) -> float:
    """Self-consistent I rate (Hz) for fixed E rates: unique, since I->I only inhibits.

    The root is bracketed first within 10 % of ``rates["I"]`` (the previous iterate), else over the whole range.
    """
    top = max_rate(cfg, False) * 0.999
    f = lambda r: group_rate(cfg, sc, "I", {**rates, "I": r}) - r
    guess = rates.get("I", 0.0)
    if 0.0 < guess < top:
        lo, hi = 0.9 * guess, min(1.1 * guess, top)
        if f(lo) > 0.0 > f(hi):
            return float(optimize.brentq(f, lo, hi, xtol=1e-6))
    if f(0.0) <= 0.0:
        return 0.0
    return float(optimize.brentq(f, 0.0, top, xtol=1e-6))


def solve_rates(cfg: dict, sc: Scenario, clamp: dict[str, float], start: dict[str, float],
                iterations: int = 400, damping: float = 0.5, tol_hz: float = 1e-4) -> dict[str, float]:
    """Self-consistent rates (Hz) of every group, with the groups in ``clamp`` held fixed.

    The I rate is solved exactly for each E state; free E groups follow a damped fixed-point
    iteration from ``start``, which converges to the fixed point that ``start`` lies in the
    basin of (start low for the background state).
    """
    rates = {**start, **clamp}
    free = [g for g in E_GROUPS if g not in clamp and sc.fractions[g] > 0]
    for _ in range(iterations):
        rates["I"] = _solve_inh(cfg, sc, rates)
        new = {g: group_rate(cfg, sc, g, rates) for g in free}
        step = max((abs(new[g] - rates[g]) for g in free), default=0.0)
        for g in free:
            rates[g] += damping * (new[g] - rates[g])
        if step < tol_hz:
            break
    rates["I"] = _solve_inh(cfg, sc, rates)
    return rates


@dataclass(frozen=True)
class FixedPoint:
    """A crossing of a rate transfer curve with the identity."""

    rate_hz: float  # input = output rate of the swept group
    slope: float  # d(output)/d(input) at the crossing
    stable: bool  # slope < 1
    rates: dict[str, float]  # all group rates at the crossing


@dataclass(frozen=True)
class TransferCurve:
    """Output rate of a group as a function of its own (clamped) presynaptic rate."""

    input_hz: np.ndarray
    output_hz: np.ndarray
    fixed_points: list[FixedPoint]


def _rate_grid(top_hz: float, n: int = 36) -> np.ndarray:
    """Input rates (Hz) from 0 to top_hz, denser at low rates where background states live."""
    return top_hz * np.linspace(0.0, 1.0, n) ** 2


def transfer_curve(cfg: dict, sc: Scenario, swept: tuple[str, ...], readout: str,
                   start: dict[str, float], top_hz: float | None = None) -> TransferCurve:
    """Transfer curve: clamp the groups in ``swept`` at x, solve the others, read ``readout``.

    Fixed points are the sign changes of output - x, refined with brentq; stability is
    slope < 1 (a central difference of the curve), the standard one-population criterion.
    """
    top = top_hz or 0.97 * max_rate(cfg, True)
    grid = _rate_grid(top)
    states: dict[float, dict[str, float]] = {}

    def state(x: float) -> dict[str, float]:
        if x not in states:
            near = min(states, key=lambda y: abs(y - x)) if states else None
            seed = states[near] if near is not None else start
            states[x] = solve_rates(cfg, sc, {g: x for g in swept}, seed)
        return states[x]

    def out(x: float) -> float:
        return group_rate(cfg, sc, readout, state(x))

    return _curve(grid, out, lambda x: {**state(x), readout: x})


def _curve(grid: np.ndarray, out: Callable[[float], float],
           rates_at: Callable[[float], dict[str, float]]) -> TransferCurve:
    """Evaluate ``out`` on ``grid``; fixed points where out(x) = x, slope by central difference.

    With no crossing (output 0 everywhere, a silent network) the fixed point is at out(0).
    """
    values = np.array([out(x) for x in grid])
    fps = []
    for x in sign_changes(lambda x: out(x) - x, grid):
        lo, hi = max(x - max(1e-3, 1e-3 * x), 0.0), x + max(1e-3, 1e-3 * x)
        slope = (out(hi) - out(lo)) / (hi - lo)
        fps.append(FixedPoint(x, slope, slope < 1.0, rates_at(x)))
    if not fps:
        fps.append(FixedPoint(float(values[0]), 0.0, True, rates_at(float(values[0]))))
    return TransferCurve(grid, values, fps)


def mean_exc_rate(sc: Scenario, rates: dict[str, float]) -> float:
    """Population-averaged E rate (Hz)."""
    return sum(sc.fractions[g] * rates[g] for g in E_GROUPS)


def background_curve(cfg: dict, weights: Weights, top_hz: float | None = None) -> TransferCurve:
    """Transfer curve of the whole E population (all E groups clamped at x, readout: non-members).

    With assemblies present, the readout is the population mean at the solved I rate; the
    lowest crossing is the background state the simulation's settle phase measures.
    """
    sc = Scenario(weights, group_fractions(cfg))
    return _population_curve(cfg, sc, top_hz)


def _population_curve(cfg: dict, sc: Scenario, top_hz: float | None) -> TransferCurve:
    top = top_hz or 0.97 * max_rate(cfg, True)
    grid = _rate_grid(top)
    groups = [g for g in E_GROUPS if sc.fractions[g] > 0]

    def state(x: float) -> dict[str, float]:
        rates = {g: x for g in E_GROUPS}
        rates["I"] = _solve_inh(cfg, sc, rates)
        return rates

    def out(x: float) -> float:
        rates = state(x)
        return sum(sc.fractions[g] * group_rate(cfg, sc, g, rates) for g in groups)

    def rates_at(x: float) -> dict[str, float]:
        rates = state(x)
        rates.update({g: group_rate(cfg, sc, g, rates) for g in groups})
        return rates

    return _curve(grid, out, rates_at)


def _active_state(curve: TransferCurve, active_hz: float) -> FixedPoint | None:
    """Highest stable crossing whose member rate exceeds ``active_hz`` (the assembly is "on")."""
    high = [f for f in curve.fixed_points if f.stable and f.rate_hz > active_hz]
    return max(high, key=lambda f: f.rate_hz) if high else None


@dataclass(frozen=True)
class PopulationRates:
    """Mean-field states (Hz) of one config at given weights."""

    background: dict[str, float]  # group rates of the background fixed point
    background_exc_hz: float  # population mean E rate there
    background_curve: TransferCurve  # all E clamped at x -> mean E output
    assembly_curve: TransferCurve | None  # focal assembly clamped at x -> member output (no cue)
    assembly: FixedPoint | None  # self-sustained active assembly state, if any
    assembly_exc_hz: float  # population mean E rate in that state (NaN if none)
    cue: dict[str, float] | None  # group rates while half the focal assembly is cued


def population_rates(cfg: dict, weights: Weights | None = None, with_cue: bool = True,
                     active_hz: float | None = None) -> PopulationRates:
    """Background and active-assembly fixed points of ``cfg`` at ``weights`` (initial by default).

    Background: the lowest crossing of the population transfer curve, refined to a state with
    distinct member / non-member rates. Active assembly: the focal assembly's members are
    clamped at x (they receive indegree_exc * size/n_exc inputs at the within weight from
    co-members firing at x), every other group is solved self-consistently, and the members'
    output is compared with x; a stable crossing above an unstable one is a self-sustained
    state when its rate exceeds ``active_hz`` (default: ``capsweep.runners.metrics.active_threshold``
    of this background); it may be the only crossing (a monostable "on" assembly). Cue: the cued
    fraction of the focal assembly gets the cue's extra Poisson input.
    """
    w = weights or initial_weights(cfg)
    sc = Scenario(w, group_fractions(cfg))
    bg_curve = _population_curve(cfg, sc, None)
    background = solve_rates(cfg, sc, {}, sorted(bg_curve.fixed_points, key=lambda f: f.rate_hz)[0].rates)
    asm_curve, active, cue = None, None, None
    if sc.fractions["U"] > 0:
        asm_curve = transfer_curve(cfg, sc, ("U",), "U", background)
        on_hz = active_hz if active_hz is not None else \
            active_threshold(cfg["detection"], mean_exc_rate(sc, background))
        active = _active_state(asm_curve, on_hz)
        if with_cue:
            sc_cue = Scenario(w, group_fractions(cfg, cfg["protocol"]["cue_fraction"]), cue_stimulus(cfg))
            cue = solve_rates(cfg, sc_cue, {}, background)
    active_exc = mean_exc_rate(sc, active.rates) if active else math.nan
    return PopulationRates(background, mean_exc_rate(sc, background), bg_curve, asm_curve, active,
                           active_exc, cue)
